"""The TOML configuration: parsed with tomllib into frozen, typed objects.

Every error is a :class:`~geopress.errors.ConfigError` that names the file,
the key (``section.key``, or ``zones.source[2].zone`` for the third source)
and, where it can be found, the line. Relative paths are resolved against the
config file's folder. Lengths are feet, pressures psi.

Loose input is normalised here once: paths become absolute, globs in
``terrain.paths`` are expanded (sorted, so the order is stable), vertical
units are checked, and inner code sees one form.
"""

from __future__ import annotations

import glob
import json
import math
import re
import tomllib
from dataclasses import asdict, dataclass, field, fields, is_dataclass, replace
from pathlib import Path
from typing import Any, Mapping

from pyproj import CRS
from pyproj.exceptions import CRSError

from .classify import RESULT_COLUMNS, Criteria
from .targets import TargetCriteria
from .errors import ConfigError
from .fieldcheck import GRADES
from .pressure import VERTICAL_UNITS, PrvSource, PumpSource, Source, TankSource
from .terrain import METHODS
from .units import UNIT_SYSTEMS


@dataclass(frozen=True)
class DatabaseSource:
    """A layer read from PostgreSQL/PostGIS instead of a file: a ``table`` (or view, ``schema.name``) or a
    ``query``, whose ``geometry_column`` holds the geometries (with an SRID).

    ``database`` is a libpq connection string or URI (``service=NAME``, ``host=... dbname=...``,
    ``postgresql://host/db``). It never holds a password (the loader refuses one): libpq takes it from
    PGPASSWORD, ``~/.pgpass`` or the service file.
    """

    database: str
    table: str | None = None
    query: str | None = None
    geometry_column: str = "geom"

    def describe(self) -> str:
        """Where the layer is, for messages and run.json: the server (no password) and the table or query."""
        what = f"table {self.table}" if self.table else "the query"
        return f"{what} of database '{redact_dsn(self.database)}'"


@dataclass(frozen=True)
class CustomersConfig:
    """Where the customers are. ``floors_field`` holds stories above ground.

    ``mail_fields`` make the mailing address, the key a mailing list groups by;
    ``letter_fields`` are carried to the lists too but are not part of that key:
    per address, their distinct values in account order, joined by "; ".
    """

    #: the file, or None when the customers come from ``database``
    path: Path | None
    id_field: str
    layer: str | None = None
    mail_fields: tuple[str, ...] = ()
    floors_field: str | None = None
    letter_fields: tuple[str, ...] = ()
    database: DatabaseSource | None = None


@dataclass(frozen=True)
class TerrainConfig:
    """DEM rasters, first listed wins where they overlap.

    ``vertical_units`` is "m", "ft" or "us_ft", or None to take the unit the
    raster states. ``datum_offset_ft`` is added to every DEM elevation after
    the unit conversion, to put the DEM on the vertical datum of the HGLs
    (e.g. the local NGVD29 - NAVD88 difference): a positive offset raises the
    ground, so pressures fall. ``memory_mb`` bounds how much raster is read at
    once. ``vertical_datum`` (with ``ZonesConfig.vertical_datum``) names the
    DEM's vertical datum as a vertical CRS ("EPSG:5703"), so that the offset
    is computed per location (:mod:`geopress.io.datum`), with the offset grid
    ``datum_grid`` when PROJ does not have it. ``vertical_rmse_ft``: each
    raster's vertical accuracy as an RMSE, ft, one per path in ``paths``
    (after globs are expanded), or None when the config does not state it;
    it sets the DEM's part of every uncertainty (:mod:`geopress.fieldcheck`).
    """

    paths: tuple[Path, ...]
    vertical_units: str | None = None
    method: str = "bilinear"
    memory_mb: float = 1024.0
    datum_offset_ft: float = 0.0
    vertical_datum: str | None = None
    datum_grid: Path | None = None
    vertical_rmse_ft: tuple[float, ...] | None = None

    def rmse_of(self, path: Path) -> float:
        """``path``'s vertical RMSE, ft; NaN when the config states none."""
        if self.vertical_rmse_ft is None:
            return math.nan
        return self.vertical_rmse_ft[self.paths.index(path)]


@dataclass(frozen=True)
class ReadingsConfig:
    """Field readings of static pressure to check the screening against (:mod:`geopress.fieldcheck`).

    A point layer with the measured static pressure, psi (``pressure_field``),
    and optionally a reading id, the date and time, the gauge's height above
    ground, ft, the HGL at the time of the reading, ft, on the HGLs' datum (a
    tank's level from SCADA), and the gauge's accuracy, psi; where a reading
    has no height or accuracy of its own, ``gauge_height_ft`` and the layer's
    gauge accuracy apply (``gauge_accuracy_psi``, or ``gauge_grade`` of a
    gauge with the span ``gauge_span_psi``). Outlier and bias rules are in
    :class:`geopress.fieldcheck.Rules`. ``database`` reads the readings from a
    PostGIS table or query instead of the file at ``path`` (None then).
    """

    path: Path | None
    pressure_field: str
    layer: str | None = None
    id_field: str | None = None
    time_field: str | None = None
    gauge_height_field: str | None = None
    hgl_field: str | None = None
    accuracy_field: str | None = None
    gauge_height_ft: float = 0.0
    gauge_accuracy_psi: float | None = None
    gauge_grade: str | None = None
    gauge_span_psi: float | None = None
    outlier_psi: float = 5.0
    outlier_sigmas: float = 2.0
    bias_psi: float = 1.0
    min_readings: int = 3
    database: DatabaseSource | None = None

    def fields(self) -> dict[str, str]:
        """The layer's fields the config names, by key (``readings.pressure_field`` ...)."""
        named = {"pressure_field": self.pressure_field, "id_field": self.id_field, "time_field": self.time_field,
                 "gauge_height_field": self.gauge_height_field, "hgl_field": self.hgl_field,
                 "accuracy_field": self.accuracy_field}
        return {f"readings.{k}": v for k, v in named.items() if v is not None}


