"""The one place that joins I/O and computation.

:func:`run` reads the inputs, computes every customer's static pressure range
and status, and (unless ``write=False``) writes the GeoPackage, the mailing
lists and ``run.json`` atomically. :func:`check` validates the config and
every input and says what a run would process, writing nothing.
"""

from __future__ import annotations

import gc
import logging
import os
import shutil
import threading
import time
import warnings
from concurrent.futures import Future, ThreadPoolExecutor
from concurrent.futures import TimeoutError as FutureTimeout
from contextlib import contextmanager, nullcontext
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Iterator

import geopandas as gpd
import numpy as np
import pandas as pd
import pyarrow as pa
import pyogrio
import pyproj
import rasterio
import shapely

from . import classify as cls
from . import confidence
from . import fieldcheck
from . import guards
from . import planning
from . import runner
from . import storage
from ._compat import behind_the_writer, release_freed_heap, report_missing, xlsx_missing
from . import nightly
from ._version import __version__
from .config import Config, DatabaseSource, load_config, redact_dsn
from .errors import ConfigError, GeopressWarning, InputError, OutputError, TerrainWarning, ZoneOverlapWarning
from .io import datum as datum_io
from .io import postgis as postgis_io
from .io import raster as raster_io
from .io import vector as vector_io
from .io import write as write_io
from .pressure import M_PER_FT, customer_pressures
from . import targets as targets_mod
from .changes import CHANGES
from .findings import AREA_COLUMNS, FLAGGED_STATUSES
from .tables import mailing_lists, zone_summary
from .units import customers_in_units, mailing_columns_in_units, units_for
from .zones import assign_xy, overlaps

log = logging.getLogger(__name__)

#: called as ``progress(step)`` when a step starts and, in a step that counts its work (customers read
#: and sampled, outputs written), as ``progress(step, done, total, unit)`` as it goes (``total`` None when
#: not known). The library never draws anything itself: the command line draws the bars.
Progress = Callable[..., None]
#: a step's count of its work: ``count(done, total)``
Count = Callable[[int, "int | None"], None]



@dataclass(frozen=True)
class Points:
    """The customers' points, row for row: ``x``/``y`` in ``crs`` (NaN where a customer has none) and the same as
    WKB (null there), which the writers pass through."""

    x: np.ndarray
    y: np.ndarray
    crs: pyproj.CRS
    wkb: pa.ChunkedArray | pa.Array


@dataclass
class ReportDrawing:
    """The report's parts (:func:`geopress.planning.report_parts`) and the job drawing their figures
    (``report.draw``) in the service band's process, idle once the band is done, while the run goes on."""

    parts: planning.ReportParts
    job: runner.Job


@dataclass
class Result:
    """What a run computed.

    ``customers``: every input customer with the result columns (and, once
    compared with the baseline, ``previous_status`` and ``change``), and
    ``points`` where they are (:meth:`located` joins the two as a
    GeoDataFrame). ``zone_summary``: one row per zone.
    ``counts``: customers per status. ``mailing``: the mailing lists by name.
    ``info``: what run.json records. ``outputs``: the files written (empty
    when ``write=False``).
    """

    config: Config
    customers: pd.DataFrame
    points: Points
    zone_summary: pd.DataFrame
    counts: dict[str, int]
    mailing: dict[str, pd.DataFrame]
    info: dict[str, Any]
    #: seconds per step; a step run in a child process, "(child process)", overlaps the others
    timings: dict[str, float] = field(default_factory=dict)
    #: wall-clock seconds of the whole run
    elapsed_s: float = 0.0
    outputs: list[Path] = field(default_factory=list)
    #: the service_band / band_limits layers and the report's terrain (geopress.planning); set by summarise
    plan: planning.Plan | None = None
    #: per finding, each customer's margin from its threshold (display unit) and class: the mailing lists' ``rated``
    rated: dict[str, tuple[np.ndarray, Any]] | None = None
    #: the field readings checked against the screening and their per-zone table (None without [readings])
    field_check: gpd.GeoDataFrame | None = None
    field_check_by_zone: pd.DataFrame | None = None
    # set by geopress.nightly.track: the baseline's customers this run lacks, and the new_* mailing lists
    removed: pd.DataFrame | None = None
    new_mailing: dict[str, pd.DataFrame] = field(default_factory=dict)
    #: the target areas (geopress.targets), polygons in the customers' CRS; set by summarise
    areas: gpd.GeoDataFrame | None = None
    #: the report's figures and maps, and the job that draws the figures in a child process; set by summarise
    #: when the run writes its report
    report: ReportDrawing | None = None

    def located(self) -> gpd.GeoDataFrame:
        """:attr:`customers` with their points as a GeoDataFrame (shapely builds a geometry per customer: about
        200 bytes each, which the run itself never holds)."""
        return gpd.GeoDataFrame(self.customers, geometry=gpd.GeoSeries(
            shapely.from_wkb(self.points.wkb.to_numpy(zero_copy_only=False)), index=self.customers.index,
            crs=self.points.crs))


class _Clock:
    def __init__(self, progress: Progress | None):
        self.timings: dict[str, float] = {}
        self.progress = progress

    @contextmanager
    def step(self, name: str) -> Iterator[None]:
        if self.progress:
            self.progress(name)
        t0 = time.perf_counter()
        yield
        release_freed_heap()  # what the step freed, for the later steps' peak (a few ms)
        self.timings[name] = round(time.perf_counter() - t0, 4)
        log.debug("step %s took %.3f s", name, self.timings[name])

    def counter(self, name: str, unit: str, total: int | None = None) -> Count | None:
        """``count(done, total)`` reporting step ``name``'s ``done`` of ``total`` ``unit`` (``total`` here when the
        caller gives None); None without progress."""
        progress = self.progress
        if progress is None:
            return None
        return lambda done, of=None: progress(name, done, total if of is None else of, unit)


@contextmanager
def _cycle_collection_paused() -> Iterator[None]:
    """Pause CPython's cycle collector for a run, then restore it as it was.

    A run makes millions of short-lived GC-tracked objects (each chunk's
    WKB bytes and shapely points, pandas' and Arrow's wrappers), enough to
    set off thousands of collections (scripts/README.md has the
    measurement). The run's large objects are freed by reference counting,
    not by the collector.
    """
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()


@contextmanager
def _recorded_warnings(into: list[str]) -> Iterator[None]:
    """Append to ``into`` the message of every GeopressWarning shown while the block runs.

    The warnings are shown as before (the caller's ``warnings.showwarning``
    still gets them); a warning the filters turn into an error or ignore is
    not recorded.
    """
    shown = warnings.showwarning

    def record(message, category, filename, lineno, file=None, line=None):
        if issubclass(category, GeopressWarning):
            into.append(str(message))
        shown(message, category, filename, lineno, file, line)

    warnings.showwarning = record
    try:
        yield
    finally:
        warnings.showwarning = shown


def _as_config(config: Config | str | os.PathLike) -> Config:
    return config if isinstance(config, Config) else load_config(config)


def check_writable(path: Path, key: str) -> None:
    """The nearest existing ancestor of ``path`` is a writable folder; raise OutputError otherwise."""
    probe = path
    while not probe.exists():
        if probe.parent == probe:
            break
        probe = probe.parent
    if not probe.is_dir():
        raise OutputError(f"{probe} is not a folder, so {key} cannot be created; choose another location", path=path, key=key)
    if not os.access(probe, os.W_OK | os.X_OK):
        raise OutputError(f"{probe} is not writable, so {key} cannot be written; choose a writable location", path=path, key=key)


def _input_record(path: Path) -> dict[str, Any]:
    st = path.stat()
    return {
        "path": str(path),
        "bytes": st.st_size,
        "modified": datetime.fromtimestamp(st.st_mtime, timezone.utc).isoformat(timespec="seconds"),
    }


def _database_record(src: DatabaseSource, key: str) -> dict[str, Any]:
    """A layer read from a database as run.json and the report list it: the connection (no password) and
    the table or query."""
    what = {"table": src.table} if src.table else {"query": src.query}
    return {"layer": key, "database": redact_dsn(src.database), **what, "geometry_column": src.geometry_column}


def _warn_overlaps(zones: vector_io.Zones) -> list[dict[str, Any]]:
    found = overlaps(zones.polygons, zones.zone_ids)
    for ov in found:
        warnings.warn(
            f"zones '{ov.zone_a}' and '{ov.zone_b}' overlap ({ov.area:,.1f} square CRS units); customers there go to "
            "the zone whose [[zones.source]] is listed first",
            ZoneOverlapWarning, stacklevel=3,
        )
    return [{"zones": [o.zone_a, o.zone_b], "area": o.area} for o in found]


