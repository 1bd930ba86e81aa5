"""Benchmark ``geopress run`` against the floor GDAL sets and the script an analyst would write.

Generates its own data under ``--work`` (deterministic, fixed seed), one
folder per size: a 6000 x 6000 float32 DEM at 1 m (tiled, DEFLATE-compressed
GeoTIFF, metres, UTM 31N on open ocean), three pressure zones with a tank, a
PRV and a pump, and N customer points in a GeoPackage. For each N of ``--n``
(default 1,000,000) it runs, alternating, ``--repeat`` times, each in its own
subprocess:

(a) ``geopress run`` end to end, as a first run (an empty output folder, so every
    customer is new) and as a re-run (the previous run's outputs in place);
(b) the floor: pyogrio writing the same customers table alone (read from
    geopress's output beforehand, not timed), with its spatial index;
(c) at the N of ``--script-at`` only, the straightforward script:
    ``geopandas.read_file``, ``geopandas.sjoin``, rasterio's
    ``DatasetReader.sample()``, pressures and statuses with numpy, then
    ``to_file`` of the customers layer and each flagged layer.

geopress and the script both sample the containing pixel (``method =
"nearest"``, which is what ``sample()`` does), so their statuses must agree;
the bench checks they do. It prints, per N, the median wall time of each
variant, their ratios to the floor, the time per customer, peak memory two
ways (see _measure.py: the resident set size of the command's own process, and the
proportional set size of all its processes together, sampled in runs of its
own before the timed ones, since sampling slows what it measures), geopress's
time per step, and the in-process throughput of the bilinear kernel.

    python scripts/bench.py                                  # N = 1,000,000
    python scripts/bench.py --n 1000000 4000000 10000000     # the scale targets
    python scripts/bench.py --n 100000 --repeat 1            # a quick check
    python scripts/bench.py --postgis "host=/tmp/pg dbname=gis"  # with the database beside the GeoPackage

With ``--postgis DSN`` (a PostgreSQL database with PostGIS, where the role may create the schema
``geopress_bench``), it also times, each in its own subprocess and alternating, reading the
customers with ``geopress.io.vector.read_customers`` from the GeoPackage and from the same rows in
a table there (loaded beforehand, not timed), and publishing geopress's customers layer (the
floor's table, with the views of the flagged layers) through ``geopress.io.postgis.Publication``,
against the floor's GeoPackage write.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import textwrap
import time
from pathlib import Path

os.environ.setdefault("OGR_CURRENT_DATE", "2026-01-01T00:00:00Z")

import numpy as np  # noqa: E402
from _measure import Measured, measure  # noqa: E402  (scripts/ is on the path when run as a script)

ROOT = Path(__file__).resolve().parents[1]
CRS = "EPSG:32631"
SIZE = 6000  # pixels a side, 1 m each
WEST, NORTH = 400_000.0, 20_000.0
NODATA = -9999.0
SEED = 20260101
HGL = {  # zone: (kind, keys) -> (high, low) HGL ft, psi_per_ft 0.433
    "Lower": ("prv", {"valve_elevation_ft": 1000.0, "setting_psi": 20.0}),
    "Middle": ("tank", {"high_water_ft": 1230.0, "low_water_ft": 1180.0}),
    "Upper": ("pump", {"discharge_hgl_ft": 1300.0}),
}
PSI_PER_FT = 0.433
FLOOR_FT = 10.0
M_PER_FT = 0.3048
FLAGGED = {"high": "high_pressure", "low": "low_pressure", "above_hgl": "above_hgl", "low_upper_floors": "upper_floors"}


# ---------------------------------------------------------------------------
# data


def ground_m(u, v):
    """Analytic ground, m, at local metres (u east, v north of the SW corner): a slope with hills."""
    return (250.0 + 0.02 * v + 12.0 * np.sin(u / 700.0) * np.cos(v / 900.0) + 4.0 * np.sin((u + v) / 130.0))


def make_dem(path: Path) -> None:
    import rasterio
    from rasterio.transform import from_origin

    profile = dict(driver="GTiff", width=SIZE, height=SIZE, count=1, dtype="float32", crs=CRS,
                   transform=from_origin(WEST, NORTH, 1.0, 1.0), nodata=NODATA, tiled=True, blockxsize=512,
                   blockysize=512, compress="deflate", predictor=3)
    with rasterio.open(path, "w", **profile) as dst:
        u = np.arange(SIZE) + 0.5
        for r0 in range(0, SIZE, 512):
            rows = np.arange(r0, min(r0 + 512, SIZE))
            v = SIZE - rows - 0.5
            block = ground_m(u[None, :], v[:, None]).astype(np.float32)
            if r0 <= 3000 < r0 + 512:  # a nodata patch (a quarry): customers there get no_terrain
                block[3000 - r0:3000 - r0 + 40, 3000:3040] = NODATA
            dst.write(block, 1, window=rasterio.windows.Window(0, r0, SIZE, block.shape[0]))
        dst.units = ("metre",)


def make_zones(path: Path) -> None:
    import geopandas as gpd
    import shapely

    u = np.linspace(0, SIZE, 61)
    cuts = [2000 + 150 * np.sin(u / 800.0), 4000 + 150 * np.cos(u / 600.0)]
    south = np.zeros_like(u)
    north = np.full_like(u, SIZE)
    bands = [(south, cuts[0]), (cuts[0], cuts[1]), (cuts[1], north)]
    polys = []
    for lo, hi in bands:
        ring = np.r_[np.c_[u, lo], np.c_[u[::-1], hi[::-1]]] + [WEST, NORTH - SIZE]
        polys.append(shapely.Polygon(ring))
    gpd.GeoDataFrame({"zone": list(HGL)}, geometry=polys, crs=CRS).to_file(path, layer="zones", engine="pyogrio")


def make_customers(path: Path, n: int) -> None:
    import geopandas as gpd
    import shapely

    rng = np.random.default_rng(SEED)
    x = WEST + rng.uniform(5, SIZE - 5, n)
    y = NORTH - SIZE + rng.uniform(5, SIZE - 5, n)
    ids = np.char.add("A", np.char.zfill(np.arange(n).astype(str), 7))
    street = rng.integers(1, 400, n).astype(str)
    df = gpd.GeoDataFrame({
        "account": ids,
        "owner": np.char.add("Owner ", (np.arange(n) // 2).astype(str)),  # two accounts per owner
        "mail_address": np.char.add(np.char.add((np.arange(n) // 2 % 9000 + 1).astype(str), " Invented Way "), street),
        "floors": rng.choice([1, 1, 1, 2, 3, 8], n).astype(np.int32),
    }, geometry=shapely.points(x, y), crs=CRS)
    df.to_file(path, layer="customers", engine="pyogrio", use_arrow=True)


def write_config(work: Path) -> Path:
    sources = []
    for zone, (kind, keys) in HGL.items():
        sources.append("[[zones.source]]\n" + f'zone = "{zone}"\nkind = "{kind}"\n'
                       + "".join(f"{k} = {v}\n" for k, v in keys.items()))
    text = textwrap.dedent(f"""\
        [customers]
        path = "customers.gpkg"
        layer = "customers"
        id_field = "account"
        mail_fields = ["owner", "mail_address"]
        floors_field = "floors"

        [terrain]
        paths = ["dem.tif"]
        vertical_units = "m"
        method = "nearest"

        [zones]
        path = "zones.gpkg"
        layer = "zones"
        id_field = "zone"

        """) + "\n".join(sources) + textwrap.dedent(f"""
        [criteria]
        max_static_psi = 80.0
        min_static_psi = 35.0
        psi_per_ft = {PSI_PER_FT}
        floor_height_ft = {FLOOR_FT}

        [output]
        path = "out-geopress/pressure.gpkg"
        mailing_dir = "out-geopress/mailing"
        xlsx = false  # openpyxl writes one cell at a time: tens of seconds here (README, Speed and scale)
        """)
    cfg = work / "bench.toml"
    cfg.write_text(text)
    return cfg


def prepare(work: Path, n: int) -> Path:
    work.mkdir(parents=True, exist_ok=True)
    stamp = work / "data.json"
    want = {"n": n, "size": SIZE, "seed": SEED}
    if not (stamp.exists() and json.loads(stamp.read_text()) == want):
        t0 = time.perf_counter()
        make_dem(work / "dem.tif")
        make_zones(work / "zones.gpkg")
        (work / "customers.gpkg").unlink(missing_ok=True)
        make_customers(work / "customers.gpkg", n)
        stamp.write_text(json.dumps(want))
        print(f"generated data in {time.perf_counter() - t0:.1f} s under {work}", flush=True)
    return write_config(work)


# ---------------------------------------------------------------------------
# the straightforward script (variant b), run in a child process


def baseline(work: Path) -> None:
    import geopandas as gpd
    import rasterio

    out = work / "out-baseline" / "pressure.gpkg"
    out.parent.mkdir(exist_ok=True)
    out.unlink(missing_ok=True)
    cust = gpd.read_file(work / "customers.gpkg", layer="customers")
    zones = gpd.read_file(work / "zones.gpkg", layer="zones")
    joined = gpd.sjoin(cust, zones[["zone", "geometry"]], how="left", predicate="intersects")
    joined = joined[~joined.index.duplicated(keep="first")].drop(columns="index_right")
    with rasterio.open(work / "dem.tif") as src:
        coords = list(zip(joined.geometry.x, joined.geometry.y))
        elev = np.array([v[0] for v in src.sample(coords)], dtype=np.float64)
        elev[elev == src.nodata] = np.nan
    ground = elev / M_PER_FT
    high = {"Lower": 1000.0 + 20.0 / PSI_PER_FT, "Middle": 1230.0, "Upper": 1300.0}
    low = {"Lower": 1000.0 + 20.0 / PSI_PER_FT, "Middle": 1180.0, "Upper": 1300.0}
    hgl_high = joined["zone"].map(high).to_numpy(dtype=np.float64)
    hgl_low = joined["zone"].map(low).to_numpy(dtype=np.float64)
    floors = joined["floors"].to_numpy(dtype=np.float64)
    psi_max = PSI_PER_FT * (hgl_high - ground)
    psi_min = PSI_PER_FT * (hgl_low - ground)
    psi_top = np.where(floors > 1, PSI_PER_FT * (hgl_low - (ground + (floors - 1) * FLOOR_FT)), np.nan)
    status = np.select(
        [np.isnan(ground), joined["zone"].isna().to_numpy(), psi_min <= 0, psi_min < 35.0, psi_max > 80.0,
         psi_top < 35.0],
        ["no_terrain", "unzoned", "above_hgl", "low", "high", "low_upper_floors"], default="ok")
    joined = joined.assign(ground_ft=ground, psi_max=psi_max, psi_min=psi_min, psi_top=psi_top, status=status)
    joined.to_file(out, layer="customers")
    for st, layer in FLAGGED.items():
        joined[joined["status"] == st].to_file(out, layer=layer)


def geopress_run(work: Path) -> None:
    from geopress.cli import main

    main(["-q", "run", str(work / "bench.toml")])


def floor_table(work: Path):
    """The customers table geopress wrote (attributes and WKB), as pyogrio reads it with Arrow."""
    import pyogrio

    meta, table = pyogrio.read_arrow(work / "out-geopress" / "pressure.gpkg", layer="customers")
    return meta, table


def floor(work: Path) -> None:
    """Write the customers table alone, with its spatial index; only the write is timed (printed as FLOOR s)."""
    import pyogrio

    meta, table = floor_table(work)
    out = work / "out-floor" / "customers.gpkg"
    out.parent.mkdir(exist_ok=True)
    out.unlink(missing_ok=True)
    t0 = time.perf_counter()
    pyogrio.write_arrow(table, out, layer="customers", driver="GPKG", geometry_name=meta["geometry_name"],
                        geometry_type="Point", crs=meta["crs"], layer_options={"SPATIAL_INDEX": "YES"})
    print(f"FLOOR {time.perf_counter() - t0:.4f}", flush=True)


# ---------------------------------------------------------------------------
# the database beside the GeoPackage (--postgis)

DB_SCHEMA = "geopress_bench"


def customers_config(work: Path, dsn: str | None):
    """The bench's [customers] as geopress reads it: the GeoPackage, or with ``dsn`` the table loaded there."""
    from geopress.config import CustomersConfig, DatabaseSource

    db = None if dsn is None else DatabaseSource(database=dsn, table=f"{DB_SCHEMA}.customers")
    return CustomersConfig(path=None if db else work / "customers.gpkg", layer=None if db else "customers",
                           id_field="account", mail_fields=("owner", "mail_address"), floors_field="floors",
                           database=db)


