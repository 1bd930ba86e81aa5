"""Point-in-polygon assignment of customers to pressure zones.

Tie rule, deterministic and independent of feature order in the layer:

1. a polygon that contains the point in its interior beats one that has the
   point only on its boundary;
2. among polygons that tie on (1) -- a point on a shared boundary, or inside
   an overlap -- the zone whose source is listed first in the config's
   ``[[zones.source]]`` wins (its ``priority`` is lowest).

The join is made in the zones' own CRS (:func:`assign_xy`): the customers'
points are reprojected, never the polygons, whose straight edges would become
chords of the true boundary in another CRS and move the tie.

Pure: shapely geometry arrays in, index arrays out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import shapely
from numpy.typing import ArrayLike, NDArray
from pyproj import CRS, Transformer


def assign(points: ArrayLike, polygons: ArrayLike, priority: ArrayLike) -> NDArray[np.intp]:
    """Index of the polygon each point belongs to, -1 for none.

    ``priority`` holds one integer per polygon, lower wins ties (rule 2).
    Missing or empty points get -1.
    """
    pts = np.asarray(points, dtype=object)
    polys = np.asarray(polygons, dtype=object)
    prio = np.asarray(priority, dtype=np.int64)
    result = np.full(pts.shape[0], -1, dtype=np.intp)
    if pts.size == 0 or polys.size == 0:
        return result
    tree = shapely.STRtree(polys)
    # bounding boxes first, then the exact test against prepared polygons: same pairs as
    # query(predicate="intersects"), several times faster for many points
    pt_idx, poly_idx = tree.query(pts)
    shapely.prepare(polys)
    hit = shapely.intersects(polys[poly_idx], pts[pt_idx])
    pt_idx, poly_idx = pt_idx[hit], poly_idx[hit]
    if pt_idx.size == 0:
        return result
    counts = np.bincount(pt_idx, minlength=pts.shape[0])
    single = counts[pt_idx] == 1
    result[pt_idx[single]] = poly_idx[single]
    multi = ~single
    if multi.any():
        mp, mq = pt_idx[multi], poly_idx[multi]
        on_boundary = ~shapely.contains(polys[mq], pts[mp])
        # lexsort: last key is primary -> by point, then boundary-ness, then priority
        order = np.lexsort((mq, prio[mq], on_boundary, mp))
        mp, mq = mp[order], mq[order]
        first = np.r_[True, mp[1:] != mp[:-1]]
        result[mp[first]] = mq[first]
    return result


#: points made into shapely geometries at a time by :func:`assign_xy` (about 200 bytes each while they live)
POINTS_AT_A_TIME = 262_144


def assign_xy(x: ArrayLike, y: ArrayLike, crs: CRS, polygons: ArrayLike, polygons_crs: CRS,
              priority: ArrayLike) -> NDArray[np.intp]:
    """:func:`assign` for map points ``x``, ``y`` in ``crs`` (NaN for none), made in ``polygons_crs``,
    :data:`POINTS_AT_A_TIME` points at a time."""
    x, y = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
    have = np.flatnonzero(~np.isnan(x) & ~np.isnan(y))
    px, py = x[have], y[have]
    if not crs.equals(polygons_crs):
        px, py = Transformer.from_crs(crs, polygons_crs, always_xy=True).transform(px, py)
    result = np.full(x.shape, -1, dtype=np.intp)
    polygons = np.asarray(polygons, dtype=object)
    for start in range(0, have.size, POINTS_AT_A_TIME):
        at = slice(start, start + POINTS_AT_A_TIME)
        result[have[at]] = assign(shapely.points(px[at], py[at]), polygons, priority)
    return result


@dataclass(frozen=True)
class Overlap:
    """Two zones whose polygons share area (in the zones' CRS units squared)."""

    zone_a: str
    zone_b: str
    area: float


def overlaps(polygons: ArrayLike, zone_ids: ArrayLike, *, min_area: float = 0.0) -> list[Overlap]:
    """Pairs of different zones whose polygons overlap by more than ``min_area``.

    Polygons that merely touch along an edge do not overlap.
    """
    polys = np.asarray(polygons, dtype=object)
    ids = np.asarray(zone_ids, dtype=object)
    if polys.size < 2:
        return []
    tree = shapely.STRtree(polys)
    a, b = tree.query(polys, predicate="intersects")
    keep = (a < b) & (ids[a] != ids[b])
    a, b = a[keep], b[keep]
    areas = shapely.area(shapely.intersection(polys[a], polys[b]))
    found: dict[tuple[str, str], float] = {}
    for i, j, area in zip(a, b, areas):
        if area > min_area:
            key = tuple(sorted((str(ids[i]), str(ids[j]))))
            found[key] = found.get(key, 0.0) + float(area)
    return [Overlap(za, zb, area) for (za, zb), area in sorted(found.items())]


def repair(polygons: ArrayLike) -> tuple[NDArray[np.object_], NDArray[np.intp]]:
    """Make invalid polygons valid; returns the polygons and the indices repaired.

    Uses :func:`shapely.make_valid` and keeps only the polygonal part of the
    repaired geometry (a bow-tie becomes a two-part MultiPolygon).
    """
    polys = np.asarray(polygons, dtype=object).copy()
    bad = np.flatnonzero(~shapely.is_valid(polys))
    for i in bad:
        fixed = shapely.make_valid(polys[i])
        if fixed.geom_type == "GeometryCollection":
            parts = [g for g in shapely.get_parts(fixed) if g.geom_type in ("Polygon", "MultiPolygon")]
            fixed = shapely.union_all(parts) if parts else shapely.Polygon()
        polys[i] = fixed
    return polys, bad
