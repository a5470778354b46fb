"""MQTT topics and payloads to samples: pure functions, no I/O, no clock.

Topics under a prefix (``ebullio`` unless configured; it may have several levels):

* ``<prefix>/<vessel>/<channel>``: one reading of one channel. ``channel`` is a role
  of :data:`drivers.sample.CHANNEL_UNITS` (``water``, ``power``, ...), the value in
  that role's unit. The payload is a bare decimal number (``21.5``), stamped with the
  time of receipt, or a JSON object ``{"t": <Unix s>, "value": <number>}``, where
  ``t`` is optional and, when present, is the instrument's own time.
* ``<prefix>/<vessel>/reading``: several channels of one instant in one message, a
  JSON object ``{"t": <Unix s>, "water_c": 21.5, "power_w": 2950.0}`` whose keys are
  the column names of :data:`CHANNEL_COLUMNS` (role, underscore, unit), ``t`` again
  optional. One message per instant is several times cheaper for the broker and the
  monitor than one per channel.
* ``<prefix>/<vessel>/estimate`` and ``<prefix>/<vessel>/flags`` are what our own
  publisher writes; they are not readings and are ignored (:func:`parse_message`
  returns an empty list), never quarantined. So is ``<prefix>/_log/chain_head``, the
  recorder's chain head after each commit (retained; ``_log`` cannot be a vessel id).

Anything else is refused with :class:`~drivers.errors.FrameError`, which carries the
raw payload for the quarantine and says what was wrong: a payload that is not UTF-8,
not a number, a non-finite number (``NaN``, ``Infinity``, also as JSON tokens), a JSON
value of the wrong shape (a list, a nested object, a string, ``true``/``false``, ``null``,
a missing ``value``, a repeated key), an unknown channel or key, an implausible
timestamp (before 2000-01-01 UTC, or more than ``max_ahead_s`` after the receipt
time: instruments in milliseconds land here), an empty or odd vessel id, or a topic
of the wrong depth.

A message is taken or refused whole: a ``reading`` with one bad key gives no
samples at all, and its raw bytes go to the quarantine.
"""

from __future__ import annotations

import json
import math
import re
from typing import Any

from drivers.errors import FrameError
from drivers.sample import CHANNEL_UNITS, PLAIN_NUMBER, Sample

#: Column-name suffix of each unit, so that a column says its unit (``water_c``, ``power_w``).
UNIT_SUFFIXES: dict[str, str] = {
    "degC": "c",
    "W": "w",
    "Wh": "wh",
    "V": "v",
    "A": "a",
    "kPa": "kpa",
}

#: Column name of each channel role: the role, an underscore and the unit's suffix.
#: The same names serve the ``reading`` payload and the CSV interchange format.
CHANNEL_COLUMNS: dict[str, str] = {
    role: f"{role}_{UNIT_SUFFIXES[unit]}" for role, unit in CHANNEL_UNITS.items()
}
#: Channel role of each column name (the inverse of :data:`CHANNEL_COLUMNS`).
COLUMN_CHANNELS: dict[str, str] = {column: role for role, column in CHANNEL_COLUMNS.items()}

#: Topic leaves our own publisher writes; a subscriber to ``<prefix>/+/+`` sees them too.
PUBLISHED_LEAVES = frozenset({"estimate", "flags", "chain_head"})
#: The topic level under the prefix where the log's own messages go (not a vessel id).
LOG_LEVEL = "_log"
#: Topic leaf of the multi-channel payload.
READING_LEAF = "reading"

#: Earliest plausible instrument time: 2000-01-01T00:00:00Z in Unix seconds.
EARLIEST_T_S = 946_684_800.0
#: How far (s) an instrument's time may run ahead of the receipt time by default.
DEFAULT_MAX_AHEAD_S = 300.0

