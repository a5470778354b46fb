"""The sample contract: one reading from one channel of one vessel.

Every driver, the simulated rig included, yields :class:`Sample` objects and
nothing else; ``monitor/`` depends on this contract, never on a transport.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from enum import StrEnum


class Quality(StrEnum):
    """How far a reading may be trusted."""

    OK = "ok"
    SUSPECT = "suspect"  # plausible but doubtful (over-range, stale, lagging)
    FAULT = "fault"  # not a reading at all (open circuit, out of range); value is NaN


#: Unit of each known channel role. Temperatures are °C, the rest SI-ish as named.
CHANNEL_UNITS: dict[str, str] = {
    "water": "degC",
    "water_top": "degC",
    "element": "degC",
    "ambient": "degC",
    "wall": "degC",
    "cold_junction": "degC",
    "power": "W",
    "energy": "Wh",
    "voltage": "V",
    "current": "A",
    "pressure": "kPa",
}


def channel_unit(channel: str) -> str:
    """Return the unit of a channel role; raw thermocouple channels end in ``_emf`` (mV)."""
    if channel.endswith("_emf"):
        return "mV"
    try:
        return CHANNEL_UNITS[channel]
    except KeyError:
        known = ", ".join(sorted(CHANNEL_UNITS))
        raise KeyError(f"unknown channel role {channel!r}; known roles: {known}") from None


@dataclass(frozen=True, slots=True)
class Sample:
    """One reading.

    ``t`` is seconds since the Unix epoch (UTC); ``value`` is in the unit of the
    channel role (°C for temperatures, W, Wh, V, A, kPa, mV for ``*_emf``).
    A ``fault`` sample carries ``NaN`` as its value so it can never be mistaken
    for a reading.
    """

    t: float
    vessel: str
    channel: str
    value: float
    quality: Quality = Quality.OK
    source: str = ""

    def __post_init__(self) -> None:
        if self.quality == Quality.FAULT and not math.isnan(self.value):
            raise ValueError("a fault sample must carry NaN as its value")
