"""Generate the fictional demo data set for geopress.

The demo describes Tarnwhistle, an invented hill town in an invented state
(code "ZZ").  Everything here is made up: the terrain, the pressure zones,
the owners and the street addresses.  The grid is placed in UTM zone 31N
(EPSG:32631) a few kilometres north of the equator on the central meridian,
which is open ocean, so it cannot be mistaken for a real place.

Files written to the output folder (default: ``data_demo/`` beside
``scripts/``):

* ``dem.tif``               synthetic DEM, metres, float32, 5 m pixels
* ``zones.gpkg``            layer ``zones``: three pressure zones
* ``customers.gpkg``        layer ``parcels``: meter points
* ``customers_parcels.gpkg`` layer ``lots``: polygon parcels, same fields
* ``geopress.toml``         demo config (points)
* ``geopress_lots.toml``    alternative config (polygon lots)
* ``readings.gpkg``         layer ``gauges``: invented field pressure readings
* ``README.md``             description of the data set

The script is deterministic: a fixed seed, no timestamps in the GeoTIFF and
a fixed ``OGR_CURRENT_DATE`` for the GeoPackages, so running it twice gives
identical files.  ``--summary`` prints the statuses the screening is
expected to assign, computed from the analytic terrain surface.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections import Counter
from pathlib import Path

# GeoPackage writers stamp gpkg_contents.last_change with the current time
# unless this is set; pin it so the files are reproducible.
os.environ.setdefault("OGR_CURRENT_DATE", "2026-01-01T00:00:00Z")

import geopandas as gpd  # noqa: E402
import numpy as np  # noqa: E402
import rasterio  # noqa: E402
import shapely  # noqa: E402
from rasterio.transform import from_origin  # noqa: E402
from shapely.affinity import rotate  # noqa: E402
from shapely.geometry import LineString, Polygon, box  # noqa: E402
from shapely.ops import split  # noqa: E402

# ---------------------------------------------------------------------------
# Constants
# ---------------------------------------------------------------------------

SEED = 417_2026
CRS = "EPSG:32631"  # WGS 84 / UTM zone 31N

M_PER_FT = 0.3048  # metres per international foot (exact)
PSI_PER_FT = 0.433  # psi per foot of water head (as in the config)

# Raster grid: 600 x 600 pixels of 5 m, i.e. a 3 km square.
PIXEL_M = 5.0
NCOLS = 600
NROWS = 600
WEST = 498_500.0
SOUTH = 8_500.0
EAST = WEST + NCOLS * PIXEL_M
NORTH = SOUTH + NROWS * PIXEL_M
NODATA = -9999.0

# Disused quarry pit: a window of pixels set to nodata (rows, cols; end
# exclusive).  Rows count down from the north edge.
PIT_ROWS = (400, 420)
PIT_COLS = (460, 480)

TOWN = "Tarnwhistle"
STATE = "ZZ"

# Zone boundaries follow (smoothed) ground contours, in metres.
LOWFIELD_TOP_M = 312.0
RIDGEWAY_TOP_M = 366.0

# Hydraulic grade lines, feet.  Chosen so the demo shows every status.
TANK = {"zone": "Ridgeway", "high_water_ft": 1212.0, "low_water_ft": 1194.0}
# What the tank (a standpipe) can hold, and its storage levels below low water (the bottom
# of equalizing storage): the level with fire suppression storage used too,
# and with standby storage used too.  Invented, like the rest.
TANK_LEVELS = {"overflow_ft": 1214.0, "bottom_ft": 1135.0,
               "fire_bottom_ft": 1150.0, "standby_bottom_ft": 1145.0}
PRV = {"zone": "Lowfield", "valve_elevation_ft": 1010.0, "setting_psi": 51.0}
PUMP = {"zone": "Summit", "discharge_hgl_ft": 1405.0}
PUMP_SHUTOFF_HGL_FT = 1425.0
# The criteria of a published rule set (20 psi with fire storage used, 30 psi
# at peak hour) and a standby minimum, for the storage levels.
RULE_SET = "wac-246-290-230"
STANDBY_MIN_PSI = 20.0

CRITERIA = {
    "max_static_psi": 80.0,
    "min_static_psi": 35.0,
    "psi_per_ft": PSI_PER_FT,
    "floor_height_ft": 10.0,
}

N_POINTS = 4700
N_LOTS = 300

STATUSES = (
    "no_terrain",
    "unzoned",
    "above_hgl",
    "low",
    "high",
    "low_upper_floors",
    "ok",
)


def rng_for(part: int) -> np.random.Generator:
    """Independent generator per part, so tuning one part leaves the rest."""
    return np.random.default_rng([SEED, part])


# ---------------------------------------------------------------------------
# Terrain
# ---------------------------------------------------------------------------


def _noise_params() -> np.ndarray:
    """Wave number, direction, phase and amplitude of the smooth noise."""
    rng = rng_for(1)
    k = 12
    wavelength = rng.uniform(300.0, 1000.0, k)
    theta = rng.uniform(0.0, 2.0 * np.pi, k)
    phase = rng.uniform(0.0, 2.0 * np.pi, k)
    amp = rng.uniform(0.15, 0.45, k)
    kx = 2.0 * np.pi / wavelength * np.cos(theta)
    ky = 2.0 * np.pi / wavelength * np.sin(theta)
    return np.stack([kx, ky, phase, amp], axis=1)


NOISE = _noise_params()


def _sigmoid(t):
    return 1.0 / (1.0 + np.exp(-t))


def smooth_ground_m(u, v):
    """Ground elevation in metres without noise; u, v metres from SW corner.

    A plane rising to the north, a valley channel in the south, an
    escarpment between the middle slopes and the summit, and a crest.
    """
    u = np.asarray(u, dtype=float)
    v = np.asarray(v, dtype=float)
    vs = v + 60.0 * np.sin(2.0 * np.pi * u / 2600.0 + 0.7)  # bend contours
    plane = 283.0 + 0.024 * vs + 0.003 * (u - 1500.0)
    south_rise = 9.0 * np.exp(-v / 260.0)
    channel_v = 430.0 + 90.0 * np.sin(2.0 * np.pi * u / 3000.0)
    channel = -7.0 * np.exp(-(((v - channel_v) / 140.0) ** 2))
    escarpment = 30.0 * _sigmoid((vs - 2150.0) / 85.0)
    crest = 20.0 * np.exp(-(((vs - 2720.0) / 260.0) ** 2))
    return plane + south_rise + channel + escarpment + crest


def ground_m(u, v):
    """Full analytic ground surface in metres (smooth surface + noise)."""
    u = np.asarray(u, dtype=float)
    v = np.asarray(v, dtype=float)
    z = smooth_ground_m(u, v)
    for kx, ky, phase, amp in NOISE:
        z = z + amp * np.sin(kx * u + ky * v + phase)
    return z


def pixel_centres():
    """Local (u, v) coordinates of every pixel centre, row 0 at the north."""
    cols = (np.arange(NCOLS) + 0.5) * PIXEL_M
    rows_v = (NROWS - np.arange(NROWS) - 0.5) * PIXEL_M
    return np.meshgrid(cols, rows_v)


def pit_bounds_local():
    """The quarry pit as (umin, vmin, umax, vmax) in local metres."""
    umin = PIT_COLS[0] * PIXEL_M
    umax = PIT_COLS[1] * PIXEL_M
    vmax = (NROWS - PIT_ROWS[0]) * PIXEL_M
    vmin = (NROWS - PIT_ROWS[1]) * PIXEL_M
    return umin, vmin, umax, vmax


def build_dem() -> np.ndarray:
    """The DEM array (float32, metres) with the quarry pit as nodata."""
    uu, vv = pixel_centres()
    dem = ground_m(uu, vv).astype(np.float32)
    dem[PIT_ROWS[0]:PIT_ROWS[1], PIT_COLS[0]:PIT_COLS[1]] = NODATA
    return dem


def write_dem(path: Path, dem: np.ndarray) -> None:
    """Write the DEM as a tiled, DEFLATE-compressed GeoTIFF."""
    profile = {
        "driver": "GTiff",
        "width": NCOLS,
        "height": NROWS,
        "count": 1,
        "dtype": "float32",
        "crs": CRS,
        "transform": from_origin(WEST, NORTH, PIXEL_M, PIXEL_M),
        "nodata": NODATA,
        "tiled": True,
        "blockxsize": 256,
        "blockysize": 256,
        "compress": "deflate",
        "predictor": 3,
        "zlevel": 9,
    }
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(dem, 1)
        dst.units = ("metre",)
        dst.descriptions = ("ground elevation",)
        dst.update_tags(1, VERTICAL_UNITS="m")


# ---------------------------------------------------------------------------
# Pressure zones
# ---------------------------------------------------------------------------


def town_polygon_local() -> Polygon:
    """Service area of the town in local metres: most of the DEM.

    The margins and a notch in the north-east (homes on private wells)
    are left outside every zone.
    """
    return Polygon(
        [
            (150, 180), (800, 140), (1400, 120), (2000, 160), (2450, 210),
            (2870, 420), (2860, 1100), (2900, 1800), (2560, 1980),
            (2480, 2350), (2700, 2520), (2620, 2860), (1900, 2870),
            (1350, 2840), (700, 2900), (300, 2860), (120, 2300),
            (170, 1700), (110, 1200), (160, 700), (100, 420),
        ]
    )


def contour_line_local(target_m: float) -> LineString:
    """Line where the smooth ground reaches ``target_m``, west to east.

    Found by bisection along v for each u; v is monotonic over the search
    window.  Extends past the town so it cuts the polygon cleanly.
    """
    u = np.linspace(-100.0, 3100.0, 81)
    lo = np.full_like(u, 700.0)
    hi = np.full_like(u, 2600.0)
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        above = smooth_ground_m(u, mid) > target_m
        hi = np.where(above, mid, hi)
        lo = np.where(above, lo, mid)
    v = np.round(0.5 * (lo + hi), 2)
    return LineString(np.column_stack([u, v])).simplify(1.0)


def build_zones_local() -> dict[str, Polygon]:
    """Split the town along two contours; the pieces share edges exactly."""
    town = town_polygon_local()
    lower = contour_line_local(LOWFIELD_TOP_M)
    upper = contour_line_local(RIDGEWAY_TOP_M)

    def south_north(poly, line):
        parts = list(split(poly, line).geoms)
        if len(parts) != 2:
            raise RuntimeError(f"contour split gave {len(parts)} parts")
        parts.sort(key=lambda p: p.centroid.y)
        return parts[0], parts[1]

    lowfield, rest = south_north(town, lower)
    ridgeway, summit = south_north(rest, upper)
    return {PRV["zone"]: lowfield, TANK["zone"]: ridgeway, PUMP["zone"]: summit}


def to_world(geom):
    """Shift a geometry from local metres to UTM coordinates."""
    return shapely.transform(geom, lambda c: c + np.array([WEST, SOUTH]))


def zones_frame(zones_local: dict[str, Polygon]) -> gpd.GeoDataFrame:
    names = {
        TANK["zone"]: "Ridgeway tank zone: middle slopes, fed by the "
        "Ridgeway standpipe",
        PRV["zone"]: "Lowfield PRV zone: valley floor, fed through the "
        "Brook Road reducing valve",
        PUMP["zone"]: "Summit closed zone: escarpment top, fed by the "
        "Crestline booster station",
    }
    order = [PRV["zone"], TANK["zone"], PUMP["zone"]]
    return gpd.GeoDataFrame(
        {
            "zone": order,
            "name": [names[z] for z in order],
            "geometry": [to_world(zones_local[z]) for z in order],
        },
        crs=CRS,
    )


# ---------------------------------------------------------------------------
# Customer locations
# ---------------------------------------------------------------------------


def slope_weight(u, v):
    """Building likelihood: steep ground (the escarpment) is sparse."""
    d = 5.0
    gx = (smooth_ground_m(u + d, v) - smooth_ground_m(u - d, v)) / (2 * d)
    gy = (smooth_ground_m(u, v + d) - smooth_ground_m(u, v - d)) / (2 * d)
    slope = np.hypot(gx, gy)
    return np.clip(1.0 - (slope - 0.035) / 0.06, 0.12, 1.0)


class Placer:
    """Rejection sampler for customer locations in local metres."""

    def __init__(self, zones_local: dict[str, Polygon], rng):
        self.zones = zones_local
        self.town = town_polygon_local()
        self.rng = rng
        self.boundaries = shapely.union_all(
            [z.boundary for z in zones_local.values()]
        )
        umin, vmin, umax, vmax = pit_bounds_local()
        self.pit_keepout = box(umin, vmin, umax, vmax).buffer(15.0)
        for g in [self.boundaries, self.pit_keepout, self.town]:
            shapely.prepare(g)
        for z in self.zones.values():
            shapely.prepare(z)
        self.cells: dict[tuple[int, int], list[tuple[float, float]]] = {}

    def claim(self, u, v, n):
        """Accept candidates in order, at most ``n``, keeping every accepted
        point at least MIN_SPACING_M from all points accepted before."""
        cell = MIN_SPACING_M
        got_u, got_v = [], []
        for ui, vi in zip(u, v):
            if len(got_u) == n:
                break
            ci, cj = int(np.floor(ui / cell)), int(np.floor(vi / cell))
            near = (p for di in (-1, 0, 1) for dj in (-1, 0, 1)
                    for p in self.cells.get((ci + di, cj + dj), ()))
            if any(np.hypot(ui - pu, vi - pv) < MIN_SPACING_M
                   for pu, pv in near):
                continue
            self.cells.setdefault((ci, cj), []).append((ui, vi))
            got_u.append(ui)
            got_v.append(vi)
        return np.array(got_u), np.array(got_v)

    def zone_of(self, u, v):
        out = np.full(np.shape(u), None, dtype=object)
        for name, poly in self.zones.items():
            out[shapely.contains_xy(poly, u, v)] = name
        return out

    def _ok(self, u, v, zone):
        inside = (u > 10) & (u < NCOLS * PIXEL_M - 10)
        inside &= (v > 10) & (v < NROWS * PIXEL_M - 10)
        ok = inside & ~shapely.contains_xy(self.pit_keepout, u, v)
        pts = shapely.points(u, v)
        ok &= shapely.distance(pts, self.boundaries) > 3.0
        if zone is None:
            ok &= shapely.contains_xy(self.town, u, v)
        elif zone == "unzoned":
            ok &= ~shapely.contains_xy(self.town, u, v)
        else:
            ok &= shapely.contains_xy(self.zones[zone], u, v)
        return ok

    def sample(self, n, centre, sigma, zone=None, weight=True, extra=None):
        """Draw ``n`` points from a gaussian (or uniform if sigma is None)."""
        got_u, got_v = [], []
        have = 0
        while have < n:
            m = 4 * n + 50
            if sigma is None:
                u = self.rng.uniform(0, NCOLS * PIXEL_M, m)
                v = self.rng.uniform(0, NROWS * PIXEL_M, m)
            else:
                u = self.rng.normal(centre[0], sigma[0], m)
                v = self.rng.normal(centre[1], sigma[1], m)
            keep = self._ok(u, v, zone)
            if weight:
                keep &= self.rng.uniform(0, 1, m) < slope_weight(u, v)
            if extra is not None:
                keep &= extra(u, v)
            cu, cv = self.claim(u[keep], v[keep], n - have)
            got_u.append(cu)
            got_v.append(cv)
            have += len(cu)
        return np.concatenate(got_u), np.concatenate(got_v)


# Neighbourhoods: (tag, centre u, v, sigma u, v, count, zone).
NEIGHBOURHOODS = [
    ("brookside", 900, 520, 380, 150, 520, PRV["zone"]),
    ("millrace", 2050, 600, 330, 170, 430, PRV["zone"]),
    ("lowfield", 1500, 900, 650, 180, 600, PRV["zone"]),
    ("ridgeway_w", 700, 1550, 350, 220, 520, TANK["zone"]),
    ("ridgeway_e", 2250, 1600, 350, 220, 500, TANK["zone"]),
    ("ridgeway_mid", 1500, 1450, 420, 140, 380, TANK["zone"]),
    ("summit", 1500, 2480, 650, 200, 430, PUMP["zone"]),
]
N_DOWNTOWN = 170
N_BROW = 48
N_ESCARP = 170
N_UNZONED = 47
N_PIT = 12
N_OFFGRID = 12
MIN_SPACING_M = 4.0  # no two meter points closer than this


def place_points(zones_local, rng):
    """All meter points: returns u, v, tag arrays (local metres)."""
    placer = Placer(zones_local, rng)
    us, vs, tags = [], [], []

    def add(u, v, tag):
        us.append(u)
        vs.append(v)
        tags.extend([tag] * len(u))

    n_fixed = sum(n[5] for n in NEIGHBOURHOODS)
    n_special = N_DOWNTOWN + N_BROW + N_ESCARP + N_UNZONED + N_PIT + N_OFFGRID
    n_background = N_POINTS - n_fixed - n_special
    if n_background < 0:
        raise RuntimeError("neighbourhood counts exceed N_POINTS")

    for tag, cu, cv, su, sv, n, zone in NEIGHBOURHOODS:
        add(*placer.sample(n, (cu, cv), (su, sv), zone=zone), tag)
    add(*placer.sample(n_background, None, None), "scattered")

    # Downtown: a compact commercial core high in the tank zone.
    add(*placer.sample(N_DOWNTOWN, (1380, 1840), (70, 45),
                       zone=TANK["zone"], weight=False), "downtown")

    # Brow: houses at the very top of the tank zone, at or above the
    # tank's low-water level.
    lw_m = TANK["low_water_ft"] * M_PER_FT
    add(*placer.sample(N_BROW, (2250, 2250), (300, 80), zone=TANK["zone"],
                       weight=False,
                       extra=lambda u, v: ground_m(u, v) > lw_m + 0.3),
        "brow")

    # Escarpment: houses on the upper slopes of the tank zone, well below
    # the brow but high enough for low pressure at low water.
    add(*placer.sample(N_ESCARP, (1000, 2150), (450, 90), zone=TANK["zone"],
                       weight=False,
                       extra=lambda u, v: (ground_m(u, v) > 340.5)
                       & (ground_m(u, v) < lw_m - 1.0)),
        "escarp")

    # Unzoned: rural homes outside the service area but on the DEM.
    add(*placer.sample(N_UNZONED, None, None, zone="unzoned", weight=False),
        "unzoned")

    # Quarry works on the nodata patch (10 m clear of its edge).
    umin, vmin, umax, vmax = pit_bounds_local()
    add(*placer.claim(rng.uniform(umin + 10, umax - 10, 20 * N_PIT),
                      rng.uniform(vmin + 10, vmax - 10, 20 * N_PIT), N_PIT),
        "pit")

    # Off-grid: beyond the DEM extent on every side.
    side = np.arange(N_OFFGRID) % 4
    along = rng.uniform(200, 2800, N_OFFGRID)
    out = rng.uniform(20, 250, N_OFFGRID)
    size = NCOLS * PIXEL_M
    u = np.select([side == 0, side == 1, side == 2], [-out, size + out, along],
                  along)
    v = np.select([side == 0, side == 1, side == 2], [along, along, -out],
                  size + out)
    add(u, v, "offgrid")

    u = np.round(np.concatenate(us), 2)
    v = np.round(np.concatenate(vs), 2)
    return u, v, np.array(tags, dtype=object)


# ---------------------------------------------------------------------------
# Polygon lots
# ---------------------------------------------------------------------------


def lot_block(rng, origin, angle, ncols, nrows, slot=(34.0, 40.0)):
    """Rectangular lots on a rotated street grid (pairs of back-to-back rows,
    a 16 m street between pairs)."""
    lots = []
    for r in range(nrows):
        pair, back = divmod(r, 2)
        v0 = pair * (2 * slot[1] + 16.0) + back * slot[1]
        for c in range(ncols):
            w = rng.uniform(15.0, 30.0)
            d = rng.uniform(24.0, 36.0)
            cu = c * slot[0] + slot[0] / 2 + rng.uniform(-1.5, 1.5)
            cv = v0 + slot[1] / 2 + rng.uniform(-1.5, 1.5)
            rect = box(cu - w / 2, cv - d / 2, cu + w / 2, cv + d / 2)
            rect = rotate(rect, angle, origin=(0, 0))
            lots.append(shapely.transform(rect, lambda p: p + np.array(origin)))
    return lots


EDGE_CASE_NOTES = {
    "straddles_lowfield_ridgeway": "across the Lowfield / Ridgeway "
                                   "boundary, interior point 4 m into Ridgeway",
    "straddles_ridgeway_summit": "rotated, across the Ridgeway / Summit "
                                 "boundary, interior point about 4 m into "
                                 "Summit",
    "half_on_quarry_pit": "interior point on valid ground, 8 m of the "
                          "lot on the "
                          "nodata quarry pit",
    "inside_quarry_pit": "entirely on the nodata quarry pit",
    "unzoned": "on the DEM but outside every zone (north-east notch)",
    "off_dem_edge": "across the west edge of the DEM, interior point 5 m "
                    "outside it; outside every zone",
}


def edge_lots():
    """Hand-placed lots that test polygon edge cases (local metres)."""
    umin, vmin, umax, vmax = pit_bounds_local()
    lower = contour_line_local(LOWFIELD_TOP_M)
    upper = contour_line_local(RIDGEWAY_TOP_M)
    on_lower = lower.interpolate(0.30, normalized=True)
    on_upper = upper.interpolate(0.60, normalized=True)
    return [
        ("straddles_lowfield_ridgeway",
         box(on_lower.x - 12, on_lower.y - 11, on_lower.x + 12,
             on_lower.y + 19)),
        ("straddles_ridgeway_summit",
         rotate(box(on_upper.x - 10, on_upper.y - 9, on_upper.x + 10,
                    on_upper.y + 19), 30, origin=(on_upper.x, on_upper.y))),
        ("half_on_quarry_pit",
         box(umin - 18, vmin + 40, umin + 8, vmin + 65)),
        ("inside_quarry_pit",
         box(umin + 30, vmin + 30, umin + 55, vmin + 60)),
        ("unzoned", box(2750, 2100, 2775, 2130)),
        ("off_dem_edge", box(-18, 1500, 8, 1530)),
    ]


def place_lots(zones_local, rng):
    """Polygon lots: three subdivisions plus the edge cases."""
    placer = Placer(zones_local, rng)
    edges = edge_lots()
    n_regular = N_LOTS - len(edges)
    candidates = []
    candidates += lot_block(rng, (420, 260), 25.0, 22, 8)  # valley
    candidates += lot_block(rng, (1500, 1820), 0.0, 16, 8)  # upper slopes
    candidates += lot_block(rng, (900, 2560), -15.0, 12, 4)  # plateau
    lots, tags = [], []
    for poly in candidates:
        c = poly.centroid
        zone = placer.zone_of(np.array([c.x]), np.array([c.y]))[0]
        if zone is None or not placer.zones[zone].contains(poly.buffer(3.0)):
            continue
        if poly.intersects(placer.pit_keepout):
            continue
        lots.append(poly)
        tags.append("subdivision")
    if len(lots) < n_regular:
        raise RuntimeError(f"only {len(lots)} regular lots fit")
    keep = np.sort(rng.choice(len(lots), n_regular, replace=False))
    lots = [lots[i] for i in keep]
    tags = [tags[i] for i in keep]
    for tag, poly in edges:
        lots.append(poly)
        tags.append(tag)
    lots = [shapely.set_precision(p, 0.01) for p in lots]
    return lots, np.array(tags, dtype=object)


# ---------------------------------------------------------------------------
# Attributes: owners, mailing addresses, floors, land use
# ---------------------------------------------------------------------------

FIRST_NAMES = [
    "Ada", "Ambrose", "Anaïs", "Bram", "Bartholomew", "Cassia", "Cormac",
    "Cosima", "Dagny", "Dashiell", "Delphine", "Élodie", "Elspeth", "Emrys",
    "Esme", "Fenna", "Florian", "Gideon", "Greer", "Hale", "Hester", "Idris",
    "Ines", "Ivo", "Jessamy", "Jory", "Juno", "Leontine", "Linnea", "Lorcan",
    "Mabyn", "Magnus", "Marit", "Nell", "Noor", "Odo", "Orla", "Otto",
    "Peregrine", "Perpetua", "Philippa", "Quinn", "Renée", "Rosalind",
    "Rowan", "Rufus", "Silas", "Søren", "Sybil", "Tamsin", "Thaddeus",
    "Tobin", "Ulla", "Una", "Vaughn", "Verity", "Winslow", "Wren", "Yara",
    "Zoë",
]

SURNAMES = [
    "Aldervane", "Ambrevine", "Birchwhistle", "Brindlecombe", "Carrowmede",
    "Cobbleworth", "Dapplewick", "Dunmarrow", "Elderwick", "Emberlow",
    "Fallowick", "Fennimark", "Gladwithe", "Gorsebrook", "Hartsmere",
    "Hollowmere", "Ivelcombe", "Juniperly", "Kettlewade", "Larkhollow",
    "Lintmoor", "Mallowfen", "Marrowby", "Mossgrave", "Nettlefold",
    "Nimbleford", "Orchardine", "Orrisdale", "Pellwhistle", "Quillfeather",
    "Rookwarden", "Rushcombe", "Sallowby", "Saltmarrow", "Tamberlin",
    "Thistlewode", "Tollenby", "Umberfield", "Vantresse", "Vellacott",
    "Wickerly", "Willowmere", "Yarrowmede", "Zephyrine", "O'Farrowdale",
    "D'Ambrecourt", "Quenwhistle", "Brackenwade", "Copperlind", "Dovetarn",
]

STREETS = [
    "Quillfeather Lane", "Sallow Row", "Tansy Way", "Cobnut Walk",
    "Brindle Row", "Millrace Steps", "Kettlewade Road", "Larkhollow Parade",
    "Fennel Court", "Thimble Hill", "Gorsebrook Drive", "Orrisroot Avenue",
    "Wickerly Close", "Harebell Rise", "Brook Bottom Road",
    "Beaconlight Way", "Teasel Crescent", "Mallowfen Street", "Dovetarn Road",
    "Pennyroyal Place", "Burdock Lane", "Sorrel Terrace", "Moorgrass Avenue",
    "Cinderpath Lane", "Tallowlight Street", "Ember Hill", "Nettlefold Way",
    "Copperlind Road", "Saltmarrow Close", "Yarrow Bank", "Lintmoor Drive",
    "Wheelwright Row", "Goosegrass Lane", "Thornapple Street",
    "Crestline Drive", "Summit Crescent", "Upper Ridgeway Road",
]

DOWNTOWN_STREETS = ["Tarnwhistle High Street", "Market Cross", "Guildhall Row",
                    "Lantern Yard"]

OTHER_CITIES = [("Port Quillery", "00921"), ("Ostrevane", "00733")]

# Landlords: (owner, mail address, city index or None for the town,
# parcels among the meter points, lots among the polygon parcels).
LANDLORDS = [
    ("=Marrowby Holdings", "Suite 4, 71 Larkhollow Parade", None, 12, 3),
    ("+Tansy Row Lettings", "PO Box 2207", None, 8, 0),
    ("@Larkhollow Rentals", "3 Harbour Walk", 0, 5, 0),
    ("-Sallowby Estates", "19 Copperlind Road", None, 4, 2),
    ("Brindlecombe Property Trust", "PO Box 118", None, 22, 4),
    ("Dovetarn Homes Ltd", "880 Wharfside Avenue", 0, 18, 0),
    ("Quillery Harbour Lettings", "41 Signal Street", 0, 12, 0),
    ("Ostrevane Residential Partners", "7 Ferrier Court", 1, 15, 3),
    ("Upper Tarn Housing Association", "2 Guildhall Row", None, 24, 0),
    ("Kettlewade & Daughters", "55 Kettlewade Road", None, 6, 0),
    ("Gorsebrook Land Co", "PO Box 961", None, 10, 4),
    ("Crestline Apartments LLC", "12 Market Cross", None, 14, 0),
    ("Millrace Mill Properties", "1 Millrace Steps", None, 9, 0),
    ("Sallow Gardens Developments", "PO Box 77", None, 0, 6),
    ("Harebell Lettings", "9 Harebell Rise", None, 0, 4),
]
# Individuals who let out a few houses each (meter points only).
N_SMALL_LANDLORDS = 76


def person_name(rng) -> str:
    first = FIRST_NAMES[rng.integers(len(FIRST_NAMES))]
    last = SURNAMES[rng.integers(len(SURNAMES))]
    r = rng.uniform()
    if r < 0.68:
        return f"{first} {last}"
    if r < 0.90:
        other = FIRST_NAMES[rng.integers(len(FIRST_NAMES))]
        return f"{first} & {other} {last}"
    if r < 0.96:
        return f"{last} Family Trust"
    initial = chr(ord("A") + int(rng.integers(26)))
    return f"{first} {initial}. {last}"


def town_zip(v: float) -> str:
    return "00418" if v > 1600.0 else "00417"


def street_for(u: float, v: float, tag: str) -> str:
    """Street names follow the neighbourhood: a coarse grid of blocks."""
    if tag == "downtown":
        return DOWNTOWN_STREETS[int(u // 40) % len(DOWNTOWN_STREETS)]
    if tag == "brow":
        return "Tankside Terrace"
    if tag == "escarp":
        return "Escarp Walk"
    if tag == "pit":
        return "Quarry Gate"
    i = int(np.clip(u // 350, 0, 8))
    j = int(np.clip(v // 400, 0, 7))
    return STREETS[(i * 5 + j * 3) % len(STREETS)]


def owner_occupier_records(u, v, tags, rng):
    """Default owner and a unique mailing address for every customer.

    Landlord and formula-test addresses are reserved so no owner-occupier
    shares them by accident.
    """
    used = {row[1] for row in LANDLORDS} | set(FORMULA_ADDRESSES)
    records = []
    for ui, vi, tag in zip(u, v, tags):
        street = street_for(ui, vi, tag)
        while True:
            number = int(rng.integers(1, 1000))
            addr = f"{number} {street}"
            if rng.uniform() < 0.04:
                addr = f"Unit {int(rng.integers(1, 9))}, {addr}"
            if addr not in used:
                break
        used.add(addr)
        city, zipc = TOWN, town_zip(vi)
        if rng.uniform() < 0.03:  # absentee owner elsewhere
            city, zipc = OTHER_CITIES[int(rng.integers(len(OTHER_CITIES)))]
        records.append(
            {"owner": person_name(rng), "mail_address": addr,
             "mail_city": city, "mail_state": STATE, "mail_zip": zipc}
        )
    return records, used


def landlord_list(rng, used, lots: bool):
    """Landlords for one file: the fixed companies plus small landlords."""
    out = []
    for owner, addr, city_idx, n_points, n_lots in LANDLORDS:
        n = n_lots if lots else n_points
        if n == 0:
            continue
        if city_idx is None:
            city, zipc = TOWN, "00417"
        else:
            city, zipc = OTHER_CITIES[city_idx]
        out.append((owner, addr, city, zipc, n))
    if lots:
        return out
    taken = set(used) | {o[1] for o in out}
    for _ in range(N_SMALL_LANDLORDS):
        while True:
            street = STREETS[int(rng.integers(len(STREETS)))]
            addr = f"{int(rng.integers(1, 1000))} {street}"
            if addr not in taken:
                break
        taken.add(addr)
        n = int(rng.choice([2, 2, 2, 3, 3, 4]))
        out.append((person_name(rng), addr, TOWN, "00417", n))
    return out


def assign_landlords(records, tags, used, rng, lots: bool):
    """Landlords own several parcels: same owner and mail_* on each.

    Each landlord's mailing address is distinct from every owner-occupier
    address, so sharing an address always means sharing an owner.
    """
    landlords = landlord_list(rng, used, lots)
    eligible = np.array([t in ORDINARY_TAGS for t in tags])
    # Rentals are more common downtown and in the valley.
    w = np.where(np.isin(tags, ["downtown", "brookside", "millrace"]), 3.0, 1.0)
    w = np.where(eligible, w, 0.0)
    total = sum(o[4] for o in landlords)
    picks = rng.choice(len(records), total, replace=False, p=w / w.sum())
    k = 0
    for owner, addr, city, zipc, n in landlords:
        for idx in picks[k:k + n]:
            records[idx] = {"owner": owner, "mail_address": addr,
                            "mail_city": city, "mail_state": STATE,
                            "mail_zip": zipc}
        k += n


# Tags of ordinary customers (not the deliberately odd ones).
ORDINARY_TAGS = {"brookside", "millrace", "lowfield", "ridgeway_w",
                 "ridgeway_e", "ridgeway_mid", "summit", "scattered",
                 "downtown", "brow", "escarp", "subdivision"}

# A few owner-occupier rows whose text starts with a formula character.
FORMULA_ADDRESSES = ["-12 Unit Rear, 5 Brindle Row", "=7 Fennel Court",
                     "+3 Annex, 14 Cobnut Walk",
                     "@ Wharf Cottage, 2 Millrace Steps"]


def add_formula_rows(records, tags, rng, lots: bool):
    """Owner-occupiers whose address or name starts with = + - or @."""
    addrs = FORMULA_ADDRESSES[:1] if lots else FORMULA_ADDRESSES
    shared = Counter(r["mail_address"] for r in records)
    ordinary = [i for i, t in enumerate(tags)
                if t in ORDINARY_TAGS and shared[records[i]["mail_address"]] == 1]
    picks = rng.choice(ordinary, len(addrs) + 1, replace=False)
    for idx, addr in zip(picks, addrs):
        records[idx]["mail_address"] = addr
    records[picks[-1]]["owner"] = "=Quenwhistle, Rowan"


def floors_and_use(tags, rng):
    """Stories and land use; tall buildings are concentrated downtown."""
    n = len(tags)
    floors = np.where(rng.uniform(0, 1, n) < 0.58, 1, 2).astype(np.int32)
    use = np.full(n, "residential", dtype=object)
    r = rng.uniform(0, 1, n)
    use[r < 0.05] = "commercial"
    use[(r >= 0.05) & (r < 0.065)] = "institutional"
    use[(r >= 0.065) & (r < 0.08)] = "industrial"
    tall_levels = np.arange(3, 13)
    tall_p = np.array([30, 25, 12, 9, 7, 5, 4, 3, 3, 2], dtype=float)
    tall_p /= tall_p.sum()
    for i, tag in enumerate(tags):
        if tag == "downtown":
            use[i] = "commercial" if rng.uniform() < 0.6 else "residential"
            if rng.uniform() < 0.72:
                floors[i] = rng.choice(tall_levels, p=tall_p)
        elif tag == "pit":
            use[i] = "industrial"
            floors[i] = 1
        elif rng.uniform() < 0.005:  # the odd walk-up elsewhere
            floors[i] = 3
    return floors, use


#: stories of the apartment tower at the foot of Ridgeway (see raise_tower)
TOWER_FLOORS = 12


def raise_tower(attrs, u, v, zones) -> int:
    """Make the lowest high-pressure customer of Ridgeway a 12-story apartment tower; return its index.

    At ground of about 1,020 ft under the tank its street sees more than 80 psi at high water, and its top
    floor, 110 ft up, less than 35 psi at low water: it is on both the high-pressure and the upper-floors
    list, the case a single status would hide. Its status stays high.
    """
    ground = analytic_ground_ft(u, v)
    status = classify(ground, zones, attrs["floors"])
    candidates = [i for i, (s, z) in enumerate(zip(status, zones)) if s == "high" and z == TANK["zone"]]
    i = min(candidates, key=lambda k: (ground[k], k))
    attrs["floors"][i] = TOWER_FLOORS
    attrs["land_use"][i] = "residential"
    return i


def build_attributes(u, v, tags, rng, accounts, lots=False):
    """Attribute columns for one file of customers."""
    records, used = owner_occupier_records(u, v, tags, rng)
    assign_landlords(records, tags, used, rng, lots)
    add_formula_rows(records, tags, rng, lots)
    floors, use = floors_and_use(tags, rng)
    cols = {k: [r[k] for r in records]
            for k in ("owner", "mail_address", "mail_city", "mail_state",
                      "mail_zip")}
    return {"account": list(accounts), **cols, "floors": floors,
            "land_use": list(use)}


def make_accounts(rng, n):
    nums = rng.choice(np.arange(1, 100_000), n, replace=False)
    return [f"A-{k:06d}" for k in nums]


# ---------------------------------------------------------------------------
# Expected statuses (self-check)
# ---------------------------------------------------------------------------


def zone_hgls_ft() -> dict[str, tuple[float, float]]:
    """(low, high) HGL in feet for every zone."""
    prv = PRV["valve_elevation_ft"] + PRV["setting_psi"] / PSI_PER_FT
    return {
        TANK["zone"]: (TANK["low_water_ft"], TANK["high_water_ft"]),
        PRV["zone"]: (prv, prv),
        PUMP["zone"]: (PUMP["discharge_hgl_ft"], PUMP["discharge_hgl_ft"]),
    }


def classify(ground_ft, zone, floors) -> list[str]:
    """Screening status for each customer, first rule that applies."""
    hgls = zone_hgls_ft()
    out = []
    for g, z, f in zip(ground_ft, zone, floors):
        if not np.isfinite(g):
            out.append("no_terrain")
            continue
        if z is None:
            out.append("unzoned")
            continue
        low, high = hgls[z]
        p_low = PSI_PER_FT * (low - g)
        top_ft = g + (f - 1) * CRITERIA["floor_height_ft"]
        if p_low <= 0:
            out.append("above_hgl")
        elif p_low < CRITERIA["min_static_psi"]:
            out.append("low")
        elif PSI_PER_FT * (high - g) > CRITERIA["max_static_psi"]:
            out.append("high")
        elif PSI_PER_FT * (low - top_ft) < CRITERIA["min_static_psi"]:
            out.append("low_upper_floors")
        else:
            out.append("ok")
    return out


def analytic_ground_ft(u, v):
    """Ground in feet from the analytic surface; NaN off the DEM or pit."""
    g = ground_m(u, v) / M_PER_FT
    off = (u < 0) | (u > NCOLS * PIXEL_M) | (v < 0) | (v > NROWS * PIXEL_M)
    umin, vmin, umax, vmax = pit_bounds_local()
    pit = (u >= umin) & (u <= umax) & (v >= vmin) & (v <= vmax)
    return np.where(off | pit, np.nan, g)


def bilinear_ground_ft(dem, u, v):
    """Ground in feet sampled bilinearly between pixel centres of ``dem``."""
    c = u / PIXEL_M - 0.5
    r = (NROWS * PIXEL_M - v) / PIXEL_M - 0.5
    c0 = np.floor(c).astype(int)
    r0 = np.floor(r).astype(int)
    ok = (c0 >= 0) & (c0 + 1 < NCOLS) & (r0 >= 0) & (r0 + 1 < NROWS)
    c0 = np.clip(c0, 0, NCOLS - 2)
    r0 = np.clip(r0, 0, NROWS - 2)
    fc = c - c0
    fr = r - r0
    q = [dem[r0, c0], dem[r0, c0 + 1], dem[r0 + 1, c0], dem[r0 + 1, c0 + 1]]
    ok &= np.all([x != NODATA for x in q], axis=0)
    z = (q[0] * (1 - fc) * (1 - fr) + q[1] * fc * (1 - fr)
         + q[2] * (1 - fc) * fr + q[3] * fc * fr)
    return np.where(ok, z / M_PER_FT, np.nan)


def status_table(statuses, zones) -> list[str]:
    """Counts of each status by zone ("none" = outside every zone)."""
    cols = [PRV["zone"], TANK["zone"], PUMP["zone"], "none"]
    counts = Counter((z or "none", s) for z, s in zip(zones, statuses))
    n = len(statuses)
    head = f"{'status':<18}" + "".join(f"{c:>10}" for c in cols)
    lines = [head + f"{'total':>8}{'share':>8}"]
    for s in STATUSES:
        row = [counts.get((c, s), 0) for c in cols]
        total = sum(row)
        lines.append(f"{s:<18}" + "".join(f"{k:>10}" for k in row)
                     + f"{total:>8}{100 * total / n:>7.1f}%")
    per_zone = [sum(counts.get((c, s), 0) for s in STATUSES) for c in cols]
    lines.append(f"{'total':<18}" + "".join(f"{k:>10}" for k in per_zone)
                 + f"{n:>8}")
    return lines


# ---------------------------------------------------------------------------
# Field readings
# ---------------------------------------------------------------------------

#: the demo DEM stands in for a lidar DEM: QL2 lidar's RMSEz of 10 cm (USGS Lidar Base Specification, from
#: memory) is 0.33 ft
DEM_RMSE_FT = 0.33
#: Lowfield's readings are all this much higher than the screening predicts, in ft of head: as if the PRV's
#: HGL were on another datum than the DEM (a datum-like offset)
LOWFIELD_OFFSET_FT = 4.0
#: the closed-valve cluster: two Ridgeway readings this many psi below the prediction
CLOSED_VALVE_PSI = (-19.0, -21.5)
#: hydrant outlets sit about 2 ft above grade (common practice, no source); loggers are read at grade
HYDRANT_GAUGE_FT = 2.0
#: hydrant gauges: ASME B40.100 Grade A, 0-160 psi (1.6 psi mid-scale); loggers: 0.5 psi (a Grade 3A 0-200 psi)
GAUGE_SPAN_PSI = 160.0
LOGGER_ACCURACY_PSI = 0.5
#: readings per zone
N_READINGS = {PRV["zone"]: 12, TANK["zone"]: 14, PUMP["zone"]: 8}


def _points_in(poly, n, rng, placer):
    """``n`` points inside ``poly`` (local metres), off the quarry pit and 20 m from any zone boundary."""
    umin, vmin, umax, vmax = poly.bounds
    got_u, got_v = [], []
    while len(got_u) < n:
        u, v = rng.uniform(umin, umax), rng.uniform(vmin, vmax)
        p = shapely.Point(u, v)
        if poly.contains(p) and not placer.pit_keepout.contains(p) and placer.boundaries.distance(p) > 20.0:
            got_u.append(u)
            got_v.append(v)
    return np.array(got_u), np.array(got_v)


def field_readings(zones_local, dem, rng) -> gpd.GeoDataFrame:
    """Invented static pressure readings: hydrant flow tests (static reading, gauge 2 ft above grade),
    pressure loggers (at grade) and complaint call-outs. Each is the pressure at the gauge from the DEM
    as geopress samples it (bilinear), plus gauge noise well within the gauge's accuracy; Lowfield's are
    all LOWFIELD_OFFSET_FT higher, and two Ridgeway readings a few tens of metres apart read about
    20 psi low (a closed valve between them and the tank). Ridgeway's hydrant tests record the tank
    level at the time (SCADA)."""
    placer = Placer(zones_local, rng=None)
    hgls = zone_hgls_ft()
    rows = []
    for zone, n in N_READINGS.items():
        u, v = _points_in(zones_local[zone], n, rng, placer)
        for i in range(n):
            kind = ("hydrant flow test", "pressure logger", "complaint call-out")[i % 3]
            level = (float(np.round(rng.uniform(hgls[zone][0] + 1, hgls[zone][1] - 1), 1))
                     if zone == TANK["zone"] and kind == "hydrant flow test" else None)
            rows.append(dict(zone=zone, u=u[i], v=v[i], kind=kind, level=level))
    # the cluster: two call-outs on one street of Ridgeway, 40 m apart
    cu, cv = _points_in(zones_local[TANK["zone"]], 1, rng, placer)
    for du, dpsi in zip((0.0, 40.0), CLOSED_VALVE_PSI):
        rows.append(dict(zone=TANK["zone"], u=cu[0] + du, v=cv[0], kind="complaint call-out", level=None,
                         valve=dpsi))
    records = {k: [] for k in ("tag", "kind", "taken", "static_psi", "gauge_ft", "tank_level_ft", "accuracy_psi")}
    geoms = []
    for i, r in enumerate(rows):
        height = HYDRANT_GAUGE_FT if r["kind"] == "hydrant flow test" else 0.0
        low, high = hgls[r["zone"]]
        hgl = r["level"] if r["level"] is not None else (low + high) / 2
        if r["zone"] == PRV["zone"]:
            hgl += LOWFIELD_OFFSET_FT
        ground = float(bilinear_ground_ft(dem, np.array([r["u"]]), np.array([r["v"]]))[0])
        accuracy = LOGGER_ACCURACY_PSI if r["kind"] == "pressure logger" else None
        noise = rng.normal(0.0, 0.3)  # a third or less of either gauge's accuracy
        psi = PSI_PER_FT * (hgl - ground - height) + noise + r.get("valve", 0.0)
        prefix = {"hydrant flow test": "HYD", "pressure logger": "LOG", "complaint call-out": "CALL"}[r["kind"]]
        records["tag"].append(f"{prefix}-{101 + i}")
        records["kind"].append(r["kind"])
        records["taken"].append(f"2026-{5 + i % 5:02d}-{1 + (7 * i) % 27:02d}T{8 + i % 9:02d}:{(13 * i) % 60:02d}")
        records["static_psi"].append(round(psi, 1))
        records["gauge_ft"].append(height)
        records["tank_level_ft"].append(r["level"])
        records["accuracy_psi"].append(accuracy)
        geoms.append(shapely.Point(r["u"] + WEST, r["v"] + SOUTH))
    return gpd.GeoDataFrame(records, geometry=geoms, crs=CRS)


# ---------------------------------------------------------------------------
# Config and README
# ---------------------------------------------------------------------------


def config_text(customers_path: str, layer: str, out_path: str,
                mailing_dir: str) -> str:
    """The demo config; paths are relative to the config file."""
    return f"""\
