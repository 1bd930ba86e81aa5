"""report.html: one self-contained page a person can open, built with matplotlib (Agg), plotly and jinja2.

Needs the ``report`` extra; :mod:`geopress._compat` says whether it is
installed and the pipeline skips the report (with a warning) when it is not.
Pure: figures are rendered to PNG bytes in memory and embedded as base64
``data:`` URIs, the interactive map is plotly.js (embedded once, inline) with
its figure as JSON in the page; :func:`render` returns the page as text and
writes nothing. The page fetches nothing: no tiles, no fonts, no scripts.

Colours are the Okabe-Ito palette, chosen to stay distinct for readers with
the common colour-vision deficiencies; every status also has its own marker
shape, and every colour and line style is named in a legend.

Maps are drawn in the map CRS's own coordinates with equal ground scale on
both axes, up being the CRS's grid north (true north for a geographic CRS);
they carry a scale bar and a north arrow instead of coordinate ticks.
"""

from __future__ import annotations

import base64
import io
import json
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Mapping, Sequence

import jinja2
import markupsafe
import numpy as np
import pandas as pd

if TYPE_CHECKING:  # matplotlib is imported where a figure is drawn: a run draws them in another process
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D

from .classify import Criteria
from .findings import FINDING_COLUMNS, FLAGGED_LAYERS, OKABE_ITO, STATUS_STYLE as _STATUS_STYLE, Style
from .pressure import M_PER_FT
from .units import Units

#: how a status is drawn, and each status's style in drawing order: the registry's (geopress.findings)
StatusStyle = Style
STATUS_STYLE = _STATUS_STYLE
BAND_COLOUR = OKABE_ITO["yellow"]
LIMIT_STYLE = {
    "max_static": (OKABE_ITO["vermillion"], "--", "max-pressure limit: lower ground exceeds the maximum"),
    "min_static": (OKABE_ITO["blue"], "--", "min-pressure limit: higher ground falls below the minimum"),
}
CAUTIONS = (
    "This is a static screening estimate: pressures come from ground elevations and the zone HGLs alone, "
    "without flow, friction losses, demand, service-line losses or the accuracy limits of the DEM.",
    "Defer to the local plumbing and water-works codes and to licensed engineering practice before acting on it; "
    "confirm any flagged customer with a field pressure reading.",
)

#: resolution of the embedded figures: a map about 8 in wide is 1,200 px, sharp on screen and on paper
DPI = 150
FONT_PT = 9.0


def _figure(figsize: tuple[float, float]) -> Figure:
    """A figure on an Agg canvas from the start, at the PNG's resolution, so layout and savefig share one renderer
    and its text metrics."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize, dpi=DPI)
    FigureCanvasAgg(fig)
    return fig


def _fit(fig: Figure, pad_in: float = 0.08) -> None:
    """Resize ``fig`` to the box of everything drawn (a map's title and legend lie outside its axes), moving the
    axes with it: what ``bbox_inches="tight"`` does, without the full extra drawing it costs."""
    box = fig.get_tightbbox(fig.canvas.get_renderer())  # inches
    w, h = fig.get_size_inches()
    new_w, new_h = box.width + 2 * pad_in, box.height + 2 * pad_in
    for ax in fig.axes:
        p = ax.get_position()
        ax.set_position(((p.x0 * w - box.x0 + pad_in) / new_w, (p.y0 * h - box.y0 + pad_in) / new_h,
                         p.width * w / new_w, p.height * h / new_h))
    fig.set_size_inches(new_w, new_h)


def _png(fig: Figure) -> str:
    _fit(fig)
    buf = io.BytesIO()
    # zlib level 3, not Pillow's default 6: the same pixels, encoded in about half the time, a few per cent larger
    fig.savefig(buf, format="png", dpi=DPI, pil_kwargs={"compress_level": 3})
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def bin_counts(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """``np.histogram(values, edges)[0]`` for equal-width ``edges`` from ``np.histogram_bin_edges(..., bins=n)``.

    Counted by numpy's equal-width path, which needs no sort of ``values``:
    the same counts, several times faster for a large zone.
    """
    return np.histogram(values, bins=edges.size - 1, range=(edges[0], edges[-1]))[0]


@dataclass(frozen=True)
class Histogram:
    """A zone's static pressures binned for its histogram, in the display unit (:func:`histogram_data`): the bin
    ``edges`` and the customers in each bin, at the zone's one HGL (``one``: PRV, pump, or a tank whose two
    pressures are the same) or at its low and high HGL (``low``, ``high``; None without a pressure), and the
    ``minimum`` and ``maximum`` static pressure."""

    edges: np.ndarray
    one: np.ndarray | None
    low: np.ndarray | None
    high: np.ndarray | None
    minimum: float
    maximum: float


def histogram_data(psi_min: np.ndarray, psi_max: np.ndarray, criteria: Criteria, units: Units) -> Histogram:
    """Bin a zone's ``psi_min`` and ``psi_max`` (NaN left out) into 40 equal bins over both and both limits."""
    pmin = units.pressure_from_psi(psi_min)
    pmax = units.pressure_from_psi(psi_max)
    pmin, pmax = pmin[np.isfinite(pmin)], pmax[np.isfinite(pmax)]
    lo_t = float(units.pressure_from_psi(criteria.min_static_psi))
    hi_t = float(units.pressure_from_psi(criteria.max_static_psi))
    bins = np.histogram_bin_edges(np.concatenate([pmin, pmax, [lo_t, hi_t]]), bins=40)
    if pmin.size and np.array_equal(pmin, pmax):  # one HGL (PRV, pump): the two histograms coincide
        return Histogram(bins, bin_counts(pmin, bins), None, None, lo_t, hi_t)
    return Histogram(bins, None, bin_counts(pmin, bins) if pmin.size else None,
                     bin_counts(pmax, bins) if pmax.size else None, lo_t, hi_t)


def histogram(zone: str, h: Histogram, units: Units) -> str:
    """PNG data URI of :func:`histogram_figure`."""
    return _png(histogram_figure(zone, h, units))


