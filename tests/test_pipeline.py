"""End to end: geopress.run and the geopress command on small worlds written to tmp_path."""

from __future__ import annotations

import csv
import errno
import gc
import json
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import geopandas as gpd
import pandas as pd
import pyogrio
import pytest
import shapely
from click.testing import CliRunner
from affine import Affine
import pyproj
from pyproj import Transformer

import faults_support
import geopress
from geopress import pipeline
from geopress.cli import cli
from geopress.errors import GeometryWarning, InputError, OutputError
from geopress.io import write as write_io
from geopress.classify import RESULT_COLUMNS
from geopress.findings import AREA_COLUMNS, FLAGGED_LAYERS
from geopress.pressure import M_PER_FT, M_PER_US_FT

from conftest import (
    BASE_CONFIG,
    DEM_SHAPE,
    DEM_TRANSFORM,
    ORIGIN,
    PROJECTED,
    customer_records,
    pixel_centre,
    plane,
    run_in_its_own_thread,
    thread_nice,
    write_layer,
    write_raster,
)

X0, Y1 = ORIGIN
K = 0.433  # psi per ft, the default
# Pressures below are 0.433 * (HGL - ground) with HGL and ground exact in binary (halves and integers):
# the only error is the one rounding of each float64 product and difference, ~1e-13 psi. 1e-9 psi is a
# safe bound that still catches any wrong foot of head (0.433 psi).
PSI_TOL = 1e-9

CRAFTED_CONFIG = """\
[customers]
path = "customers.gpkg"
layer = "customers"
id_field = "account"
mail_fields = ["owner", "mail_address"]
floors_field = "floors"

[terrain]
paths = ["dem.tif"]
vertical_units = "ft"

[zones]
path = "zones.gpkg"
layer = "zones"
id_field = "zone"

[[zones.source]]
zone = "Main"
kind = "tank"
high_water_ft = 1200.0
low_water_ft = 1180.0

[[zones.source]]
zone = "Hill"
kind = "pump"
discharge_hgl_ft = 1350.0

[output]
path = "out/pressure.gpkg"
mailing_dir = "out/mailing"
"""


def crafted_dem() -> np.ndarray:
    """Ground in ft: 1001.5 + 3 * col at every pixel centre of row, exact in binary; one nodata pixel."""
    dem = np.broadcast_to(1001.5 + 3.0 * np.arange(DEM_SHAPE[1]), DEM_SHAPE).copy()
    dem[50, 40] = -9999.0
    return dem


# account, (col, row) of the point in pixel units (None: no geometry), floors, owner, mail address,
# expected zone, ground ft, status
CRAFTED = [
    ("A-ok", (20, 10), 1, "Owner 1", "1 Hill Rd", "Main", 1061.5, "ok"),
    ("A-tall-ok", (20, 12), 2, "Owner 2", "2 Hill Rd", "Main", 1061.5, "ok"),
    ("A-high", (0, 10), 1, "Owner H", "9 Low St", "Main", 1001.5, "high"),
    ("A-high-2", (1, 30), 1, "Owner H", "9 Low St", "Main", 1004.5, "high"),
    ("A-low", (33, 10), 1, "=cmd", "-12 Rear", "Main", 1100.5, "low"),
    ("A-above", (60, 10), 1, "Owner 5", "5 Top Ln", "Main", 1181.5, "above_hgl"),
    # x between the centres of cols 59 and 60: 1178.5 + 0.5 * 3 = 1180.0, exactly the low HGL
    ("A-at-hgl", (59.5, 10), 1, "Owner 6", "6 Top Ln", "Main", 1180.0, "above_hgl"),
    ("A-upper", (25, 10), 4, "Owner 7", "7 Tower Pl", "Main", 1076.5, "low_upper_floors"),
    # on the shared Main/Hill edge x = X0 + 700: Main is listed first; 1208.5 + 0.5 * 3 = 1210.0
    ("A-edge", (69.5, 10), 1, "Owner 8", "8 Ridge Rd", "Main", 1210.0, "above_hgl"),
    ("A-hill", (80, 10), 3, "Owner 9", "9 Ridge Rd", "Hill", 1241.5, "ok"),
    ("A-unzoned", (10, 90), 1, "Owner 10", "10 Far Rd", None, 1031.5, "unzoned"),
    ("A-nodata", (40, 50), 1, "Owner 11", "11 Gap Rd", "Main", np.nan, "no_terrain"),
    ("A-off-dem", (110, 10), 1, "Owner 12", "12 East Rd", "Hill", np.nan, "no_terrain"),
    ("A-nowhere", None, 1, "Owner 13", "13 Lost Rd", None, np.nan, "no_geometry"),
]
HGL = {"Main": (1200.0, 1180.0), "Hill": (1350.0, 1350.0)}


def crafted_point(colrow):
    if colrow is None:
        return None
    return shapely.Point(*pixel_centre(*colrow))


@pytest.fixture
def crafted(tmp_path: Path) -> Path:
    """A world where every status occurs, with ground exact at each customer. Returns the config path."""
    write_raster(tmp_path / "dem.tif", crafted_dem(), DEM_TRANSFORM)
    main = shapely.box(X0, Y1 - 800, X0 + 700, Y1)
    hill = shapely.box(X0 + 700, Y1 - 800, X0 + 1200, Y1)  # runs 200 m past the DEM's east edge
    write_layer(tmp_path / "zones.gpkg", "zones", {"zone": ["Hill", "Main"]}, [hill, main])
    records = {
        "account": [c[0] for c in CRAFTED],
        "floors": [c[2] for c in CRAFTED],
        "owner": [c[3] for c in CRAFTED],
        "mail_address": [c[4] for c in CRAFTED],
    }
    write_layer(tmp_path / "customers.gpkg", "customers", records, [crafted_point(c[1]) for c in CRAFTED])
    path = tmp_path / "geopress.toml"
    path.write_text(CRAFTED_CONFIG)
    return path


def run_crafted(config_path, **kwargs):
    with pytest.warns(GeometryWarning, match="1 customers have no geometry"):
        return geopress.run(config_path, **kwargs)


def by_account(frame: pd.DataFrame) -> pd.DataFrame:
    return frame.set_index("account")


def output_files(root: Path) -> dict[str, bytes]:
    out = root / "out"
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(out.rglob("*")) if p.is_file()}


# ---------------------------------------------------------------- statuses and pressures


def test_every_status_with_exact_pressures(crafted):
    res = run_crafted(crafted)
    assert res.counts == {"no_geometry": 1, "no_terrain": 2, "unzoned": 1, "above_hgl": 3, "low": 1, "high": 2,
                          "low_upper_floors": 1, "ok": 3}
    cust = by_account(pyogrio.read_dataframe(crafted.parent / "out/pressure.gpkg", layer="customers"))
    assert len(cust) == len(CRAFTED)
    for account, _, floors, _, _, zone, ground, status in CRAFTED:
        row = cust.loc[account]
        assert row["status"] == status, account
        if np.isnan(ground):
            assert np.isnan(row["ground_ft"]) and np.isnan(row["psi_min"]) and np.isnan(row["psi_max"])
        else:
            assert row["ground_ft"] == ground, account  # pixel centres and midpoints of a plane: exact
        if zone is None:
            assert row["zone"] is None or pd.isna(row["zone"])
            assert np.isnan(row["hgl_high_ft"])
            continue
        assert row["zone"] == zone
        high, low = HGL[zone]
        assert (row["hgl_high_ft"], row["hgl_low_ft"]) == (high, low)
        if np.isnan(ground):
            continue
        assert row["psi_max"] == pytest.approx(K * (high - ground), abs=PSI_TOL)
        assert row["psi_min"] == pytest.approx(K * (low - ground), abs=PSI_TOL)
        if floors > 1:
            assert row["psi_top"] == pytest.approx(K * (low - ground - (floors - 1) * 10.0), abs=PSI_TOL)
        else:
            assert np.isnan(row["psi_top"])


