"""PostgreSQL/PostGIS: layers read from a table, view or query, and results published into a schema.

Both go through the PostgreSQL ADBC driver (``pip install 'geopress[postgis]'``), which moves rows
as Arrow over PostgreSQL's binary COPY: reading, the geometries come as WKB (``ST_AsBinary``)
into the same path as a file's (:func:`geopress.io.vector.read_layer`); publishing, each layer's
Arrow table is copied into a new table, its geometries sent as WKB, which PostGIS takes as the
column's binary input.

Connections are libpq's: a connection string or URI, credentials from PGPASSWORD, ``~/.pgpass``
or a service file. A connection string is shown only through :func:`geopress.config.redact_dsn`.

Publication (:class:`Publication`) is atomic. The run holds a session-level advisory lock keyed
to the target schema for as long as it runs, so a second run into the same schema stops at once.
Every layer is built under a temporary name (``<layer>__geopress_new``) in the target schema, so
the schema's default privileges apply to it, inside one transaction that then drops the
previous layers, renames the new ones into place and adds the run's row to ``geopress_runs``,
and commits: a reader sees the previous complete generation or the new one, and a failure at
any point rolls everything back, leaving the previous layers as they were.
"""

from __future__ import annotations

import logging
import re
import time
from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

import geopandas as gpd
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import shapely
from pyproj import CRS
from pyproj.exceptions import CRSError

from ..config import DatabaseSource, redact_dsn
from ..errors import InputError, LockError, MissingExtraError, OutputError

log = logging.getLogger(__name__)

#: the first key of the advisory lock a publishing run holds (the second is the schema's hashtext):
#: "geop" in ASCII, so that other applications' locks on the same database do not collide with it
LOCK_CLASS = 0x67656F70
#: suffix of the tables and views a publication builds before they take the published names
NEW = "__geopress_new"
#: the table of one row per published run (the run.json content as JSONB)
RUNS_TABLE = "geopress_runs"
#: how long the swap waits for a reader's lock on a published table before it lets go and tries again, and
#: how often: short, so that a reader waiting behind the swap is never held long, and below PostgreSQL's
#: deadlock_timeout (1 s by default), so a reader that locks tables in another order is never aborted
SWAP_LOCK_TIMEOUT_MS = 500
SWAP_TRIES = 40
#: PostgreSQL's memory for building each index in the publishing transaction, above its default of 64 MB
#: for the indexes of a million customers; a setting any role may make for its own transaction
INDEX_MEMORY = "256MB"


def _driver():
    try:
        import adbc_driver_postgresql.dbapi as dbapi
    except ImportError as exc:
        raise MissingExtraError("reading or publishing to PostgreSQL needs the PostgreSQL ADBC driver; install it "
                                "with pip install 'geopress[postgis]'", key="database") from exc
    return dbapi


def _message(exc: BaseException) -> str:
    """The server's or libpq's one-line reason in a driver error, with any password taken out."""
    text = str(exc)
    m = re.search(r"ERROR:\s+(.*)", text)
    if m:
        line = m.group(1)
    else:
        lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
        line = lines[0] if lines else type(exc).__name__
        line = re.sub(r"^[A-Z_]+: (\[libpq\] )?", "", line)
        line = re.sub(r"^Failed to connect: ", "", line)
    return redact_dsn(line.strip())


def sqlstate(exc: BaseException) -> str | None:
    """The SQLSTATE code of a driver error (e.g. 42P01, undefined table), when the server sent one."""
    return getattr(exc, "sqlstate", None)


#: how a run's sessions show in pg_stat_activity, unless the connection string names itself
APPLICATION_NAME = "geopress"


def with_application_name(dsn: str) -> str:
    """``dsn`` with libpq's ``fallback_application_name``, so a DBA sees which sessions are geopress's."""
    if re.match(r"(?i)postgres(ql)?://", dsn):
        return f"{dsn}{'&' if '?' in dsn else '?'}fallback_application_name={APPLICATION_NAME}"
    return f"{dsn} fallback_application_name={APPLICATION_NAME}"


