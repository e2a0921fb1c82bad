"""What a training run starts from: checked rating frames, id maps and the model, the squared-error examples.

Rating frames have ``user_id``, ``item_id`` (strings, or categoricals of strings: integer codes) and ``rating`` (float, on the scale): organic
ratings (MNAR) and probe ratings (MAR). Everything here is computed the same way by every worker of
data-parallel training (each reads the whole window), so the workers agree on ids and initial weights.
"""

from __future__ import annotations

import copy

import numpy as np
import pandas as pd
import torch

from tasks.engine.checkpoint import Checkpoint
from tasks.engine.idmap import IdMap
from tasks.engine.model import BiasedMF
from tasks.engine.propensity import naive_bayes_propensity, rating_weights
from tasks.engine.settings import DebiasSettings, ModelSettings, Scale

REQUIRED = ("user_id", "item_id", "rating")


class EngineInputError(ValueError):
    """Training data or settings the engine refuses; the message says which frame or key and what is wrong."""


def _text_categorical(col: pd.Series) -> bool:
    return isinstance(col.dtype, pd.CategoricalDtype) and pd.api.types.is_string_dtype(col.cat.categories.dtype)


def check_frame(df: pd.DataFrame | None, name: str, scale: Scale) -> pd.DataFrame:
    """``df``'s ``REQUIRED`` columns with string ids and float ratings, index 0..N-1 (None: an empty
    frame). Raises :class:`EngineInputError` naming ``name``, the problem and the first bad row."""
    if df is None:
        df = pd.DataFrame(columns=REQUIRED)
    missing = [c for c in REQUIRED if c not in df.columns]
    if missing:
        raise EngineInputError(f"{name} ratings: missing column(s) {missing}")
    df = df[list(REQUIRED)]   # copy-on-write (pandas 3): columns are shared until one is replaced below
    if df["user_id"].isna().any() or df["item_id"].isna().any():
        row = int(np.flatnonzero(df["user_id"].isna().to_numpy() | df["item_id"].isna().to_numpy())[0])
        raise EngineInputError(f"{name} ratings: null id at row {row}")
    for c in ("user_id", "item_id"):
        if not _text_categorical(df[c]):      # categoricals of text stay codes (the window's ids)
            df[c] = df[c].astype(str)
    r = pd.to_numeric(df["rating"], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(r)
    if bad.any():
        raise EngineInputError(f"{name} ratings: {int(bad.sum())} NaN/inf/non-numeric rating(s), "
                               f"first at row {int(np.flatnonzero(bad)[0])}")
    off = (r < scale.min - 1e-9) | (r > scale.max + 1e-9)
    if off.any():
        k = int(np.flatnonzero(off)[0])
        raise EngineInputError(f"{name} ratings: {int(off.sum())} rating(s) off the scale "
                               f"[{scale.min}, {scale.max}], first at row {k} (value {r[k]})")
    if df["rating"].dtype != np.float64:     # a float64 column is kept as it is (assigning copies it)
        df["rating"] = r
    return df.reset_index(drop=True)


def prepare_model(organic: pd.DataFrame, probe: pd.DataFrame, model_cfg: ModelSettings,
                  previous: Checkpoint | None, gen: torch.Generator, notes: list[str]
                  ) -> tuple[IdMap, IdMap, int, int, BiasedMF, int]:
    """Id maps (the previous checkpoint's, extended by tonight's ids) and the model to train: a grown copy
    of ``previous`` (fine-tune for ``model.finetune_epochs``) or a fresh one (``model.max_epochs``).
    Returns ``(users, items, new_users, new_items, model, epochs)``; draws from ``gen`` in a fixed order,
    so every data-parallel worker gets the same initial state."""
    users = IdMap(previous.users.ids) if previous else IdMap()
    items = IdMap(previous.items.ids) if previous else IdMap()
    # ignore_index: concatenating the frames' RangeIndexes would build (and cache on them, for as long as
    # the frames live) an int64 array of every row number: 8 bytes a window rating.
    new_users = users.extend(pd.concat([organic["user_id"], probe["user_id"]], ignore_index=True))
    new_items = items.extend(pd.concat([organic["item_id"], probe["item_id"]], ignore_index=True))
    if previous is not None:
        model = copy.deepcopy(previous.model)
        model.grow(len(users), len(items), model_cfg.init_scale, gen)
        if getattr(model, "dim", model_cfg.dim) != model_cfg.dim:
            notes.append(f"warm start keeps the checkpoint's dim={model.dim} (config says {model_cfg.dim})")
        return users, items, new_users, new_items, model, model_cfg.finetune_epochs
    model = BiasedMF(len(users), len(items), model_cfg.dim, float(organic["rating"].mean()),
                     model_cfg.init_scale, gen)
    return users, items, new_users, new_items, model, model_cfg.max_epochs


def rating_levels(scale: Scale) -> np.ndarray:
    """Rating levels for the propensity histograms, ``[L]``: ``min, min + step, ..., max``; 9 evenly spaced
    levels on a continuous scale (``step`` 0)."""
    if scale.step <= 0:
        return np.linspace(scale.min, scale.max, 9)
    return scale.min + np.arange(round((scale.max - scale.min) / scale.step) + 1) * scale.step


def training_examples(organic: pd.DataFrame, users: IdMap, items: IdMap, pf_u: np.ndarray, pf_i: np.ndarray,
                      pf_r: np.ndarray, scale: Scale, debias: DebiasSettings, notes: list[str]
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None, str | None]:
    """The squared-error examples of a run: organic ratings as indices (first, in their order), each with
    its weight (IPS/SNIPS propensity weights from the fitting probe ``pf_*`` when the method or its
    companion is one of them), then the fitting probe ratings at ``debias.probe_weight`` for probe
    up-weighting. Returns ``(users [N], items [N], ratings [N], weights [N] or None when every weight is
    1, "ips"/"snips" or None)``. Memory: indices are int32 where they fit and the organic ratings are the
    frame's own column (read only), so a window-sized run adds 8 bytes a rating here, not 32."""
    method, companion = debias.method, debias.companion
    tr_u, tr_i = users.lookup(organic["user_id"], small=True), items.lookup(organic["item_id"], small=True)
    tr_r = organic["rating"].to_numpy(dtype=float)
    tr_w = None
    weighting = next((w for w in (method, companion) if w in ("ips", "snips")), None)
    if weighting:
        if len(pf_r) == 0:
            notes.append(f"{weighting}: no probe ratings to estimate P(r); trained unweighted this time")
        else:
            share = len(organic) / (len(users) * len(items))
            prop = naive_bayes_propensity(tr_r, pf_r, rating_levels(scale), share)
            tr_w = rating_weights(tr_r, rating_levels(scale), prop, debias.propensity_clip)
    if "probe_upweight" in (method, companion):
        tr_u, tr_i = np.concatenate([tr_u, pf_u]), np.concatenate([tr_i, pf_i])
        tr_r = np.concatenate([tr_r, pf_r])
        tr_w = np.concatenate([np.ones(len(organic)) if tr_w is None else tr_w,
                               np.full(len(pf_r), debias.probe_weight)])
    return tr_u, tr_i, tr_r, tr_w, weighting
