"""The window read against a bare Arrow read of the same stored files, on an existing workspace.

Not a test. ``bench/bench_nightly.py`` measures the same thing at the end of each case; this script
repeats it on any workspace (e.g. a nightly benchmark's while it runs, or a production copy) so the
read can be re-measured after a change without a whole night. Best of ``--repeats`` on each side, warm
page cache on both, in one process:

    python bench/bench_window.py --workspace /tmp/tarewise-bench-night-10M-xxxx/ws --days 30
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


def main() -> None:
    import pyarrow.parquet as pq

    from tasks.ingest import store
    from tasks.workspace import Workspace
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workspace", required=True)
    ap.add_argument("--date", help="last day of the window (default: the last stored date)")
    ap.add_argument("--days", type=int, default=30)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    ws = Workspace.at(args.workspace)
    date = args.date or store.stored_dates(ws)[-1]
    files = [ws.partition(ws.store, d) / store.PART_FILE for d in store.window_dates(ws, date, args.days)]
    bare = read = text = float("inf")
    for _ in range(args.repeats):
        t0 = time.perf_counter()
        for f in files:
            pq.read_table(f)
        bare = min(bare, time.perf_counter() - t0)
        t0 = time.perf_counter()
        window = store.read_window(ws, date, args.days, categorical=True, times=False)   # what the night reads
        read = min(read, time.perf_counter() - t0)
        n, mb = len(window), window.memory_usage(deep=True).sum() / 2**20
        del window
        t0 = time.perf_counter()
        window = store.read_window(ws, date, args.days)                        # the same, ids as text
        text = min(text, time.perf_counter() - t0)
        text_mb = window.memory_usage(deep=True).sum() / 2**20
        del window
    out = {"files": len(files), "window_ratings": n, "bare_read_s": bare, "window_read_s": read,
           "ratio": read / bare, "frame_mb": mb, "frame_bytes_per_rating": mb * 2**20 / n,
           "text_read_s": text, "text_frame_mb": text_mb}
    print(json.dumps(out))


if __name__ == "__main__":
    main()
