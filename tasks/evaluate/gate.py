"""The promotion gate: does a candidate become live?

Rules, in order (the first that fails holds the candidate, with its reason):
1. at least ``gate.min_heldout`` held-out probe ratings to judge on;
2. candidate held-out MAE <= baseline MAE + ``gate.tolerance_mae`` (baseline: the live version; on the
   first night, or when live cannot be scored, the plain shadow model);
3. no selection-skew segment's MAE rises above the baseline's by more than ``gate.max_segment_regression``
   (segments with fewer than ``gate.min_heldout`` ratings are not judged).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

from tasks.config import GateConfig


@dataclass(frozen=True)
class GateDecision:
    promote: bool
    compared_to: str          # "live" | "shadow" | "none"
    reason: str

    def to_dict(self) -> dict:
        return asdict(self)


def decide(candidate: dict, live: dict | None, shadow: dict | None, cfg: GateConfig) -> GateDecision:
    """candidate/live/shadow: evaluation dicts (``n``, ``mae``, ``segments`` -> {label: {n, mae}})."""
    if live is not None and live.get("n", 0) > 0:
        base, name = live, "live"
    elif shadow is not None and shadow.get("n", 0) > 0:
        base, name = shadow, "shadow"
    else:
        base, name = None, "none"
    n = candidate.get("n", 0)
    if n < cfg.min_heldout:
        return GateDecision(False, name, f"only {n} held-out probe ratings (< gate.min_heldout={cfg.min_heldout})")
    if base is None:
        return GateDecision(True, name, "nothing to compare with; promoted")
    c, b = candidate["mae"], base["mae"]
    if not math.isfinite(c):
        return GateDecision(False, name, "candidate MAE is not finite")
    if c > b + cfg.tolerance_mae:
        return GateDecision(False, name, f"held-out MAE {c:.4f} worse than {name} {b:.4f} by more than "
                                         f"gate.tolerance_mae={cfg.tolerance_mae}")
    for label, seg in sorted(candidate.get("segments", {}).items()):
        bseg = base.get("segments", {}).get(label)
        if not bseg or min(seg.get("n", 0), bseg.get("n", 0)) < cfg.min_heldout:
            continue
        if seg["mae"] > bseg["mae"] + cfg.max_segment_regression:
            return GateDecision(False, name, f"segment '{label}' MAE {seg['mae']:.4f} worse than {name} "
                                             f"{bseg['mae']:.4f} by more than gate.max_segment_regression="
                                             f"{cfg.max_segment_regression}")
    return GateDecision(True, name, f"held-out MAE {c:.4f} vs {name} {b:.4f}: within tolerance")
