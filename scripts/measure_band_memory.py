"""Measure the peak working memory per DEM pixel of the service band step.

``geopress.io.raster.BAND_BYTES_PER_PIXEL`` is the number of bytes one pixel
of a zone's DEM window costs while :func:`geopress.planning.service_bands`
reads it and computes the zone's band and limit lines; it chooses the
decimation that keeps a zone window within ``terrain.memory_mb``. This script
measures it.

It writes (deterministic) a float32 DEM in metres with hills and a ripple,
a nodata hole and an irregular zone over most of it, so that the zone and
band masks, the band's polygons, both limit contours and contourpy's nodata
mask are all exercised. Then, for each size, in a fresh subprocess, it
resets the peak resident set size (``/proc/self/clear_refs``, Linux), runs
``service_bands`` with a budget that reads the window whole, and records the
peak (``VmHWM``) minus the resident size just before the call. GDAL's block
cache is held at 64 MB, as in ``bench_mosaic.py``: it is bounded, not per
pixel. The bytes per pixel are the slope between the two sizes, which
removes what does not grow with the window (the cache, libraries' scratch,
the zone's geometries); the ratio at each size is printed too.

    python scripts/measure_band_memory.py [--sizes 1500 4000] [--work bench-out/band-memory]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
CRS = "EPSG:32631"
WEST, NORTH = 300_000.0, 150_000.0


def make_inputs(work: Path, size: int) -> Path:
    import geopandas as gpd
    import rasterio
    import shapely
    from rasterio.transform import from_origin

    work.mkdir(parents=True, exist_ok=True)
    u = (np.arange(size) + 0.5) / size
    v = u[:, None]
    # two hills per side and a ripple: closed contours of many shapes, oblique to the grid
    z = (200.0 + 30.0 * np.sin(4 * np.pi * u[None, :]) * np.cos(4 * np.pi * v)
         + 3.0 * np.sin(2 * np.pi * 40 * (u[None, :] + v))).astype(np.float32)
    z[size // 3: size // 3 + size // 20, size // 2: size // 2 + size // 20] = -9999.0  # a nodata hole
    dem = work / f"dem{size}.tif"
    with rasterio.open(dem, "w", driver="GTiff", width=size, height=size, count=1, dtype="float32", crs=CRS,
                       transform=from_origin(WEST, NORTH, 1.0, 1.0), nodata=-9999.0, tiled=True,
                       blockxsize=512, blockysize=512, compress="deflate") as dst:
        dst.write(z, 1)
    # an irregular zone over most of the DEM (its window is the whole raster)
    s = float(size)
    zone = shapely.Polygon([(WEST + 0.01 * s, NORTH - 0.02 * s), (WEST + 0.97 * s, NORTH - 0.01 * s),
                            (WEST + 0.99 * s, NORTH - 0.6 * s), (WEST + 0.7 * s, NORTH - 0.99 * s),
                            (WEST + 0.02 * s, NORTH - 0.95 * s)])
    zones = work / f"zones{size}.gpkg"
    gpd.GeoDataFrame({"zone": ["Hills"]}, geometry=[zone], crs=CRS).to_file(zones, layer="zones", engine="pyogrio")
    # 800 ft pump, 80/35 psi: band from 615.2 to 719.2 ft (187.5 to 219.2 m) on ground from 167 to 233 m,
    # so both limit lines run round every hill
    cfg = work / f"band{size}.toml"
    cfg.write_text(textwrap.dedent(f"""\
        [customers]
        path = "unused.gpkg"
        id_field = "account"

        [terrain]
        paths = ["{dem.name}"]
        vertical_units = "m"
        memory_mb = 1000000

        [zones]
        path = "{zones.name}"
        id_field = "zone"

        [[zones.source]]
        zone = "Hills"
        kind = "pump"
        discharge_hgl_ft = 800.0

        [criteria]
        max_static_psi = 80.0
        min_static_psi = 35.0
        psi_per_ft = 0.433

        [output]
        path = "unused/pressure.gpkg"
        mailing_dir = "unused/mailing"
        """))
    return cfg


def measure(cfg_path: Path) -> dict:
    code = textwrap.dedent("""\
        import json, sys
        from pathlib import Path
        from pyproj import CRS
        from geopress import pipeline, planning
        from geopress.config import load_config
        from geopress.io import vector as vector_io

        def status(key):
            for line in Path("/proc/self/status").read_text().splitlines():
                if line.startswith(key + ":"):
                    return int(line.split()[1]) * 1024
            raise KeyError(key)

        cfg = load_config(sys.argv[1])
        crs = CRS.from_user_input("%s")
        zones = vector_io.read_zones(cfg.zones)
        Path("/proc/self/clear_refs").write_text("5")  # peak RSS := current RSS
        before = status("VmRSS")
        plan = planning.service_bands(cfg, zones, crs, pipeline.datum_shift(cfg, crs))
        peak = status("VmHWM")
        info = plan.info[0]["rasters"][0]
        print(json.dumps({"before": before, "peak": peak, "decimation": info["decimation"],
                          "band_pixels": info["band_pixels"]}))
        """) % CRS
    out = subprocess.run([sys.executable, "-c", code, str(cfg_path)], check=True, capture_output=True, text=True,
                         env=dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""),
                                  GDAL_CACHEMAX="64"))
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs=2, default=[1500, 4000], help="two DEM sizes, pixels a side")
    ap.add_argument("--work", type=Path, default=Path("bench-out/band-memory"), help="folder for the inputs")
    args = ap.parse_args()
    work = args.work.resolve()
    rows = []
    for size in args.sizes:
        cfg = make_inputs(work, size)
        r = measure(cfg)
        if r["decimation"] != 1:
            sys.exit(f"the {size} x {size} window was decimated; the measurement needs it whole")
        r["pixels"] = size * size
        r["delta"] = r["peak"] - r["before"]
        rows.append(r)
        print(f"{size:6d} x {size:<6d} {r['pixels'] / 1e6:7.2f} Mpx: peak {r['delta'] / 2**20:8.1f} MB over the "
              f"{r['before'] / 2**20:.0f} MB before the call = {r['delta'] / r['pixels']:5.1f} B/px "
              f"(band {r['band_pixels'] / r['pixels']:.0%} of the pixels)", flush=True)
    a, b = rows
    slope = (b["delta"] - a["delta"]) / (b["pixels"] - a["pixels"])
    print(f"bytes per pixel (slope between the two sizes): {slope:.1f}")


if __name__ == "__main__":
    main()