def histogram_figure(zone: str, h: Histogram, units: Units) -> Figure:
    """Histograms of the zone's psi_min and psi_max with both thresholds drawn.

    A zone with one HGL (PRV, pump) has one pressure per customer and one
    histogram. Counts are whole customers on the y axis; the legend sits
    below the plot, clear of the threshold lines.
    """
    from matplotlib.ticker import MaxNLocator

    fig = _figure((6.0, 3.9))
    ax = fig.add_subplot()
    # binned already (no sort) and drawn as one outline per histogram: the same bars as ax.hist(values, bins=edges)
    if h.one is not None:
        ax.stairs(h.one, h.edges, fill=True, color=OKABE_ITO["bluish_green"], label="pressure at the zone's HGL")
    if h.low is not None:
        ax.stairs(h.low, h.edges, fill=True, color=OKABE_ITO["blue"], alpha=0.5, label="at the low HGL (psi_min), filled")
    if h.high is not None:
        ax.stairs(h.high, h.edges, color=OKABE_ITO["vermillion"], linewidth=1.8,
                  label="at the high HGL (psi_max), outline")
    ax.axvline(h.minimum, color="black", linestyle="--", label=f"minimum {h.minimum:.4g} {units.pressure}")
    ax.axvline(h.maximum, color="black", linestyle=":", linewidth=2, label=f"maximum {h.maximum:.4g} {units.pressure}")
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_ylim(bottom=0)
    ax.set_xlabel(f"static pressure at ground, {units.pressure}", fontsize=FONT_PT)
    ax.set_ylabel("customers", fontsize=FONT_PT)
    ax.tick_params(labelsize=FONT_PT)
    ax.set_title(f"{zone}: static pressure", fontsize=FONT_PT + 2)
    ax.legend(fontsize=FONT_PT, loc="upper center", bbox_to_anchor=(0.5, -0.2), ncol=2, frameon=False)
    return fig


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


# ---- hillshade -------------------------------------------------------------------------------

#: the sun of every hillshade: from the north-west (azimuth clockwise from grid north), 45 degrees up
SUN_AZIMUTH_DEG = 315.0
SUN_ALTITUDE_DEG = 45.0
#: vertical exaggeration of the maps' hillshade, the same on every map: town-scale ground rarely slopes more
#: than a few degrees, which at true scale shades within a few per cent of flat ground
RELIEF = 4.0


def hillshade(dem_ft: np.ndarray, dx_ft: float, dy_ft: float, *, vert_exag: float = 1.0,
              azimuth_deg: float = SUN_AZIMUTH_DEG, altitude_deg: float = SUN_ALTITUDE_DEG) -> np.ndarray:
    """Lambertian hillshade in [0, 1] of a north-up DEM in ft with pixels ``dx_ft`` by ``dy_ft`` ft; NaN stays NaN.

    The shade is the cosine of the angle between the ground's normal and the
    direction to the sun, ``max(0, n . s)``, with the slope from
    ``numpy.gradient`` of ``vert_exag * dem_ft`` over the pixel sizes in ft
    (row 0 is the north edge). It is a physical quantity, not stretched per
    image, so the same ground shades the same on every map. Invariants:
    flat ground shades ``sin(altitude)``; a plane shades one constant value
    everywhere; ground facing the sun at ``90 - altitude`` degrees of slope
    shades 1. Pixels whose slope needs a nodata neighbour shade as flat.
    """
    z = np.asarray(dem_ft, dtype=np.float64) * vert_exag
    valid = np.isfinite(z)
    if z.shape[0] < 2 or z.shape[1] < 2:
        dz_north = dz_east = np.zeros(z.shape)
    else:
        dz_row, dz_col = np.gradient(z, dy_ft, dx_ft)
        dz_north, dz_east = -dz_row, dz_col  # rows run southwards
    dz_east = np.where(np.isfinite(dz_east), dz_east, 0.0)
    dz_north = np.where(np.isfinite(dz_north), dz_north, 0.0)
    az, alt = math.radians(azimuth_deg), math.radians(altitude_deg)
    sun = (math.sin(az) * math.cos(alt), math.cos(az) * math.cos(alt), math.sin(alt))  # east, north, up
    shade = (-dz_east * sun[0] - dz_north * sun[1] + sun[2]) / np.sqrt(1.0 + dz_east**2 + dz_north**2)
    return np.where(valid, np.clip(shade, 0.0, 1.0), np.nan)


@dataclass
class Terrain:
    """A DEM preview to shade: ground in ft (NaN nodata), north-up, covering ``extent`` = (left, right, bottom, top)."""

    dem_ft: np.ndarray
    extent: tuple[float, float, float, float]

    def shade(self, frame: "Frame") -> np.ndarray:
        """:func:`hillshade` at the maps' :data:`RELIEF`, with the pixel size in ft from ``extent`` and ``frame``."""
        left, right, bottom, top = self.extent
        h, w = self.dem_ft.shape
        dx = abs(right - left) / max(w, 1) * frame.ft_per_x
        dy = abs(top - bottom) / max(h, 1) * frame.ft_per_y
        return hillshade(self.dem_ft, dx, dy, vert_exag=RELIEF)


HILLSHADE_LABEL = f"hillshade of the DEM (sun in the north-west, {SUN_ALTITUDE_DEG:g}° up, relief x{RELIEF:g})"
#: the hillshade's grey scale, the same on every map: shade 1 is white, shade 0 a mid grey, so that
#: what is drawn over it stays legible
SHADE_GREY = (-0.6, 1.0)


# ---- map furniture ------------------------------------------------------------------------------

@dataclass(frozen=True)
class Frame:
    """How a map's coordinates relate to the ground: ft per map unit along x and along y, and what up is."""

    ft_per_x: float
    ft_per_y: float
    #: e.g. "grid north of WGS 84 / UTM zone 31N"; "north" for a geographic CRS
    north: str


FT_PER_MI = 5280.0  # exact, by definition of the statute mile
M_PER_KM = 1000.0


def _bar_candidates(units: Units) -> list[tuple[float, str]]:
    """Round scale-bar lengths, shortest first, as (ft, label): 1, 2 or 5 times a power of ten of ft below
    half a mile, then of mi (US); of m below a kilometre, then of km (SI)."""
    steps = [k * 10**p for p in range(0, 6) for k in (1, 2, 5)]
    if units.system == "si":
        small = [(v / M_PER_FT, f"{v:,} m") for v in steps if v < M_PER_KM]
        big = [(v * M_PER_KM / M_PER_FT, f"{v:,} km") for v in steps]
    else:
        small = [(float(v), f"{v:,} ft") for v in steps if v < FT_PER_MI / 2]
        big = [(0.5 * FT_PER_MI, "0.5 mi")] + [(v * FT_PER_MI, f"{v:,} mi") for v in steps]
    return small + big


