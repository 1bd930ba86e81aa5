"""report.html: contents, and a real browser (headless Chromium) opening it from disk."""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest

import geopress
from geopress import pipeline
from geopress.classify import STATUSES, Criteria
from geopress.findings import FLAGGED_STATUSES
from geopress.report import OKABE_ITO, STATUS_STYLE, Figures, draw, histogram_data, render
from geopress.scenario import load_scenario
from geopress.units import SI, US
from plotly.offline import get_plotlyjs

from browser_support import CHROMIUM, Browser


@pytest.fixture(scope="module")
def browser():
    if CHROMIUM is None:
        pytest.skip("Chromium is not installed (.ci/run installs Debian's chromium package; it could not here)")
    b = Browser()
    yield b
    b.close()


#: the page's state once the interactive map is drawn: figures, tables, and the points on the map
STATE = """(() => {
  const gd = document.getElementById("imap");
  const points = gd._fullData.filter(t => t.type === "scattergl").reduce((n, t) => n + t.x.length, 0);
  return {images: [...document.querySelectorAll("img.figure")].map(i => ({alt: i.alt, ok: i.complete && i.naturalWidth > 0})),
          zoneRows: document.querySelectorAll("#zone-summary tbody tr").length, points: points,
          webgl: !!gd.querySelector("canvas"), traces: gd._fullData.map(t => t.meta).filter(Boolean)};
})()"""
#: where a customer's marker is on screen (viewport CSS px), from plotly's own axis mapping
LOCATE = """((id) => {
  const gd = document.getElementById("imap");
  gd.scrollIntoView({block: "center"});
  for (const t of gd._fullData) {
    const i = (t.customdata || []).findIndex(c => c[0] === id);
    if (i < 0) continue;
    const xa = gd._fullLayout.xaxis, ya = gd._fullLayout.yaxis, box = gd.getBoundingClientRect();
    return {x: box.left + xa._offset + xa.l2p(t.x[i]), y: box.top + ya._offset + ya.l2p(t.y[i])};
  }
  return null;
})"""
PICKED = """(() => {
  const cells = [...document.querySelectorAll("#imap-picked td[data-field]")];
  if (!cells[0].textContent) return null;
  return Object.fromEntries(cells.map(td => [td.dataset.field, td.textContent]));
})()"""


def test_interactive_map_works_offline_and_a_click_shows_the_customer(world, browser):
    result = geopress.run(world.config_path)
    report = world.out.parent / "report.html"
    browser.open(report.resolve().as_uri())  # the network emulated offline, and no host name resolves
    browser.wait_for('document.getElementById("imap").getAttribute("data-ready") === "1"')
    state = browser.evaluate(STATE)
    # the overview, the target areas' map, and per zone (two) a map and a histogram
    assert len(state["images"]) == 6 and all(i["ok"] for i in state["images"]), state["images"]
    assert state["zoneRows"] == 2
    assert state["webgl"] and state["points"] == len(result.customers)  # 20 customers: every one drawn
    # nothing was fetched but the file itself and its data: URIs
    assert all(u.startswith(("file:", "data:")) for u in browser.requests()), browser.requests()

    c = result.customers.iloc[7]
    at = browser.evaluate(f"{LOCATE}({json.dumps(c['account'])})")
    assert at is not None
    browser.click(at["x"], at["y"])
    shown = browser.wait_for(PICKED)
    assert shown == {
        "id": c["account"], "zone": c["zone"], "ground": f"{c['ground_ft']:,.1f} ft",
        "psi_min": f"{c['psi_min']:,.1f} psi", "psi_max": f"{c['psi_max']:,.1f} psi",
        "status": c["status"], "reason": c["reason"],
    }


#: US Letter less the report's 12 mm print margins, in CSS px (96 per inch)
PRINT_WIDTH_PX = round((8.5 - 2 * 12 / 25.4) * 96)
PRINT_HEIGHT_PX = round((11.0 - 2 * 12 / 25.4) * 96)


def test_report_prints_with_whole_maps_and_tables_that_fit(world, browser):
    geopress.run(world.config_path)
    report = world.out.parent / "report.html"
    browser.open(report.resolve().as_uri(), width=PRINT_WIDTH_PX, height=PRINT_HEIGHT_PX)
    browser.send("Emulation.setEmulatedMedia", {"media": "print"})
    layout = browser.evaluate("""(() => {
      const width = document.documentElement.clientWidth;
      return {width: width,
              overflowing: [...document.querySelectorAll("table")].filter(t => t.getBoundingClientRect().right > width + 1).length,
              tallest: Math.max(...[...document.querySelectorAll("img.map")].map(i => i.getBoundingClientRect().height)),
              interactive: getComputedStyle(document.getElementById("imap-box")).display};
    })()""")
    assert layout["overflowing"] == 0  # every table fits the page's width
    assert 0 < layout["tallest"] <= PRINT_HEIGHT_PX  # a map fits on one page, so it is never cut
    assert layout["interactive"] == "none"  # on paper, a note says where the interactive map is
    pdf = browser.pdf()
    pages = len(re.findall(rb"/Type\s*/Page\b", pdf))
    # title and overview; the status table, interactive note and summary; one page per zone (two); the
    # inputs: 6 pages as laid out now, allowing for a figure or table that moves by a page either way
    assert pdf.startswith(b"%PDF") and 4 <= pages <= 8, pages


