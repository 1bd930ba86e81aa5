"""One analytic plane written the ways real DEMs come, each sampled right or refused with one line.

Every variant holds the same plane, ground (m) = a + b * x + c * y at the pixel centres, so bilinear
sampling between centres is exact (GDAL's PixelIsArea convention). The expected ground comes from
scipy's RegularGridInterpolator on the plane's own pixel-centre grid, an outside reference that knows
nothing of geopress. Each variant must give it within 1 mm, or within half its storage step where the
band stores scaled integers. The customers' sampling (geopress.io.raster.sample_terrain) and the
service band's window (read_dem_window) read each variant the same way.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pytest
import rasterio
from affine import Affine
from pyproj import CRS
from rasterio.control import GroundControlPoint
from rasterio.errors import NotGeoreferencedWarning
from scipy.interpolate import RegularGridInterpolator

from geopress.config import TerrainConfig
from geopress.errors import InputError
from geopress.io.datum import DatumShift
from geopress.io.raster import read_dem_window, sample_terrain
from geopress.pressure import M_PER_FT

from conftest import ORIGIN, PROJECTED, plane

H, W = 40, 50
PIXEL = 10.0
TRANSFORM = Affine(PIXEL, 0.0, ORIGIN[0], 0.0, -PIXEL, ORIGIN[1])
A, B, C = 300.0 - 0.1 * ORIGIN[0] + 0.05 * ORIGIN[1], 0.1, -0.05  # 300 m at the top-left corner, ~350 m across
GROUND_M = plane(A, B, C, (H, W), TRANSFORM)
HOLE = (20, 25)  # a missing pixel (row, col), away from the edges
NO_SHIFT = DatumShift(method="constant")
#: 1 mm: float32 storage of ~350 m rounds to 2**-16 m (15 micrometres), far inside it
MM = 0.001
#: float64 round-off of ~350 m values (a few times 2**-52 * 350 = 1e-13 m), added to half a storage step, which a
#: value lying exactly half-way between two steps reaches
ROUND_OFF = 1e-9


def half_step(scale: float) -> float:
    """The most a value stored as round(value / scale) * scale can be off."""
    return scale / 2 + ROUND_OFF


def expected_m(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Bilinear ground from scipy's RegularGridInterpolator on the plane's pixel-centre grid (ascending axes)."""
    xc = TRANSFORM.c + (np.arange(W) + 0.5) * PIXEL
    yc = TRANSFORM.f - (np.arange(H) + 0.5) * PIXEL  # descending: flip rows for the interpolator
    rgi = RegularGridInterpolator((yc[::-1], xc), GROUND_M[::-1], method="linear")
    return rgi(np.column_stack([y, x]))


@dataclass
class Variant:
    name: str
    write: Callable[[Path], None]
    tolerance_m: float


def _profile(dtype: str, **extra) -> dict:
    return dict(driver="GTiff", height=H, width=W, count=1, dtype=dtype, crs=PROJECTED, transform=TRANSFORM, **extra)


def _with_hole(values: np.ndarray, fill) -> np.ndarray:
    out = values.copy()
    out[HOLE] = fill
    return out


def float32_nodata(path):
    with rasterio.open(path, "w", **_profile("float32", nodata=-9999.0)) as dst:
        dst.write(_with_hole(GROUND_M, -9999.0).astype("float32"), 1)


def float64_nan(path):
    with rasterio.open(path, "w", **_profile("float64", nodata=float("nan"))) as dst:
        dst.write(_with_hole(GROUND_M, np.nan), 1)


def scaled(dtype: str, scale: float, offset: float, nodata: int):
    def write(path):
        raw = np.round((GROUND_M - offset) / scale)
        with rasterio.open(path, "w", **_profile(dtype, nodata=nodata)) as dst:
            dst.write(_with_hole(raw, nodata).astype(dtype), 1)
            dst.scales, dst.offsets = (scale,), (offset,)
    return write


def mask_band(path):
    # no nodata value: the missing pixel is stored as 0 and marked only by the per-dataset mask band
    with rasterio.Env(GDAL_TIFF_INTERNAL_MASK=True):
        with rasterio.open(path, "w", **_profile("float32")) as dst:
            dst.write(_with_hole(GROUND_M, 0.0).astype("float32"), 1)
            dst.write_mask(_with_hole(np.full((H, W), 255, np.uint8), 0))