def scale_bar_length(max_ft: float, units: Units) -> tuple[float, str]:
    """The longest round length of at most ``max_ft`` ft (the shortest if none is): (ft, label in ``units``).

    Lengths are 1, 2 or 5 times a power of ten: in ft below half a mile and
    in mi from there (5,280 ft per mi), or in m below a kilometre and in km
    from there (0.3048 m per ft).
    """
    candidates = _bar_candidates(units)
    fitting = [c for c in candidates if c[0] <= max_ft]
    return fitting[-1] if fitting else candidates[0]


def _furniture(ax, frame: Frame, units: Units, width_map: float) -> None:
    """No coordinate ticks; a scale bar bottom left and a north arrow top right."""
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    ax.set_xticks([])
    ax.set_yticks([])
    length_ft, label = scale_bar_length(0.25 * width_map * frame.ft_per_x, units)
    bar = AnchoredSizeBar(ax.transData, length_ft / frame.ft_per_x, label, loc="lower left", pad=0.5, borderpad=0.6,
                          sep=4, frameon=True, size_vertical=0, fontproperties={"size": FONT_PT})
    bar.patch.set_alpha(0.8)
    bar.patch.set_edgecolor("none")
    bar.size_bar.get_children()[0].set_linewidth(3)
    bar.set_zorder(50)  # above the customers
    ax.add_artist(bar)
    ax.annotate("N", xy=(0.965, 0.97), xytext=(0.965, 0.85), xycoords="axes fraction", textcoords="axes fraction",
                ha="center", va="top", fontsize=FONT_PT + 2, fontweight="bold",
                arrowprops={"arrowstyle": "-|>,head_width=0.4,head_length=0.8", "color": "black", "linewidth": 2},
                bbox={"boxstyle": "round,pad=0.2", "facecolor": "white", "alpha": 0.8, "edgecolor": "none"}, zorder=50)


def _limits(ax, bounds: tuple[float, float, float, float], frame: Frame) -> float:
    """Show ``bounds`` (left, bottom, right, top) with a margin at equal ground scale, widening the shorter side
    to fill the axes' frame; the width shown, in map units."""
    left, bottom, right, top = bounds
    pad = 0.03 * max(right - left, top - bottom)
    x0, x1, y0, y1 = left - pad, right + pad, bottom - pad, top + pad
    fig_w, fig_h = ax.figure.get_size_inches()
    box = ax.get_position()
    want = (box.height * fig_h) / (box.width * fig_w)  # the frame's height over its width
    have = (y1 - y0) * frame.ft_per_y / ((x1 - x0) * frame.ft_per_x)
    if have < want:  # too wide for the frame: show more ground north and south
        grow = ((x1 - x0) * frame.ft_per_x * want / frame.ft_per_y - (y1 - y0)) / 2
        y0, y1 = y0 - grow, y1 + grow
    else:
        grow = ((y1 - y0) * frame.ft_per_y / want / frame.ft_per_x - (x1 - x0)) / 2
        x0, x1 = x0 - grow, x1 + grow
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)
    ax.set_aspect(frame.ft_per_y / frame.ft_per_x)
    return x1 - x0


#: the map's frame is this wide, in inches; its height follows the ground's shape within these ratios
MAP_WIDTH_IN = 7.6
MAP_ASPECT = (0.3, 1.25)


def _map_figure(bounds: tuple[float, float, float, float], frame: Frame) -> tuple[Figure, Any]:
    """A figure that is the map's frame; title and legend lie outside it and are kept by the tight bounding box."""
    left, bottom, right, top = bounds
    ground_aspect = (top - bottom) * frame.ft_per_y / max((right - left) * frame.ft_per_x, 1e-9)
    height = MAP_WIDTH_IN * min(max(ground_aspect, MAP_ASPECT[0]), MAP_ASPECT[1])
    fig = _figure((MAP_WIDTH_IN, height))
    return fig, fig.add_axes((0.0, 0.0, 1.0, 1.0))


def _shade_under(ax, terrain: Sequence[Terrain], frame: Frame) -> None:
    for t in terrain:
        ax.imshow(np.ma.masked_invalid(t.shade(frame)), extent=t.extent, cmap="gray", vmin=SHADE_GREY[0],
                  vmax=SHADE_GREY[1], interpolation="bilinear", zorder=0)


def _customers(ax, x: np.ndarray, y: np.ndarray, status: np.ndarray,
               counts: Mapping[str, int]) -> list[Line2D]:
    """Scatter the customers by status, flagged above ok; the legend handles with the counts of every customer."""
    from matplotlib.lines import Line2D

    handles = []
    for z, (name, st) in enumerate(STATUS_STYLE.items()):
        sel = status == name
        if sel.any():
            thin = st.marker in "x+"
            ax.scatter(x[sel], y[sel], s=st.size, c=st.colour, marker=st.marker, linewidths=1.2 if thin else 0.4,
                       edgecolors=None if thin else "white" if name == "ok" else "black", zorder=10 + z)
        if counts.get(name, 0):
            handles.append(Line2D([], [], color=st.colour, marker=st.marker, linestyle="none", markersize=7,
                                  markeredgecolor=st.colour if st.marker in "x+" else "black",
                                  label=f"{st.label} ({counts[name]:,})"))
    return handles


def _legend(ax, handles: list, caption: str) -> None:
    ax.legend(handles=handles, fontsize=FONT_PT, loc="upper center", bbox_to_anchor=(0.5, -0.01), ncol=2,
              frameon=False, title=caption, title_fontsize=FONT_PT - 0.5)


@dataclass
class ZoneMap:
    """One zone's map inputs, all in one CRS: terrain preview, geometries and customer points."""

    zone: str
    terrain: Terrain
    frame: Frame
    zone_geom: Any
    band_geom: Any
    limits: Mapping[str, Any]
    x: np.ndarray
    y: np.ndarray
    status: np.ndarray
    #: customers per status in the zone when ``x``/``y``/``status`` are a sample of them (see :func:`map_sample`)
    counts: Mapping[str, int] | None = None


#: at most about this many customers are drawn per static map; a status with at most
#: MAP_RARE customers in the zone is always drawn whole.
MAP_POINTS = 20_000
MAP_RARE = 2_000


def map_sample(status: np.ndarray, points: int = MAP_POINTS, rare: int = MAP_RARE) -> np.ndarray:
    """Positions of the customers a map draws: every k-th of the common statuses, all of the rare ones.

    ``status`` holds one status per customer, as names or as integer codes
    (the same selection either way). Beyond ``points`` points a map shows no
    more (they overlap at the figure's resolution) and drawing them costs
    seconds; the legend still counts every customer. A status with at most
    ``rare`` customers is kept whole.
    """
    n = status.size
    if n <= points:
        return np.arange(n)
    codes = pd.factorize(status)[0] + 1  # 0: missing statuses, counted together
    is_rare = np.bincount(codes)[codes] <= rare
    step = int(np.ceil(n / points))
    keep = is_rare | (np.arange(n) % step == 0)
    return np.flatnonzero(keep)


