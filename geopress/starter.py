"""A commented starter config from what ``geopress init`` found in a user's own files: pure text building.

:func:`config_text` takes summaries of the inputs (made by
:mod:`geopress.io.starter`, or None for an input not given) and returns the
TOML text. What the files cannot tell (the zones' sources, the DEM's vertical
datum, a unit the raster does not state, anything about an input not given)
is written as a placeholder: a string starting with
:data:`geopress.config.PLACEHOLDER`, which the config loader refuses, naming
each key left (so ``geopress check`` lists exactly what remains to fill in).
Everything else is a valid value or a commented suggestion.
"""

from __future__ import annotations

import re
from dataclasses import asdict, dataclass, field
from typing import Sequence

from .classify import Criteria
from .config import PLACEHOLDER, rule_set_names

#: field names that usually hold an account or meter id, tried first among the unique fields
ID_NAME = re.compile(r"(^|_)(id|account|acct|meter|premise|parcel|pin|apn|number|no)($|_)|id$", re.I)
#: field names that usually make a mailing address
MAIL_NAME = re.compile(r"owner|name|mail|addr|street|city|town|state|zip|postal|post_?code", re.I)
#: field names that usually count stories
FLOORS_NAME = re.compile(r"floor|stor(e)?y|stories|storeys|levels", re.I)


@dataclass(frozen=True)
class Field:
    """A field of a layer and its type in words (``text``, ``integer``, ``real``, ``date``, ...)."""

    name: str
    kind: str


@dataclass(frozen=True)
class VectorSummary:
    """What a vector input holds. ``path`` as the config will name it; ``layers`` every layer there;
    ``considered`` the fields whose values were read to find ``unique`` ones (every value present and
    different); ``distinct`` the number of distinct values of each considered field."""

    path: str
    layer: str
    layers: tuple[str, ...]
    geometry_type: str
    features: int
    crs: str | None
    fields: tuple[Field, ...]
    considered: tuple[str, ...] = ()
    unique: tuple[str, ...] = ()
    distinct: dict[str, int] = field(default_factory=dict)


@dataclass(frozen=True)
class ZoneIds:
    """The zone ids found: the field they come from, whether it was given or guessed, and the ids in the
    order they first appear in the layer."""

    field: str
    given: bool
    ids: tuple[str, ...]


@dataclass(frozen=True)
class RasterSummary:
    """What a raster holds: size in pixels, pixel size in CRS units, CRS, and the vertical unit it states
    ("m", "ft", "us_ft") or None."""

    path: str
    width: int
    height: int
    pixel: tuple[float, float]
    crs: str | None
    vertical_unit: str | None


def toml_string(text: str) -> str:
    """``text`` as a TOML basic string: quotes, backslashes and control characters escaped (TOML 1.0)."""
    out = ['"']
    for ch in text:
        code = ord(ch)
        if ch in '"\\':
            out.append("\\" + ch)
        elif code < 0x20 or code == 0x7F:
            out.append({"\t": "\\t", "\n": "\\n", "\r": "\\r", "\b": "\\b", "\f": "\\f"}.get(ch, f"\\u{code:04X}"))
        else:
            out.append(ch)
    return "".join(out) + '"'


def shown(text: str) -> str:
    """``text`` fit for a TOML comment: control characters (newlines too) escaped as in a string
    (:func:`toml_string`'s own output is fit already)."""
    return toml_string(text)[1:-1]


def _list(items: Sequence[str]) -> str:
    return "[" + ", ".join(toml_string(i) for i in items) + "]"


def placeholder(what: str) -> str:
    """A placeholder value saying what to fill in."""
    return toml_string(f"{PLACEHOLDER}: {what}")


def _fields_comment(summary: VectorSummary) -> str:
    return "# fields (type): " + ", ".join(f"{shown(f.name)} ({shown(f.kind)})" for f in summary.fields) \
        if summary.fields else "# the layer has no fields"


def _layer_lines(summary: VectorSummary, option: str) -> list[str]:
    crs = shown(summary.crs) if summary.crs else "no CRS (assign one before a run)"
    lines = [f"# {shown(summary.path)}: layer {toml_string(summary.layer)}, {summary.features} "
             f"{shown(summary.geometry_type)} features, {crs}"]
    others = [shown(n) for n in summary.layers if n != summary.layer]
    if others:
        lines.append(f"#   other layers there: {', '.join(others)} (pick another with {option})")
    lines += [f"path = {toml_string(summary.path)}", f"layer = {toml_string(summary.layer)}"]
    return lines


def propose_id(summary: VectorSummary) -> str | None:
    """The id field to propose: the first unique field whose name looks like an id, else the first unique."""
    named = [f for f in summary.unique if ID_NAME.search(f)]
    return (named or list(summary.unique) or [None])[0]


def _customers(summary: VectorSummary | None, id_field: str | None) -> list[str]:
    out = ["[customers]"]
    if summary is None:
        return out + [f"path = {placeholder('the customers layer (parcels or meter points), e.g. customers.gpkg')}",
                      f"id_field = {placeholder('the field with a unique id per customer')}"]
    out += _layer_lines(summary, "--customers-layer")
    out.append(_fields_comment(summary))
    chosen = id_field or propose_id(summary)
    if summary.considered:
        unique = ", ".join(map(shown, summary.unique)) or "none"
        out.append(f"# fields with a value for every customer, all different: {unique} "
                   f"(read to find them: {', '.join(map(shown, summary.considered))})")
    if chosen:
        out.append(f"id_field = {toml_string(chosen)}")
    else:
        out.append(f"id_field = {placeholder('no field has a unique value for every customer; name the id field')}")
    names = [f.name for f in summary.fields]
    mail = [n for n in names if MAIL_NAME.search(n) and n != chosen]
    out.append("# the fields that make one mailing address, in the order a letter prints them; e.g.:")
    out.append(f"# mail_fields = {_list(mail or ['owner', 'mail_address', 'mail_city', 'mail_state', 'mail_zip'])}")
    out.append("# fields carried to the mailing lists but not part of the address, e.g. the service address:")
    out.append('# letter_fields = ["service_address"]')
    floors = [f.name for f in summary.fields if FLOORS_NAME.search(f.name) and f.kind == "integer"]
    out.append("# stories above ground (a whole number; empty for one story):")
    out.append(f"# floors_field = {toml_string(floors[0] if floors else 'floors')}")
    return out


