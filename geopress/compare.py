"""Customers whose status differs between two runs: pure pandas.

Customers are matched on their id. One present in only one run is listed
with the other side's status as :data:`ABSENT`. Counts per zone use the
zone of the second run (B), or of the first where B has none.
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd

#: the status shown for a customer missing from one of the runs.
ABSENT = "(absent)"
#: the zone name used for customers in no zone.
NO_ZONE = "(none)"
COMPARED = ("zone", "status", "psi_min", "psi_max")


def status_differences(a: gpd.GeoDataFrame, b: gpd.GeoDataFrame, id_field: str) -> gpd.GeoDataFrame:
    """One row per customer whose status differs between run A and run B.

    Columns: ``id_field``, ``zone`` (B's, else A's), then ``zone_a``,
    ``zone_b``, ``status_a``, ``status_b``, ``psi_min_a`` ... ``psi_max_b``;
    geometry from B (from A for customers only in A). Rows sorted by zone, id.
    """
    left = pd.DataFrame({c: a[c] for c in COMPARED}).assign(_id=a[id_field].astype(str).to_numpy(), _geom=a.geometry.to_numpy())
    right = pd.DataFrame({c: b[c] for c in COMPARED}).assign(_id=b[id_field].astype(str).to_numpy(), _geom=b.geometry.to_numpy())
    m = left.merge(right, on="_id", how="outer", suffixes=("_a", "_b"), indicator=True)
    for side in ("a", "b"):
        m[f"status_{side}"] = m[f"status_{side}"].fillna(ABSENT)
    diff = m[m["status_a"] != m["status_b"]].copy()
    zone = diff["zone_b"].where(diff["zone_b"].notna(), diff["zone_a"]).fillna(NO_ZONE)
    geom = np.where(diff["_merge"].to_numpy() == "left_only", diff["_geom_a"].to_numpy(), diff["_geom_b"].to_numpy())
    cols = ["zone_a", "zone_b", "status_a", "status_b", "psi_min_a", "psi_min_b", "psi_max_a", "psi_max_b"]
    out = pd.DataFrame({id_field: diff["_id"].to_numpy(), "zone": zone.to_numpy(dtype=object)})
    for c in cols:
        out[c] = diff[c].to_numpy()
    out = gpd.GeoDataFrame(out, geometry=gpd.GeoSeries(geom, crs=b.crs if b.crs is not None else a.crs))
    return out.sort_values(["zone", id_field], kind="stable").reset_index(drop=True)


def counts_by_zone(diff: pd.DataFrame) -> pd.DataFrame:
    """Per zone and change (``status_a`` -> ``status_b``), the number of customers; most frequent first in each zone."""
    if diff.empty:
        return pd.DataFrame({"zone": [], "status_a": [], "status_b": [], "customers": []}).astype({"customers": "int64"})
    counts = diff.groupby(["zone", "status_a", "status_b"], sort=True).size().rename("customers").reset_index()
    counts = counts.sort_values(["zone", "customers", "status_a", "status_b"], ascending=[True, False, True, True],
                                kind="stable")
    return counts.reset_index(drop=True)
