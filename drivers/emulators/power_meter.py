"""A simulated Modbus power meter, served over TCP or RTU on a serial line.

It holds power (W, float32), an energy counter (Wh, uint32 with a scale, rolling over
like a real meter's), voltage (V) and current (A) in holding registers, answering
from whatever values it was last given::

    async with PowerMeterEmulator("modbus+tcp://127.0.0.1:0") as meter:
        meter.update(power_w=2000.0, energy_wh=12.5, voltage_v=230.1, current_a=8.69)
        async with ModbusMeterDriver(
            meter.url, registers=default_meter_registers(), bindings=meter_bindings("k1")
        ) as driver:
            ...

Port 0 asks the system for a free port; :attr:`PowerMeterEmulator.url` then gives the
real one. For RTU, give the serial device of one end of a pseudo-terminal pair
(``modbus+rtu:///tmp/meterA?baud=19200&unit=1``) and the driver the other end.

To wire the simulated rig to the emulator, pass ``on_read``: it is called just before
every read request is answered, so it can move a :class:`drivers.simworld.SimulatedRig`
on and copy its ``power`` and ``energy`` samples into the meter with :meth:`update`.

Addresses not in the map are unmapped: reading them gets exception 2 (illegal data
address). The registers are read-only (writes get exception 2 too). The emulator serves
function 3 (holding) and function 4 (input) from the same map, so a map for it must not
use one address twice across the two tables.

All pymodbus server and datastore calls sit in :class:`_PymodbusServer316`, written for
pymodbus 3.16.x (its ``pymodbus.simulator`` device model, marked experimental there).
"""

from __future__ import annotations

import asyncio
import logging
import math
from collections.abc import Callable, Sequence
from types import TracebackType
from typing import Self

from pymodbus.constants import ExcCodes
from pymodbus.framer import FramerType
from pymodbus.server import ModbusSerialServer, ModbusTcpServer
from pymodbus.simulator import DataType, SimData, SimDevice

from drivers.channels import ChannelBinding
from drivers.errors import ConfigError, DriverError
from drivers.modbus import ModbusEndpoint, parse_modbus_url
from drivers.registers import (
    RegisterSpec,
    check_register_map,
    encode,
    integer_range,
)

_log = logging.getLogger(__name__)

#: Keyword of :meth:`PowerMeterEmulator.update` -> register name in the default map.
UPDATE_NAMES = {
    "power_w": "power",
    "energy_wh": "energy",
    "voltage_v": "voltage",
    "current_a": "current",
}


def default_meter_registers(*, energy_scale_wh: float = 0.01) -> list[RegisterSpec]:
    """Return the simulated meter's register map (zero-based holding addresses 0..6).

    ``power`` W float32 at 0-1; ``energy`` Wh uint32 at 2-3 with ``energy_scale_wh``
    Wh per count (default 0.01, so it rolls over after 42 949 672.96 Wh); ``voltage``
    V uint16 at 4 in 0.1 V; ``current`` A int32 at 5-6, low word first, in mA. The
    mixed types and word orders are on purpose, so the whole decoder is exercised.
    """
    return [
        RegisterSpec(name="power", address=0, type="float32", unit="W"),
        RegisterSpec(name="energy", address=2, type="uint32", unit="Wh", scale=energy_scale_wh),
        RegisterSpec(name="voltage", address=4, type="uint16", unit="V", scale=0.1),
        RegisterSpec(
            name="current", address=5, type="int32", unit="A", scale=0.001, word_order="little"
        ),
    ]


def meter_bindings(vessel: str, *, power: bool = True) -> list[ChannelBinding]:
    """Return bindings of the default map's registers to ``vessel``'s channels.

    ``power=False`` leaves out the power register, for a driver that derives power
    from the energy counter instead (``derive_power_from="energy"``).
    """
    out = [
        ChannelBinding("energy", vessel, "energy", "Wh"),
        ChannelBinding("voltage", vessel, "voltage", "V"),
        ChannelBinding("current", vessel, "current", "A"),
    ]
    if power:
        out.insert(0, ChannelBinding("power", vessel, "power", "W"))
    return out


class _PymodbusServer316:
    """Every pymodbus server and datastore call of the emulator (pymodbus 3.16.x).

    The register image lives in the emulator; ``on_access(address, count)`` returns the
    words to answer with, copied into pymodbus's block just before each read is served.
    """

    def __init__(
        self,
        endpoint: ModbusEndpoint,
        specs: Sequence[RegisterSpec],
        on_access: Callable[[int, int], list[int] | None],
    ) -> None:
        self._endpoint = endpoint
        self._on_access = on_access
        device = SimDevice(
            id=endpoint.unit,
            simdata=[
                SimData(
                    address=s.address,
                    count=s.words,
                    values=0,
                    datatype=DataType.REGISTERS,
                    readonly=True,
                )
                for s in specs
            ],
            action=self._action,
        )
        self._device = device
        self._server: ModbusTcpServer | ModbusSerialServer | None = None

    async def _action(
        self,
        function_code: int,
        start_address: int,
        address: int,
        count: int,
        current_registers: list[int],
        set_values: list[int] | list[bool] | None,
    ) -> ExcCodes | None:
        if set_values is not None or function_code not in (3, 4):
            return ExcCodes.ILLEGAL_ADDRESS
        words = self._on_access(address, count)
        if words is None:
            return ExcCodes.DEVICE_FAILURE
        offset = address - start_address
        current_registers[offset : offset + count] = words
        return None

    async def start(self) -> None:
        """Start listening (TCP) or open the serial port (RTU)."""
        ep = self._endpoint
        if ep.transport == "tcp":
            self._server = ModbusTcpServer(self._device, address=(ep.host, ep.port))
        else:
            self._server = ModbusSerialServer(
                self._device,
                framer=FramerType.RTU,
                port=ep.device,
                baudrate=ep.baud,
                parity=ep.parity,
                stopbits=ep.stopbits,
                bytesize=ep.bytesize,
            )
        try:
            await self._server.serve_forever(background=True)
        except (RuntimeError, OSError) as exc:
            await self.stop()
            raise DriverError(f"{ep.source}: the simulated meter cannot start ({exc})") from exc

    def bound_port(self) -> int:
        """Return the TCP port the server listens on (0 for RTU)."""
        if self._server is None or self._endpoint.transport != "tcp":
            return 0
        sockets = getattr(self._server.transport, "sockets", None) or ()
        return int(sockets[0].getsockname()[1]) if sockets else self._endpoint.port

    async def stop(self) -> None:
        """Close the listener and every connection; leave no task behind."""
        server, self._server = self._server, None
        if server is None:
            return
        await server.shutdown()
        relisten = server.reconnect_task
        server.reconnect_task = None
        if relisten is not None:
            relisten.cancel()
            await asyncio.gather(relisten, return_exceptions=True)
        # Let answers already scheduled by pymodbus's handlers run out.
        for _ in range(3):
            await asyncio.sleep(0)


