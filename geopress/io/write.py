"""Writing outputs so that a failed run never damages the previous ones.

Every output is first written completely to a temporary file beside its
target (same folder, so the final rename is atomic on POSIX); only when all
of them are complete are they renamed into place, GeoPackage first and
``run.json`` last. On any failure the temporary files are removed and the
earlier outputs stay byte-identical. Temporary files left by a killed run are
removed by the next run.

With a ``journal`` the multi-file commit is all or nothing: the journal lists
every (temporary, target, backup) before the first rename, each earlier
target is renamed to its backup before the new file takes its place, and the
journal is deleted once all are in place (the commit point). A failure during
the renames puts the backups back at once; a process killed during them
leaves the journal, and :func:`recover` (called by the next run before it
writes anything) puts them back then. Renames need no free space, so a full
disk cannot stop a rollback.

Nothing but the journal is synced to disk: the promise is against a run that
fails or is killed, not against the machine losing power right after a run
(then run again). SQLite's own syncs are off while a GeoPackage is written
(:func:`write_geopackage`): the file is a temporary until its rename, and the
first commit after the customers layer made the run wait for the whole file
to reach the disk (0.7 s at 4,000,000 customers).
"""

from __future__ import annotations

import csv
import errno
import fcntl
import io
import json
import logging
import os
import shutil
import sqlite3
import tempfile
import threading
import time
from contextlib import contextmanager
from glob import escape as glob_escape
from pathlib import Path
from dataclasses import dataclass
from typing import Any, Callable, Iterator, Mapping

import geopandas as gpd
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.ipc
import pyogrio
import pyogrio.errors
import shapely

from ..errors import OutputError
from ..tables import neutralise_frame

log = logging.getLogger(__name__)

TMP_MARK = ".geopress-tmp-"
#: the GDAL configuration option that sets SQLite's ``PRAGMA synchronous`` (GDAL's SQLite and GPKG drivers)
SYNC_OPTION = "OGR_SQLITE_SYNCHRONOUS"


def ensure_dir(path: Path, key: str) -> None:
    """Create ``path`` (a folder) or raise OutputError naming the key."""
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create folder ({exc.strerror}) for {key}; choose a writable location", path=path, key=key) from exc
    if not os.access(path, os.W_OK | os.X_OK):
        raise OutputError(f"folder is not writable (for {key}); choose a writable location", path=path, key=key)


def remove_stale_temps(target: Path) -> list[Path]:
    """Delete temporary files a killed run left beside ``target``."""
    removed = []
    if target.parent.is_dir():
        for p in target.parent.glob(f".{glob_escape(target.name)}{TMP_MARK}*"):
            try:
                p.unlink()
                removed.append(p)
            except OSError:
                log.warning("could not remove stale temporary file %s", p)
    return removed