def _counts_of(status: np.ndarray) -> dict[str, int]:
    names, n = np.unique(np.asarray(status, dtype=object).astype(str), return_counts=True)
    return {str(k): int(v) for k, v in zip(names, n)}


def _sampled_caption(drawn: int, total: int) -> str:
    if drawn >= total:
        return f"all {total:,} customers with a location drawn"
    return (f"{drawn:,} of {total:,} customers drawn (evenly spaced; a status with at most {MAP_RARE:,} whole); "
            "counts are of all")


def zone_map(m: ZoneMap, units: Units) -> str:
    """PNG data URI of :func:`zone_map_figure`."""
    return _png(zone_map_figure(m, units))


def zone_map_figure(m: ZoneMap, units: Units) -> Figure:
    """Customers by status over a hillshade, with zone outline, band and limit lines."""
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    bounds = m.zone_geom.bounds
    counts = _counts_of(m.status) if m.counts is None else m.counts
    fig, ax = _map_figure(bounds, m.frame)
    _shade_under(ax, [m.terrain], m.frame)
    handles: list[Any] = [Patch(facecolor="#b0b0b0", edgecolor="none", label=HILLSHADE_LABEL)]
    if not m.band_geom.is_empty:
        _draw(ax, m.band_geom, facecolor=BAND_COLOUR, edgecolor="none", alpha=0.35, zorder=1)
    handles.append(Patch(facecolor=BAND_COLOUR, alpha=0.35, label="serviceable band: within the window at both HGLs"))
    for name, (colour, style, label) in LIMIT_STYLE.items():
        line = m.limits.get(name)
        if line is not None and not line.is_empty:
            _draw(ax, line, color=colour, linestyle=style, linewidth=1.6, zorder=2)
            handles.append(Line2D([], [], color=colour, linestyle=style, linewidth=1.6, label=label))
    _draw(ax, m.zone_geom, color="black", linewidth=1.6, zorder=3)
    handles.append(Line2D([], [], color="black", linewidth=1.6, label="zone outline"))
    handles += _customers(ax, m.x, m.y, m.status, counts)
    width = _limits(ax, bounds, m.frame)
    _furniture(ax, m.frame, units, width)
    ax.set_title(f"{m.zone}: customers by status", fontsize=FONT_PT + 3)
    _legend(ax, handles, f"{_sampled_caption(m.x.size, sum(counts.values()))}; up is {m.frame.north}")
    return fig


@dataclass
class OverviewMap:
    """Every zone and every customer with a location, in one CRS (the first zone map's, else the customers')."""

    terrain: Sequence[Terrain]
    frame: Frame
    #: zone -> outline, in the map's CRS
    outlines: Mapping[str, Any]
    x: np.ndarray
    y: np.ndarray
    status: np.ndarray
    #: customers per status among those with a location (``x``/``y``/``status`` may be a sample of them)
    counts: Mapping[str, int]
    #: customers with no location (status no_geometry), on no map
    unmapped: int = 0


def _bounds(outlines: Mapping[str, Any], x: np.ndarray, y: np.ndarray) -> tuple[float, float, float, float]:
    import shapely

    boxes = [g.bounds for g in outlines.values() if not g.is_empty]
    if x.size:
        boxes.append((float(np.min(x)), float(np.min(y)), float(np.max(x)), float(np.max(y))))
    if not boxes:
        return (0.0, 0.0, 1.0, 1.0)
    b = np.array(boxes)
    left, bottom, right, top = b[:, 0].min(), b[:, 1].min(), b[:, 2].max(), b[:, 3].max()
    if right - left <= 0 or top - bottom <= 0:  # one point: a box around it
        return tuple(shapely.box(left, bottom, right, top).buffer(1.0).bounds)
    return (left, bottom, right, top)


def overview_map(m: OverviewMap, units: Units) -> str:
    """PNG data URI of :func:`overview_figure`."""
    return _png(overview_figure(m, units))


def overview_figure(m: OverviewMap, units: Units) -> Figure:
    """Every zone outlined and named, its customers by status, the flagged above the ok."""
    import matplotlib.patheffects as pe
    import shapely
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    bounds = _bounds(m.outlines, m.x, m.y)
    fig, ax = _map_figure(bounds, m.frame)
    _shade_under(ax, m.terrain, m.frame)
    handles: list[Any] = [Patch(facecolor="#b0b0b0", edgecolor="none", label=HILLSHADE_LABEL)]
    for zone, geom in m.outlines.items():
        if geom.is_empty:
            continue
        _draw(ax, geom, color="black", linewidth=1.8, zorder=3)
        p = shapely.point_on_surface(geom)
        ax.text(p.x, p.y, zone, ha="center", va="center", fontsize=FONT_PT + 3, fontweight="bold", zorder=30,
                path_effects=[pe.withStroke(linewidth=3.5, foreground="white")])
    if m.outlines:
        handles.append(Line2D([], [], color="black", linewidth=1.8, label="pressure zone outline and name"))
    handles += _customers(ax, m.x, m.y, m.status, m.counts)
    width = _limits(ax, bounds, m.frame)
    _furniture(ax, m.frame, units, width)
    ax.set_title("All zones: customers by status", fontsize=FONT_PT + 3)
    caption = _sampled_caption(m.x.size, sum(m.counts.values()))
    if m.unmapped:
        caption += f"; {m.unmapped:,} without a location on no map"
    _legend(ax, handles, f"{caption}; up is {m.frame.north}")
    return fig


# ---- target areas ---------------------------------------------------------------------------------

#: the areas map names this many areas (the largest); the table lists at most AREA_ROWS
AREA_LABELS = 25
AREA_ROWS = 200
#: a target area's fill opacity, here and in its layer's style, so the hillshade shows through
AREA_OPACITY = 0.6


@dataclass
class AreasMap:
    """The target areas over the overview's background: ``areas`` rows of (area id, finding, polygon in the map's
    CRS), most customers first."""

    background: OverviewMap
    areas: Sequence[tuple[str, str, Any]]


def areas_map(m: AreasMap, units: Units) -> str:
    """PNG data URI of :func:`areas_figure`."""
    return _png(areas_figure(m, units))


