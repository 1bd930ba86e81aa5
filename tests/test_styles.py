"""The layers' SLD styles: parsed with lxml, checked for SLD 1.0.0's structure and for the report's colours
and markers, beside the GeoPackage and inside it (layer_styles)."""

from __future__ import annotations

import sqlite3

import pyogrio
import pytest
from lxml import etree

import geopress
from geopress import styles
from geopress.classify import FLAGGED_LAYERS, STATUSES
from geopress.report import BAND_COLOUR, LIMIT_STYLE, STATUS_STYLE
from geopress.findings import FLAGGED_STATUSES, STYLES

NS = {"sld": styles.SLD_NS, "ogc": styles.OGC_NS}
# The order of children in SLD 1.0.0's content models (OGC 02-070, the schema's xsd:sequence of each element;
# from memory): an element listed here may hold only these children, each at most in this order.
ORDER = {
    "StyledLayerDescriptor": ["Name", "Title", "Abstract", "NamedLayer", "UserLayer"],
    "NamedLayer": ["Name", "LayerFeatureConstraints", "NamedStyle", "UserStyle"],
    "UserStyle": ["Name", "Title", "Abstract", "IsDefault", "FeatureTypeStyle"],
    "FeatureTypeStyle": ["Name", "Title", "Abstract", "FeatureTypeName", "SemanticTypeIdentifier", "Rule"],
    "Rule": ["Name", "Title", "Abstract", "LegendGraphic", "Filter", "ElseFilter", "MinScaleDenominator",
             "MaxScaleDenominator", "LineSymbolizer", "PolygonSymbolizer", "PointSymbolizer", "TextSymbolizer",
             "RasterSymbolizer"],
    "PointSymbolizer": ["Geometry", "Graphic"],
    "PolygonSymbolizer": ["Geometry", "Fill", "Stroke"],
    "LineSymbolizer": ["Geometry", "Stroke"],
    "Graphic": ["ExternalGraphic", "Mark", "Opacity", "Size", "Rotation"],
    "Mark": ["WellKnownName", "Fill", "Stroke"],
    "Fill": ["GraphicFill", "CssParameter"],
    "Stroke": ["GraphicFill", "GraphicStroke", "CssParameter"],
}
# SLD 1.0.0's well-known marks (from memory of the specification's list)
WELL_KNOWN = {"square", "circle", "triangle", "star", "cross", "x"}


def local(el) -> str:
    return etree.QName(el).localname


def check_structure(doc) -> None:
    """Every element in the SLD namespace holds only the children its content model allows, in order."""
    for el in doc.iter():
        if not isinstance(el.tag, str) or etree.QName(el).namespace != styles.SLD_NS or local(el) not in ORDER:
            continue
        allowed = ORDER[local(el)]
        seen = [local(c) for c in el if isinstance(c.tag, str)]
        assert all(name in allowed for name in seen), (local(el), seen)
        positions = [allowed.index(name) for name in seen]
        assert positions == sorted(positions), (local(el), seen)


def parse(text: str):
    doc = etree.fromstring(text.encode("utf-8"))
    assert etree.QName(doc).localname == "StyledLayerDescriptor" and doc.get("version") == "1.0.0"
    check_structure(doc)
    return doc


def rules_by_status(doc) -> dict[str, object]:
    out = {}
    for rule in doc.iterfind(".//sld:Rule", NS):
        eq = rule.find("ogc:Filter/ogc:PropertyIsEqualTo", NS)
        assert eq.findtext("ogc:PropertyName", namespaces=NS) == "status"
        out[eq.findtext("ogc:Literal", namespaces=NS)] = rule
    return out


def css(el) -> dict[str, str]:
    return {p.get("name"): p.text for p in el.iterfind("sld:CssParameter", NS)}


def test_every_status_has_a_rule_in_the_reports_colour_and_marker():
    doc = parse(styles.status_style("customers").sld)
    rules = rules_by_status(doc)
    assert list(rules) == list(STATUSES)
    for status, rule in rules.items():
        colour, marker, label = STATUS_STYLE[status][:3]
        mark = rule.find("sld:PointSymbolizer/sld:Graphic/sld:Mark", NS)
        assert css(mark.find("sld:Fill", NS)) == {"fill": colour}
        well_known, rotation, filled = styles.MARKS[marker]
        assert mark.findtext("sld:WellKnownName", namespaces=NS) == well_known in WELL_KNOWN
        rot = rule.findtext("sld:PointSymbolizer/sld:Graphic/sld:Rotation", namespaces=NS)
        assert float(rot) == rotation
        assert (mark.find("sld:Stroke", NS) is not None) == filled
        assert rule.findtext("sld:Title", namespaces=NS) == label
    # the report tells each shown status by colour and marker together: so do the styles
    drawn = {(css(r.find(".//sld:Mark/sld:Fill", NS))["fill"], r.findtext(".//sld:WellKnownName", namespaces=NS),
              r.findtext(".//sld:Rotation", namespaces=NS)) for s, r in rules.items() if s != "no_geometry"}
    assert len(drawn) == len(STATUSES) - 1


