"""The TOML configuration (geopress.config): loading, normalising, and errors that name key and line."""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from geopress.classify import Criteria
from geopress.config import Config, apply_overrides, config_from_dict, load_config
from geopress.errors import ConfigError
from geopress.pressure import PrvSource, PumpSource, TankSource
from geopress.targets import TargetCriteria

from conftest import BASE_CONFIG

FULL_CONFIG = """\
[customers]
path = "data/customers.gpkg"
layer = "parcels"
id_field = "account"
mail_fields = ["owner", "mail_address"]
floors_field = "floors"

[terrain]
paths = ["dem/tile_b.tif", "dem/tile_a.tif"]
vertical_units = "us_ft"
method = "nearest"
memory_mb = 64

[zones]
path = "data/zones.gpkg"
layer = "zones"
id_field = "zone"

[[zones.source]]
zone = "Low"
kind = "tank"
high_water_ft = 1400.0
low_water_ft = 1380.0

[[zones.source]]
zone = "Mid"
kind = "prv"
valve_elevation_ft = 1100
setting_psi = 55

[[zones.source]]
zone = "High"
kind = "pump"
discharge_hgl_ft = 1600.5

[criteria]
max_static_psi = 90
min_static_psi = 40
psi_per_ft = 0.4335
floor_height_ft = 12

[output]
path = "out/pressure.gpkg"
mailing_dir = "out/mailing"
"""


