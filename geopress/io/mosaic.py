"""Many DEM tiles read as one raster per CRS and pixel grid.

The configured rasters (a list, a glob's matches, or VRT files) are opened
once for their CRS, grid, type, nodata, mask, scale and offset, without
reading pixels. Rasters that share CRS, pixel size, grid phase, vertical
unit, scale and offset, and mark missing pixels by a nodata value (or not
at all), form a *group*; a
group of several tiles is read through an in-process GDAL VRT (an XML text in
``/vsimem``) laid on the union of their extents, so a window that spans a
seam holds the neighbour tile's pixels and bilinear sampling across the seam
gives the same value as sampling the merged raster. Where tiles of a group
overlap, the first listed that has a value wins, pixel by pixel (the VRT
paints sources in reverse order, nodata transparent). Groups are tried in
the order of their first raster, a customer taking the first group's value.
A raster whose missing pixels are marked by a mask band (per-dataset,
per-band, or an alpha band GDAL applies) is a group of its own and is read
with its mask (see :mod:`geopress.io.raster`).
"""

from __future__ import annotations

import math
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator
from xml.sax.saxutils import escape, quoteattr

import numpy as np
import rasterio
from affine import Affine
from rasterio.io import MemoryFile

#: how far (in pixels) a tile's origin may sit off its group's grid and still join it.
GRID_TOLERANCE_PX = 1e-6


@dataclass(frozen=True)
class Tile:
    """One raster as opened, without its pixels."""

    path: Path
    crs_wkt: str
    crs_name: str
    transform: Affine
    width: int
    height: int
    dtype: str
    nodata: float | None
    unit: str
    block: tuple[int, int]
    #: missing pixels are marked by a GDAL mask band (per-dataset, per-band or alpha), read with the values
    masked: bool = False
    #: the band's scale and offset: elevation = stored value * scale + offset (in ``unit``)
    scale: float = 1.0
    offset: float = 0.0


@dataclass
class Group:
    """Tiles on one CRS and pixel grid, with the grid that holds them all.

    ``offsets`` gives each tile's (row, col) of its top-left pixel in the
    group's grid. ``dtype``/``nodata`` are those of the group's band.
    """

    tiles: list[Tile]
    transform: Affine
    width: int
    height: int
    offsets: list[tuple[int, int]]
    dtype: str
    nodata: float | None

    @property
    def first(self) -> Tile:
        return self.tiles[0]

    @property
    def unit(self) -> str:
        return self.first.unit

    @property
    def crs_wkt(self) -> str:
        return self.first.crs_wkt

    @property
    def masked(self) -> bool:
        return self.first.masked

    @property
    def scale(self) -> float:
        return self.first.scale

    @property
    def offset(self) -> float:
        return self.first.offset

    @property
    def block(self) -> tuple[int, int]:
        return self.first.block if len(self.tiles) == 1 else (512, 512)

    def tile_rects(self) -> np.ndarray:
        """(n, 4) int64 rows of ``row0, row1, col0, col1`` per tile, in the group's pixels."""
        return np.array([(r, r + t.height, c, c + t.width) for t, (r, c) in zip(self.tiles, self.offsets)],
                        dtype=np.int64).reshape(-1, 4)

    def label(self) -> str:
        more = f" and {len(self.tiles) - 1} more tiles" if len(self.tiles) > 1 else ""
        return f"{self.first.path}{more}"


def _grid_key(tile: Tile) -> tuple | None:
    """What tiles must share to join one grid (rasters are north-up or south-up, never rotated:
    :mod:`geopress.io.raster` refuses those); None for a masked raster, a group of its own
    (a VRT of its tiles would drop their masks)."""
    if tile.masked:
        return None
    t = tile.transform
    phase_x = math.remainder(t.c / t.a, 1.0)
    phase_y = math.remainder(t.f / t.e, 1.0)
    return (tile.crs_wkt, tile.unit, tile.scale, tile.offset, t.a, t.e, phase_x, phase_y)


def _same_grid(key: tuple, other: tuple) -> bool:
    if key[:6] != other[:6]:
        return False
    return all(abs(math.remainder(p - q, 1.0)) <= GRID_TOLERANCE_PX for p, q in zip(key[6:], other[6:]))


def _band_type(tiles: list[Tile]) -> tuple[str, float | None]:
    """The group band's type and nodata: the tiles' own when they agree, else float with NaN."""
    dtypes = {t.dtype for t in tiles}
    nodatas = {t.nodata for t in tiles}
    if len(dtypes) == 1 and len(nodatas) == 1:
        dtype, nodata = tiles[0].dtype, tiles[0].nodata
        if nodata is not None:
            return dtype, nodata
        if np.dtype(dtype).kind == "f":
            return dtype, math.nan  # the gaps between tiles read as NaN
    return np.result_type(*[np.dtype(t.dtype) for t in tiles], np.float32).name, math.nan


