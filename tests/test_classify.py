"""Statuses and reasons (geopress.classify)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from geopress.classify import CODE, FLAGGED_LAYERS, STATUSES, Criteria, classify, names_at, reasons, status_names
from geopress.pressure import customer_pressures

CRIT = Criteria()


def run_classify(*, geom=True, ground=1000.0, zoned=True, pmin=50.0, pmax=60.0, ptop=np.nan, criteria=CRIT):
    """Classify customers given column-wise values (scalars broadcast)."""
    cols = np.broadcast_arrays(np.atleast_1d(geom), np.asarray(ground, float), np.asarray(zoned),
                               np.asarray(pmin, float), np.asarray(pmax, float), np.asarray(ptop, float))
    return status_names(classify(has_geometry=cols[0], ground_ft=cols[1], zoned=cols[2], psi_min=cols[3],
                                 psi_max=cols[4], psi_top=cols[5], criteria=criteria)).tolist()


def test_each_status_from_hand_built_arrays():
    nan = np.nan
    rows = [
        # geom, ground, zoned, psi_min, psi_max, psi_top -> expected
        (False, nan, False, nan, nan, nan, "no_geometry"),
        (True, nan, True, nan, nan, nan, "no_terrain"),
        (True, 900.0, False, nan, nan, nan, "unzoned"),
        (True, 900.0, True, -3.0, 5.0, nan, "above_hgl"),
        (True, 900.0, True, 20.0, 30.0, nan, "low"),
        (True, 900.0, True, 70.0, 90.0, nan, "high"),
        (True, 900.0, True, 50.0, 60.0, 30.0, "low_upper_floors"),
        (True, 900.0, True, 50.0, 60.0, 40.0, "ok"),
        (True, 900.0, True, 50.0, 60.0, nan, "ok"),
    ]
    geom, ground, zoned, pmin, pmax, ptop, expected = map(list, zip(*rows))
    assert run_classify(geom=geom, ground=ground, zoned=zoned, pmin=pmin, pmax=pmax, ptop=ptop) == expected


def test_thresholds_at_their_boundaries():
    # psi_min == 0 is above the HGL; == min is not low; == max is not high; psi_top == min is fine.
    assert run_classify(pmin=[0.0, 35.0, 50.0, 50.0], pmax=[10.0, 40.0, 80.0, 60.0], ptop=[np.nan, np.nan, np.nan, 35.0]) == [
        "above_hgl", "ok", "ok", "ok"]
    assert run_classify(pmin=[34.999, 50.0], pmax=[60.0, 80.001], ptop=[np.nan, 34.999]) == ["low", "high"]


def test_order_decides_between_conditions_that_all_hold():
    # low and high at once (a wide tank range) -> low, which comes first
    assert run_classify(pmin=20.0, pmax=90.0) == ["low"]
    # high and low upper floors at once -> high
    assert run_classify(pmin=60.0, pmax=90.0, ptop=20.0) == ["high"]
    # no geometry wins over everything, no terrain over unzoned
    assert run_classify(geom=False, ground=np.nan, zoned=False, pmin=-5.0) == ["no_geometry"]
    assert run_classify(ground=np.nan, zoned=False) == ["no_terrain"]


def test_flagged_layers_name_flagged_statuses_and_the_storage_findings():
    assert set(FLAGGED_LAYERS) == {"high", "low", "above_hgl", "low_upper_floors",
                                   "peak_hour_short", "fire_short", "standby_short"}
    assert set(FLAGGED_LAYERS.values()) == {"high_pressure", "low_pressure", "above_hgl", "upper_floors",
                                            "peak_hour_short", "fire_storage_short", "standby_storage_short"}
    # the storage findings are findings only, never a status
    assert set(FLAGGED_LAYERS) - set(STATUSES) == {"peak_hour_short", "fire_short", "standby_short"}


def reference_status(geom, ground, zoned, pmin, pmax, ptop, crit) -> str:
    """The status rule written out as an if-chain, one customer at a time."""
    if not geom:
        return "no_geometry"
    if np.isnan(ground):
        return "no_terrain"
    if not zoned:
        return "unzoned"
    if pmin <= 0:
        return "above_hgl"
    if pmin < crit.min_static_psi:
        return "low"
    if pmax > crit.max_static_psi:
        return "high"
    if not np.isnan(ptop) and ptop < crit.min_static_psi:
        return "low_upper_floors"
    return "ok"


maybe_nan = st.one_of(st.just(float("nan")), st.floats(-100.0, 200.0))
customer = st.tuples(st.booleans(), maybe_nan, st.booleans(), maybe_nan, maybe_nan, maybe_nan)


@settings(max_examples=100, deadline=None)
@given(st.lists(customer, min_size=1, max_size=30), st.floats(0.0, 60.0), st.floats(0.0, 100.0))
def test_exactly_one_status_per_customer_and_the_first_that_applies(rows, lo, span):
    crit = Criteria(min_static_psi=lo, max_static_psi=lo + span)
    geom, ground, zoned, pmin, pmax, ptop = map(list, zip(*rows))
    got = run_classify(geom=geom, ground=ground, zoned=zoned, pmin=pmin, pmax=pmax, ptop=ptop, criteria=crit)
    assert len(got) == len(rows)
    assert set(got) <= set(STATUSES)
    assert got == [reference_status(*r, crit) for r in rows]


ground_ft = st.floats(500.0, 1500.0)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(ground_ft, st.floats(0.0, 300.0), st.sampled_from([1.0, 2.0, 5.0, np.nan])), min_size=1,
                max_size=20),
       st.floats(900.0, 1400.0), st.floats(0.0, 40.0))
def test_lowering_the_ground_never_moves_ok_or_high_to_low(rows, hgl_low, range_ft):
    ground, drop, floors = (np.array(c) for c in zip(*rows))
    hgl_high = hgl_low + range_ft

    def statuses(g):
        p = customer_pressures(g, hgl_high, hgl_low, floors)
        return run_classify(ground=g, pmin=p.psi_min, pmax=p.psi_max, ptop=p.psi_top)

    before, after = statuses(ground), statuses(ground - drop)
    for b, a in zip(before, after):
        if b == "ok":
            assert a in ("ok", "high")
        if b == "high":
            assert a == "high"


def test_reasons_carry_the_numbers():
    pmin = np.array([np.nan, -4.33, 30.0, 70.0, 50.0, 50.0])
    pmax = np.array([np.nan, 0.0, 40.0, 86.4, 60.0, 60.0])
    ptop = np.array([np.nan, np.nan, np.nan, np.nan, 21.34, np.nan])
    ground = np.array([np.nan, 1010.0, 950.0, 900.0, 930.0, 930.0])
    floors = np.array([1.0, 1.0, 1.0, 1.0, 7.0, 1.0])
    codes = classify(has_geometry=np.ones(6, bool), ground_ft=ground, zoned=np.ones(6, bool), psi_min=pmin,
                     psi_max=pmax, psi_top=ptop, criteria=CRIT)
    assert status_names(codes).tolist() == ["no_terrain", "above_hgl", "low", "high", "low_upper_floors", "ok"]
    text = reasons(codes, ground_ft=ground, hgl_low_ft=np.full(6, 1000.0), psi_min=pmin, psi_max=pmax, psi_top=ptop,
                   floors=floors, criteria=CRIT).tolist()
    assert "no ground elevation" in text[0]
    assert "1010.0 ft" in text[1] and "1000.0 ft" in text[1]
    assert "30.0 psi" in text[2] and "35 psi" in text[2]
    assert "86.4 psi" in text[3] and "80 psi" in text[3]
    assert "7 stories" in text[4] and "21.3 psi" in text[4] and "35 psi" in text[4]
    assert "50.0 to 60.0 psi" in text[5]


def test_reasons_never_print_negative_zero():
    codes = np.array([CODE["above_hgl"]])
    text = reasons(codes, ground_ft=[-0.01], hgl_low_ft=[-0.01], psi_min=[0.0], psi_max=[0.0], psi_top=[np.nan],
                   floors=[1.0], criteria=CRIT)
    assert "-0.0" not in text[0]


def reference_reason(code, ground, hgl_low, pmin, pmax, ptop, floors, crit) -> str:
    """The reason sentence formatted one customer at a time (numbers as numpy prints a rounded float64)."""
    def num(v):
        return str(np.round(np.float64(v), 1) + 0.0)  # + 0.0: no negative zero

    lo, hi = f"{crit.min_static_psi:g}", f"{crit.max_static_psi:g}"
    status = STATUSES[code]
    if status == "no_geometry":
        return "no usable geometry: location unknown"
    if status == "no_terrain":
        return "no ground elevation here (outside every DEM or on nodata)"
    if status == "unzoned":
        return "outside every pressure zone"
    if status == "above_hgl":
        return (f"ground at {num(ground)} ft is at or above the low HGL of {num(hgl_low)} ft: "
                "no service by gravity, booster service needed")
    if status == "low":
        return f"static pressure down to {num(pmin)} psi is below {lo} psi: low service pressure"
    if status == "high":
        return f"static pressure up to {num(pmax)} psi exceeds {hi} psi: individual PRV expected"
    if status == "low_upper_floors":
        return (f"top floor of {int(np.round(floors))} stories down to {num(ptop)} psi is below {lo} psi: "
                "upper floors need a booster")
    return f"static pressure {num(pmin)} to {num(pmax)} psi, within {lo} to {hi} psi"


# repeated values (so rows share table entries), halves of 0.1 and near-zero negatives (rounding, negative
# zero), NaN and infinities, and any float small enough that rounding to 0.1 cannot overflow
number = st.one_of(
    st.integers(-40, 40).map(lambda k: k / 20),
    st.sampled_from([float("nan"), float("inf"), float("-inf"), -0.0, -0.04, 2.675, 1e-7, 1e15, 123456.75]),
    st.floats(-1e12, 1e12),
)
reason_row = st.tuples(st.integers(0, len(STATUSES) - 1), number, number, number, number, number,
                       st.one_of(st.sampled_from([1.0, 2.0, 2.5, 3.5, float("nan")]), st.floats(1.0, 500.0)))


@settings(max_examples=200, deadline=None)
@given(st.lists(reason_row, max_size=60), st.floats(0.0, 60.0), st.floats(0.0, 100.0))
def test_reasons_equal_the_sentences_formatted_one_customer_at_a_time(rows, lo, span):
    crit = Criteria(min_static_psi=lo, max_static_psi=lo + span)
    # floors may be NaN (no floors field), but a customer with low upper floors has a number of stories
    rows = [r[:6] + (1.0 if r[0] == CODE["low_upper_floors"] and np.isnan(r[6]) else r[6],) for r in rows]
    codes, ground, hgl_low, pmin, pmax, ptop, floors = (np.array(c) for c in zip(*rows)) if rows else [[]] * 7
    got = reasons(np.asarray(codes, dtype=np.int8), ground_ft=ground, hgl_low_ft=hgl_low, psi_min=pmin,
                  psi_max=pmax, psi_top=ptop, floors=floors, criteria=crit)
    assert got.dtype == "category" and got.categories.dtype == "str"  # a code per customer, each sentence once
    assert got.tolist() == [reference_reason(*r, crit) for r in rows]


def test_default_thresholds_are_the_code_values():
    crit = Criteria()
    # 80 psi maximum static: Uniform Plumbing Code 608.2 (confirmed); International Plumbing Code 604.8 and
    # International Residential Code P2903.3.1 (secondary).
    assert crit.max_static_psi == 80.0
    # 35 psi minimum normal working pressure: Recommended Standards for Water Works 8.2.1 (from memory);
    # Texas 30 TAC 290.45, 35 psi normal operating pressure (confirmed).
    assert crit.min_static_psi == 35.0
    # 0.433 psi per ft of water (common practice, no single source) and 10 ft per residential story
    # (building-height conventions, secondary).
    assert crit.psi_per_ft == 0.433
    assert crit.floor_height_ft == 10.0


@pytest.mark.parametrize("status", STATUSES)
def test_status_names_round_trip(status):
    assert status_names([CODE[status]]).tolist() == [status]


@settings(max_examples=60, deadline=None)
@given(st.lists(st.text(min_size=1, max_size=8), min_size=1, max_size=5).flatmap(  # a zone's id on several polygons
    lambda names: st.tuples(st.just(names), st.lists(st.tuples(st.integers(0, len(names) - 1), st.booleans()),
                                                     max_size=30))))
def test_names_at_is_the_names_by_index_missing_where_not_valid(case):
    names, rows = case
    index = np.array([i for i, _ in rows], dtype=np.intp)
    valid = np.array([v for _, v in rows], dtype=bool)
    got = pd.Series(names_at(np.array(names, dtype=object), index, valid))
    assert got.dtype == "category" and got.cat.categories.dtype == "str"
    assert got.cat.codes.dtype == np.int8  # a byte a row for a handful of names
    assert [None if pd.isna(g) else g for g in got] == [names[i] if v else None for i, v in rows]
