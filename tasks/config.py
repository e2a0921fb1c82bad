"""tarewise configuration: one TOML file, validated once at the edge, passed down typed.

Every key is typed, ranged and documented here; ``configs/example.toml`` shows each with its default.
An unknown key or a bad value raises :class:`ConfigError` naming the key path (``model.dim``) and what
is allowed. Nothing below imports Prefect, so the engine can take these objects directly.
"""

from __future__ import annotations

import datetime
import hashlib
import json
import os
import tomllib
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator


class ConfigError(ValueError):
    """A config file or value is wrong; the message names the key and what is allowed."""


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


#: URI schemes ``pyarrow.fs.FileSystem.from_uri`` understands (pyarrow's filesystem documentation).
SHARED_SCHEMES = ("file", "s3", "gs", "gcs", "hdfs", "viewfs", "abfs", "abfss")


class PathsConfig(_Section):
    logs: str = Field("sample_parquet", description="Where daily logs are read: <logs>/dt=YYYY-MM-DD/*.parquet. "
                      "Local path or pyarrow.fs URI. Overridden by --logs / TAREWISE_LOGS.")
    workspace: str = Field(".tarewise", description="Where tarewise keeps all its state: a local or mounted "
                           "POSIX folder. Overridden by --workspace / TAREWISE_WORKSPACE.")
    shared: str = Field("", description="Optional shared copy of the store, versions and live pointer on an object "
                        "store or another folder: a pyarrow.fs URI (s3://bucket/prefix?region=..., gs://bucket/"
                        "prefix, file:///path) or a path. Brought up to date after every night (live pointer "
                        "last); a new workspace restores from it. Empty: none. Overridden by --shared / "
                        "TAREWISE_SHARED.")

    @model_validator(mode="after")
    def _shared_scheme(self) -> "PathsConfig":
        if "://" in self.shared:
            scheme = self.shared.split("://", 1)[0].lower()
            if scheme not in SHARED_SCHEMES:
                raise ValueError(f"paths.shared = {self.shared!r}: unknown scheme {scheme!r}; use one of "
                                 f"{', '.join(SHARED_SCHEMES)} or a folder path")
        shared, workspace = self.shared.removeprefix("file://"), self.workspace.removeprefix("file://")
        if shared and "://" not in shared and "://" not in workspace:
            from tasks.workspace import overlaps
            if overlaps(shared, workspace):
                raise ValueError(f"paths.shared = {self.shared!r} overlaps paths.workspace = {self.workspace!r}; "
                                 "the shared copy must be a folder outside the workspace")
        return self


class ColumnsConfig(_Section):
    """Names of the input columns in the logs, mapped to tarewise's own names."""
    user_id: str = Field("user_id", min_length=1, description="Column holding the user id (string or integer).")
    item_id: str = Field("item_id", min_length=1, description="Column holding the item id (string or integer).")
    rating: str = Field("rating", min_length=1, description="Column holding the rating (number on the scale).")
    event_time: str = Field("event_time", min_length=1, description="Column holding the event time (UTC).")
    source: str = Field("source", min_length=1, description="Column saying organic or probe.")

    @model_validator(mode="after")
    def _distinct(self) -> "ColumnsConfig":
        # Two keys naming one column pass every row check (user = item on every row): refuse it here.
        seen: dict[str, str] = {}
        for key, column in self:
            if column in seen:
                raise ValueError(f"input.columns.{seen[column]} and input.columns.{key} both name the column "
                                 f"{column!r}; each needs a column of its own")
            seen[column] = key
        return self


