"""Statuses, findings and reasons from pressures and criteria: pure, vectorised.

The statuses and findings, their conditions and sentences are the registry
:mod:`geopress.findings`; this module evaluates them. Each customer gets
exactly one status, the first of :data:`STATUSES` whose condition holds
(``ok`` when none does), and every finding whose condition holds (a customer
can have several). Conditions, with psi values from
:func:`geopress.pressure.customer_pressures`:

=================  ===========================================================
no_geometry        the customer has no usable geometry
no_terrain         no ground elevation could be sampled
unzoned            the customer lies in no pressure zone
above_hgl          ``psi_min <= 0``: ground at or above the low HGL
low                ``0 < psi_min < min_static_psi``
high               ``psi_max > max_static_psi``
low_upper_floors   ``psi_top < min_static_psi <= psi_min``
ok                 none of the above
=================  ===========================================================

Classification is monotone: lowering a customer's ground never moves it from
``high`` to ``low`` and never from ``ok`` to ``low``/``above_hgl``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Mapping, Sequence

import numpy as np
import pandas as pd
import pyarrow as pa
from numpy.typing import ArrayLike, NDArray

from .findings import AREA_COLUMNS, BY_NAME, FINDING_COLUMNS, FINDINGS, FLAGGED_LAYERS, STATUSES, Values, evaluate
from .pressure import DEFAULT_PSI_PER_FT
from .storage import LEVELS

__all__ = ["CODE", "FINDINGS", "FINDING_COLUMNS", "FLAGGED_LAYERS", "RESULT_COLUMNS", "STATUSES", "Criteria",
           "classify", "names_at", "reasons", "screen", "status_names"]

#: per-customer result columns written after the id field; input fields may not reuse these names.
RESULT_COLUMNS: tuple[str, ...] = (
    "zone", "ground_ft", "hgl_high_ft", "hgl_low_ft", "psi_max", "psi_min", "psi_top", "psi_fire", "psi_standby",
    "status", "reason", "margin_psi", "sigma_psi", "confidence", *FINDING_COLUMNS.values(), *AREA_COLUMNS.values(),
    "geometry",
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
    of values the config started from (a shipped file of ``geopress/rule_sets``,
    or the path of the user's own; see :func:`geopress.config.rule_set_names`), if any.
    """

    max_static_psi: float = 80.0
    min_static_psi: float = 35.0
    psi_per_ft: float = DEFAULT_PSI_PER_FT
    floor_height_ft: float = 10.0
    peak_hour_min_psi: float | None = None
    fire_min_psi: float | None = None
    standby_min_psi: float | None = None
    rule_set: str | None = None


def screen(
    *,
    has_geometry: ArrayLike,
    ground_ft: ArrayLike,
    zoned: ArrayLike,
    psi_min: ArrayLike,
    psi_max: ArrayLike,
    psi_top: ArrayLike,
    criteria: Criteria,
    levels: Mapping[str, ArrayLike] | None = None,
) -> tuple[NDArray[np.int8], dict[str, NDArray[np.bool_]]]:
    """Status codes (indices into :data:`STATUSES`), one per customer, and each finding's boolean array.

    ``levels``: the pressures at the storage levels checked, by column (``psi_fire``, ``psi_standby``; see
    :func:`geopress.storage.level_columns`)."""
    return evaluate(Values(
        has_geometry=np.asarray(has_geometry, dtype=bool), ground_ft=np.asarray(ground_ft, dtype=np.float64),
        zoned=np.asarray(zoned, dtype=bool), psi_min=np.asarray(psi_min, dtype=np.float64),
        psi_max=np.asarray(psi_max, dtype=np.float64), psi_top=np.asarray(psi_top, dtype=np.float64),
        criteria=criteria, extra={k: np.asarray(v, dtype=np.float64) for k, v in (levels or {}).items()}))


def classify(**values) -> NDArray[np.int8]:
    """Status codes (indices into :data:`STATUSES`), one per customer; the keywords of :func:`screen`."""
    return screen(**values)[0]


def names_at(names: Sequence[str], index: ArrayLike, valid: ArrayLike | None = None) -> pd.Categorical:
    """``names[index]``, missing where not ``valid``, as a categorical of the distinct names: a small code per
    row instead of a text (a million customers have a few thousand distinct reasons, and a handful of statuses)."""
    distinct, of_name = np.unique(np.array([str(n) for n in names], dtype=object), return_inverse=True)
    codes = of_name[np.asarray(index, dtype=np.intp)] if len(names) else np.zeros(np.shape(index), dtype=np.intp)
    if valid is not None:
        codes = np.where(np.asarray(valid, dtype=bool), codes, -1)
    # pandas keeps the codes in the smallest integer type that numbers the categories
    return pd.Categorical.from_codes(codes, categories=pd.Index(distinct, dtype="str"))


