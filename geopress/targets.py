"""Target areas: customers with the same finding in the same zone that one project could fix. Pure, no I/O.

Customers of one finding and one zone are clustered by single linkage on
their coordinates in ft (:func:`cluster_labels`): two customers at most
``distance_ft`` apart are in the same area, and so is a chain of them (the
clusters of DBSCAN with ``eps = distance_ft`` and ``min_samples = 1``). An area needs at
least ``min_customers``; smaller clusters are left to individual fixes.

Each area's polygon is the convex hull of its customers buffered by half the
distance. Ground, pressures and settings are rounded to 0.1 (the HGL range
inward, so every setting it shows serves everyone). Its **zone-level fix** is one HGL ``H`` for the whole area, from a
zone PRV (for ``high``) or a booster (for the other findings), that puts the
pressure of every customer of the area, and of every ``ok`` customer of the
zone already inside the polygon, within ``[min_static_psi, max_static_psi]``:

* ``H <= lowest ground + max_static_psi / psi_per_ft`` (no one above the maximum),
* ``H >= highest served level + min_static_psi / psi_per_ft`` (no one below the minimum),

where the served level is the ground (the street), or for an
upper-floors area the top floor (a booster serving the upper floors). These
are the textbook bounds (shared REFERENCES.md, worked example: 95 + 2.31 *
30 = 164.3 ft and 5 + 2.31 * 90 = 212.9 ft). The range is empty when the
area's levels span more than ``(max - min) / psi_per_ft`` ft: no single
setting can serve it. A PRV can only lower the HGL, so a high-pressure area
whose zone's low HGL is below the lower bound cannot be served by one either
(at low water its highest customers would fall short whatever the setting).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Mapping

import numpy as np
import pandas as pd
import shapely
from numpy.typing import NDArray

from .classify import names_at
from .findings import FINDINGS, FLAGGED_STATUSES, WORST

#: the layer's columns, in order (``geometry`` last)
COLUMNS = (
    "area", "finding", "zone", "customers", "addresses", "ground_ft_min", "ground_ft_max", "served_ft_max",
    "worst_psi", "ok_inside", "fix", "hgl_ft_from", "hgl_ft_to", "psi_at_lowest_from", "psi_at_lowest_to",
    "replaces", "note", "geometry",
)


@dataclass(frozen=True)
class TargetCriteria:
    """How areas are formed: ``distance_ft``, the most two neighbouring customers of an area are apart, and
    ``min_customers``, the fewest an area has.

    Defaults: 300 ft, about a city block, so customers along one street or in one subdivision pocket join, while
    a neighbourhood across a valley stays apart; 10 customers, below which individual PRVs or service boosters
    are usually cheaper than a zone-level PRV station or booster (both common practice, no source). ``enabled``
    false skips them (they cost most where most customers are flagged: see scripts/README.md).
    """

    distance_ft: float = 300.0
    min_customers: int = 10
    enabled: bool = True


@dataclass(frozen=True)
class Fix:
    """One zone-level setting for an area: its HGL range (NaN, NaN when none) and why not, when empty."""

    hgl_ft_from: float
    hgl_ft_to: float
    note: str


def feasible_hgl(served_max_ft: float, ground_min_ft: float, criteria, *, source_low_ft: float | None = None,
                 ) -> Fix:
    """The HGL range that keeps every level from ``ground_min_ft`` (at most ``max_static_psi``) up to
    ``served_max_ft`` (at least ``min_static_psi``) in the window; for a PRV, ``source_low_ft`` is the lowest HGL
    its inlet can give (the zone's low HGL), below which it cannot hold the lower bound."""
    k = criteria.psi_per_ft
    lo = served_max_ft + criteria.min_static_psi / k
    hi = ground_min_ft + criteria.max_static_psi / k
    if lo > hi:
        span = served_max_ft - ground_min_ft
        allowed = (criteria.max_static_psi - criteria.min_static_psi) / k
        return Fix(np.nan, np.nan, f"no single setting: its levels span {span:,.1f} ft, more than the "
                                   f"{allowed:,.1f} ft the pressure window allows")
    if source_low_ft is not None and source_low_ft < lo:
        return Fix(np.nan, np.nan, f"no PRV setting: the zone's low HGL of {source_low_ft:,.1f} ft is below the "
                                   f"{lo:,.1f} ft its highest customer needs, and a PRV cannot raise it")
    return Fix(lo, hi, "")


def _tenth(value: float) -> float:
    """``value`` rounded to 0.1, as the other outputs give ft and psi."""
    return float(np.round(value, 1)) + 0.0


def _inward(fix: Fix) -> Fix:
    """``fix`` with its range rounded inward to 0.1 ft, so every setting shown keeps everyone in the window;
    as it is when the range is narrower than that."""
    # within 1e-6 of a tenth counts as on it: the arithmetic's noise (95 + 30 * 2.31 is not exactly 164.3 in
    # binary), a millionth of a tenth of a foot, far below any survey's accuracy
    lo = np.ceil(fix.hgl_ft_from * 10.0 - 1e-6) / 10.0
    hi = np.floor(fix.hgl_ft_to * 10.0 + 1e-6) / 10.0
    return Fix(lo, hi, fix.note) if lo <= hi else fix


#: the most places triangulated at once: a set with more is split into strips of this many (see
#: :func:`cluster_labels`), which bounds qhull's memory (about 700 bytes a place) and keeps every core busy
STRIP_PLACES = 200_000

#: the offsets (columns, rows) of the cells that can hold a point within the distance of a point of a given cell,
#: one of each opposite pair (cells are a hair smaller than the distance over sqrt 2: see :class:`_Grid`)
_NEIGHBOURS = [(0, 1), (0, 2)] + [(a, b) for a in (1, 2) for b in range(-2, 3)]
#: eight directions, counterclockwise from +x, in which each cell's extreme points are found
_DIRECTIONS = [(1, 0), (1, 1), (0, 1), (-1, 1), (-1, 0), (-1, -1), (0, -1), (1, -1)]
#: the most points of pairs of cells examined at once when choosing the points for the triangulation
_NEAR_CHUNK = 1 << 22


def cluster_labels(x_ft: NDArray[np.float64], y_ft: NDArray[np.float64], distance_ft: float) -> NDArray[np.intp]:
    """Single-linkage labels of points in ft at ``distance_ft``: two points at most ``distance_ft`` apart share one,
    and so does a chain of them (DBSCAN's with ``min_samples = 1``). Labels count from 0 in order of each
    cluster's first point. The coordinates must be finite.

    The points are first binned in square cells a hair smaller than ``distance_ft / sqrt(2)``, so the points of
    one cell are all within the distance of each other and belong to one cluster. Two cells are linked when a
    point of one is within the distance of a point of the other; only cells at most two columns and two rows
    apart can be. A pair is settled at once when the boxes of their points are farther apart than the distance
    (not linked), or when two of their extreme points (in the eight directions facing each other) are within it
    (linked). Pairs still open whose cells are not yet joined by settled links are decided by the Delaunay
    triangulation of the points that can matter, those within the distance of the other cell's box, and the
    clusters are the connected components of the cells and their links (scipy's csgraph). In a dense
    subdivision almost every pair is settled by its extreme points, and few points are triangulated.

    The triangulation's edges no longer than ``distance_ft`` decide the open pairs exactly: a Euclidean minimum
    spanning tree lies within the relative neighbourhood graph, which lies within the Delaunay triangulation, and
    any two of the triangulated points at most ``distance_ft`` apart (the closest points of an open pair that is
    linked are among them) are joined by its path, whose every edge is at most that long and joins two linked
    cells. Points at one place are triangulated once. More than :data:`STRIP_PLACES` places are split by x into
    strips of that many, each triangulated with the places within ``distance_ft`` of it on either side: a
    spanning-tree edge no longer than the distance has both ends in the widened strip of its left end, and stays
    an edge of that strip's relative neighbourhood graph (the lune between its ends is empty of all points, so of
    the strip's), hence of its triangulation. When qhull cannot triangulate a set (fewer than three places, all
    on a line) or leaves a place out as too close to another for its precision, the pairs within the distance
    come from a k-d tree instead.
    """
    return _cluster_all([(x_ft, y_ft)], distance_ft)[0]


def _cluster_all(points: list[tuple[NDArray[np.float64], NDArray[np.float64]]], distance_ft: float,
                 ) -> list[NDArray[np.intp]]:
    """:func:`cluster_labels` of each set of points, in order. qhull releases the GIL, so the strips of every set
    are triangulated in threads, one per core, the largest first (scripts/README.md)."""
    grids = [_Grid(np.column_stack([x, y]), distance_ft) for x, y in points]
    sets = [_places(g.xy[g.open, 0], g.xy[g.open, 1]) for g in grids]
    strips = [(i, lo, hi) for i, (places, _) in enumerate(sets) for lo, hi in _strips(places[:, 0], distance_ft)]
    strips.sort(key=lambda t: t[1] - t[2])  # the largest first

    def short(strip: tuple[int, int, int]) -> NDArray[np.intp]:
        i, lo, hi = strip
        return lo + _short_edges(sets[i][0][lo:hi], distance_ft)

    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    if cores > 1 and len(strips) > 1:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=min(cores, len(strips))) as pool:
            found = list(pool.map(short, strips))
    else:
        found = [short(t) for t in strips]
    out = []
    for i, (g, (places, at)) in enumerate(zip(grids, sets)):
        edges = np.concatenate([e for (j, _, _), e in zip(strips, found) if j == i] or [np.zeros((0, 2), np.intp)])
        # a point at each place, and the cells its edges link
        point = np.empty(places.shape[0], dtype=np.intp)
        point[at] = g.open
        labels = g.cluster(g.cell[point[edges]])
        # renumbered in order of each cluster's first point
        _, first = np.unique(labels, return_index=True)
        rank = np.empty(first.size, dtype=np.intp)
        rank[np.argsort(first)] = np.arange(first.size)
        out.append(rank[labels])
    return out


