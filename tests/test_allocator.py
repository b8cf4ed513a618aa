"""The tool's processes reuse the memory they free (pipelines/allocator.py): page faults counted, not time.

A fresh array of 64 MiB costs 16,384 page faults of 4 KiB when the C library maps it anew (glibc's default
for any block above its mmap threshold, at most 32 MiB); with the memory kept, the next array of that size
lands on pages already mapped. Each case runs in a process of its own, numpy's huge-page advice off so that
a fault is one 4 KiB page (NUMPY_MADVISE_HUGEPAGE, numpy's documented switch).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

PROBE = """
import json, resource
import pipelines, numpy as np
from pipelines.allocator import keep_freed_memory
rounds, before = 12, resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for i in range(rounds):
    a = np.ones(8 << 20)  # 64 MiB, written whole, then freed
    del a
faults = resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before
print(json.dumps({"applied": keep_freed_memory(), "faults_per_array": faults / rounds}))
"""


def probe(**env: str) -> dict:
    run = subprocess.run([sys.executable, "-c", PROBE], capture_output=True, text=True, check=True,
                         env={**os.environ, "NUMPY_MADVISE_HUGEPAGE": "0", **env})
    return json.loads(run.stdout)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="mallopt is glibc's (Linux)")
def test_freed_arrays_reuse_mapped_pages():
    kept, system = probe(APPORTION_MALLOC=""), probe(APPORTION_MALLOC="system")
    assert kept["applied"] and not system["applied"]
    # the C library's default: every array faulted in anew (16,384 pages of 4 KiB each)
    assert system["faults_per_array"] > 16_000
    # kept: the first array grows the heap (16,384 faults), the other eleven land on its pages (none): the mean is
    # about 1,365; anything near a quarter of the default means freed pages were handed back
    assert kept["faults_per_array"] < 16_384 / 4


ADVICE = """
import json, sys
first = sys.argv[1] == "numpy-first"
if first:
    import numpy
import pipelines, numpy as np
from pipelines.allocator import small_array_pages
advice = np._core.multiarray._set_madvise_hugepage(False)  # returns the setting in force
import os
print(json.dumps({"advice": bool(advice), "child_sees": os.environ.get("NUMPY_MADVISE_HUGEPAGE")}))
"""


def advice(order: str, **env: str) -> dict:
    clean = {k: v for k, v in os.environ.items() if k not in ("NUMPY_MADVISE_HUGEPAGE", "APPORTION_MALLOC")}
    run = subprocess.run([sys.executable, "-c", ADVICE, order], capture_output=True, text=True, check=True,
                         env={**clean, **env})
    return json.loads(run.stdout)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="numpy gives the huge-page advice on Linux only")
@pytest.mark.parametrize("order", ["pipelines-first", "numpy-first"])
def test_numpys_huge_page_advice_is_off_unless_asked_for(order):
    # numpy's default on Linux >= 4.6 is on (numpy/__init__.py, hugepage_setup): the opt-out keeps it
    assert advice(order, APPORTION_MALLOC="system") == {"advice": True, "child_sees": None}
    # imported after pipelines or before it, the advice is off, and processes started from it inherit that
    assert advice(order) == {"advice": False, "child_sees": "0"}
    # a setting of the user's own is followed
    assert advice(order, NUMPY_MADVISE_HUGEPAGE="1") == {"advice": True, "child_sees": "1"}
