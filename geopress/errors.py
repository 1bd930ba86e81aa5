"""Exceptions and warnings raised by geopress.

Every error a user can cause is a :class:`GeopressError`; the command line
prints its message on one line and exits 2. Anything else is a bug or an
environment failure and exits 1. ::

    GeopressError            root; .path, .key carry context when known
    ├── ConfigError          the TOML file: syntax, unknown/missing keys, types, values
    ├── InputError           an input file: missing, unreadable, CRS, fields, geometry
    ├── OutputError          an output location that cannot be created or written
    ├── LockError            another run holds the output lock
    └── MissingExtraError    an optional dependency is not installed

    GeopressWarning(UserWarning)
    ├── GeometryWarning      null/empty geometries, repaired zone polygons
    ├── ZoneOverlapWarning   zone polygons that overlap
    ├── TerrainWarning       elevations that do not look like the stated unit
    ├── StaleLockWarning     a lock left by a dead process was taken over
    └── DataWarning          other recoverable oddities of the input data
"""

from __future__ import annotations

from pathlib import Path


class GeopressError(Exception):
    """Root of every error a user can cause and fix.

    ``path`` names the file and ``key`` the config key, field or feature the
    message is about, when there is one.
    """

    def __init__(self, message: str, *, path: str | Path | None = None, key: str | None = None):
        super().__init__(message)
        self.message = message
        self.path = None if path is None else str(path)
        self.key = key

    def __str__(self) -> str:
        prefix = f"{self.path}: " if self.path else ""
        return f"{prefix}{self.message}"


class ConfigError(GeopressError):
    """The configuration file is malformed or inconsistent."""


class InputError(GeopressError):
    """An input dataset is missing, unreadable or does not fit the config."""


class OutputError(GeopressError):
    """An output location cannot be created or written."""


class LockError(GeopressError):
    """Another run is writing the same outputs."""


class MissingExtraError(GeopressError):
    """An optional dependency is needed; the message names the extra to install."""


class GeopressWarning(UserWarning):
    """Root of geopress warnings."""


class GeometryWarning(GeopressWarning):
    """Geometries were null, empty or invalid and were reported or repaired."""


class ZoneOverlapWarning(GeopressWarning):
    """Zone polygons overlap; the overlap follows the documented tie rule."""


class TerrainWarning(GeopressWarning):
    """Terrain values look inconsistent with their stated unit or extent."""


class StaleLockWarning(GeopressWarning):
    """A lock left by a process that no longer runs was taken over."""


class DataWarning(GeopressWarning):
    """Another recoverable oddity in the input data."""
