"""Reading the customers, zones and field-readings layers with pyogrio.

Errors name the file, the layer and the field, and say what to do.
"""

from __future__ import annotations

import logging
import os
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import geopandas as gpd
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyogrio
import shapely
from pyproj import CRS

from ..config import CustomersConfig, ReadingsConfig, ZonesConfig
from ..errors import ConfigError, GeometryWarning, InputError
from ..zones import repair

log = logging.getLogger(__name__)

_POINTLIKE = {"Point", "MultiPoint"}
_POLYGONAL = {"Polygon", "MultiPolygon"}


def _fmt_list(items, limit: int = 8) -> str:
    items = [str(i) for i in items]
    more = f" (+{len(items) - limit} more)" if len(items) > limit else ""
    return ", ".join(items[:limit]) + more


def has_duplicates(values: pd.Series) -> bool:
    """Whether a value occurs more than once in ``values``, missing values counting as one value
    (as pandas' ``duplicated`` counts them).

    The values are sorted and each compared with the next, which takes far less new memory than
    counting them in a hash table (pandas' ``nunique``); scripts/README.md has the measurement.
    """
    arr = pa.Array.from_pandas(values)
    if arr.null_count > 1:
        return True
    if len(arr) < 2:
        return False
    ordered = arr.take(pc.sort_indices(arr))
    return bool(pc.any(pc.equal(ordered.slice(1), ordered.slice(0, len(ordered) - 1))).as_py())


def resolve_layer(path: Path, layer: str | None, key: str) -> str:
    """The layer to read: ``layer`` checked against the file, or its only layer."""
    if not path.exists():
        raise InputError(f"file not found (from {key}.path); check the path", path=path, key=f"{key}.path")
    if not os.access(path, os.R_OK):
        raise InputError(f"cannot read the file (from {key}.path); check its permissions", path=path, key=f"{key}.path")
    try:
        layers = pyogrio.list_layers(path)
    except Exception as exc:  # pyogrio raises DataSourceError and friends
        if path.is_dir():
            raise InputError(f"is a folder GDAL cannot open as vector data; point {key}.path at the data file",
                             path=path, key=f"{key}.path") from exc
        raise InputError(
            f"not a vector dataset GDAL can open ({str(exc).splitlines()[0]}); check {key}.path", path=path, key=f"{key}.path"
        ) from exc
    names = [str(n) for n in layers[:, 0]]
    if layer is None:
        if len(names) != 1:
            raise InputError(
                f"has {len(names)} layers ({_fmt_list(names)}); set {key}.layer to one of them", path=path, key=f"{key}.layer"
            )
        return names[0]
    if layer not in names:
        raise InputError(
            f"no layer '{layer}' (from {key}.layer); layers there: {_fmt_list(names)}", path=path, key=f"{key}.layer"
        )
    return layer


def layer_info(path: Path, layer: str) -> dict:
    """pyogrio's layer info, errors translated."""
    try:
        return pyogrio.read_info(path, layer=layer)
    except Exception as exc:
        raise InputError(f"cannot read layer '{layer}': {str(exc).splitlines()[0]}", path=path) from exc


#: how Arrow text becomes pandas text: as pyogrio.read_dataframe does, pandas' own string dtype (so text
#: stays Arrow-backed, no Python string per row)
_TEXT = {pa.string(): pd.StringDtype(na_value=np.nan), pa.large_string(): pd.StringDtype(na_value=np.nan)}.get


#: the features read in one Arrow batch (pyogrio's default)
READ_BATCH_ROWS = 65_536
#: the most bytes (values and offsets) one chunk of Arrow's ``string`` or ``binary`` can hold: its offsets are 32-bit
ONE_CHUNK_BYTES = 2**31 - 1


def _one_chunk(column: pa.ChunkedArray) -> pa.ChunkedArray:
    """``column`` in one chunk; text beyond :data:`ONE_CHUNK_BYTES` as ``large_string``, anything else that large
    as it is.

    Columns come as read, one chunk per batch, and pandas takes rows of an Arrow column with Arrow's ``take``,
    which first joins all its chunks: a copy of the whole column for every take, of no rows too, and a run takes
    rows of the customers' text for every list (scripts/README.md has what it cost). The WKB is joined too: a
    batch's buffers are freed only once none of its columns is left, so keeping it in batches would keep the
    text's batches as well.
    """
    if column.num_chunks <= 1:
        return column
    if column.nbytes > ONE_CHUNK_BYTES:
        if not pa.types.is_string(column.type):
            return column
        column = column.cast(pa.large_string())
    return pa.chunked_array([column.combine_chunks()], type=column.type)


