"""The process keeps the memory it frees for its next arrays, instead of handing it back to the kernel.

The stages build and drop many full-length arrays (a column of 15M rows is 120 MB). glibc's malloc serves
each allocation above its mmap threshold (at most 32 MB) with a fresh mapping and unmaps it when the array is
freed, so the next array of the same size faults every page in again and the kernel zeroes it again (with
numpy's huge-page advice, it also compacts memory to find huge pages). Measured on a cycle of 100k leaves:
the kernel's time was as large as the process's own (37 s system against 37 s user).

`keep_freed_memory` tells glibc (`mallopt`, its public interface, through ctypes) to serve every allocation
from its heap and to keep freed memory up to `TRIM_THRESHOLD` at the heap's top: a freed array's pages are
reused by the next one, already mapped. The price is that the process's resident size does not fall back
after its peak (it stays at the high-water mark until the process ends). A step of the Dagster path runs
in a process of its own, and the command line's run ends with the cycle, so that is the peak anyway.

`small_array_pages` turns numpy's huge-page advice off (numpy's own switch, `NUMPY_MADVISE_HUGEPAGE=0`).
With the advice on, the first touch of every 2 MiB of a growing heap asks the kernel for a huge page; on a
machine whose memory is fragmented (any long-running host) that means direct compaction, and this
machine's `/proc/vmstat` counted 64k compaction stalls. Measured on a cycle of 100k leaves, same code, same
hour: own code 27.2 / 34.0 s with the advice, 19.5 / 19.8 s without (benchmarks/README.md, *The third round
of 2026-12-03 merged*). A `NUMPY_MADVISE_HUGEPAGE` set by the user is left as it is.

Both are applied when `pipelines` is imported (every process of the tool: the command line, Dagster's code
location and step processes, the model pool's workers). `APPORTION_MALLOC=system` leaves the C library's
and numpy's defaults alone. Anything but Linux with glibc: nothing to do (False).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import sys

# mallopt's parameters (glibc <malloc.h>)
M_TRIM_THRESHOLD = -1
M_TOP_PAD = -2
M_MMAP_MAX = -4

TRIM_THRESHOLD = 2**31 - 1  # mallopt takes an int: free memory at the heap's top above 2 GiB goes back to the kernel
TOP_PAD = 64 << 20  # the heap grows by at least 64 MiB at a time
OPT_OUT = "APPORTION_MALLOC"
HUGEPAGE_SWITCH = "NUMPY_MADVISE_HUGEPAGE"  # numpy's documented switch, read when numpy is imported

_applied: bool | None = None


def keep_freed_memory() -> bool:
    """Serve every allocation from the heap and keep what is freed for reuse (see the module); True when glibc
    took the settings. Once per process; `APPORTION_MALLOC=system` or a C library without `mallopt`: False."""
    global _applied
    if _applied is not None:
        return _applied
    _applied = False
    if os.environ.get(OPT_OUT, "").strip().lower() == "system" or not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # not glibc (musl has no mallopt)
        return False
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    # the order matters: the trim threshold first, so nothing is handed back between the calls
    _applied = all(mallopt(p, v) == 1 for p, v in ((M_TRIM_THRESHOLD, TRIM_THRESHOLD), (M_TOP_PAD, TOP_PAD),
                                                  (M_MMAP_MAX, 0)))
    return _applied


def small_array_pages() -> bool:
    """numpy's huge-page advice off for this process and the processes it starts (see the module); True when
    turned off here. Left alone under `APPORTION_MALLOC=system`, off Linux, or when the user set
    `NUMPY_MADVISE_HUGEPAGE` (numpy has then followed it)."""
    if (os.environ.get(OPT_OUT, "").strip().lower() == "system" or not sys.platform.startswith("linux")
            or HUGEPAGE_SWITCH in os.environ):
        return False
    os.environ[HUGEPAGE_SWITCH] = "0"  # numpy imported from here on, and every child process, read it
    numpy = sys.modules.get("numpy")
    if numpy is not None:  # imported before pipelines: numpy's runtime form of the same switch
        numpy._core.multiarray._set_madvise_hugepage(False)
    return True
