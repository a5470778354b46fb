"""``ebullio demo``: the live service over a simulated rig that speaks real instrument protocols.

The rig is simulated (:mod:`drivers.simworld`), but nothing after it is: a
simulated thermocouple logger prints its lines into a pseudo-terminal, which the
serial line driver reads; a simulated power meter answers Modbus TCP on
127.0.0.1, which the Modbus driver polls; the service records everything to an
SQLite log and runs the estimator, exactly as ``ebullio run`` does with a rig
configuration (the demo writes one and records it in the log).

Time: the rig runs ``speed`` times faster than real time. The logger stamps its
lines with the simulated clock and the drivers are handed the same clock, so the
log reads as if the run had happened at real speed. That clock starts in the past
(:func:`demo_start_s`), so no reading is ever stamped ahead of the wall clock: a
45 s demo at 20x records 15 minutes that end about when it does. When the log
already holds readings after that start (a demo a few minutes earlier), the new
demo starts just after them instead, and wherever its clock would then pass the
wall clock the rig waits: it runs at real time until it is behind again. A new
demo is a new session of the service, so its readings are a new run, live and in
a replay. The clock follows the logger:
it is the time of the line last written plus the real time since at speed, never
past the next line. When the machine is busy and the logger is late, the rig
pauses (:meth:`PacedClock.slip`) instead of catching up in a burst of lines, so a
meter reading is never stamped several lines after it was answered.

The meter is polled four times per simulated sample interval and, like a real
meter, shows the power flowing now, and an energy counter that climbs through each
interval (it is set at each read from the interval's mean power). The service
interpolates the counter at each water reading, so every filter step gets the
energy of its own interval whatever the phase of the polls.

This alignment matters: the estimator is sensitive to power that lags the
temperatures by one sample at a switch (see DEVELOPERS.md, known gaps).
"""

from __future__ import annotations

import asyncio
import contextlib
import heapq
import json
import os
import signal
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, replace

from drivers.emulators.line_logger import LineLoggerEmulator, open_pty_pair, render_line
from drivers.emulators.power_meter import PowerMeterEmulator
from drivers.errors import EbullioError
from drivers.payloads import CHANNEL_COLUMNS
from drivers.sample import Sample
from drivers.simworld import PacedClock, Scenario, SimulatedRig, scenario_metadata
from monitor.records.interchange import iso_utc
from monitor.records.recorder import last_sample_t
from monitor.rig.config import RigConfig, parse_config, toml_value, vessel_table
from monitor.rig.service import Service, Stats

#: Channels the simulated logger prints; the rest of the rig's readings go to the meter.
LOGGER_CHANNELS = ("water_emf", "element_emf", "cold_junction", "ambient")
METER_KEYS = {"power": "power_w", "energy": "energy_wh", "voltage": "voltage_v",
              "current": "current_a"}  # fmt: skip


#: Seconds between the newest reading already in the log and a demo's first one (at
#: most: never later than now).
AFTER_LAST_S = 1.0


def demo_start_s(
    now_s: float, duration_s: float, speed: float, last_t: float | None
) -> tuple[float, bool]:
    """Return the Unix time (s) of a demo's first reading, and whether it must wait for
    the wall clock.

    The start is ``duration_s`` of simulated time, less the ``duration_s / speed`` of
    real time it takes, before ``now_s``, so the readings end when the demo does and
    are never stamped ahead of the wall clock. ``last_t`` is the newest reading the
    log holds (None for a new log): a start before it moves to :data:`AFTER_LAST_S`
    after it (but not past ``now_s``), and then the demo must not run ahead of the wall
    clock (True). A log whose newest reading is later than ``now_s`` gives a start after
    ``now_s``, which the demo refuses.
    """
    start = now_s - duration_s * (1.0 - 1.0 / speed)
    if last_t is None or last_t + AFTER_LAST_S <= start:
        return start, False
    if last_t > now_s:
        return last_t + AFTER_LAST_S, True
    return min(last_t + AFTER_LAST_S, now_s), True