def connect(dsn: str, key: str, error: type = InputError, *, autocommit: bool = False):
    """An ADBC connection to ``dsn`` (in a transaction unless ``autocommit``); ``error`` naming ``key`` when it
    cannot connect."""
    dbapi = _driver()
    try:
        return dbapi.connect(with_application_name(dsn), autocommit=autocommit)
    except dbapi.Error as exc:
        raise error(f"cannot connect to database '{redact_dsn(dsn)}' ({_message(exc)}); check {key}, that the "
                    "server runs, and the role's credentials in ~/.pgpass, the service file or PGPASSWORD",
                    key=key) from None  # the driver's text may hold the connection string


def quote(name: str) -> str:
    """An SQL identifier in double quotes."""
    return '"' + name.replace('"', '""') + '"'


def qualified(name: str) -> str:
    """``schema.table`` or ``table`` as quoted identifiers (a dot splits the schema off; quote none in the config)."""
    return ".".join(quote(part) for part in name.split(".", 1))


def _literal(value: str | bool) -> str:
    """An SQL literal: text quoted, a boolean (a finding's column) as TRUE or FALSE."""
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    return "'" + value.replace("'", "''") + "'"


def _fetch(cur, sql: str) -> pa.Table:
    cur.execute(sql)
    return cur.fetch_arrow_table()


# --------------------------------------------------------------------------
# reading


@dataclass
class DbLayer:
    """A layer read from a database: attributes (Arrow, in the source's column order), WKB, CRS."""

    table: pa.Table
    wkb: pa.ChunkedArray
    crs: CRS
    #: where it came from, for messages: the table (or "query") and the database, without a password
    where: str
    name: str


def _source_sql(src: DatabaseSource) -> str:
    return qualified(src.table) if src.table else f"({src.query.strip().rstrip(';')}) AS geopress_query"


def _probe(cur, src: DatabaseSource, key: str) -> pa.Schema:
    """The source's columns (no rows): errors say what to fix of ``key``'s table or query."""
    try:
        return _fetch(cur, f"SELECT * FROM {_source_sql(src)} LIMIT 0").schema
    except Exception as exc:
        state = sqlstate(exc)
        if src.table and state == "42P01":
            raise InputError(f"no table or view {src.table} in database '{redact_dsn(src.database)}' (from "
                             f"{key}.table); check the name, as schema.name", key=f"{key}.table") from None
        if state == "42501":
            what = f"{key}.table" if src.table else f"{key}.query"
            raise InputError(f"{_message(exc)} (from {what}); GRANT SELECT on it to the role geopress connects as",
                             key=what) from None
        what = f"{key}.table" if src.table else f"{key}.query"
        raise InputError(f"{what} fails in database '{redact_dsn(src.database)}': {_message(exc)}; fix it",
                         key=what) from None


def _crs_of(cur, srids: set[int], where: str, key: str) -> CRS:
    """The CRS of the one SRID the geometries have; InputError naming ``key`` for none, several or an unknown one."""
    if not srids:
        raise InputError(f"{where}: no feature has a geometry in {key}.geometry_column", key=f"{key}.geometry_column")
    if 0 in srids:
        raise InputError(f"{where}: geometries in {key}.geometry_column have no SRID (0); set it, e.g. with "
                         "UpdateGeometrySRID or ST_SetSRID in the query", key=f"{key}.geometry_column")
    if len(srids) > 1:
        raise InputError(f"{where}: geometries in {key}.geometry_column have several SRIDs ({sorted(srids)}); "
                         "transform them to one with ST_Transform", key=f"{key}.geometry_column")
    (srid,) = srids
    found = _fetch(cur, f"SELECT auth_name, auth_srid, srtext FROM spatial_ref_sys WHERE srid = {int(srid)}").to_pylist()
    if not found:
        raise InputError(f"{where}: SRID {srid} of {key}.geometry_column is not in spatial_ref_sys; set the SRID of "
                         "the geometries' real CRS (an EPSG code)", key=f"{key}.geometry_column")
    row = found[0]
    try:
        if row["auth_name"] and row["auth_srid"]:
            return CRS.from_user_input(f"{row['auth_name']}:{row['auth_srid']}")
        return CRS.from_wkt(row["srtext"])
    except CRSError:
        raise InputError(f"{where}: SRID {srid} of {key}.geometry_column is not a CRS PROJ knows; set the SRID of "
                         "the geometries' real CRS (an EPSG code)", key=f"{key}.geometry_column") from None


