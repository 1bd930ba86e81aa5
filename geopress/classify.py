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
from typing import Callable, Sequence

import numpy as np
import pandas as pd
import pyarrow as pa
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
    "zone", "ground_ft", "hgl_high_ft", "hgl_low_ft", "psi_max", "psi_min", "psi_top", "psi_fire", "psi_standby",
    "status", "reason", "geometry",
)
CODE = {name: np.int8(i) for i, name in enumerate(STATUSES)}


@dataclass(frozen=True)
class Criteria:
    """Screening thresholds. Pressures psi, lengths ft.

    Defaults: 80 psi maximum static (plumbing codes require an individual PRV
    above it), 35 psi minimum normal working pressure, 0.433 psi per ft of
    water, 10 ft per story.

    Storage levels (:mod:`geopress.storage`), each off (None) by default: the
    least static pressure at ground with the zone at its low HGL (peak hour,
    equalizing storage used), and with a tank drawn to the bottom of its fire
    suppression or its standby storage. ``rule_set`` names the published set
    of values the config started from (:mod:`geopress.rulesets`), if any.
    """

    max_static_psi: float = 80.0
    min_static_psi: float = 35.0
    psi_per_ft: float = DEFAULT_PSI_PER_FT
    floor_height_ft: float = 10.0
    peak_hour_min_psi: float | None = None
    fire_min_psi: float | None = None
    standby_min_psi: float | None = None
    rule_set: str | None = None


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


def names_at(names: Sequence[str], index: ArrayLike, valid: ArrayLike | None = None) -> pd.api.extensions.ExtensionArray:
    """``names[index]`` as pandas text (``"str"``), missing where not ``valid``: one Arrow take, no Python string per row."""
    table = pa.array([str(n) for n in names], type=pa.large_string())
    mask = None if valid is None else ~np.asarray(valid, dtype=bool)
    return pd.array(table.take(pa.array(np.asarray(index, dtype=np.intp), mask=mask)), dtype="str")


def status_names(codes: ArrayLike) -> pd.api.extensions.ExtensionArray:
    """Status names for an array of codes, as pandas text."""
    return names_at(STATUSES, codes)


def _rounded(values: NDArray[np.float64]) -> NDArray[np.float64]:
    """Values rounded to 0.1, without a negative zero."""
    return np.round(values, 1) + 0.0


def _distinct(columns: list[NDArray], n: int) -> tuple[NDArray[np.intp], int, list[NDArray]]:
    """For ``n`` rows of ``columns``: each row's index among the distinct rows, their count, and the distinct rows.

    Values compare as numbers, every NaN equal to every other (all print as ``nan``), -0.0 equal to 0.0
    (so the numbers passed have no negative zero). The distinct rows are in order of first appearance,
    as columns.
    """
    key = np.zeros(n, dtype=np.int64)
    uniques = []
    for col in columns:
        code, u = pd.factorize(col, use_na_sentinel=False)
        key = key * len(u) + code  # below n ** len(columns): no overflow for two columns of up to 3e9 rows
        uniques.append(u)
    index, keys = pd.factorize(key)
    count = len(keys)
    values = []
    for u in reversed(uniques):
        keys, code = np.divmod(keys, len(u))
        values.append(u[code])
    return index, count, values[::-1]


def _g(value: float) -> str:
    return f"{value:g}"


#: each status's sentence: a template for str.format with the criteria as ``lo`` and ``hi``, and the
#: numbers (keys of the ``numbers`` in :func:`reasons`) that fill its ``{}`` in order
_SENTENCES: dict[str, tuple[str, tuple[str, ...]]] = {
    "no_geometry": ("no usable geometry: location unknown", ()),
    "no_terrain": ("no ground elevation here (outside every DEM or on nodata)", ()),
    "unzoned": ("outside every pressure zone", ()),
    "above_hgl": ("ground at {} ft is at or above the low HGL of {} ft: no service by gravity, booster service needed",
                  ("ground", "hgl_low")),
    "low": ("static pressure down to {} psi is below {lo} psi: low service pressure", ("pmin",)),
    "high": ("static pressure up to {} psi exceeds {hi} psi: individual PRV expected", ("pmax",)),
    "low_upper_floors": ("top floor of {} stories down to {} psi is below {lo} psi: upper floors need a booster",
                         ("stories", "ptop")),
    "ok": ("static pressure {} to {} psi, within {lo} to {hi} psi", ("pmin", "pmax")),
}


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
) -> pd.api.extensions.ExtensionArray:
    """One sentence per customer saying why it has its status, with the numbers, as pandas text (``"str"``).

    Numbers are rounded to 0.1 (stories to whole ones) and printed as numpy prints them. Each distinct
    sentence is made once: the numbers repeat (a million customers have a few thousand distinct ones),
    so the text of the rows is one Arrow take from that small table, with no Python string per row.
    """
    codes = np.asarray(codes)
    cols = {
        "ground": np.asarray(ground_ft, dtype=np.float64),
        "hgl_low": np.asarray(hgl_low_ft, dtype=np.float64),
        "pmin": np.asarray(psi_min, dtype=np.float64),
        "pmax": np.asarray(psi_max, dtype=np.float64),
        "ptop": np.asarray(psi_top, dtype=np.float64),
    }
    floors_arr = np.asarray(floors, dtype=np.float64)
    # the numbers of the rows selected by a mask; stories only where needed (floors may be NaN elsewhere)
    numbers: dict[str, Callable[[NDArray[np.bool_]], NDArray]] = {
        name: (lambda m, v=values: _rounded(v[m])) for name, values in cols.items()
    }
    numbers["stories"] = lambda m: np.round(floors_arr[m]).astype(np.int64)
    lo, hi = _g(criteria.min_static_psi), _g(criteria.max_static_psi)
    sentence = np.full(codes.shape, -1, dtype=np.intp)  # index into table; a code of no status fails the take
    table: list[str] = []
    for status, (template, names) in _SENTENCES.items():
        m = codes == CODE[status]
        if m.any():
            index, count, values = _distinct([numbers[name](m) for name in names], int(np.count_nonzero(m)))
            texts = [v.astype(str) for v in values]
            sentence[m] = len(table) + index
            table.extend(template.format(*(t[i] for t in texts), lo=lo, hi=hi) for i in range(count))
    return names_at(table, sentence)
