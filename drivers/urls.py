"""Small helpers shared by the drivers that read options from a source URL."""

from __future__ import annotations

from collections.abc import Collection
from urllib.parse import parse_qsl

from drivers.errors import ConfigError


def query_options(query: str, known: Collection[str], where: str) -> dict[str, str]:
    """Return a URL query's ``key=value`` options as a dict of strings.

    Raises :class:`ConfigError`, naming ``where`` (the URL without credentials), for an
    option not in ``known`` (the known ones are listed) or one given twice.
    """
    options: dict[str, str] = {}
    for key, value in parse_qsl(query, keep_blank_values=True):
        if key not in known:
            names = ", ".join(sorted(known))
            raise ConfigError(f"{where}: unknown option {key!r}; known options: {names}")
        if key in options:
            raise ConfigError(f"{where}: option {key!r} is given more than once")
        options[key] = value
    return options