ENGINES = ("local", "dask")


def _values(column: pd.Series) -> Any:
    """The column's values for a new frame: text as it is (Arrow-backed, no Python string per row), and
    pandas' nullable types (the floors' Int64) as they are, with their missing values."""
    extension = isinstance(column.dtype, pd.api.extensions.ExtensionDtype)
    return column.array if extension else column.to_numpy()


def _timed(fn: Callable[..., Any], *args: Any) -> tuple[Any, float]:
    t0 = time.perf_counter()
    value = fn(*args)
    return value, round(time.perf_counter() - t0, 4)


def _beside(fn: Callable[..., Any], *args: Any) -> Future:
    """``fn(*args)`` (pure computation: no I/O, no lock) started in a thread of its own: the future of its value
    and its seconds (:func:`_timed`). The thread ends with the computation; a run that fails before it waits for
    the value leaves it to finish, and the interpreter's exit waits for it."""
    pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="geopress-beside")
    try:
        return pool.submit(_timed, fn, *args)
    finally:
        pool.shutdown(wait=False)


def with_areas(result: Result, s: Screening, clock: _Clock) -> None:
    """Wait for the target areas that :func:`screen` started, keep them in ``s``, and add their columns to the
    customers, after the findings' columns. Their seconds go in the timings as "target areas (thread)"."""
    with clock.step("wait for the target areas"):
        (s.areas, s.area_crs, s.area_info), clock.timings["target areas (thread)"] = s.areas_job.result()
        customers = result.customers
        at = customers.columns.get_loc(cls.FINDING_COLUMNS[cls.FINDINGS[-1]]) + 1
        for i, name in enumerate(cls.FINDINGS):
            customers.insert(at + i, AREA_COLUMNS[name], s.areas.member[name])


def _zones_beside_terrain(cfg: Config, clock: _Clock, cust: vector_io.Customers, zones: vector_io.Zones,
                          shift: datum_io.DatumShift) -> tuple[np.ndarray, raster_io.TerrainResult]:
    """Each customer's zone polygon (:func:`geopress.zones.assign_xy`) and ground (``sample_terrain``), the zone
    join in a thread while this one samples: both read only the customers' coordinates, and shapely, GDAL and
    numpy release the GIL for most of their work (scripts/README.md has what it saves). The join's seconds go
    in the timings as "assign zones (thread)". An error of either is raised once both have finished."""
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="geopress-zones") as pool:
        joining = pool.submit(_timed, assign_xy, cust.x, cust.y, cust.crs, zones.polygons, zones.crs, zones.priority)
        # leaving the block waits for the join, an error here too: no thread is left reading the customers
        terrain = raster_io.sample_terrain(cfg.terrain, cust.x, cust.y, cust.crs, shift,
                                           count=clock.counter("sample terrain", "customers"))
    zi, seconds = joining.result()
    clock.timings["assign zones (thread)"] = seconds
    return zi, terrain


@dataclass
class Screening:
    """What :func:`summarise` takes from :func:`screen` beside the :class:`Result`."""

    customers: vector_io.Customers
    zones: vector_io.Zones
    overlap_info: list[dict[str, Any]]
    shift: datum_io.DatumShift
    terrain: raster_io.TerrainResult
    ground_table: list[guards.ZoneGround]
    pressures: Any
    levels: dict[str, np.ndarray]
    sigma: np.ndarray
    finding_counts: dict[str, int]
    #: the service band's job in its own process (see :func:`screen`)
    band: runner.Job
    #: the target areas, the CRS they were clustered in and what run.json records of them (:func:`_target_areas`),
    #: as a thread computes them, and the seconds it took; :func:`with_areas` waits for them
    areas_job: Future[tuple[tuple[targets_mod.Areas, pyproj.CRS, dict[str, Any]], float]]
    areas: targets_mod.Areas | None = None
    area_crs: pyproj.CRS | None = None
    area_info: dict[str, Any] | None = None


def screen(config: Config, clock: _Clock, band_worker: runner.Worker, *, engine: str = "local",
           scheduler: Any = None, partitions: int | None = None) -> tuple[Result, Screening]:
    """Read the inputs and screen every customer (writing nothing): the result's customers with their
    pressures, statuses, findings and target areas, and its counts. The service band is computed meanwhile in
    ``band_worker``'s process, which :func:`summarise` waits for and then stops; the summaries and lists come
    from there too. ``engine`` as in :func:`run`.
    """
    cfg = config
    with clock.step("read zones"):
        crs = vector_io.customers_crs(cfg.customers)
        zones = vector_io.read_zones(cfg.zones)
        overlap_info = _warn_overlaps(zones)
        shift = datum_shift(cfg, crs)
    # the service band needs only the zones and the DEM: the child process computes it meanwhile
    band = band_worker.submit(_timed, planning.service_bands, cfg, zones, crs, shift, what="service band")
    return _screen(cfg, clock, zones, overlap_info, shift, band, engine=engine, scheduler=scheduler,
                   partitions=partitions)


def datum_shift(cfg: Config, crs: pyproj.CRS) -> datum_io.DatumShift:
    """The vertical datum offset the config asks for (see :mod:`geopress.io.datum`)."""
    t = cfg.terrain
    return datum_io.datum_shift(offset_ft=t.datum_offset_ft, dem_datum=t.vertical_datum,
                                hgl_datum=cfg.zones.vertical_datum, grid=t.datum_grid, customers_crs=crs)


def _zone_codes(zi: np.ndarray, zones: vector_io.Zones, names: list[str]) -> np.ndarray:
    """Each customer's index into ``names`` (the zones in source order) from its polygon index ``zi`` (-1: none)."""
    code_of_polygon = np.array([names.index(z) for z in zones.zone_ids] or [0], dtype=np.intp)
    return np.where(zi >= 0, code_of_polygon[np.maximum(zi, 0)], -1)


def _zone_values(zi: np.ndarray, zones: vector_io.Zones, cfg: Config,
                 value: Callable[[Any], float]) -> np.ndarray:
    """Each point's ``value`` of its zone's source, from its polygon index ``zi`` (-1: none, then NaN)."""
    source = {s.zone: s for s in cfg.zones.sources}
    table = np.array([value(source[z]) for z in zones.zone_ids] or [np.nan])
    return np.where(zi >= 0, table[np.maximum(zi, 0)], np.nan)


def apply_guards(cfg: Config, terrain: raster_io.TerrainResult, zone_code: np.ndarray, located: int,
                 crs: pyproj.CRS, zones: vector_io.Zones) -> list[guards.ZoneGround]:
    """The guards of :mod:`geopress.guards` on a run's (or a check's) sampled ground and zone join.

    Raises InputError for too little coverage or ground off the Earth; warns
    (TerrainWarning) for a zone whose ground looks wrong against its HGL.
    Returns the per-zone ground table.
    """
    names = [s.zone for s in cfg.zones.sources]
    rasters = "; ".join(f"{r.path} in {r.crs}" for r in terrain.rasters)
    if guards.too_little(terrain.inside_any, located):
        raise InputError(f"only {terrain.inside_any} of {located} located customers lie on the terrain "
                         f"({rasters}; customers in {crs.to_string()}); check the CRS of each", path=cfg.terrain.paths[0],
                         key="terrain.paths")
    zoned = int(np.count_nonzero(zone_code >= 0))
    if guards.too_little(zoned, located):
        raise InputError(f"only {zoned} of {located} located customers lie in a zone (zones in {zones.crs.to_string()}, "
                         f"customers in {crs.to_string()}); check the CRS of each", path=cfg.zones.path, key="zones.path")
    for label, (unit, lo, hi) in terrain.ranges.items():
        if np.isfinite(lo) and guards.outside_earth(lo, hi):
            raise InputError(f"sampled ground {lo:,.0f} to {hi:,.0f} ft is not ground on Earth (below "
                             f"{guards.EARTH_LOW_FT:,.0f} or above {guards.EARTH_HIGH_FT:,.0f} ft) for vertical unit "
                             f"\"{unit}\"; check terrain.vertical_units and the raster's nodata value",
                             path=label, key="terrain.vertical_units")
    if terrain.outside_datum_grid:
        warnings.warn(f"{cfg.terrain.datum_grid}: {terrain.outside_datum_grid} customers on the terrain lie outside the "
                      "datum grid, so they have no ground on the HGLs' datum and get no_terrain; check "
                      "terrain.datum_grid", TerrainWarning, stacklevel=3)
    hgl = {s.zone: s.hgl_range(cfg.criteria.psi_per_ft) for s in cfg.zones.sources}
    table = guards.zone_grounds(terrain.ground_ft, zone_code, names, hgl)
    unit = next(iter(terrain.ranges.values()))[0] if terrain.ranges else "ft"
    for zg in table:
        why = zg.suspicion()
        if why:
            warnings.warn(_suspicion_text(cfg, zg, why, unit), TerrainWarning, stacklevel=3)
    return table


