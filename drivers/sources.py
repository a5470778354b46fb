"""Open any sample source from a URL string.

One call, :func:`open_source`, picks the handler from the URL's scheme. Each
handler is a class taking ``(url, **options)`` whose instances are async context
managers with an ``async def samples()`` iterator of :class:`~drivers.sample.Sample`.
Its docstring lists the URL's options.

Known schemes so far: ``sim`` (the simulated rig). Serial, Modbus and MQTT
handlers join here as they are written.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any
from urllib.parse import urlsplit

from drivers.errors import ConfigError
from drivers.simulator import SimulatedRigDriver

#: URL scheme -> handler. A module-level constant: handlers are registered here, in code.
HANDLERS: dict[str, Callable[..., Any]] = {
    "sim": SimulatedRigDriver,
}


def open_source(url: str, **options: Any) -> Any:
    """Return the driver for ``url`` (not yet entered: use it with ``async with``).

    Raises :class:`ConfigError` naming the known schemes when the scheme is unknown.
    """
    scheme = urlsplit(url).scheme
    try:
        handler = HANDLERS[scheme]
    except KeyError:
        known = ", ".join(f"{name}://" for name in sorted(HANDLERS))
        raise ConfigError(f"no driver for {url!r}; known schemes: {known}") from None
    return handler(url, **options)