class Staging:
    """Collects outputs in temporary files, then renames them all into place.

    Use as a context manager; :meth:`commit` publishes, leaving the block
    without committing (an exception) removes every temporary file. With a
    ``journal`` path the commit is rolled back on failure (see the module
    docstring).
    """

    def __init__(self, journal_for: Path | None = None) -> None:
        self._pending: list[tuple[Path, Path]] = []
        self._scratch: list[Path] = []
        self.committed: list[Path] = []
        self.journal_for = journal_for
        self.journal = None if journal_for is None else journal_path(journal_for)

    def temp_for(self, target: Path) -> Path:
        """A fresh temporary path beside ``target`` with the same suffix."""
        remove_stale_temps(target)
        tmp = _fresh_name(target, "")
        self._pending.append((tmp, target))
        return tmp

    def write(self, target: Path, writer: Callable[[Path], None]) -> None:
        """Stage ``target`` by calling ``writer(tmp_path)``; OSErrors become OutputError."""
        self._write_tmp(target, self.temp_for(target), writer)

    def scratch(self, target: Path, suffix: str) -> Path:
        """A fresh temporary path beside ``target`` for a file no output keeps (e.g. a table handed to a
        child process); removed when the block ends, committed or not, and by the next run if killed."""
        path = _fresh_name(target, "scratch-").with_suffix(suffix)
        self._scratch.append(path)
        return path

    def link(self, staged: Path, target: Path) -> None:
        """Stage ``target`` as the same file as the staged temporary ``staged`` (a hard link, so no copy;
        a copy where the file system has no hard links), renamed into place with the others."""
        tmp = self.temp_for(target)
        try:
            os.link(staged, tmp)
        except OSError as exc:
            if exc.errno not in (errno.EPERM, errno.EXDEV, errno.EOPNOTSUPP, errno.EMLINK):
                raise OutputError(f"cannot write ({exc.strerror or exc}); check free space and permissions",
                                  path=target) from exc
            self._write_tmp(target, tmp, lambda t: shutil.copyfile(staged, t))

    def _write_tmp(self, target: Path, tmp: Path, writer: Callable[[Path], Any]) -> Any:
        try:
            return writer(tmp)
        except OSError as exc:
            raise OutputError(f"cannot write ({exc.strerror or exc}); check free space and permissions", path=target) from exc

    def wait(self, target: Path, result: Callable[[], Any]) -> Any:
        """The value of ``result()``, a child's work on ``target``'s temporary file; OSErrors become OutputError."""
        try:
            return result()
        except OSError as exc:
            raise OutputError(f"cannot write ({exc.strerror or exc}); check free space and permissions", path=target) from exc

    def commit(self) -> None:
        """Rename every staged file into place, in the order staged."""
        if self.journal is None:
            for tmp, target in self._pending:
                os.replace(tmp, target)
                self.committed.append(target)
            self._pending.clear()
            return
        entries = [
            {"tmp": str(tmp), "target": str(target), "backup": str(_fresh_name(target, "old-")) if target.exists() else None}
            for tmp, target in self._pending
        ]
        try:
            _write_journal(self.journal_for, entries)
        except OSError as exc:
            raise OutputError(f"cannot write the commit journal ({exc.strerror or exc}); check free space and permissions",
                              path=self.journal) from exc
        try:
            for e in entries:
                if e["backup"]:
                    os.replace(e["target"], e["backup"])
                os.replace(e["tmp"], e["target"])
        except BaseException as exc:
            _rollback(entries)
            self.journal.unlink()
            self._pending.clear()
            if isinstance(exc, OSError):
                raise OutputError(f"cannot move the new outputs into place ({exc.strerror or exc}); the earlier "
                                  "outputs were put back; check permissions", path=e["target"]) from exc
            raise
        self.journal.unlink()  # the commit point
        for e in entries:
            if e["backup"]:
                _unlink(Path(e["backup"]))
        self.committed.extend(target for _, target in self._pending)
        self._pending.clear()

    def discard(self) -> None:
        """Remove every temporary file not committed, and the scratch files. A child process writing one
        must have been stopped first (the pipeline's Worker closes before its Staging)."""
        for tmp in [*(t for t, _ in self._pending), *self._scratch]:
            for p in [tmp, *tmp.parent.glob(glob_escape(tmp.name) + "*")]:
                _unlink(p)  # with what a writer put beside it (e.g. a -journal file)
        self._pending.clear()
        self._scratch.clear()

    def __enter__(self) -> "Staging":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        self.discard()


def _fresh_name(target: Path, tag: str) -> Path:
    fd, name = tempfile.mkstemp(prefix=f".{target.name}{TMP_MARK}{tag}", suffix=target.suffix, dir=target.parent)
    os.close(fd)
    os.unlink(name)  # writers such as GDAL want to create the file themselves
    return Path(name)


def _unlink(path: Path) -> None:
    try:
        path.unlink()
    except FileNotFoundError:
        pass


def journal_path(output: Path) -> Path:
    """The commit journal of the outputs staged with ``Staging(journal_for=output)``."""
    return output.parent / f".{output.name}.geopress-commit"


def _write_journal(output: Path, entries: list[dict[str, Any]]) -> None:
    tmp = output.parent / f".{output.name}{TMP_MARK}commit"  # also removed with the stale temporaries
    try:
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(entries, fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, journal_path(output))
    except BaseException:
        _unlink(tmp)
        raise


def _rollback(entries: list[dict[str, Any]]) -> None:
    """Undo a partial commit: each earlier output back in place, new ones and temporaries removed."""
    for e in reversed(entries):
        tmp, target = Path(e["tmp"]), Path(e["target"])
        if e["backup"] and Path(e["backup"]).exists():
            os.replace(e["backup"], target)
        elif not e["backup"] and not tmp.exists():
            _unlink(target)  # it did not exist before this commit
        _unlink(tmp)


def recover(output: Path) -> bool:
    """Roll back a commit that a killed run left half done beside ``output``; True if there was one."""
    journal = journal_path(output)
    if not journal.exists():
        return False
    _rollback(json.loads(journal.read_text(encoding="utf-8")))  # written whole by one rename
    journal.unlink()
    log.warning("a previous run was stopped while moving its outputs into place; the outputs before it were restored")
    return True


