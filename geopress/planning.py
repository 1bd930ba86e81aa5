"""Planning outputs of a run: the serviceable band per zone and the best HGL per zone.

Part of the pipeline layer (called by :mod:`geopress.pipeline`): it joins
the DEM windows read by :mod:`geopress.io.raster` with the pure
:mod:`geopress.band` and :mod:`geopress.besthgl`.

Several rasters: each zone is cut by the rasters' footprints in the order
configured; a raster computes the band for the part of the zone inside its
bounds that no earlier raster's bounds cover (so nodata inside an earlier
raster is not filled from a later one there).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely
from pyproj import CRS, Transformer

from . import band as band_mod
from .besthgl import BestRange, Dial, best_ranges, flagged_count, robust_tolerance, settable
from .classify import FLAGGED_LAYERS
from .config import Config
from .io import raster as raster_io
from .io.datum import DatumShift
from .io.vector import Zones
from .pressure import M_PER_FT, PrvSource, Source, TankSource

if TYPE_CHECKING:  # the report extra is optional: report_html imports it when it runs
    from . import report

log = logging.getLogger(__name__)

#: the longest side, in pixels, of the DEM kept per zone for the report's hillshade.
PREVIEW_PX = 600


@dataclass
class ZoneTerrain:
    """What the report draws for one zone, in the CRS of the zone's first raster (``crs``).

    ``dem_ft`` is a preview of the ground (ft, NaN nodata) covering
    ``extent`` = (left, right, bottom, top); ``pixel`` its pixel size in map
    units.
    """

    zone: str
    crs: CRS
    dem_ft: np.ndarray
    extent: tuple[float, float, float, float]
    pixel: float
    zone_geom: shapely.Geometry
    band_geom: shapely.Geometry
    limits: dict[str, shapely.Geometry]


@dataclass
class Plan:
    """The ``service_band`` and ``band_limits`` layers, the report's terrain and run.json's section.

    ``outlines`` holds every zone's merged polygons in the customers' CRS, in
    config order, for the report's maps of all zones (a zone without terrain too).
    """

    bands: gpd.GeoDataFrame
    limits: gpd.GeoDataFrame
    terrain: list[ZoneTerrain] = field(default_factory=list)
    info: list[dict[str, Any]] = field(default_factory=list)
    outlines: dict[str, shapely.Geometry] = field(default_factory=dict)


def _to_crs(geom: shapely.Geometry, src: CRS, dst: CRS) -> shapely.Geometry:
    if geom.is_empty or src.equals(dst):
        return geom
    return gpd.GeoSeries([geom], crs=src).to_crs(dst).iloc[0]


def _preview(win: raster_io.DemWindow) -> tuple[np.ndarray, tuple[float, float, float, float], float]:
    step = max(1, int(np.ceil(max(win.array_ft.shape) / PREVIEW_PX)))
    arr = win.array_ft[::step, ::step].copy()  # a copy: a view would keep the whole window alive
    t = win.transform
    h, w = arr.shape
    extent = (t.c, t.c + t.a * step * w, t.f + t.e * step * h, t.f)
    return arr, extent, band_mod.pixel_size(t) * step


def zone_geometries(zones: Zones, order: list[str], crs: CRS) -> dict[str, shapely.Geometry]:
    """Each zone's polygons merged, in ``order``, in ``crs``."""
    return {z: _to_crs(shapely.union_all(zones.polygons[zones.zone_ids == z]), zones.crs, crs)
            for z in order if (zones.zone_ids == z).any()}


