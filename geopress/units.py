"""Display units for the report and the mailing lists: US (ft, psi) or SI (m, kPa).

The GeoPackage layers always keep ft and psi in the fields the layer names
say. SI converts lengths at 0.3048 m per international foot and pressures
with :func:`geopress.pressure.psi_to_kpa` (6.894757 kPa per psi). For
reference, 1 m of water at 1000 kg/m3 under standard gravity is 9.80665 kPa
(:data:`geopress.pressure.KPA_PER_M_WATER`); the default 0.433 psi per ft is
0.433 * 6.894757 / 0.3048 = 9.795 kPa per m.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from .pressure import M_PER_FT, psi_to_kpa

UNIT_SYSTEMS = ("us", "si")


@dataclass(frozen=True)
class Units:
    """Converters from ft and psi to the display system and the labels to print."""

    system: str
    length: str
    pressure: str
    area: str

    def length_from_ft(self, ft: ArrayLike) -> NDArray[np.float64]:
        v = np.asarray(ft, dtype=np.float64)
        return v * M_PER_FT if self.system == "si" else v

    def pressure_from_psi(self, psi: ArrayLike) -> NDArray[np.float64]:
        return psi_to_kpa(psi) if self.system == "si" else np.asarray(psi, dtype=np.float64)

    def area_from_sq_ft(self, sq_ft: ArrayLike) -> NDArray[np.float64]:
        """Square feet to acres (US) or hectares (SI, 10,000 m2)."""
        v = np.asarray(sq_ft, dtype=np.float64)
        return v * M_PER_FT**2 / 10_000.0 if self.system == "si" else v / 43_560.0


US = Units("us", "ft", "psi", "acres")
SI = Units("si", "m", "kPa", "ha")


def units_for(system: str) -> Units:
    """The :class:`Units` of ``"us"`` or ``"si"``."""
    if system not in UNIT_SYSTEMS:
        raise ValueError(f"unknown unit system {system!r}; use one of {', '.join(UNIT_SYSTEMS)}")
    return SI if system == "si" else US


PRESSURE_COLUMNS = ("psi_max", "psi_min", "psi_top", "psi_fire", "psi_standby", "margin_psi", "sigma_psi")


def customers_in_units(customers: pd.DataFrame, units: Units) -> pd.DataFrame:
    """A shallow copy with the psi columns in the display unit (their names unchanged); as is for US."""
    if units.system == "us":
        return customers
    return customers.assign(**{c: units.pressure_from_psi(customers[c]) for c in PRESSURE_COLUMNS if c in customers})


def mailing_columns_in_units(df: pd.DataFrame, units: Units) -> pd.DataFrame:
    """A mailing list built from :func:`customers_in_units` with its psi columns (``worst_psi``, ``margin_psi``
    ...) renamed ``..._kpa`` in SI."""
    if units.system == "us":
        return df
    return df.rename(columns={c: c[:-4] + "_kpa" if c.endswith("_psi") else "kpa_" + c[4:]
                              for c in df.columns if c.endswith("_psi") or c.startswith("psi_")})
