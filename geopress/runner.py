"""The run's child processes: each a :class:`Worker`, a spawned child that does side work, a job at a time.

A run keeps both cores busy with two of them: one computes the service band while the customers
are read and screened, the other writes the GeoPackage's customers while their summaries, the
mailing lists and the report are made. Apart, the writer never waits for the band.

The child is never a fork of this process, which already runs threads (numpy's BLAS, Arrow's
allocator, GDAL's pool): it comes from multiprocessing's ``forkserver``, a server process
started once, as a new program, with the run's modules imported and with one thread only
(BLAS and Arrow's allocator are told to start none there). Forking that server is safe and
takes milliseconds, so a run does not wait for a child's imports.

Guarantees:

* every wait has a timeout: a job that does not finish within ``timeout_s`` is stopped (the
  child is killed) and raises :class:`~geopress.errors.OutputError`;
* a child that dies raises OutputError saying how (the signal or exit code);
* an exception raised in the child is raised again here, with the child's traceback as a note;
* the child holds no lock: it is a new program, and this process's descriptors are not
  inherited across ``exec`` (PEP 446), the output lock's included;
* the child exits when this process dies, however it dies: it watches this process's pid, and
  the kernel kills it when the server, which exits with this process, dies (Linux:
  ``PR_SET_PDEATHSIG``); it ignores Ctrl-C and SIGTERM, which this process handles by stopping it.

Arguments and results are pickled through a pipe; the customers the writer needs travel as an
Arrow IPC stream through a named pipe the child reads a batch at a time (see :mod:`geopress.io.write`).
"""

from __future__ import annotations

import ctypes
import logging
import multiprocessing
import multiprocessing.connection
import multiprocessing.forkserver
import multiprocessing.reduction
import os
import signal
import sys
import threading
import time
import traceback
from contextlib import contextmanager
from pathlib import Path
from typing import Any, Callable, Iterator

from .errors import OutputError

log = logging.getLogger(__name__)

_CONTEXT = multiprocessing.get_context("forkserver")
#: the modules the server imports once, so that each child starts with them
PRELOAD = ["geopress.pipeline"]
#: environment that keeps the server at one thread: OpenBLAS starts no pool, Arrow's jemalloc no background thread
SINGLE_THREADED = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1",
                   "JE_ARROW_MALLOC_CONF": "background_thread:false"}
#: what the child sends back: ("ok", value) or ("raised", (exception, traceback text))
_OK, _RAISED = "ok", "raised"
#: how multiprocessing's Connection.send pickles: the child's recv unpickles what submit sends as bytes
_PICKLER = multiprocessing.reduction.ForkingPickler
#: Linux's prctl option that sends the child a signal when its parent dies (linux/prctl.h)
_PR_SET_PDEATHSIG = 1
#: seconds between the parent's checks that a busy child is still alive
_POLL_S = 0.5


class Worker:
    """One child process that runs the jobs :meth:`submit` gives it; use as a context manager.

    The child is started in the background (the fork server's first start imports the run's
    modules, about a second), so creating a Worker returns at once, and so does submitting a job to a
    child still starting. ``timeout_s`` bounds every
    wait: for the child to start, and for each job's result. Leaving the block (or
    :meth:`close`) stops the child, whatever it is doing, and reaps it.
    """

    def __init__(self, *, timeout_s: float):
        self.timeout_s = timeout_s
        parent_end, self._child_end = _CONTEXT.Pipe(duplex=True)
        self._conn = parent_end
        self._proc = _CONTEXT.Process(target=_serve, args=(self._child_end, os.getpid()), name="geopress-worker",
                                      daemon=True)
        self._start_error: BaseException | None = None
        self._lock = threading.Lock()
        self._started = False  # under _lock: the starting thread has done what it does
        self._pending: bytes | None = None  # under _lock: a job submitted before the child started
        self._starter = threading.Thread(target=self._start, name="geopress-worker-start", daemon=True)
        self._starter.start()
        self._job: Job | None = None

    def _start(self) -> None:
        try:
            start_server()
            self._proc.start()
        except BaseException as exc:  # raised again by _ready, in the caller's thread
            self._start_error = exc
        finally:
            self._child_end.close()
            with self._lock:
                self._started = True
                pending, self._pending = self._pending, None
            if pending is not None and self._start_error is None:
                self._send(pending)

    def _send(self, data: bytes) -> None:
        """Send a pickled job; a child that died meanwhile is found by the job's wait (:meth:`Job.result`)."""
        try:
            self._conn.send_bytes(data)
        except OSError:  # a broken pipe or a reset connection
            pass

    def _ready(self, what: str, path: Path | None) -> None:
        self._starter.join(self.timeout_s)
        if self._starter.is_alive() or self._start_error is not None:
            why = "did not start in time" if self._starter.is_alive() else f"could not start ({self._start_error})"
            raise OutputError(f"the {what} process {why}; check free memory and the number of processes allowed",
                              path=path, key="output.child_timeout_s")

    @property
    def pid(self) -> int | None:
        return self._proc.pid

    def alive(self) -> bool:
        """Whether the child is starting or running: False once it could not start or has exited. It only looks
        at the child's sentinel, reading nothing, so any thread may ask while another waits for a job."""
        with self._lock:
            if not self._started:
                return True
        return self._start_error is None and not multiprocessing.connection.wait([self._proc.sentinel], 0)

    def submit(self, fn: Callable[..., Any], *args: Any, what: str, path: Path | None = None) -> "Job":
        """Send ``fn(*args)`` (a module-level function, pickled by name) to the child and return at once.

        Pickled here, so the child gets the arguments as they are now. A child still starting gets the job
        from the thread that starts it, so the caller never waits for the start; the job's wait
        (:meth:`Job.result`) raises what kept the child from starting. ``what`` names the job in errors
        ("the writer process ..."), ``path`` the file they name.
        """
        if self._job is not None and not self._job.done:
            raise RuntimeError(f"the {self._job.what} job is still running")
        data = bytes(_PICKLER.dumps((fn, args)))
        job = Job(self, what, path)
        self._job = job
        with self._lock:
            if not self._started:
                self._pending = data
                return job
        self._ready(what, path)
        self._send(data)
        return job

    def close(self) -> None:
        """Stop the child if it still runs and reap it."""
        self._starter.join(self.timeout_s)
        if self._proc.pid is not None:
            if self._proc.is_alive():
                self._proc.kill()
            self._proc.join(timeout=30)
        self._conn.close()

    def __enter__(self) -> "Worker":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