def service_bands(cfg: Config, zones: Zones, crs: CRS, shift: DatumShift) -> Plan:
    """The serviceable band and limit lines of every zone, in ``crs`` (the customers' CRS), from the DEM
    on the HGLs' datum (``shift``)."""
    crit = cfg.criteria
    footprints = [(p, *raster_io.raster_footprint(p)) for p in cfg.terrain.paths]
    band_rows, limit_rows, terrain, info = [], [], [], []
    outlines = zone_geometries(zones, [s.zone for s in cfg.zones.sources], crs)
    for zone, geom in outlines.items():
        src = cfg.zones.source_for(zone)
        high, low = src.hgl_range(crit.psi_per_ft)
        lower, upper = band_mod.limit_elevations(high, low, crit)
        remaining = geom
        polys, lines = [], {name: [] for name in band_mod.LIMITS}
        first: ZoneTerrain | None = None
        used: list[dict[str, Any]] = []
        for path, rcrs, bounds in footprints:
            if remaining.is_empty:
                break
            box_here = _to_crs(shapely.box(*bounds), rcrs, crs)
            piece = shapely.intersection(remaining, box_here)
            if piece.is_empty or piece.area == 0:
                continue
            remaining = shapely.difference(remaining, box_here)
            piece_r = _to_crs(piece, crs, rcrs)
            win = raster_io.read_dem_window(path, piece_r.bounds, cfg.terrain, shift)
            if win is None:
                continue
            b = band_mod.zone_band(win.array_ft, win.transform, piece_r, high, low, crit)
            polys.append(_to_crs(b.polygons, rcrs, crs))
            for name, line in b.limits.items():
                lines[name].append(_to_crs(line, rcrs, crs))
            used.append({"path": win.path, "decimation": win.decimation, "pixel": band_mod.pixel_size(win.transform),
                         "band_pixels": b.pixels})
            if first is None:
                arr, extent, px = _preview(win)
                first = ZoneTerrain(zone=zone, crs=rcrs, dem_ft=arr, extent=extent, pixel=px,
                                    zone_geom=piece_r, band_geom=b.polygons, limits=dict(b.limits))
            del win  # before the next window is read
        merged = band_mod.polygonal(shapely.union_all(polys)) if polys else shapely.MultiPolygon()
        sq_ft = band_mod.area_sq_ft(merged, crs)
        decimation = max((u["decimation"] for u in used), default=1)
        band_rows.append({
            "zone": zone, "lower_limit_ft": lower, "upper_limit_ft": upper,
            "area_sq_ft": round(sq_ft, 1), "area_acres": round(sq_ft / band_mod.SQ_FT_PER_ACRE, 3),
            "zone_area_acres": round(band_mod.area_sq_ft(geom, crs) / band_mod.SQ_FT_PER_ACRE, 3),
            "decimation": decimation, "geometry": None if merged.is_empty else merged,
        })
        for name, parts in lines.items():
            line = band_mod.lineal(shapely.union_all(parts)) if parts else shapely.MultiLineString()
            limit_rows.append({"zone": zone, "limit": name, "elevation_ft": lower if name == "max_static" else upper,
                               "meaning": band_mod.LIMITS[name], "geometry": None if line.is_empty else line})
        if first is not None:
            if len(used) > 1:  # the band came from several rasters: draw the merged result
                first.band_geom = _to_crs(merged, crs, first.crs)
                first.zone_geom = _to_crs(geom, crs, first.crs)
            terrain.append(first)
        info.append({"zone": zone, "lower_limit_ft": lower, "upper_limit_ft": upper, "rasters": used})
        log.info("zone %s: serviceable band %.1f to %.1f ft covers %.2f acres", zone, lower, upper,
                 sq_ft / band_mod.SQ_FT_PER_ACRE)
    bands = gpd.GeoDataFrame(band_rows, geometry="geometry", crs=crs) if band_rows else _empty(crs)
    limits = gpd.GeoDataFrame(limit_rows, geometry="geometry", crs=crs) if limit_rows else _empty(crs)
    return Plan(bands=bands, limits=limits, terrain=terrain, info=info, outlines=outlines)


def _empty(crs: CRS) -> gpd.GeoDataFrame:
    return gpd.GeoDataFrame({"zone": []}, geometry=gpd.GeoSeries([], crs=crs))