def _psi_text(psi_per_ft: float, zg: guards.ZoneGround, ground_ft: float) -> str:
    lo, hi = psi_per_ft * (zg.hgl_low_ft - ground_ft), psi_per_ft * (zg.hgl_high_ft - ground_ft)
    return f"{hi:,.0f} psi" if lo == hi else f"{lo:,.0f} to {hi:,.0f} psi"


def _suspicion_text(cfg: Config, zg: guards.ZoneGround, why: str, unit: str) -> str:
    """The warning for a zone whose median ground looks wrong against its HGL, with the other units' pressures."""
    median = zg.median_ft
    if why == "at or above the low HGL":
        where = f"is at or above the zone's low HGL of {zg.hgl_low_ft:,.0f} ft"
    else:
        where = (f"lies {zg.hgl_high_ft - median:,.0f} ft below the zone's high HGL of {zg.hgl_high_ft:,.0f} ft "
                 f"(more than {guards.MAX_DEPTH_FT:,.0f} ft)")
    others = guards.in_other_units(median, unit, cfg.terrain.datum_offset_ft)
    alt = ", ".join(f"as \"{u}\" it would be {g:,.0f} ft ({_psi_text(cfg.criteria.psi_per_ft, zg, g)})"
                    for u, g in others.items())
    return (f"zone '{zg.zone}': its median customer's ground, {median:,.0f} ft "
            f"({_psi_text(cfg.criteria.psi_per_ft, zg, median)}), {where}; check terrain.vertical_units (now \"{unit}\") "
            f"and terrain.datum_offset_ft: read {alt}")


def _screen(cfg: Config, clock: _Clock, zones: vector_io.Zones, overlap_info: list[dict[str, Any]],
            shift: datum_io.DatumShift, band: runner.Job, *, engine: str, scheduler: Any,
            partitions: int | None) -> tuple[Result, Screening]:
    crit = cfg.criteria
    with clock.step("read customers"):
        cust = vector_io.read_customers(cfg.customers, count=clock.counter("read customers", "customers"))
    # --- scale-out engine: the zone join and terrain sampling per spatial partition on dask
    joined = None
    if engine == "dask":
        from . import engine_dask

        with clock.step("assign zones and sample terrain on dask"):
            joined = engine_dask.assign_and_sample(cust, zones, cfg.terrain, shift, scheduler=scheduler,
                                                   partitions=partitions)
    # ---
    with clock.step("sample terrain"):
        if joined:
            zi, terrain = joined.zone_index, joined.terrain
        else:
            zi, terrain = _zones_beside_terrain(cfg, clock, cust, zones, shift)
    with clock.step("check zones and terrain"):
        zoned = zi >= 0
        zone = cls.names_at(zones.zone_ids, zi, zoned)
        zone_code = _zone_codes(zi, zones, [s.zone for s in cfg.zones.sources])
        hgl_high = _zone_values(zi, zones, cfg, lambda s: s.hgl_range(crit.psi_per_ft)[0])
        hgl_low = _zone_values(zi, zones, cfg, lambda s: s.hgl_range(crit.psi_per_ft)[1])
        hgl_unc = _zone_values(zi, zones, cfg, lambda s: s.hgl_uncertainty_ft)
        ground = terrain.ground_ft
        # the guards first: too few customers on the terrain is a CRS or extent problem, said as such
        ground_table = apply_guards(cfg, terrain, zone_code, int(np.count_nonzero(cust.has_geometry)), cust.crs,
                                    zones)
        if np.isnan(ground).all():
            paths = ", ".join(str(p) for p in cfg.terrain.paths)
            if terrain.inside_any:
                why = f"the terrain has only nodata where the {terrain.inside_any} customers inside it are"
            else:
                why = "no customer falls within the terrain's extent; check the CRS of the customers and of the rasters"
            raise InputError(f"{why} (terrain.paths: {paths})", path=cfg.terrain.paths[0], key="terrain.paths")
    with clock.step("compute pressure"):
        floors = (cust.frame[cfg.customers.floors_field].to_numpy(dtype=np.float64, na_value=np.nan)
                  if cfg.customers.floors_field else np.full(len(ground), np.nan))
        p = customer_pressures(ground, hgl_high, hgl_low, floors, psi_per_ft=crit.psi_per_ft,
                               floor_height_ft=crit.floor_height_ft)
        levels = storage.level_columns(ground, zi, zones.zone_ids, crit, cfg.zones.sources)
        codes, found = cls.screen(has_geometry=cust.has_geometry, ground_ft=ground, zoned=zoned,
                                  psi_min=p.psi_min, psi_max=p.psi_max, psi_top=p.psi_top, criteria=crit, levels=levels)
        # the target areas from here on, in a thread beside the rest of the customer table and the baseline
        # comparison (see with_areas): pure computation on arrays nothing changes
        areas_job = _beside(_target_areas, cfg, cust, zone_code, ground, floors, p, codes, found)
        reason = cls.reasons(codes, ground_ft=ground, hgl_low_ft=hgl_low, psi_min=p.psi_min, psi_max=p.psi_max,
                             psi_top=p.psi_top, floors=floors, criteria=crit, findings=found, levels=levels)
        margin = confidence.margins(codes, psi_min=p.psi_min, psi_max=p.psi_max, psi_top=p.psi_top, criteria=crit)
        sigma = confidence.sigmas(terrain.rmse_ft, hgl_unc, crit.psi_per_ft)
    with clock.step("customer table"):
        frame = cust.frame
        id_field = cfg.customers.id_field
        extra = [c for c in frame.columns if c != id_field]
        data = {
            id_field: _values(frame[id_field]),
            "zone": zone,
            "ground_ft": ground,
            "hgl_high_ft": hgl_high,
            "hgl_low_ft": hgl_low,
            "psi_max": p.psi_max,
            "psi_min": p.psi_min,
            "psi_top": p.psi_top,
            **levels,
            "status": cls.status_names(codes),
            "reason": reason,
            "margin_psi": margin,
            "sigma_psi": sigma,
            "confidence": confidence.classes(codes, margin, sigma),
            **{cls.FINDING_COLUMNS[name]: found[name] for name in cls.FINDINGS},
        }  # the target areas' columns come next (with_areas)
        for c in extra:
            data[c] = _values(frame[c])
        customers = pd.DataFrame(data)
        counts = {s: int(n) for s, n in zip(cls.STATUSES, np.bincount(codes, minlength=len(cls.STATUSES)))}
        finding_counts = {name: int(np.count_nonzero(found[name])) for name in cls.FINDINGS}
    result = Result(config=cfg, customers=customers, points=Points(x=cust.x, y=cust.y, crs=cust.crs, wkb=cust.wkb),
                    zone_summary=pd.DataFrame(), counts=counts, mailing={}, info={})
    return result, Screening(customers=cust, zones=zones, overlap_info=overlap_info, shift=shift, terrain=terrain,
                             ground_table=ground_table, pressures=p, levels=levels, sigma=sigma,
                             finding_counts=finding_counts, band=band, areas_job=areas_job)


