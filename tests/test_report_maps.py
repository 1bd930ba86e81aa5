"""The report's maps and figures: hillshade, scale bar, markers, histograms, the interactive map's sample and data."""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pandas as pd
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st
from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar
from pyproj import CRS

import geopress
from geopress import planning, report
from geopress.classify import Criteria
from geopress.pressure import M_PER_FT, M_PER_US_FT
from geopress.report import (INTERACTIVE_FLAGGED, INTERACTIVE_OK, MAP_RARE, STATUS_STYLE, Frame, Terrain,
                             hillshade, interactive_sample, scale_bar_length)
from geopress.units import SI, US

from conftest import ORIGIN, customer_records, write_layer

ALT = math.radians(report.SUN_ALTITUDE_DEG)
AZ = math.radians(report.SUN_AZIMUTH_DEG)
#: direction to the sun as (east, north, up)
SUN = (math.sin(AZ) * math.cos(ALT), math.cos(AZ) * math.cos(ALT), math.sin(ALT))


def _plane(b: float, c: float, shape=(7, 9), dx=3.0, dy=5.0, a=1000.0) -> np.ndarray:
    """z ft = a + b * east + c * north on a north-up grid of dx by dy ft (row 0 the north edge)."""
    rows, cols = np.mgrid[0:shape[0], 0:shape[1]]
    return a + b * cols * dx + c * (-rows * dy)


# ---- hillshade: Lambert's cosine law (the shade is the cosine of the angle to the sun; geometry, no source needed)

@settings(max_examples=60, deadline=None)
@given(z=st.floats(-500, 15_000), dx=st.floats(0.1, 500), dy=st.floats(0.1, 500))
def test_flat_ground_shades_sin_altitude(z, dx, dy):
    shade = hillshade(np.full((5, 6), z), dx, dy)
    # 1e-12: a few roundings of numbers near 1
    assert np.allclose(shade, math.sin(ALT), rtol=0, atol=1e-12)


@settings(max_examples=80, deadline=None)
@given(b=st.floats(-3, 3), c=st.floats(-3, 3), dx=st.floats(0.5, 100), dy=st.floats(0.5, 100))
def test_a_plane_shades_one_constant_value_its_normal_dotted_with_the_sun(b, c, dx, dy):
    shade = hillshade(_plane(b, c, dx=dx, dy=dy), dx, dy)
    expected = max(0.0, (-b * SUN[0] - c * SUN[1] + SUN[2]) / math.sqrt(1 + b * b + c * c))
    # numpy.gradient is exact for a plane up to rounding: 1e-9 covers the differences of values near 1e3 to 1e4
    assert np.allclose(shade, expected, rtol=0, atol=1e-9)


def test_ground_facing_the_sun_shades_one_and_ground_turned_away_shades_zero():
    b, c = -SUN[0] / SUN[2], -SUN[1] / SUN[2]  # normal (-b, -c, 1) parallel to the sun's direction
    assert np.allclose(hillshade(_plane(b, c), 3.0, 5.0), 1.0, atol=1e-12)  # rounding only
    # steeper than 45 degrees, facing away from a sun 45 degrees up: in its own shadow
    assert np.all(hillshade(_plane(-2 * b, -2 * c), 3.0, 5.0) == 0.0)


def test_relief_scales_the_slope_and_nodata_stays_nodata():
    z = _plane(0.05, -0.02)
    assert np.allclose(hillshade(z, 3.0, 5.0, vert_exag=4.0), hillshade(4.0 * z, 3.0, 5.0), atol=1e-12)
    z[3, 4] = np.nan
    shade = hillshade(z, 3.0, 5.0)
    assert np.isnan(shade[3, 4]) and np.isfinite(np.delete(shade.ravel(), 3 * z.shape[1] + 4)).all()