def _components(n: int, edges: NDArray[np.intp]) -> NDArray[np.intp]:
    """The connected component of each of ``n`` nodes joined by ``edges`` (pairs of node indices)."""
    from scipy.sparse import coo_array
    from scipy.sparse.csgraph import connected_components

    graph = coo_array((np.ones(len(edges), dtype=np.int8), (edges[:, 0], edges[:, 1])), shape=(n, n))
    return connected_components(graph, directed=False)[1]


class _Grid:
    """Points ``xy`` binned in cells for :func:`cluster_labels` at ``distance_ft``: each point's ``cell``, the
    ``links`` between cells settled by their extreme points, and the points (``open``, indices into ``xy``) to
    triangulate to decide the pairs of cells still open."""

    def __init__(self, xy: NDArray[np.float64], distance_ft: float):
        self.xy, self.distance_ft = xy, distance_ft
        n = xy.shape[0]
        self.links = np.zeros((0, 2), dtype=np.intp)
        if n == 0:
            self.cell, self.cells, self.open = np.zeros(0, np.intp), 0, np.zeros(0, np.intp)
            return
        # cells a hair smaller than distance / sqrt 2, by more than the rounding of coordinates this large, so two
        # points in one cell are within the distance as it is measured (from the coordinates as given)
        margin = distance_ft * 1e-9 + 16.0 * float(np.spacing(np.abs(xy).max()))
        side = (distance_ft - margin) / np.sqrt(2.0)
        ij = np.floor((xy - xy.min(axis=0)) / side) if side > 0 else None
        if ij is None or ij.max() >= 2.0 ** 30:
            # too many cells to number: a cell a place (points at one place are one cluster), all triangulated
            self.cell = _places(xy[:, 0], xy[:, 1])[1]
            self.cells, self.open = int(self.cell.max()) + 1, np.arange(n)
            return
        ij = ij.astype(np.int64)
        width = int(ij[:, 1].max()) + 5  # a row number off the grid by 2 never lands on another column's cell
        key = ij[:, 0] * width + ij[:, 1]
        order = np.argsort(key, kind="stable")
        sorted_key = key[order]
        new = np.r_[True, sorted_key[1:] != sorted_key[:-1]]
        starts = np.flatnonzero(new)
        self.cells = starts.size
        in_cell = np.cumsum(new) - 1
        self.cell = np.empty(n, dtype=np.intp)
        self.cell[order] = in_cell
        self.starts, self.counts = starts, np.diff(np.r_[starts, n])
        xs, ys = xy[order, 0], xy[order, 1]
        extreme = _extremes(xs, ys, in_cell, starts)
        self.box = (xs[extreme[4]], ys[extreme[6]], xs[extreme[0]], ys[extreme[2]])  # left, bottom, right, top
        keys = sorted_key[starts]
        links, open_pairs = [], []
        for a, b in _NEIGHBOURS:
            target = keys + (a * width + b)
            at = np.minimum(np.searchsorted(keys, target), self.cells - 1)
            one = np.flatnonzero(keys[at] == target)
            other = at[one]
            one, other = self._near_boxes(one, other)
            linked = self._facing(xs, ys, extreme, one, other, int(np.round(np.arctan2(b, a) / (np.pi / 4))) % 8)
            links.append(np.column_stack([one[linked], other[linked]]))
            open_pairs.append(np.column_stack([one[~linked], other[~linked]]))
        self.links = np.concatenate(links)
        pairs = np.concatenate(open_pairs)
        # pairs whose cells are already joined need no triangulation
        joined = _components(self.cells, self.links)
        pairs = pairs[joined[pairs[:, 0]] != joined[pairs[:, 1]]]
        chosen = np.zeros(n, dtype=bool)
        self._mark_near(chosen, xs, ys, pairs[:, 0], pairs[:, 1])
        self._mark_near(chosen, xs, ys, pairs[:, 1], pairs[:, 0])
        self.open = order[chosen]

    def _facing(self, xs: NDArray[np.float64], ys: NDArray[np.float64], extreme: NDArray[np.intp],
                one: NDArray[np.intp], other: NDArray[np.intp], k: int) -> NDArray[np.bool_]:
        """Whether cells ``one`` and ``other`` (in direction ``k`` of :data:`_DIRECTIONS` from it) are linked by
        their extreme points facing each other: in the direction and its two neighbours, and the opposite ones."""
        linked = np.zeros(one.size, dtype=bool)
        for ka in (k - 1, k, k + 1):
            for kb in (k + 3, k + 4, k + 5):
                p, q = extreme[ka % 8, one], extreme[kb % 8, other]
                linked |= _length(xs[p] - xs[q], ys[p] - ys[q]) <= self.distance_ft
        return linked

    def _near_boxes(self, one: NDArray[np.intp], other: NDArray[np.intp]) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
        """The pairs of cells whose points' boxes are within the distance of each other."""
        left, bottom, right, top = self.box
        gap_x = np.maximum(np.maximum(left[other] - right[one], left[one] - right[other]), 0.0)
        gap_y = np.maximum(np.maximum(bottom[other] - top[one], bottom[one] - top[other]), 0.0)
        near = _length(gap_x, gap_y) <= self.distance_ft
        return one[near], other[near]

    def _mark_near(self, chosen: NDArray[np.bool_], xs: NDArray[np.float64], ys: NDArray[np.float64],
                   one: NDArray[np.intp], other: NDArray[np.intp]) -> None:
        """Marks in ``chosen`` (by sorted position) the points of each cell ``one`` within the distance of the box
        of the points of its cell ``other``: only they can be within the distance of one of its points."""
        left, bottom, right, top = self.box
        sizes = self.counts[one]
        ends = np.cumsum(sizes)
        cuts = np.r_[0, np.flatnonzero(np.diff(ends // _NEAR_CHUNK)) + 1, one.size]
        for lo, hi in zip(cuts[:-1], cuts[1:]):
            if lo == hi:
                continue
            n_i = sizes[lo:hi]
            pair = np.repeat(np.arange(lo, hi), n_i)
            pos = np.arange(n_i.sum()) + np.repeat(self.starts[one[lo:hi]] - (np.cumsum(n_i) - n_i), n_i)
            o = other[pair]
            gap_x = np.maximum(np.maximum(left[o] - xs[pos], xs[pos] - right[o]), 0.0)
            gap_y = np.maximum(np.maximum(bottom[o] - ys[pos], ys[pos] - top[o]), 0.0)
            chosen[pos[_length(gap_x, gap_y) <= self.distance_ft]] = True

    def cluster(self, more: NDArray[np.intp]) -> NDArray[np.intp]:
        """Each point's component over the cells, their settled links and the links ``more``."""
        return _components(self.cells, np.concatenate([self.links, more]))[self.cell]


def _extremes(x: NDArray[np.float64], y: NDArray[np.float64], group: NDArray[np.intp],
              starts: NDArray[np.intp]) -> NDArray[np.intp]:
    """Each group's extreme point in each of the :data:`_DIRECTIONS` (its first, where several tie), as positions,
    of points in order of their ``group`` (non-decreasing, from 0, none skipped) that begin at ``starts``."""
    out = np.empty((len(_DIRECTIONS), starts.size), dtype=np.intp)
    for k, (a, b) in enumerate(_DIRECTIONS):
        v = a * x + b * y
        hit = np.flatnonzero(v == np.maximum.reduceat(v, starts)[group])
        out[k] = hit[np.r_[True, group[hit][1:] != group[hit][:-1]]]
    return out


def _length(dx: NDArray[np.float64], dy: NDArray[np.float64]) -> NDArray[np.float64]:
    """The length of ``(dx, dy)``, as every distance here is measured (the same rounding everywhere, and growing
    with each argument's magnitude, so a box's gap never measures longer than the points' distance it bounds)."""
    return np.sqrt(dx * dx + dy * dy)


def _places(x: NDArray[np.float64], y: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.intp]]:
    """The distinct places of points ``x``/``y``, sorted by x then y, and each point's index among them: numpy's
    ``unique(axis=0, return_inverse=True)`` of the pairs, by a lexsort (1,600,000 points: 0.7 s against 1.7 s)."""
    order = np.lexsort((y, x))
    xs, ys = x[order], y[order]
    new = np.r_[True, (xs[1:] != xs[:-1]) | (ys[1:] != ys[:-1])] if x.size else np.zeros(0, dtype=bool)
    at = np.empty(x.size, dtype=np.intp)
    at[order] = np.cumsum(new) - 1
    return np.column_stack([xs[new], ys[new]]), at


def _strips(x: NDArray[np.float64], distance_ft: float) -> list[tuple[int, int]]:
    """Slices ``[lo, hi)`` of the places (sorted by ``x``) to triangulate: every :data:`STRIP_PLACES` of them, with
    those within ``distance_ft`` on either side."""
    n = x.size
    if n == 0:
        return []
    cuts = np.r_[np.arange(0, n, STRIP_PLACES), n]
    return [(int(np.searchsorted(x, x[a] - distance_ft, "left")), int(np.searchsorted(x, x[b - 1] + distance_ft, "right")))
            for a, b in zip(cuts[:-1], cuts[1:])]


def _short_edges(places: NDArray[np.float64], distance_ft: float) -> NDArray[np.intp]:
    """The pairs of ``places`` (distinct) at most ``distance_ft`` apart among the Delaunay triangulation's edges, or
    all such pairs from a k-d tree when qhull cannot triangulate them or leaves one out."""
    from scipy.spatial import Delaunay, QhullError, cKDTree

    if places.shape[0] >= 3:
        # in vertical strips, alternately up and down, so each point qhull adds lies near the one before
        order = _snake(places)
        try:
            # centred, so qhull's precision follows the spread of the points, not their distance from the origin
            tri = Delaunay(places[order] - places.mean(axis=0))
        except QhullError:
            tri = None
        if tri is not None and len(tri.coplanar) == 0:
            s = order[tri.simplices]
            edges = np.column_stack([np.r_[s[:, 0], s[:, 1], s[:, 2]], np.r_[s[:, 1], s[:, 2], s[:, 0]]])
            # lengths from the coordinates as given, as a neighbour search would measure them
            d = places[edges[:, 0]] - places[edges[:, 1]]
            return edges[_length(d[:, 0], d[:, 1]) <= distance_ft]
    return cKDTree(places).query_pairs(distance_ft, output_type="ndarray").astype(np.intp).reshape(-1, 2)


def _snake(xy: NDArray[np.float64]) -> NDArray[np.intp]:
    """An order of the points ``xy`` in about sqrt(n) / 8 vertical strips of equal width, up the first, down the
    next: qhull triangulates 950,000 points in it in 7.1 s against 9.0 s sorted by x (scripts/README.md)."""
    n = xy.shape[0]
    strips = max(1, int(np.sqrt(n) / 8))
    left, width = xy[:, 0].min(), np.ptp(xy[:, 0])
    strip = np.minimum((xy[:, 0] - left) / (width or 1.0) * strips, strips - 1).astype(np.intp)
    return np.lexsort((np.where(strip % 2 == 0, xy[:, 1], -xy[:, 1]), strip))


def _outline(x: NDArray[np.float64], y: NDArray[np.float64], part: NDArray[np.intp]) -> NDArray[np.bool_]:
    """Which points can be vertices of the convex hull of their part (``part``: non-decreasing, from 0, none
    skipped): all but those strictly inside the polygon of the part's extreme points in the eight
    :data:`_DIRECTIONS` (Akl and Toussaint's heuristic), so the hull of the points kept is the hull of all.

    The extreme points, taken in the directions' order, run counterclockwise round the hull; a point at least
    1e-9 of the part's extent inside each of the polygon's edges of non-zero length is strictly inside it, far
    beyond the rounding of the cross products that measure it.
    """
    if part.size == 0:
        return np.zeros(0, dtype=bool)
    corner = _extremes(x, y, part, np.flatnonzero(np.r_[True, part[1:] != part[:-1]]))
    extent = np.maximum(x[corner[0]] - x[corner[4]], y[corner[2]] - y[corner[6]])[part]
    inside = np.ones(x.size, dtype=bool)
    for k in range(len(_DIRECTIONS)):
        a, b = corner[k][part], corner[(k + 1) % len(_DIRECTIONS)][part]
        ex, ey = x[b] - x[a], y[b] - y[a]
        length = _length(ex, ey)
        cross = ex * (y - y[a]) - ey * (x - x[a])
        inside &= (length == 0) | (cross > 1e-9 * length * extent)
    keep = ~inside
    keep[corner.ravel()] = True
    return keep


@dataclass
class Areas:
    """The target areas: ``table``, one row per area, sorted by customers served, most first, with
    :data:`COLUMNS` but ``addresses`` (:func:`with_addresses` adds it); per finding, each customer's area id
    (missing where none); and each area's customers (``rows``, in the table's order)."""

    table: pd.DataFrame
    member: dict[str, pd.api.extensions.ExtensionArray]
    rows: list[NDArray[np.intp]]


def with_addresses(areas: Areas, address: NDArray[np.intp]) -> pd.DataFrame:
    """``areas``' table with :data:`COLUMNS`: each area's count of distinct mailing addresses added, from
    ``address``, a code per customer (equal codes, one address; codes from 0 up). Only the areas' customers'
    codes are read, so the others may be anything.

    Apart from :func:`target_areas` because the addresses change no area: a run counts them after its
    customers have gone to the writer."""
    per_area = [address[r] for r in areas.rows]
    seen = np.zeros(max((int(codes.max()) + 1 for codes in per_area if codes.size), default=0), dtype=bool)
    counts = []
    for codes in per_area:  # a flag per code seen: no sort or hash of the codes (millions in an area)
        seen[codes] = True
        counts.append(int(np.count_nonzero(seen)))
        seen[codes] = False
    table = areas.table.copy()
    table.insert(COLUMNS.index("addresses"), "addresses", np.array(counts, dtype=np.int64))
    return table


def target_areas(*, x: NDArray[np.float64], y: NDArray[np.float64], ft_per_unit: float, zone: NDArray[np.intp],
                 zone_names: list[str], zone_low_hgl_ft: NDArray[np.float64], ground_ft: NDArray[np.float64],
                 top_ft: NDArray[np.float64], pressures: Mapping[str, NDArray[np.float64]],
                 found: Mapping[str, NDArray[np.bool_]], ok: NDArray[np.bool_], criteria,
                 targets: TargetCriteria) -> Areas:
    """The target areas of every finding and zone.

    ``x``/``y`` are the customers' coordinates in a projected CRS (``ft_per_unit`` ft per unit), ``zone`` each
    customer's index into ``zone_names`` (-1: none) and ``zone_low_hgl_ft`` each zone's low HGL; ``top_ft`` the
    top floor's elevation (the ground for one story); ``pressures`` the psi columns of :data:`geopress.findings.WORST`
    by name; ``found`` each finding's customers; ``ok`` the customers with status ok. The table has no
    ``addresses`` yet: see :func:`with_addresses`.
    """
    k_to_units = 1.0 / ft_per_unit
    rows = []
    ok_rows = np.flatnonzero(ok & (zone >= 0))
    ok_by_x: dict[int, tuple[NDArray[np.intp], NDArray[np.float64]]] = {}  # per zone: its ok customers by x
    # a storage level's shortfall (a finding that is no status) is fixed at the tank, not by a zone-level PRV or
    # booster over an area: it gets none
    groups = []
    finite = np.isfinite(x) & np.isfinite(y)
    for finding in FINDINGS if targets.enabled else ():
        if finding in FLAGGED_STATUSES:
            found_here = np.flatnonzero(found[finding] & finite)
            zone_here = zone[found_here]
            groups.extend((finding, z, sel) for z in range(len(zone_names))
                          if (sel := found_here[zone_here == z]).size >= targets.min_customers)
    clustered = _cluster_all([(x[sel] * ft_per_unit, y[sel] * ft_per_unit) for _, _, sel in groups],
                             targets.distance_ft)
    for (finding, z, sel), labels in zip(groups, clustered):
        zname = zone_names[z]
        worst_col, worse = WORST[finding]
        served = top_ft if finding == "low_upper_floors" else ground_ft
        sizes = np.bincount(labels)
        keep = np.flatnonzero(sizes >= targets.min_customers)
        if keep.size == 0:
            continue
        if z not in ok_by_x:
            zone_ok = ok_rows[zone[ok_rows] == z]
            order = np.argsort(x[zone_ok])  # ties in any order: only the count, min and max of those inside are read
            ok_by_x[z] = zone_ok[order], x[zone_ok][order]
        ok_sorted, ok_x = ok_by_x[z]
        taken = np.flatnonzero(np.isin(labels, keep))
        part = np.searchsorted(keep, labels[taken])
        by_part = np.argsort(part, kind="stable")  # shapely groups parts given in increasing order
        members_of, part = sel[taken[by_part]], part[by_part]
        outline = _outline(x[members_of], y[members_of], part)
        hulls = shapely.buffer(shapely.convex_hull(shapely.multipoints(
            np.column_stack([x[members_of[outline]], y[members_of[outline]]]), indices=part[outline])),
            targets.distance_ft / 2.0 * k_to_units)
        for i, label in enumerate(keep):
            rows_i = sel[labels == label]
            polygon = hulls[i]
            left, bottom, right, top = polygon.bounds
            cand = ok_sorted[np.searchsorted(ok_x, left, "left"):np.searchsorted(ok_x, right, "right")]
            cand = cand[(y[cand] >= bottom) & (y[cand] <= top)]
            inside = cand[shapely.contains_xy(polygon, x[cand], y[cand])] if cand.size else cand
            everyone = np.r_[rows_i, inside]
            g = ground_ft[everyone]
            ground_min, served_max = float(np.nanmin(g)), float(np.nanmax(served[everyone]))
            is_prv = finding == "high"
            fix = _inward(feasible_hgl(served_max, ground_min, criteria,
                                       source_low_ft=float(zone_low_hgl_ft[z]) if is_prv else None))
            worst_values = pressures[worst_col][rows_i]
            rows.append({
                "finding": finding, "zone": zname, "customers": int(rows_i.size),
                "ground_ft_min": _tenth(np.nanmin(ground_ft[rows_i])),
                "ground_ft_max": _tenth(np.nanmax(ground_ft[rows_i])),
                "served_ft_max": _tenth(served_max),
                "worst_psi": _tenth(np.nanmax(worst_values) if worse == "max" else np.nanmin(worst_values)),
                "ok_inside": int(inside.size),
                "fix": "zone PRV" if is_prv else "booster",
                "hgl_ft_from": fix.hgl_ft_from, "hgl_ft_to": fix.hgl_ft_to,
                "psi_at_lowest_from": _tenth(criteria.psi_per_ft * (fix.hgl_ft_from - ground_min)),
                "psi_at_lowest_to": _tenth(criteria.psi_per_ft * (fix.hgl_ft_to - ground_min)),
                "replaces": int(rows_i.size), "note": fix.note, "geometry": polygon,
                "_first": int(rows_i[0]), "_rows": rows_i,
            })
    # most customers served first; ties in the registry's order of findings, then zone, then first customer
    rank = {f: i for i, f in enumerate(FINDINGS)}
    rows.sort(key=lambda r: (-r["customers"], rank[r["finding"]], r["zone"], r["_first"]))
    members: dict[str, NDArray[np.intp]] = {}  # of the findings with areas
    for n, r in enumerate(rows, start=1):
        r["area"] = f"T{n}"
        if r["finding"] not in members:  # one array per finding, not one per area
            members[r["finding"]] = np.full(x.size, -1, dtype=np.intp)
        members[r["finding"]][r["_rows"]] = n - 1
        del r["_first"]
    ids = [r["area"] for r in rows]
    nobody = names_at(ids or [""], np.zeros(x.size, dtype=np.intp), np.zeros(x.size, dtype=bool))
    member = {f: names_at(ids, np.maximum(members[f], 0), members[f] >= 0) if f in members else nobody.copy()
              for f in FINDINGS}
    area_rows = [r.pop("_rows") for r in rows]
    table = pd.DataFrame(rows, columns=[c for c in COLUMNS if c != "addresses"])
    return Areas(table=table, member=member, rows=area_rows)
