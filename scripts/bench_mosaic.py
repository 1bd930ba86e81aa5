"""Benchmark ``geopress run`` on a state-wide mosaic far larger than memory.

Generates under ``--work`` (deterministic): one 5000 x 5000 float32 tile at
1 m (tiled, DEFLATE-compressed GeoTIFF) and two GDAL VRTs that repeat it,
a 100,000 x 100,000 pixel mosaic (37 GB of float32 if read whole) and a
20,000 x 20,000 one (1.5 GB), both over the default ``memory_mb = 1024``
budget; one pressure zone covering both; and customers in 40 invented towns
inside the first 20 km square, so both mosaics hold the same customers on
the same pixels.

Each case runs ``geopress run`` in a fresh subprocess, as a first run (its
earlier outputs are removed first), measured as _measure.py says; GDAL's block cache is held at 64 MB so that
repeating one tile cannot serve the reads from cache. It prints wall time,
peak memory, the time of the terrain step and the pixels read, for

* 2,000,000 customers on the 100,000 x 100,000 mosaic,
* 1,000,000 customers drawn the same way (same towns) on the same mosaic,
* 2,000,000 customers on the 20,000 x 20,000 mosaic,

so that time can be seen to follow the customers and not the pixels.

    python scripts/bench_mosaic.py [--n 2000000] [--work bench-out/mosaic]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import textwrap
import time
from pathlib import Path

os.environ.setdefault("OGR_CURRENT_DATE", "2026-01-01T00:00:00Z")

import numpy as np  # noqa: E402
from _measure import measure  # noqa: E402  (scripts/ is on the path when run as a script)

ROOT = Path(__file__).resolve().parents[1]
CRS = "EPSG:32631"
TILE = 5000
WEST, NORTH = 300_000.0, 150_000.0
SEED = 20260102
TOWNS = 40
REGION = 20_000  # m: the towns lie in the first REGION x REGION square


def make_tile(path: Path) -> None:
    import rasterio
    from rasterio.transform import from_origin

    u = np.arange(TILE) + 0.5
    with rasterio.open(path, "w", driver="GTiff", width=TILE, height=TILE, count=1, dtype="float32", crs=CRS,
                       transform=from_origin(WEST, NORTH, 1.0, 1.0), nodata=-9999.0, tiled=True, blockxsize=512,
                       blockysize=512, compress="deflate", predictor=3) as dst:
        for r0 in range(0, TILE, 500):
            v = (np.arange(r0, r0 + 500) + 0.5)[:, None]
            # periodic in the tile size, so repeated tiles meet without a step
            z = 200.0 + 30.0 * np.sin(2 * np.pi * u[None, :] / TILE) * np.cos(2 * np.pi * v / TILE) \
                + 3.0 * np.sin(2 * np.pi * 7 * (u[None, :] + v) / TILE)
            dst.write(z.astype(np.float32), 1, window=rasterio.windows.Window(0, r0, TILE, 500))
        dst.units = ("metre",)


def write_vrt(path: Path, tile: Path, repeat: int) -> None:
    size = TILE * repeat
    sources = "".join(
        f'<ComplexSource><SourceFilename relativeToVRT="0">{tile}</SourceFilename><SourceBand>1</SourceBand>'
        f'<SourceProperties RasterXSize="{TILE}" RasterYSize="{TILE}" DataType="Float32" BlockXSize="512" '
        f'BlockYSize="512"/><SrcRect xOff="0" yOff="0" xSize="{TILE}" ySize="{TILE}"/>'
        f'<DstRect xOff="{j * TILE}" yOff="{i * TILE}" xSize="{TILE}" ySize="{TILE}"/><NODATA>-9999</NODATA>'
        "</ComplexSource>\n"
        for i in range(repeat) for j in range(repeat))
    from pyproj import CRS as ProjCRS

    wkt = ProjCRS.from_user_input(CRS).to_wkt().replace("&", "&amp;").replace("<", "&lt;")
    path.write_text(
        f'<VRTDataset rasterXSize="{size}" rasterYSize="{size}"><SRS>{wkt}</SRS>'
        f"<GeoTransform>{WEST}, 1.0, 0.0, {NORTH}, 0.0, -1.0</GeoTransform>"
        f'<VRTRasterBand dataType="Float32" band="1" blockXSize="512" blockYSize="512">'
        f"<NoDataValue>-9999</NoDataValue>\n{sources}</VRTRasterBand></VRTDataset>\n")


def make_customers(path: Path, n: int) -> None:
    import geopandas as gpd
    import shapely

    rng = np.random.default_rng(SEED)
    centres = rng.uniform(2000, REGION - 2000, (TOWNS, 2))
    town = rng.integers(0, TOWNS, n)
    off = rng.normal(0, 500.0, (n, 2))
    u = np.clip(centres[town, 0] + off[:, 0], 1, REGION - 1)
    v = np.clip(centres[town, 1] + off[:, 1], 1, REGION - 1)
    df = gpd.GeoDataFrame({
        "account": np.char.add("M", np.char.zfill(np.arange(n).astype(str), 8)),
        "owner": np.char.add("Owner ", np.arange(n).astype(str)),
        "mail_address": np.char.add((np.arange(n) % 9000 + 1).astype(str), " Invented Lane"),
    }, geometry=shapely.points(WEST + u, NORTH - v), crs=CRS)
    df.to_file(path, layer="customers", engine="pyogrio", use_arrow=True)


def make_zone(path: Path) -> None:
    import geopandas as gpd
    import shapely

    box = shapely.box(WEST, NORTH - REGION, WEST + REGION, NORTH)
    gpd.GeoDataFrame({"zone": ["State"]}, geometry=[box], crs=CRS).to_file(path, layer="zones", engine="pyogrio")


def write_config(work: Path, name: str, dem: str, customers: str) -> Path:
    cfg = work / f"{name}.toml"
    cfg.write_text(textwrap.dedent(f"""\
        [customers]
        path = "{customers}"
        layer = "customers"
        id_field = "account"
        mail_fields = ["owner", "mail_address"]

        [terrain]
        paths = ["{dem}"]
        vertical_units = "m"

        [zones]
        path = "zone.gpkg"
        id_field = "zone"

        [[zones.source]]
        zone = "State"
        kind = "pump"
        discharge_hgl_ft = 900.0

        [output]
        path = "out-{name}/pressure.gpkg"
        mailing_dir = "out-{name}/mailing"
        xlsx = false  # openpyxl writes one cell at a time: tens of seconds at this size (README, Speed and scale)
        """))
    return cfg


def prepare(work: Path, n: int) -> None:
    work.mkdir(parents=True, exist_ok=True)
    stamp = work / "data.json"
    want = {"n": n, "tile": TILE, "seed": SEED}
    if stamp.exists() and json.loads(stamp.read_text()) == want:
        return
    t0 = time.perf_counter()
    make_tile(work / "tile.tif")
    write_vrt(work / "state.vrt", work / "tile.tif", 20)
    write_vrt(work / "region.vrt", work / "tile.tif", REGION // TILE)
    make_zone(work / "zone.gpkg")
    for name, count in (("customers", n), ("customers_half", n // 2)):
        (work / f"{name}.gpkg").unlink(missing_ok=True)
        make_customers(work / f"{name}.gpkg", count)  # same seed and towns, half as many customers
    stamp.write_text(json.dumps(want))
    print(f"generated data in {time.perf_counter() - t0:.1f} s under {work}", flush=True)


def run_case(cfg: Path) -> dict:
    shutil.rmtree(cfg.parent / f"out-{cfg.stem}", ignore_errors=True)  # a first run, every time
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""), GDAL_CACHEMAX="64")
    m = measure([sys.executable, "-c", "from geopress.cli import main; main()", "-q", "run", str(cfg)], env)
    if m.exit_code != 0:
        sys.exit(f"geopress run {cfg} failed")
    info = json.loads((cfg.parent / f"out-{cfg.stem}" / "run.json").read_text())
    terrain = info["terrain"][0]
    return {"wall": m.wall_s, "rss_gb": m.rss_gb, "pss_gb": m.pss_gb, "terrain_s": info["timings_s"]["sample terrain"],
            "pixels_read": terrain["pixels_read"], "windows": terrain["windows_read"], "shape": terrain["shape"],
            "customers": info["customers"]["total"]}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=2_000_000, help="customers (default 2,000,000)")
    ap.add_argument("--work", type=Path, default=Path("bench-out/mosaic"), help="folder for data and outputs")
    args = ap.parse_args()
    work = args.work.resolve()
    prepare(work, args.n)
    cases = [("state_full", "state.vrt", "customers.gpkg"), ("state_half", "state.vrt", "customers_half.gpkg"),
             ("region_full", "region.vrt", "customers.gpkg")]
    for name, dem, cust in cases:
        r = run_case(write_config(work, name, dem, cust))
        h, w = r["shape"]
        print(f"{name:12s} {r['customers']:>9,} customers on {w:,} x {h:,} px: {r['wall']:6.1f} s, "
              f"peak RSS (largest process) {r['rss_gb']:.2f} GB, peak PSS (all processes) {r['pss_gb']:.2f} GB, terrain {r['terrain_s']:.1f} s, {r['windows']:,} windows, "
              f"{r['pixels_read'] / 1e6:,.0f} Mpx read ({100 * r['pixels_read'] / (h * w):.2f}% of the mosaic)",
              flush=True)


if __name__ == "__main__":
    main()
