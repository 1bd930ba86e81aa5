"""What keeps a scheduled run from damaging the nightly record, however it is stopped.

The run's child process comes from a fork server, never from forking this (threaded) process; it holds no
lock and dies with the run; SIGTERM unwinds like Ctrl-C; a hung child is stopped by its timeout; a what-if
cannot replace the nightly outputs by accident; a truncated export is refused (tests/test_changes.py);
the mailing folder is locked wherever it lies.
"""

from __future__ import annotations

import concurrent.futures
import json
import os
import signal
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import pytest

import faults_support
from geopress import nightly, planning, runner
from geopress.io import raster as raster_io
from geopress.io import vector as vector_io
from geopress.io import write as write_io
from geopress.io.lock import OutputLock, lock_path

from conftest import BASE_CONFIG
from nightly_support import assert_bad, error_line, good_run, invoke, run, snapshot

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture
def prior(world):
    """One good run, then a config whose next run would change every output."""
    snap = good_run(world)
    world.config_path.write_text(world.config_path.read_text().replace("max_static_psi = 80.0", "max_static_psi = 70.0"))
    return snap


# ---------------------------------------------------------------------------- no fork of a threaded parent


def test_a_run_with_threads_running_never_forks_this_process(world, monkeypatch):
    def no_fork():
        raise AssertionError("os.fork called in the run's process")

    monkeypatch.setattr(os, "fork", no_fork)
    stop = threading.Event()
    with concurrent.futures.ThreadPoolExecutor(2) as pool:
        pool.submit(stop.wait, 60)  # a thread that runs through the whole run, as BLAS's and GDAL's do
        res = run(world)
        stop.set()
    assert res.exit_code == 0, res.stderr
    assert (world.out.parent / "pressure.gpkg").exists()


DRIVER = textwrap.dedent("""\
    import concurrent.futures, sys, threading
    if __name__ == "__main__":
        stop = threading.Event()
        pool = concurrent.futures.ThreadPoolExecutor(2)
        pool.submit(stop.wait, 60)
        from geopress.cli import main
        try:
            main(sys.argv[1:])
        finally:
            stop.set()
""")