#: A vessel id: a letter or digit, then up to 63 letters, digits, ``_``, ``.`` or ``-``.
#: This keeps ids safe as topic levels, file names and CSV cells (no wildcards, no
#: spaces, no ``$``, no ``/``).
VESSEL_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.\-]{0,63}", re.ASCII)

# How much of a refused value a reason quotes.
_QUOTE_CHARS = 40


def is_vessel_id(text: str) -> bool:
    """Return True when ``text`` is a usable vessel id (see :data:`VESSEL_ID`)."""
    return VESSEL_ID.fullmatch(text) is not None


def check_prefix(prefix: str) -> str:
    """Return ``prefix`` when it is a usable topic prefix; raise ValueError saying why not.

    A prefix is one or more non-empty topic levels without wildcards (``+``, ``#``),
    not starting with ``$`` (the broker's own topics) and without a trailing ``/``.
    """
    if not prefix:
        raise ValueError("the topic prefix is empty")
    if prefix.startswith("$"):
        raise ValueError(f"topic prefix {prefix!r} starts with '$' (reserved for the broker)")
    if "+" in prefix or "#" in prefix or "\x00" in prefix:
        raise ValueError(f"topic prefix {prefix!r} holds a wildcard or NUL")
    if any(level == "" for level in prefix.split("/")):
        raise ValueError(f"topic prefix {prefix!r} has an empty level")
    return prefix


def _quote(text: str) -> str:
    return repr(text if len(text) <= _QUOTE_CHARS else text[:_QUOTE_CHARS] + "...")


def _refuse_constant(token: str) -> float:
    raise ValueError(f"{token} is not a finite number")


