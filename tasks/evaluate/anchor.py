"""The anchor: the strongest recent version, re-scored on tonight's held-out probe ratings.

The gate's rule "candidate vs live within ``gate.tolerance_mae``" compares two neighbours, so a chain of
small steps down (or a lag that widens a little every night) passes night after night. The anchor turns
that into a cumulative budget: every version that was live (or promoted by the gate) in the last
``gate.anchor_nights`` is scored on tonight's held-out probe ratings, the same rows the candidate is
judged on, and the candidate may trail the strongest of them by at most ``gate.anchor_budget``.

Fair rows. Held-out probe pairs never enter training on any night (``engine.splits.heldout_mask`` puts a
(member, title) pair on the same side every night), so an old version has not seen tonight's rows
either. A member or title an old version never saw would be scored by its fallback, which says nothing
about whether the chain lost ground; such rows are left out of that version's comparison, and the
candidate's MAE is recomputed on exactly the rows kept. A version that keeps fewer than
``gate.min_heldout`` rows is not compared. "Strongest" is the version the candidate trails most
(largest ``candidate MAE - version MAE`` on the rows both are scored on), which is the version with the
lowest MAE when they all know every row.

Plain functions over checkpoints and a frame; which versions exist is the publish stage's question
(``publish.versions.anchor_versions``), asked by the flow.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from tasks.engine.checkpoint import Checkpoint


@dataclass(frozen=True)
class PriorVersion:
    """A recent version that can serve as the anchor: its id, run date and loaded model."""

    version_id: str
    run_date: str
    checkpoint: Checkpoint


@dataclass(frozen=True)
class AnchorComparison:
    """The candidate against the anchor on the ``n`` held-out probe ratings both are scored on (MAE in
    stars). ``live_mae``: the live version on the same rows (None when there is no live version);
    ``is_live``: the anchor is the live version itself; ``compared``: how many recent versions were
    scored; ``skipped``: one line per recent version that could not be (files gone, does not load, too
    few rows it knows)."""

    version_id: str
    run_date: str
    n: int
    mae: float
    candidate_mae: float
    live_mae: float | None = None
    is_live: bool = False
    compared: int = 1
    skipped: tuple[str, ...] = ()

    @property
    def margin(self) -> float:
        """Candidate MAE minus anchor MAE on the same rows: positive when the candidate is worse."""
        return self.candidate_mae - self.mae

    def to_dict(self) -> dict:
        return {"version_id": self.version_id, "run_date": self.run_date, "n": self.n, "mae": self.mae,
                "candidate_mae": self.candidate_mae, "margin": self.margin, "live_mae": self.live_mae,
                "is_live": self.is_live, "compared": self.compared, "skipped": list(self.skipped)}

    @classmethod
    def from_dict(cls, d: Mapping) -> AnchorComparison:
        return cls(version_id=str(d["version_id"]), run_date=str(d.get("run_date", "")), n=int(d["n"]),
                   mae=float(d["mae"]), candidate_mae=float(d["candidate_mae"]),
                   live_mae=None if d.get("live_mae") is None else float(d["live_mae"]),
                   is_live=bool(d.get("is_live", False)), compared=int(d.get("compared", 1)),
                   skipped=tuple(d.get("skipped") or ()))


def _mae(pred: np.ndarray, y: np.ndarray) -> float:
    return float(np.mean(np.abs(pred - y))) if y.size else math.nan


def compare_with_anchor(heldout: pd.DataFrame, candidate: Checkpoint, priors: Sequence[PriorVersion],
                        min_rows: int, live_id: str | None = None, live: Checkpoint | None = None,
                        skipped: Sequence[str] = ()) -> AnchorComparison | None:
    """Score every prior version on ``heldout`` (user_id, item_id, rating in stars), each on the rows it
    knows both ids of, and return the comparison with the one the candidate trails most; None when no
    prior version keeps at least ``max(min_rows, 1)`` rows (first night, every version gone).

    ``live_id`` / ``live``: tonight's live version (the night's base); when it is among ``priors`` and
    is the anchor, ``is_live`` is set; its MAE on the anchor's rows is ``live_mae``. ``skipped``: lines
    about recent versions the caller could not load, carried into the result."""
    skipped = list(skipped)
    y = heldout["rating"].to_numpy(float)
    users, items = heldout["user_id"], heldout["item_id"]
    cand_pred, _ = candidate.score(users, items)
    best: tuple[float, PriorVersion, np.ndarray, float] | None = None
    compared = 0
    for prior in priors:
        pred, flag = prior.checkpoint.score(users, items)
        known = flag == ""
        if int(known.sum()) < max(min_rows, 1):
            skipped.append(f"{prior.version_id}: knows {int(known.sum())} of the {len(y)} held-out ratings' "
                           f"members and titles (< gate.min_heldout={min_rows})")
            continue
        compared += 1
        mae = _mae(pred[known], y[known])
        gap = _mae(cand_pred[known], y[known]) - mae
        if best is None or gap > best[0]:
            best = (gap, prior, known, mae)
    if best is None:
        return None
    _, prior, known, mae = best
    live_mae = None
    if live is not None:
        live_pred, _ = live.score(users[known], items[known])
        live_mae = _mae(live_pred, y[known])
    return AnchorComparison(version_id=prior.version_id, run_date=prior.run_date, n=int(known.sum()), mae=mae,
                            candidate_mae=_mae(cand_pred[known], y[known]), live_mae=live_mae,
                            is_live=live_id is not None and prior.version_id == live_id, compared=compared,
                            skipped=tuple(skipped))
