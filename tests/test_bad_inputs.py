"""Every bad input a nightly job meets: exit 2, one line naming the file and the key, earlier outputs untouched.

Each test runs the world once successfully, breaks one thing, runs again
through the command line and checks the exit code, the ``error:`` line and
that every earlier output (GeoPackage, mailing lists, run.json) is
byte-identical, with no lock or temporary file left beside them.
"""

from __future__ import annotations

import json
import os

import numpy as np
import pytest
import shapely

from conftest import BASE_CONFIG, DEM_SHAPE, DEM_TRANSFORM, ORIGIN, customer_records, write_layer, write_raster
from nightly_support import assert_bad, config_with, good_run, run, snapshot

X0, Y1 = ORIGIN
root_only_skip = pytest.mark.skipif(os.geteuid() == 0, reason="root reads and writes regardless of permissions")


@pytest.fixture
def prior(world):
    """The world after one good run: its output snapshot."""
    return good_run(world)


def unchanged(world, prior) -> None:
    assert snapshot(world.out.parent) == prior


def rewrite_customers(world, records: dict, geoms: list, *, crs: str | None = "EPSG:32631", layer: str = "parcels"):
    world.customers_path.unlink()
    write_layer(world.customers_path, layer, records, geoms, crs=crs)


def line_points(n: int = 20):
    xs = list(X0 + np.linspace(25, 975, n))
    return xs, [shapely.Point(x, Y1 - 500.0) for x in xs]


# ---------------------------------------------------------------------------- config


def test_toml_syntax_error_names_the_line(world, prior):
    config_with(world, "max_static_psi = 80.0", "max_static_psi = = 80.0")
    line_no = BASE_CONFIG.splitlines().index("max_static_psi = 80.0") + 1
    assert_bad(run(world), str(world.config_path), "TOML syntax error", f"line {line_no}", "fix the file")
    unchanged(world, prior)


def test_unknown_key(world, prior):
    config_with(world, "max_static_psi = 80.0", "max_static_psi = 80.0\nmaximum_psi = 90")
    assert_bad(run(world), str(world.config_path), "criteria.maximum_psi", "unknown key", "allowed keys are")
    unchanged(world, prior)


def test_wrong_type(world, prior):
    config_with(world, "max_static_psi = 80.0", 'max_static_psi = "eighty"')
    assert_bad(run(world), str(world.config_path), "criteria.max_static_psi", "must be a finite number")
    unchanged(world, prior)


def test_missing_required_key(world, prior):
    config_with(world, 'id_field = "account"\n', "")
    assert_bad(run(world), str(world.config_path), "customers.id_field", "missing required key; add it")
    unchanged(world, prior)


def test_source_for_a_zone_not_in_the_layer(world, prior):
    config_with(world, "[criteria]", '[[zones.source]]\nzone = "North"\nkind = "pump"\ndischarge_hgl_ft = 1500.0\n\n[criteria]')
    line = assert_bad(run(world), "zones.source[2].zone", "'North'", "West", "fix the name")
    assert str(world.zones_path) in line
    unchanged(world, prior)


def test_zone_without_a_source(world, prior):
    east = '[[zones.source]]\nzone = "East"\nkind = "tank"\nhigh_water_ft = 1400.0\nlow_water_ft = 1380.0\n'
    config_with(world, east, "")
    assert_bad(run(world), str(world.zones_path), "zones East", "no [[zones.source]]", "add one")
    unchanged(world, prior)


def test_two_sources_for_one_zone(world, prior):
    config_with(world, "[criteria]", '[[zones.source]]\nzone = "West"\nkind = "pump"\ndischarge_hgl_ft = 1500.0\n\n[criteria]')
    assert_bad(run(world), str(world.config_path), "zones.source[2].zone", "already has a source (zones.source[0])")
    unchanged(world, prior)


def test_tank_low_water_above_high_water(world, prior):
    config_with(world, "low_water_ft = 1380.0", "low_water_ft = 1420.0")
    assert_bad(run(world), str(world.config_path), "zones.source[1].low_water_ft", "above high_water_ft", "swap them")
    unchanged(world, prior)