def load_database(work: Path, dsn: str) -> None:
    """The bench's customers into ``geopress_bench.customers`` (as a GIS would keep them: a GiST index)."""
    import adbc_driver_postgresql.dbapi as dbapi
    import pyogrio

    from geopress.io import postgis

    meta, table = pyogrio.read_arrow(work / "customers.gpkg", layer="customers")
    geometry = meta["geometry_name"] or "wkb_geometry"
    table = table.rename_columns(["geom" if c == geometry else c for c in table.column_names])
    columns = ", ".join("geom geometry(Point, 32631)" if f.name == "geom" else
                        f"{postgis.quote(f.name)} {postgis._sql_type(f, 'customers')}" for f in table.schema)
    with dbapi.connect(dsn) as con, con.cursor() as cur:
        cur.execute(f"DROP SCHEMA IF EXISTS {DB_SCHEMA} CASCADE")
        cur.execute(f"CREATE SCHEMA {DB_SCHEMA}")
        cur.execute(f"CREATE TABLE {DB_SCHEMA}.customers ({columns})")
        cur.adbc_ingest("customers", table, mode="append", db_schema_name=DB_SCHEMA)
        cur.execute(f"CREATE INDEX ON {DB_SCHEMA}.customers USING gist (geom)")
        con.commit()


