"""Memory allocators of a night's process: hand freed window-sized buffers back to the system.

A night allocates and frees many arrays of one to a few dozen MB (a day's column, a chunk of a round's
examples). Two allocators kept them after they were freed, and the night's peak grew with it:

- glibc's malloc raises its mmap threshold to the size of each large block freed (up to 32 MB), so after
  the first window-sized arrays are freed, later ones below 32 MB come from the heap, whose freed pages
  are rarely returned;
- Arrow's default pool (mimalloc) keeps the pages of decoded Parquet columns for its own reuse.

Measured on the 10M-rating benchmark window (bench/BENCHMARKS.md, "memory per rating"): the window read
peaked at 132 bytes a window rating with both as they come, 94 with the system pool and a fixed 1 MB
threshold. The numbers computed do not change, only where freed memory goes.

An operator's own choice wins: ``ARROW_DEFAULT_MEMORY_POOL`` or ``MALLOC_MMAP_THRESHOLD_`` in the
environment leaves that allocator as configured. Elsewhere than glibc (musl, macOS) the malloc part is
skipped.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os

import pyarrow as pa

#: Blocks at least this large are mapped and unmapped on their own (glibc's M_MMAP_THRESHOLD).
MMAP_THRESHOLD = 1 << 20
_M_MMAP_THRESHOLD = -3          # mallopt parameter number, glibc's malloc.h


def return_freed_memory() -> dict[str, str]:
    """Apply the settings above to this process (idempotent); returns what each allocator now does."""
    facts = {}
    if "ARROW_DEFAULT_MEMORY_POOL" in os.environ:
        facts["arrow"] = f"{pa.default_memory_pool().backend_name} (ARROW_DEFAULT_MEMORY_POOL)"
    else:
        pa.set_memory_pool(pa.system_memory_pool())
        facts["arrow"] = "system"
    facts["malloc"] = _fix_mmap_threshold()
    return facts


def _fix_mmap_threshold() -> str:
    if "MALLOC_MMAP_THRESHOLD_" in os.environ:
        return f"mmap threshold {os.environ['MALLOC_MMAP_THRESHOLD_']} (MALLOC_MMAP_THRESHOLD_)"
    name = ctypes.util.find_library("c")
    try:
        libc = ctypes.CDLL(name)
        mallopt = libc.mallopt
        libc.gnu_get_libc_version          # glibc only: mallopt's parameter numbers are glibc's
    except (OSError, AttributeError, TypeError):
        return "as it comes (not glibc)"
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    if mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD) != 1:
        return "as it comes (mallopt refused)"
    return f"mmap threshold {MMAP_THRESHOLD} bytes"
