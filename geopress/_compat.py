"""Optional dependencies, guarded once: the error names the extra to install."""

from __future__ import annotations

from types import ModuleType

from .errors import MissingExtraError


def import_dask() -> tuple[ModuleType, ModuleType]:
    """``(dask_geopandas, distributed)``, or MissingExtraError naming the ``dask`` extra."""
    try:
        import dask_geopandas
        import distributed
    except ImportError as exc:
        raise MissingExtraError(
            f"the dask engine needs dask-geopandas and dask.distributed ({exc.name or exc} is missing); "
            "install them with pip install 'geopress[dask]' or run with --engine local",
            key="engine",
        ) from exc
    return dask_geopandas, distributed
