"""Training: cold start or warm-started fine-tune of a factoriser under one of the debiasing methods.

Entry point :func:`fit`. Inputs are pandas frames with ``user_id``, ``item_id`` (strings) and
``rating`` (float, on the scale): organic ratings (MNAR) and probe ratings (MAR), and the engine's
:class:`~tasks.engine.settings.Settings`. Probe ratings are split by
:func:`tasks.engine.splits.heldout_mask` into a *fitting* part (probe error, early stopping, post-hoc maps)
and a *held-out* part that training never reads.

One epoch is one training round: probe errors are refreshed under the current model, reference users
are redrawn, their profiles are computed once (detached targets), then mini-batches of squared error
are taken, each plus ``calibration_weight`` x the distribution-calibration term on its slice of the round's
adjusted users (every adjusted user is visited once per round, spread evenly over the mini-batches).

One loop, :class:`Training` (set-up, :meth:`~Training.run_round`, :meth:`~Training.finish`), serves
single-process and data-parallel training (:mod:`tasks.engine.distributed`). What differs between them is
set-up data (which ratings and users are this worker's, its batch size per step, the step's global rating
count) and the calls to the exchange (:mod:`tasks.engine.exchange`), which in one process do nothing.

Determinism: ``torch.set_num_threads(model.threads)``, ``torch.use_deterministic_algorithms(True)``, one
seeded ``torch.Generator`` for init/shuffles/samples and one seeded numpy generator for reference draws.
Same inputs + settings + seed + thread count give bit-identical checkpoints.
"""

from __future__ import annotations

import copy
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import torch

from tasks.engine import per_user
from tasks.engine.calibration import References, profile_term_per_user
from tasks.engine.checkpoint import Checkpoint
from tasks.engine.exchange import Exchange
from tasks.engine.idmap import IdMap
from tasks.engine.inputs import EngineInputError, check_frame, prepare_model, training_examples
from tasks.engine.model import Factoriser
from tasks.engine.profiles import ProfileSampler, empirical_cdf
from tasks.engine.recalibration import MonotoneMap
from tasks.engine.reference import cap_reference_users, draw_reference_users, probe_errors, reference_probabilities
from tasks.engine.row_adam import RowAdam
from tasks.engine.settings import DebiasSettings, Scale, Settings
from tasks.engine.skew_model import OrganicRows
from tasks.engine.splits import heldout_mask


@dataclass
class FitResult:
    checkpoint: Checkpoint
    rounds: list[dict]                 # one dict per epoch/round (see ``fit``)
    probe_errors: pd.Series            # user_id -> shrunk probe MAE under the final model
    probe_fit: pd.DataFrame            # probe ratings used for fitting / early stopping
    probe_heldout: pd.DataFrame        # probe ratings for evaluation only
    best_epoch: int
    new_users: int
    new_items: int
    notes: list[str] = field(default_factory=list)


#: Rows of the examples gathered at once for a round's mini-batches (see ``Training._batches``).
_GATHER_ROWS = 1 << 20

# ---------------------------------------------------------------------------------------------
# One step's loss, early stopping, the finished checkpoint
# ---------------------------------------------------------------------------------------------

def _int32(idx: np.ndarray) -> np.ndarray:
    """Row indices ``[N]`` as int32 (half of int64's memory; int32 input is returned as it is); refuses
    tables too large for it."""
    if idx.dtype == np.int32:
        return idx
    if len(idx) and int(idx.max()) >= 2**31:
        raise ValueError(f"{int(idx.max()) + 1} embedding rows do not fit int32 indices")
    return idx.astype(np.int32)


@dataclass
class StepCalibration:
    """What a step needs for the distribution-calibration term: thresholds ``t`` [K], sharpness, the
    round's reference profiles [R, K] prepared for every step (or None), the optional extra target [K] and its
    weight, the term's weight (lambda) and the round's scale ``n_steps / visits``."""

    t: torch.Tensor
    sharpness: float
    references: References | None
    extra_target: torch.Tensor | None
    extra_weight: float
    weight: float
    scale: float


