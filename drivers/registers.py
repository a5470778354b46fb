"""A power meter's registers as a typed table, and the pure arithmetic around them.

Nothing here touches a socket or a clock: it is the wire format of a register map,
tested with tables of words, and shared by the Modbus driver (:mod:`drivers.modbus`)
and the simulated meter (:mod:`drivers.emulators.power_meter`).

Addressing: :attr:`RegisterSpec.address` is the **zero-based** protocol address, the
number that travels in the request PDU. Meter manuals often print one-based
"register numbers" (40001 for holding register 0); subtract the offset yourself.

Words are 16 bits. Within a word the bytes are big-endian (the Modbus rule). For the
32-bit types, ``word_order="big"`` puts the most significant word at the lower address;
``"little"`` puts it at the higher address (common practice, no source: both layouts
exist among meters).

:class:`EnergyToPower` turns an energy counter into average power between polls, which
is what the estimator wants as its input (mean power over each step), and survives the
counter rolling over.
"""

from __future__ import annotations

import math
import struct
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import NamedTuple

from drivers.errors import ConfigError, FrameError
from drivers.sample import CHANNEL_UNITS

#: Register type -> (struct format character, number of 16-bit words).
REGISTER_TYPES: dict[str, tuple[str, int]] = {
    "int16": ("h", 1),
    "uint16": ("H", 1),
    "int32": ("i", 2),
    "uint32": ("I", 2),
    "float32": ("f", 2),
}
WORD_ORDERS = ("big", "little")
TABLES = ("holding", "input")
#: Units a register may carry: the units of the sample roles (°C, W, Wh, V, A, kPa).
REGISTER_UNITS = tuple(sorted(set(CHANNEL_UNITS.values())))
#: Largest register count one read request may ask for (Modbus application protocol).
MAX_READ_COUNT = 125
#: Highest zero-based register address.
MAX_ADDRESS = 0xFFFF


@dataclass(frozen=True, slots=True, kw_only=True)
class RegisterSpec:
    """One quantity held in a meter's registers.

    ``address`` is the zero-based address sent on the wire (holding register "40001"
    in a manual is address 0). ``type`` is one of ``int16``, ``uint16``, ``int32``,
    ``uint32``, ``float32``; ``word_order`` (``big``: most significant word first, or
    ``little``) matters only for the 32-bit types. The decoded value is
    ``raw · scale`` in ``unit`` (a sample role's unit: ``W``, ``Wh``, ``V``, ``A``,
    ``kPa``, ``degC``). ``table`` is ``holding`` (function 3) or ``input`` (function 4).
    Invalid fields raise :class:`ConfigError` naming the register and the reason.
    """

    name: str
    address: int
    type: str
    unit: str
    word_order: str = "big"
    scale: float = 1.0
    table: str = "holding"

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name.strip():
            raise ConfigError(
                f"register at address {self.address!r}: name must be a non-empty text"
            )
        where = f"register {self.name!r}"
        if self.type not in REGISTER_TYPES:
            raise ConfigError(
                f"{where}: unknown type {self.type!r}; known types: {', '.join(REGISTER_TYPES)}"
            )
        if isinstance(self.address, bool) or not isinstance(self.address, int):
            raise ConfigError(f"{where}: address must be an integer, not {self.address!r}")
        if not 0 <= self.address <= MAX_ADDRESS - self.words + 1:
            raise ConfigError(
                f"{where}: address {self.address} with {self.words} word(s) is outside "
                f"0..{MAX_ADDRESS} (addresses are zero-based, as sent on the wire)"
            )
        if self.word_order not in WORD_ORDERS:
            raise ConfigError(
                f"{where}: word_order {self.word_order!r} must be one of {', '.join(WORD_ORDERS)}"
            )
        if (
            isinstance(self.scale, bool)
            or not isinstance(self.scale, int | float)
            or not math.isfinite(self.scale)
            or self.scale == 0.0
        ):
            raise ConfigError(
                f"{where}: scale must be a finite, non-zero number, not {self.scale!r}"
            )
        if self.unit not in REGISTER_UNITS:
            raise ConfigError(
                f"{where}: unit {self.unit!r} is not a sample unit; use one of "
                f"{', '.join(REGISTER_UNITS)}"
            )
        if self.table not in TABLES:
            raise ConfigError(f"{where}: table {self.table!r} must be one of {', '.join(TABLES)}")

    @property
    def words(self) -> int:
        """Return the number of 16-bit registers this quantity occupies (1 or 2)."""
        return REGISTER_TYPES[self.type][1]

    @property
    def end(self) -> int:
        """Return the address one past this quantity's last register."""
        return self.address + self.words


class RegisterRead(NamedTuple):
    """One read request: ``count`` registers of ``table`` from zero-based ``start``."""

    table: str
    start: int
    count: int


