"""Modbus power meters (RTU over a serial line, or TCP) as a sample source.

``ModbusMeterDriver("modbus+tcp://127.0.0.1:5020?unit=1", registers=..., bindings=...)``
polls a meter's registers at a steady rate, decodes them with the typed register
table of :mod:`drivers.registers`, and turns them into samples through
:func:`drivers.channels.bind_fields` (each binding's ``field`` is a register name).

pymodbus is used here and only here, and every call whose form depends on the
pymodbus release sits in :class:`_Pymodbus316` (3.16.x: ``device_id=`` where older
releases said ``slave=``; ``reconnect_delay=0`` switches the client's own
reconnection off, because reconnecting is the supervisor's job). Moving to another
pymodbus release means rewriting that one class.

What the driver does with what comes back:

* a Modbus exception response, or words that cannot be decoded (a NaN float, a short
  answer), becomes a :class:`~drivers.channels.Quarantined` item with
  ``where = "<url> register <name>@<address>"``. ``raw`` holds the register words
  as they travelled (big-endian bytes per word); for an exception response, which
  carries no words, it holds the exception PDU itself (function code | 0x80, code).
  When a read that spans several registers is refused, the driver splits that read
  into one request per register from then on, so one unmapped address costs only
  its own value;
* a meter that does not answer ``max_missed_polls`` polls in a row, or a lost
  connection, raises :class:`~drivers.errors.DriverError` naming the URL.

Power from the energy counter (``derive_power_from="energy"``): the named register
must hold Wh. Each poll that reads it feeds :class:`drivers.registers.EnergyToPower`
with the decoded counter value and the poll's time stamp; the average power since the
previous reading is yielded as a ``power`` sample for every vessel the energy register
is bound to, multiplied by that binding's ``gain`` (its ``offset`` cancels in a
difference). The first reading, a counter reset or an implausible jump give no power
sample and a logged reason; a roll-over of an integer counter is handled. Such a
vessel must not also have a ``power`` binding, or it would get two power channels.
"""

from __future__ import annotations

import asyncio
import logging
import math
import time
from collections.abc import AsyncIterator, Callable, Sequence
from dataclasses import dataclass
from dataclasses import fields as dataclass_fields
from types import TracebackType
from typing import Any, Self
from urllib.parse import urlsplit

from pymodbus.client import AsyncModbusSerialClient, AsyncModbusTcpClient
from pymodbus.exceptions import ConnectionException, ModbusException

from drivers.channels import ChannelBinding, Quarantined, bind_fields
from drivers.config_table import ConfigTable
from drivers.errors import ConfigError, DriverError, FrameError
from drivers.registers import (
    EnergyToPower,
    RegisterRead,
    RegisterSpec,
    check_register_map,
    counter_modulus,
    decode,
    read_plan,
    words_for,
    words_to_bytes,
)
from drivers.registry import INSTRUMENTS, DriverKind
from drivers.sample import Quality, Sample
from drivers.urls import query_options

_log = logging.getLogger(__name__)

SCHEMES = ("modbus+tcp", "modbus+rtu")
#: URL options per scheme, with their defaults.
TCP_OPTIONS: dict[str, object] = {"unit": 1}
RTU_OPTIONS: dict[str, object] = {
    "unit": 1,
    "baud": 19200,
    "parity": "N",
    "stopbits": 1,
    "bytesize": 8,
}
DEFAULT_TCP_PORT = 502
#: Text for the exception codes of the Modbus application protocol (common practice).
EXCEPTION_NAMES = {
    1: "illegal function",
    2: "illegal data address",
    3: "illegal data value",
    4: "server device failure",
    5: "acknowledge",
    6: "server device busy",
    8: "memory parity error",
    10: "gateway path unavailable",
    11: "gateway target device failed to respond",
}


# ---------------------------------------------------------------------------
# URLs (pure)
# ---------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class ModbusEndpoint:
    """Where a meter is and how to talk to it, parsed from a ``modbus+...`` URL.

    ``transport`` is ``tcp`` (``host``, ``port``) or ``rtu`` (``device`` path, ``baud``
    bit/s, ``parity`` N/E/O, ``stopbits``, ``bytesize``); ``unit`` is the Modbus unit
    (device) id; ``source`` is the URL without credentials, for samples.
    """

    transport: str
    unit: int
    source: str
    host: str = ""
    port: int = DEFAULT_TCP_PORT
    device: str = ""
    baud: int = 19200
    parity: str = "N"
    stopbits: int = 1
    bytesize: int = 8


