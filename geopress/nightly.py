"""What makes a run safe to schedule: the output lock, recovery, input checks, change tracking.

Called by :func:`geopress.pipeline.run` only; it joins
:mod:`geopress.io.lock`, :mod:`geopress.io.write`, :mod:`geopress.io.baseline`
and the pure :mod:`geopress.changes`.
"""

from __future__ import annotations

import logging
import os
from contextlib import ExitStack, contextmanager
from pathlib import Path
from typing import Iterator

import pandas as pd

from . import changes
from .config import Config
from .errors import InputError
from .findings import FINDING_COLUMNS
from .io import baseline as baseline_io
from .io import write as write_io
from .io.lock import OutputLock
from .units import customers_in_units, mailing_columns_in_units, units_for

log = logging.getLogger(__name__)


def mailing_lock_target(cfg: Config) -> Path | None:
    """What the mailing folder's own lock is named after, when the folder is not the GeoPackage's (nor in it)."""
    folder, out = cfg.output.mailing_dir, cfg.output.path.parent
    return None if folder == out or out in folder.parents else folder / "mailing-lists"


@contextmanager
def guarded_outputs(cfg: Config, targets: list[Path]) -> Iterator[None]:
    """Hold the output lock (and the mailing folder's, when it lies elsewhere); first undo a half-done
    commit and remove stale temporaries of ``targets``."""
    with ExitStack() as stack:
        stack.enter_context(OutputLock(cfg.output.path))
        mailing = mailing_lock_target(cfg)
        if mailing is not None:
            stack.enter_context(OutputLock(mailing, key="output.mailing_dir"))
        write_io.recover(cfg.output.path)
        for target in targets:
            for p in write_io.remove_stale_temps(target):
                log.info("removed a temporary file left by an earlier run: %s", p)
        yield


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


def baseline_link(output: Path) -> Path:
    """The last accepted run's GeoPackage beside ``output``: a hard link to the file that run committed."""
    return output.parent / f".{output.name}.baseline.gpkg"


def _baseline_path(cfg: Config, explicit: str | os.PathLike | None) -> tuple[Path | None, str]:
    """The GeoPackage to compare with and the key that names it in errors.

    ``--baseline`` when given; for a what-if into another folder, the main run's output (so its lists read
    "against tonight's run"); else the last accepted run (:func:`baseline_link`); else, for outputs written
    before that link was kept, the GeoPackage at ``output.path``; else none (a first run).
    """
    if explicit is not None:
        return Path(explicit), "--baseline"
    if cfg.what_if_of is not None:
        return (cfg.what_if_of, "--out-dir") if cfg.what_if_of.exists() else (None, "--out-dir")
    link = baseline_link(cfg.output.path)
    if link.exists():
        return link, "output.path"
    return (cfg.output.path, "output.path") if cfg.output.path.exists() else (None, "output.path")


def track(result, baseline: str | os.PathLike | None, *, accept_drop: bool = False) -> None:
    """Compare ``result`` (a pipeline Result) with the baseline (see :func:`_baseline_path`); adds the
    ``previous_status`` and ``change`` columns to its customers and sets its removed customers and its
    new mailing lists.

    Raises InputError when more customers are missing than ``output.max_drop_percent`` of the
    baseline's (an export cut short), unless ``accept_drop``.
    """
    cfg = result.config
    cust_cfg = cfg.customers
    current = result.customers
    path, key = _baseline_path(cfg, baseline)
    prev = None if path is None else baseline_io.read_baseline(
        path, id_field=cust_cfg.id_field, mail_fields=cust_cfg.mail_fields, crs=current.crs, key=key,
        optional=tuple(FINDING_COLUMNS.values()))
    frame = prev.frame if prev is not None else pd.DataFrame({cust_cfg.id_field: [], "status": []}, dtype=object)
    try:
        table = changes.compare(frame[cust_cfg.id_field], frame["status"], current[cust_cfg.id_field],
                                current["status"])
    except changes.DuplicatePreviousIds as exc:
        raise InputError(f"the baseline's field '{cust_cfg.id_field}' has duplicate ids, so it cannot be compared "
                         "with this run; pass --baseline with another geopress GeoPackage", path=prev.path,
                         key=key) from exc
    newly = changes.newly_in_finding(table, changes.findings_of(current), changes.findings_of(frame))
    summary = changes.summarise(table, None if prev is None else str(prev.path), newly)
    removed = summary.counts["removed"]
    limit = cfg.output.max_drop_percent
    if prev is not None and not accept_drop and removed > limit / 100 * len(prev.frame):
        raise InputError(
            f"{removed} of the baseline's {len(prev.frame)} customers ({100 * removed / len(prev.frame):.1f} %) are "
            f"missing from this run, more than output.max_drop_percent ({limit:g} %); check that the customers "
            "export is complete, or run again with --accept-drop to take this run as the new baseline",
            path=cust_cfg.path, key="output.max_drop_percent")
    for name, values in changes.change_columns(table, len(current)).items():
        current[name] = values
    # removed customers come from the baseline: read only their rows, geometry included
    gone = table["current_row"].to_numpy() < 0
    if prev is not None and gone.any():
        previous = prev.rows(table["previous_row"].to_numpy()[gone])
        result.removed = changes.removed_layer(table, previous, id_field=cust_cfg.id_field,
                                               columns=[*cust_cfg.mail_fields, "zone", current.geometry.name])
    # in the display units, as the run's own lists (which a first run copies)
    units = units_for(cfg.output.units)
    result.new_mailing = {name: mailing_columns_in_units(df, units) for name, df in changes.new_mailing_lists(
        customers_in_units(current, units), newly, id_field=cust_cfg.id_field, mail_fields=cust_cfg.mail_fields,
        letter_fields=cust_cfg.letter_fields, full=result.mailing).items()}
    result.info["changes"] = summary.to_dict()
    log.debug("changes since %s: %s", summary.baseline or "no earlier run", summary.line())