def areas_figure(m: AreasMap, units: Units) -> Figure:
    """Every zone outlined, and every target area filled in its finding's colour, the largest named."""
    import matplotlib.patheffects as pe
    import shapely
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    bg = m.background
    bounds = _bounds(bg.outlines, np.array([]), np.array([]))
    polygons = [g for _, _, g in m.areas if not g.is_empty]
    if not bg.outlines and polygons:
        bounds = shapely.union_all(polygons).bounds
    fig, ax = _map_figure(bounds, bg.frame)
    _shade_under(ax, bg.terrain, bg.frame)
    for geom in bg.outlines.values():
        if not geom.is_empty:
            _draw(ax, geom, color="black", linewidth=1.2, zorder=3)
    handles: list[Any] = [Line2D([], [], color="black", linewidth=1.2, label="pressure zone outline")]
    shown = set()
    for n, (area, finding, geom) in enumerate(m.areas):
        style = STATUS_STYLE[finding]
        _draw(ax, geom, facecolor=style.colour, edgecolor="black", linewidth=0.8, alpha=AREA_OPACITY, zorder=10)
        shown.add(finding)
        if n < AREA_LABELS:
            p = shapely.point_on_surface(geom)
            ax.text(p.x, p.y, area, ha="center", va="center", fontsize=FONT_PT, fontweight="bold", zorder=30,
                    path_effects=[pe.withStroke(linewidth=3, foreground="white")])
    handles += [Patch(facecolor=STATUS_STYLE[f].colour, edgecolor="black", alpha=AREA_OPACITY, label=f"target area: {f}")
                for f in FLAGGED_LAYERS if f in shown]
    width = _limits(ax, bounds, bg.frame)
    _furniture(ax, bg.frame, units, width)
    ax.set_title("Target areas: customers with one finding in one zone, close together", fontsize=FONT_PT + 3)
    named = min(len(m.areas), AREA_LABELS)
    _legend(ax, handles, f"{len(m.areas):,} areas, the {named:,} largest named; up is {bg.frame.north}")
    return fig


def area_rows(areas: pd.DataFrame, units: Units) -> list[dict[str, str]]:
    """The target areas as display text, in ``units``, at most :data:`AREA_ROWS`."""
    L = lambda ft: _fmt(float(units.length_from_ft(ft)))  # noqa: E731
    P = lambda psi: _fmt(float(units.pressure_from_psi(psi)))  # noqa: E731
    rows = []
    for r in areas.head(AREA_ROWS).to_dict("records"):
        if r["note"]:
            fix = f"{r['fix']}: {r['note']}"
        else:
            fix = (f"{r['fix']} at an HGL of {L(r['hgl_ft_from'])} to {L(r['hgl_ft_to'])} {units.length} "
                   f"({P(r['psi_at_lowest_from'])} to {P(r['psi_at_lowest_to'])} {units.pressure} at its lowest "
                   f"customer, {L(r['ground_ft_min'])} {units.length})")
        rows.append({
            "area": str(r["area"]), "finding": str(r["finding"]), "list": FLAGGED_LAYERS[r["finding"]],
            "zone": str(r["zone"]), "customers": f"{int(r['customers']):,}", "addresses": f"{int(r['addresses']):,}",
            "ground": f"{L(r['ground_ft_min'])} to {L(r['ground_ft_max'])}", "worst": P(r["worst_psi"]),
            "ok_inside": f"{int(r['ok_inside']):,}", "fix": fix, "replaces": f"{int(r['replaces']):,}",
            "glyph": STATUS_STYLE[r["finding"]].glyph, "colour": STATUS_STYLE[r["finding"]].colour,
        })
    return rows


# ---- interactive map ------------------------------------------------------------------------------

#: the interactive map draws every flagged (and unzoned, no-terrain) customer up to INTERACTIVE_FLAGGED,
#: rare statuses whole beyond that, and an evenly spaced sample of at most INTERACTIVE_OK ok customers:
#: about 150 bytes of page per customer drawn, and plotly.js stays responsive at these counts
INTERACTIVE_FLAGGED = 25_000
INTERACTIVE_OK = 10_000


def interactive_sample(status: np.ndarray, ok: Any) -> np.ndarray:
    """Positions, in input order, of the customers the interactive map draws (see :data:`INTERACTIVE_FLAGGED`).

    ``status`` holds names or integer codes; ``ok`` is the value of ``ok`` in it.
    """
    is_ok = status == ok
    rest = np.flatnonzero(~is_ok)
    rest = rest[map_sample(status[rest], points=INTERACTIVE_FLAGGED, rare=MAP_RARE)]
    oks = np.flatnonzero(is_ok)
    oks = oks[:: max(1, int(np.ceil(oks.size / INTERACTIVE_OK)))]
    return np.sort(np.concatenate([rest, oks]))


@dataclass
class InteractiveMap:
    """The customers the interactive map draws (a sample, see :func:`interactive_sample`) and its background.

    Coordinates in the CRS of ``frame``; ground in ft, pressures in psi.
    """

    terrain: Sequence[Terrain]
    frame: Frame
    outlines: Mapping[str, Any]
    x: np.ndarray
    y: np.ndarray
    ids: np.ndarray
    zone: np.ndarray
    ground_ft: np.ndarray
    psi_min: np.ndarray
    psi_max: np.ndarray
    status: np.ndarray
    reason: np.ndarray
    #: customers per status among those with a location (all of them, not only those drawn)
    counts: Mapping[str, int]


def _shade_png(t: Terrain, frame: Frame) -> str:
    """The hillshade as a greyscale PNG data URI, transparent on nodata."""
    from PIL import Image

    shade = t.shade(frame)
    lo, hi = SHADE_GREY
    grey = np.nan_to_num(np.clip((shade - lo) / (hi - lo), 0.0, 1.0) * 255.0, nan=0.0).round().astype(np.uint8)
    alpha = np.where(np.isfinite(shade), 255, 0).astype(np.uint8)
    buf = io.BytesIO()
    Image.fromarray(np.dstack([grey, alpha]), mode="LA").save(buf, format="PNG", compress_level=3)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _text(values: np.ndarray, digits: int, unit: str) -> list[str]:
    return ["–" if not math.isfinite(v) else f"{v:,.{digits}f} {unit}" for v in np.asarray(values, dtype=np.float64)]


