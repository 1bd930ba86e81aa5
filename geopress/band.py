"""Serviceable ground inside a zone: pure numpy, rasterio.features, contourpy and shapely.

A point of ground at elevation ``z`` ft is *serviceable* when its static
pressure stays within ``[min_static_psi, max_static_psi]`` at both the high
and the low HGL. Because the high HGL is at or above the low one, that is::

    psi_per_ft * (hgl_high_ft - z) <= max_static_psi   and
    psi_per_ft * (hgl_low_ft - z)  >= min_static_psi

so the serviceable ground is the elevation band ``[lower_ft, upper_ft]``
with (see :func:`limit_elevations`)::

    lower_ft = hgl_high_ft - max_static_psi / psi_per_ft   (below it: too high a pressure)
    upper_ft = hgl_low_ft  - min_static_psi / psi_per_ft   (above it: too low a pressure)

The band is empty when ``lower_ft > upper_ft`` (the operating range is wider
than the pressure window allows).

On a DEM the band is the set of pixels whose centre value lies in the band;
its polygons come from :func:`rasterio.features.shapes` over that mask
(in-memory arrays, no I/O), simplified to one pixel and clipped exactly to
the zone polygon. The limit lines are contours of the DEM at ``lower_ft``
and ``upper_ft`` (:mod:`contourpy`, linear interpolation between pixel
centres), clipped to the zone and simplified to one pixel.

Invariants (asserted by the tests): on a planar DEM the band's area equals
the exact area between the two limit lines within one pixel's width along
them, and every contour vertex lies on the limit elevation of the plane.
"""

from __future__ import annotations

from dataclasses import dataclass

import contourpy
import numpy as np
import shapely
from affine import Affine
from numpy.typing import NDArray
from pyproj import CRS, Geod
from rasterio import features

from .classify import Criteria
from .pressure import M_PER_FT

#: square feet in one acre (international acre, 43,560 sq ft by definition).
SQ_FT_PER_ACRE = 43_560.0
#: names of the two limit lines, with the elevation each one sits at.
LIMITS: dict[str, str] = {
    "max_static": "hgl_high_ft - max_static_psi / psi_per_ft: below it the high level gives more than max_static_psi",
    "min_static": "hgl_low_ft - min_static_psi / psi_per_ft: above it the low level gives less than min_static_psi",
}


def limit_elevations(hgl_high_ft: float, hgl_low_ft: float, criteria: Criteria) -> tuple[float, float]:
    """``(lower_ft, upper_ft)``: the ground elevations that bound the serviceable band.

    ``lower_ft`` is the ``max_static`` limit, ``upper_ft`` the ``min_static``
    limit; the band is empty when ``lower_ft > upper_ft``.
    """
    lower = hgl_high_ft - criteria.max_static_psi / criteria.psi_per_ft
    upper = hgl_low_ft - criteria.min_static_psi / criteria.psi_per_ft
    return lower, upper


def pixel_size(transform: Affine) -> float:
    """The larger side of one pixel, in map units."""
    return float(max(np.hypot(transform.a, transform.d), np.hypot(transform.b, transform.e)))


def zone_mask(zone: shapely.Geometry, shape: tuple[int, int], transform: Affine) -> NDArray[np.bool_]:
    """Pixels that touch ``zone`` (all_touched, so clipping to the polygon afterwards loses nothing)."""
    if zone.is_empty:
        return np.zeros(shape, dtype=bool)
    return features.geometry_mask([zone], out_shape=shape, transform=transform, all_touched=True, invert=True)


