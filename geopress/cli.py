"""The ``geopress`` command: parses arguments, configures logging, calls the pipeline.

Exit codes: 0 the run completed (flagged customers are a result, not a
failure); 2 bad config or input, or an output location that cannot be
written, locked or full: one line on stderr, nothing written; 1 anything
else, earlier outputs unchanged; 130 interrupted (Ctrl-C) and 143 stopped
by SIGTERM (a scheduler's), both leaving the earlier outputs unchanged.
"""

from __future__ import annotations

import contextlib
import functools
import logging
import os
import signal
import sys
import threading
import time
import warnings
from importlib import resources
from pathlib import Path
from typing import Callable

import click

from . import pipeline
from ._compat import keep_freed_memory, writer_first
from ._version import __version__
from .config import load_config
from .errors import GeopressError, InputError, OutputError
from .io.starter import write_starter
from .scenario import load_scenario

log = logging.getLogger("geopress")

EXIT_OK, EXIT_FAILURE, EXIT_BAD_INPUT = 0, 1, 2
EXIT_INTERRUPTED, EXIT_TERMINATED = 130, 143  # 128 + SIGINT, 128 + SIGTERM, as shells report them


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised where the program is, so that it unwinds as for Ctrl-C: the outputs are left as
    they were, the lock released, the child process stopped."""


def _terminate(signum, frame) -> None:
    raise Terminated


@contextlib.contextmanager
def _sigterm_unwinds():
    """SIGTERM raises :class:`Terminated` while the block runs (in the main thread; elsewhere unchanged)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGTERM, _terminate)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


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


class _Bars:
    """Progress bars on stderr (tqdm), one per step of a run (the pipeline's ``progress`` callback).

    A step that counts its work (customers read and sampled, outputs written)
    gets a bar with its count, rate and time left, kept when done; any other
    step a line with its elapsed time, cleared when the next begins.
    """

    def __init__(self) -> None:
        import threading

        from tqdm import tqdm

        tqdm.monitor_interval = 0  # no monitor thread: the run forks child processes, which a threaded parent must not
        tqdm.set_lock(threading.RLock())  # not tqdm's default multiprocessing lock, which starts a helper process
        self.tqdm = tqdm
        self.pid = os.getpid()  # a forked child's copy of the bars is stale: it logs as without them
        self.bar = None
        self.step: str | None = None
        self.counted = False

    def __call__(self, step: str, done: int | None = None, total: int | None = None, unit: str = "") -> None:
        if step != self.step or (done is not None and not self.counted):
            self.close()
            self.step, self.counted = step, done is not None
            if self.counted:
                self.bar = self.tqdm(desc=step, total=total, unit=f" {unit}", file=sys.stderr, dynamic_ncols=True)
            else:
                self.bar = self.tqdm(desc=step, total=None, bar_format="{desc} ... {elapsed}", file=sys.stderr,
                                     leave=False)
        if done is not None:
            if total is not None and self.bar.total != total:
                self.bar.total = total
            self.bar.update(done - self.bar.n)

    def write(self, line: str) -> None:
        """A log line above the bars."""
        self.tqdm.write(line, file=sys.stderr)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
        self.bar, self.step, self.counted = None, None, False


class _Console(logging.StreamHandler):
    """Log lines to stderr, through the progress bars while there are any, so a line never breaks a bar."""

    def __init__(self, bars: _Bars | None) -> None:
        super().__init__(sys.stderr)
        self.bars = bars

    def emit(self, record: logging.LogRecord) -> None:
        if self.bars is None or self.bars.bar is None or self.bars.pid != os.getpid():
            super().emit(record)
            return
        try:
            self.bars.write(self.format(record))
        except Exception:  # as logging.StreamHandler does
            self.handleError(record)


def _configure_logging(verbose: int, quiet: int, bars: _Bars | None = None) -> None:
    level = logging.INFO - 10 * verbose + 10 * quiet
    handler = _Console(bars)
    handler.setFormatter(_OneLine())
    handler.addFilter(lambda record: record.name != SUMMARY_LOGGER)  # the summary goes to --log-file only
    for name in ("geopress", "py.warnings"):
        lg = logging.getLogger(name)
        lg.handlers[:] = [handler]
        lg.setLevel(max(level, logging.DEBUG))
        lg.propagate = False


def _log_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """``warnings.showwarning`` for a command: warnings become log lines (as logging.captureWarnings does)."""
    logging.getLogger("py.warnings").warning("%s", warnings.formatwarning(message, category, filename, lineno, line))


