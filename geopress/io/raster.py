"""Sampling DEM rasters at customer points with rasterio.

Rasters are tried in the order configured; a customer takes its ground
elevation from the first raster that has a value there. Points are
reprojected to each raster's CRS with pyproj (``always_xy``). Tiles on one
CRS and pixel grid are read as one mosaic (:mod:`geopress.io.mosaic`), so
bilinear sampling across a seam equals sampling the merged raster. Only the
windows that hold customers are read: the whole covering window when it fits
``memory_mb``, otherwise windows of whole blocks around the customers, with
the customers sorted by window so each window is read once
(:func:`geopress.terrain.plan_windows`).

Every raster is read as GDAL means it (:func:`inspect`): a pixel is missing
where it equals the band's nodata value, where GDAL's mask band (a
per-dataset or per-band mask, or a Byte/UInt16 alpha band) marks it, or
where it is NaN; the band's scale and offset are applied before the unit
conversion (linear, so sampling the stored values first is exact). PixelIsPoint
GeoTIFFs are read with GDAL's half-pixel shift (RFC 33); south-up rasters
(positive y pixel size) are read as they are. What geopress cannot read right
is refused with one line: a rotated or sheared geotransform, ground control
points instead of a geotransform, an alpha band GDAL does not apply.
"""

from __future__ import annotations

import logging
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import rasterio
from pyproj import CRS, Transformer
from rasterio.enums import ColorInterp, MaskFlags, Resampling
from rasterio.windows import Window

from ..config import TerrainConfig
from ..errors import InputError
from ..pressure import feet_per_unit
from ..terrain import plan_windows, sample_pixels
from .datum import DatumShift
from .mosaic import Group, Tile, first_tile, group_tiles, open_group

log = logging.getLogger(__name__)

_UNIT_NAMES = {
    "m": "m", "metre": "m", "meter": "m", "metres": "m", "meters": "m",
    "ft": "ft", "foot": "ft", "feet": "ft", "international foot": "ft", "foot (international)": "ft",
    "us_ft": "us_ft", "us survey foot": "us_ft", "us-ft": "us_ft", "ftus": "us_ft", "foot_us": "us_ft",
    "us survey feet": "us_ft",
}
#: GDAL options every raster is opened with: PixelIsPoint GeoTIFFs are shifted by half a pixel so that
#: the geotransform is that of pixel areas (GDAL RFC 33), whatever the environment sets.
GDAL_OPTIONS = {"GTIFF_POINT_GEO_IGNORE": "NO"}


def stated_vertical_unit(src) -> str | None:
    """The vertical unit the raster states (band unit type, else a vertical CRS axis), or None."""
    unit = (src.units[0] or "").strip().lower() if src.units else ""
    if unit:
        return _UNIT_NAMES.get(unit)
    if src.crs is not None:
        crs = CRS.from_wkt(src.crs.to_wkt())
        for axis in crs.axis_info:
            if axis.direction in ("up", "down"):
                return _UNIT_NAMES.get(axis.unit_name.lower())
    return None


@dataclass
class RasterReport:
    """What sampling found, per raster (for run.json and the check command)."""

    path: str
    crs: str
    vertical_unit: str
    shape: tuple[int, int]
    customers_sampled: int = 0
    windows_read: int = 0
    pixels_read: int = 0
    #: how missing pixels are marked ("nodata value", "mask band", "none") and the band's scale and offset
    missing: str = "none"
    scale: float = 1.0
    offset: float = 0.0