BEST_COLUMNS = (
    "best_high_water_ft_from", "best_high_water_ft_to",
    "best_setting_psi_from", "best_setting_psi_to",
    "best_discharge_hgl_ft_from", "best_discharge_hgl_ft_to",
    "flagged_now", "flagged_at_best",
)
#: the settings an operator can set, in the unit of the zone's control (``control``: the source key it is)
OPERATOR_COLUMNS = (
    "control", "control_step", "control_min", "control_max", "optimum_vs_bounds",
    "step_from", "step_to", "flagged_at_step", "steps_inside_optimum",
    "robust_from", "robust_to", "flagged_robust", "robust_tolerance",
)
#: counts that may be missing (no step can be set)
_COUNTS = ("flagged_at_step", "flagged_robust")


@dataclass(frozen=True)
class Control:
    """A zone's control as the best-range sweep sees it: ``key`` (the source key it sets), the steps of
    ``dial``, the bounds on the high HGL ``lower_ft``/``upper_ft`` (what the source can do, infinite where
    nothing is known), and ``to_control``, the control's value (its unit) at a high HGL (ft)."""

    key: str
    dial: Dial
    lower_ft: float
    upper_ft: float
    offset: float
    scale: float

    def to_control(self, hgl_ft: float) -> float:
        """The control's value at high HGL ``hgl_ft``."""
        return self.scale * (hgl_ft - self.offset)


def control_of(src: Source, cfg: Config) -> Control:
    """The control of ``src``'s zone: a tank's high water (steps from its bottom), a PRV's setting, a
    booster's discharge HGL; bounded by the tank's bottom plus its operating range and its overflow, the
    PRV's inlet (the lowest HGL it supplies) and a setting of 0 psi, the pump's shutoff HGL."""
    k, op = cfg.criteria.psi_per_ft, cfg.operator
    high, low = src.hgl_range(k)
    inf = np.inf
    if isinstance(src, TankSource):
        origin = 0.0 if src.bottom_ft is None else src.bottom_ft
        return Control("high_water_ft", Dial(origin, op.tank_step_ft, origin, op.tank_step_ft),
                       -inf if src.bottom_ft is None else src.bottom_ft + (high - low),
                       inf if src.overflow_ft is None else src.overflow_ft, 0.0, 1.0)
    if isinstance(src, PrvSource):
        inlet = cfg.zones.inlet_hgl(src, k)
        return Control("setting_psi", Dial(src.valve_elevation_ft, op.prv_step_psi / k, 0.0, op.prv_step_psi),
                       src.valve_elevation_ft, inf if inlet is None else inlet[1], src.valve_elevation_ft, k)
    band = high - low  # the discharge HGL is the high HGL less the band up to the no-demand HGL
    return Control("discharge_hgl_ft", Dial(band, op.pump_step_ft, 0.0, op.pump_step_ft), -inf,
                   inf if src.shutoff_hgl_ft is None else src.shutoff_hgl_ft, band, 1.0)


def _where(best: BestRange, lower_ft: float, upper_ft: float) -> str:
    """Where the exact optimum lies against the bounds: inside, partly outside, outside (none: no optimum)."""
    if np.isnan(best.from_ft):
        return "none"
    if best.from_ft >= lower_ft and best.to_ft <= upper_ft:
        return "inside"
    if best.to_ft < lower_ft or best.from_ft > upper_ft:
        return "outside"
    return "partly outside"


