"""Inputs that give wrong pressures without a word: each caught by `check` and by `run`.

Each case is one a utility's real data brings: a mask band instead of a nodata value, decimetres in
int16 with a scale, a DEM in US survey feet configured as metres, a DEM tagged with the wrong CRS.
Each gives the right ground, or exit 2 with one line naming the file and what is wrong and the earlier
outputs byte-identical, or a warning that names the config key to check.
"""

from __future__ import annotations

import json
import shutil

import geopandas as gpd
import numpy as np
import pyogrio
import pytest
import rasterio
import shapely

import geopress
from geopress.errors import TerrainWarning
from geopress.pressure import M_PER_FT, M_PER_US_FT

from conftest import BASE_CONFIG, COEFFS, DEM_SHAPE, DEM_TRANSFORM, ORIGIN, PROJECTED, customer_records, plane, write_layer
from nightly_support import assert_bad, config_with, good_run, invoke, run, snapshot

X0, Y1 = ORIGIN
PLANE_M = plane(*COEFFS, DEM_SHAPE, DEM_TRANSFORM)


def _dem_profile(dtype: str, **extra) -> dict:
    return dict(driver="GTiff", height=DEM_SHAPE[0], width=DEM_SHAPE[1], count=1, dtype=dtype, crs=PROJECTED,
                transform=DEM_TRANSFORM, **extra)


def _customer_pixels(world) -> tuple[np.ndarray, np.ndarray]:
    """(row, col) of the pixel under each of the world's customers."""
    cols, rows = ~DEM_TRANSFORM @ (world.extra["xs"], world.extra["ys"])
    return np.floor(rows).astype(int), np.floor(cols).astype(int)


# ---------------------------------------------------------------------------- the four cases


def test_masked_pixels_stored_as_zero_are_no_terrain_not_ground_zero(world):
    # the DEM marks its gaps by a mask band only; the pixels under them hold 0, which read as ground would
    # put a West customer 1,139 ft under its HGL: 493 psi, "high"
    rows, cols = _customer_pixels(world)
    gap = (rows[3], cols[3])
    values = PLANE_M.astype(np.float32)
    mask = np.full(DEM_SHAPE, 255, np.uint8)
    values[gap], mask[gap] = 0.0, 0
    world.dem_path.unlink()
    with rasterio.Env(GDAL_TIFF_INTERNAL_MASK=True), rasterio.open(world.dem_path, "w", **_dem_profile("float32")) as dst:
        dst.write(values, 1)
        dst.write_mask(mask)
    res = run(world)
    assert res.exit_code == 0, res.stderr
    cust = world.read()
    assert cust.loc[3, "status"] == "no_terrain" and np.isnan(cust.loc[3, "ground_ft"])
    assert (cust.drop(index=3)["status"] != "no_terrain").all()


def test_decimetres_in_int16_with_a_scale_give_the_ground_not_ten_times_it(world):
    # 328 ft of ground stored as 1,000 dm (scale 0.1); read without the scale it would be 3,281 ft
    raw = np.round(PLANE_M / 0.1).astype(np.int16)
    world.dem_path.unlink()
    with rasterio.open(world.dem_path, "w", **_dem_profile("int16", nodata=-32768)) as dst:
        dst.write(raw, 1)
        dst.scales = (0.1,)
    res = geopress.run(world.config_path, write=False)
    rows, cols = _customer_pixels(world)
    # bilinear between decimetre-rounded centres: within half a storage step (0.05 m) of the plane
    np.testing.assert_allclose(res.customers["ground_ft"] * M_PER_FT, world.ground_m(world.extra["xs"], world.extra["ys"]),
                               rtol=0, atol=0.05 + 1e-9)
    assert res.info["terrain"][0]["scale"] == 0.1 and res.info["terrain"][0]["missing"] == "nodata value"


def _us_feet_labelled_metres(world) -> None:
    """The world's DEM rewritten in US survey feet while the config still says metres."""
    feet = (PLANE_M / M_PER_US_FT).astype(np.float32)
    world.dem_path.unlink()
    with rasterio.open(world.dem_path, "w", **_dem_profile("float32", nodata=-9999.0)) as dst:
        dst.write(feet, 1)


