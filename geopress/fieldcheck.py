"""Field readings against the screening: predictions, residuals, uncertainty and per-zone bias. Pure.

A reading is a static pressure measured with a gauge ``gauge_height_ft``
above the ground. With ``k`` psi per ft of water, ``g`` the ground (ft, on
the HGLs' datum, sampled as for the customers) and ``h`` the gauge height:

* predicted pressure at the gauge for an HGL ``H``: ``k * (H - g - h)``; for
  a zone whose HGL is only known as a range (a tank without the level at the
  time), the range gives an interval ``[k * (low - g - h), k * (high - g - h)]``;
* residual: measured minus the nearest predicted value (0 inside the
  interval), psi, and the same in ft of head (``/ k``);
* implied HGL: ``g + h + measured / k``, ft;
* combined uncertainty, one standard deviation, psi:
  ``sqrt(gauge^2 + (k * dem_rmse)^2 + (k * hgl_uncertainty)^2)``;
* outlier: ``|residual| > max(outlier_psi, outlier_sigmas * sigma)``.

Per zone (:func:`zone_table`): the median residual is the zone's bias, the
MAD (median absolute deviation from it, unscaled) its robust spread, and the
median of the residuals in ft the HGL correction the readings suggest. A
bias is significant when the zone has at least ``min_readings`` readings
and ``|bias|`` exceeds both ``bias_psi`` and ``z`` standard errors of a
median, ``z * 1.2533 * spread / sqrt(n)`` (1.2533 = sqrt(pi/2), the large-n
ratio of a normal median's standard error to the mean's; the spread is the
larger of the readings' RMS sigma and the scaled MAD, so readings that
scatter more than their stated uncertainty do not raise false alarms).
With ``z = 1.96`` a zone of unbiased readings is flagged at most about 5 %
of the time; tests/test_fieldcheck.py measures the rate.

Invariants (asserted by the tests): on a plane the predicted pressure is
exact; residual, implied HGL and predicted pressure satisfy
``implied - H == residual / k`` for a single HGL; readings never change a
customer's result (they are not inputs of :mod:`geopress.classify`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from .pressure import Source, static_psi

#: a reading's check, the first that holds: no pressure value; a negative one (a gauge reads gauge pressure, and a
#: static main under pressure never reads below 0); no location; in no zone; no ground under it; then outlier
#: or consistent
CHECKS: tuple[str, ...] = ("no_pressure", "negative_pressure", "no_geometry", "unzoned", "no_terrain", "outlier",
                           "consistent")
#: checks of a reading that was compared with the screening (it has a residual)
COMPARED = ("outlier", "consistent")

#: ASME B40.100 accuracy grades as shares of the span: (first quarter, middle half, last quarter). Grade A:
#: +-2 / 1 / 2 % (ASME B40.100 Table 1, secondary); 2A, 3A, 4A: +-0.5, 0.25, 0.1 % over the whole span (from memory).
GRADES: dict[str, tuple[float, float, float]] = {
    "A": (0.02, 0.01, 0.02),
    "2A": (0.005, 0.005, 0.005),
    "3A": (0.0025, 0.0025, 0.0025),
    "4A": (0.001, 0.001, 0.001),
}
#: sqrt(pi / 2): a normal sample's median has about this times the standard error of its mean (large n)
MEDIAN_SE_FACTOR = float(np.sqrt(np.pi / 2.0))
#: the MAD times this estimates a normal standard deviation (1 / Phi^-1(3/4))
MAD_TO_SD = 1.4826


@dataclass(frozen=True)
class Rules:
    """Outlier and bias rules. Pressures psi.

    Defaults: an outlier misses by more than 5 psi (about 10 ft: an accepted
    static calibration has every reading within 10 ft, 92 % within 5 ft, as a
    municipal calibration report quotes a standard modelling text; secondary)
    and by more than 2 sigma. A bias must exceed 1 psi (half the 2 psi, about
    5 ft, such a calibration accepts of a single reading; common practice, no
    source) and ``z = 1.96`` standard errors of the median, with at least 3
    readings.
    """

    outlier_psi: float = 5.0
    outlier_sigmas: float = 2.0
    bias_psi: float = 1.0
    min_readings: int = 3
    z: float = 1.96


def grade_accuracy_psi(grade: str, span_psi: float, reading_psi: ArrayLike) -> NDArray[np.float64]:
    """A gauge's accuracy, psi, at each reading: its grade's share of the span for the part of the scale the
    reading is in (first quarter, middle half, last quarter; readings off the scale take the end's share)."""
    first, middle, last = GRADES[grade]
    r = np.asarray(reading_psi, dtype=np.float64)
    share = np.where(r < 0.25 * span_psi, first, np.where(r > 0.75 * span_psi, last, middle))
    return share * span_psi


def predicted_psi(ground_ft: ArrayLike, gauge_height_ft: ArrayLike, hgl_ft: ArrayLike,
                  psi_per_ft: float) -> NDArray[np.float64]:
    """Static pressure, psi, at a gauge ``gauge_height_ft`` above ``ground_ft`` under the grade line ``hgl_ft``."""
    gauge_ft = np.asarray(ground_ft, dtype=np.float64) + np.asarray(gauge_height_ft, dtype=np.float64)
    return static_psi(hgl_ft, gauge_ft, psi_per_ft)


def residual_psi(measured_psi: ArrayLike, low_psi: ArrayLike, high_psi: ArrayLike) -> NDArray[np.float64]:
    """Measured minus the nearest predicted value in ``[low_psi, high_psi]``: 0 inside, NaN where any is NaN."""
    m = np.asarray(measured_psi, dtype=np.float64)
    lo, hi = np.asarray(low_psi, dtype=np.float64), np.asarray(high_psi, dtype=np.float64)
    return m - np.minimum(np.maximum(m, lo), hi)


def implied_hgl_ft(ground_ft: ArrayLike, gauge_height_ft: ArrayLike, measured_psi: ArrayLike,
                   psi_per_ft: float) -> NDArray[np.float64]:
    """The HGL, ft, a reading implies: ground + gauge height + measured / psi_per_ft."""
    return (np.asarray(ground_ft, dtype=np.float64) + np.asarray(gauge_height_ft, dtype=np.float64)
            + np.asarray(measured_psi, dtype=np.float64) / psi_per_ft)


def combined_sigma_psi(gauge_psi: ArrayLike, dem_rmse_ft: ArrayLike, hgl_uncertainty_ft: ArrayLike,
                       psi_per_ft: float) -> NDArray[np.float64]:
    """One standard uncertainty, psi: ``sqrt(gauge^2 + (k * dem_rmse)^2 + (k * hgl_uncertainty)^2)``, the three
    taken as independent."""
    g = np.asarray(gauge_psi, dtype=np.float64)
    d = psi_per_ft * np.asarray(dem_rmse_ft, dtype=np.float64)
    u = psi_per_ft * np.asarray(hgl_uncertainty_ft, dtype=np.float64)
    return np.sqrt(g * g + d * d + u * u)


def check_readings(*, measured_psi: ArrayLike, has_geometry: ArrayLike, zoned: ArrayLike, ground_ft: ArrayLike,
                   gauge_height_ft: ArrayLike, hgl_low_ft: ArrayLike, hgl_high_ft: ArrayLike, gauge_psi: ArrayLike,
                   dem_rmse_ft: ArrayLike, hgl_uncertainty_ft: ArrayLike, psi_per_ft: float,
                   rules: Rules = Rules()) -> pd.DataFrame:
    """Every reading against the screening, one row each.

    ``hgl_low_ft``/``hgl_high_ft`` are the HGL the reading is compared with:
    the recorded HGL at the time in both where there is one, else the zone's
    range. Columns: ``predicted_psi_low``, ``predicted_psi_high``,
    ``residual_psi``, ``residual_ft``, ``implied_hgl_ft``, ``sigma_psi``,
    ``outlier_limit_psi`` and ``check`` (one of :data:`CHECKS`); the numbers
    are NaN for a reading that was not compared.
    """
    m = np.asarray(measured_psi, dtype=np.float64)
    ground = np.asarray(ground_ft, dtype=np.float64)
    height = np.broadcast_to(np.asarray(gauge_height_ft, dtype=np.float64), m.shape)
    conditions = [np.isnan(m), m < 0, ~np.asarray(has_geometry, dtype=bool), ~np.asarray(zoned, dtype=bool),
                  np.isnan(ground)]
    first = np.select(conditions, list(range(len(conditions))), default=len(conditions))
    compared = first == len(conditions)
    keep = np.where(compared, 1.0, np.nan)  # NaN out every number of a reading not compared
    low = predicted_psi(ground, height, hgl_low_ft, psi_per_ft) * keep
    high = predicted_psi(ground, height, hgl_high_ft, psi_per_ft) * keep
    res = residual_psi(m, low, high)
    sigma = combined_sigma_psi(gauge_psi, dem_rmse_ft, hgl_uncertainty_ft, psi_per_ft) * keep
    limit = np.maximum(rules.outlier_psi, rules.outlier_sigmas * sigma)
    outlier = compared & (np.abs(res) > limit)
    first[compared] = np.where(outlier[compared], CHECKS.index("outlier"), CHECKS.index("consistent"))
    return pd.DataFrame({
        "predicted_psi_low": low,
        "predicted_psi_high": high,
        "residual_psi": res,
        "residual_ft": res / psi_per_ft,
        "implied_hgl_ft": implied_hgl_ft(ground, height, m, psi_per_ft) * keep,
        "sigma_psi": sigma,
        "outlier_limit_psi": limit,
        "check": pd.array(np.asarray(CHECKS, dtype=object)[first], dtype="str"),
    })


#: at most this many points enter a pairwise-distance computation (an evenly spaced selection beyond it): a
#: median and a mean of distances are stable long before, and memory stays at a few MB per zone
MAX_PAIRWISE = 400


def _pairwise(pts: NDArray[np.float64]) -> NDArray[np.float64]:
    """The distances between every two of ``pts`` (an evenly spaced selection of MAX_PAIRWISE when more)."""
    if len(pts) > MAX_PAIRWISE:
        pts = pts[np.linspace(0, len(pts) - 1, MAX_PAIRWISE).astype(np.intp)]
    d = np.sqrt(((pts[:, None, :] - pts[None, :, :]) ** 2).sum(axis=-1))
    return d[np.triu_indices(len(pts), k=1)]


def clustered(x: NDArray[np.float64], y: NDArray[np.float64], members: NDArray[np.bool_]) -> bool:
    """Whether the ``members`` (two or more) lie closer together than the zone's readings do: the mean distance
    between two members is below the median distance between two readings of the zone (scale-free: any CRS units)."""
    if members.sum() < 2 or members.size < 3:
        return False
    pts = np.column_stack([x, y])
    return bool(np.mean(_pairwise(pts[members])) < np.median(_pairwise(pts)))


#: per kind of source, the HGL error a steady bias may be, in words
_HGL_ERROR = {
    "tank": "a tank-level error (the levels configured, or the SCADA levels recorded with the readings)",
    "prv": "a PRV setting or valve elevation other than configured",
    "pump": "a discharge HGL other than configured",
}


def what_if(src: Source, correction_ft: float, psi_per_ft: float) -> str:
    """The ``--set`` options that move ``src``'s HGL by ``correction_ft``, to try the readings' suggestion."""
    z = src.zone
    if src.kind == "tank":
        return (f"--set zones.source.{z}.high_water_ft={src.high_water_ft + correction_ft:.1f} "
                f"--set zones.source.{z}.low_water_ft={src.low_water_ft + correction_ft:.1f}")
    if src.kind == "prv":
        return f"--set zones.source.{z}.setting_psi={src.setting_psi + correction_ft * psi_per_ft:.1f}"
    return f"--set zones.source.{z}.discharge_hgl_ft={src.discharge_hgl_ft + correction_ft:.1f}"


def _ids(ids: NDArray, sel: NDArray[np.bool_]) -> str:
    shown = [str(v) for v in ids[sel][:6]]
    return ", ".join(shown) + (", ..." if sel.sum() > 6 else "")


def zone_table(*, zone: ArrayLike, checks: ArrayLike, residual_psi: ArrayLike, sigma_psi: ArrayLike, x: ArrayLike,
               y: ArrayLike, ids: ArrayLike, sources: Sequence[Source], psi_per_ft: float,
               rules: Rules = Rules()) -> pd.DataFrame:
    """One row per zone of ``sources``: how its readings agree with the screening.

    Columns: ``zone``, ``source_kind``, ``readings`` (compared), ``bias_psi``
    (median residual), ``bias_ft``, ``mad_psi``, ``within_2_psi`` and
    ``within_5_psi`` (shares, 0 to 1), ``outliers``, ``hgl_correction_ft``
    (median implied HGL minus the HGL assumed: the median residual in ft),
    ``bias_limit_psi`` (what ``|bias|`` must exceed), ``significant_bias``,
    ``pattern`` ("steady", "uneven", "cluster", "scattered outliers", or ""
    joined by "; "), ``likely_causes`` (words) and ``what_if`` (``--set``
    options that apply the correction, for a significant bias).
    """
    zone = np.asarray(pd.array(zone, dtype="str").to_numpy(dtype=object, na_value=None))
    checks = np.asarray(checks, dtype=object)
    res = np.asarray(residual_psi, dtype=np.float64)
    sig = np.asarray(sigma_psi, dtype=np.float64)
    x, y = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
    ids = np.asarray(ids, dtype=object)
    compared = np.isin(checks, COMPARED)
    rows = []
    for src in sources:
        sel = compared & (zone == src.zone)
        r, s = res[sel], sig[sel]
        n = int(sel.sum())
        row: dict[str, object] = {"zone": src.zone, "source_kind": src.kind, "readings": n}
        if n == 0:
            rows.append({**row, "bias_psi": np.nan, "bias_ft": np.nan, "mad_psi": np.nan, "within_2_psi": np.nan,
                         "within_5_psi": np.nan, "outliers": 0, "hgl_correction_ft": np.nan,
                         "bias_limit_psi": np.nan, "significant_bias": False, "pattern": "",
                         "likely_causes": "no readings", "what_if": ""})
            continue
        bias = float(np.median(r))
        mad = float(np.median(np.abs(r - bias)))
        spread = max(float(np.sqrt(np.mean(s * s))), MAD_TO_SD * mad)
        limit = max(rules.bias_psi, rules.z * MEDIAN_SE_FACTOR * spread / np.sqrt(n))
        significant = n >= rules.min_readings and abs(bias) > limit
        out = checks[sel] == "outlier"
        patterns, causes = [], []
        if significant:
            sign = "high" if bias > 0 else "low"
            if MAD_TO_SD * mad <= float(np.sqrt(np.mean(s * s))):
                patterns.append("steady")
                causes.append(f"readings steadily {sign} by {abs(bias):.1f} psi ({abs(bias) / psi_per_ft:.1f} ft): "
                              "likely a datum offset between the DEM and the HGLs (terrain.datum_offset_ft, the "
                              f"vertical datums) or {_HGL_ERROR[src.kind]}")
            else:
                patterns.append("uneven")
                causes.append(f"readings {sign} by {abs(bias):.1f} psi at the median but scattered (MAD "
                              f"{mad:.1f} psi): look for a part of the zone fed otherwise (a closed valve, a PRV) "
                              "and check the gauge heights")
        zx, zy, zids = x[sel], y[sel], ids[sel]
        for sign, word in ((1, "high"), (-1, "low")):
            group = out & (np.sign(r) == sign)
            if group.sum() >= 2 and clustered(zx, zy, group):
                patterns.append("cluster")
                causes.append(f"{int(group.sum())} {word} outliers close together ({_ids(zids, group)}): likely a "
                              "closed valve or a wrong PRV setting in that part of the zone; check the valves and "
                              "PRVs between them and the source")
                out = out & ~group
        if out.any():
            patterns.append("scattered outliers")
            causes.append(f"{int(out.sum())} outlier{'s' if out.sum() > 1 else ''} ({_ids(zids, out)}): check each "
                          "reading (gauge, height above ground, location, time)")
        correction = bias / psi_per_ft
        rows.append({
            **row, "bias_psi": bias, "bias_ft": bias / psi_per_ft, "mad_psi": mad,
            "within_2_psi": float(np.mean(np.abs(r) <= 2.0)), "within_5_psi": float(np.mean(np.abs(r) <= 5.0)),
            "outliers": int((checks[sel] == "outlier").sum()), "hgl_correction_ft": correction,
            "bias_limit_psi": limit, "significant_bias": bool(significant), "pattern": "; ".join(patterns),
            "likely_causes": "; ".join(causes) or "agrees with the screening",
            "what_if": what_if(src, correction, psi_per_ft) if significant else "",
        })
    return pd.DataFrame(rows)
