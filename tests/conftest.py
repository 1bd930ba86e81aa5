"""Factories that write tiny rasters, layers and configs into tmp_path."""

from __future__ import annotations

import os
import sys
import textwrap
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pytest
import rasterio
import shapely
from affine import Affine

from geopress import runner

PROJECTED = "EPSG:32631"  # UTM 31N; test worlds sit near (500000, 10000), open ocean
ORIGIN = (500_000.0, 11_000.0)  # top-left corner of the test DEMs


# The fork server of this test process also imports the report's drawing modules, once: each run's band process
# draws its report's figures, and would otherwise import matplotlib again in every one of the suite's runs. A
# command's fork server does not: there the import would delay the band, for one run only.
runner.PRELOAD = [*runner.PRELOAD, "geopress.report", "matplotlib.backends.backend_agg", "matplotlib.figure",
                  "matplotlib.lines", "matplotlib.patches", "matplotlib.patheffects", "matplotlib.ticker",
                  "mpl_toolkits.axes_grid1.anchored_artists"]


def pytest_report_header(config):
    import pyogrio
    import pyproj

    return f"GDAL {rasterio.__gdal_version__}, PROJ {pyproj.proj_version_str}, pyogrio {pyogrio.__version__}"


def plane(a: float, b: float, c: float, shape: tuple[int, int], transform: Affine) -> np.ndarray:
    """z = a + b*x + c*y evaluated at every pixel centre (float64)."""
    rows, cols = np.mgrid[0 : shape[0], 0 : shape[1]]
    x, y = transform @ (cols + 0.5, rows + 0.5)
    return a + b * x + c * y


def write_raster(path: Path, array: np.ndarray, transform: Affine, crs: str | None = PROJECTED, *,
                 nodata: float | None = -9999.0, units: str | None = None, tiled: bool = False) -> Path:
    profile = dict(driver="GTiff", height=array.shape[0], width=array.shape[1], count=1, dtype=array.dtype,
                   transform=transform, nodata=nodata)
    if crs is not None:
        profile["crs"] = crs
    if tiled:
        profile.update(tiled=True, blockxsize=16, blockysize=16)
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(array, 1)
        if units:
            dst.units = (units,)
    return path


def write_layer(path: Path, layer: str, records: dict[str, list], geoms: list, crs: str | None = PROJECTED) -> Path:
    gdf = gpd.GeoDataFrame(records, geometry=gpd.GeoSeries(geoms), crs=crs)
    gdf.to_file(path, layer=layer, driver="GPKG", engine="pyogrio", mode="a" if path.exists() else "w")
    return path


@dataclass
class World:
    """A small scenario on disk: plane DEM, zones, customers, config."""

    root: Path
    dem_path: Path
    customers_path: Path
    zones_path: Path
    config_path: Path
    transform: Affine
    coeffs: tuple[float, float, float]
    extra: dict[str, Any] = field(default_factory=dict)

    def ground_m(self, x, y):
        a, b, c = self.coeffs
        return a + b * np.asarray(x) + c * np.asarray(y)

    @property
    def out(self) -> Path:
        return self.root / "out" / "pressure.gpkg"

    def read(self, layer: str = "customers") -> gpd.GeoDataFrame:
        return gpd.read_file(self.out, layer=layer, engine="pyogrio")

    def write_config(self, text: str) -> Path:
        self.config_path.write_text(textwrap.dedent(text))
        return self.config_path


#: DEM: 100 x 100 px at 10 m, 1 km square; ground rises west to east from 300 m.
DEM_SHAPE = (100, 100)
DEM_TRANSFORM = Affine(10.0, 0.0, ORIGIN[0], 0.0, -10.0, ORIGIN[1])
# z (m) = 300 + 0.1 * (x - 500000): 300 m at the west edge, 400 m at the east edge
COEFFS = (300.0 - 0.1 * ORIGIN[0], 0.1, 0.0)

BASE_CONFIG = """\
[customers]
path = "customers.gpkg"
layer = "parcels"
id_field = "account"
mail_fields = ["owner", "mail_address"]
floors_field = "floors"

[terrain]
paths = ["dem.tif"]
vertical_units = "m"
method = "bilinear"

[zones]
path = "zones.gpkg"
layer = "zones"
id_field = "zone"

[[zones.source]]
zone = "West"
kind = "prv"
valve_elevation_ft = 1000.0
setting_psi = 60.0

[[zones.source]]
zone = "East"
kind = "tank"
high_water_ft = 1400.0
low_water_ft = 1380.0

[criteria]
max_static_psi = 80.0
min_static_psi = 35.0

[output]
path = "out/pressure.gpkg"
mailing_dir = "out/mailing"
"""