def test_report_is_self_contained_and_says_what_it_is(world):
    geopress.run(world.config_path)
    html = (world.out.parent / "report.html").read_text(encoding="utf-8")
    outside_scripts = re.sub(r"<script\b[^>]*>.*?</script>", "", html, flags=re.S)
    assert not re.search(r'(src|href)="(?!data:|#)', outside_scripts)  # nothing to fetch: images are data: URIs
    assert "<script src" not in html and html.count(get_plotlyjs()) == 1  # plotly.js inline, once
    spec = json.loads(re.search(r'<script type="application/json" id="imap-spec">(.*?)</script>', html, re.S).group(1))
    images = [i["source"] for i in spec["layout"]["images"]]
    assert images and all(i.startswith("data:image/png;base64,") for i in images)  # the map's hillshade too
    assert outside_scripts.count('src="data:image/png;base64,') == 6  # as above, with the target areas' map
    assert "static screening estimate" in html and "licensed engineering practice" in html
    assert "Changes since the last run" not in html  # a first run has no earlier run to compare with
    for status in ("ok", "high", "low"):
        assert STATUS_STYLE[status].label in html  # every status colour is explained
    info = json.loads((world.out.parent / "run.json").read_text())
    assert info["report"]["written"] and str(world.out.parent / "report.html") in info["outputs"]


def test_status_colours_are_okabe_ito_and_every_status_has_its_own_colour_and_marker():
    assert set(STATUS_STYLE) == set(STATUSES)
    assert {st.colour for st in STATUS_STYLE.values()} <= set(OKABE_ITO.values())
    # every status is told apart by colour alone, by marker alone (static and interactive maps) and by glyph
    for field in ("colour", "marker", "symbol", "glyph"):
        assert len({getattr(st, field) for st in STATUS_STYLE.values()}) == len(STATUSES), field
    # drawn in the dict's order: every flagged status above ok, and larger
    order = list(STATUS_STYLE)
    assert all(order.index(s) > order.index("ok") for s in FLAGGED_STATUSES)
    assert all(STATUS_STYLE[s].size > STATUS_STYLE["ok"].size for s in FLAGGED_STATUSES)


def _summary():
    return pd.DataFrame({"zone": ["Z"], "source_kind": ["tank"], "hgl_high_ft": [1200.0], "hgl_low_ft": [1180.0],
                         "customers": [2], "n_ok": [2], "best_high_water_ft_from": [1150.0],
                         "best_high_water_ft_to": [1160.0], "flagged_at_best": [0], "control": ["high_water_ft"],
                         "control_step": [1.0], "control_min": [np.nan], "control_max": [np.nan],
                         "optimum_vs_bounds": ["inside"], "step_from": [1150.0], "step_to": [1160.0],
                         "flagged_at_step": [0], "steps_inside_optimum": [True], "robust_from": [1148.0],
                         "robust_to": [1162.0], "flagged_robust": [1], "robust_tolerance": [5]})


def test_changes_section_and_si_units():
    info = {"geopress_version": "x", "counts": {"ok": 2}, "config": {"zones": {"source": []}},
            "changes": {"baseline": "/runs/2026-01-01/pressure.gpkg",
                        "counts": {"unchanged": 1, "newly_flagged": 1, "cleared": 0},
                        "newly_in_status": {"high": 1, "low": 0}, "newly_in_finding": {"high": 1, "low": 0}}}
    def drawn(units):
        h = {"Z": histogram_data(np.array([40.0, 50.0]), np.array([60.0, 70.0]), Criteria(), units)}
        return draw(Figures(histograms=h, maps=[], overview=None, areas=None, units=units))

    html = render(info=info, summary=_summary(), bands=None, drawn=drawn(SI), criteria=Criteria(), units=SI)
    assert "Changes since the last run" in html and "/runs/2026-01-01/pressure.gpkg" in html
    assert "<td>newly_flagged</td><td class=\"num\">1</td>" in html
    assert "<code>new_high_pressure</code></td><td class=\"num\">1</td>" in html  # the new list per finding
    # 1150 ft * 0.3048 = 350.52 m; 80 psi * 6.894757 = 551.6 kPa (NIST SP 811 factor, secondary)
    assert "high water 350.5 to 353.6 m" in html
    assert "551.6 kPa" in html
    us = render(info=info, summary=_summary(), bands=None, drawn=drawn(US), criteria=Criteria(), units=US)
    assert "high water 1,150.0 to 1,160.0 ft" in us and "80 psi" in us


def test_missing_report_extra_skips_the_report(world, monkeypatch, caplog):
    monkeypatch.setattr(pipeline, "report_missing", lambda: "matplotlib not installed; install the report extra")
    with caplog.at_level("WARNING", logger="geopress.pipeline"):
        geopress.run(load_scenario(world.config_path))
    assert not (world.out.parent / "report.html").exists()
    info = json.loads((world.out.parent / "run.json").read_text())
    assert info["report"] == {"written": False, "reason": "matplotlib not installed; install the report extra"}
    assert "report.html not written" in caplog.text
