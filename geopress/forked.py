"""Run a function in a forked child process while this one goes on (POSIX only, as the output lock).

The pipeline uses it to put the second core to work: the service band is
computed in a child while the customers are sampled here, and the
GeoPackage is written in a child while the rest of the run is computed here.
A forked child shares this process's memory copy-on-write, so its arguments
are never serialised; only its return value (or exception) comes back,
pickled through a pipe.

:func:`start` forks and returns at once; :meth:`Forked.result` waits and
returns the value or raises again, here, what the child raised (with the
child's traceback as a note); a child killed by a signal raises
:class:`~geopress.errors.OutputError`. :meth:`Forked.cancel` kills a child
whose result is no longer wanted.
"""

from __future__ import annotations

import ctypes
import os
import pickle
import signal
import traceback
from pathlib import Path
from typing import Any, Callable

from .errors import OutputError

#: what a child sends back: ("ok", value) or ("raised", (exception, traceback text))
_OK, _RAISED = "ok", "raised"


class Forked:
    """A function running in a forked child; see :func:`start`."""

    def __init__(self, pid: int, read_fd: int, what: str, path: Path | None):
        self.pid, self.what, self.path = pid, what, path
        self._fh = os.fdopen(read_fd, "rb")
        self._done = False

    @property
    def done(self) -> bool:
        """True once :meth:`result` or :meth:`cancel` has reaped the child."""
        return self._done

    def result(self) -> Any:
        """Wait for the child; return its value or raise what it raised."""
        with self._fh:
            payload = self._fh.read()  # to EOF: the child closes the pipe only when it exits
        _, status = os.waitpid(self.pid, 0)
        self._done = True
        if payload:
            kind, value = pickle.loads(payload)
            if kind == _OK:
                return value
            exc, child_traceback = value
            exc.add_note(f"raised in the {self.what} process {self.pid}:\n{child_traceback}")
            raise exc
        code = os.waitstatus_to_exitcode(status)
        how = f"was killed by signal {-code}" if code < 0 else f"exited with code {code}"
        raise OutputError(f"the {self.what} process {how}; check free memory and disk space, then run again",
                          path=self.path)

    def cancel(self) -> None:
        """Kill the child (if still running) and reap it."""
        if self._done:
            return
        try:
            os.kill(self.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        os.waitpid(self.pid, 0)
        self._fh.close()
        self._done = True


def start(fn: Callable[..., Any], *args: Any, what: str, path: Path | None = None) -> Forked:
    """Call ``fn(*args)`` in a forked child and return at once.

    ``what`` names the child in errors ("the <what> process was killed ...");
    ``path`` is the file an error about it names.
    """
    read_fd, write_fd = os.pipe()
    _trim_heap()
    pid = os.fork()
    if pid == 0:  # the child: never returns into the caller's code
        code = 0
        try:
            os.close(read_fd)
            try:
                payload = pickle.dumps((_OK, fn(*args)), protocol=pickle.HIGHEST_PROTOCOL)
            except BaseException as exc:
                payload = _pickled(exc)
            with os.fdopen(write_fd, "wb") as fh:
                fh.write(payload)
        except BaseException:
            code = 3
        finally:
            os._exit(code)
    os.close(write_fd)
    return Forked(pid, read_fd, what, path)


def _trim_heap() -> None:
    """Give the C heap's free pages back to the system (glibc's ``malloc_trim``); elsewhere nothing.

    A forked child shares every page its parent holds, freed but unreturned
    heap pages included (0.55 GB of them when a run of 2,000,000 customers
    starts writing), and each page either process then reuses is copied.
    """
    try:
        trim = ctypes.CDLL(None).malloc_trim
    except (OSError, AttributeError):  # not glibc (macOS, musl)
        return
    trim(0)


def _pickled(exc: BaseException) -> bytes:
    text = "".join(traceback.format_exception(exc))
    try:
        return pickle.dumps((_RAISED, (exc, text)))
    except Exception:  # an exception that cannot be pickled: send its type and message
        return pickle.dumps((_RAISED, (RuntimeError(f"{type(exc).__name__}: {exc}"), text)))