@dataclass(frozen=True)
class ZonesConfig:
    """Pressure-zone polygons and one HGL source per zone id, in priority order.

    ``vertical_datum``: the vertical CRS the HGLs (tank levels, valve elevations,
    discharge HGLs) are on, or None (then the DEM's, shifted by
    ``TerrainConfig.datum_offset_ft``).
    """

    #: the file, or None when the zones come from ``database``
    path: Path | None
    id_field: str
    sources: tuple[Source, ...]
    layer: str | None = None
    vertical_datum: str | None = None
    database: DatabaseSource | None = None

    def source_for(self, zone: str) -> Source | None:
        """The source of ``zone``, or None."""
        for s in self.sources:
            if s.zone == zone:
                return s
        return None

    def inlet_hgl(self, src: PrvSource, psi_per_ft: float) -> tuple[float, float] | None:
        """(high, low) HGL, ft, that a PRV's inlet can supply: its ``inlet_hgl_ft`` both, or the HGL range of
        its ``inlet_zone``'s source; None when the PRV gives no inlet."""
        if src.inlet_hgl_ft is not None:
            return (src.inlet_hgl_ft, src.inlet_hgl_ft)
        upstream = None if src.inlet_zone is None else self.source_for(src.inlet_zone)
        return None if upstream is None else upstream.hgl_range(psi_per_ft)


@dataclass(frozen=True)
class OutputConfig:
    """Output GeoPackage path and the folder for the mailing lists.

    ``units`` ("us": ft, psi; "si": m, kPa) applies to the report and the
    mailing lists; the GeoPackage keeps ft and psi. ``report`` writes
    report.html beside the GeoPackage. ``xlsx`` writes an .xlsx copy beside
    each mailing list's CSV. ``max_drop_percent``: a run whose customers
    dropped by more than this share of the baseline's is refused (an export
    cut short). ``child_timeout_s``: the longest a run waits for its child
    process's job (the service band, writing the GeoPackage). ``database`` and ``schema``
    publish the same layers into that schema of a PostgreSQL/PostGIS database too
    (:mod:`geopress.io.postgis`), atomically; None: the GeoPackage only. ``geopackage = False``
    (with a database) publishes into the database instead of writing the GeoPackage; ``path``
    still says where run.json, the report and the lock go.
    ``mail_firm_only``: the mailing lists hold only the firm flags
    (:mod:`geopress.confidence`); the borderline ones are on the
    field-verification list only.
    """

    path: Path
    mailing_dir: Path
    units: str = "us"
    report: bool = True
    xlsx: bool = True
    max_drop_percent: float = 20.0
    child_timeout_s: float = 3600.0
    database: str | None = None
    schema: str | None = None
    geopackage: bool = True
    mail_firm_only: bool = False


@dataclass(frozen=True)
class OperatorConfig:
    """Steps an operator can set, and the tolerance of the robust range (see :mod:`geopress.besthgl`).

    ``tank_step_ft``: ft of tank level (counted from the tank's ``bottom_ft``
    when given, else from 0 ft); ``prv_step_psi``: psi of PRV setting;
    ``pump_step_ft``: ft of a booster's discharge HGL. The robust range may
    flag ``robust_percent`` % of the zone's customers (rounded down) or
    ``robust_customers``, whichever is larger, above the minimum.
    """

    tank_step_ft: float = 1.0
    prv_step_psi: float = 1.0
    pump_step_ft: float = 2.0
    robust_percent: float = 1.0
    robust_customers: int = 5


@dataclass(frozen=True)
class Config:
    """A whole, validated configuration."""

    customers: CustomersConfig
    terrain: TerrainConfig
    zones: ZonesConfig
    criteria: Criteria
    output: OutputConfig
    operator: OperatorConfig = field(default_factory=OperatorConfig)
    #: how target areas are formed (the optional ``[targets]`` section)
    targets: TargetCriteria = TargetCriteria()
    readings: ReadingsConfig | None = None
    source_path: Path | None = field(default=None, compare=False)
    #: the dotted-key overrides applied on top of the file (what-if runs), in the order given.
    overrides: tuple[tuple[str, Any], ...] = field(default=(), compare=False)
    #: for a what-if run into another folder: the main run's GeoPackage, its baseline by default
    what_if_of: Path | None = field(default=None, compare=False)

    @property
    def what_if(self) -> bool:
        """Whether the config has overrides beyond where the outputs go (``--set``, not only ``--out-dir``)."""
        return any(key not in OUTPUT_KEYS for key, _ in self.overrides)

    def input_paths(self) -> list[Path]:
        """Every input file the run reads, with the files a Shapefile's attributes, index and CRS are in."""
        grid = [self.terrain.datum_grid] if self.terrain.datum_grid else []

        def files(path: Path | None) -> list[Path]:  # none for a layer read from a database
            return [] if path is None else with_sidecars(path)

        readings = files(self.readings.path) if self.readings else []
        return [*files(self.customers.path), *self.terrain.paths, *grid, *files(self.zones.path), *readings]

    def to_dict(self) -> dict[str, Any]:
        """The resolved config as plain TOML-like data (paths as strings)."""
        return {
            "customers": _layer_dict(self.customers),
            "terrain": _plain(self.terrain),
            "zones": {
                **_layer_dict(self.zones, ("path", "layer", "id_field")),
                "source": [{k: v for k, v in _plain(s).items() if v is not None} for s in self.zones.sources],
            },
            "criteria": _plain(self.criteria),
            "output": _plain(self.output),
            "operator": _plain(self.operator),
            "targets": _plain(self.targets),
            **({"readings": _layer_dict(self.readings)} if self.readings else {}),
        }


#: the keys of a [customers] or [zones] section that read it from a database (DatabaseSource)
DATABASE_KEYS = ("database", "table", "query", "geometry_column")
#: the longest output.schema: PostgreSQL cuts a longer identifier to 63 bytes without a word (NAMEDATALEN - 1)
MAX_SCHEMA_BYTES = 63

#: above this a value of terrain.vertical_rmse_ft is not a DEM's RMSE in ft (the coarsest 3DEP products are
#: a few ft; 100 ft is a value in cm or inches, or a typo)
MAX_PLAUSIBLE_RMSE_FT = 100.0
#: the shipped rule sets: TOML files of criteria values, each citing its source
RULE_SETS = Path(__file__).parent / "rule_sets"
#: the criteria keys of the storage levels (geopress.storage), each off unless set
STORAGE_MINIMUMS = ("peak_hour_min_psi", "fire_min_psi", "standby_min_psi")


def rule_set_key(text: str) -> str:
    """A rule set's name as its file is named: lower case, every run of other characters one hyphen."""
    return re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")


def rule_set_names() -> list[str]:
    """The shipped rule sets' names."""
    return sorted(p.stem for p in RULE_SETS.glob("*.toml"))


#: the keys an --out-dir sets
OUTPUT_KEYS = ("output.path", "output.mailing_dir")
#: the files of a Shapefile besides the .shp, as GDAL reads them (attributes, index, CRS, encoding, spatial index)
SHAPEFILE_PARTS = (".shx", ".dbf", ".prj", ".cpg", ".qix", ".sbn", ".sbx")


