"""``python -m geopress``: the same as the ``geopress`` command."""

from .cli import main

main()
