"""Open any sample source from a URL string.

One call, :func:`open_source`, picks the handler from the URL's scheme. Each
handler is a class taking ``(url, **options)`` whose instances are async context
managers with an ``async def samples()`` iterator of :class:`~drivers.sample.Sample`.
Its docstring lists the URL's options.

Known schemes: ``sim`` (the simulated rig), ``serial`` (a line instrument),
``modbus+tcp`` and ``modbus+rtu`` (a power meter), ``mqtt`` and ``mqtts`` (a broker).
Handlers are imported when first used, so a missing optional transport costs
nothing until a URL asks for it.
"""

from __future__ import annotations

import importlib
from typing import Any
from urllib.parse import urlsplit

from drivers.errors import ConfigError

#: URL scheme -> "module:class" of its handler. A constant: handlers are registered here.
HANDLERS: dict[str, str] = {
    "sim": "drivers.sim:SimulatedRigDriver",
    "serial": "drivers.serial_line:SerialLineDriver",
    "modbus+tcp": "drivers.modbus:ModbusMeterDriver",
    "modbus+rtu": "drivers.modbus:ModbusMeterDriver",
    "mqtt": "drivers.mqtt:MqttDriver",
    "mqtts": "drivers.mqtt:MqttDriver",
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
    module, _, name = handler.partition(":")
    return getattr(importlib.import_module(module), name)(url, **options)
