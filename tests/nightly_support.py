"""Helpers for the nightly-run tests: run the CLI, snapshot the outputs, check one-line errors."""

from __future__ import annotations

from pathlib import Path

from click.testing import CliRunner, Result

from conftest import BASE_CONFIG
from geopress.cli import cli


def invoke(*args: str | Path) -> Result:
    """``geopress ARGS`` in-process; stdout and stderr kept apart."""
    return CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)


def run(world, *extra: str | Path) -> Result:
    return invoke("run", world.config_path, *extra)


def snapshot(folder: Path) -> dict[str, bytes]:
    """Every file under ``folder`` (hidden ones too) by relative path, with its bytes."""
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def good_run(world) -> dict[str, bytes]:
    """Run ``world`` once successfully and snapshot its output folder."""
    res = run(world)
    assert res.exit_code == 0, res.stderr
    snap = snapshot(world.out.parent)
    assert {"pressure.gpkg", "run.json", "mailing/high_pressure.csv", "mailing/new_high_pressure.csv"} <= set(snap)
    return snap


def error_line(res: Result, code: int = 2) -> str:
    """The run's single ``error:`` line, after checking the exit code."""
    assert res.exit_code == code, (res.exit_code, res.stdout, res.stderr)
    lines = [line for line in res.stderr.splitlines() if line.startswith("error:")]
    assert len(lines) == 1, res.stderr
    return lines[0]


def assert_bad(res: Result, *needles: str) -> str:
    """Exit 2 with one error line that contains every needle."""
    line = error_line(res)
    for n in needles:
        assert n in line, (n, line)
    return line


def config_with(world, old: str, new: str) -> None:
    """Rewrite the world's config with one replacement of the base text."""
    assert old in BASE_CONFIG, old
    world.config_path.write_text(BASE_CONFIG.replace(old, new, 1))