@dataclass
class TerrainResult:
    """Ground elevations, ft, with what was read for them.

    ``ranges`` maps each raster group's label to its unit and the lowest and
    highest elevation sampled from it, ft (for :mod:`geopress.guards`).
    ``outside_datum_grid`` counts customers on a raster but outside the
    datum grid (they have no ground on the HGLs' datum). ``rmse_ft``: per
    point, the vertical RMSE (``terrain.vertical_rmse_ft``) of the raster
    that gave its ground, ft; for tiles read as one mosaic, the largest of
    theirs; NaN where no raster gave a ground or the config states none.
    """

    ground_ft: np.ndarray
    rasters: list[RasterReport] = field(default_factory=list)
    inside_any: int = 0
    ranges: dict[str, tuple[str, float, float]] = field(default_factory=dict)
    outside_datum_grid: int = 0
    rmse_ft: np.ndarray | None = None

    def __post_init__(self) -> None:
        if self.rmse_ft is None:
            self.rmse_ft = np.full(self.ground_ft.shape, np.nan)


def _open(path: Path):
    if not path.exists():
        raise InputError("raster not found (from terrain.paths); check the path", path=path, key="terrain.paths")
    if path.is_dir():
        raise InputError("is a folder, not a raster (from terrain.paths); list the raster files", path=path, key="terrain.paths")
    if not os.access(path, os.R_OK):
        raise InputError("cannot read the raster (from terrain.paths); check its permissions", path=path, key="terrain.paths")
    try:
        with rasterio.Env(**GDAL_OPTIONS):
            return rasterio.open(path)
    except rasterio.errors.RasterioIOError as exc:
        raise InputError(f"not a raster GDAL can open ({exc}); check terrain.paths", path=path, key="terrain.paths") from exc


@dataclass(frozen=True)
class BandMeaning:
    """How band 1 of a raster is read as GDAL means it: ``masked`` when a mask band marks its missing
    pixels (besides any nodata value), and the ``scale`` and ``offset`` of its stored values."""

    nodata: float | None
    masked: bool
    scale: float
    offset: float


def inspect(src, path: Path) -> BandMeaning:
    """Check that ``src`` is a raster geopress reads right and say how to read its band 1.

    Raises InputError, naming the file, for ground control points instead of a
    geotransform, no CRS, a rotated or sheared geotransform, an alpha band GDAL
    does not apply as a mask, or a scale that is zero or not finite.
    """
    if src.gcps[0] and src.transform.is_identity:
        raise InputError("is georeferenced by ground control points, not a geotransform; warp it to a grid first "
                         "(gdalwarp -r bilinear) and list that in terrain.paths", path=path, key="terrain.paths")
    if src.crs is None:
        raise InputError("the raster has no CRS; assign one (e.g. gdal_edit -a_srs) and run again", path=path, key="crs")
    t = src.transform
    if t.b != 0 or t.d != 0:
        raise InputError(f"has a rotated or sheared geotransform ({t.b:g}, {t.d:g} rotation terms); geopress reads "
                         "north-up and south-up grids only: warp it first (gdalwarp -r bilinear)", path=path,
                         key="terrain.paths")
    flags = set(src.mask_flag_enums[0])
    alpha = [i + 1 for i, c in enumerate(src.colorinterp) if c == ColorInterp.alpha]
    if alpha and MaskFlags.alpha not in flags and MaskFlags.nodata not in flags:
        raise InputError(f"band {alpha[0]} is an alpha band that GDAL does not apply as a mask (an alpha band must be "
                         f"Byte or UInt16; this one is {src.dtypes[alpha[0] - 1]}); make it a mask band or give band 1 "
                         "a nodata value (gdal_translate -b 1 -a_nodata ...)", path=path, key="terrain.paths")
    scale, offset = float(src.scales[0]), float(src.offsets[0])
    if scale == 0 or not np.isfinite(scale) or not np.isfinite(offset):
        raise InputError(f"band 1 has a scale of {scale:g} and an offset of {offset:g}, which give no elevations; fix "
                         "the band's scale and offset (gdal_edit -scale -offset)", path=path, key="terrain.paths")
    # nodata and all-valid are what the value itself says; any other flag (per-dataset, alpha, or none at
    # all for a per-band mask band) means a mask band to read beside the values
    masked = not flags <= {MaskFlags.nodata, MaskFlags.all_valid}
    return BandMeaning(nodata=src.nodata, masked=masked, scale=scale, offset=offset)


