"""geopress.confidence: margins, sigmas and confidence classes, and the firm-only mailing option end to end."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from geopress import confidence as cf
from geopress import pipeline
from geopress.classify import CODE, Criteria
from geopress.config import load_config
from geopress.pressure import M_PER_FT

K = 0.433  # psi per ft, the default (common practice)
CRIT = Criteria()  # 35 to 80 psi


def _codes(*names):
    return np.array([CODE[n] for n in names])


def test_margins_by_status():
    codes = _codes("high", "low", "above_hgl", "low_upper_floors", "ok", "ok", "unzoned")
    m = cf.margins(codes, psi_min=[70, 30, -2, 50, 40, 60, np.nan], psi_max=[83, 30, 5, 60, 50, 78.5, np.nan],
                   psi_top=[np.nan, np.nan, np.nan, 31, np.nan, 37, np.nan], criteria=CRIT)
    # high 83 - 80 = 3; low 35 - 30 = 5; above_hgl 0 - (-2) = 2; upper floors 35 - 31 = 4;
    # ok at 40 to 50: 5 psi above the minimum, -5; ok at 60 to 78.5, top 37: the top floor 2 psi above 35, -1.5 is
    # the maximum's distance (80 - 78.5): -1.5
    assert m[:6].tolist() == [3.0, 5.0, 2.0, 4.0, -5.0, -1.5]
    assert np.isnan(m[6])


def test_sigma_from_dem_rmse_and_hgl_uncertainty():
    # 3DEP 1 m lidar DEM, RMSE 0.53 m (USGS FAQ, confirmed) = 1.738845 ft -> 0.433 * 1.738845 = 0.752920 psi;
    # HGL uncertainty 2 ft -> 0.866 psi; sqrt(0.752920^2 + 0.866^2) = sqrt(0.566889 + 0.749956) = 1.147539 psi
    assert cf.sigmas([0.53 / M_PER_FT], [2.0], K)[0] == pytest.approx(1.147539, abs=1e-6)
    assert np.isnan(cf.sigmas([np.nan], [2.0], K)[0])  # no DEM accuracy stated: no sigma, not 0.866


def test_classes_follow_the_1_96_sigma_rule():
    # ASPRS Positional Accuracy Standards, Edition 1 (2014): 95 % = 1.96 RMSE (secondary). With sigma 1 psi a flag
    # 1.96 psi or less beyond its threshold is borderline, beyond that firm; an ok customer within 1.96 psi of one
    # is near_limit, farther clear.
    codes = _codes("high", "high", "low", "ok", "ok", "ok", "high", "no_terrain")
    margin = np.array([1.97, 1.96, 0.3, -1.96, -1.97, -0.1, 5.0, np.nan])
    sigma = np.array([1.0] * 6 + [np.nan, np.nan])
    assert list(cf.classes(codes, margin, sigma).to_numpy(na_value=None)) == [
        "firm", "borderline", "borderline", "near_limit", "clear", "near_limit", "unrated", None]


def test_a_findings_rating_is_the_flagged_class_in_a_byte_a_customer():
    # the same 1.96 sigma rule as above, for customers taken as flagged whatever their status; a mailing list
    # keeps one rating per finding for every customer, so each is a categorical of one-byte codes
    margin = np.array([1.97, 1.96, -3.0, 5.0, np.nan])
    sigma = np.array([1.0, 1.0, 1.0, np.nan, 1.0])
    got = cf.rate(margin, sigma)
    assert list(pd.Series(got).to_numpy(dtype=object, na_value=None)) == [
        "firm", "borderline", "borderline", "unrated", None]
    assert got.codes.dtype == np.int8

@settings(max_examples=200, deadline=None)
@given(a=st.floats(-30, 30), b=st.floats(-30, 30), s=st.floats(0.01, 10))
def test_a_larger_margin_is_never_less_sure(a, b, s):
    lo, hi = sorted([a, b])
    rank = {"borderline": 0, "firm": 1}
    got = cf.classes(_codes("high", "high"), [lo, hi], [s, s]).tolist()
    assert rank[got[0]] <= rank[got[1]]


def test_chance_on_the_other_side():
    # Phi(-1.96) = 0.0249979 (standard normal table); on the threshold 0.5
    assert cf.chance_other_side([1.96, -1.96, 0.0], [1.0, 1.0, 2.0]).tolist() == pytest.approx(
        [0.0249979, 0.0249979, 0.5], abs=1e-7)


def test_verification_list_puts_the_closest_calls_first():
    customers = pd.DataFrame({
        "account": ["A", "B", "C", "D"], "owner": ["o1", "o2", "o3", "o4"], "zone": ["Z"] * 4,
        "status": ["high", "low", "high", "ok"], "ground_ft": [1.0] * 4, "psi_min": [70.0, 33.0, 70.0, 50.0],
        "psi_max": [81.0, 33.0, 80.2, 60.0], "psi_top": [np.nan] * 4, "sigma_psi": [1.16] * 4, "reason": ["r"] * 4})
    margins = cf.finding_margins(psi_min=customers["psi_min"], psi_max=customers["psi_max"],
                                 psi_top=customers["psi_top"], criteria=CRIT)
    # high: 81 - 80 = 1, 80.2 - 80 = 0.2; low: 35 - 33 = 2; all within 1.96 * 1.16 = 2.27 psi: borderline
    rated = {name: (m, cf.rate(m, customers["sigma_psi"])) for name, m in margins.items()}
    out = cf.verification_list(customers, rated, id_field="account", fields=["owner"])
    assert out["account"].tolist() == ["C", "A", "B"]
    assert out["list"].tolist() == ["high_pressure", "high_pressure", "low_pressure"]
    assert out["margin_psi"].tolist() == pytest.approx([0.2, 1.0, 2.0])
    assert out["chance_other_side"].tolist() == pytest.approx(
        [round(0.5 * math.erfc(m / 1.16 / math.sqrt(2)), 3) for m in (0.2, 1.0, 2.0)])


# ---- end to end on the conftest world: a plane DEM, a PRV zone West and a tank zone East ------------------


def _rated(world, rmse_ft: float = 10.0) -> None:
    # 10 ft of DEM RMSE is 4.33 psi: flags within 8.5 psi of a threshold are borderline
    text = world.config_path.read_text().replace('method = "bilinear"', f'method = "bilinear"\nvertical_rmse_ft = {rmse_ft}')
    world.config_path.write_text(text)


def test_customers_carry_margin_sigma_and_confidence(world):
    _rated(world)
    res = pipeline.run(world.config_path, write=False)
    c = res.customers
    assert c["sigma_psi"].dropna().tolist() == pytest.approx([K * 10.0] * len(c))
    flagged = c["status"].isin(["high", "low", "above_hgl", "low_upper_floors"])
    assert set(c.loc[flagged, "confidence"]) == {"firm", "borderline"}
    assert (c.loc[flagged, "margin_psi"] >= 0).all() and (c.loc[c["status"] == "ok", "margin_psi"] <= 0).all()
    by_zone = res.zone_summary.set_index("zone")
    assert (by_zone["n_firm"] + by_zone["n_borderline"]).sum() == int(flagged.sum())
    assert res.mailing["high_pressure"].columns[-3:].tolist() == ["margin_psi", "confidence", "target_area"]
    # the field-verification list holds every borderline flag (each customer here has one finding, its status)
    assert len(res.mailing["field_verification"]) == int((c["confidence"] == "borderline").sum())


def test_without_a_dem_accuracy_every_flag_is_unrated(world):
    res = pipeline.run(world.config_path, write=False)
    flagged = res.customers["status"].isin(["high", "low", "above_hgl", "low_upper_floors"])
    assert set(res.customers.loc[flagged, "confidence"]) == {"unrated"}
    assert res.info["terrain_accuracy"]["stated"] is False


def test_firm_only_changes_the_mailing_lists_and_nothing_else(world):
    _rated(world)
    both = pipeline.run(world.config_path, write=False)
    firm = pipeline.run(load_config(world.config_path, overrides={"output.mail_firm_only": True}), write=False)
    pd.testing.assert_frame_equal(pd.DataFrame(both.customers), pd.DataFrame(firm.customers))
    pd.testing.assert_frame_equal(both.zone_summary, firm.zone_summary)
    assert both.counts == firm.counts
    pd.testing.assert_frame_equal(both.mailing["field_verification"], firm.mailing["field_verification"])
    changed = 0
    for name in ("high_pressure", "low_pressure", "above_hgl", "upper_floors"):
        all_, only = both.mailing[name], firm.mailing[name]
        assert set(only["confidence"]) <= {"firm"}
        assert set(only["accounts"]) <= set(all_["accounts"])
        changed += len(all_) - len(only)
    assert changed == int((both.customers["confidence"] == "borderline").sum())  # one account per address here
    same = {k: v for k, v in both.info.items() if k not in ("config", "overrides", "confidence", "started")}
    assert same == {k: v for k, v in firm.info.items() if k not in ("config", "overrides", "confidence", "started")}
    assert both.info["confidence"]["counts"] == firm.info["confidence"]["counts"]


@settings(max_examples=300, deadline=None)
@given(pmin=st.floats(-20, 120), spread=st.floats(0, 20), top=st.one_of(st.just(np.nan), st.floats(-20, 120)))
def test_a_finding_that_holds_has_a_margin_on_its_side(pmin, spread, top):
    # the registry's condition and its threshold agree: a customer with a finding is at or beyond its threshold
    from geopress.classify import screen

    kw = dict(psi_min=[pmin], psi_max=[pmin + spread], psi_top=[top])
    _, found = screen(has_geometry=[True], ground_ft=[1000.0], zoned=[True], criteria=CRIT, **kw)
    margins = cf.finding_margins(criteria=CRIT, **kw)
    for name, held in found.items():
        if held[0]:
            assert margins[name][0] >= 0, name


def test_firm_only_is_decided_per_finding():
    from geopress.tables import mailing_lists

    # one customer, 85 psi at the street (5 psi over 80: firm at sigma 1) and 34 psi on its top floor (1 psi under
    # 35: borderline): mailed for the high pressure, not for the upper floors
    customers = pd.DataFrame({"account": ["A"], "owner": ["o"], "zone": ["Z"], "status": ["high"],
                              "psi_min": [84.0], "psi_max": [85.0], "psi_top": [34.0], "sigma_psi": [1.0],
                              "finding_above_hgl": [False], "finding_low": [False], "finding_high": [True],
                              "finding_low_upper_floors": [True]})
    margins = cf.finding_margins(psi_min=customers["psi_min"], psi_max=customers["psi_max"],
                                 psi_top=customers["psi_top"], criteria=CRIT)
    rated = {name: (m, cf.rate(m, customers["sigma_psi"])) for name, m in margins.items()}
    lists = mailing_lists(customers, id_field="account", mail_fields=["owner"], rated=rated, firm_only=True)
    assert lists["high_pressure"]["accounts"].tolist() == ["A"]
    assert lists["high_pressure"]["margin_psi"].tolist() == [5.0]
    assert lists["upper_floors"].empty
    every = mailing_lists(customers, id_field="account", mail_fields=["owner"], rated=rated)
    assert every["upper_floors"]["confidence"].tolist() == ["borderline"]


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(["East", "West", "Hill", None]), st.sampled_from([*cf.CLASSES, None])),
                max_size=40), st.booleans())
def test_zone_counts_are_pandas_crosstab(rows, categorical):
    # pandas' crosstab of the texts (missing ones left out) is the reference; the run gives categoricals
    zone = pd.array([z for z, _ in rows], dtype="str")
    conf = pd.array([c for _, c in rows], dtype="str")
    if categorical:
        zone, conf = pd.Categorical(zone), pd.Categorical(conf)
    got = cf.zone_counts(zone, conf, ["West", "East", "Nowhere"])
    table = pd.crosstab(pd.Series(zone, dtype=object), pd.Series(conf, dtype=object))
    for _, row in got.iterrows():
        for c in cf.CLASSES:
            want = int(table.loc[row["zone"], c]) if row["zone"] in table.index and c in table.columns else 0
            assert row[f"n_{c}"] == want