def best_hgl_table(customers: pd.DataFrame, cfg: Config) -> pd.DataFrame:
    """Per zone, the best range of its control (tank high water, PRV setting or pump HGL), the counts, and
    what an operator can set (:data:`OPERATOR_COLUMNS`, from :func:`geopress.besthgl.settable`).

    Only the pair of ``best_`` columns for the zone's source kind is filled; the others are NaN. The
    ``best_`` range is the exact optimum with no bounds; the operator's steps lie within the bounds.
    """
    crit, op = cfg.criteria, cfg.operator
    floors_all = (customers[cfg.customers.floors_field].to_numpy(dtype=np.float64, na_value=np.nan) if cfg.customers.floors_field
                  else np.full(len(customers), np.nan))
    zone_col = customers["zone"]
    ground_all = customers["ground_ft"].to_numpy(dtype=np.float64)
    flagged_all = customers["status"].isin(list(FLAGGED_LAYERS)).to_numpy()
    rows = []
    for src in cfg.zones.sources:
        sel = (zone_col == src.zone).to_numpy(dtype=bool)  # compared as the column's own text, no Python str per row
        row: dict[str, Any] = {"zone": src.zone, **{c: np.nan for c in BEST_COLUMNS}}
        high, low = src.hgl_range(crit.psi_per_ft)
        ground, floors = ground_all[sel], floors_all[sel]
        control = control_of(src, cfg)
        lower, upper = control.lower_ft, control.upper_ft
        # the zone's intervals sorted once, and swept once for the exact optimum and the one within the bounds
        fc = flagged_count(ground, floors, high - low, crit)
        best, bounded = best_ranges(fc, [(-np.inf, np.inf), (lower, upper)])
        key = {"high_water_ft": "best_high_water_ft", "setting_psi": "best_setting_psi",
               "discharge_hgl_ft": "best_discharge_hgl_ft"}[control.key]
        row[f"{key}_from"], row[f"{key}_to"] = control.to_control(best.from_ft), control.to_control(best.to_ft)
        row["flagged_now"] = int(flagged_all[sel].sum())
        row["flagged_at_best"] = best.flagged
        tolerance = robust_tolerance(best.customers, op.robust_percent, op.robust_customers)
        steps = settable(fc, bounded, control.dial, tolerance=tolerance, lower_ft=lower, upper_ft=upper)
        row.update({
            "control": control.key, "control_step": control.dial.c_step,
            "control_min": control.to_control(lower) if np.isfinite(lower) else np.nan,
            "control_max": control.to_control(upper) if np.isfinite(upper) else np.nan,
            "optimum_vs_bounds": _where(best, lower, upper),
            "step_from": steps.step_from, "step_to": steps.step_to, "flagged_at_step": steps.flagged_at_step,
            "steps_inside_optimum": steps.inside_optimum,
            "robust_from": steps.robust_from, "robust_to": steps.robust_to, "flagged_robust": steps.flagged_robust,
            "robust_tolerance": steps.tolerance,
        })
        rows.append(row)
    table = pd.DataFrame(rows, columns=["zone", *BEST_COLUMNS, *OPERATOR_COLUMNS])
    return table.astype({"flagged_now": "int64", "flagged_at_best": "int64", "robust_tolerance": "int64",
                         "steps_inside_optimum": "bool"} | {c: "Int64" for c in _COUNTS})


def _frame(crs: CRS, bounds: tuple[float, float, float, float]) -> "report.Frame":
    """Ground ft per map unit along x and y of ``crs`` around ``bounds`` (left, bottom, right, top), and what up is.

    Projected: the axis unit's metres (pyproj) over 0.3048, the same on both
    axes; up is grid north. Geographic: the geodesic length of a degree of
    longitude and of latitude at the centre of ``bounds`` on the CRS's
    ellipsoid; up is north.
    """
    from . import report

    if crs.is_projected:
        ft = crs.axis_info[0].unit_conversion_factor / M_PER_FT
        return report.Frame(ft_per_x=ft, ft_per_y=ft, north=f"grid north of {crs.name}")
    geod = crs.get_geod()
    lon = (bounds[0] + bounds[2]) / 2.0
    lat = min(max((bounds[1] + bounds[3]) / 2.0, -89.0), 89.0)
    per_lon = geod.inv(lon - 0.5, lat, lon + 0.5, lat)[2] / M_PER_FT
    per_lat = geod.inv(lon, lat - 0.5, lon, lat + 0.5)[2] / M_PER_FT
    return report.Frame(ft_per_x=per_lon, ft_per_y=per_lat, north="north")


def _terrain(zt: ZoneTerrain) -> "report.Terrain":
    from . import report

    return report.Terrain(dem_ft=zt.dem_ft, extent=zt.extent)


