"""Faults injected at each write step: earlier outputs stay byte-identical, no temporary file survives.

The write steps of a run, in order: the GeoPackage's customer layers (by the
run's child process, while the mailing lists and the report are staged), each
mailing list CSV, the report, the GeoPackage's other layers, the baseline's
link, run.json (all into temporary files), the commit journal, then the
renames (each earlier output to its backup, each new file into place,
run.json last). Each is failed with an OSError (ENOSPC: disk full), with an
exception, and by killing the process (SIGKILL, from a small driver run in a
subprocess).
"""

from __future__ import annotations

import errno
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

import faults_support
from geopress import nightly, planning, runner
from geopress.io import write as write_io

from nightly_support import error_line, good_run, run, snapshot

ROOT = Path(__file__).resolve().parents[1]
#: renames in a second run's commit: the journal, then a backup and a new file for each of 46 outputs
#: (GeoPackage, 7 mailing lists, 7 new_* lists and the field-verification list as CSV and .xlsx, 12 layer styles
#: with the target areas', report.html, the baseline's link, run.json): 1 + 2 * (7 + 7 + 1) + 12 + 3 = 46, with
#: 7 findings (4 statuses, 3 storage levels).
COMMIT_RENAMES = 1 + 2 * 46


def disk_full(*args, **kwargs):
    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


def bug(*args, **kwargs):
    raise RuntimeError("injected fault")


@pytest.fixture
def prior(world):
    """One good run, then a config whose next run would change every output."""
    snap = good_run(world)
    world.config_path.write_text(world.config_path.read_text().replace("max_static_psi = 80.0", "max_static_psi = 70.0"))
    return snap


#: the one hidden file a run keeps: the last accepted run's GeoPackage (geopress.nightly.baseline_link)
BASELINE = nightly.baseline_link(Path("pressure.gpkg")).name


def leftover(name: str) -> bool:
    """A hidden file that is not an output: a temporary, a lock or a journal of a run."""
    return Path(name).name.startswith(".") and Path(name).name != BASELINE


def visible(snap: dict[str, bytes]) -> dict[str, bytes]:
    return {k: v for k, v in snap.items() if not leftover(k)}


def then_a_good_run_leaves_no_temporary(world) -> None:
    res = run(world)
    assert res.exit_code == 0, res.stderr
    assert not [k for k in snapshot(world.out.parent) if leftover(k)]


def fail_on_call(real, n: int, fault):
    """``real`` with its n-th call (1-based) replaced by ``fault``."""
    calls = [0]

    def wrapper(*args, **kwargs):
        calls[0] += 1
        if calls[0] == n:
            return fault(*args, **kwargs)
        return real(*args, **kwargs)

    return wrapper


def after_partial_write(real, fault):
    """Write, then fail: the temporary file exists when the fault strikes."""

    def wrapper(path, *args, **kwargs):
        real(path, *args, **kwargs)
        assert Path(path).exists()
        return fault()

    return wrapper


#: the writers of the run's own process: the GeoPackage's later layers, the CSVs, run.json, and (in a thread) the
#: Arrow stream that hands the customers to the writer process
WRITERS = [("write_geopackage", 1), ("write_csv", 1), ("write_csv", 8), ("write_json", 1), ("send_arrow", 1)]


@pytest.mark.parametrize("fault, code, text", [(disk_full, 2, "No space left on device"), (bug, 1, "injected fault")])
@pytest.mark.parametrize("writer, n", WRITERS)
def test_fault_in_a_writer(world, prior, monkeypatch, writer, n, fault, code, text):
    monkeypatch.setattr(write_io, writer, fail_on_call(getattr(write_io, writer), n, fault))
    assert text in error_line(run(world), code)
    assert snapshot(world.out.parent) == prior
    monkeypatch.undo()
    then_a_good_run_leaves_no_temporary(world)


@pytest.mark.parametrize("writer", ["write_geopackage", "write_csv", "write_json"])
def test_disk_full_after_a_partial_write(world, prior, monkeypatch, writer):
    monkeypatch.setattr(write_io, writer, after_partial_write(getattr(write_io, writer), disk_full))
    assert "No space left on device" in error_line(run(world), 2)
    assert snapshot(world.out.parent) == prior