def test_a_findings_layer_draws_every_customer_in_its_findings_style():
    # a finding's layer holds customers whose status may be another finding (a tall building on the
    # upper-floors list is high first): one rule, no filter, in the finding's colour and marker
    for finding, layer in FLAGGED_LAYERS.items():
        doc = parse(styles.layer_styles([layer])[layer].sld)
        rules = doc.findall(".//sld:Rule", NS)
        assert len(rules) == 1 and rules[0].find("ogc:Filter", NS) is None
        assert rules[0].findtext("sld:Name", namespaces=NS) == finding
        assert css(rules[0].find(".//sld:Mark/sld:Fill", NS))["fill"] == STYLES[finding].colour  # a finding that is no status has a style too


def css_by_value(doc, field: str, symbol: str) -> dict[str, dict[str, str]]:
    """Each rule's ``symbol`` CSS parameters by the value its filter asks ``field`` to equal."""
    got = {}
    for rule in doc.iterfind(".//sld:Rule", NS):
        eq = rule.find("ogc:Filter/ogc:PropertyIsEqualTo", NS)
        assert eq.findtext("ogc:PropertyName", namespaces=NS) == field
        got[eq.findtext("ogc:Literal", namespaces=NS)] = css(rule.find(symbol, NS))
    return got


def test_target_areas_are_filled_in_their_findings_colour():
    got = css_by_value(parse(styles.area_style().sld), "finding", "sld:PolygonSymbolizer/sld:Fill")
    assert list(got) == list(FLAGGED_STATUSES)  # the storage findings get no target areas
    for finding, fill in got.items():
        assert fill["fill"] == STATUS_STYLE[finding].colour and 0 < float(fill["fill-opacity"]) < 1


def test_band_and_limit_styles_use_the_reports_colours():
    band = parse(styles.band_style().sld)
    fill = css(band.find(".//sld:PolygonSymbolizer/sld:Fill", NS))
    assert fill["fill"] == BAND_COLOUR and 0 < float(fill["fill-opacity"]) < 1
    got = css_by_value(parse(styles.limit_style().sld), "limit", "sld:LineSymbolizer/sld:Stroke")
    assert set(got) == set(LIMIT_STYLE)
    for limit, (colour, dashes, _) in LIMIT_STYLE.items():
        assert got[limit]["stroke"] == colour
        assert got[limit].get("stroke-dasharray") == styles.DASHES[dashes]


@pytest.fixture
def styled_run(world):
    geopress.run(world.config_path)
    return world


def test_sld_files_beside_the_geopackage_and_in_its_layer_styles(styled_run):
    out = styled_run.out
    layers = [str(n) for n in pyogrio.list_layers(out)[:, 0]]
    assert "layer_styles" in layers
    styled = ["customers", *FLAGGED_LAYERS.values(), "service_band", "band_limits", "changes", "target_areas"]
    for layer in styled:
        text = (out.parent / f"pressure.{layer}.sld").read_text(encoding="utf-8")
        parse(text)
    rows = pyogrio.read_dataframe(out, layer="layer_styles", read_geometry=False)
    assert sorted(rows["f_table_name"]) == sorted(styled)
    for r in rows.itertuples():
        assert r.styleSLD == (out.parent / f"pressure.{r.f_table_name}.sld").read_text(encoding="utf-8")
        assert r.f_geometry_column == pyogrio.read_info(out, layer=r.f_table_name)["geometry_name"]
        assert bool(r.useAsDefault) and r.styleName
    with sqlite3.connect(out) as con:
        assert con.execute("select data_type from gpkg_contents where table_name = 'layer_styles'").fetchone() == (
            "attributes",)
        assert con.execute("select count(*) from layer_styles where styleQML is not null").fetchone() == (0,)
    # the styled layers still open as before
    assert len(pyogrio.read_dataframe(out, layer="customers")) == 20
    assert pyogrio.read_info(out, layer="high_pressure")["geometry_type"] == "Point"