# geopress demo configuration for the fictional town of {TOWN}.
# Paths are relative to this file.  Written by scripts/make_demo.py.

[customers]
path = "{customers_path}"
layer = "{layer}"
# From a PostGIS database instead (pip install 'geopress[postgis]'; see README, "A PostGIS database"):
# database = "service=gis"            # libpq: the password in ~/.pgpass or PGPASSWORD, never here
# table = "{TOWN.lower()}.{layer}"       # or: query = "SELECT account, owner, ..., geom FROM ..."
# geometry_column = "geom"
id_field = "account"
mail_fields = ["owner", "mail_address", "mail_city", "mail_state", "mail_zip"]
floors_field = "floors"

[terrain]
paths = ["dem.tif"]
vertical_units = "m"
method = "bilinear"
# the synthetic DEM stands in for QL2 lidar (RMSEz 10 cm)
vertical_rmse_ft = {DEM_RMSE_FT}

[zones]
path = "zones.gpkg"
layer = "zones"
# database = "service=gis"
# table = "{TOWN.lower()}.zones"
id_field = "zone"

[[zones.source]]
zone = "{TANK['zone']}"
kind = "tank"
high_water_ft = {TANK['high_water_ft']}
low_water_ft = {TANK['low_water_ft']}          # the bottom of equalizing storage
overflow_ft = {TANK_LEVELS['overflow_ft']}
bottom_ft = {TANK_LEVELS['bottom_ft']}
fire_bottom_ft = {TANK_LEVELS['fire_bottom_ft']}        # fire suppression storage used too
standby_bottom_ft = {TANK_LEVELS['standby_bottom_ft']}     # standby storage used too

