"""Reading the outputs of earlier runs and writing the comparison of two runs."""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import shapely

from ..errors import InputError
from ..tables import neutralise_frame
from .vector import _fmt_list, has_duplicates
from .write import Staging, ensure_dir, write_csv

#: the layer of a run's GeoPackage that holds every customer.
LAYER = "customers"
#: the columns every run's ``customers`` layer has after the id field.
RUN_COLUMNS = ("zone", "status", "psi_min", "psi_max")


def run_layer_fields(path: Path, *, key: str, hint: str) -> list[str]:
    """The fields of the ``customers`` layer of the run GeoPackage at ``path``.

    ``key`` names where the path came from and ``hint`` says what to do; both go
    into the InputError raised when the file is missing, unreadable or not a run.
    """
    if not path.is_file():
        raise InputError(f"GeoPackage (from {key}) not found; {hint}", path=path, key=key)
    try:
        layers = [str(n) for n in pyogrio.list_layers(path)[:, 0]]
    except Exception as exc:  # pyogrio raises DataSourceError and friends
        raise InputError(f"cannot read the GeoPackage (from {key}): {str(exc).splitlines()[0]}; {hint}",
                         path=path, key=key) from exc
    if LAYER not in layers:
        raise InputError(f"GeoPackage (from {key}) has no layer '{LAYER}' (layers there: {_fmt_list(layers)}); {hint}",
                         path=path, key=key)
    return [str(f) for f in pyogrio.read_info(path, layer=LAYER)["fields"]]


def read_run_layer(path: Path, fields: Sequence[str], *, required: Sequence[str], optional: Sequence[str] = (),
                   key: str, hint: str, read_geometry: bool = True) -> pd.DataFrame:
    """The ``required`` fields (an InputError when one is missing) and whichever ``optional`` ones exist.

    The index holds the feature ids. Without ``read_geometry`` a plain DataFrame, else a GeoDataFrame.
    """
    for name in required:
        if name not in fields:
            raise InputError(f"layer '{LAYER}' of the GeoPackage (from {key}) has no field '{name}' "
                             f"(fields there: {_fmt_list(fields, 20)}); {hint}", path=path, key=key)
    columns = list(dict.fromkeys([*required, *(c for c in optional if c in fields)]))
    return pyogrio.read_dataframe(path, layer=LAYER, columns=columns, read_geometry=read_geometry, fid_as_index=True,
                                  use_arrow=True)


def read_run_customers(path: Path, id_field: str | None = None, *, key: str = "compare",
                       id_source: str = "--id-field") -> tuple[gpd.GeoDataFrame, str]:
    """The ``customers`` layer of a run's GeoPackage and its id field (the first field unless given).

    ``key`` names the argument the path came from (``BEFORE``, ``AFTER``) and ``id_source`` where a
    given ``id_field`` came from, for the errors; each error suggests only what applies to it
    (--id-field only where the id field is the trouble).
    """
    path = Path(path)
    hint = "give the output GeoPackage of a finished geopress run"
    fields = run_layer_fields(path, key=key, hint=hint)
    id_key = id_field or (fields[0] if fields else "id")
    whence = f"from {id_source}" if id_field else "the first field, taken as the id"
    err_key = "--id-field" if id_field and id_source == "--id-field" else key
    if id_key not in fields:
        raise InputError(f"layer '{LAYER}' of the GeoPackage (from {key}) has no field '{id_key}' ({whence}); fields "
                         f"there: {_fmt_list(fields, 20)}; pass --id-field with the id field both runs have",
                         path=path, key=err_key)
    gdf = read_run_layer(path, fields, required=[id_key, *RUN_COLUMNS], key=key, hint=hint)
    if has_duplicates(gdf[id_key]):
        raise InputError(f"field '{id_key}' ({whence}) has duplicate values, so it cannot match customers; "
                         "pass --id-field with a field that is unique in both runs", path=path, key=err_key)
    return gdf, id_key


def comparison_paths(out: Path) -> dict[str, Path]:
    """The files a comparison writes: the GeoPackage and two CSVs beside it (same stem)."""
    return {"gpkg": out, "csv": out.with_suffix(".csv"), "by_zone_csv": out.with_name(f"{out.stem}_by_zone.csv")}


def _as_table(diff: gpd.GeoDataFrame) -> pd.DataFrame:
    """The differences without geometry, with x and y of each point (NaN where none)."""
    geom = diff.geometry.to_numpy()
    has = ~(shapely.is_missing(geom) | shapely.is_empty(geom))
    x = np.full(len(diff), np.nan)
    y = np.full(len(diff), np.nan)
    x[has], y[has] = shapely.get_x(geom[has]), shapely.get_y(geom[has])
    return neutralise_frame(pd.DataFrame(diff.drop(columns=diff.geometry.name)).assign(x=x, y=y))


def write_comparison(out: Path, diff: gpd.GeoDataFrame, by_zone: pd.DataFrame) -> list[Path]:
    """Write layer ``status_differences`` (points) and table ``status_differences_by_zone``, plus the CSVs; atomically."""
    paths = comparison_paths(Path(out))
    ensure_dir(paths["gpkg"].parent, "--out")

    def gpkg(tmp: Path) -> None:
        pyogrio.write_dataframe(diff, tmp, layer="status_differences", driver="GPKG", geometry_type="Point",
                                layer_options={"SPATIAL_INDEX": "YES"})
        pyogrio.write_dataframe(by_zone, tmp, layer="status_differences_by_zone", driver="GPKG")

    with Staging() as stage:
        stage.write(paths["gpkg"], gpkg)
        stage.write(paths["csv"], lambda tmp: write_csv(tmp, _as_table(diff)))
        stage.write(paths["by_zone_csv"], lambda tmp: write_csv(tmp, by_zone))
        stage.commit()
        return list(stage.committed)
