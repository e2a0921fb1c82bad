"""Bad input to the engine gets a clear error naming the frame and row, or a tested fallback.

Never a silent NaN model.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch
from synthetic import mnar_logs

from tasks.engine.settings import Settings
from tasks.engine.trainer import EngineInputError, fit

torch.set_num_threads(1)

EMPTY = pd.DataFrame(columns=["user_id", "item_id", "rating"])


def _fit(organic: pd.DataFrame, probe: pd.DataFrame | None = None, **debias: object):
    return fit(organic, probe, Settings().updated({"model.max_epochs": 2, "model.batch_size": 64,
                                                   **{f"debias.{k}": v for k, v in debias.items()}}))


def _finite_model(res) -> bool:
    return all(bool(torch.isfinite(p).all()) for p in res.checkpoint.model.parameters())


def _small() -> tuple[pd.DataFrame, pd.DataFrame]:
    logs = mnar_logs(n_users=30, n_items=20, per_user=6, probe_users=20, seed=31)
    return logs.organic, logs.probe


# ---- ratings the engine refuses ------------------------------------------------------------------

def test_empty_training_data() -> None:
    with pytest.raises(EngineInputError, match="organic ratings: empty"):
        _fit(EMPTY.copy(), None)


@pytest.mark.parametrize("frame", ["organic", "probe"])
@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf, "four"])
def test_nan_inf_and_non_numeric_ratings_name_the_frame_and_row(frame: str, bad: object) -> None:
    organic, probe = _small()
    target = (organic if frame == "organic" else probe).astype({"rating": object})
    target.loc[3, "rating"] = bad
    args = (target, probe) if frame == "organic" else (organic, target)
    with pytest.raises(EngineInputError, match=rf"{frame} ratings: 1 NaN/inf/non-numeric rating\(s\), first at row 3"):
        _fit(*args)


@pytest.mark.parametrize("value", [0.0, 5.5, -3.0, 100.0])
def test_ratings_off_the_scale_name_row_and_value(value: float) -> None:
    organic, probe = _small()
    organic.loc[7, "rating"] = value
    with pytest.raises(EngineInputError, match=rf"off the scale \[1.0, 5.0\], first at row 7 \(value {value}\)"):
        _fit(organic, probe)


def test_missing_column_and_null_id() -> None:
    organic, probe = _small()
    with pytest.raises(EngineInputError, match=r"organic ratings: missing column\(s\) \['rating'\]"):
        _fit(organic.drop(columns="rating"), probe)
    probe = probe.copy()
    probe.loc[2, "item_id"] = None
    with pytest.raises(EngineInputError, match="probe ratings: null id at row 2"):
        _fit(organic, probe)


# ---- documented fallbacks, each tested ----------------------------------------------------------

def test_single_user_trains_to_a_finite_model() -> None:
    """Fallback: one user is a valid (tiny) problem; calibration has nobody to compare with and skips."""
    organic = pd.DataFrame({"user_id": ["member-000001"] * 6, "item_id": [f"title-{k:06d}" for k in range(6)],
                            "rating": [1.0, 2.0, 5.0, 4.0, 3.0, 5.0]})
    probe = pd.DataFrame({"user_id": ["member-000001"] * 4, "item_id": [f"title-{k:06d}" for k in range(6, 10)],
                          "rating": [3.0, 4.0, 2.0, 5.0]})
    for method in ("calibrated", "plain", "ips", "recalibrate", "per_user"):
        res = _fit(organic, probe, method=method)
        assert _finite_model(res), method
        s, _ = res.checkpoint.score(["member-000001"], ["title-000003"])
        assert np.isfinite(s).all() and 1 <= s[0] <= 5
        if method == "calibrated":
            assert all(r["calibration"].startswith("skipped") for r in res.rounds), res.rounds


def test_all_ratings_equal_gives_that_rating() -> None:
    """Fallback: zero-variance ratings train fine; every prediction is (close to) the one value."""
    organic, probe = _small()
    organic["rating"] = 4.0
    probe["rating"] = 4.0
    for method in ("calibrated", "ips", "snips", "recalibrate", "per_user"):
        res = _fit(organic, probe, method=method)
        assert _finite_model(res), method
        s, _ = res.checkpoint.score(organic["user_id"], organic["item_id"])
        np.testing.assert_allclose(s, 4.0, atol=0.2, err_msg=method)


def test_ips_without_probe_ratings_trains_unweighted_and_says_so() -> None:
    organic, _ = _small()
    res = _fit(organic, None, method="ips")
    assert any("no probe ratings to estimate P(r)" in n for n in res.notes)
    assert _finite_model(res)


def test_divergence_is_an_error_not_a_nan_model() -> None:
    organic, probe = _small()
    with pytest.raises(FloatingPointError, match="diverged at round 1"):
        _fit(organic, probe, method="calibrated", calibration_weight=1e39, reference_p_min=0.5)
