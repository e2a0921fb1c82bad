"""A trained model with everything needed to score: id maps, factoriser, post-processing, scale.

Scoring pipeline for a pair (u, i): raw = factoriser(u, i) -> monotone map (identity unless a
recalibrating method fitted one) -> x per-user scale (one unless a per-user method fitted one, never
negative, so a user's item order is kept) -> + per-user offset (zero unless a per-user method fitted one)
-> clip to [scale min, scale max].

Unknown ids (documented fallback): an unknown user scores ``mu + b_i`` (the item's average-user score);
an unknown item scores ``mu + b_u`` (+ the user's offset); both unknown score ``mu``; each then goes
through the monotone map and the clip. Callers get a flag saying which fallback applied.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import torch

from tasks.engine.idmap import IdMap
from tasks.engine.model import Factoriser, build_model
from tasks.engine.recalibration import MonotoneMap

FORMAT = "tarewise-checkpoint/1"


@dataclass
class Checkpoint:
    model: Factoriser
    users: IdMap
    items: IdMap
    scale_min: float
    scale_max: float
    method: str
    score_map: MonotoneMap = field(default_factory=MonotoneMap)
    user_offset: np.ndarray | None = None      # [n_users] float, additive, rating units
    user_scale: np.ndarray | None = None       # [n_users] float >= 0, multiplies the mapped score
    info: dict = field(default_factory=dict)   # free-form facts (seed, epochs, ...) saved in meta.json

    # ---- scoring -------------------------------------------------------------------------------
    def raw_scores(self, u: np.ndarray, i: np.ndarray, chunk: int = 1 << 20) -> np.ndarray:
        """Factoriser scores for index arrays (``-1`` = unknown), before post-processing; float64 [N]."""
        u, i = np.asarray(u, np.int64), np.asarray(i, np.int64)
        m = self.model
        out = np.empty(len(u), dtype=np.float64)
        with torch.no_grad():
            for s in range(0, len(u), chunk):
                uu = torch.from_numpy(u[s:s + chunk])
                ii = torch.from_numpy(i[s:s + chunk])
                ku, ki = uu >= 0, ii >= 0
                uc, ic = uu.clamp(min=0), ii.clamp(min=0)
                p, q = m.user_factors(uc), m.item_factors(ic)
                val = (m.global_mean + m.user_bias(uc).squeeze(-1) * ku + m.item_bias(ic).squeeze(-1) * ki
                       + (p * q).sum(-1) * (ku & ki))
                out[s:s + chunk] = val.double().numpy()
        return out

    def finish(self, raw: np.ndarray, u: np.ndarray) -> np.ndarray:
        """Post-process raw scores of users ``u`` (indices, -1 = unknown) onto the rating scale."""
        out = self.score_map(raw)
        u = np.asarray(u, np.int64)
        if self.user_scale is not None:
            out = out * np.where(u >= 0, self.user_scale[np.clip(u, 0, None)], 1.0)
        if self.user_offset is not None:
            out = out + np.where(u >= 0, self.user_offset[np.clip(u, 0, None)], 0.0)
        return np.clip(out, self.scale_min, self.scale_max)

    def score_idx(self, u: np.ndarray, i: np.ndarray) -> np.ndarray:
        return self.finish(self.raw_scores(u, i), u)

    def score(self, user_ids, item_ids) -> tuple[np.ndarray, np.ndarray]:
        """Scores for string ids plus a fallback label per pair ('' when both ids are known)."""
        u, i = self.users.lookup(user_ids), self.items.lookup(item_ids)
        flag = np.full(len(u), "", dtype=object)
        flag[(u < 0) & (i >= 0)] = "unknown_user"
        flag[(u >= 0) & (i < 0)] = "unknown_item"
        flag[(u < 0) & (i < 0)] = "unknown_both"
        return self.score_idx(u, i), flag

    # ---- persistence ---------------------------------------------------------------------------
    def save(self, directory: Path) -> None:
        directory = Path(directory)
        directory.mkdir(parents=True, exist_ok=True)
        torch.save(self.model.state_dict(), directory / "model.pt")
        self.users.save(directory / "users.parquet")
        self.items.save(directory / "items.parquet")
        if self.user_offset is not None:
            pq.write_table(pa.table({"offset": self.user_offset.astype(np.float64)}), directory / "user_offset.parquet")
        if self.user_scale is not None:
            pq.write_table(pa.table({"scale": self.user_scale.astype(np.float64)}), directory / "user_scale.parquet")
        meta = {"format": FORMAT, "hyper": self.model.hyper(), "scale": [self.scale_min, self.scale_max],
                "method": self.method, "score_map": self.score_map.to_dict(), "info": self.info}
        (directory / "meta.json").write_text(json.dumps(meta, indent=2, sort_keys=True, default=str))

    @classmethod
    def load(cls, directory: Path) -> "Checkpoint":
        directory = Path(directory)
        try:
            meta = json.loads((directory / "meta.json").read_text())
        except FileNotFoundError:
            raise FileNotFoundError(f"no checkpoint at {directory} (meta.json missing)") from None
        if meta.get("format") != FORMAT:
            raise ValueError(f"{directory}/meta.json: unsupported checkpoint format {meta.get('format')!r}")
        model = build_model(meta["hyper"], torch.Generator().manual_seed(0))
        model.load_state_dict(torch.load(directory / "model.pt", weights_only=True))
        offset_path = directory / "user_offset.parquet"
        offset = pq.read_table(offset_path).column("offset").to_numpy() if offset_path.exists() else None
        scale_path = directory / "user_scale.parquet"
        user_scale = pq.read_table(scale_path).column("scale").to_numpy() if scale_path.exists() else None
        return cls(model=model, users=IdMap.load(directory / "users.parquet"),
                   items=IdMap.load(directory / "items.parquet"), scale_min=meta["scale"][0],
                   scale_max=meta["scale"][1], method=meta["method"],
                   score_map=MonotoneMap.from_dict(meta["score_map"]), user_offset=offset, user_scale=user_scale,
                   info=meta["info"])
