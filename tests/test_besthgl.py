"""The exact best-HGL sweep against a brute-force sweep through the real classifier."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from geopress import classify as cls
from geopress.besthgl import best_range, best_ranges, flagged_count as count_of, ok_intervals
from geopress.classify import Criteria
from geopress.findings import FLAGGED_STATUSES
from geopress.config import config_from_dict
from geopress.planning import best_hgl_table
from geopress.pressure import customer_pressures

FLAGGED = [cls.CODE[s] for s in FLAGGED_STATUSES]
# psi_per_ft 0.5 and quarter-foot data keep every breakpoint exact in binary floating point, so the
# brute force can be evaluated exactly at each breakpoint without rounding deciding a tie
EXACT = Criteria(max_static_psi=80.0, min_static_psi=30.0, psi_per_ft=0.5, floor_height_ft=10.0)


def flagged_count(hgl_high: float, ground, floors, range_ft: float, crit: Criteria) -> int:
    """Flagged customers at one high HGL, from geopress.pressure and geopress.classify."""
    g = np.asarray(ground, dtype=np.float64)
    p = customer_pressures(g, hgl_high, hgl_high - range_ft, floors, psi_per_ft=crit.psi_per_ft,
                           floor_height_ft=crit.floor_height_ft)
    codes = cls.classify(has_geometry=np.ones(g.size, bool), ground_ft=g, zoned=np.ones(g.size, bool),
                         psi_min=p.psi_min, psi_max=p.psi_max, psi_top=p.psi_top, criteria=crit)
    return int(np.isin(codes, FLAGGED).sum())


def brute_force(ground, floors, range_ft: float, crit: Criteria):
    """Every breakpoint, the midpoints between them and points outside: coverage is constant between
    breakpoints, so this set sees every distinct count. Returns (min count, runs of minimal levels)."""
    lo, hi, _ = ok_intervals(ground, floors, range_ft, crit)
    xs = np.unique(np.concatenate([lo, hi]))
    cand = np.concatenate([xs, (xs[:-1] + xs[1:]) / 2, [xs[0] - 1.0, xs[-1] + 1.0]])
    cand.sort()
    counts = np.array([flagged_count(h, ground, floors, range_ft, crit) for h in cand])
    best = counts.min()
    runs, start = [], None
    for i, h in enumerate(cand):
        if counts[i] == best and start is None:
            start = i
        if counts[i] != best and start is not None:
            runs.append((start, i - 1))
            start = None
    if start is not None:
        runs.append((start, len(cand) - 1))
    return int(best), [(cand[a], cand[b]) for a, b in runs]


@settings(max_examples=60, deadline=None)
@given(
    ground=st.lists(st.integers(min_value=0, max_value=400), min_size=1, max_size=25),
    floors=st.lists(st.sampled_from([1, 1, 2, 3, 6]), min_size=25, max_size=25),
    range_q=st.integers(min_value=0, max_value=160),
)
def test_exact_sweep_matches_brute_force(ground, floors, range_q):
    g = 1000.0 + np.asarray(ground, dtype=np.float64) * 0.25
    fl = np.asarray(floors[: len(g)], dtype=np.float64)
    r = range_q * 0.25
    res = best_range(g, fl, r, EXACT)
    best, runs = brute_force(g, fl, r, EXACT)
    assert res.flagged == best
    assert res.customers == len(g)
    # every level of the reported range gives the minimum, through the real classifier
    for h in np.linspace(res.from_ft, res.to_ft, 7):
        assert flagged_count(h, g, fl, r, EXACT) == best
    # the reported range is a maximal run: a brute-force run has the same ends...
    ends = [(a, b) for a, b in runs if a <= res.from_ft and res.to_ft <= b]
    assert len(ends) == 1
    # (a run that starts on a midpoint starts just after the breakpoint below it; here min > 0,
    # so every run is closed and starts on a breakpoint)
    assert ends[0] == (res.from_ft, res.to_ft)
    assert res.from_inclusive and res.contains(res.from_ft)
    # ... and the tie rule: the widest run, the lowest among equally wide ones
    widest = max(b - a for a, b in runs)
    assert res.to_ft - res.from_ft == widest
    assert res.from_ft == min(a for a, b in runs if b - a == widest)


@settings(max_examples=60, deadline=None)
@given(
    ground=st.lists(st.integers(min_value=0, max_value=400), min_size=1, max_size=25),
    floors=st.lists(st.sampled_from([1, 1, 2, 3, 6]), min_size=25, max_size=25),
    range_q=st.integers(min_value=0, max_value=160),
    ends=st.lists(st.tuples(st.integers(min_value=0, max_value=800), st.integers(min_value=0, max_value=800)),
                  min_size=1, max_size=4),
)
def test_one_sweep_for_several_bounds_gives_each_bounds_own_range(ground, floors, range_q, ends):
    """best_ranges puts every pair's bounds into one sweep: the others' bounds must change no pair's range."""
    g = 1000.0 + np.asarray(ground, dtype=np.float64) * 0.25
    fl = np.asarray(floors[: len(g)], dtype=np.float64)
    r = range_q * 0.25
    # quarter-foot bounds within and around the levels that serve anyone (1060 to 1260 ft), and unbounded
    pairs = [(-np.inf, np.inf), *((1000.0 + min(a, b) * 0.25, 1000.0 + max(a, b) * 0.25) for a, b in ends)]
    fc = count_of(g, fl, r, EXACT)
    together = best_ranges(fc, pairs)
    for pair, got in zip(pairs, together):
        alone = best_ranges(fc, [pair])[0]
        assert (got.flagged, got.customers, got.from_inclusive) == (alone.flagged, alone.customers, alone.from_inclusive)
        assert np.array_equal([got.from_ft, got.to_ft], [alone.from_ft, alone.to_ft], equal_nan=True)


