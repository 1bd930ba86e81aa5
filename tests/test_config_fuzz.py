"""Fuzzing the config loader with TOML text: it returns a Config or raises ConfigError, nothing else.

Three sources of text, all written to a file and read with load_config:
random well-formed TOML documents shaped like a config, random mutations of
a valid config (lines deleted, duplicated, values swapped for other types,
garbage bytes, truncation), and raw bytes.
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from geopress.config import Config, load_config
from geopress.errors import ConfigError

from conftest import BASE_CONFIG

FUZZ = settings(max_examples=int(__import__("os").environ.get("FUZZ_N", 150)), deadline=None, suppress_health_check=[HealthCheck.too_slow])


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("fuzz")


def load_bytes(folder: Path, data: bytes) -> Config | None:
    """load_config on ``data``; None for a ConfigError, which must be one line naming the file."""
    path = folder / "geopress.toml"
    path.write_bytes(data)
    try:
        cfg = load_config(path)
    except ConfigError as exc:
        text = str(exc)
        assert text.startswith(f"{path}: ") and "\n" not in text, text
        return None
    assert isinstance(cfg, Config) and cfg.output.path.suffix.lower() == ".gpkg"
    return cfg


# ---------------------------------------------------------------------------- a small TOML writer

BARE = re.compile(r"[A-Za-z0-9_-]+")


def key(k: str) -> str:
    return k if BARE.fullmatch(k) else json.dumps(k)


def value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf") if math.isinf(v) else repr(v)
    if isinstance(v, int):
        return str(v)
    if isinstance(v, str):
        return json.dumps(v)  # ASCII with \\uXXXX escapes: also a TOML basic string
    if isinstance(v, list):
        return "[" + ", ".join(value(x) for x in v) + "]"
    return "{" + ", ".join(f"{key(k)} = {value(x)}" for k, x in v.items()) + "}"


def document(doc: dict) -> str:
    out = []
    for name, body in doc.items():
        if isinstance(body, dict):
            out.append(f"[{key(name)}]")
            out += [f"{key(k)} = {value(v)}" for k, v in body.items() if not (k == "source" and isinstance(v, list)
                                                                              and v and all(isinstance(x, dict) for x in v))]
            for item in body.get("source", []) if isinstance(body.get("source"), list) else []:
                if isinstance(item, dict):
                    out.append(f"[[{key(name)}.source]]")
                    out += [f"{key(k)} = {value(v)}" for k, v in item.items()]
        else:
            out.insert(0, f"{key(name)} = {value(body)}")
    return "\n".join(out) + "\n"


scalars = st.one_of(
    st.booleans(), st.integers(), st.sampled_from([10**19, -(10**400), 10**400]), st.floats(),
    st.text(max_size=12), st.sampled_from(["", " ", "*.tif", "[", "~/x.gpkg", "out/p.GPKG", "m", "ft", "tank", "\x00"]),
)
values = st.recursive(scalars, lambda inner: st.one_of(st.lists(inner, max_size=3),
                                                      st.dictionaries(st.text(max_size=5), inner, max_size=3)),
                      max_leaves=6)
VALID = {
    "customers": {"path": "customers.gpkg", "layer": "parcels", "id_field": "account", "mail_fields": ["owner"],
                  "floors_field": "floors"},
    "terrain": {"paths": ["dem.tif"], "vertical_units": "m", "method": "bilinear", "memory_mb": 64},
    "zones": {"path": "zones.gpkg", "layer": "zones", "id_field": "zone",
              "source": [{"zone": "West", "kind": "prv", "valve_elevation_ft": 1000.0, "setting_psi": 60.0},
                         {"zone": "East", "kind": "tank", "high_water_ft": 1400.0, "low_water_ft": 1380.0},
                         {"zone": "Hill", "kind": "pump", "discharge_hgl_ft": 1500.0}]},
    "criteria": {"max_static_psi": 80.0, "min_static_psi": 35.0, "psi_per_ft": 0.433, "floor_height_ft": 10.0},
    "output": {"path": "out/pressure.gpkg", "mailing_dir": "out/mailing"},
}


@st.composite
def config_like(draw) -> dict:
    """The valid config with each key kept, dropped or given a random value, plus stray keys."""
    doc: dict = {}
    for section, body in VALID.items():
        if draw(st.integers(0, 9)) == 0:
            continue  # a whole section missing
        new = {}
        for k, v in body.items():
            if k == "source":
                new[k] = [{kk: (vv if draw(st.integers(0, 4)) else draw(values)) for kk, vv in src.items()
                           if draw(st.integers(0, 9))} for src in v if draw(st.integers(0, 5))]
            elif draw(st.integers(0, 9)):
                new[k] = v if draw(st.integers(0, 3)) else draw(values)
        if draw(st.integers(0, 9)) == 0:
            new[draw(st.text(min_size=1, max_size=6))] = draw(values)
        doc[section] = new
    if draw(st.integers(0, 9)) == 0:
        doc[draw(st.text(min_size=1, max_size=6))] = draw(values)
    return doc


@FUZZ
@given(config_like())
def test_well_formed_documents(folder, doc):
    load_bytes(folder, document(doc).encode("utf-8"))


def test_the_valid_document_loads(folder):
    # the generator's starting point must load, or the fuzz above would only ever see errors
    assert load_bytes(folder, document(VALID).encode("utf-8")) is not None


# ---------------------------------------------------------------------------- mutations of a valid config text

LINES = BASE_CONFIG.splitlines(keepends=True)


@st.composite
def mutated(draw) -> bytes:
    lines = list(LINES)
    for _ in range(draw(st.integers(1, 4))):
        i = draw(st.integers(0, len(lines) - 1))
        op = draw(st.sampled_from(["delete", "duplicate", "value", "rename", "garbage"]))
        if op == "delete":
            del lines[i]
        elif op == "duplicate":
            lines.insert(i, lines[i])
        elif op == "value" and "=" in lines[i]:
            lines[i] = lines[i].split("=", 1)[0] + "= " + value(draw(values)) + "\n"
        elif op == "rename" and "=" in lines[i]:
            lines[i] = key(draw(st.text(min_size=1, max_size=8))) + " =" + lines[i].split("=", 1)[1]
        elif op == "garbage":
            lines.insert(i, draw(st.text(max_size=10)) + "\n")
        if not lines:
            break
    data = "".join(lines).encode("utf-8")
    if draw(st.booleans()):
        cut = draw(st.integers(0, len(data)))
        data = data[:cut] + draw(st.binary(max_size=6)) + data[cut + draw(st.integers(0, 4)):]
    return data


@FUZZ
@given(mutated())
def test_mutations_of_a_valid_config(folder, data):
    load_bytes(folder, data)


KEY_LINES = [i for i, line in enumerate(LINES) if "=" in line]


@FUZZ
@given(st.sampled_from(KEY_LINES), values)
def test_one_value_swapped(folder, i, new):
    lines = list(LINES)
    lines[i] = lines[i].split("=", 1)[0] + "= " + value(new) + "\n"
    load_bytes(folder, "".join(lines).encode("utf-8"))


def test_the_unmutated_config_loads(folder):
    assert load_bytes(folder, BASE_CONFIG.encode("utf-8")) is not None


@FUZZ
@given(st.binary(max_size=200))
def test_raw_bytes(folder, data):
    load_bytes(folder, data)


# ---------------------------------------------------------------------------- what test_one_value_swapped found


@pytest.mark.parametrize("line, key_name", [
    ('max_static_psi = 1' + "0" * 400, "criteria.max_static_psi"),  # an integer beyond any float
    ('path = "out/\\u0000.gpkg"', "output.path"),  # a NUL character no file system accepts
])
def test_values_found_by_fuzzing(folder, line, key_name):
    old = "max_static_psi = 80.0" if key_name.startswith("criteria") else 'path = "out/pressure.gpkg"'
    data = BASE_CONFIG.replace(old, line).encode()
    path = folder / "geopress.toml"
    path.write_bytes(data)
    with pytest.raises(ConfigError, match=re.escape(key_name)):
        load_config(path)
