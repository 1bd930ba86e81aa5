"""Tiled and larger-than-memory terrain: mosaics, seams, window planning, the fast kernel path."""

from __future__ import annotations

import numpy as np
import pytest
from affine import Affine
from pyproj import CRS

from geopress.config import TerrainConfig
from geopress.io import mosaic
from geopress.io.datum import DatumShift
from geopress.io.raster import read_tiles, sample_terrain

NO_SHIFT = DatumShift(method="constant")
from geopress.pressure import M_PER_FT
from geopress.terrain import plan_windows, sample_pixels
from tests.conftest import ORIGIN, PROJECTED, write_raster

PIX = 10.0
TILE = 20  # pixels a side


def _surface(shape, seed=0):
    """A rough surface (not a plane) so that a wrong neighbour pixel changes the bilinear value."""
    rng = np.random.default_rng(seed)
    return (300.0 + 50.0 * rng.random(shape)).astype(np.float32)


def _tiles(tmp_path, dem, n, *, nodata=-9999.0, order=None):
    """Cut ``dem`` into n x n tiles written as GeoTIFFs; returns paths (row-major, or ``order``)."""
    paths = []
    for i in range(n):
        for j in range(n):
            part = dem[i * TILE:(i + 1) * TILE, j * TILE:(j + 1) * TILE]
            t = Affine(PIX, 0, ORIGIN[0] + j * TILE * PIX, 0, -PIX, ORIGIN[1] - i * TILE * PIX)
            paths.append(write_raster(tmp_path / f"t{i}{j}.tif", np.ascontiguousarray(part), t, nodata=nodata,
                                      tiled=True))
    return paths if order is None else [paths[k] for k in order]


def _points(n_side, rng, n=4000):
    """Points over the mosaic, many of them within a pixel of a seam."""
    size = n_side * TILE * PIX
    x = ORIGIN[0] + rng.uniform(0, size, n)
    y = ORIGIN[1] - rng.uniform(0, size, n)
    seams = ORIGIN[0] + np.arange(1, n_side) * TILE * PIX
    k = n // 2
    x[:k] = rng.choice(seams, k) + rng.uniform(-PIX, PIX, k)
    return x, y


def _cfg(paths, **kw):
    return TerrainConfig(paths=tuple(paths), vertical_units="m", **kw)


@pytest.mark.parametrize("memory_mb", [1024.0, 0.002])
def test_mosaic_of_3x3_tiles_equals_the_merged_raster(tmp_path, memory_mb):
    dem = _surface((3 * TILE, 3 * TILE))
    merged = write_raster(tmp_path / "merged.tif", dem, Affine(PIX, 0, ORIGIN[0], 0, -PIX, ORIGIN[1]))
    (tmp_path / "tiles").mkdir()
    paths = _tiles(tmp_path / "tiles", dem, 3, order=[4, 0, 8, 2, 6, 1, 3, 5, 7])  # listing order must not matter
    x, y = _points(3, np.random.default_rng(1))
    crs = CRS.from_user_input(PROJECTED)
    # 0.002 MB = 524 float32 pixels: every window is a few blocks, so the run reads many windows
    got = sample_terrain(_cfg(paths, memory_mb=memory_mb), x, y, crs, NO_SHIFT)
    want = sample_terrain(_cfg([merged]), x, y, crs, NO_SHIFT)
    assert np.array_equal(got.ground_ft, want.ground_ft, equal_nan=True)  # same pixels, same arithmetic: bit for bit
    assert np.count_nonzero(np.isnan(got.ground_ft)) == 0
    assert sum(r.customers_sampled for r in got.rasters) == x.size
    if memory_mb < 1:
        # a 0.002 MB budget is 524 float32 pixels, so the 60 x 60 mosaic takes many windows,
        # and a window's share of one tile can never exceed the budget
        assert sum(r.windows_read for r in got.rasters) > 9 * 4
        assert max(r.pixels_read / r.windows_read for r in got.rasters) <= 0.002 * 1024 * 1024 / 4


