"""The vertical offset that puts DEM elevations on the HGLs' datum, per location, with pyproj.

Three ways, chosen by the config (checked there):

* ``constant``: ``terrain.datum_offset_ft``, one offset everywhere (0 by default);
* ``none``: ``terrain.vertical_datum`` and ``zones.vertical_datum`` name the same datum;
* ``grid``: the two datums differ. PROJ's database says which operation relates them and
  in which direction (e.g. NGVD29 to NAVD88 adds the VERTCON offset: NAVD88 = NGVD29 +
  offset). The operation's grid is ``terrain.datum_grid``, a GeoTIFF of offsets PROJ reads
  with ``vgridshift``, or a grid PROJ finds itself (installed from its data packages).

A transformation that PROJ can do only as a "ballpark" (no grid, so no vertical offset at
all) is refused: a silent zero offset is the wrong number this module exists to prevent.

:meth:`DatumShift.offsets_ft` gives, at map points in any CRS, the offset in ft to add to
DEM elevations: ``elevation on the HGLs' datum = elevation on the DEM's datum + offset``.
Points outside the grid get NaN (they have no ground on the HGLs' datum).
"""

from __future__ import annotations

import logging
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
from pyproj import CRS, Transformer
from pyproj.crs import CompoundCRS
from pyproj.exceptions import ProjError
from pyproj.transformer import TransformerGroup

from ..errors import ConfigError, InputError
from ..pressure import M_PER_FT

log = logging.getLogger(__name__)

def _m_per_unit(crs: CRS) -> float:
    return crs.axis_info[0].unit_conversion_factor


@dataclass
class DatumShift:
    """How DEM elevations are put on the HGLs' datum; see the module docstring.

    ``method`` is "constant", "none" or "grid". For "grid", ``pipeline`` is the PROJ
    operation between ``horizontal`` + the DEM's datum and ``horizontal`` + the HGLs'
    datum (heights in ``target_m_per_unit`` metres per unit), fed in ``horizontal``'s
    axis order. ``applied`` records the range of offsets used (ft), for run.json.
    """

    method: str
    constant_ft: float = 0.0
    description: str = ""
    pipeline: str | None = None
    horizontal: CRS | None = None
    target_m_per_unit: float = 1.0
    grid: str | None = None
    applied: list[float] = field(default_factory=list)
    _transformer: Transformer | None = field(default=None, repr=False, compare=False)
    _to_horizontal: dict[str, Transformer] = field(default_factory=dict, repr=False, compare=False)

    def __getstate__(self) -> dict[str, Any]:  # for a child process: transformers are rebuilt there
        return {**self.__dict__, "_transformer": None, "_to_horizontal": {}}

    def offsets_ft(self, x: np.ndarray, y: np.ndarray, crs: CRS) -> np.ndarray:
        """Offset, ft, to add to DEM elevations at map points ``x``, ``y`` in ``crs`` (NaN outside the grid)."""
        x = np.asarray(x, dtype=np.float64)
        if self.method != "grid":
            out = np.full(x.shape, self.constant_ft)
        else:
            if self._transformer is None:
                self._transformer = Transformer.from_pipeline(self.pipeline)
            wkt = crs.to_wkt()
            if wkt not in self._to_horizontal:
                self._to_horizontal[wkt] = Transformer.from_crs(crs, self.horizontal, always_xy=True)
            lon, lat = self._to_horizontal[wkt].transform(x, np.asarray(y, dtype=np.float64))
            # the operation takes its horizontal CRS's own axis order (latitude first for EPSG's geographic CRSs)
            first, second = (lat, lon) if self.horizontal.axis_info[0].direction == "north" else (lon, lat)
            _, _, z = self._transformer.transform(first, second, np.zeros(x.shape))
            z = np.asarray(z, dtype=np.float64)
            out = np.where(np.isfinite(z), z * self.target_m_per_unit / M_PER_FT, np.nan)
        self._record(out)
        return out

    def _record(self, offsets: np.ndarray) -> None:
        finite = offsets[np.isfinite(offsets)]
        if finite.size:
            lo, hi = float(finite.min()), float(finite.max())
            if self.applied:
                lo, hi = min(lo, self.applied[0]), max(hi, self.applied[1])
            self.applied = [lo, hi]

    def info(self) -> dict[str, Any]:
        """What run.json records: the method, the datums or grid and the offsets applied, ft."""
        return {"method": self.method, "description": self.description, "grid": self.grid,
                "offset_ft_range": [round(v, 4) for v in self.applied] or None}

    def direction(self) -> str:
        """One sentence: which way the offset moves the pressures."""
        if self.method == "none":
            return "the DEM and the HGLs are on the same vertical datum: no offset"
        return ("a positive offset raises the ground onto the HGLs' datum, so pressures fall "
                "(0.433 psi per ft at the default psi_per_ft)")


def datum_shift(*, offset_ft: float, dem_datum: str | None, hgl_datum: str | None, grid: Path | None,
                customers_crs: CRS) -> DatumShift:
    """The :class:`DatumShift` the config asks for; the config has checked which keys go together and
    normalised the datums to vertical CRSs (:data:`geopress.config.DATUM_NAMES`).

    Raises InputError when the grid is missing or unreadable, when PROJ has no operation
    between the datums that uses it, or when the only operation it has is a ballpark one.
    """
    if dem_datum is None:
        return DatumShift(method="constant", constant_ft=offset_ft,
                          description=f"terrain.datum_offset_ft = {offset_ft:g} ft everywhere")
    dem_v, hgl_v = CRS.from_user_input(dem_datum), CRS.from_user_input(hgl_datum)
    if dem_v.datum == hgl_v.datum:
        if grid is not None:
            raise ConfigError(f"terrain.datum_grid is set, but the DEM and the HGLs are both on {dem_v.datum.name}; "
                              "remove terrain.datum_grid", key="terrain.datum_grid")
        return DatumShift(method="none", description=f"DEM and HGLs both on {dem_v.datum.name}")
    what = f"{dem_v.name} (terrain.vertical_datum) to {hgl_v.name} (zones.vertical_datum)"
    if grid is None:
        return _installed_operation(dem_v, hgl_v, customers_crs, what)
    return _grid_operation(dem_v, hgl_v, grid, what)


