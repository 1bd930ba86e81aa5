"""Checks that the inputs fit together, from the sampled ground and the zone join: pure numpy.

A run and ``geopress check`` apply the same guards (:mod:`geopress.pipeline`):

* **coverage**: fewer than :data:`MIN_COVERED_SHARE` of the located customers on any
  raster, or in any zone, cannot be a usable run (a DEM or a zone layer in the wrong CRS,
  or the wrong area): an error;
* **ground on Earth**: sampled ground below :data:`EARTH_LOW_FT` or above
  :data:`EARTH_HIGH_FT` is not ground (a wrong unit, an undeclared nodata value): an error;
* **ground against the HGL** (:meth:`ZoneGround.suspicion`): a zone whose median customer
  is at or above the zone's low HGL, or more than :data:`MAX_DEPTH_FT` below its high HGL,
  almost always means a wrong vertical unit or datum: a warning naming
  ``terrain.vertical_units`` and ``terrain.datum_offset_ft``, with what the pressures would
  be in the other units.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from .pressure import VERTICAL_UNITS, feet_per_unit

#: lowest ground, ft: the shore of the Dead Sea, about 430 m (1,410 ft) below sea level, is the lowest
#: dry land (from memory); 1,500 ft leaves room for the DEM's own error.
EARTH_LOW_FT = -1_500.0
#: highest ground, ft: Mount Everest, 8,848.86 m (29,031.7 ft; from memory).
EARTH_HIGH_FT = 29_100.0
#: below this share of the located customers on the rasters, or in the zones, a run is refused
#: (common practice, no source: a partial DEM or zone layer is a setup error, not a nightly result).
MIN_COVERED_SHARE = 0.5
#: a zone's median customer this far below the high HGL, ft, is suspect: 300 ft is 130 psi at
#: 0.433 psi/ft, above the 125 psig most a service connection may see under Maryland COMAR
#: 20.70.07.02 (and the "usually 90 to 110 psi" maximum of AWWA M32, as quoted in a master plan).
MAX_DEPTH_FT = 300.0
#: the percentiles of ground listed per zone
PERCENTILES = (0.0, 5.0, 50.0, 95.0, 100.0)


@dataclass(frozen=True)
class ZoneGround:
    """One zone's customers' ground against its HGL.

    ``ground_ft`` holds the min, 5th percentile, median, 95th percentile and max
    (NaN when no customer of the zone has ground).
    """

    zone: str
    customers: int
    ground_ft: tuple[float, float, float, float, float]
    hgl_high_ft: float
    hgl_low_ft: float

    @property
    def median_ft(self) -> float:
        return self.ground_ft[2]

    def psi_range(self, psi_per_ft: float) -> tuple[float, float]:
        """The zone's static pressure range, psi: at its highest customer with the low HGL,
        and at its lowest customer with the high HGL."""
        return psi_per_ft * (self.hgl_low_ft - self.ground_ft[4]), psi_per_ft * (self.hgl_high_ft - self.ground_ft[0])

    def suspicion(self) -> str | None:
        """Why the zone's ground looks wrong against its HGL, or None.

        "at or above the low HGL" when the median customer gets no gravity service;
        "far below the high HGL" when it lies more than :data:`MAX_DEPTH_FT` below it.
        """
        median = self.median_ft
        if np.isnan(median):
            return None
        if median >= self.hgl_low_ft:
            return "at or above the low HGL"
        if self.hgl_high_ft - median > MAX_DEPTH_FT:
            return "far below the high HGL"
        return None


def zone_grounds(ground_ft: ArrayLike, zone_index: ArrayLike, zone_names: list[str],
                 hgl_ft: dict[str, tuple[float, float]]) -> list[ZoneGround]:
    """One :class:`ZoneGround` per zone name, in the order of ``zone_names``.

    ``zone_index`` holds each customer's index into ``zone_names`` (-1 unzoned);
    ``hgl_ft`` maps a zone to its (high, low) HGL. NaN ground is left out.
    """
    ground = np.asarray(ground_ft, dtype=np.float64)
    zi = np.asarray(zone_index)
    keep = ~np.isnan(ground) & (zi >= 0)
    order = np.argsort(zi[keep], kind="stable")
    values, codes = ground[keep][order], zi[keep][order]
    bounds = np.searchsorted(codes, np.arange(len(zone_names) + 1))
    out = []
    for i, zone in enumerate(zone_names):
        vals = values[bounds[i]:bounds[i + 1]]
        stats = tuple(float(v) for v in np.percentile(vals, PERCENTILES)) if vals.size else (np.nan,) * 5
        high, low = hgl_ft[zone]
        out.append(ZoneGround(zone=zone, customers=int(np.count_nonzero(zi == i)), ground_ft=stats,
                              hgl_high_ft=high, hgl_low_ft=low))
    return out


def outside_earth(low_ft: float, high_ft: float) -> bool:
    """Whether a raster's sampled ground range (ft) leaves what the Earth has."""
    return bool(low_ft < EARTH_LOW_FT or high_ft > EARTH_HIGH_FT)


def too_little(covered: int, located: int) -> bool:
    """Whether ``covered`` of ``located`` customers is less than :data:`MIN_COVERED_SHARE` (False with none located)."""
    return located > 0 and covered < MIN_COVERED_SHARE * located


def in_other_units(ground_ft: float, unit: str, offset_ft: float = 0.0) -> dict[str, float]:
    """``ground_ft`` (ft, the datum offset ``offset_ft`` included) had the DEM's values been in each
    vertical unit other than ``unit``."""
    raw = (ground_ft - offset_ft) / feet_per_unit(unit)
    return {u: raw * feet_per_unit(u) + offset_ft for u in VERTICAL_UNITS if u != unit}
