"""Wall time and peak memory of a command, for the benchmarks (Linux: /proc and wait4).

geopress runs child processes (the service band, the GeoPackage writer)
beside a fork server, and a process tree's pages may be shared, so the
resident set size of one process says too little and the sum over processes
too much. :func:`measure` reports both the
peak RSS of the command's process (``wait4``: the largest of it and the
children it waited for, not those of geopress's fork server) and the peak
proportional set size of the whole process tree (a page shared by n processes
counts 1/n in each, so the sum is the memory the tree really holds), sampled
every 50 ms. Linux starts a child's peak RSS at its parent's resident set when
it starts (it survives ``exec``), so the caller must be small for the peak RSS
to be the command's: bench.py makes its data in a process of its own.

Sampling is not free: each read of ``/proc/PID/smaps_rollup`` walks that process's
page tables, and it slowed a run of ``geopress`` (four processes) at 1,000,000
customers by about 3 s of 8 (scripts/README.md). So a timed run is measured with
``sample=False`` (wall time and the process's peak RSS from ``wait4``,
which cost nothing), and the PSS comes from runs of its own.
"""

from __future__ import annotations

import os
import subprocess
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping, Sequence

GB = 1024 * 1024  # KiB per GiB


@dataclass
class Measured:
    wall_s: float
    rss_gb: float  # the command's process's peak resident set size (see above)
    pss_gb: float  # the process tree's peak proportional set size, sampled (NaN when not sampled)
    exit_code: int
    stdout: str = ""


def _tree(pid: int) -> list[int]:
    """``pid`` and its descendants."""
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        out.append(p)
        for task in Path(f"/proc/{p}/task").glob("*"):
            try:
                todo.extend(int(c) for c in (task / "children").read_text().split())
            except OSError:  # the task ended meanwhile
                pass
    return out


def _pss_kib(pids: list[int]) -> int:
    kib = 0
    for p in pids:
        try:
            for line in Path(f"/proc/{p}/smaps_rollup").read_text().splitlines():
                if line.startswith("Pss:"):
                    kib += int(line.split()[1])
                    break
        except OSError:  # the process ended meanwhile
            pass
    return kib


def measure(cmd: Sequence[str], env: Mapping[str, str] | None = None, *, sample: bool = True) -> Measured:
    """Run ``cmd`` to its end and measure it; ``sample=False`` leaves out the PSS sampling (see above)."""
    import tempfile

    out = tempfile.TemporaryFile(mode="w+")  # a file, not a pipe: a chatty child never blocks on it
    t0 = time.perf_counter()
    proc = subprocess.Popen(list(cmd), env=None if env is None else dict(env), stdout=out)
    peak = [0]
    stop = threading.Event()

    def sample_pss() -> None:
        while not stop.wait(0.05):
            peak[0] = max(peak[0], _pss_kib(_tree(proc.pid)))

    sampler = threading.Thread(target=sample_pss, daemon=True)
    if sample:
        sampler.start()
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    stop.set()
    if sample:
        sampler.join()
    proc.returncode = os.waitstatus_to_exitcode(status)
    out.seek(0)
    text = out.read()
    out.close()
    return Measured(wall, usage.ru_maxrss / GB, peak[0] / GB if sample else float("nan"), proc.returncode, text)