def customer_records(xs, ys, *, floors=None, owners=None, addresses=None):
    n = len(xs)
    return {
        "account": [f"C{i:04d}" for i in range(n)],
        "owner": owners or [f"Owner {i}" for i in range(n)],
        "mail_address": addresses or [f"{i} Test Row" for i in range(n)],
        "floors": floors or [1] * n,
    }


@pytest.fixture
def world(tmp_path: Path) -> World:
    """Plane DEM in metres; zones West (x < 500500) and East; customers along a west-east line."""
    a, b, c = COEFFS
    dem = plane(a, b, c, DEM_SHAPE, DEM_TRANSFORM).astype(np.float64)
    dem_path = write_raster(tmp_path / "dem.tif", dem, DEM_TRANSFORM)
    x0, y1 = ORIGIN
    west = shapely.box(x0, y1 - 1000, x0 + 500, y1)
    east = shapely.box(x0 + 500, y1 - 1000, x0 + 1000, y1)
    zones_path = write_layer(tmp_path / "zones.gpkg", "zones", {"zone": ["West", "East"]}, [west, east])
    xs = list(x0 + np.linspace(25, 975, 20))
    ys = [y1 - 500.0] * len(xs)
    recs = customer_records(xs, ys)
    customers_path = write_layer(tmp_path / "customers.gpkg", "parcels", recs,
                                 [shapely.Point(x, y) for x, y in zip(xs, ys)])
    config_path = tmp_path / "geopress.toml"
    config_path.write_text(BASE_CONFIG)
    return World(tmp_path, dem_path, customers_path, zones_path, config_path, DEM_TRANSFORM, COEFFS,
                 extra={"xs": np.array(xs), "ys": np.array(ys)})


# ---- shared by the pipeline and CLI tests --------------------------------------------------


def pixel_centre(col: float, row: float, transform: Affine = DEM_TRANSFORM) -> tuple[float, float]:
    """Map coordinates of pixel (row, col)'s centre; fractional values give points between centres."""
    return transform @ (col + 0.5, row + 0.5)


@pytest.fixture
def restore_logging():
    """The CLI configures the geopress loggers and captures warnings: undo that after the test."""
    import logging

    saved = {}
    for name in ("geopress", "py.warnings"):
        lg = logging.getLogger(name)
        saved[name] = (lg.handlers[:], lg.level, lg.propagate)
    yield
    logging.captureWarnings(False)
    for name, (handlers, level, propagate) in saved.items():
        lg = logging.getLogger(name)
        lg.handlers[:] = handlers
        lg.setLevel(level)
        lg.propagate = propagate


# ---- a PostgreSQL/PostGIS server for the database tests ------------------------------------


@pytest.fixture(scope="session")
def postgis_server():
    """A throwaway cluster with PostGIS (tests/postgis_support.py), started once and stopped at the end.

    Without PostgreSQL, PostGIS or the driver the database tests skip, saying why; under CI
    (CI=true), where .ci/run installs them, they fail instead: a skipped database test there hides
    a broken install."""
    import os

    import postgis_support

    why = postgis_support.missing()
    if why:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail(f"CI: the database tests need a PostgreSQL/PostGIS server: {why}", pytrace=False)
        pytest.skip(why)
    server = postgis_support.start()
    try:
        yield server
    finally:
        postgis_support.remove(server)


def thread_nice() -> int:
    """The calling thread's nice value (Linux keeps one per thread)."""
    return os.getpriority(os.PRIO_PROCESS, threading.get_native_id())


def run_in_its_own_thread(config_path: Path) -> None:
    """``geopress.run(config_path)`` in a thread of its own, so a nice value it sets stays there; raises what the run
    raised. Skips where nice values are not per thread (other systems than Linux)."""
    import geopress

    if not sys.platform.startswith("linux"):
        pytest.skip("per-thread nice values are Linux's")
    failed: list[BaseException] = []

    def run() -> None:
        try:
            geopress.run(config_path)
        except BaseException as exc:  # noqa: BLE001 - raised below, in the caller's thread
            failed.append(exc)

    thread = threading.Thread(target=run)
    thread.start()
    thread.join(timeout=120)
    assert not thread.is_alive(), "the run did not end within 120 s"
    if failed:
        raise failed[0]
