"""Units, HGL sources and static pressure (geopress.pressure)."""

from __future__ import annotations

import math

import numpy as np
import pint
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from geopress.pressure import (
    DEFAULT_PSI_PER_FT,
    KPA_PER_M_WATER,
    M_PER_FT,
    M_PER_US_FT,
    PA_PER_PSI,
    STANDARD_GRAVITY,
    PrvSource,
    PumpSource,
    TankSource,
    customer_pressures,
    feet_per_unit,
    head_ft_for_psi,
    psi_to_kpa,
    static_psi,
    to_feet,
)

# Elevations and HGLs a utility can have, ft: Dead Sea shore to Everest (from memory), rounded out.
ELEV = st.floats(min_value=-2000.0, max_value=30000.0, allow_nan=False)
PSI_PER_FT = st.floats(min_value=0.3, max_value=0.5)
# Round-off of psi_per_ft * (h - e) with |h|, |e| <= 3e4 ft and psi_per_ft <= 0.5 is a few times
# 2**-52 * 0.5 * 6e4 = 7e-12 psi; 1e-9 psi leaves a wide margin and still catches any real slope error.
ROUND_OFF_PSI = 1e-9

# pint's foot_H2O is a column of water at the conventional 1000 kg/m3 (pint's definitions file:
# 1 ftH2O = 0.3048 m x 1000 kg/m3 x 9.80665 m/s2 = 2989.067 Pa). Water at 15 C is 999.103 kg/m3
# (standard density tables, confirmed in REFERENCES.md).
DENSITY_15C_OVER_CONVENTIONAL = 999.103 / 1000.0


# ---------------------------------------------------------------- unit constants


def test_foot_constants_are_the_exact_definitions():
    # US Federal Register notice 2020-21902 (confirmed): international foot 0.3048 m, survey foot 1200/3937 m.
    assert M_PER_FT == 0.3048
    assert M_PER_US_FT == 1200 / 3937
    assert STANDARD_GRAVITY == 9.80665  # 3rd CGPM (1901), exact (confirmed)


def test_feet_per_unit():
    assert feet_per_unit("ft") == 1.0
    assert feet_per_unit("m") == 1 / 0.3048
    # The survey foot is 2 ppm longer than the international foot: 1200/3937/0.3048 = 1.000002000004
    # (US Federal Register notice 2020-21902, confirmed). 1e-12 is far below that 2e-6 difference.
    assert feet_per_unit("us_ft") == pytest.approx(1.000002000004, abs=1e-12)
    assert feet_per_unit("us_ft") != 1.0


def test_to_feet_keeps_nan_and_rejects_unknown_units():
    out = to_feet([1.0, np.nan], "m")
    assert out[0] == 1 / 0.3048
    assert np.isnan(out[1])
    with pytest.raises(ValueError, match="us_ft"):
        to_feet([1.0], "yd")


# ---------------------------------------------------------------- static pressure invariants


@settings(max_examples=100, deadline=None)
@given(hgl=ELEV, e1=ELEV, e2=ELEV, k=PSI_PER_FT)
def test_static_psi_is_linear_in_elevation_with_slope_minus_psi_per_ft(hgl, e1, e2, k):
    p1 = static_psi(hgl, e1, k)
    p2 = static_psi(hgl, e2, k)
    assert p2 - p1 == pytest.approx(-k * (e2 - e1), abs=ROUND_OFF_PSI)


@settings(max_examples=100, deadline=None)
@given(hgl=ELEV, k=PSI_PER_FT)
def test_static_psi_is_zero_at_the_hgl(hgl, k):
    assert static_psi(hgl, hgl, k) == 0.0


@settings(max_examples=50, deadline=None)
@given(hgl=ELEV, k=PSI_PER_FT)
def test_nan_elevation_gives_nan_pressure(hgl, k):
    out = static_psi(hgl, np.array([np.nan, hgl - 10.0]), k)
    assert np.isnan(out[0])
    assert not np.isnan(out[1])
    assert np.isnan(static_psi(np.nan, 100.0, k))


def test_point_above_the_hgl_has_negative_pressure():
    assert static_psi(100.0, 110.0) < 0


# ---------------------------------------------------------------- HGL sources


def test_tank_hgl_range_is_high_and_low_water():
    assert TankSource("A", high_water_ft=1400.0, low_water_ft=1380.0).hgl_range(0.433) == (1400.0, 1380.0)


