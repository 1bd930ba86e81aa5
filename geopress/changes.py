"""What changed since the previous run: pure pandas over ids and statuses.

Customers are matched by the configured id field, compared as text (so an
id stored as 1 in one run and "1" in the next is the same customer). Each
customer gets exactly one change, the first that holds:

================  ==============================================================
new_customer      the id was not in the previous run
removed           the id was in the previous run and is not in this one
unchanged         same status as in the previous run
newly_flagged     not flagged before (ok, no_terrain, ...), flagged now
cleared           flagged before, ``ok`` now
status_changed    any other change, e.g. ``low`` to ``above_hgl``, or a
                  flagged customer that now has ``no_terrain``
================  ==============================================================

"Flagged" means a status with a mailing list
(:data:`geopress.classify.FLAGGED_LAYERS`). The ``new_<list>`` mailing lists
hold the customers whose status is that list's status now and was not in the
previous run -- newly flagged, changed from another status, or new
customers -- so a job that mails only them never mails an owner twice for the
same finding.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from .classify import FLAGGED_LAYERS
from .tables import mailing_list

CHANGES: tuple[str, ...] = ("new_customer", "removed", "unchanged", "newly_flagged", "cleared", "status_changed")


def _keys(ids: pd.Series) -> np.ndarray:
    return ids.astype(str).to_numpy(dtype=object)


def compare(
    previous_ids: pd.Series,
    previous_status: pd.Series,
    current_ids: pd.Series,
    current_status: pd.Series,
) -> pd.DataFrame:
    """One row per customer of either run, current customers first (in order), then removed ones.

    Columns: ``key`` (the id as text), ``previous_status`` (None for new
    customers), ``status`` (None for removed ones), ``change`` and
    ``current_row`` / ``previous_row`` (positions in the inputs, -1 where
    absent).
    """
    prev_keys = _keys(previous_ids)
    cur_keys = _keys(current_ids)
    # hash lookups on object arrays (ids are unique in each run): one pass each way
    prev_index = pd.Index(prev_keys, dtype=object)
    prev_row = prev_index.get_indexer(pd.Index(cur_keys, dtype=object)).astype(np.int64)
    known = prev_row >= 0
    prev_stat = np.asarray(previous_status, dtype=object)
    cur_stat = np.asarray(current_status, dtype=object)
    before = np.where(known, prev_stat[np.where(known, prev_row, 0)] if len(prev_stat) else None, None)

    flagged = list(FLAGGED_LAYERS)
    was = np.isin(before.astype(str), flagged) & known
    now = np.isin(cur_stat.astype(str), flagged)
    change = np.select(
        [~known, before == cur_stat, ~was & now, was & (cur_stat == "ok")],
        ["new_customer", "unchanged", "newly_flagged", "cleared"],
        default="status_changed",
    ).astype(object)

    seen = np.zeros(len(prev_keys), dtype=bool)
    seen[prev_row[known]] = True
    gone = np.flatnonzero(~seen)
    current = pd.DataFrame({
        "key": cur_keys, "previous_status": before, "status": cur_stat, "change": change,
        "current_row": np.arange(len(cur_keys)), "previous_row": prev_row,
    })
    removed = pd.DataFrame({
        "key": prev_keys[gone], "previous_status": prev_stat[gone], "status": np.full(gone.size, None, dtype=object),
        "change": np.full(gone.size, "removed", dtype=object),
        "current_row": np.full(gone.size, -1), "previous_row": gone,
    })
    return pd.concat([current, removed], ignore_index=True)


def counts(table: pd.DataFrame) -> dict[str, int]:
    """Customers per change, every change listed."""
    vc = table["change"].value_counts()
    return {c: int(vc.get(c, 0)) for c in CHANGES}


def newly_in_status(table: pd.DataFrame) -> dict[str, np.ndarray]:
    """For each flagged status, the current rows that have it now and did not before."""
    cur = table[table["current_row"] >= 0]
    fresh = cur["previous_status"].to_numpy(dtype=object) != cur["status"].to_numpy(dtype=object)
    return {
        status: cur.loc[fresh & (cur["status"] == status).to_numpy(), "current_row"].to_numpy(dtype=np.int64)
        for status in FLAGGED_LAYERS
    }


def new_mailing_lists(
    customers: pd.DataFrame, table: pd.DataFrame, *, id_field: str, mail_fields: Sequence[str]
) -> dict[str, pd.DataFrame]:
    """``new_<list>`` mailing lists: :func:`geopress.tables.mailing_list` over the newly-in-status customers."""
    out = {}
    for status, rows in newly_in_status(table).items():
        out[f"new_{FLAGGED_LAYERS[status]}"] = mailing_list(
            customers.iloc[rows], status, id_field=id_field, mail_fields=mail_fields
        )
    return out


@dataclass(frozen=True)
class Summary:
    """Change counts for run.json and the log."""

    baseline: str | None
    counts: dict[str, int]
    newly_in_status: dict[str, int]

    def to_dict(self) -> dict[str, object]:
        return {"baseline": self.baseline, "counts": self.counts, "newly_in_status": self.newly_in_status}

    def line(self) -> str:
        """``newly_flagged 2, cleared 1, ...`` (changes with a count), or ``none``."""
        parts = [f"{c} {n}" for c, n in self.counts.items() if n and c != "unchanged"]
        return ", ".join(parts) or "none"


def summarise(table: pd.DataFrame, baseline: str | None) -> Summary:
    """The :class:`Summary` of a comparison table."""
    return Summary(
        baseline=baseline,
        counts=counts(table),
        newly_in_status={s: int(r.size) for s, r in newly_in_status(table).items()},
    )



def changes_layer(
    table: pd.DataFrame,
    current: pd.DataFrame,
    previous: pd.DataFrame | None,
    *,
    id_field: str,
    columns: Sequence[str],
) -> pd.DataFrame:
    """The customers that changed: id, ``previous_status``, ``status``, ``change``, then ``columns``.

    ``current`` and ``previous`` are both runs' customers (``previous`` may be
    None when ``table`` has no removed customers). ``columns`` (e.g. mail
    fields, zone, geometry) come from the current run where the customer is
    in it, else from the previous run, empty where that run lacks them. Pass
    GeoDataFrames in one CRS to get a GeoDataFrame.
    """
    rep = table[table["change"] != "unchanged"]
    cur = rep[rep["current_row"] >= 0]
    gone = rep[rep["current_row"] < 0]
    take = list(dict.fromkeys([id_field, *columns]))
    parts = [current.iloc[cur["current_row"].to_numpy()].reindex(columns=take)]
    if len(gone):
        if previous is None:
            raise ValueError("the table has removed customers but no previous frame was given")
        parts.append(previous.iloc[gone["previous_row"].to_numpy()].reindex(columns=take))
    if len(parts) == 2 and parts[0][id_field].dtype != parts[1][id_field].dtype:
        parts = [p.assign(**{id_field: p[id_field].astype(str)}) for p in parts]
    out = pd.concat(parts, ignore_index=True)
    both = pd.concat([cur, gone], ignore_index=True)
    for pos, col in enumerate(("previous_status", "status", "change"), start=1):
        out.insert(pos, col, both[col].to_numpy(dtype=object))
    return out
