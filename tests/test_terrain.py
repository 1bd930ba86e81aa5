"""Sampling a DEM at points (geopress.terrain), with outside checks on a real DEM."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import shapely
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st

from geopress.terrain import pixel_coords, sample, sample_pixels

from conftest import plane, write_raster

H, W = 12, 17
# A rotated-free but non-square, north-up grid: 2 m by 3 m pixels.
TRANSFORM = Affine(2.0, 0.0, 1000.0, 0.0, -3.0, 5000.0)
A, B, C = 250.0, 0.01, -0.02
DEM = plane(A, B, C, (H, W), TRANSFORM)
# Bilinear of float64 values ~ 300 with weights in [0, 1]: a few times 2**-52 * 300 = 7e-14 of round-off,
# plus the plane's own round-off at the centres; 1e-9 is generous and far below any sampling error
# (one pixel off would be 0.02 m or more).
PLANE_TOL = 1e-9


def to_map(cols, rows, transform=TRANSFORM):
    return transform @ (np.asarray(cols), np.asarray(rows))


def plane_at(cols, rows):
    x, y = to_map(cols, rows)
    return A + B * x + C * y


inset_cols = st.floats(0.5, W - 0.5)
inset_rows = st.floats(0.5, H - 0.5)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(inset_cols, inset_rows), min_size=1, max_size=20))
def test_bilinear_is_exact_on_a_plane_inside_the_half_pixel_inset(points):
    cols, rows = (np.array(v) for v in zip(*points))
    x, y = to_map(cols, rows)
    got = sample(DEM, TRANSFORM, x, y)
    np.testing.assert_allclose(got, A + B * x + C * y, rtol=0, atol=PLANE_TOL)


def test_bilinear_at_pixel_centres_returns_the_pixel_value_exactly():
    rows, cols = np.mgrid[0:H, 0:W]
    got = sample_pixels(DEM, cols.ravel() + 0.5, rows.ravel() + 0.5)
    np.testing.assert_array_equal(got, DEM.ravel())


def test_last_centre_lines_are_still_bilinear():
    # Exactly half a pixel from the right or bottom edge is inside the inset, as it is on the left and top.
    cols = np.array([1.0, W - 0.5, W - 0.5, 0.5])
    rows = np.array([H - 0.5, 3.2, H - 0.5, 0.5])
    np.testing.assert_allclose(sample_pixels(DEM, cols, rows), plane_at(cols, rows), rtol=0, atol=PLANE_TOL)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.floats(0.0, W, exclude_max=True), st.floats(0.0, H, exclude_max=True)),
                min_size=1, max_size=20))
def test_nearest_is_the_containing_pixel(points):
    cols, rows = (np.array(v) for v in zip(*points))
    got = sample_pixels(DEM, cols, rows, method="nearest")
    np.testing.assert_array_equal(got, DEM[np.floor(rows).astype(int), np.floor(cols).astype(int)])


def test_containing_pixel_is_half_open_on_the_right_and_bottom():
    got = sample_pixels(DEM, [0.0, W - 1e-9, W, 1.0, 1.0], [0.0, 1.0, 1.0, H - 1e-9, H], method="nearest")
    assert got[0] == DEM[0, 0]
    assert got[1] == DEM[1, W - 1]
    assert np.isnan(got[2])
    assert got[3] == DEM[H - 1, 1]
    assert np.isnan(got[4])


@pytest.mark.parametrize(
    "col, row, pixel",
    [
        (0.2, 5.7, (5, 0)),  # within half a pixel of the left edge
        (W - 0.3, 5.7, (5, W - 1)),  # right edge
        (6.8, 0.1, (0, 6)),  # top edge
        (6.8, H - 0.01, (H - 1, 6)),  # bottom edge
        (0.0, 0.0, (0, 0)),  # the outer corner itself
    ],
)
def test_within_half_a_pixel_of_the_edge_falls_back_to_the_containing_pixel(col, row, pixel):
    got = sample_pixels(DEM, [col], [row])
    assert got[0] == DEM[pixel]
    # ... which is not the plane's value there: the fallback really happened
    assert abs(got[0] - plane_at(col, row)) > 1e-6


def test_nodata_neighbour_falls_back_to_the_containing_pixel():
    dem = DEM.copy()
    dem[4, 5] = -9999.0
    # (5.2, 5.3) lies in pixel (5, 5); its four centres are rows 4-5, cols 4-5, so (4, 5) is a neighbour.
    got = sample_pixels(dem, [5.2, 8.6], [5.3, 8.5], nodata=-9999.0)
    assert got[0] == dem[5, 5]
    assert got[1] == pytest.approx(plane_at(8.6, 8.5), abs=PLANE_TOL)  # far from it: still bilinear


def test_nan_neighbour_in_a_float_array_without_nodata_falls_back():
    dem = DEM.copy()
    dem[4, 5] = np.nan
    assert sample_pixels(dem, [5.2], [5.3], nodata=None)[0] == dem[5, 5]


def test_nodata_containing_pixel_gives_nan():
    dem = DEM.copy()
    dem[5, 5] = -9999.0
    for method in ("bilinear", "nearest"):
        assert np.isnan(sample_pixels(dem, [5.5, 5.9], [5.5, 5.1], nodata=-9999.0, method=method)).all()


def test_integer_dem_with_nodata():
    dem = np.arange(H * W, dtype=np.int16).reshape(H, W)
    dem[0, 0] = -32768
    got = sample_pixels(dem, [0.5, 2.0, 3.5], [0.5, 2.0, 3.5], nodata=-32768)
    assert np.isnan(got[0])
    # (2.0, 2.0) is the corner shared by pixels (1, 1), (1, 2), (2, 1), (2, 2): bilinear weights them 1/4
    # each. Small integers and weights of 1/2 are exact in float64, so the mean comes out exactly.
    assert got[1] == (dem[1, 1] + dem[1, 2] + dem[2, 1] + dem[2, 2]) / 4
    assert got[2] == float(dem[3, 3])
    assert got.dtype == np.float64


@pytest.mark.parametrize("col, row", [(-0.01, 3.0), (3.0, -0.01), (W + 0.5, 3.0), (3.0, H + 2.0), (np.nan, 3.0)])
def test_outside_or_missing_point_gives_nan(col, row):
    for method in ("bilinear", "nearest"):
        assert np.isnan(sample_pixels(DEM, [col], [row], method=method)[0])


def test_pixel_coords_invert_the_transform():
    cols, rows = pixel_coords(TRANSFORM, [1000.0, 1000.0 + 2 * W], [5000.0, 5000.0 - 3 * H])
    np.testing.assert_allclose(cols, [0.0, W], atol=1e-12)  # exact arithmetic but for round-off
    np.testing.assert_allclose(rows, [0.0, H], atol=1e-12)


def test_bad_arguments_raise():
    with pytest.raises(ValueError, match="2-D"):
        sample_pixels(DEM.ravel(), [1.0], [1.0])
    with pytest.raises(ValueError, match="method"):
        sample_pixels(DEM, [1.0], [1.0], method="cubic")


@settings(max_examples=100, deadline=None)
@given(
    st.lists(st.floats(-500.0, 9000.0), min_size=9, max_size=9),
    st.floats(0.5, 2.5), st.floats(0.5, 2.5),
)
def test_bilinear_lies_between_its_four_neighbours(values, col, row):
    dem = np.array(values).reshape(3, 3)
    got = sample_pixels(dem, [col], [row])[0]
    c0, r0 = int(np.floor(col - 0.5)), int(np.floor(row - 0.5))
    c0, r0 = min(c0, 1), min(r0, 1)  # at exactly 2.5 the kernel's 2x2 block is still rows/cols 1-2
    block = dem[r0 : r0 + 2, c0 : c0 + 2]
    # a convex combination can overshoot its bounds only by round-off: a few ulps of values <= 9000
    tol = 1e-11
    assert block.min() - tol <= got <= block.max() + tol


def test_float32_dem_is_exact_to_its_storage_rounding():
    dem32 = DEM.astype(np.float32)
    cols = np.array([1.3, 7.77, 15.2])
    rows = np.array([2.6, 6.01, 10.9])
    got = sample_pixels(dem32, cols, rows)
    assert got.dtype == np.float64  # interpolation runs in float64
    # Each stored value is off the plane by at most half a float32 ulp (2**-24 relative), and bilinear
    # weights sum to 1, so the result is off by at most that much of the largest |z|; float64 arithmetic adds
    # nothing visible at that scale.
    tol = 2.0**-24 * np.abs(DEM).max()
    np.testing.assert_allclose(got, plane_at(cols, rows), rtol=0, atol=tol)


# ---------------------------------------------------------------- outside checks on a real DEM


def jacksboro():
    """matplotlib's sample DEM (3 arc-second grid, metres) and its north-up transform."""
    cbook = pytest.importorskip("matplotlib.cbook")
    try:
        path = Path(cbook.get_sample_data("jacksboro_fault_dem.npz", asfileobj=False))
    except (OSError, ValueError) as exc:
        pytest.skip(f"matplotlib's sample data jacksboro_fault_dem.npz is not installed ({exc})")
    if not path.exists():
        pytest.skip("matplotlib's sample data jacksboro_fault_dem.npz is not installed")
    with np.load(path) as data:
        elev = data["elevation"]
        dx, dy = float(data["dx"]), float(data["dy"])
        x0 = float(data["xmin"])
        # The file's "ymin" is the larger latitude: row 0 is the northern edge (width and height match
        # (xmax - xmin) / dx and |ymax - ymin| / dy, so these are pixel edges, not centres).
        top = max(float(data["ymin"]), float(data["ymax"]))
        assert elev.shape == (round(abs(float(data["ymax"]) - float(data["ymin"])) / dy),
                              round((float(data["xmax"]) - x0) / dx))
    return elev, Affine(dx, 0.0, x0, 0.0, -dy, top)


