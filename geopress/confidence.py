"""How sure each status is: the margin from the threshold that set it, its uncertainty, a confidence class. Pure.

``margin_psi`` is how far the deciding pressure lies from the threshold that
set the status, positive inside the flagged side; each finding's deciding
column and threshold are its registry entry's (:class:`geopress.findings.Finding`):

==================  ==========================================  ======================
status              deciding pressure and threshold              margin_psi
==================  ==========================================  ======================
high                psi_max against max_static_psi               psi_max - max
low                 psi_min against min_static_psi               min - psi_min
above_hgl           psi_min against 0 (ground at the low HGL)    -psi_min
low_upper_floors    psi_top against min_static_psi               min - psi_top
ok                  the nearest of the above                     minus the distance
others              none                                         NaN
==================  ==========================================  ======================

``sigma_psi`` is one standard uncertainty of a customer's pressure from the
DEM and the HGL, ``sqrt((psi_per_ft * dem_rmse_ft)^2 + (psi_per_ft *
hgl_uncertainty_ft)^2)``; NaN where the config states no DEM accuracy
(``terrain.vertical_rmse_ft``), since a sigma of 0 would call every flag firm.

``confidence`` follows the 95 % convention of the ASPRS Positional Accuracy
Standards (Edition 1, 2014: vertical accuracy at 95 % = 1.96 RMSE): a flag
is ``firm`` when its margin exceeds 1.96 sigma and ``borderline`` otherwise;
an ok customer within 1.96 sigma of a threshold is ``near_limit`` (it may be
flagged if the DEM is off), the other ok ones ``clear``; ``unrated`` where
sigma is unknown; empty for a customer with no pressure (no_geometry,
no_terrain, unzoned).
"""

from __future__ import annotations

import math
from typing import Mapping, Sequence

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from .classify import CODE, Criteria, names_at
from .findings import BY_NAME, FINDINGS, FLAGGED_STATUSES
from .tables import in_finding, rows_of

#: the confidence classes, most certain flag first
CLASSES: tuple[str, ...] = ("firm", "borderline", "near_limit", "clear", "unrated")
#: margin over sigma a flag must exceed to be firm: two-sided 95 % of a normal error (ASPRS Edition 1 convention)
Z95 = 1.96
#: the list of the borderline flags, for a field reading before a letter (:func:`verification_list`)
VERIFICATION_LIST = "field_verification"


def margins(codes: ArrayLike, *, psi_min: ArrayLike, psi_max: ArrayLike, psi_top: ArrayLike,
            criteria: Criteria) -> NDArray[np.float64]:
    """``margin_psi`` per customer (see the module's table); NaN for no_geometry, no_terrain and unzoned. A status
    is judged by its own threshold, an ok customer by the statuses' (the storage-level findings are no status)."""
    codes = np.asarray(codes)
    each = finding_margins(psi_min=psi_min, psi_max=psi_max, psi_top=psi_top, criteria=criteria,
                           names=FLAGGED_STATUSES)
    out = np.full(codes.shape, np.nan)
    for name, m in each.items():
        own = codes == CODE[name]
        out[own] = m[own]
    # an ok customer: the nearest threshold it could cross, every margin being negative (fmax skips the NaN
    # psi_top of a single story)
    ok = codes == CODE["ok"]
    out[ok] = np.fmax.reduce([m[ok] for m in each.values()])
    return out


def finding_margins(*, psi_min: ArrayLike, psi_max: ArrayLike, psi_top: ArrayLike, criteria: Criteria,
                    extra: Mapping[str, ArrayLike] | None = None,
                    names: Sequence[str] = FINDINGS) -> dict[str, NDArray[np.float64]]:
    """Each finding's margin for every customer, psi: its worst column beyond its threshold, positive on the
    flagged side (:meth:`geopress.findings.Finding.margin`). ``extra`` holds the storage levels' pressure columns
    (``psi_fire`` ...); a finding whose column is absent or whose minimum is off (None) has NaN margins."""
    columns = {"psi_min": np.asarray(psi_min, dtype=np.float64), "psi_max": np.asarray(psi_max, dtype=np.float64),
               "psi_top": np.asarray(psi_top, dtype=np.float64),
               **{k: np.asarray(v, dtype=np.float64) for k, v in (extra or {}).items()}}
    out = {}
    for name in names:
        finding = BY_NAME[name].finding
        worst = columns.get(finding.worst)
        off = worst is None or finding.threshold(criteria) is None
        out[name] = np.full(columns["psi_min"].shape, np.nan) if off else finding.margin(worst, criteria)
    return out


def rate(margin_psi: ArrayLike, sigma_psi: ArrayLike) -> pd.Categorical:
    """A finding's confidence for each customer as if flagged by it: firm, borderline or unrated (see
    :func:`classes`), for the mailing list of that finding; a categorical, a byte a customer."""
    m = np.asarray(margin_psi, dtype=np.float64)
    return pd.Categorical.from_codes(_class_index(np.full(m.shape, CODE[FLAGGED_STATUSES[0]]), m, sigma_psi),
                                     categories=CLASSES)


def sigmas(dem_rmse_ft: ArrayLike, hgl_uncertainty_ft: ArrayLike, psi_per_ft: float) -> NDArray[np.float64]:
    """``sigma_psi``: ``sqrt((k * dem_rmse)^2 + (k * hgl_uncertainty)^2)``; NaN where the DEM's RMSE is NaN."""
    d = psi_per_ft * np.asarray(dem_rmse_ft, dtype=np.float64)
    u = psi_per_ft * np.asarray(hgl_uncertainty_ft, dtype=np.float64)
    return np.sqrt(d * d + u * u)