def test_the_same_ground_shades_the_same_whatever_the_range_of_the_preview():
    # no stretch per image: a preview that holds only a nearly flat piece keeps its near-flat shade
    z = _plane(0.001, 0.0) + np.random.default_rng(0).normal(0.0, 0.01, (7, 9))  # 0.01 ft of rounding noise
    shade = Terrain(z, (0.0, 9 * 3.0, 0.0, 7 * 5.0)).shade(Frame(1.0, 1.0, "grid north"))
    # noise of 0.01 ft over 3 ft pixels, times RELIEF 4: slopes under 0.03, so shades within 0.03 of flat
    assert np.all(np.abs(shade - math.sin(ALT)) < 0.03)


# ---- scale bar

FT_PER = {"ft": 1.0, "mi": 5280.0, "m": 1 / M_PER_FT, "km": 1000 / M_PER_FT}  # mile 5,280 ft; 0.3048 m per ft


@settings(max_examples=150, deadline=None)
@given(max_ft=st.floats(3.5, 5e6), units=st.sampled_from([US, SI]))
def test_scale_bar_is_the_longest_round_length_that_fits(max_ft, units):
    ft, label = scale_bar_length(max_ft, units)
    value, unit = label.split()
    value = float(value.replace(",", ""))
    assert ft == pytest.approx(value * FT_PER[unit], rel=1e-12)  # the label says the length drawn
    assert unit in (("ft", "mi") if units is US else ("m", "km"))
    assert ft <= max_ft
    # round: 1, 2 or 5 times a power of ten (or half a mile); the next round length is at most 2.5 times as long
    mantissa = value / 10 ** math.floor(math.log10(value))
    assert round(mantissa, 9) in (1, 2, 5) or label == "0.5 mi"
    assert 2.5 * ft > max_ft


def test_scale_bar_switches_to_miles_and_kilometres():
    assert scale_bar_length(2_000.0, US) == (2_000.0, "2,000 ft")
    assert scale_bar_length(3_000.0, US) == (2_640.0, "0.5 mi")
    assert scale_bar_length(900.0 / M_PER_FT, SI) == pytest.approx((500 / M_PER_FT, "500 m"))
    assert scale_bar_length(1_500.0 / M_PER_FT, SI)[1] == "1 km"


def test_map_frames_in_feet_per_map_unit():
    # a projected CRS in US survey feet: 1200/3937 m each (Federal Register 2020-21902, confirmed), 0.3048 m per ft
    f = planning._frame(CRS("EPSG:2227"), (6e6, 2e6, 6.1e6, 2.1e6))
    assert f.ft_per_x == f.ft_per_y == pytest.approx(M_PER_US_FT / M_PER_FT, rel=1e-12)
    assert f.north.startswith("grid north of ")
    # geographic at 60 degrees north: a degree of longitude is about half a degree of latitude (cos 60 = 0.5);
    # 1 % covers the ellipsoid's flattening, which changes that ratio by under 0.7 %
    g = planning._frame(CRS("EPSG:4326"), (10.0, 59.9, 10.2, 60.1))
    assert g.ft_per_x / g.ft_per_y == pytest.approx(0.5, rel=0.01) and g.north == "north"


# ---- figures

def _zone_map(status: list[str]) -> report.ZoneMap:
    n = len(status)
    zone = shapely.box(0, 0, 1000, 600)
    return report.ZoneMap(
        zone="Z", terrain=Terrain(_plane(0.01, 0.02, shape=(12, 20), dx=50, dy=50), (0, 1000, 0, 600)),
        frame=Frame(1 / M_PER_FT, 1 / M_PER_FT, "grid north of a test CRS"), zone_geom=zone,
        band_geom=shapely.box(100, 100, 900, 400), limits={"max_static": shapely.LineString([(0, 100), (1000, 100)])},
        x=np.linspace(50, 950, n), y=np.full(n, 300.0), status=np.array(status, dtype=object))