class InputConfig(_Section):
    columns: ColumnsConfig = ColumnsConfig()
    organic_label: str = Field("organic", min_length=1, description="`source` value of organic ratings.")
    probe_label: str = Field("probe", min_length=1, description="`source` value of probe ratings.")
    missing_partition: Literal["error", "skip"] = Field(
        "error", description="What a run does when its date's partition is absent.")
    max_rejected_share: float = Field(0.05, ge=0.0, le=1.0,
                                      description="Fail the run before training when more rows than this are rejected.")
    max_future_seconds: int = Field(3_600, ge=0, description="Allowance (s) around the run date: rows whose event_time "
                                    "lies further than this after its end (future) or before its start (wrong-day "
                                    "partition) are quarantined; rows within it are kept (late-flushed events).")
    max_id_length: int = Field(256, ge=1, le=65_536, description="Longer ids are quarantined.")

    @model_validator(mode="after")
    def _labels_differ(self) -> "InputConfig":
        if self.organic_label == self.probe_label:
            raise ValueError("input.organic_label and input.probe_label must differ")
        return self


class ScaleConfig(_Section):
    min: float = Field(1.0, description="Lowest rating on the scale.")
    max: float = Field(5.0, description="Highest rating on the scale.")
    step: float = Field(1.0, ge=0.0, description="Rating step (1 for whole stars); 0 means continuous.")

    @model_validator(mode="after")
    def _ordered(self) -> "ScaleConfig":
        if not self.min < self.max:
            raise ValueError(f"scale.min ({self.min}) must be below scale.max ({self.max})")
        if self.step > 0:
            n = (self.max - self.min) / self.step
            if abs(n - round(n)) > 1e-9:
                raise ValueError("scale.step must divide scale.max - scale.min")
        return self

    @property
    def levels(self) -> list[float]:
        """Allowed rating values when a step is set (else the two ends)."""
        if self.step <= 0:
            return [self.min, self.max]
        n = int(round((self.max - self.min) / self.step))
        return [self.min + k * self.step for k in range(n + 1)]


class WindowConfig(_Section):
    days: int = Field(30, ge=1, le=3650, description="Training uses the stored ratings of this many days up to the run date.")


