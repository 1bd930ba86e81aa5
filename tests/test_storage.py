"""Storage levels (geopress.storage), booster ranges and rule sets of criteria (geopress.config)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from geopress.classify import Criteria
from geopress.config import config_from_dict, rule_set_names
from geopress.errors import ConfigError
from geopress.pressure import PrvSource, PumpSource, TankSource, customer_pressures
from geopress.storage import active, level_hgl_ft, level_psi, short, zone_levels

TANK = TankSource("T", high_water_ft=1400.0, low_water_ft=1380.0, bottom_ft=1300.0, fire_bottom_ft=1330.0,
                  standby_bottom_ft=1320.0)
SOURCES = [
    TANK,
    # setting 60 psi at 0.5 psi/ft: HGL 1000 + 120 = 1120 ft, fed from T
    PrvSource("P", valve_elevation_ft=1000.0, setting_psi=60.0, inlet_zone="T"),
    # setting 167.5 psi: HGL 1000 + 335 = 1335 ft, above T's fire (1330 ft) and standby (1320 ft) levels
    PrvSource("Q", valve_elevation_ft=1000.0, setting_psi=167.5, inlet_zone="T"),
    PumpSource("B", discharge_hgl_ft=1500.0, no_demand_hgl_ft=1520.0),
]


def test_level_hgls_by_zone_kind():
    k = 0.5
    assert zone_levels("peak_hour", SOURCES, k) == {"T": 1380.0, "P": 1120.0, "Q": 1335.0, "B": 1500.0}
    # fire: the tank at its fire bottom; P holds its 1120 ft below the inlet's 1330; Q's 1335 ft setting cannot be
    # held above the inlet's 1330 ft; the pump has no storage
    assert zone_levels("fire", SOURCES, k) == {"T": 1330.0, "P": 1120.0, "Q": 1330.0}
    assert zone_levels("standby", SOURCES, k) == {"T": 1320.0, "P": 1120.0, "Q": 1320.0}
    assert level_hgl_ft("fire", PumpSource("B", discharge_hgl_ft=1500.0), {}, k) is None


def test_a_level_is_checked_only_when_its_minimum_is_set_and_a_zone_has_it():
    assert active(Criteria(), SOURCES) == []
    crit = Criteria(fire_min_psi=20.0, standby_min_psi=20.0, peak_hour_min_psi=30.0)
    assert [lv.name for lv in active(crit, SOURCES)] == ["peak_hour", "fire", "standby"]
    # without a tank that gives the fire level, the fire minimum has nothing to check
    assert [lv.name for lv in active(crit, SOURCES[3:])] == ["peak_hour"]


def test_short_customers_on_an_analytic_plane_by_hand():
    # ground (ft) on a plane rising 2 ft per m eastward from 1250 ft: customers at x = 0, 5, ..., 45 m have
    # ground 1250, 1260, ..., 1340 ft; all in tank zone T (index 0)
    x = np.arange(0.0, 50.0, 5.0)
    ground = 1250.0 + 2.0 * x
    zone_index = np.zeros(x.size, dtype=int)
    k = 0.5  # psi per ft, exact in binary
    # fire: HGL 1330 ft, 20 psi needs 40 ft of head: short where ground > 1290 ft -> 1300, 1310, ..., 1340 ft
    psi = level_psi(ground, zone_index, ["T"], zone_levels("fire", [TANK], k), k)
    np.testing.assert_array_equal(psi, 0.5 * (1330.0 - ground))
    assert ground[short(psi, 20.0)].tolist() == [1300.0, 1310.0, 1320.0, 1330.0, 1340.0]
    # exactly 20 psi (ground 1290 ft) is not short: the rule is "at least 20 psi" (WAC 246-290-230, confirmed)
    assert psi[ground == 1290.0].item() == 20.0 and not short(psi, 20.0)[ground == 1290.0].item()
    # standby: HGL 1320 ft, 25 psi needs 50 ft: short where ground > 1270 ft -> 1280 ... 1340 ft
    psi = level_psi(ground, zone_index, ["T"], zone_levels("standby", [TANK], k), k)
    assert ground[short(psi, 25.0)].tolist() == [1280.0, 1290.0, 1300.0, 1310.0, 1320.0, 1330.0, 1340.0]
    # peak hour: HGL 1380 ft (low water), 30 psi needs 60 ft: short where ground > 1320 ft -> 1330, 1340 ft
    psi = level_psi(ground, zone_index, ["T"], zone_levels("peak_hour", [TANK], k), k)
    assert ground[short(psi, 30.0)].tolist() == [1330.0, 1340.0]


def test_no_level_no_zone_or_no_ground_is_never_short():
    psi = level_psi([1000.0, np.nan, 1000.0], [0, 0, -1], ["P"], {}, 0.5)  # P has no level here
    assert np.isnan(psi).all() and not short(psi, 20.0).any()
    psi = level_psi([1000.0, np.nan, 1000.0], [0, 0, -1], ["T"], {"T": 1010.0}, 0.5)
    assert psi[0] == 5.0 and np.isnan(psi[1:]).all() and short(psi, 20.0).tolist() == [True, False, False]


@settings(max_examples=100, deadline=None)
@given(ground=st.floats(min_value=-1000.0, max_value=10000.0), rise=st.floats(min_value=0.0, max_value=500.0),
       level=st.floats(min_value=0.0, max_value=10000.0), minimum=st.floats(min_value=0.0, max_value=150.0))
def test_raising_the_ground_never_clears_a_shortfall(ground, rise, level, minimum):
    before, after = (level_psi([g], [0], ["T"], {"T": level}, 0.433) for g in (ground, ground + rise))
    assert not (short(before, minimum)[0] and not short(after, minimum)[0])


def test_a_booster_with_a_no_demand_hgl_has_a_range_like_a_tank():
    src = PumpSource("B", discharge_hgl_ft=1500.0, no_demand_hgl_ft=1520.0)
    assert src.hgl_range(0.433) == (1520.0, 1500.0)
    # ground 1330 ft at 0.5 psi/ft: 95 psi at the no-demand HGL, 85 psi at the discharge HGL
    p = customer_pressures([1330.0], *src.hgl_range(0.5), [1], psi_per_ft=0.5)
    assert (p.psi_max[0], p.psi_min[0]) == (95.0, 85.0)
    assert PumpSource("C", discharge_hgl_ft=1500.0).hgl_range(0.433) == (1500.0, 1500.0)


# ---------------------------------------------------------------- rule sets


def _criteria(criteria: dict, tmp_path=None):
    data = {
        "customers": {"path": "c.gpkg", "id_field": "id"},
        "terrain": {"paths": ["d.tif"], "vertical_units": "m"},
        "zones": {"path": "z.gpkg", "id_field": "zone", "source": [
            {"zone": "T", "kind": "tank", "high_water_ft": 1400.0, "low_water_ft": 1380.0}]},
        "criteria": criteria,
        "output": {"path": "o.gpkg", "mailing_dir": "m"},
    }
    return config_from_dict(data, base_dir=tmp_path or ".").criteria


def test_shipped_rule_sets_carry_the_published_values():
    assert rule_set_names() == ["30-tac-290-45", "52-pa-code-65-6", "wac-246-290-230"]
    # Washington WAC 246-290-230: 30 psi at peak hour with equalizing storage used, 20 psi with fire and
    # equalizing storage used (REFERENCES.md: confirmed)
    wa = _criteria({"rule_set": "WAC 246-290-230"})
    assert (wa.peak_hour_min_psi, wa.fire_min_psi, wa.rule_set) == (30.0, 20.0, "wac-246-290-230")
    assert wa.min_static_psi == 35.0 and wa.standby_min_psi is None  # left as they were
    # Texas 30 TAC 290.45: 35 psi normal operating pressure, 20 psi during fire fighting (confirmed)
    tx = _criteria({"rule_set": "30 TAC 290.45"})
    assert (tx.min_static_psi, tx.fire_min_psi, tx.peak_hour_min_psi) == (35.0, 20.0, None)
    # Pennsylvania 52 Pa. Code 65.6: 25 psig normally, 20 psig at peak (confirmed); its 125 psig maximum is not
    # the plumbing code's 80 psi, so max_static_psi stays
    pa = _criteria({"rule_set": "52 Pa. Code 65.6"})
    assert (pa.min_static_psi, pa.peak_hour_min_psi, pa.max_static_psi) == (25.0, 20.0, 80.0)


def test_explicit_keys_override_the_rule_set():
    crit = _criteria({"rule_set": "wac-246-290-230", "fire_min_psi": 25.0, "min_static_psi": 40.0})
    assert (crit.fire_min_psi, crit.peak_hour_min_psi, crit.min_static_psi) == (25.0, 30.0, 40.0)


def test_an_unknown_rule_set_is_named_in_one_line():
    with pytest.raises(ConfigError) as info:
        _criteria({"rule_set": "ohio"})
    text = str(info.value)
    assert info.value.key == "criteria.rule_set" and "unknown rule set 'ohio'" in text and "wac-246-290-230" in text
    assert "\n" not in text


def test_a_user_rule_set_file(tmp_path):
    (tmp_path / "ours.toml").write_text('name = "our district"\n[criteria]\nfire_min_psi = 25\nstandby_min_psi = 20\n')
    crit = _criteria({"rule_set": "ours.toml"}, tmp_path)
    assert (crit.fire_min_psi, crit.standby_min_psi) == (25.0, 20.0)
    assert crit.rule_set == str((tmp_path / "ours.toml").resolve())
    (tmp_path / "bad.toml").write_text("[criteria]\nfire_minimum = 25\n")
    with pytest.raises(ConfigError, match="sets unknown key 'fire_minimum'") as info:
        _criteria({"rule_set": "bad.toml"}, tmp_path)
    assert info.value.key == "criteria.rule_set"
    with pytest.raises(ConfigError, match="cannot read rule set"):
        _criteria({"rule_set": "missing.toml"}, tmp_path)


def test_a_negative_storage_minimum_is_refused():
    with pytest.raises(ConfigError) as info:
        _criteria({"fire_min_psi": -1.0})
    assert info.value.key == "criteria.fire_min_psi"


# ---------------------------------------------------------------- through the pipeline, on the analytic plane

STORAGE_CONFIG = """\
[[zones.source]]
zone = "West"
kind = "prv"
valve_elevation_ft = 1000.0
setting_psi = 60.0
inlet_zone = "East"

