"""How sure each status is: the margin from the threshold that set it, its uncertainty, a confidence class. Pure.

``margin_psi`` is how far the deciding pressure lies from the threshold that
set the status, positive inside the flagged side:

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
from typing import Sequence

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from .classify import CODE, FLAGGED_LAYERS, Criteria

#: the confidence classes, most certain flag first
CLASSES: tuple[str, ...] = ("firm", "borderline", "near_limit", "clear", "unrated")
#: margin over sigma a flag must exceed to be firm: two-sided 95 % of a normal error (ASPRS Edition 1 convention)
Z95 = 1.96
#: the list of the borderline flags, for a field reading before a letter (:func:`verification_list`)
VERIFICATION_LIST = "field_verification"


def margins(codes: ArrayLike, *, psi_min: ArrayLike, psi_max: ArrayLike, psi_top: ArrayLike,
            criteria: Criteria) -> NDArray[np.float64]:
    """``margin_psi`` per customer (see the module's table); NaN for no_geometry, no_terrain and unzoned."""
    codes = np.asarray(codes)
    pmin = np.asarray(psi_min, dtype=np.float64)
    pmax = np.asarray(psi_max, dtype=np.float64)
    ptop = np.asarray(psi_top, dtype=np.float64)
    lo, hi = criteria.min_static_psi, criteria.max_static_psi
    # an ok customer's distance to each threshold it could cross (psi_top only for several stories)
    nearest = np.fmin(np.fmin(hi - pmax, pmin - lo), ptop - lo)
    return np.select(
        [codes == CODE["high"], codes == CODE["low"], codes == CODE["above_hgl"], codes == CODE["low_upper_floors"],
         codes == CODE["ok"]],
        [pmax - hi, lo - pmin, -pmin, lo - ptop, -nearest], default=np.nan)


def sigmas(dem_rmse_ft: ArrayLike, hgl_uncertainty_ft: ArrayLike, psi_per_ft: float) -> NDArray[np.float64]:
    """``sigma_psi``: ``sqrt((k * dem_rmse)^2 + (k * hgl_uncertainty)^2)``; NaN where the DEM's RMSE is NaN."""
    d = psi_per_ft * np.asarray(dem_rmse_ft, dtype=np.float64)
    u = psi_per_ft * np.asarray(hgl_uncertainty_ft, dtype=np.float64)
    return np.sqrt(d * d + u * u)


def classes(codes: ArrayLike, margin_psi: ArrayLike, sigma_psi: ArrayLike) -> pd.api.extensions.ExtensionArray:
    """``confidence`` per customer: one of :data:`CLASSES`, missing where there is no margin."""
    codes = np.asarray(codes)
    m = np.asarray(margin_psi, dtype=np.float64)
    s = np.asarray(sigma_psi, dtype=np.float64)
    flagged = np.isin(codes, [CODE[st] for st in FLAGGED_LAYERS])
    ok = codes == CODE["ok"]
    sure = np.where(flagged, m, -m) > Z95 * s  # beyond 1.96 sigma on the side the status is on
    rated = ~np.isnan(m)
    names = np.array([None, *CLASSES], dtype=object)  # index 0: no class
    which = np.select([rated & np.isnan(s), flagged & sure, flagged, ok & sure, ok],
                      [CLASSES.index(c) + 1 for c in ("unrated", "firm", "borderline", "clear", "near_limit")],
                      default=0)
    which[~rated] = 0
    return pd.array(names[which], dtype="str")


def chance_other_side(margin_psi: ArrayLike, sigma_psi: ArrayLike) -> NDArray[np.float64]:
    """The chance that the true pressure lies on the other side of the threshold, for a normal error of
    ``sigma_psi``: ``Phi(-|margin| / sigma)`` (0.5 on the threshold, 0.025 at 1.96 sigma)."""
    z = np.abs(np.asarray(margin_psi, dtype=np.float64)) / np.asarray(sigma_psi, dtype=np.float64)
    return np.array([0.5 * math.erfc(v / math.sqrt(2.0)) for v in np.atleast_1d(z)])


def verification_list(customers: pd.DataFrame, *, id_field: str, fields: Sequence[str] = ()) -> pd.DataFrame:
    """The borderline flagged customers, one row each, the ones a field reading would decide most first.

    Columns: the id, ``zone``, ``status``, ``ground_ft``, ``psi_min``,
    ``psi_max``, ``psi_top``, ``margin_psi``, ``sigma_psi``,
    ``chance_other_side`` (:func:`chance_other_side`), ``reason`` and
    ``fields`` (e.g. the mail and letter fields). Sorted by
    ``chance_other_side``, highest first, then by id.
    """
    cols = [id_field, *[f for f in fields if f != id_field], "zone", "status", "ground_ft", "psi_min", "psi_max",
            "psi_top", "margin_psi", "sigma_psi", "reason"]
    sub = customers.loc[(customers["confidence"] == "borderline").to_numpy(dtype=bool), cols]
    out = pd.DataFrame(sub).reset_index(drop=True)
    out.insert(len(cols) - 1, "chance_other_side",
               np.round(chance_other_side(out["margin_psi"], out["sigma_psi"]), 3) if len(out) else [])
    for c in ("ground_ft", "psi_min", "psi_max", "psi_top", "margin_psi", "sigma_psi"):
        out[c] = out[c].to_numpy(dtype=np.float64).round(2)
    order = np.lexsort((out[id_field].astype(str).to_numpy(), -out["chance_other_side"].to_numpy(dtype=np.float64)))
    return out.iloc[order].reset_index(drop=True)


def zone_counts(zone: ArrayLike, confidence: ArrayLike, zones: Sequence[str]) -> pd.DataFrame:
    """Per zone of ``zones``: ``n_firm``, ``n_borderline``, ``n_near_limit``, ``n_clear``, ``n_unrated``."""
    frame = pd.DataFrame({"zone": pd.array(zone, dtype="str"), "confidence": pd.array(confidence, dtype="str")})
    counts = frame.dropna().groupby(["zone", "confidence"]).size()
    rows = []
    for z in zones:
        rows.append({"zone": z, **{f"n_{c}": int(counts.get((z, c), 0)) for c in CLASSES}})
    return pd.DataFrame(rows)
