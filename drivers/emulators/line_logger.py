"""A simulated thermocouple logger that prints one text line per instant on a serial line.

It stands in for a real multi-channel logger in the demo and the tests:
``SimulatedRig -> LineLoggerEmulator -> pty -> SerialLineDriver -> samples``.

A line (``keyvalue`` style, the default) looks like::

    t=1767225600.000 water_mv=-0.363 element_mv=-0.362 ambient_c=21.02 power_w=0.0 voltage_v=229.81
    current_a=0.0 energy_wh=0.0 cj_c=24.0\\r\\n

(one line on the wire; readings in the rig's sensor order, the cold junction last).

Field names are ours: ``<role>_mv`` for a raw thermocouple EMF (mV, cold junction at the
terminals), ``cj_c`` for the terminal block's temperature (°C), and ``<role>_<unit>``
for the rest (``ambient_c``, ``power_w``, ``voltage_v``, ``current_a``, ``energy_wh``).
``t`` is the logger's own clock in Unix seconds with three decimals. A reading the
rig dropped is simply absent from the line. The ``csv`` style prints the same values
by position (:data:`CSV_CHANNELS`), an empty cell for a missing reading.

:func:`logger_bindings` gives the :class:`~drivers.framing.LineSpec` and channel
bindings that read these lines back; :func:`open_pty_pair` makes the pseudo-terminal.
"""

from __future__ import annotations

import asyncio
import logging
import os
import tty
from collections.abc import Mapping, Sequence

from drivers.channels import ChannelBinding
from drivers.errors import ConfigError, DriverError
from drivers.framing import LineSpec
from drivers.sample import Sample, channel_unit
from drivers.simworld import Clock, SimulatedRig

log = logging.getLogger(__name__)

STYLES = ("keyvalue", "csv")
#: Field suffix for each unit.
_UNIT_SUFFIX = {"degC": "c", "mV": "mv", "W": "w", "Wh": "wh", "V": "v", "A": "a", "kPa": "kpa"}
#: Temperature roles the logger has inputs for (raw mV or already in °C).
TEMPERATURE_ROLES = ("water", "element", "ambient", "wall")
#: Other inputs: a power meter's readings.
METER_ROLES = ("power", "voltage", "current", "energy")
#: Column order of the ``csv`` style, after the time column ``t``.
CSV_CHANNELS: tuple[str, ...] = (
    *(f"{role}_emf" for role in TEMPERATURE_ROLES),
    "cold_junction",
    *TEMPERATURE_ROLES,
    *METER_ROLES,
)


def field_name(channel: str) -> str:
    """Return the logger's field name for a sample channel (``water_emf`` -> ``water_mv``)."""
    if channel == "cold_junction":
        return "cj_c"
    if channel.endswith("_emf"):
        return channel[: -len("_emf")] + "_mv"
    return f"{channel}_{_UNIT_SUFFIX[channel_unit(channel)]}"


def _value_text(value: float) -> str:
    # the shortest text that reads back to the same float, so nothing is lost on the wire
    return repr(float(value))


def render_line(
    batch: Sequence[Sample], style: str = "keyvalue", time_shift_s: float = 0.0
) -> bytes:
    """Return the CRLF-terminated line (ASCII bytes) the logger prints for one instant.

    ``batch`` is one instant's samples of one vessel (``SimulatedRig.read()``); the
    line's ``t`` is their time plus ``time_shift_s`` (s). Raises ValueError for an
    empty batch, samples of different instants or vessels, an unknown style, or (csv
    style) a channel without a column.
    """
    if style not in STYLES:
        raise ValueError(f"unknown line style {style!r}; known styles: {', '.join(STYLES)}")
    if not batch:
        raise ValueError("an empty batch has no time to print")
    t = batch[0].t
    if any(s.t != t or s.vessel != batch[0].vessel for s in batch):
        raise ValueError("a line holds the samples of one vessel at one instant")
    stamp = f"{t + time_shift_s:.3f}"
    if style == "keyvalue":
        tokens = [f"t={stamp}"] + [f"{field_name(s.channel)}={_value_text(s.value)}" for s in batch]
        return (" ".join(tokens) + "\r\n").encode("ascii")
    cells = dict.fromkeys(CSV_CHANNELS, "")
    for s in batch:
        if s.channel not in cells:
            raise ValueError(f"channel {s.channel!r} has no column in the csv style")
        cells[s.channel] = _value_text(s.value)
    return (",".join([stamp, *cells.values()]) + "\r\n").encode("ascii")


