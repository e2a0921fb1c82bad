"""What the gate's anchor costs a night: loading the recent versions and scoring them on the held-out
probe ratings, at the sizes of the nightly benchmark (bench/make_logs.py: 1M, 10M, 30M ratings).

The anchor step (``steps.compare_with_anchor``: ``versions.anchor_versions`` then
``evaluate.anchor.compare_with_anchor``) does not train; its cost is reading ``gate.anchor_nights``
checkpoints (size and presence of files checked, then ``Checkpoint.load``) and scoring each on the
night's held-out probe rows. Both depend on the model's size (members, titles, ``model.dim``) and the
held-out rows, not on what the weights are, so this script publishes versions of a model of the
benchmark's size with random factors (invented) into a scratch workspace and times the step, once with
the night's base already in memory (as in a night) and printed per version.

    python bench/bench_anchor.py --sizes 1M,10M,30M --versions 14

Compare with the nightly run's total at the same size in BENCHMARKS.md (measured by bench/bench_nightly.py).
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import torch

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from bench.make_logs import SIZES  # noqa: E402
from tasks.config import Config  # noqa: E402
from tasks.engine.checkpoint import Checkpoint  # noqa: E402
from tasks.engine.idmap import IdMap  # noqa: E402
from tasks.engine.model import BiasedMF  # noqa: E402
from tasks.evaluate.anchor import compare_with_anchor  # noqa: E402
from tasks.publish import versions  # noqa: E402
from tasks.schemas import PREDICTIONS  # noqa: E402
from tasks.workspace import Workspace  # noqa: E402

#: Held-out probe rows per night at each size: about 3% of a day's active members answer one probe card
#: and 30% of probe pairs are held out; a 30-day window holds them all (invented, as in make_logs).
HELDOUT_SHARE_OF_RATINGS = 0.03 * 0.3 / 10


def checkpoint(members: int, titles: int, dim: int, seed: int) -> Checkpoint:
    g = torch.Generator().manual_seed(seed)
    model = BiasedMF(members, titles, dim, 3.5, 0.1, g)
    return Checkpoint(model=model, users=IdMap([f"member-{k:07d}" for k in range(members)]),
                      items=IdMap([f"title-{k:07d}" for k in range(titles)]), scale_min=1.0, scale_max=5.0,
                      method="per_user", user_offset=np.zeros(members))


def case(size: str, count: int, dim: int, work: Path) -> dict:
    ratings, members, titles = SIZES[size]
    ws = Workspace.at(work / size)
    empty = PREDICTIONS.empty_table().to_pandas()
    t0 = time.perf_counter()
    ids = []
    for k in range(count):
        run_date = f"2026-10-{k + 1:02d}"
        vid = versions.new_version_id(ws, run_date)
        versions.publish(ws, vid, checkpoint(members, titles, dim, k), empty,
                         {"run_date": run_date, "kind": "nightly", "metrics": {},
                          "gate": {"promote": True, "compared_to": "live", "reason": "bench"}})
        ids.append(vid)
    versions.set_live(ws, ids[-1], reason="bench")
    publish_s = time.perf_counter() - t0
    rng = np.random.default_rng(0)
    rows = max(100, int(ratings * HELDOUT_SHARE_OF_RATINGS))
    heldout = pd.DataFrame({"user_id": [f"member-{k:07d}" for k in rng.integers(0, members, rows)],
                            "item_id": [f"title-{k:07d}" for k in rng.integers(0, titles, rows)],
                            "rating": rng.integers(1, 6, rows).astype(float)})
    t_base = time.perf_counter()   # the reference, in the same run: what every night already does to warm-start
    _, base, _ = versions.load_base(ws, "2026-11-30")
    base_s = time.perf_counter() - t_base
    candidate = checkpoint(members, titles, dim, 999)
    t1 = time.perf_counter()
    priors, skipped = versions.anchor_versions(ws, "2026-11-30", count, loaded={ids[-1]: base})
    t2 = time.perf_counter()
    result = compare_with_anchor(heldout, candidate, priors, 10, ids[-1], base, skipped)
    t3 = time.perf_counter()
    assert result is not None and result.compared == count and not skipped
    model_mb = sum(p.stat().st_size for p in (ws.versions / ids[0] / "model").rglob("*")) / 1e6
    return {"size": size, "members": members, "titles": titles, "dim": dim, "versions": count,
            "model_mb": model_mb, "heldout_rows": rows, "load_s": t2 - t1, "score_s": t3 - t2,
            "total_s": t3 - t1, "per_version_s": (t3 - t1) / count, "publish_s": publish_s,
            "base_s": base_s, "load_avg": os.getloadavg()[0]}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="1M,10M", help="comma list of 1M, 10M, 30M")
    ap.add_argument("--versions", type=int, default=Config().gate.anchor_nights, help="gate.anchor_nights")
    ap.add_argument("--dim", type=int, default=Config().model.dim, help="model.dim")
    args = ap.parse_args()
    torch.set_num_threads(Config().model.threads)
    work = Path(tempfile.mkdtemp(prefix="tarewise-bench-anchor-"))
    try:
        print("| size | members | titles | dim | model on disk | held-out rows | versions | load | score | "
              "anchor step | per version | load_base (reference) | anchor / load_base | load average |")
        print("| --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: |")
        for size in args.sizes.split(","):
            r = case(size.strip(), args.versions, args.dim, work)
            print(f"| {r['size']} | {r['members']:,} | {r['titles']:,} | {r['dim']} | {r['model_mb']:.1f} MB | "
                  f"{r['heldout_rows']:,} | {r['versions']} | {r['load_s']:.2f} s | {r['score_s']:.2f} s | "
                  f"**{r['total_s']:.2f} s** | {r['per_version_s']:.3f} s | {r['base_s']:.2f} s | "
                  f"**{r['total_s'] / r['base_s']:.1f}x** | {r['load_avg']:.1f} |", flush=True)
            shutil.rmtree(work / size, ignore_errors=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
