"""Seeded generator of invented demo logs with a known ground truth.

Scenario (invented, every number made up): a regional library network's reading app. Members rate
audiobooks and e-books from 1 to 5 whole stars. Most members rate titles they finished and loved
("lover" group), some mostly rate titles they abandoned and disliked ("hater"), the rest rate whatever
they happened to open ("random"). Each night about 3% of the day's active members get one "rate a random
title" card: those answers are probe ratings of a uniformly random title, recorded at their true value.

Ground truth
    true rating r(u, i) = clip(round(mu + b_u + b_i + p_u . q_i + noise_sd * z(u, i)), 1, 5)
    where z(u, i) is a standard normal drawn from a hash of (seed, u, i), so a pair's true rating is a
    fixed number that can be recomputed for any pair without storing users x items.

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
import json
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from tasks import schemas

GROUPS = ("lover", "hater", "random")
DEFAULT_GROUP_SHARES = {"lover": 0.60, "hater": 0.15, "random": 0.25}
MEMBER_PREFIX = "member-"
TITLE_PREFIX = "title-"
ID_DIGITS = 6
TRUTH_DIR = "_truth"

# Invented ground-truth parameters (stars). Chosen so true ratings have mean ~3.1 and sd ~1.
_MU = 3.1
_MEMBER_BIAS_SD = 0.35
_TITLE_BIAS_SD = 0.45
_DIM = 4
_FACTOR_SD = 0.55          # dot product sd = 0.55^2 * sqrt(4) ~ 0.6
_NOISE_SD = 0.5
_ACTIVITY_SIGMA = 1.0      # log-normal spread of member activity
_MAX_DRAW_ROUNDS = 10_000  # a member's chance to accept a draw is rarely below e^-4: never reached in practice

_US_PER_DAY = 86_400 * 1_000_000


@dataclass(frozen=True)
class SkewChange:
    """A shift injected from ``from_date`` (inclusive) on, for drift-alert tests and benchmarks.

    activity: per-group multiplier of members' organic activity (``{"lover": 2.0}`` roughly doubles the
        weight of lovers in the day's organic ratings).
    strength: per-group multiplier of the selection strength ``a`` (2.0 = twice as choosy).
    probe_share: replaces the probe share from that day on (e.g. 0.0 to simulate a broken random probe).
    """

    from_date: str
    activity: dict[str, float] = field(default_factory=dict)
    strength: dict[str, float] = field(default_factory=dict)
    probe_share: float | None = None

    def __post_init__(self) -> None:
        dt.date.fromisoformat(self.from_date)
        for name in (*self.activity, *self.strength):
            if name not in GROUPS:
                raise ValueError(f"skew_change: unknown group {name!r} (groups: {', '.join(GROUPS)})")
        if any(v < 0 for v in (*self.activity.values(), *self.strength.values())):
            raise ValueError("skew_change: multipliers must be >= 0")
        if self.probe_share is not None and not 0.0 <= self.probe_share <= 1.0:
            raise ValueError("skew_change.probe_share must lie in [0, 1]")


@dataclass
class GroundTruth:
    """Everything needed to recompute true ratings, plus member groups.

    Arrays are indexed by member number (``member-000123`` -> 123) and title number.
    member_factors: (n_members, dim); title_factors: (n_titles, dim); biases in stars.
    """

    seed: int
    mu: float
    noise_sd: float
    member_bias: np.ndarray
    member_factors: np.ndarray
    member_group: np.ndarray          # int8 codes into GROUPS
    member_activity: np.ndarray       # relative weights, sum 1
    title_bias: np.ndarray
    title_factors: np.ndarray
    title_popularity: np.ndarray      # exposure weights, sum 1
    selection_strength: dict[str, float]
    params: dict = field(default_factory=dict)

    @property
    def n_members(self) -> int:
        return len(self.member_bias)

    @property
    def n_titles(self) -> int:
        return len(self.title_bias)

    @property
    def member_ids(self) -> pa.Array:
        return _format_ids(MEMBER_PREFIX, self.n_members)

    @property
    def title_ids(self) -> pa.Array:
        return _format_ids(TITLE_PREFIX, self.n_titles)

    @property
    def groups(self) -> pd.Series:
        """Group name per member id (index: member ids)."""
        return pd.Series(np.asarray(GROUPS, dtype=object)[self.member_group],
                         index=pd.Index(self.member_ids.to_pylist(), name="user_id"), name="group")

    def true_rating_idx(self, members: np.ndarray, titles: np.ndarray) -> np.ndarray:
        """True ratings (float64, whole stars 1..5) of aligned member/title number arrays."""
        m = np.asarray(members, dtype=np.int64)
        t = np.asarray(titles, dtype=np.int64)
        raw = (self.mu + self.member_bias[m] + self.title_bias[t]
               + np.einsum("ij,ij->i", self.member_factors[m], self.title_factors[t])
               + self.noise_sd * _pair_normal(self.seed, m, t))
        return np.clip(np.rint(raw), 1.0, 5.0)

    def true_rating(self, user_ids, item_ids) -> np.ndarray:
        """True ratings of aligned id sequences (``member-...``, ``title-...``); float64 array."""
        m = parse_ids(user_ids, MEMBER_PREFIX, self.n_members)
        t = parse_ids(item_ids, TITLE_PREFIX, self.n_titles)
        return self.true_rating_idx(m, t)

    def save(self, out_dir: str | Path) -> Path:
        """Write ``<out>/_truth/{members,titles}.parquet`` and ``params.json``."""
        d = Path(out_dir) / TRUTH_DIR
        d.mkdir(parents=True, exist_ok=True)
        members = {"member_id": self.member_ids,
                   "group": pa.array(np.asarray(GROUPS, dtype=object)[self.member_group], pa.string()),
                   "bias": self.member_bias, "activity": self.member_activity}
        members.update({f"f{k}": self.member_factors[:, k] for k in range(self.member_factors.shape[1])})
        titles = {"title_id": self.title_ids, "bias": self.title_bias, "popularity": self.title_popularity}
        titles.update({f"f{k}": self.title_factors[:, k] for k in range(self.title_factors.shape[1])})
        pq.write_table(pa.table(members), d / "members.parquet")
        pq.write_table(pa.table(titles), d / "titles.parquet")
        params = {"seed": self.seed, "mu": self.mu, "noise_sd": self.noise_sd,
                  "selection_strength": self.selection_strength, **self.params}
        (d / "params.json").write_text(json.dumps(params, indent=2, sort_keys=True) + "\n", encoding="utf-8")
        return d

    @classmethod
    def load(cls, out_dir: str | Path) -> "GroundTruth":
        """Read back what :meth:`save` wrote (``out_dir`` is the logs folder holding ``_truth``)."""
        d = Path(out_dir) / TRUTH_DIR
        params = json.loads((d / "params.json").read_text(encoding="utf-8"))
        members = pq.read_table(d / "members.parquet")
        titles = pq.read_table(d / "titles.parquet")
        fm = sorted(c for c in members.column_names if c.startswith("f") and c[1:].isdigit())
        ft = sorted(c for c in titles.column_names if c.startswith("f") and c[1:].isdigit())
        groups = members["group"].to_numpy(zero_copy_only=False)
        code = {g: k for k, g in enumerate(GROUPS)}
        extra = {k: v for k, v in params.items() if k not in ("seed", "mu", "noise_sd", "selection_strength")}
        return cls(
            seed=int(params["seed"]), mu=float(params["mu"]), noise_sd=float(params["noise_sd"]),
            member_bias=members["bias"].to_numpy(),
            member_factors=np.column_stack([members[c].to_numpy() for c in sorted(fm, key=lambda c: int(c[1:]))]),
            member_group=np.array([code[g] for g in groups], dtype=np.int8),
            member_activity=members["activity"].to_numpy(),
            title_bias=titles["bias"].to_numpy(),
            title_factors=np.column_stack([titles[c].to_numpy() for c in sorted(ft, key=lambda c: int(c[1:]))]),
            title_popularity=titles["popularity"].to_numpy(),
            selection_strength={k: float(v) for k, v in params["selection_strength"].items()},
            params=extra,
        )


def _format_ids(prefix: str, n: int) -> pa.Array:
    digits = pc.utf8_lpad(pc.cast(pa.array(np.arange(n, dtype=np.int64)), pa.string()), ID_DIGITS, "0")
    return pc.binary_join_element_wise(pa.scalar(prefix), digits, "")


def parse_ids(ids, prefix: str, n: int) -> np.ndarray:
    """``member-000123`` -> 123 (vectorised). Raises ValueError naming the first bad id."""
    arr = pa.array(ids, pa.string()) if not isinstance(ids, (pa.Array, pa.ChunkedArray)) else ids
    arr = pc.cast(arr, pa.string())
    ok = pc.and_(pc.starts_with(arr, prefix), pc.equal(pc.utf8_length(arr), len(prefix) + ID_DIGITS))
    ok = pc.fill_null(ok, False)
    if not pc.all(ok).as_py():
        bad = arr.filter(pc.invert(ok))
        raise ValueError(f"id {bad[0].as_py()!r} does not look like {prefix}{'0' * ID_DIGITS}")
    nums = pc.cast(pc.utf8_slice_codeunits(arr, len(prefix)), pa.int64()).to_numpy()
    if len(nums) and (nums.min() < 0 or nums.max() >= n):
        raise ValueError(f"id number out of range 0..{n - 1} for {prefix}")
    return nums


def _splitmix64(x: np.ndarray) -> np.ndarray:
    # Bit mixer (public-domain SplitMix64 finaliser): turns consecutive integers into
    # uncorrelated 64-bit values; uint64 arithmetic wraps, which is intended.
    x = (x + np.uint64(0x9E3779B97F4A7C15)).astype(np.uint64)
    x = (x ^ (x >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    x = (x ^ (x >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return x ^ (x >> np.uint64(31))


def _pair_normal(seed: int, m: np.ndarray, t: np.ndarray) -> np.ndarray:
    """A fixed standard normal per (seed, member, title), via Box-Muller on two hashed uniforms."""
    with np.errstate(over="ignore"):
        key = (m.astype(np.uint64) << np.uint64(32)) ^ t.astype(np.uint64) ^ (np.uint64(seed) << np.uint64(56))
        h1 = _splitmix64(key)
        h2 = _splitmix64(h1)
    u1 = ((h1 >> np.uint64(11)).astype(np.float64) + 0.5) / 2.0**53
    u2 = (h2 >> np.uint64(11)).astype(np.float64) / 2.0**53
    return np.sqrt(-2.0 * np.log(u1)) * np.cos(2.0 * np.pi * u2)


def make_truth(n_members: int, n_titles: int, seed: int,
               group_shares: dict[str, float] | None = None,
               selection_strength: dict[str, float] | None = None) -> GroundTruth:
    """Draw the invented world: biases, factors, groups, activity and popularity."""
    if n_members < 1 or n_titles < 1:
        raise ValueError("n_members and n_titles must be >= 1")
    if n_members >= 10**ID_DIGITS or n_titles >= 10**ID_DIGITS:
        raise ValueError(f"at most {10**ID_DIGITS - 1} members and titles (ids have {ID_DIGITS} digits)")
    shares = dict(DEFAULT_GROUP_SHARES if group_shares is None else group_shares)
    unknown = set(shares) - set(GROUPS)
    if unknown:
        raise ValueError(f"group_shares: unknown group(s) {sorted(unknown)} (groups: {', '.join(GROUPS)})")
    p = np.array([max(0.0, float(shares.get(g, 0.0))) for g in GROUPS])
    if p.sum() <= 0:
        raise ValueError("group_shares must have a positive total")
    p = p / p.sum()
    strength = {"lover": 1.0, "hater": 1.0, "random": 0.0}
    strength.update(selection_strength or {})

    rng = np.random.default_rng([seed, 0])
    member_bias = rng.normal(0.0, _MEMBER_BIAS_SD, n_members)
    member_factors = rng.normal(0.0, _FACTOR_SD, (n_members, _DIM))
    member_group = rng.choice(len(GROUPS), size=n_members, p=p).astype(np.int8)
    activity = rng.lognormal(0.0, _ACTIVITY_SIGMA, n_members)
    title_bias = rng.normal(0.0, _TITLE_BIAS_SD, n_titles)
    title_factors = rng.normal(0.0, _FACTOR_SD, (n_titles, _DIM))
    # Zipf-like exposure with exponent ~1: P(rank k) = ln(1 + 1/k) / ln(N + 1), the law of floor(X) for
    # X with density proportional to 1/x on [1, N + 1], which makes a draw O(1) (see _draw_titles).
    ranks = rng.permutation(n_titles) + 1
    popularity = np.log1p(1.0 / ranks) / np.log(n_titles + 1.0)
    return GroundTruth(seed=seed, mu=_MU, noise_sd=_NOISE_SD,
                       member_bias=member_bias, member_factors=member_factors, member_group=member_group,
                       member_activity=activity / activity.sum(),
                       title_bias=title_bias, title_factors=title_factors,
                       title_popularity=popularity / popularity.sum(),
                       selection_strength=strength,
                       params={"group_shares": dict(zip(GROUPS, p.tolist())), "dim": _DIM})


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
             skew_change: SkewChange | dict | None = None,
             selection_strength: dict[str, float] | None = None) -> GroundTruth:
    """Write ``days`` daily partitions from ``start_date`` into ``out_dir`` and return the ground truth.

    Existing ``dt=`` partitions of those dates are overwritten; others are left alone.
    ``probe_share`` is the chance that a member active that day (one with an organic rating) answers
    a probe. ``selection_strength`` overrides the per-group ``a`` (default lover 1, hater 1, random 0).
    """
    start = dt.date.fromisoformat(start_date)
    if days < 1:
        raise ValueError("days must be >= 1")
    if organic_per_day < 0:
        raise ValueError("organic_per_day must be >= 0")
    if not 0.0 <= probe_share <= 1.0:
        raise ValueError("probe_share must lie in [0, 1]")
    if isinstance(skew_change, dict):
        skew_change = SkewChange(**skew_change)
    truth = make_truth(n_members, n_titles, seed, group_shares, selection_strength)
    truth.params.update({"start_date": start_date, "days": days, "organic_per_day": organic_per_day,
                         "probe_share": probe_share,
                         "skew_change": None if skew_change is None else {
                             "from_date": skew_change.from_date, "activity": skew_change.activity,
                             "strength": skew_change.strength, "probe_share": skew_change.probe_share}})
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
        if skew_change is not None and day >= dt.date.fromisoformat(skew_change.from_date):
            for g, v in skew_change.activity.items():
                activity_mult[GROUPS.index(g)] = v
            for g, v in skew_change.strength.items():
                strength[GROUPS.index(g)] *= v
            if skew_change.probe_share is not None:
                share = skew_change.probe_share
        arrays = _draw_day(truth, k, organic_per_day, share, activity_mult, strength, title_by_rank)
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