def _xy(x: np.ndarray, y: np.ndarray, src: CRS, dst: CRS) -> tuple[np.ndarray, np.ndarray]:
    """Coordinates ``x``/``y`` (in ``src``) in ``dst``, x east and y north as GeoPandas' ``to_crs`` gives them."""
    if dst.equals(src):
        return x, y
    return Transformer.from_crs(src, dst, always_xy=True).transform(x, y)


@dataclass
class ReportParts:
    """What the report takes from a run's customers (:func:`report_parts`): its figures as data, to draw in any
    process (``report.draw``), the interactive map, and the CRS, frame, terrain and zone outlines of the maps of
    all zones, which a field check's map shares."""

    figures: "report.Figures"
    interactive: "report.InteractiveMap"
    crs: CRS
    frame: "report.Frame"
    background: list["report.Terrain"]
    outlines: dict[str, shapely.Geometry]


def report_parts(cfg: Config, customers: pd.DataFrame, points: Any, plan: Plan | None,
                 areas: gpd.GeoDataFrame | None = None) -> ReportParts:
    """The report's figures and maps for a run (needs the ``report`` extra; see :mod:`geopress._compat`), from
    its customers; ``points``: their ``x``, ``y`` and ``crs`` (a pipeline Points); ``areas``: the target areas'
    layer. Draws nothing.

    Each zone map is drawn in the CRS of its zone's first raster; the maps of
    all zones (overview and interactive) in that of the first zone map, with
    the terrain previews of the zones whose rasters share it, or in the
    customers' CRS when no zone has terrain.
    """
    from . import report
    from .units import units_for

    units = units_for(cfg.output.units)
    # zones and statuses as integer codes into their names (unzoned -> -1): compared as integers, not as strings
    zone_code, zone_names = pd.factorize(customers["zone"])
    code_of = {z: i for i, z in enumerate(zone_names.tolist())}
    status_code, status_names = pd.factorize(customers["status"])  # every customer has a status
    status_names = np.asarray(status_names, dtype=object)
    psi_min = customers["psi_min"].to_numpy(dtype=np.float64)
    psi_max = customers["psi_max"].to_numpy(dtype=np.float64)
    histograms = {}
    for z in (src.zone for src in cfg.zones.sources):  # the zone summary's zones, in its order
        sel = zone_code == code_of.get(z, -2)
        histograms[z] = report.histogram_data(psi_min[sel], psi_max[sel], cfg.criteria, units)

    def counts_at(sel: np.ndarray) -> dict[str, int]:
        per = np.bincount(status_code[sel], minlength=len(status_names))
        return {status_names[i]: int(per[i]) for i in np.flatnonzero(per)}

    maps = []
    px, py, pcrs = points.x, points.y, points.crs
    drawable = ~(np.isnan(px) | np.isnan(py))
    terrains = plan.terrain if plan is not None else []
    for zt in terrains:
        sel = np.flatnonzero((zone_code == code_of.get(zt.zone, -2)) & drawable)
        counts = counts_at(sel)
        sel = sel[report.map_sample(status_code[sel])]
        x, y = _xy(px[sel], py[sel], pcrs, zt.crs)
        maps.append(report.ZoneMap(
            zone=zt.zone, terrain=_terrain(zt), frame=_frame(zt.crs, zt.zone_geom.bounds),
            zone_geom=zt.zone_geom, band_geom=zt.band_geom, limits=zt.limits,
            x=x, y=y, status=status_names[status_code[sel]], counts=counts,
        ))
    # -- the maps of all zones, in one CRS
    crs = terrains[0].crs if terrains else pcrs
    outlines = {z: _to_crs(g, pcrs, crs) for z, g in (plan.outlines if plan is not None else {}).items()}
    shown = np.flatnonzero(drawable)
    counts = counts_at(shown)
    unmapped = int(len(customers) - shown.size)
    over = shown[report.map_sample(status_code[shown])]
    x, y = _xy(px[over], py[over], pcrs, crs)
    if outlines:
        frame = _frame(crs, shapely.union_all(list(outlines.values())).bounds)
    else:
        frame = _frame(crs, (float(np.min(x)), float(np.min(y)), float(np.max(x)), float(np.max(y))) if x.size
                       else (0.0, 0.0, 0.0, 0.0))
    background = [_terrain(zt) for zt in terrains if zt.crs.equals(crs)]
    overview = report.OverviewMap(terrain=background, frame=frame, outlines=outlines, x=x, y=y,
                                  status=status_names[status_code[over]], counts=counts, unmapped=unmapped)
    ok_code = {s: i for i, s in enumerate(status_names)}.get("ok", -1)
    pick = shown[report.interactive_sample(status_code[shown], ok_code)]
    x, y = _xy(px[pick], py[pick], pcrs, crs)

    def picked(column: str) -> np.ndarray:  # only the drawn rows become Python objects
        return customers[column].iloc[pick].to_numpy(dtype=object, na_value=None)

    interactive = report.InteractiveMap(
        terrain=background, frame=frame, outlines=outlines, x=x, y=y,
        ids=picked(cfg.customers.id_field), zone=picked("zone"),
        ground_ft=customers["ground_ft"].to_numpy(dtype=np.float64)[pick], psi_min=psi_min[pick],
        psi_max=psi_max[pick], status=status_names[status_code[pick]], reason=picked("reason"), counts=counts,
    )
    areas_drawn = None
    if areas is not None:
        shapes = areas.geometry.to_numpy() if areas.crs is None or areas.crs.equals(crs) else areas.to_crs(crs).geometry.to_numpy()
        areas_drawn = report.AreasMap(background=overview, areas=list(zip(areas["area"], areas["finding"], shapes)))
    figures = report.Figures(histograms=histograms, maps=maps, overview=overview, areas=areas_drawn, units=units)
    return ReportParts(figures=figures, interactive=interactive, crs=crs, frame=frame, background=background,
                       outlines=outlines)


