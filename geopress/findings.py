"""The one registry of statuses and findings: pure, no I/O.

Every status a customer can have is one :class:`Status` entry of
:data:`REGISTRY`, in precedence order: its name, its condition, its reason
sentence, its map style and, for a status that flags a customer for
follow-up, its :class:`Finding` (output layer, mailing list, "worst"
column). Classification (:mod:`geopress.classify`), the mailing lists and
zone summary (:mod:`geopress.tables`), change tracking, planning, the
report, the layer styles and the tests read it from here. Adding a finding
is one entry here (and its test): its layer, list, ``new_`` list, column,
counts, style and legend follow.

A customer's **findings** are every flagged entry whose condition holds (a
``finding_<name>`` boolean column each), so a customer can be on several
lists; its **status** is the first entry whose condition holds, ``ok`` when
none does. Findings are evaluated only for customers located, on the terrain
and in a zone (the first three statuses say why the others cannot be).

Each finding names one remedy, so its conditions are written not to overlap
where the remedy would repeat: ``low`` is a street pressure above zero and
below the minimum (at or below zero is ``above_hgl``, whose letter covers
it); ``low_upper_floors`` is a top floor below the minimum where the street
meets it (a low street's letter covers its upper floors). ``high`` overlaps
with each of them: a tall building with 85 psi at the street and 30 psi on
its top floor is both ``high`` and ``low_upper_floors``; a wide tank range
can give ``high`` at high water and ``low`` at low water.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, NamedTuple

import numpy as np
from numpy.typing import NDArray

from . import storage

#: Okabe-Ito colours (Okabe and Ito, "Color Universal Design", 2008), by name.
OKABE_ITO = {
    "black": "#000000", "orange": "#E69F00", "sky_blue": "#56B4E9", "bluish_green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "reddish_purple": "#CC79A7",
}


class Style(NamedTuple):
    """How a status is drawn: on the static maps (matplotlib ``marker``) and the interactive one (plotly ``symbol``)."""

    colour: str
    marker: str
    label: str
    symbol: str
    #: marker area on the static maps, points squared; the interactive map's diameter in px follows its square root
    size: float
    #: the marker's shape as a character, for the tables
    glyph: str


@dataclass(frozen=True)
class Values:
    """What a condition reads, one array entry per customer: psi from :func:`geopress.pressure.customer_pressures`,
    ground ft, and the criteria (a :class:`geopress.classify.Criteria`). ``extra`` holds any further per-customer
    arrays a condition needs, by name."""

    has_geometry: NDArray[np.bool_]
    ground_ft: NDArray[np.float64]
    zoned: NDArray[np.bool_]
    psi_min: NDArray[np.float64]
    psi_max: NDArray[np.float64]
    psi_top: NDArray[np.float64]
    criteria: Any
    extra: Mapping[str, NDArray] = field(default_factory=dict)


@dataclass(frozen=True)
class Finding:
    """What a flagged status adds: its output layer (GeoPackage view and mailing list of that name, and
    ``new_<layer>``), the pressure column that is worst for it with whether its ``max`` or ``min`` is worse,
    and the ``threshold`` (psi, from the criteria) that column is judged against."""

    layer: str
    worst: str
    worse: str
    threshold: Callable[[Any], float]

    def margin(self, worst: NDArray[np.float64], criteria: Any) -> NDArray[np.float64]:
        """How far ``worst`` (the values of the worst column) lies beyond the threshold, psi: positive on the
        flagged side (above it for ``max``, below it for ``min``)."""
        limit = self.threshold(criteria)
        return worst - limit if self.worse == "max" else limit - worst


@dataclass(frozen=True)
class Status:
    """One status: ``condition`` (None for ``ok``, the default), the reason ``sentence`` (a template for
    str.format with the criteria as ``lo`` and ``hi`` and the ``numbers`` of :func:`geopress.classify.reasons`
    filling its ``{}`` in order), its ``style``, its drawing ``layer_order`` on the maps (lowest first) and,
    when it flags a customer, its :class:`Finding`. An entry with ``is_status`` False is a finding only: it
    never becomes a customer's status (the storage levels: emergencies, not normal operation), so it is on no
    status map, only in its own layer, list and column; its style draws that layer."""

    name: str
    condition: Callable[[Values], NDArray[np.bool_]] | None
    sentence: str
    numbers: tuple[str, ...]
    style: Style
    layer_order: int
    finding: Finding | None = None
    is_status: bool = True

    @property
    def column(self) -> str:
        """The customer's boolean column for this finding."""
        return f"finding_{self.name}"

    @property
    def area_column(self) -> str:
        """The customer's column naming its target area of this finding (geopress.targets), missing where none."""
        return f"target_area_{self.name}"


