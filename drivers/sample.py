"""The sample contract: one reading from one channel of one vessel.

Every driver, the simulated rig included, yields :class:`Sample` objects and
nothing else; ``monitor/`` depends on this contract, never on a transport.
"""

from __future__ import annotations

import functools
import math
import re
import sys
import types
from collections.abc import Mapping
from dataclasses import dataclass
from enum import StrEnum

#: A number as instruments write it: plain ASCII decimal, an optional sign, point and
#: exponent. Not Python's wider ``float()`` grammar (``1_000``, non-ASCII digits,
#: ``inf``, ``nan``): every text path (serial lines, MQTT payloads, time stamps) uses
#: this one rule.
PLAIN_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?", re.ASCII)


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


#: Channels in °C.
TEMPERATURE_CHANNELS = frozenset(k for k, unit in CHANNEL_UNITS.items() if unit == "degC")
#: Absolute zero, °C.
ABSOLUTE_ZERO_C = -273.15
#: The highest temperature any standard thermocouple type is specified to (type B,
#: 1820 °C, ITS-90 tables; from memory): a °C reading above it is no reading.
HIGHEST_SENSOR_C = 1820.0
#: The default ceiling of a power reading, in rated powers (a few times the rating:
#: an inrush or a meter's spike passes, a 1e200 W reading does not; judgement).
MAX_POWER_RATED = 4.0
#: The ceiling without a rated power, W (a large building's heater bank; judgement).
MAX_POWER_UNRATED_W = 1.0e6
#: Ranges of the other channels: (lowest, highest) in the channel's unit (judgement:
#: far outside any water heater's, so only nonsense is caught).
OTHER_RANGES: dict[str, tuple[float, float]] = {
    "energy": (0.0, 1.0e12),
    "voltage": (0.0, 2000.0),
    "current": (0.0, 5000.0),
    "pressure": (1.0, 10000.0),
}


#: The range of a channel without one of its own: any finite value.
ANY_FINITE = (-sys.float_info.max, sys.float_info.max)


@functools.lru_cache(maxsize=64)
def _ranges(max_power_w: float, power_noise_w: float) -> Mapping[str, tuple[float, float]]:
    """Return :attr:`ReadingLimits.ranges` for these limits (made once, then shared)."""
    # a temperature at or below absolute zero is none: the lowest allowed is the
    # float just above it
    above_zero_c = math.nextafter(ABSOLUTE_ZERO_C, math.inf)
    ranges = dict.fromkeys(TEMPERATURE_CHANNELS, (above_zero_c, HIGHEST_SENSOR_C))
    ranges["power"] = (-power_noise_w, max_power_w)
    ranges.update(OTHER_RANGES)
    return types.MappingProxyType(ranges)


@dataclass(frozen=True, slots=True)
class ReadingLimits:
    """What one vessel's readings may physically be; anything outside is no reading.

    ``max_power_w``: the ceiling of a power reading (W); ``power_noise_w``: how far
    below zero an idle meter's noise may go (W). Temperatures lie above absolute zero
    and at or below :data:`HIGHEST_SENSOR_C`; every value is finite. Build it with
    :meth:`from_metadata`; :meth:`problem` says what is wrong with one value.
    """

    max_power_w: float = MAX_POWER_UNRATED_W
    power_noise_w: float = 50.0

    @property
    def ranges(self) -> Mapping[str, tuple[float, float]]:
        """Each channel's lowest and highest reading, both allowed: a value ``v`` is a
        reading of a channel when ``lo <= v <= hi`` (so never NaN or infinite); a channel
        not in it takes any finite value (:data:`ANY_FINITE`). Do not change it."""
        return _ranges(self.max_power_w, self.power_noise_w)

    @classmethod
    def from_metadata(cls, metadata: Mapping[str, object]) -> ReadingLimits:
        """Limits from a vessel's metadata: ``max_power_w``, else 4x ``rated_power_w``."""

        def number(key: str) -> float | None:
            try:
                value = float(metadata.get(key))  # type: ignore[arg-type]
            except (TypeError, ValueError):
                return None
            return value if math.isfinite(value) and value > 0.0 else None

        rated = number("rated_power_w")
        top = number("max_power_w") or (MAX_POWER_RATED * rated if rated else None)
        top = top or MAX_POWER_UNRATED_W
        return cls(max_power_w=top, power_noise_w=max(50.0, 0.02 * top))

    def problem(self, channel: str, value: float) -> str | None:
        """Return why ``value`` cannot be a reading of ``channel``, or None when it can."""
        lo, hi = self.ranges.get(channel, ANY_FINITE)
        if lo <= value <= hi:
            return None
        if not math.isfinite(value):
            return f"{channel} = {value!r} is not a finite number"
        if channel in TEMPERATURE_CHANNELS:
            if value < lo:
                return f"{channel} = {value!r} °C is at or below absolute zero"
            return f"{channel} = {value!r} °C is above any thermocouple's range"
        if channel == "power":
            if value < lo:
                return f"power = {value!r} W is below -{self.power_noise_w:g} W"
            return f"power = {value!r} W is above the vessel's {self.max_power_w:g} W"
        unit = CHANNEL_UNITS[channel]
        return f"{channel} = {value!r} {unit} is outside {lo:g} to {hi:g} {unit}"