def read_ground(src, meaning: BandMeaning, window: Window, out_shape: tuple[int, int] | None = None,
                resampling: Resampling = Resampling.nearest) -> np.ndarray:
    """Band 1 over ``window`` as float64 stored values, NaN where missing (nodata, masked or NaN).

    With ``out_shape`` smaller than the window it is read decimated with ``resampling``;
    GDAL's average then leaves missing pixels out, and a decimated pixel is missing only
    when all of its pixels are (its mask averages to 0).
    """
    arr = src.read(1, window=window, out_shape=out_shape, resampling=resampling)
    values = arr.astype(np.float64)
    if meaning.nodata is not None and not np.isnan(meaning.nodata):
        values[arr == meaning.nodata] = np.nan
    del arr
    if meaning.masked:
        mask = src.read_masks(1, window=window, out_shape=out_shape, resampling=resampling)
        values[mask == 0] = np.nan
    return values


def resolve_unit(src, path: Path, configured: str | None) -> str:
    """The vertical unit to use for ``src``: configured, stated, and consistent."""
    stated = stated_vertical_unit(src)
    if configured is None and stated is None:
        raise InputError(
            "the raster does not state its vertical unit; set terrain.vertical_units to \"m\", \"ft\" or \"us_ft\"",
            path=path, key="terrain.vertical_units",
        )
    if configured is not None and stated is not None and configured != stated:
        raise InputError(
            f"terrain.vertical_units is \"{configured}\" but the raster states \"{stated}\"; fix the config or the raster",
            path=path, key="terrain.vertical_units",
        )
    return configured or stated


def read_tiles(paths, configured_unit: str | None) -> list[Tile]:
    """Open every raster once for its CRS, grid, type, nodata, mask, scale, offset and vertical unit
    (no pixels read); each is checked by :func:`inspect`."""
    tiles = []
    for path in paths:
        with _open(path) as src:
            meaning = inspect(src, path)
            unit = resolve_unit(src, path, configured_unit)
            tiles.append(Tile(path=Path(path), crs_wkt=src.crs.to_wkt(), crs_name=src.crs.to_string(),
                              transform=src.transform, width=src.width, height=src.height, dtype=src.dtypes[0],
                              nodata=src.nodata, unit=unit, block=tuple(src.block_shapes[0]), masked=meaning.masked,
                              scale=meaning.scale, offset=meaning.offset))
    return tiles


def _report(tile: Tile) -> RasterReport:
    missing = "mask band" if tile.masked else "nodata value" if tile.nodata is not None else "none"
    return RasterReport(path=str(tile.path), crs=tile.crs_name, vertical_unit=tile.unit, shape=(tile.height, tile.width),
                        missing=missing, scale=tile.scale, offset=tile.offset)


def describe(paths, configured_unit: str | None) -> list[RasterReport]:
    """Open each raster and check it as a run would (:func:`read_tiles`), without reading pixels."""
    return [_report(t) for t in read_tiles(paths, configured_unit)]


def coverage(tiles: list[Tile], x: np.ndarray, y: np.ndarray, crs: CRS) -> tuple[list[int], int]:
    """How many of the map points ``x``, ``y`` (in ``crs``; NaN for none) lie on each tile, and on any."""
    each, anywhere = [], np.zeros(x.shape, dtype=bool)
    transformers: dict[str, Transformer | None] = {}
    have = ~np.isnan(x)
    for tile in tiles:
        if tile.crs_wkt not in transformers:
            target = CRS.from_wkt(tile.crs_wkt)
            transformers[tile.crs_wkt] = None if target.equals(crs) else Transformer.from_crs(crs, target, always_xy=True)
        tr = transformers[tile.crs_wkt]
        rx, ry = (x[have], y[have]) if tr is None else tr.transform(x[have], y[have])
        inv = ~tile.transform
        cols = inv.a * rx + inv.b * ry + inv.c
        rows = inv.d * rx + inv.e * ry + inv.f
        on = (cols >= 0) & (cols < tile.width) & (rows >= 0) & (rows < tile.height)
        each.append(int(on.sum()))
        anywhere[np.flatnonzero(have)[on]] = True
    return each, int(anywhere.sum())