def test_dense_sweep_with_default_psi_per_ft():
    """With 0.433 psi/ft the breakpoints are not exact in binary; sweep a dense grid plus each breakpoint +/- 1e-6 ft."""
    rng = np.random.default_rng(7)
    crit = Criteria()
    g = rng.uniform(1000.0, 1120.0, 60)
    fl = rng.choice([1.0, 1.0, 2.0, 4.0, np.nan], 60)
    res = best_range(g, fl, 20.0, crit)
    lo, hi, _ = ok_intervals(g, fl, 20.0, crit)
    # 1e-6 ft is far above float64 rounding of ~1e3 ft (2e-13) and far below the data's spacing
    eps = 1e-6
    xs = np.concatenate([lo, hi])
    cand = np.concatenate([xs - eps, xs + eps, np.linspace(xs.min() - 5, xs.max() + 5, 4001)])
    counts = np.array([flagged_count(h, g, fl, 20.0, crit) for h in cand])
    assert res.flagged == counts.min()
    inside = (cand > res.from_ft + eps) & (cand < res.to_ft - eps)
    assert inside.any() and (counts[inside] == res.flagged).all()


def test_tie_rule_prefers_the_widest_then_the_lowest():
    crit = EXACT  # window 30..80 psi = 60..160 ft of head at 0.5 psi/ft
    # one-story customers at 1000 and 1240 ft: ok for H in [1060, 1160] and [1300, 1400]; equally wide -> lowest
    res = best_range([1000.0, 1240.0], [1, 1], 0.0, crit)
    assert (res.from_ft, res.to_ft, res.flagged) == (1060.0, 1160.0, 1)
    # three stories (top 20 ft up) narrow the first to [1080, 1160]: the wider, higher range wins
    res = best_range([1000.0, 1240.0], [3, 1], 0.0, crit)
    assert (res.from_ft, res.to_ft, res.flagged) == (1300.0, 1400.0, 1)
    # a third customer at 1040 ft (ok in [1100, 1200]) overlaps the first: a lower count beats any width
    res = best_range([1000.0, 1240.0, 1040.0], [1, 1, 1], 0.0, crit)
    assert (res.from_ft, res.to_ft, res.flagged) == (1100.0, 1160.0, 1)


def test_zero_minimum_leaves_the_lower_end_exclusive():
    crit = Criteria(max_static_psi=80.0, min_static_psi=0.0, psi_per_ft=0.5)
    res = best_range([1000.0], [1], 0.0, crit)
    # at H = 1000 ft the ground is at the HGL: above_hgl (psi_min <= 0); just above it, ok up to 1160
    assert (res.from_ft, res.to_ft, res.from_inclusive) == (1000.0, 1160.0, False)
    assert not res.contains(1000.0) and res.contains(1000.5) and res.contains(1160.0)
    assert flagged_count(1000.0, [1000.0], [1], 0.0, crit) == 1
    assert flagged_count(1000.5, [1000.0], [1], 0.0, crit) == 0


def test_nobody_servable_and_nobody_at_all():
    crit = EXACT
    # a 200 ft operating range with a 100 ft pressure window: no level serves anyone
    res = best_range([1000.0, 1010.0], [1, 1], 200.0, crit)
    assert np.isnan(res.from_ft) and res.flagged == 2
    res = best_range([np.nan], [1], 0.0, crit)  # no terrain: not counted
    assert res.customers == 0 and res.flagged == 0


def test_table_reports_each_kind_in_its_own_unit():
    cfg = config_from_dict({
        "customers": {"path": "c.gpkg", "id_field": "id", "floors_field": "floors"},
        "terrain": {"paths": ["d.tif"], "vertical_units": "m"},
        "zones": {"path": "z.gpkg", "id_field": "zone", "source": [
            {"zone": "T", "kind": "tank", "high_water_ft": 1200.0, "low_water_ft": 1180.0},
            {"zone": "P", "kind": "prv", "valve_elevation_ft": 900.0, "setting_psi": 50.0},
            {"zone": "U", "kind": "pump", "discharge_hgl_ft": 1300.0},
        ]},
        "criteria": {"psi_per_ft": 0.5, "min_static_psi": 30.0, "max_static_psi": 80.0},
        "output": {"path": "o.gpkg", "mailing_dir": "m"},
    })
    customers = pd.DataFrame({
        "zone": ["T", "T", "P", "P", "U", None],
        "ground_ft": [1000.0, 1020.0, 900.0, 920.0, 1100.0, 1000.0],
        "floors": [1.0, 1.0, 1.0, 1.0, 1.0, 1.0],
        "status": ["ok", "high", "low", "ok", "ok", "unzoned"],
    })
    t = best_hgl_table(customers, cfg).set_index("zone")
    # tank, R = 20 ft: customer 1000 ok for H in [1080, 1160], customer 1020 for [1100, 1180]
    assert (t.loc["T", "best_high_water_ft_from"], t.loc["T", "best_high_water_ft_to"]) == (1100.0, 1160.0)
    # PRV at 900 ft: both ok for HGL in [980, 1060] -> setting 0.5 * (HGL - 900) = 40 .. 80 psi
    assert (t.loc["P", "best_setting_psi_from"], t.loc["P", "best_setting_psi_to"]) == (40.0, 80.0)
    assert (t.loc["U", "best_discharge_hgl_ft_from"], t.loc["U", "best_discharge_hgl_ft_to"]) == (1160.0, 1260.0)
    assert t.loc["T", "flagged_now"] == 1 and t.loc["T", "flagged_at_best"] == 0
    assert np.isnan(t.loc["T", "best_setting_psi_from"]) and np.isnan(t.loc["P", "best_high_water_ft_from"])
