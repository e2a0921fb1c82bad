"""The anchor: recent versions re-scored on tonight's held-out probe ratings, on the rows each knows,
and the one the candidate trails most (tasks/evaluate/anchor.py). Real models trained by the engine on
invented selection-skewed logs (tests/synthetic.py); every number is invented."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch
from synthetic import mnar_logs

from tasks.config import Config
from tasks.engine.trainer import fit
from tasks.evaluate.anchor import AnchorComparison, PriorVersion, compare_with_anchor
from tasks.train.settings import engine_settings

torch.set_num_threads(1)
CFG = Config().updated({"model.max_epochs": 3, "model.batch_size": 128, "model.dim": 4})


@pytest.fixture(scope="module")
def night():
    """Tonight's held-out probe ratings and three models: a well-trained one, one trained for a single
    epoch (weaker), and one that never saw the first 20 members (trained without their ratings)."""
    logs = mnar_logs(n_users=90, n_items=40, per_user=10, probe_users=70, probes_per_user=6, seed=3)
    good = fit(logs.organic, logs.probe, engine_settings(CFG))
    weak = fit(logs.organic, logs.probe, engine_settings(CFG.updated({"model.max_epochs": 1})))
    strangers = set(logs.user_ids[:20])
    partial = fit(logs.organic[~logs.organic["user_id"].isin(strangers)],
                  logs.probe[~logs.probe["user_id"].isin(strangers)], engine_settings(CFG))
    heldout = good.probe_heldout          # the split is by (member, title): the same rows for every model
    return heldout, good.checkpoint, weak.checkpoint, partial.checkpoint, strangers


def _mae(ckpt, rows: pd.DataFrame) -> float:
    pred, _ = ckpt.score(rows["user_id"], rows["item_id"])
    return float(np.mean(np.abs(pred - rows["rating"].to_numpy(float))))


def test_anchor_is_the_version_the_candidate_trails_most_on_the_same_rows(night):
    heldout, good, weak, _, _ = night
    a = compare_with_anchor(heldout, weak, [PriorVersion("v1", "2026-11-01", weak),
                                            PriorVersion("v2", "2026-11-02", good)], min_rows=10)
    assert a.version_id == "v2" and a.compared == 2 and a.n == len(heldout)
    assert a.mae == pytest.approx(_mae(good, heldout)) and a.candidate_mae == pytest.approx(_mae(weak, heldout))
    assert a.margin == pytest.approx(_mae(weak, heldout) - _mae(good, heldout)) and a.margin > 0
    assert AnchorComparison.from_dict(a.to_dict()) == a


def test_members_an_old_version_never_saw_are_left_out_of_its_comparison(night):
    heldout, good, _, partial, strangers = night
    known = heldout[~heldout["user_id"].isin(strangers)]
    assert 0 < len(known) < len(heldout)
    a = compare_with_anchor(heldout, good, [PriorVersion("v1", "2026-11-01", partial)], min_rows=10,
                            live_id="v1", live=partial)
    assert a.n == len(known) and a.is_live
    assert a.mae == pytest.approx(_mae(partial, known))
    assert a.candidate_mae == pytest.approx(_mae(good, known))   # the candidate on exactly those rows
    assert a.live_mae == pytest.approx(_mae(partial, known))


def test_versions_with_too_few_known_rows_are_skipped_with_a_line_and_none_left_is_no_anchor(night):
    heldout, good, _, partial, _ = night
    assert compare_with_anchor(heldout, good, [], min_rows=10) is None      # first night
    assert compare_with_anchor(heldout, good, [PriorVersion("v1", "2026-11-01", partial)],
                               min_rows=len(heldout)) is None
    a = compare_with_anchor(heldout, good, [PriorVersion("v1", "2026-11-01", partial),
                                            PriorVersion("v2", "2026-11-02", good)],
                            min_rows=len(heldout), skipped=["v0: gone"])
    assert a.version_id == "v2" and a.compared == 1 and a.margin == 0.0
    assert a.skipped[0] == "v0: gone" and a.skipped[1].startswith("v1: knows ")