def _rings(geom: Any) -> tuple[list[float | None], list[float | None]]:
    """Every ring or line of ``geom`` as one x and one y list, None between the parts (a gap for plotly)."""
    import shapely

    xs: list[float | None] = []
    ys: list[float | None] = []
    for part in shapely.get_parts(shapely.boundary(geom) if shapely.get_dimensions(geom) == 2 else geom):
        for line in shapely.get_parts(part):
            xy = shapely.get_coordinates(line)
            xs += xy[:, 0].tolist() + [None]
            ys += xy[:, 1].tolist() + [None]
    return xs, ys


def interactive_figure(m: InteractiveMap, units: Units) -> dict[str, Any]:
    """The plotly figure (data, layout, config) as plain JSON-ready data; coordinates in display units from
    the south-west corner of the map, so the axes read as distances east and north (grid).

    A customer's ``customdata`` is [id, zone, ground, psi_min, psi_max, reason], values as display text and the
    reason as an index into ``reasons``, each distinct sentence once.
    """
    import shapely

    left, bottom, right, top = _bounds(m.outlines, m.x, m.y)
    pad = 0.03 * max(right - left, top - bottom)  # as on the static maps: no marker cut at the edge
    per = 1.0 / M_PER_FT if units.system == "si" else 1.0  # display length units per ft

    def ex(x: Any) -> Any:
        return np.round((np.asarray(x, dtype=np.float64) - left) * m.frame.ft_per_x / per, 1)

    def ny(y: Any) -> Any:
        return np.round((np.asarray(y, dtype=np.float64) - bottom) * m.frame.ft_per_y / per, 1)

    data: list[dict[str, Any]] = []
    for zone, geom in m.outlines.items():
        if geom.is_empty:
            continue
        xs, ys = _rings(geom)
        fx = [None if v is None else float(ex(v)) for v in xs]
        fy = [None if v is None else float(ny(v)) for v in ys]
        data.append({"type": "scatter", "mode": "lines", "x": fx, "y": fy, "name": f"zone {zone}",
                     "line": {"color": "black", "width": 2}, "hoverinfo": "skip", "legendgroup": "zones",
                     "showlegend": False})
    annotations = [{"x": float(ex(p.x)), "y": float(ny(p.y)), "text": f"<b>{z}</b>", "showarrow": False,
                    "font": {"size": 15, "color": "black"}, "bgcolor": "rgba(255,255,255,0.75)"}
                   for z, p in ((z, shapely.point_on_surface(g)) for z, g in m.outlines.items() if not g.is_empty)]
    ground = _text(units.length_from_ft(m.ground_ft), 1, units.length)
    pmin = _text(units.pressure_from_psi(m.psi_min), 1, units.pressure)
    pmax = _text(units.pressure_from_psi(m.psi_max), 1, units.pressure)
    status = np.asarray(m.status, dtype=object).astype(str)
    # each distinct reason once: a million customers have a few thousand distinct ones
    reason_index, reasons = pd.factorize(pd.Series(m.reason, dtype=object).fillna(""))
    for name, st in STATUS_STYLE.items():
        sel = np.flatnonzero(status == name)
        if not sel.size:
            continue
        custom = [[str(m.ids[i]), str(m.zone[i]) if isinstance(m.zone[i], str) else "none", ground[i], pmin[i],
                   pmax[i], int(reason_index[i])] for i in sel]
        total = int(m.counts.get(name, sel.size))
        shown = f"{total:,}" if sel.size == total else f"{sel.size:,} of {total:,}"
        data.append({
            "type": "scattergl", "mode": "markers", "name": f"{name} ({shown})", "meta": name,
            "x": ex(m.x[sel]).tolist(), "y": ny(m.y[sel]).tolist(), "customdata": custom,
            "marker": {"color": st.colour, "symbol": st.symbol, "size": round(math.sqrt(st.size) * 1.6, 1),
                       "line": {"width": 0.5 if name == "ok" else 1, "color": "white" if name == "ok" else "black"}},
            "hovertemplate": ("<b>%{customdata[0]}</b><br>zone %{customdata[1]}<br>ground %{customdata[2]}<br>"
                              "pressure %{customdata[3]} to %{customdata[4]}<br>status " + name
                              + "<br>click for the reason<extra></extra>"),
        })
    images = []
    for t in m.terrain:
        tl, tr, tb, tt = t.extent
        images.append({"source": _shade_png(t, m.frame), "xref": "x", "yref": "y", "x": float(ex(tl)),
                       "y": float(ny(tt)), "sizex": float(ex(tr) - ex(tl)), "sizey": float(ny(tt) - ny(tb)),
                       "sizing": "stretch", "layer": "below", "opacity": 0.8})
    axis = {"showgrid": True, "gridcolor": "rgba(0,0,0,0.12)", "zeroline": False, "ticksuffix": f" {units.length}",
            "tickformat": ",d"}
    layout = {
        "xaxis": {**axis, "title": {"text": f"{units.length} east of the map's south-west corner"},
                  "range": [float(ex(left - pad)), float(ex(right + pad))]},
        "yaxis": {**axis, "title": {"text": f"{units.length} north ({m.frame.north})"}, "scaleanchor": "x",
                  "scaleratio": 1,
                  "range": [float(ny(bottom - pad)), float(ny(top + pad))]},
        "images": images, "annotations": annotations, "dragmode": "pan", "hovermode": "closest", "height": 720,
        "margin": {"l": 80, "r": 20, "t": 20, "b": 60}, "plot_bgcolor": "white",
        "legend": {"title": {"text": "status (drawn)"}, "itemsizing": "constant"}, "uirevision": "keep",
    }
    config = {"scrollZoom": True, "displaylogo": False, "responsive": True,
              "modeBarButtonsToRemove": ["select2d", "lasso2d", "sendDataToCloud"]}
    return {"data": data, "layout": layout, "config": config, "reasons": [str(r) for r in reasons]}


def interactive_note(m: InteractiveMap) -> str:
    """What the interactive map draws, in words: of how many customers, and which."""
    status = np.asarray(m.status, dtype=object).astype(str)
    total = sum(m.counts.values())
    ok_total = int(m.counts.get("ok", 0))
    ok_drawn = int(np.count_nonzero(status == "ok"))
    rest_total, rest_drawn = total - ok_total, int(status.size) - ok_drawn
    if status.size >= total:
        return f"All {total:,} customers with a location are drawn."
    parts = [f"{rest_drawn:,} of {rest_total:,} customers in other statuses than ok"
             + (" (every one)" if rest_drawn >= rest_total else " (evenly spaced; a status with at most "
                                                                   f"{MAP_RARE:,} customers whole)"),
             f"{ok_drawn:,} of {ok_total:,} ok customers (evenly spaced)"]
    return f"Drawn: {parts[0]} and {parts[1]}; the legend and the tables count every customer."


