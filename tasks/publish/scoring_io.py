"""``tarewise score``: score arbitrary (user_id, item_id) pairs read from Parquet with a version.

Ids go through ingest's own rule (``tasks/ingest/ids.py``): ``23.0`` is the member stored as ``23``, and an
id ingest would quarantine (blanks only, blanks at either end, not a whole number, too long) is an error
naming the row: it cannot be any stored member or title, and a silent "unknown" score would hide that.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from tasks.config import Config
from tasks.ingest.ids import ID_CHECKS, as_text, id_masks
from tasks.ingest.rows import REASON_SEP, reason_phrases
from tasks.publish.versions import VersionError, live_version, load_checkpoint_checked
from tasks.schemas import SCORES
from tasks.workspace import Workspace


def score_pairs(cfg: Config, pairs: Path, out: Path, version: str | None = None) -> tuple[int, str, int]:
    """Write schemas.SCORES rows for every input pair; return (rows, version used, rows with a fallback)."""
    ws = Workspace.at(cfg.paths.workspace)
    vid = version or live_version(ws)
    if vid is None:
        raise VersionError(f"no live version in {ws.root}; run a night first or pass --version")
    ckpt, damage = load_checkpoint_checked(ws, vid)
    if damage:
        raise VersionError(f"version {vid} cannot score: {damage}")
    if ckpt is None:
        raise VersionError(f"version {vid} has no model in {ws.versions / vid}")
    try:
        table = pq.read_table(pairs)
    except (OSError, pa.ArrowInvalid) as exc:
        raise ValueError(f"{pairs}: not a readable Parquet file ({exc})") from None
    missing = [c for c in ("user_id", "item_id") if c not in table.column_names]
    if missing:
        raise ValueError(f"{pairs}: missing column(s) {missing}; expected user_id, item_id")
    df = _ids(table, pairs, cfg)
    scores, flags = ckpt.score(df["user_id"], df["item_id"])
    df["score"] = scores.astype("float32")
    df["fallback"] = flags
    out.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(pa.Table.from_pandas(df, schema=SCORES, preserve_index=False), out)
    return len(df), vid, int((flags != "").sum())


def _ids(table: pa.Table, pairs: Path, cfg: Config) -> pd.DataFrame:
    """``user_id`` and ``item_id`` as ingest stores ids (text); raises ValueError naming the first row
    with an id ingest would refuse, and how many such rows there are."""
    out, refused, why = {}, np.zeros(table.num_rows, bool), {}
    for col in ("user_id", "item_id"):
        text, not_whole = as_text(table[col], f"{pairs}: column '{col}'")
        masks = id_masks(text, not_whole, cfg.input.max_id_length)
        for k in ID_CHECKS:
            refused |= masks[k]
            why[f"{col}_{k}"] = masks[k]
        out[col] = text.to_pandas()
    if refused.any():
        row = int(np.flatnonzero(refused)[0])
        phrases = reason_phrases(cfg)
        reasons = REASON_SEP.join(phrases[key] for key, mask in why.items() if mask[row])
        raise ValueError(f"{pairs}: {int(refused.sum())} pair(s) with an id ingest refuses; first at row {row}: "
                         f"{reasons}")
    return pd.DataFrame(out)
