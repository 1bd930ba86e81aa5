"""report.html: contents, and a real browser (headless Chromium) opening it from disk."""

from __future__ import annotations

import json
import re
import shutil
import subprocess

import numpy as np
import pandas as pd
import pytest

import geopress
from geopress import pipeline
from geopress.classify import Criteria
from geopress.report import OKABE_ITO, STATUS_STYLE, render
from geopress.scenario import load_scenario
from geopress.units import SI, US

CHROMIUM = shutil.which("chromium")  # Debian package: /usr/bin/chromium


def test_browser_loads_every_image_and_one_row_per_zone(world, tmp_path):
    if CHROMIUM is None:
        pytest.skip("Chromium is not installed (.ci/run installs Debian's chromium package; it could not here)")
    geopress.run(world.config_path)
    report = world.out.parent / "report.html"
    profile = tmp_path / "chromium-profile"
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
           "--disable-background-networking", "--disable-component-update", "--disable-sync", "--no-first-run",
           f"--user-data-dir={profile}", "--virtual-time-budget=5000", "--dump-dom",
           report.resolve().as_uri() + "#selftest"]
    dom = subprocess.run(cmd, capture_output=True, text=True, timeout=120, check=True).stdout
    m = re.search(r'<pre id="selftest">(.*?)</pre>', dom, re.S)
    assert m and m.group(1), "the page's self-test did not run"
    found = json.loads(m.group(1))
    # two zones, each with a histogram and a map
    assert len(found["images"]) == 4
    assert all(img["complete"] and img["naturalWidth"] > 0 for img in found["images"]), found["images"]
    assert found["zoneRows"] == 2


def test_report_is_self_contained_and_says_what_it_is(world):
    geopress.run(world.config_path)
    html = (world.out.parent / "report.html").read_text(encoding="utf-8")
    assert not re.search(r'(src|href)="(?!data:)', html)  # nothing to fetch: images are data: URIs
    assert html.count('src="data:image/png;base64,') == 4
    assert "static screening estimate" in html and "licensed engineering practice" in html
    assert "Changes since the last run" not in html  # a first run has no earlier run to compare with
    for status in ("ok", "high", "low"):
        assert STATUS_STYLE[status][2] in html  # every status colour is explained
    info = json.loads((world.out.parent / "run.json").read_text())
    assert info["report"]["written"] and str(world.out.parent / "report.html") in info["outputs"]


def test_status_colours_are_okabe_ito():
    palette = set(OKABE_ITO.values())
    assert {c for c, _, _ in STATUS_STYLE.values()} <= palette
    # the flagged statuses and ok are each told apart by colour and by marker
    shown = ["ok", "high", "low", "above_hgl", "low_upper_floors"]
    assert len({STATUS_STYLE[s][0] for s in shown}) == len(shown)
    assert len({STATUS_STYLE[s][1] for s in shown}) == len(shown)


def _summary():
    return pd.DataFrame({"zone": ["Z"], "source_kind": ["tank"], "hgl_high_ft": [1200.0], "hgl_low_ft": [1180.0],
                         "customers": [2], "n_ok": [2], "best_high_water_ft_from": [1150.0],
                         "best_high_water_ft_to": [1160.0], "flagged_at_best": [0]})


def test_changes_section_and_si_units():
    info = {"geopress_version": "x", "counts": {"ok": 2}, "config": {"zones": {"source": []}},
            "changes": {"baseline": "/runs/2026-01-01/pressure.gpkg",
                        "counts": {"unchanged": 1, "newly_flagged": 1, "cleared": 0},
                        "newly_in_status": {"high": 1, "low": 0}}}
    pressures = {"Z": (np.array([40.0, 50.0]), np.array([60.0, 70.0]))}
    html = render(info=info, summary=_summary(), bands=None, maps=[], pressures=pressures, criteria=Criteria(),
                  units=SI)
    assert "Changes since the last run" in html and "/runs/2026-01-01/pressure.gpkg" in html
    assert "<td>newly_flagged</td><td class=\"num\">1</td>" in html
    # 1150 ft * 0.3048 = 350.52 m; 80 psi * 6.894757 = 551.6 kPa (NIST SP 811 factor, secondary)
    assert "high water 350.5 to 353.6 m" in html
    assert "551.6 kPa" in html
    us = render(info=info, summary=_summary(), bands=None, maps=[], pressures=pressures, criteria=Criteria(), units=US)
    assert "high water 1,150.0 to 1,160.0 ft" in us and "80 psi" in us


def test_missing_report_extra_skips_the_report(world, monkeypatch, caplog):
    monkeypatch.setattr(pipeline, "report_missing", lambda: "matplotlib not installed; install the report extra")
    with caplog.at_level("WARNING", logger="geopress.pipeline"):
        geopress.run(load_scenario(world.config_path))
    assert not (world.out.parent / "report.html").exists()
    info = json.loads((world.out.parent / "run.json").read_text())
    assert info["report"] == {"written": False, "reason": "matplotlib not installed; install the report extra"}
    assert "report.html not written" in caplog.text