def _plotly_js() -> markupsafe.Markup:
    from plotly.offline import get_plotlyjs

    return markupsafe.Markup(get_plotlyjs())


def _json_for_script(value: Any) -> markupsafe.Markup:
    """JSON to place inside a ``<script type="application/json">``: every ``<`` escaped, so no text ends the script."""
    return markupsafe.Markup(json.dumps(value, separators=(",", ":"), allow_nan=False).replace("<", "\\u003c"))


# ---- tables and the page ------------------------------------------------------------------------------

def _fmt(value: Any, digits: int = 1) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    if isinstance(value, (float, np.floating)):
        return f"{value:,.{digits}f}"
    return str(value)


#: per control key: how the report names it, and whether it is a length (else a pressure)
_CONTROLS = {"high_water_ft": ("high water", True), "setting_psi": ("setting", False),
             "discharge_hgl_ft": ("discharge HGL", True)}
_BEST_KEYS = {"high_water_ft": "best_high_water_ft", "setting_psi": "best_setting_psi",
              "discharge_hgl_ft": "best_discharge_hgl_ft"}


def _count(value: Any) -> str:
    return "–" if value is None or pd.isna(value) else f"{int(value):,}"


def control_texts(r: Mapping[str, Any], units: Units) -> dict[str, str]:
    """A zone_summary row's control ranges as display text in ``units``: ``best`` (the whole steps an operator
    can set, or the single best step; ``best_note`` says which, at length), ``flagged_at_best`` (what they flag), ``exact`` (the exact optimum,
    against what the source can do) and ``robust``."""
    key = r.get("control")
    if key not in _CONTROLS:
        return {"best": "–", "best_note": "–", "flagged_at_best": "–", "exact": "–", "robust": "–"}
    label, length = _CONTROLS[key]
    unit = units.length if length else units.pressure
    V = lambda v: _fmt(float(units.length_from_ft(v) if length else units.pressure_from_psi(v)))  # noqa: E731
    step = f"{float(units.length_from_ft(r['control_step']) if length else units.pressure_from_psi(r['control_step'])):.3g}"

    def span(a: Any, b: Any) -> str:
        return f"{V(a)} {unit}" if a == b else f"{V(a)} to {V(b)} {unit}"

    lo, hi = r.get(f"{_BEST_KEYS[key]}_from"), r.get(f"{_BEST_KEYS[key]}_to")
    exact = "–" if lo is None or pd.isna(lo) else f"{label} {span(lo, hi)}, flags {_count(r.get('flagged_at_best'))}"
    where = r.get("optimum_vs_bounds")
    limits = [f"from {V(r['control_min'])}" if not pd.isna(r.get("control_min")) else "",
              f"up to {V(r['control_max'])}" if not pd.isna(r.get("control_max")) else ""]
    if where in ("outside", "partly outside"):
        exact += f"; {where} what the source can do ({label} {' '.join(x for x in limits if x)} {unit})"
    if pd.isna(r.get("step_from")):
        best = note = "no step serves any customer"
    elif r.get("steps_inside_optimum"):
        best = f"{label} {span(r['step_from'], r['step_to'])}"
        note = f"{best}: whole {step} {unit} steps inside the exact optimum"
    else:
        best = f"{label} {span(r['step_from'], r['step_to'])} (one step)"
        note = (f"{label} {span(r['step_from'], r['step_to'])}: the exact optimum is narrower than one {step} {unit} "
                "step, and this is the step that flags fewest")
    robust = "–" if pd.isna(r.get("robust_from")) else (
        f"{label} {span(r['robust_from'], r['robust_to'])}, flags at most {_count(r.get('flagged_robust'))} "
        f"(the minimum plus up to {_count(r.get('robust_tolerance'))})")
    return {"best": best, "best_note": note, "flagged_at_best": _count(r.get("flagged_at_step")), "exact": exact,
            "robust": robust}


def summary_rows(summary: pd.DataFrame, bands: pd.DataFrame | None, units: Units, criteria: Criteria) -> list[dict[str, str]]:
    """The zone_summary table as display text, one row per zone, in ``units``."""
    band_by_zone = {} if bands is None else {r["zone"]: r for r in bands.to_dict("records")}
    rows = []
    for r in summary.to_dict("records"):
        L = lambda ft: _fmt(float(units.length_from_ft(ft)))  # noqa: E731
        texts = control_texts(r, units)
        b = band_by_zone.get(r["zone"])
        if b is not None:
            band = (f"{L(b['lower_limit_ft'])} to {L(b['upper_limit_ft'])} {units.length}, "
                    f"{_fmt(float(units.area_from_sq_ft(b['area_sq_ft'])))} {units.area}")
        else:
            band = "–"
        flagged = sum(int(r.get(f"n_{s}", 0)) for s in FLAGGED_LAYERS)
        rows.append({
            "zone": str(r["zone"]), "source": str(r.get("source_kind", "")),
            "hgl": f"{L(r['hgl_low_ft'])} to {L(r['hgl_high_ft'])}",
            "customers": str(int(r["customers"])), "ok": str(int(r.get("n_ok", 0))),
            # per finding (registry order): customers with it as their status, and on its list
            "by_status": [str(int(r[f"n_{s}"])) if f"n_{s}" in r else "–" for s in FLAGGED_LAYERS],  # –: no status
            "by_finding": [str(int(r.get(f"n_{c}", 0))) for c in FINDING_COLUMNS.values()],
            "flagged": str(flagged), **texts,
            "firm": str(int(r.get("n_firm", 0))), "borderline": str(int(r.get("n_borderline", 0))),
            "near_limit": str(int(r.get("n_near_limit", 0))), "unrated": str(int(r.get("n_unrated", 0))),
            "band": band,
        })
    return rows


#: a zone source's configured keys, in the order a reader expects them, with their unit
SOURCE_KEYS = (
    ("high_water_ft", "high water", "ft"), ("low_water_ft", "low water", "ft"),
    ("fire_bottom_ft", "bottom of fire storage", "ft"), ("standby_bottom_ft", "bottom of standby storage", "ft"),
    ("overflow_ft", "overflow", "ft"), ("bottom_ft", "bottom", "ft"),
    ("valve_elevation_ft", "valve elevation", "ft"), ("setting_psi", "setting", "psi"),
    ("inlet_zone", "inlet zone", ""), ("inlet_hgl_ft", "inlet HGL", "ft"),
    ("discharge_hgl_ft", "discharge HGL", "ft"), ("no_demand_hgl_ft", "HGL at no demand", "ft"),
    ("shutoff_hgl_ft", "shutoff HGL", "ft"),
)


