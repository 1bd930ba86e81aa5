"""Zone summaries and mailing lists from the per-customer results: pure pandas.

Mailing lists group customers by their mailing address (the configured
``mail_fields``) so each owner gets one letter listing every account at that
address. Text cells that a spreadsheet would run as a formula are
neutralised with a leading apostrophe (the usual CSV-injection defence).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import pandas as pd

from .classify import FLAGGED_LAYERS, STATUSES
from .pressure import Source

#: for each flagged status, the pressure column that is worst and whether low or high is worse.
WORST: dict[str, tuple[str, str]] = {
    "high": ("psi_max", "max"),
    "low": ("psi_min", "min"),
    "above_hgl": ("psi_min", "min"),
    "low_upper_floors": ("psi_top", "min"),
}
FORMULA_PREFIXES = ("=", "+", "-", "@", "\t", "\r")


def neutralise(value: object) -> object:
    """Prefix text that a spreadsheet would run as a formula with an apostrophe."""
    if isinstance(value, str) and value.startswith(FORMULA_PREFIXES):
        return "'" + value
    return value


def neutralise_frame(df: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``df`` with every text cell neutralised."""
    out = df.copy()
    for col in out.columns:
        if pd.api.types.is_string_dtype(out[col]) and out[col].dtype != object:
            text = out[col]
            risky = text.str.startswith(FORMULA_PREFIXES).fillna(False).to_numpy(dtype=bool)
            if risky.any():
                out.loc[risky, col] = "'" + text[risky]
        elif out[col].dtype == object:
            out[col] = out[col].map(neutralise)
    return out


def _join_runs(values: list[str], starts: np.ndarray, ends: np.ndarray) -> list[str]:
    """``"; "``-joined ``values[s:e]`` for each run."""
    return ["; ".join(values[s:e]) for s, e in zip(starts.tolist(), ends.tolist())]


def mailing_list(
    customers: pd.DataFrame, status: str, *, id_field: str, mail_fields: Sequence[str]
) -> pd.DataFrame:
    """One row per distinct mailing address among customers with ``status``.

    Columns: the mail fields, ``accounts`` (ids joined by "; ", sorted),
    ``customer_count``, ``zones`` and ``worst_psi`` (the highest psi_max for
    high pressure, the lowest psi_min or psi_top otherwise). Rows are sorted
    most severe first, then by first account. Without mail fields, one row per
    customer.
    """
    col, how = WORST[status]
    # the id field may also be a mail field: select each column once
    sub = customers.loc[customers["status"] == status, list(dict.fromkeys([id_field, *mail_fields, "zone", col]))]
    keys = list(mail_fields) or [id_field]
    cols = [*keys, "accounts", "customer_count", "zones", "worst_psi"]
    if sub.empty:
        return pd.DataFrame(columns=cols)
    # vectorised group-by: one integer code per address, then runs of a sort by (code, text)
    code = sub.groupby(keys, dropna=False, sort=False).ngroup().to_numpy()
    n_groups = int(code.max()) + 1
    ids = np.asarray(sub[id_field].astype(str).to_numpy(dtype=object), dtype=str)
    order = np.lexsort((ids, code))
    sorted_code = code[order]
    starts = np.flatnonzero(np.r_[True, sorted_code[1:] != sorted_code[:-1]])
    ends = np.r_[starts[1:], sorted_code.size]
    accounts = _join_runs(ids[order].tolist(), starts, ends)
    zones = np.asarray(sub["zone"].map(str).to_numpy(dtype=object), dtype=str)
    zorder = np.lexsort((zones, code))
    zc, zs = code[zorder], zones[zorder]
    first = np.r_[True, (zc[1:] != zc[:-1]) | (zs[1:] != zs[:-1])]  # distinct zones per address
    zc, zs = zc[first], zs[first]
    zstarts = np.flatnonzero(np.r_[True, zc[1:] != zc[:-1]])
    zends = np.r_[zstarts[1:], zc.size]
    first_row = order[starts]  # rows sorted by code, so group g's first row is at starts[g]
    out = sub.iloc[first_row][keys].reset_index(drop=True)
    out["accounts"] = accounts
    out["customer_count"] = np.bincount(code, minlength=n_groups)
    out["zones"] = _join_runs(zs.tolist(), zstarts, zends)
    worst = pd.Series(sub[col].to_numpy(dtype=np.float64)).groupby(code).agg(how)
    out["worst_psi"] = worst.reindex(range(n_groups)).to_numpy().round(1)
    ascending = how == "min"
    out = out.sort_values(["worst_psi", "accounts"], ascending=[ascending, True], kind="stable").reset_index(drop=True)
    return neutralise_frame(out[cols])


def mailing_lists(customers: pd.DataFrame, *, id_field: str, mail_fields: Sequence[str]) -> dict[str, pd.DataFrame]:
    """Every flagged status's mailing list, keyed by output name (``high_pressure`` ...)."""
    return {
        FLAGGED_LAYERS[status]: mailing_list(customers, status, id_field=id_field, mail_fields=mail_fields)
        for status in FLAGGED_LAYERS
    }


def zone_summary(customers: pd.DataFrame, sources: Sequence[Source], psi_per_ft: float) -> pd.DataFrame:
    """Per zone: source kind, HGL range, customer count, count by status, ground and psi_max spread."""
    rows = []
    for src in sources:
        high, low = src.hgl_range(psi_per_ft)
        sub = customers[customers["zone"] == src.zone]
        row: dict[str, object] = {
            "zone": src.zone,
            "source_kind": src.kind,
            "hgl_high_ft": high,
            "hgl_low_ft": low,
            "customers": int(len(sub)),
        }
        counts = sub["status"].value_counts()
        for status in STATUSES:
            row[f"n_{status}"] = int(counts.get(status, 0))
        for col in ("ground_ft", "psi_max"):
            vals = sub[col].to_numpy(dtype=np.float64)
            vals = vals[~np.isnan(vals)]
            for stat, fn in (("min", np.min), ("median", np.median), ("max", np.max)):
                row[f"{col}_{stat}"] = float(np.round(fn(vals), 2)) if vals.size else np.nan
        rows.append(row)
    return pd.DataFrame(rows)
