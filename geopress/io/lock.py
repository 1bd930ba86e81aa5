"""One run at a time per output: a lock file beside the GeoPackage.

``.<output name>.lock`` (e.g. ``.pressure.gpkg.lock``) holds the pid, host
and start time of the run that writes the outputs, and that run holds an
exclusive ``flock`` on it for as long as it runs. The operating system drops
the ``flock`` when the process ends in any way (exit, crash, SIGKILL), so:

* a second run finds the ``flock`` taken and raises :class:`LockError` at
  once, naming the lock file and the process in it;
* a lock file whose ``flock`` is free was left by a process that no longer
  runs; it is taken over with a :class:`StaleLockWarning` naming that process.

The lock file is removed when the run ends. POSIX only (``fcntl``); on a
network file system the lock is as good as that file system's locking.
"""

from __future__ import annotations

import errno
import fcntl
import json
import logging
import os
import socket
import warnings
from datetime import datetime, timezone
from pathlib import Path

from ..errors import LockError, OutputError, StaleLockWarning

log = logging.getLogger(__name__)


def lock_path(output: Path) -> Path:
    """The lock file of ``output``."""
    return output.parent / f".{output.name}.lock"


def _holder(text: str) -> str:
    try:
        info = json.loads(text)
        return f"process {info['pid']} on {info['host']}, started {info['started']}"
    except (ValueError, KeyError, TypeError):
        return "an unknown process"


class OutputLock:
    """Context manager holding the lock of ``output`` (a path whose folder may not exist yet).

    A folder it had to create is removed again on release when it is still
    empty, so a run that fails leaves nothing behind.
    """

    def __init__(self, output: Path, key: str = "output.path"):
        self.output = output
        self.key = key
        self.path = lock_path(output)
        self._fd: int | None = None
        self._created: list[Path] = []

    def _make_folder(self) -> None:
        missing = []
        p = self.path.parent
        while not p.exists():
            missing.append(p)
            p = p.parent
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputError(f"cannot create folder ({exc.strerror}) for {self.key}; choose a writable location",
                              path=self.path.parent, key=self.key) from exc
        self._created = missing

    def acquire(self) -> "OutputLock":
        self._make_folder()
        while True:
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as exc:
                self._remove_created()
                raise OutputError(f"cannot create the lock file ({exc.strerror}); choose a writable output folder",
                                  path=self.path, key=self.key) from exc
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError as exc:
                text = _read(fd)
                os.close(fd)
                if exc.errno not in (errno.EAGAIN, errno.EACCES):
                    raise
                raise LockError(
                    f"another run holds the lock ({_holder(text)}); wait for it to finish",
                    path=self.path, key=self.key,
                ) from None
            # The holder may have removed the file between our open and flock: lock the file that is there.
            try:
                same = os.fstat(fd).st_ino == os.stat(self.path).st_ino
            except FileNotFoundError:
                same = False
            if same:
                break
            os.close(fd)
        stale = _read(fd)
        if stale.strip():
            warnings.warn(
                f"{self.path}: lock left by {_holder(stale)}, which no longer runs; taking it over",
                StaleLockWarning, stacklevel=2,
            )
        info = {"pid": os.getpid(), "host": socket.gethostname(),
                "started": datetime.now(timezone.utc).isoformat(timespec="seconds")}
        os.ftruncate(fd, 0)
        os.pwrite(fd, json.dumps(info).encode() + b"\n", 0)
        self._fd = fd
        log.debug("locked %s", self.path)
        return self

    def release(self) -> None:
        if self._fd is None:
            return
        try:
            self.path.unlink()
        except FileNotFoundError:
            pass
        os.close(self._fd)  # closing drops the flock
        self._fd = None
        self._remove_created()

    def _remove_created(self) -> None:
        for p in self._created:
            try:
                p.rmdir()
            except OSError:
                break  # not empty: the run wrote something there
        self._created = []

    def __enter__(self) -> "OutputLock":
        return self.acquire()

    def __exit__(self, *exc) -> None:
        self.release()


def _read(fd: int) -> str:
    return os.pread(fd, 4096, 0).decode("utf-8", "replace")
