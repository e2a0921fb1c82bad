"""``tarewise score``: score arbitrary (user_id, item_id) pairs read from Parquet with a version."""

from __future__ import annotations

from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from tasks.config import Config
from tasks.publish.versions import VersionError, live_version, load_checkpoint
from tasks.schemas import SCORES
from tasks.workspace import Workspace


def score_pairs(cfg: Config, pairs: Path, out: Path, version: str | None = None) -> tuple[int, str, int]:
    """Write schemas.SCORES rows for every input pair; return (rows, version used, rows with a fallback)."""
    ws = Workspace.at(cfg.paths.workspace)
    vid = version or live_version(ws)
    if vid is None:
        raise VersionError(f"no live version in {ws.root}; run a night first or pass --version")
    ckpt = load_checkpoint(ws, vid)
    if ckpt is None:
        raise VersionError(f"version {vid} has no model in {ws.versions / vid}")
    try:
        table = pq.read_table(pairs)
    except (OSError, pa.ArrowInvalid) as exc:
        raise ValueError(f"{pairs}: not a readable Parquet file ({exc})") from None
    missing = [c for c in ("user_id", "item_id") if c not in table.column_names]
    if missing:
        raise ValueError(f"{pairs}: missing column(s) {missing}; expected user_id, item_id")
    df = table.select(["user_id", "item_id"]).to_pandas()
    nulls = df["user_id"].isna() | df["item_id"].isna()
    if nulls.any():
        raise ValueError(f"{pairs}: null id at row {int(nulls.to_numpy().nonzero()[0][0])}")
    df["user_id"], df["item_id"] = df["user_id"].astype(str), df["item_id"].astype(str)
    scores, flags = ckpt.score(df["user_id"], df["item_id"])
    df["score"] = scores.astype("float32")
    df["fallback"] = flags
    out.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(pa.Table.from_pandas(df, schema=SCORES, preserve_index=False), out)
    return len(df), vid, int((flags != "").sum())
