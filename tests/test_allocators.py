"""The night's process hands freed buffers back (tasks/allocators.py); an operator's environment wins."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from conftest import REPO

PROBE = """
import json, os, sys
import numpy as np, pyarrow as pa, pyarrow.compute as pc
from tasks.allocators import return_freed_memory
facts = return_freed_memory()
t = pc.add(pa.array(np.arange(8 << 20)), 1)     # 64 MB allocated by Arrow: through the pool set
print(json.dumps({"facts": facts, "pool": pa.default_memory_pool().backend_name,
                  "held": pa.default_memory_pool().bytes_allocated()}))
"""


def _run(env: dict) -> dict:
    return _run_code(PROBE, env)


def _run_code(code: str, env: dict | None = None) -> dict:
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=REPO,
                         env={"PATH": "/usr/bin:/bin", "PYTHONPATH": str(REPO), **(env or {})}, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_system_pool_and_a_fixed_mmap_threshold_by_default() -> None:
    got = _run({})
    assert got["pool"] == "system" and got["facts"]["arrow"] == "system"
    if sys.platform.startswith("linux"):
        assert got["facts"]["malloc"] in ("mmap threshold 1048576 bytes", "as it comes (not glibc)")
    assert got["held"] >= 64 << 20


def test_the_operators_environment_wins() -> None:
    got = _run({"ARROW_DEFAULT_MEMORY_POOL": "jemalloc", "MALLOC_MMAP_THRESHOLD_": "131072"})
    assert got["pool"] == "jemalloc" and got["facts"]["arrow"].endswith("(ARROW_DEFAULT_MEMORY_POOL)")
    assert got["facts"]["malloc"] == "mmap threshold 131072 (MALLOC_MMAP_THRESHOLD_)"


TRIM = """
import json, os
import numpy as np
from tasks.allocators import return_freed_memory, trim
return_freed_memory()
def rss_mb():
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20
start = rss_mb()
small = [np.ones(64 * 1024 // 8) for _ in range(4000)]     # 250 MB of 64 kB blocks: below the mmap threshold
keep = np.ones(1024)                                       # allocated last: holds the heap's top in place
del small
before = rss_mb()
released = trim()
print(json.dumps({"start": start, "before": before, "after": rss_mb(), "released": released}))
"""


def test_trim_hands_the_heaps_free_pages_back() -> None:
    if not sys.platform.startswith("linux"):
        pytest.skip("reads /proc/self/statm")
    got = _run_code(TRIM)
    held = got["before"] - got["start"]            # freed small blocks the heap still held
    if not got["released"] or held < 20:
        pytest.skip(f"not glibc (trim is a no-op there) or the frees gave the memory back: {got}")
    # Trimming gives back at least three quarters of what the heap held after the frees.
    assert got["after"] - got["start"] < 0.25 * held, got
