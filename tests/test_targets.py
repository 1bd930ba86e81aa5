"""Target areas (geopress.targets): clustering, polygons and the zone-level settings against closed forms."""

from __future__ import annotations

import contextlib
from unittest import mock

import numpy as np
import pytest
import shapely
from hypothesis import example, given, settings
from hypothesis import strategies as st

from geopress import targets
from geopress.classify import Criteria
from geopress.findings import FINDINGS
from geopress.pressure import static_psi
from geopress.targets import COLUMNS, TargetCriteria, cluster_labels, feasible_hgl, target_areas, with_addresses

# the worked example of shared REFERENCES.md (university water-distribution course notes, confirmed):
# HGL_min = highest elevation + 2.31 * P_min = 95 + 2.31 * 30 = 164.3 ft; HGL_max = lowest + 2.31 * P_max =
# 5 + 2.31 * 90 = 212.9 ft, with 2.31 ft per psi
EXAMPLE = Criteria(min_static_psi=30.0, max_static_psi=90.0, psi_per_ft=1 / 2.31)
# 2.31 ft/psi times 30 or 90 psi in binary floating point: a few ulps of 200 ft
TOL_FT = 1e-9


def areas(x, y, ground, finding="high", *, ok=None, top=None, zone=None, low_hgl=1e6, criteria=EXAMPLE,
          distance_ft=100.0, min_customers=2, address=None):
    """target_areas for customers at x, y (ft, a projected CRS in ft) all with ``finding`` unless ``ok``."""
    x, y, ground = (np.asarray(v, dtype=float) for v in (x, y, ground))
    n = x.size
    ok = np.zeros(n, bool) if ok is None else np.asarray(ok, bool)
    found = {f: (~ok if f == finding else np.zeros(n, bool)) for f in FINDINGS}
    psi = static_psi(np.full(n, 200.0), ground, criteria.psi_per_ft)
    got = target_areas(
        x=x, y=y, ft_per_unit=1.0, zone=np.zeros(n, np.intp) if zone is None else np.asarray(zone, np.intp),
        zone_names=["Z", "Y"], zone_low_hgl_ft=np.array([low_hgl, low_hgl]), ground_ft=ground,
        top_ft=ground if top is None else np.asarray(top, float),
        pressures={"psi_min": psi, "psi_max": psi, "psi_top": psi}, found=found, ok=ok, criteria=criteria,
        targets=TargetCriteria(distance_ft=distance_ft, min_customers=min_customers))
    got.table = with_addresses(got, np.arange(n) if address is None else np.asarray(address))
    return got


def test_settings_on_a_plane_are_the_textbook_closed_forms():
    # ground on a plane rising 1 ft per ft east, from 5 ft to 95 ft, customers every 10 ft: one area
    x = np.arange(5.0, 96.0, 10.0)
    got = areas(x, np.zeros_like(x), x).table
    assert len(got) == 1
    row = got.iloc[0]
    assert row["hgl_ft_from"] == pytest.approx(164.3, abs=TOL_FT)
    assert row["hgl_ft_to"] == pytest.approx(212.9, abs=TOL_FT)
    assert (row["ground_ft_min"], row["ground_ft_max"]) == (5.0, 95.0)
    # at the lowest customer the PRV gives from (164.3 - 5) / 2.31 = 68.96 -> 69.0 psi to the 90 psi maximum
    assert (row["psi_at_lowest_from"], row["psi_at_lowest_to"]) == (69.0, 90.0)
    assert row["fix"] == "zone PRV" and row["replaces"] == row["customers"] == 10 and row["note"] == ""


