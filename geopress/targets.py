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


def cluster_labels(x_ft: NDArray[np.float64], y_ft: NDArray[np.float64], distance_ft: float) -> NDArray[np.intp]:
    """Single-linkage labels of points in ft at ``distance_ft``: two points at most ``distance_ft`` apart share one,
    and so does a chain of them (DBSCAN's with ``min_samples = 1``). Labels count from 0 in order of each
    cluster's first point.

    The clusters are the connected components of the Delaunay triangulation's edges no longer than
    ``distance_ft`` (scipy's qhull and csgraph). A Euclidean minimum spanning tree lies within the relative
    neighbourhood graph, which lies within the Delaunay triangulation, and any two points at most ``distance_ft``
    apart are joined by its path, whose every edge is at most that long: so the components are exactly those of the
    points within ``distance_ft`` of each other. The triangulation gives about three edges a point whatever the
    density, where a neighbour search finds every point within the distance (hundreds a customer in a dense
    subdivision).

    Points at one place are triangulated once. More than :data:`STRIP_PLACES` places are split by x into strips
    of that many, each triangulated with the places within ``distance_ft`` of it on either side: a spanning-tree
    edge no longer than the distance has both ends in the widened strip of its left end, and stays an edge of
    that strip's relative neighbourhood graph (the lune between its ends is empty of all points, so of the
    strip's), hence of its triangulation; every edge kept joins two points within the distance. When qhull cannot
    triangulate a set (fewer than three places, all on a line) or leaves a place out as too close to another for
    its precision, the pairs within the distance come from a k-d tree instead.
    """
    return _cluster_all([(x_ft, y_ft)], distance_ft)[0]


def _cluster_all(points: list[tuple[NDArray[np.float64], NDArray[np.float64]]], distance_ft: float,
                 ) -> list[NDArray[np.intp]]:
    """:func:`cluster_labels` of each set of points, in order. qhull releases the GIL, so the strips of every set
    are triangulated in threads, one per core, the largest first (scripts/README.md)."""
    from scipy.sparse import coo_array
    from scipy.sparse.csgraph import connected_components

    sets = [_places(x, y) for x, y in points]
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
    for i, (places, at) in enumerate(sets):
        edges = np.concatenate([e for (j, _, _), e in zip(strips, found) if j == i] or [np.zeros((0, 2), np.intp)])
        n = places.shape[0]
        graph = coo_array((np.ones(len(edges), dtype=np.int8), (edges[:, 0], edges[:, 1])), shape=(n, n))
        labels = connected_components(graph, directed=False)[1][at.ravel()] if n else np.zeros(0, dtype=np.intp)
        # renumbered in order of each cluster's first point
        _, first = np.unique(labels, return_index=True)
        rank = np.empty(first.size, dtype=np.intp)
        rank[np.argsort(first)] = np.arange(first.size)
        out.append(rank[labels])
    return out


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
            return edges[np.sqrt(d[:, 0] * d[:, 0] + d[:, 1] * d[:, 1]) <= distance_ft]
    return cKDTree(places).query_pairs(distance_ft, output_type="ndarray").astype(np.intp).reshape(-1, 2)


def _snake(xy: NDArray[np.float64]) -> NDArray[np.intp]:
    """An order of the points ``xy`` in about sqrt(n) / 8 vertical strips of equal width, up the first, down the
    next: qhull triangulates 950,000 points in it in 7.1 s against 9.0 s sorted by x (scripts/README.md)."""
    n = xy.shape[0]
    strips = max(1, int(np.sqrt(n) / 8))
    left, width = xy[:, 0].min(), np.ptp(xy[:, 0])
    strip = np.minimum((xy[:, 0] - left) / (width or 1.0) * strips, strips - 1).astype(np.intp)
    return np.lexsort((np.where(strip % 2 == 0, xy[:, 1], -xy[:, 1]), strip))


@dataclass
class Areas:
    """The target areas (``table``: one row per area, :data:`COLUMNS`, sorted by customers served, most first)
    and, per finding, each customer's area id (missing where none)."""

    table: pd.DataFrame
    member: dict[str, pd.api.extensions.ExtensionArray]


def target_areas(*, x: NDArray[np.float64], y: NDArray[np.float64], ft_per_unit: float, zone: NDArray[np.intp],
                 zone_names: list[str], zone_low_hgl_ft: NDArray[np.float64], ground_ft: NDArray[np.float64],
                 top_ft: NDArray[np.float64], pressures: Mapping[str, NDArray[np.float64]],
                 found: Mapping[str, NDArray[np.bool_]], ok: NDArray[np.bool_], address: NDArray[np.intp],
                 criteria, targets: TargetCriteria) -> Areas:
    """The target areas of every finding and zone.

    ``x``/``y`` are the customers' coordinates in a projected CRS (``ft_per_unit`` ft per unit), ``zone`` each
    customer's index into ``zone_names`` (-1: none) and ``zone_low_hgl_ft`` each zone's low HGL; ``top_ft`` the
    top floor's elevation (the ground for one story); ``pressures`` the psi columns of :data:`geopress.findings.WORST`
    by name; ``found`` each finding's customers; ``ok`` the customers with status ok; ``address`` a code per
    customer's mailing address (equal codes, one address).
    """
    k_to_units = 1.0 / ft_per_unit
    rows = []
    members = {finding: np.full(x.size, -1, dtype=np.intp) for finding in FINDINGS}
    ok_rows = np.flatnonzero(ok & (zone >= 0))
    # a storage level's shortfall (a finding that is no status) is fixed at the tank, not by a zone-level PRV or
    # booster over an area: it gets none
    groups = [] if not targets.enabled else [
        (finding, z, sel) for finding in FINDINGS if finding in FLAGGED_STATUSES for z in range(len(zone_names))
        if (sel := np.flatnonzero(found[finding] & (zone == z) & np.isfinite(x) & np.isfinite(y))).size
        >= targets.min_customers]
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
        zone_ok = ok_rows[zone[ok_rows] == z]
        order = np.argsort(x[zone_ok], kind="stable")
        ok_sorted, ok_x = zone_ok[order], x[zone_ok][order]
        taken = np.flatnonzero(np.isin(labels, keep))
        part = np.searchsorted(keep, labels[taken])
        by_part = np.argsort(part, kind="stable")  # shapely groups parts given in increasing order
        members_of = sel[taken[by_part]]
        hulls = shapely.buffer(shapely.convex_hull(shapely.multipoints(
            np.column_stack([x[members_of], y[members_of]]), indices=part[by_part])),
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
                "addresses": int(np.unique(address[rows_i]).size),
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
    for n, r in enumerate(rows, start=1):
        r["area"] = f"T{n}"
        members[r["finding"]][r.pop("_rows")] = n - 1
        del r["_first"]
    ids = [r["area"] for r in rows]
    member = {f: names_at(ids or [""], np.maximum(m, 0), m >= 0) for f, m in members.items()}
    table = pd.DataFrame(rows, columns=list(COLUMNS))
    return Areas(table=table, member=member)
