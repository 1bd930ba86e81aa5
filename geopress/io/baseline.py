"""Reading the previous run's customers (id and status) to compare a run against.

The baseline is the ``customers`` layer of an earlier geopress GeoPackage:
by default the one at ``output.path`` before this run replaces it, or one
chosen with ``geopress run --baseline PATH``. Only the id field, ``status``,
``zone``, the mail fields it has and the geometry are read.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import geopandas as gpd
from pyproj import CRS

from .results import read_run_layer, run_layer_fields

log = logging.getLogger(__name__)

@dataclass
class Baseline:
    """The previous run's customers, geometry in the current run's CRS."""

    path: Path
    frame: gpd.GeoDataFrame


def read_baseline(
    path: Path, *, id_field: str, mail_fields: Sequence[str], crs: CRS, key: str
) -> Baseline:
    """Read the baseline GeoPackage at ``path``; ``key`` names where it came from in errors.

    Raises InputError when it is missing, not a GeoPackage geopress wrote, or
    lacks the id field or ``status``.
    """
    hint = "pass --baseline with an earlier geopress GeoPackage, or move the file away to start a fresh history"
    fields = run_layer_fields(path, key=key, hint=hint)
    frame = read_run_layer(path, fields, required=(id_field, "status"), optional=("zone", *mail_fields), key=key,
                           hint=hint)
    if frame.crs is not None and not CRS.from_user_input(frame.crs).equals(crs):
        frame = frame.to_crs(crs)
    else:
        frame = frame.set_crs(crs, allow_override=True)
    log.info("baseline: %d customers from %s", len(frame), path)
    return Baseline(path=path, frame=frame)
