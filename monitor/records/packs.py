"""The compact form of the recorder's readings: one *pack* per vessel and commit (schema 2).

A pack holds, in arrival order, the samples one vessel had in one committed block, as
columns of fixed-width little-endian numbers, so a reader unpacks each column with one
``struct`` call. It is bytes only: this module knows nothing of SQLite, of names or of
the hash chain (:mod:`monitor.records.recorder` owns the tables and the one mapping of
a sample to its stored form; docs/recorder.md describes both).

Layout of a pack (``u16`` is a 2-byte unsigned integer, ``f64`` an IEEE 754 double, all
little-endian)::

    u8   flags    1: a quality column follows the series ids (else every sample is ok)
                  2: positions and series ids are u32 (else u16)
                  4 and 8: the value column's form (0: f64, 1: i16 decimal, 2: i32 decimal)
                  16: every byte after this one is zlib-compressed (``zlib.compress``)
    u8   decimals the decimal places of an integer value column (0-9)
    u16  runs     how many runs of consecutive positions follow
    u16  instants how many distinct-time runs follow
    runs     x (start, length)    u16 or u32 each: where the samples sit among the
                                  block's samples (0 = the block's first sample)
    instants x f64                the time (Unix s) of each run of equal times
    instants x u16                how many consecutive samples share that time
    n x series id                 u16 or u32: which (channel, source) the sample is
    [n x u8 quality]              0 ok, 1 suspect, 2 fault (only with flag 1)
    n x value                     f64; or i16/i32 m, the value being m / 10**decimals
                                  exactly, and the lowest integer (-32768, -2**31)
                                  standing for NaN

``n`` (the number of samples) is not in the bytes: the recorder keeps it in the pack's
row. A pack holds at most :data:`MAX_SAMPLES` samples (its counts are u16); the
recorder writes at most :data:`PACK_SAMPLES`, so a question about a time window unpacks
little beyond the window even in a log committed in large blocks.

Why the values round-trip bit for bit
    A float that prints with ``d`` decimals (``repr``, the shortest text that reads back
    as the same float) is the double nearest to the decimal number m / 10**d, and so is
    the IEEE quotient ``m / 10.0**d`` (division is correctly rounded, and m and 10**d
    with d <= 9 are exact doubles). :func:`encode_pack` uses the integer form only
    after checking ``m / 10**d == v`` for every value of the pack; anything else (noise
    with 17 digits, infinities, huge numbers) is kept as f64. Readings parsed from an
    instrument's decimal text, and the simulated rig's quantised readings, take 2 or 4
    bytes instead of 8.
"""

from __future__ import annotations

import itertools
import math
import struct
import zlib
from collections.abc import Sequence
from dataclasses import dataclass

__all__ = [
    "MAX_SAMPLES",
    "PACK_SAMPLES",
    "QUALITY_CODES",
    "Pack",
    "decode_pack",
    "encode_pack",
    "pack_tail",
]

#: The most samples one pack can hold (its counts are u16).
MAX_SAMPLES = 65_535
#: The most samples the recorder puts in one pack.
PACK_SAMPLES = 4_096
#: Quality of each code in a pack's quality column.
QUALITY_CODES: tuple[str, ...] = ("ok", "suspect", "fault")

_QUALITIES = 1
_WIDE = 2
_FORM_SHIFT = 2
_FORM_MASK = 12
_ZLIB = 16
_F64, _I16, _I32 = 0, 1, 2
_NAN_INT = {_I16: -(2**15), _I32: -(2**31)}
_INT_CODE = {_I16: "h", _I32: "i"}
_MAX_DECIMALS = 9
_ZLIB_FROM = 64  # packs of fewer samples are not worth a zlib header
_COUNTS = struct.Struct("<BHH")  # decimals, runs, instants (after the flags byte)
_STRUCTS: dict[tuple[str, int], struct.Struct] = {}


def _struct(code: str, count: int) -> struct.Struct:
    """Return the little-endian struct of ``count`` items of ``code`` (kept for reuse)."""
    found = _STRUCTS.get((code, count))
    if found is None:
        found = struct.Struct(f"<{count}{code}")
        if len(_STRUCTS) < 4096:
            _STRUCTS[(code, count)] = found
    return found


