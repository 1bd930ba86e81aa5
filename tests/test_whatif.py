"""What-if runs (--set, --out-dir), run comparison, SI units and the planning layers end to end."""

from __future__ import annotations

import json

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

import geopress
from geopress.findings import FLAGGED_STATUSES, finding_of_layer
from geopress.cli import cli
from geopress.errors import ConfigError
from geopress.pressure import M_PER_FT, PA_PER_PSI
from geopress.scenario import load_scenario, parse_assignment


def invoke(*args):
    return CliRunner().invoke(cli, list(args), obj={}, catch_exceptions=False)


@pytest.mark.parametrize("text, expected", [
    ("criteria.max_static_psi=90", ("criteria.max_static_psi", 90)),
    ("zones.source.Upper.high_water_ft=1250.5", ("zones.source.Upper.high_water_ft", 1250.5)),
    ('customers.layer="lots"', ("customers.layer", "lots")),
    ("customers.layer=lots", ("customers.layer", "lots")),  # not TOML: taken as text
    ("output.report=false", ("output.report", False)),
    ('customers.mail_fields=["owner", "addr"]', ("customers.mail_fields", ["owner", "addr"])),
    (" output.units = si ", ("output.units", "si")),
])
def test_parse_assignment(text, expected):
    assert parse_assignment(text) == expected


@pytest.mark.parametrize("text", ["max_static_psi", "=90", "criteria..max=1"])
def test_parse_assignment_rejects_malformed(text):
    with pytest.raises(ConfigError, match="KEY=VALUE"):
        parse_assignment(text)


def test_out_dir_keeps_file_names_and_records_overrides(world, tmp_path):
    cfg = load_scenario(world.config_path, ["zones.source.East.high_water_ft=1500"], tmp_path / "scen")
    assert cfg.output.path == (tmp_path / "scen" / "pressure.gpkg").resolve()
    assert cfg.output.mailing_dir == (tmp_path / "scen" / "mailing").resolve()
    assert cfg.zones.source_for("East").high_water_ft == 1500.0
    assert dict(cfg.overrides)["zones.source.East.high_water_ft"] == 1500


def test_whatif_run_and_compare_from_the_command_line(world, tmp_path):
    base = invoke("-q", "run", str(world.config_path), "--set", "output.report=false", "--replace-outputs")
    assert base.exit_code == 0, base.output
    before = world.out.read_bytes()
    scen = tmp_path / "scen"
    res = invoke("-q", "run", str(world.config_path), "--set", "output.report=false",
                 "--set", "zones.source.East.high_water_ft=1500", "--out-dir", str(scen))
    assert res.exit_code == 0, res.output
    assert world.out.read_bytes() == before  # the base run's outputs are untouched
    assert (scen / "pressure.gpkg").exists() and (scen / "mailing" / "high_pressure.csv").exists()
    info = json.loads((scen / "run.json").read_text())
    assert info["overrides"]["zones.source.East.high_water_ft"] == 1500
    assert info["report"] == {"written": False, "reason": "output.report = false"}

    out = tmp_path / "cmp" / "diff.gpkg"
    cmp_ = invoke("compare", str(world.out), str(scen / "pressure.gpkg"), "--out", str(out))
    assert cmp_.exit_code == 0, cmp_.output
    # independent expectation: join both runs' customers on the account number
    a = gpd.read_file(world.out, layer="customers").set_index("account")
    b = gpd.read_file(scen / "pressure.gpkg", layer="customers").set_index("account")
    changed = a.index[a["status"] != b.loc[a.index, "status"]]
    assert len(changed) > 0
    assert (b.loc[changed, "zone"] == "East").all()  # only East's HGL moved
    diff = gpd.read_file(out, layer="status_differences")
    assert sorted(diff["account"]) == sorted(changed)
    assert (diff["status_a"].to_numpy() == a.loc[diff["account"], "status"].to_numpy()).all()
    assert (diff["status_b"].to_numpy() == b.loc[diff["account"], "status"].to_numpy()).all()
    by_zone = pd.read_csv(tmp_path / "cmp" / "diff_by_zone.csv")
    assert by_zone["customers"].sum() == len(changed) and set(by_zone["zone"]) == {"East"}
    listed = pd.read_csv(tmp_path / "cmp" / "diff.csv")
    assert len(listed) == len(changed) and {"x", "y", "status_a", "status_b"} <= set(listed.columns)
    assert f"{len(changed)} customers differ in status" in cmp_.output
    assert f"East: {len(changed)}" in cmp_.output