#: SQLite page cache while writing a GeoPackage, MB (GDAL's default is small). Writing the
#: customer layers of 1,000,000 customers took the same time (about 6 s) with 128 MB as with
#: 256 or 512 MB, the spatial index being built on GDAL's own thread; a larger cache only holds
#: more memory. Pages are allocated only as used, so small outputs do not pay for it.
GPKG_CACHE_MB = 128


@dataclass(frozen=True)
class View:
    """A layer of the rows of an earlier point layer (named ``of``) whose ``column`` holds one of
    ``values``, written as an SQL view over that layer and registered as a feature layer (the
    GeoPackage standard lets a ``gpkg_contents`` row name a table or a view; from memory).

    Nothing is copied: GDAL reads the view with the base layer's spatial index, and a
    feature's fid in the view is its fid in the base layer. ``extent`` (min x, min y, max x,
    max y of the rows selected, None for each when none has a geometry) goes into
    ``gpkg_contents``; ``rows`` is how many rows it selects (:func:`view_of` counts both).
    """

    of: str
    column: str
    values: tuple[str | bool, ...]
    rows: int
    extent: tuple[float | None, float | None, float | None, float | None]


def view_of(of: str, frame: pd.DataFrame, column: str, values: tuple[str | bool, ...], x: np.ndarray,
            y: np.ndarray) -> View:
    """The :class:`View` of the rows of ``frame`` (written as layer ``of``, its points at ``x``/``y``, NaN for
    none) whose ``column`` is in ``values``."""
    match = frame[column].isin(values).to_numpy(dtype=bool)
    drawn = match & ~(np.isnan(x) | np.isnan(y))
    extent = ((float(x[drawn].min()), float(y[drawn].min()), float(x[drawn].max()), float(y[drawn].max()))
              if drawn.any() else (None,) * 4)
    return View(of=of, column=column, values=tuple(values), rows=int(match.sum()), extent=extent)


@dataclass(frozen=True)
class Encoded:
    """A point layer given as its attributes ``frame`` and its geometries already encoded: ``wkb``, row for row
    (as :func:`geopress.io.vector.read_customers` gives them), in ``crs``; the writer passes them through as the
    last column, ``geometry``."""

    frame: pd.DataFrame
    wkb: pa.ChunkedArray | pa.Array
    crs: Any


@dataclass(frozen=True)
class ArrowPipe:
    """A point layer that reaches a writer in another process through a named pipe (a FIFO) at ``path``, as an
    Arrow IPC stream of ``rows`` rows (WKB geometries in column ``geometry``, CRS ``crs``): the run sends it
    (:func:`send_arrow`) while the writer reads it a batch at a time and hands each batch to GDAL. The writer
    starts on the first batch, holds one batch, and nothing goes to disk; it checks that every row came, since a
    sender that stopped early ends the stream as cleanly as one that finished."""

    path: Path
    geometry: str
    crs: str | None
    rows: int


@dataclass(frozen=True)
class Styles:
    """The ``layer_styles`` table that desktop GIS reads a layer's default style from: one row per
    layer named in ``sld`` (layer -> (style name, description, SLD text)), its SLD in ``styleSLD``
    (``styleQML`` left empty), each the layer's default. Written after the layers it styles."""

    sld: Mapping[str, tuple[str, str, str]]


@dataclass(frozen=True)
class Polygons:
    """A polygon layer, typed "Polygon" even when it has no rows (GDAL would type an empty one by its first row)."""

    frame: gpd.GeoDataFrame


#: a layer to write: a frame, a point layer with its WKB or through a pipe, a view of an earlier point layer,
#: a polygon layer, or styles
Layer = pd.DataFrame | Encoded | ArrowPipe | View | Polygons | Styles


#: the geometry column of an :class:`Encoded` layer as written
GEOMETRY = "geometry"

#: rows per record batch of an :class:`ArrowPipe`: the writer process holds one batch at a time
ARROW_BATCH_ROWS = 65_536
#: bytes a pipe buffers (Linux's F_SETPIPE_SZ, at most /proc/sys/fs/pipe-max-size, 1 MiB by default there): with
#: the default 64 KiB the sender would wait on the writer for every 64 KiB
PIPE_BYTES = 1 << 20
_F_SETPIPE_SZ = 1031  # linux/fcntl.h: F_LINUX_SPECIFIC_BASE + 7
#: seconds between the sender's checks for the writer opening the pipe
_OPEN_POLL_S = 0.005