[[zones.source]]
zone = "{PRV['zone']}"
kind = "prv"
valve_elevation_ft = {PRV['valve_elevation_ft']}
setting_psi = {PRV['setting_psi']}
inlet_zone = "{TANK['zone']}"         # fed from the tank's zone

[[zones.source]]
zone = "{PUMP['zone']}"
kind = "pump"
discharge_hgl_ft = {PUMP['discharge_hgl_ft']}
shutoff_hgl_ft = {PUMP_SHUTOFF_HGL_FT}

[criteria]
rule_set = "{RULE_SET}"   # 30 psi at peak hour, 20 psi with fire storage used
standby_min_psi = {STANDBY_MIN_PSI}
max_static_psi = {CRITERIA['max_static_psi']}
min_static_psi = {CRITERIA['min_static_psi']}
psi_per_ft = {CRITERIA['psi_per_ft']}
floor_height_ft = {CRITERIA['floor_height_ft']}

[output]
path = "{out_path}"
mailing_dir = "{mailing_dir}"
# Publish the same layers into a PostGIS schema too (it must exist; the role needs CREATE on it):
# database = "service=gis"
# schema = "pressure"

# invented field readings: hydrant flow tests, pressure loggers, complaint call-outs
[readings]
path = "readings.gpkg"
layer = "gauges"
pressure_field = "static_psi"
id_field = "tag"
time_field = "taken"
gauge_height_field = "gauge_ft"
hgl_field = "tank_level_ft"
accuracy_field = "accuracy_psi"
gauge_grade = "A"
gauge_span_psi = {GAUGE_SPAN_PSI:g}
"""


def readme_text(point_table, lot_table, edge_rows) -> str:
    """The data set's README, with the expected status counts."""
    prv_hgl = zone_hgls_ft()[PRV["zone"]][0]
    pit_px = f"{PIT_ROWS[1] - PIT_ROWS[0]} x {PIT_COLS[1] - PIT_COLS[0]}"
    edges = "\n".join(f"| `{a}` | {EDGE_CASE_NOTES[t]} | {st} |"
                      for t, a, st in edge_rows)
    return f"""\
# geopress demo data: {TOWN}

Everything in this folder is **fictional**. {TOWN} is an invented hill
town in an invented state (code `{STATE}`). The terrain, pressure zones,
owners, account numbers and street addresses are all made up, and the grid
sits over open ocean in UTM zone 31N, so it matches no real place.

Regenerate with `python scripts/make_demo.py` (or `--out DIR`). The output
is deterministic: the same bytes every run. `--summary` also prints the
statuses the screening is expected to assign. This README is written by
the script; edit the script, not this file.

## Files

| file | content |
| --- | --- |
| `dem.tif` | synthetic DEM, {NCOLS} x {NROWS} px of {PIXEL_M:g} m, float32, elevations in **metres**, DEFLATE, 256 x 256 tiles, nodata {NODATA:g} |
| `zones.gpkg` | layer `zones`: text fields `zone` (id) and `name`; three polygons with shared edges |
| `customers.gpkg` | layer `parcels`: {N_POINTS} meter points |
| `customers_parcels.gpkg` | layer `lots`: {N_LOTS} polygon parcels, same fields |
| `geopress.toml` | demo config for the meter points |
| `geopress_lots.toml` | the same config for the polygon lots |
| `readings.gpkg` | layer `gauges`: {sum(N_READINGS.values()) + 2} invented field readings of static pressure |

All layers use EPSG:32631 (WGS 84 / UTM zone 31N), metres. The DEM covers
easting {WEST:.0f} to {EAST:.0f} and northing {SOUTH:.0f} to {NORTH:.0f}.
Hydraulic grades in the configs are in feet (1 ft = 0.3048 m).

## Terrain and zones

A valley in the south (floor about 285 m, 935 ft) rises over middle slopes
and a steep escarpment to a crest of about 400 m (1310 ft) in the north.
A disused quarry pit of {pit_px} pixels (rows {PIT_ROWS[0]} to
{PIT_ROWS[1] - 1}, columns {PIT_COLS[0]} to {PIT_COLS[1] - 1}) is nodata.
The service area covers most of the DEM; the margins and a notch in the
north-east (homes on private wells) are outside every zone. Zone
boundaries follow the {LOWFIELD_TOP_M:g} m and {RIDGEWAY_TOP_M:g} m ground
contours.

| zone | kind | HGL (ft) |
| --- | --- | --- |
| `{PRV['zone']}` | PRV, valve at {PRV['valve_elevation_ft']:g} ft set to {PRV['setting_psi']:g} psi | {prv_hgl:.1f} |
| `{TANK['zone']}` | tank, low / high water (bottom of fire storage {TANK_LEVELS['fire_bottom_ft']:g}, of standby storage {TANK_LEVELS['standby_bottom_ft']:g}; overflow {TANK_LEVELS['overflow_ft']:g}, bottom {TANK_LEVELS['bottom_ft']:g}) | {TANK['low_water_ft']:g} / {TANK['high_water_ft']:g} |
| `{PUMP['zone']}` | closed zone, booster discharge | {PUMP['discharge_hgl_ft']:g} |

## Customers

Fields: `account` (unique text, `A-` and six digits, unique across both
customer files), `owner`, `mail_address`, `mail_city`, `mail_state`,
`mail_zip` (five-digit text with leading zeros), `floors` (integer
stories), `land_use`.

* About 8 % of customers share their mailing address (same owner and
  mail fields) with other accounts: landlords.
* Some owners or addresses begin with `=`, `+`, `-` or `@`, and some
  contain commas, apostrophes or accented letters, to exercise CSV output.
* Buildings of 3 to 12 stories (about 3 %) are concentrated in a downtown
  core high in the `{TANK['zone']}` zone.
* Meter points lie at least 3 m from zone boundaries and 10 m inside the
  DEM edge, and the ones on the quarry pit at least 10 m inside it.

Expected statuses of the meter points (`customers.gpkg`), from the
analytic terrain surface:

```
{chr(10).join(point_table)}
```

Expected statuses of the polygon lots (`customers_parcels.gpkg`), taking
the ground at each lot's interior point (shapely `point_on_surface`,
which for these rectangles is the centre):

```
{chr(10).join(lot_table)}
```

## Field readings

`readings.gpkg`, layer `gauges`: fields `tag`, `kind` (hydrant flow test,
pressure logger, complaint call-out), `taken` (date and time), `static_psi`,
`gauge_ft` (height above ground: {HYDRANT_GAUGE_FT:g} ft at hydrants, 0 for the
others), `tank_level_ft` (the Ridgeway tank's level at the time, from SCADA,
for its hydrant tests) and `accuracy_psi` (loggers: {LOGGER_ACCURACY_PSI:g} psi;
the hydrant gauges are Grade A of 0 to {GAUGE_SPAN_PSI:g} psi, as the config says).
Each is the pressure the DEM predicts at the gauge plus a little gauge noise,
except:

* every `{PRV['zone']}` reading is {LOWFIELD_OFFSET_FT:g} ft of head
  ({PSI_PER_FT * LOWFIELD_OFFSET_FT:.2f} psi) higher: a datum-like offset the
  field check should find as the zone's bias;
* two `{TANK['zone']}` call-outs 40 m apart read {-CLOSED_VALVE_PSI[0]:g} and
  {-CLOSED_VALVE_PSI[1]:g} psi low: a closed valve, which the field check
  should show as a cluster of outliers.

Lots placed on purpose to test polygon edge cases (status at the
interior point):

| account | case | expected status |
| --- | --- | --- |
{edges}
"""


