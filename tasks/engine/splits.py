"""Deterministic split of probe ratings into a fitting part and a held-out evaluation part.

A (user, item) pair always lands on the same side, whatever night or row order it arrives in, so held-out
probe ratings never leak into probe error, early stopping or recalibration on a later night.
"""

from __future__ import annotations

import hashlib

import numpy as np


def heldout_mask(user_ids, item_ids, share: float, salt: str = "tarewise-probe-split") -> np.ndarray:
    """Boolean array, True where the pair is held out. ``share`` in (0, 1) is the expected held-out share.

    Uses blake2b of ``salt|user|item`` (stable across Python runs, unlike ``hash()``).
    """
    if not 0.0 < share < 1.0:
        raise ValueError(f"held-out share must be in (0, 1), got {share}")
    cut = int(share * 2**64)
    out = np.empty(len(user_ids), dtype=bool)
    prefix = salt.encode() + b"\x1f"
    for k, (u, i) in enumerate(zip(user_ids, item_ids)):
        h = hashlib.blake2b(prefix + str(u).encode() + b"\x1f" + str(i).encode(), digest_size=8).digest()
        out[k] = int.from_bytes(h, "big") < cut
    return out
