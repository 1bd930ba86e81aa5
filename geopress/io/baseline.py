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
import numpy as np
import pandas as pd
import pyogrio
from pyproj import CRS

from ..errors import InputError
from .vector import _fmt_list

log = logging.getLogger(__name__)

LAYER = "customers"


@dataclass
class Baseline:
    """The previous run's customers (the read fields, no geometry; the index holds the feature ids).

    :meth:`rows` gives chosen rows with their geometry in ``crs``, the current run's CRS.
    """

    path: Path
    frame: pd.DataFrame
    columns: list[str]
    crs: CRS

    def rows(self, positions: np.ndarray) -> gpd.GeoDataFrame:
        """The rows at ``positions`` of :attr:`frame`, in that order, with their geometry in :attr:`crs`."""
        fids = self.frame.index.to_numpy()[positions]
        if len(fids) == 0:
            return gpd.GeoDataFrame(self.frame.iloc[positions].reset_index(drop=True),
                                    geometry=gpd.GeoSeries([], crs=self.crs))
        got = pyogrio.read_dataframe(self.path, layer=LAYER, columns=self.columns, fids=fids, fid_as_index=True,
                                     use_arrow=True)
        got = got.reindex(fids).reset_index(drop=True)
        if got.crs is not None and not CRS.from_user_input(got.crs).equals(self.crs):
            return got.to_crs(self.crs)
        return got.set_crs(self.crs, allow_override=True)


def read_baseline(
    path: Path, *, id_field: str, mail_fields: Sequence[str], crs: CRS, key: str
) -> Baseline:
    """Read the baseline GeoPackage at ``path``; ``key`` names where it came from in errors.

    Raises InputError when it is missing, not a GeoPackage geopress wrote, or
    lacks the id field or ``status``.
    """
    hint = "pass --baseline with an earlier geopress GeoPackage, or move the file away to start a fresh history"
    if not path.is_file():
        raise InputError(f"baseline GeoPackage (from {key}) not found; {hint}", path=path, key=key)
    try:
        layers = [str(n) for n in pyogrio.list_layers(path)[:, 0]]
    except Exception as exc:  # pyogrio raises DataSourceError and friends
        raise InputError(f"cannot read the baseline (from {key}): {str(exc).splitlines()[0]}; {hint}", path=path, key=key) from exc
    if LAYER not in layers:
        raise InputError(f"baseline (from {key}) has no layer '{LAYER}' (layers there: {_fmt_list(layers)}); {hint}", path=path, key=key)
    have = [str(f) for f in pyogrio.read_info(path, layer=LAYER)["fields"]]
    for name in (id_field, "status"):
        if name not in have:
            raise InputError(
                f"baseline (from {key}) layer '{LAYER}' has no field '{name}' (fields there: {_fmt_list(have, 20)}); {hint}",
                path=path, key=key,
            )
    columns = [c for c in dict.fromkeys([id_field, "status", "zone", *mail_fields]) if c in have]
    # no geometry here: only removed customers need theirs (:meth:`Baseline.rows`)
    frame = pyogrio.read_dataframe(path, layer=LAYER, columns=columns, read_geometry=False, fid_as_index=True,
                                   use_arrow=True)
    log.info("baseline: %d customers from %s", len(frame), path)
    return Baseline(path=path, frame=frame, columns=columns, crs=crs)
