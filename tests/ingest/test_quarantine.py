"""Rejected share and quarantine file (tasks/ingest/quarantine.py): the share that stops a night, counts
by reason, and the quarantine partition replaced whole on every write. Real Parquet files."""

from __future__ import annotations

from pathlib import Path

import pyarrow.parquet as pq
import pytest
from log_files import DAY, T0, good, table, write

from tasks import schemas
from tasks.config import Config
from tasks.ingest.logs import (IngestError, check_rejected_share, read_partition, rejected_by_reason, rejected_share,
                                write_quarantine)


def test_rejected_share_gate(logs: Path, cfg: Config) -> None:
    write(logs, table(good(18) + [("m", "t", 9.0, T0, "organic"), ("m", "u", 3.0, T0, "promo")]))
    res = read_partition(str(logs), DAY, cfg)
    assert rejected_share(res) == pytest.approx(0.1)
    expected = {"rating outside the scale [1, 5] (scale.min, scale.max)": 1,
                "source label not recognised (expected 'organic' or 'probe', see input.organic_label and "
                "input.probe_label)": 1}
    assert rejected_by_reason(res.rejected) == expected
    assert res.reason_counts == expected
    with pytest.raises(IngestError, match=r"2 of 20 rows rejected \(10\.0%\), above input\.max_rejected_share") as e:
        check_rejected_share(res, cfg)
    assert "rating outside the scale" in str(e.value) and "source label not recognised" in str(e.value)
    check_rejected_share(res, cfg.updated({"input.max_rejected_share": 0.1}))   # at the limit: passes


def test_write_quarantine_is_idempotent(logs: Path, cfg: Config, ws) -> None:
    write(logs, table(good(3) + [("m", "t", 9.0, T0, "organic")]))
    res = read_partition(str(logs), DAY, cfg)
    path = Path(write_quarantine(ws, DAY, res.rejected))
    write_quarantine(ws, DAY, res.rejected)
    back = pq.read_table(path)
    assert back.schema.equals(schemas.QUARANTINE, check_metadata=False)
    assert back.num_rows == 1
    assert sorted(p.name for p in path.parent.iterdir()) == ["part-0.parquet"]   # no temp files left
    write_quarantine(ws, DAY, res.rejected.iloc[0:0])     # a clean re-run clears the date
    assert pq.read_table(path).num_rows == 0