def test_ok_customers_inside_the_polygon_bound_the_setting_too():
    # the flagged customers span 5 to 45 ft; an ok customer inside the polygon stands at 95 ft, one outside at 300 ft
    x = np.array([5.0, 25.0, 45.0, 30.0, 30.0])
    y = np.array([0.0, 0.0, 0.0, 10.0, 400.0])
    ground = np.array([5.0, 25.0, 45.0, 95.0, 300.0])
    row = areas(x, y, ground, ok=[False, False, False, True, True]).table.iloc[0]
    assert row["customers"] == 3 and row["ok_inside"] == 1
    assert row["hgl_ft_from"] == pytest.approx(164.3, abs=TOL_FT)  # from the ok customer's 95 ft
    assert (row["ground_ft_min"], row["ground_ft_max"]) == (5.0, 45.0)  # the area's own customers


def test_no_single_setting_when_the_levels_span_more_than_the_window():
    # (90 - 30) * 2.31 = 138.6 ft of window; these customers span 150 ft
    x = np.array([0.0, 50.0, 100.0, 150.0])
    row = areas(x, np.zeros(4), x).table.iloc[0]
    assert np.isnan(row["hgl_ft_from"]) and np.isnan(row["hgl_ft_to"])
    assert "no single setting" in row["note"] and "150.0 ft" in row["note"] and "138.6 ft" in row["note"]


def test_a_prv_cannot_raise_the_zones_low_hgl():
    x = np.arange(5.0, 96.0, 10.0)
    row = areas(x, np.zeros_like(x), x, low_hgl=160.0).table.iloc[0]  # below the 164.3 ft needed
    assert np.isnan(row["hgl_ft_from"]) and "cannot raise" in row["note"]
    row = areas(x, np.zeros_like(x), x, finding="low", low_hgl=160.0).table.iloc[0]  # a booster can
    assert row["fix"] == "booster" and row["hgl_ft_from"] == pytest.approx(164.3, abs=TOL_FT)


def test_an_upper_floors_booster_serves_the_top_floors():
    # 3 buildings on 5 to 25 ft ground, top floors up to 95 ft: the booster must lift the highest top floor
    x = np.array([5.0, 15.0, 25.0])
    row = areas(x, np.zeros(3), x, finding="low_upper_floors", top=[95.0, 15.0, 25.0]).table.iloc[0]
    assert row["served_ft_max"] == 95.0
    assert row["hgl_ft_from"] == pytest.approx(164.3, abs=TOL_FT)


def test_two_separated_clusters_are_two_areas_sorted_by_customers():
    west = np.arange(0.0, 50.0, 10.0)  # 5 customers 10 ft apart
    east = 10_000.0 + np.arange(0.0, 70.0, 10.0)  # 7 customers, 10,000 ft away
    x = np.r_[west, east]
    got = areas(x, np.zeros_like(x), np.full(x.size, 50.0), min_customers=3)
    assert got.table["customers"].tolist() == [7, 5] and got.table["area"].tolist() == ["T1", "T2"]
    member = got.member["high"].tolist()
    assert member == ["T2"] * 5 + ["T1"] * 7
    assert all(v is None or v != v for v in got.member["low"].tolist())  # no low areas: all missing
    # each polygon holds its own customers and not the other's
    for poly, xs in zip(got.table["geometry"], (east, west)):
        assert shapely.contains_xy(poly, xs, np.zeros_like(xs)).all()


def test_polygon_is_the_hull_buffered_by_half_the_distance_and_small_clusters_are_dropped():
    x = np.array([0.0, 100.0, 100.0, 0.0, 5000.0])
    y = np.array([0.0, 0.0, 100.0, 100.0, 0.0])
    got = areas(x, y, np.full(5, 50.0), distance_ft=100.0, min_customers=2).table
    assert len(got) == 1 and got.iloc[0]["customers"] == 4  # the lone customer far east is no area
    poly = got.iloc[0]["geometry"]
    # a 100 ft square buffered by 50 ft: 100^2 + 4 * 100 * 50 + pi * 50^2, less the buffer's polygonal arcs
    assert poly.area == pytest.approx(10_000 + 20_000 + np.pi * 2_500, rel=2e-3)  # shapely's 8 segments per quarter


