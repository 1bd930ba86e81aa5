"""Reading the outputs of earlier runs and writing the comparison of two runs."""

from __future__ import annotations

from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import shapely

from ..errors import InputError
from ..tables import neutralise_frame
from .write import Staging, ensure_dir, write_csv

#: the columns every run's ``customers`` layer has after the id field.
RUN_COLUMNS = ("zone", "status", "psi_min", "psi_max")


def read_run_customers(path: Path, id_field: str | None = None) -> tuple[gpd.GeoDataFrame, str]:
    """The ``customers`` layer of a run's GeoPackage and its id field (the first field unless given)."""
    path = Path(path)
    if not path.exists():
        raise InputError("GeoPackage not found; give the output.path of a finished run", path=path)
    try:
        names = [str(n) for n in pyogrio.list_layers(path)[:, 0]]
    except Exception as exc:
        raise InputError(f"not a GeoPackage GDAL can open ({str(exc).splitlines()[0]})", path=path) from exc
    if "customers" not in names:
        raise InputError("has no 'customers' layer; give the output GeoPackage of a geopress run", path=path, key="customers")
    fields = [str(f) for f in pyogrio.read_info(path, layer="customers")["fields"]]
    key = id_field or (fields[0] if fields else None)
    missing = [c for c in (key, *RUN_COLUMNS) if c not in fields]
    if key is None or missing:
        raise InputError(f"layer 'customers' lacks the field(s) {', '.join(map(str, missing))}; "
                         "is it the output of a geopress run? (use --id-field for another id)", path=path, key="customers")
    gdf = pyogrio.read_dataframe(path, layer="customers", columns=[key, *RUN_COLUMNS], use_arrow=True)
    if gdf[key].duplicated().any():
        raise InputError(f"field '{key}' has duplicate values, so it cannot match customers; pass --id-field",
                         path=path, key=key)
    return gdf, key


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
