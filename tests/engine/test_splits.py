"""The split of probe ratings into a fitting part and a held-out part: a function of the (user, item) pair."""

from __future__ import annotations

import numpy as np
import pytest

from tasks.engine.splits import heldout_mask


def test_heldout_split_is_a_function_of_the_pair() -> None:
    rng = np.random.default_rng(0)
    users = np.array([f"member-{k:06d}" for k in rng.integers(0, 5000, 20_000)], dtype=object)
    items = np.array([f"title-{k:06d}" for k in rng.integers(0, 5000, 20_000)], dtype=object)
    held = heldout_mask(users, items, 0.3)
    order = rng.permutation(len(users))
    assert np.array_equal(heldout_mask(users[order], items[order], 0.3), held[order])   # row order irrelevant
    assert np.array_equal(heldout_mask(list(users[:50]), list(items[:50]), 0.3), held[:50])  # any sequence
    # Share close to configured: within 4 binomial standard errors (normal approximation; 4: common
    # practice, no source).
    assert abs(held.mean() - 0.3) <= 4 * np.sqrt(0.3 * 0.7 / len(held))
    with pytest.raises(ValueError, match="share"):
        heldout_mask(users, items, 1.0)


def test_the_salt_draws_another_split_and_a_larger_share_holds_out_more() -> None:
    users = [f"member-{k:06d}" for k in range(4000)]
    items = [f"title-{k % 97:06d}" for k in range(4000)]
    base = heldout_mask(users, items, 0.3)
    other = heldout_mask(users, items, 0.3, salt="another-split")
    # Independent splits agree on about 0.3^2 + 0.7^2 = 58% of pairs, not all of them.
    assert 0.5 < float(np.mean(base == other)) < 0.66
    # The cut is a threshold on one hash: every pair held out at 0.3 is held out at 0.5.
    assert np.all(heldout_mask(users, items, 0.5)[base])
    with pytest.raises(ValueError, match="share"):
        heldout_mask(users, items, 0.0)
