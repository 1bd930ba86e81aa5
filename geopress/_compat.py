"""Optional dependencies, checked once.

``HAS_REPORT`` says whether the ``report`` extra (matplotlib and jinja2) is
installed; :func:`report_missing` names what is missing and what to install.
"""

from __future__ import annotations

import importlib.util

REPORT_MODULES = ("matplotlib", "jinja2")
_MISSING_REPORT = tuple(m for m in REPORT_MODULES if importlib.util.find_spec(m) is None)
HAS_REPORT = not _MISSING_REPORT


def report_missing() -> str | None:
    """None when the report can be built, else a sentence naming the missing modules and the extra."""
    if HAS_REPORT:
        return None
    return f"{' and '.join(_MISSING_REPORT)} not installed; install the report extra: pip install 'geopress[report]'"