def test_no_warning_about_fork_under_warnings_as_errors(world):
    # Python 3.12 and later warn (DeprecationWarning) at a fork of a process with threads; under -W error the
    # run would fail. The driver starts a thread pool first, as a notebook or a service would.
    proc = subprocess.run([sys.executable, "-W", "error", "-c", DRIVER, "run", str(world.config_path)],
                          env={**os.environ, "PYTHONPATH": str(ROOT)}, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert not [line for line in proc.stderr.splitlines() if "Warning" in line or line.startswith("warning:")]


def test_the_child_server_runs_one_thread(world):
    assert run(world).exit_code == 0
    import multiprocessing.forkserver as fs

    server = fs._forkserver._forkserver_pid  # multiprocessing's own record of its server
    assert server and len(os.listdir(f"/proc/{server}/task")) == 1


# ---------------------------------------------------------------------------- a child never holds the lock

KILLED_DRIVER = textwrap.dedent("""\
    import sys
    if __name__ == "__main__":
        import faults_support
        from geopress.io import write as write_io
        write_io.write_in_child = faults_support.hang_and_tell
        from geopress.cli import main
        main(["run", sys.argv[1]])
""")


def _wait_for(path: Path, seconds: float = 120) -> str:
    deadline = time.monotonic() + seconds
    while not path.exists():
        assert time.monotonic() < deadline, f"{path} never appeared"
        time.sleep(0.05)
    return path.read_text()


def _gone(pid: int, seconds: float) -> bool:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return True
        time.sleep(0.05)
    return False


def test_killing_the_run_kills_its_child_and_frees_the_lock(world, tmp_path):
    prior = good_run(world)
    pid_file = tmp_path / "child.pid"
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), str(ROOT / "tests")]),
           faults_support.PID_FILE: str(pid_file)}
    parent = subprocess.Popen([sys.executable, "-c", KILLED_DRIVER, str(world.config_path)], env=env,
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        child = int(_wait_for(pid_file))  # the writer's job has started and hangs
        # the child has no descriptor of the lock file: it cannot keep the flock alive
        lock = lock_path(world.out)
        fds = [os.readlink(f"/proc/{child}/fd/{fd}") for fd in os.listdir(f"/proc/{child}/fd")]
        assert lock.exists() and str(lock) not in fds
        parent.send_signal(signal.SIGKILL)
        parent.wait(timeout=30)
    finally:
        parent.kill()
    assert _gone(child, 10)  # the child dies with the run (it watches the run's pid, and the kernel's signal)
    t0 = time.monotonic()
    res = run(world)
    assert res.exit_code == 0, res.stderr
    assert time.monotonic() - t0 < 60  # taken at once, not after a wait: LockError would have exited 2 at once
    assert "taking it over" in res.stderr  # the dead run's lock file, taken over
    assert snapshot(world.out.parent).keys() == prior.keys()


# ---------------------------------------------------------------------------- SIGTERM takes the Ctrl-C path


def _sigterm_then(real):
    def wrapper(*args, **kwargs):
        os.kill(os.getpid(), signal.SIGTERM)
        time.sleep(5)  # the handler raises before this ends
        return real(*args, **kwargs)
    return wrapper


STEPS = [
    (vector_io, "read_customers", "reading the customers"),
    (raster_io, "sample_terrain", "sampling the terrain"),
    (nightly, "track", "comparing with the baseline"),
    (write_io, "send_arrow", "handing the customers over, in a thread"),
    (runner.Job, "result", "waiting for the child"),
    (write_io, "write_csv", "staging the mailing lists"),
    (planning, "report_html", "making the report"),
    (write_io, "write_json", "staging run.json"),
]


@pytest.mark.parametrize("owner, name, step", STEPS, ids=[s for _, _, s in STEPS])
def test_sigterm_during_each_step_leaves_the_outputs_and_frees_the_lock(world, prior, monkeypatch, owner, name, step):
    monkeypatch.setattr(owner, name, _sigterm_then(getattr(owner, name)))
    res = run(world)
    assert "terminated (SIGTERM); earlier outputs are unchanged" in error_line(res, 143)
    for thread in threading.enumerate():  # a hand-off thread still running would write its file after the run
        if thread.name == "geopress-hand-off":
            thread.join(30)
    assert snapshot(world.out.parent) == prior
    assert not lock_path(world.out).exists()
    monkeypatch.undo()
    assert run(world).exit_code == 0


def test_sigterm_during_the_renames_is_rolled_back(world, prior, monkeypatch):
    calls = [0]
    real = os.replace

    def replace(a, b):
        calls[0] += 1
        if calls[0] == 6:
            os.kill(os.getpid(), signal.SIGTERM)
            time.sleep(5)
        return real(a, b)

    monkeypatch.setattr(os, "replace", replace)
    assert "terminated" in error_line(run(world), 143)
    assert snapshot(world.out.parent) == prior


# ---------------------------------------------------------------------------- a child that hangs


def test_a_hung_child_is_stopped_by_its_timeout(world, prior, monkeypatch):
    monkeypatch.setattr(write_io, "write_in_child", faults_support.hang_and_tell)
    world.config_path.write_text(world.config_path.read_text() + "child_timeout_s = 3\n")
    t0 = time.monotonic()
    line = assert_bad(run(world), "the writer process did not finish within 3 s (output.child_timeout_s)",
                      "was stopped")
    assert time.monotonic() - t0 < 60 and "\n" not in line
    assert snapshot(world.out.parent) == prior


def test_a_hung_hand_off_is_stopped_by_its_timeout(world, prior, monkeypatch):
    # the thread that sends the customers to the writer process never ends: the run waits for it
    # no longer than child_timeout_s, says so on one line, and exits without waiting for the thread
    monkeypatch.setattr(write_io, "send_arrow", lambda *a, **k: time.sleep(600))
    world.config_path.write_text(world.config_path.read_text() + "child_timeout_s = 3\n")
    t0 = time.monotonic()
    line = assert_bad(run(world), "handing the customers to the writer process did not finish within 3 s "
                      "(output.child_timeout_s)")
    assert time.monotonic() - t0 < 60 and "\n" not in line
    assert snapshot(world.out.parent) == prior


# ---------------------------------------------------------------------------- what-ifs


def test_a_what_if_without_an_out_dir_is_refused(world, prior):
    line = assert_bad(invoke("run", world.config_path, "--set", "criteria.max_static_psi=70"),
                      "--set without --out-dir would replace the nightly outputs", "--out-dir DIR", "--replace-outputs")
    assert snapshot(world.out.parent) == prior
    assert "line" not in line


def test_a_what_if_elsewhere_compares_with_tonights_run(world, tmp_path):
    good_run(world)
    scen = tmp_path / "scenario"
    res = invoke("run", world.config_path, "--set", "criteria.max_static_psi=70", "--out-dir", scen)
    assert res.exit_code == 0, res.stderr
    info = json.loads((scen / "run.json").read_text())
    assert info["changes"]["baseline"] == str(world.out)  # tonight's run, not the scenario folder's own
    main = set(csv_accounts_in(world.out.parent, "high_pressure"))
    now = set(csv_accounts_in(scen, "high_pressure"))
    # the what-if's new list holds exactly the customers its lower threshold adds to tonight's list
    assert set(csv_accounts_in(scen, "new_high_pressure")) == now - main and now > main
    assert not nightly.baseline_link(scen / "pressure.gpkg").exists()  # a what-if never becomes a baseline


def test_a_what_if_that_replaces_the_outputs_does_not_become_the_baseline(world):
    good_run(world)
    link = nightly.baseline_link(world.out)
    before = link.read_bytes()
    res = invoke("run", world.config_path, "--set", "criteria.max_static_psi=70", "--replace-outputs")
    assert res.exit_code == 0, res.stderr
    assert link.read_bytes() == before and world.out.read_bytes() != before
    # the next nightly run compares with the last nightly one: nobody newly flagged, though the what-if flagged more
    res = run(world)
    assert res.exit_code == 0, res.stderr
    assert json.loads((world.out.parent / "run.json").read_text())["changes"]["counts"]["newly_flagged"] == 0


# ---------------------------------------------------------------------------- the mailing folder's own lock


def test_a_mailing_folder_elsewhere_is_locked_too(world, tmp_path):
    lists = tmp_path / "letters"
    world.config_path.write_text(BASE_CONFIG.replace('mailing_dir = "out/mailing"', f'mailing_dir = "{lists}"'))
    assert run(world).exit_code == 0
    target = lists / "mailing-lists"
    assert nightly.mailing_lock_target(geopress_config(world)) == target
    before = snapshot(lists)
    with OutputLock(target, key="output.mailing_dir"):  # another run writing into the same folder
        assert_bad(run(world), str(lock_path(target)), "another run holds the lock")
    assert snapshot(lists) == before
    assert run(world).exit_code == 0


def geopress_config(world):
    import geopress

    return geopress.load_config(world.config_path)


def csv_rows(path: Path) -> list[dict[str, str]]:
    import csv

    with open(path, encoding="utf-8-sig", newline="") as fh:
        return list(csv.DictReader(fh))


def csv_accounts_in(folder: Path, name: str) -> list[str]:
    return [a for r in csv_rows(folder / "mailing" / f"{name}.csv") for a in r["accounts"].split("; ") if a]
