"""Settings an operator can set: whole steps, the robust range and what the source can do.

The steps and the robust range are checked against a brute-force sweep of every step through the real
classifier (geopress.pressure and geopress.classify, via test_besthgl.flagged_count); the bounds against
hand computations; impossible settings against the config loader.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from geopress.classify import Criteria
from geopress.besthgl import Dial, best_range, flagged_count, ok_intervals, robust_tolerance, settable
from geopress.config import config_from_dict
from geopress.errors import ConfigError
from geopress.planning import best_hgl_table

from test_besthgl import EXACT, flagged_count as classified_count


#: a 20 ft window of head (30 to 40 psi at 0.5 psi/ft), so that optima narrower than a step, several optimal
#: ranges and ties between them are common in a few customers
NARROW = Criteria(max_static_psi=40.0, min_static_psi=30.0, psi_per_ft=0.5, floor_height_ft=10.0)


def longest(mask: np.ndarray) -> tuple[int, int] | None:
    """The longest run of True, the first of equally long ones, by a plain loop."""
    best, start = None, None
    for i, m in enumerate([*mask, False]):
        if m and start is None:
            start = i
        elif not m and start is not None:
            if best is None or (i - 1 - start) > (best[1] - best[0]):
                best = (start, i - 1)
            start = None
    return best


@settings(max_examples=150, deadline=None)
@given(
    ground=st.lists(st.integers(min_value=0, max_value=300), min_size=1, max_size=20),
    floors=st.lists(st.sampled_from([1, 1, 2, 4]), min_size=20, max_size=20),
    range_q=st.integers(min_value=0, max_value=80),
    step_q=st.sampled_from([1, 2, 4, 10]),
    origin_q=st.integers(min_value=0, max_value=40),
    tolerance=st.integers(min_value=0, max_value=4),
    lower_q=st.one_of(st.none(), st.integers(min_value=0, max_value=600)),
    width_q=st.one_of(st.none(), st.integers(min_value=0, max_value=600)),
)
def test_steps_and_robust_range_match_a_brute_force_sweep(ground, floors, range_q, step_q, origin_q, tolerance,
                                                           lower_q, width_q):
    # psi_per_ft 0.5 and quarter-foot ground, range, steps, origin and bounds: every level and breakpoint is
    # exact in binary floating point, so no rounding decides whether a step is inside a range
    g = 1000.0 + np.asarray(ground, dtype=np.float64) * 0.25
    fl = np.asarray(floors[: len(g)], dtype=np.float64)
    r, step, origin = range_q * 0.25, step_q * 0.25, 1000.0 + origin_q * 0.25
    lower = -np.inf if lower_q is None else 1000.0 + lower_q * 0.25
    upper = np.inf if width_q is None else max(lower, 1000.0) + width_q * 0.25
    dial = Dial(origin, step, 0.0, 1.0)  # the control reads the step number n
    best = best_range(g, fl, r, NARROW, lower_ft=lower, upper_ft=upper)
    res = settable(flagged_count(g, fl, r, NARROW), best, dial, tolerance=tolerance, lower_ft=lower, upper_ft=upper)

    # brute force: the bounded minimum over every breakpoint, midpoint and bound inside the bounds
    lo, hi, _ = ok_intervals(g, fl, r, NARROW)
    xs = np.unique(np.concatenate([lo, hi, [b for b in (lower, upper) if np.isfinite(b)]]))
    cand = np.concatenate([xs, (xs[:-1] + xs[1:]) / 2])
    cand = cand[(cand >= lower) & (cand <= upper)]
    counts_c = np.array([classified_count(h, g, fl, r, NARROW) for h in cand])
    if not (counts_c < len(g)).any():
        assert np.isnan(best.from_ft) and np.isnan(res.step_from) and res.flagged_at_step is None
        return
    assert best.flagged == counts_c.min()

    # every step within the bounds over a span wider than every breakpoint, through the classifier
    n_all = np.arange(int(np.floor((xs[0] - origin) / step)) - 2, int(np.ceil((xs[-1] - origin) / step)) + 3)
    n_all = n_all[(origin + n_all * step >= lower) & (origin + n_all * step <= upper)]
    counts = np.array([classified_count(origin + n * step, g, fl, r, NARROW) for n in n_all])
    serving = np.flatnonzero(counts < len(g))
    if serving.size == 0:  # no step can be set that serves anyone
        assert np.isnan(res.step_from) and np.isnan(res.robust_from)
        return
    n_all, counts = n_all[serving[0]:serving[-1] + 1], counts[serving[0]:serving[-1] + 1]
    run = longest(counts == best.flagged)
    if run is not None:
        assert res.inside_optimum
        assert (res.step_from, res.step_to) == (n_all[run[0]], n_all[run[1]])
        assert res.flagged_at_step == best.flagged
        # whole steps inside the exact optimum: every one in a minimal range, the next ones outside it
        assert all(counts[run[0]:run[1] + 1] == best.flagged)
    else:
        assert not res.inside_optimum and res.step_from == res.step_to
        assert res.flagged_at_step == counts.min() > best.flagged
        fewest = n_all[counts == counts.min()]
        middle = (best.from_ft + best.to_ft) / 2.0
        nearest = fewest[np.argmin(np.abs(origin + fewest * step - middle))]
        assert res.step_from == nearest
    robust = longest(counts <= best.flagged + tolerance)
    if robust is None:  # no step is within the tolerance: the optimum is narrower than a step, and so is the rest
        assert not res.inside_optimum and np.isnan(res.robust_from) and res.flagged_robust is None
    else:
        assert (res.robust_from, res.robust_to) == (n_all[robust[0]], n_all[robust[1]])
        assert res.flagged_robust == counts[robust[0]:robust[1] + 1].max() <= best.flagged + tolerance


def test_an_optimum_narrower_than_one_step_gives_the_single_best_step():
    # window 30..80 psi at 0.5 psi/ft: a one-story customer at ground g is ok for H in [g + 60, g + 160]
    # A at 1000.3 ft: [1060.3, 1160.3]; B at 1100.1 ft: [1160.1, 1260.1]; both ok only on [1160.1, 1160.3]
    g, fl = [1000.3, 1100.1], [1, 1]
    best = best_range(g, fl, 0.0, EXACT)
    assert (best.from_ft, best.to_ft, best.flagged) == pytest.approx((1160.1, 1160.3, 0))
    res = settable(flagged_count(g, fl, 0.0, EXACT), best, Dial(0.0, 1.0, 0.0, 1.0), tolerance=0)
    # whole feet: 1160 leaves B low (1160 < 1160.1), 1161 leaves A high (1161 > 1160.3): one each; the tie goes
    # to the step nearest the optimum's middle, 1160.2 ft
    assert (res.step_from, res.step_to, res.flagged_at_step, res.inside_optimum) == (1160.0, 1160.0, 1, False)
    # within a tolerance of 1 every step from 1060.3 up to 1260.1 serves one of them: 1061 to 1260
    res = settable(flagged_count(g, fl, 0.0, EXACT), best, Dial(0.0, 1.0, 0.0, 1.0), tolerance=1)
    assert (res.robust_from, res.robust_to, res.flagged_robust) == (1061.0, 1260.0, 1)


@pytest.mark.parametrize("customers, percent, minimum, expected", [
    (2131, 1.0, 5, 21),   # 1 % of 2,131 is 21.31: 21 customers
    (300, 1.0, 5, 5),     # 1 % of 300 is 3: the 5 customers are larger
    (500, 1.0, 5, 5),     # exactly 5 either way
    (0, 1.0, 0, 0),
])
def test_robust_tolerance_is_the_larger_of_percent_and_count(customers, percent, minimum, expected):
    assert robust_tolerance(customers, percent, minimum) == expected


# ---------------------------------------------------------------- what the source can do


def _cfg(sources, operator=None):
    data = {
        "customers": {"path": "c.gpkg", "id_field": "id", "floors_field": "floors"},
        "terrain": {"paths": ["d.tif"], "vertical_units": "m"},
        "zones": {"path": "z.gpkg", "id_field": "zone", "source": sources},
        "criteria": {"psi_per_ft": 0.5, "min_static_psi": 30.0, "max_static_psi": 80.0},
        "output": {"path": "o.gpkg", "mailing_dir": "m"},
    }
    if operator:
        data["operator"] = operator
    return config_from_dict(data)


def test_bounds_of_tank_prv_and_pump_by_hand():
    cfg = _cfg([
        # operating range 20 ft; the tank holds water between 1150 and 1170 ft
        {"zone": "T", "kind": "tank", "high_water_ft": 1165.0, "low_water_ft": 1145.0, "bottom_ft": 1120.5,
         "overflow_ft": 1170.0},
        {"zone": "U", "kind": "tank", "high_water_ft": 1300.0, "low_water_ft": 1290.0},
        # inlet from zone U: the PRV's HGL can be held up to U's low water, 1290 ft: setting 0.5 * (1290 - 900) = 195
        # psi; set it at 30 psi (HGL 960 ft)
        {"zone": "P", "kind": "prv", "valve_elevation_ft": 900.0, "setting_psi": 30.0, "inlet_zone": "U"},
        {"zone": "Q", "kind": "prv", "valve_elevation_ft": 900.0, "setting_psi": 30.0, "inlet_hgl_ft": 1000.0},
        {"zone": "B", "kind": "pump", "discharge_hgl_ft": 1300.0, "no_demand_hgl_ft": 1310.0,
         "shutoff_hgl_ft": 1320.0},
    ], operator={"tank_step_ft": 1.0, "prv_step_psi": 2.0, "pump_step_ft": 2.0})
    customers = pd.DataFrame({
        # T, R = 20 ft: a customer is ok for H in [g + 20 + 60, g + 160]: [1100, 1180] at 1020 ft, [1080, 1160]
        # at 1000 ft, both on [1100, 1160]; the bottom at 1120.5 ft bounds H below at 1140.5: partly outside
        "zone": ["T", "T", "P", "P", "Q", "B"],
        "ground_ft": [1020.0, 1000.0, 900.0, 920.0, 900.0, 1200.0],
        "floors": [1.0] * 6,
        "status": ["ok"] * 6,
    })
    t = best_hgl_table(customers, cfg).set_index("zone")
    assert (t.loc["T", "best_high_water_ft_from"], t.loc["T", "best_high_water_ft_to"]) == (1100.0, 1160.0)
    assert (t.loc["T", "control_min"], t.loc["T", "control_max"]) == (1120.5 + 20.0, 1170.0)
    assert t.loc["T", "optimum_vs_bounds"] == "partly outside"
    # steps of 1 ft counted from the bottom at 1120.5: 1140.5, 1141.5, ..., 1159.5 lie within [1140.5, 1160]
    assert (t.loc["T", "step_from"], t.loc["T", "step_to"], t.loc["T", "flagged_at_step"]) == (1140.5, 1159.5, 0)
    # P: both ok for HGL in [980, 1060]: setting 0.5 * (HGL - 900) = 40 to 80 psi, within 0 to 195 psi
    assert (t.loc["P", "control_min"], t.loc["P", "control_max"]) == (0.0, 195.0)
    assert t.loc["P", "optimum_vs_bounds"] == "inside"
    assert (t.loc["P", "step_from"], t.loc["P", "step_to"]) == (40.0, 80.0)
    # Q: the customer at 900 ft is ok for HGL in [960, 1060], setting 30 to 80 psi; the inlet holds 1000 ft,
    # 50 psi: steps of 2 psi from 30 to 50
    assert t.loc["Q", "control_max"] == 50.0 and t.loc["Q", "optimum_vs_bounds"] == "partly outside"
    assert (t.loc["Q", "best_setting_psi_from"], t.loc["Q", "best_setting_psi_to"]) == (30.0, 80.0)
    assert (t.loc["Q", "step_from"], t.loc["Q", "step_to"]) == (30.0, 50.0)
    # B: band 10 ft; ok for high H in [1270, 1360], discharge = H - 10 in [1260, 1350]; the shutoff 1320 ft
    # bounds the high HGL, so the discharge at most 1310 ft
    assert (t.loc["B", "best_discharge_hgl_ft_from"], t.loc["B", "best_discharge_hgl_ft_to"]) == (1260.0, 1350.0)
    assert t.loc["B", "control_max"] == 1310.0 and t.loc["B", "optimum_vs_bounds"] == "partly outside"
    assert (t.loc["B", "step_from"], t.loc["B", "step_to"]) == (1260.0, 1310.0)


def test_an_optimum_outside_the_bounds_is_said_and_the_steps_are_the_best_within():
    # the customer at 1000 ft is ok for H in [1060, 1160]; the tank overflows at 1050 ft: no step serves it
    cfg = _cfg([{"zone": "T", "kind": "tank", "high_water_ft": 1040.0, "low_water_ft": 1040.0,
                 "overflow_ft": 1050.0}])
    customers = pd.DataFrame({"zone": ["T", "T"], "ground_ft": [1000.0, 900.0], "floors": [1.0, 1.0],
                              "status": ["low", "high"]})
    # the customer at 900 ft is ok for H in [960, 1060]: within the bounds only it can be served, 960 to 1050 ft
    t = best_hgl_table(customers, cfg).set_index("zone")
    assert (t.loc["T", "best_high_water_ft_from"], t.loc["T", "best_high_water_ft_to"]) == (1060.0, 1060.0)
    assert t.loc["T", "optimum_vs_bounds"] == "outside" and t.loc["T", "flagged_at_best"] == 0
    assert (t.loc["T", "step_from"], t.loc["T", "step_to"], t.loc["T", "flagged_at_step"]) == (960.0, 1050.0, 1)


# ---------------------------------------------------------------- impossible settings are refused


BASE = [
    {"zone": "U", "kind": "tank", "high_water_ft": 1300.0, "low_water_ft": 1290.0},
    {"zone": "P", "kind": "prv", "valve_elevation_ft": 900.0, "setting_psi": 30.0},
    {"zone": "B", "kind": "pump", "discharge_hgl_ft": 1300.0},
]


@pytest.mark.parametrize("index, extra, key, words", [
    # 170 psi at 0.5 psi/ft puts the HGL at 900 + 340 = 1240 ft, above the inlet's 1200 ft
    (1, {"setting_psi": 170.0, "inlet_hgl_ft": 1200.0}, "zones.source[1].setting_psi", "above inlet_hgl_ft 1,200.0 ft"),
    # 250 psi: 900 + 500 = 1400 ft, above U's high water 1300 ft
    (1, {"setting_psi": 250.0, "inlet_zone": "U"}, "zones.source[1].setting_psi", "highest HGL of its inlet zone 'U'"),
    (1, {"inlet_zone": "Nowhere"}, "zones.source[1].inlet_zone", "has no [[zones.source]]"),
    (1, {"inlet_zone": "P"}, "zones.source[1].inlet_zone", "own zone"),
    (1, {"inlet_zone": "U", "inlet_hgl_ft": 1200.0}, "zones.source[1].inlet_zone", "keep one"),
    (0, {"overflow_ft": 1295.0}, "zones.source[0].overflow_ft", "above its overflow"),
    (0, {"bottom_ft": 1291.0}, "zones.source[0].bottom_ft", "below its bottom"),
    (2, {"no_demand_hgl_ft": 1290.0}, "zones.source[2].no_demand_hgl_ft", "at no demand"),
    (2, {"shutoff_hgl_ft": 1290.0}, "zones.source[2].discharge_hgl_ft", "above its shutoff"),
])
def test_impossible_settings_are_refused_in_one_line(index, extra, key, words):
    sources = [dict(s) for s in BASE]
    sources[index].update(extra)
    with pytest.raises(ConfigError) as info:
        _cfg(sources)
    assert info.value.key == key
    assert words in str(info.value) and "\n" not in str(info.value)


def test_a_setting_the_inlet_can_supply_loads():
    sources = [dict(s) for s in BASE]
    sources[1].update({"setting_psi": 200.0, "inlet_zone": "U"})  # 900 + 400 = 1300 ft: U's high water, allowed
    assert _cfg(sources).zones.sources[1].inlet_zone == "U"


@pytest.mark.parametrize("key, value", [("tank_step_ft", 0.0), ("prv_step_psi", -1.0), ("robust_percent", 101.0),
                                        ("robust_customers", 2.5), ("steps", 1.0)])
def test_bad_operator_keys_are_refused(key, value):
    with pytest.raises(ConfigError) as info:
        _cfg(BASE, operator={key: value})
    assert info.value.key == f"operator.{key}"
