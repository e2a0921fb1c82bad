"""Row checks and their reasons: which rows of a day go to the quarantine, and why.

A row is checked on every rule; each rule that fails adds its reason key, and the quarantine lists every
reason of a row, in :data:`ORDER`, joined by :data:`REASON_SEP`. Reasons are fixed phrases (values stay
in the row itself, some phrases quote config values), so counting rejected rows by reason is meaningful.
All checks are vectorised over the whole file or partition (numpy / pyarrow compute); none loops over rows.
What makes an id acceptable (blanks only count as empty; blanks at either end are refused) is ``ids.py``'s
rule, shared with ``tarewise score``.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from tasks.config import Config
from tasks.ingest.columns import US
from tasks.ingest.ids import id_masks

_US_PER_DAY = 86_400 * US
_STEP_TOLERANCE = 1e-9
#: Joins the reasons of one row; no phrase contains it, so reason texts can be split again.
REASON_SEP = "; "

#: The duplicate reason's phrase (the other phrases are completed with config values in reason_phrases()).
DUPLICATE = "exact duplicate of an earlier event (same user, item, rating, event_time, source)"

#: Every reason key, in the order reasons are listed for a row.
ORDER = ["user_id_null", "user_id_type", "user_id_long", "user_id_padded", "item_id_null", "item_id_type",
         "item_id_long", "item_id_padded", "rating_null", "rating_text", "rating_nonfinite", "rating_scale", "rating_step", "source_label",
         "time_null", "time_bad", "time_future", "time_wrong_day", "duplicate"]


def reason_phrases(cfg: Config) -> dict[str, str]:
    """Reason key -> the phrase the quarantine shows, completed with the config values it names."""
    s, i = cfg.scale, cfg.input
    lo, hi = f"{s.min:g}", f"{s.max:g}"
    return {
        "user_id_null": "user_id is missing or empty",
        "user_id_type": "user_id is neither text nor a whole number",
        "user_id_long": f"user_id longer than {i.max_id_length} characters (input.max_id_length)",
        "user_id_padded": "user_id has blanks at its start or end (ids are compared exactly, blanks too)",
        "item_id_null": "item_id is missing or empty",
        "item_id_type": "item_id is neither text nor a whole number",
        "item_id_long": f"item_id longer than {i.max_id_length} characters (input.max_id_length)",
        "item_id_padded": "item_id has blanks at its start or end (ids are compared exactly, blanks too)",
        "rating_null": "rating is missing",
        "rating_text": "rating is not a number",
        "rating_nonfinite": "rating is NaN or infinite",
        "rating_scale": f"rating outside the scale [{lo}, {hi}] (scale.min, scale.max)",
        "rating_step": f"rating not on the scale's step of {s.step:g} (scale.step)",
        "source_label": (f"source label not recognised (expected '{i.organic_label}' or '{i.probe_label}', "
                         "see input.organic_label and input.probe_label)"),
        "time_null": "event_time is missing",
        "time_bad": "event_time is not a readable timestamp",
        "time_future": (f"event_time more than {i.max_future_seconds} s after the end of the run date "
                        "(input.max_future_seconds)"),
        "time_wrong_day": ("event_time before the partition date by more than input.max_future_seconds "
                           "(wrong-day partition)"),
        "duplicate": DUPLICATE,
    }


def _np(x) -> np.ndarray:
    return x.to_numpy(zero_copy_only=False)


def check_rows(t: pa.Table, flags: dict[str, np.ndarray], day: dt.date, cfg: Config
               ) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """Every check but duplicates over one canonical table (:func:`tasks.ingest.columns.canonical_columns`).

    flags: the conversion failures of the same rows; day: the partition's date. Returns (boolean
    ``[rows]`` masks by reason key, ratings ``[rows]`` float64 snapped onto the scale's step).
    """
    masks = dict(flags)
    for col in ("user_id", "item_id"):
        for check, mask in id_masks(t[col], masks[f"{col}_type"], cfg.input.max_id_length).items():
            masks[f"{col}_{check}"] = mask

    masks.update(_rating_masks(t["rating"], masks["rating_text"], cfg))
    snapped = masks.pop("_snapped")

    src = t["source"]
    known = pc.is_in(src, value_set=pa.array([cfg.input.organic_label, cfg.input.probe_label]))
    masks["source_label"] = ~_np(pc.fill_null(known, False))

    t_us = _np(t["event_time_us"])
    usable = ~(masks["time_null"] | masks["time_bad"])
    start = (day - dt.date(1970, 1, 1)).days * _US_PER_DAY
    end = start + _US_PER_DAY
    no = np.zeros(len(t_us), bool)
    if t_us.size and t_us.min() >= start and t_us.max() < end:   # the usual case: one pass each
        masks["time_future"], masks["time_wrong_day"] = no, no
    else:
        future = usable & (t_us > end + cfg.input.max_future_seconds * US)
        masks["time_future"] = future
        # Events within the allowance either side of the day are kept: late-flushed buffers put
        # a few events just past midnight into the neighbouring partition, and they are real ratings.
        slack = cfg.input.max_future_seconds * US
        masks["time_wrong_day"] = usable & ~future & (t_us < start - slack)
    return masks, snapped


def _rating_masks(col: pa.ChunkedArray, not_number: np.ndarray, cfg: Config) -> dict[str, np.ndarray]:
    """Rating masks plus ``_snapped``: ratings within the tolerance moved onto their exact level,
    so later code can compare levels exactly. Whole-array checks first; per-row work only if needed."""
    s = cfg.scale
    r = _np(col).astype(np.float64, copy=False)
    n = r.size
    no = np.zeros(n, bool)
    r_null = _np(pc.is_null(col)) if col.null_count else no
    out = {"rating_null": r_null & ~not_number}
    with np.errstate(invalid="ignore"):
        finite = np.isfinite(r)
        all_finite = bool(finite.all())
        out["rating_nonfinite"] = no if all_finite else ~finite & ~r_null
        lo, hi = s.min - _STEP_TOLERANCE, s.max + _STEP_TOLERANCE
        if n and all_finite and r.min() >= lo and r.max() <= hi:
            out["rating_scale"] = off_scale = no
        else:
            out["rating_scale"] = off_scale = finite & ((r < lo) | (r > hi))
        on_scale = finite & ~off_scale
        if s.step <= 0:
            out["rating_step"] = no
            out["_snapped"] = np.where(on_scale, np.clip(r, s.min, s.max), r)
            return out
        level = np.rint((r - s.min) / s.step)
        snapped = s.min + level * s.step
        if n and all_finite and not off_scale.any() and np.array_equal(snapped, r):
            # The usual night: every rating already sits exactly on a level; one comparison pass.
            out["rating_step"], out["_snapped"] = no, r
            return out
        dev = np.abs(r - snapped)
        out["rating_step"] = on_scale & (dev > _STEP_TOLERANCE)
        if not np.any(dev[on_scale] > 0):
            out["_snapped"] = r
        else:
            ok = on_scale & ~out["rating_step"]
            out["_snapped"] = np.where(ok, np.clip(snapped, s.min, s.max), r)
    return out


def duplicate_mask(t: pa.Table, candidates: np.ndarray) -> np.ndarray:
    """True for rows (among ``candidates``) that repeat an earlier candidate on every canonical column.

    Exact duplicates share event_time and rating, so a sort of a 64-bit mix of those two numbers first
    narrows the search to rows whose mix is not unique (usually few: events carry microseconds);
    only those go through the exact multi-column grouping. Time-ordered input skips the sort.
    """
    dup = np.zeros(len(candidates), bool)
    idx = np.flatnonzero(candidates)
    if idx.size < 2:
        return dup
    times, ratings = _np(t["event_time_us"]), _np(t["rating"])
    if idx.size < len(candidates):
        times, ratings = times[idx], ratings[idx]
    if times.size and np.all(times[1:] >= times[:-1]):
        # Logs are usually written in time order: then equal times are neighbours and no sort is needed.
        same = times[1:] == times[:-1]
        if not same.any():
            return dup
        in_run = np.zeros(times.size, bool)
        in_run[1:] |= same
        in_run[:-1] |= same
        idx = idx[in_run]
    else:
        with np.errstate(over="ignore"):
            mix = times.view(np.uint64) * np.uint64(0x9E3779B97F4A7C15) ^ ratings.view(np.uint64)
        s = np.sort(mix)
        shared = np.unique(s[1:][s[1:] == s[:-1]])
        if shared.size == 0:
            return dup
        pos = np.minimum(np.searchsorted(shared, mix), shared.size - 1)
        idx = idx[shared[pos] == mix]
    sub = t.take(pa.array(idx)).select(["user_id", "item_id", "rating", "event_time_us", "source"])
    sub = sub.append_column("_pos", pa.array(np.arange(idx.size, dtype=np.int64)))
    first = sub.group_by(["user_id", "item_id", "rating", "event_time_us", "source"], use_threads=False) \
               .aggregate([("_pos", "min")])["_pos_min"]
    if len(first) == idx.size:
        return dup
    keep = np.zeros(idx.size, bool)
    keep[_np(first)] = True
    dup[idx[~keep]] = True
    return dup


def reason_strings(masks: dict[str, np.ndarray], rows: np.ndarray, phrases: dict[str, str]) -> np.ndarray:
    """Reason text per rejected row: every reason that applies, in ORDER, joined by '; '.

    Rows are grouped by their combination of reasons (a bit code), so strings are built once per
    combination, not once per row.
    """
    code = np.zeros(rows.size, dtype=np.int64)
    for bit, key in enumerate(ORDER):
        code |= masks[key][rows].astype(np.int64) << bit
    combos, inverse = np.unique(code, return_inverse=True)
    text = np.array([REASON_SEP.join(phrases[k] for b, k in enumerate(ORDER) if (c >> b) & 1)
                     for c in combos], dtype=object)
    return text[inverse]