def _int_option(url: str, name: str, text: str, allowed: Sequence[int] | range) -> int:
    try:
        value = int(text)
    except ValueError:
        raise ConfigError(f"{url}: option {name}={text!r} is not an integer") from None
    if value not in allowed:
        shown = f"{allowed.start}..{allowed.stop - 1}" if isinstance(allowed, range) else allowed
        raise ConfigError(f"{url}: option {name}={value} is outside {shown}")
    return value


def parse_modbus_url(url: str) -> ModbusEndpoint:
    """Return the endpoint a ``modbus+tcp://HOST:PORT?unit=N`` or
    ``modbus+rtu:///dev/PORT?baud=B&parity=P&unit=N`` URL names.

    TCP options: ``unit`` (1). RTU options: ``unit`` (1), ``baud`` (19200 bit/s),
    ``parity`` (N, E or O), ``stopbits`` (1 or 2), ``bytesize`` (7 or 8). An unknown
    or repeated option, or a bad value, raises :class:`ConfigError` naming the known
    options.
    """
    try:
        parts = urlsplit(url)
        port = parts.port
    except ValueError as exc:
        raise ConfigError(f"{url!r} is not a valid URL: {exc}") from None
    if parts.scheme not in SCHEMES:
        raise ConfigError(f"{url!r}: scheme must be one of {', '.join(s + '://' for s in SCHEMES)}")
    host = parts.hostname or ""
    netloc = host if port is None else f"{host}:{port}"
    if ":" in host:
        netloc = f"[{host}]" + ("" if port is None else f":{port}")
    source = f"{parts.scheme}://{netloc}{parts.path}" + (f"?{parts.query}" if parts.query else "")
    known = TCP_OPTIONS if parts.scheme == "modbus+tcp" else RTU_OPTIONS
    given = query_options(parts.query, known, source)
    if parts.scheme == "modbus+tcp":
        if not host:
            raise ConfigError(f"{source}: a modbus+tcp URL needs a host")
        if parts.path not in ("", "/"):
            raise ConfigError(f"{source}: a modbus+tcp URL takes no path")
        unit = _int_option(source, "unit", given.get("unit", "1"), range(256))
        return ModbusEndpoint(
            "tcp", unit, source, host=host, port=DEFAULT_TCP_PORT if port is None else port
        )
    if host or port is not None:
        raise ConfigError(f"{source}: a modbus+rtu URL names a device path, not a host")
    if not parts.path or parts.path == "/":
        raise ConfigError(f"{source}: a modbus+rtu URL needs a serial device path")
    parity = given.get("parity", "N").upper()
    if parity not in ("N", "E", "O"):
        raise ConfigError(f"{source}: option parity={parity!r} must be N, E or O")
    return ModbusEndpoint(
        "rtu",
        _int_option(source, "unit", given.get("unit", "1"), range(1, 248)),
        source,
        device=parts.path,
        baud=_int_option(source, "baud", given.get("baud", "19200"), range(50, 4_000_001)),
        parity=parity,
        stopbits=_int_option(source, "stopbits", given.get("stopbits", "1"), (1, 2)),
        bytesize=_int_option(source, "bytesize", given.get("bytesize", "8"), (7, 8)),
    )


# ---------------------------------------------------------------------------
# pymodbus, behind one small class
# ---------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Answer:
    """One read's outcome: ``words``, or an exception response, or no answer at all."""

    words: list[int] | None = None
    exception_pdu: bytes | None = None
    exception_code: int = 0
    no_answer: str = ""


def _raise_if_cancelled() -> None:
    """Raise CancelledError when the running task was asked to stop.

    pymodbus 3.16 sometimes takes a cancellation that arrives while a request is in
    flight and answers with an exception (or nothing) instead, so the task would
    poll on for ever after being told to stop; asking the task itself catches that.
    """
    task = asyncio.current_task()
    if task is not None and task.cancelling():
        raise asyncio.CancelledError