def with_sidecars(path: Path) -> list[Path]:
    """``path`` and, for a Shapefile, every other file of it that exists (any case of the suffix)."""
    if path.suffix.lower() != ".shp":
        return [path]
    folder = path.parent
    names = {p.name.lower(): p for p in folder.glob(f"{glob.escape(path.stem)}.*")} if folder.is_dir() else {}
    parts = [names[f"{path.stem}{ext}".lower()] for ext in SHAPEFILE_PARTS if f"{path.stem}{ext}".lower() in names]
    return [path, *parts]


#: short names for the vertical datums utilities meet most, as PROJ's database codes them
#: (EPSG:5703 "NAVD88 height"; EPSG:7968 "NGVD29 height (m)"). Any other vertical CRS is
#: given by its code, name or WKT.
DATUM_NAMES: dict[str, str] = {"NAVD88": "EPSG:5703", "NGVD29": "EPSG:7968"}


def _layer_dict(cfg: CustomersConfig | ZonesConfig | ReadingsConfig, names: tuple[str, ...] | None = None
                ) -> dict[str, Any]:
    """A layer's section as the TOML has it: ``names`` (default every field), the database's keys flat in it."""
    out = {f.name: _plain(getattr(cfg, f.name)) for f in fields(cfg)
           if f.name != "database" and (names is None or f.name in names)}
    if cfg.database is not None:
        out.update(_plain(cfg.database))
    return out


#: a password in a libpq key/value connection string, in a URI's user info or in its parameters
_PASSWORD_KV = re.compile(r"(?i)(\bpassword\s*=\s*)('(?:[^'\\]|\\.)*'|[^\s&]*)")
_PASSWORD_URI = re.compile(r"(?i)^(postgres(?:ql)?://[^:@/?]*):([^@/?]*)@")


def dsn_password(dsn: str) -> bool:
    """Whether the libpq connection string or URI ``dsn`` holds a password."""
    return bool(_PASSWORD_KV.search(dsn) or _PASSWORD_URI.search(dsn))


def redact_dsn(dsn: str) -> str:
    """``dsn`` with any password replaced by ``***``: the only form of a connection string geopress shows."""
    return _PASSWORD_URI.sub(r"\1:***@", _PASSWORD_KV.sub(r"\1***", dsn))


def _plain(obj: Any) -> Any:
    if is_dataclass(obj):
        return {f.name: _plain(getattr(obj, f.name)) for f in fields(obj)}
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    return obj


# --------------------------------------------------------------------------
# loading


