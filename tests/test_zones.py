"""Point-in-polygon zone assignment, overlaps and repair (geopress.zones)."""

from __future__ import annotations

from unittest import mock

import numpy as np
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st
from pyproj import CRS

from geopress import zones as zones_mod
from geopress.zones import Overlap, assign, assign_xy, overlaps, repair

WEST = shapely.box(0, 0, 10, 10)
EAST = shapely.box(10, 0, 20, 10)


def pts(*xy):
    return np.array([shapely.Point(x, y) for x, y in xy], dtype=object)


def test_interior_points_go_to_their_polygon():
    got = assign(pts((5, 5), (15, 5)), [WEST, EAST], [0, 1])
    assert got.tolist() == [0, 1]


def test_shared_boundary_point_goes_to_the_zone_listed_first():
    on_edge = pts((10, 5), (10, 0))  # an edge point and a shared corner on the outer boundary
    assert assign(on_edge, [WEST, EAST], [0, 1]).tolist() == [0, 0]
    assert assign(on_edge, [WEST, EAST], [1, 0]).tolist() == [1, 1]
    # independent of feature order in the layer
    assert assign(on_edge, [EAST, WEST], [1, 0]).tolist() == [1, 1]


def test_point_on_the_outer_boundary_of_one_zone_belongs_to_it():
    assert assign(pts((0, 5), (20, 10)), [WEST, EAST], [0, 1]).tolist() == [0, 1]


def test_interior_beats_boundary_whatever_the_priority():
    # INNER's edge x = 4 runs through WEST's interior: a point there is interior to WEST only.
    inner = shapely.box(4, 2, 8, 8)
    assert assign(pts((4, 5)), [WEST, inner], [1, 0]).tolist() == [0]


def test_overlap_goes_to_the_zone_listed_first():
    a = shapely.box(0, 0, 12, 10)
    b = shapely.box(8, 0, 20, 10)
    inside_both = pts((10, 5))
    assert assign(inside_both, [a, b], [0, 1]).tolist() == [0]
    assert assign(inside_both, [a, b], [1, 0]).tolist() == [1]


def test_outside_missing_and_empty_points_get_minus_one():
    points = np.array([shapely.Point(50, 50), None, shapely.Point(), shapely.Point(5, 5)], dtype=object)
    assert assign(points, [WEST, EAST], [0, 1]).tolist() == [-1, -1, -1, 0]


def test_no_points_or_no_polygons():
    assert assign(np.array([], dtype=object), [WEST], [0]).tolist() == []
    assert assign(pts((5, 5)), np.array([], dtype=object), []).tolist() == [-1]


def test_multipolygon_zone_and_two_features_of_one_zone():
    two_parts = shapely.MultiPolygon([shapely.box(0, 0, 1, 1), shapely.box(5, 5, 6, 6)])
    assert assign(pts((0.5, 0.5), (5.5, 5.5), (3, 3)), [two_parts], [0]).tolist() == [0, 0, -1]


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.integers(-2, 22), st.integers(-2, 12)), min_size=1, max_size=30), st.booleans())
def test_every_point_gets_at_most_one_zone_by_the_rule(grid_points, west_first):
    # Integer points on a 1-unit grid hit edges and corners often.
    points = pts(*grid_points)
    prio = [0, 1] if west_first else [1, 0]
    got = assign(points, [WEST, EAST], prio)
    for (x, y), z in zip(grid_points, got):
        in_w, in_e = 0 <= x <= 10 and 0 <= y <= 10, 10 <= x <= 20 and 0 <= y <= 10
        if in_w and in_e:
            assert z == (0 if west_first else 1)
        elif in_w:
            assert z == 0
        elif in_e:
            assert z == 1
        else:
            assert z == -1


@settings(max_examples=50, deadline=None)
@given(st.lists(st.tuples(st.integers(-2, 22), st.integers(-2, 12)), max_size=30), st.integers(1, 7))
def test_points_assigned_a_chunk_at_a_time_get_the_zones_of_all_at_once(grid_points, chunk):
    # assign_xy makes its shapely points a chunk at a time; the answer is assign's on every point (rows of NaN,
    # a customer without a location, among them)
    xy = np.array(grid_points + [(np.nan, np.nan)], dtype=float)
    crs = CRS.from_epsg(32631)
    whole = assign(shapely.points(xy), [WEST, EAST], [0, 1])
    with mock.patch.object(zones_mod, "POINTS_AT_A_TIME", chunk):
        got = assign_xy(xy[:, 0], xy[:, 1], crs, [WEST, EAST], crs, [0, 1])
    assert got.tolist() == whole.tolist()


def test_overlaps_reports_overlapping_pairs_not_touching_ones():
    a = shapely.box(0, 0, 12, 10)  # overlaps b by 2 x 10 = 20
    b = shapely.box(10, 0, 20, 10)
    c = shapely.box(20, 0, 30, 10)  # touches b along x = 20 only
    found = overlaps([a, b, c], ["A", "B", "C"])
    assert found == [Overlap("A", "B", 20.0)]


def test_overlaps_ignores_parts_of_the_same_zone_and_small_slivers():
    a1, a2 = shapely.box(0, 0, 12, 10), shapely.box(10, 0, 20, 10)
    assert overlaps([a1, a2], ["A", "A"]) == []
    sliver = shapely.box(11.99, 0, 20, 10)  # 0.01 x 10 = 0.1 overlap with a1
    assert overlaps([a1, sliver], ["A", "B"], min_area=0.5) == []
    assert overlaps([a1], ["A"]) == []


def test_repair_makes_a_bow_tie_two_triangles():
    bow_tie = shapely.Polygon([(0, 0), (10, 10), (10, 0), (0, 10), (0, 0)])
    assert not bow_tie.is_valid
    fixed, idx = repair([WEST, bow_tie])
    assert idx.tolist() == [1]
    assert fixed[0] is WEST  # valid polygons are left alone
    assert fixed[1].is_valid
    assert fixed[1].geom_type == "MultiPolygon"
    assert len(fixed[1].geoms) == 2
    # each triangle is a quarter of the 10 x 10 square: 25 + 25
    assert fixed[1].area == 50.0
    # the crossing point (5, 5) is on the boundary of both triangles, a point inside one is assigned
    assert assign(pts((2, 5), (5, 9)), [fixed[1]], [0]).tolist() == [0, -1]


def test_repair_keeps_only_the_polygonal_part():
    # A polygon with a dangling spike repairs to a polygon plus a line: only the polygon is kept.
    spike = shapely.Polygon([(0, 0), (4, 0), (4, 4), (4, 8), (4, 4), (0, 4), (0, 0)])
    fixed, idx = repair([spike])
    assert idx.tolist() == [0]
    assert fixed[0].geom_type in ("Polygon", "MultiPolygon")
    assert fixed[0].area == 16.0
