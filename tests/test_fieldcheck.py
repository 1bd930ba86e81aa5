"""geopress.fieldcheck: predictions, residuals, uncertainty, outliers and per-zone bias, against hand computations."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from geopress import fieldcheck as fc
from geopress.pressure import M_PER_FT, PrvSource, PumpSource, TankSource

K = 0.433  # psi per ft, the default (common practice)


def one(**kw):
    """check_readings for one reading, with plain defaults for what a test does not set."""
    args = dict(measured_psi=[60.0], has_geometry=[True], zoned=[True], ground_ft=[1000.0], gauge_height_ft=[2.0],
                hgl_low_ft=[1138.0], hgl_high_ft=[1138.0], gauge_psi=[1.6], dem_rmse_ft=[0.0],
                hgl_uncertainty_ft=[0.0], psi_per_ft=K)
    args.update(kw)
    return fc.check_readings(**args).iloc[0]


def test_residual_and_implied_hgl_by_hand():
    # ground 1000 ft, gauge 2 ft above it, HGL 1138 ft: 136 ft of water over the gauge,
    # 0.433 * 136 = 58.888 psi predicted; 60.0 psi measured:
    #   residual 60.0 - 58.888 = 1.112 psi = 1.112 / 0.433 = 2.568129 ft of head
    #   implied HGL 1000 + 2 + 60.0 / 0.433 = 1002 + 138.568129 = 1140.568129 ft
    row = one()
    assert row["predicted_psi_low"] == pytest.approx(58.888, abs=1e-12)  # float64 rounding only
    assert row["residual_psi"] == pytest.approx(1.112, abs=1e-12)
    assert row["residual_ft"] == pytest.approx(2.568129330, abs=1e-9)  # written to 10 digits
    assert row["implied_hgl_ft"] == pytest.approx(1140.568129330, abs=1e-9)
    assert row["check"] == "consistent"


def test_sigma_by_hand():
    # gauge 1.6 psi (a Grade A 0-160 psi gauge mid-scale, ASME B40.100, secondary); DEM RMSE 0.82 m
    # (3DEP 1/3 arc-second, USGS FAQ, confirmed) = 0.82 / 0.3048 = 2.690289 ft -> 0.433 * 2.690289 = 1.164895 psi;
    # HGL uncertainty 1 ft -> 0.433 psi.  sigma = sqrt(1.6^2 + 1.164895^2 + 0.433^2)
    #   = sqrt(2.56 + 1.356980 + 0.187489) = sqrt(4.104469) = 2.025949 psi
    row = one(dem_rmse_ft=[0.82 / M_PER_FT], hgl_uncertainty_ft=[1.0])
    assert row["sigma_psi"] == pytest.approx(2.025949010, abs=1e-9)
    # the outlier limit is max(5 psi, 2 sigma) = max(5, 4.0519) = 5 psi
    assert row["outlier_limit_psi"] == 5.0


def test_outlier_limit_takes_two_sigma_when_larger():
    # gauge 3 psi alone: 2 sigma = 6 psi > 5 psi. 6.5 psi off is an outlier, 5.5 psi off is not.
    assert one(gauge_psi=[3.0])["outlier_limit_psi"] == 6.0
    assert one(gauge_psi=[3.0], measured_psi=[58.888 + 6.5])["check"] == "outlier"
    assert one(gauge_psi=[3.0], measured_psi=[58.888 + 5.5])["check"] == "consistent"
    assert one(gauge_psi=[1.0], measured_psi=[58.888 + 5.5])["check"] == "outlier"


def test_interval_residual_is_zero_inside_and_distance_outside():
    # a tank zone without the level at the time: HGL 1120 to 1140 ft over a gauge at 1002 ft
    # predicts 0.433 * 118 = 51.094 to 0.433 * 138 = 59.754 psi
    kw = dict(hgl_low_ft=[1120.0], hgl_high_ft=[1140.0])
    assert one(measured_psi=[55.0], **kw)["residual_psi"] == 0.0
    assert one(measured_psi=[50.0], **kw)["residual_psi"] == pytest.approx(50.0 - 51.094, abs=1e-12)
    assert one(measured_psi=[61.0], **kw)["residual_psi"] == pytest.approx(61.0 - 59.754, abs=1e-12)


@pytest.mark.parametrize("kw, check", [
    (dict(measured_psi=[np.nan]), "no_pressure"),
    (dict(measured_psi=[-3.0]), "negative_pressure"),
    (dict(has_geometry=[False]), "no_geometry"),
    (dict(zoned=[False], hgl_low_ft=[np.nan], hgl_high_ft=[np.nan]), "unzoned"),
    (dict(ground_ft=[np.nan]), "no_terrain"),
])
def test_a_reading_that_cannot_be_compared_has_its_own_check_and_no_numbers(kw, check):
    row = one(**kw)
    assert row["check"] == check
    assert np.isnan(row["residual_psi"]) and np.isnan(row["sigma_psi"]) and np.isnan(row["implied_hgl_ft"])


def test_grade_accuracy():
    # ASME B40.100 Table 1 (secondary): Grade A is 1 % of span over the middle half, 2 % in the first and last
    # quarters; a 0-160 psi Grade A gauge reads to +-1.6 psi mid-scale
    assert fc.grade_accuracy_psi("A", 160.0, [80.0])[0] == pytest.approx(1.6)
    assert fc.grade_accuracy_psi("A", 160.0, [20.0, 150.0]) == pytest.approx([3.2, 3.2])
    # Grade 3A: 0.25 % of span (from memory)
    assert fc.grade_accuracy_psi("3A", 200.0, [10.0, 100.0]) == pytest.approx([0.5, 0.5])


@settings(max_examples=200, deadline=None)
@given(ground=st.floats(0, 5000), height=st.floats(0, 5), hgl=st.floats(0, 6000), measured=st.floats(0, 300),
       k=st.floats(0.40, 0.45))
def test_implied_hgl_minus_hgl_is_the_residual_in_feet(ground, height, hgl, measured, k):
    row = one(measured_psi=[measured], ground_ft=[ground], gauge_height_ft=[height], hgl_low_ft=[hgl],
              hgl_high_ft=[hgl], psi_per_ft=k)
    # tolerance: the two sides round differently in float64; 1e-9 relative to values of up to ~7000 ft
    assert row["implied_hgl_ft"] - hgl == pytest.approx(row["residual_ft"], abs=1e-8)


def _zone(residuals, sigma, *, x=None, y=None, src=None, rules=fc.Rules()):
    n = len(residuals)
    res = np.asarray(residuals, dtype=float)
    limit = np.maximum(rules.outlier_psi, rules.outlier_sigmas * np.asarray(sigma))
    checks = np.where(np.abs(res) > limit, "outlier", "consistent")
    rng = np.random.default_rng(0)
    return fc.zone_table(zone=["Z"] * n, checks=checks, residual_psi=res, sigma_psi=np.full(n, sigma),
                         x=rng.uniform(0, 1000, n) if x is None else x, y=rng.uniform(0, 1000, n) if y is None else y,
                         ids=np.array([f"R{i}" for i in range(n)], dtype=object),
                         sources=[src or PrvSource("Z", valve_elevation_ft=1000.0, setting_psi=50.0)],
                         psi_per_ft=K, rules=rules).iloc[0]


def test_bias_detector_finds_an_injected_three_foot_offset():
    # 500 readings, each with 0.5 psi of normal noise (a Grade 3A gauge of 0-200 psi, 0.5 psi, on a lidar DEM
    # whose error is small beside it), all 3 ft of head high: a datum offset of 3 ft
    rng = np.random.default_rng(20261204)
    offset_ft = 3.0
    res = K * offset_ft + rng.normal(0.0, 0.5, 500)
    row = _zone(res, 0.5)
    # the median of 500 normal readings of 0.5 psi (1.155 ft) has a standard error of
    # 1.2533 * 1.155 / sqrt(500) = 0.065 ft: 0.2 ft is three of them
    assert abs(row["hgl_correction_ft"] - offset_ft) < 0.2
    assert abs(row["bias_ft"] - offset_ft) < 0.2
    assert row["significant_bias"]
    assert row["pattern"] == "steady"
    assert "datum offset" in row["likely_causes"] and "PRV setting" in row["likely_causes"]
    # the what-if moves the PRV's HGL by the correction: setting 50 + 0.433 * correction psi
    assert row["what_if"] == f"--set zones.source.Z.setting_psi={50 + K * row['hgl_correction_ft']:.1f}"


def test_bias_detector_stays_quiet_on_noise():
    # 4,000 zones of unbiased readings (5 to 20 each) at the stated sigma of 2 psi (a 1.6 psi gauge on a 3DEP
    # 1/3 arc-second DEM, 1.16 psi). The rule's two-sided 1.96 standard errors of the median allow about 5 % of
    # false alarms where that term dominates, fewer where the 1 psi floor does.
    rng = np.random.default_rng(7)
    alarms = trials = 0
    for n in range(5, 21):
        for _ in range(250):
            alarms += bool(_zone(rng.normal(0.0, 2.0, n), 2.0)["significant_bias"])
            trials += 1
    rate = alarms / trials
    # 5 % of 4,000 trials has a binomial standard deviation of 0.34 %; 5 % + 3 of them is 6 %. The small-n median
    # has a little less spread than 1.2533 sigma / sqrt(n), so the rate measured is below 5 %.
    assert rate < 0.06, rate


def test_a_cluster_of_low_outliers_is_named_as_a_closed_valve():
    # 10 readings spread over a 1000 x 1000 square, two of them 20 psi low and 30 units apart
    rng = np.random.default_rng(3)
    x, y = rng.uniform(0, 1000, 10), rng.uniform(0, 1000, 10)
    x[[3, 4]], y[[3, 4]] = [500.0, 530.0], [500.0, 500.0]
    res = rng.normal(0.0, 0.5, 10)
    res[[3, 4]] = [-20.0, -18.0]
    row = _zone(res, 1.0, x=x, y=y)
    assert row["outliers"] == 2
    assert not row["significant_bias"]  # the median stays near 0
    assert row["pattern"] == "cluster"
    assert "closed valve" in row["likely_causes"] and "R3, R4" in row["likely_causes"]


def test_outliers_far_apart_are_not_a_cluster():
    x = np.array([0.0, 1000, 0, 1000, 500, 400, 600, 450, 550, 500])
    y = np.array([0.0, 1000, 1000, 0, 500, 400, 600, 550, 450, 600])
    res = np.zeros(10)
    res[[0, 1]] = [-20.0, -18.0]  # opposite corners
    row = _zone(res, 1.0, x=x, y=y)
    assert row["pattern"] == "scattered outliers"
    assert "check each reading" in row["likely_causes"]


def test_tank_and_pump_what_ifs():
    assert fc.what_if(TankSource("T", high_water_ft=1212.0, low_water_ft=1194.0), 3.0, K) == (
        "--set zones.source.T.high_water_ft=1215.0 --set zones.source.T.low_water_ft=1197.0")
    assert fc.what_if(PumpSource("P", discharge_hgl_ft=1405.0), -4.0, K) == "--set zones.source.P.discharge_hgl_ft=1401.0"


def test_few_readings_never_flag_a_bias():
    row = _zone([5.0, 5.1], 0.1)
    assert row["readings"] == 2 and not row["significant_bias"]


def test_shares_within_two_and_five_psi():
    row = _zone([0.0, 1.0, -2.0, 3.0, -4.5, 6.0, 0.5, -0.5], 0.5)
    assert row["within_2_psi"] == pytest.approx(5 / 8)
    assert row["within_5_psi"] == pytest.approx(7 / 8)
    assert row["bias_psi"] == pytest.approx(0.25)  # median of the 8
    assert row["mad_psi"] == pytest.approx(float(np.median(np.abs(np.array(
        [0.0, 1.0, -2.0, 3.0, -4.5, 6.0, 0.5, -0.5]) - 0.25))))


def test_a_zone_without_readings():
    out = fc.zone_table(zone=pd.array([None], dtype="str"), checks=["unzoned"], residual_psi=[np.nan],
                        sigma_psi=[np.nan], x=[0.0], y=[0.0], ids=np.array(["1"], dtype=object),
                        sources=[PumpSource("P", discharge_hgl_ft=1.0)], psi_per_ft=K)
    assert out.iloc[0]["readings"] == 0 and out.iloc[0]["likely_causes"] == "no readings"


# ---- end to end: the readings layer through geopress.run ------------------------------------------------

from conftest import BASE_CONFIG, ORIGIN, write_layer  # noqa: E402

from geopress import pipeline  # noqa: E402
from geopress.errors import InputError  # noqa: E402

X0, Y1 = ORIGIN
READINGS = """
[readings]
path = "readings.gpkg"
pressure_field = "static_psi"
id_field = "tag"
gauge_height_field = "height_ft"
hgl_field = "tank_ft"
gauge_accuracy_psi = 1.0
"""


def _readings(world, records: dict, geoms: list, config: str = READINGS, crs: str = "EPSG:32631"):
    path = world.root / "readings.gpkg"
    if path.exists():
        path.unlink()
    write_layer(path, "gauges", records, geoms, crs=crs)
    world.write_config(BASE_CONFIG + config)


def _ground_ft(world, x):
    return world.ground_m(x, Y1 - 500.0) / M_PER_FT


def test_predicted_pressure_at_gauge_height_on_a_plane_is_exact(world):
    import shapely

    # the world's DEM is the plane z = 300 m + 0.1 (x - 500000) (bilinear sampling is exact on it); West is a
    # PRV zone, HGL 1000 + 60 / 0.433 ft; East a tank, 1380 to 1400 ft, with the level recorded for E2
    xs = [X0 + 123.4, X0 + 377.7, X0 + 640.2, X0 + 910.9]
    _readings(world, {"tag": ["W1", "W2", "E1", "E2"], "static_psi": [50.0, 40.0, 60.0, 55.0],
                      "height_ft": [2.0, None, 1.5, 0.0], "tank_ft": [None, None, None, 1391.0]},
              [shapely.Point(x, Y1 - 500.0) for x in xs])
    res = pipeline.run(world.config_path, write=False)
    fc_ = res.field_check.set_index("reading")
    hgl_w = 1000.0 + 60.0 / K
    g = _ground_ft(world, np.array(xs))
    # psi = 0.433 * (HGL - ground - height); ground in ft = m / 0.3048 exactly. 1e-9 psi: float64 rounding only
    assert fc_.loc["W1", "predicted_psi_low"] == pytest.approx(K * (hgl_w - g[0] - 2.0), abs=1e-9)
    assert fc_.loc["W2", "gauge_height_ft"] == 0.0  # readings.gauge_height_ft's default
    assert fc_.loc["W2", "predicted_psi_high"] == pytest.approx(K * (hgl_w - g[1]), abs=1e-9)
    assert fc_.loc["E1", "predicted_psi_low"] == pytest.approx(K * (1380.0 - g[2] - 1.5), abs=1e-9)
    assert fc_.loc["E1", "predicted_psi_high"] == pytest.approx(K * (1400.0 - g[2] - 1.5), abs=1e-9)
    assert fc_.loc["E2", "predicted_psi_low"] == fc_.loc["E2", "predicted_psi_high"] == pytest.approx(
        K * (1391.0 - g[3]), abs=1e-9)
    assert fc_.loc["W1", "implied_hgl_ft"] == pytest.approx(g[0] + 2.0 + 50.0 / K, abs=1e-9)
    assert list(fc_["zone"]) == ["West", "West", "East", "East"]
    assert res.info["field_check"]["readings"] == 4


def test_readings_never_change_a_customer_result(world):
    import shapely

    before = pipeline.run(world.config_path, write=False)
    _readings(world, {"tag": ["A", "B"], "static_psi": [10.0, 200.0], "height_ft": [0.0, 0.0],
                      "tank_ft": [None, 2000.0]}, [shapely.Point(X0 + 100, Y1 - 500), shapely.Point(X0 + 900, Y1 - 500)])
    after = pipeline.run(world.config_path, write=False)
    pd.testing.assert_frame_equal(pd.DataFrame(before.customers), pd.DataFrame(after.customers))
    assert before.counts == after.counts
    for name in before.mailing:
        pd.testing.assert_frame_equal(before.mailing[name], after.mailing[name])
    assert set(after.field_check["check"]) == {"outlier"}


def test_bad_readings_get_their_own_check(world):
    import shapely

    pts = [shapely.Point(X0 + 100, Y1 - 500), shapely.Point(X0 + 200, Y1 - 500),
           shapely.Point(X0 - 5000, Y1 - 500), shapely.Point(X0 + 300, Y1 + 300), None]
    _readings(world, {"tag": ["neg", "empty", "far", "offdem", "nowhere"], "static_psi": ["-4", "", "50", "50", "50"],
                      "height_ft": [None] * 5, "tank_ft": [None] * 5}, pts)
    # zone West reaches only the DEM's edge: put a zone beyond the DEM so "offdem" is zoned but has no ground
    zones = world.root / "zones.gpkg"
    zones.unlink()
    write_layer(zones, "zones", {"zone": ["West", "East"]},
                [shapely.box(X0, Y1 - 1000, X0 + 500, Y1 + 1000), shapely.box(X0 + 500, Y1 - 1000, X0 + 1000, Y1)])
    res = pipeline.run(world.config_path, write=False)
    assert list(res.field_check["check"]) == ["negative_pressure", "no_pressure", "unzoned", "no_terrain",
                                              "no_geometry"]


@pytest.mark.parametrize("records, needle", [
    ({"tag": ["a"], "psi": [50.0]}, "no field 'static_psi' (from readings.pressure_field)"),
    ({"tag": ["a", "b"], "static_psi": ["50", "fifty"]}, "field 'static_psi' (readings.pressure_field) must hold "
                                                         "pressures in psi; readings b have fifty"),
])
def test_a_bad_readings_layer_is_one_line_naming_the_field(world, records, needle):
    import shapely

    n = len(records["tag"])
    _readings(world, records, [shapely.Point(X0 + 100, Y1 - 500)] * n,
              config=READINGS.replace('gauge_height_field = "height_ft"\nhgl_field = "tank_ft"\n', ""))
    with pytest.raises(InputError) as err:
        pipeline.run(world.config_path, write=False)
    assert needle in str(err.value) and "\n" not in str(err.value)


def test_written_layers_and_run_json(world):
    import json

    import geopandas as gpd
    import shapely

    _readings(world, {"tag": ["W1", "E1"], "static_psi": [50.0, 60.0], "height_ft": [2.0, 2.0],
                      "tank_ft": [None, None]}, [shapely.Point(X0 + 100, Y1 - 500), shapely.Point(X0 + 900, Y1 - 500)])
    pipeline.run(world.config_path)
    layer = gpd.read_file(world.out, layer="field_check", engine="pyogrio")
    assert list(layer["reading"]) == ["W1", "E1"] and layer.crs.to_epsg() == 32631
    assert {"residual_psi", "residual_ft", "implied_hgl_ft", "sigma_psi", "check"} <= set(layer.columns)
    table = gpd.read_file(world.out, layer="field_check_by_zone", engine="pyogrio")
    assert list(table["zone"]) == ["West", "East"] and list(table["readings"]) == [1, 1]
    info = json.loads((world.out.parent / "run.json").read_text())
    assert info["field_check"]["checks"]["consistent"] + info["field_check"]["checks"]["outlier"] == 2


def test_check_reads_the_readings_as_a_run_would(world):
    import shapely

    _readings(world, {"tag": ["W1", "far"], "static_psi": [50.0, 50.0], "height_ft": [2.0, 2.0],
                      "tank_ft": [None, None]}, [shapely.Point(X0 + 100, Y1 - 500), shapely.Point(X0 - 5000, Y1 - 500)])
    report = pipeline.check(world.config_path)
    line = next(x for x in report.lines if x.startswith("readings:"))
    assert line.endswith("(1 unzoned, 1 consistent)") or line.endswith("(1 unzoned, 1 outlier)")
    _readings(world, {"tag": ["W1"], "psi": [50.0]}, [shapely.Point(X0 + 100, Y1 - 500)],
              config=READINGS.replace('gauge_height_field = "height_ft"\nhgl_field = "tank_ft"\n', ""))
    with pytest.raises(InputError, match="readings.pressure_field"):
        pipeline.check(world.config_path)


def test_a_zone_of_many_readings_stays_fast_and_finds_its_cluster():
    # 20,000 readings (a logger network): the distances use an evenly spaced selection of 400, not 20,000^2 pairs
    import time

    rng = np.random.default_rng(11)
    n = 20_000
    x, y = rng.uniform(0, 1000, n), rng.uniform(0, 1000, n)
    res = rng.normal(0.0, 0.5, n)
    x[:3], y[:3], res[:3] = [100.0, 110.0, 120.0], [100.0, 100.0, 100.0], [-20.0, -19.0, -21.0]
    t0 = time.perf_counter()
    row = _zone(res, 1.0, x=x, y=y)
    # a few MB and well under a second on one core; 10 s leaves room for a loaded test machine
    assert time.perf_counter() - t0 < 10.0
    assert row["pattern"] == "cluster" and row["outliers"] == 3
