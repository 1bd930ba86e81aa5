"""Optional dependencies, checked once; each message names the extra to install.

pyproject.toml's lower bounds are the versions the suite runs on; where code must
branch on a dependency's version, the flag belongs here (one module knows them all).

``HAS_REPORT`` says whether the ``report`` extra (matplotlib, jinja2 and plotly) is
installed and :func:`report_missing` names what is missing; the layer styles
need it too (their palette is the report's). :func:`xlsx_missing` says the
same of openpyxl, which the report extra also brings, for the mailing lists'
.xlsx copies. :func:`import_dask` returns the ``dask`` extra's modules or
raises MissingExtraError. :func:`release_freed_heap` returns freed heap pages to the
system where the C library can (glibc), and does nothing elsewhere;
:func:`keep_freed_memory` makes a process keep them instead, for its own reuse;
:func:`writer_first` makes its runs give the CPU to their writer process once it has the customers.
"""

from __future__ import annotations

import ctypes
import importlib.util
import os
import sys
import threading
from types import ModuleType

from .errors import MissingExtraError


REPORT_MODULES = ("matplotlib", "jinja2", "plotly")
_MISSING_REPORT = tuple(m for m in REPORT_MODULES if importlib.util.find_spec(m) is None)
HAS_REPORT = not _MISSING_REPORT


def report_missing() -> str | None:
    """None when the report can be built, else a sentence naming the missing modules and the extra."""
    if HAS_REPORT:
        return None
    return f"{' and '.join(_MISSING_REPORT)} not installed; install the report extra: pip install 'geopress[report]'"


HAS_XLSX = importlib.util.find_spec("openpyxl") is not None


def xlsx_missing() -> str | None:
    """None when the .xlsx copies can be written, else a sentence naming openpyxl and the extra."""
    if HAS_XLSX:
        return None
    return "openpyxl not installed; install the report extra: pip install 'geopress[report]'"


def import_dask() -> tuple[ModuleType, ModuleType]:
    """``(dask_geopandas, distributed)``, or MissingExtraError naming the ``dask`` extra."""
    try:
        import dask_geopandas
        import distributed
    except ImportError as exc:
        raise MissingExtraError(
            f"the dask engine needs dask-geopandas and dask.distributed ({exc.name or exc} is missing); "
            "install them with pip install 'geopress[dask]' or run with --engine local",
            key="engine",
        ) from exc
    return dask_geopandas, distributed


def _glibc(name: str):
    """glibc's function ``name``, or None where the C library has none (macOS, musl, Windows)."""
    try:
        return getattr(ctypes.CDLL("libc.so.6"), name)
    except (OSError, AttributeError):
        return None


_MALLOC_TRIM = _glibc("malloc_trim")
_MALLOPT = _glibc("mallopt")
#: glibc's mallopt parameters (malloc.h)
_M_TRIM_THRESHOLD, _M_MMAP_MAX, _M_ARENA_MAX = -1, -4, -8
#: whether this process keeps the memory it frees (:func:`keep_freed_memory`)
_KEEPING = False


def release_freed_heap() -> None:
    """Give the system back the heap pages freed so far, unless this process keeps them
    (:func:`keep_freed_memory`).

    glibc keeps memory that C code frees (qhull's in the target areas, Arrow's and pandas' temporaries) for
    reuse, and in the arena of each thread that freed it; a run would hold it to its end. Measured at
    4,000,000 customers: 0.6 GB kept after the target areas' threads, 0.4 GB less at the run's peak with it
    returned after every step (scripts/README.md).
    """
    if _MALLOC_TRIM is not None and not _KEEPING:
        _MALLOC_TRIM(0)


def keep_freed_memory() -> None:
    """Make this process keep the memory it frees, for its own later allocations, until it exits.

    Arrow allocates from the C library (its default, mimalloc, hands large blocks back to the system at
    once), and glibc takes every block from its heap (no block of its own mapping, which goes back to the
    system when freed), never shrinks that heap, and keeps one heap for all threads (what the target
    areas' threads free can then serve the run's own thread). Memory new to a process costs the kernel a
    page fault and a page of zeros; on virtual machines that return freed pages to their host, it costs
    the host's work too. The price is a higher peak: scripts/README.md has what it bought and what it
    costs. For a process that runs geopress only (the command line); a Python session that imports
    geopress keeps its own allocators.
    """
    global _KEEPING
    import pyarrow as pa

    pa.set_memory_pool(pa.system_memory_pool())
    if _MALLOPT is not None:
        _MALLOPT(_M_MMAP_MAX, 0)
        _MALLOPT(_M_TRIM_THRESHOLD, 2**31 - 1)
        _MALLOPT(_M_ARENA_MAX, 1)
    _KEEPING = True


#: the nice value a run's own thread takes once its writer process has the customers (:func:`writer_first`)
BEHIND_THE_WRITER_NICE = 10
#: whether this process's runs give the CPU to their writer (:func:`writer_first`)
_WRITER_FIRST = False


def writer_first() -> None:
    """Make this process's runs give the CPU to their writer process once it has the customers.

    From then on the writer's GeoPackage (GDAL inserting the customers and building their spatial index, in two
    threads) sets when a run ends, while the run's own work (summaries, lists, report) ends well before it and
    then waits; on two cores the three contend. :func:`behind_the_writer` then lowers the priority of the run's
    thread, Linux's per-thread nice value, so the writer goes first and the run's work fills the gaps
    (scripts/README.md has what it saves). A nice value cannot be raised again without privilege, so this is
    for a process that runs geopress only and exits (the command line), on Linux only; a Python session that
    imports geopress keeps its priority.
    """
    global _WRITER_FIRST
    _WRITER_FIRST = sys.platform.startswith("linux")


def behind_the_writer() -> None:
    """Lower the calling thread's priority to :data:`BEHIND_THE_WRITER_NICE` (never raise it), when this process
    was set to :func:`writer_first`; otherwise, or where the system refuses, leave it as it is."""
    if not _WRITER_FIRST:
        return
    thread = threading.get_native_id()
    try:
        if os.getpriority(os.PRIO_PROCESS, thread) < BEHIND_THE_WRITER_NICE:
            os.setpriority(os.PRIO_PROCESS, thread, BEHIND_THE_WRITER_NICE)
    except OSError:  # a container's seccomp filter, say: the run goes on at its priority
        pass
