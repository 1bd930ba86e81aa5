"""Statuses and reasons from pressures and criteria: pure, vectorised.

Each customer gets exactly one status, the first of :data:`STATUSES` whose
condition holds (``ok`` when none does). Conditions, with psi values from
:func:`geopress.pressure.customer_pressures`:

=================  ===========================================================
no_geometry        the customer has no usable geometry
no_terrain         no ground elevation could be sampled
unzoned            the customer lies in no pressure zone
above_hgl          ``psi_min <= 0``: ground at or above the low HGL
low                ``psi_min < min_static_psi``
high               ``psi_max > max_static_psi``
low_upper_floors   ``psi_top < min_static_psi``
ok                 none of the above
=================  ===========================================================

Classification is monotone: lowering a customer's ground never moves it from
``high`` to ``low`` and never from ``ok`` to ``low``/``above_hgl``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .pressure import DEFAULT_PSI_PER_FT

STATUSES: tuple[str, ...] = (
    "no_geometry",
    "no_terrain",
    "unzoned",
    "above_hgl",
    "low",
    "high",
    "low_upper_floors",
    "ok",
)
#: statuses that flag a customer for follow-up, with the output layer that lists them.
FLAGGED_LAYERS: dict[str, str] = {
    "high": "high_pressure",
    "low": "low_pressure",
    "above_hgl": "above_hgl",
    "low_upper_floors": "upper_floors",
}
#: per-customer result columns written after the id field; input fields may not reuse these names.
RESULT_COLUMNS: tuple[str, ...] = (
    "zone", "ground_ft", "hgl_high_ft", "hgl_low_ft", "psi_max", "psi_min", "psi_top", "status", "reason", "geometry",
)
CODE = {name: np.int8(i) for i, name in enumerate(STATUSES)}


@dataclass(frozen=True)
class Criteria:
    """Screening thresholds. Pressures psi, lengths ft.

    Defaults: 80 psi maximum static (plumbing codes require an individual PRV
    above it), 35 psi minimum normal working pressure, 0.433 psi per ft of
    water, 10 ft per story.
    """

    max_static_psi: float = 80.0
    min_static_psi: float = 35.0
    psi_per_ft: float = DEFAULT_PSI_PER_FT
    floor_height_ft: float = 10.0


def classify(
    *,
    has_geometry: ArrayLike,
    ground_ft: ArrayLike,
    zoned: ArrayLike,
    psi_min: ArrayLike,
    psi_max: ArrayLike,
    psi_top: ArrayLike,
    criteria: Criteria,
) -> NDArray[np.int8]:
    """Status codes (indices into :data:`STATUSES`), one per customer."""
    geom = np.asarray(has_geometry, dtype=bool)
    ground = np.asarray(ground_ft, dtype=np.float64)
    zoned_arr = np.asarray(zoned, dtype=bool)
    pmin = np.asarray(psi_min, dtype=np.float64)
    pmax = np.asarray(psi_max, dtype=np.float64)
    ptop = np.asarray(psi_top, dtype=np.float64)
    conditions = [
        ~geom,
        np.isnan(ground),
        ~zoned_arr,
        pmin <= 0.0,
        pmin < criteria.min_static_psi,
        pmax > criteria.max_static_psi,
        ptop < criteria.min_static_psi,  # NaN (single story) compares False
    ]
    return np.select(conditions, [CODE[s] for s in STATUSES[:-1]], default=CODE["ok"]).astype(np.int8)


def status_names(codes: ArrayLike) -> NDArray[np.str_]:
    """Status names for an array of codes."""
    return np.asarray(STATUSES)[np.asarray(codes, dtype=np.intp)]


def _num(values: NDArray[np.float64]) -> NDArray[np.str_]:
    """Values rounded to 0.1 as text, without a negative zero."""
    return (np.round(values, 1) + 0.0).astype(str)


def _g(value: float) -> str:
    return f"{value:g}"


def reasons(
    codes: ArrayLike,
    *,
    ground_ft: ArrayLike,
    hgl_low_ft: ArrayLike,
    psi_min: ArrayLike,
    psi_max: ArrayLike,
    psi_top: ArrayLike,
    floors: ArrayLike,
    criteria: Criteria,
) -> NDArray[np.object_]:
    """One sentence per customer saying why it has its status, with the numbers."""
    codes = np.asarray(codes)
    out = np.empty(codes.shape, dtype=object)
    lo, hi = _g(criteria.min_static_psi), _g(criteria.max_static_psi)
    cols = {
        "ground": np.asarray(ground_ft, dtype=np.float64),
        "hgl_low": np.asarray(hgl_low_ft, dtype=np.float64),
        "pmin": np.asarray(psi_min, dtype=np.float64),
        "pmax": np.asarray(psi_max, dtype=np.float64),
        "ptop": np.asarray(psi_top, dtype=np.float64),
        "floors": np.asarray(floors, dtype=np.float64),
    }
    add = np.strings.add

    def sel(name: str, mask: NDArray[np.bool_]) -> NDArray[np.str_]:
        return _num(cols[name][mask])

    fixed = {
        "no_geometry": "no usable geometry: location unknown",
        "no_terrain": "no ground elevation here (outside every DEM or on nodata)",
        "unzoned": "outside every pressure zone",
    }
    for name, text in fixed.items():
        out[codes == CODE[name]] = text
    m = codes == CODE["above_hgl"]
    if m.any():
        out[m] = add(add(add(add("ground at ", sel("ground", m)), " ft is at or above the low HGL of "), sel("hgl_low", m)),
                     " ft: no service by gravity, booster service needed")
    m = codes == CODE["low"]
    if m.any():
        out[m] = add(add("static pressure down to ", sel("pmin", m)), f" psi is below {lo} psi: low service pressure")
    m = codes == CODE["high"]
    if m.any():
        out[m] = add(add("static pressure up to ", sel("pmax", m)), f" psi exceeds {hi} psi: individual PRV expected")
    m = codes == CODE["low_upper_floors"]
    if m.any():
        stories = np.round(cols["floors"][m]).astype(np.int64).astype(str)
        out[m] = add(add(add(add("top floor of ", stories), " stories down to "), sel("ptop", m)),
                     f" psi is below {lo} psi: upper floors need a booster")
    m = codes == CODE["ok"]
    if m.any():
        out[m] = add(add(add(add("static pressure ", sel("pmin", m)), " to "), sel("pmax", m)),
                     f" psi, within {lo} to {hi} psi")
    return out
