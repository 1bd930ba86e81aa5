"""Wall time and peak memory of a command, for the benchmarks (Linux: /proc and wait4).

geopress runs a second process (the service band, the GeoPackage writer)
beside a fork server, and a process tree's pages may be shared, so the
resident set size of one process says too little and the sum over processes
too much. :func:`measure` reports both the
peak RSS of the largest process (``wait4``) and the peak proportional set
size of the whole process tree (a page shared by n processes counts 1/n in
each, so the sum is the memory the tree really holds), sampled every 50 ms.
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
    rss_gb: float  # the largest process's peak resident set size
    pss_gb: float  # the process tree's peak proportional set size, sampled
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


def measure(cmd: Sequence[str], env: Mapping[str, str] | None = None) -> Measured:
    """Run ``cmd`` to its end and measure it."""
    import tempfile

    out = tempfile.TemporaryFile(mode="w+")  # a file, not a pipe: a chatty child never blocks on it
    t0 = time.perf_counter()
    proc = subprocess.Popen(list(cmd), env=None if env is None else dict(env), stdout=out)
    peak = [0]
    stop = threading.Event()

    def sample() -> None:
        while not stop.wait(0.05):
            peak[0] = max(peak[0], _pss_kib(_tree(proc.pid)))

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    stop.set()
    sampler.join()
    proc.returncode = os.waitstatus_to_exitcode(status)
    out.seek(0)
    text = out.read()
    out.close()
    return Measured(wall, usage.ru_maxrss / GB, peak[0] / GB, proc.returncode, text)
