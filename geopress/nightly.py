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

import numpy as np
import pandas as pd

from . import changes
from .config import Config
from .errors import InputError
from .findings import FINDING_COLUMNS
from .io import baseline as baseline_io
from .io import postgis
from .io import write as write_io
from .io.lock import OutputLock
from .units import customers_in_units, mailing_columns_in_units, units_for

log = logging.getLogger(__name__)


def publishes(cfg: Config) -> bool:
    """Whether a run of ``cfg`` publishes into a database: ``output.database`` is set and the run is not a what-if
    nor sent to another folder (``--set``, ``--out-dir``), whose results must not replace the published ones."""
    return cfg.output.database is not None and not cfg.overrides


def mailing_lock_target(cfg: Config) -> Path | None:
    """What the mailing folder's own lock is named after, when the folder is not the GeoPackage's (nor in it)."""
    folder, out = cfg.output.mailing_dir, cfg.output.path.parent
    return None if folder == out or out in folder.parents else folder / "mailing-lists"


@contextmanager
def guarded_outputs(cfg: Config, targets: list[Path]) -> Iterator[postgis.Publication | None]:
    """Hold the output lock (and the mailing folder's, when it lies elsewhere); first undo a half-done
    commit and remove stale temporaries of ``targets``. When the run publishes into a database
    (:func:`publishes`), hold that schema's advisory lock too, and give its :class:`~geopress.io.postgis.Publication`."""
    with ExitStack() as stack:
        stack.enter_context(OutputLock(cfg.output.path))
        mailing = mailing_lock_target(cfg)
        if mailing is not None:
            stack.enter_context(OutputLock(mailing, key="output.mailing_dir"))
        publication = None
        if publishes(cfg):
            publication = stack.enter_context(postgis.Publication(cfg.output.database, cfg.output.schema))
        write_io.recover(cfg.output.path)
        for target in targets:
            for p in write_io.remove_stale_temps(target):
                log.info("removed a temporary file left by an earlier run: %s", p)
        yield publication


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


def track(result, baseline: str | os.PathLike | None, *, accept_drop: bool = False,
          published: postgis.Publication | None = None) -> dict[str, np.ndarray]:
    """Compare ``result`` (a pipeline Result) with the baseline: ``baseline`` when given, else the customers
    last ``published`` into the database when the run publishes and one has, else as :func:`_baseline_path`
    says (so a run that starts publishing keeps the history of its GeoPackage); adds the
    ``previous_status`` and ``change`` columns to its customers, sets its removed customers and returns the
    rows newly in each finding, for :func:`new_lists`.

    Raises InputError when more customers are missing than ``output.max_drop_percent`` of the
    baseline's (an export cut short), unless ``accept_drop``.
    """
    cfg = result.config
    cust_cfg = cfg.customers
    current = result.customers
    prev, key = None, "output.schema"
    if baseline is None and published is not None:
        columns = [cust_cfg.id_field, "status", "zone", *cust_cfg.mail_fields, *FINDING_COLUMNS.values()]
        frame = published.previous(cust_cfg.id_field, columns)
        if frame is not None:
            def fetch(ids: pd.Series, names: list[str]):
                return published.previous_rows(cust_cfg.id_field, ids, names, result.points.crs)

            prev = baseline_io.published_baseline(published.where, frame, cust_cfg.id_field, result.points.crs, fetch,
                                                  key=key)
    if prev is None:
        path, key = _baseline_path(cfg, baseline)
        prev = None if path is None else baseline_io.read_baseline(
            path, id_field=cust_cfg.id_field, mail_fields=cust_cfg.mail_fields, crs=result.points.crs, key=key,
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
                                               columns=[*cust_cfg.mail_fields, "zone", "geometry"])
    result.info["changes"] = summary.to_dict()
    log.debug("changes since %s: %s", summary.baseline or "no earlier run", summary.line())
    return newly


def new_lists(result, newly: dict[str, np.ndarray]) -> None:
    """Set ``result.new_mailing``, the ``new_*`` mailing lists of the customers :func:`track` found ``newly`` in
    each finding, once ``result`` has its own lists."""
    cfg = result.config
    cust_cfg = cfg.customers
    # in the display units, as the run's own lists (which a first run copies)
    units = units_for(cfg.output.units)
    result.new_mailing = {name: mailing_columns_in_units(df, units) for name, df in changes.new_mailing_lists(
        customers_in_units(result.customers, units), newly, id_field=cust_cfg.id_field,
        mail_fields=cust_cfg.mail_fields, letter_fields=cust_cfg.letter_fields, full=result.mailing,
        rated=result.rated, firm_only=cfg.output.mail_firm_only).items()}
