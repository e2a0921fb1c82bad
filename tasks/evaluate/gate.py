"""The promotion gate: does a candidate become live?

Rules, in order (the first that fails holds the candidate, with its reason):
1. at least ``gate.min_heldout`` held-out probe ratings to judge on;
2. candidate held-out MAE <= baseline MAE + ``gate.tolerance_mae`` (baseline: the live version; on the
   first night, or when live cannot be scored, the plain shadow model; with neither, the candidate is
   promoted once rule 1 holds);
3. no selection-skew segment's MAE rises above the baseline's by more than ``gate.max_segment_regression``
   (segments with fewer than ``gate.min_heldout`` ratings on either side are not judged).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

from tasks.config import GateConfig
from tasks.evaluate.evaluation import Evaluation, ModelErrors


@dataclass(frozen=True)
class GateDecision:
    promote: bool
    compared_to: str          # "live" | "shadow" | "none"
    reason: str

    def to_dict(self) -> dict:
        return asdict(self)


def baseline(evaluation: Evaluation) -> tuple[ModelErrors | None, str]:
    """What the candidate is judged against: live when it was scored on at least one rating, else the
    shadow model on the same terms, else nothing (``(None, "none")``)."""
    for name in ("live", "shadow"):
        e = getattr(evaluation, name)
        if e is not None and e.n > 0:
            return e, name
    return None, "none"


def decide(evaluation: Evaluation, cfg: GateConfig) -> GateDecision:
    """Apply the rules above to one night's held-out errors (MAEs in stars)."""
    cand = evaluation.candidate
    base, name = baseline(evaluation)
    if cand.n < cfg.min_heldout:
        return GateDecision(False, name, f"only {cand.n} held-out probe ratings (< gate.min_heldout={cfg.min_heldout})")
    if base is None:
        return GateDecision(True, name, "nothing to compare with; promoted")
    c, b = cand.mae, base.mae
    if not math.isfinite(c):
        return GateDecision(False, name, "candidate MAE is not finite")
    if c > b + cfg.tolerance_mae:
        return GateDecision(False, name, f"held-out MAE {c:.4f} worse than {name} {b:.4f} by more than "
                                         f"gate.tolerance_mae={cfg.tolerance_mae}")
    for label, seg in sorted(cand.segments.items()):
        bseg = base.segments.get(label)
        if bseg is None or min(seg.n, bseg.n) < cfg.min_heldout:
            continue
        if seg.mae > bseg.mae + cfg.max_segment_regression:
            return GateDecision(False, name, f"segment '{label}' MAE {seg.mae:.4f} worse than {name} "
                                             f"{bseg.mae:.4f} by more than gate.max_segment_regression="
                                             f"{cfg.max_segment_regression}")
    return GateDecision(True, name, f"held-out MAE {c:.4f} vs {name} {b:.4f}: within tolerance")