def _sample_group(src, group: Group, cols: np.ndarray, rows: np.ndarray, method: str, max_pixels: float,
                  reports: list[RasterReport], sampled: Callable[[int], None] | None = None) -> np.ndarray:
    """Sample ``src`` (the group opened) at fractional pixel coordinates of its grid (NaN outside).

    Reads only the windows :func:`~geopress.terrain.plan_windows` plans; each
    tile's report counts the windows that touched it, its pixels in them and
    the customers it served. Returns the stored values (before scale and
    offset). A masked group's windows are read with their mask as float64
    (:func:`read_ground`), others as stored. ``sampled(n)`` is told after
    each window how many customers got a value from it.
    """
    meaning = BandMeaning(nodata=group.nodata, masked=group.masked, scale=group.scale, offset=group.offset)
    h, w = group.height, group.width
    out = np.full(cols.shape, np.nan)
    cf, rf = np.floor(cols), np.floor(rows)
    inside = np.flatnonzero((cf >= 0) & (cf < w) & (rf >= 0) & (rf < h))
    if inside.size == 0:
        return out
    ci, ri = cf[inside].astype(np.int64), rf[inside].astype(np.int64)
    rects = group.tile_rects()
    for local, r0, r1, c0, c1 in plan_windows(ri, ci, (h, w), group.block, max_pixels):
        idx = inside[local]
        window = Window(c0, r0, c1 - c0, r1 - r0)
        if group.masked:
            arr, nodata = read_ground(src, meaning, window), None
        else:
            arr, nodata = src.read(1, window=window), group.nodata
        out[idx] = sample_pixels(arr, cols[idx] - c0, rows[idx] - r0, nodata=nodata, method=method)
        del arr
        touched = np.flatnonzero((rects[:, 0] < r1) & (rects[:, 1] > r0) & (rects[:, 2] < c1) & (rects[:, 3] > c0))
        got = local[~np.isnan(out[idx])]
        if sampled is not None:
            sampled(got.size)
        served = first_tile(rects[touched], ri[got], ci[got])
        counts = np.bincount(served[served >= 0], minlength=touched.size)
        for j, t in enumerate(touched):
            rr0, rr1, cc0, cc1 = rects[t]
            rep = reports[t]
            rep.windows_read += 1
            rep.pixels_read += int((min(r1, rr1) - max(r0, rr0)) * (min(c1, cc1) - max(c0, cc0)))
            rep.customers_sampled += int(counts[j])
    return out


#: bytes per pixel of a masked window beside its stored values: the float64 values and the mask
MASKED_EXTRA_BYTES = 8 + 1