[[zones.source]]
zone = "East"
kind = "tank"
high_water_ft = 1400.0
low_water_ft = 1380.0
fire_bottom_ft = 1325.0
standby_bottom_ft = 1315.0

[criteria]
max_static_psi = 80.0
min_static_psi = 35.0
psi_per_ft = 0.5
peak_hour_min_psi = 30.0
fire_min_psi = 20.0
standby_min_psi = 25.0
"""


def storage_world(world):
    """The conftest world (ground 300 m + 0.1 m per m east: customers at 302.5, 307.5, ..., 397.5 m, the first
    ten in West, the last ten in East) with the sources and criteria above."""
    text = world.config_path.read_text()
    head = text[: text.index("[[zones.source]]")]
    tail = text[text.index("[output]"):]
    world.write_config(head + STORAGE_CONFIG + "\n" + tail)
    return world


def test_pressure_at_each_storage_level_on_the_plane(world):
    import geopress
    from geopress.pressure import M_PER_FT

    res = geopress.run(storage_world(world).config_path, write=False)
    c = res.customers
    ground_m = 302.5 + 5.0 * np.arange(20)
    g = ground_m / M_PER_FT
    # bilinear sampling of a plane is exact; 1e-6 ft allows float64 rounding of ~1e3 ft values only
    np.testing.assert_allclose(c["ground_ft"], g, rtol=0, atol=1e-6)
    east = np.arange(20) >= 10
    # East at the fire level 1325 ft; West (a PRV at 1000 + 60 / 0.5 = 1120 ft fed from East) keeps its 1120 ft,
    # which is below East's 1325 ft
    fire_hgl = np.where(east, 1325.0, 1120.0)
    np.testing.assert_allclose(c["psi_fire"], 0.5 * (fire_hgl - g), rtol=0, atol=1e-6)
    standby_hgl = np.where(east, 1315.0, 1120.0)
    np.testing.assert_allclose(c["psi_standby"], 0.5 * (standby_hgl - g), rtol=0, atol=1e-6)


def test_each_storage_level_finds_the_customers_short_there(world):
    import geopress

    res = geopress.run(storage_world(world).config_path, write=False)
    c = res.customers.set_index("account")
    # ground of customer i is 302.5 + 5 i m = (302.5 + 5 i) / 0.3048 ft; i = 0..9 in West, 10..19 in East.
    # fire, 20 psi at 0.5 psi/ft needs 40 ft of head:
    #   East at 1325 ft: short where ground > 1285 ft = 391.668 m: 392.5 and 397.5 m (i = 18, 19)
    #   West at 1120 ft: short where ground > 1080 ft = 329.184 m: 332.5 ... 347.5 m (i = 6 ... 9)
    assert sorted(c.index[c["finding_fire_short"]]) == [f"C{i:04d}" for i in (6, 7, 8, 9, 18, 19)]
    # standby, 25 psi needs 50 ft:
    #   East at 1315 ft: short where ground > 1265 ft = 385.572 m: 387.5, 392.5, 397.5 m (i = 17, 18, 19)
    #   West at 1120 ft: short where ground > 1070 ft = 326.136 m: 327.5 ... 347.5 m (i = 5 ... 9)
    assert sorted(c.index[c["finding_standby_short"]]) == [f"C{i:04d}" for i in (5, 6, 7, 8, 9, 17, 18, 19)]
    # peak hour, 30 psi needs 60 ft at the low HGL:
    #   East at 1380 ft: short where ground > 1320 ft = 402.336 m: nobody (the highest is 397.5 m)
    #   West at 1120 ft: short where ground > 1060 ft = 323.088 m: 327.5 ... 347.5 m (i = 5 ... 9)
    assert sorted(c.index[c["finding_peak_hour_short"]]) == [f"C{i:04d}" for i in (5, 6, 7, 8, 9)]
    # findings only: the status is what normal operation gives. East's customer 17 (387.5 m = 1271.33 ft) keeps
    # 0.5 * (1380 - 1271.33) = 54.3 psi at low water and 0.5 * (1400 - 1271.33) = 64.3 psi at high: ok
    assert c.loc["C0017", "status"] == "ok"
    assert c.loc["C0017", "reason"] == ("with standby and equalizing storage used, static pressure down to 21.8 psi "
                                        "is below 25 psi")  # 0.5 * (1315 - 1271.33) = 21.83
    assert res.info["counts_by_finding"]["fire_short"] == 6
    for name in ("peak_hour_short", "fire_short", "standby_short"):
        assert name not in res.counts  # no customer has it as a status
    assert res.info["storage_levels"][1] == {"level": "fire", "minimum_psi": 20.0, "checked": True,
                                             "zones": {"West": 1120.0, "East": 1325.0}}


def test_a_minimum_no_zone_can_check_is_recorded_as_such():
    from geopress.storage import record

    crit = Criteria(fire_min_psi=20.0)
    assert record(crit, SOURCES[3:]) == [{"level": "fire", "minimum_psi": 20.0, "checked": False, "zones": {}}]
    assert record(Criteria(), SOURCES) == []


def test_levels_not_checked_find_nobody(world):
    import geopress

    res = geopress.run(world.config_path, write=False)  # no storage minimum set, no storage level given
    c = res.customers
    assert "psi_fire" not in c.columns and "psi_standby" not in c.columns
    for name in ("peak_hour_short", "fire_short", "standby_short"):
        assert not c[f"finding_{name}"].any()


def test_a_booster_with_a_no_demand_hgl_through_the_pipeline(world):
    import geopress

    text = world.config_path.read_text()
    text = text.replace('kind = "tank"\nhigh_water_ft = 1400.0\nlow_water_ft = 1380.0',
                        'kind = "pump"\ndischarge_hgl_ft = 1380.0\nno_demand_hgl_ft = 1400.0')
    assert "no_demand_hgl_ft" in text
    world.write_config(text)
    res = geopress.run(world.config_path, write=False)
    c = res.customers
    east = (c["zone"] == "East").to_numpy(dtype=bool)
    # the closed zone rises to 1400 ft at no demand and holds 1380 ft at the discharge: the tank's range
    assert (c.loc[east, "hgl_high_ft"] == 1400.0).all() and (c.loc[east, "hgl_low_ft"] == 1380.0).all()
    np.testing.assert_allclose(c.loc[east, "psi_max"] - c.loc[east, "psi_min"], 0.433 * 20.0, rtol=0, atol=1e-9)
    row = res.zone_summary.set_index("zone").loc["East"]
    assert (row["source_kind"], row["hgl_high_ft"], row["hgl_low_ft"]) == ("pump", 1400.0, 1380.0)
