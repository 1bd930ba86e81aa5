"""The report's field-check section: per-zone table, residual against ground, and a map of the readings. Pure.

Needs the ``report`` extra, as :mod:`geopress.report` does, whose figure
helpers and map furniture it uses. Residuals are drawn on a diverging
colour scale (ColorBrewer's RdBu: red for readings below the prediction,
blue above it, distinct for the common colour-vision deficiencies), with
its colour bar as the legend; outliers carry a thick black ring too, so
they do not depend on colour.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd
from matplotlib.colors import TwoSlopeNorm
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from . import report as rp
from .fieldcheck import COMPARED
from .units import Units

#: the colour scale's half-width, psi: the default outlier threshold. Fixed, so that a zone's bias of a psi or two
#: shows on every map, and outliers (ringed besides) take the scale's ends
SCALE_PSI = 5.0
#: a reading not compared with the screening (no pressure, no location, unzoned, no ground)
NOT_COMPARED = dict(marker="x", color=rp.OKABE_ITO["black"], size=30.0)


@dataclass
class FieldMap:
    """The readings with a location in the map's CRS, over the zones and the hillshade of the overview."""

    terrain: Sequence[rp.Terrain]
    frame: rp.Frame
    outlines: Mapping[str, Any]
    x: np.ndarray
    y: np.ndarray
    residual_psi: np.ndarray
    check: np.ndarray


def field_map(m: FieldMap, units: Units) -> str:
    """PNG data URI of :func:`field_map_figure`."""
    return rp._png(field_map_figure(m, units))


def field_map_figure(m: FieldMap, units: Units) -> Figure:
    """Readings coloured by residual, outliers ringed, readings not compared as black x's, zones outlined."""
    bounds = rp._bounds(m.outlines, m.x, m.y)
    fig, ax = rp._map_figure(bounds, m.frame)
    rp._shade_under(ax, m.terrain, m.frame)
    import matplotlib.patheffects as pe
    import shapely

    for zone, geom in m.outlines.items():
        if not geom.is_empty:
            rp._draw(ax, geom, color="black", linewidth=1.4, zorder=3)
            p = shapely.point_on_surface(geom)
            ax.text(p.x, p.y, zone, ha="center", va="center", fontsize=rp.FONT_PT + 2, fontweight="bold", zorder=30,
                    alpha=0.8, path_effects=[pe.withStroke(linewidth=3, foreground="white")])
    compared = np.isin(m.check, COMPARED)
    outlier = m.check == "outlier"
    res = np.asarray(units.pressure_from_psi(m.residual_psi), dtype=np.float64)
    half = float(units.pressure_from_psi(SCALE_PSI))
    norm = TwoSlopeNorm(vcenter=0.0, vmin=-half, vmax=half)
    dots = ax.scatter(m.x[compared & ~outlier], m.y[compared & ~outlier], c=res[compared & ~outlier], cmap="RdBu",
                      norm=norm, s=46, edgecolors="black", linewidths=0.5, zorder=10)
    ax.scatter(m.x[outlier], m.y[outlier], c=res[outlier], cmap="RdBu", norm=norm, s=110, edgecolors="black",
               linewidths=2.2, zorder=11)
    other = ~compared
    ax.scatter(m.x[other], m.y[other], marker=NOT_COMPARED["marker"], c=NOT_COMPARED["color"], s=NOT_COMPARED["size"],
               linewidths=1.2, zorder=9)
    # the colour bar under the map, outside its frame (the figure is fitted to everything drawn when saved)
    bar = fig.colorbar(dots, cax=fig.add_axes((0.15, -0.07, 0.7, 0.025)), orientation="horizontal",
                       extend="both")
    bar.set_label(f"residual, {units.pressure}: measured minus predicted (red: below the screening, blue: above)",
                  fontsize=rp.FONT_PT)
    bar.ax.tick_params(labelsize=rp.FONT_PT)
    handles = [
        Patch(facecolor="#b0b0b0", edgecolor="none", label=rp.HILLSHADE_LABEL),
        Line2D([], [], color="black", linewidth=1.4, label="pressure zone outline"),
        Line2D([], [], marker="o", linestyle="none", markerfacecolor="white", markeredgecolor="black", markersize=7,
               label=f"reading, coloured by residual ({int((compared & ~outlier).sum())})"),
        Line2D([], [], marker="o", linestyle="none", markerfacecolor="white", markeredgecolor="black", markersize=10,
               markeredgewidth=2.2, label=f"outlier, thick ring ({int(outlier.sum())})"),
    ]
    if other.any():
        handles.append(Line2D([], [], marker="x", linestyle="none", color=NOT_COMPARED["color"], markersize=7,
                              label=f"not compared: no pressure, location, zone or ground ({int(other.sum())})"))
    width = rp._limits(ax, bounds, m.frame)
    rp._furniture(ax, m.frame, units, width)
    ax.set_title("Field readings: residual against the screening", fontsize=rp.FONT_PT + 3)
    ax.legend(handles=handles, fontsize=rp.FONT_PT, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=2,
              frameon=False, title=f"up is {m.frame.north}", title_fontsize=rp.FONT_PT - 0.5)
    return fig