def test_no_areas_when_they_are_off():
    x = np.arange(5.0, 96.0, 10.0)
    got = target_areas(x=x, y=np.zeros_like(x), ft_per_unit=1.0, zone=np.zeros(x.size, np.intp), zone_names=["Z"],
                       zone_low_hgl_ft=np.array([1e6]), ground_ft=x, top_ft=x,
                       pressures={c: x for c in ("psi_min", "psi_max", "psi_top")},
                       found={f: np.full(x.size, f == "high") for f in FINDINGS}, ok=np.zeros(x.size, bool),
                       criteria=EXAMPLE, targets=TargetCriteria(enabled=False))
    assert with_addresses(got, np.arange(x.size)).columns.tolist() == list(COLUMNS)
    assert got.table.empty and all(m.isna().all() for m in got.member.values())


def test_areas_per_zone_and_finding_and_distinct_addresses():
    x = np.arange(0.0, 60.0, 10.0)
    got = areas(x, np.zeros(6), np.full(6, 50.0), zone=[0, 0, 0, 1, 1, 1], address=[7, 7, 8, 9, 9, 9],
                min_customers=3).table
    assert sorted(zip(got["zone"], got["customers"], got["addresses"])) == [("Y", 3, 1), ("Z", 3, 2)]


@settings(max_examples=40, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 30), st.integers(0, 5)), min_size=1, max_size=60))
def test_addresses_are_the_distinct_codes_of_each_areas_customers(points):
    # customers on a 10 ft grid, clustered at 10 ft; each area's addresses against numpy's own distinct count
    x = np.array([10.0 * p[0] for p in points])
    codes = np.array([p[1] for p in points])
    got = areas(x, np.zeros(x.size), np.full(x.size, 50.0), distance_ft=10.0, min_customers=1, address=codes)
    assert got.table.columns.tolist() == list(COLUMNS)
    assert got.table["addresses"].tolist() == [np.unique(codes[r]).size for r in got.rows]
    assert sorted(np.concatenate(got.rows).tolist()) == list(range(x.size))  # every customer in one area


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(0.0, 300.0), min_size=2, max_size=25), st.floats(20.0, 40.0), st.floats(5.0, 100.0))
def test_every_customer_is_within_the_window_across_the_range(ground, lo, span):
    crit = Criteria(min_static_psi=lo, max_static_psi=lo + span)
    g = np.array(ground)
    x = np.arange(g.size) * 10.0
    row = areas(x, np.zeros_like(x), g, criteria=crit, distance_ft=15.0).table.iloc[0]
    exact = feasible_hgl(g.max(), g.min(), crit)
    if np.isnan(exact.hgl_ft_from):
        assert g.max() - g.min() > span / crit.psi_per_ft and np.isnan(row["hgl_ft_from"])
        return
    # the closed forms: everyone within the window at both ends, and just outside them someone is not
    for h in (exact.hgl_ft_from, exact.hgl_ft_to):
        psi = static_psi(np.full(g.size, h), g, crit.psi_per_ft)
        # 1e-9 psi: the bounds are computed in ft and multiplied back, a few ulps off
        assert (psi >= lo - 1e-9).all() and (psi <= lo + span + 1e-9).all()
    below = static_psi(np.full(g.size, exact.hgl_ft_from - 0.01), g, crit.psi_per_ft)
    above = static_psi(np.full(g.size, exact.hgl_ft_to + 0.01), g, crit.psi_per_ft)
    assert (below < lo).any() and (above > lo + span).any()
    # the layer's range is the exact one rounded inward to 0.1 ft (1e-7 ft: the rounding's allowance for noise)
    assert exact.hgl_ft_from - 1e-7 <= row["hgl_ft_from"] <= row["hgl_ft_to"] <= exact.hgl_ft_to + 1e-7
    if exact.hgl_ft_to - exact.hgl_ft_from >= 0.2:
        assert row["hgl_ft_from"] - exact.hgl_ft_from < 0.1 and exact.hgl_ft_to - row["hgl_ft_to"] < 0.1