def _short_at(v: Values, level: str) -> NDArray[np.bool_]:
    """Whether the pressure at a storage level (:mod:`geopress.storage`) is below its minimum: nowhere when the
    minimum is off (None) or no zone has the level (its column absent from ``v.extra``)."""
    lv = storage.BY_NAME[level]
    minimum = getattr(v.criteria, lv.minimum)
    psi = v.psi_min if lv.column == "psi_min" else v.extra.get(lv.column)
    if minimum is None or psi is None:
        return np.zeros(np.shape(v.ground_ft), dtype=bool)
    return storage.short(psi, minimum)


_C = OKABE_ITO
REGISTRY: tuple[Status, ...] = (
    Status("no_geometry", lambda v: ~v.has_geometry, "no usable geometry: location unknown", (),
           Style(_C["yellow"], "*", "no geometry: location unknown, on no map", "star", 36.0, "★"), 7),
    Status("no_terrain", lambda v: np.isnan(v.ground_ft),
           "no ground elevation here (outside every DEM or on nodata)", (),
           Style(_C["black"], "x", "no terrain: ground elevation unknown", "x", 36.0, "✕"), 1),
    Status("unzoned", lambda v: ~v.zoned, "outside every pressure zone", (),
           Style(_C["orange"], "P", "unzoned: in no pressure zone", "cross", 36.0, "✚"), 2),
    Status("above_hgl", lambda v: v.psi_min <= 0.0,
           "ground at {} ft is at or above the low HGL of {} ft: no service by gravity, booster service needed",
           ("ground", "hgl_low"),
           Style(_C["reddish_purple"], "D", "above HGL: no gravity service", "diamond", 36.0, "◆"), 6,
           Finding("above_hgl", "psi_min", "min", lambda c: 0.0)),
    Status("low", lambda v: (v.psi_min > 0.0) & (v.psi_min < v.criteria.min_static_psi),
           "static pressure down to {} psi is below {lo} psi: low service pressure", ("pmin",),
           Style(_C["blue"], "v", "low: below the minimum static pressure", "triangle-down", 40.0, "▼"), 4,
           Finding("low_pressure", "psi_min", "min", lambda c: c.min_static_psi)),
    Status("high", lambda v: v.psi_max > v.criteria.max_static_psi,
           "static pressure up to {} psi exceeds {hi} psi: individual PRV expected", ("pmax",),
           Style(_C["vermillion"], "^", "high: above the maximum static pressure", "triangle-up", 40.0, "▲"), 5,
           Finding("high_pressure", "psi_max", "max", lambda c: c.max_static_psi)),
    # psi_top is NaN for a single story, which compares False; the street is not low (that letter covers the floors)
    Status("low_upper_floors",
           lambda v: (v.psi_top < v.criteria.min_static_psi) & ~(v.psi_min < v.criteria.min_static_psi),
           "top floor of {} stories down to {} psi is below {lo} psi: upper floors need a booster", ("stories", "ptop"),
           Style(_C["sky_blue"], "s", "low upper floors: top floor below the minimum", "square", 36.0, "■"), 3,
           Finding("upper_floors", "psi_top", "min", lambda c: c.min_static_psi)),
    # the storage levels: findings only, each off unless its criteria minimum is set (geopress.storage)
    Status("peak_hour_short", lambda v: _short_at(v, "peak_hour"),
           "at peak hour with equalizing storage used (HGL {} ft), static pressure down to {} psi is below {peak_hour} psi",
           ("hgl_low", "pmin"),
           Style(_C["blue"], "v", "short at peak hour: below the peak-hour minimum", "triangle-down", 40.0, "▼"), 4,
           Finding("peak_hour_short", "psi_min", "min", lambda c: c.peak_hour_min_psi), is_status=False),
    Status("fire_short", lambda v: _short_at(v, "fire"),
           "with fire suppression and equalizing storage used, static pressure down to {} psi is below {fire} psi",
           ("pfire",),
           Style(_C["reddish_purple"], "D", "short with fire storage used: below the fire minimum", "diamond", 36.0,
                 "◆"), 6,
           Finding("fire_storage_short", "psi_fire", "min", lambda c: c.fire_min_psi), is_status=False),
    Status("standby_short", lambda v: _short_at(v, "standby"),
           "with standby and equalizing storage used, static pressure down to {} psi is below {standby} psi",
           ("pstandby",),
           Style(_C["sky_blue"], "s", "short with standby storage used: below the standby minimum", "square", 36.0,
                 "■"), 3,
           Finding("standby_storage_short", "psi_standby", "min", lambda c: c.standby_min_psi), is_status=False),
    Status("ok", None, "static pressure {} to {} psi, within {lo} to {hi} psi", ("pmin", "pmax"),
           Style(_C["bluish_green"], "o", "ok: within the pressure window", "circle", 14.0, "●"), 0),
)
del _C

