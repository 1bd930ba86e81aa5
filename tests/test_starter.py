"""geopress init: from a user's own three files to a filled config, without the demo's files."""

from __future__ import annotations

import re
import tomllib

import numpy as np
import pyogrio
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st

from conftest import DEM_SHAPE, DEM_TRANSFORM, ORIGIN, PROJECTED, plane, write_raster
from geopress.config import PLACEHOLDER, config_from_dict, placeholders
from geopress.errors import ConfigError
from geopress.starter import Field, RasterSummary, VectorSummary, ZoneIds, config_text, toml_string
from nightly_support import assert_bad, invoke

X0, Y1 = ORIGIN


@pytest.fixture
def own_files(tmp_path):
    """A utility's own files, none from the demo: a shapefile of meter points, a DEM that states no
    vertical unit, and a GeoPackage of two zones with a text field naming each."""
    import geopandas as gpd

    data = tmp_path / "gis"
    data.mkdir()
    xs = X0 + np.linspace(25, 975, 12)
    gpd.GeoDataFrame({
        "owner": ["Ann", "Ann", "Bo", "Cy"] * 3,  # not unique
        "acct_no": [f"M-{i:03d}" for i in range(12)],  # unique: the id to propose
        "street": [f"{i} Row" for i in range(12)],  # unique too, but not named like an id
        "stories": [1, 2] * 6,
    }, geometry=[shapely.Point(x, Y1 - 500.0) for x in xs], crs=PROJECTED).to_file(
        data / "meters.shp", engine="pyogrio")
    a, b, c = 300.0 - 0.1 * X0, 0.1, 0.0  # metres, rising west to east
    write_raster(data / "dem.tif", plane(a, b, c, DEM_SHAPE, DEM_TRANSFORM), DEM_TRANSFORM)
    zones = gpd.GeoDataFrame({"label": ["Low side", "High side"], "zone_name": ["West", "East"], "code": [1, 2]},
                             geometry=[shapely.box(X0, Y1 - 1000, X0 + 500, Y1),
                                       shapely.box(X0 + 500, Y1 - 1000, X0 + 1000, Y1)], crs=PROJECTED)
    zones.to_file(data / "zones.gpkg", layer="pressure_zones", engine="pyogrio")
    return tmp_path


def placeholder_keys(line: str) -> list[str]:
    return re.findall(r"([\w.\[\]]+) \(line \d+\)", line)


def fill(text: str, key_line: str, value: str) -> str:
    """Replace the first placeholder line of ``key_line`` (e.g. ``kind = ``) with ``value``."""
    pattern = re.compile(rf'^{re.escape(key_line)}"{PLACEHOLDER}[^"]*"$', re.M)
    assert pattern.search(text), key_line
    return pattern.sub(value, text, count=1)


def test_from_own_files_to_a_run(own_files):
    cfg = own_files / "geopress.toml"
    res = invoke("init", cfg, "--customers", own_files / "gis/meters.shp", "--terrain", own_files / "gis/dem.tif",
                 "--zones", own_files / "gis/zones.gpkg")
    assert res.exit_code == 0, res.stderr
    assert "fill in the 8 values marked FILL IN" in res.stdout
    text = cfg.read_text(encoding="utf-8")
    data = tomllib.loads(text)
    assert data["customers"] == {"path": "gis/meters.shp", "layer": "meters", "id_field": "acct_no"}
    assert "# fields (type): owner (text), acct_no (text), street (text), stories (integer)" in text
    assert "all different: acct_no, street (read to find them: owner, acct_no, street, stories)" in text
    assert '# floors_field = "stories"' in text
    assert data["terrain"]["paths"] == ["gis/dem.tif"]
    assert data["zones"]["layer"] == "pressure_zones" and data["zones"]["id_field"] == "zone_name"  # named like a zone
    assert [s["zone"] for s in data["zones"]["source"]] == ["West", "East"]

    # check names exactly the placeholders left
    line = assert_bad(invoke("check", cfg), str(cfg), "still a placeholder")
    assert placeholder_keys(line) == [
        "terrain.vertical_units", "terrain.datum_offset_ft",
        *[f"zones.source[{i}].{k}" for i in (0, 1) for k in ("kind", "high_water_ft", "low_water_ft")]]
    lines = text.splitlines()
    for key in placeholder_keys(line):
        number = int(re.search(rf"{re.escape(key)} \(line (\d+)\)", line).group(1))
        assert lines[number - 1].startswith(key.rsplit(".", 1)[-1] + " = ")

    text = fill(text, "vertical_units = ", 'vertical_units = "m"')
    text = fill(text, "datum_offset_ft = ", "datum_offset_ft = 0.0")
    text = fill(text, "kind = ", 'kind = "prv"')  # West: a PRV instead of a tank
    text = fill(text, "high_water_ft = ", "valve_elevation_ft = 1000.0")
    text = fill(text, "low_water_ft = ", "setting_psi = 60.0")
    cfg.write_text(text, encoding="utf-8")
    line = assert_bad(invoke("check", cfg), "3 values are still a placeholder")
    assert placeholder_keys(line) == ["zones.source[1].kind", "zones.source[1].high_water_ft",
                                      "zones.source[1].low_water_ft"]

    text = fill(text, "kind = ", 'kind = "tank"')
    text = fill(text, "high_water_ft = ", "high_water_ft = 1400.0")
    text = fill(text, "low_water_ft = ", "low_water_ft = 1380.0")
    cfg.write_text(text, encoding="utf-8")
    res = invoke("check", cfg)
    assert res.exit_code == 0, res.stderr
    assert "customers: 12 from" in res.stdout and "zones: 2 from" in res.stdout
    assert "  West (prv, " in res.stdout and "  East (tank, " in res.stdout
    res = invoke("-q", "run", cfg)
    assert res.exit_code == 0, res.stderr
    assert len(pyogrio.read_dataframe(own_files / "out/pressure.gpkg", layer="customers")) == 12


