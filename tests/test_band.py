"""Serviceable band and limit lines on analytic plane DEMs."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from affine import Affine
from pyproj import CRS

from geopress import band
from geopress.classify import Criteria
from geopress.config import TerrainConfig
from geopress.io.datum import DatumShift
from geopress.io.raster import BAND_BYTES_PER_PIXEL, read_dem_window

from conftest import write_raster

NO_SHIFT = DatumShift(method="constant")

PIXEL = 10.0
X0, Y0 = 500_000.0, 11_000.0
TRANSFORM = Affine(PIXEL, 0.0, X0, 0.0, -PIXEL, Y0)
SHAPE = (120, 150)
# plane in ft over map metres: rises 0.30 ft per m east and 0.17 ft per m north, so the
# limit lines are oblique to the pixel grid and the staircase is exercised
A, B, C = 900.0, 0.30, 0.17


def f(x, y):
    return A + B * (np.asarray(x) - X0) + C * (np.asarray(y) - (Y0 - SHAPE[0] * PIXEL))


def plane_dem() -> np.ndarray:
    rows, cols = np.mgrid[0:SHAPE[0], 0:SHAPE[1]]
    x, y = TRANSFORM @ (cols + 0.5, rows + 0.5)
    return f(x, y)


def clip_halfplane(poly: shapely.Polygon, level: float, keep_above: bool) -> shapely.Geometry:
    """Exact part of ``poly`` where f >= level (or <= level): Sutherland-Hodgman on the plane's linear function."""
    pts = list(poly.exterior.coords)[:-1]
    out = []
    for (x1, y1), (x2, y2) in zip(pts, pts[1:] + pts[:1]):
        d1, d2 = f(x1, y1) - level, f(x2, y2) - level
        in1, in2 = (d1 >= 0, d2 >= 0) if keep_above else (d1 <= 0, d2 <= 0)
        if in1:
            out.append((x1, y1))
        if in1 != in2:
            t = d1 / (d1 - d2)
            out.append((x1 + t * (x2 - x1), y1 + t * (y2 - y1)))
    return shapely.Polygon(out) if len(out) >= 3 else shapely.Polygon()


def level_line(level: float) -> shapely.LineString:
    """A long straight line where f == level."""
    xa, xb = X0 - 5000, X0 + 5000
    ya = (level - A - B * (xa - X0)) / C + (Y0 - SHAPE[0] * PIXEL)
    yb = (level - A - B * (xb - X0)) / C + (Y0 - SHAPE[0] * PIXEL)
    return shapely.LineString([(xa, ya), (xb, yb)])


# an irregular convex zone well inside the DEM
ZONE = shapely.Polygon([(X0 + 120, Y0 - 1080), (X0 + 1380, Y0 - 1010), (X0 + 1300, Y0 - 90), (X0 + 200, Y0 - 160)])
CRIT = Criteria(max_static_psi=80.0, min_static_psi=35.0)


@pytest.mark.parametrize("hgl_high, hgl_low", [(1240.0, 1225.0), (1300.0, 1240.0), (1190.0, 1190.0)])
def test_band_area_on_a_plane_matches_the_exact_strip(hgl_high, hgl_low):
    lower, upper = band.limit_elevations(hgl_high, hgl_low, CRIT)
    result = band.zone_band(plane_dem(), TRANSFORM, ZONE, hgl_high, hgl_low, CRIT)
    exact = clip_halfplane(clip_halfplane(ZONE, lower, True), upper, False)
    line_length = sum(shapely.intersection(ZONE, level_line(v)).length for v in (lower, upper))
    assert exact.area > 0 and line_length > 0  # both limit lines cross this zone
    # The mask's staircase and the one-pixel simplification move each limit by at most about a
    # pixel, so the area may differ by at most one pixel's width along both lines (the criterion).
    assert abs(result.polygons.area - exact.area) <= PIXEL * line_length
    # and the band lies inside the zone and inside the strip widened by one pixel (+ half-diagonal of staircase)
    assert ZONE.buffer(1e-6).contains(result.polygons)
    widened = clip_halfplane(clip_halfplane(ZONE, lower - PIXEL * 1.5 * np.hypot(B, C), True),
                             upper + PIXEL * 1.5 * np.hypot(B, C), False)
    assert widened.buffer(1e-6).contains(result.polygons)