def test_min_threshold_above_max(world, prior):
    config_with(world, "min_static_psi = 35.0", "min_static_psi = 90.0")
    assert_bad(run(world), str(world.config_path), "criteria.min_static_psi", "above max_static_psi")
    unchanged(world, prior)


@pytest.mark.parametrize("value", ["0.0", "-0.433"])
def test_non_positive_psi_per_ft(world, prior, value):
    config_with(world, "min_static_psi = 35.0", f"min_static_psi = 35.0\npsi_per_ft = {value}")
    assert_bad(run(world), str(world.config_path), "criteria.psi_per_ft", "must be positive")
    unchanged(world, prior)


@pytest.mark.parametrize("target, key", [("customers.gpkg", "customers.path"), ("zones.gpkg", "zones.path")])
def test_output_path_equal_to_an_input(world, prior, target, key):
    config_with(world, 'path = "out/pressure.gpkg"', f'path = "{target}"')
    assert_bad(run(world), str(world.config_path), "output.path", f"same file as {key}", "write the output elsewhere")
    unchanged(world, prior)


def test_output_folder_that_cannot_be_created(world, prior):
    (world.root / "blocker").write_text("a file where a folder should be\n")
    config_with(world, 'path = "out/pressure.gpkg"', 'path = "blocker/sub/pressure.gpkg"')
    assert_bad(run(world), "output.path", "is not a folder", "choose another location")
    unchanged(world, prior)


@root_only_skip
def test_output_folder_that_cannot_be_written(world, prior):
    world.out.parent.chmod(0o555)
    try:
        assert_bad(run(world), str(world.out.parent), "output.path", "not writable", "choose a writable location")
    finally:
        world.out.parent.chmod(0o755)
    unchanged(world, prior)


def test_output_folder_that_cannot_be_written_as_seen_by_access(world, prior, monkeypatch):
    # The same case for a root user, who may write anywhere: os.access is what geopress asks.
    denied = world.out.parent
    real = os.access
    monkeypatch.setattr(os, "access", lambda p, mode, **kw: False if os.fspath(p) == os.fspath(denied) else real(p, mode, **kw))
    assert_bad(run(world), str(denied), "output.path", "not writable", "choose a writable location")
    unchanged(world, prior)


def test_config_that_is_a_folder(world, prior):
    folder = world.root / "configs.toml"
    folder.mkdir()
    from nightly_support import invoke

    assert_bad(invoke("run", folder), str(folder), "cannot read config file", "Is a directory")
    unchanged(world, prior)


def test_config_missing(world, prior):
    from nightly_support import invoke

    assert_bad(invoke("run", world.root / "nope.toml"), "nope.toml", "config file not found")
    unchanged(world, prior)


def test_config_saved_with_a_byte_order_mark_is_read(world, prior):
    # Windows editors save "UTF-8" with a BOM; TOML itself forbids one, the file is still meant as UTF-8.
    world.config_path.write_bytes(b"\xef\xbb\xbf" + BASE_CONFIG.encode("utf-8"))
    res = run(world)
    assert res.exit_code == 0, res.stderr


# ---------------------------------------------------------------------------- files


@pytest.mark.parametrize("which, key", [("customers_path", "customers.path"), ("zones_path", "zones.path"),
                                        ("dem_path", "terrain.paths")])
def test_input_missing(world, prior, which, key):
    path = getattr(world, which)
    path.unlink()
    assert_bad(run(world), str(path), "not found", key, "check the path")
    unchanged(world, prior)


@root_only_skip
@pytest.mark.parametrize("which, key", [("customers_path", "customers.path"), ("zones_path", "zones.path"),
                                        ("dem_path", "terrain.paths")])
def test_input_unreadable(world, prior, which, key):
    path = getattr(world, which)
    path.chmod(0)
    try:
        assert_bad(run(world), str(path), "cannot read", key, "permissions")
    finally:
        path.chmod(0o644)
    unchanged(world, prior)


