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
"""

from __future__ import annotations

import logging
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import rasterio
from pyproj import CRS, Transformer
from rasterio.windows import Window

from ..config import TerrainConfig
from ..errors import InputError, TerrainWarning
from ..pressure import feet_per_unit
from ..terrain import plan_windows, sample_pixels
from .mosaic import Group, Tile, first_tile, group_tiles, open_group

log = logging.getLogger(__name__)

_UNIT_NAMES = {
    "m": "m", "metre": "m", "meter": "m", "metres": "m", "meters": "m",
    "ft": "ft", "foot": "ft", "feet": "ft", "international foot": "ft", "foot (international)": "ft",
    "us_ft": "us_ft", "us survey foot": "us_ft", "us-ft": "us_ft", "ftus": "us_ft", "foot_us": "us_ft",
    "us survey feet": "us_ft",
}
#: plausible ground elevations on Earth, ft: Dead Sea shore about -1410 ft, Everest about 29,030 ft (from memory).
PLAUSIBLE_FT = (-1500.0, 29100.0)


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


@dataclass
class TerrainResult:
    """Ground elevations, ft, with what was read for them.

    ``ranges`` maps each raster group's label to its unit and the lowest and
    highest elevation sampled from it, ft (for :func:`warn_implausible`).
    """

    ground_ft: np.ndarray
    rasters: list[RasterReport] = field(default_factory=list)
    inside_any: int = 0
    ranges: dict[str, tuple[str, float, float]] = field(default_factory=dict)


def warn_implausible(result: TerrainResult, stacklevel: int = 2) -> None:
    """A TerrainWarning for each raster group whose sampled elevations are not plausible ground."""
    for label, (unit, lo, hi) in result.ranges.items():
        if np.isfinite(lo) and (lo < PLAUSIBLE_FT[0] or hi > PLAUSIBLE_FT[1]):
            warnings.warn(
                f"{label}: sampled elevations {lo:,.0f} to {hi:,.0f} ft are not plausible ground for vertical "
                f"unit \"{unit}\"; check terrain.vertical_units",
                TerrainWarning, stacklevel=stacklevel + 1,
            )


def _open(path: Path):
    if not path.exists():
        raise InputError("raster not found (from terrain.paths); check the path", path=path, key="terrain.paths")
    if path.is_dir():
        raise InputError("is a folder, not a raster (from terrain.paths); list the raster files", path=path, key="terrain.paths")
    if not os.access(path, os.R_OK):
        raise InputError("cannot read the raster (from terrain.paths); check its permissions", path=path, key="terrain.paths")
    try:
        return rasterio.open(path)
    except rasterio.errors.RasterioIOError as exc:
        raise InputError(f"not a raster GDAL can open ({exc}); check terrain.paths", path=path, key="terrain.paths") from exc


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


def describe(path: Path, configured_unit: str | None) -> RasterReport:
    """Open a raster and check CRS and unit, without reading pixels."""
    with _open(path) as src:
        if src.crs is None:
            raise InputError("the raster has no CRS; assign one (e.g. gdal_edit -a_srs) and run again", path=path, key="crs")
        unit = resolve_unit(src, path, configured_unit)
        return RasterReport(path=str(path), crs=src.crs.to_string(), vertical_unit=unit, shape=(src.height, src.width))


def read_tiles(paths, configured_unit: str | None) -> list[Tile]:
    """Open every raster once for its CRS, grid, type, nodata and vertical unit (no pixels read)."""
    tiles = []
    for path in paths:
        with _open(path) as src:
            if src.crs is None:
                raise InputError("the raster has no CRS; assign one (e.g. gdal_edit -a_srs) and run again", path=path, key="crs")
            unit = resolve_unit(src, path, configured_unit)
            tiles.append(Tile(path=Path(path), crs_wkt=src.crs.to_wkt(), crs_name=src.crs.to_string(),
                              transform=src.transform, width=src.width, height=src.height, dtype=src.dtypes[0],
                              nodata=src.nodata, unit=unit, block=tuple(src.block_shapes[0])))
    return tiles


def _sample_group(src, group: Group, cols: np.ndarray, rows: np.ndarray, method: str, max_pixels: float,
                  reports: list[RasterReport], sampled: Callable[[int], None] | None = None) -> np.ndarray:
    """Sample ``src`` (the group opened) at fractional pixel coordinates of its grid (NaN outside).

    Reads only the windows :func:`~geopress.terrain.plan_windows` plans; each
    tile's report counts the windows that touched it, its pixels in them and
    the customers it served. ``sampled(n)`` is told after each window how many
    customers got a value from it.
    """
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
        arr = src.read(1, window=Window(c0, r0, c1 - c0, r1 - r0))
        out[idx] = sample_pixels(arr, cols[idx] - c0, rows[idx] - r0, nodata=group.nodata, method=method)
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


def sample_terrain(cfg: TerrainConfig, x: np.ndarray, y: np.ndarray, crs: CRS, *, warn: bool = True,
                   count: Callable[[int, int | None], None] | None = None) -> TerrainResult:
    """Ground elevation, ft, at map points ``x``, ``y`` in ``crs``; NaN where no raster has a value.

    The rasters are grouped and read as :mod:`geopress.io.mosaic` describes;
    each customer is reprojected to the CRS of the group that serves it.
    Never more than ``cfg.memory_mb`` of raster is read at once. With
    ``warn=False`` implausible elevations are only recorded in ``ranges``.
    ``count(done, total)`` is told, after each window read, how many of the
    ``total`` customers with a location have a value so far, and ``total``
    once every raster has been tried.
    """
    total = int(np.count_nonzero(~np.isnan(x)))
    done = 0

    def sampled(n: int) -> None:
        nonlocal done
        done += n
        count(done, total)

    ground = np.full(x.shape, np.nan)
    tiles = read_tiles(cfg.paths, cfg.vertical_units)
    reports = {t.path: RasterReport(path=str(t.path), crs=t.crs_name, vertical_unit=t.unit, shape=(t.height, t.width))
               for t in tiles}
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
        max_pixels = memory_bytes / np.dtype(group.dtype).itemsize
        # GDAL_NUM_THREADS: GeoTIFF blocks of one read are decompressed on every core
        with rasterio.Env(GDAL_NUM_THREADS="ALL_CPUS"), open_group(group) as src:
            values = _sample_group(src, group, cols, rows, cfg.method, max_pixels, [reports[t.path] for t in group.tiles],
                                   sampled if count is not None else None)
        ft = values * feet_per_unit(group.unit) + cfg.datum_offset_ft
        lo, hi = np.nanmin(ft, initial=np.inf), np.nanmax(ft, initial=-np.inf)
        result.ranges[group.label()] = (group.unit, float(lo), float(hi))
        ground[todo] = ft
        log.info("sampled %d customers from %s", int(np.count_nonzero(~np.isnan(ft))), group.label())
    result.inside_any = int(inside_any.sum())
    if count is not None:
        count(total, total)
    if warn:
        warn_implausible(result)
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
    """Ground in ft (float64, NaN for nodata) over a window of one raster.

    ``decimation`` is 1 at full resolution, k when every k x k pixels were
    averaged so the window fits ``memory_mb``.
    """

    path: str
    crs: CRS
    array_ft: np.ndarray
    transform: "rasterio.Affine"
    decimation: int


def raster_footprint(path: Path) -> tuple[CRS, tuple[float, float, float, float]]:
    """The raster's CRS and bounds (left, bottom, right, top) in that CRS."""
    with _open(path) as src:
        if src.crs is None:
            raise InputError("the raster has no CRS; assign one (e.g. gdal_edit -a_srs) and run again", path=path, key="crs")
        return CRS.from_wkt(src.crs.to_wkt()), tuple(src.bounds)


