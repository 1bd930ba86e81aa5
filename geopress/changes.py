"""What changed since the previous run: pure pandas and Arrow over ids and statuses.

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

The current customers carry their change in the ``customers`` layer
(:func:`change_columns`); the removed ones, which it lacks, form a layer of
their own (:func:`removed_layer`).

"Flagged" means a status with a mailing list, a finding
(:data:`geopress.findings.FLAGGED_LAYERS`). The ``new_<list>`` mailing lists
follow the findings, not the status: they hold the customers who have that
list's finding now and did not have it in the previous run (a previous run
written before findings had their columns had only its status's) -- newly
flagged, with a finding added to another, or new customers -- so a job that
mails only them never mails an owner twice for the same finding.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from .findings import FINDINGS, FLAGGED_LAYERS, FLAGGED_STATUSES
from .tables import in_finding, mailing_list

CHANGES: tuple[str, ...] = ("new_customer", "removed", "unchanged", "newly_flagged", "cleared", "status_changed")
#: the dtype a frame gives text inserted as Python objects: ``str`` (Arrow, NaN where missing) in pandas 3
_TEXT = pd.Series(np.array(["x", None], dtype=object)).dtype
_ARROW_TEXT = isinstance(_TEXT, pd.StringDtype) and _TEXT.storage == "pyarrow"


def _arrow(values: pd.Series) -> pa.Array:
    """``values`` as one Arrow array (no copy for Arrow-backed text), null where missing."""
    arr = pa.array(values, from_pandas=True)
    return arr.combine_chunks() if isinstance(arr, pa.ChunkedArray) else arr


def _codes(values: pd.Series) -> tuple[np.ndarray, list]:
    """An integer code per value (-1 where missing) and the distinct values the codes index."""
    enc = pc.dictionary_encode(_arrow(values))
    return pc.fill_null(enc.indices, -1).to_numpy().astype(np.int64), enc.dictionary.to_pylist()


def _recode(codes: np.ndarray, own: list, vocab: list) -> np.ndarray:
    """``codes`` into ``own`` as codes into ``vocab`` (which holds every value of ``own``); -1 stays -1."""
    if own == vocab[: len(own)]:
        return codes
    where = np.array([vocab.index(v) for v in own] + [-1], dtype=np.int64)
    return where[codes]  # -1 picks the trailing -1


class DuplicatePreviousIds(ValueError):
    """The previous run lists an id more than once."""


def _previous_rows(prev_keys: pa.Array, cur_keys: pa.Array) -> np.ndarray:
    """For each current key, the position of the same key among the previous ones, -1 where absent."""
    if len(prev_keys) == 0:
        return np.full(len(cur_keys), -1, dtype=np.int64)
    if prev_keys.equals(cur_keys):  # the same customers in the same order: the usual nightly run
        return np.arange(len(cur_keys), dtype=np.int64)
    # one hash pass over both runs' keys (missing ids match each other, as in a pandas Index)
    enc = pc.dictionary_encode(pa.concat_arrays([prev_keys, cur_keys]), null_encoding="encode")
    codes = enc.indices.to_numpy()
    prev_codes, cur_codes = codes[: len(prev_keys)], codes[len(prev_keys):]
    if np.bincount(prev_codes, minlength=len(enc.dictionary)).max() > 1:
        raise DuplicatePreviousIds("the previous run's ids are not unique")
    where = np.full(len(enc.dictionary), -1, dtype=np.int64)
    where[prev_codes] = np.arange(len(prev_keys))
    return where[cur_codes]


def compare(
    previous_ids: pd.Series,
    previous_status: pd.Series,
    current_ids: pd.Series,
    current_status: pd.Series,
) -> pd.DataFrame:
    """One row per customer of either run, current customers first (in order), then removed ones.

    Columns: ``key`` (the id as text), ``previous_status`` (missing for new
    customers), ``status`` (missing for removed ones), ``change`` and
    ``current_row`` / ``previous_row`` (positions in the inputs, -1 where
    absent). The statuses and the change are categoricals; a missing status
    is never the same as another. Ids must be unique in each run (the
    current run's reader checks them; :class:`DuplicatePreviousIds` when the
    previous ids are not).
    """
    prev_keys = previous_ids.astype(str)
    cur_keys = current_ids.astype(str)
    prev_row = _previous_rows(_arrow(prev_keys).cast(pa.large_string()), _arrow(cur_keys).cast(pa.large_string()))
    known = prev_row >= 0
    n_cur, n_prev = len(cur_keys), len(prev_keys)

    # statuses as integer codes into one vocabulary of both runs' values
    prev_code, prev_vals = _codes(previous_status)
    cur_code, cur_vals = _codes(current_status)
    vocab = list(dict.fromkeys([*prev_vals, *cur_vals]))
    prev_code, cur_code = _recode(prev_code, prev_vals, vocab), _recode(cur_code, cur_vals, vocab)
    before = prev_code[prev_row] if n_prev else np.full(n_cur, -1, dtype=np.int64)
    before[~known] = -1
    flagged = np.array([v in FLAGGED_LAYERS for v in vocab] + [False])  # the last entry is for -1
    ok = vocab.index("ok") if "ok" in vocab else -2
    was, now = flagged[before], flagged[cur_code]
    code = {c: np.int8(i) for i, c in enumerate(CHANGES)}
    change = np.select(
        [~known, (before == cur_code) & (cur_code >= 0), ~was & now, was & (cur_code == ok)],
        [code["new_customer"], code["unchanged"], code["newly_flagged"], code["cleared"]],
        default=code["status_changed"],
    ).astype(np.int8)

    seen = np.zeros(n_prev, dtype=bool)
    seen[prev_row[known]] = True
    gone = np.flatnonzero(~seen)
    n_gone = gone.size
    statuses = pd.Index(vocab, dtype=object)
    return pd.DataFrame({
        "key": pd.concat([cur_keys, prev_keys.iloc[gone]], ignore_index=True),
        "previous_status": pd.Categorical.from_codes(np.r_[before, prev_code[gone]], categories=statuses),
        "status": pd.Categorical.from_codes(np.r_[cur_code, np.full(n_gone, -1)], categories=statuses),
        "change": pd.Categorical.from_codes(np.r_[change, np.full(n_gone, code["removed"])], categories=CHANGES),
        "current_row": np.r_[np.arange(n_cur), np.full(n_gone, -1)].astype(np.int64),
        "previous_row": np.r_[prev_row, gone].astype(np.int64),
    })


def counts(table: pd.DataFrame) -> dict[str, int]:
    """Customers per change, every change listed."""
    vc = table["change"].value_counts()
    return {c: int(vc.get(c, 0)) for c in CHANGES}


def newly_in_status(table: pd.DataFrame) -> dict[str, np.ndarray]:
    """For each flagged status, the current rows that have it now and did not before (in order)."""
    rows = table["current_row"].to_numpy()
    fresh = (rows >= 0) & (table["change"] != "unchanged").to_numpy()
    status = table["status"]
    return {s: rows[fresh & (status == s).to_numpy()].astype(np.int64) for s in FLAGGED_STATUSES}


def findings_of(customers: pd.DataFrame) -> dict[str, np.ndarray]:
    """Each finding's boolean array over ``customers`` (a run's, or an earlier one's: see
    :func:`geopress.tables.in_finding`)."""
    return {name: in_finding(customers, name) for name in FINDINGS}


def newly_in_finding(table: pd.DataFrame, current: Mapping[str, np.ndarray],
                     previous: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """For each finding, the current rows that have it now and did not in the previous run (in order).

    ``current`` and ``previous`` hold each finding's boolean array over the current and the previous
    customers (:func:`findings_of`); a new customer had none.
    """
    rows = table["current_row"].to_numpy()
    previous_row = table["previous_row"].to_numpy()
    here = rows >= 0
    rows, previous_row = rows[here], previous_row[here]
    known = previous_row >= 0
    out = {}
    for name in FINDINGS:
        was = np.zeros(rows.size, dtype=bool)
        was[known] = np.asarray(previous[name], dtype=bool)[previous_row[known]]
        out[name] = rows[np.asarray(current[name], dtype=bool)[rows] & ~was].astype(np.int64)
    return out


def new_mailing_lists(
    customers: pd.DataFrame, newly: Mapping[str, np.ndarray], *, id_field: str, mail_fields: Sequence[str],
    full: Mapping[str, pd.DataFrame] | None = None, letter_fields: Sequence[str] = (),
    rated: Mapping[str, tuple[np.ndarray, Any]] | None = None, firm_only: bool = False,
) -> dict[str, pd.DataFrame]:
    """``new_<list>`` mailing lists: :func:`geopress.tables.mailing_list` over the customers newly in each finding
    (``newly``, as :func:`newly_in_finding` gives them).

    ``full`` may hold the run's own lists by name (``high_pressure`` ...),
    as :func:`geopress.tables.mailing_lists` makes them from ``customers``
    with the same fields (``letter_fields`` as there): a finding whose every customer is newly in it (a
    first run) then takes a copy of its list instead of building it again. ``rated`` and ``firm_only`` as in
    :func:`geopress.tables.mailing_lists`.
    """
    out = {}
    for finding, rows in newly.items():
        name = FLAGGED_LAYERS[finding]
        if full is not None and name in full and rows.size and rows.size == int(in_finding(customers, finding).sum()):
            out[f"new_{name}"] = full[name].copy()
            continue
        out[f"new_{name}"] = mailing_list(customers.iloc[rows], finding, id_field=id_field, mail_fields=mail_fields,
                                          letter_fields=letter_fields, firm_only=firm_only,
                                          rated=None if rated is None else (rated[finding][0][rows],
                                                                            rated[finding][1][rows]))
    return out


@dataclass(frozen=True)
class Summary:
    """Change counts for run.json and the log."""

    baseline: str | None
    counts: dict[str, int]
    newly_in_status: dict[str, int]
    #: customers newly in each finding: the rows of its ``new_<list>``
    newly_in_finding: dict[str, int]

    def to_dict(self) -> dict[str, object]:
        return {"baseline": self.baseline, "counts": self.counts, "newly_in_status": self.newly_in_status,
                "newly_in_finding": self.newly_in_finding}

    def line(self) -> str:
        """``newly_flagged 2, cleared 1, ...`` (changes with a count), or ``none``."""
        parts = [f"{c} {n}" for c, n in self.counts.items() if n and c != "unchanged"]
        return ", ".join(parts) or "none"


def summarise(table: pd.DataFrame, baseline: str | None, newly: Mapping[str, np.ndarray]) -> Summary:
    """The :class:`Summary` of a comparison table and of the rows newly in each finding (:func:`newly_in_finding`)."""
    return Summary(
        baseline=baseline,
        counts=counts(table),
        newly_in_status={s: int(r.size) for s, r in newly_in_status(table).items()},
        newly_in_finding={s: int(r.size) for s, r in newly.items()},
    )


def _stored_text(values: pd.Series) -> pd.api.extensions.ExtensionArray | np.ndarray:
    """A categorical of text as a frame stores it when inserted as Python objects (None where missing).

    Where pandas makes such text Arrow ``str``, it is built from Arrow
    without Python strings, unless no value is present (e.g.
    ``previous_status`` on a first run): those stay objects, all None.
    """
    codes = values.cat.codes.to_numpy()
    if _ARROW_TEXT and (codes >= 0).any():
        text = pa.array(values.cat.categories.to_numpy(dtype=object), pa.large_string())
        return pd.array(text.take(pa.array(codes, mask=codes < 0)), dtype=_TEXT)
    return values.to_numpy(dtype=object, na_value=None)


def change_columns(table: pd.DataFrame, n_current: int) -> dict[str, pd.Categorical]:
    """``previous_status`` and ``change`` of the current customers, in their order, as categoricals (like
    ``status``: a code a customer; written as text).

    ``table`` is a :func:`compare` table of ``n_current`` current customers (its first rows).
    """
    return {col: table[col].iloc[:n_current].array for col in ("previous_status", "change")}


def removed_layer(table: pd.DataFrame, previous: pd.DataFrame, *, id_field: str,
                  columns: Sequence[str]) -> pd.DataFrame:
    """The customers of the previous run that this one lacks: id, ``previous_status``, ``change``, then
    ``columns`` (e.g. mail fields, zone, geometry; empty where the previous run lacks them).

    ``previous`` holds the previous run's rows of the removed customers, in the order of ``table``'s
    removed rows. Pass a GeoDataFrame to get a GeoDataFrame.
    """
    gone = np.flatnonzero(table["current_row"].to_numpy() < 0)
    out = previous.reindex(columns=list(dict.fromkeys([id_field, *columns]))).reset_index(drop=True)
    for pos, col in enumerate(("previous_status", "change"), start=1):
        out.insert(pos, col, _stored_text(table[col].iloc[gone]))
    return out