def interior_points(shape, n, seed):
    """Random fractional pixel coordinates inside the half-pixel inset, where bilinear applies."""
    rng = np.random.default_rng(seed)
    cols = rng.uniform(0.5, shape[1] - 0.5, n)
    rows = rng.uniform(0.5, shape[0] - 0.5, n)
    return cols, rows


# Both sides interpolate int16 values in float64 (scipy on float64 grids, ours casting each pixel).
# Map <-> pixel coordinates near lon -84 with 0.00083 deg pixels lose about 2**-52 * 1e5 = 2e-11 px; the
# steepest step of this DEM is under 100 m per pixel, so agreement must hold to 1e-8 m. 1e-6 m is the bound.
REAL_DEM_TOL_M = 1e-6
# rasterstats 0.21 still multiplies affine transforms with `*`, which affine deprecates; not ours to assert.
RASTERSTATS_AFFINE = pytest.mark.filterwarnings("ignore:Use `@` matmul:PendingDeprecationWarning")


def test_bilinear_matches_scipy_regular_grid_interpolator_on_a_real_dem():
    # scipy.interpolate.RegularGridInterpolator, method "linear" (reference library) on pixel centres.
    from scipy.interpolate import RegularGridInterpolator

    elev, transform = jacksboro()
    h, w = elev.shape
    xc = transform.c + transform.a * (np.arange(w) + 0.5)
    yc = transform.f + transform.e * (np.arange(h) + 0.5)  # descending; scipy wants ascending axes
    interp = RegularGridInterpolator((yc[::-1], xc), elev[::-1].astype(np.float64), method="linear")
    cols, rows = interior_points(elev.shape, 500, seed=1)
    x, y = transform @ (cols, rows)
    ours = sample(elev, transform, x, y)
    theirs = interp(np.column_stack([y, x]))
    np.testing.assert_allclose(ours, theirs, rtol=0, atol=REAL_DEM_TOL_M)