def _pandas(table: pa.Table) -> pd.DataFrame:
    """``table`` as pandas, its text as Arrow-backed strings in one chunk each (:func:`_one_chunk`)."""
    columns = [_one_chunk(c) if _TEXT(c.type) is not None else c for c in table.columns]
    return pa.Table.from_arrays(columns, names=table.column_names).to_pandas(types_mapper=_TEXT)


def read_layer(path: Path, layer: str, columns: list[str], *, count: Callable[[int, int | None], None] | None = None,
               total: int | None = None, geometry: bool = True) -> tuple[pd.DataFrame, pa.ChunkedArray]:
    """The ``columns`` and geometry of a layer, errors translated, and its geometries as the file's WKB.

    The same frame as ``pyogrio.read_dataframe(use_arrow=True)``, made without
    a Python bytes object per row: the WKB goes straight from Arrow to
    shapely, and is returned too, so that a writer can pass unchanged
    geometries through instead of encoding them again. With ``geometry=False``
    the frame has the attributes only, and the WKB is left as it is. The features are read
    in Arrow batches, as ``pyogrio.read_arrow`` reads them, and ``count(done,
    total)`` is told the features read after each.
    """
    try:
        with pyogrio.open_arrow(path, layer=layer, columns=columns, use_pyarrow=True,
                                batch_size=READ_BATCH_ROWS) as (meta, reader):
            batches, done = [], 0
            for batch in reader:
                batches.append(batch)
                done += len(batch)
                if count is not None:
                    count(done, total)
            table = pa.Table.from_batches(batches, schema=reader.schema)
        name = meta["geometry_name"] or "wkb_geometry"
        if name not in table.column_names:
            raise InputError(f"layer '{layer}' has no geometry; it must hold points or polygons", path=path, key="geometry")
        wkb = _one_chunk(table[name])
        frame = (_frame(table.drop_columns([name]), wkb, meta["crs"]) if geometry
                 else _pandas(table.drop_columns([name])))
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"cannot read layer '{layer}': {str(exc).splitlines()[0]}", path=path) from exc
    return frame, wkb


def _frame(attributes: pa.Table, wkb: pa.ChunkedArray, crs) -> gpd.GeoDataFrame:
    """A layer's attributes (Arrow) and its WKB as a GeoDataFrame, as :func:`read_layer` gives it."""
    geometry = shapely.from_wkb(wkb.to_numpy(zero_copy_only=False))
    return gpd.GeoDataFrame(_pandas(attributes), geometry=gpd.GeoSeries(geometry, crs=crs))


def _read_database(src, key: str, wanted: dict[str, str], count=None, columns: list[str] | None = None,
                   geometry: bool = True) -> tuple[pd.DataFrame, pa.ChunkedArray, CRS, str, str]:
    """A layer from a database (:mod:`geopress.io.postgis`), its ``wanted`` fields checked and its ``columns``
    read: the frame (with its geometries unless not ``geometry``, as :func:`read_layer`), its WKB, its CRS, its
    name, and where it is."""
    from . import postgis

    got = postgis.read_source(src, key, wanted, count=count, columns=columns)
    frame = _frame(got.table, got.wkb, got.crs) if geometry else _pandas(got.table)
    return frame, _one_chunk(got.wkb), got.crs, got.name, got.where


def check_fields(path: Path, layer: str, info: dict, wanted: dict[str, str]) -> None:
    """Every configured field (``{config key: field}``) exists in the layer."""
    have = [str(f) for f in info["fields"]]
    for key, name in wanted.items():
        if name not in have:
            raise InputError(
                f"layer '{layer}' has no field '{name}' (from {key}); fields there: {_fmt_list(have, 20)}",
                path=path,
                key=key,
            )


def _crs(path: Path, layer: str, info_crs: str | None) -> CRS:
    if not info_crs:
        raise InputError(
            f"layer '{layer}' has no CRS; assign one (e.g. with ogr2ogr -a_srs) and run again", path=path, key="crs"
        )
    return CRS.from_user_input(info_crs)


