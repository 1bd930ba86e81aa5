"""Vertical datums per location: PROJ's operation between the DEM's and the HGLs' datums, with a
synthetic offset grid written here (geopress.io.datum), and every way the datum keys can be wrong."""

from __future__ import annotations

import json

import numpy as np
import pytest
import rasterio
from affine import Affine
from pyproj import CRS, Transformer

import geopress
from geopress.errors import ConfigError, InputError
from geopress.pressure import DEFAULT_PSI_PER_FT, M_PER_FT

from conftest import BASE_CONFIG, PROJECTED

# The test world (conftest.world) lies in UTM 31N near 3 deg E, 0.1 deg N. The grid covers it in NAD83
# geographic coordinates, as PROJ's vertical offset grids do, at 0.01 deg (about 1.1 km) per cell.
GRID_WEST, GRID_NORTH, GRID_STEP = 2.9, 0.2, 0.01
GRID_SHAPE = (20, 20)

DATUMS = """
[zones]
vertical_datum = "NGVD29"
"""


def write_grid(path, values_m: np.ndarray) -> None:
    """A vertical offset grid (m) in EPSG:4269 over the test world."""
    t = Affine(GRID_STEP, 0.0, GRID_WEST, 0.0, -GRID_STEP, GRID_NORTH)
    with rasterio.open(path, "w", driver="GTiff", height=values_m.shape[0], width=values_m.shape[1], count=1,
                       dtype="float32", crs="EPSG:4269", transform=t) as dst:
        dst.write(values_m.astype(np.float32), 1)


def datum_config(world, *, grid: str | None = "offsets.tif", dem: str = "NAVD88", hgl: str = "NGVD29") -> None:
    """The base config with the DEM on ``dem``, the HGLs on ``hgl`` and, when given, the offset grid."""
    terrain = f'vertical_datum = "{dem}"\n' + (f'datum_grid = "{grid}"\n' if grid else "")
    text = BASE_CONFIG.replace('method = "bilinear"\n', f'method = "bilinear"\n{terrain}')
    text = text.replace('id_field = "zone"\n', f'id_field = "zone"\nvertical_datum = "{hgl}"\n')
    world.write_config(text)


@pytest.fixture
def before(world):
    """The base world's pressures with no datum handling."""
    return geopress.run(world.config_path, write=False).customers


def test_a_constant_grid_moves_every_pressure_by_0433_psi_per_ft(world, before):
    # NAVD88 = NGVD29 + offset (the NGS convention, PROJ's "NGVD29 height to NAVD88 height" adds the
    # grid): a DEM on NAVD88 under HGLs on NGVD29 sits 0.5 m lower on the HGLs' datum, so every
    # pressure rises by 0.433 psi per ft of offset (0.433 psi/ft: common practice, no source)
    write_grid(world.root / "offsets.tif", np.full(GRID_SHAPE, 0.5))
    datum_config(world)
    res = geopress.run(world.config_path, write=False)
    after = res.customers
    offset_ft = 0.5 / M_PER_FT
    # float32 stores 0.5 exactly; PROJ's bilinear of a constant grid is the constant, so only float64
    # round-off of ~1000 ft values remains (1e-9 ft bounds it)
    np.testing.assert_allclose(after["ground_ft"], before["ground_ft"] - offset_ft, rtol=0, atol=1e-9)
    np.testing.assert_allclose(after["psi_max"] - before["psi_max"], DEFAULT_PSI_PER_FT * offset_ft, rtol=0, atol=1e-9)
    assert res.info["datum"]["method"] == "grid" and res.info["datum"]["grid"].endswith("offsets.tif")
    assert res.info["datum"]["offset_ft_range"] == pytest.approx([-offset_ft, -offset_ft], abs=1e-4)


def test_the_offset_is_taken_at_each_customer(world, before):
    # each grid column its own offset, so the customers (x 500,025 to 500,975 m, about 3.0002 to 3.0088
    # deg E, between the centres of columns 9 to 11) each get their own, checked against the grid's value
    cols = np.arange(GRID_SHAPE[1], dtype=np.float64)
    values = np.broadcast_to(0.1 * cols, GRID_SHAPE)  # 0.1 m more per 0.01 deg east: linear in longitude
    write_grid(world.root / "offsets.tif", values)
    datum_config(world)
    after = geopress.run(world.config_path, write=False).customers
    lon, _ = Transformer.from_crs(PROJECTED, "EPSG:4269", always_xy=True).transform(world.extra["xs"], world.extra["ys"])
    # grid values at cell centres (PixelIsArea): 0.1 m per cell from the centre of column 0 at 2.905 deg;
    # linear in longitude, so PROJ's bilinear interpolation is exact
    offset_m = 0.1 * (lon - (GRID_WEST + GRID_STEP / 2)) / GRID_STEP
    assert np.ptp(offset_m) > 0.05  # the customers really see different offsets
    # float32 storage of 0.1 * col rounds by at most 1e-7 m; 1e-6 ft bounds it
    np.testing.assert_allclose(before["ground_ft"] - after["ground_ft"], offset_m / M_PER_FT, rtol=0, atol=1e-6)