@RASTERSTATS_AFFINE
def test_bilinear_matches_rasterstats_point_query_on_a_real_dem(tmp_path):
    # rasterstats.point_query(interpolate="bilinear") (reference library): 2x2 pixel centres around the
    # point, nearest at nodata or edges (rasterstats source, point.py, confirmed in REFERENCES.md).
    from rasterstats import point_query

    elev, transform = jacksboro()
    tif = write_raster(tmp_path / "real.tif", elev, transform, crs="EPSG:4326", nodata=-32768)
    cols, rows = interior_points(elev.shape, 60, seed=2)
    x, y = transform @ (cols, rows)
    theirs = np.array(point_query(list(shapely.points(x, y)), str(tif), interpolate="bilinear"), dtype=np.float64)
    np.testing.assert_allclose(sample(elev, transform, x, y, nodata=-32768), theirs, rtol=0, atol=REAL_DEM_TOL_M)


@RASTERSTATS_AFFINE
def test_nodata_fallback_matches_rasterstats(tmp_path):
    # Same reference: with a nodata pixel among the four centres both fall back to the containing pixel.
    from rasterstats import point_query

    elev, transform = jacksboro()
    elev = elev.copy()
    elev[100, 200] = -32768
    tif = write_raster(tmp_path / "holed.tif", elev, transform, crs="EPSG:4326", nodata=-32768)
    # points in the four pixels around the hole, none at a .5 pixel fraction, where rasterstats rounds half to even
    cols = np.array([199.8, 201.2, 199.8, 201.2])
    rows = np.array([99.8, 99.8, 101.2, 101.2])
    x, y = transform @ (cols, rows)
    ours = sample(elev, transform, x, y, nodata=-32768)
    theirs = np.array(point_query(list(shapely.points(x, y)), str(tif), interpolate="bilinear"), dtype=np.float64)
    np.testing.assert_array_equal(ours, elev[np.floor(rows).astype(int), np.floor(cols).astype(int)])
    np.testing.assert_array_equal(ours, theirs)
