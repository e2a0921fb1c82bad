"""Long-run check: does the nightly chain (warm-started night after night) keep up with a fresh fit?

Data: bench/long_run_data.py (an InstEval-derived world and the bfi world, spread over daily partitions).
Everything runs through the real command line (``python -m flows.cli``), as a user would:

* **chain**: ``tarewise backfill --live each`` over days 1..N, so every night warm-starts from the live
  version and the gate decides; the live version is scored after each checkpoint night (``--at``);
* **cold**: an empty workspace whose logs hold the night's window as one partition (every organic and probe
  rating up to the checkpoint date, moved to that date: the ratings the chain's store holds), then
  ``tarewise run --cold`` on that date, for the default and ``plain``; at the last checkpoint also for every
  other method (``--methods``);
* **oracle**: a fresh workspace whose logs are one partition holding a uniform sample of cells as large as
  the organic log so far, plus the same probe ratings; ``run --cold`` with ``debias.method = "plain"``.

Each version is scored on the hidden MAR test with ``tarewise score --version``. Gap closed =
``(MAE_plain - MAE) / (MAE_plain - MAE_oracle)`` per seed and night (plain = the cold plain fit), then
mean ± std over seeds. Writes ``bench/out/long_run_<dataset>.md`` (+ ``.csv``).

Usage::

    python bench/long_run.py --dataset insteval --preset full     # 60 days, nights 30 and 60, 3 seeds
    python bench/long_run.py --dataset bfi --preset full
    python bench/long_run.py --dataset insteval --preset tiny     # seconds; what the test runs
    python bench/long_run.py --dataset insteval --chains default,model.refit_every=7 --methods none

Reproducible: same flags give identical numbers (``model.threads = 1``, seeded draws).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import time
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from bench.long_run_data import (World, bfi_world, insteval_truth, insteval_world, write_logs,  # noqa: E402
                                 write_oracle_logs, write_test, write_window_logs)
from bench.open_data import GROUPS  # noqa: E402

OUT = ROOT / "bench" / "out"


@dataclass(frozen=True)
class Preset:
    days: int
    at: tuple[int, ...]
    seeds: int
    members: int = 2000          # InstEval subset
    titles: int = 500
    test_cells: int = 20_000
    organic_share: float = 0.03
    bfi_kwargs: dict = field(default_factory=dict)
    config: dict = field(default_factory=dict)


PRESETS = {
    "full": Preset(days=60, at=(30, 60), seeds=3),
    "tiny": Preset(days=6, at=(3, 6), seeds=1, members=150, titles=60, test_cells=1500, organic_share=0.08,
                   config={"model.max_epochs": 8, "model.finetune_epochs": 3, "debias.per_user_min_probes": 10}),
}

#: Methods run cold at the last checkpoint besides default and plain: label -> config overrides.
METHODS: dict[str, dict] = {
    "per_user skew_offset": {"debias.per_user_design": "skew_offset"},
    "per_user offset": {"debias.per_user_design": "offset"},
    "per_user + ips": {"debias.combine_with": "ips"},
    "recalibrate": {"debias.method": "recalibrate"},
    "ips": {"debias.method": "ips"},
    "probe_upweight": {"debias.method": "probe_upweight"},
    "calibrated λ5 + probe ECDF": {"debias.method": "calibrated", "debias.calibration_weight": 5.0,
                                    "debias.probe_target_weight": 1.0},
}


# ---------------------------------------------------------------------------------------------------
# the command line, as a user runs it
# ---------------------------------------------------------------------------------------------------
def toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return json.dumps(v)
    return repr(v)


def write_config(path: Path, settings: dict) -> Path:
    """A TOML config from dotted keys (``{"model.seed": 1, ...}``)."""
    sections: dict[str, dict] = {}
    for key, value in settings.items():
        section, _, name = key.partition(".")
        sections.setdefault(section, {})[name] = value
    text = "\n".join(f"[{s}]\n" + "\n".join(f"{k} = {toml_value(v)}" for k, v in kv.items()) + "\n"
                     for s, kv in sections.items())
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")
    return path


#: Run the command line in this process (typer's CliRunner on ``flows.cli.app``, the same commands) instead
#: of one ``python -m flows.cli`` process per command: the test does, to share its Prefect API.
IN_PROCESS = {"on": False}


def cli(*args: str, log: Path) -> float:
    """Run ``tarewise args`` (``python -m flows.cli``); raise with its output on failure. Returns wall seconds."""
    t0 = time.perf_counter()
    if IN_PROCESS["on"]:
        from typer.testing import CliRunner

        from flows.cli import app

        res = CliRunner().invoke(app, list(args))
        code, output = res.exit_code, res.output + (repr(res.exception) if res.exception else "")
    else:
        env = {**os.environ, "PYTHONPATH": str(ROOT)}
        proc = subprocess.run([sys.executable, "-m", "flows.cli", *args], cwd=ROOT, env=env, capture_output=True,
                              text=True)
        code, output = proc.returncode, proc.stdout + proc.stderr
    with log.open("a", encoding="utf-8") as fh:
        fh.write(f"$ tarewise {' '.join(args)}\n{output}\n")
    if code != 0:
        raise RuntimeError(f"tarewise {' '.join(args)} failed ({code}):\n{output}")
    return time.perf_counter() - t0


def live(ws: Path) -> str:
    return json.loads((ws / "live.json").read_text())["version_id"]


def ledger(ws: Path) -> pd.DataFrame:
    return pq.read_table(ws / "ledger" / "runs.parquet").to_pandas()


def score(ws: Path, version: str, world: World, test: Path, cfg: Path, log: Path) -> dict:
    """MAE overall and per group of ``version`` on the hidden test."""
    out = ws.parent / f"scores-{ws.name}-{version}.parquet"
    cli("score", "--pairs", str(test), "--out", str(out), "--version", version, "--config", str(cfg),
        "--workspace", str(ws), log=log)
    s = pq.read_table(out).to_pandas()
    scn = world.scenario
    err = np.abs(s["score"].to_numpy(float) - scn.test_rating)
    row = {"mae": float(err.mean()), "unknown_share": float((s["fallback"] != "").mean())}
    for g in GROUPS:
        row[f"mae_{g}"] = float(err[scn.test_group == g].mean())
    return row


# ---------------------------------------------------------------------------------------------------
# one seed
# ---------------------------------------------------------------------------------------------------
def base_settings(world: World, seed: int, logs: Path, preset: Preset) -> dict:
    return {"paths.logs": str(logs), "scale.min": world.scale[0], "scale.max": world.scale[1],
            "window.days": world.days + 1, "model.seed": seed, "model.threads": 1, "evaluate.bootstrap": 50,
            "publish.top_n": 5, "runtime.workers": 1, "runtime.min_free_mb": 0, **preset.config}


def parse_chain(spec: str) -> tuple[str, dict]:
    """``"default"`` or ``"key=value;key=value"`` -> (label, overrides)."""
    if spec == "default":
        return spec, {}
    over = {}
    for part in spec.split(";"):
        k, _, v = part.partition("=")
        try:
            over[k.strip()] = json.loads(v)
        except json.JSONDecodeError:
            over[k.strip()] = v.strip()
    return spec, over


def cold_run(label: str, over: dict, store_from: Path | None, logs: Path, day: int, world: World, base: dict,
             work: Path, test: Path, log: Path) -> dict:
    """A fresh workspace (with ``store_from``'s store, when given), ``run --cold`` on ``day``, scored."""
    ws = work / f"cold-{day}-{len(list(work.glob(f'cold-{day}-*')))}"
    if store_from is not None:
        shutil.copytree(store_from / "store", ws / "store")
    cfg = write_config(ws.parent / f"{ws.name}.toml", {**base, "paths.logs": str(logs), **over})
    secs = cli("run", "--cold", "--date", world.date(day), "--config", str(cfg), "--workspace", str(ws), log=log)
    # Scored whatever the gate said: a first night compares the candidate only with its shadow.
    version = sorted(p.name for p in (ws / "versions").iterdir() if not p.name.startswith("."))[-1]
    return {"what": label, "night": day, "seconds": secs, **score(ws, version, world, test, cfg, log)}


def run_seed(dataset: str, seed: int, preset: Preset, chains: list[str], methods: dict[str, dict], work: Path,
             say=print, truth: np.ndarray | None = None, partial: Path | None = None,
             parts: tuple[str, ...] = ("chain", "cold"), resume: bool = False,
             only_methods: bool = False) -> tuple[list[dict], dict]:
    """Every row (chain / cold / plain / oracle per checkpoint night) for one seed, and chain facts.
    ``parts``: the chains, the cold runs, or both (they share nothing but the data, so two processes can
    run them side by side). ``resume``: keep ``work``'s earlier chain workspaces (a backfill skips the
    nights already done)."""
    if dataset == "insteval":
        world = insteval_world(seed, preset.days, preset.members, preset.titles, preset.test_cells,
                               preset.organic_share, truth=truth)
    else:
        world = bfi_world(seed, preset.days, **preset.bfi_kwargs)
    work = work / f"{dataset}-s{seed}" / "+".join(parts)
    if not resume:
        shutil.rmtree(work, ignore_errors=True)
    logs, test, log = work / "logs", work / "test.parquet", work / "cli.log"
    work.mkdir(parents=True, exist_ok=True)
    if not (logs.exists() and test.exists()):
        write_logs(world, logs)
        write_test(world, test)
    base = base_settings(world, seed, logs, preset)
    rows: list[dict] = []
    facts: dict = {"world": {"organic": len(world.scenario.organic), "probe": len(world.scenario.probe),
                             "test": len(world.scenario.test_rating),
                             "organic_mean": float(world.scenario.organic["rating"].mean()),
                             "test_mean": float(world.scenario.test_rating.mean())}}

    def keep(row: dict) -> None:
        row["seed"] = seed
        rows.append(row)
        if partial is not None:     # rows so far, so a long run can be read before it ends
            pd.DataFrame(rows).to_csv(partial, index=False)

    if "cold" in parts:
        for day in preset.at:
            # The night's window as one partition (every organic and probe rating up to `day`, moved to that
            # date): an empty workspace, one `run --cold`, the same ratings the chain's store holds.
            wlog = work / f"window-logs-{day}"
            write_window_logs(world, wlog, day)
            refs = () if only_methods else (("cold: default", {}), ("plain", {"debias.method": "plain"}))
            for m_label, m_over in (*refs, *((f"cold: {k}", v) for k, v in methods.items() if day == preset.at[-1])):
                keep(cold_run(m_label, m_over, None, wlog, day, world, base, work, test, log))
                say(f"{dataset} seed {seed} night {day} {m_label}: MAE {rows[-1]['mae']:.4f}")
            if only_methods:
                continue
            olog = work / f"oracle-logs-{day}"
            write_oracle_logs(world, olog, day)
            keep(cold_run("oracle", {"debias.method": "plain"}, None, olog, day, world, base, work, test, log))
            say(f"{dataset} seed {seed} night {day} oracle: MAE {rows[-1]['mae']:.4f}")
    if "chain" not in parts:
        return rows, facts
    for c, spec in enumerate(chains):
        label, over = parse_chain(spec)
        ws = work / f"chain{c}"
        cfg = write_config(work / f"chain{c}.toml", {**base, **over})
        start = 1
        for day in preset.at:
            secs = cli("backfill", "--start", world.date(start), "--end", world.date(day), "--live", "each",
                       "--config", str(cfg), "--workspace", str(ws), log=log)
            r = {"what": f"chain: {label}", "night": day, "seconds": secs / (day - start + 1),
                 **score(ws, live(ws), world, test, cfg, log)}
            keep(r)
            say(f"{dataset} seed {seed} night {day} chain {label}: MAE {r['mae']:.4f} ({r['seconds']:.1f} s/night)")
            start = day + 1
        lg = ledger(ws)
        bf = lg[lg["kind"] == "backfill"]
        train = [json.loads(d).get("train", float("nan")) for d in bf["durations_json"].fillna("{}")]
        facts[f"chain: {label}"] = {
            "nights": int(bf["run_date"].nunique()),
            "done": int(bf.loc[bf["status"] == "done", "run_date"].nunique()),
            "went_live": int((bf["state"] == "live").sum()),
            "held": int((bf["state"] == "held").sum()),
            "train_s_per_night": float(np.nanmean(train)) if train else float("nan"),
        }
    return rows, facts


def add_gap(df: pd.DataFrame) -> pd.DataFrame:
    ref = df[df["what"].isin(["plain", "oracle"])].groupby(["seed", "night", "what"])["mae"].mean().unstack("what")
    p = ref["plain"].reindex(list(zip(df["seed"], df["night"]))).to_numpy()
    o = ref["oracle"].reindex(list(zip(df["seed"], df["night"]))).to_numpy()
    df["gap_closed"] = (p - df["mae"].to_numpy()) / (p - o)
    return df


def _pm(v: pd.Series, pct: bool = False) -> str:
    x = v.to_numpy(float) * (100 if pct else 1)
    sd = float(np.std(x, ddof=1)) if len(x) > 1 else 0.0
    return f"{x.mean():.1f} ± {sd:.1f}%" if pct else f"{x.mean():.3f} ± {sd:.3f}"


def table(df: pd.DataFrame, dataset: str, preset: str, facts: list[dict]) -> str:
    seeds = sorted(df["seed"].unique())
    lines = [f"### Long run: {dataset}, preset {preset}, {len(seeds)} seed(s) ({', '.join(map(str, seeds))})", "",
             "MAE on the hidden MAR test (mean ± std over seeds); gap closed = (plain − m) / (plain − oracle) "
             "with plain and oracle fitted cold on the same night's window. `chain` = the live version after "
             "`tarewise backfill --live each` over every night so far (held nights leave live where it was; the "
             "next night warm-starts from live); `cold` = `tarewise run --cold` in an empty workspace on the "
             "same ratings (the window as one partition); s = wall seconds per night of the chain, per run "
             "otherwise (shared 2-core machine).", "",
             "| night | what ran | MAE | gap closed | " + " | ".join(f"MAE {g}" for g in GROUPS) + " | s |",
             "|---|---|---|---|" + "---|" * len(GROUPS) + "---|"]
    for night in sorted(df["night"].unique()):
        d = df[df["night"] == night]
        for what in dict.fromkeys(d["what"]):
            x = d[d["what"] == what]
            lines.append(f"| {night} | {what} | {_pm(x['mae'])} | {_pm(x['gap_closed'], True)} | "
                         + " | ".join(_pm(x[f"mae_{g}"]) for g in GROUPS) + f" | {x['seconds'].mean():.1f} |")
    lines += ["", "Chain facts per seed: " + "; ".join(json.dumps(f, sort_keys=True) for f in facts), ""]
    return "\n".join(lines)


def _facts(csv: Path) -> dict:
    """A run's chain facts: its ``.facts.json``, else the facts line of its ``.md`` table."""
    if csv.with_suffix(".facts.json").exists():
        return json.loads(csv.with_suffix(".facts.json").read_text())
    line = next(x for x in csv.with_suffix(".md").read_text().splitlines() if x.startswith("Chain facts per seed: "))
    return json.loads(line.removeprefix("Chain facts per seed: "))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--dataset", choices=("insteval", "bfi"), default="insteval")
    ap.add_argument("--preset", choices=tuple(PRESETS), default="full")
    ap.add_argument("--seeds", type=int, default=None, help="override the preset's seed count")
    ap.add_argument("--seed-list", default="", help="comma-separated seeds (overrides --seeds)")
    ap.add_argument("--chains", default="default",
                    help="'|'-separated chains: 'default' or 'key=value;key=value' config overrides")
    ap.add_argument("--methods", default="all", help="'all', 'none' or '|'-separated labels of METHODS")
    ap.add_argument("--work", default="", help="scratch folder (default: a temporary one under /tmp)")
    ap.add_argument("--parts", default="chain+cold", choices=("chain+cold", "chain", "cold"),
                    help="run the chains, the cold runs, or both (two processes can split them)")
    ap.add_argument("--resume", action="store_true", help="keep earlier chain workspaces under --work")
    ap.add_argument("--only-methods", action="store_true", help="cold runs of --methods only (no default, plain, "
                    "oracle: merge with a run that has them)")
    ap.add_argument("--at", default="", help="comma-separated checkpoint nights (default: the preset's)")
    ap.add_argument("--out", default="")
    ap.add_argument("--merge", default="", help="comma-separated .csv files of earlier runs (one per seed, each "
                    "with its .facts.json): write their combined table instead of running")
    args = ap.parse_args(argv)
    out = Path(args.out) if args.out else OUT / f"long_run_{args.dataset}_{args.preset}.md"
    out.parent.mkdir(parents=True, exist_ok=True)
    if args.merge:
        files = [Path(f) for f in args.merge.split(",")]
        df = add_gap(pd.concat([pd.read_csv(f) for f in files], ignore_index=True))
        facts = [_facts(f) for f in files]
        text = table(df, args.dataset, args.preset, facts)
        out.write_text(text, encoding="utf-8")
        df.to_csv(out.with_suffix(".csv"), index=False)
        print(text)
        return 0
    preset = PRESETS[args.preset]
    if args.at:
        preset = replace(preset, at=tuple(int(x) for x in args.at.split(",")))
    seeds = ([int(s) for s in args.seed_list.split(",")] if args.seed_list
             else list(range(args.seeds if args.seeds is not None else preset.seeds)))
    methods = (METHODS if args.methods == "all" else {} if args.methods == "none"
               else {k: METHODS[k] for k in args.methods.split("|")})
    chains = args.chains.split("|")
    work = Path(args.work or f"/tmp/tarewise-long-run-{os.getpid()}")
    truth = insteval_truth(preset.members, preset.titles) if args.dataset == "insteval" else None
    rows, facts = [], []
    for seed in seeds:
        r, f = run_seed(args.dataset, seed, preset, chains, methods, work, truth=truth,
                        partial=work / f"partial-{args.dataset}-s{seed}-{args.parts}.csv",
                        parts=tuple(args.parts.split("+")), resume=args.resume, only_methods=args.only_methods)
        rows += r
        facts.append({"seed": seed, **f})
    df = add_gap(pd.DataFrame(rows))
    text = table(df, args.dataset, args.preset, facts)
    print(text)
    out.write_text(text, encoding="utf-8")
    df.drop(columns="gap_closed").to_csv(out.with_suffix(".csv"), index=False)
    out.with_suffix(".facts.json").write_text(json.dumps(facts[0] if len(facts) == 1 else facts), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