def test_limit_lines_lie_on_the_limit_elevations():
    result = band.zone_band(plane_dem(), TRANSFORM, ZONE, 1240.0, 1225.0, CRIT)
    lower, upper = result.lower_ft, result.upper_ft
    assert lower == pytest.approx(1240.0 - 80.0 / 0.433, abs=1e-12)
    assert upper == pytest.approx(1225.0 - 35.0 / 0.433, abs=1e-12)
    for name, level in (("max_static", lower), ("min_static", upper)):
        line = result.limits[name]
        xy = shapely.get_coordinates(line)
        assert len(xy) >= 2
        # contour vertices are linear interpolation between pixel centres: exact on a plane, up to
        # float64 rounding of ~1e3 ft values (1e-9 ft is far above that and far below anything real)
        np.testing.assert_allclose(f(xy[:, 0], xy[:, 1]), level, rtol=0, atol=1e-9)
        assert ZONE.buffer(1e-6).contains(line)
        exact_length = shapely.intersection(ZONE, level_line(level)).length
        # the contour stops at the last pixel centres inside the DEM and is clipped to the zone: same
        # straight line, so its length matches to well within a pixel
        assert line.length == pytest.approx(exact_length, abs=PIXEL)


def test_band_is_empty_when_the_operating_range_is_too_wide():
    # pressure window 35..80 psi is 103.9 ft of head; a 120 ft operating range cannot fit anywhere
    result = band.zone_band(plane_dem(), TRANSFORM, ZONE, 1300.0, 1180.0, CRIT)
    assert result.lower_ft > result.upper_ft
    assert result.polygons.is_empty and result.pixels == 0


def test_nodata_pixels_are_never_serviceable():
    dem = plane_dem()
    lower, upper = band.limit_elevations(1240.0, 1225.0, CRIT)
    full = band.zone_band(dem, TRANSFORM, ZONE, 1240.0, 1225.0, CRIT)
    holed = dem.copy()
    hole = (slice(40, 60), slice(18, 34))
    assert ((holed[hole] >= lower) & (holed[hole] <= upper)).any()
    holed[hole] = np.nan
    cut = band.zone_band(holed, TRANSFORM, ZONE, 1240.0, 1225.0, CRIT)
    in_band_hole = int(((dem[hole] >= lower) & (dem[hole] <= upper)).sum())
    assert cut.pixels == full.pixels - in_band_hole
    assert cut.polygons.area < full.polygons.area


def test_area_in_square_feet_and_acres():
    square = shapely.box(0, 0, 100, 100)  # 10,000 m2
    # 10,000 m2 / 0.3048**2 = 107,639.1 sq ft (international foot, exact definition)
    assert band.area_sq_ft(square, CRS("EPSG:32631")) == pytest.approx(10_000 / 0.3048**2, rel=1e-12)
    assert band.SQ_FT_PER_ACRE == 43_560.0  # acre = 43,560 sq ft by definition (from memory)
    # a 0.01 x 0.01 degree cell at the equator is about 1.11 km x 1.11 km = 1.232e6 m2 (from memory: 111.3 km per degree)
    cell = shapely.box(0, 0, 0.01, 0.01)
    assert band.area_sq_ft(cell, CRS("EPSG:4326")) * 0.3048**2 == pytest.approx(1.232e6, rel=0.01)