def classes(codes: ArrayLike, margin_psi: ArrayLike, sigma_psi: ArrayLike) -> pd.Categorical:
    """``confidence`` per customer: one of :data:`CLASSES`, missing where there is no margin."""
    which = _class_index(codes, margin_psi, sigma_psi)
    return names_at(CLASSES, np.maximum(which, 0), which >= 0)


def _class_index(codes: ArrayLike, margin_psi: ArrayLike, sigma_psi: ArrayLike) -> NDArray[np.int8]:
    """Each customer's class as its index in :data:`CLASSES`, -1 where there is no margin."""
    codes = np.asarray(codes)
    m = np.asarray(margin_psi, dtype=np.float64)
    s = np.asarray(sigma_psi, dtype=np.float64)
    flagged = np.isin(codes, [CODE[st] for st in FLAGGED_STATUSES])
    ok = codes == CODE["ok"]
    sure = np.where(flagged, m, -m) > Z95 * s  # beyond 1.96 sigma on the side the status is on
    rated = ~np.isnan(m)
    which = np.select([rated & np.isnan(s), flagged & sure, flagged, ok & sure, ok],
                      [CLASSES.index(c) + 1 for c in ("unrated", "firm", "borderline", "clear", "near_limit")],
                      default=0)
    which[~rated] = 0  # 0: no class
    return (which - 1).astype(np.int8)


def chance_other_side(margin_psi: ArrayLike, sigma_psi: ArrayLike) -> NDArray[np.float64]:
    """The chance that the true pressure lies on the other side of the threshold, for a normal error of
    ``sigma_psi``: ``Phi(-|margin| / sigma)`` (0.5 on the threshold, 0.025 at 1.96 sigma)."""
    z = np.abs(np.asarray(margin_psi, dtype=np.float64)) / np.asarray(sigma_psi, dtype=np.float64)
    return np.array([0.5 * math.erfc(v / math.sqrt(2.0)) for v in np.atleast_1d(z)])


def verification_list(customers: pd.DataFrame, rated: Mapping[str, tuple[ArrayLike, ArrayLike]], *, id_field: str,
                      fields: Sequence[str] = ()) -> pd.DataFrame:
    """Every borderline flag, one row per customer and finding, the ones a field reading would decide most first.

    ``rated`` maps each finding to each customer's margin from its threshold
    and its class for it (:func:`finding_margins`, :func:`rate`). Columns: the
    id, ``fields`` (e.g. the mail and letter fields), ``zone``, ``list`` (the
    finding's mailing list), ``status``, ``ground_ft``, ``psi_min``,
    ``psi_max``, ``psi_top``, ``margin_psi`` (for that finding), ``sigma_psi``,
    ``chance_other_side`` (:func:`chance_other_side`) and ``reason``. Sorted
    by ``chance_other_side``, highest first, then by id and list.
    """
    keep = [id_field, *[f for f in fields if f != id_field], "zone"]
    after = ["status", "ground_ft", "psi_min", "psi_max", "psi_top"]
    parts = []
    for name in FINDINGS:
        margin, cls = rated[name]
        borderline = pd.Series(cls).eq("borderline").to_numpy(dtype=bool, na_value=False)
        sel = in_finding(customers, name) & borderline
        part = rows_of(customers, [*keep, *after, "sigma_psi", "reason"], np.flatnonzero(sel)).reset_index(drop=True)
        part.insert(len(keep), "list", BY_NAME[name].finding.layer)
        part.insert(len(keep) + 1 + len(after), "margin_psi", np.asarray(margin, dtype=np.float64)[sel])
        parts.append(part)
    out = pd.concat(parts, ignore_index=True)
    out.insert(len(out.columns) - 1, "chance_other_side",
               np.round(chance_other_side(out["margin_psi"], out["sigma_psi"]), 3) if len(out) else [])
    for c in ("ground_ft", "psi_min", "psi_max", "psi_top", "margin_psi", "sigma_psi"):
        out[c] = out[c].to_numpy(dtype=np.float64).round(2)
    order = np.lexsort((out["list"].astype(str).to_numpy(), out[id_field].astype(str).to_numpy(),
                        -out["chance_other_side"].to_numpy(dtype=np.float64)))
    return out.iloc[order].reset_index(drop=True)


def zone_counts(zone: ArrayLike, confidence: ArrayLike, zones: Sequence[str]) -> pd.DataFrame:
    """Per zone of ``zones``: ``n_firm``, ``n_borderline``, ``n_near_limit``, ``n_clear``, ``n_unrated``."""
    # factorized (a categorical's codes as they are), then counted per pair of codes: no text per customer
    zone_code, zone_names = pd.factorize(pd.Series(zone))
    class_code, class_names = pd.factorize(pd.Series(confidence))
    both = (zone_code >= 0) & (class_code >= 0)
    per = np.bincount(zone_code[both] * len(class_names) + class_code[both],
                      minlength=len(zone_names) * len(class_names)).reshape(len(zone_names), len(class_names))
    at_zone = {str(z): i for i, z in enumerate(zone_names)}
    at_class = {str(c): j for j, c in enumerate(class_names)}
    rows = []
    for z in zones:
        i = at_zone.get(z)
        rows.append({"zone": z, **{f"n_{c}": int(per[i, at_class[c]]) if i is not None and c in at_class else 0
                                   for c in CLASSES}})
    return pd.DataFrame(rows)
