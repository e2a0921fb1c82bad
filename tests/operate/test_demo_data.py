"""Demo data generator: deterministic, skewed as designed, probe share near target, ids well formed."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from tasks import schemas
from tasks.config import Config
from tasks.ingest.logs import list_partition_dates, read_partition
from tasks.operate.demo_data import GroundTruth, SkewChange, generate, main, parse_ids


def load(out: Path) -> pd.DataFrame:
    parts = []
    for d in sorted(out.glob("dt=*")):
        parts.append(pq.read_table(d / "part-0.parquet").to_pandas().assign(dt=d.name[3:]))
    return pd.concat(parts, ignore_index=True)


@pytest.fixture(scope="module")
def world(tmp_path_factory) -> tuple[Path, GroundTruth, pd.DataFrame]:
    """4 invented days, a generous probe share so per-group probe means are precise."""
    out = tmp_path_factory.mktemp("demo")
    truth = generate(out, "2026-11-01", 4, n_members=2000, n_titles=600, organic_per_day=6000, seed=11,
                     probe_share=0.4)
    return out, truth, load(out)


def test_same_seed_gives_byte_identical_files(tmp_path: Path) -> None:
    kw = dict(start_date="2026-11-01", days=3, n_members=300, n_titles=200, organic_per_day=500, seed=5)
    generate(tmp_path / "a", **kw)
    generate(tmp_path / "b", **kw)
    generate(tmp_path / "c", **{**kw, "seed": 6})
    files = sorted(p.relative_to(tmp_path / "a") for p in (tmp_path / "a").rglob("*") if p.is_file())
    assert len(files) == 3 + 3    # three days + members, titles, params
    for rel in files:
        assert (tmp_path / "a" / rel).read_bytes() == (tmp_path / "b" / rel).read_bytes(), rel
    assert not load(tmp_path / "a").equals(load(tmp_path / "c"))


def test_ids_and_columns_follow_the_contract(world) -> None:
    out, truth, df = world
    assert df["user_id"].str.fullmatch(r"member-\d{6}").all()
    assert df["item_id"].str.fullmatch(r"title-\d{6}").all()
    schema = pq.read_schema(out / "dt=2026-11-01" / "part-0.parquet")
    assert [(f.name, f.type) for f in schema] == [(f.name, f.type) for f in schemas.RATINGS]
    assert set(df["source"]) == {schemas.ORGANIC, schemas.PROBE}
    assert set(df["rating"].unique()) <= {1.0, 2.0, 3.0, 4.0, 5.0}
    # Every event lies inside its partition's UTC day, and files are in time order.
    day = pd.to_datetime(df["dt"]).dt.tz_localize("UTC")
    assert ((df["event_time"] >= day) & (df["event_time"] < day + pd.Timedelta(days=1))).all()
    assert all(g["event_time"].is_monotonic_increasing for _, g in df.groupby("dt"))


def test_every_rating_is_the_true_rating(world) -> None:
    out, truth, df = world
    assert np.array_equal(truth.true_rating(df["user_id"], df["item_id"]), df["rating"].to_numpy())
    again = GroundTruth.load(out)     # what tests and benchmarks load from <out>/_truth
    assert np.array_equal(again.true_rating(df["user_id"], df["item_id"]), df["rating"].to_numpy())
    assert again.groups.equals(truth.groups)


def test_true_ratings_look_like_star_ratings(world) -> None:
    _, truth, _ = world
    rng = np.random.default_rng(0)
    r = truth.true_rating_idx(rng.integers(0, truth.n_members, 50_000), rng.integers(0, truth.n_titles, 50_000))
    counts = np.bincount(r.astype(int), minlength=6)[1:]
    assert 2.8 < r.mean() < 3.3              # "realistic mean ~3" (the brief's target)
    assert (counts > 0.02 * r.size).all()    # every star level is used


def test_group_shares_near_target(world) -> None:
    _, truth, _ = world
    share = truth.groups.value_counts(normalize=True)
    for group, target in {"lover": 0.60, "hater": 0.15, "random": 0.25}.items():
        sd = math.sqrt(target * (1 - target) / truth.n_members)   # binomial; 4 sd: common practice, no source
        assert abs(share[group] - target) < 4 * sd, (group, share[group])


def test_organic_ratings_are_skewed_by_group(world) -> None:
    _, truth, df = world
    df = df.assign(group=truth.groups.reindex(df["user_id"]).to_numpy())
    means = df.groupby(["group", "source"])["rating"].mean().unstack()
    gap = means[schemas.ORGANIC] - means[schemas.PROBE]
    assert gap["lover"] > 0.5, gap          # lovers rate what they like: a plain model over-predicts them
    assert gap["hater"] < -0.5, gap
    assert abs(gap["random"]) < 0.3, gap    # random raters: no selection on the rating itself
    # Probe ratings are MAR: their mean matches the true mean over uniformly random titles.
    probes = df[df["source"] == schemas.PROBE]
    rng = np.random.default_rng(1)
    m = rng.integers(0, truth.n_members, 100_000)
    uniform_mean = truth.true_rating_idx(m, rng.integers(0, truth.n_titles, m.size)).mean()
    assert abs(probes["rating"].mean() - uniform_mean) < 4 * probes["rating"].std() / math.sqrt(len(probes))


def test_probe_share_near_target(world) -> None:
    _, _, df = world
    for _, day in df.groupby("dt"):
        active = day.loc[day["source"] == schemas.ORGANIC, "user_id"].nunique()
        probes = day[day["source"] == schemas.PROBE]
        assert probes["user_id"].is_unique                  # one probe card per member per night
        sd = math.sqrt(active * 0.4 * 0.6)      # binomial spread of the probe count; 4 sd: common practice, no source
        assert abs(len(probes) - 0.4 * active) < 4 * sd, (len(probes), active)


def test_default_probe_share_is_three_percent(tmp_path: Path) -> None:
    generate(tmp_path, "2026-11-01", 2, n_members=4000, n_titles=300, organic_per_day=8000, seed=2)
    df = load(tmp_path)
    active = sum(d.loc[d["source"] == schemas.ORGANIC, "user_id"].nunique() for _, d in df.groupby("dt"))
    probes = int((df["source"] == schemas.PROBE).sum())
    # binomial spread, normal approximation; 4 sd: common practice, no source
    assert abs(probes - 0.03 * active) < 4 * math.sqrt(active * 0.03 * 0.97)


def test_skew_change_shifts_lovers_share_from_the_given_day(tmp_path: Path) -> None:
    truth = generate(tmp_path, "2026-11-01", 4, n_members=1500, n_titles=300, organic_per_day=3000, seed=3,
                     skew_change=SkewChange("2026-11-03", activity={"lover": 4.0}, probe_share=0.0))
    df = load(tmp_path)
    df = df.assign(group=truth.groups.reindex(df["user_id"]).to_numpy())
    organic = df[df["source"] == schemas.ORGANIC]
    lover_share = organic.groupby("dt")["group"].apply(lambda g: (g == "lover").mean())
    assert lover_share["2026-11-03"] > lover_share["2026-11-02"] + 0.15
    assert lover_share["2026-11-04"] > lover_share["2026-11-01"] + 0.15
    probes = df[df["source"] == schemas.PROBE].groupby("dt").size()
    assert probes.get("2026-11-02", 0) > 0 and probes.get("2026-11-03", 0) == 0


def test_large_world_never_builds_users_by_items(tmp_path: Path) -> None:
    # 400k x 90k pairs would be 36e9 cells; only sampled pairs are ever evaluated.
    truth = generate(tmp_path, "2026-11-01", 1, n_members=400_000, n_titles=90_000, organic_per_day=20_000, seed=4)
    df = load(tmp_path)
    assert (df["source"] == schemas.ORGANIC).sum() == 20_000
    assert truth.member_factors.shape == (400_000, truth.member_factors.shape[1])


def test_ingest_reads_generated_logs_cleanly(world) -> None:
    out, _, df = world
    assert list_partition_dates(str(out)) == ["2026-11-01", "2026-11-02", "2026-11-03", "2026-11-04"]
    res = read_partition(str(out), "2026-11-02", Config())
    assert res.rows_rejected == 0 and res.rows_valid == int((df["dt"] == "2026-11-02").sum())


def test_cli_writes_partitions(tmp_path: Path) -> None:
    assert main(["--out", str(tmp_path), "--days", "2", "--members", "50", "--titles", "40",
                 "--organic-per-day", "30", "--seed", "1", "--shift-from", "2026-11-02",
                 "--shift-activity", "hater=3"]) == 0
    assert sorted(p.name for p in tmp_path.iterdir()) == ["_truth", "dt=2026-11-01", "dt=2026-11-02"]


def test_bad_arguments_are_named() -> None:
    with pytest.raises(ValueError, match="unknown group"):
        SkewChange("2026-11-01", activity={"fans": 2.0})
    with pytest.raises(ValueError, match="member-000000"):
        parse_ids(["member-12"], "member-", 10)
    with pytest.raises(ValueError, match="out of range"):
        parse_ids(["member-000010"], "member-", 10)


def test_popularity_sampler_matches_stored_popularity() -> None:
    from tasks.operate.demo_data import _draw_titles, make_truth
    truth = make_truth(10, 500, seed=9)
    by_rank = np.argsort(-truth.title_popularity, kind="stable")
    n = 200_000
    counts = np.bincount(_draw_titles(np.random.default_rng(0), by_rank, n), minlength=truth.n_titles)
    p = truth.title_popularity
    assert abs(p.sum() - 1.0) < 1e-12
    top = by_rank[:20]           # the most popular titles: a clearly long-tailed head
    # binomial spread per title, normal approximation; 5 sd over 20 titles: common practice, no source
    assert np.all(np.abs(counts[top] - n * p[top]) < 5 * np.sqrt(n * p[top] * (1 - p[top])))
    assert p[by_rank[0]] > 20 * p[by_rank[-1]]