class ModelConfig(_Section):
    kind: Literal["biased_mf"] = Field("biased_mf", description="Factorisation model; biased MF is the only one today.")
    dim: int = Field(16, ge=1, le=1024, description="Number of latent factors.")
    learning_rate: float = Field(0.02, gt=0.0, le=1.0, description="Adam step size.")
    weight_decay: float = Field(0.02, ge=0.0, description="L2 penalty on the factors and biases of each batch "
                                "(per-example, as in Koren, Bell & Volinsky 2009).")
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
    keep_base: bool = Field(True, description="A warm start scores its base as round 0 for early stopping, "
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


def check_timezone(name: str) -> str:
    """``name`` if it is an IANA time zone name (``Europe/Berlin``, ``UTC``); else ValueError with the
    closest names. Checked with the standard library's ``zoneinfo`` (tz database from the system or the
    ``tzdata`` package)."""
    import difflib
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError, available_timezones

    known = available_timezones()
    try:
        ZoneInfo(name)
        if name in known:
            return name
    except (ZoneInfoNotFoundError, ValueError, OSError):
        pass
    close = [z for z in known if z.lower() == name.lower()] or difflib.get_close_matches(name, known, n=2)
    hint = f"did you mean {' or '.join(repr(z) for z in close)}?" if close else "e.g. 'Europe/Berlin' or 'UTC'"
    raise ValueError(f"{name!r} is not an IANA time zone name; {hint}")


def check_cron(expr: str) -> str:
    """``expr`` if it is a 5-field cron expression (minute hour day-of-month month day-of-week); else
    ValueError saying which field is wrong. Parsed with ``cronsim`` (a cron parser that Prefect's own
    dependencies install); Prefect's schedule (``prefect.schedules.Cron``) reads the same five fields."""
    from cronsim import CronSim, CronSimError

    fields = expr.split()
    example = "e.g. '30 2 * * *' for 02:30 every day"
    if len(fields) != 5:
        raise ValueError(f"{expr!r} has {len(fields)} field(s); a cron schedule has 5 (minute hour "
                         f"day-of-month month day-of-week), {example}")
    try:
        CronSim(expr, datetime.datetime(2026, 1, 1))
    except CronSimError as exc:
        raise ValueError(f"{expr!r} is not a valid cron schedule ({exc}); {example}") from None
    return expr


class RuntimeConfig(_Section):
    timezone: str = Field("UTC", description="IANA zone; 'yesterday' and the schedule use it.")
    schedule: str = Field("30 2 * * *", description="Cron for the nightly deployment (5 fields: minute hour "
                          "day-of-month month day-of-week).")
    shadow: bool = Field(True, description="Train a plain shadow model beside the candidate.")
    runner: Literal["thread", "dask"] = Field("thread", description="Prefect task runner for the parallel parts "
                                             "of a night (files of a partition, blocks of users to score): "
                                             "'thread' = a thread pool in the run's process; 'dask' = "
                                             "prefect-dask (see flows/runners.py).")
    dask_address: str = Field("", description="Existing Dask scheduler address (e.g. tcp://host:8786); empty = "
                              "a local in-process cluster of runtime.workers workers.")
    workers: int = Field(0, ge=0, le=1024, description="Parallel tasks (threads or local Dask workers); 0 = the "
                         "machine's CPU count. Each scoring task holds up to debias.memory_budget_mb.")
    flow_timeout_seconds: int = Field(6 * 3600, ge=60, description="A nightly run taking longer is failed.")
    io_retries: int = Field(2, ge=0, le=20, description="Retries of a task after a transient I/O error.")
    lock_stale_seconds: int = Field(4 * 3600, ge=60, description="A store lock older than this with a dead "
                                    "holder is taken over.")
    min_ratings_to_train: int = Field(1, ge=1, description="Skip training on a date with fewer ratings in the window.")
    lock_wait_seconds: int = Field(1800, ge=0, description="A scheduled or flow-started run (nightly, backfill) "
                                   "waits this long for another run to release the workspace lock, then gives up "
                                   "with one line recorded in the ledger (status 'refused'). `tarewise run` and "
                                   "`backfill` from a terminal are refused at once instead.")
    catch_up: str = Field("all", description="Nights missed since the last done one (serve down, a dropped slot): "
                          "'all' runs them before the scheduled night, oldest first; 'last:N' only the N most "
                          "recent (the older ones are reported as missed in `status` and an alert); 'none' runs "
                          "none (all are reported).")
    catch_up_per_run: int = Field(0, ge=0, description="At most this many nights per scheduled run, oldest first "
                                  "(the scheduled night waits until the backlog is done); 0 = no limit.")
    min_free_mb: int = Field(200, ge=0, description="Commands that write refuse to start when the workspace's disk "
                             "has less free space than this (MB); 0 = no check. A night writes a version (model, "
                             "predictions), store and report files; 200 MB covers the demo many times over "
                             "(common practice, no source): raise it to a few versions' size for real data.")

    @field_validator("timezone")
    @classmethod
    def _zone(cls, v: str) -> str:
        return check_timezone(v)

    @field_validator("schedule")
    @classmethod
    def _cron(cls, v: str) -> str:
        return check_cron(v)

    @field_validator("catch_up")
    @classmethod
    def _catch_up(cls, v: str) -> str:
        v = v.strip().lower()
        if v in ("all", "none"):
            return v
        head, _, n = v.partition(":")
        if head == "last" and n.isdigit() and int(n) >= 1:
            return f"last:{int(n)}"
        raise ValueError(f"{v!r} is not 'all', 'none' or 'last:N' (N >= 1)")

    def catch_up_limit(self) -> int | None:
        """How many missed nights to run: None = all, 0 = none, N for 'last:N'."""
        if self.catch_up == "all":
            return None
        return 0 if self.catch_up == "none" else int(self.catch_up.split(":")[1])


class DriftConfig(_Section):
    baseline_nights: int = Field(14, ge=3, le=365, description="Trailing nights forming the baseline band.")
    min_baseline_nights: int = Field(5, ge=2, description="No skew alerts before this many nights of history.")
    mad_k: float = Field(4.0, gt=0.0, description="Band = median +- k * 1.4826 * MAD.")
    cooldown_nights: int = Field(3, ge=0, description="Same-kind alerts within this many nights fold into one.")
    min_probe_coverage: float = Field(0.005, ge=0.0, le=1.0, description="Alert when the night's share of active "
                                      "users with a probe rating falls below this.")
    max_quarantine_share: float = Field(0.02, ge=0.0, le=1.0, description="Alert above this rejected share.")

    @model_validator(mode="after")
    def _baseline_fits(self) -> "DriftConfig":
        if self.min_baseline_nights > self.baseline_nights:
            raise ValueError("drift.min_baseline_nights must not exceed drift.baseline_nights")
        return self


class AlertsConfig(_Section):
    webhook_url_env: str = Field("TAREWISE_WEBHOOK_URL", description="Environment variable holding the webhook URL "
                                 "(secrets never live in config files).")
    prefect_blocks: tuple[str, ...] = Field((), description="Names of Prefect notification blocks to notify.")
    retries: int = Field(3, ge=0, le=20, description="Delivery retries per receiver before recording a failure.")
    retry_delay_seconds: float = Field(1.0, ge=0.0, description="First retry delay; doubles each retry.")
    timeout_seconds: float = Field(10.0, gt=0.0, description="HTTP timeout of one delivery attempt.")
    backfill_delivery: Literal["record", "send"] = Field(
        "record", description="Alerts of backfill and sweep nights: 'record' keeps them in the history and "
        "report without sending (a replay would page people with stale alerts); 'send' delivers them.")


class LabelsConfig(_Section):
    """Words the report and the alerts use for a deployment's own domain."""
    user: str = Field("user", min_length=1, description="One person who rates, as the report calls them "
                      "(e.g. 'member', 'student', 'customer').")
    users: str = Field("users", min_length=1, description="Plural of labels.user.")
    item: str = Field("item", min_length=1, description="One thing that is rated (e.g. 'title', 'course', 'recipe').")
    items: str = Field("items", min_length=1, description="Plural of labels.item.")
    rating_unit: str = Field("rating points", min_length=1, description="Unit written after a rating or a "
                             "difference of ratings (e.g. 'stars': '+0.30 stars').")
    rating_symbol: str = Field("", description="Short form of the unit beside the report's headline numbers "
                               "(e.g. '\u2605'); empty: labels.rating_unit.")

    @property
    def unit_short(self) -> str:
        """The unit beside a headline number: ``rating_symbol``, else ``rating_unit``."""
        return self.rating_symbol or self.rating_unit


class Config(_Section):
    paths: PathsConfig = PathsConfig()
    input: InputConfig = InputConfig()
    scale: ScaleConfig = ScaleConfig()
    window: WindowConfig = WindowConfig()
    model: ModelConfig = ModelConfig()
    debias: DebiasConfig = DebiasConfig()
    evaluate: EvaluateConfig = EvaluateConfig()
    gate: GateConfig = GateConfig()
    probe: ProbeConfig = ProbeConfig()
    publish: PublishConfig = PublishConfig()
    retention: RetentionConfig = RetentionConfig()
    runtime: RuntimeConfig = RuntimeConfig()
    drift: DriftConfig = DriftConfig()
    alerts: AlertsConfig = AlertsConfig()
    labels: LabelsConfig = LabelsConfig()

    def with_overrides(self, logs: str | None = None, workspace: str | None = None,
                       shared: str | None = None) -> "Config":
        """Copy with the paths replaced (CLI flags win over env vars, which win over the file).
        ``shared=""`` turns the shared copy off; ``None`` leaves it as it is."""
        update = {k: v for k, v in {"logs": logs, "workspace": workspace}.items() if v}
        if shared is not None:
            update["shared"] = shared
        paths = PathsConfig.model_validate({**self.paths.model_dump(), **update}) if update else self.paths
        return self.model_copy(update={"paths": paths})

    def updated(self, dotted: dict[str, object]) -> "Config":
        """Copy with ``{"debias.calibration_weight": 2.0, ...}`` applied and re-validated (used by sweeps)."""
        raw = self.model_dump()
        for key, value in dotted.items():
            node = raw
            parts = key.split(".")
            for p in parts[:-1]:
                if p not in node or not isinstance(node[p], dict):
                    raise ConfigError(f"unknown config key '{key}'")
                node = node[p]
            if parts[-1] not in node:
                raise ConfigError(f"unknown config key '{key}'")
            node[parts[-1]] = value
        return parse_config(raw, source="<override>")

    def digest(self) -> str:
        """Stable short hash of every setting except the paths (which vary by environment)."""
        raw = self.model_dump(mode="json")
        raw.pop("paths", None)
        return hashlib.sha256(json.dumps(raw, sort_keys=True).encode()).hexdigest()[:16]


def _format_error(err: ValidationError, source: str, prefix: tuple[str, ...] = ()) -> str:
    """One line per problem (key, what is wrong, the value given); a single problem is one line in all."""
    problems = []
    for e in err.errors():
        key = ".".join(str(p) for p in (*prefix, *e["loc"])) or "<top level>"
        if e["type"] == "extra_forbidden":
            problems.append(f"{key}: unknown key (check spelling; see configs/example.toml)")
            continue
        msg = str(e["msg"]).removeprefix("Value error, ")
        given = repr(e.get("input"))
        problems.append(f"{key}: {msg}" + ("" if given in msg else f" (got {given})"))
    if len(problems) == 1:
        return f"invalid config in {source}: {problems[0]}"
    return "\n".join([f"invalid config in {source}:"] + [f"  {p}" for p in problems])


def parse_config(raw: dict, source: str = "<dict>") -> Config:
    try:
        return Config.model_validate(raw)
    except ValidationError as err:
        raise ConfigError(_format_error(err, source)) from None


def load_config(path: str | Path | None = None, logs: str | None = None, workspace: str | None = None,
                shared: str | None = None) -> Config:
    """Read and validate a TOML config (defaults when ``path`` is None); apply path overrides.

    Precedence for the paths: explicit argument > TAREWISE_LOGS / TAREWISE_WORKSPACE / TAREWISE_SHARED > file.
    """
    raw: dict = {}
    source = "<defaults>"
    if path is not None:
        p = Path(path)
        source = str(p)
        try:
            raw = tomllib.loads(p.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ConfigError(f"config file not found: {p}") from None
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"config file {p} is not valid TOML: {exc}") from None
    cfg = parse_config(raw, source)
    try:
        return cfg.with_overrides(logs=logs or os.environ.get("TAREWISE_LOGS"),
                                  workspace=workspace or os.environ.get("TAREWISE_WORKSPACE"),
                                  shared=shared if shared is not None else os.environ.get("TAREWISE_SHARED"))
    except ValidationError as err:
        raise ConfigError(_format_error(err, "command line / environment", ("paths",))) from None


def render_example() -> str:
    """``configs/example.toml``: every key with its default and description (a test keeps them in sync)."""
    lines = ["# tarewise configuration: every key with its default. Generated by",
             "#   python -m tasks.config > configs/example.toml",
             "# Unknown keys are errors. Secrets (webhook URLs) never go here: see alerts.webhook_url_env.", ""]

    def fmt(v: object) -> str:
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, (list, tuple)):
            return "[" + ", ".join(fmt(x) for x in v) + "]"
        if isinstance(v, str):
            return json.dumps(v)
        return repr(v)

    def section(model: type[BaseModel], instance: BaseModel, prefix: str) -> None:
        nested = []
        lines.append(f"[{prefix}]")
        doc = (model.__doc__ or "").strip().splitlines()
        if doc and not doc[0].startswith("Create a new model"):
            lines.insert(len(lines) - 1, f"# {doc[0]}")
        for name, field in model.model_fields.items():
            value = getattr(instance, name)
            if isinstance(value, BaseModel):
                nested.append((name, type(value), value))
                continue
            if field.description:
                lines.append(f"# {field.description}")
            lines.append(f"{name} = {fmt(value)}")
        lines.append("")
        for name, sub_model, sub in nested:
            section(sub_model, sub, f"{prefix}.{name}")

    cfg = Config()
    for name in Config.model_fields:
        sub = getattr(cfg, name)
        section(type(sub), sub, name)
    return "\n".join(lines)


if __name__ == "__main__":  # pragma: no cover
    print(render_example(), end="")