def read_dem_window(path: Path, bounds: tuple[float, float, float, float], terrain: TerrainConfig) -> DemWindow | None:
    """Read the raster over ``bounds`` (in its CRS) plus a one-pixel halo, as ground in ft.

    ``terrain`` gives the vertical unit, the datum offset and the memory budget.

    Returns None when the bounds miss the raster. When the window would need
    more than ``memory_mb`` (at :data:`BAND_BYTES_PER_PIXEL`), it is read
    decimated by the smallest whole factor that fits (GDAL's average
    resampling, which uses overviews when the file has them) and the
    decimation is logged.
    """
    from rasterio.enums import Resampling

    with _open(path) as src:
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
        arr = src.read(1, window=window, out_shape=out_shape, masked=True,
                       resampling=Resampling.average if factor > 1 else Resampling.nearest)
        transform = (src.transform @ rasterio.Affine.translation(c0, r0)
                     @ rasterio.Affine.scale(width / out_shape[1], height / out_shape[0]))
        if factor > 1:
            log.info("%s: the %d x %d px zone window exceeds terrain.memory_mb = %g; read decimated by %d",
                     path, width, height, memory_mb, factor)
        # in place, one float64 copy: the same values as filled(...) * ft + offset, with less memory
        ground = arr.data.astype(np.float64)
        ground[np.ma.getmaskarray(arr)] = np.nan
        del arr
        ground *= feet_per_unit(unit)
        ground += terrain.datum_offset_ft
        return DemWindow(path=str(path), crs=CRS.from_wkt(src.crs.to_wkt()), array_ft=ground,
                         transform=transform, decimation=factor)
