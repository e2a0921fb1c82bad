"""Seeded generator of invented demo logs with a known ground truth.

Scenario (invented, every number made up): a regional library network's reading app. Members rate
audiobooks and e-books from 1 to 5 whole stars. Most members rate titles they finished and loved
("lover" group), some mostly rate titles they abandoned and disliked ("hater"), the rest rate whatever
they happened to open ("random"). Each night about 3% of the day's active members get one "rate a random
title" card: those answers are probe ratings of a uniformly random title, recorded at their true value.

Ground truth: ``tasks/operate/demo_world.py`` (members, titles and their true ratings; re-exported here).

Organic selection (the MNAR part)
    A member is drawn by activity (log-normal weights, times a per-group multiplier); a candidate
    title is drawn by Zipf-like popularity (P(rank k) = ln(1 + 1/k) / ln(N + 1)); the member rates
    it with probability ``exp(a * (r - 5))`` (lover), ``exp(-a * (r - 1))`` (hater) or 1 (random);
    otherwise another title is drawn for the same member. So the day's count is exact and members'
    activity is respected. A member may rate the same title again (the store keeps the latest).

Output: ``<out>/dt=YYYY-MM-DD/part-0.parquet`` per day with columns user_id, item_id, rating (float64),
event_time (timestamp[us, UTC]), source ("organic" / "probe"), plus ``<out>/_truth/`` (members.parquet,
titles.parquet, params.json). Readers ignore underscore-prefixed directories.

Memory is O(members + titles + ratings of one day): true ratings are only computed for drawn pairs.
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from tasks import schemas
from tasks.operate.demo_world import (DEFAULT_GROUP_SHARES, GROUPS, ID_DIGITS, MEMBER_PREFIX, TITLE_PREFIX,  # noqa: F401
                                      TRUTH_DIR, GroundTruth, make_truth, parse_ids)


_MAX_DRAW_ROUNDS = 10_000  # a member's chance to accept a draw is rarely below e^-4: never reached in practice

_US_PER_DAY = 86_400 * 1_000_000


@dataclass(frozen=True)
class SkewChange:
    """A shift injected from ``from_date`` (inclusive) on, up to ``until_date`` (inclusive; None: for good),
    for drift-alert tests, benchmarks and the demo's story.

    activity: per-group multiplier of members' organic activity (``{"lover": 2.0}`` roughly doubles the
        weight of lovers in the day's organic ratings).
    strength: per-group multiplier of the selection strength ``a`` (2.0 = twice as choosy).
    probe_share: replaces the probe share from that day on (e.g. 0.0 to simulate a broken random probe).
    """

    from_date: str
    activity: dict[str, float] = field(default_factory=dict)
    strength: dict[str, float] = field(default_factory=dict)
    probe_share: float | None = None
    until_date: str | None = None

    def __post_init__(self) -> None:
        dt.date.fromisoformat(self.from_date)
        if self.until_date is not None and dt.date.fromisoformat(self.until_date) < dt.date.fromisoformat(
                self.from_date):
            raise ValueError("skew_change.until_date must not be before from_date")
        for name in (*self.activity, *self.strength):
            if name not in GROUPS:
                raise ValueError(f"skew_change: unknown group {name!r} (groups: {', '.join(GROUPS)})")
        if any(v < 0 for v in (*self.activity.values(), *self.strength.values())):
            raise ValueError("skew_change: multipliers must be >= 0")
        if self.probe_share is not None and not 0.0 <= self.probe_share <= 1.0:
            raise ValueError("skew_change.probe_share must lie in [0, 1]")

    def applies(self, day: dt.date) -> bool:
        """Is ``day`` inside the change's dates?"""
        return (day >= dt.date.fromisoformat(self.from_date)
                and (self.until_date is None or day <= dt.date.fromisoformat(self.until_date)))

    def to_dict(self) -> dict:
        """As recorded in ``_truth/params.json`` (``until_date`` only when set)."""
        d = {"from_date": self.from_date, "activity": self.activity, "strength": self.strength,
             "probe_share": self.probe_share}
        return d if self.until_date is None else {**d, "until_date": self.until_date}



def _accept_prob(r: np.ndarray, group: np.ndarray, strength: np.ndarray) -> np.ndarray:
    """Chance that a member rates an exposed title of true rating ``r`` (max 1 at the favoured end)."""
    a = strength[group]
    lover = np.exp(a * (r - 5.0))
    hater = np.exp(-a * (r - 1.0))
    return np.where(group == 0, lover, np.where(group == 1, hater, 1.0))


