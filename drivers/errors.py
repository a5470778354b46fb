"""The exception tree shared by every layer of ebullio.

One root, :class:`EbullioError`; each leaf also inherits the builtin it
resembles, so callers that only know Python's own exceptions still catch it.
Lower-layer errors (pyserial, aiomqtt, iapws, ...) are mapped to these at one
boundary with ``raise ... from exc``.

This module lives in ``drivers/`` because that is the lowest package: both
``monitor/`` and ``dashboard/`` may import it, while ``drivers/`` imports
nothing from them.
"""

from __future__ import annotations


class EbullioError(Exception):
    """Root of every error ebullio raises on purpose."""


class DriverError(EbullioError):
    """An instrument, transport or simulated source failed."""


class FrameError(DriverError, ValueError):
    """A frame, line or payload could not be parsed; ``raw`` keeps the input bytes."""

    def __init__(self, message: str, raw: bytes | str = b"") -> None:
        super().__init__(message)
        self.raw = raw


class ThermocoupleRangeError(EbullioError, ValueError):
    """A temperature or EMF lies outside a thermocouple type's reference range."""


class PhysicsRangeError(EbullioError, ValueError):
    """A physical quantity lies outside the range a function is valid for."""


class ConfigError(EbullioError, ValueError):
    """A configuration, scenario or metadata value is missing or wrong."""


class LogFormatError(EbullioError, ValueError):
    """A log file cannot be read at all (bad header, unknown columns); names file and line."""