def sample_terrain(cfg: TerrainConfig, x: np.ndarray, y: np.ndarray, crs: CRS, shift: DatumShift, *,
                   count: Callable[[int, int | None], None] | None = None) -> TerrainResult:
    """Ground elevation, ft, on the HGLs' datum at map points ``x``, ``y`` in ``crs``; NaN where no
    raster has a value (or, with a datum grid, where the grid has none).

    The rasters are grouped and read as :mod:`geopress.io.mosaic` describes;
    each customer is reprojected to the CRS of the group that serves it.
    Never more than ``cfg.memory_mb`` of raster is read at once. Elevations
    are ``(stored * scale + offset)`` in the raster's unit, converted to ft,
    plus ``shift``'s offset at the customer. ``count(done, total)`` is told,
    after each window read, how many of the ``total`` customers with a
    location have a value so far, and ``total`` once every raster has been tried.
    """
    total = int(np.count_nonzero(~np.isnan(x)))
    done = 0

    def sampled(n: int) -> None:
        nonlocal done
        done += n
        count(done, total)

    ground = np.full(x.shape, np.nan)
    tiles = read_tiles(cfg.paths, cfg.vertical_units)
    reports = {t.path: _report(t) for t in tiles}
    result = TerrainResult(ground_ft=ground, rasters=list(reports.values()))
    transformers: dict[str, Transformer | None] = {}
    inside_any = np.zeros(x.shape, dtype=bool)
    memory_bytes = cfg.memory_mb * 1024 * 1024
    for group in group_tiles(tiles):
        todo = np.flatnonzero(np.isnan(ground) & ~np.isnan(x))
        if todo.size == 0:
            break
        key = group.crs_wkt
        if key not in transformers:
            target = CRS.from_wkt(key)
            transformers[key] = None if target.equals(crs) else Transformer.from_crs(crs, target, always_xy=True)
        tr = transformers[key]
        rx, ry = (x[todo], y[todo]) if tr is None else tr.transform(x[todo], y[todo])
        inv = ~group.transform
        cols = inv.a * rx + inv.b * ry + inv.c
        rows = inv.d * rx + inv.e * ry + inv.f
        inside_any[todo] |= (cols >= 0) & (cols < group.width) & (rows >= 0) & (rows < group.height)
        max_pixels = memory_bytes / (np.dtype(group.dtype).itemsize + (MASKED_EXTRA_BYTES if group.masked else 0))
        # GDAL_NUM_THREADS: GeoTIFF blocks of one read are decompressed on every core
        with rasterio.Env(GDAL_NUM_THREADS="ALL_CPUS", **GDAL_OPTIONS), open_group(group) as src:
            values = _sample_group(src, group, cols, rows, cfg.method, max_pixels, [reports[t.path] for t in group.tiles],
                                   sampled if count is not None else None)
        ft = (values * group.scale + group.offset) * feet_per_unit(group.unit)
        lo, hi = np.nanmin(ft, initial=np.inf), np.nanmax(ft, initial=-np.inf)
        result.ranges[group.label()] = (group.unit, float(lo), float(hi))
        got = np.flatnonzero(~np.isnan(ft))
        offsets = shift.offsets_ft(x[todo[got]], y[todo[got]], crs)
        result.outside_datum_grid += int(np.isnan(offsets).sum())
        ft[got] += offsets
        ground[todo] = ft
        result.rmse_ft[todo[got]] = max(cfg.rmse_of(t.path) for t in group.tiles)
        log.info("sampled %d points from %s", got.size, group.label())
    result.inside_any = int(inside_any.sum())
    if count is not None:
        count(total, total)
    return result


# --------------------------------------------------------------------------
# DEM windows over zones (for the serviceable band and the report's maps)

#: peak working bytes per DEM pixel while a zone's window is read and its band computed: the
#: float64 ground (8) and, at the peak, contourpy's x and y grids and cache (20, see
#: geopress.band.CONTOUR_GRID_BYTES) and its nodata mask (1). Measured with
#: scripts/measure_band_memory.py (peak RSS of service_bands in a fresh process, slope between
#: a 1500 x 1500 and a 4000 x 4000 window): 30.8 B/px, rounded up.
BAND_BYTES_PER_PIXEL = 32


@dataclass
class DemWindow:
    """Ground in ft on the HGLs' datum (float64, NaN where missing) over a window of one raster,
    north-up (a south-up raster's rows are turned over).

    ``decimation`` is 1 at full resolution, k when every k x k pixels were
    averaged so the window fits ``memory_mb``.
    """

    path: str
    crs: CRS
    array_ft: np.ndarray
    transform: "rasterio.Affine"
    decimation: int


def raster_footprint(path: Path) -> tuple[CRS, tuple[float, float, float, float]]:
    """The raster's CRS and bounds (left, bottom, right, top; bottom below top, south-up rasters too) in that CRS."""
    with _open(path) as src:
        inspect(src, path)
        left, bottom, right, top = src.bounds
        return CRS.from_wkt(src.crs.to_wkt()), (min(left, right), min(bottom, top), max(left, right), max(bottom, top))


