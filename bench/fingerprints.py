"""Fingerprints of a fixed set of nights: sha256 of every published file and of each night's report.

Used to show that a change meant to keep behaviour (a refactor) keeps it bit for bit: run it before and
after, and compare the two outputs (``diff``). Each setting replays the invented sample logs
(``sample_parquet/``) through the real command line (``tarewise backfill --live each``) in a fresh
workspace, so the flow, the engine, the gate, publishing and the report are all exercised.

    python bench/fingerprints.py > before.txt      # on the old code
    python bench/fingerprints.py > after.txt       # on the new code
    diff before.txt after.txt                      # empty: same bytes

Report files carry the time they were rendered; those timestamps are blanked before hashing (and
nothing else is). Takes a few minutes (one Prefect start per setting).
"""

from __future__ import annotations

import argparse
import hashlib
import os
import re
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: name -> TOML body (on top of a fast base config below).
SETTINGS = {
    "per_user": "",
    "calibrated": '[debias]\nmethod = "calibrated"\nprobe_target_weight = 1.0\ncalibration_weight = 2.0\n',
    "plain": '[debias]\nmethod = "plain"\n',
    "ips": '[debias]\nmethod = "ips"\n',
    "snips": '[debias]\nmethod = "snips"\n',
    "recalibrate": '[debias]\nmethod = "recalibrate"\n',
    "probe_upweight": '[debias]\nmethod = "probe_upweight"\n',
    "per_user_ips": '[debias]\nmethod = "per_user"\ncombine_with = "ips"\n',
}

BASE = """
[model]
dim = 8
max_epochs = 12
finetune_epochs = 4
[evaluate]
bootstrap = 100
[runtime]
timezone = "UTC"
"""

# ISO timestamps with a time part (report render time, alert times); dates alone are kept.
STAMP = re.compile(rb"\d{4}-\d\d-\d\d[T ]\d\d:\d\d:\d\d(\.\d+)?([+-]\d\d:\d\d|Z)?")
# Durations and timings vary run to run: "seconds": 1.234 in JSON twins, "1.2 s" in HTML.
TIMING = re.compile(rb'"(seconds|duration_seconds|[a-z_]*_seconds|durations)": (\{[^}]*\}|[0-9.e+-]+)')


def digest(path: Path, blank: bool) -> str:
    data = path.read_bytes()
    if blank:
        data = TIMING.sub(rb'"\1": _', STAMP.sub(b"<time>", data))
    return hashlib.sha256(data).hexdigest()[:16]


def fingerprint(name: str, body: str, start: str, end: str, tmp: Path) -> list[str]:
    ws, cfg = tmp / name / "ws", tmp / name / "cfg.toml"
    cfg.parent.mkdir(parents=True)
    cfg.write_text(BASE + body)
    env = {**os.environ, "PREFECT_HOME": str(tmp / "prefect-home"), "PREFECT_LOGGING_LEVEL": "WARNING"}
    cmd = [sys.executable, "-m", "flows.cli", "backfill", "--start", start, "--end", end, "--live", "each",
           "-c", str(cfg), "--workspace", str(ws), "--logs", str(ROOT / "sample_parquet")]
    done = subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True, text=True)
    if done.returncode != 0:
        raise SystemExit(f"{name}: backfill failed\n{done.stdout}\n{done.stderr}")
    lines = []
    for vdir in sorted((ws / "versions").iterdir()):
        for f in sorted(p for p in vdir.rglob("*") if p.is_file()):
            if f.name == "manifest.json":
                continue   # carries timings and code version; its content is covered by predictions + model
            lines.append(f"{name} {f.relative_to(ws)} {digest(f, blank=False)}")
    for f in sorted((ws / "reports").glob("*")):
        lines.append(f"{name} {f.relative_to(ws)} {digest(f, blank=True)}")
    return lines


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--start", default="2026-11-01")
    ap.add_argument("--end", default="2026-11-04")
    ap.add_argument("--only", default="", help="comma-separated setting names")
    args = ap.parse_args()
    names = [n for n in SETTINGS if not args.only or n in args.only.split(",")]
    with tempfile.TemporaryDirectory() as d:
        for name in names:
            for line in fingerprint(name, SETTINGS[name], args.start, args.end, Path(d)):
                print(line, flush=True)


if __name__ == "__main__":
    main()