def step_loss(model: Factoriser, u: torch.Tensor, i: torch.Tensor, r: torch.Tensor, w: torch.Tensor | None, norm: float,
              weight_decay: float, pick: torch.Tensor | None = None, items: torch.Tensor | None = None,
              calib: StepCalibration | None = None, se_norm: float | None = None
              ) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor | None]:
    """Loss of one mini-batch: ``sum(w * (pred - r)^2) / se_norm + weight_decay * sum(penalty) / norm``
    plus, when ``pick`` (adjusted users [P]) is given, ``weight * scale * sum_u term_u`` over their profiles
    on ``items`` [S]. ``norm``: the step's rating count over all workers; ``se_norm`` defaults to it (the
    weight sum for self-normalised IPS).
    Returns ``(loss, squared-error part, summed calibration term or None)``, the last two detached."""
    if pick is not None and len(pick):
        pred, penalty, block = model.step_outputs(u, i, pick, items)
    else:
        pred, penalty, block = model.step_outputs(u, i)
    err = (pred - r) ** 2
    se = (err if w is None else w * err).sum() / (norm if se_norm is None else se_norm)
    loss = se + weight_decay * penalty.sum() / norm
    term = None
    if block is not None:
        term = profile_term_per_user(block, calib.t, calib.sharpness, calib.references, calib.extra_target,
                                     calib.extra_weight).sum()
        loss = loss + calib.weight * term * calib.scale
        term = term.detach()
    return loss, se.detach(), term


class EarlyStopping:
    """Keeps the weights of the round with the lowest probe-fit MAE; says stop after ``patience`` rounds
    without an improvement of more than 1e-6. Without probe ratings (``val`` NaN) every round counts as
    best, so the last round's weights are kept and training runs every epoch."""

    def __init__(self, model: torch.nn.Module, patience: int) -> None:
        self.model, self.patience = model, patience
        self.best_val, self.best_epoch, self.stale = float("inf"), 0, 0
        self.best_state = copy.deepcopy(model.state_dict())

    def update(self, epoch: int, val: float) -> bool:
        """Record round ``epoch``'s probe-fit MAE; True when training should stop."""
        if np.isnan(val):
            self.best_state, self.best_epoch = copy.deepcopy(self.model.state_dict()), epoch
            return False
        if val < self.best_val - 1e-6:
            self.best_val, self.best_epoch, self.stale = val, epoch, 0
            self.best_state = copy.deepcopy(self.model.state_dict())
            return False
        self.stale += 1
        return self.stale >= self.patience

    def restore(self) -> int:
        """Load the best weights into the model; returns their epoch."""
        self.model.load_state_dict(self.best_state)
        return self.best_epoch


def apply_correction(ckpt: Checkpoint, organic: pd.DataFrame | OrganicRows, probe_fit: pd.DataFrame, pf_u: np.ndarray,
                     pf_i: np.ndarray, pf_r: np.ndarray, debias: DebiasSettings, scale: Scale,
                     notes: list[str]) -> None:
    """Fit ``ckpt``'s post-hoc correction (recalibration map or per-user correction) on the fitting probe
    ``pf_*`` / ``probe_fit`` and set it on ``ckpt``; a method without one leaves ``ckpt`` as it is."""
    method, companion = debias.method, debias.companion
    if "recalibrate" in (method, companion) and len(pf_r) >= 2:
        ckpt.score_map = MonotoneMap.fit(ckpt.raw_scores(pf_u, pf_i), pf_r)
    if method == "per_user":
        correction = per_user.fit_correction(ckpt, organic, probe_fit, debias, scale)
        ckpt.score_map, ckpt.user_offset, ckpt.user_scale = (correction.score_map, correction.user_offset,
                                                             correction.user_scale)
        ckpt.info["per_user"] = correction.info
        notes.extend(correction.notes)


def has_correction(debias: DebiasSettings) -> bool:
    """Does the method fit a post-hoc correction after training (so the served score is not the raw MF's)?"""
    return debias.method == "per_user" or "recalibrate" in (debias.method, debias.companion)


