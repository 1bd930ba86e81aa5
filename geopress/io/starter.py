"""``geopress init``'s look at a user's own files, and the starter config written from it.

:func:`inspect_vector` picks a layer and reads only the fields it needs to
tell which have a unique value per feature (the customers' id) or few
distinct values (the zone ids); :func:`inspect_raster` reads a raster's size,
CRS and stated vertical unit, no pixels. :func:`write_starter` joins them with
the pure :func:`geopress.starter.config_text` and writes the file, never over
an existing one unless asked. Errors name the command's option.
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import pyarrow as pa
import pyarrow.compute as pc
import pyogrio
import rasterio

from ..config import placeholders
from ..errors import InputError, OutputError
from ..starter import Field, RasterSummary, VectorSummary, ZoneIds, config_text
from .raster import stated_vertical_unit
from .vector import _fmt_list
from .write import Staging

#: OGR field types in words
_KINDS = {"OFTString": "text", "OFTInteger": "integer", "OFTInteger64": "integer", "OFTReal": "real",
          "OFTDate": "date", "OFTDateTime": "date and time", "OFTTime": "time"}
_POINTS = ("Point", "MultiPoint", "Point Z", "MultiPoint Z")
_POLYGONS = ("Polygon", "MultiPolygon", "Polygon Z", "MultiPolygon Z")


def _readable(path: Path, option: str) -> None:
    if not path.exists():
        raise InputError(f"file not found (from {option}); check the path", path=path, key=option)
    if not os.access(path, os.R_OK):
        raise InputError(f"cannot read the file (from {option}); check its permissions", path=path, key=option)


def relative(path: Path, folder: Path) -> str:
    """``path`` as the config in ``folder`` names it: relative where it can be, with forward slashes."""
    try:
        return Path(os.path.relpath(path.resolve(), folder.resolve())).as_posix()
    except ValueError:  # another drive (Windows)
        return path.resolve().as_posix()


def inspect_vector(path: Path, folder: Path, *, option: str, layer: str | None = None,
                   geometry: Sequence[str], what: str, read: Sequence[str] | None = None) -> VectorSummary:
    """The layer of ``path`` to use (``layer``, else the one with the most ``geometry`` features, ``what``
    in words) and its fields; the ``read`` fields (default: its text and integer fields) are read, without
    geometry, to count their distinct values and find the unique ones."""
    _readable(path, option)
    try:
        listed = pyogrio.list_layers(path)
    except Exception as exc:  # pyogrio raises DataSourceError and friends
        raise InputError(f"not a vector dataset GDAL can open ({str(exc).splitlines()[0]}; from {option})",
                         path=path, key=option) from exc
    names = [str(n) for n in listed[:, 0]]
    if layer is not None and layer not in names:
        raise InputError(f"no layer '{layer}' (from {option}-layer); layers there: {_fmt_list(names)}",
                         path=path, key=f"{option}-layer")
    if layer is None:
        fitting = [str(n) for n, kind in listed if kind in geometry]
        if not fitting:
            raise InputError(f"no layer of {what} (from {option}); layers there: {_fmt_list(names)}", path=path,
                             key=option)
        layer = max(fitting, key=lambda n: pyogrio.read_info(path, layer=n)["features"])
    info = pyogrio.read_info(path, layer=layer)
    fields = tuple(Field(str(n), _KINDS.get(t, t)) for n, t in zip(info["fields"], info["ogr_types"]))
    wanted = [f.name for f in fields if f.kind in ("text", "integer")] if read is None else list(read)
    distinct: dict[str, int] = {}
    unique: list[str] = []
    if wanted:
        _, table = pyogrio.read_arrow(path, layer=layer, columns=wanted, read_geometry=False)
        for name in wanted:
            column = table[name]
            distinct[name] = pc.count_distinct(column, mode="only_valid").as_py()
            if column.null_count == 0 and distinct[name] == len(column) and not _blank(column):
                unique.append(name)
    return VectorSummary(path=relative(path, folder), layer=layer, layers=tuple(names),
                         geometry_type=str(info["geometry_type"]), features=int(info["features"]),
                         crs=info["crs"], fields=fields, considered=tuple(wanted), unique=tuple(unique),
                         distinct=distinct)


def _blank(column: pa.ChunkedArray) -> bool:
    """Any text value that is empty or only spaces (not an id)."""
    if not pa.types.is_string(column.type) and not pa.types.is_large_string(column.type):
        return False
    return pc.any(pc.equal(pc.utf8_trim_whitespace(column), "")).as_py() or False


def zone_ids(path: Path, summary: VectorSummary, zone_field: str | None) -> ZoneIds:
    """The zone ids of the zones layer: from ``zone_field`` (--zone-field), else from the text field named
    like a zone, else the text field with the fewest distinct values (more than none)."""
    names = [f.name for f in summary.fields]
    if zone_field is not None:
        if zone_field not in names:
            raise InputError(f"layer '{summary.layer}' has no field '{zone_field}' (from --zone-field); fields "
                             f"there: {_fmt_list(names, 20)}", path=path, key="--zone-field")
        field, given = zone_field, True
    else:
        text = [f.name for f in summary.fields if f.kind == "text" and summary.distinct.get(f.name, 0) > 0]
        if not text:
            raise InputError(f"layer '{summary.layer}' has no text field with zone names (from --zones); name the "
                             f"field with --zone-field (fields there: {_fmt_list(names, 20)})", path=path,
                             key="--zone-field")
        named = [n for n in text if "zone" in n.lower()]
        field, given = (named or sorted(text, key=lambda n: summary.distinct[n]))[0], False
    _, table = pyogrio.read_arrow(path, layer=summary.layer, columns=[field], read_geometry=False)
    ids = tuple(dict.fromkeys(str(v) for v in pc.drop_null(table[field]).to_pylist()))  # as they first appear
    return ZoneIds(field=field, given=given, ids=ids)


def inspect_raster(path: Path, folder: Path) -> RasterSummary:
    """Size, pixel size, CRS and stated vertical unit of a raster (no pixels read)."""
    _readable(path, "--terrain")
    try:
        src = rasterio.open(path)
    except rasterio.errors.RasterioIOError as exc:
        raise InputError(f"not a raster GDAL can open ({exc}); check --terrain", path=path, key="--terrain") from exc
    with src:
        return RasterSummary(path=relative(path, folder), width=src.width, height=src.height,
                             pixel=(abs(src.transform.a), abs(src.transform.e)),
                             crs=src.crs.to_string() if src.crs else None, vertical_unit=stated_vertical_unit(src))


@dataclass
class Starter:
    """The starter config written: its path, its text and the keys left to fill in."""

    path: Path
    text: str
    placeholders: list[str]


def write_starter(config: Path, *, customers: Path | None = None, customers_layer: str | None = None,
                  id_field: str | None = None, terrain: Sequence[Path] = (), zones: Path | None = None,
                  zones_layer: str | None = None, zone_field: str | None = None, force: bool = False) -> Starter:
    """Inspect the inputs given and write a commented starter config at ``config``.

    Never replaces an existing file unless ``force``. Raises InputError for an
    input that cannot be read and OutputError where the file cannot be written.
    """
    config = Path(config)
    if config.exists() and not force:
        raise OutputError("already exists; give another file name, or pass --force to replace it", path=config,
                          key="CONFIG")
    folder = config.resolve().parent
    cust = None
    if customers is not None:
        cust = inspect_vector(Path(customers), folder, option="--customers", layer=customers_layer,
                              geometry=_POINTS + _POLYGONS, what="points or polygons")
        if id_field is not None and id_field not in [f.name for f in cust.fields]:
            raise InputError(f"layer '{cust.layer}' has no field '{id_field}' (from --id-field); fields there: "
                             f"{_fmt_list([f.name for f in cust.fields], 20)}", path=customers, key="--id-field")
    rasters = [inspect_raster(Path(p), folder) for p in terrain]
    zone_summary = ids = None
    if zones is not None:
        zone_summary = inspect_vector(Path(zones), folder, option="--zones", layer=zones_layer, geometry=_POLYGONS,
                                      what="polygons")
        ids = zone_ids(Path(zones), zone_summary, zone_field)
    text = config_text(cust, rasters, zone_summary, ids, id_field=id_field)
    if not folder.is_dir():
        raise OutputError("the folder for the config does not exist; create it first", path=config, key="CONFIG")
    with Staging() as stage:
        stage.write(config, lambda tmp: tmp.write_text(text, encoding="utf-8"))
        stage.commit()
    return Starter(path=config, text=text, placeholders=placeholders(tomllib.loads(text)))