#: every status, in precedence order (``ok`` last)
STATUSES: tuple[str, ...] = tuple(s.name for s in REGISTRY if s.is_status)
BY_NAME: dict[str, Status] = {s.name: s for s in REGISTRY}
#: the statuses that flag a customer, in precedence order: the findings
FINDINGS: tuple[str, ...] = tuple(s.name for s in REGISTRY if s.finding is not None)
#: the findings that are also statuses (the statuses that flag a customer), in precedence order
FLAGGED_STATUSES: tuple[str, ...] = tuple(name for name in FINDINGS if name in STATUSES)
#: finding -> its output layer and mailing list
FLAGGED_LAYERS: dict[str, str] = {s.name: s.finding.layer for s in REGISTRY if s.finding is not None}
#: finding -> its boolean column of the customers
FINDING_COLUMNS: dict[str, str] = {name: BY_NAME[name].column for name in FINDINGS}
#: finding -> the customers' column naming their target area of it
AREA_COLUMNS: dict[str, str] = {name: BY_NAME[name].area_column for name in FINDINGS}
#: finding -> (the pressure column that is worst, whether its "max" or "min" is worse)
WORST: dict[str, tuple[str, str]] = {s.name: (s.finding.worst, s.finding.worse) for s in REGISTRY
                                     if s.finding is not None}
#: status -> style, in drawing order: the first is drawn lowest, so every flagged status lies above ``ok``.
#: ``no_geometry`` has no location and appears on no map, only in the tables.
STATUS_STYLE: dict[str, Style] = {s.name: s.style for s in sorted(REGISTRY, key=lambda s: s.layer_order)
                                   if s.is_status}
#: every entry's style, the findings that are no status too (their layers are drawn in it)
STYLES: dict[str, Style] = {s.name: s.style for s in REGISTRY}
#: the statuses that say why no finding could be evaluated (no location, ground or zone)
UNSCREENED: tuple[str, ...] = STATUSES[: STATUSES.index(FINDINGS[0])]


def finding_of_layer(layer: str) -> str:
    """The finding whose output layer (and mailing list) is ``layer``."""
    return {v: k for k, v in FLAGGED_LAYERS.items()}[layer]


def evaluate(values: Values) -> tuple[NDArray[np.int8], dict[str, NDArray[np.bool_]]]:
    """Each customer's status code (index into :data:`STATUSES`) and each finding's boolean array.

    Vectorised: each condition is one numpy expression over every customer.
    """
    n = np.asarray(values.has_geometry).shape[0]
    held = {s.name: np.asarray(s.condition(values), dtype=bool) for s in REGISTRY if s.condition is not None}
    screened = np.ones(n, dtype=bool)
    for name in UNSCREENED:
        screened &= ~held[name]
    found = {name: held[name] & screened for name in FINDINGS}
    codes = np.full(n, STATUSES.index("ok"), dtype=np.int8)
    decided = np.zeros(n, dtype=bool)
    for i, name in enumerate(STATUSES):
        if name not in held:  # ok: no condition
            continue
        now = held[name] & ~decided
        codes[now] = i
        decided |= now
    return codes, found