def residual_figure(readings: pd.DataFrame, by_zone: pd.DataFrame, units: Units) -> str | None:
    """PNG data URI: per zone with readings, each reading's residual against its ground with +-1 sigma bars,
    outliers as vermillion triangles, the zone's bias as a dashed line; None when no reading was compared."""
    zones = [z for z, n in zip(by_zone["zone"], by_zone["readings"]) if n > 0]
    if not zones:
        return None
    cols = min(3, len(zones))
    rows = -(-len(zones) // cols)
    fig = rp._figure((3.6 * cols, 2.9 * rows + 0.6))
    bias = dict(zip(by_zone["zone"], by_zone["bias_psi"]))
    zone = readings["zone"].to_numpy(dtype=object, na_value=None)
    check = readings["check"].to_numpy(dtype=object)
    ground = np.asarray(units.length_from_ft(readings["ground_ft"].to_numpy(dtype=np.float64)))
    res = np.asarray(units.pressure_from_psi(readings["residual_psi"].to_numpy(dtype=np.float64)))
    sig = np.asarray(units.pressure_from_psi(readings["sigma_psi"].to_numpy(dtype=np.float64)))
    for i, z in enumerate(zones):
        ax = fig.add_subplot(rows, cols, i + 1)
        for kind, style in (("consistent", dict(fmt="o", color=rp.OKABE_ITO["blue"], markersize=4)),
                            ("outlier", dict(fmt="^", color=rp.OKABE_ITO["vermillion"], markersize=7))):
            sel = (zone == z) & (check == kind)
            ax.errorbar(ground[sel], res[sel], yerr=sig[sel], linestyle="none", elinewidth=0.8, capsize=2, **style)
        ax.axhline(0.0, color="black", linewidth=0.8)
        ax.axhline(float(units.pressure_from_psi(bias[z])), color=rp.OKABE_ITO["orange"], linestyle="--",
                   linewidth=1.6)
        ax.set_title(f"{z}", fontsize=rp.FONT_PT + 1)
        ax.set_xlabel(f"ground, {units.length}", fontsize=rp.FONT_PT)
        ax.set_ylabel(f"residual, {units.pressure}", fontsize=rp.FONT_PT)
        ax.tick_params(labelsize=rp.FONT_PT - 1)
    fig.legend(handles=[
        Line2D([], [], marker="o", linestyle="none", color=rp.OKABE_ITO["blue"], label="reading, bar: +-1 sigma"),
        Line2D([], [], marker="^", linestyle="none", color=rp.OKABE_ITO["vermillion"], label="outlier"),
        Line2D([], [], color=rp.OKABE_ITO["orange"], linestyle="--", label="zone bias (median residual)"),
        Line2D([], [], color="black", linewidth=0.8, label="the screening's prediction"),
    ], loc="lower center", ncol=4, fontsize=rp.FONT_PT, frameon=False)
    fig.subplots_adjust(left=0.09, right=0.98, top=0.92, bottom=0.2 / rows + 0.08, hspace=0.6, wspace=0.35)
    return rp._png(fig)


def zone_rows(by_zone: pd.DataFrame, units: Units) -> list[dict[str, str]]:
    """field_check_by_zone as display text, in ``units``."""
    P = lambda psi: rp._fmt(float(units.pressure_from_psi(psi)))  # noqa: E731
    L = lambda ft: rp._fmt(float(units.length_from_ft(ft)))  # noqa: E731
    share = lambda v: "–" if pd.isna(v) else f"{100 * v:.0f} %"  # noqa: E731
    rows = []
    for r in by_zone.to_dict("records"):
        rows.append({
            "zone": str(r["zone"]), "readings": str(int(r["readings"])), "bias": P(r["bias_psi"]),
            "bias_length": L(r["bias_ft"]), "mad": P(r["mad_psi"]), "within_2": share(r["within_2_psi"]),
            "within_5": share(r["within_5_psi"]), "outliers": str(int(r["outliers"])),
            "correction": L(r["hgl_correction_ft"]), "limit": P(r["bias_limit_psi"]),
            "flag": "significant bias" if r["significant_bias"] else "", "causes": str(r["likely_causes"]),
            "what_if": str(r["what_if"]),
        })
    return rows


def outlier_rows(readings: pd.DataFrame, units: Units) -> list[dict[str, str]]:
    """The outliers, one row each, in ``units``."""
    out = readings[readings["check"] == "outlier"]
    P = lambda psi: rp._fmt(float(units.pressure_from_psi(psi)))  # noqa: E731
    return [{"reading": str(r["reading"]), "zone": str(r["zone"]), "measured": P(r["measured_psi"]),
             "predicted": (P(r["predicted_psi_low"]) if r["predicted_psi_low"] == r["predicted_psi_high"]
                           else f"{P(r['predicted_psi_low'])} to {P(r['predicted_psi_high'])}"),
             "residual": P(r["residual_psi"]), "limit": P(r["outlier_limit_psi"])} for r in out.to_dict("records")]


def section(readings: pd.DataFrame, by_zone: pd.DataFrame, fmap: FieldMap | None, info: Mapping[str, Any],
            units: Units) -> dict[str, Any]:
    """Everything the template's field-check section shows."""
    return {
        "rows": zone_rows(by_zone, units), "outliers": outlier_rows(readings, units),
        "residuals": residual_figure(readings, by_zone, units),
        "map": field_map(fmap, units) if fmap is not None and fmap.x.size else None,
        "checks": dict(info.get("checks", {})), "total": int(len(readings)),
    }