#: pixels whose datum offset is computed at once, so the coordinates stay small beside the window
_DATUM_CHUNK_PX = 1 << 20


def _add_datum(ground: np.ndarray, transform, crs: CRS, shift: DatumShift) -> None:
    """Add ``shift``'s offset at each pixel centre to ``ground`` (ft), in place, a block of rows at a time."""
    if shift.method != "grid":
        ground += shift.constant_ft
        return
    h, w = ground.shape
    step = max(1, _DATUM_CHUNK_PX // max(w, 1))
    cols = np.arange(w) + 0.5
    for r0 in range(0, h, step):
        rows = np.arange(r0, min(r0 + step, h)) + 0.5
        cc, rr = np.meshgrid(cols, rows)
        x, y = transform @ (cc.ravel(), rr.ravel())
        ground[r0:r0 + rows.size] += shift.offsets_ft(x, y, crs).reshape(rows.size, w)


def read_dem_window(path: Path, bounds: tuple[float, float, float, float], terrain: TerrainConfig,
                    shift: DatumShift) -> DemWindow | None:
    """Read the raster over ``bounds`` (in its CRS) plus a one-pixel halo, as ground in ft on the HGLs' datum.

    ``terrain`` gives the vertical unit and the memory budget, ``shift`` the datum offset.
    The raster is read as :func:`inspect` and :func:`read_ground` say, as the customers are.

    Returns None when the bounds miss the raster. When the window would need
    more than ``memory_mb`` (at :data:`BAND_BYTES_PER_PIXEL`), it is read
    decimated by the smallest whole factor that fits (GDAL's average
    resampling, which uses overviews when the file has them) and the
    decimation is logged.
    """
    with _open(path) as src:
        meaning = inspect(src, path)
        unit = resolve_unit(src, path, terrain.vertical_units)
        memory_mb = terrain.memory_mb
        left, bottom, right, top = bounds
        cols, rows = ~src.transform @ (np.array([left, right, left, right]), np.array([bottom, bottom, top, top]))
        c0 = max(int(np.floor(cols.min())) - 1, 0)
        r0 = max(int(np.floor(rows.min())) - 1, 0)
        c1 = min(int(np.ceil(cols.max())) + 1, src.width)
        r1 = min(int(np.ceil(rows.max())) + 1, src.height)
        if c1 <= c0 or r1 <= r0:
            return None
        width, height = c1 - c0, r1 - r0
        budget = memory_mb * 1024 * 1024
        factor = max(1, int(np.ceil(np.sqrt(width * height * BAND_BYTES_PER_PIXEL / budget))))
        window = Window(c0, r0, width, height)
        out_shape = (max(1, height // factor), max(1, width // factor))
        with rasterio.Env(**GDAL_OPTIONS):
            ground = read_ground(src, meaning, window, out_shape,
                                 Resampling.average if factor > 1 else Resampling.nearest)
        transform = (src.transform @ rasterio.Affine.translation(c0, r0)
                     @ rasterio.Affine.scale(width / out_shape[1], height / out_shape[0]))
        if transform.e > 0:  # south-up: turn the rows over, so the window is north-up like the others
            ground = np.ascontiguousarray(ground[::-1])
            transform = transform @ rasterio.Affine.translation(0, ground.shape[0]) @ rasterio.Affine.scale(1, -1)
        if factor > 1:
            log.info("%s: the %d x %d px zone window exceeds terrain.memory_mb = %g; read decimated by %d",
                     path, width, height, memory_mb, factor)
        # in place: the same values as (stored * scale + offset) * ft per unit + datum offset, with less memory
        ground *= meaning.scale
        ground += meaning.offset
        ground *= feet_per_unit(unit)
        crs = CRS.from_wkt(src.crs.to_wkt())
        _add_datum(ground, transform, crs, shift)
        return DemWindow(path=str(path), crs=crs, array_ft=ground, transform=transform, decimation=factor)