def arrow_pipe(path: Path, layer: Encoded, *, made: pa.Table | None = None) -> tuple[ArrowPipe, pa.Table]:
    """The point layer ``layer`` as an Arrow table, and the :class:`ArrowPipe` at ``path`` it is sent through.
    ``made``: its table as :func:`point_table` made it earlier, from some of the frame's columns; only the others
    are converted now, each put where it is in the frame."""
    if made is None:
        table = point_table(layer)
    else:
        table = made
        for i, name in enumerate(layer.frame.columns):
            if name not in made.column_names:
                column = _arrow_columns(layer.frame[[name]])
                table = table.add_column(i, column.field(0), column.column(0))
    return ArrowPipe(path=path, geometry=GEOMETRY, crs=_crs_text(layer.crs), rows=table.num_rows), table


def make_pipe(pipe: ArrowPipe) -> None:
    """Make the FIFO of ``pipe``, readable and writable by this user only."""
    os.mkfifo(pipe.path, 0o600)


def send_arrow(pipe: ArrowPipe, table: pa.Table, *, reader_alive: Callable[[], bool], stop: threading.Event,
               timeout_s: float) -> bool:
    """Send ``table`` through the FIFO of ``pipe`` (:func:`make_pipe`) once the writer has opened it, in batches of
    :data:`ARROW_BATCH_ROWS`. Arrow only, no pandas: it runs in a thread beside code that reads the frame the
    table was made from, and waits on the writer without the GIL.

    True when every row was sent. False, having sent all or part, when the writer is gone or done without it
    (``reader_alive()`` false before it opened the pipe, or a broken pipe later), did not open it within
    ``timeout_s``, or ``stop`` was set: the writer's own job then says what went wrong, or nobody waits for it.
    Other OSErrors propagate.
    """
    deadline = time.monotonic() + timeout_s
    while True:  # opened without blocking: a writer that never opens the pipe cannot hold this thread
        try:
            fd = os.open(pipe.path, os.O_WRONLY | os.O_NONBLOCK | os.O_CLOEXEC)
            break
        except OSError as exc:
            if exc.errno != errno.ENXIO:  # ENXIO: nobody reads it yet
                raise
        if stop.is_set() or not reader_alive() or time.monotonic() > deadline:
            return False
        time.sleep(_OPEN_POLL_S)
    try:
        # buffered: a write the pipe takes only in part is finished by the file object, not left short
        with os.fdopen(fd, "wb", buffering=PIPE_BYTES) as sink:  # closes fd, whatever happens below
            os.set_blocking(fd, True)
            try:
                fcntl.fcntl(fd, _F_SETPIPE_SZ, PIPE_BYTES)
            except OSError:  # a lower limit on this system: the default buffer works, only slower
                pass
            with pa.ipc.new_stream(sink, table.schema) as out:
                for batch in table.to_batches(max_chunksize=ARROW_BATCH_ROWS):
                    if stop.is_set():
                        return False
                    out.write_batch(batch)
    except BrokenPipeError:  # the writer is gone: its job says why
        return False
    return True


def write_geopackage(path: Path, layers: Mapping[str, Layer]) -> dict[str, float]:
    """Write each layer into the GeoPackage at ``path`` (created, or added to), in order, and return the
    seconds each took. GeoDataFrames of points and point layers get the type "Point" and a spatial
    index, other GeoDataFrames a spatial index, other frames are plain tables; views select from an
    earlier point layer.

    Every failure to write is an :class:`~geopress.errors.OutputError` naming ``path``: the file
    system's (a full disk, permissions) and those GDAL and SQLite report.
    """
    try:
        with _unsynced():
            return _write_layers(path, layers)
    except OSError as exc:
        raise OutputError(f"cannot write ({exc.strerror or exc}); check free space and permissions", path=path) from exc
    except (sqlite3.Error, pyogrio.errors.DataSourceError, pyogrio.errors.DataLayerError, pyogrio.errors.FieldError,
            pyogrio.errors.GeometryError, pyogrio.errors.CRSError) as exc:
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise OutputError(f"cannot write the GeoPackage ({first}); check free space and permissions",
                          path=path) from exc


def write_in_child(path: Path, layers: Mapping[str, Layer]) -> dict[str, float]:
    """:func:`write_geopackage` as the writer process's job (:mod:`geopress.runner`), with a larger
    SQLite page cache (:data:`GPKG_CACHE_MB`) in that process only."""
    pyogrio.set_gdal_config_options({"OGR_SQLITE_CACHE": str(GPKG_CACHE_MB)})
    return write_geopackage(path, layers)


