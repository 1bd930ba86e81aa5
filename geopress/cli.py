"""The ``geopress`` command: parses arguments, configures logging, calls the pipeline.

Exit codes: 0 the run completed (flagged customers are a result, not a
failure); 2 bad config or input, one line on stderr; 1 anything else.
"""

from __future__ import annotations

import functools
import logging
import sys
import warnings
from importlib import resources
from pathlib import Path
from typing import Callable

import click

from . import pipeline
from ._version import __version__
from .config import load_config
from .errors import GeopressError

log = logging.getLogger("geopress")

EXIT_OK, EXIT_FAILURE, EXIT_BAD_INPUT = 0, 1, 2


class _OneLine(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        msg = record.getMessage()
        if record.name == "py.warnings":
            # "path:line: Category: message" -> "warning: message"
            text = msg.strip().splitlines()[0]
            parts = text.split(": ", 2)
            msg = parts[2] if len(parts) == 3 else text
            return f"warning: {msg}"
        level = record.levelname.lower()
        return msg if record.levelno == logging.INFO else f"{level}: {msg}"


def _configure_logging(verbose: int, quiet: int) -> None:
    level = logging.INFO - 10 * verbose + 10 * quiet
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(_OneLine())
    for name in ("geopress", "py.warnings"):
        lg = logging.getLogger(name)
        lg.handlers[:] = [handler]
        lg.setLevel(max(level, logging.DEBUG))
        lg.propagate = False
    logging.captureWarnings(True)


def _progress(ctx: click.Context) -> Callable[[str], None] | None:
    if ctx.obj["quiet"] or not sys.stderr.isatty():
        return None
    return lambda step: click.echo(f"geopress: {step} ...", err=True)


def guarded(fn: Callable) -> Callable:
    """Map GeopressError to exit 2 with one line, other failures to exit 1."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        ctx = click.get_current_context()
        debug = ctx.obj["debug"]
        _configure_logging(ctx.obj["verbose"], ctx.obj["quiet"])
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("always")
                return fn(*args, **kwargs)
        except GeopressError as exc:
            if debug:
                raise
            click.echo(f"error: {exc}", err=True)
            ctx.exit(EXIT_BAD_INPUT)
        except KeyboardInterrupt:
            click.echo("error: interrupted; earlier outputs are unchanged", err=True)
            ctx.exit(130)
        except Exception as exc:  # a bug or an environment failure
            if debug:
                raise
            first = str(exc).splitlines()[0] if str(exc) else ""
            click.echo(f"error: unexpected failure ({type(exc).__name__}: {first}); earlier outputs are unchanged; "
                       "rerun with --debug for details", err=True)
            ctx.exit(EXIT_FAILURE)

    return wrapper


def _summary(result: pipeline.Result) -> str:
    counts = ", ".join(f"{k} {v}" for k, v in result.counts.items() if v)
    seconds = sum(result.timings.values())
    where = f" -> {result.config.output.path}" if result.outputs else ""
    return f"{len(result.customers)} customers: {counts} ({seconds:.1f} s){where}"


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="geopress")
@click.option("-v", "--verbose", count=True, help="More log output (repeat for debug).")
@click.option("-q", "--quiet", count=True, help="Less log output: warnings and errors only.")
@click.option("--debug", is_flag=True, help="Show tracebacks instead of one-line errors.")
@click.pass_context
def cli(ctx: click.Context, verbose: int, quiet: int, debug: bool) -> None:
    """Static service-pressure screening of water customers."""
    ctx.ensure_object(dict)
    ctx.obj.update(verbose=verbose, quiet=quiet, debug=debug)


@cli.command("run")
@click.argument("config", type=click.Path(path_type=Path))
@click.option("--engine", type=click.Choice(pipeline.ENGINES), default="local", show_default=True,
              help="local: in this process; dask: zone join and terrain per spatial partition on dask.distributed "
                   "(pip install 'geopress[dask]').")
@click.option("--scheduler", metavar="ADDRESS", default=None,
              help="dask scheduler address (e.g. tcp://10.0.0.5:8786); default: a LocalCluster for this run.")
@click.option("--partitions", type=click.IntRange(min=1), default=None,
              help="Spatial partitions for --engine dask (default: two per worker thread).")
@click.pass_context
@guarded
def run_cmd(ctx: click.Context, config: Path, engine: str, scheduler: str | None, partitions: int | None) -> None:
    """Run the screening described by CONFIG and write its outputs."""
    result = pipeline.run(load_config(config), progress=_progress(ctx), engine=engine, scheduler=scheduler,
                          partitions=partitions)
    click.echo(_summary(result))


@cli.command("check")
@click.argument("config", type=click.Path(path_type=Path))
@click.pass_context
@guarded
def check_cmd(ctx: click.Context, config: Path) -> None:
    """Validate CONFIG and every input; print what a run would process; write nothing."""
    report = pipeline.check(load_config(config))
    for line in report.lines:
        click.echo(line)
    click.echo("check passed")


def demo_config_path() -> Path:
    """The bundled demo config."""
    return Path(str(resources.files("geopress.data_demo").joinpath("geopress.toml")))


@cli.command("demo")
@click.option("--out", "out_dir", type=click.Path(path_type=Path), default=Path("geopress-demo-out"),
              show_default=True, help="Folder for the demo's outputs.")
@click.pass_context
@guarded
def demo_cmd(ctx: click.Context, out_dir: Path) -> None:
    """Run the bundled invented-town scenario."""
    out = out_dir.resolve()
    cfg = load_config(demo_config_path(), overrides={
        "output.path": str(out / "pressure.gpkg"),
        "output.mailing_dir": str(out / "mailing"),
    })
    result = pipeline.run(cfg, progress=_progress(ctx))
    click.echo(_summary(result))
    click.echo(f"open {out / 'pressure.gpkg'} in a GIS viewer; mailing lists are in {out / 'mailing'}")


def main(argv: list[str] | None = None) -> None:
    """Console-script entry point."""
    cli.main(args=argv, prog_name="geopress", obj={})