def dbscan_labels(x, y, distance_ft):
    """The reference: scikit-learn's DBSCAN with ``min_samples = 1`` (single linkage at ``eps``), a
    general-purpose library from the package registry, on every pairwise distance, so it shares no code path with
    the triangulation. The distances are scipy's ``cdist``, from the coordinates' differences: scikit-learn's own
    Euclidean distances expand ``|a|^2 + |b|^2 - 2 a.b``, which at state-plane coordinates (2,000,000 ft) gave
    25.0 ft^2 for two points 25.00024 ft^2 apart (the example below) and joined them at 5 ft."""
    from scipy.spatial.distance import cdist
    from sklearn.cluster import DBSCAN

    xy = np.column_stack([x, y])
    return DBSCAN(eps=distance_ft, min_samples=1, metric="precomputed").fit_predict(cdist(xy, xy))


def assert_same_partition(a, b):
    """Two labelings group the points alike (the label numbers may differ)."""
    pairs = set(zip(a.tolist(), b.tolist()))
    assert len(pairs) == len(set(a.tolist())) == len(set(b.tolist()))


# coordinates on a 5 ft grid (ties at exactly the distance, places shared by several customers, rows on one line)
# or anywhere in a block; state-plane-like offsets, so qhull sees large coordinates with a small spread
grid = st.integers(0, 40).map(lambda i: i * 5.0)
anywhere = st.floats(0.0, 200.0, allow_nan=False)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.tuples(grid | anywhere, grid | anywhere), min_size=1, max_size=60),
       st.sampled_from([5.0, 12.5, 25.0, 60.0]), st.sampled_from([0.0, 2_000_000.0]),
       st.sampled_from([targets.STRIP_PLACES, 3, 7]))
@example([(0.0, 0.0), (5.0, 0.015625)], 5.0, 2_000_000.0, targets.STRIP_PLACES)  # 5.00002 ft apart: not joined
def test_clusters_are_those_of_dbscan_with_one_sample(points, distance_ft, offset, strip_places):
    xy = np.array(points) + offset
    # strips of 3 or 7 places: the split a set of more than STRIP_PLACES gets, on sets small enough to check
    with mock.patch.object(targets, "STRIP_PLACES", strip_places):
        got = cluster_labels(xy[:, 0], xy[:, 1], distance_ft)
    assert_same_partition(got, dbscan_labels(xy[:, 0], xy[:, 1], distance_ft))
    # numbered from 0 in order of each cluster's first point
    _, first = np.unique(got, return_index=True)
    assert (got[np.sort(first)] == np.arange(first.size)).all()


# clumps of up to 80 points, many in a cell of the grid that cluster_labels bins them in first
clump = st.tuples(st.floats(0.0, 300.0), st.floats(0.0, 300.0), st.floats(0.5, 20.0), st.integers(1, 80))


@settings(max_examples=60, deadline=None)
@given(st.lists(clump, min_size=1, max_size=8), st.sampled_from([5.0, 25.0, 60.0]), st.integers(0, 2**32 - 1),
       st.booleans())
def test_dense_clusters_are_those_of_dbscan(clumps, distance_ft, seed, settle):
    rng = np.random.default_rng(seed)
    xy = np.concatenate([rng.normal((cx, cy), spread, (n, 2)) for cx, cy, spread, n in clumps])
    # settle False: no pair of cells is linked by its extreme points, so the triangulation decides every pair
    # the boxes leave open, their points chosen a few pairs at a time (as 4,194,304 points are in a large set)
    unsettled = mock.patch.object(targets._Grid, "_facing",
                                  lambda self, xs, ys, extreme, one, other, k: np.zeros(one.size, dtype=bool))
    with contextlib.nullcontext() if settle else unsettled, mock.patch.object(targets, "_NEAR_CHUNK", 50):
        got = cluster_labels(xy[:, 0], xy[:, 1], distance_ft)
    assert_same_partition(got, dbscan_labels(xy[:, 0], xy[:, 1], distance_ft))


