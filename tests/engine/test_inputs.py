"""What a training run starts from: the squared-error examples and their weights, the rating levels,
the model to train. (Frames the engine refuses: tests/engine/test_bad_input.py.)"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch
from synthetic import mnar_logs

from tasks.engine.checkpoint import Checkpoint
from tasks.engine.idmap import IdMap
from tasks.engine.inputs import check_frame, prepare_model, rating_levels, training_examples
from tasks.engine.propensity import naive_bayes_propensity, rating_weights
from tasks.engine.settings import DebiasSettings, ModelSettings, Scale


@pytest.fixture(scope="module")
def run():
    logs = mnar_logs(n_users=40, n_items=20, per_user=5, probe_users=30, seed=4)
    users, items = IdMap(), IdMap()
    users.extend(pd.concat([logs.organic["user_id"], logs.probe["user_id"]]))
    items.extend(pd.concat([logs.organic["item_id"], logs.probe["item_id"]]))
    pf_u, pf_i = users.lookup(logs.probe["user_id"]), items.lookup(logs.probe["item_id"])
    return logs.organic, users, items, pf_u, pf_i, logs.probe["rating"].to_numpy(float)


def _examples(run, **debias):
    organic, users, items, pf_u, pf_i, pf_r = run
    notes: list[str] = []
    out = training_examples(organic, users, items, pf_u, pf_i, pf_r, Scale(), DebiasSettings(**debias), notes)
    return out, notes


def test_plain_examples_are_the_organic_ratings_in_order_at_weight_one(run) -> None:
    organic, users, items = run[:3]
    (u, i, r, w, weighting), notes = _examples(run, method="plain")
    assert np.array_equal(u, users.lookup(organic["user_id"])) and np.array_equal(i, items.lookup(organic["item_id"]))
    assert u.dtype == i.dtype == np.int32                     # window-sized: half of int64's memory
    assert np.array_equal(r, organic["rating"].to_numpy()) and w is None      # None: every weight is 1
    assert weighting is None and notes == []


@pytest.mark.parametrize("method, combine_with", [("ips", "none"), ("snips", "none"), ("calibrated", "ips"),
                                                  ("per_user", "snips")])
def test_propensity_weights_for_the_method_or_its_companion(run, method, combine_with) -> None:
    organic, users, items, _, _, pf_r = run
    (_, _, r, w, weighting), _ = _examples(run, method=method, combine_with=combine_with)
    assert weighting == (method if method in ("ips", "snips") else combine_with)
    share = len(organic) / (len(users) * len(items))
    levels = np.array([1.0, 2.0, 3.0, 4.0, 5.0])
    # Reference: the propensity module's functions, applied as documented.
    expected = rating_weights(r, levels, naive_bayes_propensity(r, pf_r, levels, share), 0.05)
    np.testing.assert_array_equal(w, expected)
    assert w.mean() == pytest.approx(1.0) and w.std() > 0


def test_a_companion_is_ignored_by_methods_that_take_none(run) -> None:
    (_, _, _, w, weighting), _ = _examples(run, method="plain", combine_with="ips")
    assert weighting is None and w is None


def test_probe_upweighting_appends_the_fitting_probe_at_its_weight(run) -> None:
    organic, _, _, pf_u, pf_i, pf_r = run
    (u, i, r, w, _), _ = _examples(run, method="calibrated", combine_with="probe_upweight", probe_weight=2.5)
    n = len(organic)
    assert len(u) == n + len(pf_r)
    assert np.array_equal(u[n:], pf_u) and np.array_equal(i[n:], pf_i) and np.array_equal(r[n:], pf_r)
    assert np.all(w[:n] == 1.0) and np.all(w[n:] == 2.5)


def test_weighting_without_probe_ratings_says_so(run) -> None:
    organic, users, items = run[:3]
    notes: list[str] = []
    empty = np.empty(0, np.int64)
    *_, w, weighting = training_examples(organic, users, items, empty, empty, np.empty(0), Scale(),
                                         DebiasSettings(method="snips"), notes)
    assert weighting == "snips" and w is None
    assert notes == ["snips: no probe ratings to estimate P(r); trained unweighted this time"]


@pytest.mark.parametrize("scale, levels", [
    (Scale(1.0, 5.0, 1.0), [1, 2, 3, 4, 5]), (Scale(0.0, 1.0, 0.25), [0, 0.25, 0.5, 0.75, 1]),
    (Scale(1.0, 5.0, 0.0), np.linspace(1, 5, 9)),                  # continuous: 9 even levels
])
def test_rating_levels(scale, levels) -> None:
    np.testing.assert_array_equal(rating_levels(scale), levels)


def test_a_fresh_model_trains_max_epochs_and_a_warm_start_finetune_epochs(run) -> None:
    organic = run[0]
    probe = check_frame(None, "probe", Scale())
    assert list(probe.columns) == ["user_id", "item_id", "rating"] and probe.empty
    settings = ModelSettings(dim=3, max_epochs=9, finetune_epochs=2)
    notes: list[str] = []
    users, items, new_users, new_items, model, epochs = prepare_model(organic, probe, settings, None,
                                                                      torch.Generator().manual_seed(0), notes)
    assert (new_users, new_items, epochs) == (len(users), len(items), 9)
    assert float(model.global_mean) == pytest.approx(organic["rating"].mean())
    previous = Checkpoint(model=model, users=users, items=items, scale_min=1.0, scale_max=5.0, method="plain")
    more = pd.DataFrame({"user_id": ["member-999999"], "item_id": ["title-999999"], "rating": [3.0]})
    _, _, nu, ni, grown, epochs = prepare_model(pd.concat([organic, more]), probe, ModelSettings(dim=5),
                                                previous, torch.Generator().manual_seed(0), notes)
    assert (nu, ni, epochs, grown.n_users) == (1, 1, ModelSettings().finetune_epochs, len(users) + 1)
    assert grown is not model                                      # the previous checkpoint stays as it was
    assert notes == ["warm start keeps the checkpoint's dim=3 (config says 5)"]
