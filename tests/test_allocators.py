"""The night's process hands freed buffers back (tasks/allocators.py); an operator's environment wins."""

from __future__ import annotations

import json
import subprocess
import sys

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
    out = subprocess.run([sys.executable, "-c", PROBE], capture_output=True, text=True, cwd=REPO,
                         env={"PATH": "/usr/bin:/bin", "PYTHONPATH": str(REPO), **env}, check=True)
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