def test_prv_hgl_is_valve_elevation_plus_setting_head():
    src = PrvSource("B", valve_elevation_ft=1000.0, setting_psi=60.0)
    high, low = src.hgl_range(0.433)
    assert high == low == 1000.0 + 60.0 / 0.433
    # the head depends on the psi_per_ft in use
    assert src.hgl_range(0.5)[0] == 1120.0


def test_pump_hgl_is_the_discharge_hgl():
    assert PumpSource("C", discharge_hgl_ft=1250.0).hgl_range(0.433) == (1250.0, 1250.0)


# ---------------------------------------------------------------- customer pressures


def test_customer_pressures_range_and_top_floor():
    ground = np.array([1000.0, 1000.0, 1000.0, 1000.0])
    floors = np.array([1.0, 3.0, np.nan, 0.0])
    p = customer_pressures(ground, 1200.0, 1180.0, floors, psi_per_ft=0.5, floor_height_ft=10.0)
    np.testing.assert_array_equal(p.psi_max, [100.0] * 4)  # 0.5 * (1200 - 1000)
    np.testing.assert_array_equal(p.psi_min, [90.0] * 4)  # 0.5 * (1180 - 1000)
    # psi_top only where floors > 1: the 3-story top floor is 20 ft up, 0.5 * (1180 - 1020) = 80
    assert p.psi_top[1] == 80.0
    assert np.isnan(p.psi_top[[0, 2, 3]]).all()


def test_customer_pressures_nan_ground_gives_nan_everywhere():
    p = customer_pressures([np.nan], [1200.0], [1180.0], [4.0])
    assert np.isnan(p.psi_max[0]) and np.isnan(p.psi_min[0]) and np.isnan(p.psi_top[0])


# ---------------------------------------------------------------- outside checks


def test_default_psi_per_ft_against_pint_foot_h2o():
    # pint (reference library, REFERENCES.md): foot_H2O converts to 0.43353 psi.
    ureg = pint.UnitRegistry()
    pint_psi_per_ft = ureg.Quantity(1.0, "foot_H2O").to("psi").magnitude
    assert pint_psi_per_ft == pytest.approx(0.43353, abs=5e-6)  # published to 5 decimals
    # 0.433 is 62.4 lb/ft3 / 144 (common practice), i.e. water lighter than pint's 1000 kg/m3:
    # 0.433 sits 0.12 % below pint, so it is *not* within 0.1 % of foot_H2O. For water at 15 C
    # (density above, confirmed) and at 60 F (pint's own foot_H2O_60F, 0.43309 psi), pint's value rounds
    # to 0.433: the tolerance is half a unit in 0.433's last published digit.
    assert pint_psi_per_ft * DENSITY_15C_OVER_CONVENTIONAL == pytest.approx(DEFAULT_PSI_PER_FT, abs=0.0005)
    assert ureg.Quantity(1.0, "foot_H2O_60F").to("psi").magnitude == pytest.approx(DEFAULT_PSI_PER_FT, abs=0.0005)
    # the 0.12 % gap stated above, to the 0.001 % its last quoted digit carries
    assert abs(DEFAULT_PSI_PER_FT - pint_psi_per_ft) / pint_psi_per_ft == pytest.approx(0.00122, abs=0.00001)
    # 62.4 / 144 = 0.4333 (fluid-mechanics texts, common practice): 0.433 is its 3-figure rounding.
    assert 62.4 / 144 == pytest.approx(DEFAULT_PSI_PER_FT, abs=0.0005)


def test_pa_per_psi_against_nist_sp811():
    # NIST SP 811 Appendix B.9 (secondary): 1 psi = 6894.757 Pa, 1 ftH2O (39.2 F) = 2988.98 Pa.
    # Tolerances: half a unit in the last published digit.
    assert PA_PER_PSI == pytest.approx(6894.757, abs=0.0005)
    assert psi_to_kpa(1.0) == pytest.approx(6.894757, abs=0.0000005)
    nist_psi_per_ft = 2988.98 / 6894.757
    pint_psi_per_ft = pint.UnitRegistry().Quantity(1.0, "foot_H2O").to("psi").magnitude
    # NIST's ftH2O is water at 39.2 F, 999.972 kg/m3 (density tables, confirmed); pint's is 1000 kg/m3.
    # Scaled by that density ratio they agree to the rounding of 2988.98 (0.005 Pa in 2989, 2e-6 relative).
    assert nist_psi_per_ft == pytest.approx(pint_psi_per_ft * 999.972 / 1000.0, rel=2e-6)


def test_kpa_per_metre_of_water_is_g_times_density():
    # 1000 kg/m3 * 9.80665 m/s2 = 9.80665 kPa per m (3rd CGPM standard gravity, confirmed); exact product.
    assert KPA_PER_M_WATER == 9.80665


