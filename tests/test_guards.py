"""The guards on sampled ground (geopress.guards): pure, with hypothesis."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from geopress import guards
from geopress.pressure import M_PER_FT, M_PER_US_FT

grounds = st.lists(st.floats(-1000, 10000, allow_nan=False), min_size=1, max_size=60)


@settings(max_examples=100, deadline=None)
@given(grounds, st.integers(1, 4), st.data())
def test_zone_grounds_are_the_percentiles_of_each_zones_customers(values, nzones, data):
    ground = np.array(values)
    zi = np.array(data.draw(st.lists(st.integers(-1, nzones - 1), min_size=ground.size, max_size=ground.size)))
    names = [f"z{i}" for i in range(nzones)]
    table = guards.zone_grounds(ground, zi, names, {n: (2000.0, 1900.0) for n in names})
    assert [t.zone for t in table] == names
    for i, t in enumerate(table):
        mine = ground[zi == i]
        assert t.customers == mine.size
        if mine.size:
            assert t.ground_ft == pytest.approx(tuple(np.percentile(mine, [0, 5, 50, 95, 100])))
            assert t.ground_ft[0] <= t.ground_ft[1] <= t.ground_ft[2] <= t.ground_ft[3] <= t.ground_ft[4]
        else:
            assert np.isnan(t.ground_ft).all() and t.suspicion() is None


def test_nan_ground_is_left_out_but_counted():
    table = guards.zone_grounds(np.array([100.0, np.nan, 300.0]), np.array([0, 0, 0]), ["a"], {"a": (500.0, 450.0)})
    assert table[0].customers == 3 and table[0].ground_ft[2] == 200.0


@settings(max_examples=200, deadline=None)
@given(st.floats(0, 3000), st.floats(0, 100), st.floats(-2000, 5000))
def test_suspicion_marks_exactly_the_two_bad_cases(high, drop, median):
    low = high - drop
    zg = guards.ZoneGround("z", 1, (median,) * 5, high, low)
    why = zg.suspicion()
    if median >= low:
        assert why == "at or above the low HGL"
    elif high - median > guards.MAX_DEPTH_FT:
        assert why == "far below the high HGL"
    else:
        assert why is None


def test_psi_range_is_the_highest_customer_at_low_water_to_the_lowest_at_high_water():
    # ground 310 to 420 ft under 1,220 to 1,245 ft: 0.433 * (1220 - 420) = 346.4, 0.433 * (1245 - 310) = 404.9
    zg = guards.ZoneGround("z", 5, (310.0, 320.0, 365.0, 410.0, 420.0), 1245.0, 1220.0)
    assert zg.psi_range(0.433) == pytest.approx((346.4, 404.855))


def test_earth_limits_and_their_sources():
    # Dead Sea shore about 430 m below sea level; Everest 8,848.86 m (both from memory)
    assert guards.EARTH_LOW_FT < -430 / M_PER_FT and guards.EARTH_HIGH_FT > 8848.86 / M_PER_FT
    assert not guards.outside_earth(-282.0, 14_505.0)  # Death Valley and Mount Whitney, ft (from memory)
    assert guards.outside_earth(-3281.0, 100.0) and guards.outside_earth(0.0, 32_808.0)


@given(st.integers(0, 10_000), st.integers(0, 10_000))
def test_too_little_is_below_half(covered, located):
    covered = min(covered, located)
    assert guards.too_little(covered, located) == (located > 0 and 2 * covered < located)


def test_other_units_use_the_exact_foot_definitions():
    # 1,000 "m" read as ft or as US survey ft: the stored value is 1,000 either way
    others = guards.in_other_units(1000 / M_PER_FT, "m")
    assert others["ft"] == pytest.approx(1000.0, rel=1e-15)
    assert others["us_ft"] == pytest.approx(1000 * M_PER_US_FT / M_PER_FT, rel=1e-15)
    # a datum offset is taken off before the unit changes and added back after
    assert guards.in_other_units(1003.0, "ft", offset_ft=3.0)["m"] == pytest.approx(1000 / M_PER_FT + 3.0)