def _draw_titles(rng: np.random.Generator, title_by_rank: np.ndarray, size: int) -> np.ndarray:
    """Titles drawn by popularity: rank = floor(X), X = (N + 1) ** U, i.e. density ~ 1/x on [1, N + 1]."""
    n = title_by_rank.size
    rank = np.floor(np.exp(rng.random(size) * np.log(n + 1.0))).astype(np.int64)
    return title_by_rank[np.clip(rank, 1, n) - 1]


def _draw_day(truth: GroundTruth, day_index: int, organic: int, probe_share: float,
              activity_mult: np.ndarray, strength: np.ndarray, title_by_rank: np.ndarray
              ) -> tuple[np.ndarray, ...]:
    """Member numbers, title numbers, ratings, offsets (us into the day) and is_probe for one day."""
    rng = np.random.default_rng([truth.seed, 1, day_index])
    w = truth.member_activity * activity_mult[truth.member_group]
    member_cdf = np.cumsum(w / w.sum())
    members = np.minimum(np.searchsorted(member_cdf, rng.random(organic), side="right"), truth.n_members - 1)
    titles = np.full(organic, -1, dtype=np.int64)
    ratings = np.zeros(organic)
    pending = np.arange(organic)
    for _ in range(_MAX_DRAW_ROUNDS):
        if pending.size == 0:
            break
        cand = _draw_titles(rng, title_by_rank, pending.size)
        m = members[pending]
        r = truth.true_rating_idx(m, cand)
        take = rng.random(pending.size) < _accept_prob(r, truth.member_group[m], strength)
        titles[pending[take]] = cand[take]
        ratings[pending[take]] = r[take]
        pending = pending[~take]
    if pending.size:  # practically unreachable; keeps the day's count exact regardless
        cand = rng.integers(0, truth.n_titles, pending.size)
        titles[pending] = cand
        ratings[pending] = truth.true_rating_idx(members[pending], cand)

    seen = np.zeros(truth.n_members, dtype=bool)
    seen[members] = True
    active = np.flatnonzero(seen)
    probe_members = active[rng.random(active.size) < probe_share]
    probe_titles = rng.integers(0, truth.n_titles, probe_members.size)
    probe_ratings = truth.true_rating_idx(probe_members, probe_titles)

    all_m = np.concatenate([members, probe_members])
    all_t = np.concatenate([titles, probe_titles])
    all_r = np.concatenate([ratings, probe_ratings])
    is_probe = np.concatenate([np.zeros(organic, bool), np.ones(probe_members.size, bool)])
    offsets = rng.integers(0, _US_PER_DAY, all_m.size)
    order = np.argsort(offsets, kind="stable")   # a log file is in time order
    return all_m[order], all_t[order], all_r[order], offsets[order], is_probe[order]


def _day_table(truth: GroundTruth, day: dt.date, m, t, r, offsets, is_probe,
               member_ids: pa.Array, title_ids: pa.Array) -> pa.Table:
    start_us = int((dt.datetime(day.year, day.month, day.day, tzinfo=dt.timezone.utc)
                    - dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc)) / dt.timedelta(microseconds=1))
    source = np.where(is_probe, schemas.PROBE, schemas.ORGANIC)
    return pa.table({
        "user_id": member_ids.take(pa.array(m)),
        "item_id": title_ids.take(pa.array(t)),
        "rating": pa.array(r, pa.float64()),
        "event_time": pa.array(offsets + start_us, pa.timestamp("us", tz="UTC")),
        "source": pa.array(source, pa.string()),
    })