def report_html(cfg: Config, customers: pd.DataFrame, points: Any, summary: pd.DataFrame, plan: Plan | None,
                info: dict[str, Any], areas: gpd.GeoDataFrame | None = None,
                readings: gpd.GeoDataFrame | None = None, readings_by_zone: pd.DataFrame | None = None, *,
                parts: ReportParts | None = None, drawn: "report.Drawn | None" = None) -> str:
    """The report page for a run (needs the ``report`` extra; see :mod:`geopress._compat`); ``points``: the
    customers' ``x``, ``y`` and ``crs`` (a pipeline Points).

    ``parts`` (:func:`report_parts` of the same run) and ``drawn`` (their figures, drawn by ``report.draw``,
    perhaps in another process) are made here when not given.
    """
    from . import report

    if parts is None:
        parts = report_parts(cfg, customers, points, plan, areas)
    if drawn is None:
        drawn = report.draw(parts.figures)
    units = parts.figures.units
    bands = None if plan is None else pd.DataFrame(plan.bands.drop(columns=plan.bands.geometry.name))
    field = None
    if readings is not None:
        from . import report_field

        located = readings.geometry.notna().to_numpy()
        shown = readings.geometry.to_numpy()[located]
        rx, ry = _xy(shapely.get_x(shown), shapely.get_y(shown), readings.crs, parts.crs)
        fmap = report_field.FieldMap(terrain=parts.background, frame=parts.frame, outlines=parts.outlines, x=rx, y=ry,
                                     residual_psi=readings["residual_psi"].to_numpy(dtype=np.float64)[located],
                                     check=readings["check"].to_numpy(dtype=object)[located])
        field = report_field.section(readings, readings_by_zone, fmap, info.get("field_check", {}), units)
    return report.render(info=info, summary=summary, bands=bands, drawn=drawn, criteria=cfg.criteria, units=units,
                         interactive=parts.interactive,
                         areas=None if areas is None else pd.DataFrame(areas.drop(columns=areas.geometry.name)),
                         field=field)