def test_set_naming_an_unknown_zone_is_a_config_error(world):
    res = CliRunner().invoke(cli, ["run", str(world.config_path), "--set", "zones.source.Nowhere.high_water_ft=1",
                                   "--out-dir", str(world.root / "scen")], obj={})
    assert res.exit_code == 2
    assert "no [[zones.source]] with zone = 'Nowhere'" in res.output


def test_compare_of_a_run_with_itself_is_empty(world, tmp_path):
    geopress.run(load_scenario(world.config_path, ["output.report=false"], replace_outputs=True))
    comp = geopress.pipeline.compare(world.out, world.out, out=tmp_path / "same.gpkg")
    assert len(comp.differences) == 0 and len(comp.by_zone) == 0
    assert len(gpd.read_file(tmp_path / "same.gpkg", layer="status_differences")) == 0


def test_compare_rejects_a_file_that_is_not_a_run(world, tmp_path):
    res = CliRunner().invoke(cli, ["compare", str(world.zones_path), str(world.zones_path)], obj={})
    assert res.exit_code == 2 and "has no layer 'customers' (layers there: zones)" in res.output


def test_si_units_convert_the_mailing_lists(world, tmp_path):
    us = geopress.run(load_scenario(world.config_path, ["output.report=false"], replace_outputs=True), write=False)
    si = geopress.run(load_scenario(world.config_path, ["output.report=false", "output.units=si"], replace_outputs=True), write=False)
    for name, df in us.mailing.items():
        other = si.mailing[name]
        if name == "field_verification":  # one row per borderline flag, its pressures psi_* in US and kpa_* in SI
            assert "psi_min" in df.columns and "kpa_min" in other.columns and "margin_kpa" in other.columns
            continue
        if finding_of_layer(name) not in FLAGGED_STATUSES:  # a storage level's list: no level checked here
            assert df.empty and other.empty and "worst_kpa" in other.columns
            continue
        assert "worst_psi" in df.columns and "worst_kpa" in other.columns and "worst_psi" not in other.columns
        # kPa = psi * 6.894757 (NIST SP 811: 1 psi = 6,894.757 Pa); both columns are rounded to 0.1, so
        # compare against the unrounded psi (the customers layer) converted, within half a 0.1 kPa step
        col = {"high_pressure": "psi_max", "low_pressure": "psi_min", "above_hgl": "psi_min",
               "upper_floors": "psi_top"}[name]
        how = "max" if name == "high_pressure" else "min"
        flagged = us.customers[us.customers["status"] == {"high_pressure": "high", "low_pressure": "low",
                                                          "above_hgl": "above_hgl", "upper_floors": "low_upper_floors"}[name]]
        if len(flagged):
            worst = getattr(flagged[col], how)() * 6.894757
            extreme = other["worst_kpa"].max() if how == "max" else other["worst_kpa"].min()
            assert extreme == pytest.approx(worst, abs=0.05 + 1e-9)
    assert PA_PER_PSI == pytest.approx(6894.757, abs=1e-3)  # NIST SP 811 (secondary, REFERENCES.md)
    # the GeoPackage keeps ft and psi whatever the display units
    np.testing.assert_array_equal(us.customers["psi_max"], si.customers["psi_max"])


def test_si_units_convert_the_new_mailing_lists_too(world):
    # a first run: every flagged customer is new, so each new_* list is the run's list, in the same units
    si = geopress.run(load_scenario(world.config_path, ["output.report=false", "output.units=si"], replace_outputs=True), write=False)
    assert si.new_mailing
    for name, df in si.new_mailing.items():
        assert "worst_kpa" in df.columns and "worst_psi" not in df.columns
        pd.testing.assert_frame_equal(df, si.mailing[name.removeprefix("new_")])