def generate(out_dir: str | Path, start_date: str, days: int, n_members: int, n_titles: int,
             organic_per_day: int, seed: int, probe_share: float = 0.03,
             group_shares: dict[str, float] | None = None,
             skew_change: SkewChange | dict | list | None = None,
             selection_strength: dict[str, float] | None = None, first_day_index: int = 0) -> GroundTruth:
    """Write ``days`` daily partitions from ``start_date`` into ``out_dir`` and return the ground truth.

    ``skew_change``: one :class:`SkewChange` (or its fields as a dict) or a list of them; on a day
    several cover, the later one in the list wins for each group and for the probe share.

    Existing ``dt=`` partitions of those dates are overwritten; others are left alone.
    ``probe_share`` is the chance that a member active that day (one with an organic rating) answers
    a probe. ``selection_strength`` overrides the per-group ``a`` (default lover 1, hater 1, random 0).
    Day ``k`` draws from a generator seeded by ``(seed, first_day_index + k)``: a second call with
    another ``first_day_index`` adds days that differ from the first call's.
    """
    start = dt.date.fromisoformat(start_date)
    if days < 1:
        raise ValueError("days must be >= 1")
    if organic_per_day < 0:
        raise ValueError("organic_per_day must be >= 0")
    if not 0.0 <= probe_share <= 1.0:
        raise ValueError("probe_share must lie in [0, 1]")
    changes = [c if isinstance(c, SkewChange) else SkewChange(**c)
               for c in (skew_change if isinstance(skew_change, list) else [skew_change] if skew_change else [])]
    truth = make_truth(n_members, n_titles, seed, group_shares, selection_strength)
    recorded = [c.to_dict() for c in changes]
    truth.params.update({"start_date": start_date, "days": days, "organic_per_day": organic_per_day,
                         "probe_share": probe_share,
                         "skew_change": None if not recorded else recorded[0] if len(recorded) == 1 else recorded})
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    member_ids, title_ids = truth.member_ids, truth.title_ids
    base_strength = np.array([truth.selection_strength[g] for g in GROUPS])
    title_by_rank = np.argsort(-truth.title_popularity, kind="stable")
    for k in range(days):
        day = start + dt.timedelta(days=k)
        activity_mult = np.ones(len(GROUPS))
        strength = base_strength.copy()
        share = probe_share
        for change in (c for c in changes if c.applies(day)):
            for g, v in change.activity.items():
                activity_mult[GROUPS.index(g)] = v
            for g, v in change.strength.items():
                strength[GROUPS.index(g)] = base_strength[GROUPS.index(g)] * v
            if change.probe_share is not None:
                share = change.probe_share
        arrays = _draw_day(truth, first_day_index + k, organic_per_day, share, activity_mult, strength, title_by_rank)
        table = _day_table(truth, day, *arrays, member_ids=member_ids, title_ids=title_ids)
        part = out / f"dt={day.isoformat()}"
        part.mkdir(parents=True, exist_ok=True)
        pq.write_table(table, part / "part-0.parquet", compression="zstd")
    truth.save(out)
    return truth


def _parse_pairs(text: str, what: str) -> dict[str, float]:
    pairs: dict[str, float] = {}
    for chunk in filter(None, (c.strip() for c in text.split(","))):
        name, sep, value = chunk.partition("=")
        if not sep:
            raise SystemExit(f"{what}: expected name=value pairs like lover=0.6,hater=0.15, got {chunk!r}")
        pairs[name.strip()] = float(value)
    return pairs


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tasks.operate.demo_data",
                                 description="Write invented library-app rating logs with a known ground truth.")
    ap.add_argument("--out", required=True, help="folder to write dt=YYYY-MM-DD/part-0.parquet into")
    ap.add_argument("--start", default="2026-11-01", help="first date (YYYY-MM-DD)")
    ap.add_argument("--days", type=int, default=8)
    ap.add_argument("--members", type=int, default=1500)
    ap.add_argument("--titles", type=int, default=800)
    ap.add_argument("--organic-per-day", type=int, default=2500)
    ap.add_argument("--probe-share", type=float, default=0.03)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--groups", default="", help="group shares, e.g. lover=0.6,hater=0.15,random=0.25")
    ap.add_argument("--shift-from", default="", help="date from which --shift-activity/--shift-strength apply")
    ap.add_argument("--shift-activity", default="", help="per-group activity multipliers, e.g. lover=2")
    ap.add_argument("--shift-strength", default="", help="per-group selection strength multipliers")
    ap.add_argument("--shift-probe-share", type=float, default=None)
    args = ap.parse_args(argv)
    change = None
    if args.shift_from:
        change = SkewChange(args.shift_from, _parse_pairs(args.shift_activity, "--shift-activity"),
                            _parse_pairs(args.shift_strength, "--shift-strength"), args.shift_probe_share)
    generate(args.out, args.start, args.days, args.members, args.titles, args.organic_per_day, args.seed,
             probe_share=args.probe_share,
             group_shares=_parse_pairs(args.groups, "--groups") or None, skew_change=change)
    print(f"wrote {args.days} day(s) of invented ratings to {args.out}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