def _compound(horizontal: CRS, vertical: CRS) -> CompoundCRS:
    return CompoundCRS(name=f"{horizontal.name} + {vertical.name}", components=[horizontal, vertical])


def _operations(horizontal: CRS, dem_v: CRS, hgl_v: CRS) -> TransformerGroup:
    """PROJ's operations from ``horizontal`` + ``dem_v`` to ``horizontal`` + ``hgl_v``, those it lacks grids for too."""
    with warnings.catch_warnings():
        # pyproj warns when the best operation lacks its grid: this module says so itself, or uses the user's grid
        warnings.filterwarnings("ignore", message="Best transformation is not available", category=UserWarning)
        return TransformerGroup(_compound(horizontal, dem_v), _compound(horizontal, hgl_v))


def _installed_operation(dem_v: CRS, hgl_v: CRS, customers_crs: CRS, what: str) -> DatumShift:
    """The best operation PROJ can do with the grids it has; refused when that is a ballpark."""
    horizontal = customers_crs.geodetic_crs
    group = _operations(horizontal, dem_v, hgl_v)
    usable = [t for t in group.transformers if "ballpark" not in t.description.lower()]
    if not usable:
        needs = sorted({g.short_name for op in group.unavailable_operations for g in op.grids})
        grids = f" (PROJ's operations need {', '.join(needs)})" if needs else ""
        raise InputError(f"from {what} PROJ has only a ballpark transformation, which applies no vertical offset"
                         f"{grids}; set terrain.datum_grid to the offset grid, or terrain.datum_offset_ft to a "
                         "known offset and remove the two vertical_datum keys", key="terrain.datum_grid")
    best = usable[0]
    return DatumShift(method="grid", description=best.description, pipeline=best.to_proj4(),
                      horizontal=horizontal, target_m_per_unit=_m_per_unit(hgl_v))


_GRIDS = re.compile(r"\+grids=(\S+)")


def _grid_operation(dem_v: CRS, hgl_v: CRS, grid: Path, what: str) -> DatumShift:
    """PROJ's operation between the datums, run with the user's grid file in place of its own."""
    if not grid.is_file():
        raise InputError("datum grid not found (from terrain.datum_grid); check the path", path=grid,
                         key="terrain.datum_grid")
    try:
        with rasterio.open(grid) as src:
            if src.crs is None:
                raise InputError("the datum grid has no CRS; it must be a GeoTIFF in geographic coordinates, as PROJ's "
                                 "grids are", path=grid, key="terrain.datum_grid")
            horizontal = CRS.from_wkt(src.crs.to_wkt())
    except rasterio.errors.RasterioIOError as exc:
        raise InputError(f"not a grid GDAL can open ({exc}); check terrain.datum_grid", path=grid,
                         key="terrain.datum_grid") from exc
    if not horizontal.is_geographic:
        raise InputError(f"the datum grid is in {horizontal.name}, a projected CRS; PROJ reads vertical offset grids "
                         "in geographic coordinates", path=grid, key="terrain.datum_grid")
    group = _operations(horizontal, dem_v, hgl_v)
    candidates = [op for op in group.unavailable_operations if op.grids] + \
                 [t for t in group.transformers if _GRIDS.search(t.to_proj4() or "")]
    texts = [(op.name if hasattr(op, "grids") else op.description, op.to_proj4()) for op in candidates]
    if not texts:
        raise InputError(f"PROJ knows no grid-based operation from {what}, so terrain.datum_grid cannot be applied; "
                         "use terrain.datum_offset_ft with a known offset instead", path=grid, key="terrain.datum_grid")
    named = [(n, t) for n, t in texts if Path(_GRIDS.search(t).group(1)).name == grid.name]
    chosen = named or texts
    pipelines = {_GRIDS.sub("+grids=GRID", t) for _, t in chosen}
    if len(pipelines) > 1:
        names = sorted({Path(_GRIDS.search(t).group(1)).name for _, t in texts})
        raise InputError(f"PROJ has several operations from {what} that differ in more than their grid; name the "
                         f"grid file as PROJ names the one it is (one of {', '.join(names)})", path=grid,
                         key="terrain.datum_grid")
    name, text = chosen[0]
    pipeline = _GRIDS.sub(lambda _: f"+grids={grid.resolve()}", text)
    try:
        Transformer.from_pipeline(pipeline)
    except ProjError as exc:
        raise InputError(f"PROJ cannot use the datum grid ({str(exc).splitlines()[0]}); it must be a GeoTIFF PROJ "
                         "reads with vgridshift", path=grid, key="terrain.datum_grid") from exc
    log.info("datum: %s with the grid %s", name, grid)
    return DatumShift(method="grid", description=f"{name}, grid {grid.name}", pipeline=pipeline,
                      horizontal=horizontal, target_m_per_unit=_m_per_unit(hgl_v), grid=str(grid))
