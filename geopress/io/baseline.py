"""Reading the previous run's customers (id, status and findings) to compare a run against.

The baseline is the ``customers`` layer of an earlier geopress GeoPackage:
by default the one at ``output.path`` before this run replaces it, or one
chosen with ``geopress run --baseline PATH``. The id field and ``status``
are read for every customer; ``zone``, the mail fields it has and the
geometry only for the removed ones.
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

from .results import LAYER, read_run_layer, run_layer_fields

log = logging.getLogger(__name__)

@dataclass
class Baseline:
    """The previous run's customers: id and status (the index holds the feature ids).

    :meth:`rows` gives chosen rows with ``columns`` and their geometry in ``crs``, the current run's CRS.
    """

    path: Path
    frame: pd.DataFrame
    columns: list[str]
    crs: CRS

    def rows(self, positions: np.ndarray) -> gpd.GeoDataFrame:
        """The rows at ``positions`` of :attr:`frame`, in that order, with their geometry in :attr:`crs`."""
        fids = self.frame.index.to_numpy()[positions]
        if len(fids) == 0:
            return gpd.GeoDataFrame({c: pd.Series([], dtype=object) for c in self.columns},
                                    geometry=gpd.GeoSeries([], crs=self.crs))
        got = pyogrio.read_dataframe(self.path, layer=LAYER, columns=self.columns, fids=fids, fid_as_index=True,
                                     use_arrow=True)
        got = got.reindex(fids).reset_index(drop=True)
        if got.crs is not None and not CRS.from_user_input(got.crs).equals(self.crs):
            return got.to_crs(self.crs)
        return got.set_crs(self.crs, allow_override=True)


def read_baseline(
    path: Path, *, id_field: str, mail_fields: Sequence[str], crs: CRS, key: str, optional: Sequence[str] = ()
) -> Baseline:
    """Read the baseline GeoPackage at ``path``; ``key`` names where it came from in errors. The ``optional``
    fields (the finding columns, say) are read for every customer too, where the layer has them.

    Raises InputError when it is missing, not a GeoPackage geopress wrote, or
    lacks the id field or ``status``.
    """
    hint = "pass --baseline with an earlier geopress GeoPackage, or move the file away to start a fresh history"
    fields = run_layer_fields(path, key=key, hint=hint)
    columns = [c for c in dict.fromkeys([id_field, "status", "zone", *mail_fields]) if c in fields]
    # only what the comparison needs: removed customers' other fields and geometry come from :meth:`Baseline.rows`
    frame = read_run_layer(path, fields, required=(id_field, "status"), optional=optional, key=key, hint=hint,
                           read_geometry=False)
    log.info("baseline: %d customers from %s", len(frame), path)
    return Baseline(path=path, frame=frame, columns=columns, crs=crs)
