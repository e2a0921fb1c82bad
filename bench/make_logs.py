"""Large invented rating logs for the nightly benchmark: 1M, 10M or 30M organic ratings over 30 days
(and 100M, for the one-machine limit).

Same invented scenario and generator as the demo (:func:`tasks.operate.demo_data.generate`: the library network's
reading app, lover / hater / random members, Zipf-like title popularity, log-normal member activity,
about 3% of each day's active members answer one probe card). Only the sizes differ; every number is
invented. Memory is O(members + titles + one day of ratings), so 30M ratings need no more RAM than 1M
ratings of a day's size.

    python bench/make_logs.py --sizes 1M,10M --out /tmp/tarewise-bench-logs

Each size goes to ``<out>/<size>/dt=YYYY-MM-DD/part-0.parquet``. A folder whose ``_truth/params.json``
already matches the requested size is reused, so the benchmark can be re-run without regenerating.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from tasks.operate.demo_data import TRUTH_DIR, generate  # noqa: E402

#: name -> (organic ratings over the window, members, titles). Invented sizes within the issue's range
#: (up to 500k users and 100k items).
SIZES = {
    "300k": (300_000, 20_000, 10_000),
    "1M": (1_000_000, 50_000, 20_000),
    "10M": (10_000_000, 200_000, 50_000),
    "30M": (30_000_000, 500_000, 100_000),
    "100M": (100_000_000, 900_000, 200_000),
}
DAYS = 30
START = "2026-10-01"
SEED = 2026


def size_params(size: str) -> dict:
    ratings, members, titles = SIZES[size]
    return {"start_date": START, "days": DAYS, "organic_per_day": ratings // DAYS, "n_members": members,
            "n_titles": titles, "seed": SEED}


def _matches(folder: Path, params: dict) -> bool:
    path = folder / TRUTH_DIR / "params.json"
    if not path.is_file():
        return False
    have = json.loads(path.read_text())
    return all(have.get(k) == params[k] for k in ("start_date", "days", "organic_per_day", "seed")) and \
        have.get("bench_members") == params["n_members"] and have.get("bench_titles") == params["n_titles"]


def make_logs(out: Path, size: str, force: bool = False) -> tuple[Path, float]:
    """Write (or reuse) the logs of ``size`` under ``out/size``; return (folder, seconds spent generating)."""
    params = size_params(size)
    folder = Path(out) / size
    if not force and _matches(folder, params):
        return folder, 0.0
    t0 = time.perf_counter()
    truth = generate(folder, params["start_date"], params["days"], params["n_members"], params["n_titles"],
                     params["organic_per_day"], params["seed"])
    # Record the sizes beside the generator's own parameters, so a later run can tell the folder is reusable.
    truth.params.update(bench_members=params["n_members"], bench_titles=params["n_titles"])
    truth.save(folder)
    return folder, time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="1M,10M", help="comma list of " + ",".join(SIZES))
    ap.add_argument("--out", default="/tmp/tarewise-bench-logs")
    ap.add_argument("--force", action="store_true", help="regenerate even when a matching folder exists")
    args = ap.parse_args()
    for size in [s.strip() for s in args.sizes.split(",") if s.strip()]:
        if size not in SIZES:
            ap.error(f"unknown size {size!r}; choose from {', '.join(SIZES)}")
        folder, secs = make_logs(Path(args.out), size, args.force)
        print(f"{size}: {folder} ({'reused' if secs == 0 else f'{secs:.0f} s'})", file=sys.stderr)


if __name__ == "__main__":
    main()