def summarise(result: Result, s: Screening, clock: _Clock, *, draw: bool = False) -> None:
    """Add to ``result`` (from :func:`screen`) what is made from its customers: the target areas' layer, the zone
    summary with the best control ranges, the mailing lists, the field check and what run.json records. Reads only the field
    readings; leaves the customers as they are. With ``draw`` (a run that writes its report), the report's
    figures are drawn meanwhile in the service band's process (:attr:`Result.report`)."""
    cfg, customers, cust, p, levels, sigma = result.config, result.customers, s.customers, s.pressures, s.levels, s.sigma
    crit, id_field, zones, shift, terrain = cfg.criteria, cfg.customers.id_field, s.zones, s.shift, s.terrain
    with clock.step("target areas' addresses"):
        result.areas = _area_layer(cfg, cust, s.areas, s.area_crs)
    with clock.step("wait for the service band"):  # computed since the zones were read, beside all of the above
        plan, clock.timings["service band (child process)"] = s.band.result()
    result.plan = plan
    if draw and cfg.output.report and report_missing() is None:
        from . import report  # the report extra, here; it imports matplotlib only where a figure is drawn

        with clock.step("report's figures"):  # their data here; drawn in the band's process, now idle
            parts = planning.report_parts(cfg, customers, result.points, plan, result.areas)
            result.report = ReportDrawing(parts, s.band.worker.submit(report.draw, parts.figures,
                                                                      what="report figures", path=report_path(cfg)))
    else:
        s.band.worker.close()  # its one job is done: its memory goes back before the summaries'
    with clock.step("summarise"):
        summary = zone_summary(customers, cfg.zones.sources, crit.psi_per_ft)
        units = units_for(cfg.output.units)
        shown = customers_in_units(customers, units)
        # each finding's margin (in the display unit) and class, for its mailing list
        rated = {name: (units.pressure_from_psi(m), confidence.rate(m, sigma)) for name, m in confidence.finding_margins(
            psi_min=p.psi_min, psi_max=p.psi_max, psi_top=p.psi_top, criteria=crit, extra=levels).items()}
        mailing = {name: mailing_columns_in_units(df, units) for name, df in mailing_lists(
            shown, id_field=id_field, mail_fields=cfg.customers.mail_fields, letter_fields=cfg.customers.letter_fields,
            rated=rated, firm_only=cfg.output.mail_firm_only).items()}
        mailing[confidence.VERIFICATION_LIST] = mailing_columns_in_units(confidence.verification_list(
            shown, rated, id_field=id_field, fields=[*cfg.customers.mail_fields, *cfg.customers.letter_fields]), units)
        summary = summary.merge(confidence.zone_counts(customers["zone"], customers["confidence"],
                                                       [s.zone for s in cfg.zones.sources]), on="zone", how="left")
    # -- planning: serviceable band and best HGL per zone (geopress.planning) --
    with clock.step("best HGL"):
        summary = summary.merge(planning.best_hgl_table(customers, cfg), on="zone", how="left")
    readings = by_zone = None
    if cfg.readings is not None:  # read after the customers' results: they never depend on the readings
        with clock.step("check field readings"):
            readings, by_zone = field_check(cfg, zones, shift)
    info = {
        "geopress_version": __version__,
        "versions": {"gdal": rasterio.__gdal_version__, "proj": pyproj.proj_version_str, "pyogrio": pyogrio.__version__},
        "config_file": str(cfg.source_path) if cfg.source_path else None,
        "config": cfg.to_dict(),
        "inputs": [*(_input_record(p) for p in cfg.input_paths()),
                   *(_database_record(c.database, key) for key, c in (("customers", cfg.customers), ("zones", cfg.zones),
                                                                      ("readings", cfg.readings))
                     if c is not None and c.database is not None)],
        "customers": {
            "total": int(len(customers)),
            "layer": cust.layer,
            "from_polygons": cust.from_polygons,
            "no_geometry": cust.no_geometry,
        },
        "counts": result.counts,
        "counts_by_finding": s.finding_counts,
        "terrain": [vars(r) for r in terrain.rasters],
        "datum": {**shift.info(), "direction": shift.direction()},
        "ground_vs_hgl": [_ground_row(zg, crit.psi_per_ft) for zg in s.ground_table],
        "zones": {"layer": zones.layer, "crs": zones.crs.to_string(), "repaired": zones.repaired,
                  "overlaps": s.overlap_info},
        "overrides": dict(cfg.overrides),
        "service_band": plan.info,
        "storage_levels": storage.record(crit, cfg.zones.sources),
        "target_areas": s.area_info,
        "terrain_accuracy": terrain_accuracy(cfg),
        "confidence": {"counts": {c: int((customers["confidence"] == c).sum()) for c in confidence.CLASSES},
                       "mail_firm_only": cfg.output.mail_firm_only},
    }
    if readings is not None:
        info["field_check"] = field_check_info(cfg, readings, by_zone)
    result.zone_summary, result.mailing, result.rated = summary, mailing, rated
    result.field_check, result.field_check_by_zone = readings, by_zone
    result.info = {**info, **result.info}  # what the baseline comparison recorded comes after


def _projected(x: np.ndarray, y: np.ndarray, crs: pyproj.CRS) -> tuple[np.ndarray, np.ndarray, float, pyproj.CRS]:
    """The points in a projected CRS, its ft per unit, and that CRS: the customers' own when projected, else the
    UTM zone (WGS 84) at the centre of their extent."""
    if crs.is_projected:
        return x, y, crs.axis_info[0].unit_conversion_factor / M_PER_FT, crs
    from pyproj.aoi import AreaOfInterest
    from pyproj.database import query_utm_crs_info

    finite = np.isfinite(x) & np.isfinite(y)
    lon = float((np.min(x[finite]) + np.max(x[finite])) / 2) if finite.any() else 0.0
    lat = float((np.min(y[finite]) + np.max(y[finite])) / 2) if finite.any() else 0.0
    utm = pyproj.CRS.from_epsg(int(query_utm_crs_info(
        datum_name="WGS 84", area_of_interest=AreaOfInterest(lon, lat, lon, lat))[0].code))
    ux, uy = pyproj.Transformer.from_crs(crs, utm, always_xy=True).transform(x, y)
    return np.asarray(ux), np.asarray(uy), utm.axis_info[0].unit_conversion_factor / M_PER_FT, utm


def _target_areas(cfg: Config, cust: vector_io.Customers, zone_code: np.ndarray, ground: np.ndarray,
                  floors: np.ndarray, p: Any, codes: np.ndarray, found: dict[str, np.ndarray],
                  ) -> tuple[targets_mod.Areas, pyproj.CRS, dict[str, Any]]:
    """The target areas (geopress.targets) of a run, without their addresses (:func:`_area_layer`): the areas,
    the CRS they were clustered in, and what run.json records of them."""
    crit = cfg.criteria
    names = [s.zone for s in cfg.zones.sources]
    low = {s.zone: s.hgl_range(crit.psi_per_ft)[1] for s in cfg.zones.sources}
    x, y, ft_per_unit, crs = _projected(cust.x, cust.y, cust.crs)
    top = np.where(floors > 1, ground + (floors - 1) * crit.floor_height_ft, ground)  # NaN floors: one story
    areas = targets_mod.target_areas(
        x=x, y=y, ft_per_unit=ft_per_unit, zone=zone_code, zone_names=names,
        zone_low_hgl_ft=np.array([low[n] for n in names]), ground_ft=ground, top_ft=top,
        pressures={"psi_min": p.psi_min, "psi_max": p.psi_max, "psi_top": p.psi_top}, found=found,
        ok=codes == cls.CODE["ok"], criteria=crit, targets=cfg.targets)
    table = areas.table
    info = {"enabled": cfg.targets.enabled, "distance_ft": cfg.targets.distance_ft,
            "min_customers": cfg.targets.min_customers,
            "clustered_in": crs.to_string(), "areas": int(len(table)),
            "by_finding": {f: int((table["finding"] == f).sum()) for f in FLAGGED_STATUSES},  # the findings that get areas
            "customers_in_areas": int(table["customers"].sum())}
    return areas, crs, info


def _area_layer(cfg: Config, cust: vector_io.Customers, areas: targets_mod.Areas, crs: pyproj.CRS) -> gpd.GeoDataFrame:
    """The target areas' layer, in the customers' CRS, with each area's distinct mailing addresses (every
    customer its own address when there are no mail fields)."""
    mail = list(cfg.customers.mail_fields)
    if not mail:
        address = np.arange(len(cust.frame))
    else:  # a code per mailing address of the areas' customers (-1 for the others, never read)
        address = np.full(len(cust.frame), -1, dtype=np.intp)
        taken = np.zeros(len(cust.frame), dtype=bool)
        for r in areas.rows:
            taken[r] = True
        rows = np.flatnonzero(taken)
        if rows.size:
            address[rows] = cust.frame[mail].iloc[rows].groupby(mail, dropna=False, sort=False).ngroup().to_numpy()
    layer = gpd.GeoDataFrame(targets_mod.with_addresses(areas, address), geometry="geometry", crs=crs)
    return layer if crs.equals(cust.crs) else layer.to_crs(cust.crs)