@pytest.mark.parametrize("which, key", [("customers_path", "customers.path"), ("zones_path", "zones.path"),
                                        ("dem_path", "terrain.paths")])
def test_input_unreadable_as_seen_by_access(world, prior, monkeypatch, which, key):
    # The same case for a root user: os.access(R_OK) is what geopress asks before GDAL opens the file.
    path = getattr(world, which)
    real = os.access
    monkeypatch.setattr(os, "access", lambda p, mode, **kw: False if os.fspath(p) == os.fspath(path) else real(p, mode, **kw))
    assert_bad(run(world), str(path), "cannot read", key, "permissions")
    unchanged(world, prior)


@pytest.mark.parametrize("which, key, what", [("customers_path", "customers.path", "vector"),
                                              ("zones_path", "zones.path", "vector"),
                                              ("dem_path", "terrain.paths", "raster")])
def test_input_gdal_cannot_open(world, prior, which, key, what):
    path = getattr(world, which)
    path.write_text("account,owner\nC1,someone\n")
    assert_bad(run(world), str(path), f"not a {what}", "GDAL can open", key)
    unchanged(world, prior)


def test_input_that_is_a_folder(world, prior):
    world.customers_path.unlink()
    world.customers_path.mkdir()
    assert_bad(run(world), str(world.customers_path), "is a folder", "customers.path")
    unchanged(world, prior)


def test_layer_that_does_not_exist_lists_the_layers(world, prior):
    config_with(world, 'layer = "parcels"', 'layer = "lots"')
    assert_bad(run(world), str(world.customers_path), "no layer 'lots'", "customers.layer", "layers there: parcels")
    unchanged(world, prior)


def test_empty_customers_layer(world, prior):
    rewrite_customers(world, {"account": ["x"], "owner": ["o"], "mail_address": ["a"], "floors": [1]}, [shapely.Point(X0 + 5, Y1 - 5)])
    import pyogrio

    gdf = pyogrio.read_dataframe(world.customers_path).iloc[:0]
    world.customers_path.unlink()
    pyogrio.write_dataframe(gdf, world.customers_path, layer="parcels")
    assert_bad(run(world), str(world.customers_path), "layer 'parcels' (from customers.layer) has no features")
    unchanged(world, prior)


# ---------------------------------------------------------------------------- CRS and units


def test_customers_without_crs(world, prior):
    xs, pts = line_points()
    with pytest.warns(UserWarning, match="'crs' was not provided"):  # geopandas, writing the broken input
        rewrite_customers(world, customer_records(xs, xs), pts, crs=None)
    assert_bad(run(world), str(world.customers_path), "layer 'parcels' has no CRS", "assign one")
    unchanged(world, prior)


def test_zones_without_crs(world, prior):
    world.zones_path.unlink()
    with pytest.warns(UserWarning, match="'crs' was not provided"):  # geopandas, writing the broken input
        write_layer(world.zones_path, "zones", {"zone": ["West", "East"]},
                    [shapely.box(X0, Y1 - 1000, X0 + 500, Y1), shapely.box(X0 + 500, Y1 - 1000, X0 + 1000, Y1)], crs=None)
    assert_bad(run(world), str(world.zones_path), "layer 'zones' has no CRS", "assign one")
    unchanged(world, prior)


def test_raster_without_crs(world, prior):
    write_raster(world.dem_path, np.full(DEM_SHAPE, 350.0), DEM_TRANSFORM, crs=None)
    assert_bad(run(world), str(world.dem_path), "the raster has no CRS", "assign one")
    unchanged(world, prior)


def test_terrain_without_vertical_unit(world, prior):
    config_with(world, 'vertical_units = "m"\n', "")
    assert_bad(run(world), str(world.dem_path), "does not state its vertical unit", "terrain.vertical_units")
    unchanged(world, prior)


def test_terrain_unit_that_contradicts_the_raster(world, prior):
    write_raster(world.dem_path, np.full(DEM_SHAPE, 350.0), DEM_TRANSFORM, units="ft")
    assert_bad(run(world), str(world.dem_path), 'terrain.vertical_units is "m" but the raster states "ft"')
    unchanged(world, prior)