def check_register_map(specs: Iterable[RegisterSpec]) -> list[RegisterSpec]:
    """Return ``specs`` as a list after checking it is a usable map (raises ConfigError).

    A map needs at least one register, and names must be unique (they are the field
    names the channel bindings refer to).
    """
    out = list(specs)
    if not out:
        raise ConfigError("a register map needs at least one register")
    seen: set[str] = set()
    for spec in out:
        if not isinstance(spec, RegisterSpec):
            raise ConfigError(f"register map entry {spec!r} is not a RegisterSpec")
        if spec.name in seen:
            raise ConfigError(f"register {spec.name!r} is defined twice in the map")
        seen.add(spec.name)
    return out


def words_to_bytes(regs: Sequence[int]) -> bytes:
    """Return register words as the bytes they travel as (big-endian within each word).

    Words outside 0..65535 are clamped into a 16-bit field with ``& 0xFFFF`` so the
    raw record can always be written; :func:`decode` refuses such words.
    """
    return b"".join((int(w) & 0xFFFF).to_bytes(2, "big") for w in regs)


def decode(regs: Sequence[int], spec: RegisterSpec) -> float:
    """Return the value (in ``spec.unit``) held in ``regs``, the words read for ``spec``.

    Raises :class:`FrameError` (``raw`` = the words as bytes) when the count is wrong,
    a word is not a 16-bit value, or a float32 is NaN or infinite.
    """
    where = f"register {spec.name!r}@{spec.address}"
    words = list(regs)
    if len(words) != spec.words:
        raise FrameError(
            f"{where}: {spec.type} needs {spec.words} word(s), got {len(words)}",
            raw=words_to_bytes(words),
        )
    for w in words:
        if isinstance(w, bool) or not isinstance(w, int) or not 0 <= w <= 0xFFFF:
            raise FrameError(f"{where}: {w!r} is not a 16-bit word", raw=words_to_bytes(words))
    raw_bytes = words_to_bytes(words)
    ordered = words[::-1] if spec.word_order == "little" else words
    fmt = REGISTER_TYPES[spec.type][0]
    (raw,) = struct.unpack(">" + fmt, words_to_bytes(ordered))
    if not math.isfinite(raw):
        raise FrameError(f"{where}: float32 {raw!r} is not a finite number", raw=raw_bytes)
    return float(raw) * spec.scale


def encode(value: float, spec: RegisterSpec) -> list[int]:
    """Return the register words that hold ``value`` (in ``spec.unit``) under ``spec``.

    Integer types round ``value / scale`` to the nearest integer. Raises
    :class:`ConfigError` naming the register when the value is not finite or does not
    fit the type at this scale.
    """
    where = f"register {spec.name!r}@{spec.address}"
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise ConfigError(f"{where}: cannot hold {value!r}; a finite number is needed")
    raw = value / spec.scale
    fmt = REGISTER_TYPES[spec.type][0]
    if spec.type == "float32":
        try:
            packed = struct.pack(">f", raw)
        except OverflowError:
            raise ConfigError(f"{where}: {value!r} {spec.unit} overflows a float32") from None
    else:
        lo, hi = integer_range(spec)
        whole = round(raw)
        if not lo <= whole <= hi:
            raise ConfigError(
                f"{where}: {value!r} {spec.unit} is raw {whole}, outside {spec.type} "
                f"({lo}..{hi}) at scale {spec.scale}"
            )
        packed = struct.pack(">" + fmt, whole)
    words = [int.from_bytes(packed[i : i + 2], "big") for i in range(0, len(packed), 2)]
    return words[::-1] if spec.word_order == "little" else words


def integer_range(spec: RegisterSpec) -> tuple[int, int]:
    """Return the (lowest, highest) raw integer of an integer register type.

    Raises :class:`ConfigError` for ``float32``, which has no integer range.
    """
    bits = 16 * spec.words
    if spec.type.startswith("uint"):
        return 0, 2**bits - 1
    if spec.type.startswith("int"):
        return -(2 ** (bits - 1)), 2 ** (bits - 1) - 1
    raise ConfigError(f"register {spec.name!r}: {spec.type} has no integer range")


def counter_modulus(spec: RegisterSpec) -> float | None:
    """Return the value (in ``spec.unit``) after which an integer counter rolls over to 0.

    That is ``2**bits · |scale|`` for the integer types; ``None`` for ``float32``,
    which does not wrap.
    """
    if spec.type == "float32":
        return None
    return float(2 ** (16 * spec.words)) * abs(spec.scale)


def read_plan(specs: Iterable[RegisterSpec]) -> list[RegisterRead]:
    """Return the fewest read requests that cover every register in ``specs``.

    Registers of the same table that touch or overlap are merged into one read of at
    most :data:`MAX_READ_COUNT` registers; a gap always starts a new read (an unused
    address may be unmapped, and reading it would fail the whole request). Reads come
    sorted by table (``holding`` first) and start address.
    """
    reads: list[RegisterRead] = []
    all_specs = list(specs)
    for table in TABLES:
        chosen = sorted(
            (s for s in all_specs if s.table == table), key=lambda s: (s.address, s.end)
        )
        start = end = -1
        for spec in chosen:
            if start >= 0 and spec.address <= end and max(end, spec.end) - start <= MAX_READ_COUNT:
                end = max(end, spec.end)
                continue
            if start >= 0:
                reads.append(RegisterRead(table, start, end - start))
            start, end = spec.address, spec.end
        if start >= 0:
            reads.append(RegisterRead(table, start, end - start))
    return reads