def finish_checkpoint(model: Factoriser, users: IdMap, items: IdMap, settings: Settings,
                      previous: Checkpoint | None, best_epoch: int, epochs_run: int,
                      organic: pd.DataFrame | OrganicRows,
                      probe_fit: pd.DataFrame, pf_u: np.ndarray, pf_i: np.ndarray, pf_r: np.ndarray,
                      notes: list[str]) -> tuple[Checkpoint, pd.Series]:
    """The trained model as a checkpoint with its post-hoc correction (recalibration map or per-user
    correction, fitted on the fitting probe ``pf_*``), and every probe user's shrunk probe error under
    it (a Series indexed by user id)."""
    scale, debias = settings.scale, settings.debias
    method, companion = debias.method, debias.companion
    ckpt = Checkpoint(model=model, users=users, items=items, scale_min=scale.min, scale_max=scale.max,
                      method=method if companion == "none" else f"{method}+{companion}",
                      info={"seed": settings.model.seed, "threads": settings.model.threads, "best_epoch": best_epoch,
                            "epochs_run": epochs_run, "warm_start": previous is not None})
    # Post-hoc corrections are refitted from scratch every night on the current model (never carried
    # over from ``previous``): they describe this model's errors, not the last one's.
    apply_correction(ckpt, organic, probe_fit, pf_u, pf_i, pf_r, debias, scale, notes)
    errs = probe_errors(pf_u, ckpt.score_idx(pf_u, pf_i), pf_r, debias.shrinkage)
    errs.index = users.ids[errs.index.to_numpy()]
    errs.index.name = "user_id"
    return ckpt, errs


# ---------------------------------------------------------------------------------------------
# The training loop
# ---------------------------------------------------------------------------------------------


def fit(organic: pd.DataFrame, probe: pd.DataFrame | None, settings: Settings, previous: Checkpoint | None = None,
        log: Callable[[str], None] | None = None) -> FitResult:
    """Train (or fine-tune ``previous``) in this process and return the checkpoint with per-round facts.

    Each round dict has: ``epoch``, ``reference_users``, ``reference_share`` (of users with a probe
    error), ``adjusted_users``, ``calibration`` ("on" / "skipped: <why>" / "off"), ``loss`` (mean over
    steps of the squared-error term), ``calibration_term`` (the round's summed term divided by its visits:
    the mean per visited adjusted user; NaN when calibration is not on), ``val_mae`` (probe fitting split),
    ``seconds``. ``log`` receives one line per round.
    """
    return Training(organic, probe, settings, previous, log=log).run()


