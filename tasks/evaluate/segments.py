"""Selection-skew segments of users: who rates organically above, below or like their probe ratings.

The gate judges the candidate per segment and the drift report describes the segments, so they live
here, before both: the evaluate stage computes them, the monitor stage reuses them. Pure functions over
a ratings window (user_id, item_id, rating in stars, source "organic"/"probe", dt); no I/O.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from tasks.schemas import ORGANIC, PROBE

#: Segment names of :func:`user_skew_segments`, in display order.
SEGMENTS = ("up", "down", "neutral", "unknown")

WINDOW_COLUMNS = ("user_id", "item_id", "rating", "source", "dt")


def check_window(window: pd.DataFrame, needed: Sequence[str] = WINDOW_COLUMNS) -> None:
    """Raise ``ValueError`` naming the missing columns when ``window`` lacks any of ``needed``."""
    missing = [c for c in needed if c not in window.columns]
    if missing:
        raise ValueError(f"ratings window lacks column(s) {missing}; has {list(window.columns)}")


@dataclass(frozen=True)
class RatingsByUser:
    """A ratings window as row arrays, each of shape ``(rows,)``: ``codes`` is the row's position in the
    sorted ``users`` index, ``rating`` in stars, ``is_organic`` / ``is_probe`` boolean masks."""

    codes: np.ndarray
    users: pd.Index
    rating: np.ndarray
    is_organic: np.ndarray
    is_probe: np.ndarray

    @classmethod
    def of(cls, window: pd.DataFrame) -> RatingsByUser:
        codes, users = _factorize_sorted(window["user_id"])
        return cls(codes=codes, users=users, rating=window["rating"].to_numpy(dtype=float),
                   is_organic=(window["source"] == ORGANIC).to_numpy(dtype=bool),
                   is_probe=(window["source"] == PROBE).to_numpy(dtype=bool))

    def per_user(self) -> pd.DataFrame:
        """Per-user counts and means (see :func:`user_skew`), one row per entry of ``users``."""
        n = len(self.users)
        out = {}
        for mask, name in ((self.is_organic, "organic"), (self.is_probe, "probe")):
            codes = self.codes[mask]
            count = np.bincount(codes, minlength=n)
            total = np.bincount(codes, weights=self.rating[mask], minlength=n)
            del codes
            out[f"{name}_n"] = count
            out[f"{name}_mean"] = np.where(count > 0, total / np.maximum(count, 1), np.nan)
        frame = pd.DataFrame(out, index=pd.Index(self.users, name="user_id"))
        frame["skew"] = frame["organic_mean"] - frame["probe_mean"]
        return frame


def _factorize_sorted(ids: pd.Series) -> tuple[np.ndarray, pd.Index]:
    """``pd.factorize(ids, sort=True)`` as ``(codes, pd.Index(uniques))``. The window's ids (a categorical
    with sorted categories, :func:`tasks.ingest.store.read_window`) keep their own int32 codes, renumbered
    only when some category has no row: the same codes and index, half the memory of factorize's int64
    codes and without hashing every row."""
    codes = ids.cat.codes.to_numpy() if isinstance(ids.dtype, pd.CategoricalDtype) else None
    if (codes is None or ids.dtype.ordered or not ids.cat.categories.is_monotonic_increasing
            or (len(codes) and codes.min() < 0)):          # missing ids follow factorize's own rules
        codes, users = pd.factorize(ids, sort=True)
        return codes, pd.Index(users)
    seen = np.bincount(codes, minlength=len(ids.cat.categories)) > 0
    if not seen.all():
        codes = (np.cumsum(seen) - 1).astype(codes.dtype)[codes]
    return codes, pd.CategoricalIndex(pd.Categorical.from_codes(np.flatnonzero(seen), dtype=ids.dtype))


def user_skew(window: pd.DataFrame) -> pd.DataFrame:
    """Per-user organic and probe rating counts and means over ``window``.

    Returns a frame indexed by ``user_id`` (sorted) with columns ``organic_n``, ``organic_mean``,
    ``probe_n``, ``probe_mean`` and ``skew`` = organic mean minus probe mean in stars (NaN unless the
    user has both kinds of rating).
    """
    check_window(window, ("user_id", "rating", "source"))
    return RatingsByUser.of(window).per_user()


def segment_of(skew: pd.Series | np.ndarray, margin: float) -> np.ndarray:
    """Segment label per skew value: "up" above ``margin``, "down" below ``-margin``, else
    "neutral"; NaN skew (no probe or no organic rating) is "unknown"."""
    s = np.asarray(skew, dtype=float)
    out = np.full(s.shape, "neutral", dtype=object)
    out[s > margin] = "up"
    out[s < -margin] = "down"
    out[np.isnan(s)] = "unknown"
    return out


def user_skew_segments(window: pd.DataFrame, margin: float) -> pd.Series:
    """Segment of every user in ``window`` by their selection skew (``cfg.evaluate.skew_margin`` stars).

    Returns a Series indexed by ``user_id`` (sorted), named ``segment``, with values "up" (organic mean
    exceeds probe mean by more than ``margin``), "down" (falls short by more), "neutral", or "unknown"
    (no probe rating or no organic rating in the window).
    """
    return _segments(user_skew(window), margin)


def _segments(per_user: pd.DataFrame, margin: float) -> pd.Series:
    """Segment label per row of ``per_user`` (:func:`user_skew`'s frame), named ``segment``."""
    return pd.Series(segment_of(per_user["skew"], margin), index=per_user.index, name="segment")


def judged_segments(window: pd.DataFrame, heldout: pd.DataFrame, margin: float) -> pd.Series:
    """Segments for judging models on ``heldout`` (probe ratings: user_id, item_id): as
    :func:`user_skew_segments`, but from ``window`` *without* those held-out probe ratings.

    A segment defined on the ratings it is then judged on is selected on their noise: users whose
    held-out probe ratings happen to sit high land in "down", and any model that predicts them from
    their other ratings looks worse there than it is. On the InstEval long run (README, "Long run")
    that made candidates 0.1 stars better than the plain shadow overall look 0.1-0.2 worse on 'down'
    or 'neutral', and `gate.segments_vs_shadow = "hold"` held 35 of 60 nights for it (seed 0); segmented
    without the held-out rows, every segment of those candidates was as good as plain or better. Users whose only
    probe ratings are held out are "unknown".
    """
    check_window(window, ("user_id", "item_id", "rating", "source"))
    ratings = RatingsByUser.of(window)
    probe_rows = np.flatnonzero(ratings.is_probe)
    if len(heldout) and len(probe_rows):
        probes = window.iloc[probe_rows]
        pairs = pd.MultiIndex.from_arrays([probes["user_id"].astype(str).to_numpy(),
                                           probes["item_id"].astype(str).to_numpy()])
        held = pd.MultiIndex.from_arrays([heldout["user_id"].astype(str).to_numpy(),
                                          heldout["item_id"].astype(str).to_numpy()])
        # The held-out rows stop counting as probe ratings; the window itself is not copied (a copy
        # without them held every window rating a second time). A member left with no counted rating
        # is "unknown", as a member absent from the window is to the evaluation.
        is_probe = ratings.is_probe.copy()
        is_probe[probe_rows[pairs.isin(held)]] = False
        ratings = dataclasses.replace(ratings, is_probe=is_probe)
    return _segments(ratings.per_user(), margin)