class PowerMeterEmulator:
    """A simulated Modbus meter (async context manager), serving a register map.

    ``url``: ``modbus+tcp://HOST:PORT?unit=N`` (port 0: any free port) or
    ``modbus+rtu:///DEVICE?baud=B&parity=P&unit=N``. ``registers``: the map (default
    :func:`default_meter_registers`). ``on_read``: called with the emulator before
    each read is answered (default None); if it raises, the meter answers exception 4
    (server device failure) and the error is logged. All values start at 0.
    """

    def __init__(
        self,
        url: str = "modbus+tcp://127.0.0.1:0",
        *,
        registers: Sequence[RegisterSpec] | None = None,
        on_read: Callable[[PowerMeterEmulator], None] | None = None,
    ) -> None:
        self.endpoint = parse_modbus_url(url)
        specs = check_register_map(default_meter_registers() if registers is None else registers)
        owner: dict[int, str] = {}
        for spec in specs:
            for a in range(spec.address, spec.end):
                if a in owner:
                    raise ConfigError(
                        f"simulated meter: registers {owner[a]!r} and {spec.name!r} share "
                        f"address {a} (holding and input share one map here)"
                    )
                owner[a] = spec.name
        self.registers = {spec.name: spec for spec in specs}
        self.on_read = on_read
        self.reads = 0
        self._words: dict[int, int] = dict.fromkeys(owner, 0)
        self._server = _PymodbusServer316(self.endpoint, specs, self._answer)

    @property
    def url(self) -> str:
        """Return the URL a driver should use (with the real port once started)."""
        ep = self.endpoint
        if ep.transport != "tcp":
            return ep.source
        return f"modbus+tcp://{ep.host}:{self._server.bound_port() or ep.port}?unit={ep.unit}"

    def _answer(self, address: int, count: int) -> list[int] | None:
        self.reads += 1
        if self.on_read is not None:
            try:
                self.on_read(self)
            except Exception:
                _log.exception("simulated meter: on_read failed; answering device failure")
                return None
        return [self._words.get(a, 0) for a in range(address, address + count)]

    def set_value(self, name: str, value: float) -> None:
        """Hold ``value`` (in the register's unit) in register ``name``.

        An integer energy counter (unit Wh) keeps ``value`` modulo its roll-over
        (:func:`drivers.registers.counter_modulus`), as a real meter's counter does.
        Raises :class:`ConfigError` for an unknown name or a value the register cannot hold.
        """
        spec = self._spec(name)
        if spec.unit == "Wh" and spec.type.startswith("uint") and math.isfinite(value):
            counts = round(value / spec.scale) % (integer_range(spec)[1] + 1)
            value = counts * spec.scale
        self.set_words(name, encode(value, spec))

    def set_words(self, name: str, words: Sequence[int]) -> None:
        """Hold raw ``words`` in register ``name`` (for tests: a NaN, a torn value)."""
        spec = self._spec(name)
        if len(words) != spec.words or not all(0 <= w <= 0xFFFF for w in words):
            raise ConfigError(f"register {name!r} needs {spec.words} word(s) of 0..65535")
        for i, w in enumerate(words):
            self._words[spec.address + i] = int(w)

    def words_of(self, name: str) -> list[int]:
        """Return the words register ``name`` holds now, as they would go on the wire."""
        spec = self._spec(name)
        return [self._words[a] for a in range(spec.address, spec.end)]

    def update(
        self,
        *,
        power_w: float | None = None,
        energy_wh: float | None = None,
        voltage_v: float | None = None,
        current_a: float | None = None,
    ) -> None:
        """Hold the given readings (W, Wh, V, A) in the registers of the same names.

        Readings left as None keep their last value.
        """
        given = {
            "power_w": power_w,
            "energy_wh": energy_wh,
            "voltage_v": voltage_v,
            "current_a": current_a,
        }
        for key, value in given.items():
            if value is not None:
                self.set_value(UPDATE_NAMES[key], value)

    def _spec(self, name: str) -> RegisterSpec:
        try:
            return self.registers[name]
        except KeyError:
            known = ", ".join(self.registers)
            raise ConfigError(f"simulated meter has no register {name!r}; it has {known}") from None

    async def __aenter__(self) -> Self:
        """Start serving; raise DriverError if the port cannot be opened."""
        await self._server.start()
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        """Stop serving and close every connection."""
        await self._server.stop()

    async def stop(self) -> None:
        """Stop serving now (the meter "goes dead"); ``__aexit__`` then does nothing."""
        await self._server.stop()