def test_seam_value_uses_the_neighbour_tile(tmp_path):
    """A point half a pixel from a seam is interpolated across it, not snapped to its own pixel."""
    dem = _surface((TILE, 2 * TILE), seed=3)
    paths = _tiles(tmp_path, np.vstack([dem, dem]), 2)[:2]  # the top row of tiles: a west-east seam
    x = np.array([ORIGIN[0] + TILE * PIX + 0.25 * PIX])  # a quarter pixel east of the seam
    y = np.array([ORIGIN[1] - 5.5 * PIX])  # on a row of pixel centres
    got = sample_terrain(_cfg(paths), x, y, CRS.from_user_input(PROJECTED), NO_SHIFT).ground_ft
    left, right = float(dem[5, TILE - 1]), float(dem[5, TILE])
    # bilinear between the last pixel of the west tile and the first of the east tile, weight 0.75 on the east one
    assert got[0] * M_PER_FT == pytest.approx(left + 0.75 * (right - left), rel=0, abs=1e-9)


def test_overlapping_tiles_first_listed_with_a_value_wins(tmp_path):
    t = Affine(PIX, 0, ORIGIN[0], 0, -PIX, ORIGIN[1])
    low = np.full((10, 10), 100.0, dtype=np.float32)
    high = np.full((10, 10), 200.0, dtype=np.float32)
    high[:, :5] = -9999.0  # the first listed has nodata on its west half
    a = write_raster(tmp_path / "a.tif", high, t)
    b = write_raster(tmp_path / "b.tif", low, t @ Affine.translation(2, 0))  # shifted two pixels east
    x = ORIGIN[0] + np.array([1.5, 7.5, 11.5]) * PIX
    y = np.full(3, ORIGIN[1] - 5.5 * PIX)
    got = sample_terrain(_cfg([a, b]), x, y, CRS.from_user_input(PROJECTED), NO_SHIFT).ground_ft * M_PER_FT
    # 1.5: only a covers it, nodata there -> NaN; 7.5: both cover it, a has a value; 11.5: only b
    assert np.isnan(got[0])
    assert got[1:].tolist() == pytest.approx([200.0, 100.0], rel=0, abs=1e-9)  # m -> ft -> m round trip


def test_tiles_in_another_crs_and_resolution_form_their_own_group(tmp_path):
    dem = _surface((TILE, TILE))
    a = write_raster(tmp_path / "a.tif", dem, Affine(PIX, 0, ORIGIN[0], 0, -PIX, ORIGIN[1]))
    coarse = write_raster(tmp_path / "coarse.tif", np.full((4, 4), 50.0), Affine(100, 0, ORIGIN[0], 0, -100, ORIGIN[1]))
    # the same ground in UTM 31S (false northing 10,000 km): the customers are reprojected to it
    south = write_raster(tmp_path / "south.tif", np.full((10, 10), 70.0),
                         Affine(PIX, 0, ORIGIN[0] + 400, 0, -PIX, ORIGIN[1] + 10_000_000), crs="EPSG:32731")
    tiles = read_tiles([a, coarse, south], "m")
    groups = mosaic.group_tiles(tiles)
    assert [len(g.tiles) for g in groups] == [1, 1, 1]
    x = ORIGIN[0] + np.array([50.0, 300.0, 450.0])
    y = ORIGIN[1] - np.array([50.0, 300.0, 50.0])
    got = sample_terrain(_cfg([a, coarse, south]), x, y, CRS.from_user_input(PROJECTED), NO_SHIFT).ground_ft * M_PER_FT
    # (50, 50) m is in a; (300, 300) m is past a's 200 m and in coarse; (450, 50) m only in the 31S raster
    # abs 1e-9 m: the m -> ft -> m round trip of float64 values near 100 m
    want = [sample_pixels(dem, np.array([5.0]), np.array([5.0]))[0], 50.0, 70.0]
    assert got.tolist() == pytest.approx(want, rel=0, abs=1e-9)


