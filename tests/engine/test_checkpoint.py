"""A checkpoint scores (u, i) pairs through the documented pipeline and survives save and load unchanged."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import torch
from synthetic import random_biased_mf

from tasks.engine.checkpoint import Checkpoint
from tasks.engine.idmap import IdMap
from tasks.engine.recalibration import MonotoneMap

USERS = [f"member-{k:06d}" for k in range(5)]
ITEMS = [f"title-{k:06d}" for k in range(4)]


def _checkpoint(per_user: bool = True) -> Checkpoint:
    model, _ = random_biased_mf(5, 4, 3, 3.1, 0.7, seed=11)
    ck = Checkpoint(model=model, users=IdMap(USERS), items=IdMap(ITEMS), scale_min=1.0, scale_max=5.0,
                    method="per_user", info={"seed": 7})
    if per_user:
        ck.score_map = MonotoneMap(np.array([0.0, 3.0, 6.0]), np.array([0.5, 3.5, 5.5]))
        ck.user_scale = np.array([1.0, 0.5, 2.0, 0.0, 1.5])
        ck.user_offset = np.array([0.0, 0.3, -0.4, 2.0, -9.0])
    return ck


def _weights(ck: Checkpoint) -> dict[str, np.ndarray]:
    m = ck.model
    return {"mu": float(m.global_mean), "bu": m.user_bias.weight.detach().double().numpy()[:, 0],
            "bi": m.item_bias.weight.detach().double().numpy()[:, 0],
            "p": m.user_factors.weight.detach().double().numpy(), "q": m.item_factors.weight.detach().double().numpy()}


def test_score_follows_map_then_scale_then_offset_then_clip() -> None:
    ck = _checkpoint()
    w = _weights(ck)
    u, i = np.repeat(np.arange(5), 4), np.tile(np.arange(4), 5)
    raw = w["mu"] + w["bu"][u] + w["bi"][i] + (w["p"][u] * w["q"][i]).sum(1)
    np.testing.assert_allclose(ck.raw_scores(u, i), raw, rtol=0, atol=1e-5)
    # Reference: the pipeline of the module docstring, written out with numpy.
    expected = np.clip(np.interp(raw, [0.0, 3.0, 6.0], [0.5, 3.5, 5.5]) * ck.user_scale[u] + ck.user_offset[u], 1, 5)
    scores, flags = ck.score([USERS[k] for k in u], [ITEMS[k] for k in i])
    np.testing.assert_allclose(scores, expected, rtol=0, atol=1e-5)
    assert set(flags) == {""}
    assert np.all(scores[u == 4] == 1.0) and np.all(scores[u == 3] == 2.0)    # clipped; scale 0: offset only


def test_unknown_ids_use_the_documented_fallbacks() -> None:
    ck = _checkpoint(per_user=False)
    w = _weights(ck)
    scores, flags = ck.score(["nobody", USERS[2], "nobody", USERS[1]], [ITEMS[3], "nothing", "nothing", ITEMS[0]])
    assert flags.tolist() == ["unknown_user", "unknown_item", "unknown_both", ""]
    np.testing.assert_allclose(scores[:3], [w["mu"] + w["bi"][3], w["mu"] + w["bu"][2], w["mu"]], atol=1e-5)


def test_save_and_load_keep_every_score_and_fact(tmp_path: Path) -> None:
    ck = _checkpoint()
    ck.save(tmp_path / "ck")
    back = Checkpoint.load(tmp_path / "ck")
    assert (back.method, back.info, back.scale_min, back.scale_max) == ("per_user", {"seed": 7}, 1.0, 5.0)
    pairs = (USERS + ["nobody"], ITEMS + ["nothing", ITEMS[0]])
    for a, b in zip(back.score(*pairs), ck.score(*pairs)):
        np.testing.assert_array_equal(a, b)
    for name, value in ck.model.state_dict().items():
        assert torch.equal(back.model.state_dict()[name], value), name
    # Saving again writes the same bytes: checkpoints are part of the byte-identical outputs.
    back.save(tmp_path / "again")
    for f in sorted((tmp_path / "ck").iterdir()):
        assert (tmp_path / "again" / f.name).read_bytes() == f.read_bytes(), f.name
    # Without per-user parts no per-user files are written, and loading gives None.
    _checkpoint(per_user=False).save(tmp_path / "plain")
    assert not (tmp_path / "plain" / "user_offset.parquet").exists()
    plain = Checkpoint.load(tmp_path / "plain")
    assert plain.user_offset is None and plain.user_scale is None


def test_load_names_what_is_wrong(tmp_path: Path) -> None:
    with pytest.raises(FileNotFoundError, match="meta.json missing"):
        Checkpoint.load(tmp_path / "nothing-here")
    _checkpoint().save(tmp_path / "ck")
    meta = json.loads((tmp_path / "ck" / "meta.json").read_text())
    (tmp_path / "ck" / "meta.json").write_text(json.dumps({**meta, "format": "tarewise-checkpoint/0"}))
    with pytest.raises(ValueError, match="unsupported checkpoint format 'tarewise-checkpoint/0'"):
        Checkpoint.load(tmp_path / "ck")
