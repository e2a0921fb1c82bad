"""Hand-built inputs shared by tests of several modules: a ratings window worked by hand, and typed
held-out errors. Invented library-app scenario (members rate titles 1-5 stars); every number is invented.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from tasks.evaluate.evaluation import Errors, ModelErrors


def member_window() -> pd.DataFrame:
    """Five members over two nights; each one's skew is worked out beside their rows."""
    rows = [
        # member-000001 rates what they love: organic 5,5,4 vs probe 3 -> skew +1.667 (up)
        ("member-000001", "title-000010", 5.0, "organic", "2024-05-01"),
        ("member-000001", "title-000011", 5.0, "organic", "2024-05-02"),
        ("member-000001", "title-000012", 4.0, "organic", "2024-05-02"),
        ("member-000001", "title-000013", 3.0, "probe", "2024-05-02"),
        # member-000002 rates what they dislike: organic 1,2 vs probes 3,4 -> skew -2 (down)
        ("member-000002", "title-000010", 1.0, "organic", "2024-05-01"),
        ("member-000002", "title-000014", 2.0, "organic", "2024-05-02"),
        ("member-000002", "title-000015", 3.0, "probe", "2024-05-01"),
        ("member-000002", "title-000016", 4.0, "probe", "2024-05-02"),
        # member-000003: organic 3,4 vs probe 3 -> +0.5 exactly at the margin -> neutral
        ("member-000003", "title-000010", 3.0, "organic", "2024-05-02"),
        ("member-000003", "title-000017", 4.0, "organic", "2024-05-02"),
        ("member-000003", "title-000018", 3.0, "probe", "2024-05-02"),
        # member-000004: organic only -> unknown;  member-000005: probe only -> unknown
        ("member-000004", "title-000011", 4.0, "organic", "2024-05-02"),
        ("member-000005", "title-000012", 2.0, "probe", "2024-05-01"),
    ]
    return pd.DataFrame(rows, columns=["user_id", "item_id", "rating", "source", "dt"])


def errors(mae: float, n: int = 120, width: float = 0.05, rmse: float = 1.0) -> Errors:
    """Errors with an interval ``mae -+ width`` and RMSE ``rmse -+ width`` (stars)."""
    return Errors(n=n, mae=mae, rmse=rmse, mae_lo=mae - width, mae_hi=mae + width, rmse_lo=rmse - width,
                  rmse_hi=rmse + width)


def model_errors(mae: float, n: int = 120, segments: dict[str, tuple[float, int]] | None = None,
                 width: float = 0.05, rmse: float = 1.0) -> ModelErrors:
    """A model's errors overall and per segment (``{label: (mae, n)}``)."""
    return ModelErrors(**vars(errors(mae, n, width, rmse)),
                       segments={k: errors(m, c) for k, (m, c) in (segments or {}).items()})



#: A gate that promotes every candidate and keeps no anchor, for tests of what happens around a switch
#: (kills, the shared copy, retention) that must not depend on what the real gate makes of the demo's small
#: probe (with the default model the demo's second night is held: on 29 held-out ratings it is 0.06 worse).
PROMOTE_ALL = {"gate.tolerance_mae": 1.0, "gate.anchor_budget": 1.0, "gate.max_segment_regression": 2.0,
               "gate.anchor_nights": 0}


def promote_all_demo_config(folder) -> Path:
    """configs/demo.toml with :data:`PROMOTE_ALL`'s gate, written into ``folder``; returns its path."""
    from conftest import REPO

    text = (REPO / "configs" / "demo.toml").read_text(encoding="utf-8")
    assert "\n[gate]\n" in text
    lines = "".join(f"{k.split('.')[1]} = {v}\n" for k, v in PROMOTE_ALL.items())
    path = Path(folder) / "demo-promote-all.toml"
    path.write_text(text.replace("\n[gate]\n", "\n[gate]\n" + lines), encoding="utf-8")
    return path
