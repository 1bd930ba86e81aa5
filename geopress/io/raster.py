"""Sampling DEM rasters at customer points with rasterio.

Rasters are tried in the order configured; a customer takes its ground
elevation from the first raster that has a value there. Points are
reprojected to each raster's CRS with pyproj (``always_xy``). Only the
windows that hold customers are read: the whole covering window when it fits
``memory_mb``, otherwise one block (plus a one-pixel halo) at a time, with the
customers sorted by block so each block is read once.
"""

from __future__ import annotations

import logging
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import rasterio
from pyproj import CRS, Transformer
from rasterio.windows import Window

from ..config import TerrainConfig
from ..errors import InputError, TerrainWarning
from ..pressure import feet_per_unit
from ..terrain import sample_pixels

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
    ground_ft: np.ndarray
    rasters: list[RasterReport] = field(default_factory=list)
    inside_any: int = 0


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


def _sample_one(src, cols, rows, method: str, memory_bytes: float, report: RasterReport) -> np.ndarray:
    """Sample band 1 of ``src`` at fractional pixel coordinates (NaN outside)."""
    h, w = src.height, src.width
    out = np.full(cols.shape, np.nan)
    cf, rf = np.floor(cols), np.floor(rows)
    inside = np.flatnonzero((cf >= 0) & (cf < w) & (rf >= 0) & (rf < h))
    if inside.size == 0:
        return out
    ci, ri = cf[inside].astype(np.int64), rf[inside].astype(np.int64)
    itemsize = np.dtype(src.dtypes[0]).itemsize
    nodata = src.nodata
    c0, c1 = max(ci.min() - 1, 0), min(ci.max() + 2, w)
    r0, r1 = max(ri.min() - 1, 0), min(ri.max() + 2, h)
    if (c1 - c0) * (r1 - r0) * itemsize <= memory_bytes:
        windows = [(inside, r0, r1, c0, c1)]
    else:
        bh, bw = src.block_shapes[0]
        block = (ri // bh) * ((w + bw - 1) // bw) + ci // bw
        order = np.argsort(block, kind="stable")
        sorted_blocks = block[order]
        starts = np.flatnonzero(np.r_[True, sorted_blocks[1:] != sorted_blocks[:-1]])
        ends = np.r_[starts[1:], sorted_blocks.size]
        nbx = (w + bw - 1) // bw
        windows = []
        for s, e in zip(starts, ends):
            b = int(sorted_blocks[s])
            br, bc = divmod(b, nbx)
            windows.append((inside[order[s:e]], max(br * bh - 1, 0), min((br + 1) * bh + 1, h),
                            max(bc * bw - 1, 0), min((bc + 1) * bw + 1, w)))
    for idx, wr0, wr1, wc0, wc1 in windows:
        arr = src.read(1, window=Window(wc0, wr0, wc1 - wc0, wr1 - wr0))
        # A window edge that is not the raster's edge has a one-pixel halo beyond every
        # customer in it, so the kernel's edge fallback only triggers at the raster's edge.
        out[idx] = sample_pixels(arr, cols[idx] - wc0, rows[idx] - wr0, nodata=nodata, method=method)
        report.windows_read += 1
        report.pixels_read += arr.size
    report.customers_sampled += int(np.count_nonzero(~np.isnan(out)))
    return out


def sample_terrain(cfg: TerrainConfig, x: np.ndarray, y: np.ndarray, crs: CRS) -> TerrainResult:
    """Ground elevation, ft, at map points ``x``, ``y`` in ``crs``; NaN where no raster has a value."""
    ground = np.full(x.shape, np.nan)
    result = TerrainResult(ground_ft=ground)
    transformers: dict[str, Transformer] = {}
    inside_any = np.zeros(x.shape, dtype=bool)
    memory_bytes = cfg.memory_mb * 1024 * 1024
    for path in cfg.paths:
        todo = np.flatnonzero(np.isnan(ground) & ~np.isnan(x))
        with _open(path) as src:
            if src.crs is None:
                raise InputError("the raster has no CRS; assign one (e.g. gdal_edit -a_srs) and run again", path=path, key="crs")
            unit = resolve_unit(src, path, cfg.vertical_units)
            report = RasterReport(path=str(path), crs=src.crs.to_string(), vertical_unit=unit, shape=(src.height, src.width))
            result.rasters.append(report)
            if todo.size == 0:
                continue
            key = src.crs.to_wkt()
            if key not in transformers:
                transformers[key] = Transformer.from_crs(crs, CRS.from_wkt(key), always_xy=True)
            rx, ry = transformers[key].transform(x[todo], y[todo])
            inv = ~src.transform
            cols = inv.a * rx + inv.b * ry + inv.c
            rows = inv.d * rx + inv.e * ry + inv.f
            inside_any[todo] |= (cols >= 0) & (cols < src.width) & (rows >= 0) & (rows < src.height)
            values = _sample_one(src, cols, rows, cfg.method, memory_bytes, report)
            ft = values * feet_per_unit(unit)
            lo, hi = np.nanmin(ft, initial=np.inf), np.nanmax(ft, initial=-np.inf)
            if np.isfinite(lo) and (lo < PLAUSIBLE_FT[0] or hi > PLAUSIBLE_FT[1]):
                warnings.warn(
                    f"{path}: sampled elevations {lo:,.0f} to {hi:,.0f} ft are not plausible ground for vertical unit "
                    f"\"{unit}\"; check terrain.vertical_units",
                    TerrainWarning, stacklevel=2,
                )
            ground[todo] = ft
            log.info("sampled %d customers from %s (%d windows)", report.customers_sampled, path, report.windows_read)
    result.inside_any = int(inside_any.sum())
    return result


# --------------------------------------------------------------------------
# DEM windows over zones (for the serviceable band and the report's maps)

#: working bytes per DEM pixel when a zone's band is computed (float64 ground, masks, contour scratch).
BAND_BYTES_PER_PIXEL = 24


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


def read_dem_window(path: Path, bounds: tuple[float, float, float, float], vertical_units: str | None,
                    memory_mb: float) -> DemWindow | None:
    """Read the raster over ``bounds`` (in its CRS) plus a one-pixel halo, as ground in ft.

    Returns None when the bounds miss the raster. When the window would need
    more than ``memory_mb`` (at :data:`BAND_BYTES_PER_PIXEL`), it is read
    decimated by the smallest whole factor that fits (GDAL's average
    resampling, which uses overviews when the file has them) and the
    decimation is logged.
    """
    from rasterio.enums import Resampling

    with _open(path) as src:
        unit = resolve_unit(src, path, vertical_units)
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
        ground = np.ma.filled(arr.astype(np.float64), np.nan) * feet_per_unit(unit)
        return DemWindow(path=str(path), crs=CRS.from_wkt(src.crs.to_wkt()), array_ft=ground,
                         transform=transform, decimation=factor)
