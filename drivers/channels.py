"""From an instrument's named fields to samples: channel bindings and the quarantine item.

Every line, register or payload driver ends the same way: it has pulled a set of
named fields out of one frame (``{"ch1": "1.234", "cj": "21.5"}``) and must turn
them into :class:`~drivers.sample.Sample` objects for the vessels they belong to.
:func:`bind_fields` does that, in one place, for all of them:

* a field that is a plain reading is scaled ``value = gain·raw + offset``;
* a thermocouple field in raw millivolts goes through ITS-90 (:mod:`drivers.thermocouple`)
  with cold-junction compensation from another field of the same frame (itself in °C),
  and the calibration then applies to the temperature, in °C, because that is how a
  thermocouple is calibrated against a reference thermometer (common practice, no source);
* an open circuit or over-range EMF becomes a ``fault`` sample (NaN) with the reason,
  never a number.

Anything that cannot be used at all is handed back as a :class:`Quarantined` item
carrying the raw input, where it came from and why, so the recorder can keep it.
Drivers yield :class:`Sample` and :class:`Quarantined` items from ``samples()``.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

from drivers.errors import ConfigError
from drivers.sample import CHANNEL_UNITS, PLAIN_NUMBER, Quality, Sample
from drivers.thermocouple import classify_emf, reference_table

#: Units a channel may be configured in, and the channel roles each suits.
TEMPERATURE_UNITS = ("degC", "mV")


@dataclass(frozen=True, slots=True)
class Quarantined:
    """Input that could not be used, set aside: kept verbatim, with where it came from
    and why. The one record of set-aside input, live (a driver, the service's checks)
    and in a read log (a CSV row, a recorder log's quarantine).

    ``t`` is the Unix time (s) it was received, None for a line read from a file;
    ``source`` the instrument or broker URL, or the file; ``where`` the position in
    it (port and line, topic, register, ``line 12``); ``raw`` the bytes as they
    arrived; ``line`` the file's line number (0 when not from a file).
    """

    t: float | None
    source: str
    where: str
    reason: str
    raw: bytes
    line: int = 0

    @property
    def text(self) -> str:
        """The raw input as text (bytes that are not UTF-8 as ``\\xNN``)."""
        return self.raw.decode("utf-8", "backslashreplace")

    def as_dict(self) -> dict[str, object]:
        """Return it as a JSON-ready dict (``file`` is the source; docs/run-summary.md)."""
        return {"file": self.source, "line": self.line, "where": self.where, "t": self.t,
                "reason": self.reason, "raw": self.text}  # fmt: skip


@dataclass(frozen=True, slots=True)
class Acknowledge:
    """Sent by a driver after the items of one delivery it must confirm once they are safe.

    The live service passes it to the recorder, which calls ``send()`` (in the event
    loop's thread) after the block holding those items is committed: a broker's QoS 1
    message is acknowledged only once it is on disk, so a crash before the commit has
    the broker deliver it again. ``send`` must be safe to call on a closed link (it
    then does nothing: the broker redelivers). ``source`` names the driver.
    """

    source: str
    send: Callable[[], object]


@dataclass(frozen=True, slots=True)
class ChannelBinding:
    """Where one vessel channel is found in a source's frames, and how to convert it.

    ``field`` names the value in the frame (a CSV position's name, a ``key=value`` key,
    a regex group, a register name); ``role`` is the sample channel (``water``,
    ``element``, ``ambient``, ``power``, ...); ``unit`` is what the field carries:
    the role's own unit (``degC``, ``W``, ``Wh``, ...) or ``mV`` for a raw
    thermocouple, which then needs ``thermocouple`` (type letter) and
    ``cold_junction`` (the field holding the reference junction's temperature, °C,
    or a fixed temperature in °C given as a number). ``gain`` and ``offset`` are the
    calibration, applied in the role's unit.
    """

    field: str
    vessel: str
    role: str
    unit: str
    thermocouple: str | None = None
    cold_junction: str | float | None = None
    offset: float = 0.0
    gain: float = 1.0

    def __post_init__(self) -> None:
        where = f"channel {self.vessel}/{self.role} (field {self.field!r})"
        if self.role not in CHANNEL_UNITS:
            known = ", ".join(sorted(CHANNEL_UNITS))
            raise ConfigError(f"{where}: unknown role {self.role!r}; known roles: {known}")
        if not (math.isfinite(self.gain) and math.isfinite(self.offset)) or self.gain == 0.0:
            raise ConfigError(f"{where}: gain must be finite and non-zero, offset finite")
        own = CHANNEL_UNITS[self.role]
        if self.unit == "mV":
            if own != "degC":
                raise ConfigError(f"{where}: only a temperature role can be read in mV")
            if self.thermocouple is None:
                raise ConfigError(f"{where}: a channel in mV needs its thermocouple type")
            try:
                reference_table(self.thermocouple)
            except (KeyError, ValueError) as exc:
                raise ConfigError(f"{where}: {exc}") from None
            if self.cold_junction is None:
                raise ConfigError(
                    f"{where}: a channel in mV needs a cold_junction (a field or a fixed °C)"
                )
        elif self.unit != own:
            raise ConfigError(
                f"{where}: unit {self.unit!r} does not suit the role; use {own!r}"
                + (" or 'mV' for a raw thermocouple" if own == "degC" else "")
            )


def parse_number(text: str | float | int) -> float:
    """Return ``text`` as a finite float; raise ValueError saying what it was otherwise."""
    if isinstance(text, bool):
        raise ValueError(f"{text!r} is not a number")
    if isinstance(text, int | float):
        value = float(text)
    else:
        stripped = text.strip() if isinstance(text, str) else None
        if stripped is None or PLAIN_NUMBER.fullmatch(stripped) is None:
            raise ValueError(f"{text!r} is not a plain decimal number")
        value = float(stripped)
    if not math.isfinite(value):
        raise ValueError(f"{text!r} is not a finite number")
    return value


def _cold_junction_c(binding: ChannelBinding, fields: Mapping[str, object]) -> float:
    cj = binding.cold_junction
    if isinstance(cj, int | float):
        return float(cj)
    if cj not in fields:
        raise ValueError(f"cold-junction field {cj!r} is missing from the frame")
    return parse_number(fields[cj])  # type: ignore[arg-type]


def bind_fields(
    fields: Mapping[str, object],
    bindings: Sequence[ChannelBinding],
    t: float,
    source: str,
) -> tuple[list[Sample], list[str]]:
    """Return (samples, problems) for one frame's fields under ``bindings``.

    A binding whose field is absent from the frame gives no sample (the instrument
    simply did not report it). A field that is present but not a finite number, or a
    thermocouple whose cold junction cannot be read, gives no sample and one line in
    ``problems`` naming the field and why; the caller quarantines the raw frame when
    any problem is reported. An open-circuit or over-range EMF gives a ``fault``
    sample (NaN) instead, because the instrument did report it.
    """
    samples: list[Sample] = []
    problems: list[str] = []
    for b in bindings:
        if b.field not in fields:
            continue
        try:
            raw = parse_number(fields[b.field])  # type: ignore[arg-type]
        except ValueError as exc:
            problems.append(f"field {b.field!r}: {exc}")
            continue
        if b.unit == "mV":
            try:
                cj_c = _cold_junction_c(b, fields)
            except ValueError as exc:
                problems.append(f"field {b.field!r}: {exc}")
                continue
            reading = classify_emf(b.thermocouple, raw, cj_c)  # type: ignore[arg-type]
            if reading.quality == Quality.FAULT:
                samples.append(Sample(t, b.vessel, b.role, math.nan, Quality.FAULT, source))
                continue
            value = b.gain * reading.t_c + b.offset
        else:
            value = b.gain * raw + b.offset
        samples.append(Sample(t, b.vessel, b.role, value, Quality.OK, source))
    return samples, problems
