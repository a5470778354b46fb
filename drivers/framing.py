"""Line protocols as pure functions over bytes: cut a byte stream into lines, parse a line.

Many loggers and panel meters print one text line per reading on a serial port.
This module knows nothing about ports or clocks; it turns bytes into values:

* :class:`LineFramer` cuts a stream that arrives in arbitrary chunks into lines,
  keeping the partial line between calls, and turns an over-long line into
  :class:`~drivers.errors.FrameError` pieces that carry every raw byte;
* :class:`LineSpec` says how one line is laid out (``csv``, ``keyvalue`` or
  ``regex``) and which field, if any, holds the instrument's own time stamp;
* :func:`parse_line` turns one line into named text fields, raising ``FrameError``
  (with the raw line) and a reason when the line does not fit the spec;
* :func:`instrument_time` reads the instrument's time stamp out of those fields and
  refuses one that is unreadable or absurd.

The fields then go to :func:`drivers.channels.bind_fields`, which makes samples.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from datetime import datetime

from drivers.errors import ConfigError, FrameError
from drivers.sample import PLAIN_NUMBER

#: Default longest line, in bytes before its newline (a trailing CR counted).
DEFAULT_MAX_LINE_BYTES = 1024
#: 2000-01-01T00:00:00Z in Unix seconds: an instrument time stamp before it is absurd.
EARLIEST_INSTRUMENT_TIME_S = 946684800.0
#: Default allowance (s) for an instrument clock running ahead of the receiving host.
DEFAULT_MAX_AHEAD_S = 300.0

FRAMINGS = ("csv", "keyvalue", "regex")

_DEFAULT_PAIR_SPLIT = re.compile(r"[\s,]+")


# ---------------------------------------------------------------------------
# Cutting a byte stream into lines
# ---------------------------------------------------------------------------


class LineFramer:
    """Cuts a byte stream into lines; one instance per stream (it keeps the partial line).

    Lines end at ``b"\\n"``; a ``b"\\r"`` just before it is removed. Empty lines are
    skipped. A line longer than ``max_line_bytes`` (counted before its newline, a
    trailing CR included) is not a line: it comes out as one or more
    :class:`FrameError` items whose ``raw`` bytes, in order, are the whole line as it
    arrived (the CR kept), each piece at most ``max_line_bytes`` long, so nothing is
    lost and memory stays bounded; the framer then resynchronises at the next
    newline. The items do not depend on how the stream was chunked.
    """

    def __init__(self, max_line_bytes: int = DEFAULT_MAX_LINE_BYTES) -> None:
        if isinstance(max_line_bytes, bool) or not isinstance(max_line_bytes, int):
            raise ConfigError(f"max_line_bytes must be an int, got {max_line_bytes!r}")
        if max_line_bytes < 1:
            raise ConfigError(f"max_line_bytes must be at least 1, got {max_line_bytes}")
        self.max_line_bytes = max_line_bytes
        self._buffer = bytearray()
        self._line_no = 1  # number of the line in progress (1-based, empty lines counted)
        self._overlong_parts = 0  # pieces of the line in progress already handed out

    @property
    def pending_bytes(self) -> int:
        """Return how many bytes of an unfinished line are held (bytes)."""
        return len(self._buffer)

    def feed(self, chunk: bytes) -> list[bytes | FrameError]:
        """Return the complete lines (bytes, no line ending) and FrameErrors in ``chunk``."""
        return [item for _, item in self.feed_numbered(chunk)]

    def feed_numbered(self, chunk: bytes) -> list[tuple[int, bytes | FrameError]]:
        """Return ``(line number, line or FrameError)`` pairs for the lines ``chunk`` ends.

        Line numbers start at 1 and count every newline of the stream, empty lines
        included, so they say where on the wire an item was; the pieces of one
        over-long line share its number.
        """
        out: list[tuple[int, bytes | FrameError]] = []
        limit = self.max_line_bytes
        start = 0
        size = len(chunk)
        while start < size:
            end = chunk.find(b"\n", start)
            if end < 0:
                self._buffer += chunk[start:]
                self._cut_overlong(out, final=False)
                break
            self._buffer += chunk[start:end]
            start = end + 1
            if self._overlong_parts or len(self._buffer) > limit:
                self._cut_overlong(out, final=True)
            else:
                line = bytes(self._buffer)
                if line.endswith(b"\r"):
                    line = line[:-1]
                if line:
                    out.append((self._line_no, line))
            self._buffer.clear()
            self._overlong_parts = 0
            self._line_no += 1
        return out

    def finish(self) -> list[tuple[int, FrameError]]:
        """Return the unfinished line held, if any, as a FrameError, and forget it.

        For the end of a stream (a port closed or lost): the bytes after the last
        newline are not a line, but they are kept for the quarantine.
        """
        if not self._buffer:
            return []
        raw = bytes(self._buffer)
        part = f" (after {self._overlong_parts} over-long parts)" if self._overlong_parts else ""
        item = (
            self._line_no,
            FrameError(f"unfinished line{part}: the stream ended before its newline", raw=raw),
        )
        self._buffer.clear()
        self._overlong_parts = 0
        return [item]

    def _cut_overlong(self, out: list[tuple[int, bytes | FrameError]], *, final: bool) -> None:
        """Hand out full pieces of an over-long line (and, if ``final``, its remainder)."""
        limit = self.max_line_bytes
        buf = self._buffer
        # Before the first piece the line is known to be over-long only once it holds more
        # than ``limit`` bytes; after that every full piece can go at once. Pieces are
        # always consecutive ``limit``-byte slices of the line, whatever the chunking.
        while len(buf) > limit or (self._overlong_parts and len(buf) >= limit and buf):
            self._emit_piece(out, bytes(buf[:limit]), last=False)
            del buf[:limit]
        if final and self._overlong_parts and buf:
            self._emit_piece(out, bytes(buf), last=True)
            buf.clear()

    def _emit_piece(
        self, out: list[tuple[int, bytes | FrameError]], raw: bytes, *, last: bool
    ) -> None:
        first_byte = self._overlong_parts * self.max_line_bytes
        self._overlong_parts += 1
        reason = (
            f"line longer than {self.max_line_bytes} bytes: part {self._overlong_parts} "
            f"(bytes {first_byte} to {first_byte + len(raw) - 1})"
            + (", the end of the line" if last else "; resynchronising at the next newline")
        )
        out.append((self._line_no, FrameError(reason, raw=raw)))


# ---------------------------------------------------------------------------
# How a line is laid out
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class LineSpec:
    """How one text line of an instrument is laid out; validated on construction.

    ``framing`` is one of:

    * ``"csv"``: values by position, split on ``delimiter`` (default ``","``; no
      quoting), named by ``fields`` in order; an empty name skips that position. An
      empty cell is a missing reading and is left out of the parsed fields.
    * ``"keyvalue"``: ``key=value`` tokens in any order. Tokens are split on
      ``pair_separator`` when given, otherwise on any run of whitespace and commas
      (so ``a=1 b=2``, ``a=1,b=2`` and ``a=1, b=2`` all parse); the key ends at the
      first ``key_separator`` (default ``"="``).
    * ``"regex"``: ``pattern`` must match the whole line (``re.fullmatch``) and its
      named groups are the fields; a group that did not take part is left out.

    ``time_field`` optionally names the field that holds the instrument's own time
    stamp (Unix seconds, or ISO 8601 with an offset); without it samples are stamped
    at receipt.
    """

    framing: str
    fields: tuple[str, ...] = ()
    delimiter: str = ","
    pair_separator: str | None = None
    key_separator: str = "="
    pattern: str = ""
    time_field: str | None = None
    _regex: re.Pattern[str] | None = field(
        default=None, init=False, repr=False, compare=False, hash=False
    )

    def __post_init__(self) -> None:
        if self.framing not in FRAMINGS:
            raise ConfigError(
                f"line framing {self.framing!r} is unknown; known framings: {', '.join(FRAMINGS)}"
            )
        if not isinstance(self.fields, tuple):
            object.__setattr__(self, "fields", tuple(self.fields))
        if self.time_field is not None and not self.time_field:
            raise ConfigError("time_field must be a field name or None, not an empty string")
        getattr(self, f"_check_{self.framing}")()

    def _check_csv(self) -> None:
        names = [n for n in self.fields if n]
        if not names:
            raise ConfigError("csv framing needs fields: the name of each position, in order")
        if not all(isinstance(n, str) for n in self.fields):
            raise ConfigError(f"csv fields must be strings, got {self.fields!r}")
        duplicated = sorted({n for n in names if names.count(n) > 1})
        if duplicated:
            raise ConfigError(f"csv fields name {duplicated} more than once")
        if not self.delimiter or "\n" in self.delimiter or "\r" in self.delimiter:
            raise ConfigError(f"csv delimiter {self.delimiter!r} must be non-empty, no CR or LF")
        if self.time_field is not None and self.time_field not in names:
            raise ConfigError(f"time_field {self.time_field!r} is not one of the csv fields")
        self._refuse("pattern", "pair_separator")

    def _check_keyvalue(self) -> None:
        if not self.key_separator or self.key_separator.isspace():
            raise ConfigError(
                f"key_separator {self.key_separator!r} must be non-empty and not whitespace"
            )
        if self.pair_separator is not None and (
            not self.pair_separator or self.key_separator in self.pair_separator
        ):
            raise ConfigError(
                f"pair_separator {self.pair_separator!r} must be non-empty and must not "
                f"contain the key separator {self.key_separator!r}"
            )
        self._refuse("fields", "pattern")

    def _check_regex(self) -> None:
        if not self.pattern:
            raise ConfigError("regex framing needs a pattern with named groups")
        try:
            compiled = re.compile(self.pattern)
        except re.error as exc:
            raise ConfigError(f"regex pattern {self.pattern!r} does not compile: {exc}") from exc
        if not compiled.groupindex:
            raise ConfigError(
                f"regex pattern {self.pattern!r} has no named groups, e.g. (?P<water>[-0-9.]+)"
            )
        if self.time_field is not None and self.time_field not in compiled.groupindex:
            raise ConfigError(f"time_field {self.time_field!r} is not a group of the pattern")
        self._refuse("fields", "pair_separator")
        object.__setattr__(self, "_regex", compiled)

    def _refuse(self, *names: str) -> None:
        """Raise ConfigError if an option that does not apply to this framing was set."""
        defaults = {"fields": (), "pattern": "", "pair_separator": None}
        for name in names:
            if getattr(self, name) != defaults[name]:
                raise ConfigError(f"{name} does not apply to {self.framing} framing")


# ---------------------------------------------------------------------------
# Parsing one line
# ---------------------------------------------------------------------------


def _decode(line: bytes) -> str:
    try:
        return line.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise FrameError(
            f"not valid UTF-8 at byte {exc.start}: {line[exc.start : exc.end]!r}", raw=line
        ) from None


def parse_line(line: bytes, spec: LineSpec) -> dict[str, str]:
    """Return the named text fields of one line (no line ending) laid out as ``spec`` says.

    Raises :class:`FrameError` with ``raw=line`` and a reason for invalid UTF-8, a line
    of only whitespace, the wrong number of CSV fields, no regex match, a key=value
    token without the key separator or with an empty key, and a key given twice.
    Values are returned as text (stripped of surrounding whitespace); turning them
    into numbers is :func:`drivers.channels.bind_fields`' job.
    """
    text = _decode(line)
    if not text.strip():
        raise FrameError("line holds only whitespace", raw=line)
    if spec.framing == "csv":
        return _parse_csv(line, text, spec)
    if spec.framing == "keyvalue":
        return _parse_keyvalue(line, text, spec)
    return _parse_regex(line, text, spec)


def _parse_csv(line: bytes, text: str, spec: LineSpec) -> dict[str, str]:
    cells = text.split(spec.delimiter)
    if len(cells) != len(spec.fields):
        raise FrameError(
            f"expected {len(spec.fields)} fields separated by {spec.delimiter!r}, "
            f"found {len(cells)}",
            raw=line,
        )
    out: dict[str, str] = {}
    for name, cell in zip(spec.fields, cells, strict=True):
        value = cell.strip()
        if name and value:
            out[name] = value
    return out


def _parse_keyvalue(line: bytes, text: str, spec: LineSpec) -> dict[str, str]:
    if spec.pair_separator is None:
        tokens = _DEFAULT_PAIR_SPLIT.split(text.strip())
    else:
        tokens = [tok.strip() for tok in text.split(spec.pair_separator)]
    out: dict[str, str] = {}
    for position, token in enumerate(tokens, start=1):
        if not token:
            continue
        key, sep, value = token.partition(spec.key_separator)
        key = key.strip()
        if not sep:
            raise FrameError(f"token {position} {token!r} has no {spec.key_separator!r}", raw=line)
        if not key:
            raise FrameError(f"token {position} {token!r} has an empty key", raw=line)
        if key in out:
            raise FrameError(f"key {key!r} appears more than once", raw=line)
        out[key] = value.strip()
    return out


def _parse_regex(line: bytes, text: str, spec: LineSpec) -> dict[str, str]:
    regex = spec._regex
    assert regex is not None  # set by LineSpec for regex framing
    match = regex.fullmatch(text)
    if match is None:
        raise FrameError(f"line does not match the pattern {spec.pattern!r}", raw=line)
    return {k: v.strip() for k, v in match.groupdict().items() if v is not None}


# ---------------------------------------------------------------------------
# The instrument's own time stamp
# ---------------------------------------------------------------------------


def instrument_time(
    fields: dict[str, str],
    spec: LineSpec,
    received_t: float,
    *,
    max_ahead_s: float = DEFAULT_MAX_AHEAD_S,
    earliest_t: float = EARLIEST_INSTRUMENT_TIME_S,
) -> float:
    """Return the reading's time in Unix seconds (UTC).

    With no ``spec.time_field`` that is ``received_t``, the time of receipt. Otherwise
    it is the field's value: Unix seconds (``1767225600.25``) or ISO 8601 with an
    offset (``2026-01-01T00:00:00.250+00:00``, ``...Z``). Raises :class:`FrameError`
    when the field is missing or unreadable, when an ISO time has no offset, or when
    the time is absurd: before ``earliest_t`` (default 2000-01-01, s) or more than
    ``max_ahead_s`` seconds (default 300 s) after ``received_t``.
    """
    name = spec.time_field
    if name is None:
        return received_t
    if name not in fields:
        raise FrameError(f"time field {name!r} is missing from the line")
    text = fields[name]
    raw = text.encode("utf-8", "backslashreplace")
    if PLAIN_NUMBER.fullmatch(text):  # Unix seconds, as every number on a line
        t = float(text)
    else:
        try:
            stamp = datetime.fromisoformat(text)
        except ValueError:
            raise FrameError(
                f"time field {name!r} = {text!r} is neither Unix seconds nor ISO 8601", raw=raw
            ) from None
        if stamp.tzinfo is None or stamp.utcoffset() is None:
            raise FrameError(
                f"time field {name!r} = {text!r} has no UTC offset, so it is ambiguous", raw=raw
            )
        t = stamp.timestamp()
    if not math.isfinite(t):
        raise FrameError(f"time field {name!r} = {text!r} is not a finite time", raw=raw)
    if t < earliest_t:
        raise FrameError(
            f"time field {name!r} = {text!r} lies before {earliest_t:.0f} s (absurd)", raw=raw
        )
    if t > received_t + max_ahead_s:
        raise FrameError(
            f"time field {name!r} = {text!r} lies {t - received_t:.1f} s after receipt, "
            f"more than the {max_ahead_s:g} s allowed",
            raw=raw,
        )
    return t