@contextmanager
def _unsynced() -> Iterator[None]:
    """GDAL's SQLite connections without syncs (``PRAGMA synchronous = OFF``) in this block; see the module's
    docstring. A GDAL configuration option is global to the process: the block restores the earlier value."""
    before = pyogrio.get_gdal_config_option(SYNC_OPTION)
    pyogrio.set_gdal_config_options({SYNC_OPTION: "OFF"})
    try:
        yield
    finally:
        pyogrio.set_gdal_config_options({SYNC_OPTION: before})


def _connect(path: Path) -> sqlite3.Connection:
    """An SQLite connection to the GeoPackage being written, without syncs, like GDAL's (:func:`_unsynced`)."""
    con = sqlite3.connect(path)
    con.execute("PRAGMA synchronous = OFF")
    return con


#: shapely.get_type_id of a missing geometry and of a Point
MISSING, POINT = -1, 0


def _write_layers(path: Path, layers: Mapping[str, Layer]) -> dict[str, float]:
    points: dict[str, Encoded | gpd.GeoDataFrame | pa.Table] = {}  # the point layers written, that views select from
    seconds = {}
    for name, layer in layers.items():
        t0 = time.perf_counter()
        if isinstance(layer, Styles):
            _write_layer_styles(path, name, layer)
        elif isinstance(layer, View):
            if layer.rows:
                _create_view(path, name, layer)
            else:
                # GDAL finds a view's fid column from its first row: an empty view would list the fid as a field
                _write_point_layer(path, name, _no_rows(points[layer.of]))
        elif isinstance(layer, Polygons):
            pyogrio.write_dataframe(layer.frame, path, layer=name, driver="GPKG", use_arrow=True,
                                    geometry_type="Polygon", layer_options={"SPATIAL_INDEX": "YES"})
        elif isinstance(layer, ArrowPipe):
            schema = _write_from_pipe(path, name, layer)
            points[name] = (schema.empty_table(), layer.geometry, layer.crs)
        elif isinstance(layer, Encoded) or (isinstance(layer, gpd.GeoDataFrame) and _all_points(layer)):
            _write_point_layer(path, name, layer)
            points[name] = layer
        elif isinstance(layer, gpd.GeoDataFrame):
            pyogrio.write_dataframe(layer, path, layer=name, driver="GPKG", use_arrow=True,
                                    layer_options={"SPATIAL_INDEX": "YES"})
        else:
            pyogrio.write_dataframe(layer, path, layer=name, driver="GPKG")
        seconds[name] = round(time.perf_counter() - t0, 4)
    return seconds


def _write_from_pipe(path: Path, name: str, pipe: ArrowPipe) -> pa.Schema:
    """Write the point layer sent through ``pipe`` a batch at a time, as it comes (this process holds one batch,
    not the table: 1.45 GB at 4,000,000 customers); OutputError when fewer or more rows came than were sent."""
    got = 0
    # a buffered Python file: its reads return all the bytes asked for (a pipe's may return fewer), and it needs no
    # seek (Arrow's own file does one); opening waits for the sender to open its end
    with open(pipe.path, "rb", buffering=PIPE_BYTES) as source:
        reader = pa.ipc.open_stream(source)

        def counted():
            nonlocal got
            for batch in reader:
                got += batch.num_rows
                yield batch

        _write_arrow_points(path, name, pa.RecordBatchReader.from_batches(reader.schema, counted()), pipe.geometry,
                            pipe.crs)
    if got != pipe.rows:
        raise OutputError(f"the {name} layer reached the writer incomplete ({got:,} of {pipe.rows:,} rows); "
                          "run again", path=path)
    return reader.schema


def _write_arrow_points(path: Path, name: str, table: pa.Table | pa.RecordBatchReader, geometry: str,
                        crs: str | None) -> None:
    pyogrio.write_arrow(table, path, layer=name, driver="GPKG", geometry_name=geometry, geometry_type="Point",
                        crs=crs, layer_options={"SPATIAL_INDEX": "YES"})


def _write_point_layer(path: Path, name: str, layer) -> None:
    """A point layer, typed "Point" even when empty or all null (else GDAL would type it "Unknown"),
    with its spatial index."""
    if isinstance(layer, tuple):  # an empty Arrow table of an ArrowPipe's schema, its geometry column and CRS
        _write_arrow_points(path, name, *layer)
    elif isinstance(layer, Encoded):
        _write_arrow_points(path, name, point_table(layer), GEOMETRY, _crs_text(layer.crs))
    else:
        pyogrio.write_dataframe(layer, path, layer=name, driver="GPKG", use_arrow=True, geometry_type="Point",
                                layer_options={"SPATIAL_INDEX": "YES"})