@dataclass
class Customers:
    """The customers layer reduced to what a run needs.

    ``frame`` has the id field, mail and letter fields and floors (pandas' nullable
    Int64, so the layer written keeps an integer field; missing where unknown), and
    no geometry: each customer's point in the layer's CRS is ``x``/``y`` (a polygon's
    point on its surface; NaN where there is no usable geometry, and ``has_geometry``
    False). ``wkb`` is the points as WKB (null where there is none): the file's own
    bytes when they are exactly these points (every one a 2D point or missing), for
    writers to pass through, else encoded from ``x``/``y``.
    """

    frame: pd.DataFrame
    x: np.ndarray
    y: np.ndarray
    has_geometry: np.ndarray
    crs: CRS
    layer: str
    from_polygons: int
    no_geometry: int
    wkb: pa.ChunkedArray | pa.Array


def _located(path: Path, layer: str, info: dict, key: str) -> None:
    """An InputError when the layer has no geometry at all (a table of attributes, e.g. a CSV of accounts)."""
    if info.get("geometry_type") is None:
        hint = ("give it point columns (for a CSV, GDAL's open options X_POSSIBLE_NAMES and Y_POSSIBLE_NAMES, e.g. "
                "ogr2ogr -oo X_POSSIBLE_NAMES=lon -oo Y_POSSIBLE_NAMES=lat -a_srs EPSG:4326 customers.gpkg "
                "accounts.csv) or join the accounts to the parcels" if key == "customers"
                else "it must hold points" if key == "readings" else "it must hold polygons")
        raise InputError(f"layer '{layer}' (from {key}.path) has no geometry, only attributes; {hint}", path=path,
                         key=f"{key}.path")


def customers_crs(cfg: CustomersConfig) -> CRS:
    """The customers layer's CRS, from its metadata (an InputError when it has no geometry or no CRS)."""
    if cfg.database is not None:
        from . import postgis

        return postgis.source_crs(cfg.database, "customers")
    layer = resolve_layer(cfg.path, cfg.layer, "customers")
    info = layer_info(cfg.path, layer)
    _located(cfg.path, layer, info, "customers")
    return _crs(cfg.path, layer, info["crs"])


def read_customers(cfg: CustomersConfig, *, mail: bool = True,
                   count: Callable[[int, int | None], None] | None = None) -> Customers:
    """Read and check the customers layer; polygons become shapely's point_on_surface.

    With ``mail=False`` the mail and letter fields are checked to exist but not read
    (``geopress check`` needs only where the customers are). ``count(done, total)`` is told
    the features read as they are (see :func:`read_layer`).
    """
    wanted = {"customers.id_field": cfg.id_field}
    wanted.update({f"customers.mail_fields[{i}]": f for i, f in enumerate(cfg.mail_fields)})
    wanted.update({f"customers.letter_fields[{i}]": f for i, f in enumerate(cfg.letter_fields)})
    if cfg.floors_field:
        wanted["customers.floors_field"] = cfg.floors_field
    columns = list(dict.fromkeys([cfg.id_field, *(cfg.mail_fields if mail else ()),
                                  *([cfg.floors_field] if cfg.floors_field else []),
                                  *(cfg.letter_fields if mail else ())]))
    if cfg.database is not None:
        df, wkb, crs, layer, path = _read_database(cfg.database, "customers", wanted, count=count, columns=columns,
                                                   geometry=False)
    else:
        path = cfg.path
        layer = resolve_layer(path, cfg.layer, "customers")
        info = layer_info(path, layer)
        check_fields(path, layer, info, wanted)
        _located(path, layer, info, "customers")
        crs = _crs(path, layer, info["crs"])
        if info["features"] == 0:
            raise InputError(f"layer '{layer}' (from customers.layer) has no features; check the export that wrote it", path=path, key="customers.layer")
        df, wkb = read_layer(path, layer, columns, count=count, total=info["features"] if info["features"] >= 0 else None,
                             geometry=False)
    if len(df) == 0:
        raise InputError(f"layer '{layer}' (from customers.layer) has no features; check the export that wrote it", path=path, key="customers.layer")

    ids = df[cfg.id_field]
    if ids.isna().any():
        first = np.flatnonzero(ids.isna().to_numpy())[:5] + 1
        raise InputError(
            f"field '{cfg.id_field}' (customers.id_field) is empty in features {_fmt_list(first)}; give every customer an id",
            path=path,
            key="customers.id_field",
        )
    # finding the duplicates themselves hashes every id: only a layer that has some pays for it
    if has_duplicates(ids):
        dup = ids[ids.duplicated(keep=False)]
        raise InputError(
            f"field '{cfg.id_field}' (customers.id_field) has duplicate ids: {_fmt_list(pd.unique(dup))}; ids must be unique",
            path=path,
            key="customers.id_field",
        )

    floors = np.full(len(df), np.nan)
    if cfg.floors_field:
        raw = pd.to_numeric(df[cfg.floors_field], errors="coerce")
        bad_text = raw.isna() & df[cfg.floors_field].notna()
        vals = raw.to_numpy(dtype=np.float64)
        bad = bad_text.to_numpy() | (~np.isnan(vals) & ((vals < 1) | (vals != np.round(vals))))
        if bad.any():
            sample = ids[bad].head(5).tolist()
            raise InputError(
                f"field '{cfg.floors_field}' (customers.floors_field) must be a whole number of stories >= 1; customers {_fmt_list(sample)} "
                f"have {_fmt_list(df[cfg.floors_field][bad].head(5).tolist())}",
                path=path,
                key="customers.floors_field",
            )
        floors = vals

    located = _locate(wkb, ids, path, layer)
    if cfg.floors_field:
        # whole numbers (checked above) as a nullable integer column: written as an INTEGER field
        unknown = np.isnan(floors)
        df[cfg.floors_field] = pd.arrays.IntegerArray(np.where(unknown, 0, floors).astype(np.int64), unknown)
    missing = ~located.has
    if missing.any():
        warnings.warn(
            f"{path}: {int(missing.sum())} customers have no geometry (e.g. {_fmt_list(ids[missing].head(5).tolist())}); "
            "they get status no_geometry",
            GeometryWarning,
            stacklevel=2,
        )
    log.info("read %d customers from %s layer %s (%d polygons, %d without geometry)", len(df), path, layer,
             located.from_polygons, int(missing.sum()))
    return Customers(
        frame=df, x=located.x, y=located.y, has_geometry=located.has, crs=crs, layer=layer,
        from_polygons=located.from_polygons, no_geometry=int(missing.sum()),
        wkb=wkb if located.unchanged else points_wkb(located.x, located.y),
    )