def test_zone_map_has_no_coordinates_but_a_scale_bar_and_a_north_arrow_and_draws_flagged_above_ok():
    fig = report.zone_map_figure(_zone_map(["ok"] * 30 + ["high"] * 3 + ["unzoned"]), US)
    ax = fig.axes[0]
    assert len(ax.get_xticks()) == 0 and len(ax.get_yticks()) == 0
    bars = [a for a in ax.artists if isinstance(a, AnchoredSizeBar)]
    # the map shows 1,100 m across (the zone, 3 % margins, widened to the frame's shape): a quarter is 902 ft
    assert len(bars) == 1 and bars[0].txt_label.get_text() == "500 ft"
    assert any(t.get_text() == "N" for t in ax.texts)
    dots = [c for c in ax.collections if c.get_offsets().shape[0] in (30, 3)]
    ok = next(c for c in dots if c.get_offsets().shape[0] == 30)
    high = next(c for c in dots if c.get_offsets().shape[0] == 3)
    assert high.get_zorder() > ok.get_zorder()
    assert (high.get_sizes() > ok.get_sizes()).all()
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert f"{STATUS_STYLE['high'].label} (3)" in labels and f"{STATUS_STYLE['ok'].label} (30)" in labels
    assert "up is grid north of a test CRS" in ax.get_legend().get_title().get_text()


def test_histogram_counts_whole_customers_and_its_legend_stays_off_the_plot():
    for pmin, pmax, first in ((np.array([40.0, 50.0, 50.5]),) * 2 + ("pressure at the zone's HGL",),
                              (np.array([30.0, 40.0, 50.0]), np.array([45.0, 55.0, 85.0]),
                               "at the low HGL (psi_min), filled")):
        fig = report.histogram_figure("Z", report.histogram_data(pmin, pmax, Criteria(), US), US)
        ax = fig.axes[0]
        fig.canvas.draw()
        ticks = ax.get_yticks()
        assert np.array_equal(ticks, np.round(ticks))  # no fraction of a customer
        legend = ax.get_legend()
        assert legend.get_window_extent().y1 <= ax.get_window_extent().y0  # wholly below the axes
        assert [t.get_text() for t in legend.get_texts()][0] == first


def test_overview_shows_unzoned_and_no_terrain_customers_with_every_zone(world):
    # a second East zone that leaves a strip of the DEM unzoned, and customers in it and off the DEM
    x0, y1 = ORIGIN
    zones = [shapely.box(x0, y1 - 1000, x0 + 500, y1), shapely.box(x0 + 500, y1 - 800, x0 + 1000, y1)]
    write_layer(world.root / "zones2.gpkg", "zones", {"zone": ["West", "East"]}, zones)
    xs = list(world.extra["xs"]) + [x0 + 700.0, x0 + 1300.0]
    ys = list(world.extra["ys"]) + [y1 - 900.0, y1 - 500.0]
    write_layer(world.root / "customers2.gpkg", "parcels", customer_records(xs, ys),
                [shapely.Point(x, y) for x, y in zip(xs, ys)])
    text = world.config_path.read_text().replace('"zones.gpkg"', '"zones2.gpkg"').replace('"customers.gpkg"',
                                                                                       '"customers2.gpkg"')
    world.write_config(text)
    result = geopress.run(world.config_path, write=False)
    assert result.counts["unzoned"] == 1 and result.counts["no_terrain"] == 1
    html = planning.report_html(result.config, result.customers, result.points, result.zone_summary, result.plan, result.info)
    spec = json.loads(re.search(r'id="imap-spec">(.*?)</script>', html, re.S).group(1))
    drawn = {t["meta"]: len(t["x"]) for t in spec["data"] if t.get("meta")}
    assert drawn["unzoned"] == 1 and drawn["no_terrain"] == 1 and sum(drawn.values()) == 22
    assert [a["text"] for a in spec["layout"]["annotations"]] == ["<b>West</b>", "<b>East</b>"]
    assert "All 22 customers with a location are drawn." in html


# ---- interactive map