def _progress(ctx: click.Context) -> _Bars | None:
    """The pipeline's progress callback: bars on a terminal, unless quiet; None otherwise."""
    return ctx.obj["bars"]


def guarded(fn: Callable) -> Callable:
    """Map GeopressError to exit 2 with one line, other failures to exit 1."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        ctx = click.get_current_context()
        debug = ctx.obj["debug"]
        bars = ctx.obj["bars"] = None if _quiet(ctx) or not sys.stderr.isatty() else _Bars()
        _configure_logging(ctx.obj["verbose"], ctx.obj["quiet"], bars)
        try:
            with warnings.catch_warnings(), _sigterm_unwinds():
                warnings.simplefilter("always")
                warnings.showwarning = _log_warning  # restored when the block ends, even in-process
                return fn(*args, **kwargs)
        except GeopressError as exc:
            _close(bars)
            _finish_log(ctx, f"run failed: exit {EXIT_BAD_INPUT}: {exc}")
            if debug:
                raise
            click.echo(f"error: {exc}", err=True)
            ctx.exit(EXIT_BAD_INPUT)
        except Terminated:
            _close(bars)
            _finish_log(ctx, f"run failed: exit {EXIT_TERMINATED}: terminated (SIGTERM); earlier outputs are unchanged")
            click.echo("error: terminated (SIGTERM); earlier outputs are unchanged", err=True)
            ctx.exit(EXIT_TERMINATED)
        except KeyboardInterrupt:
            _close(bars)
            _finish_log(ctx, f"run failed: exit {EXIT_INTERRUPTED}: interrupted; earlier outputs are unchanged")
            click.echo("error: interrupted; earlier outputs are unchanged", err=True)
            ctx.exit(EXIT_INTERRUPTED)
        except Exception as exc:  # a bug or an environment failure
            _close(bars)
            first = str(exc).splitlines()[0] if str(exc) else ""
            _finish_log(ctx, f"run failed: exit {EXIT_FAILURE}: {type(exc).__name__}: {first}")
            if debug:
                raise
            click.echo(f"error: unexpected failure ({type(exc).__name__}: {first}); earlier outputs are unchanged; "
                       "rerun with --debug for details", err=True)
            ctx.exit(EXIT_FAILURE)

    return wrapper


def _close(bars: _Bars | None) -> None:
    """Finish the last bar, before a result or an error is printed."""
    if bars is not None:
        bars.close()


def _counts_text(counts: dict[str, int], skip: tuple[str, ...] = ()) -> str:
    """``ok 12, high 3`` for the non-zero counts (less ``skip``), or ``none``."""
    return ", ".join(f"{k} {v}" for k, v in counts.items() if v and k not in skip) or "none"


def _summary(result: pipeline.Result) -> str:
    counts = _counts_text(result.counts)
    seconds = result.elapsed_s
    where = f" -> {result.config.output.path}" if result.outputs else ""
    return f"{len(result.customers)} customers: {counts} ({seconds:.1f} s){where}"


def _global_option(ctx: click.Context, param: click.Parameter, value: int | bool) -> None:
    """Merge a global option into ``ctx.obj``: the group's value first, then the subcommand's added to it,
    so ``geopress -v run -v CONFIG`` is ``-vv``."""
    obj = ctx.ensure_object(dict)
    before = obj.get(param.name, 0) if ctx.parent is not None else 0  # the group's own call starts afresh
    obj[param.name] = (bool(before) or value) if param.name == "debug" else before + value


def global_options(command: Callable) -> Callable:
    """-v, -q and --debug, accepted before the subcommand and after it (see :func:`_global_option`)."""
    for decls, kwargs in reversed((
        (("-v", "--verbose"), dict(count=True, help="More log output (repeat for debug).")),
        (("-q", "--quiet"), dict(count=True, help="Print nothing on success: warnings and errors only "
                                                  "(-qq: errors only).")),
        (("--debug",), dict(is_flag=True, help="Show tracebacks instead of one-line errors.")),
    )):
        command = click.option(*decls, **kwargs, expose_value=False, callback=_global_option)(command)
    return command


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="geopress")
@global_options
def cli() -> None:
    """Static service-pressure screening of water customers."""


def _quiet(ctx: click.Context) -> bool:
    """-q given more often than -v: print nothing on success."""
    return ctx.obj["quiet"] > ctx.obj["verbose"]


def _say(text: str) -> None:
    """A result line on stdout, unless quiet: a quiet command prints nothing when it succeeds."""
    if not _quiet(click.get_current_context()):
        click.echo(text)


_set_option = click.option(
    "--set", "assignments", multiple=True, metavar="KEY=VALUE",
    help="Override a config key for this run (repeatable), e.g. --set criteria.max_static_psi=90 or "
         "--set zones.source.Upper.high_water_ft=1250. VALUE is read as TOML; other text as a string.")


# -- --log-file: a plain appended log for schedulers; each run ends with one summary line ----------
SUMMARY_LOGGER = "geopress.summary"


class _Stamped(_OneLine):
    def format(self, record: logging.LogRecord) -> str:
        stamp = time.strftime("%Y-%m-%dT%H:%M:%S%z", time.localtime(record.created))
        return f"{stamp} geopress[{record.process}] {super().format(record)}"


def _open_log(ctx: click.Context, path: Path) -> None:
    try:
        handler = logging.FileHandler(path, mode="a", encoding="utf-8")
    except OSError as exc:
        raise OutputError(f"cannot open the log file ({exc.strerror}) for --log-file; choose a writable path",
                          path=path, key="--log-file") from exc
    handler.setFormatter(_Stamped())
    for name in ("geopress", "py.warnings"):
        logging.getLogger(name).addHandler(handler)
    logging.getLogger(SUMMARY_LOGGER).setLevel(logging.INFO)  # even with -q
    ctx.obj["log_file"] = handler
    ctx.obj["started"] = time.perf_counter()


def _finish_log(ctx: click.Context, line: str) -> None:
    """Write the run's last line to --log-file and close it (no-op without one)."""
    handler = ctx.obj.pop("log_file", None)
    if handler is None:
        return
    seconds = time.perf_counter() - ctx.obj["started"]
    logging.getLogger(SUMMARY_LOGGER).info("%s; %.1f s", line, seconds)
    for name in ("geopress", "py.warnings"):
        logging.getLogger(name).removeHandler(handler)
    handler.close()