def read_child(work: Path, dsn: str | None) -> None:
    """Read the customers as a run does; prints READ s."""
    from geopress.io.vector import read_customers

    t0 = time.perf_counter()
    cust = read_customers(customers_config(work, dsn))
    print(f"READ {time.perf_counter() - t0:.4f} {len(cust.frame)}", flush=True)


def publish_child(work: Path, dsn: str) -> None:
    """Publish the floor's customers table with the flagged views, as a run does; prints PUBLISH s."""
    from geopress.io import postgis

    meta, table = floor_table(work)
    geometry = meta["geometry_name"]
    layers = {"customers": postgis.Table(data=table, geometry=geometry, kind="Point", srid=32631, key="account",
                                         indexes=("status",))}
    layers.update({name: postgis.View(of="customers", column="status", values=(code,)) for code, name in FLAGGED.items()})
    t0 = time.perf_counter()
    with postgis.Publication(dsn, DB_SCHEMA) as pub:
        pub.build(layers)
        pub.swap({"bench": True}, list(layers))
    print(f"PUBLISH {time.perf_counter() - t0:.4f}", flush=True)


def bench_database(work: Path, n: int, repeat: int, dsn: str, floor_s: float) -> None:
    """Read and publish times of the database beside the GeoPackage's at ``n`` customers."""
    load_database(work, dsn)
    runs: dict[str, list[float]] = {"read gpkg": [], "read db": [], "publish db": []}
    tags = {"read gpkg": ("read", "READ"), "read db": ("read-db", "READ"), "publish db": ("publish-db", "PUBLISH")}
    for i in range(repeat):
        for variant in list(runs) if i % 2 == 0 else list(runs)[::-1]:
            child, tag = tags[variant]
            env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
            m = measure([sys.executable, __file__, "--child", child, "--work", str(work), "--postgis", dsn], env,
                        sample=False)
            if m.exit_code != 0:
                sys.exit(f"{variant} failed with exit code {m.exit_code}")
            seconds = float(next(line.split()[1] for line in m.stdout.splitlines() if line.startswith(tag + " ")))
            runs[variant].append(seconds)
            print(f"N={n:,} run {i + 1} {variant:10s} {seconds:8.2f} s  peak RSS {m.rss_gb:5.2f} GB", flush=True)
    med = {v: statistics.median(r) for v, r in runs.items()}
    print(f"\n{n:,} customers, the database beside the GeoPackage")
    print(f"  read: GeoPackage {med['read gpkg']:.2f} s, database {med['read db']:.2f} s "
          f"({med['read db'] / med['read gpkg']:.2f}x)")
    print(f"  publish: floor GeoPackage write {floor_s:.2f} s, database (COPY, indexes, views, swap) "
          f"{med['publish db']:.2f} s ({med['publish db'] / floor_s:.2f}x)")


