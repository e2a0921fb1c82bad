"""Stable string-id to contiguous-int maps, persisted with the model.

New ids are appended (sorted, so the result does not depend on row order), never renumbered: index ``k``
means the same user or item on every night a checkpoint is carried forward.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq


class IdMap:
    """Bijection between string ids and ``0..n-1``."""

    def __init__(self, ids: list[str] | pd.Index | None = None) -> None:
        index = pd.Index([] if ids is None else list(ids), dtype=object)
        if index.has_duplicates:
            raise ValueError("IdMap: duplicate ids")
        self._index = index

    def __len__(self) -> int:
        return len(self._index)

    @property
    def ids(self) -> pd.Index:
        return self._index

    def extend(self, ids: pd.Series | np.ndarray | list[str]) -> int:
        """Append ids not seen before (sorted); return how many were added."""
        # Distinct ids first (a categorical's observed categories), then Python strings of those only.
        unique = pd.unique(ids if isinstance(ids, pd.Series) else pd.Series(ids, dtype=object))
        new = sorted(set(unique) - set(self._index)) if len(self._index) else sorted(set(unique))
        if new:
            self._index = self._index.append(pd.Index(new, dtype=object))
        return len(new)

    def lookup(self, ids: pd.Series | np.ndarray | list[str], small: bool = False) -> np.ndarray:
        """Indices of ``ids``; ``-1`` for ids not in the map (and for missing values). int64, or with
        ``small`` int32 when every index fits (half the memory for window-sized lookups; same values)."""
        dtype = np.int32 if small and len(self._index) < 2**31 else np.int64
        if isinstance(ids, pd.Series) and isinstance(ids.dtype, pd.CategoricalDtype):
            # The window's ids: integer codes into distinct texts. Look up each text once and index by the
            # codes (one array; factorizing a categorical made four of them, 32 bytes a rating).
            codes = ids.cat.codes.to_numpy()
            cats = ids.cat.categories
            found = self._index.get_indexer(pd.Index(np.asarray(cats, dtype=object))).astype(dtype) \
                if len(cats) else np.empty(0, dtype)
            out = found[codes] if len(found) else np.full(len(codes), -1, dtype)
            if len(found) and (codes < 0).any():     # missing values (code -1) are not in the map
                out[codes < 0] = -1
            return out
        # Hash the column as it is (Arrow-backed text stays in Arrow), then look up each distinct id once:
        # turning millions of ids into Python strings first took 14 s of a 10M-rating night.
        codes, uniques = pd.factorize(pd.Series(ids) if not isinstance(ids, pd.Series) else ids)
        found = self._index.get_indexer(pd.Index(np.asarray(uniques, dtype=object))).astype(dtype)
        return np.where(codes >= 0, found[np.maximum(codes, 0)], -1).astype(dtype, copy=False) if len(found) else \
            np.full(len(codes), -1, dtype)

    def save(self, path: Path) -> None:
        pq.write_table(pa.table({"id": pa.array(list(self._index), pa.string())}), path)

    @classmethod
    def load(cls, path: Path) -> "IdMap":
        return cls(pq.read_table(path).column("id").to_pylist())