def _checked_columns(schema: pa.Schema, src: DatabaseSource, wanted: Mapping[str, str], where: str,
                     key: str) -> None:
    have = schema.names
    geometry = src.geometry_column
    if geometry not in have:
        raise InputError(f"{where}: no column '{geometry}' (from {key}.geometry_column); columns there: "
                         f"{', '.join(have[:20])}", key=f"{key}.geometry_column")
    typname = (schema.field(geometry).metadata or {}).get(b"ADBC:postgresql:typname", b"").decode()
    if typname != "geometry":
        raise InputError(f"{where}: column '{geometry}' (from {key}.geometry_column) is {typname or 'not'} a "
                         "PostGIS geometry; name the geometry column", key=f"{key}.geometry_column")
    for config_key, name in wanted.items():
        if name not in have:
            raise InputError(f"{where}: no field '{name}' (from {config_key}); fields there: "
                             f"{', '.join(n for n in have[:20] if n != geometry)}", key=config_key)


def source_crs(src: DatabaseSource, key: str) -> CRS:
    """The CRS of the source's geometries, from the first that has one (the read checks them all)."""
    with connect(src.database, f"{key}.database") as con, con.cursor() as cur:
        where = src.describe()
        _checked_columns(_probe(cur, src, key), src, {}, where, key)
        g = quote(src.geometry_column)
        got = _fetch(cur, f"SELECT ST_SRID({g}) AS srid FROM {_source_sql(src)} WHERE {g} IS NOT NULL LIMIT 1")
        return _crs_of(cur, set(got["srid"].to_pylist()), where, key)


def read_source(src: DatabaseSource, key: str, wanted: Mapping[str, str], *,
                count: Callable[[int, int | None], None] | None = None, columns: Sequence[str] | None = None
                ) -> DbLayer:
    """Read the fields ``wanted`` (``{config key: column}``; only ``columns`` of them when given, all checked
    to exist) and the geometries of ``key``'s source.

    The columns come in the source's order (as a file's are read); the geometries as WKB, with
    every SRID checked to be one and known. Errors are InputErrors naming the key to fix.
    """
    where = src.describe()
    with connect(src.database, f"{key}.database") as con, con.cursor() as cur:
        schema = _probe(cur, src, key)
        _checked_columns(schema, src, wanted, where, key)
        read = set(wanted.values() if columns is None else columns)
        names = [n for n in schema.names if n in read and n != src.geometry_column]
        g = quote(src.geometry_column)
        select = ", ".join([*(quote(n) for n in names), f"ST_AsBinary({g}) AS geopress_wkb",
                            f"ST_SRID({g}) AS geopress_srid"])
        try:
            cur.execute(f"SELECT {select} FROM {_source_sql(src)}")
            reader = cur.fetch_record_batch()
            batches, done = [], 0
            for batch in reader:
                batches.append(batch)
                done += batch.num_rows
                if count is not None:
                    count(done, None)
            table = pa.Table.from_batches(batches, schema=reader.schema)
        except Exception as exc:
            raise InputError(f"{where}: reading it fails: {_message(exc)}; check {key}", key=key) from None
        srids = set(pc.unique(table["geopress_srid"].drop_null()).to_pylist())
        crs = _crs_of(cur, srids, where, key) if table.num_rows else CRS.from_epsg(4326)
    wkb = table["geopress_wkb"]
    table = table.drop_columns(["geopress_wkb", "geopress_srid"])
    # the driver's field metadata (PostgreSQL type names) is no part of the data
    table = table.replace_schema_metadata(None).cast(pa.schema([pa.field(f.name, f.type) for f in table.schema]))
    log.info("read %d rows from %s", table.num_rows, where)
    return DbLayer(table=table, wkb=wkb, crs=crs, where=where, name=src.table or "query")


# --------------------------------------------------------------------------
# publishing