def _no_rows(layer):
    """``layer`` without its rows: the same fields and CRS."""
    if isinstance(layer, tuple):
        table, geometry, crs = layer
        return table.slice(0, 0), geometry, crs
    if isinstance(layer, Encoded):
        return Encoded(layer.frame.iloc[:0], layer.wkb.slice(0, 0), layer.crs)
    return layer.iloc[:0]


def _quoted(name: str) -> str:
    """An SQL identifier in double quotes."""
    return '"' + name.replace('"', '""') + '"'


def _text(value: str | bool) -> str:
    """An SQL literal: a string quoted, a boolean as the integer a GeoPackage stores it as."""
    if isinstance(value, (bool, np.bool_)):
        return str(int(value))
    return "'" + value.replace("'", "''") + "'"


def _create_view(path: Path, name: str, view: View) -> None:
    """Create ``view`` as layer ``name`` of the GeoPackage at ``path``."""
    con = _connect(path)
    try:
        with con:  # one transaction: the view is registered whole or not at all
            # every column as it is, the fid (the primary key) too: GDAL then takes it as the view's
            # fid and filters the view by the base layer's spatial index
            columns = con.execute(f"PRAGMA table_info({_quoted(view.of)})").fetchall()
            selected = ", ".join(_quoted(c[1]) for c in columns)
            values = ", ".join(_text(v) for v in view.values)
            con.execute(f"CREATE VIEW {_quoted(name)} AS SELECT {selected} FROM {_quoted(view.of)} "
                        f"WHERE {_quoted(view.column)} IN ({values})")
            con.execute("INSERT INTO gpkg_contents (table_name, data_type, identifier, min_x, min_y, max_x, max_y, srs_id) "
                        "SELECT ?, 'features', ?, ?, ?, ?, ?, srs_id FROM gpkg_contents WHERE table_name = ?",
                        (name, name, *view.extent, view.of))
            con.execute("INSERT INTO gpkg_geometry_columns (table_name, column_name, geometry_type_name, srs_id, z, m) "
                        "SELECT ?, column_name, geometry_type_name, srs_id, z, m FROM gpkg_geometry_columns "
                        "WHERE table_name = ?", (name, view.of))
    finally:
        con.close()


#: the columns of ``layer_styles`` as desktop GIS creates and reads it (from memory), after its id
LAYER_STYLES_COLUMNS = (
    "f_table_catalog TEXT(256)", "f_table_schema TEXT(256)", "f_table_name TEXT(256)",
    "f_geometry_column TEXT(256)", "styleName TEXT(30)", "styleQML TEXT", "styleSLD TEXT", "useAsDefault BOOLEAN",
    "description TEXT", "owner TEXT(30)", "ui TEXT(30)", "update_time DATETIME",
)


def _write_layer_styles(path: Path, name: str, styles: Styles) -> None:
    """Create table ``name`` holding ``styles``, registered as an attributes table of the GeoPackage;
    each row names its layer's geometry column as ``gpkg_geometry_columns`` has it."""
    con = _connect(path)
    try:
        with con:  # one transaction: the table is there whole or not at all
            con.execute(f"CREATE TABLE {_quoted(name)} (id INTEGER PRIMARY KEY AUTOINCREMENT, "
                        f"{', '.join(LAYER_STYLES_COLUMNS)})")
            stamp = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
            for layer, (style_name, description, sld) in styles.sld.items():
                con.execute(f"INSERT INTO {_quoted(name)} (f_table_catalog, f_table_schema, f_table_name, "
                            "f_geometry_column, styleName, styleQML, styleSLD, useAsDefault, description, owner, ui, "
                            "update_time) SELECT '', '', ?, column_name, ?, NULL, ?, 1, ?, '', NULL, ? "
                            "FROM gpkg_geometry_columns WHERE table_name = ?",
                            (layer, style_name, sld, description, stamp, layer))
            con.execute("INSERT INTO gpkg_contents (table_name, data_type, identifier, last_change) "
                        "VALUES (?, 'attributes', ?, ?)", (name, name, stamp))
    finally:
        con.close()


def point_table(layer: Encoded) -> pa.Table:
    """An encoded point layer as an Arrow table, its WKB geometries last, in column :data:`GEOMETRY`."""
    return pa.Table.from_arrays([*_arrow_columns(layer.frame).columns, layer.wkb],
                                names=[*map(str, layer.frame.columns), GEOMETRY])


