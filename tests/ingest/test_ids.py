"""The id rule (tasks/ingest/ids.py) shared by ingest and ``score``: blanks only count as empty, blanks at
either end are refused, whole-number floats become integer text. Checked against Python's own ``str``
methods over many kinds of text, and on Arrow arrays that are slices of larger ones."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

from tasks.ingest.errors import IngestError
from tasks.ingest.ids import as_text, id_masks

TEXT = ["member-1", "", "   ", "\t\n", "\u00a0", " member-1", "member-1 ", "\u3000title", "title\u2003", "名前",
        "名前 ", "é", "inner  blanks", "x" * 9, "  " + "y" * 9, None, "\u200b", "📚", "a\r", "\x1cz"]


def _reference(ids: list[str | None], max_len: int) -> dict[str, list[bool]]:
    # Reference: Python's str.strip() and len() (Unicode white space, characters).
    return {"null": [s is None or s.strip() == "" for s in ids],
            "long": [s is not None and s.strip() != "" and len(s) > max_len for s in ids],
            "padded": [s is not None and s.strip() != "" and s.strip() != s for s in ids]}


@pytest.mark.parametrize("offset", [0, 3])
def test_id_masks_match_python_strip_on_whole_and_sliced_arrays(offset: int) -> None:
    ids = ["pad"] * offset + TEXT
    arr = pa.chunked_array([pa.array(ids, pa.string()).slice(offset)])
    masks = id_masks(arr, np.zeros(len(TEXT), bool), max_len=8)
    got = {k: masks[k].tolist() for k in ("null", "long", "padded")}
    assert got == _reference(TEXT, 8)


def test_ids_given_as_numbers_become_integer_text() -> None:
    text, not_whole = as_text(pa.chunked_array([pa.array([23.0, -7.0, 23.5, None, float("nan")])]), "pairs")
    assert text.to_pylist() == ["23", "-7", None, None, None]
    assert not_whole.tolist() == [False, False, True, False, True]
    ints, _ = as_text(pa.chunked_array([pa.array([23, 0], pa.int16())]), "pairs")
    assert ints.to_pylist() == ["23", "0"]


def test_a_type_that_cannot_hold_ids_names_the_column() -> None:
    with pytest.raises(IngestError, match=r"pairs\.parquet: column 'user_id' has type bool; expected text or whole"):
        as_text(pa.chunked_array([pa.array([True])]), "pairs.parquet: column 'user_id'")