def band_mask(dem_ft: NDArray[np.floating], lower_ft: float, upper_ft: float,
              inside: NDArray[np.bool_] | None = None) -> NDArray[np.bool_]:
    """Pixels whose centre elevation lies in ``[lower_ft, upper_ft]``; NaN (nodata) is never in the band."""
    dem = np.asarray(dem_ft, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        mask = (dem >= lower_ft) & (dem <= upper_ft)
    if inside is not None:
        mask &= inside
    return mask


def mask_polygons(mask: NDArray[np.bool_], transform: Affine) -> shapely.Geometry:
    """The ``True`` pixels of ``mask`` as one (Multi)Polygon in map coordinates (pixel edges)."""
    if not mask.any():
        return shapely.MultiPolygon()
    parts = [shapely.geometry.shape(geom) for geom, _ in
             features.shapes(mask.astype(np.uint8), mask=mask, transform=transform, connectivity=4)]
    # shapes() returns disjoint connected regions, so the collection is already a valid MultiPolygon
    return shapely.MultiPolygon(parts)


#: bytes contourpy allocates per grid point it traces on: the x and y grids it makes from 1-D
#: coordinates (float64 each) and its per-point cache (uint32); z is used in place when it is
#: C-contiguous float64 (contourpy 1.3: contour_generator, common.h, base_impl.h)
CONTOUR_GRID_BYTES = 8 + 8 + 4


def contour_lines(dem_ft: NDArray[np.floating], transform: Affine, level_ft: float) -> shapely.Geometry:
    """The DEM's contour at ``level_ft`` as a MultiLineString in map coordinates.

    Vertices are linearly interpolated between pixel centres (the GDAL
    PixelIsArea convention: centre of pixel ``(row, col)`` at ``(col + 0.5,
    row + 0.5)``); NaN pixels break the lines.
    """
    z = np.asarray(dem_ft, dtype=np.float64)
    if z.shape[0] < 2 or z.shape[1] < 2:
        return shapely.MultiLineString()
    # only quads whose corners lie on both sides of the level hold the contour: trace it in
    # the box around them, with the full grid's pixel indices as coordinates (same vertices)
    with np.errstate(invalid="ignore"):
        above = z >= level_ft
        below = z < level_ft  # NaN is neither
    rows = np.flatnonzero((above.any(axis=1)[:-1] | above.any(axis=1)[1:]) & (below.any(axis=1)[:-1] | below.any(axis=1)[1:]))
    if rows.size == 0:
        return shapely.MultiLineString()
    r0, r1 = int(rows[0]), int(rows[-1]) + 2
    cols_above, cols_below = above[r0:r1].any(axis=0), below[r0:r1].any(axis=0)
    cols = np.flatnonzero((cols_above[:-1] | cols_above[1:]) & (cols_below[:-1] | cols_below[1:]))
    if cols.size == 0:
        return shapely.MultiLineString()
    c0, c1 = int(cols[0]), int(cols[-1]) + 2
    del above, below
    # contourpy copies a z that is not C-contiguous (a column slice of the grid is not) and
    # allocates CONTOUR_GRID_BYTES for every point it traces on; whole rows are a view, and the
    # quads outside the box cross no level, so tracing on them gives the same lines: take whole
    # rows unless the column box saves more than the copy costs
    if z.flags.c_contiguous and (c1 - c0) * (CONTOUR_GRID_BYTES + z.itemsize) >= z.shape[1] * CONTOUR_GRID_BYTES:
        c0, c1 = 0, z.shape[1]
    # contourpy masks the NaN (and inf) pixels itself, as masked_invalid would
    box = z[r0:r1, c0:c1]
    if box.shape[0] < 2 or box.shape[1] < 2 or not np.isfinite(box).any():
        return shapely.MultiLineString()
    gen = contourpy.contour_generator(x=np.arange(c0, c1, dtype=np.float64), y=np.arange(r0, r1, dtype=np.float64),
                                      z=box, line_type=contourpy.LineType.Separate)
    lines = []
    for xy in gen.lines(level_ft):
        if len(xy) < 2:
            continue
        x, y = transform @ (xy[:, 0] + 0.5, xy[:, 1] + 0.5)
        lines.append(shapely.LineString(np.column_stack([x, y])))
    return shapely.MultiLineString(lines)


def polygonal(geom: shapely.Geometry) -> shapely.Geometry:
    """The polygonal part of ``geom`` as a MultiPolygon."""
    parts = [g for g in shapely.get_parts(geom) if g.geom_type in ("Polygon", "MultiPolygon") and not g.is_empty]
    return shapely.MultiPolygon([p for g in parts for p in shapely.get_parts(g)])


def lineal(geom: shapely.Geometry) -> shapely.Geometry:
    """The lineal part of ``geom`` as a MultiLineString."""
    parts = [g for g in shapely.get_parts(geom) if g.geom_type in ("LineString", "MultiLineString") and not g.is_empty]
    return shapely.MultiLineString([p for g in parts for p in shapely.get_parts(g)])


@dataclass(frozen=True)
class Band:
    """The serviceable band of one zone on one DEM window, in the DEM's map coordinates.

    ``polygons`` is a MultiPolygon (empty when nothing is serviceable),
    ``limits`` maps ``"max_static"``/``"min_static"`` to MultiLineStrings.
    """

    lower_ft: float
    upper_ft: float
    polygons: shapely.Geometry
    limits: dict[str, shapely.Geometry]
    pixels: int


def zone_band(dem_ft: NDArray[np.floating], transform: Affine, zone: shapely.Geometry,
              hgl_high_ft: float, hgl_low_ft: float, criteria: Criteria) -> Band:
    """The serviceable band and limit lines of ``zone`` (in the DEM's CRS) over the DEM window.

    ``dem_ft`` is ground in ft with NaN for nodata. Polygons and lines are
    simplified to one pixel (:func:`pixel_size`) and clipped to ``zone``.
    """
    lower, upper = limit_elevations(hgl_high_ft, hgl_low_ft, criteria)
    tol = pixel_size(transform)
    mask = band_mask(dem_ft, lower, upper, zone_mask(zone, dem_ft.shape, transform))
    polys = mask_polygons(mask, transform)
    pixels = int(mask.sum())
    del mask  # before the contours, which need the most memory
    if not polys.is_empty:
        polys = polygonal(shapely.intersection(shapely.make_valid(shapely.simplify(polys, tol)), zone))
    limits = {}
    for name, level in (("max_static", lower), ("min_static", upper)):
        line = contour_lines(dem_ft, transform, level)
        if not line.is_empty:
            line = lineal(shapely.intersection(shapely.simplify(line, tol), zone))
        limits[name] = line
    return Band(lower_ft=lower, upper_ft=upper, polygons=polys, limits=limits, pixels=pixels)


def area_sq_ft(geom: shapely.Geometry, crs: CRS) -> float:
    """Area of ``geom`` in square feet.

    Projected CRS: the planar area scaled by the CRS's linear unit (metres
    per unit from the CRS, then 0.3048 m per ft). Geographic CRS: the
    geodesic area on the CRS's ellipsoid (pyproj.Geod).
    """
    if geom is None or geom.is_empty:
        return 0.0
    if crs.is_projected:
        m_per_unit = crs.axis_info[0].unit_conversion_factor
        return float(geom.area) * (m_per_unit / M_PER_FT) ** 2
    geod = crs.get_geod() or Geod(ellps="WGS84")
    area_m2, _ = geod.geometry_area_perimeter(geom)
    return abs(area_m2) / M_PER_FT**2