def write(tmp_path: Path, text: str, name: str = "geopress.toml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def error_of(tmp_path: Path, text: str) -> ConfigError:
    with pytest.raises(ConfigError) as info:
        load_config(write(tmp_path, text))
    return info.value


def line_number(text: str, needle: str, after: str | None = None) -> int:
    """1-based line of the first line starting with ``needle`` (after the line starting with ``after``)."""
    lines = text.splitlines()
    start = 0 if after is None else next(i for i, line in enumerate(lines) if line.startswith(after))
    return next(i for i, line in enumerate(lines) if i >= start and line.startswith(needle)) + 1


# ---------------------------------------------------------------- loading


def test_base_example_loads(tmp_path):
    cfg = load_config(write(tmp_path, BASE_CONFIG))
    assert isinstance(cfg, Config)
    assert cfg.customers.mail_fields == ("owner", "mail_address")
    assert cfg.terrain.vertical_units == "m" and cfg.terrain.method == "bilinear"
    assert [s.zone for s in cfg.zones.sources] == ["West", "East"]
    assert cfg.zones.sources[0] == PrvSource("West", valve_elevation_ft=1000.0, setting_psi=60.0)
    assert cfg.zones.sources[1] == TankSource("East", high_water_ft=1400.0, low_water_ft=1380.0)
    assert cfg.criteria == Criteria(max_static_psi=80.0, min_static_psi=35.0)


def test_full_example_loads_with_every_key(tmp_path):
    cfg = load_config(write(tmp_path, FULL_CONFIG))
    assert cfg.terrain.paths == (tmp_path / "dem/tile_b.tif", tmp_path / "dem/tile_a.tif")  # order kept
    assert cfg.terrain.memory_mb == 64.0
    assert cfg.zones.sources[2] == PumpSource("High", discharge_hgl_ft=1600.5)
    assert cfg.zones.source_for("Mid") == PrvSource("Mid", valve_elevation_ft=1100.0, setting_psi=55.0)
    assert cfg.zones.source_for("Nowhere") is None
    assert cfg.criteria == Criteria(max_static_psi=90.0, min_static_psi=40.0, psi_per_ft=0.4335, floor_height_ft=12.0)
    assert isinstance(cfg.criteria.max_static_psi, float)  # TOML integers normalised


def test_criteria_table_is_optional_and_defaults_apply(tmp_path):
    text = BASE_CONFIG.replace("[criteria]\nmax_static_psi = 80.0\nmin_static_psi = 35.0\n", "")
    assert "[criteria]" not in text
    assert load_config(write(tmp_path, text)).criteria == Criteria()


def test_targets_table_is_optional_with_its_defaults(tmp_path):
    assert load_config(write(tmp_path, BASE_CONFIG)).targets == TargetCriteria(distance_ft=300.0, min_customers=10)
    cfg = load_config(write(tmp_path, BASE_CONFIG + "\n[targets]\ndistance_ft = 150\nmin_customers = 4\n"))
    assert cfg.targets == TargetCriteria(distance_ft=150.0, min_customers=4)
    assert isinstance(cfg.targets.min_customers, int) and cfg.to_dict()["targets"] == {"distance_ft": 150.0,
                                                                                        "min_customers": 4,
                                                                                        "enabled": True}
    off = load_config(write(tmp_path, BASE_CONFIG + "\n[targets]\nenabled = false\n")).targets
    assert off == TargetCriteria(enabled=False)


@pytest.mark.parametrize("line, key, says", [
    ("distance_ft = 0", "targets.distance_ft", "must be positive"),
    ("distance_ft = -5", "targets.distance_ft", "must be positive"),
    ('distance_ft = "300 ft"', "targets.distance_ft", "must be a finite number"),
    ("min_customers = 0", "targets.min_customers", "at least 1"),
    ("min_customers = 2.5", "targets.min_customers", "whole number"),
    ("distance_m = 90", "targets.distance_m", "allowed keys are distance_ft, enabled, min_customers"),
    ('enabled = "no"', "targets.enabled", "true or false"),
])
def test_bad_targets_name_their_key_and_line(tmp_path, line, key, says):
    text = BASE_CONFIG + f"\n[targets]\n{line}\n"
    err = error_of(tmp_path, text)
    assert err.key == key and says in str(err)
    assert f"(line {line_number(text, line.split(' ')[0])})" in str(err)


def test_relative_paths_resolve_against_the_config_folder(tmp_path, monkeypatch):
    conf_dir = tmp_path / "project" / "conf"
    conf_dir.mkdir(parents=True)
    path = write(conf_dir, BASE_CONFIG.replace('path = "customers.gpkg"', 'path = "../data/customers.gpkg"'))
    monkeypatch.chdir(tmp_path)  # somewhere else entirely
    cfg = load_config(Path("project/conf/geopress.toml"))
    assert cfg.customers.path == (tmp_path / "project" / "data" / "customers.gpkg").resolve()
    assert cfg.terrain.paths == ((conf_dir / "dem.tif").resolve(),)
    assert cfg.output.path == (conf_dir / "out" / "pressure.gpkg").resolve()
    assert cfg.output.mailing_dir == (conf_dir / "out" / "mailing").resolve()
    assert path.exists()


def test_absolute_paths_are_kept(tmp_path):
    dem = tmp_path / "elsewhere" / "dem.tif"
    cfg = load_config(write(tmp_path, BASE_CONFIG.replace('paths = ["dem.tif"]', f'paths = ["{dem}"]')))
    assert cfg.terrain.paths == (dem,)


def test_glob_in_terrain_paths_expands_sorted(tmp_path):
    (tmp_path / "tiles").mkdir()
    for name in ("n2.tif", "n10.tif", "n1.tif"):
        (tmp_path / "tiles" / name).write_bytes(b"")
    text = BASE_CONFIG.replace('paths = ["dem.tif"]', 'paths = ["first.tif", "tiles/n*.tif", "tiles/n1.tif"]')
    cfg = load_config(write(tmp_path, text))
    # first.tif listed first keeps priority; the glob is sorted; a repeated file is kept once, first place
    assert [p.name for p in cfg.terrain.paths] == ["first.tif", "n1.tif", "n10.tif", "n2.tif"]


def test_glob_matching_nothing_names_the_key(tmp_path):
    text = BASE_CONFIG.replace('paths = ["dem.tif"]', 'paths = ["tiles/*.tif"]')
    err = error_of(tmp_path, text)
    assert err.key == "terrain.paths"
    assert "tiles/*.tif" in str(err) and f"line {line_number(text, 'paths', '[terrain]')}" in str(err)


def test_overrides_apply_before_validation(tmp_path):
    cfg = load_config(write(tmp_path, BASE_CONFIG),
                      overrides={"criteria.max_static_psi": 90, "zones.source.East.low_water_ft": 1390.0})
    assert cfg.criteria.max_static_psi == 90.0
    assert cfg.zones.source_for("East").low_water_ft == 1390.0
    with pytest.raises(ConfigError, match="no \\[\\[zones.source\\]\\] with zone = 'Nope'"):
        load_config(write(tmp_path, BASE_CONFIG), overrides={"zones.source.Nope.low_water_ft": 1.0})
    with pytest.raises(ConfigError, match="zones.source.ZONE.key"):
        apply_overrides(tomllib.loads(BASE_CONFIG), {"zones.source.East": 1.0})


def test_to_dict_round_trips(tmp_path):
    cfg = load_config(write(tmp_path, FULL_CONFIG))
    again = config_from_dict(cfg.to_dict(), base_dir=tmp_path / "somewhere-else")
    assert again == cfg  # paths in to_dict are absolute, so the base folder no longer matters


# ---------------------------------------------------------------- errors: key and line


def test_missing_config_file(tmp_path):
    with pytest.raises(ConfigError, match="config file not found") as info:
        load_config(tmp_path / "nope.toml")
    assert str(tmp_path / "nope.toml") in str(info.value)


def test_syntax_error_names_the_file_and_line(tmp_path):
    text = BASE_CONFIG.replace("[terrain]", "[terrain")
    err = error_of(tmp_path, text)
    assert "TOML syntax error" in str(err)
    assert f"line {line_number(text, '[terrain')}" in str(err)
    assert str(tmp_path / "geopress.toml") in str(err)
    assert "\n" not in str(err)


def test_unknown_key_names_key_line_and_allowed_keys(tmp_path):
    text = BASE_CONFIG.replace('id_field = "account"', 'id_feild = "account"')
    err = error_of(tmp_path, text)
    assert err.key == "customers.id_feild"
    assert f"customers.id_feild (line {line_number(text, 'id_feild')})" in str(err)
    assert "id_field" in str(err)  # the allowed keys are listed


def test_unknown_key_in_a_source_names_its_index(tmp_path):
    text = BASE_CONFIG.replace("low_water_ft = 1380.0", "low_water_ft = 1380.0\nsetting_psi = 3.0")
    err = error_of(tmp_path, text)
    assert err.key == "zones.source[1].setting_psi"
    assert f"(line {line_number(text, 'setting_psi = 3.0')})" in str(err)


def test_unknown_top_level_table_is_named_plainly(tmp_path):
    text = BASE_CONFIG + "\n[reports]\ntitle = 'x'\n"
    err = error_of(tmp_path, text)
    assert err.key == "reports"
    assert ": reports" in str(err) and ".reports" not in str(err)
    assert f"line {line_number(text, '[reports]')}" in str(err)


def test_wrong_type_names_key_and_line(tmp_path):
    text = BASE_CONFIG.replace("max_static_psi = 80.0", 'max_static_psi = "80"')
    err = error_of(tmp_path, text)
    assert err.key == "criteria.max_static_psi"
    assert f"(line {line_number(text, 'max_static_psi')})" in str(err) and "'80'" in str(err)


@pytest.mark.parametrize(
    "old, new, key",
    [
        ('mail_fields = ["owner", "mail_address"]', "mail_fields = [1, 2]", "customers.mail_fields"),
        ('vertical_units = "m"', "vertical_units = true", "terrain.vertical_units"),
        ('method = "bilinear"', 'method = "cubic"', "terrain.method"),
        ('vertical_units = "m"', 'vertical_units = "yards"', "terrain.vertical_units"),
        ('kind = "prv"', 'kind = "well"', "zones.source[0].kind"),
        ("setting_psi = 60.0", "setting_psi = 0", "zones.source[0].setting_psi"),
        ("setting_psi = 60.0", "setting_psi = true", "zones.source[0].setting_psi"),
        ("setting_psi = 60.0", "setting_psi = nan", "zones.source[0].setting_psi"),
        ('path = "out/pressure.gpkg"', 'path = "out/pressure.shp"', "output.path"),
        ('paths = ["dem.tif"]', "paths = []", "terrain.paths"),
        ("min_static_psi = 35.0", "min_static_psi = -1", "criteria.min_static_psi"),
        ("min_static_psi = 35.0", "min_static_psi = 35.0\nfloor_height_ft = 0", "criteria.floor_height_ft"),
        ('paths = ["dem.tif"]', 'paths = ["dem.tif"]\nmemory_mb = 0', "terrain.memory_mb"),
    ],
)
def test_bad_values_name_their_key(tmp_path, old, new, key):
    text = BASE_CONFIG.replace(old, new, 1)
    assert text != BASE_CONFIG
    err = error_of(tmp_path, text)
    assert err.key == key
    assert str(err).split(": ", 1)[1].startswith(key)


def test_missing_required_key_names_key_and_table_line(tmp_path):
    text = BASE_CONFIG.replace('id_field = "account"\n', "")
    err = error_of(tmp_path, text)
    assert err.key == "customers.id_field"
    assert "missing required key" in str(err)
    assert f"(line {line_number(text, '[customers]')})" in str(err)


def test_missing_required_table(tmp_path):
    text = BASE_CONFIG.replace('[output]\npath = "out/pressure.gpkg"\nmailing_dir = "out/mailing"\n', "")
    err = error_of(tmp_path, text)
    assert err.key == "output" and "missing required table" in str(err)


def test_missing_sources(tmp_path):
    text = BASE_CONFIG.split("[[zones.source]]")[0] + "[output]\npath = 'o.gpkg'\nmailing_dir = 'm'\n"
    assert error_of(tmp_path, text).key == "zones.source"


def test_two_sources_for_one_zone(tmp_path):
    text = BASE_CONFIG.replace('zone = "East"', 'zone = "West"')
    err = error_of(tmp_path, text)
    assert err.key == "zones.source[1].zone"
    assert "zones.source[0]" in str(err)
    second = [i for i, line in enumerate(text.splitlines(), 1) if line == 'zone = "West"'][1]
    assert f"(line {second})" in str(err)


def test_tank_low_water_above_high_water(tmp_path):
    text = BASE_CONFIG.replace("low_water_ft = 1380.0", "low_water_ft = 1420.0")
    err = error_of(tmp_path, text)
    assert err.key == "zones.source[1].low_water_ft"
    assert "1420 ft is above high_water_ft 1400 ft" in str(err)
    assert f"(line {line_number(text, 'low_water_ft')})" in str(err)


def test_min_above_max(tmp_path):
    text = BASE_CONFIG.replace("min_static_psi = 35.0", "min_static_psi = 85.0")
    err = error_of(tmp_path, text)
    assert err.key == "criteria.min_static_psi"
    assert "85 psi is above max_static_psi 80 psi" in str(err)
    assert f"(line {line_number(text, 'min_static_psi')})" in str(err)


@pytest.mark.parametrize("value", ["0", "-0.433"])
def test_non_positive_psi_per_ft(tmp_path, value):
    text = BASE_CONFIG.replace("min_static_psi = 35.0", f"min_static_psi = 35.0\npsi_per_ft = {value}")
    err = error_of(tmp_path, text)
    assert err.key == "criteria.psi_per_ft"
    assert "must be positive" in str(err)
    assert f"(line {line_number(text, 'psi_per_ft')})" in str(err)


@pytest.mark.parametrize(
    "replacements, names",
    [
        ([('path = "out/pressure.gpkg"', 'path = "customers.gpkg"')], "customers.path"),
        ([('path = "out/pressure.gpkg"', 'path = "./zones.gpkg"')], "zones.path"),
        ([('paths = ["dem.tif"]', 'paths = ["dem.gpkg"]'), ('path = "out/pressure.gpkg"', 'path = "dem.gpkg"')],
         "terrain.paths"),
    ],
)
def test_output_path_equal_to_an_input_path(tmp_path, replacements, names):
    text = BASE_CONFIG
    for old, new in replacements:
        text = text.replace(old, new)
    err = error_of(tmp_path, text)
    assert err.key == "output.path"
    assert f"same file as {names}" in str(err)
    assert f"(line {line_number(text, 'path', after='[output]')})" in str(err)


def test_mailing_dir_equal_to_an_input_path(tmp_path):
    text = BASE_CONFIG.replace('mailing_dir = "out/mailing"', 'mailing_dir = "dem.tif"')
    assert error_of(tmp_path, text).key == "output.mailing_dir"


@pytest.mark.parametrize("bad", ["~no-such-user-geopress/customers.gpkg", "cust\x00omers.gpkg"])
def test_unusable_path_is_a_config_error(tmp_path, bad):
    data = tomllib.loads(BASE_CONFIG)
    data["customers"]["path"] = bad
    with pytest.raises(ConfigError) as info:
        config_from_dict(data, base_dir=tmp_path)
    assert info.value.key == "customers.path"


@pytest.mark.parametrize("section, key, value", [
    ("output", "path", "two\nlines.tif"),
    ("terrain", "paths", ["tiles\n*.tif"]),
    ("criteria", "two\nlines", 1.0),
])
def test_errors_stay_on_one_line_whatever_the_key_or_value(tmp_path, section, key, value):
    data = tomllib.loads(BASE_CONFIG)
    data[section][key] = value
    with pytest.raises(ConfigError) as info:
        config_from_dict(data, base_dir=tmp_path)
    assert info.value.key == (f"{section}.{key}" if "\n" not in key else f'{section}."two\\nlines"')
    assert "\n" not in str(info.value)


# ---------------------------------------------------------------- robustness

toml_scalar = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-10**6, 10**6),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.sampled_from(["m", "ft", "us_ft", "tank", "prv", "pump", "bilinear", "x.gpkg", "*.tif", "~", "West", "",
                     "~no-such-user-geopress/x", "a\x00b", "two\nlines.tif", "[", "East"]),
)
toml_value = st.recursive(toml_scalar, lambda inner: st.one_of(
    st.lists(inner, max_size=3), st.dictionaries(st.text(max_size=6), inner, max_size=3)), max_leaves=6)