def _changes_text(result: pipeline.Result) -> str:
    return _counts_text(result.info["changes"]["counts"], skip=("unchanged",))


def _run_line(result: pipeline.Result) -> str:
    counts = _counts_text(result.counts)
    return f"run done: exit {EXIT_OK}: {len(result.customers)} customers: {counts}; changes: {_changes_text(result)}"


@cli.command("run")
@global_options
@click.argument("config", type=click.Path(path_type=Path))
@_set_option
@click.option("--out-dir", type=click.Path(path_type=Path), default=None,
              help="Write the outputs into this folder instead (same file names), e.g. for a what-if run.")
@click.option("--baseline", type=click.Path(path_type=Path),
              help="Compare with this earlier geopress GeoPackage instead of the previous output.")
@click.option("--log-file", type=click.Path(path_type=Path, dir_okay=False),
              help="Append a plain-text log here; each run ends with one summary line.")
@click.option("--engine", type=click.Choice(pipeline.ENGINES), default="local", show_default=True,
              help="local: in this process; dask: zone join and terrain per spatial partition on dask.distributed "
                   "(pip install 'geopress[dask]').")
@click.option("--scheduler", metavar="ADDRESS", default=None,
              help="dask scheduler address (e.g. tcp://10.0.0.5:8786); default: a LocalCluster for this run.")
@click.option("--partitions", type=click.IntRange(min=1), default=None,
              help="Spatial partitions for --engine dask (default: two per worker thread).")
@click.option("--replace-outputs", is_flag=True,
              help="Let a --set what-if without --out-dir replace the outputs (it never becomes the baseline).")
@click.option("--accept-drop", is_flag=True,
              help="Accept a run whose customers dropped by more than output.max_drop_percent of the baseline's.")
@click.pass_context
@guarded
def run_cmd(ctx: click.Context, config: Path, assignments: tuple[str, ...], out_dir: Path | None,
            baseline: Path | None, log_file: Path | None, engine: str, scheduler: str | None,
            partitions: int | None, replace_outputs: bool, accept_drop: bool) -> None:
    """Run the screening described by CONFIG and write its outputs."""
    if log_file is not None:
        _open_log(ctx, log_file)
        log.info("run started: %s", config.resolve())
    cfg = load_scenario(config, assignments, out_dir, replace_outputs=replace_outputs)
    result = pipeline.run(cfg, progress=_progress(ctx), baseline=baseline, engine=engine, scheduler=scheduler,
                          partitions=partitions, accept_drop=accept_drop)
    _close(_progress(ctx))
    _say(_summary(result))
    since = result.info["changes"]["baseline"] or "no earlier run"
    _say(f"changes since {since}: {_changes_text(result)}")
    _finish_log(ctx, _run_line(result))