# ---------------------------------------------------------------------------
# measuring


VARIANTS = ("first", "rerun", "floor", "script")


def run_child(variant: str, work: Path, *, sample: bool = False) -> Measured:
    """One variant in a fresh process, measured (see _measure.py: ``sample`` for the PSS, which slows what it
    measures); the floor's time is its write alone."""
    import shutil

    if variant == "first":
        shutil.rmtree(work / "out-geopress", ignore_errors=True)
    # the file system's dirty pages written out first, untimed: the last run's outputs (a GeoPackage of 1 GB at
    # 4,000,000 customers) are not written back during this one
    os.sync()
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    child = {"first": "geopress", "rerun": "geopress", "floor": "floor", "script": "baseline"}[variant]
    m = measure([sys.executable, __file__, "--child", child, "--work", str(work)], env, sample=sample)
    if m.exit_code != 0:
        sys.exit(f"{variant} failed with exit code {m.exit_code}")
    if variant == "floor":
        m.wall_s = float(next(line.split()[1] for line in m.stdout.splitlines() if line.startswith("FLOOR ")))
    return m


def in_child(what: str, work: Path, n: int) -> None:
    """``--child what`` for ``n`` customers under ``work`` in a fresh process; exits when it fails."""
    done = subprocess.run([sys.executable, __file__, "--child", what, "--work", str(work), "--n", str(n)])
    if done.returncode != 0:
        sys.exit(f"{what} failed with exit code {done.returncode}")


