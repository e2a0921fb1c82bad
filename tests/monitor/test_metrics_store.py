"""The metrics time series: one row per night, a re-run replaces its row, bad rows and files are named."""

from __future__ import annotations

import pytest

from tasks.monitor.metrics_store import (
    MetricsStoreError,
    prune_metrics,
    read_metrics,
    row_of,
    write_night_metrics,
)


def test_metrics_store_replaces_a_rerun_date_and_keeps_order(ws):
    write_night_metrics(ws, {"run_date": "2024-06-02", "skew_mean_shift": 0.2})
    write_night_metrics(ws, {"run_date": "2024-06-01", "skew_mean_shift": 0.1})
    write_night_metrics(ws, {"run_date": "2024-06-02", "skew_mean_shift": 0.25, "skew_test": "chi2"})
    m = read_metrics(ws)
    assert m["run_date"].tolist() == ["2024-06-01", "2024-06-02"]
    assert m["skew_mean_shift"].tolist() == [0.1, 0.25] and m.loc[1, "skew_test"] == "chi2"
    assert read_metrics(ws, until="2024-06-01")["run_date"].tolist() == ["2024-06-01"]
    assert prune_metrics(ws, before="2024-06-02") == 1
    assert read_metrics(ws)["run_date"].tolist() == ["2024-06-02"]


def test_metrics_store_refuses_bad_rows_and_names_a_bad_file(ws):
    with pytest.raises(MetricsStoreError, match="not_a_metric"):
        write_night_metrics(ws, {"run_date": "2024-06-01", "not_a_metric": 1.0})
    with pytest.raises(MetricsStoreError, match="YYYY-MM-DD"):
        write_night_metrics(ws, {"run_date": "06/01/2024"})
    with pytest.raises(MetricsStoreError, match="skew_organic_n"):
        write_night_metrics(ws, {"run_date": "2024-06-01", "skew_organic_n": "many"})
    ws.metrics.parent.mkdir(parents=True, exist_ok=True)
    ws.metrics.write_bytes(b"this is not parquet")
    with pytest.raises(MetricsStoreError, match=str(ws.metrics)):
        write_night_metrics(ws, {"run_date": "2024-06-01"})


def test_row_of_a_night_and_a_missing_night_named(ws):
    write_night_metrics(ws, {"run_date": "2024-06-01", "skew_mean_shift": 0.1, "candidate_n": 40})
    series = read_metrics(ws)
    row = row_of(series, "2024-06-01", ws.metrics)
    assert row["skew_mean_shift"] == 0.1 and row["candidate_n"] == 40 and set(row) == set(series.columns)
    with pytest.raises(MetricsStoreError, match=f"no metrics stored for 2024-06-02 in {ws.metrics}"):
        row_of(series, "2024-06-02", ws.metrics)