@pytest.mark.parametrize("metres", [-5000.0, 9000.0])
def test_elevations_that_cannot_be_in_the_stated_unit_are_refused(world, prior, metres):
    # -5000 m is below any dry land; 9000 m everywhere is a DEM in feet labelled metres (29,528 ft > Everest).
    write_raster(world.dem_path, np.full(DEM_SHAPE, metres), DEM_TRANSFORM)
    assert_bad(run(world), str(world.dem_path), "not ground on Earth", "terrain.vertical_units")
    unchanged(world, prior)


# ---------------------------------------------------------------------------- fields


def test_id_field_missing_lists_the_fields(world, prior):
    config_with(world, 'id_field = "account"', 'id_field = "acct"')
    assert_bad(run(world), str(world.customers_path), "no field 'acct'", "customers.id_field",
               "fields there: account, owner, mail_address, floors")
    unchanged(world, prior)


def test_mail_field_missing_lists_the_fields(world, prior):
    config_with(world, 'mail_fields = ["owner", "mail_address"]', 'mail_fields = ["owner", "address"]')
    assert_bad(run(world), str(world.customers_path), "no field 'address'", "customers.mail_fields[1]",
               "fields there: account")
    unchanged(world, prior)


def test_duplicate_ids_name_the_first_duplicates(world, prior):
    xs, pts = line_points()
    recs = customer_records(xs, xs)
    recs["account"][5] = recs["account"][3] = "C0001"
    recs["account"][9] = "C0007"
    rewrite_customers(world, recs, pts)
    assert_bad(run(world), str(world.customers_path), "customers.id_field", "duplicate ids: C0001, C0007", "must be unique")
    unchanged(world, prior)


def test_empty_ids(world, prior):
    xs, pts = line_points()
    recs = customer_records(xs, xs)
    recs["account"][4] = None
    rewrite_customers(world, recs, pts)
    assert_bad(run(world), str(world.customers_path), "customers.id_field", "empty in features 5")
    unchanged(world, prior)


@pytest.mark.parametrize("bad", [2.5, 0, -1, "two"])
def test_floors_not_a_whole_number_of_at_least_one(world, prior, bad):
    xs, pts = line_points()
    recs = customer_records(xs, xs)
    recs["floors"] = [str(f) for f in recs["floors"]] if isinstance(bad, str) else [float(f) for f in recs["floors"]]
    recs["floors"][2] = bad
    rewrite_customers(world, recs, pts)
    assert_bad(run(world), str(world.customers_path), "customers.floors_field", "whole number of stories >= 1", "C0002")
    unchanged(world, prior)


# ---------------------------------------------------------------------------- geometry


def test_null_and_empty_geometries_are_reported_and_the_run_goes_on(world, prior):
    xs, pts = line_points()
    pts[3], pts[8] = None, shapely.Point()
    rewrite_customers(world, customer_records(xs, xs), pts)
    res = run(world)
    assert res.exit_code == 0, res.stderr
    warns = [line for line in res.stderr.splitlines() if line.startswith("warning:")]
    assert any("2 customers have no geometry" in w and "C0003" in w for w in warns), res.stderr
    info = json.loads((world.out.parent / "run.json").read_text())
    assert info["customers"]["no_geometry"] == 2 and info["counts"]["no_geometry"] == 2
    cust = world.read()
    assert sorted(cust.loc[cust["status"] == "no_geometry", "account"]) == ["C0003", "C0008"]


def test_line_geometries_in_customers(world, prior):
    xs, pts = line_points()
    pts[4] = shapely.LineString([(X0 + 10, Y1 - 10), (X0 + 20, Y1 - 20)])
    rewrite_customers(world, customer_records(xs, xs), pts)
    assert_bad(run(world), str(world.customers_path), "LineString", "C0004", "must be points or polygons")
    unchanged(world, prior)