@cli.command("check")
@global_options
@click.argument("config", type=click.Path(path_type=Path))
@_set_option
@click.pass_context
@guarded
def check_cmd(ctx: click.Context, config: Path, assignments: tuple[str, ...]) -> None:
    """Validate CONFIG and every input; print what a run would process; write nothing."""
    report = pipeline.check(load_scenario(config, assignments, writes=False))
    for line in report.lines:
        _say(line)
    _say("check passed")


@cli.command("compare")
@global_options
@click.argument("before", type=click.Path(path_type=Path))
@click.argument("after", type=click.Path(path_type=Path))
@click.option("--out", type=click.Path(path_type=Path), default=None,
              help="GeoPackage to write (default: status_differences.gpkg beside AFTER); CSVs go beside it.")
@click.option("--id-field", default=None, help="Customer id field (default: the first field of the customers layer).")
@click.pass_context
@guarded
def compare_cmd(ctx: click.Context, before: Path, after: Path, out: Path | None, id_field: str | None) -> None:
    """List the customers whose status differs between two runs' GeoPackages, with counts per zone."""
    comp = pipeline.compare(before, after, out=out, id_field=id_field)
    _say(f"{len(comp.differences)} customers differ in status")
    for zone, grp in comp.by_zone.groupby("zone", sort=True):
        _say(f"  {zone}: {int(grp['customers'].sum())}")
        for r in grp.itertuples(index=False):
            _say(f"    {r.status_a} -> {r.status_b}: {r.customers}")
    _say(f"written: {', '.join(str(p) for p in comp.outputs)}")


@cli.command("init")
@global_options
@click.argument("config", type=click.Path(path_type=Path, dir_okay=False), default="geopress.toml", required=False)
@click.option("--customers", type=click.Path(path_type=Path), help="Your customers: parcels or meter points.")
@click.option("--customers-layer", metavar="LAYER", help="The customers' layer (default: the one with most features).")
@click.option("--id-field", metavar="FIELD", help="The customer id field (default: proposed from the unique fields).")
@click.option("--terrain", type=click.Path(path_type=Path), multiple=True, help="A DEM raster (repeatable).")
@click.option("--zones", type=click.Path(path_type=Path), help="Your pressure-zone polygons.")
@click.option("--zones-layer", metavar="LAYER", help="The zones' layer (default: the polygon layer with most features).")
@click.option("--zone-field", metavar="FIELD", help="The field naming each zone (default: guessed).")
@click.option("--force", is_flag=True, help="Replace CONFIG if it exists.")
@click.pass_context
@guarded
def init_cmd(ctx: click.Context, config: Path, customers: Path | None, customers_layer: str | None,
             id_field: str | None, terrain: tuple[Path, ...], zones: Path | None, zones_layer: str | None,
             zone_field: str | None, force: bool) -> None:
    """Write a commented starter CONFIG (default geopress.toml) from your own files."""
    started = write_starter(config, customers=customers, customers_layer=customers_layer, id_field=id_field,
                            terrain=terrain, zones=zones, zones_layer=zones_layer, zone_field=zone_field, force=force)
    left = len(started.placeholders)
    _say(f"wrote {started.path}: fill in the {left} values marked FILL IN, then run: geopress check {started.path}"
         if left else f"wrote {started.path}; check it with: geopress check {started.path}")


def demo_config_path() -> Path:
    """The bundled demo config: installed as geopress.data_demo, or data_demo/ of a source checkout."""
    try:
        path = Path(str(resources.files("geopress.data_demo").joinpath("geopress.toml")))
    except ModuleNotFoundError:  # running from a source tree without installing
        path = Path(__file__).resolve().parent.parent / "data_demo" / "geopress.toml"
    if not path.is_file():
        raise InputError("the demo data is not installed; reinstall geopress (pip install .)", path=path)
    return path


@cli.command("demo")
@global_options
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
    _close(_progress(ctx))
    _say(_summary(result))
    _say(f"open {out / 'pressure.gpkg'} in a GIS viewer; mailing lists are in {out / 'mailing'}")
    if result.info.get("report", {}).get("written"):
        _say(f"report: {result.info['report']['path']}")


def main(argv: list[str] | None = None) -> None:
    """Console-script entry point."""
    keep_freed_memory()
    writer_first()
    cli.main(args=argv, prog_name="geopress", obj={})