def demo_scenario(scenario: Scenario) -> Scenario:
    """Return ``scenario`` with raw type K thermocouples on the water and the element."""
    sensors = dict(scenario.sensors)
    for role in ("water", "element"):
        if role in sensors:
            sensors[role] = replace(sensors[role], raw_tc_type="K")
    return replace(scenario, sensors=sensors)


@dataclass(frozen=True)
class DemoVessel:
    """One vessel the demo runs live, and how its readings reach the service.

    ``via``: ``"bench"``, a thermocouple line logger on a pseudo-terminal (raw type K)
    and a Modbus TCP power meter on 127.0.0.1 of its own; ``"logger"``, one line logger
    printing all its channels; ``"mqtt"``, a reading message per instant on the demo's
    broker. ``metadata`` replaces the simulated log's own description (its ``truth_``
    keys included) with what a user would configure (None: that description).
    """

    scenario: Scenario
    seed: int
    via: str = "bench"
    metadata: dict[str, str | float] | None = None

    def __post_init__(self) -> None:
        if self.via not in ("bench", "logger", "mqtt"):
            raise ValueError(f"unknown way in {self.via!r}")


def demo_config_text(
    vessels: list[DemoVessel],
    serial_ports: dict[int, str],
    meter_urls: dict[int, str],
    poll_s: float,
    mqtt_url: str | None = None,
) -> str:
    """Return the TOML rig configuration of the demo (recorded in the log like any other).

    ``serial_ports`` and ``meter_urls`` are the pseudo-terminal and the meter of each
    vessel (by its index) that has them; ``mqtt_url`` the demo's broker.
    """
    lines = ["# ebullio demo: simulated vessels behind simulated instruments (line loggers "
             "on pseudo-terminals, Modbus TCP meters, MQTT)", "[site]",
             f"pressure_kpa = {vessels[0].scenario.pressure_kpa!r}", "", "[recorder]",
             "commit_interval_s = 1.0", ""]  # fmt: skip
    if mqtt_url is not None:
        lines += ["[mqtt]", f"url = {toml_value(mqtt_url)}", f"prefix = {toml_value(MQTT_PREFIX)}",
                  "inflight_window = 0", ""]  # fmt: skip
    tables: list[str] = []
    for i, v in enumerate(vessels):
        meta = scenario_metadata(v.scenario, v.seed) if v.metadata is None else v.metadata
        serial_url = f"serial://{serial_ports[i]}?baud=115200" if i in serial_ports else None
        meter_url = meter_urls.get(i)
        if serial_url is not None:
            lines += ["[[instruments]]", f'url = "{serial_url}"', 'framing = "keyvalue"',
                      'time_field = "t"', ""]  # fmt: skip
        if meter_url is not None:
            lines += _meter_table(meter_url, poll_s)
        tables += vessel_table(v.scenario.vessel, meta, True if v.via == "mqtt" else None)
        channels = [
            (serial_url, "water_mv", "water", "mV", "K"),
            (serial_url, "element_mv", "element", "mV", "K"),
            (serial_url, "ambient_c", "ambient", "degC", None),
        ]
        on_meter = meter_url if v.via == "bench" else serial_url
        channels += [(on_meter, field, role, unit, None) for field, role, unit in (
            ("power" if v.via == "bench" else "power_w", "power", "W"),
            ("energy" if v.via == "bench" else "energy_wh", "energy", "Wh"),
            ("voltage" if v.via == "bench" else "voltage_v", "voltage", "V"),
            ("current" if v.via == "bench" else "current_a", "current", "A"),
        )]  # fmt: skip
        for url, field_, role, unit, tc in channels if v.via != "mqtt" else []:
            tables += ["", "[[vessels.channels]]", f'instrument = "{url}"', f'field = "{field_}"',
                       f'role = "{role}"', f'unit = "{unit}"']  # fmt: skip
            if tc:
                tables += [f'thermocouple = "{tc}"', 'cold_junction = "cj_c"']
        tables.append("")
    return "\n".join(lines + tables)


