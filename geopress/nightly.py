"""What makes a run safe to schedule: the output lock, recovery, input checks, change tracking.

Called by :func:`geopress.pipeline.run` only; it joins
:mod:`geopress.io.lock`, :mod:`geopress.io.write`, :mod:`geopress.io.baseline`
and the pure :mod:`geopress.changes`.
"""

from __future__ import annotations

import logging
import os
import warnings
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

import numpy as np
import pandas as pd

from . import changes
from .config import Config
from .errors import DataWarning, InputError
from .io import baseline as baseline_io
from .io import write as write_io
from .io.lock import OutputLock
from .units import customers_in_units, mailing_columns_in_units, units_for

log = logging.getLogger(__name__)


@contextmanager
def guarded_outputs(cfg: Config, targets: list[Path]) -> Iterator[OutputLock]:
    """Hold the output lock; first undo a half-done commit and remove stale temporaries of ``targets``."""
    with OutputLock(cfg.output.path) as lock:
        write_io.recover(cfg.output.path)
        for target in targets:
            for p in write_io.remove_stale_temps(target):
                log.info("removed a temporary file left by an earlier run: %s", p)
        yield lock


def snapshot(paths: list[Path]) -> dict[Path, tuple[int, int]]:
    """Size and modification time (ns) of each input."""
    out = {}
    for p in paths:
        try:
            st = p.stat()
        except OSError:
            continue  # reading it will say what is wrong
        out[p] = (st.st_size, st.st_mtime_ns)
    return out


def check_unchanged(before: dict[Path, tuple[int, int]]) -> None:
    """Raise InputError if an input was replaced or rewritten while the run read it."""
    after = snapshot(list(before))
    for p, stamp in before.items():
        if after.get(p) != stamp:
            raise InputError("changed while this run was reading it (is an export still writing it?); "
                             "run again once it is complete", path=p, key="input")


def track(result, baseline: str | os.PathLike | None) -> None:
    """Compare ``result`` (a pipeline Result) with the baseline; sets its changes and new mailing lists.

    ``baseline`` None means the previous GeoPackage at ``output.path``, when
    there is one (the first run finds every customer new).
    """
    cfg = result.config
    cust_cfg = cfg.customers
    current = result.customers
    if baseline is not None:
        prev = baseline_io.read_baseline(Path(baseline), id_field=cust_cfg.id_field, mail_fields=cust_cfg.mail_fields,
                                         crs=current.crs, key="--baseline")
    elif cfg.output.path.exists():
        prev = baseline_io.read_baseline(cfg.output.path, id_field=cust_cfg.id_field, mail_fields=cust_cfg.mail_fields,
                                         crs=current.crs, key="output.path")
    else:
        prev = None
    frame = prev.frame if prev is not None else pd.DataFrame({cust_cfg.id_field: [], "status": []}, dtype=object)
    try:
        table = changes.compare(frame[cust_cfg.id_field], frame["status"], current[cust_cfg.id_field],
                                current["status"])
    except changes.DuplicatePreviousIds as exc:
        raise InputError(f"the baseline's field '{cust_cfg.id_field}' has duplicate ids, so it cannot be compared "
                         "with this run; pass --baseline with another geopress GeoPackage", path=prev.path,
                         key="--baseline" if baseline is not None else "output.path") from exc
    summary = changes.summarise(table, None if prev is None else str(prev.path))
    removed = summary.counts["removed"]
    if prev is not None and removed * 2 > len(prev.frame):
        warnings.warn(
            f"{cust_cfg.path}: {removed} of the baseline's {len(prev.frame)} customers are missing from this run; "
            "check that the customers export is complete",
            DataWarning, stacklevel=2,
        )
    columns = [*cust_cfg.mail_fields, "zone", current.geometry.name]
    # removed customers come from the baseline: read only their rows, geometry included
    gone = table["current_row"].to_numpy() < 0
    previous = None
    if prev is not None:
        previous = prev.rows(table["previous_row"].to_numpy()[gone])
        table = table.copy()
        table.loc[gone, "previous_row"] = np.arange(int(gone.sum()))
    result.changes = changes.changes_layer(table, current, previous, id_field=cust_cfg.id_field, columns=columns)
    # in the display units, as the run's own lists (which a first run copies)
    units = units_for(cfg.output.units)
    result.new_mailing = {name: mailing_columns_in_units(df, units) for name, df in changes.new_mailing_lists(
        customers_in_units(current, units), table, id_field=cust_cfg.id_field, mail_fields=cust_cfg.mail_fields,
        letter_fields=cust_cfg.letter_fields, full=result.mailing).items()}
    result.info["changes"] = summary.to_dict()
    log.debug("changes since %s: %s", summary.baseline or "no earlier run", summary.line())
