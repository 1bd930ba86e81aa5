"""The command line as a scheduler and an analyst meet it: global options anywhere, -q silent on success,
compare's errors, progress bars only on a terminal."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest
import shapely

from conftest import ORIGIN, write_layer
from nightly_support import assert_bad, invoke

X0, Y1 = ORIGIN


@pytest.mark.parametrize("where", ["before", "after"])
def test_quiet_prints_nothing_on_success_before_or_after_the_subcommand(world, where):
    args = ["-q", "run", world.config_path] if where == "before" else ["run", world.config_path, "-q"]
    res = invoke(*args)
    assert res.exit_code == 0
    assert (res.stdout, res.stderr) == ("", "")
    assert world.out.exists()


def test_without_quiet_the_run_says_what_it_did(world):
    res = invoke("run", world.config_path)
    assert res.exit_code == 0 and "20 customers:" in res.stdout and "changes since" in res.stdout


@pytest.mark.parametrize("args", [["-v", "run", "{cfg}", "-v"], ["-vv", "run", "{cfg}"], ["run", "-vv", "{cfg}"]])
def test_verbose_counts_add_up_across_both_positions(world, args):
    res = invoke(*[a.replace("{cfg}", str(world.config_path)) for a in args])
    assert res.exit_code == 0
    assert any(line.startswith("debug: step read zones took") for line in res.stderr.splitlines()), res.stderr


@pytest.mark.parametrize("where", ["before", "after"])
def test_debug_before_or_after_the_subcommand_shows_the_traceback(world, where):
    from click.testing import CliRunner

    from geopress.cli import cli
    from geopress.errors import ConfigError

    missing = world.root / "nope.toml"
    args = ["--debug", "check", str(missing)] if where == "before" else ["check", str(missing), "--debug"]
    res = CliRunner().invoke(cli, args)
    assert isinstance(res.exception, ConfigError)  # raised, not turned into one line
    assert "nope.toml" in str(res.exception)


def test_quiet_still_shows_a_warning_and_double_quiet_only_errors(world):
    world.zones_path.unlink()
    # the zones overlap: a warning, and the run still succeeds
    write_layer(world.zones_path, "zones", {"zone": ["West", "East"]},
                [shapely.box(X0, Y1 - 1000, X0 + 500, Y1), shapely.box(X0 + 300, Y1 - 1000, X0 + 1000, Y1)])
    once = invoke("-q", "run", world.config_path)
    assert once.exit_code == 0 and once.stdout == ""
    assert [line.split(":")[0] for line in once.stderr.splitlines()] == ["warning"], once.stderr
    twice = invoke("run", world.config_path, "-qq")
    assert twice.exit_code == 0 and (twice.stdout, twice.stderr) == ("", "")
    bad = invoke("-qq", "check", world.root / "nope.toml")
    assert_bad(bad, "nope.toml", "config file not found")  # errors still go to stderr


# ---------------------------------------------------------------- compare's errors


def test_compare_of_a_missing_file_names_it_and_its_argument_and_no_option(world, tmp_path):
    invoke("-q", "run", world.config_path)
    missing = tmp_path / "gone.gpkg"
    line = assert_bad(invoke("compare", world.out, missing), str(missing), "(from AFTER)", "not found")
    assert "--id-field" not in line
    line = assert_bad(invoke("compare", missing, world.out), str(missing), "(from BEFORE)")
    assert "--id-field" not in line


def test_compare_of_a_layer_without_status_does_not_suggest_the_id_option(world, tmp_path):
    invoke("-q", "run", world.config_path)
    import pyogrio

    cust = pyogrio.read_dataframe(world.out, layer="customers").drop(columns=["status"])
    other = tmp_path / "no_status.gpkg"
    pyogrio.write_dataframe(cust, other, layer="customers")
    line = assert_bad(invoke("compare", world.out, other), str(other), "(from AFTER)", "no field 'status'")
    assert "--id-field" not in line


def test_compare_suggests_the_id_option_where_the_id_is_the_trouble(world, tmp_path):
    invoke("-q", "run", world.config_path)
    line = assert_bad(invoke("compare", world.out, world.out, "--id-field", "meter"), str(world.out),
                      "no field 'meter' (from --id-field)", "pass --id-field")
    line = assert_bad(invoke("compare", world.out, world.out, "--id-field", "zone"), str(world.out),
                      "field 'zone' (from --id-field) has duplicate values", "pass --id-field")
    assert line


# ---------------------------------------------------------------- progress


def _run_on_a_terminal(args: list[str], cwd) -> tuple[int, str, str]:
    """Run ``python -m geopress ARGS`` with stderr on a pseudo-terminal; its exit code, stdout and terminal text."""
    import fcntl
    import pty
    import select
    import struct
    import termios

    controller, terminal = pty.openpty()
    # a terminal of 100 x 40 characters (a new pseudo-terminal has 0 x 0, where tqdm draws nothing)
    fcntl.ioctl(terminal, termios.TIOCSWINSZ, struct.pack("HHHH", 40, 100, 0, 0))
    env = {**os.environ, "TERM": "xterm"}
    proc = subprocess.Popen([sys.executable, "-m", "geopress", *args], cwd=cwd, stdin=subprocess.DEVNULL,
                            stdout=subprocess.PIPE, stderr=terminal, env=env)
    os.close(terminal)
    chunks = []
    try:
        while True:
            ready, _, _ = select.select([controller], [], [], 120)
            if not ready:
                raise TimeoutError("no output from the child for 120 s")
            try:
                data = os.read(controller, 65536)
            except OSError:  # EIO: the child closed the terminal
                break
            if not data:
                break
            chunks.append(data)
        out = proc.stdout.read().decode()
        code = proc.wait(timeout=60)
    finally:
        os.close(controller)
        if proc.poll() is None:
            proc.kill()
            proc.wait(timeout=10)
    return code, out, b"".join(chunks).decode(errors="replace")


def test_progress_bars_on_a_terminal_and_none_with_quiet(world):
    code, out, screen = _run_on_a_terminal(["run", str(world.config_path)], world.root)
    assert code == 0, screen
    assert "20 customers:" in out
    # tqdm's bars: the step, a count of total, the rate and the time left
    for step in ("read customers", "sample terrain"):
        assert any(step in line and "20/20" in line and "customers/s" in line for line in screen.splitlines()), screen
    assert any("write outputs" in line and "outputs/s" in line for line in screen.splitlines()), screen
    assert "<" in screen  # the time left, as in [00:00<00:00, ...]
    code, out, screen = _run_on_a_terminal(["-q", "run", str(world.config_path)], world.root)
    assert (code, out, screen) == (0, "", "")


def test_no_progress_when_stderr_is_not_a_terminal(world):
    proc = subprocess.run([sys.executable, "-m", "geopress", "run", str(world.config_path)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0
    assert "customers/s" not in proc.stderr and "\r" not in proc.stderr