def test_decimated_window_keeps_the_georeferencing(tmp_path):
    dem_m = (plane_dem() * 0.3048).astype(np.float64)  # store metres, read back as ft
    path = write_raster(tmp_path / "dem.tif", dem_m, TRANSFORM)
    bounds = ZONE.bounds
    full = read_dem_window(path, bounds, TerrainConfig(paths=(path,), vertical_units="m", memory_mb=1024), NO_SHIFT)
    assert full.decimation == 1
    # budget of ~1/10 of the window's working size forces decimation by ceil(sqrt(10)) or so
    need_mb = full.array_ft.size * BAND_BYTES_PER_PIXEL / 2**20
    small = read_dem_window(path, bounds, TerrainConfig(paths=(path,), vertical_units="m", memory_mb=need_mb / 10),
                            NO_SHIFT)
    assert small.decimation >= 3
    assert small.array_ft.size * BAND_BYTES_PER_PIXEL / 2**20 <= need_mb / 10 * 1.0001
    rows, cols = np.mgrid[0:small.array_ft.shape[0], 0:small.array_ft.shape[1]]
    x, y = small.transform @ (cols + 0.5, rows + 0.5)
    # The average of a plane over a block is the plane at the block's centre. The window is not a whole
    # number of blocks (e.g. 101 rows into 25), and GDAL averages whole source pixels, so the averaged
    # area's centre may miss the decimated pixel's centre by up to half a source pixel: at most half the
    # plane's rise per source pixel. A transform off by one decimated pixel would miss by >= 4 x that.
    half_pixel_rise = 0.5 * PIXEL * np.hypot(B, C)
    np.testing.assert_allclose(small.array_ft, f(x, y), rtol=0, atol=half_pixel_rise)
    assert read_dem_window(path, (0.0, 0.0, 10.0, 10.0), TerrainConfig(paths=(path,), vertical_units="m"),
                           NO_SHIFT) is None
    # the datum offset is added to every elevation after the unit conversion
    shifted = read_dem_window(path, bounds, TerrainConfig(paths=(path,), vertical_units="m"),
                              DatumShift(method="constant", constant_ft=-3.25))
    np.testing.assert_array_equal(shifted.array_ft, full.array_ft - 3.25)


def test_contour_traced_in_the_crossing_box_equals_contourpy_on_the_whole_grid():
    # reference: contourpy over the full grid, vertices moved to pixel centres as contour_lines does
    import contourpy

    rng = np.random.default_rng(3)
    v, u = np.mgrid[0:80, 0:90]
    dem = 100.0 + 0.5 * v + 3.0 * np.sin(u / 7.0) + rng.normal(0, 0.2, v.shape)
    dem[30:34, 40:44] = np.nan
    t = Affine(2.0, 0.0, 500.0, 0.0, -2.0, 900.0)
    gen = contourpy.contour_generator(z=np.ma.masked_invalid(dem), line_type=contourpy.LineType.Separate)
    expected = shapely.MultiLineString([np.column_stack(t @ (xy[:, 0] + 0.5, xy[:, 1] + 0.5))
                                        for xy in gen.lines(120.0) if len(xy) >= 2])
    got = band.contour_lines(dem, t, 120.0)
    assert got.wkb == expected.wkb  # vertex for vertex, in the same order
    assert band.contour_lines(dem, t, 10.0).is_empty  # the level is below every pixel


@pytest.mark.parametrize("half_width, whole_rows", [(4.0, False), (40.0, True)])
def test_contour_on_whole_rows_or_on_the_column_box_equals_contourpy_on_the_whole_grid(monkeypatch, half_width,
                                                                                        whole_rows):
    # a hill whose contour spans a few columns (traced on the column box, copied by contourpy) or most
    # of them (traced on whole rows, a view); NaN beside the box in its rows, and across the contour (which
    # opens the loop)
    import contourpy

    v, u = np.mgrid[0:80, 0:90]
    dem = 100.0 + 10.0 * np.exp(-(((u - 45.0) / half_width) ** 2 + ((v - 40.0) / 12.0) ** 2)) + 0.01 * u
    dem[38:41, 0:2] = np.nan
    dem[29:32, 44:47] = np.nan
    t = Affine(2.0, 0.0, 500.0, 0.0, -2.0, 900.0)
    gen = contourpy.contour_generator(z=np.ma.masked_invalid(dem), line_type=contourpy.LineType.Separate)
    expected = shapely.MultiLineString([np.column_stack(t @ (xy[:, 0] + 0.5, xy[:, 1] + 0.5))
                                        for xy in gen.lines(105.0) if len(xy) >= 2])
    assert shapely.get_coordinates(expected)[:, 0].min() > t.c + 10 * t.a  # the box is narrower than the grid
    traced = []
    real = contourpy.contour_generator
    monkeypatch.setattr(contourpy, "contour_generator", lambda **kw: traced.append(kw["z"].shape) or real(**kw))
    got = band.contour_lines(dem, t, 105.0)
    assert got.wkb == expected.wkb  # vertex for vertex, in the same order
    assert (traced[0][1] == dem.shape[1]) == whole_rows and traced[0][0] < dem.shape[0]
