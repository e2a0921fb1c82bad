"""``tarewise score`` (tasks/publish/scoring_io.py): ids are normalised by ingest's own rule, so a member
stored as ``23`` is found when the pairs give ``23.0``, and an id ingest would refuse is an error naming
the row, not a silent "unknown user". A real small version, published through tasks.publish.versions."""

from __future__ import annotations

import pandas as pd
import pytest
from versions_kit import publish_night

from tasks.config import Config
from tasks.publish.scoring_io import score_pairs
from tasks.workspace import Workspace

MEMBERS = [str(k) for k in range(20, 50)]      # integer-like member ids: "20" .. "49"


@pytest.fixture(scope="module")
def numbered(tmp_path_factory) -> Config:
    root = tmp_path_factory.mktemp("score")
    publish_night(Workspace.at(root / "ws"), "2026-11-01", user_ids=MEMBERS)
    return Config().with_overrides(workspace=str(root / "ws"))


def test_integer_ids_given_as_floats_score_like_the_integers(numbered: Config, tmp_path) -> None:
    as_text = tmp_path / "text.parquet"
    as_float = tmp_path / "float.parquet"
    pd.DataFrame({"user_id": ["23", "24"], "item_id": ["title-000001"] * 2}).to_parquet(as_text)
    pd.DataFrame({"user_id": [23.0, 24.0], "item_id": ["title-000001"] * 2}).to_parquet(as_float)
    score_pairs(numbered, as_text, tmp_path / "a.parquet")
    n, _, fallbacks = score_pairs(numbered, as_float, tmp_path / "b.parquet")
    a, b = pd.read_parquet(tmp_path / "a.parquet"), pd.read_parquet(tmp_path / "b.parquet")
    assert (n, fallbacks) == (2, 0)
    assert b["user_id"].tolist() == ["23", "24"] and b["fallback"].tolist() == ["", ""]
    assert b["score"].tolist() == a["score"].tolist()


@pytest.mark.parametrize("ids, phrase", [
    ([23.5, 24.0], "row 0: user_id is neither text nor a whole number"),
    (["23", "   "], "row 1: user_id is missing or empty"),
    (["23", " 24"], "row 1: user_id has blanks at its start or end"),
    (["23", None], "row 1: user_id is missing or empty"),
])
def test_an_id_ingest_would_refuse_is_an_error_naming_the_row(numbered: Config, tmp_path, ids, phrase) -> None:
    pairs = tmp_path / "pairs.parquet"
    pd.DataFrame({"user_id": ids, "item_id": ["title-000001"] * 2}).to_parquet(pairs)
    with pytest.raises(ValueError, match=rf"{pairs}: 1 pair\(s\) with an id ingest refuses; first at {phrase}"):
        score_pairs(numbered, pairs, tmp_path / "out.parquet")
    assert not (tmp_path / "out.parquet").exists()