# The child process: the service band is computed while the customers are sampled, the GeoPackage's
# customer layers are written while the rest is staged. A fault in either surfaces in the run.
@pytest.mark.parametrize("owner, name, fault, code, text", [
    pytest.param(write_io, "write_in_child", faults_support.disk_full, 2, "No space left on device",
                 id="writer-disk-full"),
    pytest.param(write_io, "write_in_child", faults_support.sqlite_full, 2,
                 "cannot write the GeoPackage (database or disk is full)", id="writer-sqlite-full"),
    pytest.param(write_io, "write_in_child", faults_support.output_error, 2, "cannot write (injected)",
                 id="writer-output-error"),
    pytest.param(write_io, "write_in_child", faults_support.bug, 1, "injected fault", id="writer-bug"),
    pytest.param(write_io, "write_in_child", faults_support.killed, 2, "the writer process was killed by signal 9",
                 id="writer-killed"),
    pytest.param(planning, "service_bands", faults_support.bug, 1, "injected fault", id="band-bug"),
    pytest.param(planning, "service_bands", faults_support.killed, 2,
                 "the service band process was killed by signal 9", id="band-killed"),
])
def test_fault_in_the_child_process(world, prior, monkeypatch, owner, name, fault, code, text):
    monkeypatch.setattr(owner, name, fault)
    assert text in error_line(run(world), code)
    assert snapshot(world.out.parent) == prior
    monkeypatch.undo()
    then_a_good_run_leaves_no_temporary(world)


def test_a_failure_while_the_writer_process_works_stops_it(world, prior, monkeypatch):
    # the writer's job is still running when a fault strikes here: the child is stopped and reaped,
    # its temporary files removed at once, not only at the next run
    workers = []
    real = runner.Worker
    monkeypatch.setattr(runner, "Worker", lambda **kw: workers.append(real(**kw)) or workers[-1])
    monkeypatch.setattr(write_io, "write_in_child", faults_support.hang_and_tell)
    monkeypatch.setattr(write_io, "write_csv", bug)
    assert "injected fault" in error_line(run(world), 1)
    assert len(workers) == 2  # the service band's and the writer's
    for worker in workers:
        with pytest.raises(ProcessLookupError):
            os.kill(worker.pid, 0)  # reaped: not even a zombie
    assert snapshot(world.out.parent) == prior


@pytest.mark.parametrize("fault, code, text", [(disk_full, 2, "cannot write the commit journal (No space left"),
                                               (bug, 1, "injected fault")])
def test_fault_writing_the_commit_journal(world, prior, monkeypatch, fault, code, text):
    monkeypatch.setattr(os, "replace", fail_on_call(os.replace, 1, fault))  # the journal's own rename
    assert text in error_line(run(world), code)
    assert snapshot(world.out.parent) == prior


@pytest.mark.parametrize("fault, code, text", [(disk_full, 2, "the earlier outputs were put back"),
                                               (bug, 1, "injected fault")])
@pytest.mark.parametrize("n", [2, 3, 12, COMMIT_RENAMES])
def test_fault_during_the_renames_is_rolled_back(world, prior, monkeypatch, n, fault, code, text):
    journal_writes = []
    real_journal = write_io._write_journal
    monkeypatch.setattr(write_io, "_write_journal", lambda *a: (journal_writes.append(1), real_journal(*a)))
    monkeypatch.setattr(os, "replace", fail_on_call(os.replace, n, fault))
    assert text in error_line(run(world), code)
    assert journal_writes == [1]
    assert snapshot(world.out.parent) == prior
    monkeypatch.undo()
    then_a_good_run_leaves_no_temporary(world)


def test_the_last_rename_is_run_json(world, prior, monkeypatch):
    renamed = []
    real = os.replace
    monkeypatch.setattr(os, "replace", lambda a, b: (renamed.append(Path(b).name), real(a, b)))
    assert run(world).exit_code == 0
    assert len(renamed) == COMMIT_RENAMES and renamed[-1] == "run.json" and renamed[2] == "pressure.gpkg"


def test_interrupt_during_the_renames_is_rolled_back(world, prior, monkeypatch):
    def interrupt(*args):
        raise KeyboardInterrupt

    monkeypatch.setattr(os, "replace", fail_on_call(os.replace, 7, interrupt))
    assert "interrupted" in error_line(run(world), 130)
    assert snapshot(world.out.parent) == prior


# ---------------------------------------------------------------------------- a killed process