#: features whose WKB is made into shapely geometries at a time: a customer is kept as its point's coordinates,
#: not as a shapely object (about 200 bytes each)
GEOMETRY_CHUNK = 262_144


@dataclass(frozen=True)
class _Located:
    """Each customer's point (``x``/``y``, NaN where ``has`` is False), how many came from polygons, and whether
    the file's WKB already holds exactly these points."""

    x: np.ndarray
    y: np.ndarray
    has: np.ndarray
    from_polygons: int
    unchanged: bool


def _plain_points(wkb: pa.ChunkedArray | pa.Array) -> tuple[np.ndarray, np.ndarray] | None:
    """``x``/``y`` (NaN where null) read straight from the bytes when every geometry is null or a little-endian 2D
    point (21 bytes: byte order 1, type 1, x, y, as OGC's WKB lays them out), as GDAL gives a point layer; None
    otherwise. No shapely object, nor a Python bytes object, per feature."""
    x, y = np.full(len(wkb), np.nan), np.full(len(wkb), np.nan)
    chunks = wkb.chunks if isinstance(wkb, pa.ChunkedArray) else [wkb]
    at = 0
    for chunk in chunks:
        for start in range(0, len(chunk), GEOMETRY_CHUNK):
            part = chunk.slice(start, GEOMETRY_CHUNK).cast(pa.large_binary())
            lengths = pc.binary_length(part).to_numpy(zero_copy_only=False)  # NaN where null
            point = lengths == _POINT_WKB.itemsize
            if np.count_nonzero(point) != np.count_nonzero(~np.isnan(lengths)):
                return None
            offsets = np.frombuffer(part.buffers()[1], dtype=np.int64, count=len(part) + 1, offset=part.offset * 8)
            records = np.frombuffer(part.buffers()[2], dtype=np.uint8)[
                offsets[:-1][point][:, None] + np.arange(_POINT_WKB.itemsize)].copy().view(_POINT_WKB).ravel()
            if not ((records["order"] == 1) & (records["type"] == 1)).all():
                return None
            rows = at + np.flatnonzero(point)
            x[rows], y[rows] = records["x"], records["y"]
            at += len(part)
    return x, y


