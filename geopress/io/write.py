"""Writing outputs so that a failed run never damages the previous ones.

Every output is first written completely to a temporary file beside its
target (same folder, so the final rename is atomic on POSIX); only when all
of them are complete are they renamed into place, GeoPackage first and
``run.json`` last. On any failure the temporary files are removed and the
earlier outputs stay byte-identical. Temporary files left by a killed run are
removed by the next run.
"""

from __future__ import annotations

import json
import logging
import os
import tempfile
from concurrent.futures import Executor, Future
from pathlib import Path
from typing import Any, Callable, Mapping

import geopandas as gpd
import pandas as pd
import pyogrio

from ..errors import OutputError

log = logging.getLogger(__name__)

TMP_MARK = ".geopress-tmp-"


def ensure_dir(path: Path, key: str) -> None:
    """Create ``path`` (a folder) or raise OutputError naming the key."""
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create folder ({exc.strerror}) for {key}; choose a writable location", path=path, key=key) from exc
    if not os.access(path, os.W_OK | os.X_OK):
        raise OutputError(f"folder is not writable (for {key}); choose a writable location", path=path, key=key)


def remove_stale_temps(target: Path) -> list[Path]:
    """Delete temporary files a killed run left beside ``target``."""
    removed = []
    if target.parent.is_dir():
        for p in target.parent.glob(f".{target.name}{TMP_MARK}*"):
            try:
                p.unlink()
                removed.append(p)
            except OSError:
                log.warning("could not remove stale temporary file %s", p)
    return removed


class Staging:
    """Collects outputs in temporary files, then renames them all into place.

    Use as a context manager; :meth:`commit` publishes, leaving the block
    without committing (an exception) removes every temporary file.
    """

    def __init__(self) -> None:
        self._pending: list[tuple[Path, Path]] = []
        self.committed: list[Path] = []

    def temp_for(self, target: Path) -> Path:
        """A fresh temporary path beside ``target`` with the same suffix."""
        remove_stale_temps(target)
        fd, name = tempfile.mkstemp(prefix=f".{target.name}{TMP_MARK}", suffix=target.suffix, dir=target.parent)
        os.close(fd)
        os.unlink(name)  # writers such as GDAL want to create the file themselves
        tmp = Path(name)
        self._pending.append((tmp, target))
        return tmp

    def write(self, target: Path, writer: Callable[[Path], None]) -> None:
        """Stage ``target`` by calling ``writer(tmp_path)``; OSErrors become OutputError."""
        self._write_tmp(target, self.temp_for(target), writer)

    def write_in_background(self, target: Path, writer: Callable[[Path], None], pool: Executor) -> Future:
        """Like :meth:`write`, run on ``pool`` (GDAL releases the GIL while writing, so the
        other outputs can be written meanwhile); the temporary file keeps its place in the
        commit order. Call :meth:`wait` on the returned future before committing."""
        tmp = self.temp_for(target)
        return pool.submit(self._write_tmp, target, tmp, writer)

    def _write_tmp(self, target: Path, tmp: Path, writer: Callable[[Path], None]) -> None:
        try:
            writer(tmp)
        except OSError as exc:
            raise OutputError(f"cannot write ({exc.strerror or exc}); check free space and permissions", path=target) from exc

    def commit(self) -> None:
        """Rename every staged file into place, in the order staged."""
        for tmp, target in self._pending:
            os.replace(tmp, target)
            self.committed.append(target)
        self._pending.clear()

    def discard(self) -> None:
        for tmp, _ in self._pending:
            try:
                tmp.unlink()
            except FileNotFoundError:
                pass
        self._pending.clear()

    def __enter__(self) -> "Staging":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        self.discard()


def write_geopackage(path: Path, layers: Mapping[str, pd.DataFrame]) -> None:
    """Write each frame as a layer (GeoDataFrames with a spatial index, others as plain tables)."""
    for name, df in layers.items():
        if isinstance(df, gpd.GeoDataFrame):
            pyogrio.write_dataframe(df, path, layer=name, driver="GPKG", use_arrow=True,
                                    layer_options={"SPATIAL_INDEX": "YES"})
        else:
            pyogrio.write_dataframe(df, path, layer=name, driver="GPKG")


def write_csv(path: Path, df: pd.DataFrame) -> None:
    """UTF-8 CSV with a header, no index."""
    df.to_csv(path, index=False, encoding="utf-8", lineterminator="\n")


def write_json(path: Path, data: Mapping[str, Any]) -> None:
    """Indented JSON, keys in insertion order."""
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(data, fh, indent=2, default=str)
        fh.write("\n")
        fh.flush()
        os.fsync(fh.fileno())