# ---------------------------------------------------------------------------
# Main
# ---------------------------------------------------------------------------


def customers_frame(geoms, attrs) -> gpd.GeoDataFrame:
    gdf = gpd.GeoDataFrame({**attrs, "geometry": geoms}, crs=CRS)
    gdf["floors"] = gdf["floors"].astype("int32")
    return gdf.sort_values("account").reset_index(drop=True)


def write_layer(gdf: gpd.GeoDataFrame, path: Path, layer: str) -> None:
    if path.exists():
        path.unlink()
    gdf.to_file(path, layer=layer, driver="GPKG", engine="pyogrio")


def parse_args(argv):
    default_out = Path(__file__).resolve().parent.parent / "data_demo"
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", type=Path, default=default_out,
                   help="output folder (default: %(default)s)")
    p.add_argument("--summary", action="store_true",
                   help="print the expected status counts")
    return p.parse_args(argv)


def main(argv=None) -> int:
    args = parse_args(argv)
    out: Path = args.out
    out.mkdir(parents=True, exist_ok=True)

    dem = build_dem()
    write_dem(out / "dem.tif", dem)

    zones_local = build_zones_local()
    write_layer(zones_frame(zones_local), out / "zones.gpkg", "zones")

    accounts = make_accounts(rng_for(2), N_POINTS + N_LOTS)
    lookup = Placer(zones_local, rng=None)  # zone lookups only

    u, v, tags = place_points(zones_local, rng_for(4))
    attrs = build_attributes(u, v, tags, rng_for(5), accounts[:N_POINTS])
    raise_tower(attrs, u, v, lookup.zone_of(u, v))
    pts = shapely.points(u + WEST, v + SOUTH)
    write_layer(customers_frame(pts, attrs), out / "customers.gpkg", "parcels")

    lots, lot_tags = place_lots(zones_local, rng_for(6))
    lc = shapely.point_on_surface(lots)
    lu, lv = shapely.get_x(lc), shapely.get_y(lc)
    lot_attrs = build_attributes(lu, lv, lot_tags, rng_for(7),
                                 accounts[N_POINTS:], lots=True)
    lot_geoms = [to_world(p) for p in lots]
    write_layer(customers_frame(lot_geoms, lot_attrs),
                out / "customers_parcels.gpkg", "lots")

    # Expected statuses from the analytic surface.
    pz = lookup.zone_of(u, v)
    p_status = classify(analytic_ground_ft(u, v), pz, attrs["floors"])
    lz = lookup.zone_of(lu, lv)
    l_status = classify(analytic_ground_ft(lu, lv), lz, lot_attrs["floors"])
    point_table = status_table(p_status, pz)
    lot_table = status_table(l_status, lz)
    edge_rows = [(t, a, st) for t, a, st
                 in zip(lot_tags, lot_attrs["account"], l_status)
                 if t != "subdivision"]

    write_layer(field_readings(zones_local, dem, rng_for(8)), out / "readings.gpkg", "gauges")

    (out / "geopress.toml").write_text(
        config_text("customers.gpkg", "parcels", "out/pressure.gpkg",
                    "out/mailing"), encoding="utf-8")
    (out / "geopress_lots.toml").write_text(
        config_text("customers_parcels.gpkg", "lots",
                    "out/lots/pressure.gpkg", "out/lots/mailing"),
        encoding="utf-8")
    (out / "README.md").write_text(
        readme_text(point_table, lot_table, edge_rows), encoding="utf-8")

    if args.summary:
        print("meter points (customers.gpkg / parcels):")
        print("\n".join(point_table))
        b_status = classify(bilinear_ground_ft(dem, u, v), pz, attrs["floors"])
        diff = sum(a != b for a, b in zip(p_status, b_status))
        print(f"\nstatuses that change with bilinear DEM sampling: {diff}")
        print("\npolygon lots (customers_parcels.gpkg / lots), at interior points:")
        print("\n".join(lot_table))
        print("\nground range (m): "
              f"{dem[dem != NODATA].min():.1f} - {dem[dem != NODATA].max():.1f}")
        hgls = zone_hgls_ft()
        print("zone HGLs (ft, low/high): " + ", ".join(
            f"{z} {lo:.1f}/{hi:.1f}" for z, (lo, hi) in hgls.items()))
    return 0


if __name__ == "__main__":
    sys.exit(main())
