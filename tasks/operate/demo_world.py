"""The invented world behind the demo logs: members, titles, their true ratings (a known ground truth).

Scenario (invented, every number made up): a regional library network's reading app; see
``tasks/operate/demo_data.py`` for how days of ratings are drawn from this world.

Ground truth
    true rating r(u, i) = clip(round(mu + b_u + b_i + p_u . q_i + noise_sd * z(u, i)), 1, 5)
    where z(u, i) is a standard normal drawn from a hash of (seed, u, i), so a pair's true rating is a
    fixed number that can be recomputed for any pair without storing users x items.

Saved as ``<logs>/_truth/`` (members.parquet, titles.parquet, params.json); readers of the logs skip
underscore-prefixed folders.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

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