def status_names(codes: ArrayLike) -> pd.Categorical:
    """Status names for an array of codes, as a categorical (see :func:`names_at`)."""
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
    findings: Mapping[str, ArrayLike] | None = None,
    levels: Mapping[str, ArrayLike] | None = None,
) -> pd.Categorical:
    """One text per customer saying why it has its status and findings, with the numbers, as a categorical
    of the distinct sentences.

    A customer with findings gets each finding's sentence, in the registry's order, joined by ``"; "``; any other
    its status's sentence. ``findings`` (finding -> boolean array, as :func:`screen` gives them) defaults to each
    flagged status's own finding alone. Numbers are rounded to 0.1 (stories to whole ones) and printed as numpy
    prints them. Each distinct sentence is made once: the numbers repeat (a million customers have a few thousand
    distinct ones), so each finding's texts are one Arrow take from that small table and the joining is Arrow's,
    with no Python string per row.
    """
    codes = np.asarray(codes)
    cols = {
        "ground": np.asarray(ground_ft, dtype=np.float64),
        "hgl_low": np.asarray(hgl_low_ft, dtype=np.float64),
        "pmin": np.asarray(psi_min, dtype=np.float64),
        "pmax": np.asarray(psi_max, dtype=np.float64),
        "ptop": np.asarray(psi_top, dtype=np.float64),
        # the storage levels' pressures (as for screen), NaN where not checked
        **{name: np.asarray((levels or {}).get(column, np.full(codes.shape, np.nan)), dtype=np.float64)
           for name, column in (("pfire", "psi_fire"), ("pstandby", "psi_standby"))},
    }
    floors_arr = np.asarray(floors, dtype=np.float64)
    # the numbers of the rows selected by a mask; stories only where needed (floors may be NaN elsewhere)
    numbers: dict[str, Callable[[NDArray[np.bool_]], NDArray]] = {
        name: (lambda m, v=values: _rounded(v[m])) for name, values in cols.items()
    }
    numbers["stories"] = lambda m: np.round(floors_arr[m]).astype(np.int64)
    lo, hi = _g(criteria.min_static_psi), _g(criteria.max_static_psi)
    # the storage levels' minimums, for their sentences (a sentence is used only where its minimum is set)
    minimums = {lv.name: _g(getattr(criteria, lv.minimum)) for lv in LEVELS if getattr(criteria, lv.minimum) is not None}

    def sentences(status: str, m: NDArray[np.bool_], sentence: NDArray[np.intp], table: list[str]) -> None:
        """Fill ``sentence[m]`` with indices into ``table`` of ``status``'s sentences for the rows ``m``."""
        if m.any():
            entry = BY_NAME[status]
            index, count, values = _distinct([numbers[name](m) for name in entry.numbers], int(np.count_nonzero(m)))
            texts = [v.astype(str) for v in values]
            sentence[m] = len(table) + index
            table.extend(entry.sentence.format(*(t[i] for t in texts), lo=lo, hi=hi, **minimums) for i in range(count))

    found = ({name: codes == CODE[name] if name in CODE else np.zeros(codes.shape, dtype=bool) for name in FINDINGS}
             if findings is None
             else {name: np.asarray(findings[name], dtype=bool) for name in FINDINGS})
    any_finding = np.zeros(codes.shape, dtype=bool)
    for m in found.values():
        any_finding |= m
    sentence = np.full(codes.shape, -1, dtype=np.intp)  # index into table; a code of no status fails the take
    table: list[str] = []
    for name in STATUSES:
        sentences(name, (codes == CODE[name]) & ~any_finding, sentence, table)
    if any_finding.any():
        # each finding's sentences apart, then each distinct combination of them joined once
        own: list[list[str]] = []
        columns = []
        for name, m in found.items():
            each = np.full(codes.shape, -1, dtype=np.intp)
            part: list[str] = []
            sentences(name, m, each, part)
            own.append(part)
            columns.append(each[any_finding])
        index, count, values = _distinct(columns, int(np.count_nonzero(any_finding)))
        sentence[any_finding] = len(table) + index
        table.extend("; ".join(part[v[i]] for part, v in zip(own, values) if v[i] >= 0) for i in range(count))
    return names_at(table, sentence)
