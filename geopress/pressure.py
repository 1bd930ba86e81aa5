"""Units, HGL sources and static pressure: pure functions over numpy arrays.

Lengths are feet unless a name says otherwise; pressures are psi (gauge).

Invariants (asserted by the tests):

* static pressure is linear in elevation with slope ``-psi_per_ft``;
* it is zero exactly where the elevation equals the HGL;
* NaN elevations (no terrain) give NaN pressures, never a made-up number.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, Union

import numpy as np
from numpy.typing import ArrayLike, NDArray

#: metres in one international foot, exact by definition (US Federal Register 2020-21902).
M_PER_FT = 0.3048
#: metres in one US survey foot, exact by definition (1200/3937 m).
M_PER_US_FT = 1200.0 / 3937.0
#: default psi per foot of water column (common practice; 62.4 lb/ft3 / 144 in2/ft2).
DEFAULT_PSI_PER_FT = 0.433
#: standard gravity, m/s2, exact (3rd CGPM, 1901).
STANDARD_GRAVITY = 9.80665
#: kPa per metre of water at 1000 kg/m3 and standard gravity.
KPA_PER_M_WATER = 1000.0 * STANDARD_GRAVITY / 1000.0
#: pascals in one psi (NIST SP 811): 0.45359237 kg * 9.80665 / (0.0254 m)^2.
PA_PER_PSI = 0.45359237 * STANDARD_GRAVITY / 0.0254**2


_FT_PER_UNIT: dict[str, float] = {
    "ft": 1.0,
    "m": 1.0 / M_PER_FT,
    "us_ft": M_PER_US_FT / M_PER_FT,
}

VERTICAL_UNITS: tuple[str, ...] = tuple(_FT_PER_UNIT)


def feet_per_unit(unit: str) -> float:
    """International feet in one ``unit`` ("m", "ft" or "us_ft")."""
    try:
        return _FT_PER_UNIT[unit]
    except KeyError:
        raise ValueError(f"unknown vertical unit {unit!r}; use one of {', '.join(VERTICAL_UNITS)}") from None


def to_feet(values: ArrayLike, unit: str) -> NDArray[np.float64]:
    """Convert lengths in ``unit`` to international feet (float64, NaN kept)."""
    return np.asarray(values, dtype=np.float64) * feet_per_unit(unit)


def psi_to_kpa(psi: ArrayLike) -> NDArray[np.float64]:
    """Pressure in kPa from psi (exact NIST factor)."""
    return np.asarray(psi, dtype=np.float64) * (PA_PER_PSI / 1000.0)


def head_ft_for_psi(psi: ArrayLike, psi_per_ft: float = DEFAULT_PSI_PER_FT) -> NDArray[np.float64]:
    """Feet of water column that give ``psi``; the inverse of :func:`static_psi`'s slope."""
    return np.asarray(psi, dtype=np.float64) / psi_per_ft


def static_psi(hgl_ft: ArrayLike, elevation_ft: ArrayLike, psi_per_ft: float = DEFAULT_PSI_PER_FT) -> NDArray[np.float64]:
    """Static gauge pressure, psi, at ``elevation_ft`` below a grade line ``hgl_ft``.

    ``psi_per_ft * (hgl_ft - elevation_ft)``; negative where the point is above
    the HGL (no gravity service), NaN where either input is NaN.
    """
    return psi_per_ft * (np.asarray(hgl_ft, dtype=np.float64) - np.asarray(elevation_ft, dtype=np.float64))


@dataclass(frozen=True)
class TankSource:
    """A zone fed by an elevated tank; the HGL is the water surface, ft.

    ``high_water_ft`` and ``low_water_ft`` are the normal operating levels (the
    bottom of operational and of equalizing storage). Optional, ft: the
    ``overflow_ft`` and the tank's ``bottom_ft`` (what the tank can hold), and
    the bottoms of its fire suppression and standby storage,
    ``fire_bottom_ft`` and ``standby_bottom_ft`` (the levels with that storage
    used too), between ``bottom_ft`` and ``low_water_ft``.
    """

    zone: str
    high_water_ft: float
    low_water_ft: float
    #: one standard uncertainty of the HGL, ft (level sensor, datum of the records); 0 when not known
    hgl_uncertainty_ft: float = 0.0
    overflow_ft: float | None = None
    bottom_ft: float | None = None
    fire_bottom_ft: float | None = None
    standby_bottom_ft: float | None = None
    kind: Literal["tank"] = "tank"

    def hgl_range(self, psi_per_ft: float) -> tuple[float, float]:
        """(high, low) HGL in ft."""
        return (self.high_water_ft, self.low_water_ft)


