"""Storage levels: static pressure with a zone's storage drawn down, pure.

A tank's volume is split, from the top, into operational, equalizing,
standby and fire suppression storage, over dead storage (Washington DOH Water
System Design Manual, chapter 9; the order of standby and fire storage varies
and they may be nested). geopress takes the HGL of a zone at three such levels:

=========  ====================================================  ===================
level      HGL of the zone                                       minimum (criteria)
=========  ====================================================  ===================
peak_hour  its low HGL: a tank at the bottom of equalizing       ``peak_hour_min_psi``
           storage (``low_water_ft``), a PRV's or pump's HGL
fire       a tank at ``fire_bottom_ft``: fire suppression and    ``fire_min_psi``
           equalizing storage used
standby    a tank at ``standby_bottom_ft``: standby and          ``standby_min_psi``
           equalizing storage used
=========  ====================================================  ===================

A PRV zone whose ``inlet_zone`` has the level gets the lower of its own HGL
and its inlet's HGL at that level (a valve cannot hold its setting above its
inlet). Zones without the level are not checked at it. A customer falls short
at a level when its static pressure at ground there is below the level's
minimum; a level whose minimum is None is off.

Invariants (asserted by the tests): pressure at a level is
``psi_per_ft * (level HGL - ground)``; falling short is monotone in ground
(raising the ground never clears it) and never holds where the level or the
ground is unknown (NaN).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .pressure import PrvSource, Source, TankSource, static_psi


@dataclass(frozen=True)
class Level:
    """One storage level: its ``name``, the criteria key of its minimum (psi), the per-customer pressure
    column it is read from, and what the level means, for sentences."""

    name: str
    minimum: str
    column: str
    meaning: str


LEVELS: tuple[Level, ...] = (
    Level("peak_hour", "peak_hour_min_psi", "psi_min", "at peak hour with equalizing storage used"),
    Level("fire", "fire_min_psi", "psi_fire", "with fire suppression and equalizing storage used"),
    Level("standby", "standby_min_psi", "psi_standby", "with standby and equalizing storage used"),
)
BY_NAME: dict[str, Level] = {lv.name: lv for lv in LEVELS}
#: tank key of each level below the low water
_TANK_KEY = {"fire": "fire_bottom_ft", "standby": "standby_bottom_ft"}


def level_hgl_ft(level: str, src: Source, sources: Mapping[str, Source], psi_per_ft: float,
                 _seen: frozenset[str] = frozenset()) -> float | None:
    """The HGL, ft, of ``src``'s zone at ``level``, or None when the zone has no such level.

    ``sources`` maps each zone to its source, for a PRV's ``inlet_zone``.
    """
    high, low = src.hgl_range(psi_per_ft)
    if level == "peak_hour":
        return low
    if isinstance(src, TankSource):
        return getattr(src, _TANK_KEY[level])
    if isinstance(src, PrvSource) and src.inlet_zone in sources and src.zone not in _seen:
        inlet = level_hgl_ft(level, sources[src.inlet_zone], sources, psi_per_ft, _seen | {src.zone})
        return None if inlet is None else min(low, inlet)
    return None


def zone_levels(level: str, sources: Sequence[Source], psi_per_ft: float) -> dict[str, float]:
    """Each zone that has ``level``, with its HGL there, ft."""
    by_zone = {s.zone: s for s in sources}
    found = {s.zone: level_hgl_ft(level, s, by_zone, psi_per_ft) for s in sources}
    return {z: h for z, h in found.items() if h is not None}


def active(criteria: object, sources: Sequence[Source]) -> list[Level]:
    """The levels checked: those whose minimum is set and that some zone has."""
    psi_per_ft = getattr(criteria, "psi_per_ft")
    return [lv for lv in LEVELS
            if getattr(criteria, lv.minimum) is not None and zone_levels(lv.name, sources, psi_per_ft)]


def level_psi(ground_ft: ArrayLike, zone_index: ArrayLike, zone_names: Sequence[str], levels: Mapping[str, float],
              psi_per_ft: float) -> NDArray[np.float64]:
    """Per customer, static pressure at ground with its zone at the level, psi.

    ``zone_index`` indexes ``zone_names`` (-1: no zone); ``levels`` maps a zone to its HGL at the level, ft.
    NaN where the zone has no such level, there is no zone, or the ground is unknown.
    """
    zi = np.asarray(zone_index, dtype=np.intp)
    per_zone = np.array([levels.get(z, np.nan) for z in zone_names] or [np.nan], dtype=np.float64)
    hgl = np.where(zi >= 0, per_zone[np.maximum(zi, 0)], np.nan)
    return static_psi(hgl, ground_ft, psi_per_ft)


def short(psi: ArrayLike, minimum_psi: float) -> NDArray[np.bool_]:
    """Whether the pressure at a level is below its minimum (NaN: not checked, so False)."""
    return np.asarray(psi, dtype=np.float64) < minimum_psi


def level_columns(ground_ft: ArrayLike, zone_index: ArrayLike, zone_names: Sequence[str], criteria: object,
                  sources: Sequence[Source]) -> dict[str, NDArray[np.float64]]:
    """The per-customer pressure column of each level checked that has one of its own (``psi_fire``,
    ``psi_standby``; peak hour reads ``psi_min``), by column name. Arguments as in :func:`level_psi`."""
    k = getattr(criteria, "psi_per_ft")
    return {lv.column: level_psi(ground_ft, zone_index, zone_names, zone_levels(lv.name, sources, k), k)
            for lv in active(criteria, sources) if lv.column != "psi_min"}


def record(criteria: object, sources: Sequence[Source]) -> list[dict[str, object]]:
    """Each level whose minimum is set, for run.json: its minimum (psi), whether it is checked, and each zone
    that has it with its HGL there (ft). A level no zone has checks nobody: the record says so."""
    k = getattr(criteria, "psi_per_ft")
    out = []
    for lv in LEVELS:
        minimum = getattr(criteria, lv.minimum)
        if minimum is None:
            continue
        zones = zone_levels(lv.name, sources, k)
        out.append({"level": lv.name, "minimum_psi": minimum, "checked": bool(zones),
                    "zones": {z: round(h, 2) for z, h in zones.items()}})
    return out