def compare_statuses(work: Path) -> int:
    import pyogrio

    a = pyogrio.read_dataframe(work / "out-geopress" / "pressure.gpkg", layer="customers",
                               columns=["account", "status"], read_geometry=False, use_arrow=True)
    b = pyogrio.read_dataframe(work / "out-baseline" / "pressure.gpkg", layer="customers",
                               columns=["account", "status"], read_geometry=False, use_arrow=True)
    merged = a.merge(b, on="account", suffixes=("_gp", "_base"), validate="one_to_one")
    if len(merged) != len(a) or len(a) != len(b):
        sys.exit(f"customer counts differ: geopress {len(a)}, baseline {len(b)}")
    diff = merged[merged["status_gp"] != merged["status_base"]]
    if len(diff):
        sys.exit(f"{len(diff)} statuses differ, e.g.\n{diff.head()}")
    return len(merged)


def kernel_rate(work: Path, repeat: int) -> float:
    """Points per second of the bilinear kernel on the DEM in memory (1,000,000 random points)."""
    import rasterio

    sys.path.insert(0, str(ROOT))
    from geopress.terrain import sample_pixels

    with rasterio.open(work / "dem.tif") as src:
        dem = src.read(1)
    rng = np.random.default_rng(1)
    n = 1_000_000
    cols, rows = rng.uniform(0, SIZE, n), rng.uniform(0, SIZE, n)
    times = []
    for _ in range(max(repeat, 3)):
        t0 = time.perf_counter()
        sample_pixels(dem, cols, rows, nodata=NODATA, method="bilinear")
        times.append(time.perf_counter() - t0)
    return n / statistics.median(times)


