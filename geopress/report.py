"""report.html: one self-contained page a person can open, built with matplotlib (Agg) and jinja2.

Needs the ``report`` extra; :mod:`geopress._compat` says whether it is
installed and the pipeline skips the report (with a warning) when it is not.
Pure: figures are rendered to PNG bytes in memory and embedded as base64
``data:`` URIs; :func:`render` returns the page as text and writes nothing.

Colours are the Okabe-Ito palette, chosen to stay distinct for readers with
the common colour-vision deficiencies; every status also has its own marker
shape, and every colour and line style is named in a legend.
"""

from __future__ import annotations

import base64
import io
import math
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import jinja2
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import LightSource
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from .classify import Criteria
from .pressure import M_PER_FT
from .units import Units

#: Okabe-Ito colours (Okabe and Ito, "Color Universal Design", 2008), by name.
OKABE_ITO = {
    "black": "#000000", "orange": "#E69F00", "sky_blue": "#56B4E9", "bluish_green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "reddish_purple": "#CC79A7",
}
#: status -> (colour, marker, legend text)
STATUS_STYLE: dict[str, tuple[str, str, str]] = {
    "ok": (OKABE_ITO["bluish_green"], "o", "ok: within the pressure window"),
    "high": (OKABE_ITO["vermillion"], "^", "high: above the maximum static pressure"),
    "low": (OKABE_ITO["blue"], "v", "low: below the minimum static pressure"),
    "above_hgl": (OKABE_ITO["reddish_purple"], "D", "above HGL: no gravity service"),
    "low_upper_floors": (OKABE_ITO["sky_blue"], "s", "low upper floors: top floor below the minimum"),
    "no_terrain": (OKABE_ITO["black"], "x", "no terrain: ground elevation unknown"),
    "unzoned": (OKABE_ITO["orange"], "P", "unzoned"),
    "no_geometry": (OKABE_ITO["black"], "+", "no geometry"),
}
BAND_COLOUR = OKABE_ITO["yellow"]
LIMIT_STYLE = {
    "max_static": (OKABE_ITO["vermillion"], "--", "max-pressure limit: below this line pressure at high level exceeds the maximum"),
    "min_static": (OKABE_ITO["blue"], "--", "min-pressure limit: above this line pressure at low level falls below the minimum"),
}
CAUTIONS = (
    "This is a static screening estimate: pressures come from ground elevations and the zone HGLs alone, "
    "without flow, friction losses, demand, service-line losses or the accuracy limits of the DEM.",
    "Defer to the local plumbing and water-works codes and to licensed engineering practice before acting on it; "
    "confirm any flagged customer with a field pressure reading.",
)


def _figure(figsize: tuple[float, float]) -> Figure:
    """A figure on an Agg canvas from the start, so tight_layout and savefig share one renderer and its text metrics."""
    fig = Figure(figsize=figsize)
    FigureCanvasAgg(fig)
    return fig