def _arrow_columns(frame: pd.DataFrame) -> pa.Table:
    """``frame``'s columns as Arrow, as GDAL can make fields of them."""
    attributes = pa.Table.from_pandas(frame, preserve_index=False)
    # a text column with no value at all (e.g. previous_status on a first run) comes as Arrow's null type,
    # which GDAL cannot make a field of: it is text
    for i, f in enumerate(attributes.schema):
        if pa.types.is_null(f.type):
            attributes = attributes.set_column(i, f.name, attributes.column(i).cast(pa.large_string()))
    return attributes


def _all_points(df: gpd.GeoDataFrame) -> bool:
    """Every geometry a point or missing (customers always are; an empty layer counts too)."""
    return bool(np.isin(shapely.get_type_id(df.geometry.to_numpy()), (MISSING, POINT)).all())


def _crs_text(crs: Any) -> str | None:
    """The CRS as pyogrio.write_dataframe passes it to GDAL: "EPSG:n" when it has a code, else WKT1."""
    if crs is None:
        return None
    epsg = crs.to_epsg()
    return f"EPSG:{epsg}" if epsg else crs.to_wkt("WKT1_GDAL")


#: rows of a CSV made at a time: the text of one slice of rows is all a CSV holds beside its frame
CSV_CHUNK_ROWS = 131_072


def write_csv(path: Path, df: pd.DataFrame, prepare: Callable[[pd.DataFrame], pd.DataFrame] | None = None) -> None:
    """UTF-8 CSV with a byte-order mark, a header, no index; ``prepare(rows)`` first, when given, maps each slice of
    rows (a function of each row alone, such as :func:`geopress.tables.neutralise_frame`).

    The mark is how a spreadsheet on Windows tells UTF-8 from its ANSI code
    page: without it "Zoë" opens as "ZoÃ«". Readers that know UTF-8 skip it
    (Python: ``encoding="utf-8-sig"``; pandas.read_csv does by itself).

    The rows are made :data:`CSV_CHUNK_ROWS` at a time (:func:`_csv_rows`), so a list of millions of rows never
    holds all its text at once; where a slice has a value that way does not cover, pandas writes the whole file.
    """
    def prepared(rows: pd.DataFrame) -> pd.DataFrame:
        return rows if prepare is None else prepare(rows)

    header = io.StringIO()
    csv.writer(header, lineterminator="\n").writerow([str(c) for c in df.columns])
    with open(path, "wb") as fh:
        fh.write(header.getvalue().encode("utf-8-sig"))
        for start in range(0, len(df), CSV_CHUNK_ROWS):  # no rows: the header alone, as pandas writes it
            body = _csv_rows(prepared(df.iloc[start:start + CSV_CHUNK_ROWS]))
            if body is None:
                break
            fh.write(body)
        else:
            return
    prepared(df).to_csv(path, index=False, encoding="utf-8-sig", lineterminator="\n")


#: characters that make the csv module (pandas' writer) quote a cell, with QUOTE_MINIMAL and "\\n" ending lines (a
#: carriage return is left to pandas: whether the csv module quotes it has changed between Python versions)
_CSV_SPECIAL = r'[",\n]'


def _csv_rows(df: pd.DataFrame) -> memoryview | None:
    """The rows of ``df`` as pandas' ``to_csv`` writes them (``index=False``, ``lineterminator="\\n"``), byte for
    byte, made by Arrow's compute functions a column at a time instead of the csv module a cell at a time; or None
    when a column is one this does not cover (then pandas writes the file).

    Covered: text without carriage returns (quoted where it holds a quote, comma or newline, a quote doubled);
    integers; floats of magnitudes from 1e-4 to 1e8 (the shortest text that reads back the same, as numpy prints
    it: ``1.0``, ``-0.0``; NaN empty), where neither numpy nor Arrow writes an exponent (Arrow does from 1e10,
    numpy below 1e-4); missing values as empty cells; at least two columns (the csv module writes a lone empty
    cell as ``""``).
    """
    if df.shape[1] < 2 or len(df) == 0:
        return None
    cells = []
    for name in df.columns:
        text = _csv_cells(df[name])
        if text is None:
            return None
        cells.append(text.combine_chunks() if isinstance(text, pa.ChunkedArray) else text)
    lines = pc.binary_join_element_wise(pc.binary_join_element_wise(*cells, _utf8(",")), _utf8(""), _utf8("\n"))
    offsets = np.frombuffer(lines.buffers()[1], dtype=np.int64)[lines.offset:lines.offset + len(lines) + 1]
    return memoryview(lines.buffers()[2])[int(offsets[0]):int(offsets[-1])]