def terrain_accuracy(cfg: Config) -> dict[str, Any]:
    """The DEM accuracy a run assumes, for run.json and the report: each raster's vertical RMSE, ft, or that the
    config states none (then the DEM adds nothing to any uncertainty)."""
    t = cfg.terrain
    if t.vertical_rmse_ft is None:
        return {"stated": False, "note": "terrain.vertical_rmse_ft not set: uncertainties leave the DEM out"}
    return {"stated": True, "vertical_rmse_ft": {str(p): r for p, r in zip(t.paths, t.vertical_rmse_ft)}}


def field_check(cfg: Config, zones: vector_io.Zones,
                shift: datum_io.DatumShift) -> tuple[gpd.GeoDataFrame, pd.DataFrame]:
    """The field readings of ``cfg.readings`` against the screening: each reading's zone and ground (the
    customers' zone join, tie rule and terrain sampling), prediction, residual and check, and the per-zone table
    (:mod:`geopress.fieldcheck`)."""
    rc = cfg.readings
    k = cfg.criteria.psi_per_ft
    r = vector_io.read_readings(rc)
    zi = assign_xy(r.x, r.y, r.crs, zones.polygons, zones.crs, zones.priority)
    zoned = zi >= 0
    high = _zone_values(zi, zones, cfg, lambda s: s.hgl_range(k)[0])
    low = _zone_values(zi, zones, cfg, lambda s: s.hgl_range(k)[1])
    recorded = ~np.isnan(r.hgl_ft)
    hgl_high, hgl_low = np.where(recorded, r.hgl_ft, high), np.where(recorded, r.hgl_ft, low)
    terrain = raster_io.sample_terrain(cfg.terrain, r.x, r.y, r.crs, shift)
    height = np.where(np.isnan(r.gauge_height_ft), rc.gauge_height_ft, r.gauge_height_ft)
    default = (np.full(r.x.shape, rc.gauge_accuracy_psi) if rc.gauge_accuracy_psi is not None
               else fieldcheck.grade_accuracy_psi(rc.gauge_grade, rc.gauge_span_psi, r.measured_psi))
    gauge = np.where(np.isnan(r.accuracy_psi), default, r.accuracy_psi)
    rmse = np.nan_to_num(terrain.rmse_ft, nan=0.0)  # a DEM of unstated accuracy adds nothing (run.json says so)
    hgl_unc = np.nan_to_num(_zone_values(zi, zones, cfg, lambda s: s.hgl_uncertainty_ft), nan=0.0)
    rules = fieldcheck.Rules(outlier_psi=rc.outlier_psi, outlier_sigmas=rc.outlier_sigmas, bias_psi=rc.bias_psi,
                             min_readings=rc.min_readings)
    checked = fieldcheck.check_readings(
        measured_psi=r.measured_psi, has_geometry=r.has_geometry, zoned=zoned, ground_ft=terrain.ground_ft,
        gauge_height_ft=height, hgl_low_ft=hgl_low, hgl_high_ft=hgl_high, gauge_psi=gauge, dem_rmse_ft=rmse,
        hgl_uncertainty_ft=hgl_unc, psi_per_ft=k, rules=rules)
    zone = cls.names_at(zones.zone_ids, zi, zoned)
    data = {
        "reading": pd.array(r.ids, dtype="str"), "taken": r.taken, "zone": zone, "ground_ft": terrain.ground_ft,
        "gauge_height_ft": height, "measured_psi": r.measured_psi, "hgl_recorded_ft": r.hgl_ft,
        "hgl_low_ft": hgl_low, "hgl_high_ft": hgl_high, **{c: checked[c].to_numpy() for c in checked.columns
                                                           if c != "check"},
        "gauge_accuracy_psi": gauge, "dem_rmse_ft": rmse, "hgl_uncertainty_ft": hgl_unc, "check": checked["check"].array,
    }
    points = np.full(r.x.shape, None, dtype=object)
    points[r.has_geometry] = shapely.points(r.x[r.has_geometry], r.y[r.has_geometry])
    frame = gpd.GeoDataFrame(data, geometry=gpd.GeoSeries(points, crs=r.crs))
    by_zone = fieldcheck.zone_table(zone=zone, checks=checked["check"].to_numpy(dtype=object),
                                    residual_psi=checked["residual_psi"], sigma_psi=checked["sigma_psi"], x=r.x, y=r.y,
                                    ids=r.ids, sources=cfg.zones.sources, psi_per_ft=k, rules=rules)
    return frame, by_zone


def field_check_info(cfg: Config, readings: pd.DataFrame, by_zone: pd.DataFrame) -> dict[str, Any]:
    """What run.json records of the field check: counts per check, and per zone the bias and the outliers."""
    counts = readings["check"].value_counts()
    return {
        "path": _where(cfg.readings),
        "readings": int(len(readings)),
        "checks": {c: int(counts.get(c, 0)) for c in fieldcheck.CHECKS},
        "zones_with_bias": by_zone.loc[by_zone["significant_bias"], "zone"].tolist(),
        "by_zone": [{"zone": row["zone"], "readings": int(row["readings"]), "bias_psi": _r(row["bias_psi"]),
                     "bias_ft": _r(row["bias_ft"]), "outliers": int(row["outliers"]),
                     "significant_bias": bool(row["significant_bias"]), "pattern": row["pattern"]}
                    for row in by_zone.to_dict("records")],
    }


def _ground_row(zg: guards.ZoneGround, psi_per_ft: float) -> dict[str, Any]:
    """A zone's ground against its HGL, as run.json and ``check`` give it (ft, psi, rounded to 0.1)."""
    lo, hi = zg.psi_range(psi_per_ft)
    names = ("min", "p5", "median", "p95", "max")
    return {"zone": zg.zone, "customers": zg.customers,
            **{f"ground_ft_{n}": _r(v) for n, v in zip(names, zg.ground_ft)},
            "hgl_low_ft": _r(zg.hgl_low_ft), "hgl_high_ft": _r(zg.hgl_high_ft), "psi_from": _r(lo), "psi_to": _r(hi)}


def _r(value: float) -> float | None:
    return None if np.isnan(value) else round(float(value), 1)


#: the changes a ``changes`` layer lists (of the current customers; the removed ones have a layer of their own)
CHANGED = tuple(c for c in CHANGES if c not in ("unchanged", "removed"))


def customer_layers(result: Result) -> dict[str, write_io.Layer]:
    """The GeoPackage's first layers: ``customers``, the frame with its points' WKB (see write_io.Encoded; a run
    sends its rows through a pipe instead: :func:`start_writing`), then its views (:func:`customer_views`)."""
    return {"customers": _layer_frame(result), **customer_views(result)}


def customer_views(result: Result) -> dict[str, write_io.View]:
    """The flagged layers and ``changes``, views of the customers layer (see write_io.View); they read no target
    area."""
    customers, x, y = result.customers, result.points.x, result.points.y
    layers: dict[str, write_io.View] = {}
    for finding, name in cls.FLAGGED_LAYERS.items():
        layers[name] = write_io.view_of("customers", customers, cls.FINDING_COLUMNS[finding], (True,), x, y)
    if "change" in customers.columns:
        layers["changes"] = write_io.view_of("customers", customers, "change", CHANGED, x, y)
    return layers


def later_layers(result: Result) -> dict[str, write_io.Layer]:
    """The GeoPackage's other layers, in writing order, added once :func:`customer_layers` are written."""
    layers: dict[str, write_io.Layer] = {"zone_summary": result.zone_summary}
    if result.areas is not None:
        layers["target_areas"] = write_io.Polygons(result.areas)
    if result.plan is not None:
        layers["service_band"] = result.plan.bands
        layers["band_limits"] = result.plan.limits
    if result.removed is not None:
        layers["removed_customers"] = result.removed
    if result.field_check is not None:
        layers["field_check"] = result.field_check
        layers["field_check_by_zone"] = result.field_check_by_zone
    return layers


#: every layer a run can publish into a database (a run drops those of an earlier run it does not publish)
PUBLISHED_LAYERS = ("customers", *cls.FLAGGED_LAYERS.values(), "changes", "zone_summary", "target_areas",
                    "service_band", "band_limits", "removed_customers")