#: PostgreSQL column types of Arrow types
_TYPES: tuple[tuple[Callable[[pa.DataType], bool], str], ...] = (
    (pa.types.is_boolean, "boolean"),
    (lambda t: pa.types.is_int8(t) or pa.types.is_int16(t) or pa.types.is_uint8(t), "smallint"),
    (lambda t: pa.types.is_int32(t) or pa.types.is_uint16(t), "integer"),
    (lambda t: pa.types.is_int64(t) or pa.types.is_uint32(t), "bigint"),
    (pa.types.is_float32, "real"),
    (pa.types.is_float64, "double precision"),
    (lambda t: pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_null(t), "text"),
)


def _sql_type(field: pa.Field, layer: str) -> str:
    for test, name in _TYPES:
        if test(field.type):
            return name
    raise OutputError(f"layer '{layer}': field '{field.name}' of type {field.type} has no PostgreSQL column type "
                      "here; report this", key="output.database")


def _plain_types(table: pa.Table) -> pa.Table:
    """Text for dictionary (categorical) and null columns, which COPY takes as text."""
    for i, f in enumerate(table.schema):
        if pa.types.is_dictionary(f.type) or pa.types.is_null(f.type) or pa.types.is_string_view(f.type):
            table = table.set_column(i, f.name, table.column(i).cast(pa.large_string()))
    return table


@dataclass(frozen=True)
class Table:
    """A layer to publish as a table: ``data`` (Arrow; its geometry column as WKB) with ``geometry`` the name
    of that column (None for a table without geometry), ``kind`` its PostGIS geometry type and ``srid``,
    and the columns to index (besides the geometry's GiST index) and the primary key."""

    data: pa.Table
    geometry: str | None = None
    kind: str = "Geometry"
    srid: int = 0
    indexes: tuple[str, ...] = ()
    key: str | None = None


@dataclass(frozen=True)
class View:
    """A layer to publish as a view of the published table ``of``: its rows whose ``column`` is in ``values``."""

    of: str
    column: str
    values: tuple[str | bool, ...]


def srid_of(crs: Any) -> int:
    """The EPSG code PostGIS takes as the SRID of ``crs``; OutputError when it has none."""
    code = None if crs is None else CRS.from_user_input(crs).to_epsg()
    if not code:
        raise OutputError("the customers' CRS has no EPSG code, which PostGIS needs as the SRID of the published "
                          "layers; reproject the customers to a CRS with one", key="output.database")
    return int(code)


def geo_table(frame: gpd.GeoDataFrame, *, kind: str = "Geometry", indexes: tuple[str, ...] = (),
              key: str | None = None) -> Table:
    """A GeoDataFrame as a :class:`Table`, its geometries as WKB."""
    geometry = frame.geometry.name
    attributes = pa.Table.from_pandas(pd.DataFrame(frame.drop(columns=geometry)), preserve_index=False)
    wkb = pa.array(shapely.to_wkb(frame.geometry.to_numpy()), type=pa.binary())
    data = attributes.add_column(frame.columns.get_loc(geometry), geometry, wkb)
    return Table(data=data, geometry=geometry, kind=kind, srid=srid_of(frame.crs), indexes=indexes, key=key)


def encoded_table(frame: pd.DataFrame, wkb: pa.Array | pa.ChunkedArray, crs: Any, *, kind: str = "Geometry",
                  indexes: tuple[str, ...] = (), key: str | None = None) -> Table:
    """Attributes ``frame`` and their geometries already encoded, ``wkb`` in ``crs``, as a :class:`Table` whose
    last column is the geometry, ``geometry``."""
    data = pa.Table.from_pandas(frame, preserve_index=False).append_column("geometry", wkb)
    return Table(data=data, geometry="geometry", kind=kind, srid=srid_of(crs), indexes=indexes, key=key)


def plain_table(frame: pd.DataFrame) -> Table:
    """A frame without geometry (the zone summary) as a :class:`Table`."""
    return Table(data=pa.Table.from_pandas(pd.DataFrame(frame), preserve_index=False))