def _utf8(value: str) -> pa.Scalar:
    """``value`` as an Arrow scalar of the large text type the CSV's cells have."""
    return pa.scalar(value, pa.large_string())


def _csv_cells(column: pd.Series) -> pa.Array | None:
    """One column's cells as pandas' to_csv writes them (see :func:`_csv_rows`), missing as empty, or None."""
    values = column.array
    if isinstance(column.dtype, pd.CategoricalDtype):
        categories = column.cat.categories
        if not (pd.api.types.is_string_dtype(categories) or len(categories) == 0):
            return None
        values = column.astype("string").array
    if pd.api.types.is_string_dtype(column.dtype) or isinstance(column.dtype, pd.CategoricalDtype):
        try:
            text = pa.array(values, type=pa.large_string(), from_pandas=True)
        except (pa.ArrowInvalid, pa.ArrowTypeError):  # an object column of other things than text
            return None
        if pc.any(pc.match_substring(text, "\r")).as_py():
            return None
        special = pc.match_substring_regex(text, _CSV_SPECIAL)
        quoted = pc.binary_join_element_wise(_utf8('"'), pc.replace_substring(text, '"', '""'), _utf8('"'), _utf8(""))
        return pc.fill_null(pc.if_else(special, quoted, text), "")
    if pd.api.types.is_integer_dtype(column.dtype):
        return pc.fill_null(pc.cast(pa.array(values, from_pandas=True), pa.large_string()), "")
    if column.dtype == np.float64:
        v = column.to_numpy()
        finite = np.isfinite(v)
        magnitude = np.abs(v[finite])
        if np.isinf(v).any() or ((magnitude >= 1e8) | ((magnitude < 1e-4) & (magnitude != 0))).any():
            return None
        text = pc.cast(pa.array(v, from_pandas=True), pa.large_string())
        whole = pa.array(finite & (v == np.trunc(v)))
        return pc.fill_null(pc.if_else(whole, pc.binary_join_element_wise(text, _utf8(".0"), _utf8("")), text), "")
    return None


def write_list_csv(path: Path, df: pd.DataFrame) -> None:
    """A mailing list as CSV (:func:`write_csv`), each text cell a spreadsheet would run as a formula
    given a leading apostrophe (:func:`geopress.tables.neutralise_frame`)."""
    write_csv(path, df, neutralise_frame)


#: rows of one worksheet in an .xlsx workbook (Excel's limit; from memory)
XLSX_MAX_ROWS = 1_048_576


def write_xlsx(path: Path, df: pd.DataFrame, sheet: str) -> None:
    """``df`` as an .xlsx workbook with one sheet named ``sheet`` (openpyxl, the report extra).

    Every text cell is stored as text (an inline string): none can run as a
    formula, so none needs the CSV's guard apostrophe. Numbers stay numbers,
    missing values are empty cells. A character that XML cannot hold (a
    control character other than tab and newline) becomes U+FFFD.
    """
    from openpyxl import Workbook
    from openpyxl.cell import WriteOnlyCell
    from openpyxl.cell.cell import ILLEGAL_CHARACTERS_RE

    if len(df) + 1 > XLSX_MAX_ROWS:
        raise OutputError(f"{len(df)} rows do not fit one .xlsx sheet ({XLSX_MAX_ROWS - 1} at most); set "
                          "output.xlsx = false and use the CSV", path=path, key="output.xlsx")
    book = Workbook(write_only=True)
    ws = book.create_sheet(title=sheet[:31])

    def cell(value: Any) -> Any:
        if isinstance(value, str):
            c = WriteOnlyCell(ws, value=ILLEGAL_CHARACTERS_RE.sub("\ufffd", value))
            c.data_type = "s"  # text, even where it starts with "=": openpyxl would take that as a formula
            return c
        if value is None or value is pd.NA or (isinstance(value, float) and value != value):
            return None
        return value

    ws.append([cell(str(c)) for c in df.columns])
    for row in zip(*(df[c].tolist() for c in df.columns)):
        ws.append([cell(v) for v in row])
    book.save(path)


def write_text(path: Path, text: str) -> None:
    """UTF-8 text."""
    path.write_text(text, encoding="utf-8")


def write_json(path: Path, data: Mapping[str, Any]) -> None:
    """Indented JSON, keys in insertion order."""
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(data, fh, indent=2, default=str)
        fh.write("\n")
        fh.flush()
        os.fsync(fh.fileno())
