"""What-if runs: ``--set KEY=VALUE`` overrides and an output folder, without editing the config.

``VALUE`` is read as a TOML value (``90``, ``1250.5``, ``true``,
``"lots"``, ``["a", "b"]``); text that is not a TOML value is taken as a
string, so ``--set customers.layer=lots`` works unquoted. Keys are dotted
(``criteria.max_static_psi``); ``zones.source.ZONE.key`` addresses the
``[[zones.source]]`` whose zone is ZONE (see
:func:`geopress.config.apply_overrides`).
"""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any, Iterable

from dataclasses import replace

from .config import Config, load_config
from .errors import ConfigError


def parse_assignment(text: str) -> tuple[str, Any]:
    """``"a.b=VALUE"`` -> ``("a.b", value)`` with VALUE parsed as TOML, else kept as text."""
    key, sep, raw = text.partition("=")
    key = key.strip()
    if not sep or not key or any(not part for part in key.split(".")):
        raise ConfigError(f"--set '{text}' must look like KEY=VALUE, e.g. criteria.max_static_psi=90", key="--set")
    raw = raw.strip()
    try:
        value = tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw
    return key, value


def parse_assignments(items: Iterable[str]) -> dict[str, Any]:
    """Every ``--set`` in order; a key given twice keeps its last value."""
    return dict(parse_assignment(item) for item in items)


def load_scenario(config_path: str | Path, assignments: Iterable[str] = (), out_dir: str | Path | None = None, *,
                  replace_outputs: bool = False, writes: bool = True) -> Config:
    """The config at ``config_path`` with ``assignments`` applied and, with ``out_dir``, its outputs moved there.

    ``out_dir`` keeps the file names: ``output.path`` becomes
    ``OUT_DIR/<its file name>`` and ``output.mailing_dir`` becomes
    ``OUT_DIR/<its folder name>``. A what-if (``assignments``) into
    ``out_dir`` compares with the main run's GeoPackage by default
    (``Config.what_if_of``).

    Raises ConfigError for ``assignments`` without ``out_dir`` in a run that
    ``writes``: the what-if would replace the nightly outputs, unless the
    caller says it should (``replace_outputs``).
    """
    overrides = parse_assignments(assignments)
    if writes and overrides and out_dir is None and not replace_outputs:
        raise ConfigError("--set without --out-dir would replace the nightly outputs with a what-if; write it "
                          "elsewhere with --out-dir DIR, or add --replace-outputs if it should replace them",
                          key="--set")
    cfg = load_config(config_path, overrides=overrides)
    if out_dir is None:
        return cfg
    out = Path(out_dir).expanduser().resolve()
    overrides = {
        **overrides,
        "output.path": str(out / cfg.output.path.name),
        "output.mailing_dir": str(out / cfg.output.mailing_dir.name),
    }
    moved = load_config(config_path, overrides=overrides,
                        origins={"output.path": "--out-dir", "output.mailing_dir": "--out-dir"})
    return replace(moved, what_if_of=cfg.output.path) if cfg.what_if else moved