def database_layers(result: Result) -> dict[str, postgis_io.Table | postgis_io.View]:
    """The GeoPackage's layers as a database gets them, with the same names and fields: ``customers`` keyed by
    the id field and indexed on ``status``, the flagged layers and ``changes`` views of it, the others tables."""
    layers: dict[str, postgis_io.Table | postgis_io.View] = {}
    for name, layer in customer_layers(result).items():
        if isinstance(layer, write_io.View):
            layers[name] = postgis_io.View(of=layer.of, column=layer.column, values=layer.values)
        else:
            layers[name] = postgis_io.encoded_table(result.customers, result.points.wkb, result.points.crs,
                                                    kind="Point", key=result.config.customers.id_field,
                                                    indexes=("status",))
    for name, layer in later_layers(result).items():
        if isinstance(layer, write_io.Polygons):
            layers[name] = postgis_io.geo_table(layer.frame, kind="Geometry")
        elif isinstance(layer, gpd.GeoDataFrame):
            layers[name] = postgis_io.geo_table(layer, kind="Point" if name == "removed_customers" else "Geometry")
        else:
            layers[name] = postgis_io.plain_table(layer)
    return layers


def run_json_path(config: Config) -> Path:
    """run.json sits beside the GeoPackage."""
    return config.output.path.parent / "run.json"


#: the step a run's timings give the hand-off's thread (see :func:`start_writing`); it overlaps the others
HAND_OFF_THREAD = "hand the customers to the writer (thread)"


class HandOff:
    """The thread that hands the customers to the writer process (see :func:`start_writing`); use as a context
    manager, inside the run's ``Worker`` and ``Staging``: leaving the block tells the thread to submit no job and
    to stop sending, and waits (at most ``timeout_s``) for it to end, so a run that stops early never leaves it
    making a pipe beside the outputs after the staging is cleared, nor starts the writer then. The thread is a
    daemon: the interpreter's exit never waits for it."""

    def __init__(self, timeout_s: float):
        self.timeout_s = timeout_s
        self.stopping = threading.Event()
        self._future: Future = Future()
        self._thread: threading.Thread | None = None

    def start(self, fn: Callable[["HandOff"], runner.Job | None]) -> None:
        """Run ``fn(self)`` in the thread; its value is the writer's job (None when stopping)."""
        future = self._future
        future.set_running_or_notify_cancel()

        def target() -> None:
            try:
                future.set_result(fn(self))
            except BaseException as exc:
                future.set_exception(exc)

        self._thread = threading.Thread(target=target, name="geopress-hand-off", daemon=True)
        self._thread.start()

    def job(self) -> runner.Job | None:
        """The writer's job, once the thread has submitted it; what the thread raised; or OutputError when it
        did not finish within ``timeout_s``."""
        try:
            return self._future.result(timeout=self.timeout_s)
        except FutureTimeout:
            raise OutputError(f"handing the customers to the writer process did not finish within "
                              f"{self.timeout_s:g} s (output.child_timeout_s); check the disk and the machine's "
                              "load, or raise output.child_timeout_s", key="output.child_timeout_s") from None

    def __enter__(self) -> "HandOff":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.stopping.set()
        if self._thread is not None and self._thread.ident is not None:
            self._thread.join(self.timeout_s)


@dataclass
class Writing:
    """The GeoPackage's customer layers as :func:`start_writing` handed them to the writer process: the hand-off
    whose thread submits the writer's job (None when the run writes no GeoPackage), the GeoPackage's temporary
    file and the layers."""

    hand_off: HandOff | None
    gpkg: Path | None
    first_layers: dict[str, write_io.Layer]


def start_writing(result: Result, s: Screening, clock: _Clock, stage: write_io.Staging, worker: runner.Worker,
                  hand_off: HandOff) -> Writing:
    """Start writing the GeoPackage's customer layers in ``worker``'s process, from ``result``'s customers as
    they are now (after the baseline comparison's columns), with their target areas (:func:`with_areas`): the rest
    of the run goes on meanwhile.

    The customers travel to the writer as an Arrow stream through a named pipe in the staging folder, which it
    reads a batch at a time as GDAL takes them: not pickled, not inherited, not written to disk. Their Arrow
    table is made here, all but the target areas' columns while their thread may still run; ``hand_off``'s
    thread makes the pipe, submits the writer's job and sends the table while the summaries are made (it waits
    on the writer without the GIL). The thread touches no pandas object; :meth:`HandOff.job` waits for it."""
    out = result.config.output
    if not out.geopackage:
        with_areas(result, s, clock)
        with clock.step("hand the customers to the writer"):
            write_io.ensure_dir(out.path.parent, "output.path")
            return Writing(hand_off=None, gpkg=None, first_layers=customer_layers(result))
    with clock.step("the customers as Arrow"):
        made = write_io.point_table(_layer_frame(result))
        views = customer_views(result)
    with_areas(result, s, clock)
    with clock.step("hand the customers to the writer"):
        write_io.ensure_dir(out.path.parent, "output.path")
        gpkg = stage.temp_for(out.path)
        pipe, table = write_io.arrow_pipe(stage.scratch(out.path, ".arrows"), _layer_frame(result), made=made)
        first_layers: dict[str, write_io.Layer] = {"customers": pipe, **views}

        def hand(h: HandOff) -> runner.Job | None:
            t0 = time.perf_counter()
            stage.wait(out.path, lambda: write_io.make_pipe(pipe))
            if h.stopping.is_set():
                return None
            job = worker.submit(write_io.write_in_child, gpkg, first_layers, what="writer", path=out.path)
            # whether every row went or not, the job's wait says how the writer ended (it counts the rows)
            stage.wait(out.path, lambda: write_io.send_arrow(pipe, table, reader_alive=job.running,
                                                             stop=h.stopping, timeout_s=h.timeout_s))
            clock.timings[HAND_OFF_THREAD] = round(time.perf_counter() - t0, 4)
            return job

        hand_off.start(hand)
        return Writing(hand_off=hand_off, gpkg=gpkg, first_layers=first_layers)


def write_outputs(result: Result, clock: _Clock, stage: write_io.Staging, writing: Writing,
                  publication: postgis_io.Publication | None = None) -> list[Path]:
    """Write every output: while the writer process writes the GeoPackage's customer layers (``writing``), the
    mailing lists, the layer styles, the report and (with a ``publication``) the database's new layers are
    staged here, then its other layers, run.json, the database's swap, and the renames into place."""
    cfg = result.config
    out = cfg.output
    t0 = time.perf_counter()
    with clock.step("write outputs"):
        first_layers, gpkg = writing.first_layers, writing.gpkg
        write_io.ensure_dir(out.mailing_dir, "output.mailing_dir")
        info = dict(result.info)
        files = _list_files(result, info)
        later = later_layers(result)
        styles = _layer_styles(result, [*first_layers, *later], info)
        for layer, style in styles.items():
            files[style_path(cfg, layer)] = lambda tmp, text=style.sld: write_io.write_text(tmp, text)
        if styles:
            later["layer_styles"] = write_io.Styles({k: (v.name, v.description, v.sld) for k, v in styles.items()})
        # the report, the GeoPackage's first layers and the others, and run.json count as one output each
        advance = _advance(clock.counter("write outputs", "outputs", len(files) + 4))
        info["outputs"] = [*([str(out.path)] if out.geopackage else []), *[str(p) for p in files]]
        for target, write in files.items():
            stage.write(target, write)
            advance()
        _stage_report(result, info, stage)
        advance()
        if publication is not None:  # built in one open transaction, swapped in below
            info["database"] = {"database": redact_dsn(out.database), "schema": out.schema}
            info["database"]["build_s"] = publication.build(database_layers(result))
        # the hand-off ends once the writer has read every customer, near the end of its customers layer
        writer = writing.hand_off.job() if writing.hand_off is not None else None
        if writer is not None:
            first = stage.wait(out.path, writer.result)
            advance()
            info["geopackage_layers_s"] = {**first,
                                           **stage.wait(out.path, lambda: write_io.write_geopackage(gpkg, later))}
            if not cfg.what_if:  # a plain run becomes the next run's baseline; a what-if never does
                stage.link(gpkg, nightly.baseline_link(out.path))
        else:
            advance()
        advance()
        # run.json is written inside this step: it records the step up to its own writing
        info["timings_s"] = {**clock.timings, "write outputs": round(time.perf_counter() - t0, 4)}
        info["finished"] = datetime.now(timezone.utc).isoformat(timespec="seconds")
        stage.write(run_json_path(cfg), lambda tmp: write_io.write_json(tmp, info))
        advance()
        if publication is not None:  # the database first: a failure there leaves the files as they were too
            publication.swap(info, PUBLISHED_LAYERS)
        stage.commit()
        result.info = info
        return [p for p in stage.committed if not p.name.startswith(".")]