class _Pymodbus316:
    """Every pymodbus call the driver makes, written for pymodbus 3.16.x.

    One request per call, no retries inside pymodbus (the driver counts missed polls
    itself) and no background reconnection. ``read`` returns an :class:`_Answer` and
    raises :class:`DriverError` only when the link itself is gone.
    """

    def __init__(self, endpoint: ModbusEndpoint, timeout_s: float) -> None:
        self._endpoint = endpoint
        if endpoint.transport == "tcp":
            self._client: AsyncModbusTcpClient | AsyncModbusSerialClient = AsyncModbusTcpClient(
                endpoint.host,
                port=endpoint.port,
                timeout=timeout_s,
                retries=0,
                reconnect_delay=0.0,
                name="ebullio-meter",
            )
        else:
            self._client = AsyncModbusSerialClient(
                endpoint.device,
                baudrate=endpoint.baud,
                parity=endpoint.parity,
                stopbits=endpoint.stopbits,
                bytesize=endpoint.bytesize,
                timeout=timeout_s,
                retries=0,
                reconnect_delay=0.0,
                name="ebullio-meter",
            )

    async def connect(self) -> bool:
        """Return True once the link is open (TCP connected, serial port opened)."""
        return bool(await self._client.connect())

    async def read(self, read: RegisterRead, unit: int) -> _Answer:
        """Return the outcome of one read request."""
        method = (
            self._client.read_holding_registers
            if read.table == "holding"
            else self._client.read_input_registers
        )
        try:
            response = await method(read.start, count=read.count, device_id=unit)
        except ConnectionException as exc:
            _raise_if_cancelled()
            raise DriverError(f"{self._endpoint.source}: link to the meter lost ({exc})") from exc
        except ModbusException as exc:
            _raise_if_cancelled()
            return _Answer(no_answer=str(exc))
        _raise_if_cancelled()
        if response.isError():
            code = int(getattr(response, "exception_code", 0))
            return _Answer(
                exception_pdu=bytes([response.function_code & 0xFF, code & 0xFF]),
                exception_code=code,
            )
        return _Answer(words=[int(w) for w in response.registers])

    def close(self) -> None:
        """Close the link; never raises."""
        self._client.close()


# ---------------------------------------------------------------------------
# The driver
# ---------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Refusal:
    """A register whose value could not be had in one poll."""

    spec: RegisterSpec
    reason: str
    raw: bytes


