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

Blocks below the threshold still come from the heap (a training round frees thousands of small
tensors); :func:`trim` gives the heap's free pages back between a night's stages.

An operator's own choice wins: ``ARROW_DEFAULT_MEMORY_POOL`` or ``MALLOC_MMAP_THRESHOLD_`` in the
environment leaves that allocator as configured. Elsewhere than glibc (musl, macOS) the malloc part is
skipped.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import functools
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


def trim() -> bool:
    """Give the heap's free pages back to the system now (glibc's ``malloc_trim(0)``); True when it
    released some. Called between a night's stages: training frees many small tensors (below the mmap
    threshold, so heap-allocated) whose pages would otherwise stay in the process through scoring, the
    night's peak. Measured at 10M ratings: about 15 MB off that peak (2 bytes a window rating, within
    the spread of repeats; BENCHMARKS.md, "Fourth pass"). A no-op (False) elsewhere than glibc."""
    libc = _glibc()
    if libc is None:
        return False
    libc.malloc_trim.argtypes, libc.malloc_trim.restype = [ctypes.c_size_t], ctypes.c_int
    return bool(libc.malloc_trim(0))


@functools.cache
def _glibc():
    """The C library when it is glibc (whose mallopt/malloc_trim this module calls), else None; looked
    up once per process (a night trims more than once)."""
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c"))
        libc.gnu_get_libc_version          # glibc only: mallopt's parameter numbers are glibc's
    except (OSError, AttributeError, TypeError):
        return None
    return libc


def _fix_mmap_threshold() -> str:
    if "MALLOC_MMAP_THRESHOLD_" in os.environ:
        return f"mmap threshold {os.environ['MALLOC_MMAP_THRESHOLD_']} (MALLOC_MMAP_THRESHOLD_)"
    libc = _glibc()
    if libc is None:
        return "as it comes (not glibc)"
    mallopt = libc.mallopt
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    if mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD) != 1:
        return "as it comes (mallopt refused)"
    return f"mmap threshold {MMAP_THRESHOLD} bytes"