def _layer_frame(result: Result) -> write_io.Encoded:
    """The customers as the writer takes them: their attributes and their points' WKB."""
    return write_io.Encoded(result.customers, result.points.wkb, result.points.crs)


def _advance(count: Count | None) -> Callable[[], None]:
    """One more output written, reported through ``count``."""
    done = [0]

    def advance() -> None:
        done[0] += 1
        if count is not None:
            count(done[0], None)

    return advance


def _list_files(result: Result, info: dict[str, Any]) -> dict[Path, Callable[[Path], None]]:
    """Each mailing list's CSV and, with ``output.xlsx`` and openpyxl, its .xlsx copy, with their writers;
    ``info["xlsx"]`` says whether the copies are written."""
    out = result.config.output
    reason = xlsx_missing() if out.xlsx else "output.xlsx = false"
    if out.xlsx and reason:
        log.warning("the mailing lists' .xlsx copies not written: %s", reason)
    info["xlsx"] = {"written": reason is None, "reason": reason}
    files: dict[Path, Callable[[Path], None]] = {}
    staged: dict[str, Path] = {}  # each full list's temporary CSV, once written

    def csv(tmp: Path, name: str, df: pd.DataFrame) -> None:
        write_io.write_list_csv(tmp, df)
        staged[name] = tmp

    for name, df in {**result.mailing, **result.new_mailing}.items():
        full = name.removeprefix("new_")
        if name in result.new_mailing and full in result.mailing and df.equals(result.mailing[full]):
            # a first run's new list is its full list: the CSV is copied, not formatted again (1.7 s of a 1M run)
            files[out.mailing_dir / f"{name}.csv"] = lambda tmp, full=full: shutil.copyfile(staged[full], tmp)
        else:
            files[out.mailing_dir / f"{name}.csv"] = lambda tmp, name=name, df=df: csv(tmp, name, df)
        if info["xlsx"]["written"]:
            files[out.mailing_dir / f"{name}.xlsx"] = lambda tmp, df=df, name=name: write_io.write_xlsx(tmp, df, name)
    return files


def _layer_styles(result: Result, layers: list[str], info: dict[str, Any]) -> dict[str, Any]:
    """The SLD style of each of ``layers`` that has one (geopress.styles), or none without the report extra,
    whose palette they share; ``info["styles"]`` says which."""
    missing = report_missing()
    if missing:
        info["styles"] = {"written": False, "reason": missing}
        return {}
    from . import styles

    found = dict(styles.layer_styles(layers))
    info["styles"] = {"written": True, "layers": list(found)}
    return found


def style_path(config: Config, layer: str) -> Path:
    """A layer's SLD file beside the GeoPackage: ``<stem>.<layer>.sld``."""
    return config.output.path.with_name(f"{config.output.path.stem}.{layer}.sld")


def output_targets(config: Config) -> list[Path]:
    """Every file a run of ``config`` can write."""
    out = config.output
    names = [*cls.FLAGGED_LAYERS.values(), *[f"new_{n}" for n in cls.FLAGGED_LAYERS.values()],
             confidence.VERIFICATION_LIST]
    lists = [out.mailing_dir / f"{n}{suffix}" for n in names for suffix in (".csv", ".xlsx")]
    styled = ["customers", *cls.FLAGGED_LAYERS.values(), "service_band", "band_limits", "changes", "target_areas"]
    return [out.path, nightly.baseline_link(out.path), *lists, *[style_path(config, layer) for layer in styled],
            report_path(config), run_json_path(config)]


def report_path(config: Config) -> Path:
    """report.html sits beside the GeoPackage."""
    return config.output.path.parent / "report.html"


def _stage_report(result: Result, info: dict[str, Any], stage: write_io.Staging) -> None:
    """Stage report.html (from ``info`` as run.json will record it) and say in ``info`` whether it was written."""
    cfg = result.config
    if not cfg.output.report:
        info["report"] = {"written": False, "reason": "output.report = false"}
        return
    missing = report_missing()
    if missing:
        log.warning("report.html not written: %s", missing)
        info["report"] = {"written": False, "reason": missing}
        return
    path = report_path(cfg)
    info["report"] = {"written": True, "path": str(path), "units": cfg.output.units}
    info["outputs"].append(str(path))
    drawing = result.report
    drawn = None
    if drawing is not None:
        drawn = stage.wait(path, drawing.job.result)
        drawing.job.worker.close()  # the band's process has done its last job
    html = planning.report_html(cfg, result.customers, result.points, result.zone_summary, result.plan, info,
                                result.areas, result.field_check, result.field_check_by_zone,
                                parts=None if drawing is None else drawing.parts, drawn=drawn)
    stage.write(path, lambda tmp: tmp.write_text(html, encoding="utf-8"))


def run(config: Config | str | os.PathLike, *, write: bool = True, progress: Progress | None = None,
        baseline: str | os.PathLike | None = None, engine: str = "local", scheduler: Any = None,
        partitions: int | None = None, accept_drop: bool = False) -> Result:
    """Run the screening for ``config`` (a :class:`Config` or a path to a TOML file).

    Parameters
    ----------
    config
        the configuration, or the path of its TOML file.
    write
        write the outputs (default), atomically and under the output lock: on any error, or
        Ctrl-C, no output is changed. ``False`` computes everything and writes nothing.
    baseline
        an earlier geopress GeoPackage to compare with; by default the last accepted run
        (see :func:`geopress.nightly.track`).
    engine, scheduler, partitions
        ``engine="dask"`` runs the zone join and terrain sampling per spatial partition on
        dask.distributed (``pip install 'geopress[dask]'``): ``scheduler`` is a scheduler
        address, cluster or Client (None starts a LocalCluster), ``partitions`` the number of
        spatial partitions. The results are identical to ``engine="local"``.
    accept_drop
        take a run whose customers dropped by more than ``output.max_drop_percent`` of the
        baseline's as it is, instead of refusing it.

    Returns
    -------
    Result

    Raises
    ------
    GeopressError
        for a bad config or input, a locked or unwritable output, a refused drop.

    Notes
    -----
    The run's side work goes to child processes (:mod:`geopress.runner`, from multiprocessing's
    fork server): a script that calls ``run`` must do so under ``if __name__ == "__main__":``.
    """
    if engine not in ENGINES:
        raise ConfigError(f"engine must be one of {', '.join(ENGINES)}, not {engine!r}", key="engine")
    if engine == "local" and (scheduler is not None or partitions is not None):
        raise ConfigError("a scheduler and partitions apply only to the dask engine; add --engine dask", key="engine")
    cfg = _as_config(config)
    clock = _Clock(progress)
    t0 = time.perf_counter()
    started = datetime.now(timezone.utc).isoformat(timespec="seconds")
    if write:
        check_writable(cfg.output.path.parent, "output.path")
        check_writable(cfg.output.mailing_dir, "output.mailing_dir")
    shown: list[str] = []
    with _cycle_collection_paused(), _recorded_warnings(shown), \
            nightly.guarded_outputs(cfg, output_targets(cfg)) if write else nullcontext() as publication, \
            write_io.Staging(journal_for=cfg.output.path) as stage, \
            runner.Worker(timeout_s=cfg.output.child_timeout_s) as band_worker, \
            runner.Worker(timeout_s=cfg.output.child_timeout_s) if write else nullcontext() as worker, \
            HandOff(cfg.output.child_timeout_s) as hand_off:  # each ended before the one above it
        inputs = nightly.snapshot(cfg.input_paths())
        result, screening = screen(cfg, clock, band_worker, engine=engine, scheduler=scheduler,
                                   partitions=partitions)
        with clock.step("compare with baseline"):
            newly = nightly.track(result, baseline, accept_drop=accept_drop, published=publication)
        # the customers are final once their target areas are in: the writer process writes them while their
        # summaries and lists are made here
        writing = None
        if write:
            writing = start_writing(result, screening, clock, stage, worker, hand_off)
        else:
            with_areas(result, screening, clock)
        if writing is not None and writing.hand_off is not None:
            behind_the_writer()  # the writer process sets the run's end from here (a command's process only: _compat)
        summarise(result, screening, clock, draw=write)
        nightly.check_unchanged(inputs)
        with clock.step("new mailing lists"):
            nightly.new_lists(result, newly)
        result.info["started"] = started
        result.info["engine"] = engine
        result.info["warnings"] = shown  # the same list: warnings shown while writing are added too
        if writing is not None:
            result.outputs = write_outputs(result, clock, stage, writing, publication)
    result.timings = clock.timings
    result.elapsed_s = time.perf_counter() - t0
    log.debug("run finished in %.2f s: %s", result.elapsed_s,
              ", ".join(f"{k} {v}" for k, v in result.counts.items() if v))
    return result