def _png(fig: Figure) -> str:
    buf = io.BytesIO()
    # zlib level 3, not Pillow's default 6: the same pixels, encoded in about half the time, a few per cent larger
    fig.savefig(buf, format="png", dpi=100, pil_kwargs={"compress_level": 3})
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def bin_counts(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """``np.histogram(values, edges)[0]`` for equal-width ``edges`` from ``np.histogram_bin_edges(..., bins=n)``.

    Counted by numpy's equal-width path, which needs no sort of ``values``:
    the same counts, several times faster for a large zone.
    """
    return np.histogram(values, bins=edges.size - 1, range=(edges[0], edges[-1]))[0]


def histogram(zone: str, psi_min: np.ndarray, psi_max: np.ndarray, criteria: Criteria, units: Units) -> str:
    """PNG data URI: histograms of the zone's psi_min and psi_max with both thresholds drawn."""
    fig = _figure((6.4, 3.6))
    ax = fig.add_subplot()
    pmin = units.pressure_from_psi(psi_min)
    pmax = units.pressure_from_psi(psi_max)
    pmin, pmax = pmin[np.isfinite(pmin)], pmax[np.isfinite(pmax)]
    lo_t = float(units.pressure_from_psi(criteria.min_static_psi))
    hi_t = float(units.pressure_from_psi(criteria.max_static_psi))
    both = np.concatenate([pmin, pmax, [lo_t, hi_t]])
    bins = np.histogram_bin_edges(both, bins=40)
    # binned here (no sort), then drawn as one weighted value per bin: the same bars as ax.hist(values, bins=bins)
    lefts = bins[:-1]
    if pmin.size and np.array_equal(pmin, pmax):  # one HGL (PRV, pump): the two histograms coincide
        ax.hist(lefts, bins=bins, weights=bin_counts(pmin, bins), color=OKABE_ITO["bluish_green"],
                label="pressure at the zone's one HGL")
    else:
        if pmin.size:
            ax.hist(lefts, bins=bins, weights=bin_counts(pmin, bins), color=OKABE_ITO["blue"], histtype="stepfilled",
                    alpha=0.5, label="pressure at low HGL (psi_min)")
        if pmax.size:
            ax.hist(lefts, bins=bins, weights=bin_counts(pmax, bins), color=OKABE_ITO["vermillion"], histtype="step",
                    linewidth=1.8, label="pressure at high HGL (psi_max), outline")
    ax.axvline(lo_t, color="black", linestyle="--", label=f"minimum {lo_t:.4g} {units.pressure}")
    ax.axvline(hi_t, color="black", linestyle=":", linewidth=2, label=f"maximum {hi_t:.4g} {units.pressure}")
    ax.set_xlabel(f"static pressure at ground, {units.pressure}")
    ax.set_ylabel("customers")
    ax.set_title(f"{zone}: static pressure")
    ax.legend(fontsize=8, loc="upper left")
    fig.tight_layout()
    return _png(fig)


def _draw(ax, geom, **style) -> None:
    """Draw polygons' outlines/fills or lines of a shapely geometry."""
    import shapely

    for part in shapely.get_parts(geom):
        if part.is_empty:
            continue
        if part.geom_type == "Polygon":
            if "facecolor" in style:
                from matplotlib.patches import PathPatch
                from matplotlib.path import Path as MplPath

                rings = [np.asarray(part.exterior.coords)] + [np.asarray(r.coords) for r in part.interiors]
                codes = []
                for r in rings:
                    c = np.full(len(r), MplPath.LINETO)
                    c[0] = MplPath.MOVETO
                    codes.append(c)
                ax.add_patch(PathPatch(MplPath(np.concatenate(rings), np.concatenate(codes)), **style))
            else:
                for ring in [part.exterior, *part.interiors]:
                    xy = np.asarray(ring.coords)
                    ax.plot(xy[:, 0], xy[:, 1], **style)
        elif part.geom_type in ("LineString", "LinearRing"):
            xy = np.asarray(part.coords)
            ax.plot(xy[:, 0], xy[:, 1], **style)
        elif part.geom_type in ("MultiPolygon", "MultiLineString", "GeometryCollection"):
            _draw(ax, part, **style)


#: vertical exaggeration of the hillshade, so gentle town-scale relief shows.
VERT_EXAG = 4.0


def hillshade(dem_ft: np.ndarray, pixel: float, ft_per_map_unit: float) -> np.ndarray:
    """Grey hillshade in [0, 1] of a DEM in ft (light from the north-west, 45 degrees up, :data:`VERT_EXAG`); NaN stays NaN."""
    dem = np.asarray(dem_ft, dtype=np.float64)
    valid = np.isfinite(dem)
    if not valid.any():
        return np.full(dem.shape, np.nan)
    filled = np.where(valid, dem, np.nanmean(dem)) / ft_per_map_unit
    shade = LightSource(azdeg=315, altdeg=45).hillshade(filled, vert_exag=VERT_EXAG, dx=pixel, dy=pixel)
    return np.where(valid, shade, np.nan)


@dataclass
class ZoneMap:
    """One zone's map inputs, all in one CRS: terrain preview, geometries and customer points."""

    zone: str
    dem_ft: np.ndarray
    extent: tuple[float, float, float, float]
    pixel: float
    ft_per_map_unit: float
    zone_geom: Any
    band_geom: Any
    limits: Mapping[str, Any]
    x: np.ndarray
    y: np.ndarray
    status: np.ndarray
    #: customers per status in the zone when ``x``/``y``/``status`` are a sample of them (see :func:`map_sample`)
    counts: Mapping[str, int] | None = None


#: at most about this many customers are drawn per zone map; a status with at most
#: MAP_RARE customers in the zone is always drawn whole.
MAP_POINTS = 20_000
MAP_RARE = 2_000


def map_sample(status: np.ndarray) -> np.ndarray:
    """Positions of the customers a zone map draws: every k-th of the common statuses, all of the rare ones.

    ``status`` holds one status per customer, as names or as integer codes
    (the same selection either way). Beyond :data:`MAP_POINTS` points a map
    shows no more (they overlap at the figure's resolution) and drawing
    them costs seconds; the legend still counts every customer.
    """
    n = status.size
    if n <= MAP_POINTS:
        return np.arange(n)
    codes = pd.factorize(status)[0] + 1  # 0: missing statuses, counted together
    rare = np.bincount(codes)[codes] <= MAP_RARE
    step = int(np.ceil(n / MAP_POINTS))
    keep = rare | (np.arange(n) % step == 0)
    return np.flatnonzero(keep)


def zone_map(m: ZoneMap) -> str:
    """PNG data URI: customers coloured by status over a hillshade, with zone outline, band and limit lines."""
    left, bottom, right, top = m.zone_geom.bounds
    aspect = min(max((top - bottom) / max(right - left, 1e-9), 0.3), 2.0)
    fig = _figure((7.5, 5.6 * aspect + 2.0))
    ax = fig.add_subplot()
    shade = hillshade(m.dem_ft, m.pixel, m.ft_per_map_unit)
    ax.imshow(np.ma.masked_invalid(shade), extent=m.extent, cmap="gray", vmin=0, vmax=1, interpolation="nearest",
              alpha=0.8, zorder=0)
    handles = [Patch(facecolor="#bbbbbb", edgecolor="none", label=f"hillshade of the DEM (light from the north-west, relief x{VERT_EXAG:g})")]
    if not m.band_geom.is_empty:
        _draw(ax, m.band_geom, facecolor=BAND_COLOUR, edgecolor="none", alpha=0.45, zorder=1)
    handles.append(Patch(facecolor=BAND_COLOUR, alpha=0.45, label="serviceable band: within the pressure window"))
    for name, (colour, style, label) in LIMIT_STYLE.items():
        line = m.limits.get(name)
        if line is not None and not line.is_empty:
            _draw(ax, line, color=colour, linestyle=style, linewidth=1.3, zorder=2)
            handles.append(Line2D([], [], color=colour, linestyle=style, label=label))
    _draw(ax, m.zone_geom, color="black", linewidth=1.4, zorder=3)
    handles.append(Line2D([], [], color="black", linewidth=1.4, label="zone outline"))
    for status, (colour, marker, label) in STATUS_STYLE.items():
        sel = m.status == status
        if not sel.any():
            continue
        ax.scatter(m.x[sel], m.y[sel], s=10, c=colour, marker=marker, linewidths=0.6 if marker in "x+" else 0.2,
                   edgecolors=None if marker in "x+" else "black", zorder=4)
        count = int(sel.sum()) if m.counts is None else int(m.counts.get(status, 0))
        handles.append(Line2D([], [], color=colour, marker=marker, linestyle="none", label=f"{label} ({count})"))
    pad = 0.03 * max(right - left, top - bottom)
    ax.set_xlim(left - pad, right + pad)
    ax.set_ylim(bottom - pad, top + pad)
    ax.set_aspect("equal")
    ax.set_title(f"{m.zone}: customers by status")
    ax.tick_params(labelsize=7)
    ax.legend(handles=handles, fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -0.06), ncol=2, frameon=False)
    fig.tight_layout()
    return _png(fig)