def test_hand_checked_values_and_reasons(crafted):
    cust = by_account(run_crafted(crafted, write=False).customers)
    # 0.433 * (1200 - 1001.5) = 85.9505 psi at ground with the tank full
    assert cust.loc["A-high", "psi_max"] == pytest.approx(85.9505, abs=PSI_TOL)
    assert "86.0 psi exceeds 80 psi" in cust.loc["A-high", "reason"]
    # 0.433 * (1180 - 1100.5) = 34.4235 psi with the tank low
    assert cust.loc["A-low", "psi_min"] == pytest.approx(34.4235, abs=PSI_TOL)
    assert "34.4 psi is below 35 psi" in cust.loc["A-low", "reason"]
    # 4 stories: top floor 30 ft up, 0.433 * (1180 - 1106.5) = 31.8255 psi
    assert cust.loc["A-upper", "psi_top"] == pytest.approx(31.8255, abs=PSI_TOL)
    assert "top floor of 4 stories down to 31.8 psi" in cust.loc["A-upper", "reason"]
    # ground exactly at the low HGL: zero pressure is no gravity service
    assert cust.loc["A-at-hgl", "psi_min"] == 0.0
    assert "1180.0 ft is at or above the low HGL of 1180.0 ft" in cust.loc["A-at-hgl", "reason"]
    # pump zone: 0.433 * (1350 - 1241.5) = 46.9805 psi, top of 3 stories 0.433 * 88.5 = 38.3205
    assert cust.loc["A-hill", "psi_min"] == pytest.approx(46.9805, abs=PSI_TOL)
    assert cust.loc["A-hill", "psi_top"] == pytest.approx(38.3205, abs=PSI_TOL)


def test_write_false_writes_nothing(crafted):
    res = run_crafted(crafted, write=False)
    assert res.outputs == []
    assert not (crafted.parent / "out").exists()


def test_boundary_point_follows_source_order(crafted):
    text = crafted.read_text()
    main_src = text[text.index('[[zones.source]]\nzone = "Main"'):text.index('[[zones.source]]\nzone = "Hill"')]
    swapped = text.replace(main_src, "").replace("[output]", main_src + "[output]")
    crafted.write_text(swapped)
    cust = by_account(run_crafted(crafted, write=False).customers)
    # Hill is listed first now: the edge point takes its pump HGL, 0.433 * (1350 - 1210) = 60.62 psi
    assert cust.loc["A-edge", "zone"] == "Hill"
    assert cust.loc["A-edge", "psi_min"] == pytest.approx(60.62, abs=PSI_TOL)
    assert cust.loc["A-edge", "status"] == "ok"
    assert cust.loc["A-ok", "zone"] == "Main"  # interior points do not move


# ---------------------------------------------------------------- CRS and units


def test_geographic_customers_against_a_projected_dem(world):
    # customers stored in EPSG:4326, the DEM and zones in UTM 31N
    xs, ys = world.extra["xs"], world.extra["ys"] + np.linspace(-300, 300, len(world.extra["xs"]))
    to_geo = Transformer.from_crs(PROJECTED, "EPSG:4326", always_xy=True)
    lon, lat = to_geo.transform(xs, ys)
    recs = customer_records(list(lon), list(lat))
    world.customers_path.unlink()
    write_layer(world.customers_path, "parcels", recs, list(shapely.points(lon, lat)), crs="EPSG:4326")
    res = geopress.run(world.config_path, write=False)
    # the points the run samples at: the stored lon/lat projected back
    px, py = Transformer.from_crs("EPSG:4326", PROJECTED, always_xy=True).transform(lon, lat)
    # Plane ground ~ 1000-1300 ft: bilinear round-off ~1e-12 ft; the back-projection is the same pyproj
    # operation the run uses, so only float noise separates them. 1e-6 ft (0.3 um) bounds that, while a
    # wrong axis order or CRS would be off by metres to kilometres.
    np.testing.assert_allclose(res.customers["ground_ft"], world.ground_m(px, py) / M_PER_FT, rtol=0, atol=1e-6)
    # and the projected points are the original ones: PROJ's UTM round trip is good to nanometres, 1e-6 m bounds it
    np.testing.assert_allclose(px, xs, rtol=0, atol=1e-6)
    assert res.points.crs.to_epsg() == 4326
    assert set(res.customers["zone"]) == {"West", "East"}
    assert res.counts["unzoned"] == 0


def us_ft_world(tmp_path, units=None):
    """The base world with a DEM whose values are integers in US survey feet (1,100 to 1,199: plausible
    ground under the zones' HGLs, so no guard of geopress.guards fires)."""
    dem = np.broadcast_to(1100.0 + np.arange(DEM_SHAPE[1]), DEM_SHAPE).astype(np.float32)
    write_raster(tmp_path / "dem.tif", dem, DEM_TRANSFORM, units=units)
    cols = np.arange(5, 100, 10)
    xs, ys = pixel_centre(cols, np.full(cols.size, 40))
    write_layer(tmp_path / "customers.gpkg", "parcels", customer_records(list(xs), list(ys)),
                list(shapely.points(xs, ys)))
    write_layer(tmp_path / "zones.gpkg", "zones", {"zone": ["West", "East"]},
                [shapely.box(X0, Y1 - 1000, X0 + 500, Y1), shapely.box(X0 + 500, Y1 - 1000, X0 + 1000, Y1)])
    return dem[40, cols].astype(np.float64)


# ground_ft = value * (1200/3937) / 0.3048 is two exactly defined factors; the code multiplies by their
# ratio, computed once. The two orders differ by at most ~2 float64 roundings (2 * 2**-53 relative), so
# rtol 4e-16; the survey foot's 2 ppm (0.002 ft at 1,100 ft) is 10 orders of magnitude larger.
US_FT_RTOL = 4e-16


def test_dem_in_us_survey_feet_from_the_config(tmp_path):
    values = us_ft_world(tmp_path)
    (tmp_path / "geopress.toml").write_text(BASE_CONFIG.replace('vertical_units = "m"', 'vertical_units = "us_ft"'))
    res = geopress.run(tmp_path / "geopress.toml", write=False)
    ground = res.customers["ground_ft"].to_numpy()
    np.testing.assert_allclose(ground, values * 1200 / 3937 / 0.3048, rtol=US_FT_RTOL, atol=0)
    # survey feet are 2 ppm longer (1200/3937 m against 0.3048 m): the conversion really happened
    assert (ground - values > 1.9e-6 * values).all()
    assert res.info["terrain"][0]["vertical_unit"] == "us_ft"


def test_dem_stating_us_survey_feet_in_its_band_unit(tmp_path):
    values = us_ft_world(tmp_path, units="US survey foot")
    (tmp_path / "geopress.toml").write_text(BASE_CONFIG.replace('vertical_units = "m"\n', ""))
    res = geopress.run(tmp_path / "geopress.toml", write=False)
    np.testing.assert_allclose(res.customers["ground_ft"], values * M_PER_US_FT / M_PER_FT, rtol=US_FT_RTOL, atol=0)
    assert res.info["terrain"][0]["vertical_unit"] == "us_ft"