def test_invalid_zone_polygon_is_repaired_with_a_warning(world, prior):
    bow_tie = shapely.Polygon([(X0, Y1), (X0 + 500, Y1 - 1000), (X0, Y1 - 1000), (X0 + 500, Y1)])
    world.zones_path.unlink()
    write_layer(world.zones_path, "zones", {"zone": ["West", "East"]},
                [bow_tie, shapely.box(X0 + 500, Y1 - 1000, X0 + 1000, Y1)])
    res = run(world)
    assert res.exit_code == 0, res.stderr
    assert any(line.startswith("warning:") and "zones West" in line and "make_valid" in line
               for line in res.stderr.splitlines()), res.stderr


def test_overlapping_zones_warn_and_follow_the_first_listed_source(world, prior):
    world.zones_path.unlink()
    # East reaches 200 m into West; West is listed first in [[zones.source]], so it keeps the overlap.
    write_layer(world.zones_path, "zones", {"zone": ["West", "East"]},
                [shapely.box(X0, Y1 - 1000, X0 + 500, Y1), shapely.box(X0 + 300, Y1 - 1000, X0 + 1000, Y1)])
    res = run(world)
    assert res.exit_code == 0, res.stderr
    assert any(line.startswith("warning:") and "zones 'East' and 'West' overlap" in line
               for line in res.stderr.splitlines()), res.stderr
    cust = world.read()
    x = shapely.get_x(cust.geometry.to_numpy())
    in_overlap = (x > X0 + 300) & (x < X0 + 500)
    assert in_overlap.sum() > 0 and (cust.loc[in_overlap, "zone"] == "West").all()


def test_zones_in_another_crs_than_the_customers(world, prior):
    import geopandas as gpd

    zones = gpd.read_file(world.zones_path, layer="zones").to_crs("EPSG:4326")
    world.zones_path.unlink()
    zones.to_file(world.zones_path, layer="zones", driver="GPKG")
    before = gpd.read_file(world.out, layer="customers")
    res = run(world)
    assert res.exit_code == 0, res.stderr
    after = world.read()
    # The customers sit 25 m or more from the zone edge, far beyond any reprojection round-off.
    assert after["zone"].tolist() == before["zone"].tolist()
    assert after["status"].tolist() == before["status"].tolist()


# ---------------------------------------------------------------------------- terrain


def test_dem_all_nodata(world, prior):
    write_raster(world.dem_path, np.full(DEM_SHAPE, -9999.0), DEM_TRANSFORM)
    assert_bad(run(world), str(world.dem_path), "only nodata", "terrain.paths")
    unchanged(world, prior)


def test_no_customer_on_the_dem(world, prior):
    xs, _ = line_points()
    far = [shapely.Point(x + 50_000.0, Y1 - 500.0) for x in xs]
    rewrite_customers(world, customer_records(xs, xs), far)
    world.zones_path.unlink()
    write_layer(world.zones_path, "zones", {"zone": ["West", "East"]},
                [shapely.box(X0 + 50_000, Y1 - 1000, X0 + 50_500, Y1), shapely.box(X0 + 50_500, Y1 - 1000, X0 + 51_000, Y1)])
    assert_bad(run(world), str(world.dem_path), "only 0 of 20 located customers lie on the terrain", "check the CRS")
    unchanged(world, prior)


# ---------------------------------------------------------------------------- what else a nightly job meets


def test_customers_replaced_while_the_run_reads_them(world, prior, monkeypatch):
    from geopress.io import vector

    real = vector.read_customers

    def read_then_replace(cfg, **kwargs):
        out = real(cfg, **kwargs)
        xs, pts = line_points(5)  # the export overwrites the file with a partial one
        rewrite_customers(world, customer_records(xs, xs), pts)
        return out

    monkeypatch.setattr(vector, "read_customers", read_then_replace)
    assert_bad(run(world), str(world.customers_path), "changed while this run was reading it", "run again")
    unchanged(world, prior)


def test_first_run_with_bad_input_writes_nothing(world):
    config_with(world, 'id_field = "account"', 'id_field = "acct"')
    assert_bad(run(world), "no field 'acct'")
    assert not world.out.parent.exists()