def _refuse_repeats(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    seen: dict[str, Any] = {}
    for key, value in pairs:
        if key in seen:
            raise ValueError(f"key {key!r} appears twice")
        seen[key] = value
    return seen


def _shape(value: object) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if value is None:
        return "null"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "an object"
    return type(value).__name__


def _decode_json(text: str) -> object:
    """Return the JSON value of ``text``; numbers come back as floats. ValueError if bad."""
    try:
        return json.loads(
            text,
            parse_int=float,  # so that a 400-digit integer becomes inf and is refused below
            parse_constant=_refuse_constant,
            object_pairs_hook=_refuse_repeats,
        )
    except RecursionError:
        raise ValueError("JSON nested too deeply") from None
    except json.JSONDecodeError as exc:
        raise ValueError(f"not a number or a JSON object ({exc.msg} at char {exc.pos})") from None


def _number(value: object, what: str) -> float:
    if type(value) is not float:  # ints were parsed as floats; bool is refused here
        raise ValueError(f"{what} is {_shape(value)}, not a number")
    if not math.isfinite(value):
        raise ValueError(f"{what} is not a finite number")
    return value


def _instrument_t(value: object, received_t: float, max_ahead_s: float) -> float:
    t = _number(value, "'t'")
    if t < EARLIEST_T_S:
        raise ValueError(f"'t' = {t!r} s lies before 2000-01-01 UTC")
    if t > received_t + max_ahead_s:
        ahead_s = t - received_t
        hint = " (milliseconds instead of seconds?)" if t > 1e11 else ""
        raise ValueError(
            f"'t' = {t!r} s is {ahead_s:.0f} s after its receipt, more than {max_ahead_s:g} s"
            + hint
        )
    return t


def _channel_payload(text: str, received_t: float, max_ahead_s: float) -> tuple[float, float]:
    """Return (t, value) of a single-channel payload: a bare number or {"t", "value"}."""
    stripped = text.strip()
    if PLAIN_NUMBER.fullmatch(stripped):
        value = float(stripped)
        if not math.isfinite(value):
            raise ValueError(f"{_quote(stripped)} is not a finite number")
        return received_t, value
    decoded = _decode_json(stripped)
    if not isinstance(decoded, dict):
        raise ValueError(f"payload is {_shape(decoded)}, not a number or a JSON object")
    unknown = sorted(set(decoded) - {"t", "value"})
    if unknown:
        raise ValueError(f"unknown key(s) {unknown}; a channel payload has 'value' and 't'")
    if "value" not in decoded:
        raise ValueError("the JSON object has no 'value'")
    value = _number(decoded["value"], "'value'")
    t = _instrument_t(decoded["t"], received_t, max_ahead_s) if "t" in decoded else received_t
    return t, value


def _reading_payload(
    text: str, received_t: float, max_ahead_s: float
) -> tuple[float, list[tuple[str, float]]]:
    """Return (t, [(role, value), ...]) of a multi-channel ``reading`` payload."""
    decoded = _decode_json(text.strip())
    if not isinstance(decoded, dict):
        raise ValueError(f"payload is {_shape(decoded)}; a reading is a JSON object")
    unknown = sorted(key for key in decoded if key != "t" and key not in COLUMN_CHANNELS)
    if unknown:
        raise ValueError(
            f"unknown key(s) {unknown}; known: 't', " + ", ".join(sorted(COLUMN_CHANNELS))
        )
    values = [
        (COLUMN_CHANNELS[key], _number(value, repr(key)))
        for key, value in decoded.items()
        if key != "t"
    ]
    if not values:
        raise ValueError("the reading holds no channel")
    t = _instrument_t(decoded["t"], received_t, max_ahead_s) if "t" in decoded else received_t
    return t, values


def parse_message(
    topic: str,
    payload: bytes,
    received_t: float,
    prefix: str,
    source: str,
    *,
    max_ahead_s: float = DEFAULT_MAX_AHEAD_S,
) -> list[Sample]:
    """Return the samples (value in the channel's unit, ``t`` in Unix s) of one MQTT message.

    ``received_t`` (Unix s) stamps payloads without their own ``t`` and bounds the
    plausible ones: an instrument time more than ``max_ahead_s`` (s) after it is
    refused. ``source`` goes into every sample. Topics our publisher writes give an
    empty list. Raises :class:`FrameError` (``raw`` = the payload) for anything else
    that is not a reading, with the topic and the reason in its message.
    """
    raw = bytes(payload)
    try:
        samples = _parse(topic, raw, received_t, prefix, source, max_ahead_s)
    except ValueError as exc:
        raise FrameError(f"topic {_quote(topic)}: {exc}", raw=raw) from None
    return samples


def _parse(
    topic: str, raw: bytes, received_t: float, prefix: str, source: str, max_ahead_s: float
) -> list[Sample]:
    head = prefix + "/"
    if not topic.startswith(head):
        raise ValueError(f"not under the prefix {prefix!r}")
    levels = topic[len(head) :].split("/")
    if len(levels) != 2:
        raise ValueError(
            f"{len(levels)} level(s) after the prefix; expected <vessel>/<channel> "
            "or <vessel>/reading"
        )
    vessel, leaf = levels
    if leaf in PUBLISHED_LEAVES:
        return []
    if not is_vessel_id(vessel):
        raise ValueError(
            f"vessel id {_quote(vessel)} is empty or holds characters other than "
            "letters, digits, '_', '.', '-' (at most 64, starting with a letter or digit)"
        )
    if leaf != READING_LEAF and leaf not in CHANNEL_UNITS:
        known = ", ".join([*sorted(CHANNEL_UNITS), READING_LEAF])
        raise ValueError(f"unknown channel {_quote(leaf)}; known: {known}")
    if not raw:
        raise ValueError("empty payload")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ValueError(f"payload is not UTF-8 (byte {exc.start})") from None
    if leaf == READING_LEAF:
        t, values = _reading_payload(text, received_t, max_ahead_s)
        return [Sample(t, vessel, role, value, source=source) for role, value in values]
    t, value = _channel_payload(text, received_t, max_ahead_s)
    return [Sample(t, vessel, leaf, value, source=source)]