def test_units_are_validated(world):
    with pytest.raises(ConfigError, match="output.units"):
        load_scenario(world.config_path, ["output.units=metric"], replace_outputs=True)
    with pytest.raises(ConfigError, match="output.report"):
        load_scenario(world.config_path, ['output.report="yes"'], replace_outputs=True)


def test_run_writes_the_planning_layers(world):
    geopress.run(load_scenario(world.config_path, ["output.report=false"], replace_outputs=True))
    bands = world.read("service_band").set_index("zone")
    limits = world.read("band_limits")
    summary = world.read("zone_summary").set_index("zone")
    assert set(bands.index) == {"West", "East"} and len(limits) == 4
    # West: PRV at 1000 ft + 60 psi / 0.433 = 1138.57 ft. Band 953.8 .. 1057.7 ft of ground; the plane
    # rises 0.1 m per m east from 300 m (984.3 ft) at x = 500000, so the band is the strip from the
    # west edge to x = 500000 + (1057.7 * 0.3048 - 300) / 0.1 = 500223.9 m, 1000 m tall
    hgl = 1000.0 + 60.0 / 0.433
    upper_ft = hgl - 35.0 / 0.433
    strip_m2 = ((upper_ft * M_PER_FT - 300.0) / 0.1) * 1000.0
    # within one 10 m pixel along the 1000 m limit line (the criterion)
    assert bands.loc["West", "area_sq_ft"] * M_PER_FT**2 == pytest.approx(strip_m2, abs=10.0 * 1000.0)
    assert bands.loc["West", "area_acres"] == pytest.approx(bands.loc["West", "area_sq_ft"] / 43_560, abs=1e-3)
    assert bands.loc["West", "upper_limit_ft"] == pytest.approx(upper_ft, abs=1e-9)
    for col in ("best_high_water_ft_from", "best_high_water_ft_to", "flagged_at_best",
                "best_setting_psi_from", "best_setting_psi_to"):
        assert col in summary.columns
    assert np.isfinite(summary.loc["East", "best_high_water_ft_from"])
    assert np.isnan(summary.loc["East", "best_setting_psi_from"])
    assert summary.loc["East", "flagged_at_best"] <= summary.loc["East", "flagged_now"]


def test_band_from_two_rasters_matches_one(world):
    import rasterio
    from affine import Affine

    from conftest import write_raster

    geopress.run(load_scenario(world.config_path, ["output.report=false"], replace_outputs=True))
    one = world.read("service_band").set_index("zone")
    with rasterio.open(world.dem_path) as src:
        dem = src.read(1)
    t = world.transform
    # the seam at column 15 (x = 500150 m) cuts the West band (x = 500000 .. 500224 m)
    write_raster(world.root / "dem_a.tif", dem[:, :15].copy(), t)
    write_raster(world.root / "dem_b.tif", dem[:, 15:].copy(), t @ Affine.translation(15, 0))
    geopress.run(load_scenario(world.config_path, ["output.report=false", 'terrain.paths=["dem_a.tif", "dem_b.tif"]'],
                               replace_outputs=True))
    two = world.read("service_band").set_index("zone")
    info = json.loads((world.out.parent / "run.json").read_text())
    west = next(z for z in info["service_band"] if z["zone"] == "West")
    assert [r["path"].rsplit("/", 1)[1] for r in west["rasters"]] == ["dem_a.tif", "dem_b.tif"]
    # the same pixels decide the band either way; only the one-pixel simplification may differ where the
    # seam cuts the band's outline: allow one 10 m pixel along the 1000 m seam
    for zone in ("West", "East"):
        assert two.loc[zone, "area_sq_ft"] * M_PER_FT**2 == pytest.approx(one.loc[zone, "area_sq_ft"] * M_PER_FT**2,
                                                                          abs=10.0 * 1000.0)
