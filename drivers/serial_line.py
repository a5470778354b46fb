"""A serial-port instrument that prints one text line per reading, through pyserial.

``SerialLineDriver("serial:///dev/ttyUSB0?baud=9600", spec=..., bindings=...)`` opens the
port, cuts what arrives into lines (:class:`drivers.framing.LineFramer`), parses each
line (:func:`drivers.framing.parse_line`) and turns its fields into samples
(:func:`drivers.channels.bind_fields`). Anything that does not parse is yielded as a
:class:`~drivers.channels.Quarantined` item with the raw bytes; a lost port raises
:class:`~drivers.errors.DriverError` so the supervisor can build a new driver.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import AsyncIterator, Callable, Sequence
from dataclasses import dataclass
from typing import Any, Self
from urllib.parse import unquote, urlsplit

import serial

from drivers.channels import ChannelBinding, Quarantined, bind_fields
from drivers.config_table import ConfigTable
from drivers.errors import ConfigError, DriverError, FrameError
from drivers.framing import (
    DEFAULT_MAX_AHEAD_S,
    DEFAULT_MAX_LINE_BYTES,
    FRAMINGS,
    LineFramer,
    LineSpec,
    instrument_time,
    parse_line,
)
from drivers.registry import INSTRUMENTS, DriverKind
from drivers.sample import Sample
from drivers.urls import query_options

log = logging.getLogger(__name__)

#: Bytes asked for per read when the port is readable.
READ_SIZE = 4096
#: Chunks held for a slow consumer before the driver stops reading the port (backpressure);
#: the kernel's buffer and the instrument's flow control then take over.
MAX_QUEUED_CHUNKS = 64

_PARITIES = {
    "N": serial.PARITY_NONE,
    "E": serial.PARITY_EVEN,
    "O": serial.PARITY_ODD,
    "M": serial.PARITY_MARK,
    "S": serial.PARITY_SPACE,
}
_BYTESIZES = {
    "5": serial.FIVEBITS,
    "6": serial.SIXBITS,
    "7": serial.SEVENBITS,
    "8": serial.EIGHTBITS,
}
_STOPBITS = {
    "1": serial.STOPBITS_ONE,
    "1.5": serial.STOPBITS_ONE_POINT_FIVE,
    "2": serial.STOPBITS_TWO,
}
#: URL options and their defaults.
URL_OPTIONS = {"baud": "9600", "parity": "N", "bytesize": "8", "stopbits": "1"}


@dataclass(frozen=True)
class SerialSettings:
    """Where and how to open a serial port: the port path and its line settings."""

    port: str
    baud: int
    parity: str
    bytesize: int
    stopbits: float


def parse_serial_url(url: str) -> SerialSettings:
    """Return the port and line settings a ``serial://`` URL names.

    The form is ``serial:///dev/ttyUSB0?baud=9600&parity=N&bytesize=8&stopbits=1`` (three
    slashes: the port is an absolute path). Options: ``baud`` (bit/s, default 9600),
    ``parity`` (N none, E even, O odd, M mark, S space; default N), ``bytesize`` (data
    bits 5-8, default 8), ``stopbits`` (1, 1.5 or 2; default 1). Raises ConfigError
    for another scheme, a host part, a missing path, an unknown or repeated option, or
    a bad value.
    """
    parts = urlsplit(url)
    if parts.scheme != "serial":
        raise ConfigError(f"not a serial:// URL: {url!r}")
    if parts.netloc:
        raise ConfigError(
            f"{url!r}: a serial URL names a path, not a host; write "
            f"'serial:///{parts.netloc}{parts.path}' (three slashes)"
        )
    port = unquote(parts.path)
    if not port or port == "/":
        raise ConfigError(f"{url!r}: no port path, e.g. serial:///dev/ttyUSB0?baud=9600")
    options = query_options(parts.query, URL_OPTIONS, repr(url))
    merged = URL_OPTIONS | options
    try:
        baud = int(merged["baud"])
    except ValueError:
        raise ConfigError(f"{url!r}: baud must be a whole number of bit/s") from None
    if baud <= 0:
        raise ConfigError(f"{url!r}: baud must be positive, got {baud}")
    parity = merged["parity"].upper()
    if parity not in _PARITIES:
        raise ConfigError(f"{url!r}: parity must be one of {', '.join(_PARITIES)}")
    if merged["bytesize"] not in _BYTESIZES:
        raise ConfigError(f"{url!r}: bytesize must be one of {', '.join(_BYTESIZES)}")
    if merged["stopbits"] not in _STOPBITS:
        raise ConfigError(f"{url!r}: stopbits must be one of {', '.join(_STOPBITS)}")
    return SerialSettings(
        port=port,
        baud=baud,
        parity=_PARITIES[parity],
        bytesize=_BYTESIZES[merged["bytesize"]],
        stopbits=_STOPBITS[merged["stopbits"]],
    )


class _Lost:
    """Queue marker: the port failed; ``reason`` says how."""

    def __init__(self, reason: str) -> None:
        self.reason = reason


class SerialLineDriver:
    """Samples from a line-printing instrument on a serial port (pyserial 3.5, POSIX).

    Options (keyword arguments):

    * ``spec`` (:class:`~drivers.framing.LineSpec`, required): how a line is laid out;
    * ``bindings`` (sequence of :class:`~drivers.channels.ChannelBinding`, required):
      which field feeds which vessel channel, and in which unit;
    * ``clock`` (callable returning Unix s, default ``time.time``): stamps receipt;
    * ``max_line_bytes`` (bytes, default 1024): longer lines are quarantined in pieces;
    * ``max_ahead_s`` (s, default 300): how far ahead of receipt an instrument time
      stamp may lie before it counts as absurd (only with ``spec.time_field``);
    * ``silence_s`` (s, default None): raise DriverError when no byte arrives for this
      long (a device that is plugged in but dead); None waits for ever, because some
      loggers print only every few minutes.

    URL options (``baud``, ``parity``, ``bytesize``, ``stopbits``): see
    :func:`parse_serial_url`.

    Each line is stamped at receipt with ``clock()``, or with the instrument's own time
    when ``spec.time_field`` is set. A line that cannot be framed, parsed or time
    stamped, that has a field ``bind_fields`` cannot use, or that carries none of the
    bound fields, is yielded as one :class:`Quarantined` item (``where`` is
    ``"<port> line <n>"``, n counting every line since the port was opened), beside
    whatever samples the line did give. A port that fails (EIO, end of file, device
    gone) ends :meth:`samples` with :class:`DriverError` naming the port and URL,
    after an unfinished last line has been quarantined.

    The port is read through the event loop's reader (``loop.add_reader`` on the
    port's file descriptor) rather than a thread: the port is opened non-blocking
    (pyserial's ``timeout=0``), each read only takes what the kernel already holds,
    and there is no thread to stop or join, so cancelling ``samples()`` or leaving
    ``async with`` releases everything at once. This needs a selector event loop
    (the default on Linux and macOS).
    """

    def __init__(
        self,
        url: str,
        *,
        spec: LineSpec,
        bindings: Sequence[ChannelBinding],
        clock: Callable[[], float] = time.time,
        max_line_bytes: int = DEFAULT_MAX_LINE_BYTES,
        max_ahead_s: float = DEFAULT_MAX_AHEAD_S,
        silence_s: float | None = None,
    ) -> None:
        self.settings = parse_serial_url(url)
        if not isinstance(spec, LineSpec):
            raise ConfigError(f"spec must be a LineSpec, got {type(spec).__name__}")
        if not bindings:
            raise ConfigError(f"{url!r}: no channel bindings: nothing would be recorded")
        if not all(isinstance(b, ChannelBinding) for b in bindings):
            raise ConfigError(f"{url!r}: bindings must be ChannelBinding objects")
        if silence_s is not None and not silence_s > 0.0:
            raise ConfigError(f"{url!r}: silence_s must be positive seconds or None")
        if not max_ahead_s >= 0.0:
            raise ConfigError(f"{url!r}: max_ahead_s must be zero or more seconds")
        self.url = url
        self.source = url  # a serial URL carries no credentials
        self.port = self.settings.port
        self.spec = spec
        self.bindings = tuple(bindings)
        self._clock = clock
        self._framer = LineFramer(max_line_bytes)
        self._max_ahead_s = max_ahead_s
        self._silence_s = silence_s
        self._serial: serial.Serial | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._queue: asyncio.Queue[tuple[float, bytes] | _Lost] = asyncio.Queue()
        self._reading = False
        self._lost: str | None = None  # why the port failed; once set it is never read again
        self._used = False
        self._bytes_received = 0

    @property
    def bytes_received(self) -> int:
        """Return how many bytes have been read from the port so far (bytes)."""
        return self._bytes_received

    # -- the link -----------------------------------------------------------------------

    async def __aenter__(self) -> Self:
        """Open the port; raise DriverError naming it if it cannot be opened."""
        if self._used:
            raise DriverError(f"{self.url}: a driver is used once; build a new one")
        self._used = True
        s = self.settings
        try:
            # pyserial opens with O_NONBLOCK and sets the line with TCSANOW: neither waits
            # on the device, so this does not block the event loop.
            self._serial = serial.Serial(
                s.port,
                s.baud,
                bytesize=s.bytesize,
                parity=s.parity,
                stopbits=s.stopbits,
                timeout=0,
            )
        except (serial.SerialException, OSError, ValueError) as exc:
            raise DriverError(f"cannot open serial port {s.port} ({self.url}): {exc}") from exc
        self._loop = asyncio.get_running_loop()
        self._resume()
        log.info("opened serial port %s at %d bit/s", s.port, s.baud)
        return self

    async def __aexit__(self, *exc: object) -> None:
        """Stop reading and close the port; never raises because the port is dead."""
        self._pause()
        port, self._serial = self._serial, None
        if self._lost is None:
            self._lost = "the driver was closed"
            self._queue.put_nowait(_Lost(self._lost))  # wakes a consumer still waiting
        if port is not None:
            try:
                port.close()
            except (serial.SerialException, OSError) as err:
                log.warning("closing serial port %s: %s", self.port, err)

    def _resume(self) -> None:
        if (
            self._serial is not None
            and self._loop is not None
            and not self._reading
            and self._lost is None
        ):
            self._loop.add_reader(self._serial.fileno(), self._on_readable)
            self._reading = True

    def _pause(self) -> None:
        if self._reading and self._serial is not None and self._loop is not None:
            self._loop.remove_reader(self._serial.fileno())
        self._reading = False

    def _on_readable(self) -> None:
        """Take what the kernel holds (called by the event loop when the port is readable)."""
        port = self._serial
        if port is None:
            return
        try:
            chunk = port.read(READ_SIZE)
        except (serial.SerialException, OSError) as exc:
            # EIO, or "readable but no data" (end of file): the device or pty is gone
            self._pause()
            self._lost = str(exc)
            self._queue.put_nowait(_Lost(self._lost))
            return
        if chunk:
            self._bytes_received += len(chunk)
            self._queue.put_nowait((self._clock(), chunk))
            if self._queue.qsize() >= MAX_QUEUED_CHUNKS:
                self._pause()

    async def _next_chunk(self) -> tuple[float, bytes] | _Lost:
        if self._queue.empty():
            if self._lost is not None:  # asked again after the loss: say so, do not wait
                return _Lost(self._lost)
            self._resume()
        try:
            async with asyncio.timeout(self._silence_s):
                item = await self._queue.get()
        except TimeoutError:
            self._pause()
            self._lost = f"no data for {self._silence_s:g} s"
            return _Lost(self._lost)
        if not self._reading and self._queue.qsize() < MAX_QUEUED_CHUNKS:
            self._resume()
        return item

    # -- the samples --------------------------------------------------------------------

    async def samples(self) -> AsyncIterator[Sample | Quarantined]:
        """Yield samples and quarantined lines as they arrive; DriverError when the port is lost."""
        if self._serial is None:
            raise DriverError(f"{self.url}: use the driver inside 'async with'")
        while True:
            item = await self._next_chunk()
            if isinstance(item, _Lost):
                t = self._clock()
                for n, err in self._framer.finish():
                    yield self._quarantine(t, n, str(err), err.raw)
                self._pause()
                raise DriverError(f"serial port {self.port} lost ({self.url}): {item.reason}")
            received_t, chunk = item
            for n, frame in self._framer.feed_numbered(chunk):
                for out in self._from_frame(n, frame, received_t):
                    yield out

    def _quarantine(self, t: float, n: int, reason: str, raw: bytes | str) -> Quarantined:
        data = raw if isinstance(raw, bytes) else raw.encode("utf-8", "backslashreplace")
        log.debug("quarantined %s line %d: %s", self.port, n, reason)
        return Quarantined(t, self.source, f"{self.port} line {n}", reason, data)

    def _from_frame(
        self, n: int, frame: bytes | FrameError, received_t: float
    ) -> list[Sample | Quarantined]:
        """Return the samples (and at most one Quarantined item) one framed line gives."""
        if isinstance(frame, FrameError):
            return [self._quarantine(received_t, n, str(frame), frame.raw)]
        try:
            fields = parse_line(frame, self.spec)
            t = instrument_time(fields, self.spec, received_t, max_ahead_s=self._max_ahead_s)
        except FrameError as exc:
            return [self._quarantine(received_t, n, str(exc), frame)]
        samples, problems = bind_fields(fields, self.bindings, t, self.source)
        out: list[Sample | Quarantined] = list(samples)
        if problems:
            out.append(self._quarantine(received_t, n, "; ".join(problems), frame))
        elif not samples:
            names = ", ".join(sorted(fields)) or "none"
            reason = f"no bound field in the line (fields found: {names})"
            out.append(self._quarantine(received_t, n, reason, frame))
        return out


def read_table(table: ConfigTable) -> dict[str, Any]:
    """Return the driver options of a serial instrument's ``[[instruments]]`` table.

    Keys: ``framing`` (csv, keyvalue or regex; required), ``fields``, ``pattern``,
    ``time_field``, ``delimiter``, ``pair_separator`` and ``key_separator``
    (:class:`~drivers.framing.LineSpec`), and ``max_line_bytes`` (16-65536, default
    1024). Returns ``spec`` and ``max_line_bytes``.
    """
    framing = table.string("framing", required=True)
    if framing not in FRAMINGS:
        raise table.fail("framing", f"{framing!r} is not one of {', '.join(FRAMINGS)}")
    layout: dict[str, Any] = {"framing": framing}
    for key in ("pattern", "time_field", "delimiter", "pair_separator", "key_separator"):
        if table.has(key):
            layout[key] = table.string(key)
    if table.has("fields"):
        fields = table.get("fields")
        if not isinstance(fields, list) or not all(isinstance(f, str) for f in fields):
            raise table.fail("fields", 'must be a list of field names ("" skips one)')
        layout["fields"] = tuple(fields)
    max_line = table.number("max_line_bytes", DEFAULT_MAX_LINE_BYTES, lo=16, hi=65536)
    try:
        spec = LineSpec(**layout)
    except ConfigError as exc:
        raise table.fail_here(str(exc)) from None
    return {"spec": spec, "max_line_bytes": int(max_line)}


#: The driver registry's entry (drivers/registry.py).
DRIVER = DriverKind("serial", ("serial",), SerialLineDriver, read_table, INSTRUMENTS)