def alpha_band(path):
    # elevations in decimetres as UInt16 with an UInt16 alpha band, which GDAL applies as the mask
    raw = np.round(GROUND_M / 0.1)
    with rasterio.open(path, "w", **dict(_profile("uint16"), count=2), photometric="MINISBLACK", alpha="YES") as dst:
        dst.write(_with_hole(raw, 0).astype("uint16"), 1)
        dst.write(_with_hole(np.full((H, W), 65535), 0).astype("uint16"), 2)
        dst.scales = (0.1, 1.0)


def overviews(path):
    # an overview full of nonsense (an external .ovr, which GDAL reads as the file's first overview):
    # sampling at full resolution must never use it
    float32_nodata(path)
    ovr = dict(_profile("float32", nodata=-9999.0), height=H // 2, width=W // 2, transform=TRANSFORM @ Affine.scale(2))
    with rasterio.open(f"{path}.ovr", "w", **ovr) as dst:
        dst.write(np.full((H // 2, W // 2), 5000.0, np.float32), 1)
    with rasterio.open(path) as src:
        assert src.overviews(1) == [2]  # the overview is really there


def pixel_is_point(path):
    # GDAL writes the tie point at the centre of the top-left pixel (AREA_OR_POINT=Point) and reads it back
    # shifted by half a pixel to the PixelIsArea geotransform (RFC 33)
    with rasterio.open(path, "w", **_profile("float32", nodata=-9999.0)) as dst:
        dst.update_tags(AREA_OR_POINT="Point")
        dst.write(_with_hole(GROUND_M, -9999.0).astype("float32"), 1)
    with rasterio.Env(GTIFF_POINT_GEO_IGNORE=True), rasterio.open(path) as raw:
        assert raw.tags()["AREA_OR_POINT"] == "Point"
        assert raw.transform.c == TRANSFORM.c + PIXEL / 2  # the stored tie point is the pixel centre


def south_up(path):
    # rows from south to north: positive y pixel size, origin at the bottom-left corner
    t = Affine(PIXEL, 0.0, TRANSFORM.c, 0.0, PIXEL, TRANSFORM.f - H * PIXEL)
    with rasterio.open(path, "w", **dict(_profile("float32", nodata=-9999.0), transform=t)) as dst:
        dst.write(_with_hole(GROUND_M, -9999.0)[::-1].astype("float32"), 1)


VARIANTS = [
    Variant("float32 with a nodata value", float32_nodata, MM),
    Variant("float64 with NaN nodata", float64_nan, MM),
    # scaled integers: within half the storage step
    Variant("int16 centimetres above 300 m (scale 0.01, offset 300)", scaled("int16", 0.01, 300.0, -32768),
            half_step(0.01)),
    Variant("uint16 centimetres (scale 0.01)", scaled("uint16", 0.01, 0.0, 65535), half_step(0.01)),
    Variant("int32 millimetres (scale 0.001)", scaled("int32", 0.001, 0.0, -2147483648), half_step(0.001)),
    Variant("float32 with a mask band and no nodata", mask_band, MM),
    Variant("uint16 decimetres with an alpha band (scale 0.1)", alpha_band, half_step(0.1)),
    Variant("float32 with a nonsense overview", overviews, MM),
    Variant("PixelIsPoint GeoTIFF", pixel_is_point, MM),
    Variant("south-up rows (positive y pixel size)", south_up, MM),
]


@pytest.fixture(params=VARIANTS, ids=[v.name for v in VARIANTS])
def dem_variant(request, tmp_path) -> tuple[Variant, Path]:
    """Each way of writing the plane, as a GeoTIFF in tmp_path."""
    variant = request.param
    path = tmp_path / "dem.tif"
    variant.write(path)
    return variant, path


def _terrain(path: Path) -> TerrainConfig:
    return TerrainConfig(paths=(path,), vertical_units="m")


def _interior_points(n: int = 400, seed: int = 7) -> tuple[np.ndarray, np.ndarray]:
    """Points between pixel centres, at least one pixel from the edges and two from the hole."""
    rng = np.random.default_rng(seed)
    cols = rng.uniform(1.0, W - 1.0, 4 * n)
    rows = rng.uniform(1.0, H - 1.0, 4 * n)
    far = np.maximum(abs(rows - (HOLE[0] + 0.5)), abs(cols - (HOLE[1] + 0.5))) > 2.0
    x, y = TRANSFORM @ (cols[far][:n], rows[far][:n])
    return np.asarray(x), np.asarray(y)


def test_every_variant_samples_the_plane(dem_variant):
    variant, path = dem_variant
    x, y = _interior_points()
    got = sample_terrain(_terrain(path), x, y, CRS.from_user_input(PROJECTED), NO_SHIFT).ground_ft * M_PER_FT
    assert not np.isnan(got).any()
    np.testing.assert_allclose(got, expected_m(x, y), rtol=0, atol=variant.tolerance_m)


def test_every_variant_treats_its_missing_pixel_as_nodata(dem_variant):
    variant, path = dem_variant
    r, c = HOLE
    # on the missing pixel: no value; beside it (its neighbour in the 2x2 is missing): the containing
    # pixel's own value, as for any nodata value
    x, y = TRANSFORM @ (np.array([c + 0.5, c + 1.25]), np.array([r + 0.5, r + 0.5]))
    got = sample_terrain(_terrain(path), np.asarray(x), np.asarray(y), CRS.from_user_input(PROJECTED),
                         NO_SHIFT).ground_ft * M_PER_FT
    assert np.isnan(got[0])
    assert got[1] == pytest.approx(GROUND_M[r, c + 1], abs=variant.tolerance_m)


def test_the_band_window_reads_every_variant_as_the_customers_do(dem_variant):
    variant, path = dem_variant
    left, top = TRANSFORM.c, TRANSFORM.f
    win = read_dem_window(path, (left, top - H * PIXEL, left + W * PIXEL, top), _terrain(path), NO_SHIFT)
    assert win.transform.e < 0  # north-up, a south-up raster too
    rows, cols = np.mgrid[0:H, 0:W]
    x, y = win.transform @ (cols + 0.5, rows + 0.5)
    ground_m = win.array_ft * M_PER_FT
    hole = np.isnan(ground_m)
    assert hole.sum() == 1 and hole[HOLE]  # the missing pixel, wherever the rows were stored
    np.testing.assert_allclose(ground_m[~hole], (A + B * x + C * y)[~hole], rtol=0, atol=variant.tolerance_m)


# ---------------------------------------------------------------------------- refused, with one line each


def rotated(path):
    t = TRANSFORM @ Affine.rotation(10.0)
    with rasterio.open(path, "w", **dict(_profile("float32", nodata=-9999.0), transform=t)) as dst:
        dst.write(GROUND_M.astype("float32"), 1)


def ground_control_points(path):
    gcps = [GroundControlPoint(row=0, col=0, x=TRANSFORM.c, y=TRANSFORM.f),
            GroundControlPoint(row=H, col=0, x=TRANSFORM.c, y=TRANSFORM.f - H * PIXEL),
            GroundControlPoint(row=0, col=W, x=TRANSFORM.c + W * PIXEL, y=TRANSFORM.f)]
    profile = _profile("float32", nodata=-9999.0)
    del profile["transform"], profile["crs"]
    with warnings.catch_warnings():  # rasterio warns while the file has no georeferencing yet: the GCPs come next
        warnings.simplefilter("ignore", NotGeoreferencedWarning)
        with rasterio.open(path, "w", **profile) as dst:
            dst.gcps = (gcps, CRS.from_user_input(PROJECTED))
            dst.write(GROUND_M.astype("float32"), 1)


def float_alpha(path):
    # a Float32 alpha band: GDAL applies only Byte or UInt16 alpha bands as masks, so this one would be ignored
    with rasterio.open(path, "w", **dict(_profile("float32"), count=2), photometric="MINISBLACK", alpha="YES") as dst:
        dst.write(GROUND_M.astype("float32"), 1)
        dst.write(np.full((H, W), 255.0, np.float32), 2)


def zero_scale(path):
    with rasterio.open(path, "w", **_profile("int16", nodata=-32768)) as dst:
        dst.write(np.round(GROUND_M).astype("int16"), 1)
        dst.scales = (0.0,)


@pytest.mark.parametrize("write, words", [
    (rotated, "rotated or sheared geotransform"),
    (ground_control_points, "ground control points"),
    (float_alpha, "alpha band that GDAL does not apply"),
    (zero_scale, "scale of 0"),
], ids=["rotated", "gcps", "float alpha", "zero scale"])
def test_what_cannot_be_read_right_is_refused(tmp_path, write, words):
    path = tmp_path / "dem.tif"
    write(path)
    x, y = _interior_points(5)
    with pytest.raises(InputError, match=words) as info:
        sample_terrain(_terrain(path), x, y, CRS.from_user_input(PROJECTED), NO_SHIFT)
    assert info.value.path == str(path) and "\n" not in str(info.value)
    with pytest.raises(InputError, match=words):
        read_dem_window(path, (0, 0, 1, 1), _terrain(path), NO_SHIFT)
