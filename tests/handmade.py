"""Hand-built inputs shared by tests of several modules: a ratings window worked by hand, and typed
held-out errors. Invented library-app scenario (members rate titles 1-5 stars); every number is invented.
"""

from __future__ import annotations

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