def _paths(node, prefix=()):
    """Every (path, container) into nested dicts and lists."""
    if isinstance(node, dict):
        for k, v in node.items():
            yield (*prefix, k)
            yield from _paths(v, (*prefix, k))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            yield (*prefix, i)
            yield from _paths(v, (*prefix, i))


BASE_DATA = tomllib.loads(BASE_CONFIG)
BASE_PATHS = list(_paths(BASE_DATA))


@st.composite
def mutated_config(draw):
    data = copy.deepcopy(BASE_DATA)
    for _ in range(draw(st.integers(0, 3))):
        path = draw(st.sampled_from(BASE_PATHS))
        node = data
        try:
            for p in path[:-1]:
                node = node[p]
            action = draw(st.sampled_from(["replace", "delete", "add"]))
            if action == "replace":
                node[path[-1]] = draw(toml_value)
            elif action == "delete" and isinstance(node, dict):
                del node[path[-1]]
            elif isinstance(node, dict):
                node[draw(st.text(min_size=1, max_size=8))] = draw(toml_value)
        except (KeyError, IndexError, TypeError):
            pass  # an earlier mutation removed or replaced this branch
    return data


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(mutated_config())
def test_any_input_gives_a_config_or_a_config_error(data):
    try:
        cfg = config_from_dict(data, base_dir="/nonexistent-geopress-base")
    except ConfigError as exc:
        assert str(exc) and "\n" not in str(exc)
        assert exc.key
    else:
        assert isinstance(cfg, Config)


@pytest.mark.parametrize("key", ["floors_field", "mail_fields"])
def test_an_input_field_named_like_a_result_column_is_refused(tmp_path, key):
    value = '"status"' if key == "floors_field" else '["owner", "status"]'
    old = 'floors_field = "floors"' if key == "floors_field" else 'mail_fields = ["owner", "mail_address"]'
    err = error_of(tmp_path, BASE_CONFIG.replace(old, f"{key} = {value}"))
    expected_key = "customers.floors_field" if key == "floors_field" else "customers.mail_fields[1]"
    assert err.key == expected_key
    assert "'status' has the name of a result column" in str(err)
