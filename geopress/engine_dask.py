"""The zone join and terrain sampling per spatial partition, on dask.distributed.

Customers with a geometry are cut into spatial partitions by dask-geopandas
(Hilbert curve order); each partition is joined to the zones and sampled
from the terrain on a worker with the same functions as the in-process
path, so the results are identical, bit for bit. Only the per-customer zone
index and ground elevation come back; the driver computes pressures and
statuses and writes every output from one writer. Without a scheduler
address a LocalCluster is started for the run (one single-threaded worker
process per core) and closed after it.
"""

from __future__ import annotations

import logging
import os
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, Iterator

import geopandas as gpd
import numpy as np
import shapely
from pyproj import CRS

from ._compat import import_dask
from .config import TerrainConfig
from .errors import ConfigError
from .io import raster as raster_io
from .io import vector as vector_io
from .io.datum import DatumShift
from .zones import assign_xy

log = logging.getLogger(__name__)


@dataclass
class Joined:
    """Per customer (input order): the zone polygon index (-1 none) and the terrain result."""

    zone_index: np.ndarray
    terrain: raster_io.TerrainResult


def _partition(part: gpd.GeoDataFrame, polygons: np.ndarray, zones_crs_wkt: str, priority: np.ndarray,
               terrain: TerrainConfig, shift: DatumShift, crs_wkt: str) -> dict[str, Any]:
    """Zone index and ground of one partition's customers (runs on a worker)."""
    pts = part.geometry.to_numpy()
    x, y = shapely.get_x(pts), shapely.get_y(pts)
    crs = CRS.from_wkt(crs_wkt)
    zi = assign_xy(x, y, crs, polygons, CRS.from_wkt(zones_crs_wkt), priority)
    # the guards on the sampled ground run once, in the driver, on the merged ranges
    result = raster_io.sample_terrain(terrain, x, y, crs, shift)
    return {"rows": part["_row"].to_numpy(), "zone_index": zi, "ground_ft": result.ground_ft, "rmse_ft": result.rmse_ft,
            "rasters": result.rasters, "inside_any": result.inside_any, "ranges": result.ranges,
            "outside_datum_grid": result.outside_datum_grid}


@contextmanager
def _client(distributed, scheduler: Any) -> Iterator[Any]:
    """A Client on ``scheduler`` (an address, a cluster or a Client), or on a LocalCluster started here."""
    if scheduler is not None and hasattr(scheduler, "submit"):
        yield scheduler
        return
    if scheduler is not None:
        try:
            client = distributed.Client(scheduler, timeout="30s", set_as_default=False)
        except OSError as exc:
            raise ConfigError(f"cannot reach the dask scheduler at {scheduler} ({exc}); check --scheduler",
                              key="scheduler") from exc
        with client:
            yield client
        return
    with distributed.LocalCluster(n_workers=os.cpu_count() or 1, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster, set_as_default=False) as client:
        yield client


def _merge(parts: list[dict[str, Any]], n: int, template: raster_io.TerrainResult) -> Joined:
    zone_index = np.full(n, -1, dtype=np.intp)
    ground = np.full(n, np.nan)
    rmse = np.full(n, np.nan)
    reports = {r.path: r for r in template.rasters}
    ranges: dict[str, tuple[str, float, float]] = {}
    inside_any = outside_grid = 0
    for p in parts:
        zone_index[p["rows"]] = p["zone_index"]
        ground[p["rows"]] = p["ground_ft"]
        rmse[p["rows"]] = p["rmse_ft"]
        inside_any += p["inside_any"]
        outside_grid += p["outside_datum_grid"]
        for r in p["rasters"]:
            rep = reports[r.path]
            rep.customers_sampled += r.customers_sampled
            rep.windows_read += r.windows_read
            rep.pixels_read += r.pixels_read
        for label, (unit, lo, hi) in p["ranges"].items():
            _, lo0, hi0 = ranges.get(label, (unit, np.inf, -np.inf))
            ranges[label] = (unit, min(lo0, lo), max(hi0, hi))
    terrain = raster_io.TerrainResult(ground_ft=ground, rasters=list(reports.values()), inside_any=inside_any,
                                      ranges=ranges, outside_datum_grid=outside_grid, rmse_ft=rmse)
    return Joined(zone_index=zone_index, terrain=terrain)


def assign_and_sample(cust: vector_io.Customers, zones: vector_io.Zones, terrain: TerrainConfig, shift: DatumShift, *,
                      scheduler: Any = None, partitions: int | None = None) -> Joined:
    """Zone index and ground elevation (ft, on the HGLs' datum by ``shift``) of every customer,
    computed per spatial partition on dask.

    ``scheduler``: a dask.distributed scheduler address (``tcp://host:8786``),
    a cluster or Client object, or None for a LocalCluster. ``partitions``:
    how many spatial partitions (default two per worker thread).
    """
    dask_geopandas, distributed = import_dask()
    if partitions is not None and partitions < 1:
        raise ConfigError(f"partitions must be at least 1, not {partitions}", key="partitions")
    n = len(cust.frame)
    rows = np.flatnonzero(cust.has_geometry)
    frame = gpd.GeoDataFrame({"_row": rows}, geometry=shapely.points(cust.x[rows], cust.y[rows]), crs=cust.crs)
    template = raster_io.TerrainResult(ground_ft=np.empty(0),
                                       rasters=raster_io.describe(terrain.paths, terrain.vertical_units))
    if rows.size == 0:
        return _merge([], n, template)
    import dask

    with _client(distributed, scheduler) as client:
        threads = sum(client.nthreads().values()) or 1
        nparts = max(1, min(partitions or 2 * threads, rows.size))
        ddf = dask_geopandas.from_geopandas(frame, npartitions=nparts)
        if nparts > 1:
            ddf = ddf.spatial_shuffle(by="hilbert", npartitions=nparts)
        polygons, priority = client.scatter([zones.polygons, zones.priority], broadcast=True)
        tasks = [dask.delayed(_partition)(part, polygons, zones.crs.to_wkt(), priority, terrain, shift, cust.crs.to_wkt())
                 for part in ddf.to_delayed()]
        log.info("dask: %d spatial partitions on %d worker threads", len(tasks), threads)
        parts = client.gather(client.compute(tasks))
    return _merge(parts, n, template)