def _fmt(value: Any, digits: int = 1) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    if isinstance(value, (float, np.floating)):
        return f"{value:,.{digits}f}"
    return str(value)


def summary_rows(summary: pd.DataFrame, bands: pd.DataFrame | None, units: Units, criteria: Criteria) -> list[dict[str, str]]:
    """The zone_summary table as display text, one row per zone, in ``units``."""
    band_by_zone = {} if bands is None else {r["zone"]: r for r in bands.to_dict("records")}
    rows = []
    for r in summary.to_dict("records"):
        L = lambda ft: _fmt(float(units.length_from_ft(ft)))  # noqa: E731
        P = lambda psi: _fmt(float(units.pressure_from_psi(psi)))  # noqa: E731
        if r.get("source_kind") == "tank":
            best = f"high water {L(r.get('best_high_water_ft_from'))} to {L(r.get('best_high_water_ft_to'))} {units.length}"
        elif r.get("source_kind") == "prv":
            best = f"setting {P(r.get('best_setting_psi_from'))} to {P(r.get('best_setting_psi_to'))} {units.pressure}"
        else:
            best = (f"discharge HGL {L(r.get('best_discharge_hgl_ft_from'))} to {L(r.get('best_discharge_hgl_ft_to'))} "
                    f"{units.length}")
        b = band_by_zone.get(r["zone"])
        if b is not None:
            band = (f"{L(b['lower_limit_ft'])} to {L(b['upper_limit_ft'])} {units.length}, "
                    f"{_fmt(float(units.area_from_sq_ft(b['area_sq_ft'])))} {units.area}")
        else:
            band = "–"
        flagged = sum(int(r.get(f"n_{s}", 0)) for s in ("high", "low", "above_hgl", "low_upper_floors"))
        rows.append({
            "zone": str(r["zone"]), "source": str(r.get("source_kind", "")),
            "hgl": f"{L(r['hgl_low_ft'])} to {L(r['hgl_high_ft'])}",
            "customers": str(int(r["customers"])), "ok": str(int(r.get("n_ok", 0))),
            "high": str(int(r.get("n_high", 0))), "low": str(int(r.get("n_low", 0))),
            "above_hgl": str(int(r.get("n_above_hgl", 0))), "upper": str(int(r.get("n_low_upper_floors", 0))),
            "flagged": str(flagged), "best": best,
            "flagged_at_best": _fmt(r.get("flagged_at_best"), 0) if "flagged_at_best" in r else "–",
            "band": band,
        })
    return rows