def test_us_survey_feet_configured_as_metres_warn_in_check_and_run(world):
    _us_feet_labelled_metres(world)
    res = invoke("check", world.config_path)
    assert res.exit_code == 0, res.stderr
    warns = [line for line in res.stderr.splitlines() if line.startswith("warning:")]
    # both zones' medians (about 3,400 and 4,000 ft read as metres) are above their HGLs (1,139 and 1,380 ft)
    assert len(warns) == 2, res.stderr
    for line in warns:
        assert "terrain.vertical_units" in line and "terrain.datum_offset_ft" in line
        assert 'as "us_ft" it would be' in line and 'as "ft" it would be' in line
    assert "median customer's ground" in warns[0] and "is at or above the zone's low HGL" in warns[0]
    assert "<- median at or above the low HGL" in res.stdout
    # the run warns the same, goes on (a warning does not stop a nightly run) and records it
    res = run(world)
    assert res.exit_code == 0, res.stderr
    info = json.loads((world.out.parent / "run.json").read_text())
    assert len(info["warnings"]) == 2 and all("terrain.vertical_units" in w for w in info["warnings"])
    report = (world.out.parent / "report.html").read_text()
    assert report.index("terrain.vertical_units") < report.index("Customers by status")


def test_the_warning_says_what_the_pressures_would_be_in_the_other_units(world):
    _us_feet_labelled_metres(world)
    with pytest.warns(TerrainWarning) as caught:
        report = geopress.check(world.config_path)
    west = next(str(w.message) for w in caught if "'West'" in str(w.message))
    median_ft = next(z.median_ft for z in report.ground if z.zone == "West")
    # read as US survey feet, the stored values are the plane in feet again: (median in ft) * 0.3048 / (1200/3937)
    as_us_ft = median_ft * M_PER_FT * M_PER_FT / M_PER_US_FT
    hgl = 1000.0 + 60.0 / 0.433  # West: PRV at 1,000 ft set to 60 psi
    assert f'as "us_ft" it would be {as_us_ft:,.0f} ft ({0.433 * (hgl - as_us_ft):,.0f} psi)' in west


def test_a_dem_tagged_with_the_wrong_crs_fails_check_and_run(world):
    prior = good_run(world)
    with rasterio.open(world.dem_path, "r+") as dst:
        dst.crs = "EPSG:32632"  # the next UTM zone: the same numbers 6 degrees east, over none of the customers
    res = invoke("check", world.config_path)
    assert_bad(res, str(world.dem_path), "only 0 of 20 located customers lie on the terrain", "EPSG:32632",
               "customers in EPSG:32631")
    assert_bad(run(world), "only 0 of 20 located customers lie on the terrain", "check the CRS of each")
    assert snapshot(world.out.parent) == prior


def test_too_few_customers_in_the_zones_fails(world):
    prior = good_run(world)
    world.zones_path.unlink()
    # a zone layer covering only the westmost quarter of the customers
    write_layer(world.zones_path, "zones", {"zone": ["West", "East"]},
                [shapely.box(X0, Y1 - 1000, X0 + 125, Y1), shapely.box(X0 + 125, Y1 - 1000, X0 + 250, Y1)])
    line = assert_bad(run(world), str(world.zones_path), "only 5 of 20 located customers lie in a zone",
                      "zones in EPSG:32631")
    assert "zones.path" not in line or "check the CRS" in line
    assert snapshot(world.out.parent) == prior


# ---------------------------------------------------------------------------- check's report


def test_check_on_the_demo_prints_ground_against_the_hgl_per_zone(invoke_demo_copy):
    res = invoke("check", invoke_demo_copy / "geopress.toml")
    assert res.exit_code == 0, res.stderr
    zone_lines = [line for line in res.stdout.splitlines() if line.startswith("  ") and "ground" in line]
    assert len(zone_lines) == 3
    for line in zone_lines:
        assert "(5 %" in line and "median" in line and "95 %" in line and "under an HGL of" in line and "psi" in line
    assert "of the located customers on a raster" in res.stdout and "unzoned" in res.stdout
    assert not [line for line in res.stderr.splitlines() if line.startswith("warning:")]