def _locate(wkb: pa.ChunkedArray, ids: pd.Series, path: Path, layer: str) -> _Located:
    """The customers' points from their WKB, :data:`GEOMETRY_CHUNK` features at a time: a point as it is, a
    polygon's shapely ``point_on_surface``, none for a missing or empty geometry (or a coordinate NaN); lines are
    refused. A layer of plain 2D points is read from the bytes (:func:`_plain_points`)."""
    n = len(wkb)
    plain = _plain_points(wkb)
    if plain is not None:
        x, y = plain
        has = ~(np.isnan(x) | np.isnan(y))
        # an empty point is stored as NaN, NaN: it becomes missing, so the file's bytes are not the points
        unchanged = bool(np.count_nonzero(has) == n - wkb.null_count)
        return _Located(x=x, y=y, has=has, from_polygons=0, unchanged=unchanged)
    x, y, has = np.full(n, np.nan), np.full(n, np.nan), np.zeros(n, dtype=bool)
    linear_rows, kinds, polygons, emptied = [], set(), 0, False
    for start in range(0, n, GEOMETRY_CHUNK):
        geom = shapely.from_wkb(wkb.slice(start, GEOMETRY_CHUNK).to_numpy(zero_copy_only=False))
        types = np.asarray(shapely.get_type_id(geom))
        missing = shapely.is_missing(geom) | shapely.is_empty(geom)
        emptied |= bool((missing & ~shapely.is_missing(geom)).any())
        # type ids: 0 Point, 1 LineString, 2 LinearRing, 3 Polygon, 4 MultiPoint, 5 MultiLineString, 6 MultiPolygon,
        # 7 Collection
        linear = np.isin(types, [1, 2, 5, 7]) & ~missing
        if linear.any():
            linear_rows.append(start + np.flatnonzero(linear))
            kinds |= set(types[linear].tolist())
        areal = np.isin(types, [3, 4, 6]) & ~missing
        polygons += int(areal.sum())
        if areal.any():
            geom[areal] = shapely.point_on_surface(geom[areal])
        at = slice(start, start + geom.size)
        x[at][~missing] = shapely.get_x(geom[~missing])
        y[at][~missing] = shapely.get_y(geom[~missing])
        has[at] = ~(np.isnan(x[at]) | np.isnan(y[at]))
        emptied |= bool((has[at] != ~missing).any())  # a point with a NaN coordinate is none either
    if linear_rows:
        rows = np.concatenate(linear_rows)
        names = {1: "LineString", 2: "LinearRing", 5: "MultiLineString", 7: "GeometryCollection"}
        raise InputError(
            f"layer '{layer}' has {rows.size} {'/'.join(names[k] for k in sorted(kinds))} geometries "
            f"(customers {_fmt_list(ids.iloc[rows[:5]].tolist())}); customers must be points or polygons",
            path=path,
            key="geometry",
        )
    # the file's WKB is what shapely would encode only for 2D points: 21 bytes each (byte order, type and
    # two doubles, as OGC's WKB lays them out), none where missing; an empty point became missing above
    lengths = pc.binary_length(wkb)
    two_d = pc.all(pc.or_kleene(pc.equal(lengths, _POINT_WKB.itemsize), pc.is_null(lengths))).as_py()
    return _Located(x=x, y=y, has=has, from_polygons=polygons, unchanged=bool(two_d) and not polygons and not emptied)


#: a 2D point's WKB, as OGC's Simple Features lay it out: byte order (1, little-endian), type (1, Point), x, y
_POINT_WKB = np.dtype([("order", "u1"), ("type", "<u4"), ("x", "<f8"), ("y", "<f8")])


def points_wkb(x: np.ndarray, y: np.ndarray) -> pa.Array:
    """2D points as WKB, null where ``x`` or ``y`` is NaN: the bytes shapely's ``to_wkb`` gives, made without a
    geometry object per point."""
    x, y = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
    has = ~(np.isnan(x) | np.isnan(y))
    records = np.zeros(int(has.sum()), dtype=_POINT_WKB)
    records["order"], records["type"], records["x"], records["y"] = 1, 1, x[has], y[has]
    offsets = np.zeros(x.size + 1, dtype=np.int32)
    np.cumsum(np.where(has, _POINT_WKB.itemsize, 0), out=offsets[1:])
    validity = pa.array(has).buffers()[1]
    return pa.Array.from_buffers(pa.binary(), x.size, [validity, pa.py_buffer(offsets), pa.py_buffer(records)],
                                 null_count=int(x.size - has.sum()))