def test_stated_unit_contradicting_the_config_is_an_input_error(tmp_path):
    us_ft_world(tmp_path, units="metre")
    (tmp_path / "geopress.toml").write_text(BASE_CONFIG.replace('vertical_units = "m"', 'vertical_units = "us_ft"'))
    with pytest.raises(InputError, match='raster states "m"') as info:
        geopress.run(tmp_path / "geopress.toml", write=False)
    assert info.value.key == "terrain.vertical_units"
    assert info.value.path == str(tmp_path / "dem.tif")


def test_dem_without_a_unit_needs_the_config(tmp_path):
    us_ft_world(tmp_path)
    (tmp_path / "geopress.toml").write_text(BASE_CONFIG.replace('vertical_units = "m"\n', ""))
    with pytest.raises(InputError, match="terrain.vertical_units"):
        geopress.run(tmp_path / "geopress.toml", write=False)


def test_first_listed_raster_wins_and_gaps_fall_through(world):
    # "near.tif" covers the western 60 columns at 100 m, with a nodata hole; dem.tif (plane) covers all.
    # Both share one pixel grid, so they are read as one mosaic, first listed winning pixel by pixel, and a
    # point between their pixels interpolates across the seam as on the merged raster.
    # Points: inside near, east of it, in its hole, and 0.1 px inside its east edge (across the seam).
    near = np.full((100, 60), 300.0)
    near[49:51, 9:11] = -9999.0
    write_raster(world.root / "near.tif", near, DEM_TRANSFORM)
    pts = [pixel_centre(30, 30), pixel_centre(80, 30), pixel_centre(10, 50), pixel_centre(59.4, 30)]
    write_layer(world.root / "few.gpkg", "parcels", customer_records([p[0] for p in pts], [p[1] for p in pts]),
                [shapely.Point(p) for p in pts])
    text = BASE_CONFIG.replace('path = "customers.gpkg"', 'path = "few.gpkg"')
    world.write_config(text.replace('paths = ["dem.tif"]', 'paths = ["near.tif", "dem.tif"]'))
    ground_m = geopress.run(world.config_path, write=False).customers["ground_ft"].to_numpy() * M_PER_FT
    x = np.array([p[0] for p in pts])
    y = np.array([p[1] for p in pts])
    plane_m = world.ground_m(x, y)
    # across the seam: 0.6 of near's last column (300 m) and 0.4 of dem.tif's first column beyond it
    seam_m = 0.6 * 300.0 + 0.4 * world.ground_m(*pixel_centre(60, 30))
    # ft -> m and back costs ~1e-13 m; 1e-9 m bounds it
    np.testing.assert_allclose(ground_m, [300.0, plane_m[1], plane_m[2], seam_m], rtol=0, atol=1e-9)
    world.write_config(text.replace('paths = ["dem.tif"]', 'paths = ["dem.tif", "near.tif"]'))
    ground_m = geopress.run(world.config_path, write=False).customers["ground_ft"].to_numpy() * M_PER_FT
    np.testing.assert_allclose(ground_m, plane_m, rtol=0, atol=1e-9)


def test_block_by_block_reading_matches_one_window(world):
    # A tiled DEM (16 px blocks) and a memory budget of 1 KiB force one window per block, each with a
    # one-pixel halo; customers sit on and around block edges, where a missing halo would show.
    a, b, c = world.coeffs
    write_raster(world.dem_path, plane(a, b, c, DEM_SHAPE, DEM_TRANSFORM), DEM_TRANSFORM, tiled=True)
    cols = np.array([15.5, 16.0, 16.5, 31.9, 32.0, 47.7, 63.99, 95.0, 99.6])
    rows = np.array([15.5, 16.0, 15.9, 32.1, 47.5, 48.0, 64.0, 80.2, 99.6])
    xs, ys = pixel_centre(cols - 0.5, rows - 0.5)
    world.customers_path.unlink()
    write_layer(world.customers_path, "parcels", customer_records(list(xs), list(ys)), list(shapely.points(xs, ys)))
    whole = geopress.run(world.config_path, write=False)
    world.write_config(BASE_CONFIG.replace('method = "bilinear"', 'method = "bilinear"\nmemory_mb = 0.001'))
    blocks = geopress.run(world.config_path, write=False)
    assert whole.info["terrain"][0]["windows_read"] == 1
    assert blocks.info["terrain"][0]["windows_read"] > 1
    np.testing.assert_array_equal(blocks.customers["ground_ft"], whole.customers["ground_ft"])
    inset = (cols >= 0.5) & (cols <= 99.5) & (rows >= 0.5) & (rows <= 99.5)
    # plane exact inside the inset (bilinear round-off ~1e-12 ft, see test_terrain); 1e-9 ft bound
    np.testing.assert_allclose(whole.customers["ground_ft"][inset], world.ground_m(xs, ys)[inset] / M_PER_FT,
                               rtol=0, atol=1e-9)


def test_polygon_customers_use_point_on_surface(world):
    # an L-shaped parcel whose centroid lies outside it, and a square
    ell = shapely.Polygon([(X0 + 100, Y1 - 100), (X0 + 300, Y1 - 100), (X0 + 300, Y1 - 140), (X0 + 140, Y1 - 140),
                           (X0 + 140, Y1 - 300), (X0 + 100, Y1 - 300)])
    square = shapely.box(X0 + 700, Y1 - 600, X0 + 740, Y1 - 560)
    assert not ell.contains(ell.centroid)
    world.customers_path.unlink()
    write_layer(world.customers_path, "parcels", customer_records([0, 0], [0, 0]), [ell, square])
    res = geopress.run(world.config_path)
    expected = shapely.point_on_surface([ell, square])
    got = res.located().geometry.to_numpy()
    assert shapely.equals(got, expected).all()
    assert ell.contains(got[0])
    ex, ey = shapely.get_x(expected), shapely.get_y(expected)
    # plane, bilinear: round-off only (~1e-12 ft, see test_terrain); 1e-9 ft bound
    np.testing.assert_allclose(res.customers["ground_ft"], world.ground_m(ex, ey) / M_PER_FT, rtol=0, atol=1e-9)
    assert res.info["customers"]["from_polygons"] == 2
    assert pyogrio.read_info(world.out, layer="customers")["geometry_type"] == "Point"


# ---------------------------------------------------------------- outputs