def test_check_on_a_demo_copy_with_feet_for_metres_warns_naming_the_key(invoke_demo_copy):
    cfg = invoke_demo_copy / "geopress.toml"
    cfg.write_text(cfg.read_text().replace('vertical_units = "m"', 'vertical_units = "ft"'))
    # the demo's DEM states its unit (metres), so the contradiction itself is refused first
    assert_bad(invoke("check", cfg), "dem.tif", 'terrain.vertical_units is "ft" but the raster states "m"')
    # a DEM that does not state its unit leaves only the numbers to tell: they warn
    with rasterio.open(invoke_demo_copy / "dem.tif", "r+") as dst:
        dst.units = ("",)
    res = invoke("check", cfg)
    assert res.exit_code == 0, res.stderr
    warns = [line for line in res.stderr.splitlines() if line.startswith("warning:")]
    assert len(warns) == 3 and all("terrain.vertical_units (now \"ft\")" in w for w in warns), res.stderr
    assert all("more than 300 ft" in w for w in warns)


@pytest.fixture
def invoke_demo_copy(tmp_path):
    """A copy of the demo's data folder (the config's paths are relative to it)."""
    from geopress.cli import demo_config_path

    src = demo_config_path().parent
    dst = tmp_path / "demo"
    shutil.copytree(src, dst, ignore=shutil.ignore_patterns("out", "*.md"))
    return dst


def test_check_reads_where_the_customers_are_not_their_mail_fields(world, monkeypatch):
    from geopress.io import vector

    seen = []
    real = vector.read_layer
    monkeypatch.setattr(vector, "read_layer", lambda path, layer, columns, **kw: seen.append(columns) or real(path, layer, columns, **kw))
    geopress.check(world.config_path)
    assert seen[0] == ["account", "floors"]  # the id and floors (checked), not owner or mail_address


# ---------------------------------------------------------------------------- messages that point at the problem


def test_a_csv_of_accounts_says_it_has_no_geometry_and_how_to_give_it_one(world):
    csv = world.root / "accounts.csv"
    csv.write_text("account,owner,mail_address,floors\nC0001,A,1 Row,1\n")
    config_with(world, 'path = "customers.gpkg"\nlayer = "parcels"', 'path = "accounts.csv"')
    line = assert_bad(invoke("check", world.config_path), str(csv), "has no geometry", "X_POSSIBLE_NAMES",
                      "join the accounts to the parcels")
    assert "assign one" not in line


def test_a_bad_set_value_names_the_set_argument_not_a_line(world):
    line = assert_bad(invoke("check", world.config_path, "--set", "criteria.max_static_psi=lots"),
                      "criteria.max_static_psi (from --set criteria.max_static_psi): must be a finite number")
    assert "line" not in line
    line = assert_bad(invoke("check", world.config_path, "--set", "zones.source.East.low_water_ft=1500"),
                      "zones.source[1].low_water_ft (from --set zones.source.East.low_water_ft)")
    assert "line" not in line


def _as_shapefile(world):
    """The world's customers as a Shapefile (field names cut to the 10 characters a .dbf allows), configured."""
    gdf = gpd.read_file(world.customers_path, layer="parcels").rename(columns={"mail_address": "mail_addr"})
    shp = world.root / "parcels.shp"
    pyogrio.write_dataframe(gdf, shp)
    world.config_path.write_text(BASE_CONFIG.replace('path = "customers.gpkg"\nlayer = "parcels"', 'path = "parcels.shp"')
                                 .replace('"mail_address"]', '"mail_addr"]'))
    return shp