def test_init_never_replaces_a_file_unless_forced(own_files):
    cfg = own_files / "geopress.toml"
    cfg.write_text("# mine\n")
    assert_bad(invoke("init", cfg, "--zones", own_files / "gis/zones.gpkg"), str(cfg), "already exists", "--force")
    assert cfg.read_text() == "# mine\n"
    res = invoke("init", cfg, "--zones", own_files / "gis/zones.gpkg", "--zone-field", "label", "--force")
    assert res.exit_code == 0, res.stderr
    data = tomllib.loads(cfg.read_text())
    assert [s["zone"] for s in data["zones"]["source"]] == ["Low side", "High side"]
    # the inputs not given are placeholders too
    assert {"customers.path", "customers.id_field", "terrain.paths[0]", "terrain.vertical_units"} <= set(
        placeholders(data))


def test_init_errors_name_the_option(own_files):
    missing = own_files / "gis/nope.shp"
    assert_bad(invoke("init", own_files / "a.toml", "--customers", missing), str(missing), "(from --customers)")
    assert_bad(invoke("init", own_files / "b.toml", "--zones", own_files / "gis/zones.gpkg", "--zone-field", "zone"),
               "no field 'zone' (from --zone-field)", "label, zone_name, code")
    assert_bad(invoke("init", own_files / "c.toml", "--customers", own_files / "gis/meters.shp", "--id-field", "id"),
               "no field 'id' (from --id-field)")
    assert_bad(invoke("init", own_files / "d.toml", "--zones", own_files / "gis/meters.shp"),
               "no layer of polygons (from --zones)")
    assert not list(own_files.glob("*.toml"))


def test_a_layer_without_a_unique_field_leaves_the_id_to_fill_in():
    summary = VectorSummary(path="c.gpkg", layer="c", layers=("c",), geometry_type="Point", features=2,
                            crs="EPSG:32631", fields=(Field("owner", "text"),), considered=("owner",), unique=())
    data = tomllib.loads(config_text(summary, [], None, None))
    assert data["customers"]["id_field"].startswith(PLACEHOLDER)


names = st.text(st.characters(blacklist_categories=("Cs",)), min_size=1, max_size=12)


@settings(max_examples=30, deadline=None)
@given(zones=st.lists(names, min_size=1, max_size=5, unique=True), unit=st.sampled_from([None, "m", "ft", "us_ft"]),
       path=names)
def test_any_zone_names_and_paths_come_back_from_the_text(zones, unit, path):
    # every name the text shows, in values and in comments, is the awkward one
    cust = VectorSummary(path=path, layer=path, layers=(path, "x"), geometry_type="Point", features=1, crs=path,
                         fields=(Field(path, "text"),), considered=(path,), unique=(path,))
    zsum = VectorSummary(path="z.gpkg", layer="z", layers=("z",), geometry_type="Polygon", features=len(zones),
                         crs=None, fields=(Field("zone", "text"),))
    raster = RasterSummary(path=path, width=1, height=1, pixel=(1.0, 1.0), crs=path, vertical_unit=unit)
    text = config_text(cust, [raster], zsum, ZoneIds("zone", True, tuple(zones)))
    data = tomllib.loads(text)
    assert [s["zone"] for s in data["zones"]["source"]] == zones
    assert data["customers"]["path"] == path and data["customers"]["id_field"] == path
    expected = ([] if unit else ["terrain.vertical_units"]) + ["terrain.datum_offset_ft"] + [
        f"zones.source[{i}].{k}" for i in range(len(zones)) for k in ("kind", "high_water_ft", "low_water_ft")]
    assert placeholders(data) == expected
    with pytest.raises(ConfigError, match="still a placeholder") as err:
        config_from_dict(data, text=text)
    assert err.value.key == expected[0]


@given(st.text(st.characters(blacklist_categories=("Cs",))))
def test_toml_string_round_trips(text):
    assert tomllib.loads(f"v = {toml_string(text)}")["v"] == text
