"""The output lock: a second run exits 2 at once; a lock left by a dead process is taken over."""

from __future__ import annotations

import fcntl
import json
import os
import signal
import socket
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

import geopress
from geopress.errors import LockError, StaleLockWarning
from geopress.io import lock as lock_mod
from geopress.io.lock import OutputLock, lock_path

from nightly_support import assert_bad, error_line, good_run, run, snapshot

ROOT = Path(__file__).resolve().parents[1]

HOLDER = textwrap.dedent("""\
    import sys, time
    from pathlib import Path
    from geopress.io.lock import OutputLock
    lock = OutputLock(Path(sys.argv[1])).acquire()
    print("locked", flush=True)
    sys.stdin.readline() if sys.argv[2] == "wait" else time.sleep(600)
    lock.release()
""")


def holder(output: Path, mode: str = "wait") -> subprocess.Popen:
    """Another process holding the lock of ``output`` until its stdin closes (or it is killed)."""
    proc = subprocess.Popen([sys.executable, "-c", HOLDER, str(output), mode], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True, env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert proc.stdout.readline().strip() == "locked"
    return proc


def test_second_run_exits_2_at_once_naming_the_lock_and_its_process(world, monkeypatch):
    prior = good_run(world)
    proc = holder(world.out)
    try:
        from geopress.io import vector

        def must_not_read(cfg):
            raise AssertionError("a locked-out run read its inputs")

        monkeypatch.setattr(vector, "read_customers", must_not_read)
        line = assert_bad(run(world), str(lock_path(world.out)), f"process {proc.pid} on {socket.gethostname()}",
                          "another run holds the lock", "wait for it to finish")
        assert "started 20" in line
    finally:
        proc.stdin.close()
        proc.wait(timeout=30)
        proc.stdout.close()
    assert snapshot(world.out.parent) == prior  # the holder removed its lock file on release


def test_lock_left_by_a_killed_process_is_taken_over_with_a_warning(world):
    prior = good_run(world)
    proc = holder(world.out, "sleep")
    stale = json.loads(lock_path(world.out).read_text())
    assert stale["pid"] == proc.pid
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    proc.stdin.close()
    proc.stdout.close()
    assert lock_path(world.out).exists()  # SIGKILL leaves the file; the flock went with the process
    res = run(world)
    assert res.exit_code == 0, res.stderr
    warns = [line for line in res.stderr.splitlines() if line.startswith("warning:")]
    assert len(warns) == 1 and f"lock left by process {proc.pid}" in warns[0] and "taking it over" in warns[0]
    assert not lock_path(world.out).exists()
    assert set(snapshot(world.out.parent)) == set(prior)


def test_stale_lock_file_with_a_dead_pid_is_taken_over_by_the_library(world):
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    world.out.parent.mkdir(parents=True)
    lock_path(world.out).write_text(json.dumps({"pid": dead.pid, "host": "h", "started": "2020-01-01T00:00:00+00:00"}))
    with pytest.warns(StaleLockWarning, match=f"process {dead.pid} on h, started 2020-01-01"):
        geopress.run(world.config_path)
    assert not lock_path(world.out).exists()


def test_garbage_in_a_stale_lock_file_is_taken_over(world):
    world.out.parent.mkdir(parents=True)
    lock_path(world.out).write_bytes(b"\x00\xffnot json")
    with pytest.warns(StaleLockWarning, match="an unknown process"):
        geopress.run(world.config_path)


def test_lock_in_the_same_process_is_exclusive(tmp_path):
    out = tmp_path / "o" / "pressure.gpkg"
    with OutputLock(out) as first:
        info = json.loads(first.path.read_text())
        assert info["pid"] == os.getpid() and info["host"] == socket.gethostname()
        with pytest.raises(LockError, match=f"process {os.getpid()}"):
            OutputLock(out).acquire()
    assert not lock_path(out).exists()
    assert not out.parent.exists()  # the folder the lock made, still empty, is gone again


def test_lock_file_replaced_between_open_and_flock_is_retried(tmp_path, monkeypatch):
    # A holder that releases (unlink, close) just after we opened its file: we must lock the new file, not the old.
    out = tmp_path / "pressure.gpkg"
    real = fcntl.flock
    calls = []

    def flock_after_release(fd, op):
        if not calls:
            os.unlink(lock_path(out))
            lock_path(out).write_text("")
        calls.append(fd)
        return real(fd, op)

    monkeypatch.setattr(lock_mod.fcntl, "flock", flock_after_release)
    with OutputLock(out) as held:
        assert len(calls) == 2
        assert os.fstat(held._fd).st_ino == os.stat(lock_path(out)).st_ino


def test_lock_released_after_a_failed_run(world):
    good_run(world)
    world.config_path.write_text(world.config_path.read_text().replace('id_field = "account"', 'id_field = "acct"'))
    error_line(run(world))
    assert not lock_path(world.out).exists()