def bench_one(work: Path, n: int, repeat: int, with_script: bool) -> dict[str, float]:
    """geopress's first run and re-run and the floor once each for their peak PSS only, then every variant at ``n``
    customers, alternating, timed without sampling memory. Prints and returns the medians (s) and geopress's peak
    PSS (GB)."""
    # the data made, and the statuses compared below, in processes of their own: the timed runs are this
    # process's children, and a child's peak RSS as wait4 gives it starts from its parent's at its start
    in_child("prepare", work, n)
    variants = [v for v in VARIANTS if v != "script" or with_script]
    pss = {}
    for variant in ("first", "rerun", "floor"):  # the first run leaves the outputs the re-run and the floor need
        m = run_child(variant, work, sample=True)
        pss[variant] = m.pss_gb
        print(f"N={n:,} memory {variant:7s} peak PSS of all its processes {m.pss_gb:5.2f} GB (took {m.wall_s:.2f} s "
              "while sampled; not timed)", flush=True)
    runs: dict[str, list[Measured]] = {v: [] for v in variants}
    for i in range(repeat):
        for variant in variants if i % 2 == 0 else variants[::-1]:
            m = run_child(variant, work)
            runs[variant].append(m)
            print(f"N={n:,} run {i + 1} {variant:7s} {m.wall_s:8.2f} s  peak RSS {m.rss_gb:5.2f} GB", flush=True)
    if with_script:
        in_child("compare", work, n)
    med = {v: statistics.median(m.wall_s for m in r) for v, r in runs.items()}
    rss = {v: max(m.rss_gb for m in r) for v, r in runs.items()}
    steps = json.loads((work / "out-geopress" / "run.json").read_text())["timings_s"]
    print(f"\n{n:,} customers" + (", statuses identical in geopress and the script" if with_script else ""))
    for v in variants:
        print(f"  {v:7s} median {med[v]:8.2f} s  {1e6 * med[v] / n:6.2f} us per customer  peak RSS {rss[v]:.2f} GB"
              + (f"  peak PSS {pss[v]:.2f} GB" if v in pss else ""))
    for v in ("first", "rerun"):
        # each pair of runs follows back to back, so it shares the machine's load more than the medians do
        pairs = [g.wall_s / f.wall_s for g, f in zip(runs[v], runs["floor"])]
        print(f"  geopress {v} / floor: {med[v] / med['floor']:.2f}x (within pairs: median "
              f"{statistics.median(pairs):.2f}x)")
    if with_script:
        pairs = [b.wall_s / g.wall_s for g, b in zip(runs["first"], runs["script"])]
        print(f"  script / geopress first run: {med['script'] / med['first']:.2f}x faster (within pairs: median "
              f"{statistics.median(pairs):.2f}x)")
    print("  geopress steps (last run): " + ", ".join(f"{k} {v:.2f} s" for k, v in steps.items()))
    return {**{f"{v}_s": med[v] for v in variants}, "pss_gb": max(pss["first"], pss["rerun"]), "floor_s": med["floor"]}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, nargs="+", default=[1_000_000], help="customers, one or more sizes "
                    "(default 1,000,000)")
    ap.add_argument("--repeat", type=int, default=3, help="alternating runs of each variant (default 3)")
    ap.add_argument("--script-at", type=int, default=1_000_000,
                    help="the size at which the straightforward script runs too (default 1,000,000)")
    ap.add_argument("--work", type=Path, default=Path("bench-out"), help="folder for data and outputs")
    ap.add_argument("--postgis", metavar="DSN", help="also time reading and publishing with this PostgreSQL/PostGIS "
                    "database (libpq connection string; the role creates the schema geopress_bench)")
    ap.add_argument("--child", choices=["geopress", "baseline", "floor", "read", "read-db", "publish-db", "prepare",
                                        "compare"], help=argparse.SUPPRESS)
    args = ap.parse_args()
    work = args.work.resolve()
    if args.child:
        children = {"geopress": geopress_run, "baseline": baseline, "floor": floor,
                    "read": lambda w: read_child(w, None), "read-db": lambda w: read_child(w, args.postgis),
                    "publish-db": lambda w: publish_child(w, args.postgis), "prepare": lambda w: prepare(w, args.n[0]),
                    "compare": compare_statuses}
        children[args.child](work)
        return
    results = {}
    for n in args.n:
        results[n] = bench_one(work / f"n{n}", n, args.repeat, n == args.script_at)
        if args.postgis:
            bench_database(work / f"n{n}", n, args.repeat, args.postgis, results[n]["floor_s"])
    if len(results) > 1:
        small, large = min(results), max(results)
        for v in ("first", "rerun"):
            ratio = (results[large][f"{v}_s"] / large) / (results[small][f"{v}_s"] / small)
            print(f"time per customer, {v} run, at {large:,} against {small:,}: {ratio:.2f}x")
    smallest = work / f"n{min(results)}"
    print(f"bilinear kernel in process: {kernel_rate(smallest, args.repeat) / 1e6:.1f} million points per second")


if __name__ == "__main__":
    main()
