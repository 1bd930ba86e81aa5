"""geopress.forked: a function in a forked child, its value or exception brought back."""

from __future__ import annotations

import os
import signal
import time

import numpy as np
import pytest

from geopress import forked
from geopress.errors import InputError, OutputError


def test_the_value_comes_back_and_the_child_sees_this_process_memory():
    big = np.arange(3_000_000, dtype=np.float64)  # shared copy-on-write, not sent to the child
    job = forked.start(lambda a: (os.getpid(), float(a.sum()), a[:5] * 2), big, what="test")
    pid, total, head = job.result()
    assert pid == job.pid != os.getpid()
    assert total == float(big.sum())
    np.testing.assert_array_equal(head, big[:5] * 2)
    assert job.done


def test_an_exception_is_raised_again_with_its_attributes_and_the_child_traceback():
    def fail():
        raise InputError("bad terrain", path="dem.tif", key="terrain.paths")

    job = forked.start(fail, what="test")
    with pytest.raises(InputError, match="bad terrain") as info:
        job.result()
    assert (info.value.key, str(info.value.path)) == ("terrain.paths", "dem.tif")
    assert any(f"raised in the test process {job.pid}" in note for note in info.value.__notes__)


def test_a_killed_child_is_an_output_error_naming_the_path():
    job = forked.start(lambda: os.kill(os.getpid(), signal.SIGKILL), what="writer", path="out.gpkg")
    with pytest.raises(OutputError, match="the writer process was killed by signal 9") as info:
        job.result()
    assert str(info.value.path) == "out.gpkg"


def test_cancel_kills_a_running_child_and_reaps_it():
    job = forked.start(time.sleep, 60, what="test")
    t0 = time.perf_counter()
    job.cancel()
    assert time.perf_counter() - t0 < 10  # far less than the 60 s sleep: it was killed, not waited for
    assert job.done
    with pytest.raises(ProcessLookupError):
        os.kill(job.pid, 0)
    job.cancel()  # a second cancel does nothing