def logger_bindings(
    vessel: str, tc_type: str, style: str = "keyvalue"
) -> tuple[LineSpec, list[ChannelBinding]]:
    """Return the LineSpec and channel bindings that read this logger's lines for ``vessel``.

    Raw thermocouple fields (``<role>_mv``) are bound as type ``tc_type`` with the
    cold junction in ``cj_c``; the time stamp ``t`` is the instrument's time. Each
    temperature role is bound both as ``<role>_mv`` and ``<role>_c``, since the logger
    prints one or the other depending on the sensor; a line carrying both would give
    two samples for the role.
    """
    if style not in STYLES:
        raise ConfigError(f"unknown line style {style!r}; known styles: {', '.join(STYLES)}")
    if style == "keyvalue":
        spec = LineSpec("keyvalue", time_field="t")
    else:
        spec = LineSpec("csv", fields=("t", *(field_name(c) for c in CSV_CHANNELS)), time_field="t")
    bindings = [ChannelBinding(field_name("cold_junction"), vessel, "cold_junction", "degC")]
    for role in TEMPERATURE_ROLES:
        bindings.append(
            ChannelBinding(
                field_name(f"{role}_emf"),
                vessel,
                role,
                "mV",
                thermocouple=tc_type,
                cold_junction=field_name("cold_junction"),
            )
        )
        bindings.append(ChannelBinding(field_name(role), vessel, role, "degC"))
    for role in METER_ROLES:
        bindings.append(ChannelBinding(field_name(role), vessel, role, channel_unit(role)))
    return spec, bindings


def open_pty_pair() -> tuple[int, str]:
    """Return ``(master_fd, slave_path)`` of a new raw pseudo-terminal.

    Both ends are put in raw mode at once (a fresh pty echoes and translates line
    endings). The slave descriptor is then closed: the pty lives as long as the
    master is open, and a driver opens the slave again by its path. Bytes written to
    the master before something opens the slave are lost (pyserial flushes input on
    open), so start the reader first. The caller closes ``master_fd``; closing it is
    how a test "unplugs" the port.
    """
    master_fd, slave_fd = os.openpty()
    try:
        tty.setraw(master_fd)
        tty.setraw(slave_fd)
        slave_path = os.ttyname(slave_fd)
    except BaseException:
        os.close(master_fd)
        raise
    finally:
        os.close(slave_fd)
    return master_fd, slave_path


class LineLoggerEmulator:
    """Prints a simulated rig's readings as logger lines into a pty or serial device.

    ``port`` is an open file descriptor (the master end from :func:`open_pty_pair`;
    it is made non-blocking and left open for the caller to close) or a device path
    (opened here, closed by :meth:`close`). ``clock`` paces the run like the
    simulator's driver: ``FastClock`` as fast as the reader takes the lines,
    ``PacedClock(speed)`` at ``speed`` times real time, with the lines' ``t`` moved to
    the clock's start (the rig itself is not changed). ``style`` is ``keyvalue``
    (default) or ``csv``. Close a descriptor only after :meth:`run` has ended or been
    cancelled: a writer waiting on a full pty is not woken by the close.
    """

    def __init__(
        self,
        rig: SimulatedRig,
        port: int | str,
        clock: Clock,
        *,
        style: str = "keyvalue",
    ) -> None:
        if style not in STYLES:
            raise ConfigError(f"unknown line style {style!r}; known styles: {', '.join(STYLES)}")
        self.rig = rig
        self.clock = clock
        self.style = style
        start = clock.start_epoch_s()
        #: Added to the rig's sample times to give the logger's clock, s.
        self.time_shift_s = 0.0 if start is None else start - rig.scenario.start_epoch_s
        if isinstance(port, str):
            try:
                self._fd = os.open(port, os.O_RDWR | os.O_NOCTTY | os.O_NONBLOCK)
            except OSError as exc:
                raise DriverError(f"emulator cannot open {port}: {exc}") from exc
            self._owns_fd = True
            self.port_name = port
        else:
            self._fd = port
            self._owns_fd = False
            self.port_name = f"fd {port}"
            os.set_blocking(port, False)
        self.lines_written = 0

    def close(self) -> None:
        """Close the device if this emulator opened it (a descriptor passed in stays open)."""
        if self._owns_fd and self._fd >= 0:
            os.close(self._fd)
            self._fd = -1

    async def write(self, data: bytes) -> None:
        """Write all of ``data`` to the port, waiting (off the CPU) while the pty is full.

        Raises DriverError when the port has been closed or has failed.
        """
        loop = asyncio.get_running_loop()
        view = memoryview(data)
        while view:
            try:
                written = os.write(self._fd, view)
            except BlockingIOError:
                await self._writable(loop)
                continue
            except OSError as exc:
                raise DriverError(f"emulator port {self.port_name} failed: {exc}") from exc
            view = view[written:]

    async def _writable(self, loop: asyncio.AbstractEventLoop) -> None:
        ready = loop.create_future()
        try:
            loop.add_writer(self._fd, ready.set_result, None)
        except (OSError, ValueError) as exc:
            raise DriverError(f"emulator port {self.port_name} failed: {exc}") from exc
        try:
            await ready
        finally:
            loop.remove_writer(self._fd)

    async def run(self, *, inject: Mapping[int, bytes] | None = None) -> int:
        """Return the number of reading lines written, after printing the whole scenario.

        ``inject`` maps an instant's index (0 = the first) to raw bytes written just
        before that instant's line: corrupt lines for tests. An instant whose
        readings all dropped out prints nothing.
        """
        extra = dict(inject or {})
        for index, batch in enumerate(self.rig.run()):
            await self.clock.wait_until(self.rig.elapsed_s)
            if index in extra:
                await self.write(extra.pop(index))
            if batch:
                await self.write(render_line(batch, self.style, self.time_shift_s))
                self.lines_written += 1
        if extra:
            log.warning("instants %s are past the end of the run; not injected", sorted(extra))
        return self.lines_written