@dataclass
class Zones:
    """Zone polygons (one row per feature, in the layer's CRS ``crs``) with their zone ids and tie priority."""

    polygons: np.ndarray
    zone_ids: np.ndarray
    priority: np.ndarray
    crs: CRS
    layer: str
    repaired: list[str]


def read_zones(cfg: ZonesConfig) -> Zones:
    """Read the zones layer, repair invalid polygons and check the sources; the polygons stay in the
    layer's own CRS, where their edges are straight (the join reprojects the customers instead)."""
    if cfg.database is not None:
        df, _, crs, layer, path = _read_database(cfg.database, "zones", {"zones.id_field": cfg.id_field})
    else:
        path = cfg.path
        layer = resolve_layer(path, cfg.layer, "zones")
        info = layer_info(path, layer)
        check_fields(path, layer, info, {"zones.id_field": cfg.id_field})
        _located(path, layer, info, "zones")
        crs = _crs(path, layer, info["crs"])
        df, _ = read_layer(path, layer, [cfg.id_field])
    if len(df) == 0:
        raise InputError(f"layer '{layer}' has no zone polygons", path=path, key="zones.layer")
    ids = df[cfg.id_field]
    if ids.isna().any():
        raise InputError(f"field '{cfg.id_field}' is empty for {int(ids.isna().sum())} zone polygons; name every zone",
                         path=path, key="zones.id_field")
    ids = ids.astype(str).to_numpy(dtype=object)
    geom = df.geometry.to_numpy()
    missing = shapely.is_missing(geom) | shapely.is_empty(geom)
    if missing.any():
        warnings.warn(f"{path}: zone polygons of {_fmt_list(sorted(set(ids[missing])))} have no geometry and are ignored",
                      GeometryWarning, stacklevel=2)
        geom, ids = geom[~missing], ids[~missing]
    kinds = set(shapely.get_type_id(geom).tolist()) - {3, 6}
    if kinds:
        bad = ids[~np.isin(shapely.get_type_id(geom), [3, 6])]
        raise InputError(f"layer '{layer}' has non-polygon geometries for zones {_fmt_list(sorted(set(bad)))}; zones must be polygons",
                         path=path, key="geometry")
    geom, fixed = repair(geom)
    repaired = sorted(set(ids[fixed].tolist()))
    if repaired:
        warnings.warn(f"{path}: invalid polygons of zones {_fmt_list(repaired)} were repaired with make_valid; check them",
                      GeometryWarning, stacklevel=2)

    present = sorted(set(ids.tolist()))
    for i, src in enumerate(cfg.sources):
        if src.zone not in present:
            raise ConfigError(
                f"zone '{src.zone}' of zones.source[{i}].zone is not in layer '{layer}' (zones there: {_fmt_list(present)}); fix the name",
                path=cfg.path, key=f"zones.source[{i}].zone",
            )
    no_source = [z for z in present if cfg.source_for(z) is None]
    if no_source:
        raise InputError(
            f"zones {_fmt_list(no_source)} in layer '{layer}' have no [[zones.source]]; add one for each",
            path=path, key="zones.source",
        )
    rank = {s.zone: i for i, s in enumerate(cfg.sources)}
    priority = np.array([rank[z] for z in ids], dtype=np.int64)
    return Zones(polygons=geom, zone_ids=ids, priority=priority, crs=crs, layer=layer, repaired=repaired)


@dataclass
class Readings:
    """The field-readings layer reduced to what a check needs, one entry per feature, in the layer's order.

    ``x``/``y`` in ``crs`` (NaN without a point); ``measured_psi``, NaN where
    the pressure is empty; ``gauge_height_ft``, ``hgl_ft`` and ``accuracy_psi``
    NaN where the reading has no value of its own (the config's defaults
    apply); ``ids`` the id field's text, or the feature's number from 1;
    ``taken`` the time field as text (missing where empty or not configured).
    """

    x: np.ndarray
    y: np.ndarray
    has_geometry: np.ndarray
    crs: CRS
    layer: str
    ids: np.ndarray
    taken: pd.api.extensions.ExtensionArray
    measured_psi: np.ndarray
    gauge_height_ft: np.ndarray
    hgl_ft: np.ndarray
    accuracy_psi: np.ndarray


