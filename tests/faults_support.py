"""Faults for the jobs of a run's child process.

The child comes from multiprocessing's fork server, not from the test process, so a monkeypatch
there does not reach it. A test instead patches the function the pipeline submits
(``planning.service_bands``, ``write_io.write_in_child``) with one of these: they are
module-level, so the job pickles them by name and the child imports this module.
"""

from __future__ import annotations

import errno
import os
import signal
import sqlite3
import time
from pathlib import Path

from geopress.errors import OutputError


def disk_full(*args):
    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


def bug(*args):
    raise RuntimeError("injected fault")


def killed(*args):
    os.kill(os.getpid(), signal.SIGKILL)


def sqlite_full(path, layers):
    """What writing a GeoPackage on a full disk ends in when SQLite notices it first, translated as the
    writer translates every SQLite error."""
    from geopress.io import write as write_io

    def create_view(*a):
        raise sqlite3.OperationalError("database or disk is full")

    write_io._create_view = create_view  # in this child only
    return write_io.write_in_child(path, layers)


#: where :func:`hang_and_tell` writes the child's pid (set by the test through the environment)
PID_FILE = "GEOPRESS_TEST_PID_FILE"


def hang_and_tell(*args):
    """Write this process's pid to the file named by $GEOPRESS_TEST_PID_FILE, then hang."""
    target = os.environ.get(PID_FILE)
    if target:
        tmp = Path(target + ".tmp")
        tmp.write_text(str(os.getpid()))
        tmp.replace(target)
    time.sleep(3600)


def output_error(*args):
    raise OutputError("cannot write (injected); check free space and permissions", path="out.gpkg")


#: the file :func:`write_and_say_so` leaves beside the GeoPackage it starts writing
WRITER_STARTED = ".writer-started"


def write_and_say_so(path, layers):
    """The writer's job, which first leaves :data:`WRITER_STARTED` beside ``path``."""
    from geopress.io import write as write_io

    Path(path).with_name(WRITER_STARTED).touch()
    return write_io.write_in_child(path, layers)


def band_once_the_writer_writes(cfg, *args):
    """The service band, computed once the writer has started (at most 60 s later)."""
    from geopress import planning

    marker = cfg.output.path.with_name(WRITER_STARTED)
    deadline = time.monotonic() + 60
    while not marker.exists():
        if time.monotonic() > deadline:
            raise RuntimeError("the writer never started while the service band was computed")
        time.sleep(0.05)
    return planning.service_bands(cfg, *args)