def _terrain(rasters: Sequence[RasterSummary]) -> list[str]:
    out = ["[terrain]"]
    if not rasters:
        out += [f"paths = [{placeholder('the DEM rasters, e.g. dem.tif or tiles/*.tif')}]",
                f"vertical_units = {placeholder('the unit of the DEM values: m, ft or us_ft')}"]
    else:
        for r in rasters:
            stated = f"states its vertical unit: {r.vertical_unit}" if r.vertical_unit else "states no vertical unit"
            crs = shown(r.crs) if r.crs else "no CRS (assign one before a run)"
            out.append(f"# {shown(r.path)}: {r.width} x {r.height} px of {r.pixel[0]:g} x {r.pixel[1]:g} CRS units, "
                       f"{crs}; {stated}")
        out.append(f"paths = {_list([r.path for r in rasters])}")
        units = {r.vertical_unit for r in rasters}
        if len(units) == 1 and None not in units:
            out.append(f"vertical_units = {toml_string(units.pop())}  # as the raster states")
        else:
            why = ("the rasters state different units" if len(units - {None}) > 1 else
                   "the raster does not state it" if len(rasters) == 1 else "not stated by every raster")
            out.append(f"vertical_units = {placeholder(f'the unit of the DEM values ({why}): m, ft or us_ft')}")
    out += [
        'method = "bilinear"',
        "# The DEM's vertical datum against the one the tank levels and valve elevations are surveyed on",
        "# (e.g. a DEM on NAVD88, levels on NGVD29): feet to add to every DEM elevation; 0.0 when both are the same.",
        f"datum_offset_ft = {placeholder('feet to add to the DEM to reach the HGL datum (0.0 if the same datum)')}",
    ]
    return out


SOURCE_HELP = [
    "# One [[zones.source]] per zone id; their order breaks ties where zones touch or overlap (first wins).",
    '# kind = "tank": high_water_ft and low_water_ft, the operating levels (operations records or SCADA)',
    '# kind = "prv":  valve_elevation_ft and setting_psi (the valve\'s outlet setting), instead of the two levels',
    '# kind = "pump": discharge_hgl_ft (the booster station\'s discharge HGL), instead of the two levels',
]


def _zones(summary: VectorSummary | None, zones: ZoneIds | None) -> list[str]:
    out = ["[zones]"]
    if summary is None or zones is None:
        out += [f"path = {placeholder('the pressure-zone polygons, e.g. zones.gpkg')}",
                f"id_field = {placeholder('the field naming each zone')}", ""]
        ids: tuple[str, ...] = ()
    else:
        out += _layer_lines(summary, "--zones-layer")
        out.append(_fields_comment(summary))
        how = "given with --zone-field" if zones.given else "guessed: a text field with few distinct values"
        out.append(f"# zone ids from field {toml_string(zones.field)} ({how}; another with --zone-field): "
                   f"{len(zones.ids)} ids")
        out += [f"id_field = {toml_string(zones.field)}", ""]
        ids = zones.ids
    out += SOURCE_HELP
    for zone in ids or (None,):
        out += ["[[zones.source]]",
                f"zone = {toml_string(zone) if zone is not None else placeholder('a zone id')}",
                f"kind = {placeholder('tank, prv or pump')}",
                f"high_water_ft = {placeholder('the tank high water level, ft')}",
                f"low_water_ft = {placeholder('the tank low water level, ft')}",
                ""]
    return out[:-1]


def config_text(customers: VectorSummary | None, rasters: Sequence[RasterSummary], zones: VectorSummary | None,
                zone_ids: ZoneIds | None, *, id_field: str | None = None, output: str = "out") -> str:
    """The starter config for these inputs (None: not given), as TOML text.

    ``id_field`` overrides the proposed customer id; ``output`` is the folder
    for the outputs, relative to the config.
    """
    crit = asdict(Criteria())
    lines = [
        "# geopress configuration, started by `geopress init` from the files named below.",
        f'# Every value marked "{PLACEHOLDER}" must be replaced before a run: `geopress check` names each one left.',
        "# Paths are relative to this file. Elevations are feet (international foot, 0.3048 m), pressures psi.",
        "# geopress gives a static screening estimate; local codes and a licensed engineer decide.",
        "",
        *_customers(customers, id_field),
        "",
        *_terrain(rasters),
        "",
        *_zones(zones, zone_ids),
        "",
        "[criteria]",
        "# the defaults; set the ones your plumbing code and state rules use, or start from a published rule set:",
        f"# rule_set = {toml_string(rule_set_names()[-1])}   # one of {', '.join(rule_set_names())}",
        *[f"{k} = {v!r}" for k, v in crit.items() if v is not None],
        "",
        "[output]",
        f"path = {toml_string(f'{output}/pressure.gpkg')}",
        f"mailing_dir = {toml_string(f'{output}/mailing')}",
        "",
    ]
    return "\n".join(lines)