@dataclass
class CheckReport:
    """What :func:`check` found; ``lines`` say what a run would process.

    ``coverage`` maps each raster path to the customers on it (and ``"any"`` to
    those on any raster); ``ground`` is the per-zone ground against the HGL;
    ``warnings`` the messages of the warnings shown.
    """

    config: Config
    customers: int
    no_geometry: int
    zones: list[str]
    rasters: list[raster_io.RasterReport]
    overlaps: list[dict[str, Any]]
    lines: list[str]
    coverage: dict[str, int] = field(default_factory=dict)
    unzoned: int = 0
    ground: list[guards.ZoneGround] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


def _where(layer_cfg: Any) -> str:
    """Where a customers, zones or readings layer is read from: its file, or its table or query in a database."""
    return str(layer_cfg.path) if layer_cfg.database is None else layer_cfg.database.describe()


def _share(part: int, whole: int) -> str:
    return f"{100 * part / whole:.1f} %" if whole else "n/a"


def check(config: Config | str | os.PathLike) -> CheckReport:
    """Validate the config and every input as a run would, and say how they fit together; write nothing.

    Reads where the customers are (not their mail fields), samples the terrain
    under them and joins them to the zones, checks the field readings (when
    the config has them) as a run would, then applies the run's guards
    (:func:`apply_guards`): too little coverage or ground off the Earth raise
    InputError, a zone whose ground looks wrong against its HGL warns.

    Returns
    -------
    CheckReport
        ``lines`` to print: the inputs, the share of customers on each raster and
        in a zone, the datum handling, and per zone the ground (min, 5th
        percentile, median, 95th percentile, max, ft) beside the HGL range and the
        static pressure range.

    Raises
    ------
    GeopressError
        for a bad config or input, as :func:`run` would.
    """
    cfg = _as_config(config)
    shown: list[str] = []
    with _recorded_warnings(shown):
        check_writable(cfg.output.path.parent, "output.path")
        check_writable(cfg.output.mailing_dir, "output.mailing_dir")
        cust = vector_io.read_customers(cfg.customers, mail=False)
        zones = vector_io.read_zones(cfg.zones)
        ov = _warn_overlaps(zones)
        shift = datum_shift(cfg, cust.crs)
        tiles = raster_io.read_tiles(cfg.terrain.paths, cfg.terrain.vertical_units)
        rasters = raster_io.describe(cfg.terrain.paths, cfg.terrain.vertical_units)
        each, anywhere = raster_io.coverage(tiles, cust.x, cust.y, cust.crs)
        terrain = raster_io.sample_terrain(cfg.terrain, cust.x, cust.y, cust.crs, shift)
        names = [s.zone for s in cfg.zones.sources]
        zone_code = _zone_codes(assign_xy(cust.x, cust.y, cust.crs, zones.polygons, zones.crs, zones.priority),
                                zones, names)
        located = int(np.count_nonzero(cust.has_geometry))
        table = apply_guards(cfg, terrain, zone_code, located, cust.crs, zones)
    unzoned = located - int(np.count_nonzero(zone_code >= 0))
    k = cfg.criteria.psi_per_ft
    lines = [
        f"customers: {len(cust.frame)} from {_where(cfg.customers)} layer '{cust.layer}' ({cust.crs.to_string()}); "
        f"{cust.from_polygons} polygons, {cust.no_geometry} without geometry",
    ]
    for r, n in zip(rasters, each):
        lines.append(f"terrain: {r.path} ({r.shape[1]} x {r.shape[0]} px, {r.crs}, vertical unit {r.vertical_unit}, "
                     f"missing pixels by {r.missing}, scale {r.scale:g}, offset {r.offset:g}): "
                     f"{_share(n, located)} of the located customers on it")
    lines.append(f"terrain: {_share(anywhere, located)} of the located customers on a raster")
    lines.append(f"datum: {shift.description}; {shift.direction()}")
    lines.append(f"zones: {len(names)} from {_where(cfg.zones)} layer '{zones.layer}' ({zones.crs.to_string()}); "
                 f"{_share(located - unzoned, located)} of the located customers in a zone, {unzoned} unzoned")
    lines.append("per zone: ground of its customers (min, 5 %, median, 95 %, max) against its HGL, and the static "
                 "pressure range")
    for zg, src in zip(table, cfg.zones.sources):
        lo_psi, hi_psi = zg.psi_range(k)
        g = zg.ground_ft
        ground = ("no ground sampled" if np.isnan(g[0]) else
                  f"ground {g[0]:,.0f} to {g[4]:,.0f} ft (5 % {g[1]:,.0f}, median {g[2]:,.0f}, 95 % {g[3]:,.0f})")
        hgl = (f"an HGL of {zg.hgl_high_ft:,.0f} ft" if zg.hgl_high_ft == zg.hgl_low_ft
               else f"an HGL of {zg.hgl_low_ft:,.0f} to {zg.hgl_high_ft:,.0f} ft")
        psi = "" if np.isnan(g[0]) else f": static {lo_psi:,.1f} to {hi_psi:,.1f} psi"
        flag = f"  <- median {zg.suspicion()}" if zg.suspicion() else ""
        lines.append(f"  {zg.zone} ({src.kind}, {zg.customers} customers): {ground} under {hgl}{psi}{flag}")
    for o in ov:
        lines.append(f"overlap: zones {o['zones'][0]} and {o['zones'][1]} share {o['area']:,.1f} square CRS units")
    if cfg.readings is not None:
        with _recorded_warnings(shown):
            readings, _ = field_check(cfg, zones, shift)
        checks = readings["check"].value_counts()
        lines.append(f"readings: {len(readings)} from {_where(cfg.readings)} ("
                     + ", ".join(f"{checks[c]} {c}" for c in fieldcheck.CHECKS if checks.get(c, 0)) + ")")
    lines.append(f"output: {cfg.output.path}, mailing lists in {cfg.output.mailing_dir}")
    if cfg.output.database is not None:
        lines.append(f"output: published into schema {cfg.output.schema} of database '{redact_dsn(cfg.output.database)}'"
                     + ("" if cfg.output.geopackage else ", instead of the GeoPackage"))
    coverage = {r.path: n for r, n in zip(rasters, each)}
    coverage["any"] = anywhere
    return CheckReport(config=cfg, customers=len(cust.frame), no_geometry=cust.no_geometry, zones=names,
                       rasters=rasters, overlaps=ov, lines=lines, coverage=coverage, unzoned=unzoned, ground=table,
                       warnings=shown)


@dataclass
class Comparison:
    """Customers whose status differs between two runs, the counts per zone, and the files written."""

    differences: gpd.GeoDataFrame
    by_zone: pd.DataFrame
    id_field: str
    outputs: list[Path]


def compare(a: str | os.PathLike, b: str | os.PathLike, *, out: str | os.PathLike | None = None,
            id_field: str | None = None) -> Comparison:
    """Compare the ``customers`` layers of two runs' GeoPackages (A before, B after).

    Writes ``out`` (default: ``status_differences.gpkg`` beside B) with layers
    ``status_differences`` and ``status_differences_by_zone``, and the two as
    CSVs beside it (``<stem>.csv``, ``<stem>_by_zone.csv``).
    """
    from . import compare as compare_mod
    from .io import results

    left, key = results.read_run_customers(Path(a), id_field, key="BEFORE")
    right, _ = results.read_run_customers(Path(b), key, key="AFTER",
                                          id_source="--id-field" if id_field else "the first field of BEFORE")
    diff = compare_mod.status_differences(left, right, key)
    by_zone = compare_mod.counts_by_zone(diff)
    target = Path(out) if out is not None else Path(b).parent / "status_differences.gpkg"
    if target.suffix.lower() != ".gpkg":
        raise OutputError(f"--out must end in .gpkg, not '{target.name}'", path=target, key="--out")
    written = results.write_comparison(target.resolve(), diff, by_zone)
    log.info("%d customers differ in status between %s and %s", len(diff), a, b)
    return Comparison(differences=diff, by_zone=by_zone, id_field=key, outputs=written)
