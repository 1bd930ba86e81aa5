"""geopress: static service-pressure screening of every customer of a water utility.

Join customer points or parcels to a DEM and to pressure-zone polygons,
compute each customer's static pressure range from the zone's HGL source, and
flag high, low and no-gravity-service customers. A static screening
estimate: local codes and a licensed engineer decide.

    >>> import geopress
    >>> result = geopress.run("geopress.toml")          # doctest: +SKIP
    >>> result.counts["high"]                           # doctest: +SKIP
"""

from ._version import __version__
from .classify import STATUSES, Criteria
from .config import Config, load_config
from .errors import ConfigError, GeopressError, GeopressWarning, InputError, LockError, MissingExtraError, OutputError
from .pipeline import CheckReport, Result, check, run

__all__ = [
    "__version__",
    "run",
    "check",
    "load_config",
    "Config",
    "Criteria",
    "Result",
    "CheckReport",
    "STATUSES",
    "GeopressError",
    "ConfigError",
    "InputError",
    "OutputError",
    "LockError",
    "MissingExtraError",
    "GeopressWarning",
]