class Job:
    """A job running in a :class:`Worker`'s child; :meth:`result` waits for it."""

    def __init__(self, worker: Worker, what: str, path: Path | None):
        self.worker, self.what, self.path = worker, what, path
        self.started = time.monotonic()
        self.done = False

    def result(self) -> Any:
        """Wait (at most the worker's ``timeout_s`` from the submission) and return the job's value,
        or raise what the child raised; OutputError when the child does not start, dies or the time runs out."""
        self.worker._ready(self.what, self.path)
        conn, proc = self.worker._conn, self.worker._proc
        deadline = self.started + self.worker.timeout_s
        while True:
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                self.done = True
                proc.kill()
                proc.join(timeout=30)
                raise OutputError(f"the {self.what} process did not finish within {self.worker.timeout_s:g} s "
                                  "(output.child_timeout_s) and was stopped; check the machine's load and free "
                                  "memory, or raise output.child_timeout_s", path=self.path, key="output.child_timeout_s")
            if conn.poll(min(remaining, _POLL_S)):
                try:
                    kind, value = conn.recv()
                except (EOFError, ConnectionResetError):
                    self._died()
                break
            if not proc.is_alive() and not conn.poll(0):
                self._died()
        self.done = True
        if kind == _OK:
            return value
        exc, child_traceback = value
        exc.add_note(f"raised in the {self.what} process {proc.pid}:\n{child_traceback}")
        raise exc

    def running(self) -> bool:
        """Whether the job may still be running: False once the child has answered (its value or its error) or
        is gone. It only looks at the pipe and the child's sentinel, reading nothing, so another thread may ask
        before :meth:`result` is called."""
        try:
            return self.worker.alive() and not self.worker._conn.poll(0)
        except (OSError, EOFError):  # the worker was closed
            return False

    def _died(self) -> None:
        self.done = True
        proc = self.worker._proc
        proc.join(timeout=30)
        code = proc.exitcode
        how = f"was killed by signal {-code}" if code is not None and code < 0 else f"exited with code {code}"
        raise OutputError(f"the {self.what} process {how}; check free memory and disk space, then run again",
                          path=self.path)


@contextmanager
def _environment(values: dict[str, str]) -> Iterator[None]:
    saved = {k: os.environ.get(k) for k in values}
    os.environ.update(values)
    try:
        yield
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


def start_server() -> None:
    """Start the fork server (once per process) with :data:`PRELOAD` imported and one thread."""
    _CONTEXT.set_forkserver_preload(PRELOAD)
    with _environment(SINGLE_THREADED):
        multiprocessing.forkserver.ensure_running()


def _die_with_parent(run_pid: int) -> None:
    """Exit when the run's process dies: the kernel's signal when the server (our parent) dies (Linux),
    and a watch on the run's pid, which covers the moment before and every other system."""
    if sys.platform.startswith("linux"):
        try:
            ctypes.CDLL(None, use_errno=True).prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
        except (OSError, AttributeError):
            pass

    def watch() -> None:
        while True:
            try:
                os.kill(run_pid, 0)
            except ProcessLookupError:
                os._exit(1)
            time.sleep(_POLL_S)

    threading.Thread(target=watch, name="geopress-parent-watch", daemon=True).start()


def _serve(conn, run_pid: int) -> None:
    """The child's loop: run each job received, send back its value or exception, until the pipe closes."""
    _die_with_parent(run_pid)
    # Ctrl-C and a scheduler's SIGTERM reach the whole process group: the parent handles them and stops this child
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    while True:
        try:
            fn, args = conn.recv()
        except (EOFError, ConnectionResetError, KeyboardInterrupt):
            return
        try:
            payload = (_OK, fn(*args))
        except BaseException as exc:  # everything goes back to the parent, which decides
            payload = (_RAISED, (exc, "".join(traceback.format_exception(exc))))
        try:
            conn.send(payload)
        except Exception as exc:  # a value or exception that cannot be pickled: send what can be
            text = payload[1][1] if payload[0] == _RAISED else ""
            conn.send((_RAISED, (RuntimeError(f"the job's result could not be sent back ({type(exc).__name__}: "
                                              f"{exc})"), text)))