DRIVER = textwrap.dedent("""\
    import os, signal, sys
    import geopress.io.write as w
    target, n, when = sys.argv[1], int(sys.argv[2]), sys.argv[3]
    if __name__ != "__main__":
        raise SystemExit  # imported by the run's child process
    owner = os if target == "replace" else w
    real = getattr(owner, target)
    calls = [0]
    def killer(*args, **kwargs):
        calls[0] += 1
        if calls[0] == n:
            if when == "after":
                real(*args, **kwargs)
            os.kill(os.getpid(), signal.SIGKILL)
        return real(*args, **kwargs)
    setattr(owner, target, killer)
    from geopress.cli import main
    main(["run", sys.argv[4]])
""")


def killed_run(world, target: str, n: int, when: str) -> None:
    proc = subprocess.run([sys.executable, "-c", DRIVER, target, str(n), when, str(world.config_path)],
                          env={**os.environ, "PYTHONPATH": str(ROOT)}, capture_output=True, text=True, timeout=120)
    assert proc.returncode == -signal.SIGKILL, proc.stderr


@pytest.mark.parametrize("target, n, when", [
    ("write_geopackage", 1, "after"),  # the later layers, written in the run's own process
    ("write_csv", 3, "before"),
    ("write_json", 1, "after"),
])
def test_killed_while_writing(world, prior, target, n, when):
    killed_run(world, target, n, when)
    assert visible(snapshot(world.out.parent)) == visible(prior)  # the earlier outputs, untouched
    assert any(leftover(k) for k in snapshot(world.out.parent))  # the killed run's leftovers
    then_a_good_run_leaves_no_temporary(world)


@pytest.mark.parametrize("n, when", [(1, "after"), (2, "after"), (3, "after"), (12, "before"), (COMMIT_RENAMES, "before"),
                                     (COMMIT_RENAMES, "after")])
def test_killed_during_the_renames_is_rolled_back_by_the_next_run(world, prior, n, when):
    killed_run(world, "replace", n, when)
    # The next run, even one that then fails on its input, first puts the earlier outputs back.
    world.config_path.write_text(world.config_path.read_text().replace('id_field = "account"', 'id_field = "acct"'))
    res = run(world)
    assert "no field 'acct'" in error_line(res, 2)
    warns = [line for line in res.stderr.splitlines() if line.startswith("warning:")]
    assert any("taking it over" in w for w in warns), res.stderr
    assert snapshot(world.out.parent) == prior
    world.config_path.write_text(world.config_path.read_text().replace('id_field = "acct"', 'id_field = "account"'))
    then_a_good_run_leaves_no_temporary(world)


# ---------------------------------------------------------------------------- other things a nightly job meets


def test_stale_temporary_files_are_removed(world, prior):
    out = world.out.parent
    left = [out / f".pressure.gpkg{write_io.TMP_MARK}abc123.gpkg", out / f".pressure.gpkg{write_io.TMP_MARK}abc123.gpkg-journal",
            out / "mailing" / f".high_pressure.csv{write_io.TMP_MARK}x.csv", out / f".run.json{write_io.TMP_MARK}y.json"]
    for p in left:
        p.write_bytes(b"half written")
    then_a_good_run_leaves_no_temporary(world)


def test_output_geopackage_open_in_a_reader(world, prior):
    # A GIS user has the GeoPackage open: on POSIX the rename gives the reader its old file, the run goes on.
    reader = sqlite3.connect(f"file:{world.out}?mode=ro", uri=True)
    try:
        reader.execute("BEGIN")
        before = reader.execute("SELECT count(*) FROM customers WHERE status = 'high'").fetchone()[0]
        res = run(world)
        assert res.exit_code == 0, res.stderr
        assert reader.execute("SELECT count(*) FROM customers WHERE status = 'high'").fetchone()[0] == before
    finally:
        reader.close()
    assert snapshot(world.out.parent)["pressure.gpkg"] != prior["pressure.gpkg"]


def test_read_only_output_file_is_replaced(world, prior):
    # Permissions on the file do not protect it from a rename; the folder's do (see test_bad_inputs).
    world.out.chmod(0o444)
    then_a_good_run_leaves_no_temporary(world)
    assert world.out.read_bytes() != prior["pressure.gpkg"]


def test_a_stale_report_temporary_is_removed_even_by_a_run_that_fails(world, prior):
    # a killed run can leave a report temporary; the next run removes it before it reads any input
    stale = world.out.parent / f".report.html{write_io.TMP_MARK}killed.html"
    stale.write_text("half a report")
    world.customers_path.unlink()
    assert run(world).exit_code == 2
    assert not stale.exists()