def words_for(spec: RegisterSpec, read: RegisterRead, regs: Sequence[int]) -> list[int]:
    """Return the words of ``spec`` out of ``regs``, the answer to ``read``.

    Raises :class:`FrameError` (raw = the whole answer) when the answer is too short
    to contain them or ``spec`` lies outside the read.
    """
    offset = spec.address - read.start
    if spec.table != read.table or offset < 0 or spec.end > read.start + read.count:
        raise FrameError(
            f"register {spec.name!r}@{spec.address} is not inside the read of "
            f"{read.table} {read.start}..{read.start + read.count - 1}",
            raw=words_to_bytes(regs),
        )
    if offset + spec.words > len(regs):
        raise FrameError(
            f"register {spec.name!r}@{spec.address}: the answer holds {len(regs)} "
            f"word(s), {read.count} were asked for",
            raw=words_to_bytes(regs),
        )
    return list(regs[offset : offset + spec.words])


@dataclass(frozen=True, slots=True)
class PowerStep:
    """What one counter reading says about power.

    ``power_w`` is the average power (W) since the previous accepted reading, or
    ``None`` with ``reason`` saying why there is none (first reading, counter reset,
    implausible jump, time not advancing). ``interval_s`` is the averaging interval (s),
    0 when there is no power. ``wrapped`` is True when the counter rolled over.
    """

    power_w: float | None
    interval_s: float
    reason: str = ""
    wrapped: bool = False


class EnergyToPower:
    """Average power between polls from successive readings of an energy counter.

    ``update(t_s, energy_wh)`` gives a :class:`PowerStep`. A counter that falls is taken
    as having rolled over when ``modulus_wh`` is known and the rolled-over increase
    stays at or under ``max_power_w``; otherwise the fall is a reset (or a swapped
    meter) and no power is given. A rise that would mean more than ``max_power_w`` is
    refused too. Power is never negative. After a refusal the new reading becomes the
    baseline, so the next interval is measured normally.

    Options: ``modulus_wh`` (Wh, default None: the counter never wraps; use
    :func:`counter_modulus`), ``max_power_w`` (W, default 100 000: more than any
    single vessel's supply, so only a broken reading exceeds it).
    """

    def __init__(self, *, modulus_wh: float | None = None, max_power_w: float = 100_000.0) -> None:
        if modulus_wh is not None and not (math.isfinite(modulus_wh) and modulus_wh > 0.0):
            raise ConfigError(f"modulus_wh must be positive and finite, not {modulus_wh!r}")
        if not (math.isfinite(max_power_w) and max_power_w > 0.0):
            raise ConfigError(f"max_power_w must be positive and finite, not {max_power_w!r}")
        self.modulus_wh = modulus_wh
        self.max_power_w = max_power_w
        self._last: tuple[float, float] | None = None

    def reset(self) -> None:
        """Forget the baseline (the next reading starts a new interval)."""
        self._last = None

    def update(self, t_s: float, energy_wh: float) -> PowerStep:
        """Return the average power (W) since the previous reading, or None with a reason."""
        if not (math.isfinite(t_s) and math.isfinite(energy_wh)):
            return PowerStep(None, 0.0, f"reading ({t_s!r} s, {energy_wh!r} Wh) is not finite")
        last, self._last = self._last, (t_s, energy_wh)
        if last is None:
            return PowerStep(None, 0.0, "first counter reading: power needs two")
        t0_s, e0_wh = last
        dt_s = t_s - t0_s
        if dt_s <= 0.0:
            self._last = last  # keep the older baseline; this reading told us nothing
            return PowerStep(None, 0.0, f"time did not advance ({dt_s:+.6g} s) between readings")
        delta_wh = energy_wh - e0_wh
        wrapped = False
        if delta_wh < 0.0:
            if self.modulus_wh is None:
                return PowerStep(
                    None, 0.0, f"counter fell by {-delta_wh:.6g} Wh (reset?); power not derived"
                )
            rolled_wh = delta_wh + self.modulus_wh
            if rolled_wh < 0.0 or rolled_wh * 3600.0 / dt_s > self.max_power_w:
                return PowerStep(
                    None,
                    0.0,
                    f"counter fell by {-delta_wh:.6g} Wh, too far to be a roll-over at "
                    f"{self.modulus_wh:.6g} Wh (reset?); power not derived",
                )
            delta_wh, wrapped = rolled_wh, True
        power_w = delta_wh * 3600.0 / dt_s  # Wh per s -> W: 1 Wh = 3600 J
        if power_w > self.max_power_w:
            return PowerStep(
                None,
                0.0,
                f"counter rose {delta_wh:.6g} Wh in {dt_s:.6g} s = {power_w:.6g} W, above "
                f"max_power_w {self.max_power_w:.6g} W; power not derived",
            )
        return PowerStep(power_w, dt_s, "", wrapped)