def _min_static_line_x(plan) -> float:
    """x of the West zone's min_static limit line (a north-south line on the test world's plane)."""
    limits = plan.limits.set_index(["zone", "limit"])
    return limits.geometry[("West", "min_static")].centroid.x


def test_the_band_uses_the_same_offsets(world):
    write_grid(world.root / "offsets.tif", np.full(GRID_SHAPE, 0.5))
    base = geopress.run(world.config_path, write=False).plan
    datum_config(world)
    moved = geopress.run(world.config_path, write=False).plan
    # the limits are elevations on the HGLs' datum, unchanged; the ground is 0.5 m lower there, so on the
    # world's plane (0.1 m rise per m east) the limit line lies 5 m further east. Contours interpolate
    # linearly between pixel centres, exact on a plane: 1e-6 m bounds the round-off
    assert moved.bands["lower_limit_ft"].tolist() == base.bands["lower_limit_ft"].tolist()
    assert _min_static_line_x(moved) - _min_static_line_x(base) == pytest.approx(5.0, abs=1e-6)


def test_a_missing_grid_is_refused(world):
    datum_config(world, grid="nowhere.tif")
    with pytest.raises(InputError, match="datum grid not found") as info:
        geopress.run(world.config_path, write=False)
    assert info.value.key == "terrain.datum_grid"


def test_datums_without_a_grid_are_refused_rather_than_a_ballpark_zero(world):
    # PROJ has the NGVD29 - NAVD88 operations only with its VERTCON grids, which this machine does not
    # have (no network, no data package): it would fall back to a ballpark transformation with no offset
    datum_config(world, grid=None)
    with pytest.raises(InputError, match="ballpark") as info:
        geopress.run(world.config_path, write=False)
    assert info.value.key == "terrain.datum_grid" and "us_noaa_vertcon" in str(info.value)


def test_one_datum_for_both_needs_no_offset(world, before):
    datum_config(world, grid=None, dem="EPSG:5703", hgl="NAVD88")
    res = geopress.run(world.config_path, write=False)
    np.testing.assert_array_equal(res.customers["ground_ft"], before["ground_ft"])
    assert res.info["datum"]["method"] == "none"


def test_a_grid_in_projected_coordinates_is_refused(world):
    with rasterio.open(world.root / "offsets.tif", "w", driver="GTiff", height=2, width=2, count=1, dtype="float32",
                       crs=PROJECTED, transform=Affine(1000, 0, 499_000, 0, -1000, 12_000)) as dst:
        dst.write(np.zeros((2, 2), np.float32), 1)
    datum_config(world)
    with pytest.raises(InputError, match="geographic coordinates"):
        geopress.run(world.config_path, write=False)


@pytest.mark.parametrize("change, key, words", [
    (lambda t: t.replace('id_field = "zone"\n', 'id_field = "zone"\nvertical_datum = "NGVD29"\n'),
     "zones.vertical_datum", "terrain.vertical_datum is not"),
    (lambda t: t.replace('method = "bilinear"\n', 'method = "bilinear"\ndatum_grid = "g.tif"\n'),
     "terrain.datum_grid", "needs terrain.vertical_datum"),
    (lambda t: t.replace('method = "bilinear"\n', 'method = "bilinear"\nvertical_datum = "NAVD88"\ndatum_offset_ft = 1.0\n')
     .replace('id_field = "zone"\n', 'id_field = "zone"\nvertical_datum = "NGVD29"\n'),
     "terrain.datum_offset_ft", "cannot be used with"),
    (lambda t: t.replace('method = "bilinear"\n', 'method = "bilinear"\nvertical_datum = "EPSG:4326"\n'),
     "terrain.vertical_datum", "not a vertical datum"),
    (lambda t: t.replace('method = "bilinear"\n', 'method = "bilinear"\nvertical_datum = "sea level"\n'),
     "terrain.vertical_datum", "not a datum PROJ knows"),
], ids=["one datum", "grid alone", "offset and datums", "horizontal CRS", "unknown name"])
def test_datum_keys_that_do_not_fit_name_the_key(world, change, key, words):
    world.write_config(change(BASE_CONFIG))
    with pytest.raises(ConfigError, match=words) as info:
        geopress.load_config(world.config_path)
    assert info.value.key == key and "line" in str(info.value)


def test_run_json_records_the_datum_handling(world):
    write_grid(world.root / "offsets.tif", np.full(GRID_SHAPE, 0.5))
    datum_config(world)
    geopress.run(world.config_path)
    info = json.loads((world.out.parent / "run.json").read_text())
    assert info["datum"]["method"] == "grid"
    assert "NGVD29" in info["datum"]["description"] and "offsets.tif" in info["datum"]["description"]
    assert "pressures fall" in info["datum"]["direction"]
    assert str(world.root / "offsets.tif") in [i["path"] for i in info["inputs"]]