def _meter_table(url: str, poll_s: float) -> list[str]:
    """Return the ``[[instruments]]`` table of a demo power meter at ``url``."""
    return [
        "[[instruments]]",
        f'url = "{url}"',
        f"poll_s = {poll_s!r}",
        "registers = [",
        '  { name = "power", address = 0, type = "float32", unit = "W" },',
        '  { name = "energy", address = 2, type = "uint32", unit = "Wh", scale = 0.01 },',
        '  { name = "voltage", address = 4, type = "uint16", unit = "V", scale = 0.1 },',
        '  { name = "current", address = 5, type = "int32", unit = "A", scale = 0.001, '
        'word_order = "little" },',
        "]",
        "",
    ]


def _line(elapsed_s: float, m: dict[str, object]) -> str:
    """Return one live terminal line of the demo from an estimate message."""

    def num(key: str, fmt: str) -> str:
        value = m.get(key)
        return format(value, fmt) if isinstance(value, float) else "-"

    eta = m.get("time_to_target_s")
    if m.get("target_c") is None:
        eta_text = "-"
    elif eta is None:
        eta_text = "not reachable"
    else:
        eta_text = (
            f"{eta:.0f} s ({num('time_to_target_lo_s', '.0f')}-{num('time_to_target_hi_s', '.0f')})"
        )
    raised = m.get("flags") or []
    flags = [f["message"] for f in raised if f["level"] != "notice"]  # type: ignore[union-attr]
    return (
        f"{elapsed_s:7.0f} {m['phase']!s:>8} {num('water_c', '8.2f')} {num('power_w', '7.0f')} "
        f"{eta_text:>20} {num('water_mass_kg', '6.3f')}±{num('water_mass_std', '.3f')} "
        f"{num('ua_w_per_k', '6.3f')}±{num('ua_std', '.3f')} "
        f"{num('element_conductance_w_per_k', '6.1f')}±{num('element_conductance_std', '.1f')}"
        + ("  " + "; ".join(flags) if flags else "")
    )


async def run_demo(
    scenario: Scenario,
    seed: int,
    log_path: str,
    speed: float,
    every_s: float = 10.0,
    say: Callable[[str], None] = print,
    on_started: Callable[[], None] | None = None,
    metadata: dict[str, str | float] | None = None,
) -> tuple[Stats, RigConfig]:
    """Run one vessel on a bench (a line logger and a meter) to the end of its scenario."""
    vessels = [DemoVessel(scenario, seed, "bench", metadata)]
    return await run_live(vessels, log_path, speed, every_s, say, on_started)