class ModbusMeterDriver:
    """A Modbus power meter polled at a steady rate; yields Samples and Quarantined items.

    URL: ``modbus+tcp://HOST[:PORT]?unit=N`` (port 502 by default) or
    ``modbus+rtu:///dev/PORT?baud=19200&parity=N&stopbits=1&bytesize=8&unit=1``.

    Options:

    * ``registers``: the meter's register map, :class:`~drivers.registers.RegisterSpec`
      items with unique names (required);
    * ``bindings``: :class:`~drivers.channels.ChannelBinding` items whose ``field`` is a
      register name and whose ``unit`` is that register's unit (required);
    * ``poll_s``: poll period, s (default 1.0); polls follow a monotonic schedule
      without drift, and a poll that overruns skips the slots it missed;
    * ``timeout_s``: how long to wait for each answer, and for the connection, s
      (default 1.0);
    * ``derive_power_from``: the name of a Wh register whose increase gives a
      ``power`` sample (average W over the poll interval) per bound vessel
      (default None);
    * ``max_missed_polls``: polls in a row without an answer before DriverError
      (default 3);
    * ``max_power_w``: the highest power (W) an energy step may imply before it is
      refused as implausible (default 100 000);
    * ``clock``: time stamps, Unix s (default ``time.time``); the schedule itself
      always runs on the event loop's monotonic clock.
    """

    def __init__(
        self,
        url: str,
        *,
        registers: Sequence[RegisterSpec],
        bindings: Sequence[ChannelBinding],
        poll_s: float = 1.0,
        timeout_s: float = 1.0,
        derive_power_from: str | None = None,
        max_missed_polls: int = 3,
        max_power_w: float = 100_000.0,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.endpoint = parse_modbus_url(url)
        self.source = self.endpoint.source
        self.registers = check_register_map(registers)
        self.bindings = list(bindings)
        by_name = {spec.name: spec for spec in self.registers}
        for name, value in (("poll_s", poll_s), ("timeout_s", timeout_s)):
            if not (isinstance(value, int | float) and math.isfinite(value) and value > 0.0):
                raise ConfigError(f"{self.source}: {name} must be a positive number of s")
        if isinstance(max_missed_polls, bool) or not (
            isinstance(max_missed_polls, int) and max_missed_polls >= 1
        ):
            raise ConfigError(f"{self.source}: max_missed_polls must be an integer of 1 or more")
        if not self.bindings:
            raise ConfigError(f"{self.source}: no channel bindings, so nothing to report")
        for b in self.bindings:
            if not isinstance(b, ChannelBinding):
                raise ConfigError(f"{self.source}: binding {b!r} is not a ChannelBinding")
            spec = by_name.get(b.field)
            if spec is None:
                raise ConfigError(
                    f"{self.source}: binding {b.vessel}/{b.role} names register {b.field!r}, "
                    f"which is not in the map; registers: {', '.join(by_name)}"
                )
            if b.unit != spec.unit:
                raise ConfigError(
                    f"{self.source}: binding {b.vessel}/{b.role} is in {b.unit!r} but register "
                    f"{spec.name!r} holds {spec.unit!r}"
                )
        self.poll_s = float(poll_s)
        self.timeout_s = float(timeout_s)
        self.max_missed_polls = max_missed_polls
        self.derive_power_from = derive_power_from
        self._power_bindings: list[ChannelBinding] = []
        self._energy: EnergyToPower | None = None
        if derive_power_from is not None:
            self._energy = self._check_derived_power(derive_power_from, by_name, max_power_w)
        self._clock = clock
        self._plan = read_plan(self.registers)
        self._link: _Pymodbus316 | None = None

    def _check_derived_power(
        self, name: str, by_name: dict[str, RegisterSpec], max_power_w: float
    ) -> EnergyToPower:
        spec = by_name.get(name)
        if spec is None:
            raise ConfigError(
                f"{self.source}: derive_power_from names register {name!r}, which is not in "
                f"the map; registers: {', '.join(by_name)}"
            )
        if spec.unit != "Wh":
            raise ConfigError(
                f"{self.source}: derive_power_from register {name!r} holds {spec.unit!r}, "
                "an energy counter in 'Wh' is needed"
            )
        self._power_bindings = [b for b in self.bindings if b.field == name]
        if not self._power_bindings:
            raise ConfigError(
                f"{self.source}: derive_power_from register {name!r} is bound to no vessel"
            )
        for b in self._power_bindings:
            for other in self.bindings:
                if other.vessel == b.vessel and other.role == "power":
                    raise ConfigError(
                        f"{self.source}: vessel {b.vessel!r} already has a power channel "
                        f"(register {other.field!r}); derive_power_from would give it a second"
                    )
        return EnergyToPower(modulus_wh=counter_modulus(spec), max_power_w=max_power_w)

    async def __aenter__(self) -> Self:
        """Open the link to the meter; raise DriverError naming the URL if it cannot."""
        link = _Pymodbus316(self.endpoint, self.timeout_s)
        try:
            connected = await link.connect()
        except (OSError, ModbusException) as exc:
            link.close()
            raise DriverError(f"{self.source}: cannot open the link to the meter ({exc})") from exc
        if not connected:
            link.close()
            raise DriverError(f"{self.source}: cannot open the link to the meter")
        self._link = link
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        """Close the link; never raises because the link is dead."""
        if self._link is not None:
            self._link.close()
            self._link = None

    async def samples(self) -> AsyncIterator[Sample | Quarantined]:
        """Yield the samples (units of their roles) and quarantined items of every poll.

        Raises :class:`DriverError` naming the URL when the link is lost or the meter
        does not answer ``max_missed_polls`` polls in a row.
        """
        if self._link is None:
            raise DriverError(f"{self.source}: use the driver inside 'async with' first")
        loop = asyncio.get_running_loop()
        due_s = loop.time()
        missed = 0
        while True:
            items, no_answer = await self._poll(self._link)
            if no_answer:
                missed += 1
                _log.warning("%s: no answer (%d in a row): %s", self.source, missed, no_answer)
                if missed >= self.max_missed_polls:
                    raise DriverError(
                        f"{self.source}: the meter (unit {self.endpoint.unit}) did not answer "
                        f"{missed} polls in a row (timeout {self.timeout_s:g} s): {no_answer}"
                    )
            else:
                missed = 0
                for item in items:
                    yield item
            due_s += self.poll_s
            now_s = loop.time()
            if due_s <= now_s:
                skipped = math.floor((now_s - due_s) / self.poll_s) + 1
                _log.debug("%s: poll overran; skipping %d slot(s)", self.source, skipped)
                due_s += skipped * self.poll_s
            await asyncio.sleep(due_s - now_s)

    def _specs_in(self, read: RegisterRead) -> list[RegisterSpec]:
        return [
            s
            for s in self.registers
            if s.table == read.table
            and read.start <= s.address
            and s.end <= read.start + read.count
        ]

    async def _poll(self, link: _Pymodbus316) -> tuple[list[Sample | Quarantined], str]:
        """Return one poll's items, or ([], reason) when the meter did not answer."""
        values: dict[str, float] = {}
        refused: list[_Refusal] = []
        all_words: list[int] = []
        pending = list(self._plan)
        while pending:
            read = pending.pop(0)
            answer = await link.read(read, self.endpoint.unit)
            if answer.no_answer:
                return [], answer.no_answer
            specs = self._specs_in(read)
            if answer.words is None:
                if len(specs) > 1:
                    singles = [r for s in specs for r in read_plan([s])]
                    _log.info(
                        "%s: read of %s %d..%d refused (code %d); reading its registers one "
                        "by one from now on",
                        self.source,
                        read.table,
                        read.start,
                        read.start + read.count - 1,
                        answer.exception_code,
                    )
                    index = self._plan.index(read)
                    self._plan[index : index + 1] = singles
                    pending[0:0] = singles
                    continue
                name = EXCEPTION_NAMES.get(answer.exception_code, "unknown code")
                refused.extend(
                    _Refusal(
                        s,
                        f"exception response {answer.exception_code} ({name}) to a read of "
                        f"{read.count} {read.table} register(s) from {read.start}",
                        answer.exception_pdu or b"",
                    )
                    for s in specs
                )
                continue
            all_words.extend(answer.words)
            for spec in specs:
                try:
                    values[spec.name] = decode(words_for(spec, read, answer.words), spec)
                except FrameError as exc:
                    raw = exc.raw if isinstance(exc.raw, bytes) else exc.raw.encode()
                    refused.append(_Refusal(spec, str(exc), raw))
        t = self._clock()
        return self._items(t, values, refused, all_words), ""

    def _items(
        self, t: float, values: dict[str, float], refused: list[_Refusal], all_words: list[int]
    ) -> list[Sample | Quarantined]:
        items: list[Sample | Quarantined] = []
        samples, problems = bind_fields(values, self.bindings, t, self.source)
        items.extend(samples)
        if self._energy is not None and self.derive_power_from in values:
            step = self._energy.update(t, values[self.derive_power_from])
            if step.power_w is None:
                level = logging.DEBUG if step.reason.startswith("first") else logging.WARNING
                _log.log(level, "%s: no derived power: %s", self.source, step.reason)
            else:
                items.extend(
                    Sample(t, b.vessel, "power", b.gain * step.power_w, Quality.OK, self.source)
                    for b in self._power_bindings
                )
        items.extend(
            Quarantined(
                t,
                self.source,
                f"{self.source} register {r.spec.name}@{r.spec.address}",
                r.reason,
                r.raw,
            )
            for r in refused
        )
        if problems:
            items.append(
                Quarantined(
                    t,
                    self.source,
                    f"{self.source} registers {', '.join(sorted(values))}",
                    "; ".join(problems),
                    words_to_bytes(all_words),
                )
            )
        return items


def read_table(table: ConfigTable) -> dict[str, Any]:
    """Return the driver options of a Modbus meter's ``[[instruments]]`` table.

    Keys: ``registers`` (a list of :class:`~drivers.registers.RegisterSpec` tables;
    required), ``poll_s`` (0.001-3600, default 1), ``timeout_s`` (0.01-60, default 1)
    and ``power_from_energy`` (a register's name: mean power from that energy counter).
    Returns ``registers``, ``poll_s``, ``timeout_s`` and ``derive_power_from``.
    """
    poll_s = table.number("poll_s", 1.0, lo=0.001, hi=3600.0)
    timeout_s = table.number("timeout_s", 1.0, lo=0.01, hi=60.0)
    power_from = table.string("power_from_energy")
    listed = table.get("registers")
    if not isinstance(listed, list) or not listed:
        raise table.fail("registers", "a Modbus instrument needs a list of registers")
    keys = {f.name for f in dataclass_fields(RegisterSpec)}
    registers: list[RegisterSpec] = []
    for i, reg in enumerate(listed):
        where = f"registers[{i}]"
        if not isinstance(reg, dict):
            raise table.fail(where, "must be a table")
        unknown = sorted(set(reg) - keys)
        if unknown:
            known = ", ".join(sorted(keys))
            raise table.fail(f"{where}.{unknown[0]}", f"unknown key (keys: {known})")
        try:
            registers.append(RegisterSpec(**reg))
        except (TypeError, ConfigError) as exc:
            raise table.fail(where, str(exc)) from None
    try:
        check_register_map(registers)
    except ConfigError as exc:
        raise table.fail("registers", str(exc)) from None
    if power_from is not None and power_from not in {r.name for r in registers}:
        raise table.fail("power_from_energy", f"{power_from!r} is not one of the registers")
    return {
        "registers": registers,
        "poll_s": poll_s,
        "timeout_s": timeout_s,
        "derive_power_from": power_from,
    }


#: The driver registry's entry (drivers/registry.py).
DRIVER = DriverKind("modbus", SCHEMES, ModbusMeterDriver, read_table, INSTRUMENTS)