def test_interactive_sample_draws_every_flagged_customer_up_to_its_cap_and_a_sample_of_ok():
    small = np.array(["ok"] * 50 + ["high"] * 5)
    assert interactive_sample(small, "ok").tolist() == list(range(55))
    rng = np.random.default_rng(3)
    n_ok, n_high, n_low = 5 * INTERACTIVE_OK, 2 * INTERACTIVE_FLAGGED, 40
    status = rng.permutation(np.array(["ok"] * n_ok + ["high"] * n_high + ["low"] * n_low, dtype=object))
    drawn = interactive_sample(status, "ok")
    assert np.all(np.diff(drawn) > 0)  # input order, no repeats
    picked = pd.Series(status[drawn]).value_counts()
    assert picked["ok"] <= INTERACTIVE_OK and picked["high"] <= INTERACTIVE_FLAGGED
    assert picked["low"] == n_low  # a status with at most MAP_RARE customers is drawn whole
    assert n_low <= MAP_RARE


def _interactive(status: list[str], counts: dict[str, int]) -> report.InteractiveMap:
    n = len(status)
    return report.InteractiveMap(
        terrain=[], frame=Frame(1.0, 1.0, "grid north"), outlines={"Z": shapely.box(0, 0, 100, 100)},
        x=np.linspace(0, 100, n), y=np.linspace(0, 100, n), ids=np.array([f"A{i}" for i in range(n)], dtype=object),
        zone=np.array(["Z"] * (n - 1) + [None], dtype=object), ground_ft=np.full(n, 1000.04),
        psi_min=np.full(n, 40.06), psi_max=np.full(n, 50.0), status=np.array(status, dtype=object),
        reason=np.array(["same reason"] * (n - 1) + ["other reason"], dtype=object), counts=counts)


def test_interactive_figure_has_each_customers_values_and_says_how_many_it_draws():
    m = _interactive(["ok", "ok", "high", "low"], {"ok": 1000, "high": 1, "low": 1})
    fig = report.interactive_figure(m, SI)
    traces = [t for t in fig["data"] if t.get("meta")]
    assert [t["meta"] for t in traces] == ["ok", "low", "high"]  # drawing order: flagged above ok
    assert traces[0]["name"] == "ok (2 of 1,000)" and traces[2]["name"] == "high (1)"
    # 1000.04 ft * 0.3048 = 304.8 m; 40.06 psi * 6.894757 = 276.2 kPa (NIST SP 811 factor, secondary)
    assert traces[2]["customdata"] == [["A2", "Z", "304.8 m", "276.2 kPa", "344.7 kPa", 0]]
    assert fig["reasons"] == ["same reason", "other reason"]  # each distinct sentence once
    assert fig["reasons"][traces[1]["customdata"][0][5]] == "other reason"
    assert traces[1]["customdata"][0][1] == "none"  # unzoned
    assert all(t["type"] == "scattergl" for t in traces)
    note = report.interactive_note(m)
    assert "2 of 2 customers in other statuses than ok (every one)" in note and "2 of 1,000 ok customers" in note


def test_zone_sources_show_every_kind_of_control():
    sources = [{"zone": "T", "kind": "tank", "high_water_ft": 1212.0, "low_water_ft": 1194.0},
               {"zone": "V", "kind": "prv", "valve_elevation_ft": 1010.0, "setting_psi": 51.0},
               {"zone": "P", "kind": "pump", "discharge_hgl_ft": 1405.0}]
    summary = pd.DataFrame({"zone": ["T", "V", "P"], "hgl_low_ft": [1194.0, 1127.8, 1405.0],
                            "hgl_high_ft": [1212.0, 1127.8, 1405.0]})
    rows = {r["zone"]: r for r in report.source_rows(sources, summary, US)}
    assert rows["T"]["controls"] == "high water 1,212.0 ft; low water 1,194.0 ft"
    assert rows["V"]["controls"] == "valve elevation 1,010.0 ft; setting 51.0 psi"
    assert rows["P"]["controls"] == "discharge HGL 1,405.0 ft" and rows["P"]["hgl"] == "1,405.0 to 1,405.0 ft"
    # in SI the configured ft and psi stay, with metres and kPa beside them (0.3048 m per ft; 6.894757 kPa per psi)
    si = {r["zone"]: r for r in report.source_rows(sources, summary, SI)}
    assert si["V"]["controls"] == "valve elevation 1,010.0 ft (307.8 m); setting 51.0 psi (351.6 kPa)"
