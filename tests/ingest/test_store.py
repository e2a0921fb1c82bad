"""Curated store: idempotent date writes, latest event wins, window bounds. Real Parquet under tmp_path."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tasks import schemas
from tasks.ingest.store import read_window, stored_dates, write_partition
from tasks.workspace import Workspace


def frame(rows: list[tuple], file: str = "in.parquet") -> pd.DataFrame:
    """Rows of (user_id, item_id, rating, 'YYYY-MM-DDTHH:MM:SS', source) as an ingest ``valid`` frame."""
    df = pd.DataFrame(rows, columns=["user_id", "item_id", "rating", "event_time", "source"])
    df["event_time"] = pd.to_datetime(df["event_time"], utc=True).dt.as_unit("us")
    df["rating"] = df["rating"].astype(float)
    df["input_file"] = file
    df["input_row"] = range(len(df))
    return df


def as_set(df: pd.DataFrame) -> set[tuple]:
    return {(r.user_id, r.item_id, r.source, r.rating) for r in df.itertuples()}


def test_writing_a_date_twice_keeps_one_copy(ws: Workspace) -> None:
    df = frame([("m1", "t1", 4, "2026-11-01T10:00:00", "organic"), ("m2", "t1", 2, "2026-11-01T11:00:00", "probe")])
    first = write_partition(ws, "2026-11-01", df)
    second = write_partition(ws, "2026-11-01", df)
    assert first == second and second["rows"] == 2
    assert pq.read_table(second["path"]).num_rows == 2
    assert len(read_window(ws, "2026-11-01", 1)) == 2
    files = sorted(p.name for p in (ws.store / "dt=2026-11-01").iterdir())
    assert files == ["part-0.parquet"]     # no temp files or second parts


def test_rewrite_replaces_the_date_and_empty_clears_it(ws: Workspace) -> None:
    write_partition(ws, "2026-11-01", frame([("m1", "t1", 4, "2026-11-01T10:00:00", "organic")]))
    write_partition(ws, "2026-11-01", frame([("m9", "t9", 1, "2026-11-01T10:00:00", "organic")]))
    assert as_set(read_window(ws, "2026-11-01", 1)) == {("m9", "t9", "organic", 1.0)}
    write_partition(ws, "2026-11-01", frame([]))
    assert read_window(ws, "2026-11-01", 1).empty
    assert stored_dates(ws) == ["2026-11-01"]


def test_latest_event_wins_within_a_date_ties_go_to_the_last_row(ws: Workspace) -> None:
    df = frame([
        ("m1", "t1", 5, "2026-11-01T12:00:00", "organic"),
        ("m1", "t1", 2, "2026-11-01T09:00:00", "organic"),   # earlier event, later row: loses
        ("m2", "t1", 3, "2026-11-01T08:00:00", "organic"),
        ("m2", "t1", 4, "2026-11-01T08:00:00", "organic"),   # same time: the later input row wins
        ("m1", "t1", 1, "2026-11-01T07:00:00", "probe"),     # same pair, probe: kept beside the organic one
    ])
    out = write_partition(ws, "2026-11-01", df)
    # Every row is on record, in input order; the window counts only the winners.
    assert out["rows"] == 5
    stored = pq.read_table(out["path"]).to_pandas()
    assert stored["input_row"].tolist() == [0, 1, 2, 3, 4]
    assert pq.read_schema(out["path"]).equals(schemas.STORE, check_metadata=False)
    win = read_window(ws, "2026-11-01", 1)
    assert as_set(win) == {("m1", "t1", "organic", 5.0), ("m2", "t1", "organic", 4.0), ("m1", "t1", "probe", 1.0)}
    assert win["rating"].tolist() == [5.0, 4.0, 1.0]      # winners keep their input order


def test_latest_event_wins_across_dates_and_ties_go_to_the_later_date(ws: Workspace) -> None:
    write_partition(ws, "2026-11-01", frame([("m1", "t1", 5, "2026-11-01T12:00:00", "organic"),
                                             ("m2", "t2", 3, "2026-11-02T01:00:00", "organic"),
                                             ("m3", "t3", 3, "2026-11-01T12:00:00", "organic")]))
    write_partition(ws, "2026-11-02", frame([("m1", "t1", 1, "2026-11-02T08:00:00", "organic"),
                                             ("m2", "t2", 4, "2026-11-01T23:00:00", "organic"),   # older: loses
                                             ("m3", "t3", 2, "2026-11-01T12:00:00", "organic")]))  # tie: later date
    win = read_window(ws, "2026-11-02", 2)
    assert as_set(win) == {("m1", "t1", "organic", 1.0), ("m2", "t2", "organic", 3.0), ("m3", "t3", "organic", 2.0)}
    assert dict(zip(win["user_id"], win["dt"])) == {"m1": "2026-11-02", "m2": "2026-11-01", "m3": "2026-11-02"}


def test_window_bounds_exclude_the_start_and_include_the_run_date(ws: Workspace) -> None:
    for day in ("2026-10-29", "2026-10-30", "2026-10-31", "2026-11-01", "2026-11-02"):
        write_partition(ws, day, frame([(f"m-{day}", "t", 3, f"{day}T10:00:00", "organic")]))
    win = read_window(ws, "2026-11-01", 3)   # (2026-10-29, 2026-11-01]
    assert sorted(win["dt"]) == ["2026-10-30", "2026-10-31", "2026-11-01"]
    assert list(win.columns) == schemas.RATINGS.names + ["dt"]
    assert sorted(read_window(ws, "2026-11-05", 1)["dt"]) == []
    assert stored_dates(ws) == ["2026-10-29", "2026-10-30", "2026-10-31", "2026-11-01", "2026-11-02"]


def test_empty_store_gives_typed_empty_frame(ws: Workspace) -> None:
    win = read_window(ws, "2026-11-01", 30)
    assert win.empty and list(win.columns) == schemas.RATINGS.names + ["dt"]
    assert str(win["event_time"].dtype) == "datetime64[us, UTC]" and win["rating"].dtype == "float64"
    assert stored_dates(ws) == []


def test_stored_dates_skip_foreign_folders(ws: Workspace) -> None:
    write_partition(ws, "2026-11-01", frame([("m", "t", 3, "2026-11-01T10:00:00", "organic")]))
    (ws.store / "dt=not-a-date").mkdir()
    (ws.store / "dt=2026-11-03").mkdir()         # no part file: nothing stored for that date
    (ws.store / "scratch").mkdir()
    assert stored_dates(ws) == ["2026-11-01"]


def test_invalid_rows_never_reach_the_store(ws: Workspace) -> None:
    good = frame([("m", "t", 3, "2026-11-01T10:00:00", "organic")])
    write_partition(ws, "2026-11-01", good)
    bad = frame([(None, "t", 3, "2026-11-01T10:00:00", "organic")])
    with pytest.raises(ValueError, match="user_id has 1 null"):
        write_partition(ws, "2026-11-01", bad)
    with pytest.raises(ValueError, match="source must be"):
        write_partition(ws, "2026-11-01", frame([("m", "t", 3, "2026-11-01T10:00:00", "promo")]))
    with pytest.raises(ValueError, match="YYYY-MM-DD"):
        write_partition(ws, "1 Nov 2026", good)
    # A failed write leaves the previous file untouched.
    assert as_set(read_window(ws, "2026-11-01", 1)) == {("m", "t", "organic", 3.0)}


def test_ingest_output_goes_straight_into_the_store(ws: Workspace, logs, cfg) -> None:
    import pyarrow as pa

    from tasks.ingest.logs import read_partition
    part = logs / "dt=2026-11-01"
    part.mkdir()
    t0 = dt.datetime(2026, 11, 1, 10, tzinfo=dt.timezone.utc)
    pq.write_table(pa.table({"user_id": ["m1", "m1", "m2"], "item_id": ["t1", "t1", "t1"],
                             "rating": [2.0, 5.0, 3.0],
                             "event_time": pa.array([t0, t0 + dt.timedelta(hours=1), t0],
                                                    pa.timestamp("us", tz="UTC")),
                             "source": ["organic", "organic", "probe"]}), part / "a.parquet")
    res = read_partition(str(logs), "2026-11-01", cfg)
    assert write_partition(ws, "2026-11-01", res.valid)["rows"] == 3       # every valid row on record
    assert read_window(ws, "2026-11-01", 1)["rating"].tolist() == [5.0, 3.0]   # the re-rating counts
    stored = pq.read_table(ws.store / "dt=2026-11-01" / "part-0.parquet")
    assert stored.schema.equals(schemas.STORE, check_metadata=False)
    assert set(stored["input_file"].to_pylist()) == {str(part / "a.parquet")}


def _random_ratings(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({
        "user_id": [f"m{k}" for k in rng.integers(0, 40, n)],
        "item_id": [f"t{k}" for k in rng.integers(0, 30, n)],
        "rating": rng.integers(1, 6, n).astype(float),
        # few distinct times so that ties are common
        "event_time": pd.to_datetime(rng.integers(0, 20, n), unit="s", utc=True).as_unit("us"),
        "source": np.where(rng.random(n) < 0.3, "probe", "organic"),
    })
    df["input_file"] = "in.parquet"
    df["input_row"] = np.arange(n)
    return df


def _reference_latest(df: pd.DataFrame) -> set[tuple]:
    # Reference: pandas sort_values(kind="stable") + drop_duplicates(keep="last").
    ordered = df.assign(_row=np.arange(len(df))).sort_values(["event_time", "_row"], kind="stable")
    last = ordered.drop_duplicates(["user_id", "item_id", "source"], keep="last")
    return {(r.user_id, r.item_id, r.source, r.rating, r.event_time) for r in last.itertuples()}


@pytest.mark.parametrize("pack_limit,buckets,chunk", [(2**62, 4_194_301, 4_000_000), (1, 4_194_301, 4_000_000),
                                                       (2**62, 7, 4_000_000), (2**62, 7, 500), (1, 7, 700)],
                         ids=["packed-key", "ranked-triples", "no-prefilter", "grouped", "grouped-ranked"])
def test_latest_event_matches_a_pandas_reference(ws: Workspace, monkeypatch, pack_limit: int, buckets: int,
                                                 chunk: int) -> None:
    import tasks.ingest.store as store
    monkeypatch.setattr(store, "_PACK_LIMIT", pack_limit)    # 1 forces the path used for huge id spaces
    monkeypatch.setattr(store, "_BUCKETS", buckets)          # 7: the path of large windows (no counting pre-filter)
    monkeypatch.setattr(store, "_CHUNK_ROWS", chunk)         # 500: large windows' repeats found group by group
    df = _random_ratings(3000, seed=1)
    out = write_partition(ws, "2026-11-01", df)
    assert pq.read_table(out["path"]).num_rows == len(df)
    got = read_window(ws, "2026-11-01", 1)
    assert {(r.user_id, r.item_id, r.source, r.rating, r.event_time) for r in got.itertuples()} == \
        _reference_latest(df)
    # Across dates: date order, then row order breaks ties.
    later = _random_ratings(2000, seed=2)
    write_partition(ws, "2026-11-02", later)
    win = read_window(ws, "2026-11-02", 2)
    assert {(r.user_id, r.item_id, r.source, r.rating, r.event_time) for r in win.itertuples()} == \
        _reference_latest(pd.concat([_latest_frame(df), _latest_frame(later)], ignore_index=True))


def _latest_frame(df: pd.DataFrame) -> pd.DataFrame:
    ordered = df.assign(_row=np.arange(len(df))).sort_values(["event_time", "_row"], kind="stable")
    return ordered.drop_duplicates(["user_id", "item_id", "source"], keep="last").sort_values("_row")


def test_categorical_window_has_the_same_content(ws: Workspace) -> None:
    write_partition(ws, "2026-11-01", _random_ratings(500, seed=3))
    write_partition(ws, "2026-11-02", _random_ratings(500, seed=4))
    plain = read_window(ws, "2026-11-02", 2)
    cat = read_window(ws, "2026-11-02", 2, categorical=True)
    assert str(cat["user_id"].dtype) == "category" and str(cat["dt"].dtype) == "category"
    pd.testing.assert_frame_equal(plain, cat.astype({c: plain[c].dtype for c in ("user_id", "item_id",
                                                                                  "source", "dt")}))


def _old_read_window(days: list[pd.DataFrame], dates: list[str]) -> pd.DataFrame:
    """The window as the text-id read computed it before ids became codes (pandas reference): every stored
    row in date then row order; per (user, item, source) the latest event_time wins, then the later date,
    then the later row."""
    rows = pd.concat([d.assign(dt=dt, _day=k, _row=np.arange(len(d))) for k, (d, dt) in enumerate(zip(days, dates))],
                     ignore_index=True)
    last = rows.sort_values(["event_time", "_day", "_row"], kind="stable").drop_duplicates(
        ["user_id", "item_id", "source"], keep="last")
    return last.sort_values(["_day", "_row"])[[*schemas.RATINGS.names, "dt"]].reset_index(drop=True)


def test_window_read_on_codes_equals_the_text_read_on_tricky_cases(ws: Workspace) -> None:
    """Duplicates within and across days, equal times (later date / later row wins), one pair rated as
    organic and as probe, ids new on later days, non-ASCII ids (sort order of the dictionary), and store
    files written four ways: as the store writes them, without Parquet dictionary pages (plain text),
    with a dictionary that overflows its page (pyarrow falls back to plain pages mid-column) and in
    several row groups, each with its own dictionary (as the store wrote them before)."""
    rng = np.random.default_rng(7)
    ids = ["m1", "m10", "m2", "Ärger", "zoë", "émile", "m1 ", "日本"]
    days, dates = [], ["2026-11-01", "2026-11-02", "2026-11-03", "2026-11-04"]
    for k, d in enumerate(dates):
        n = 400
        users = rng.choice(ids[:3 + 2 * k], n)             # later days bring new ids
        items = rng.choice([f"t{j}" for j in range(5 + 3 * k)] + ["Ω"], n)
        hours = rng.integers(0, 3, n)                       # few distinct times: many equal-time ties
        df = frame([(u, i, float(rng.integers(1, 6)), f"2026-11-0{1 + (k if h else 0)}T0{h}:00:00",
                     "probe" if rng.random() < 0.2 else "organic") for u, i, h in zip(users, items, hours)])
        days.append(df)
    out = write_partition(ws, dates[0], days[0])
    assert pq.ParquetFile(out["path"]).metadata.num_row_groups == 1      # one dictionary per day
    for d, df, kwargs in ((dates[1], days[1], {"use_dictionary": False}),
                          (dates[2], days[2], {"dictionary_pagesize_limit": 16, "data_page_size": 64}),
                          (dates[3], days[3], {"row_group_size": 50})):
        table = pa.Table.from_pandas(df[schemas.STORE.names], preserve_index=False).cast(schemas.STORE)
        (ws.store / f"dt={d}").mkdir(parents=True)
        pq.write_table(table, ws.store / f"dt={d}" / "part-0.parquet", **kwargs)
    want = _old_read_window(days, dates)
    got = read_window(ws, dates[-1], 4)
    pd.testing.assert_frame_equal(got, want.astype({c: got[c].dtype for c in want.columns}))
    cat = read_window(ws, dates[-1], 4, categorical=True)
    for c in ("user_id", "item_id"):
        cats = list(cat[c].cat.categories)
        assert cats == sorted(cats)                         # code order is text order (Python's sort)
        assert set(cats) == set(want[c])
    assert cat["user_id"].astype(str).tolist() == want["user_id"].tolist()
    # What the night reads: the same rows without event_time (it chose the latest events and is dropped).
    night = read_window(ws, dates[-1], 4, categorical=True, times=False)
    assert "event_time" not in night.columns
    pd.testing.assert_frame_equal(night, cat.drop(columns=["event_time"]))
    assert list(read_window(ws, "2026-10-01", 1, categorical=True, times=False).columns) == list(night.columns)


def test_chunks_that_share_a_row_groups_dictionary_are_merged_before_unifying(tmp_path) -> None:
    """Parquet's reader hands a row group out in several chunks, each carrying the row group's dictionary;
    they become one chunk per dictionary (unifying then hashes each dictionary once), same values."""
    from tasks.ingest.store import _merge_shared_dictionaries
    n = 600_000     # row groups of 300k rows: the reader hands each out in chunks of about 128k
    ids = np.array([f"m{k}" for k in range(5000)])[np.random.default_rng(0).integers(0, 5000, n)]
    pq.write_table(pa.table({"user_id": ids}), tmp_path / "f.parquet", row_group_size=n // 2)
    col = pq.read_table(tmp_path / "f.parquet", read_dictionary=["user_id"])["user_id"]
    merged = _merge_shared_dictionaries(col)
    assert col.num_chunks > 2 and merged.num_chunks == 2             # two row groups, two dictionaries
    assert merged.cast(pa.string()).to_pylist() == ids.tolist()
