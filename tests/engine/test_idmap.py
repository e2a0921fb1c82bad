"""Id maps stay stable across nights; warm start grows the model without disturbing old rows."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch
from synthetic import mnar_logs, random_biased_mf

from tasks.engine.checkpoint import Checkpoint
from tasks.engine.idmap import IdMap
from tasks.engine.settings import Settings
from tasks.engine.trainer import fit

torch.set_num_threads(1)


def test_extend_appends_sorted_new_ids_and_never_renumbers(tmp_path: Path) -> None:
    m = IdMap()
    assert m.extend(["member-000007", "member-000002", "member-000007"]) == 2
    assert list(m.ids) == ["member-000002", "member-000007"]
    before = m.lookup(["member-000002", "member-000007"]).copy()
    # A later night brings a new id that sorts *before* the old ones: it still goes to the end.
    assert m.extend(pd.Series(["member-000001", "member-000007", "member-000009"])) == 2
    assert list(m.lookup(["member-000002", "member-000007"])) == list(before)
    assert list(m.lookup(["member-000001", "member-000009", "nobody"])) == [2, 3, -1]
    assert m.extend([]) == 0 and len(m) == 4
    m.save(tmp_path / "users.parquet")
    assert list(IdMap.load(tmp_path / "users.parquet").ids) == list(m.ids)


def test_new_ids_do_not_depend_on_row_order() -> None:
    ids = [f"title-{k:06d}" for k in (5, 3, 9, 1)]
    a, b = IdMap(["title-000004"]), IdMap(["title-000004"])
    a.extend(ids)
    b.extend(ids[::-1])
    assert list(a.ids) == list(b.ids)


def test_duplicate_ids_are_refused() -> None:
    with pytest.raises(ValueError, match="duplicate"):
        IdMap(["a", "a"])


def test_grow_keeps_old_rows_and_initialises_new_ones() -> None:
    m, g = random_biased_mf(6, 5, 4, 3.0, 0.3, seed=0)
    uu, ii = torch.meshgrid(torch.arange(6), torch.arange(5), indexing="ij")
    with torch.no_grad():
        before = m(uu.reshape(-1), ii.reshape(-1)).clone()
    m.grow(206, 405, init_scale=0.05, generator=g)
    assert m.n_users == 206 and m.n_items == 405
    with torch.no_grad():
        after = m(uu.reshape(-1), ii.reshape(-1))
        assert torch.equal(before, after)                        # old predictions unchanged, bit for bit
        assert (m.user_bias.weight[6:] == 0).all() and (m.item_bias.weight[5:] == 0).all()
        new_p, new_q = m.user_factors.weight[6:], m.item_factors.weight[5:]
        # Small random init: std near init_scale (800 and 1,600 draws), not zero.
        assert 0.04 < float(new_p.std()) < 0.06 and 0.04 < float(new_q.std()) < 0.06
    m.grow(10, 10, 0.05, g)                                      # shrinking is never done
    assert m.n_users == 206 and m.n_items == 405


def test_warm_start_appends_new_ids_and_fine_tunes_a_bounded_number_of_epochs(tmp_path: Path) -> None:
    logs = mnar_logs(n_users=80, n_items=40, per_user=8, probe_users=50, seed=7)
    cfg = Settings().updated({"debias.method": "plain", "model.max_epochs": 3, "model.finetune_epochs": 2,
                              "model.patience": 10, "model.batch_size": 256})
    night1 = logs.organic[logs.organic["user_id"] < "member-000060"]
    first = fit(night1, logs.probe.iloc[:0], cfg)
    first.checkpoint.save(tmp_path / "ckpt")
    previous = Checkpoint.load(tmp_path / "ckpt")
    old_users, old_items = list(previous.users.ids), list(previous.items.ids)

    second = fit(logs.organic, logs.probe, cfg, previous=previous)
    users, items = list(second.checkpoint.users.ids), list(second.checkpoint.items.ids)
    assert users[:len(old_users)] == old_users and items[:len(old_items)] == old_items
    assert second.new_users == len(users) - len(old_users) == 20
    assert users[len(old_users):] == sorted(users[len(old_users):])
    assert len(second.rounds) <= cfg.model.finetune_epochs
    assert second.checkpoint.info["warm_start"] is True
    # Fine-tuning started from the previous weights: old rows moved only a little in two epochs.
    old_p = previous.model.user_factors.weight.detach()
    new_p = second.checkpoint.model.user_factors.weight.detach()[:len(old_users)]
    assert float((new_p - old_p).abs().mean()) < float(old_p.abs().mean())
    scores, flags = second.checkpoint.score(["member-000079"], [old_items[0]])
    assert np.isfinite(scores).all() and flags[0] == ""


def test_lookup_of_categorical_ids_equals_the_lookup_of_their_text():
    """The window hands ids over as categoricals (codes into sorted texts); the lookup indexes by the codes
    and must agree with the text lookup on unknown ids, missing values and unobserved categories."""
    m = IdMap(["b", "a", "c"])
    cat = pd.Series(pd.Categorical(["a", "c", None, "z", "a", "c"], categories=["a", "b", "c", "z", "never"]))
    assert m.lookup(cat).tolist() == m.lookup(cat.astype(object)).tolist() == [1, 2, -1, -1, 1, 2]
    assert m.lookup(cat).dtype == np.int64
    assert IdMap().lookup(cat).tolist() == [-1] * 6
    assert m.lookup(pd.Series(pd.Categorical([], categories=[]))).tolist() == []