async def run_live(
    vessels: list[DemoVessel],
    log_path: str,
    speed: float,
    every_s: float = 10.0,
    say: Callable[[str], None] = print,
    on_started: Callable[[], None] | None = None,
    mqtt_url: str | None = None,
) -> tuple[Stats, RigConfig]:
    """Run the demo's vessels live to the end of the longest scenario (or SIGINT/SIGTERM);
    return the service's counters and configuration.

    The first vessel's figures are said every ``every_s`` simulated seconds. Every
    vessel's scenario starts at the same instant; ``mqtt_url`` is the broker of the
    vessels that come ``via`` MQTT.
    """
    common = vessels[0].scenario.start_epoch_s
    vessels = [replace(v, scenario=replace(demo_scenario(v.scenario) if v.via != "mqtt"
                                           else v.scenario, start_epoch_s=common))
               for v in vessels]  # fmt: skip
    duration_s = max(v.scenario.duration_s for v in vessels)
    step_s = min(v.scenario.sample_interval_s for v in vessels)
    last_t = await asyncio.to_thread(last_sample_t, log_path)
    start_s, capped = demo_start_s(time.time(), duration_s, speed, last_t)
    if start_s > time.time():
        raise EbullioError(
            f"{log_path}: its newest reading ({iso_utc(last_t or 0.0)}) is later than now, "
            "so a demo's readings cannot follow it without being stamped in the future; "
            "give another --log"
        )
    if capped:
        say(f"demo: {log_path} has readings up to {iso_utc(last_t or 0.0)}, so this run starts "
            "after them and runs no faster than real time until it is behind the clock "
            "(for full speed give another --log)")  # fmt: skip
    # simulated time starts when the rigs do, once the service is listening; until
    # then the clock stands at the start (the meters read zeros)
    base = {"wall": start_s, "mono": time.monotonic(), "speed": 0.0}
    # Once the rigs run, the clock follows the loggers: it is the simulated time of the
    # instant last written plus the real time since then at speed, but never past the
    # next instant. A busy machine that makes the loggers late makes the clock late
    # too, so the meters' readings keep their place between the loggers' lines.
    written: dict[str, float] = {}

    def sim_now() -> float:
        if "t" in written:
            ahead = (time.monotonic() - written["mono"]) * speed
            now = written["t"] + min(ahead, 0.999 * step_s)
        else:
            now = base["wall"] + (time.monotonic() - base["mono"]) * base["speed"]
        return min(now, time.time())  # never ahead of the wall clock

    # A real meter's energy counter climbs through an interval, so each counter is set
    # at each read from the power of the interval under way (not held as a step).
    ramps: dict[int, dict[str, float]] = {}

    def energy_now(i: int) -> Callable[[PowerMeterEmulator], None]:
        def read(meter: PowerMeterEmulator) -> None:
            ramp = ramps.get(i, {})
            if "end_t" in ramp:
                interval_s = vessels[i].scenario.sample_interval_s
                to_go_s = min(max(ramp["end_t"] - sim_now(), 0.0), interval_s)
                meter.update(energy_wh=ramp["end_wh"] - ramp["power_w"] * to_go_s / 3600.0)

        return read

    rigs = [SimulatedRig(v.scenario, seed=v.seed, source="demo") for v in vessels]
    ptys = {i: open_pty_pair() for i, v in enumerate(vessels) if v.via != "mqtt"}
    # four polls per sample interval: one always lands well inside each interval, away
    # from the instants where the line is written and the meter changes
    poll_s = step_s / speed / 4.0
    last_said = -1e18
    try:
        async with contextlib.AsyncExitStack() as stack:
            meters = {
                i: await stack.enter_async_context(
                    PowerMeterEmulator("modbus+tcp://127.0.0.1:0", on_read=energy_now(i))
                )
                for i, v in enumerate(vessels)
                if v.via == "bench"
            }
            ports = {i: path for i, (_, path) in ptys.items()}
            urls = {i: m.url for i, m in meters.items()}
            text = demo_config_text(vessels, ports, urls, poll_s, mqtt_url)
            config = parse_config(text, "<demo configuration>", {})
            watched = vessels[0].scenario.vessel

            def on_estimate(m: dict[str, object]) -> None:
                nonlocal last_said
                if m.get("vessel") != watched:
                    return
                elapsed = max(float(m["t"]) - base["wall"], 0.0)  # type: ignore[arg-type]
                if elapsed - last_said >= every_s:
                    last_said = elapsed
                    say(_line(elapsed, m))

            publish = None
            if mqtt_url is not None:
                publish = await stack.enter_async_context(_ReadingPublisher(mqtt_url))
            service = Service(config, log_path, clock=sim_now, on_estimate=on_estimate)
            loop = asyncio.get_running_loop()
            stopping = asyncio.Event()
            for signum in (signal.SIGINT, signal.SIGTERM):
                loop.add_signal_handler(signum, stopping.set)
            task = asyncio.create_task(service.run(), name="service")
            try:
                await service.started.wait()
                if on_started is not None:
                    on_started()  # the log exists now: the board can open it
                await asyncio.sleep(0.5)  # let the serial drivers open their ports first
                clock = PacedClock(speed)
                loggers = {i: LineLoggerEmulator(rigs[i], fd, clock) for i, (fd, _) in ptys.items()}
                base.update(wall=sim_now(), mono=time.monotonic(), speed=speed)
                shift_s = base["wall"] - common
                # The rig's power sample at an instant is the mean over the interval that
                # ends there; a meter shows the power flowing now. So at each instant a
                # meter is given the next instant's power (the interval now starting),
                # and a poll inside an interval reads that interval's power.
                streams = [_instants(i, rig) for i, rig in enumerate(rigs)]
                for at_s, i, batch, upcoming in heapq.merge(*streams, key=lambda e: e[:2]):
                    await clock.wait_until(at_s)
                    ahead_s = base["wall"] + at_s - time.time()
                    if ahead_s > 0.0:  # never a reading stamped ahead of the wall clock
                        await asyncio.sleep(ahead_s)
                    clock.slip(at_s)  # a stall pauses the rigs rather than bunching lines
                    if stopping.is_set() or task.done():
                        break
                    via = vessels[i].via
                    if via == "mqtt" and publish is not None and batch:
                        await publish.reading(batch, shift_s)
                    elif via != "mqtt":
                        line = [s for s in batch if via == "logger" or s.channel in LOGGER_CHANNELS]
                        if line:
                            await loggers[i].write(render_line(line, "keyvalue", shift_s))
                    written.update(t=common + at_s + shift_s, mono=time.monotonic())
                    if via == "bench" and upcoming is not None:
                        _feed(upcoming, meters[i], ramps.setdefault(i, {}), shift_s)
                await asyncio.sleep(max(0.3, 3 * poll_s))  # the last lines and polls get through
            finally:
                service.stop()
                stats = await task
                for signum in (signal.SIGINT, signal.SIGTERM):
                    loop.remove_signal_handler(signum)
    finally:
        for fd, _ in ptys.values():
            with contextlib.suppress(OSError):
                os.close(fd)
    return stats, config