def test_glob_and_vrt_paths(tmp_path):
    import rasterio

    dem = _surface((2 * TILE, 2 * TILE))
    (tmp_path / "tiles").mkdir()
    paths = _tiles(tmp_path / "tiles", dem, 2)
    group = mosaic.group_tiles(read_tiles(paths, "m"))[0]
    vrt = tmp_path / "all.vrt"
    vrt.write_text(mosaic.vrt_xml(group))
    with rasterio.open(vrt) as src:
        assert np.array_equal(src.read(1), dem)  # the VRT is the merged raster
    from geopress.config import config_from_dict

    cfg = config_from_dict({
        "customers": {"path": "c.gpkg", "id_field": "id"},
        "terrain": {"paths": ["tiles/*.tif"], "vertical_units": "m"},
        "zones": {"path": "z.gpkg", "id_field": "zone",
                  "source": [{"zone": "A", "kind": "pump", "discharge_hgl_ft": 100.0}]},
        "output": {"path": "out/o.gpkg", "mailing_dir": "out/m"},
    }, base_dir=tmp_path)
    assert list(cfg.terrain.paths) == sorted(paths)
    x, y = _points(2, np.random.default_rng(2), n=500)
    crs = CRS.from_user_input(PROJECTED)
    by_glob = sample_terrain(cfg.terrain, x, y, crs, NO_SHIFT).ground_ft
    by_vrt = sample_terrain(_cfg([vrt]), x, y, crs, NO_SHIFT).ground_ft
    assert np.array_equal(by_glob, by_vrt, equal_nan=True)


def test_plan_windows_reads_each_point_once_within_budget():
    rng = np.random.default_rng(5)
    shape = (5000, 7000)
    # two dense towns and a few scattered farms
    rows = np.r_[rng.integers(100, 400, 3000), rng.integers(4000, 4300, 3000), rng.integers(0, 5000, 20)]
    cols = np.r_[rng.integers(200, 600, 3000), rng.integers(6000, 6999, 3000), rng.integers(0, 7000, 20)]
    budget = 2_000_000
    windows = plan_windows(rows, cols, shape, (256, 256), budget)
    seen = np.concatenate([w[0] for w in windows])
    assert np.array_equal(np.sort(seen), np.arange(rows.size))  # every point exactly once
    area = 0
    for idx, r0, r1, c0, c1 in windows:
        assert (r1 - r0) * (c1 - c0) <= budget
        # every point's 3x3 neighbourhood (clipped at the raster's edge) is in its window
        assert (rows[idx] - 1 >= r0).all() or r0 == 0
        assert ((rows[idx] - 1 >= r0) | (r0 == 0)).all() and ((rows[idx] + 2 <= r1) | (r1 == shape[0])).all()
        assert ((cols[idx] - 1 >= c0) | (c0 == 0)).all() and ((cols[idx] + 2 <= c1) | (c1 == shape[1])).all()
        area += (r1 - r0) * (c1 - c0)
    # cost follows the area holding customers (two towns of ~0.3 Mpx each, 20 farms of one block at most),
    # not the raster's 35 Mpx
    assert area < 4_000_000
    whole = plan_windows(rows, cols, shape, (256, 256), 1e9)  # it all fits: one window around every point
    assert len(whole) == 1
    assert whole[0][1:] == (max(rows.min() - 1, 0), rows.max() + 2, max(cols.min() - 1, 0), min(cols.max() + 2, 7000))


def test_kernel_fast_path_matches_the_general_path():
    """All points inside (the fast path) and the same points mixed with outside ones give the same values."""
    rng = np.random.default_rng(7)
    a = (rng.random((50, 60)) * 100).astype(np.float32)
    a[10, 10] = -9999.0
    c = rng.uniform(0.5, 59.5, 2000)
    r = rng.uniform(0.5, 49.5, 2000)
    fast = sample_pixels(a, c, r, nodata=-9999.0)
    mixed = sample_pixels(a, np.r_[c, -5.0, np.nan], np.r_[r, 3.0, 3.0], nodata=-9999.0)
    assert np.array_equal(fast, mixed[:-2], equal_nan=True)
    assert np.isnan(mixed[-2:]).all()
    near = (np.floor(c) == 10) & (np.floor(r) == 10)
    assert np.isnan(fast[near]).all()  # containing pixel is nodata: no value