def source_rows(sources: Sequence[Mapping[str, Any]], summary: pd.DataFrame, units: Units) -> list[dict[str, str]]:
    """The configured zone sources as display text: kind, each configured control (ft and psi as in the
    config, and in ``units`` when those are SI) and the HGL it gives (from ``summary``)."""
    hgl = {r["zone"]: r for r in summary.to_dict("records")}
    rows = []
    for s in sources:
        controls = []
        for key, label, unit in SOURCE_KEYS:
            if s.get(key) is None:
                continue
            if not unit:  # text: a zone's name
                controls.append(f"{label} {s[key]}")
                continue
            value = float(s[key])
            text = f"{label} {value:,.1f} {unit}"
            if units.system == "si":
                shown = units.length_from_ft(value) if unit == "ft" else units.pressure_from_psi(value)
                text += f" ({float(shown):,.1f} {units.length if unit == 'ft' else units.pressure})"
            controls.append(text)
        h = hgl.get(s.get("zone"))
        rows.append({
            "zone": str(s.get("zone", "")), "kind": str(s.get("kind", "")), "controls": "; ".join(controls) or "–",
            "hgl": "–" if h is None else (f"{_fmt(float(units.length_from_ft(h['hgl_low_ft'])))} to "
                                          f"{_fmt(float(units.length_from_ft(h['hgl_high_ft'])))} {units.length}"),
        })
    return rows


def dem_accuracy_text(accuracy: Mapping[str, Any], criteria: Criteria, units: Units) -> str:
    """The DEM accuracy a run assumed (run.json's ``terrain_accuracy``), with what it means in pressure."""
    if not accuracy.get("stated"):
        return ("not stated (terrain.vertical_rmse_ft): the flags' confidence is unrated and the field check's "
                "sigmas leave the DEM out")
    parts = []
    for path, rmse_ft in accuracy["vertical_rmse_ft"].items():
        length = float(units.length_from_ft(rmse_ft))
        psi = float(units.pressure_from_psi(criteria.psi_per_ft * rmse_ft))
        parts.append(f"{path.rsplit('/', 1)[-1]}: vertical RMSE {length:.2f} {units.length} "
                     f"({psi:.2f} {units.pressure} at one standard deviation)")
    return "; ".join(parts) + "; a flag is firm when its margin exceeds 1.96 of these (ASPRS 95 % convention)"


def _plain(value: Any) -> Any:
    """Nested run.json data as text-friendly rows for the template's generic renderer."""
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return value


@dataclass
class Figures:
    """The report's figures as data, to draw in any process (:func:`draw`): each zone's histogram, by zone in the
    page's order, each map of a zone with terrain, the overview and the target areas' map (None when left out)."""

    histograms: Mapping[str, Histogram]
    maps: Sequence[ZoneMap]
    overview: OverviewMap | None
    areas: AreasMap | None
    units: Units


@dataclass(frozen=True)
class Drawn:
    """The report's figures as PNG data URIs (:func:`draw`): by zone, its histogram and its map (the zones with
    terrain); the overview and the target areas' map, None when left out."""

    histograms: Mapping[str, str]
    maps: Mapping[str, str]
    overview: str | None
    areas: str | None


def draw(figures: Figures) -> Drawn:
    """Draw every figure of ``figures`` (matplotlib, Agg)."""
    u = figures.units
    return Drawn(histograms={z: histogram(z, h, u) for z, h in figures.histograms.items()},
                 maps={m.zone: zone_map(m, u) for m in figures.maps},
                 overview=None if figures.overview is None else overview_map(figures.overview, u),
                 areas=None if figures.areas is None else areas_map(figures.areas, u))


def render(*, info: Mapping[str, Any], summary: pd.DataFrame, bands: pd.DataFrame | None, drawn: Drawn,
           criteria: Criteria, units: Units, interactive: InteractiveMap | None = None,
           areas: pd.DataFrame | None = None, field: Mapping[str, Any] | None = None,
           title: str = "geopress static pressure screening") -> str:
    """The report page as HTML text.

    ``drawn`` holds the figures (:func:`draw`): each zone of ``summary`` has a
    histogram there, and a map when it has terrain; the overview and the target
    areas' map are left out when None there. ``interactive`` is the interactive
    map of all zones (left out when None); ``info`` is what run.json records
    (its ``changes`` section is shown when there was an earlier run to compare
    with); ``areas`` the target areas' table (geopress.targets; left out when None).
    ``field`` is the field-check section (:func:`geopress.report_field.section`),
    left out when None.
    """
    env = jinja2.Environment(loader=jinja2.PackageLoader("geopress", "templates"),
                             autoescape=jinja2.select_autoescape(["html", "j2"]), undefined=jinja2.StrictUndefined)
    rows = summary_rows(summary, bands, units, criteria)
    row_of = {r["zone"]: r for r in rows}
    zones = [{"zone": zone, "row": row_of[str(zone)], "histogram": drawn.histograms[zone], "map": drawn.maps.get(zone)}
             for zone in summary["zone"].tolist()]
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
    sources = ((info.get("config") or {}).get("zones") or {}).get("source") or []
    crit["DEM accuracy assumed"] = dem_accuracy_text(info.get("terrain_accuracy") or {}, criteria, units)
    imap = None
    if interactive is not None:
        imap = {"spec": _json_for_script(interactive_figure(interactive, units)), "note": interactive_note(interactive),
                "plotly_js": _plotly_js(), "north": interactive.frame.north}
    return env.get_template("report.html.j2").render(
        title=title, info=_plain(info), counts=counts, rows=rows, zones=zones,
        criteria=crit, units=units, cautions=CAUTIONS, changes=_plain(changes) if (changes := info.get("changes")) and changes.get("baseline") else None,
        status_style=STATUS_STYLE, overrides=info.get("overrides") or {},
        finding_counts=info.get("counts_by_finding", {}), lists=FLAGGED_LAYERS,
        areas=None if areas is None else {"rows": area_rows(areas, units), "total": len(areas),
                                          "settings": (info.get("target_areas") or {}),
                                          "map": drawn.areas},
        overview=drawn.overview, imap=imap,
        sources=source_rows(sources, summary, units), field=field,
    )
