"""geopress.runner: a job in the run's child process, its value or exception brought back, every wait bounded."""

from __future__ import annotations

import math
import os
import time

import pytest

import faults_support
from geopress import runner
from geopress.errors import InputError, OutputError


def raise_input_error():
    raise InputError("bad terrain", path="dem.tif", key="terrain.paths")


def test_the_value_comes_back_from_another_process():
    with runner.Worker(timeout_s=60) as worker:
        assert worker.submit(math.sqrt, 16.0, what="test").result() == 4.0
        assert worker.submit(os.getpid, what="test").result() == worker.pid != os.getpid()


def test_an_exception_is_raised_again_with_its_attributes_and_the_child_traceback():
    with runner.Worker(timeout_s=60) as worker:
        job = worker.submit(raise_input_error, what="test")
        with pytest.raises(InputError, match="bad terrain") as info:
            job.result()
    assert (info.value.key, str(info.value.path)) == ("terrain.paths", "dem.tif")
    assert any(f"raised in the test process {worker.pid}" in note for note in info.value.__notes__)


def test_a_killed_child_is_an_output_error_naming_the_path():
    with runner.Worker(timeout_s=60) as worker:
        with pytest.raises(OutputError, match="the writer process was killed by signal 9") as info:
            worker.submit(faults_support.killed, what="writer", path="out.gpkg").result()
    assert str(info.value.path) == "out.gpkg"


def test_a_job_past_its_timeout_is_stopped_and_says_so():
    with runner.Worker(timeout_s=2) as worker:
        t0 = time.monotonic()
        with pytest.raises(OutputError, match="did not finish within 2 s"):
            worker.submit(time.sleep, 60, what="test").result()
        assert time.monotonic() - t0 < 30  # the 2 s timeout and the kill, not the 60 s sleep
        with pytest.raises(ProcessLookupError):
            os.kill(worker.pid, 0)


def test_leaving_the_block_stops_a_running_child_and_reaps_it():
    with runner.Worker(timeout_s=60) as worker:
        worker.submit(time.sleep, 60, what="test")
        t0 = time.monotonic()
    assert time.monotonic() - t0 < 30
    with pytest.raises(ProcessLookupError):
        os.kill(worker.pid, 0)


def test_one_job_at_a_time():
    with runner.Worker(timeout_s=60) as worker:
        worker.submit(time.sleep, 60, what="first")
        with pytest.raises(RuntimeError, match="the first job is still running"):
            worker.submit(math.sqrt, 4.0, what="second")


def test_a_job_submitted_while_the_child_starts_does_not_wait_for_it(monkeypatch):
    # the start held back 2 s: submit returns at once, and the job, pickled then, runs once the child is up
    real = runner.start_server
    monkeypatch.setattr(runner, "start_server", lambda: (time.sleep(2), real()))
    values = [9.0]
    with runner.Worker(timeout_s=60) as worker:
        t0 = time.monotonic()
        job = worker.submit(math.fsum, values, what="test")
        assert time.monotonic() - t0 < 1.0  # not the 2 s start
        values.append(1.0)  # after the submit: the child gets the list as it was
        assert job.result() == 9.0


def test_a_child_that_cannot_start_fails_the_job(monkeypatch):
    def refused():
        raise OSError("Resource temporarily unavailable")

    monkeypatch.setattr(runner, "start_server", refused)
    with runner.Worker(timeout_s=60) as worker:
        # raised by the submit when the start has already failed, else by the wait
        with pytest.raises(OutputError, match="the service band process could not start .Resource temporarily"):
            worker.submit(math.sqrt, 4.0, what="service band").result()