class Training:
    """One training run: set up in the constructor, then :meth:`run_round` per round, then :meth:`finish`
    (:meth:`run` does all three). ``exchange``: the single-process :class:`Exchange` unless given one for
    data-parallel training, where ``organic``/``probe`` are still the *whole* window and each worker
    keeps its users' ratings. ``batch_per_worker``: each worker takes ``model.batch_size`` ratings per
    step (see :func:`tasks.engine.distributed.fit_distributed`).

    ``term_schedule`` (set on an instance before the first round; not a config key yet): how a round's
    visits of adjusted users are spread over its steps. ``"spread"`` (what nights run): every step takes
    its even share (~40 users per step at 1M ratings). ``"packed"``: up to ``debias.users_per_step`` users
    on each of ``ceil(visits / users_per_step)`` steps spaced evenly through the round, none on the others.
    Every user is still visited once per round with the same weight and a profile over the same number of
    sampled items, so the round's objective is the same; what changes is the path (a step's item sample is
    shared by more users, fewer steps carry the term), measured in BENCHMARKS.md ("calibrated epoch
    against the trainer's own plain epoch")."""

    term_schedule: str = "spread"

    def __init__(self, organic: pd.DataFrame, probe: pd.DataFrame | None, settings: Settings,
                 previous: Checkpoint | None = None, exchange: Exchange | None = None,
                 log: Callable[[str], None] | None = None, batch_per_worker: bool = False) -> None:
        self.settings, self.previous = settings, previous
        scale, model_cfg, debias = settings.scale, settings.model, settings.debias
        ex = self.exchange = exchange or Exchange()
        self.say = log or (lambda _msg: None)
        organic = check_frame(organic, "organic", scale)
        probe = check_frame(probe, "probe", scale)
        if organic.empty:
            raise EngineInputError("organic ratings: empty, nothing to train on")
        torch.set_num_threads(model_cfg.threads)
        torch.use_deterministic_algorithms(True)
        # The generator every worker shares for what they must agree on (initial weights); then per-worker
        # streams, except that rank 0 keeps it, so one worker reproduces single-process training (tested).
        self.gen = torch.Generator().manual_seed(model_cfg.seed)
        self.notes: list[str] = []
        (self.users, self.items, self.new_users, self.new_items, self.model,
         self.epochs) = prepare_model(organic, probe, model_cfg, previous, self.gen, self.notes)
        if ex.rank > 0:
            self.gen = torch.Generator().manual_seed(model_cfg.seed * 1_000_003 + 7919 * ex.rank)
        self.rng = np.random.default_rng(model_cfg.seed if ex.rank == 0 else [model_cfg.seed, ex.rank])

        # ---- probe split: every worker holds the fitting split (post-hoc maps, propensities) and computes
        # probe errors and validation error on its own users' part -----------------------------------
        held = heldout_mask(probe["user_id"].to_numpy(), probe["item_id"].to_numpy(), debias.heldout_share)
        self.probe_fit, self.probe_heldout = probe[~held].reset_index(drop=True), probe[held].reset_index(drop=True)
        self.all_pf_u = self.users.lookup(self.probe_fit["user_id"])
        self.all_pf_i = self.items.lookup(self.probe_fit["item_id"])
        self.all_pf_r = self.probe_fit["rating"].to_numpy(dtype=float, copy=True)
        mine = ex.owns(self.all_pf_u)
        self.pf_u, self.pf_i = torch.from_numpy(self.all_pf_u[mine]), torch.from_numpy(self.all_pf_i[mine])
        self.pf_r = self.all_pf_r[mine]

        # ---- training examples, this worker's share of them, and the steps of a round ---------------
        tr_u, tr_i, tr_r, tr_w, weighting = training_examples(organic, self.users, self.items, self.all_pf_u,
                                                              self.all_pf_i, self.all_pf_r, scale, debias, self.notes)
        n_examples = len(tr_r)
        # The organic ratings as model rows, kept for the per-round refit of the correction (the first
        # len(organic) examples; in one process the same memory as the training columns below).
        self.organic_rows = OrganicRows(tr_u[:len(organic)], tr_i[:len(organic)], tr_r[:len(organic)])
        mine = ex.owns(tr_u)
        # Memory: the examples are held for the whole run and gathered once a round, so they are kept
        # small: int32 indices (embedding lookups take them; gradients and outputs are the same bits), the
        # ratings as float32 (what the loss reads) and no weight column when every weight is 1
        # (w * x == x exactly, so the loss is unchanged).
        self.T_u, self.T_i = (torch.from_numpy(_int32(x[mine])) for x in (tr_u, tr_i))
        self.T_r = torch.from_numpy(np.asarray(tr_r[mine], dtype=np.float32))
        self.T_w = None if tr_w is None or bool((tr_w == 1.0).all()) else torch.from_numpy(tr_w[mine]).float()
        del tr_i, tr_r, tr_w
        self.self_normalise = weighting == "snips"
        sizes = ex.sizes(len(self.T_r))
        bs = min(model_cfg.batch_size, n_examples)
        # Every worker takes the same number of steps, each over its share of the step's ratings:
        # ceil(share * batch), so every shard is through within n_steps, and one worker takes exactly the
        # single-process batches. The step's global rating count normalises its loss.
        self.n_steps = -(-max(sizes) // bs) if batch_per_worker else -(-n_examples // bs)
        local_bs = [-(-s // self.n_steps) if batch_per_worker else -(-s * bs // n_examples) for s in sizes]
        self.step_count = np.zeros(self.n_steps, np.int64)
        for s, b in zip(sizes, local_bs):
            self.step_count += np.clip(s - np.arange(self.n_steps) * b, 0, b)
        self.batch = local_bs[ex.rank]

        # ---- calibration set-up ------------------------------------------------------------------
        self.calibrated = debias.method == "calibrated" and debias.calibration_weight > 0
        self.profiles = ProfileSampler(scale.min, scale.max, debias, len(self.items), self.calibrated)
        if self.profiles.note:
            self.notes.append(self.profiles.note)
        organic_u = self.organic_rows.users
        self.active_users = torch.from_numpy(np.unique(organic_u[ex.owns(organic_u)]).astype(np.int64))
        del tr_u, organic_u
        self.probe_target = (empirical_cdf(torch.from_numpy(self.all_pf_r).float(), self.profiles.t)
                             if self.calibrated and debias.probe_target_weight > 0 and len(self.all_pf_r) else None)

        # RowAdam: torch.optim.SparseAdam's update (to float rounding), ~40% cheaper per step (tasks/engine/row_adam.py).
        self.optimiser = RowAdam(list(self.model.parameters()), lr=model_cfg.learning_rate)
        self.stopping = EarlyStopping(self.model, model_cfg.patience)
        self.stop_corrected = model_cfg.stop_on == "corrected" and has_correction(debias)
        self.rounds: list[dict] = []
        self.reference_draws: list[int] = []        # reference users this worker drew, per round

    def _validation(self) -> float:
        """Probe-fit MAE of the current weights, NaN without probe ratings. ``model.stop_on = "corrected"``
        and a method with a post-hoc correction: the MAE of the served score (correction refitted on the
        fitting split for these weights; every worker holds that split and the whole window, so each
        computes the same number); else the raw factoriser's, summed over workers."""
        if self.stop_corrected:
            if len(self.all_pf_r) == 0:
                return float("nan")
            scale = self.settings.scale
            ckpt = Checkpoint(model=self.model, users=self.users, items=self.items, scale_min=scale.min,
                              scale_max=scale.max, method=self.settings.debias.method)
            apply_correction(ckpt, self.organic_rows, self.probe_fit, self.all_pf_u, self.all_pf_i, self.all_pf_r,
                             self.settings.debias, scale, [])
            return float(np.abs(ckpt.score_idx(self.all_pf_u, self.all_pf_i) - self.all_pf_r).mean())
        err, count = self.exchange.sum(float(np.abs(self._predict_fit() - self.pf_r).sum()), float(len(self.pf_r)))
        return err / count if count else float("nan")

    def _predict_fit(self) -> np.ndarray:
        """Predictions on this worker's fitting probe ratings, clipped to the scale; float64 ``[P]``."""
        scale = self.settings.scale
        with torch.no_grad():
            return self.model(self.pf_u, self.pf_i).double().clamp(scale.min, scale.max).numpy()

    def _references(self) -> tuple[torch.Tensor, torch.Tensor, dict]:
        """This round's reference draw: ``(adjusted users of this worker [A], every worker's reference
        profiles [R, K], round facts)``; the facts are global and the same on every worker."""
        debias, ex = self.settings.debias, self.exchange
        errs = probe_errors(self.pf_u.numpy(), self._predict_fit(), self.pf_r, debias.shrinkage)
        probs = reference_probabilities(errs, debias.reference_temperature, debias.reference_p_min,
                                        debias.reference_p_max)
        drawn = draw_reference_users(probs, self.rng)
        # Each worker keeps at most its share of the cap, so the gathered total stays near the cap.
        mine = torch.from_numpy(cap_reference_users(drawn, -(-debias.max_reference_users // ex.world), self.rng))
        self.reference_draws.append(len(mine))
        is_ref = torch.zeros(len(self.users), dtype=torch.bool)
        is_ref[mine] = True
        adjusted = self.active_users[~is_ref[self.active_users]]
        references = ex.gather_rows(self.profiles.targets(self.model, mine, self.gen))
        # A round visits `visits` adjusted users (every one once, cycling when there are fewer users
        # than steps, at most users_per_step per step), spread evenly over its mini-batches. Step j adds
        # calibration_weight * sum_{u in its slice} term_u * n_steps / visits (global visits), so over a
        # round the calibration part sums to n_steps * calibration_weight * (mean term): the same objective
        # (and the same expected pull per user per round) as averaging the term over users_per_step random
        # users at every step, which profiled each user ~6 times per round at 1M ratings and made a
        # calibrated round ~10x a plain one; now ~1.5x (bench/bench_engine.py).
        per_step = -(-debias.users_per_step // ex.world)
        visits = min(max(len(adjusted), self.n_steps), self.n_steps * per_step) if len(adjusted) else 0
        with_error, n_adjusted, n_drawn, all_visits = (
            int(x) for x in ex.sum(float(len(errs)), float(len(adjusted)), float(len(drawn)), float(visits)))
        n_refs = references.shape[0]
        if n_refs < n_drawn and not any(n.startswith("reference users capped") for n in self.notes):
            self.notes.append(f"reference users capped at {n_refs} of {n_drawn} drawn (debias.max_reference_users)")
        if n_refs == 0 and self.probe_target is None:
            status = "skipped: no reference users this round"
        elif n_adjusted == 0:
            status = "skipped: every active user is a reference user"
        else:
            status = "on"
        facts = {"reference_users": n_refs, "reference_share": n_refs / with_error if with_error else float("nan"),
                 "adjusted_users": n_adjusted, "calibration": status, "visits": visits, "all_visits": all_visits}
        return adjusted, references, facts

    def _batches(self, perm: torch.Tensor):
        """The round's mini-batches in step order: ``(k, users [B], items [B], ratings [B], weights [B] or
        None)``, step ``k`` the rows ``perm[k * batch:(k + 1) * batch]`` of the examples.

        Gathered a chunk of steps at a time (about ``_GATHER_ROWS`` rows), then contiguous slices:
        gathering each mini-batch from the full columns cost ~0.5 ms per step at 24M ratings (four random
        reads per rating, one Python call per column and step), and gathering the whole round at once
        held another copy of every example (12 bytes a rating). The batches are the same either way."""
        per = max(1, _GATHER_ROWS // max(1, self.batch))
        for c in range(0, self.n_steps, per):
            rows = perm[c * self.batch:(c + per) * self.batch]
            cu, ci, cr = self.T_u[rows], self.T_i[rows], self.T_r[rows]
            cw = None if self.T_w is None else self.T_w[rows]
            for k in range(c, min(c + per, self.n_steps)):
                b = slice((k - c) * self.batch, (k - c + 1) * self.batch)
                yield k, cu[b], ci[b], cr[b], None if cw is None else cw[b]

    def run_round(self, epoch: int) -> bool:
        """Train round ``epoch`` (1-based) and record it in :attr:`rounds`; True when early stopping says stop."""
        t0 = time.perf_counter()
        debias, ex, gen = self.settings.debias, self.exchange, self.gen
        facts = {"reference_users": 0, "reference_share": float("nan"), "adjusted_users": 0, "calibration": "off"}
        if self.calibrated:
            adjusted, references, facts = self._references()
        # int32 when it fits: the same permutation (and generator state) as int64, half the memory.
        perm = torch.randperm(len(self.T_r), generator=gen,
                              dtype=torch.int32 if len(self.T_r) < 2**31 else torch.int64)
        calib, visits = None, 0
        if facts["calibration"] == "on":
            visits = facts["visits"]
            reps = -(-visits // len(adjusted)) if len(adjusted) else 0
            orders = [adjusted[torch.randperm(len(adjusted), generator=gen)] for _ in range(reps)]
            visit_order = torch.cat(orders)[:visits] if reps else torch.empty(0, dtype=torch.int64)
            calib = StepCalibration(self.profiles.t, self.profiles.sharpness,
                                    References(references) if len(references) else None,
                                    self.probe_target, debias.probe_target_weight, debias.calibration_weight,
                                    self.n_steps / facts["all_visits"])
        # Self-normalised IPS divides each step's squared error by the step's weight sum over all workers.
        weight_sums = ex.sum(*(float(w.sum()) if w is not None else float(r.numel())
                               for _k, _u, _i, r, w in self._batches(perm))) if self.self_normalise else None
        se_sum, term_sum = 0.0, 0.0
        # Term step j of m takes visits [j * visits // m, (j + 1) * visits // m) and lands on step
        # j * n_steps // m; with m = n_steps that is every step's even share.
        m = self.n_steps
        if calib and self.term_schedule == "packed":
            m = min(self.n_steps, max(1, -(-visits // -(-debias.users_per_step // ex.world))))
        elif self.term_schedule not in ("spread", "packed"):
            raise ValueError(f"term_schedule must be 'spread' or 'packed', got {self.term_schedule!r}")
        term_steps = {j * self.n_steps // m: (j * visits // m, (j + 1) * visits // m) for j in range(m)} if calib else {}
        for k, b_u, b_i, b_r, b_w in self._batches(perm):
            span = term_steps.get(k)
            pick = visit_order[span[0]:span[1]] if span else None
            loss, se, term = step_loss(self.model, b_u, b_i, b_r, b_w, float(self.step_count[k]),
                                       self.settings.model.weight_decay, pick,
                                       self.profiles.step_items(gen) if pick is not None and len(pick) else None,
                                       calib, se_norm=None if weight_sums is None else weight_sums[k])
            self.optimiser.zero_grad(set_to_none=True)
            loss.backward()
            ex.sum_gradients(self.model)
            self.optimiser.step()
            se_sum += float(se)
            if term is not None:
                term_sum += float(term)
        se_sum, term_sum = ex.sum(se_sum, term_sum)
        del perm
        if not all(bool(torch.isfinite(p).all()) for p in self.model.parameters()):
            raise FloatingPointError(f"training diverged at round {epoch} (non-finite weights); "
                                     "lower model.learning_rate or debias.calibration_weight")
        val = self._validation()
        self.rounds.append({"epoch": epoch, "reference_users": facts["reference_users"],
                            "reference_share": facts["reference_share"], "adjusted_users": facts["adjusted_users"],
                            "calibration": facts["calibration"], "loss": se_sum / self.n_steps,
                            "calibration_term": term_sum / facts["all_visits"] if calib else float("nan"),
                            "val_mae": val, "seconds": time.perf_counter() - t0})
        self.say(f"round {epoch}: loss={se_sum / self.n_steps:.4f} val_mae={val:.4f} "
                 f"calibration={facts['calibration']} references={facts['reference_users']}")
        if not np.isfinite(se_sum):
            raise FloatingPointError(f"training diverged at round {epoch} (loss {se_sum}); lower model.learning_rate")
        return self.stopping.update(epoch, val)

    def finish(self) -> FitResult:
        """Restore the best round's weights and fit the post-hoc correction (from the whole fitting split,
        which every worker holds: the same on every worker)."""
        if len(self.all_pf_r) == 0:
            self.notes.append("no probe ratings in the fitting split: no early stopping, ran every epoch")
        best_epoch = self.stopping.restore()
        ckpt, errs = finish_checkpoint(self.model, self.users, self.items, self.settings, self.previous, best_epoch,
                                       len(self.rounds), self.organic_rows, self.probe_fit, self.all_pf_u, self.all_pf_i,
                                       self.all_pf_r, self.notes)
        return FitResult(checkpoint=ckpt, rounds=self.rounds, probe_errors=errs, probe_fit=self.probe_fit,
                         probe_heldout=self.probe_heldout, best_epoch=best_epoch, new_users=self.new_users,
                         new_items=self.new_items, notes=self.notes)

    def run(self) -> FitResult:
        """Every round until early stopping or the epoch bound, then :meth:`finish`. A warm start with
        ``model.keep_base`` first scores the base as round 0: when no round beats it, its weights are kept
        (new rows as initialised; the post-hoc correction is refitted either way)."""
        if self.previous is not None and self.settings.model.keep_base:
            self.base_val = self._validation()
            self.say(f"round 0 (base): val_mae={self.base_val:.4f}")
            if np.isfinite(self.base_val):
                self.stopping.update(0, self.base_val)
        for epoch in range(1, self.epochs + 1):
            if self.run_round(epoch):
                break
        return self.finish()