@dataclass(frozen=True)
class PrvSource:
    """A zone fed through a pressure-reducing valve: HGL = valve elevation + setting head.

    Optional inlet side: ``inlet_zone`` (the zone upstream, whose HGL range
    feeds the valve) or ``inlet_hgl_ft`` (a fixed inlet HGL, ft); at most one.
    """

    zone: str
    valve_elevation_ft: float
    setting_psi: float
    #: one standard uncertainty of the HGL, ft (the valve's setting drift, its surveyed elevation); 0 when not known
    hgl_uncertainty_ft: float = 0.0
    inlet_zone: str | None = None
    inlet_hgl_ft: float | None = None
    kind: Literal["prv"] = "prv"

    def hgl_range(self, psi_per_ft: float) -> tuple[float, float]:
        """(high, low) HGL in ft; both equal ``valve_elevation_ft + setting_psi / psi_per_ft``."""
        hgl = self.valve_elevation_ft + self.setting_psi / psi_per_ft
        return (hgl, hgl)


@dataclass(frozen=True)
class PumpSource:
    """A closed zone held by a booster station at a discharge HGL, ft.

    Optional, ft: ``no_demand_hgl_ft``, the HGL the closed zone rises to at no
    demand (towards the pump's shutoff head, or the discharge setting plus its
    control band), which makes the zone's HGL a range like a tank's; and
    ``shutoff_hgl_ft``, the highest HGL the station can make (suction HGL plus
    the shutoff head), which bounds the settings considered.
    """

    zone: str
    discharge_hgl_ft: float
    #: one standard uncertainty of the HGL, ft (the discharge gauge, its elevation); 0 when not known
    hgl_uncertainty_ft: float = 0.0
    no_demand_hgl_ft: float | None = None
    shutoff_hgl_ft: float | None = None
    kind: Literal["pump"] = "pump"

    def hgl_range(self, psi_per_ft: float) -> tuple[float, float]:
        """(high, low) HGL in ft: (``no_demand_hgl_ft``, discharge), both the discharge HGL without it."""
        high = self.discharge_hgl_ft if self.no_demand_hgl_ft is None else self.no_demand_hgl_ft
        return (high, self.discharge_hgl_ft)


Source = Union[TankSource, PrvSource, PumpSource]


@dataclass(frozen=True)
class Pressures:
    """Per-customer static pressures, psi; NaN where not computable."""

    psi_max: NDArray[np.float64]
    psi_min: NDArray[np.float64]
    psi_top: NDArray[np.float64]


def customer_pressures(
    ground_ft: ArrayLike,
    hgl_high_ft: ArrayLike,
    hgl_low_ft: ArrayLike,
    floors: ArrayLike,
    *,
    psi_per_ft: float = DEFAULT_PSI_PER_FT,
    floor_height_ft: float = 10.0,
) -> Pressures:
    """Pressure range at ground and at the top floor.

    ``psi_max`` is at ground with the high HGL, ``psi_min`` at ground with the
    low HGL; ``psi_top`` is at the top floor, ``ground + (floors - 1) *
    floor_height_ft``, with the low HGL, and NaN where ``floors <= 1`` or
    unknown (NaN).
    """
    ground = np.asarray(ground_ft, dtype=np.float64)
    floors_arr = np.asarray(floors, dtype=np.float64)
    psi_max = static_psi(hgl_high_ft, ground, psi_per_ft)
    psi_min = static_psi(hgl_low_ft, ground, psi_per_ft)
    multi = floors_arr > 1  # NaN compares False
    top_ft = ground + (np.where(multi, floors_arr, 1.0) - 1.0) * floor_height_ft
    psi_top = np.where(multi, static_psi(hgl_low_ft, top_ft, psi_per_ft), np.nan)
    return Pressures(psi_max=psi_max, psi_min=psi_min, psi_top=psi_top)