@dataclass(frozen=True, slots=True)
class Pack:
    """One decoded pack: its samples as columns, each a list of ``n`` items.

    ``positions`` are the samples' places among their block's samples, ``times`` Unix s,
    ``series`` the recorder's series ids, ``qualities`` codes of :data:`QUALITY_CODES`,
    ``values`` floats (NaN where the sample carries none).
    """

    positions: list[int]
    times: list[float]
    series: list[int]
    qualities: list[int]
    values: list[float]


def _decimal_form(values: Sequence[float]) -> tuple[int, int, list[int]] | None:
    """Return (form, decimals, integers) when every value is m / 10**decimals exactly."""
    decimals = 0
    for v in values:
        if v != v:
            continue
        text = repr(v)
        point = text.find(".")
        if point < 0 or "e" in text:  # inf, or an exponent form: keep the f64
            return None
        places = 0 if text.endswith(".0") else len(text) - point - 1
        if places > decimals:
            if places > _MAX_DECIMALS:
                return None
            decimals = places
    scale = 10.0**decimals
    ints: list[int] = []
    low = high = 0
    for v in values:
        if v != v:
            ints.append(None)  # type: ignore[arg-type]
            continue
        m = round(v * scale)
        if m / scale != v or (m == 0 and math.copysign(1.0, v) < 0.0):  # -0.0 stays f64
            return None
        ints.append(m)
        low, high = min(low, m), max(high, m)
    if low > -(2**15) and high < 2**15:
        form = _I16
    elif low > -(2**31) and high < 2**31:
        form = _I32
    else:
        return None
    nan = _NAN_INT[form]
    return form, decimals, [nan if m is None else m for m in ints]


def _runs(items: Sequence[object]) -> tuple[list[object], list[int]]:
    """Return the runs of equal consecutive items: (the item of each, its length)."""
    heads: list[object] = []
    lengths: list[int] = []
    previous = object()
    for item in items:
        if item == previous:
            lengths[-1] += 1
        else:
            heads.append(item)
            lengths.append(1)
            previous = item
    return heads, lengths


def encode_pack(
    positions: Sequence[int],
    times: Sequence[float],
    series: Sequence[int],
    qualities: Sequence[int],
    values: Sequence[float],
) -> bytes:
    """Return the bytes of one pack (the module docstring's layout).

    The five sequences hold one item per sample, in arrival order: ``positions``
    ascending non-negative ints, ``times`` finite floats (Unix s), ``series`` ids,
    ``qualities`` codes of :data:`QUALITY_CODES`, ``values`` floats (NaN for none).
    Raises ValueError for an empty or over-long pack or sequences of unequal length.
    """
    n = len(positions)
    if not 0 < n <= MAX_SAMPLES:
        raise ValueError(f"a pack holds 1 to {MAX_SAMPLES} samples, not {n}")
    if not n == len(times) == len(series) == len(qualities) == len(values):
        raise ValueError("a pack's columns must have one item per sample")
    # runs of consecutive positions
    starts, lengths = [positions[0]], [1]
    for before, p in itertools.pairwise(positions):
        if p == before + 1:
            lengths[-1] += 1
        else:
            starts.append(p)
            lengths.append(1)
    instants, counts = _runs(times)
    wide = max(starts[-1] + lengths[-1], max(series)) > 0xFFFF
    flags = _WIDE if wide else 0
    code = "I" if wide else "H"
    runs = [x for pair in zip(starts, lengths, strict=True) for x in pair]
    parts = [
        _struct(code, len(runs)).pack(*runs),
        _struct("d", len(instants)).pack(*instants),
        _struct("H", len(counts)).pack(*counts),
        _struct(code, n).pack(*series),
    ]
    if any(qualities):
        flags |= _QUALITIES
        parts.append(bytes(qualities))
    decimal = _decimal_form(values)
    if decimal is None:
        decimals = 0
        parts.append(_struct("d", n).pack(*values))
    else:
        form, decimals, ints = decimal
        flags |= form << _FORM_SHIFT
        parts.append(_struct(_INT_CODE[form], n).pack(*ints))
    body = _COUNTS.pack(decimals, len(starts), len(instants)) + b"".join(parts)
    if n >= _ZLIB_FROM:
        squeezed = zlib.compress(body, 6)
        if len(squeezed) < len(body):
            return bytes((flags | _ZLIB,)) + squeezed
    return bytes((flags,)) + body


