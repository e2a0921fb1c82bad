"""Cost of reading the served (corrected) score for early stopping (``model.stop_on = "corrected"``).

Not a timed test. On invented selection-free logs of ``--ratings`` organic ratings (Zipf-free uniform draws,
random 1..5, 3% of members with 5 probe ratings), trains the default method for ``--epochs`` rounds with
``stop_on = "raw"`` and with ``"corrected"`` (patience high, so both run every round) and prints seconds per
round of each and their ratio, measured in one run.

    python bench/bench_stopping.py --ratings 1000000 --epochs 2
    python bench/bench_stopping.py --long-run-night     # the long run's night 60, warm and cold, before/after
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from tasks.engine.settings import Settings  # noqa: E402
from tasks.engine.trainer import fit  # noqa: E402


def logs(n: int, users: int, items: int, seed: int = 0) -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    organic = pd.DataFrame({"user_id": "u" + pd.Series(rng.integers(0, users, n)).astype(str),
                            "item_id": "i" + pd.Series(rng.integers(0, items, n)).astype(str),
                            "rating": rng.integers(1, 6, n).astype(float)})
    pu = rng.choice(users, int(0.03 * users), replace=False).repeat(5)
    probe = pd.DataFrame({"user_id": "u" + pd.Series(pu).astype(str),
                          "item_id": "i" + pd.Series(rng.integers(0, items, len(pu))).astype(str),
                          "rating": rng.integers(1, 6, len(pu)).astype(float)})
    return organic, probe


def long_run_night() -> None:
    """Warm (from night 59) and cold fits on the long run's InstEval window at night 60, seed 0, with the
    old rule (raw-score stopping, at least one round) and the new one: seconds and rounds of each."""
    from bench.long_run import PRESETS
    from bench.long_run_data import insteval_truth, insteval_world

    p = PRESETS["full"]
    w = insteval_world(0, p.days, p.members, p.titles, p.test_cells, p.organic_share,
                       truth=insteval_truth(p.members, p.titles))
    s = w.scenario
    new = Settings().updated({"scale.min": 1.0, "scale.max": 5.0, "model.seed": 0})
    old = new.updated({"model.stop_on": "raw", "model.keep_base": False})

    def window(d):
        return s.organic[w.organic_day <= d], s.probe[w.probe_day <= d]

    (o59, p59), (o60, p60) = window(p.days - 1), window(p.days)
    bases = {"before": fit(o59, p59, old).checkpoint, "after": fit(o59, p59, new).checkpoint}
    for name, cfg in (("before", old), ("after", new)):
        for start in ("warm", "cold"):
            t0 = time.perf_counter()
            res = fit(o60, p60, cfg, previous=bases[name] if start == "warm" else None)
            dt = time.perf_counter() - t0
            print(f"{start} fit, {name}: {dt:.1f} s, {len(res.rounds)} rounds ({dt / len(res.rounds):.2f} s/round), "
                  f"{len(o60):,} organic ratings")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--ratings", type=int, default=1_000_000)
    ap.add_argument("--epochs", type=int, default=2)
    ap.add_argument("--long-run-night", action="store_true",
                    help="warm and cold fits on the long run's InstEval window at night 60, before and after")
    args = ap.parse_args(argv)
    if args.long_run_night:
        long_run_night()
        return 0
    users, items = max(100, args.ratings // 20), max(50, args.ratings // 50)
    organic, probe = logs(args.ratings, users, items)
    per_round = {}
    for stop_on in ("raw", "corrected"):
        s = Settings().updated({"model.max_epochs": args.epochs, "model.patience": 10_000, "model.stop_on": stop_on})
        t0 = time.perf_counter()
        res = fit(organic, probe, s)
        per_round[stop_on] = (time.perf_counter() - t0) / len(res.rounds)
    print(f"{args.ratings:,} ratings, {users:,} members, {items:,} titles, {len(probe):,} probe ratings: "
          f"s/round raw {per_round['raw']:.2f}, corrected {per_round['corrected']:.2f}, "
          f"ratio {per_round['corrected'] / per_round['raw']:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
