"""Per-member selection skew and its segments, worked by hand on a small window (tests/handmade.py).

Invented library-app scenario (members rate titles 1-5 stars); all numbers are invented.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from handmade import member_window
from tasks.evaluate.segments import SEGMENTS, RatingsByUser, segment_of, user_skew, user_skew_segments


def test_user_skew_and_segments_by_hand():
    w = member_window()
    per = user_skew(w)
    assert per.loc["member-000001", "skew"] == pytest.approx(14 / 3 - 3)
    assert per.loc["member-000002", "skew"] == pytest.approx(-2.0)
    assert math.isnan(per.loc["member-000004", "skew"]) and math.isnan(per.loc["member-000005", "skew"])
    seg = user_skew_segments(w, margin=0.5)
    assert seg.to_dict() == {"member-000001": "up", "member-000002": "down", "member-000003": "neutral",
                             "member-000004": "unknown", "member-000005": "unknown"}
    assert set(seg) <= set(SEGMENTS)
    # a smaller margin moves member-000003 (+0.5) to "up"
    assert user_skew_segments(w, margin=0.4)["member-000003"] == "up"


def test_segment_of_edges():
    # exactly at the margin is neutral on both sides; NaN (one kind of rating missing) is unknown
    assert segment_of(np.array([0.5, -0.5, 0.51, -0.51, np.nan, 0.0]), 0.5).tolist() == [
        "neutral", "neutral", "up", "down", "unknown", "neutral"]


def test_ratings_by_user_counts_and_means():
    r = RatingsByUser.of(member_window())
    assert list(r.users) == [f"member-00000{i}" for i in range(1, 6)]
    per = r.per_user()
    assert per["organic_n"].tolist() == [3, 2, 2, 1, 0] and per["probe_n"].tolist() == [1, 2, 1, 0, 1]
    assert per.loc["member-000002", "probe_mean"] == pytest.approx(3.5)
    assert math.isnan(per.loc["member-000005", "organic_mean"])


def test_missing_column_is_named():
    with pytest.raises(ValueError, match=r"lacks column\(s\) \['source'\]"):
        user_skew(member_window().drop(columns="source"))


def test_judged_segments_leave_out_the_held_out_probe_ratings_they_are_judged_on() -> None:
    from tasks.evaluate.segments import judged_segments

    # u1 rates 3 organically; one fitting probe (3) and one held-out probe (5). With the held-out rating
    # u1 would be 'down' (organic 3 below probe mean 4 by more than 0.5): a segment chosen by the very
    # rating it is then judged on. Without it u1 is 'neutral'. u2's only probe rating is held out: unknown.
    window = pd.DataFrame({
        "user_id": ["u1", "u1", "u1", "u2", "u2"],
        "item_id": ["a", "b", "c", "a", "d"],
        "rating": [3.0, 3.0, 5.0, 4.0, 1.0],
        "source": ["organic", "probe", "probe", "organic", "probe"],
        "dt": ["2026-11-01"] * 5,
    })
    heldout = pd.DataFrame({"user_id": ["u1", "u2"], "item_id": ["c", "d"], "rating": [5.0, 1.0]})
    assert user_skew_segments(window, 0.5).to_dict() == {"u1": "down", "u2": "up"}
    assert judged_segments(window, heldout, 0.5).to_dict() == {"u1": "neutral", "u2": "unknown"}
    # categorical ids (as the window read hands them over) give the same answer
    cat = window.astype({"user_id": "category", "item_id": "category"})
    assert judged_segments(cat, heldout, 0.5).astype(str).to_dict() == {"u1": "neutral", "u2": "unknown"}
    # nothing held out: the same as user_skew_segments
    assert judged_segments(window, heldout.iloc[:0], 0.5).equals(user_skew_segments(window, 0.5))


def test_the_windows_own_codes_give_what_factorize_gives() -> None:
    """Users by their window codes (a sorted categorical, some categories without rows, empty windows)
    equal ``pd.factorize(sort=True)`` (the reference, pandas) codes and index exactly."""
    from tasks.evaluate.segments import _factorize_sorted

    rng = np.random.default_rng(0)
    for _ in range(30):
        cats = sorted({f"m{rng.integers(0, 50)}" for _ in range(30)} | {"zz", "Ärger"})
        vals = rng.choice(cats[: max(1, len(cats) - int(rng.integers(0, 4)))], int(rng.integers(0, 40)))
        ids = pd.Series(pd.Categorical(vals, categories=cats))
        want_codes, want_users = pd.factorize(ids, sort=True)
        codes, users = _factorize_sorted(ids)
        assert np.array_equal(codes, want_codes)
        pd.testing.assert_index_equal(users, pd.Index(want_users), exact=True)