def test_run_json_lists_every_file_of_a_shapefile(world):
    shp = _as_shapefile(world)
    res = run(world)
    assert res.exit_code == 0, res.stderr
    info = json.loads((world.out.parent / "run.json").read_text())
    listed = {i["path"]: i for i in info["inputs"]}
    for ext in (".shp", ".shx", ".dbf", ".prj", ".cpg"):
        part = str(shp.with_suffix(ext))
        assert part in listed and listed[part]["bytes"] == shp.with_suffix(ext).stat().st_size
    report = (world.out.parent / "report.html").read_text()
    assert "parcels.dbf" in report


def test_an_edited_dbf_is_seen_as_an_input_changed_during_the_run(world, monkeypatch):
    from geopress.io import vector

    shp = _as_shapefile(world)
    real = vector.read_customers

    def read_then_touch(cfg, **kw):
        out = real(cfg, **kw)
        dbf = shp.with_suffix(".dbf")
        dbf.write_bytes(dbf.read_bytes())  # an export rewriting the attributes only
        return out

    monkeypatch.setattr(vector, "read_customers", read_then_touch)
    assert_bad(run(world), str(shp.with_suffix(".dbf")), "changed while this run was reading it")


# ---------------------------------------------------------------------------- the tie rule in every CRS


def test_the_tie_rule_holds_for_customers_in_wgs84_over_projected_zones(tmp_path):
    # Two zones share one long straight edge in UTM 31N, x = 530,000 m, 30 km east of the central
    # meridian, from 0 to 400 km north. In WGS84 that edge is a curve; a polygon reprojected there
    # keeps only its vertices, so its edge becomes a chord and the zones' true boundary moves.
    from pyproj import Transformer

    x_edge = 530_000.0
    west = shapely.box(500_000.0, 0.0, x_edge, 400_000.0)
    east = shapely.box(x_edge, 0.0, 560_000.0, 400_000.0)
    write_layer(tmp_path / "zones.gpkg", "zones", {"zone": ["East", "West"]}, [east, west], crs=PROJECTED)
    to_geo = Transformer.from_crs(PROJECTED, "EPSG:4326", always_xy=True)
    to_utm = Transformer.from_crs("EPSG:4326", PROJECTED, always_xy=True)
    # mid-edge, 0.3 m east of the line (so in East), and points on the line whose WGS84 coordinates come
    # back to x_edge exactly (on the boundary: the tie goes to West, whose source is listed first)
    inside_east = to_geo.transform(x_edge + 0.3, 200_000.0)
    on_line = []
    for north in np.linspace(150_000.0, 250_000.0, 2001):
        lon, lat = to_geo.transform(x_edge, north)
        if to_utm.transform(lon, lat)[0] == x_edge:
            on_line.append((lon, lat))
        if len(on_line) == 3:
            break
    assert len(on_line) == 3
    # the chord between the reprojected corners passes east of the true edge at mid-length (about 15 m,
    # as 1/cos(latitude) bends the edge in longitude), so a join in WGS84 would put inside_east in West
    a, b = to_geo.transform(x_edge, 0.0), to_geo.transform(x_edge, 400_000.0)
    chord_x = to_utm.transform(*shapely.LineString([a, b]).interpolate(0.5, normalized=True).coords[0])[0]
    assert chord_x - x_edge > 0.3
    pts = [inside_east, *on_line]
    write_layer(tmp_path / "customers.gpkg", "parcels", customer_records([p[0] for p in pts], [p[1] for p in pts]),
                [shapely.Point(p) for p in pts], crs="EPSG:4326")
    # flat ground of 340 m (1,115 ft): under both zones' HGLs and within 300 ft of them, so no guard fires
    values = np.full((40, 6), 340.0, np.float32)
    with rasterio.open(tmp_path / "dem.tif", "w", driver="GTiff", height=40, width=6, count=1, dtype="float32",
                       crs=PROJECTED, transform=rasterio.Affine(10_000, 0, 500_000, 0, -10_000, 400_000)) as dst:
        dst.write(values, 1)
    (tmp_path / "geopress.toml").write_text(BASE_CONFIG)  # West's source is listed first: it wins ties
    zones = geopress.run(tmp_path / "geopress.toml", write=False).customers["zone"].tolist()
    assert zones == ["East", "West", "West", "West"]