class Publication:
    """The run's hold on the target ``schema`` of ``dsn``: the advisory lock from :meth:`__enter__` to
    :meth:`__exit__`, the previous run's customers (:meth:`previous`), and the new generation's layers
    built (:meth:`build`) and swapped into place with the run's row (:meth:`swap`) in one transaction."""

    def __init__(self, dsn: str, schema: str):
        self.dsn = dsn
        self.schema = schema
        self.where = f"schema {schema} of database '{redact_dsn(dsn)}'"
        self._lock = None
        self._con = None
        self._built: list[str] = []
        #: what :meth:`swap` renames: (TABLE, VIEW or INDEX, built name, published name)
        self._renames: list[tuple[str, str, str]] = []

    # -- the lock ------------------------------------------------------------
    def __enter__(self) -> "Publication":
        # no transaction: the session holds the lock, and an idle transaction would hold back VACUUM
        con = connect(self.dsn, "output.database", OutputError, autocommit=True)
        try:
            with con.cursor() as cur:
                got = _fetch(cur, f"SELECT pg_try_advisory_lock({LOCK_CLASS}, hashtext({_literal(self.schema)})) "
                                  "AS got, has_schema_privilege(n.oid, 'CREATE') AS can FROM (SELECT 1) AS one "
                                  f"LEFT JOIN pg_namespace n ON n.nspname = {_literal(self.schema)}").to_pylist()[0]
            if not got["got"]:
                raise LockError(f"another geopress run is publishing into {self.where}; wait for it to finish",
                                key="output.schema")
            if got["can"] is None:
                raise OutputError(f"{self.where} does not exist; create it (CREATE SCHEMA {quote(self.schema)}) "
                                  "and grant CREATE on it to the role geopress connects as", key="output.schema")
            if not got["can"]:
                raise OutputError(f"the role geopress connects as may not create tables in {self.where}; "
                                  f"GRANT CREATE ON SCHEMA {quote(self.schema)} to it", key="output.schema")
        except BaseException:
            con.close()  # ends the session, and its lock
            raise
        self._lock = con
        return self

    def __exit__(self, *exc: Any) -> None:
        self.discard()
        if self._lock is not None:
            self._lock.close()  # a session's advisory locks end with it
            self._lock = None

    # -- the baseline ----------------------------------------------------------
    def previous(self, id_field: str, columns: Sequence[str]) -> pd.DataFrame | None:
        """The published customers' ``id_field``, ``status`` and those of ``columns`` they have (no geometry:
        :meth:`previous_rows` gives it for the rows that need it); None when no run has published here yet."""
        with connect(self.dsn, "output.database", OutputError) as con, con.cursor() as cur:
            have = _fetch(cur, "SELECT a.attname AS name FROM pg_attribute a JOIN pg_class c ON c.oid = a.attrelid "
                               "JOIN pg_namespace n ON n.oid = c.relnamespace WHERE n.nspname = "
                               f"{_literal(self.schema)} AND c.relname = 'customers' AND a.attnum > 0 "
                               "AND NOT a.attisdropped ORDER BY a.attnum")["name"].to_pylist()
            if not have:
                return None
            for needed in (id_field, "status"):
                if needed not in have:
                    raise InputError(f"{self.where}: the published customers have no field '{needed}', so this run "
                                     "cannot be compared with them; drop that table to start a fresh history",
                                     key="output.schema")
            names = [c for c in dict.fromkeys([id_field, "status", *columns]) if c in have and c != "geometry"]
            table = _fetch(cur, f"SELECT {', '.join(quote(c) for c in names)} FROM {quote(self.schema)}.customers")
        return table.to_pandas()

    def previous_rows(self, id_field: str, ids: pd.Series, columns: Sequence[str], crs: CRS) -> gpd.GeoDataFrame:
        """The published customers whose ``id_field`` is in ``ids`` (in that order) with ``columns`` and their
        geometry in ``crs``: the ids go to a temporary table by binary COPY, joined to the customers."""
        select = ", ".join(f"c.{quote(c)}" for c in columns)
        with connect(self.dsn, "output.database", OutputError) as con, con.cursor() as cur:
            key = quote(id_field)
            cur.execute(f"CREATE TEMPORARY TABLE geopress_wanted AS SELECT {key} FROM {quote(self.schema)}.customers "
                        "WITH NO DATA")
            cur.adbc_ingest("geopress_wanted", pa.Table.from_pandas(pd.DataFrame({id_field: ids}),
                                                                    preserve_index=False),
                            mode="append", temporary=True)
            table = _fetch(cur, f"SELECT {select}, ST_AsBinary(c.geometry) AS geopress_wkb FROM "
                                f"{quote(self.schema)}.customers c JOIN geopress_wanted w USING ({key})")
            con.rollback()  # the temporary table goes with it
        frame = table.drop_columns(["geopress_wkb"]).to_pandas()
        geometry = shapely.from_wkb(table["geopress_wkb"].to_numpy(zero_copy_only=False))
        got = gpd.GeoDataFrame(frame, geometry=gpd.GeoSeries(geometry, crs=crs))
        order = pd.Index(got[id_field]).get_indexer(ids)
        if (order < 0).any():
            raise InputError(f"{self.where}: the published customers changed while this run read them; run again",
                             key="output.schema")
        return got.iloc[order].reset_index(drop=True)

    # -- the new generation -------------------------------------------------------
    def build(self, layers: Mapping[str, Table | View]) -> dict[str, float]:
        """Open the publishing transaction and build every layer in it under its temporary name, indexes
        after the rows; the seconds each took. Nothing is visible to others until :meth:`swap`."""
        self._con = connect(self.dsn, "output.database", OutputError)
        seconds = {}
        try:
            with self._con.cursor() as cur:
                cur.execute(f"SET LOCAL maintenance_work_mem = {_literal(INDEX_MEMORY)}")
                for name, layer in layers.items():
                    t0 = time.perf_counter()
                    if isinstance(layer, View):
                        self._create_view(cur, name, layer)
                    else:
                        self._create_table(cur, name, layer)
                    self._built.append(name)
                    self._renames.append(("VIEW" if isinstance(layer, View) else "TABLE", name + NEW, name))
                    seconds[name] = round(time.perf_counter() - t0, 4)
        except OutputError:
            self.discard()
            raise
        except Exception as exc:
            self.discard()
            raise OutputError(f"cannot publish into {self.where} ({_message(exc)}); the published layers are "
                              "unchanged", key="output.schema") from None
        return seconds

    def _name(self, name: str) -> str:
        return f"{quote(self.schema)}.{quote(name + NEW)}"

    def _create_table(self, cur, name: str, layer: Table) -> None:
        data = _plain_types(layer.data)
        columns = []
        for f in data.schema:
            if f.name == layer.geometry:
                columns.append(f"{quote(f.name)} geometry({layer.kind}, {layer.srid})")
            else:
                columns.append(f"{quote(f.name)} {_sql_type(f, name)}")
        cur.execute(f"DROP TABLE IF EXISTS {self._name(name)}")
        cur.execute(f"CREATE TABLE {self._name(name)} ({', '.join(columns)})")
        if data.num_rows:
            # binary COPY; the WKB goes to the geometry column's binary input
            cur.adbc_ingest(name + NEW, data, mode="append", db_schema_name=self.schema)
        if layer.key:  # renaming its index renames the constraint too
            cur.execute(f"ALTER TABLE {self._name(name)} ADD CONSTRAINT {quote(name + NEW + '_pkey')} "
                        f"PRIMARY KEY ({quote(layer.key)})")
            self._renames.append(("INDEX", name + NEW + "_pkey", name + "_pkey"))
        if layer.geometry:
            cur.execute(f"CREATE INDEX {quote(name + NEW + '_geom_idx')} ON {self._name(name)} "
                        f"USING gist ({quote(layer.geometry)})")
            self._renames.append(("INDEX", name + NEW + "_geom_idx", name + "_geom_idx"))
        for i, column in enumerate(layer.indexes):
            # numbered, not named after the column: a long field name would pass PostgreSQL's 63 bytes
            cur.execute(f"CREATE INDEX {quote(f'{name}{NEW}_{i}_idx')} ON {self._name(name)} ({quote(column)})")
            self._renames.append(("INDEX", f"{name}{NEW}_{i}_idx", f"{name}_{i}_idx"))
        cur.execute(f"ANALYZE {self._name(name)}")

    def _create_view(self, cur, name: str, view: View) -> None:
        values = ", ".join(_literal(v) for v in view.values)
        cur.execute(f"CREATE VIEW {self._name(name)} AS SELECT * FROM {self._name(view.of)} "
                    f"WHERE {quote(view.column)} IN ({values})")

    def swap(self, info: Mapping[str, Any], known: Sequence[str]) -> None:
        """Replace the published layers with the built ones, drop those of ``known`` (every layer a run can
        publish) this generation lacks, add the run's row to ``geopress_runs``, and commit."""
        import json

        s = quote(self.schema)
        try:
            with self._con.cursor() as cur:
                cur.execute(f"CREATE TABLE IF NOT EXISTS {s}.{RUNS_TABLE} (run bigint GENERATED ALWAYS AS IDENTITY "
                            "PRIMARY KEY, published timestamp with time zone NOT NULL DEFAULT now(), "
                            "info jsonb NOT NULL)")
                names = list(dict.fromkeys([*known, *self._built]))
                kinds = {r["relname"]: r["relkind"] for r in _fetch(
                    cur, "SELECT c.relname, c.relkind::text AS relkind FROM pg_class c JOIN pg_namespace n ON "
                         f"n.oid = c.relnamespace WHERE n.nspname = {_literal(self.schema)} AND c.relname IN "
                         f"({', '.join(_literal(n) for n in names)})").to_pylist()}
                self._lock_published(cur, [n for n in names if n in kinds])
                # views first: they depend on the tables
                for name in sorted((n for n in names if n in kinds), key=lambda n: kinds[n] != "v"):
                    cur.execute(f"DROP {'VIEW' if kinds[name] == 'v' else 'TABLE'} {s}.{quote(name)}")
                for kind, new, final in self._renames:
                    cur.execute(f"ALTER {kind} {s}.{quote(new)} RENAME TO {quote(final)}")
                cur.execute(f"INSERT INTO {s}.{RUNS_TABLE} (info) VALUES "
                            f"({_literal(json.dumps(info, default=str))}::jsonb)")
            self._con.commit()
        except Exception as exc:
            self.discard()
            raise OutputError(f"cannot publish into {self.where} ({_message(exc)}); the published layers are "
                              "unchanged", key="output.schema") from None
        self._con.close()
        self._con = None
        self._built.clear()
        self._renames.clear()

    def _lock_published(self, cur, names: Sequence[str]) -> None:
        """Take the published relations ``names`` for the swap, waiting at most SWAP_LOCK_TIMEOUT_MS at a time
        for readers and letting go of all of them between tries (a PL/pgSQL block: a failed try rolls back
        its own subtransaction only, not the publishing transaction)."""
        if not names:
            return
        relations = ", ".join(f"{quote(self.schema)}.{quote(n)}" for n in names)
        cur.execute(f"""DO $geopress$ BEGIN
            PERFORM set_config('lock_timeout', '{SWAP_LOCK_TIMEOUT_MS}', true);
            FOR attempt IN 1..{SWAP_TRIES} LOOP
                BEGIN
                    LOCK TABLE {relations} IN ACCESS EXCLUSIVE MODE;
                    RETURN;
                EXCEPTION WHEN lock_not_available THEN
                    RAISE NOTICE 'geopress: a reader holds a published layer; trying again';
                    PERFORM pg_sleep(0.05);
                END;
            END LOOP;
            RAISE EXCEPTION 'readers held the published layers through % tries; try the run again later',
                {SWAP_TRIES} USING ERRCODE = 'lock_not_available';
        END $geopress$""")

    def discard(self) -> None:
        """Roll the publishing transaction back (nothing of it stays) and close its connection."""
        if self._con is not None:
            try:
                self._con.rollback()
            except Exception:  # a broken connection rolls back by itself on the server
                log.debug("rollback failed", exc_info=True)
            self._con.close()
            self._con = None
        self._built.clear()
        self._renames.clear()