def read_csv(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8-sig") as fh:  # the byte-order mark written for spreadsheets
        return list(csv.DictReader(fh))


def test_mailing_lists_dedupe_addresses_and_neutralise_formulas(crafted):
    run_crafted(crafted)
    mailing = crafted.parent / "out" / "mailing"
    lists = [f"{n}{suffix}" for n in LISTS for suffix in (".csv", ".xlsx")]
    assert sorted(p.name for p in mailing.iterdir()) == sorted(lists + [f"new_{n}" for n in lists]
                                                               + ["field_verification.csv", "field_verification.xlsx"])
    high = read_csv(mailing / "high_pressure.csv")
    # two accounts at one address: one letter listing both; worst is 0.433 * 198.5 = 85.95 -> 86.0, 5.95 psi over
    # 80; the config states no DEM accuracy, so the flag is unrated
    assert high == [{"owner": "Owner H", "mail_address": "9 Low St", "accounts": "A-high; A-high-2",
                     "customer_count": "2", "zones": "Main", "worst_psi": "86.0", "margin_psi": "5.95",
                     "confidence": "unrated", "target_area": ""}]  # no area
    low = read_csv(mailing / "low_pressure.csv")
    assert [(r["owner"], r["mail_address"], r["accounts"]) for r in low] == [("'=cmd", "'-12 Rear", "A-low")]
    above = read_csv(mailing / "above_hgl.csv")
    # most severe first: 1210 ft (-12.99 psi), 1181.5 ft (-0.65), 1180 ft (0.0)
    assert [r["accounts"] for r in above] == ["A-edge", "A-above", "A-at-hgl"]
    assert [r["accounts"] for r in read_csv(mailing / "upper_floors.csv")] == ["A-upper"]
    # the GeoPackage keeps the owner's text as it is
    gpkg_low = pyogrio.read_dataframe(crafted.parent / "out/pressure.gpkg", layer="low_pressure")
    assert gpkg_low["owner"].tolist() == ["=cmd"]


def test_flagged_layers_and_zone_summary(crafted):
    run_crafted(crafted)
    out = crafted.parent / "out/pressure.gpkg"
    names = [str(n) for n in pyogrio.list_layers(out)[:, 0]]
    assert sorted(names) == sorted(["customers", *LISTS, "zone_summary", "service_band", "band_limits", "changes",
                                    "layer_styles", "target_areas"])
    for name in ("customers", "high_pressure", "low_pressure", "above_hgl", "upper_floors"):
        assert pyogrio.read_info(out, layer=name)["geometry_type"] == "Point", name
    flagged = {name: sorted(pyogrio.read_dataframe(out, layer=name)["account"])
               for name in ("high_pressure", "low_pressure", "above_hgl", "upper_floors")}
    assert flagged == {"high_pressure": ["A-high", "A-high-2"], "low_pressure": ["A-low"],
                       "above_hgl": ["A-above", "A-at-hgl", "A-edge"], "upper_floors": ["A-upper"]}
    summary = pyogrio.read_dataframe(out, layer="zone_summary", read_geometry=False).set_index("zone")
    assert summary.loc["Main", "source_kind"] == "tank"
    assert (summary.loc["Main", "hgl_high_ft"], summary.loc["Main", "hgl_low_ft"]) == (1200.0, 1180.0)
    assert summary.loc["Main", "customers"] == 10
    assert summary.loc["Main", ["n_ok", "n_high", "n_low", "n_above_hgl", "n_low_upper_floors", "n_no_terrain"]
                       ].tolist() == [2, 2, 1, 3, 1, 1]
    assert summary.loc["Main", "ground_ft_min"] == 1001.5 and summary.loc["Main", "ground_ft_max"] == 1210.0
    assert summary.loc["Main", "psi_max_max"] == round(K * (1200 - 1001.5), 2)
    assert summary.loc["Hill", "source_kind"] == "pump"
    assert summary.loc["Hill", "customers"] == 2 and summary.loc["Hill", "n_no_terrain"] == 1


def test_an_empty_flagged_layer_is_still_a_point_layer(world):
    geopress.run(world.config_path)
    assert world.read("upper_floors").empty  # nobody in the base world has upper floors
    for name in ("customers", "upper_floors"):
        assert pyogrio.read_info(world.out, layer=name)["geometry_type"] == "Point"


def test_floors_stay_an_integer_field_with_unknown_stories_empty(world):
    xs, ys = world.extra["xs"], world.extra["ys"]
    recs = customer_records(list(xs), list(ys), floors=[3, None] + [1] * (len(xs) - 2))
    gdf = gpd.GeoDataFrame(recs, geometry=gpd.GeoSeries([shapely.Point(x, y) for x, y in zip(xs, ys)]), crs=PROJECTED)
    gdf["floors"] = gdf["floors"].astype("Int64")  # an integer field with one empty value, as exports have
    pyogrio.write_dataframe(gdf, world.customers_path, layer="parcels", driver="GPKG")
    geopress.run(world.config_path)
    info = pyogrio.read_info(world.out, layer="customers")
    assert dict(zip(info["fields"], info["ogr_types"]))["floors"] == "OFTInteger64"
    floors = pyogrio.read_dataframe(world.out, layer="customers", columns=["account", "floors"])
    assert floors["floors"].iloc[0] == 3 and pd.isna(floors["floors"].iloc[1])
    assert pyogrio.read_info(world.out, layer="upper_floors")["fields"].tolist() == info["fields"].tolist()


def test_customers_layer_has_a_spatial_index(crafted):
    run_crafted(crafted)
    with sqlite3.connect(crafted.parent / "out/pressure.gpkg") as con:
        tables = {r[0] for r in con.execute("select name from sqlite_master where type = 'table'")}
        assert "rtree_customers_geom" in tables
        # one entry per customer with a geometry
        assert con.execute("select count(*) from rtree_customers_geom").fetchone()[0] == len(CRAFTED) - 1


def test_a_customer_with_two_findings_is_on_both_lists(crafted):
    # an 11-story tower on Main's lowest ground (col 0: 1001.5 ft): at the street 0.433 * (1200 - 1001.5) =
    # 85.95 psi at high water, above 80; its top floor 10 * 10 ft up, at low water 0.433 * (1180 - 1101.5) =
    # 33.99 psi, below 35, while the street keeps 0.433 * (1180 - 1001.5) = 77.29 psi: high and upper floors
    root = crafted.parent
    cust = pyogrio.read_dataframe(root / "customers.gpkg", layer="customers")
    tower = gpd.GeoDataFrame({"account": ["A-tower"], "floors": [11], "owner": ["Owner T"],
                              "mail_address": ["3 Tower Sq"]}, geometry=[crafted_point((0, 12))], crs=cust.crs)
    pd.concat([cust, tower], ignore_index=True).to_file(root / "customers.gpkg", layer="customers", driver="GPKG")
    res = run_crafted(crafted)
    row = by_account(res.customers).loc["A-tower"]
    assert row["status"] == "high"  # the first that applies
    assert [row[f"finding_{f}"] for f in ("above_hgl", "low", "high", "low_upper_floors")] == [False, False, True, True]
    assert row["reason"] == ("static pressure up to 86.0 psi exceeds 80 psi: individual PRV expected; "
                             "top floor of 11 stories down to 34.0 psi is below 35 psi: upper floors need a booster")
    assert res.counts["high"] == 3 and res.counts["low_upper_floors"] == 1
    info = json.loads((root / "out/run.json").read_text())
    assert info["counts"] == res.counts
    # no storage level is checked here: nobody is short at one
    assert info["counts_by_finding"] == {"above_hgl": 3, "low": 1, "high": 3, "low_upper_floors": 2,
                                         "peak_hour_short": 0, "fire_short": 0, "standby_short": 0}
    out = root / "out/pressure.gpkg"
    for layer, accounts in {"high_pressure": ["A-high", "A-high-2", "A-tower"],
                            "upper_floors": ["A-tower", "A-upper"]}.items():
        assert sorted(pyogrio.read_dataframe(out, layer=layer)["account"]) == accounts, layer
    mailing = root / "out" / "mailing"
    assert [r["accounts"] for r in read_csv(mailing / "upper_floors.csv")] == ["A-upper", "A-tower"]  # 31.8, 34.0
    assert "A-tower" in [r["accounts"] for r in read_csv(mailing / "high_pressure.csv")]
    summary = pyogrio.read_dataframe(out, layer="zone_summary", read_geometry=False).set_index("zone")
    assert summary.loc["Main", ["n_high", "n_low_upper_floors", "n_finding_high", "n_finding_low_upper_floors"]
                       ].tolist() == [3, 1, 3, 2]
    html = (root / "out/report.html").read_text(encoding="utf-8")
    assert 'id="finding-counts"' in html and "<code>upper_floors</code>" in html
    assert "No target areas" in html  # 10 customers close together by default: none here


def test_target_area_of_the_two_high_customers(crafted):
    # A-high (col 0, row 10) and A-high-2 (col 1, row 30) lie sqrt(10^2 + 200^2) = 200.2 m = 656.9 ft apart, in a
    # CRS in metres; within 700 ft of each other they form one area of 2. So do the three above the HGL (cols 59.5,
    # 60 and 69.5 of row 10: 5 m and 95 m apart); the other findings have fewer than 2 close together.
    crafted.write_text(crafted.read_text() + "\n[targets]\ndistance_ft = 700\nmin_customers = 2\n")
    res = run_crafted(crafted)
    root = crafted.parent
    out = root / "out/pressure.gpkg"
    areas = pyogrio.read_dataframe(out, layer="target_areas")
    assert pyogrio.read_info(out, layer="target_areas")["geometry_type"] == "Polygon"
    assert areas["area"].tolist() == ["T1", "T2"] and areas["customers"].tolist() == [3, 2]  # most served first
    b = areas.iloc[0]
    assert (b["finding"], b["zone"], b["fix"], b["ok_inside"]) == ("above_hgl", "Main", "booster", 0)
    # a booster lifting 1210 ft to 35 psi: 1210 + 35 / 0.433 = 1290.83 ft; 1180 ft at most 80 psi: 1364.76 ft
    assert (b["ground_ft_min"], b["ground_ft_max"], b["hgl_ft_from"], b["hgl_ft_to"]) == (1180.0, 1210.0, 1290.9,
                                                                                          1364.7)
    a = areas.iloc[1]
    assert (a["area"], a["finding"], a["zone"], a["customers"], a["addresses"]) == ("T2", "high", "Main", 2, 1)
    assert (a["ground_ft_min"], a["ground_ft_max"]) == (1001.5, 1004.5)
    # the closed forms of geopress.targets with 0.433 psi/ft, rounded inward to 0.1 ft: no ok customer lies within
    # 350 ft of the two (A-ok is 200 m = 656 ft east of A-high), so HGL_min = 1004.5 + 35 / 0.433 = 1085.33 ft
    # and HGL_max = 1001.5 + 80 / 0.433 = 1186.26 ft
    assert a["ok_inside"] == 0 and a["fix"] == "zone PRV" and a["note"] == ""
    assert (a["hgl_ft_from"], a["hgl_ft_to"]) == (1085.4, 1186.2)
    assert a["worst_psi"] == 86.0  # 0.433 * (1200 - 1001.5) = 85.95
    # the polygon: the hull (a segment) buffered by 350 ft = 106.68 m holds both customers
    assert areas.geometry.iloc[1].contains(shapely.MultiPoint([crafted_point((0, 10)), crafted_point((1, 30))]))
    cust = by_account(res.customers)
    assert cust.loc[["A-high", "A-high-2"], "target_area_high"].tolist() == ["T2", "T2"]
    assert cust["target_area_high"].notna().sum() == 2 and cust["target_area_low"].isna().all()
    high = read_csv(root / "out/mailing/high_pressure.csv")
    assert [(r["accounts"], r["target_area"]) for r in high] == [("A-high; A-high-2", "T2")]
    info = json.loads((root / "out/run.json").read_text())
    assert info["target_areas"] == {"enabled": True, "distance_ft": 700.0, "min_customers": 2, "clustered_in": res.points.crs.to_string(),
                                    "areas": 2, "by_finding": {"above_hgl": 1, "low": 0, "high": 1,
                                                               "low_upper_floors": 0}, "customers_in_areas": 5}
    html = (root / "out/report.html").read_text(encoding="utf-8")
    assert 'id="areas-map"' in html and "zone PRV at an HGL of 1,085.4 to 1,186.2 ft" in html


def test_target_areas_of_customers_in_a_geographic_crs_are_clustered_in_utm():
    # two points 0.001 degree of latitude apart near 45 N: about 111.1 m = 364.6 ft (from memory: a degree of
    # latitude is about 111.1 km there); in the UTM zone the distance is true to the zone's 0.9996 scale
    crs = pyproj.CRS("EPSG:4326")
    x, y, ft_per_unit, used = pipeline._projected(np.array([3.0, 3.0, np.nan]), np.array([45.0, 45.001, np.nan]), crs)
    assert used.is_projected and "UTM zone 31N" in used.name
    assert ft_per_unit == pytest.approx(1 / 0.3048, rel=1e-12)  # metres: the international foot exactly
    d_ft = np.hypot(x[1] - x[0], y[1] - y[0]) * ft_per_unit
    assert d_ft == pytest.approx(364.6, abs=1.0)  # 1 ft: the recalled metres per degree, and the zone's scale
    assert np.isnan(x[2])  # no location stays none


#: the layers that get a style, in the order the GeoPackage gets them
#: the styled layers in the order the GeoPackage gets them: customers and its views, then the others
STYLED = ["customers", *FLAGGED_LAYERS.values(), "changes", "target_areas", "service_band", "band_limits"]
#: every finding's layer and mailing list, in the registry's order (the storage levels' too, empty when not checked)
LISTS = tuple(FLAGGED_LAYERS.values())


def test_run_json_records_the_run(crafted):
    res = run_crafted(crafted)
    root = crafted.parent
    info = json.loads((root / "out/run.json").read_text())
    assert info["geopress_version"] == geopress.__version__
    assert info["config_file"] == str(crafted)
    assert info["counts"] == res.counts
    assert info["customers"] == {"total": len(CRAFTED), "layer": "customers", "from_polygons": 0, "no_geometry": 1}
    assert [i["path"] for i in info["inputs"]] == [str(root / "customers.gpkg"), str(root / "dem.tif"),
                                                   str(root / "zones.gpkg")]
    assert info["inputs"][1]["bytes"] == (root / "dem.tif").stat().st_size
    lists = [f"{n}{suffix}" for n in LISTS for suffix in (".csv", ".xlsx")]
    assert info["outputs"] == [str(root / "out/pressure.gpkg")] + [
        str(root / "out/mailing" / name)
        for name in [*lists, "field_verification.csv", "field_verification.xlsx", *[f"new_{n}" for n in lists]]
    ] + [str(root / f"out/pressure.{layer}.sld") for layer in STYLED] + [str(root / "out/report.html")]
    assert info["xlsx"] == {"written": True, "reason": None}
    assert info["styles"] == {"written": True, "layers": STYLED}
    assert info["config"]["zones"]["source"][0] == {"zone": "Main", "high_water_ft": 1200.0, "low_water_ft": 1180.0,
                                                    "hgl_uncertainty_ft": 0.0, "kind": "tank"}
    assert info["terrain"][0]["vertical_unit"] == "ft" and info["terrain"][0]["customers_sampled"] == 11
    assert info["started"] <= info["finished"]
    assert "sample terrain" in info["timings_s"] and info["timings_s"]["write outputs"] > 0
    assert json.loads(json.dumps(res.info, default=str)) == info  # the result says what run.json says
    assert set(info["versions"]) == {"gdal", "proj", "pyogrio"}
    assert sorted(res.outputs) == sorted(Path(p) for p in info["outputs"] + [str(root / "out/run.json")])


def disk_full(*args, **kwargs):
    raise OSError(errno.ENOSPC, "No space left on device")


@pytest.mark.parametrize("failing", ["write_csv", "write_json"])
def test_a_failed_write_leaves_previous_outputs_byte_identical(crafted, monkeypatch, failing):
    root = crafted.parent
    run_crafted(crafted)
    before = output_files(root)
    assert set(before) == {"out/pressure.gpkg", "out/.pressure.gpkg.baseline.gpkg", "out/run.json", "out/report.html"} | {
        f"out/mailing/{p}{n}{suffix}" for p in ("", "new_") for n in LISTS for suffix in (".csv", ".xlsx")
    } | {f"out/pressure.{layer}.sld" for layer in STYLED} | {"out/mailing/field_verification.csv",
                                                             "out/mailing/field_verification.xlsx"}
    # a second run that would change every output, and runs out of space part way
    crafted.write_text(crafted.read_text().replace("high_water_ft = 1200.0", "high_water_ft = 1190.0"))

    monkeypatch.setattr(write_io, failing, disk_full)
    with pytest.raises(OutputError, match="No space left on device"):
        run_crafted(crafted)
    assert output_files(root) == before
    leftovers = [p for p in root.rglob("*") if write_io.TMP_MARK in p.name]
    assert leftovers == []


def test_temp_files_of_a_killed_run_are_removed(crafted):
    stale = crafted.parent / "out" / f".pressure.gpkg{write_io.TMP_MARK}abc.gpkg"
    stale.parent.mkdir()
    stale.write_bytes(b"half a file")
    run_crafted(crafted)
    assert not stale.exists()


def test_input_error_leaves_previous_outputs(crafted):
    root = crafted.parent
    run_crafted(crafted)
    before = output_files(root)
    (root / "zones.gpkg").unlink()
    with pytest.raises(InputError, match="file not found"):
        geopress.run(crafted)  # the zones are read before the customers, so no geometry warning comes first
    assert output_files(root) == before


# ---------------------------------------------------------------- command line


@pytest.fixture
def invoke(restore_logging):
    runner = CliRunner()

    def _invoke(*args):
        return runner.invoke(cli, list(map(str, args)), obj={})

    return _invoke


def one_error_line(stderr: str) -> str:
    errors = [line for line in stderr.splitlines() if line.startswith("error:")]
    assert len(errors) == 1, stderr
    assert "Traceback" not in stderr
    return errors[0]


def test_cli_run_exit_0_with_summary(crafted, invoke):
    res = invoke("run", crafted)
    assert res.exit_code == 0, res.stderr
    assert res.stdout.startswith(f"{len(CRAFTED)} customers: no_geometry 1, no_terrain 2, unzoned 1, above_hgl 3, "
                                 "low 1, high 2, low_upper_floors 1, ok 3 (")
    first, second = res.stdout.rstrip().splitlines()
    assert first.endswith(f"-> {crafted.parent / 'out/pressure.gpkg'}")
    assert second == f"changes since no earlier run: new_customer {len(CRAFTED)}"
    # the no-geometry warning reaches the user as one line
    assert any(line.startswith("warning:") and "no geometry" in line for line in res.stderr.splitlines())
    assert (crafted.parent / "out/run.json").exists()


def test_cli_check_prints_and_writes_nothing(crafted, invoke):
    before = sorted(p.name for p in crafted.parent.iterdir())
    res = invoke("check", crafted)
    assert res.exit_code == 0, res.stderr
    lines = res.stdout.splitlines()
    assert lines[0].startswith(f"customers: {len(CRAFTED)} from ")
    # Main's 10 customers (A-nodata without ground) run from A-high's 1,001.5 ft to A-edge's 1,210.0 ft;
    # the static range is 0.433 * (1180 - 1210) = -13.0 to 0.433 * (1200 - 1001.5) = 86.0 psi
    assert "Main (tank, 10 customers): ground 1,002 to 1,210 ft" in res.stdout
    assert "under an HGL of 1,180 to 1,200 ft: static -13.0 to 86.0 psi" in res.stdout
    # Hill: A-hill at 1,241.5 ft (A-off-dem has no ground): 0.433 * (1350 - 1241.5) = 47.0 psi
    assert "Hill (pump, 2 customers): ground 1,242 to 1,242 ft" in res.stdout
    assert "under an HGL of 1,350 ft: static 47.0 to 47.0 psi" in res.stdout
    assert "vertical unit ft" in res.stdout
    # 13 located customers: A-off-dem is off the DEM, A-unzoned outside both zones
    assert "92.3 % of the located customers on a raster" in res.stdout
    assert "92.3 % of the located customers in a zone, 1 unzoned" in res.stdout
    assert lines[-1] == "check passed"
    assert sorted(p.name for p in crafted.parent.iterdir()) == before


def test_cli_bad_config_exit_2_one_line_naming_the_key(crafted, invoke):
    crafted.write_text(crafted.read_text().replace("low_water_ft = 1180.0", "low_water_ft = 1280.0"))
    res = invoke("run", crafted)
    assert res.exit_code == 2
    line = one_error_line(res.stderr)
    assert line.startswith(f"error: {crafted}: zones.source[0].low_water_ft (line 21): ")
    assert res.stdout == ""


def test_cli_missing_customers_file_exit_2(crafted, invoke):
    (crafted.parent / "customers.gpkg").unlink()
    res = invoke("run", crafted)
    assert res.exit_code == 2
    line = one_error_line(res.stderr)
    assert str(crafted.parent / "customers.gpkg") in line and "customers.path" in line


def test_cli_missing_config_file_exit_2(tmp_path, invoke):
    res = invoke("check", tmp_path / "nope.toml")
    assert res.exit_code == 2
    assert "config file not found" in one_error_line(res.stderr)


def test_cli_full_disk_exit_2_and_outputs_kept(crafted, invoke, monkeypatch):
    assert invoke("run", crafted).exit_code == 0
    before = output_files(crafted.parent)
    monkeypatch.setattr(write_io, "write_csv", disk_full)
    res = invoke("run", crafted)
    assert res.exit_code == 2
    assert "cannot write" in one_error_line(res.stderr)
    assert output_files(crafted.parent) == before


def test_cli_unexpected_failure_exit_1(crafted, invoke, monkeypatch):
    def broken(*args, **kwargs):
        raise RuntimeError("simulated bug")

    monkeypatch.setattr(pipeline, "screen", broken)
    res = invoke("run", crafted)
    assert res.exit_code == 1
    line = one_error_line(res.stderr)
    assert "unexpected failure (RuntimeError: simulated bug)" in line and "--debug" in line


def test_cli_debug_shows_a_traceback(crafted):
    crafted.write_text(crafted.read_text().replace("[terrain]", "[terrain]\nbogus = 1"))
    code = "import sys; from geopress.cli import main; main(sys.argv[1:])"
    repo = Path(__file__).resolve().parents[1]
    proc = subprocess.run([sys.executable, "-c", code, "--debug", "run", str(crafted)], capture_output=True, text=True,
                          env={"PYTHONPATH": str(repo), "PATH": "/usr/bin:/bin"}, timeout=60)
    assert proc.returncode == 1
    assert "Traceback (most recent call last)" in proc.stderr
    assert "geopress.errors.ConfigError" in proc.stderr and "terrain.bogus" in proc.stderr


def test_cli_demo(tmp_path, invoke):
    repo = Path(__file__).resolve().parents[1]
    if not (repo / "data_demo" / "geopress.toml").exists():
        pytest.skip("data_demo/ is not in this checkout yet (generated separately)")
    res = invoke("demo", "--out", tmp_path / "demo")
    assert res.exit_code == 0, res.stderr
    assert (tmp_path / "demo" / "pressure.gpkg").exists()
    assert "customers:" in res.stdout
    # the demo's 12-story tower at the foot of Ridgeway (scripts/make_demo.py, raise_tower) is on two lists
    lists = {name: [r["accounts"] for r in read_csv(tmp_path / "demo" / "mailing" / f"{name}.csv")]
             for name in ("high_pressure", "upper_floors")}
    assert all(any("A-052634" in a for a in accounts) for accounts in lists.values())
    # and the report lists target areas with their settings
    html = (tmp_path / "demo" / "report.html").read_text(encoding="utf-8")
    assert 'id="target-areas-table"' in html and "zone PRV at an HGL of" in html
    # the demo's invented readings (scripts/make_demo.py): Lowfield's are all 4 ft of head high, and two Ridgeway
    # call-outs read about 20 psi low close together
    by_zone = pyogrio.read_dataframe(tmp_path / "demo" / "pressure.gpkg", layer="field_check_by_zone").set_index("zone")
    # 12 readings with 0.3 psi of noise (0.7 ft): their median is within 0.5 ft of the offset
    assert by_zone.loc["Lowfield", "bias_ft"] == pytest.approx(4.0, abs=0.5)
    assert by_zone.loc["Lowfield", "significant_bias"] and by_zone.loc["Lowfield", "pattern"] == "steady"
    assert not by_zone.loc["Ridgeway", "significant_bias"] and by_zone.loc["Ridgeway", "pattern"] == "cluster"
    assert not by_zone.loc["Summit", "significant_bias"] and by_zone.loc["Summit", "outliers"] == 0
    readings = pyogrio.read_dataframe(tmp_path / "demo" / "pressure.gpkg", layer="field_check")
    assert sorted(readings.loc[readings["check"] == "outlier", "reading"]) == ["CALL-135", "CALL-136"]
    section = html[html.index('id="field-check"'):html.index('id="inputs"')]
    assert "significant bias" in section and "closed valve" in section and "CALL-135" in section
    assert section.count("data:image/png") == 2  # residual against ground, and the map of residuals


# ---------------------------------------------------------------- input problems


def test_overlapping_zones_warn_and_follow_source_order(world):
    # East reaches 100 m into West: customers there go to West, listed first in the config
    world.zones_path.unlink()
    write_layer(world.zones_path, "zones", {"zone": ["West", "East"]},
                [shapely.box(X0, Y1 - 1000, X0 + 500, Y1), shapely.box(X0 + 400, Y1 - 1000, X0 + 1000, Y1)])
    with pytest.warns(geopress.errors.ZoneOverlapWarning, match="'East' and 'West' overlap"):
        res = geopress.run(world.config_path, write=False)
    xs = world.extra["xs"]
    in_overlap = (xs > X0 + 400) & (xs < X0 + 500)
    assert in_overlap.any()
    assert (res.customers["zone"][in_overlap] == "West").all()
    # 1000 m x 100 m of overlap: box intersections are exact but for round-off (pytest.approx's 1e-6 relative)
    assert res.info["zones"]["overlaps"] == [{"zones": ["East", "West"], "area": pytest.approx(100_000.0)}]


def test_invalid_zone_polygon_is_repaired_with_a_warning(world):
    bow_tie = shapely.Polygon([(X0 + 500, Y1), (X0 + 1000, Y1 - 1000), (X0 + 1000, Y1), (X0 + 500, Y1 - 1000)])
    world.zones_path.unlink()
    write_layer(world.zones_path, "zones", {"zone": ["West", "East"]}, [shapely.box(X0, Y1 - 1000, X0 + 500, Y1),
                                                                         bow_tie])
    with pytest.warns(GeometryWarning, match="zones East were repaired"):
        res = geopress.run(world.config_path, write=False)
    assert res.info["zones"]["repaired"] == ["East"]


def test_ground_off_the_earth_is_refused_naming_the_unit(tmp_path):
    # a DEM in feet declared as metres: 30,000 "m" would be 98,425 ft, far above any ground on Earth
    dem = np.broadcast_to(30000.0 + np.arange(DEM_SHAPE[1]), DEM_SHAPE).astype(np.float32)
    us_ft_world(tmp_path)
    write_raster(tmp_path / "dem.tif", dem, DEM_TRANSFORM)
    (tmp_path / "geopress.toml").write_text(BASE_CONFIG)
    with pytest.raises(InputError, match="not ground on Earth.*check terrain.vertical_units") as info:
        geopress.run(tmp_path / "geopress.toml", write=False)
    assert info.value.key == "terrain.vertical_units" and info.value.path == str(tmp_path / "dem.tif")


@pytest.mark.parametrize(
    "change, error, key",
    [
        (lambda w: w.write_config(BASE_CONFIG.replace('id_field = "account"', 'id_field = "acct"')),
         InputError, "customers.id_field"),
        (lambda w: w.write_config(BASE_CONFIG.replace('layer = "parcels"', 'layer = "lots"')),
         InputError, "customers.layer"),
        (lambda w: w.write_config(BASE_CONFIG.replace('zone = "East"', 'zone = "Central"')),
         geopress.ConfigError, "zones.source[1].zone"),
        (lambda w: w.write_config(BASE_CONFIG.replace('paths = ["dem.tif"]', 'paths = ["missing.tif"]')),
         InputError, "terrain.paths"),
        (lambda w: write_raster(w.dem_path, np.zeros((4, 4)), DEM_TRANSFORM, crs=None),
         InputError, "crs"),
        (lambda w: write_raster(w.dem_path, np.zeros((4, 4)), Affine.translation(-1e5, 0) @ DEM_TRANSFORM),
         InputError, "terrain.paths"),
    ],
    ids=["missing-field", "missing-layer", "zone-not-in-layer", "missing-raster", "raster-without-crs",
         "no-customer-on-the-dem"],
)
def test_input_problems_raise_errors_naming_the_key(world, change, error, key):
    change(world)
    with pytest.raises(error) as info:
        geopress.run(world.config_path)
    assert info.value.key == key
    assert "\n" not in str(info.value)
    assert not world.out.exists()


def test_duplicate_customer_ids(world):
    world.customers_path.unlink()
    recs = customer_records([X0 + 10, X0 + 20], [Y1 - 10, Y1 - 10])
    recs["account"] = ["C1", "C1"]
    write_layer(world.customers_path, "parcels", recs, [shapely.Point(X0 + 10, Y1 - 10), shapely.Point(X0 + 20, Y1 - 10)])
    with pytest.raises(InputError, match="duplicate ids: C1") as info:
        geopress.run(world.config_path)
    assert info.value.key == "customers.id_field"


def test_zone_without_a_source(world):
    world.write_config(BASE_CONFIG.split('[[zones.source]]\nzone = "East"')[0] + "[output]\npath = 'out/p.gpkg'\n"
                       "mailing_dir = 'out/m'\n")
    with pytest.raises(InputError, match="zones East in layer 'zones' have no \\[\\[zones.source\\]\\]"):
        geopress.run(world.config_path)


def test_stale_temp_removal_takes_the_output_name_literally(tmp_path):
    # '[' and ']' in the output's name must not act as a glob character class
    target = tmp_path / "run[1].gpkg"
    own = tmp_path / f".run[1].gpkg{write_io.TMP_MARK}abc.gpkg"
    other = tmp_path / f".run1.gpkg{write_io.TMP_MARK}abc.gpkg"
    own.write_text("x")
    other.write_text("x")
    assert write_io.remove_stale_temps(target) == [own]
    assert other.exists()


def test_datum_offset_shifts_ground_onto_the_hgl_datum(world):
    # HGLs kept on an older datum 3.25 ft below the DEM's: ground_ft = DEM (ft) + datum_offset_ft
    plain = geopress.run(world.config_path, write=False).customers
    world.write_config(BASE_CONFIG.replace('method = "bilinear"', 'method = "bilinear"\ndatum_offset_ft = -3.25'))
    shifted = geopress.run(world.config_path, write=False).customers
    np.testing.assert_array_equal(shifted["ground_ft"], plain["ground_ft"] - 3.25)
    # 3.25 ft more head everywhere: 0.433 * 3.25 = 1.40725 psi more (float64 round-off ~1e-13, PSI_TOL)
    np.testing.assert_allclose(shifted["psi_min"], plain["psi_min"] + 0.433 * 3.25, rtol=0, atol=PSI_TOL)


def test_a_run_pauses_the_cycle_collector_and_restores_it(world, monkeypatch):
    seen = []
    real = pipeline.screen

    def spy(*args, **kwargs):
        seen.append(gc.isenabled())
        return real(*args, **kwargs)

    monkeypatch.setattr(pipeline, "screen", spy)
    assert gc.isenabled()
    geopress.run(world.config_path)
    assert seen == [False] and gc.isenabled()
    gc.disable()
    try:
        geopress.run(world.config_path)
        assert not gc.isenabled()  # left as the caller had it
    finally:
        gc.enable()


def _each_waits_for_the_other(monkeypatch, first: tuple[object, str], second: tuple[object, str]) -> None:
    """Patch two functions (an owner and an attribute name each) so that each waits, 30 s at most, for the other to
    have started: run one after the other, the first would time out."""
    started = {first: threading.Event(), second: threading.Event()}
    for mine, other in ((first, second), (second, first)):
        owner, name = mine
        real = getattr(owner, name)

        def patched(*args, _real=real, _mine=started[mine], _other=started[other], _names=(name, other[1]), **kwargs):
            _mine.set()
            assert _other.wait(timeout=30), "%s never started beside %s" % tuple(reversed(_names))
            return _real(*args, **kwargs)

        monkeypatch.setattr(owner, name, patched)


def _screened(res: pipeline.Result) -> pd.DataFrame:
    """The customers' columns of a run but those of the baseline comparison (a second run has a baseline)."""
    return res.customers[[c for c in res.customers.columns if c not in ("previous_status", "change")]]


def test_the_writer_starts_while_the_service_band_is_computed(world, monkeypatch):
    # the band waits (60 s at most) for the writer's job to start: a writer queued behind the band would fail it
    monkeypatch.setattr(pipeline.planning, "service_bands", faults_support.band_once_the_writer_writes)
    monkeypatch.setattr(write_io, "write_in_child", faults_support.write_and_say_so)
    res = geopress.run(world.config_path)
    (world.out.parent / faults_support.WRITER_STARTED).unlink()
    monkeypatch.undo()
    alone = geopress.run(world.config_path, write=False)
    assert res.info["service_band"] == alone.info["service_band"]
    assert res.plan.bands.geometry.geom_equals_exact(alone.plan.bands.geometry, 0).all()


@pytest.mark.parametrize("first, second, timing", [
    ((pipeline, "assign_xy"), (pipeline.raster_io, "sample_terrain"), "assign zones (thread)"),
    ((pipeline, "_target_areas"), (pipeline.nightly, "track"), "target areas (thread)"),
], ids=["zone-join-beside-sampling", "target-areas-beside-baseline-comparison"])
def test_a_thread_works_beside_the_runs_own(world, monkeypatch, first, second, timing):
    _each_waits_for_the_other(monkeypatch, first, second)
    res = geopress.run(world.config_path)
    monkeypatch.undo()
    alone = geopress.run(world.config_path, write=False)
    pd.testing.assert_frame_equal(_screened(res), _screened(alone))
    assert timing in res.info["timings_s"]
    # the target areas' columns where the customers layer has always had them: after the findings', in the
    # documented order, in the frame and in the layer
    assert set(AREA_COLUMNS.values()) <= set(res.customers.columns)
    assert [c for c in res.customers.columns if c in RESULT_COLUMNS] == [
        c for c in RESULT_COLUMNS if c in res.customers.columns]
    written = pyogrio.read_dataframe(world.out, layer="customers", read_geometry=False, max_features=1)
    assert list(written.columns) == list(res.customers.columns)


def test_an_error_in_the_target_areas_is_the_runs(world, monkeypatch):
    def areas(*args):
        raise RuntimeError("broken target areas")

    monkeypatch.setattr(pipeline, "_target_areas", areas)
    with pytest.raises(RuntimeError, match="broken target areas"):
        geopress.run(world.config_path)
    assert not world.out.exists()


@pytest.mark.parametrize("failing", ["join", "sample"])
def test_an_error_beside_the_zone_join_waits_for_both(world, monkeypatch, failing):
    # an error of either is raised only once the other has finished: no thread is left reading the customers
    finished = []
    real_join, real_sample = pipeline.assign_xy, pipeline.raster_io.sample_terrain

    def join(*args):
        time.sleep(0.1 if failing == "join" else 0.6)  # the one that fails, first
        if failing == "join":
            raise InputError("broken zone join", key="zones.path")
        finished.append("join")
        return real_join(*args)

    def sample(*args, **kwargs):
        time.sleep(0.1 if failing == "sample" else 0.6)
        if failing == "sample":
            raise InputError("broken sampling", key="terrain.paths")
        finished.append("sample")
        return real_sample(*args, **kwargs)

    monkeypatch.setattr(pipeline, "assign_xy", join)
    monkeypatch.setattr(pipeline.raster_io, "sample_terrain", sample)
    with pytest.raises(InputError, match=f"broken {'zone join' if failing == 'join' else 'sampling'}"):
        geopress.run(world.config_path, write=False)
    assert finished == ["sample" if failing == "join" else "join"]
    assert not [t for t in threading.enumerate() if t.name.startswith("geopress-zones")]


@pytest.mark.parametrize("writer_first", [True, False])
def test_a_command_run_gives_the_cpu_to_its_writer(world, monkeypatch, writer_first):
    # the command line's policy (_compat.writer_first): once the writer process has the customers, the run's
    # thread takes a lower priority (Linux's per-thread nice value); a Python session's run keeps its own
    from geopress import _compat

    monkeypatch.setattr(_compat, "_WRITER_FIRST", writer_first)
    seen = {}
    real_track, real_summarise = pipeline.nightly.track, pipeline.summarise

    def track(*args, **kwargs):
        seen["before the writer"] = thread_nice()
        return real_track(*args, **kwargs)

    def summarise(*args, **kwargs):
        seen["after"] = thread_nice()
        return real_summarise(*args, **kwargs)

    monkeypatch.setattr(pipeline.nightly, "track", track)
    monkeypatch.setattr(pipeline, "summarise", summarise)
    start = thread_nice()
    run_in_its_own_thread(world.config_path)
    lowered = max(start, _compat.BEHIND_THE_WRITER_NICE) if writer_first else start
    assert seen == {"before the writer": start, "after": lowered}
    assert thread_nice() == start  # this thread's priority is untouched


def test_the_command_line_gives_the_cpu_to_its_writer(monkeypatch):
    from geopress import cli as cli_module

    called = []
    monkeypatch.setattr(cli_module, "writer_first", lambda: called.append("writer_first"))
    monkeypatch.setattr(cli_module, "keep_freed_memory", lambda: called.append("keep_freed_memory"))
    with pytest.raises(SystemExit) as exit_info:
        cli_module.main(["--help"])
    assert exit_info.value.code == 0 and sorted(called) == ["keep_freed_memory", "writer_first"]