def _body(data: bytes) -> tuple[int, bytes]:
    """Return a pack's flags and its bytes after them, decompressed."""
    if not data:
        raise ValueError("an empty pack")
    flags = data[0]
    if flags & ~(_QUALITIES | _WIDE | _FORM_MASK | _ZLIB):
        raise ValueError(f"unknown pack flags {flags:#04x}")
    body = data[1:]
    if flags & _ZLIB:
        try:
            body = zlib.decompress(body)
        except zlib.error as exc:
            raise ValueError(f"the pack's compressed bytes are damaged ({exc})") from None
    return flags, body


def pack_tail(data: bytes) -> tuple[int, float]:
    """Return the position and the time (Unix s) of a pack's last sample, reading only
    the pack's first columns. Raises ValueError as :func:`decode_pack` does for bytes
    that are not a pack (only the part read is checked)."""
    flags, body = _body(data)
    try:
        _, n_runs, n_instants = _COUNTS.unpack_from(body)
        code, size = ("I", 4) if flags & _WIDE else ("H", 2)
        at = _COUNTS.size + (2 * n_runs - 2) * size
        start, length = _struct(code, 2).unpack_from(body, at)
        (t,) = _struct("d", 1).unpack_from(body, at + 2 * size + 8 * (n_instants - 1))
    except struct.error as exc:
        raise ValueError(f"the pack is shorter than its counts say ({exc})") from None
    if not (n_runs and n_instants):
        raise ValueError("a pack without samples")
    return start + length - 1, t


def decode_pack(data: bytes, n: int) -> Pack:
    """Return the samples of a pack of ``n`` samples.

    Raises ValueError when the bytes are not such a pack (too short or too long, a
    count that does not add up, an unknown flag or quality).
    """
    flags, body = _body(data)
    try:
        decimals, n_runs, n_instants = _COUNTS.unpack_from(body)
        at = _COUNTS.size
        code, size = ("I", 4) if flags & _WIDE else ("H", 2)
        runs = _struct(code, 2 * n_runs).unpack_from(body, at)
        at += 2 * n_runs * size
        instants = _struct("d", n_instants).unpack_from(body, at)
        at += 8 * n_instants
        counts = _struct("H", n_instants).unpack_from(body, at)
        at += 2 * n_instants
        series = list(_struct(code, n).unpack_from(body, at))
        at += n * size
        if flags & _QUALITIES:
            qualities = list(body[at : at + n])
            at += n
        else:
            qualities = [0] * n
        form = (flags & _FORM_MASK) >> _FORM_SHIFT
        if form == _F64:
            values = list(_struct("d", n).unpack_from(body, at))
            at += 8 * n
        elif form in _INT_CODE:
            if decimals > _MAX_DECIMALS:
                raise ValueError(f"{decimals} decimal places")
            ints = _struct(_INT_CODE[form], n).unpack_from(body, at)
            at += n * (2 if form == _I16 else 4)
            scale, nan = 10.0**decimals, _NAN_INT[form]
            values = [math.nan if m == nan else m / scale for m in ints]
        else:
            raise ValueError(f"unknown value form {form}")
    except struct.error as exc:
        raise ValueError(f"the pack is shorter than its counts say ({exc})") from None
    if at != len(body):
        raise ValueError(f"the pack has {len(body) - at} bytes past its samples")
    if sum(counts) != n or sum(runs[1::2]) != n or len(qualities) != n:
        raise ValueError(f"the pack's counts do not add up to its {n} samples")
    if qualities and max(qualities) >= len(QUALITY_CODES):
        raise ValueError(f"unknown quality code {max(qualities)}")
    if n_runs == 1:
        positions = list(range(runs[0], runs[0] + runs[1]))
    else:
        positions = []
        for start, length in zip(runs[::2], runs[1::2], strict=True):
            positions.extend(range(start, start + length))
    if n_instants == 1:
        times = [instants[0]] * n
    else:
        times = []
        for t, count in zip(instants, counts, strict=True):
            times.extend([t] * count)
    return Pack(positions, times, series, qualities, values)