@pytest.mark.parametrize("x, y", [
    ([], []),                                                 # none
    ([0.0, 0.0, 0.0], [0.0, 0.0, 0.0]),                       # one place
    ([0.0, 9.0, 0.0, 9.0], [0.0, 0.0, 0.0, 0.0]),             # two places
    ([0.0, 10.0, 20.0, 45.0, 55.0], [0.0, 10.0, 20.0, 45.0, 55.0]),  # all on one line: qhull cannot triangulate
])
def test_degenerate_points_cluster_as_dbscan_does(x, y):
    x, y = np.array(x, dtype=float), np.array(y, dtype=float)
    got = cluster_labels(x, y, 15.0)
    if x.size == 0:
        assert got.size == 0
        return
    assert_same_partition(got, dbscan_labels(x, y, 15.0))


@pytest.mark.parametrize("spread, distance_ft", [
    (1_000_000.0, 1e-4),  # more than 2**30 cells a side: no cell is numbered
    (2.0, 1e-12),         # a distance below the rounding of coordinates this large: no cell is small enough
])
def test_without_cells_every_point_is_triangulated(spread, distance_ft):
    rng = np.random.default_rng(3)
    xy = 2_000_000.0 + rng.uniform(0.0, spread, (40, 2))
    xy[1] = xy[0] + [distance_ft / 2, 0.0]  # a pair within the distance (at one place, at the second spread)
    xy[2] = xy[3]                             # and two customers at one place
    grid = targets._Grid(xy, distance_ft)
    assert grid.open.size == 40 and grid.cells == len({tuple(p) for p in xy.tolist()})
    assert_same_partition(cluster_labels(xy[:, 0], xy[:, 1], distance_ft), dbscan_labels(xy[:, 0], xy[:, 1], distance_ft))


@settings(max_examples=100, deadline=None)
@given(st.lists(st.lists(st.tuples(grid | anywhere, grid | anywhere), min_size=1, max_size=40), min_size=1, max_size=4),
       st.sampled_from([0.0, 2_000_000.0]))
def test_outline_keeps_the_convex_hull(parts, offset):
    # shapely's (GEOS's) convex hull of each part, a general-purpose reference: the points kept give the same one,
    # on grid ties, shared places, lines and single points
    xy = np.array([p for ps in parts for p in ps]) + offset
    part = np.repeat(np.arange(len(parts)), [len(ps) for ps in parts])
    keep = targets._outline(xy[:, 0], xy[:, 1], part)
    for i in range(len(parts)):
        mine = part == i
        whole = shapely.convex_hull(shapely.multipoints(xy[mine]))
        assert shapely.convex_hull(shapely.multipoints(xy[mine & keep])).equals(whole)


def test_outline_leaves_out_the_inside():
    # 10,000 points spread evenly in a square: the polygon of the eight extremes holds nearly all of them
    rng = np.random.default_rng(7)
    xy = rng.uniform(0.0, 1000.0, (10_000, 2))
    keep = targets._outline(xy[:, 0], xy[:, 1], np.zeros(10_000, dtype=np.intp))
    assert keep.sum() < 1_000
    whole = shapely.convex_hull(shapely.multipoints(xy))
    assert shapely.convex_hull(shapely.multipoints(xy[keep])).equals(whole)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(grid | anywhere | st.just(-0.0), grid | anywhere), max_size=40))
def test_places_are_numpys_unique_pairs(points):
    # numpy's unique(axis=0, return_inverse=True), a general-purpose reference, on shared places and -0.0
    xy = np.array(points, dtype=float).reshape(-1, 2)
    places, at = targets._places(xy[:, 0], xy[:, 1])
    want, inverse = np.unique(xy, axis=0, return_inverse=True)
    np.testing.assert_array_equal(places, want.reshape(-1, 2))
    np.testing.assert_array_equal(at, inverse.ravel())