def load_config(path: str | Path, overrides: Mapping[str, Any] | None = None,
                origins: Mapping[str, str] | None = None) -> Config:
    """Read and validate a config file.

    ``overrides`` maps dotted keys to values applied before validation, e.g.
    ``{"criteria.max_static_psi": 90}``. An error in an overridden value names
    where it came from, not a line of the file: ``origins`` maps a key to that
    (e.g. ``"--out-dir"``), by default ``--set KEY``.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")  # a byte-order mark from a Windows editor is not an error
    except FileNotFoundError:
        raise ConfigError("config file not found; check the path", path=path) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"cannot read config file ({exc}); check its permissions and encoding", path=path) from exc
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"TOML syntax error: {exc}; fix the file", path=path) from exc
    return config_from_dict(data, base_dir=path.resolve().parent, source_path=path, text=text, overrides=overrides,
                            origins=origins)


def config_from_dict(
    data: Mapping[str, Any],
    *,
    base_dir: str | Path = ".",
    source_path: str | Path | None = None,
    text: str | None = None,
    overrides: Mapping[str, Any] | None = None,
    origins: Mapping[str, str] | None = None,
) -> Config:
    """Validate already-parsed TOML data. ``text``, when given, lets errors name lines;
    ``overrides`` and ``origins`` as in :func:`load_config`."""
    reader = _Reader(Path(base_dir), None if source_path is None else Path(source_path), text)
    data = dict(data)
    if overrides:
        data = apply_overrides(data, overrides, reader, origins)
    left = placeholders(data)
    if left:
        where = []
        for key in left:
            line = reader.line_of(key)
            where.append(f"{key} (line {line})" if line else key)
        raise ConfigError(f"{len(left)} {'value is' if len(left) == 1 else 'values are'} still a placeholder: "
                          f"{', '.join(where)}; replace each \"{PLACEHOLDER} ...\" with the real value (the comment "
                          "above it says what)", path=reader.source_path, key=left[0])
    cfg = reader.build(data)
    return replace(cfg, overrides=tuple((str(k), v) for k, v in (overrides or {}).items()))


def apply_overrides(data: Mapping[str, Any], overrides: Mapping[str, Any], reader: "_Reader | None" = None,
                    origins: Mapping[str, str] | None = None) -> dict[str, Any]:
    """Return a copy of ``data`` with dotted-key overrides applied.

    ``zones.source.NAME.key`` addresses the source whose ``zone`` is NAME.
    With a ``reader``, each overridden key is recorded with its origin
    (``origins[key]``, else ``--set KEY``), so errors about it name that.
    """
    import copy

    out = copy.deepcopy(dict(data))
    for dotted, value in overrides.items():
        parts = dotted.split(".")
        if len(parts) >= 3 and parts[0] == "zones" and parts[1] == "source":
            if len(parts) != 4:
                raise ConfigError(f"override '{dotted}' must be zones.source.ZONE.key", key=dotted)
            sources = out.get("zones", {}).get("source", [])
            match = [s for s in sources if isinstance(s, dict) and s.get("zone") == parts[2]]
            if not match:
                raise ConfigError(f"override '{dotted}': no [[zones.source]] with zone = '{parts[2]}'", key=dotted)
            match[0][parts[3]] = value
            if reader is not None:
                reader.overridden[f"zones.source[{sources.index(match[0])}].{parts[3]}"] = _origin(dotted, origins)
            continue
        node = out
        for p in parts[:-1]:
            nxt = node.setdefault(p, {})
            if not isinstance(nxt, dict):
                raise ConfigError(f"override '{dotted}': '{p}' is not a table", key=dotted)
            node = nxt
        node[parts[-1]] = value
        if reader is not None:
            reader.overridden[dotted] = _origin(dotted, origins)
    return out


def _origin(key: str, origins: Mapping[str, str] | None) -> str:
    return (origins or {}).get(key, f"--set {key}")
#: how a value that ``geopress init`` could not know starts: the loader refuses it, naming each key left
PLACEHOLDER = "FILL IN"


def placeholders(data: Mapping[str, Any], prefix: str = "") -> list[str]:
    """The dotted keys (``zones.source[0].kind``, ``terrain.paths[0]``) whose value is still a placeholder."""
    found: list[str] = []
    for name, value in data.items():
        key = f"{prefix}.{name}" if prefix else str(name)
        items = value if isinstance(value, list) else [value]
        for i, item in enumerate(items):
            where = f"{key}[{i}]" if isinstance(value, list) else key
            if isinstance(item, dict):
                found += placeholders(item, where)
            elif isinstance(item, str) and item.startswith(PLACEHOLDER):
                found.append(where)
    return found


_GLOB_CHARS = re.compile(r"[*?\[]")
_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


def _float_or_inf(value: int | float) -> float:
    """``value`` as a float; inf for an integer too large for one (TOML integers are unbounded in tomllib)."""
    try:
        return float(value)
    except OverflowError:
        return math.inf


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


class _Reader:
    """Validates sections key by key; knows the file and text to name lines."""

    def __init__(self, base_dir: Path, source_path: Path | None, text: str | None):
        #: keys whose value came from an override, with where it came from ("--set criteria.x")
        self.overridden: dict[str, str] = {}
        self.base_dir = base_dir
        self.source_path = source_path
        self.lines = text.splitlines() if text is not None else None

    # -- error helpers -------------------------------------------------
    def line_of(self, key: str) -> int | None:
        """Best-effort 1-based line of a dotted key such as ``zones.source[1].kind``."""
        if self.lines is None:
            return None
        m = re.fullmatch(r"(.+?)\[(\d+)\]\.(.+)", key)
        if m:
            header, nth, leaf = m.group(1), int(m.group(2)), m.group(3)
            pattern = re.compile(r"^\s*\[\[\s*" + re.escape(header) + r"\s*\]\]")
        else:
            header, _, leaf = key.rpartition(".")
            nth = 0
            pattern = re.compile(r"^\s*\[\s*" + re.escape(header) + r"\s*\]") if header else None
        start = 0
        if pattern is not None:
            hits = [i for i, line in enumerate(self.lines) if pattern.match(line)]
            if len(hits) <= nth:
                return None
            start = hits[nth]
            if leaf == "":
                return start + 1
        key_re = re.compile(r"^\s*" + re.escape(re.sub(r"\[\d+\]$", "", leaf)) + r"\s*=")  # a list's item: its key
        for i in range(start + (1 if pattern is not None else 0), len(self.lines)):
            if i > start and self.lines[i].lstrip().startswith("["):
                break
            if key_re.match(self.lines[i]):
                return i + 1
        if pattern is None:  # a top-level name may be a table: [name], [name.sub] or [[name]]
            table_re = re.compile(r"^\s*\[\[?\s*" + re.escape(leaf) + r"\s*[\].]")
            return next((i + 1 for i, line in enumerate(self.lines) if table_re.match(line)), None)
        return start + 1

    def error(self, key: str, message: str) -> ConfigError:
        if key in self.overridden:
            where = f" (from {self.overridden[key]})"
        else:
            line = self.line_of(key)
            where = f" (line {line})" if line else ""
        return ConfigError(f"{key}{where}: {message}", path=self.source_path, key=key)

    # -- typed getters ---------------------------------------------------
    def table(self, data: Mapping[str, Any], key: str, *, required: bool = True) -> dict[str, Any]:
        value = data.get(key.rpartition(".")[2])
        if value is None:
            if required:
                raise self.error(key, "missing required table; add it")
            return {}
        if not isinstance(value, dict):
            raise self.error(key, "must be a table")
        return value

    def get(self, table: Mapping[str, Any], section: str, name: str, kind: str, default: Any = ..., ) -> Any:
        key = f"{section}.{name}"
        if table.get(name) is None:  # TOML has no null: None comes only from Config.to_dict, for a key not set
            if default is ...:
                raise self.error(key, "missing required key; add it")
            return default
        value = table[name]
        if kind == "str":
            if not isinstance(value, str) or not value.strip():
                raise self.error(key, f"must be a non-empty string, not {value!r}")
            return value
        if kind == "number":
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(_float_or_inf(value)):
                raise self.error(key, f"must be a finite number, not {_short(value)}")
            return float(value)
        if kind == "str_list":
            if isinstance(value, str):
                value = [value]
            if not isinstance(value, list) or not all(isinstance(v, str) and v.strip() for v in value):
                raise self.error(key, f"must be a list of strings, not {value!r}")
            return tuple(value)
        raise AssertionError(kind)

    def no_unknown(self, table: Mapping[str, Any], section: str, allowed: set[str]) -> None:
        for name in table:
            if name not in allowed:
                shown = name if _BARE_KEY.fullmatch(name) else json.dumps(name)  # as TOML would quote it
                key = f"{section}.{shown}" if section else shown
                raise self.error(key, f"unknown key; allowed keys are {', '.join(sorted(allowed))}")

    def path(self, value: str, key: str) -> Path:
        if "\x00" in value:
            raise self.error(key, "contains a NUL character, which no file name can; fix the path")
        try:
            p = Path(value).expanduser()
            return (p if p.is_absolute() else self.base_dir / p).resolve()
        except (RuntimeError, ValueError, OSError) as exc:  # unknown ~user, NUL byte, symlink loop
            raise self.error(key, f"is not a usable path ({exc}); fix it") from exc

    # -- sections ----------------------------------------------------------
    def build(self, data: dict[str, Any]) -> Config:
        self.no_unknown(data, "", {"customers", "terrain", "zones", "criteria", "output", "operator", "targets",
                                   "readings"})
        cfg = Config(
            customers=self.customers(self.table(data, "customers")),
            terrain=self.terrain(self.table(data, "terrain")),
            zones=self.zones(self.table(data, "zones")),
            criteria=self.criteria(self.table(data, "criteria", required=False)),
            output=self.output(self.table(data, "output")),
            operator=self.operator(self.table(data, "operator", required=False)),
            targets=self.targets(self.table(data, "targets", required=False)),
            readings=self.readings(self.table(data, "readings", required=False)) if "readings" in data else None,
            source_path=self.source_path,
        )
        inputs = {p: name for name, p in [("customers.path", cfg.customers.path), ("zones.path", cfg.zones.path)]}
        inputs.update({p: "terrain.paths" for p in cfg.terrain.paths})
        if cfg.readings is not None and cfg.readings.path is not None:
            inputs[cfg.readings.path] = "readings.path"
        if cfg.source_path is not None:
            inputs[Path(cfg.source_path).resolve()] = "the config file"
        for out_key, out_path in (("output.path", cfg.output.path),):
            if out_path in inputs:
                raise self.error(out_key, f"is the same file as {inputs[out_path]}; write the output elsewhere")
        if cfg.output.mailing_dir in inputs:
            raise self.error("output.mailing_dir", f"is the same path as {inputs[cfg.output.mailing_dir]}")
        self.datums_fit(cfg.terrain, cfg.zones)
        self.inlets_supply(cfg.zones, cfg.criteria.psi_per_ft)
        return cfg

    def datums_fit(self, terrain: TerrainConfig, zones: ZonesConfig) -> None:
        """The datum keys go together: both vertical datums or neither; a grid only with them; no constant offset too."""
        if (terrain.vertical_datum is None) != (zones.vertical_datum is None):
            given, missing = (("terrain", "zones") if zones.vertical_datum is None else ("zones", "terrain"))
            raise self.error(f"{given}.vertical_datum", f"is set but {missing}.vertical_datum is not; name the datum of "
                                                        "both the DEM and the HGLs, or neither")
        if terrain.vertical_datum is None and terrain.datum_grid is not None:
            raise self.error("terrain.datum_grid", "needs terrain.vertical_datum and zones.vertical_datum, which say "
                                                   "which way the grid's offsets go; add them")
        if terrain.vertical_datum is not None and terrain.datum_offset_ft != 0:
            raise self.error("terrain.datum_offset_ft", "cannot be used with terrain.vertical_datum and "
                                                        "zones.vertical_datum, which compute the offset; keep one way")

    def customers(self, t: dict[str, Any]) -> CustomersConfig:
        s = "customers"
        self.no_unknown(t, s, {"path", "layer", "id_field", "mail_fields", "floors_field", "letter_fields",
                               *DATABASE_KEYS})
        database = self.database_source(t, s)
        cfg = CustomersConfig(
            path=None if database else self.path(self.get(t, s, "path", "str"), "customers.path"),
            database=database,
            layer=self.get(t, s, "layer", "str", None),
            id_field=self.get(t, s, "id_field", "str"),
            mail_fields=self.get(t, s, "mail_fields", "str_list", ()),
            floors_field=self.get(t, s, "floors_field", "str", None),
            letter_fields=self.get(t, s, "letter_fields", "str_list", ()),
        )
        named = [("customers.id_field", cfg.id_field), ("customers.floors_field", cfg.floors_field)]
        named += [(f"customers.mail_fields[{i}]", f) for i, f in enumerate(cfg.mail_fields)]
        named += [(f"customers.letter_fields[{i}]", f) for i, f in enumerate(cfg.letter_fields)]
        for key, name in named:
            if name in RESULT_COLUMNS:
                raise self.error(key, f"field {name!r} has the name of a result column "
                                      f"({', '.join(RESULT_COLUMNS)}); rename it in the layer")
        listed = {cfg.id_field: "customers.id_field (the lists show it as accounts)",
                  **{f: "customers.mail_fields, the mailing key" for f in cfg.mail_fields}}
        seen: set[str] = set()
        for i, name in enumerate(cfg.letter_fields):
            if name in listed:
                raise self.error(f"customers.letter_fields[{i}]", f"field {name!r} is already in {listed[name]}; "
                                                                  "remove it from letter_fields")
            if name in seen:
                raise self.error(f"customers.letter_fields[{i}]", f"field {name!r} is listed twice; keep one")
            seen.add(name)
        return cfg

    def terrain(self, t: dict[str, Any]) -> TerrainConfig:
        s = "terrain"
        self.no_unknown(t, s, {"paths", "vertical_units", "method", "memory_mb", "datum_offset_ft", "vertical_datum",
                               "datum_grid", "vertical_rmse_ft"})
        raw = self.get(t, s, "paths", "str_list")
        if not raw:
            raise self.error("terrain.paths", "must list at least one raster")
        rmse_each = self.rmse(t, len(raw))
        paths: list[Path] = []
        rmse: dict[Path, float] = {}
        for item, item_rmse in zip(raw, rmse_each or [math.nan] * len(raw)):
            p = self.path(item, "terrain.paths")
            if _GLOB_CHARS.search(item):
                hits = sorted(Path(h) for h in glob.glob(str(p)))
                if not hits:
                    raise self.error("terrain.paths", f"the pattern {item!r} matches no file")
            else:
                hits = [p]
            paths.extend(hits)
            for h in hits:
                rmse.setdefault(h, item_rmse)  # a raster listed twice: its first entry, as for the ground
        units = self.get(t, s, "vertical_units", "str", None)
        if units is not None and units not in VERTICAL_UNITS:
            raise self.error("terrain.vertical_units", f"must be one of {', '.join(VERTICAL_UNITS)}, not {units!r}")
        method = self.get(t, s, "method", "str", "bilinear")
        if method not in METHODS:
            raise self.error("terrain.method", f"must be one of {', '.join(METHODS)}, not {method!r}")
        memory_mb = self.get(t, s, "memory_mb", "number", 1024.0)
        if memory_mb <= 0:
            raise self.error("terrain.memory_mb", "must be positive")
        offset = self.get(t, s, "datum_offset_ft", "number", 0.0)
        datum = self.vertical_datum(t, s)
        grid = self.get(t, s, "datum_grid", "str", None)
        unique = tuple(dict.fromkeys(paths))
        return TerrainConfig(paths=unique, vertical_units=units, method=method, memory_mb=memory_mb,
                             datum_offset_ft=offset, vertical_datum=datum,
                             datum_grid=None if grid is None else self.path(grid, "terrain.datum_grid"),
                             vertical_rmse_ft=None if rmse_each is None else tuple(rmse[p] for p in unique))

    def rmse(self, t: dict[str, Any], n_paths: int) -> list[float] | None:
        """``terrain.vertical_rmse_ft``: one number for every raster, or one per entry of ``terrain.paths``
        (a glob's entry for every file it matches); None when not given."""
        key = "terrain.vertical_rmse_ft"
        value = t.get("vertical_rmse_ft")
        if value is None:
            return None
        items = value if isinstance(value, list) else [value] * n_paths
        if isinstance(value, list) and len(value) != n_paths:
            raise self.error(key, f"lists {len(value)} values for {n_paths} entries of terrain.paths; give one per "
                                  "entry, or one number for all")
        out = []
        for v in items:
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(_float_or_inf(v)) or v < 0:
                raise self.error(key, f"must be a non-negative number of ft (or a list of them), not {_short(v)}")
            out.append(float(v))
        if any(v > MAX_PLAUSIBLE_RMSE_FT for v in out):
            raise self.error(key, f"{max(out):g} ft is not a DEM's vertical RMSE (3DEP 1/3 arc-second is about "
                                  f"2.7 ft); give it in ft, not cm or inches")
        return out

    def vertical_datum(self, t: dict[str, Any], section: str) -> str | None:
        """``section.vertical_datum`` as a vertical CRS ("EPSG:5703", or WKT when it has no code), or None."""
        key = f"{section}.vertical_datum"
        text = self.get(t, section, "vertical_datum", "str", None)
        if text is None:
            return None
        try:
            crs = CRS.from_user_input(DATUM_NAMES.get(text.strip().upper(), text))
        except CRSError:
            raise self.error(key, f"{text!r} is not a datum PROJ knows; give the EPSG code of a vertical CRS "
                                  f"(e.g. EPSG:5703) or one of {', '.join(DATUM_NAMES)}") from None
        if not crs.is_vertical:
            raise self.error(key, f"{text!r} is {crs.name}, not a vertical datum; give a vertical CRS such as "
                                  "EPSG:5703 (NAVD88 height)")
        code = crs.to_authority()
        return f"{code[0]}:{code[1]}" if code else crs.to_wkt()

    def database_source(self, t: dict[str, Any], s: str) -> DatabaseSource | None:
        """The section's database keys as a :class:`DatabaseSource`, or None when it names a file."""
        given = {name: self.get(t, s, name, "str", None) for name in DATABASE_KEYS}
        if given["database"] is None:
            for name, value in given.items():
                if value is not None:
                    raise self.error(f"{s}.{name}", f"needs {s}.database, the connection to read from; add it or "
                                                    "remove this key")
            return None
        for name in ("path", "layer"):
            if t.get(name) is not None:
                hint = "name the table with table = \"schema.name\"" if name == "layer" else "keep one"
                raise self.error(f"{s}.{name}", f"is for a file and cannot be used with {s}.database; {hint}")
        self.no_password(f"{s}.database", given["database"])
        if (given["table"] is None) == (given["query"] is None):
            raise self.error(f"{s}.table", f"give one of {s}.table (a table or view) or {s}.query (a SELECT)")
        return DatabaseSource(database=given["database"], table=given["table"], query=given["query"],
                              geometry_column=given["geometry_column"] or "geom")

    def no_password(self, key: str, dsn: str) -> None:
        if dsn_password(dsn):
            raise self.error(key, "holds a password, which a config file must not; remove it and give it to libpq "
                                  "in ~/.pgpass, a service file (PGSERVICEFILE) or PGPASSWORD")

    def zones(self, t: dict[str, Any]) -> ZonesConfig:
        s = "zones"
        self.no_unknown(t, s, {"path", "layer", "id_field", "source", "vertical_datum", *DATABASE_KEYS})
        database = self.database_source(t, s)
        raw = t.get("source")
        if raw is None:
            raise self.error("zones.source", "missing; add one [[zones.source]] table per zone")
        if not isinstance(raw, list) or not all(isinstance(x, dict) for x in raw):
            raise self.error("zones.source", "must be an array of tables ([[zones.source]])")
        sources: list[Source] = []
        seen: dict[str, int] = {}
        for i, item in enumerate(raw):
            src = self.source(item, i)
            if src.zone in seen:
                raise self.error(
                    f"zones.source[{i}].zone",
                    f"zone '{src.zone}' already has a source (zones.source[{seen[src.zone]}]); keep one",
                )
            seen[src.zone] = i
            sources.append(src)
        return ZonesConfig(
            path=None if database else self.path(self.get(t, s, "path", "str"), "zones.path"),
            database=database,
            layer=self.get(t, s, "layer", "str", None),
            id_field=self.get(t, s, "id_field", "str"),
            sources=tuple(sources),
            vertical_datum=self.vertical_datum(t, s),
        )

    _KIND_KEYS = {
        "tank": ("high_water_ft", "low_water_ft"),
        "prv": ("valve_elevation_ft", "setting_psi"),
        "pump": ("discharge_hgl_ft",),
    }
    #: optional numeric keys per kind, ft (``inlet_zone`` of a prv is text)
    _OPTIONAL_KEYS = {
        "tank": ("overflow_ft", "bottom_ft", "fire_bottom_ft", "standby_bottom_ft"),
        "prv": ("inlet_hgl_ft",),
        "pump": ("no_demand_hgl_ft", "shutoff_hgl_ft"),
    }
    #: per kind, (lower, upper, the key an error names, why): the levels that must not cross, where both are given
    _ORDER = {
        "tank": (
            ("low_water_ft", "high_water_ft", "low_water_ft", "swap them"),
            ("high_water_ft", "overflow_ft", "overflow_ft", "a tank holds no water above its overflow: fix one of them"),
            ("bottom_ft", "low_water_ft", "bottom_ft", "a tank holds no water below its bottom: fix one of them"),
            ("fire_bottom_ft", "low_water_ft", "fire_bottom_ft", "fire storage lies below the equalizing storage: fix one of them"),
            ("standby_bottom_ft", "low_water_ft", "standby_bottom_ft",
             "standby storage lies below the equalizing storage: fix one of them"),
            ("bottom_ft", "fire_bottom_ft", "fire_bottom_ft", "a tank holds no water below its bottom: fix one of them"),
            ("bottom_ft", "standby_bottom_ft", "standby_bottom_ft", "a tank holds no water below its bottom: fix one of them"),
        ),
        "pump": (
            ("discharge_hgl_ft", "no_demand_hgl_ft", "no_demand_hgl_ft",
             "a closed zone rises above the discharge HGL at no demand, not below it: fix one of them"),
            ("no_demand_hgl_ft", "shutoff_hgl_ft", "no_demand_hgl_ft", "the pump makes no HGL above its shutoff: fix one of them"),
            ("discharge_hgl_ft", "shutoff_hgl_ft", "discharge_hgl_ft", "the pump makes no HGL above its shutoff: fix one of them"),
        ),
    }

    def source(self, t: dict[str, Any], i: int) -> Source:
        s = f"zones.source[{i}]"
        zone = self.get(t, s, "zone", "str")
        kind = self.get(t, s, "kind", "str")
        if kind not in self._KIND_KEYS:
            raise self.error(f"{s}.kind", f"must be one of {', '.join(self._KIND_KEYS)}, not {kind!r}")
        keys = self._KIND_KEYS[kind]
        optional = self._OPTIONAL_KEYS[kind]
        self.no_unknown(t, s, {"zone", "kind", *keys, *optional, *(("inlet_zone",) if kind == "prv" else ()),
                               "hgl_uncertainty_ft"})
        v = {k: self.get(t, s, k, "number") for k in keys}
        v.update({k: self.get(t, s, k, "number", None) for k in optional})
        v["hgl_uncertainty_ft"] = self.get(t, s, "hgl_uncertainty_ft", "number", 0.0)
        if v["hgl_uncertainty_ft"] < 0:
            raise self.error(f"{s}.hgl_uncertainty_ft", "must not be negative")
        for lower, upper, key, why in self._ORDER.get(kind, ()):
            if v[lower] is not None and v[upper] is not None and v[lower] > v[upper]:
                raise self.error(f"{s}.{key}", f"{lower} {v[lower]:g} ft is above {upper} {v[upper]:g} ft; {why}")
        if kind == "tank":
            return TankSource(zone=zone, **v)
        if kind == "prv":
            if v["setting_psi"] <= 0:
                raise self.error(f"{s}.setting_psi", "must be positive")
            v["inlet_zone"] = self.get(t, s, "inlet_zone", "str", None)
            if v["inlet_zone"] is not None and v["inlet_hgl_ft"] is not None:
                raise self.error(f"{s}.inlet_zone", "and inlet_hgl_ft both give the valve's inlet; keep one")
            if v["inlet_zone"] == zone:
                raise self.error(f"{s}.inlet_zone", f"is the valve's own zone '{zone}'; name the zone upstream")
            return PrvSource(zone=zone, **v)
        return PumpSource(zone=zone, **v)

    def inlets_supply(self, zones: ZonesConfig, psi_per_ft: float) -> None:
        """Every PRV's inlet exists and can supply its setting: a setting whose HGL is above the highest HGL
        of its inlet is refused."""
        for i, src in enumerate(zones.sources):
            if not isinstance(src, PrvSource) or (src.inlet_zone is None and src.inlet_hgl_ft is None):
                continue
            s = f"zones.source[{i}]"
            if src.inlet_zone is not None and zones.source_for(src.inlet_zone) is None:
                raise self.error(f"{s}.inlet_zone", f"names zone '{src.inlet_zone}', which has no [[zones.source]]; "
                                                    f"name one of {', '.join(x.zone for x in zones.sources)}")
            inlet_high, _ = zones.inlet_hgl(src, psi_per_ft)
            hgl, _ = src.hgl_range(psi_per_ft)
            if hgl > inlet_high:
                what = (f"inlet_hgl_ft {inlet_high:,.1f} ft" if src.inlet_zone is None
                        else f"{inlet_high:,.1f} ft, the highest HGL of its inlet zone '{src.inlet_zone}'")
                raise self.error(f"{s}.setting_psi", f"{src.setting_psi:g} psi puts the HGL at {hgl:,.1f} ft, above "
                                                     f"{what}: a PRV cannot raise the HGL; lower the setting or fix the "
                                                     "inlet")

    def criteria(self, t: dict[str, Any]) -> Criteria:
        s = "criteria"
        defaults = {k: v for k, v in asdict(Criteria()).items() if k != "rule_set"}
        self.no_unknown(t, s, {*defaults, "rule_set"})
        rule_set = self.get(t, s, "rule_set", "str", None)
        if rule_set is not None:
            rule_set, values = self.rule_set(rule_set, set(defaults))
            defaults.update(values)
        v = {k: self.get(t, s, k, "number", d) for k, d in defaults.items()}
        where = f" (from rule set {rule_set})" if rule_set else ""
        if v["psi_per_ft"] <= 0:
            raise self.error("criteria.psi_per_ft", f"must be positive, not {v['psi_per_ft']:g}")
        if v["floor_height_ft"] <= 0:
            raise self.error("criteria.floor_height_ft", f"must be positive, not {v['floor_height_ft']:g}")
        for name in ("min_static_psi", *STORAGE_MINIMUMS):
            if v[name] is not None and v[name] < 0:
                raise self.error(f"criteria.{name}", f"must not be negative{where}")
        if v["min_static_psi"] > v["max_static_psi"]:
            raise self.error(
                "criteria.min_static_psi",
                f"{v['min_static_psi']:g} psi is above max_static_psi {v['max_static_psi']:g} psi{where}; fix one of them",
            )
        return Criteria(**v, rule_set=rule_set)

    def rule_set(self, text: str, allowed: set[str]) -> tuple[str, dict[str, float]]:
        """The criteria values of a rule set: a shipped one by name (its file's stem, any case and punctuation:
        "WAC 246-290-230"), or a user's TOML file (a path ending in .toml, relative to the config). Returns the
        name to record (the shipped stem, or the file's absolute path) and the values."""
        key = "criteria.rule_set"
        if text.lower().endswith(".toml"):
            path = self.path(text, key)
            name = str(path)
        else:
            name = rule_set_key(text)
            path = RULE_SETS / f"{name}.toml"
            if not path.is_file():
                raise self.error(key, f"unknown rule set {text!r}; use one of {', '.join(rule_set_names())}, "
                                      "or the path of your own .toml file")
        try:
            data = tomllib.loads(path.read_text(encoding="utf-8-sig"))
        except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
            raise self.error(key, f"cannot read rule set {path} ({exc}); fix the file or the path") from exc
        values = data.get("criteria")
        if not isinstance(values, dict):
            raise self.error(key, f"rule set {path} has no [criteria] table; add one with the values it sets")
        for k, value in values.items():
            if k not in allowed:
                raise self.error(key, f"rule set {path} sets unknown key {k!r}; allowed keys are "
                                      f"{', '.join(sorted(allowed))}")
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(_float_or_inf(value)):
                raise self.error(key, f"rule set {path}: {k} must be a finite number, not {_short(value)}")
        return name, {k: float(x) for k, x in values.items()}

    def operator(self, t: dict[str, Any]) -> OperatorConfig:
        s = "operator"
        defaults = asdict(OperatorConfig())
        self.no_unknown(t, s, set(defaults))
        v = {k: self.get(t, s, k, "number", d) for k, d in defaults.items()}
        for name in ("tank_step_ft", "prv_step_psi", "pump_step_ft"):
            if not 0.01 <= v[name] <= 100:
                raise self.error(f"operator.{name}", f"must be between 0.01 and 100, not {v[name]:g}")
        if not 0 <= v["robust_percent"] <= 100:
            raise self.error("operator.robust_percent", f"must be between 0 and 100, not {v['robust_percent']:g}")
        if v["robust_customers"] < 0 or v["robust_customers"] != int(v["robust_customers"]):
            raise self.error("operator.robust_customers", f"must be a whole number >= 0, not {v['robust_customers']:g}")
        v["robust_customers"] = int(v["robust_customers"])
        return OperatorConfig(**v)

    def targets(self, t: dict[str, Any]) -> TargetCriteria:
        s = "targets"
        defaults = TargetCriteria()
        self.no_unknown(t, s, {"distance_ft", "min_customers", "enabled"})
        distance = self.get(t, s, "distance_ft", "number", defaults.distance_ft)
        if distance <= 0:
            raise self.error("targets.distance_ft", f"must be positive, not {distance:g}")
        count = self.get(t, s, "min_customers", "number", float(defaults.min_customers))
        if count < 1 or count != int(count):
            raise self.error("targets.min_customers", f"must be a whole number of at least 1, not {count:g}")
        enabled = t.get("enabled", True)
        if not isinstance(enabled, bool):
            raise self.error("targets.enabled", f"must be true or false, not {enabled!r}")
        return TargetCriteria(distance_ft=distance, min_customers=int(count), enabled=enabled)

    def readings(self, t: dict[str, Any]) -> ReadingsConfig:
        s = "readings"
        text_keys = ("layer", "id_field", "time_field", "gauge_height_field", "hgl_field", "accuracy_field",
                     "gauge_grade")
        number_keys = {"gauge_height_ft": 0.0, "gauge_accuracy_psi": None, "gauge_span_psi": None, "outlier_psi": 5.0,
                       "outlier_sigmas": 2.0, "bias_psi": 1.0, "min_readings": 3.0}
        self.no_unknown(t, s, {"path", "pressure_field", *text_keys, *number_keys, *DATABASE_KEYS})
        database = self.database_source(t, s)
        v: dict[str, Any] = {k: self.get(t, s, k, "str", None) for k in text_keys}
        v.update({k: self.get(t, s, k, "number", d) for k, d in number_keys.items()})
        for k in ("gauge_accuracy_psi", "gauge_span_psi", "outlier_psi", "outlier_sigmas", "bias_psi"):
            if v[k] is not None and v[k] <= 0:
                raise self.error(f"readings.{k}", f"must be positive, not {v[k]:g}")
        if v["gauge_height_ft"] < 0:
            raise self.error("readings.gauge_height_ft", "must not be negative (the gauge's height above ground)")
        if v["min_readings"] < 1 or v["min_readings"] != int(v["min_readings"]):
            raise self.error("readings.min_readings", f"must be a whole number >= 1, not {v['min_readings']:g}")
        v["min_readings"] = int(v["min_readings"])
        grade = v["gauge_grade"]
        if grade is not None:
            if grade.upper() not in GRADES:
                raise self.error("readings.gauge_grade", f"must be one of {', '.join(GRADES)} (ASME B40.100 accuracy "
                                                         f"grades), not {grade!r}")
            v["gauge_grade"] = grade.upper()
            if v["gauge_span_psi"] is None:
                raise self.error("readings.gauge_grade", "needs readings.gauge_span_psi, the gauge's full scale in "
                                                         "psi (a grade's accuracy is a share of it); add it")
            if v["gauge_accuracy_psi"] is not None:
                raise self.error("readings.gauge_grade", "cannot be used with readings.gauge_accuracy_psi; keep one")
        elif v["gauge_span_psi"] is not None:
            raise self.error("readings.gauge_span_psi", "is used only with readings.gauge_grade; add the grade or "
                                                        "remove the span")
        if grade is None and v["gauge_accuracy_psi"] is None:
            raise self.error("readings", "says nothing of the gauges' accuracy; add readings.gauge_accuracy_psi "
                                         "(psi) or readings.gauge_grade with readings.gauge_span_psi (used where "
                                         "a reading has no accuracy_field value of its own)")
        return ReadingsConfig(path=None if database else self.path(self.get(t, s, "path", "str"), "readings.path"),
                              pressure_field=self.get(t, s, "pressure_field", "str"), database=database, **v)

    def output(self, t: dict[str, Any]) -> OutputConfig:
        s = "output"
        self.no_unknown(t, s, {"path", "mailing_dir", "units", "report", "xlsx", "max_drop_percent", "child_timeout_s",
                               "database", "schema", "geopackage", "mail_firm_only"})
        database, schema = self.get(t, s, "database", "str", None), self.get(t, s, "schema", "str", None)
        if (database is None) != (schema is None):
            given, missing = ("database", "schema") if schema is None else ("schema", "database")
            raise self.error(f"output.{given}", f"is set but output.{missing} is not; give both to publish into a "
                                                "database, or neither")
        if database is not None:
            self.no_password("output.database", database)
            if len(schema.encode()) > MAX_SCHEMA_BYTES:
                raise self.error("output.schema", f"is longer than {MAX_SCHEMA_BYTES} bytes; choose a shorter name")
        if t.get("geopackage") is False and database is None:
            raise self.error("output.geopackage", "= false needs output.database and output.schema to publish into "
                                                  "instead; add them, or write the GeoPackage")
        path = self.path(self.get(t, s, "path", "str"), "output.path")
        if path.suffix.lower() != ".gpkg":
            raise self.error("output.path", f"must end in .gpkg, not {path.name!r}")
        units = self.get(t, s, "units", "str", "us")
        if units not in UNIT_SYSTEMS:
            raise self.error("output.units", f"must be one of {', '.join(UNIT_SYSTEMS)}, not {units!r}")
        flags = {}
        for name, default in (("report", True), ("xlsx", True), ("geopackage", True), ("mail_firm_only", False)):
            flags[name] = t.get(name, default)
            if not isinstance(flags[name], bool):
                raise self.error(f"output.{name}", f"must be true or false, not {flags[name]!r}")
        drop = self.get(t, s, "max_drop_percent", "number", 20.0)
        if not 0 <= drop <= 100:
            raise self.error("output.max_drop_percent", f"must be between 0 and 100, not {drop:g}")
        timeout = self.get(t, s, "child_timeout_s", "number", 3600.0)
        if timeout <= 0:
            raise self.error("output.child_timeout_s", f"must be positive, not {timeout:g}")
        return OutputConfig(path=path, mailing_dir=self.path(self.get(t, s, "mailing_dir", "str"), "output.mailing_dir"),
                            units=units, max_drop_percent=drop, child_timeout_s=timeout, database=database,
                            schema=schema, **flags)
