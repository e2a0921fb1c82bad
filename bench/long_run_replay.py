"""Engine-only replay of the long run (bench/long_run.py's worlds, no command line, no gate): fit night by
night on the growing window, each night warm-started from the night before, and report the hidden-test MAE
at the checkpoint nights beside a cold fit, plain and the oracle on the same window.

It is what the nightly chain does with every candidate promoted; much cheaper than the CLI run, so it
compares warm-start rules over 60 nights and 3 seeds on a busy machine. Variants:

* ``warm``: warm start every night under the given settings (the default: ``model.stop_on = "corrected"``,
  ``model.keep_base = true``);
* ``refit=N``: a cold fit every N nights (``model.refit_every``);
* ``better``: a warm and a cold fit every night, keep the lower probe-fit MAE (``model.cold_candidate``);
* ``methods``: no chain; at each checkpoint night a cold fit of the default, of plain, of the oracle and
  of every method of ``bench/long_run.py``'s ``METHODS`` on the same window, MAE overall and per
  selection group (one JSON line each): the every-method table of README's "Long run".

    python bench/long_run_replay.py insteval 0 warm '{}'                       # + cold/plain/oracle
    python bench/long_run_replay.py insteval 0 warm '{"model.stop_on": "raw", "model.keep_base": false}'
    python bench/long_run_replay.py bfi 1 better

Prints one JSON line per checkpoint night (and one with the references for ``warm``).
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from bench.long_run import PRESETS  # noqa: E402
from bench.long_run_data import bfi_world, insteval_truth, insteval_world  # noqa: E402
from tasks.engine.metrics import mae  # noqa: E402
from tasks.engine.settings import Settings  # noqa: E402
from tasks.engine.trainer import fit  # noqa: E402
from tasks.train.training import probe_fit_mae  # noqa: E402


def main(argv: list[str]) -> int:
    ds, seed, variant = argv[0], int(argv[1]), argv[2]
    over = json.loads(argv[3]) if len(argv) > 3 else {}
    p = PRESETS["full"]
    if ds == "insteval":
        w = insteval_world(seed, p.days, p.members, p.titles, p.test_cells, p.organic_share,
                           truth=insteval_truth(p.members, p.titles))
    else:
        w = bfi_world(seed, p.days)
    s = w.scenario
    base = Settings().updated({"scale.min": w.scale[0], "scale.max": w.scale[1], "model.seed": seed, **over})
    plain = base.updated({"debias.method": "plain"})

    def score(ck) -> float:
        pred, _ = ck.score(s.test_user, s.test_item)
        return mae(pred, s.test_rating)

    if variant == "methods":
        from bench.long_run import METHODS
        from bench.open_data import GROUPS

        def groups(ck) -> dict:
            pred, _ = ck.score(s.test_user, s.test_item)
            err = abs(pred - s.test_rating)
            return {"mae": float(err.mean()), **{f"mae_{g}": float(err[s.test_group == g].mean()) for g in GROUPS}}

        for d in p.at:
            org, pr = s.organic[w.organic_day <= d], s.probe[w.probe_day <= d]
            runs = {"default": (org, base), "plain": (org, plain), "oracle": (s.oracle.iloc[:len(org)], plain),
                    **{k: (org, base.updated(v)) for k, v in METHODS.items()}}
            for what, (ratings, settings) in runs.items():
                t = time.perf_counter()
                res = fit(ratings, pr, settings)
                print(json.dumps({"ds": ds, "seed": seed, "night": d, "what": what, **groups(res.checkpoint),
                                  "secs": time.perf_counter() - t}), flush=True)
        return 0
    refit = int(variant.split("=")[1]) if variant.startswith("refit=") else 0
    prev = None
    for d in range(1, p.days + 1):
        org, pr = s.organic[w.organic_day <= d], s.probe[w.probe_day <= d]
        t = time.perf_counter()
        start = None if refit and (d - 1) % refit == 0 else prev
        if variant == "better" and prev is not None:
            a, b = fit(org, pr, base, previous=prev), fit(org, pr, base)
            res = a if probe_fit_mae(a) <= probe_fit_mae(b) else b
        else:
            res = fit(org, pr, base, previous=start)
        prev = res.checkpoint
        if d in p.at:
            print(json.dumps({"ds": ds, "seed": seed, "variant": variant, "over": over, "night": d,
                              "mae": score(prev), "best_epoch": res.best_epoch, "rounds": len(res.rounds),
                              "secs": time.perf_counter() - t}), flush=True)
            if variant == "warm":
                c, pl = fit(org, pr, base), fit(org, pr, plain)
                o = fit(s.oracle.iloc[:len(org)], pr, plain)
                print(json.dumps({"ds": ds, "seed": seed, "night": d, "cold": score(c.checkpoint),
                                  "plain": score(pl.checkpoint), "oracle": score(o.checkpoint),
                                  "cold_best": c.best_epoch}), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
