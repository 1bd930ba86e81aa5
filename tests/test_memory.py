"""geopress._compat.release_freed_heap: the heap pages a thread freed go back to the system."""

from __future__ import annotations

import threading
from pathlib import Path

import numpy as np
import pytest

from geopress import _compat


def rss_mb() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024.0
    raise AssertionError("no VmRSS in /proc/self/status")


@pytest.mark.skipif(_compat._MALLOC_TRIM is None or not Path("/proc/self/status").exists(),
                    reason="glibc's malloc_trim and /proc are Linux's")
def test_memory_a_thread_freed_is_given_back():
    kept = []

    def work():
        # 400 MB in 2 KB arrays (malloc'd, not Python's small-object pool) in a thread's own arena; one in 64
        # kept, so the freed pages lie between live ones and the arena cannot shrink from its top by itself
        arrays = [np.ones(256) for _ in range(200_000)]
        kept.extend(arrays[::64])

    thread = threading.Thread(target=work)
    thread.start()
    thread.join()
    before = rss_mb()
    _compat.release_freed_heap()
    # glibc returned 390 of the 455 MB here; 200 MB leaves room for whatever else the process holds
    assert before - rss_mb() > 200.0


FAULTS = """
import resource, sys
import numpy as np
import pyarrow as pa
from geopress import _compat
if sys.argv[1] == "keep":
    _compat.keep_freed_memory()
def faults():
    return resource.getrusage(resource.RUSAGE_SELF).ru_minflt
def refill(make):
    # 256 MB, far beyond the 32 MB that glibc at most gives a block of its own mapping, freed, then again
    block = make(); del block
    _compat.release_freed_heap()  # as a run does after every step
    before = faults(); block = make(); return faults() - before
size = 256 * 2**20
print(refill(lambda: np.ones(size // 8)), refill(lambda: pa.allocate_buffer(size)), pa.default_memory_pool().backend_name)
"""


@pytest.mark.skipif(_compat._MALLOPT is None, reason="mallopt is glibc's")
def test_a_process_that_keeps_its_freed_memory_takes_no_new_pages_for_the_same_blocks():
    # the observable effect: touching a block again after freeing it costs no page faults. Without keeping,
    # numpy's block comes back as new pages: at least one fault per 2 MB huge page, 128 here (640 measured)
    import subprocess
    import sys

    def run(mode):
        out = subprocess.run([sys.executable, "-c", FAULTS, mode], capture_output=True, text=True, check=True)
        *faults, backend = out.stdout.split()
        return [int(f) for f in faults], backend

    (numpy_new, _), backend = run("default")
    assert numpy_new >= 128 and backend != "system"
    (numpy_kept, arrow_kept), backend = run("keep")
    assert backend == "system"
    # a few faults for the interpreter's own small objects; the blocks themselves are reused whole
    assert numpy_kept < 16 and arrow_kept < 16
