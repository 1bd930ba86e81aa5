"""Styles for the GeoPackage's layers in OGC Styled Layer Descriptor 1.0.0 (with its Filter Encoding 1.0): pure.

Each style colours and shapes a layer's features as report.html does: the
colours and markers of the statuses are the registry's
(:data:`geopress.findings.STATUS_STYLE`), the band's and limits'
:data:`geopress.report.BAND_COLOUR` and :data:`~geopress.report.LIMIT_STYLE`,
read from there, so one place knows each colour. The ``customers`` and
``changes`` layers get one rule per status (``ogc:PropertyIsEqualTo`` on
``status``); a finding's layer one rule, without a filter, in its finding's
style (every customer in it has that finding, whatever its status); the
service band one polygon rule; the band limits one line rule per ``limit``;
the target areas one polygon rule per ``finding``.

Needs the ``report`` extra, as the report does (its palette lives there).
:func:`sld` returns the document as text and writes nothing.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from dataclasses import dataclass
from typing import Mapping, Sequence

from .findings import FLAGGED_LAYERS, FLAGGED_STATUSES, STATUSES, STYLES, finding_of_layer
from .report import AREA_OPACITY, BAND_COLOUR, LIMIT_STYLE

SLD_NS = "http://www.opengis.net/sld"
OGC_NS = "http://www.opengis.net/ogc"
XLINK_NS = "http://www.w3.org/1999/xlink"
XSI_NS = "http://www.w3.org/2001/XMLSchema-instance"
SCHEMA_LOCATION = f"{SLD_NS} http://schemas.opengis.net/sld/1.0.0/StyledLayerDescriptor.xsd"

#: matplotlib's marker codes (as STATUS_STYLE gives them) as an SLD well-known mark, its rotation in degrees
#: clockwise, and whether it is drawn as a filled shape with an outline (else a bare symbol, as the report
#: draws x and + without an edge)
MARKS: dict[str, tuple[str, float, bool]] = {
    "o": ("circle", 0.0, True),
    "^": ("triangle", 0.0, True),
    "v": ("triangle", 180.0, True),
    "s": ("square", 0.0, True),
    "D": ("square", 45.0, True),
    "P": ("cross", 0.0, True),
    "x": ("x", 0.0, False),
    "+": ("cross", 0.0, False),
    "*": ("star", 0.0, True),
}
#: matplotlib's line styles (as LIMIT_STYLE gives them) as an SLD stroke-dasharray; None: solid
DASHES: dict[str, str | None] = {"-": None, "--": "6 3", ":": "1 3", "-.": "6 3 1 3"}
#: point size, px, and the outline around filled marks, px
POINT_SIZE_PX = 8
OUTLINE_PX = 0.5
LINE_PX = 1.5
#: the service band's fill opacity, so the terrain or a base map shows through
BAND_OPACITY = 0.4

for _ns, _prefix in ((SLD_NS, "sld"), (OGC_NS, "ogc"), (XLINK_NS, "xlink"), (XSI_NS, "xsi")):
    ET.register_namespace(_prefix, _ns)


@dataclass(frozen=True)
class LayerStyle:
    """A layer's style: its SLD document and the name and description it is stored under."""

    layer: str
    name: str
    description: str
    sld: str


def _el(parent: ET.Element, tag: str, text: str | None = None, ns: str = SLD_NS, **attrib: str) -> ET.Element:
    el = ET.SubElement(parent, f"{{{ns}}}{tag}", attrib)
    if text is not None:
        el.text = text
    return el


def _css(parent: ET.Element, **params: str | float) -> None:
    for name, value in params.items():
        _el(parent, "CssParameter", str(value), name=name.replace("_", "-"))


def _filter_equal(rule: ET.Element, field: str, value: str) -> None:
    flt = _el(rule, "Filter", ns=OGC_NS)
    eq = _el(flt, "PropertyIsEqualTo", ns=OGC_NS)
    _el(eq, "PropertyName", field, ns=OGC_NS)
    _el(eq, "Literal", value, ns=OGC_NS)


def _point_rule(fts: ET.Element, status: str, filtered: bool = True) -> None:
    """A rule drawing ``status``'s marker: for the features of that status, or (not ``filtered``) for every one."""
    style = STYLES[status]
    colour, label = style.colour, style.label
    well_known, rotation, filled = MARKS[style.marker]
    rule = _el(fts, "Rule")
    _el(rule, "Name", status)
    _el(rule, "Title", label)
    if filtered:
        _filter_equal(rule, "status", status)
    graphic = _el(_el(rule, "PointSymbolizer"), "Graphic")
    mark = _el(graphic, "Mark")
    _el(mark, "WellKnownName", well_known)
    _css(_el(mark, "Fill"), fill=colour)
    if filled:
        _css(_el(mark, "Stroke"), stroke="#000000", stroke_width=OUTLINE_PX)
    _el(graphic, "Size", str(POINT_SIZE_PX))
    _el(graphic, "Rotation", f"{rotation:g}")