def _numbers(df: pd.DataFrame, name: str | None, key: str, ids: np.ndarray, path: Path, what: str) -> np.ndarray:
    """The field ``name`` as float64, NaN where empty; an InputError naming ``key`` when a value is not a number."""
    if name is None:
        return np.full(len(df), np.nan)
    col = df[name]
    text = col.astype("string").str.strip()
    empty = col.isna() | (text == "").fillna(True)
    values = pd.to_numeric(text.where(~empty), errors="coerce")
    bad = (values.isna() & ~empty).to_numpy(dtype=bool)
    if bad.any():
        raise InputError(f"field '{name}' ({key}) must hold {what}; readings {_fmt_list(ids[bad].tolist(), 5)} have "
                         f"{_fmt_list(col[bad].head(5).tolist(), 5)}", path=path, key=key)
    return values.to_numpy(dtype=np.float64, na_value=np.nan)


def read_readings(cfg: ReadingsConfig) -> Readings:
    """Read and check the field-readings layer (any GDAL vector source with point geometries).

    One line, as an InputError naming the field, for a field the config names
    that the layer lacks, a value that is not a number, a negative gauge height
    or a gauge accuracy that is not positive. A reading without a pressure or a
    location is kept: the check gives it a status of its own.
    """
    columns = list(dict.fromkeys(cfg.fields().values()))
    if cfg.database is not None:
        df, _, crs, layer, path = _read_database(cfg.database, "readings", cfg.fields(), columns=columns)
    else:
        path = cfg.path
        layer = resolve_layer(path, cfg.layer, "readings")
        info = layer_info(path, layer)
        check_fields(path, layer, info, cfg.fields())
        _located(path, layer, info, "readings")
        crs = _crs(path, layer, info["crs"])
        df, _ = read_layer(path, layer, columns)
    if len(df) == 0:
        source = "readings.path" if cfg.database is None else "readings.database"
        raise InputError(f"layer '{layer}' (from {source}) has no readings; check the export that wrote it",
                         path=path, key=source)
    ids = (df[cfg.id_field].astype("string").fillna("").to_numpy(dtype=object) if cfg.id_field
           else np.array([str(i + 1) for i in range(len(df))], dtype=object))
    geom = df.geometry.to_numpy()
    missing = shapely.is_missing(geom) | shapely.is_empty(geom)
    not_point = ~missing & (shapely.get_type_id(geom) != 0)
    if not_point.any():
        raise InputError(f"layer '{layer}' has non-point geometries (readings {_fmt_list(ids[not_point].tolist(), 5)}); "
                         "a reading is a point where the gauge was", path=path, key="geometry")
    x = np.full(len(df), np.nan)
    y = np.full(len(df), np.nan)
    x[~missing] = shapely.get_x(geom[~missing])
    y[~missing] = shapely.get_y(geom[~missing])
    measured = _numbers(df, cfg.pressure_field, "readings.pressure_field", ids, path, "pressures in psi")
    height = _numbers(df, cfg.gauge_height_field, "readings.gauge_height_field", ids, path, "heights in ft")
    if (height < 0).any():
        raise InputError(f"field '{cfg.gauge_height_field}' (readings.gauge_height_field) has negative gauge heights "
                         f"(readings {_fmt_list(ids[height < 0].tolist(), 5)}); give the height above ground in ft",
                         path=path, key="readings.gauge_height_field")
    hgl = _numbers(df, cfg.hgl_field, "readings.hgl_field", ids, path, "HGLs in ft")
    accuracy = _numbers(df, cfg.accuracy_field, "readings.accuracy_field", ids, path, "accuracies in psi")
    if (accuracy <= 0).any():
        raise InputError(f"field '{cfg.accuracy_field}' (readings.accuracy_field) must be positive, psi; readings "
                         f"{_fmt_list(ids[accuracy <= 0].tolist(), 5)} are not", path=path, key="readings.accuracy_field")
    taken = (df[cfg.time_field].astype("string").array if cfg.time_field
             else pd.array([None] * len(df), dtype="string"))
    log.info("read %d field readings from %s layer %s", len(df), path, layer)
    return Readings(x=x, y=y, has_geometry=~missing, crs=crs, layer=layer, ids=ids, taken=taken, measured_psi=measured,
                    gauge_height_ft=height, hgl_ft=hgl, accuracy_psi=accuracy)
