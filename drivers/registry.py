"""The one driver registry: every sample source is opened here, by its URL's scheme.

A driver module declares what the rest of ebullio needs of it in one module-level
:class:`DriverKind` named ``DRIVER``: its URL schemes, its factory, and how its table
of the rig configuration is read. :data:`DRIVERS` below lists the driver modules, one
line each with the schemes it reads, and a module is imported only when a URL of its
scheme is asked for, so a transport costs nothing until it is used.

Who asks:

* :func:`open_source` (``url, **options``) returns a driver, not yet entered (use it
  with ``async with``). The live service opens every source through it: each
  configured instrument and the MQTT broker.
* ``monitor/rig/config.py`` asks :func:`driver_kind` which driver reads an
  ``[[instruments]]`` URL and hands that driver's ``read_table`` the table; the
  ``[mqtt]`` URL must be a driver's whose ``configured_in`` is ``"[mqtt]"``. An
  unknown scheme is refused with the known ones named.

Adding a driver touches its own module (with its ``DRIVER``) and one line of
:data:`DRIVERS`; DEVELOPERS.md ("Adding a driver") has the rest.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any
from urllib.parse import urlsplit

from drivers.config_table import ConfigTable
from drivers.errors import ConfigError

#: Where a driver's URL is configured: an ``[[instruments]]`` table of its own, read by
#: its ``read_table``.
INSTRUMENTS = "[[instruments]]"
#: ... or the ``[mqtt]`` table, which ``monitor/rig/config.py`` reads itself because the
#: estimates are published there too.
MQTT = "[mqtt]"


@dataclass(frozen=True)
class DriverKind:
    """What the registry knows of one driver, declared as ``DRIVER`` in the driver's module.

    * ``name``: a short word for the kind (``serial``, ``modbus``); a configured
      instrument keeps it (``monitor.rig.config.Instrument.kind``).
    * ``schemes``: the URL schemes it reads, the same as its line in :data:`DRIVERS`.
    * ``factory``: ``factory(url, **options)`` returns a driver, not yet entered: an
      async context manager with ``async def samples()``. An instrument's factory is
      given ``bindings`` (its :class:`~drivers.channels.ChannelBinding` items),
      ``clock`` (receipt time, Unix s) and what its ``read_table`` returned.
    * ``read_table``: for an instrument, reads the keys of its ``[[instruments]]``
      table other than ``url`` from a :class:`~drivers.config_table.ConfigTable` and
      returns them as the factory's keyword options, raising ``table.fail(key,
      reason)`` for a bad one. Checks that need the channels as well are the
      factory's: the configuration builds each instrument's driver once (not entered)
      before anything starts.
    * ``configured_in``: :data:`INSTRUMENTS` (then ``read_table`` is required),
      :data:`MQTT`, or None for a source opened only from code (the simulated rig).
    """

    name: str
    schemes: tuple[str, ...]
    factory: Callable[..., Any]
    read_table: Callable[[ConfigTable], dict[str, Any]] | None = None
    configured_in: str | None = None

    def __post_init__(self) -> None:
        if not self.schemes:
            raise ValueError(f"driver kind {self.name!r} reads no URL scheme")
        if (self.configured_in == INSTRUMENTS) != (self.read_table is not None):
            raise ValueError(
                f"driver kind {self.name!r}: an {INSTRUMENTS} driver needs a read_table, "
                "and only such a driver has one"
            )


#: The driver modules, one line each with the URL schemes it reads. The module itself
#: declares them again in its ``DRIVER`` (tests/drivers/test_registry.py checks they
#: agree): listed here they are known without importing the module.
DRIVERS: dict[str, tuple[str, ...]] = {
    "drivers.sim": ("sim",),
    "drivers.serial_line": ("serial",),
    "drivers.modbus": ("modbus+tcp", "modbus+rtu"),
    "drivers.mqtt": ("mqtt", "mqtts"),
}


def known_schemes() -> list[str]:
    """Return every registered URL scheme, sorted."""
    return sorted(scheme for schemes in DRIVERS.values() for scheme in schemes)


def shown_schemes(schemes: list[str] | tuple[str, ...]) -> str:
    """Return schemes as a message shows them: ``modbus+tcp://, serial://``."""
    return ", ".join(f"{scheme}://" for scheme in schemes)


def _shown(url: str) -> str:
    """Return ``url`` with any user name and password hidden (for messages)."""
    head, sep, rest = url.partition("://")
    netloc, slash, tail = rest.partition("/")
    if sep and "@" in netloc:
        return f"{head}{sep}***@{netloc.rsplit('@', 1)[1]}{slash}{tail}"
    return url


def _kind_of(module: str) -> DriverKind:
    kind = getattr(importlib.import_module(module), "DRIVER", None)
    if not isinstance(kind, DriverKind):
        raise TypeError(f"{module} is registered as a driver but declares no DRIVER")
    if set(kind.schemes) != set(DRIVERS[module]):
        raise TypeError(
            f"{module} reads {sorted(kind.schemes)}, but its registry line says "
            f"{sorted(DRIVERS[module])}"
        )
    return kind


def driver_kind(url: str) -> DriverKind:
    """Return the kind of driver that reads ``url``, importing its module if need be.

    Raises :class:`ConfigError` naming the known schemes when none reads it.
    """
    scheme = urlsplit(url).scheme
    for module, schemes in DRIVERS.items():
        if scheme in schemes:
            return _kind_of(module)
    raise ConfigError(
        f"no driver for {_shown(url)!r}; known schemes: {shown_schemes(known_schemes())}"
    )


def driver_kinds(configured_in: str | None = None) -> list[DriverKind]:
    """Return every registered kind (importing every driver module), or only those
    configured in ``configured_in`` (:data:`INSTRUMENTS` or :data:`MQTT`)."""
    kinds = [_kind_of(module) for module in DRIVERS]
    if configured_in is None:
        return kinds
    return [kind for kind in kinds if kind.configured_in == configured_in]


def open_source(url: str, **options: Any) -> Any:
    """Return the driver for ``url`` with ``options`` (not yet entered: use ``async with``).

    Raises :class:`ConfigError` naming the known schemes when the scheme is unknown, and
    whatever the driver raises for a bad URL or option.
    """
    return driver_kind(url).factory(url, **options)
