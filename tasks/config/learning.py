"""Sections about the model and its judgement: model, debias, evaluate, gate, probe, publish, retention."""

from __future__ import annotations

from typing import Literal

from pydantic import Field, model_validator

from tasks.config.base import _Section


class ModelConfig(_Section):
    kind: Literal["biased_mf"] = Field("biased_mf", description="Factorisation model; biased MF is the only one today.")
    dim: int = Field(16, ge=1, le=1024, description="Number of latent factors.")
    learning_rate: float = Field(0.02, gt=0.0, le=1.0, description="Adam step size.")
    weight_decay: float = Field(0.2, ge=0.0, description="L2 penalty on the factors and biases of each batch "
                                "(per-example, as in Koren, Bell & Volinsky 2009). Strong enough that training "
                                "converges instead of relying on early stopping, so a warm-started chain of nights "
                                "ends where a fresh fit does (README, 'Long run').")
    batch_size: int = Field(1024, ge=1, description="Ratings per mini-batch.")
    max_epochs: int = Field(40, ge=1, le=10_000, description="Epoch bound for a cold start.")
    finetune_epochs: int = Field(8, ge=1, le=10_000, description="Epoch bound when warm-starting from a checkpoint.")
    patience: int = Field(4, ge=1, description="Early stopping: epochs without validation improvement.")
    init_scale: float = Field(0.05, gt=0.0, le=1.0, description="Std of the random init of new factor rows.")
    seed: int = Field(7, ge=0, description="Seed of every random draw (init, shuffles, reference sampling).")
    threads: int = Field(1, ge=1, le=256, description="torch intra-op threads; part of the reproducibility contract.")
    stop_on: Literal["raw", "corrected"] = Field(
        "corrected", description="What early stopping reads on the probe fitting split: 'corrected' = the MAE of "
        "the served score (the method's post-hoc correction refitted for each round's weights; methods without "
        "one read the raw model); 'raw' = the factoriser's own MAE, before any correction.")
    refit_every: int = Field(0, ge=0, le=10_000, description="Train from scratch (cold) instead of warm-starting "
                             "when the base has this many warm-started nights behind it since its last cold fit "
                             "(0 = never on a schedule).")
    cold_candidate: bool = Field(False, description="On a warm-started night also train a cold model on the same "
                                 "window and keep whichever has the lower probe-fit MAE of the served score (the "
                                 "fitting split, never the gate's held-out one); costs a cold fit every night.")
    keep_base: bool = Field(False, description="A warm start scores its base as round 0 for early stopping, "
                            "so a night whose rounds are all worse keeps the base's weights (new rows as "
                            "initialised) instead of taking at least one round.")


DebiasMethod = Literal[
    "plain",            # squared error on organic ratings only
    "probe_upweight",   # organic + probe training split, probes up-weighted
    "ips",              # inverse propensity weighted squared error (naive Bayes propensities)
    "snips",            # self-normalised IPS
    "recalibrate",      # plain model + monotone map fitted on probe training split
    "calibrated",       # squared error + distribution-calibration term
    "per_user",         # per-user shrunk correction learned from probes (issue: per-user debiasing)
]


class DebiasConfig(_Section):
    method: DebiasMethod = Field("per_user", description="Debiasing method of the candidate (default: the best "
                                 "on the open-data check, bench/open_data.py; numbers in README).")
    calibration_weight: float = Field(1.0, ge=0.0, description="lambda: weight of the distribution-calibration term.")
    profile_points: int = Field(10, ge=2, le=512, description="K: thresholds of the soft CDF (rule of thumb: 10+).")
    profile_sharpness: float = Field(0.1, gt=0.0, description="s: sigmoid temperature of the soft CDF, in rating units.")
    reference_temperature: float = Field(0.3, gt=0.0, description="tau: p_u = exp(-probe_error / tau).")
    reference_p_min: float = Field(0.01, ge=0.0, le=1.0, description="Lower clip of a user's reference probability.")
    reference_p_max: float = Field(0.9, ge=0.0, le=1.0, description="Upper clip of a user's reference probability.")
    shrinkage: float = Field(5.0, ge=0.0, description="m: probe error = (n*mae + m*mean)/(n + m).")
    profile_item_sample: int = Field(256, ge=0, description="Items sampled uniformly per step for the soft CDF "
                                     "(one sample shared by the step's users; an independent one per reference "
                                     "user); 0 = all items (chunked under memory_budget_mb).")
    users_per_step: int = Field(256, ge=1, description="Cap on adjusted users per training step; a round visits "
                                "every adjusted user once, spread evenly over its mini-batches.")
    memory_budget_mb: float = Field(256.0, gt=0.0, description="Cap on the users x items block held at once.")
    max_reference_users: int = Field(1024, ge=0, description="Cap on reference users per round: when more are "
                                     "drawn, a uniform sample of this many is used (redrawn every round). Each "
                                     "adjusted user is compared with every reference user, so without a cap a "
                                     "round costs users x references; 0 = no cap.")
    probe_target_weight: float = Field(0.0, ge=0.0, description="Weight of the probe-rating ECDF as an extra "
                                       "target of the calibration term (0 = reference users only).")
    combine_with: Literal["none", "probe_upweight", "ips", "snips", "recalibrate"] = Field(
        "none", description="Probe-based option applied together with the calibration term (method "
        "'calibrated') or under the per-user correction (method 'per_user'; not 'recalibrate').")
    probe_weight: float = Field(5.0, ge=0.0, description="Weight of a probe rating relative to an organic one "
                                "(probe_upweight).")
    propensity_clip: float = Field(0.05, gt=0.0, le=1.0, description="Lower clip of IPS propensities, relative "
                                   "to the largest propensity.")
    heldout_share: float = Field(0.3, gt=0.0, lt=1.0, description="Share of probe pairs held out for evaluation only "
                                 "(chosen by a hash of user and item).")
    per_user_design: Literal["offset", "skew_offset", "skew_affine"] = Field(
        "skew_affine", description="per_user method: 'offset' = global monotone map + each user's shrunk mean "
        "probe residual; 'skew_offset' = offset predicted from how the user rates organically (skew model), "
        "updated by their own probe ratings; 'skew_affine' = as skew_offset plus a predicted per-user slope.")
    per_user_prior: float = Field(0.0, ge=0.0, description="Pseudo-ratings m shrinking a user's own probe "
                                  "residuals: shift = sum / (n + m). 0 = estimate m from the data (empirical Bayes).")
    per_user_min_probes: int = Field(30, ge=2, description="Fewer probe ratings in the fitting split than this: "
                                     "the skew model is not fitted and the 'offset' design is used.")

    @model_validator(mode="after")
    def _p_range(self) -> "DebiasConfig":
        if self.reference_p_min > self.reference_p_max:
            raise ValueError("debias.reference_p_min must not exceed debias.reference_p_max")
        if self.method == "per_user" and self.combine_with == "recalibrate":
            raise ValueError("debias.combine_with = 'recalibrate' does not combine with method 'per_user', "
                             "which fits its own per-user map (use 'none', 'ips', 'snips' or 'probe_upweight')")
        return self