def _plain(value: Any) -> Any:
    """Nested run.json data as text-friendly rows for the template's generic renderer."""
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return value


def render(*, info: Mapping[str, Any], summary: pd.DataFrame, bands: pd.DataFrame | None, maps: Sequence[ZoneMap],
           pressures: Mapping[str, tuple[np.ndarray, np.ndarray]], criteria: Criteria, units: Units,
           title: str = "geopress static pressure screening") -> str:
    """The report page as HTML text.

    ``pressures`` maps zone -> (psi_min, psi_max) arrays in psi; ``maps``
    holds one :class:`ZoneMap` per zone that has terrain; ``info`` is what
    run.json records (its ``changes`` section is shown when there was an earlier run to compare with).
    """
    env = jinja2.Environment(loader=jinja2.PackageLoader("geopress", "templates"),
                             autoescape=jinja2.select_autoescape(["html", "j2"]), undefined=jinja2.StrictUndefined)
    by_zone = {m.zone: m for m in maps}
    zones = []
    for zone in summary["zone"].tolist():
        pmin, pmax = pressures.get(zone, (np.array([]), np.array([])))
        zones.append({
            "zone": zone,
            "histogram": histogram(zone, pmin, pmax, criteria, units),
            "map": zone_map(by_zone[zone]) if zone in by_zone else None,
        })
    counts = info.get("counts", {})
    per_ft = criteria.psi_per_ft
    k_display = (f"{float(units.pressure_from_psi(per_ft)) / M_PER_FT:.4g} kPa per m" if units.system == "si"
                 else f"{per_ft:g} psi per ft")
    crit = {
        "minimum static pressure": f"{float(units.pressure_from_psi(criteria.min_static_psi)):.4g} {units.pressure}",
        "maximum static pressure": f"{float(units.pressure_from_psi(criteria.max_static_psi)):.4g} {units.pressure}",
        "pressure per height of water": k_display,
        "story height": f"{float(units.length_from_ft(criteria.floor_height_ft)):.4g} {units.length}",
    }
    return env.get_template("report.html.j2").render(
        title=title, info=_plain(info), counts=counts, rows=summary_rows(summary, bands, units, criteria), zones=zones,
        criteria=crit, units=units, cautions=CAUTIONS, changes=_plain(changes) if (changes := info.get("changes")) and changes.get("baseline") else None,
        status_style=STATUS_STYLE, overrides=info.get("overrides") or {},
    )