def group_tiles(tiles: list[Tile]) -> list[Group]:
    """Tiles grouped by CRS, pixel size, grid phase and vertical unit, in order of first appearance."""
    buckets: list[tuple[tuple | None, list[Tile]]] = []
    for tile in tiles:
        key = _grid_key(tile)
        for bkey, members in buckets:
            if key is not None and bkey is not None and _same_grid(bkey, key):
                members.append(tile)
                break
        else:
            buckets.append((key, [tile]))
    groups = []
    for _, members in buckets:
        if len(members) == 1:
            t = members[0]
            groups.append(Group(members, t.transform, t.width, t.height, [(0, 0)], t.dtype, t.nodata))
            continue
        a, e = members[0].transform.a, members[0].transform.e
        lefts = [t.transform.c for t in members]
        tops = [t.transform.f for t in members]
        left, top = min(lefts), max(tops) if e < 0 else min(tops)
        offsets = [(round((t.transform.f - top) / e), round((t.transform.c - left) / a)) for t in members]
        width = max(c + t.width for t, (_, c) in zip(members, offsets))
        height = max(r + t.height for t, (r, _) in zip(members, offsets))
        dtype, nodata = _band_type(members)
        groups.append(Group(members, Affine(a, 0.0, left, 0.0, e, top), width, height, offsets, dtype, nodata))
    return groups


_GDAL_TYPES = {
    "uint8": "Byte", "int8": "Int8", "uint16": "UInt16", "int16": "Int16", "uint32": "UInt32", "int32": "Int32",
    "uint64": "UInt64", "int64": "Int64", "float32": "Float32", "float64": "Float64",
}


def _num(value: float) -> str:
    return "nan" if math.isnan(value) else repr(float(value))


def vrt_xml(group: Group) -> str:
    """A GDAL VRT laying the group's tiles on its grid; the first listed tile is painted last, so it wins."""
    t = group.transform
    band_type = _GDAL_TYPES[group.dtype]
    parts = [
        f'<VRTDataset rasterXSize="{group.width}" rasterYSize="{group.height}">',
        f"<SRS>{escape(group.crs_wkt)}</SRS>",
        f"<GeoTransform>{t.c!r}, {t.a!r}, {t.b!r}, {t.f!r}, {t.d!r}, {t.e!r}</GeoTransform>",
        f'<VRTRasterBand dataType="{band_type}" band="1" blockXSize="512" blockYSize="512">',
    ]
    if group.nodata is not None:
        parts.append(f"<NoDataValue>{_num(group.nodata)}</NoDataValue>")
    for tile, (row, col) in reversed(list(zip(group.tiles, group.offsets))):
        parts += [
            "<ComplexSource>",
            f'<SourceFilename relativeToVRT="0">{escape(str(tile.path))}</SourceFilename>',
            "<SourceBand>1</SourceBand>",
            f'<SourceProperties RasterXSize="{tile.width}" RasterYSize="{tile.height}" '
            f'DataType={quoteattr(_GDAL_TYPES[tile.dtype])} BlockXSize="{tile.block[1]}" BlockYSize="{tile.block[0]}"/>',
            f'<SrcRect xOff="0" yOff="0" xSize="{tile.width}" ySize="{tile.height}"/>',
            f'<DstRect xOff="{col}" yOff="{row}" xSize="{tile.width}" ySize="{tile.height}"/>',
        ]
        if tile.nodata is not None:
            parts.append(f"<NODATA>{_num(tile.nodata)}</NODATA>")
        parts.append("</ComplexSource>")
    parts += ["</VRTRasterBand>", "</VRTDataset>"]
    return "\n".join(parts)


@contextmanager
def open_group(group: Group) -> Iterator[rasterio.io.DatasetReader]:
    """The group as one open dataset: the tile itself, or an in-memory VRT of its tiles."""
    if len(group.tiles) == 1:
        with rasterio.open(group.first.path) as src:
            yield src
        return
    with MemoryFile(vrt_xml(group).encode("utf-8"), ext=".vrt") as mem, mem.open() as src:
        yield src


def first_tile(rects: np.ndarray, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """Index into ``rects`` (``row0, row1, col0, col1`` rows, in priority order) of the first
    rectangle holding each integer pixel ``rows``, ``cols``; -1 for none."""
    out = np.full(rows.shape, -1, dtype=np.intp)
    todo = np.arange(rows.size)
    for i, (r0, r1, c0, c1) in enumerate(rects):
        if todo.size == 0:
            break
        rr, cc = rows[todo], cols[todo]
        hit = (rr >= r0) & (rr < r1) & (cc >= c0) & (cc < c1)
        out[todo[hit]] = i
        todo = todo[~hit]
    return out