# Handbook worked examples, all listed in REFERENCES.md.
# psi_per_ft = 62.4 / 144 where the text uses 62.4 lb/ft3; 1 / 2.31 where it uses 2.31 ft per psi.
PSI_PER_FT_62_4 = 62.4 / 144
PSI_PER_FT_2_31 = 1 / 2.31
# Published values are rounded to 0.1: our value must be within half of that.
HALF_TENTH = 0.05


@pytest.mark.parametrize(
    "head_ft, published_psig",
    [
        (105.0, 45.5),  # fluid-mechanics e-text, static pressure examples (confirmed)
        (130.0, 56.3),  # same text (confirmed)
    ],
)
def test_handbook_static_pressure_with_62_4_lb_per_ft3(head_ft, published_psig):
    assert static_psi(head_ft, 0.0, PSI_PER_FT_62_4) == pytest.approx(published_psig, abs=HALF_TENTH)


def test_operator_math_100_ft_is_43_3_psi():
    # operator math examples (confirmed): 100 ft of head = 43.3 psi at 0.433 psi/ft; exact but for float round-off.
    assert static_psi(100.0, 0.0) == pytest.approx(43.3, abs=1e-12)


def test_operator_math_46_2_ft_is_20_psi():
    # operator math examples (confirmed): 46.2 ft = 20 psi. 46.2 is 20 x 2.31 rounded to 0.1 ft.
    assert head_ft_for_psi(20.0) == pytest.approx(46.2, abs=HALF_TENTH)
    # "20 psi" is a whole number: 46.2 ft at 0.433 psi/ft must round to it.
    assert static_psi(46.2, 0.0) == pytest.approx(20.0, abs=0.5)


def test_operator_training_tank_level_for_30_psi_at_a_fixture():
    # water-operator training static-pressure exercise (confirmed): fixture 16 ft above a 75 ft pad is at
    # 91 ft; 30 psi x 2.31 = 69.3 ft; tank level needed 160.3 ft.
    fixture_ft = 75.0 + 16.0
    assert head_ft_for_psi(30.0, PSI_PER_FT_2_31) == pytest.approx(69.3, abs=1e-12)  # exact but round-off
    tank_ft = fixture_ft + head_ft_for_psi(30.0, PSI_PER_FT_2_31)
    assert tank_ft == pytest.approx(160.3, abs=1e-12)
    assert static_psi(tank_ft, fixture_ft, PSI_PER_FT_2_31) == pytest.approx(30.0, abs=1e-12)
    # With the 0.433 default the head is 30 / 0.433 = 69.28 ft: 2.31 and 1/0.433 = 2.3095 differ by
    # 0.0005 ft/psi, i.e. 0.015 ft at 30 psi, plus half of the published 0.1 ft.
    tol = 30.0 * abs(2.31 - 1 / DEFAULT_PSI_PER_FT) + HALF_TENTH
    assert fixture_ft + head_ft_for_psi(30.0) == pytest.approx(160.3, abs=tol)


@pytest.mark.parametrize(
    "elevation_ft, psi, published_hgl_ft",
    [
        (95.0, 30.0, 164.3),  # HGL_min = highest elevation + 2.31 x P_min (course notes, confirmed)
        (5.0, 90.0, 212.9),  # HGL_max = lowest elevation + 2.31 x P_max (course notes, confirmed)
    ],
)
def test_course_notes_hgl_bounds(elevation_ft, psi, published_hgl_ft):
    # The notes' HGL is a PRV setting at the given elevation: PrvSource computes the same thing.
    hgl, _ = PrvSource("Z", valve_elevation_ft=elevation_ft, setting_psi=psi).hgl_range(PSI_PER_FT_2_31)
    assert hgl == pytest.approx(published_hgl_ft, abs=1e-9)  # 2.31 x P is exact to 0.1 ft: only round-off
    # At 0.433 psi/ft: P x |2.31 - 1/0.433| from the differing constants plus half the published 0.1 ft.
    hgl_default, _ = PrvSource("Z", valve_elevation_ft=elevation_ft, setting_psi=psi).hgl_range(DEFAULT_PSI_PER_FT)
    assert hgl_default == pytest.approx(published_hgl_ft, abs=psi * abs(2.31 - 1 / DEFAULT_PSI_PER_FT) + HALF_TENTH)
    assert not math.isclose(hgl_default, published_hgl_ft, abs_tol=1e-6)  # the two constants really differ