def _document(layer: str, title: str, abstract: str) -> tuple[ET.Element, ET.Element]:
    """The SLD root and the FeatureTypeStyle to add rules to."""
    root = ET.Element(f"{{{SLD_NS}}}StyledLayerDescriptor", {"version": "1.0.0", f"{{{XSI_NS}}}schemaLocation": SCHEMA_LOCATION})
    named = _el(root, "NamedLayer")
    _el(named, "Name", layer)
    style = _el(named, "UserStyle")
    _el(style, "Name", title)
    _el(style, "Title", title)
    _el(style, "Abstract", abstract)
    return root, _el(style, "FeatureTypeStyle")


def _text(root: ET.Element) -> str:
    ET.indent(root)
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n"


CAUTION = "Static screening estimate; local codes and a licensed engineer decide."


def status_style(layer: str, statuses: Sequence[str] = STATUSES) -> LayerStyle:
    """Points coloured and shaped by ``status``, one rule for each of ``statuses``."""
    name = f"{layer} by status"
    description = f"geopress: {layer} coloured and shaped by status, as in report.html. {CAUTION}"
    root, fts = _document(layer, name, description)
    for status in statuses:
        _point_rule(fts, status)
    return LayerStyle(layer, name, description, _text(root))


def finding_style(layer: str) -> LayerStyle:
    """A finding's layer: every point in that finding's colour and marker (whatever its status)."""
    finding = finding_of_layer(layer)
    name = f"{layer} ({finding})"
    description = f"geopress: {layer}, every customer with the finding {finding}, as in report.html. {CAUTION}"
    root, fts = _document(layer, name, description)
    _point_rule(fts, finding, filtered=False)
    return LayerStyle(layer, name, description, _text(root))


def band_style(layer: str = "service_band") -> LayerStyle:
    """The service band: polygons filled in the report's band colour."""
    name = layer
    description = f"geopress: ground within the pressure window at both HGLs, as in report.html. {CAUTION}"
    root, fts = _document(layer, name, description)
    rule = _el(fts, "Rule")
    _el(rule, "Name", "serviceable band")
    _el(rule, "Title", "serviceable band: within the pressure window")
    symbolizer = _el(rule, "PolygonSymbolizer")
    _css(_el(symbolizer, "Fill"), fill=BAND_COLOUR, fill_opacity=BAND_OPACITY)
    _css(_el(symbolizer, "Stroke"), stroke=BAND_COLOUR, stroke_width=OUTLINE_PX)
    return LayerStyle(layer, name, description, _text(root))


def area_style(layer: str = "target_areas") -> LayerStyle:
    """The target areas: polygons filled in their finding's colour, one rule per finding (``finding``)."""
    name = f"{layer} by finding"
    description = f"geopress: target areas filled in their finding's colour, as in report.html. {CAUTION}"
    root, fts = _document(layer, name, description)
    for finding in FLAGGED_STATUSES:  # the findings that get target areas
        rule = _el(fts, "Rule")
        _el(rule, "Name", finding)
        _el(rule, "Title", f"target area: {finding}")
        _filter_equal(rule, "finding", finding)
        symbolizer = _el(rule, "PolygonSymbolizer")
        _css(_el(symbolizer, "Fill"), fill=STYLES[finding].colour, fill_opacity=AREA_OPACITY)
        _css(_el(symbolizer, "Stroke"), stroke="#000000", stroke_width=OUTLINE_PX)
    return LayerStyle(layer, name, description, _text(root))


def limit_style(layer: str = "band_limits") -> LayerStyle:
    """The band's limit lines, one rule per ``limit`` in the report's colour and dashes."""
    name = f"{layer} by limit"
    description = f"geopress: the elevations where static pressure crosses a limit, as in report.html. {CAUTION}"
    root, fts = _document(layer, name, description)
    for limit, (colour, dashes, label) in LIMIT_STYLE.items():
        rule = _el(fts, "Rule")
        _el(rule, "Name", limit)
        _el(rule, "Title", label)
        _filter_equal(rule, "limit", limit)
        params: dict[str, str | float] = {"stroke": colour, "stroke_width": LINE_PX}
        if DASHES[dashes]:
            params["stroke_dasharray"] = DASHES[dashes]
        _css(_el(_el(rule, "LineSymbolizer"), "Stroke"), **params)
    return LayerStyle(layer, name, description, _text(root))


def layer_styles(layers: Sequence[str]) -> Mapping[str, LayerStyle]:
    """The style of each of ``layers`` (output layer names) that has one, by layer.

    ``customers`` and ``changes`` get a rule for every status; a finding's layer
    (``high_pressure`` ...) its finding's style (:func:`finding_style`).
    """
    out: dict[str, LayerStyle] = {}
    for layer in layers:
        if layer in ("customers", "changes"):
            out[layer] = status_style(layer)
        elif layer in FLAGGED_LAYERS.values():
            out[layer] = finding_style(layer)
        elif layer == "service_band":
            out[layer] = band_style(layer)
        elif layer == "band_limits":
            out[layer] = limit_style(layer)
        elif layer == "target_areas":
            out[layer] = area_style(layer)
    return out