def _instants(
    index: int, rig: SimulatedRig
) -> Iterator[tuple[float, int, list[Sample], list[Sample] | None]]:
    """Yield (simulated s, ``index``, the instant's samples, the next instant's or None)."""
    instants = ((rig.elapsed_s, batch) for batch in rig.run())
    at_s, batch = next(instants)
    for next_at_s, upcoming in instants:
        yield at_s, index, batch, upcoming
        at_s, batch = next_at_s, upcoming
    yield at_s, index, batch, None


#: The topic prefix of the demo's own broker.
MQTT_PREFIX = "ebullio-demo"


class _ReadingPublisher:
    """Publishes a simulated instrument's instants as ``reading`` messages (QoS 1)."""

    def __init__(self, url: str) -> None:
        import aiomqtt

        from drivers.mqtt import parse_mqtt_url

        broker = parse_mqtt_url(url)
        self._client = aiomqtt.Client(broker.host, broker.port, identifier="ebullio-demo-heaters")
        self._client.pending_calls_threshold = 10_000

    async def __aenter__(self) -> _ReadingPublisher:
        await self._client.__aenter__()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self._client.__aexit__(*exc)  # type: ignore[arg-type]

    async def reading(self, batch: list[Sample], shift_s: float) -> None:
        payload = {"t": batch[0].t + shift_s}
        payload |= {CHANNEL_COLUMNS[s.channel]: s.value for s in batch if s.value == s.value}
        topic = f"{MQTT_PREFIX}/{batch[0].vessel}/reading"
        await self._client.publish(topic, json.dumps(payload).encode(), qos=1)


def _feed(
    batch: list[Sample], meter: PowerMeterEmulator, ramp: dict[str, float], shift_s: float
) -> None:
    """Hold the instant's power meter readings in the simulated meter's registers.

    The energy counter's value at the instant and the interval's mean power go to
    ``ramp`` (the counter is set from them at each read); the rest is held as is.
    """
    values = {METER_KEYS[s.channel]: s.value for s in batch if s.channel in METER_KEYS}
    if "energy_wh" in values and "power_w" in values and batch:
        ramp.update(end_t=batch[0].t + shift_s, end_wh=values.pop("energy_wh"),
                    power_w=values["power_w"])  # fmt: skip
    if values:
        meter.update(**values)