class EvaluateConfig(_Section):
    bootstrap: int = Field(500, ge=0, le=100_000, description="Bootstrap resamples for confidence intervals.")
    confidence: float = Field(0.9, gt=0.0, lt=1.0, description="Coverage of the bootstrap intervals.")
    skew_margin: float = Field(0.5, ge=0.0, description="Stars: a user whose organic mean exceeds their probe "
                               "mean by more than this is 'skewed up' (less: 'down'; else 'neutral').")


class GateConfig(_Section):
    tolerance_mae: float = Field(0.01, ge=0.0, description="Candidate may be at most this much worse than live.")
    max_segment_regression: float = Field(0.05, ge=0.0, description="No segment's MAE may rise by more than this.")
    min_heldout: int = Field(10, ge=0, description="Fewer held-out probe ratings than this: the gate holds.")
    anchor_nights: int = Field(14, ge=0, description="The anchor is the strongest of this many most recent "
                               "versions that were live (or promoted by the gate), re-scored on tonight's "
                               "held-out probe ratings. 0: no anchor (the candidate is compared with live only).")
    anchor_budget: float = Field(0.01, ge=0.0, description="Cumulative budget: the candidate is held when its "
                                 "held-out MAE is worse than the anchor's, on the same ratings, by more than "
                                 "this, even if it is within gate.tolerance_mae of live. Small steps down add "
                                 "up against it.")
    segments_vs_shadow: Literal["hold", "note"] = Field(
        "hold", description="Every night each segment of the candidate is also compared with the plain shadow "
        "model (gate.max_segment_regression, gate.min_heldout): 'hold' holds a candidate with a segment worse "
        "than doing nothing; 'note' promotes it and names the segment in the gate's reason.")
    hold_on_alert: Literal["off", "warning", "critical"] = Field(
        "off", description="Hold a candidate whose night raised an alert of this severity or worse ('warning' "
        "holds on warnings and critical alerts). 'off': alerts never hold; the held-out probe ratings judge "
        "the candidate whatever the night's selection skew did.")
    require_approval: bool = Field(False, description="A candidate that passes every rule waits as held with "
                                   "the reason 'awaiting approval' until `tarewise approve` makes it live (or "
                                   "`tarewise reject` turns it down); both are recorded in the run ledger.")


class ProbeConfig(_Section):
    """The random probe's budget and plan (`tarewise probe-budget`, `tarewise probe-plan`)."""
    plan_uniform_share: float = Field(0.3, ge=0.0, le=1.0, description="Share of a probe plan's members drawn "
                                      "uniformly at random (the rest are chosen by expected error reduction); it "
                                      "keeps the probe's estimates of the whole population honest.")
    plan_activity_power: float = Field(1.0, ge=0.0, le=2.0, description="How much a member's activity weighs "
                                       "in a probe plan's score: (organic ratings + 1) to this power; 0 = every "
                                       "member's predictions count the same.")
    budget_regression: float = Field(0.02, gt=0.0, description="Regression of the held-out MAE (rating units) "
                                     "the probe budget asks the gate to detect.")
    budget_power: float = Field(0.8, gt=0.0, lt=1.0, description="How often the gate should detect it "
                                "(the probe budget names the nightly count that reaches this).")


class PublishConfig(_Section):
    top_n: int = Field(20, ge=1, le=10_000, description="Predictions per user (unrated items, best first).")


class RetentionConfig(_Section):
    keep_versions: int = Field(10, ge=1, description="Keep this many newest versions (live and pinned always kept).")
    pinned: tuple[str, ...] = Field((), description="Version ids never deleted.")
    quarantine_days: int = Field(90, ge=1, description="Quarantine partitions older than this are deleted.")
    metrics_days: int = Field(365, ge=1, description="Metric rows older than this are dropped.")
