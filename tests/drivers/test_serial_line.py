"""Tests of the serial line driver over real pseudo-terminals, fed by the simulated logger."""

from __future__ import annotations

import asyncio
import contextlib
import os
import time
from collections.abc import AsyncIterator, Iterator
from dataclasses import replace
from pathlib import Path

import pytest

from drivers import serial_line
from drivers.channels import ChannelBinding, Quarantined
from drivers.emulators.line_logger import (
    LineLoggerEmulator,
    logger_bindings,
    open_pty_pair,
    render_line,
)
from drivers.errors import ConfigError, DriverError
from drivers.framing import LineSpec
from drivers.sample import Quality, Sample
from drivers.serial_line import SerialLineDriver, parse_serial_url
from drivers.simworld import FastClock, PacedClock, Scenario, SimulatedRig, kettle_scenario

SEED = 7
#: Every test's own bound on waiting for the pty, s (each finishes far sooner).
WAIT_S = 10.0


def _raw_kettle(duration_s: float) -> Scenario:
    """Return the kettle with raw type K millivolts for its water and element sensors."""
    base = kettle_scenario(duration_s=duration_s)
    sensors = dict(base.sensors)
    for role in ("water", "element"):
        sensors[role] = replace(sensors[role], raw_tc_type="K")
    return replace(base, sensors=sensors)


def _plain_twin(scenario: Scenario) -> Scenario:
    """Return the same scenario reporting °C: same seed, same random draws, same readings."""
    sensors = {role: replace(spec, raw_tc_type=None) for role, spec in scenario.sensors.items()}
    return replace(scenario, sensors=sensors)


def _late_clock(scenario: Scenario) -> float:
    """Return a fixed receipt time an hour after the scenario starts (Unix s)."""
    return scenario.start_epoch_s + 3600.0


class Pty:
    """A pty master end that a test can close ("unplug") once; closed at teardown too."""

    def __init__(self) -> None:
        self.master_fd, self.slave_path = open_pty_pair()

    def unplug(self) -> None:
        if self.master_fd >= 0:
            os.close(self.master_fd)
            self.master_fd = -1


@pytest.fixture
def pty() -> Iterator[Pty]:
    p = Pty()
    yield p
    p.unplug()


async def _take(driver: SerialLineDriver, count: int) -> list[Sample | Quarantined]:
    """Return the next ``count`` items the driver yields."""
    out: list[Sample | Quarantined] = []
    if count == 0:
        return out
    async with contextlib.aclosing(driver.samples()) as items:
        async for item in items:
            out.append(item)
            if len(out) == count:
                break
    return out


@contextlib.asynccontextmanager
async def _running(emulator: LineLoggerEmulator, **kwargs: object) -> AsyncIterator[asyncio.Task]:
    """Run the emulator as a task; make sure it has ended when the block is left."""
    task = asyncio.create_task(emulator.run(**kwargs), name="line-logger")  # type: ignore[arg-type]
    try:
        yield task
    finally:
        if not task.done():
            task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task


# ---------------------------------------------------------------------------
# The logger's lines (pure)
# ---------------------------------------------------------------------------


def test_render_line_keyvalue_and_csv() -> None:
    t = 1767225600.0
    batch = [
        Sample(t, "k1", "water_emf", 3.412),
        Sample(t, "k1", "cold_junction", 21.43),
        Sample(t, "k1", "ambient", 20.1),
        Sample(t, "k1", "power", 2201.5),
    ]
    assert render_line(batch) == (
        b"t=1767225600.000 water_mv=3.412 cj_c=21.43 ambient_c=20.1 power_w=2201.5\r\n"
    )
    assert render_line(batch, "csv", time_shift_s=0.25) == (
        b"1767225600.250,3.412,,,,21.43,,,20.1,,2201.5,,,\r\n"
    )
    with pytest.raises(ValueError, match="empty batch"):
        render_line([])
    with pytest.raises(ValueError, match="one vessel at one instant"):
        render_line([*batch, Sample(t + 1.0, "k1", "water_emf", 3.5)])
    with pytest.raises(ValueError, match="unknown line style"):
        render_line(batch, "xml")


@pytest.mark.parametrize("style", ["keyvalue", "csv"])
def test_logger_bindings_parse_what_the_logger_prints(style: str) -> None:
    from drivers.channels import bind_fields
    from drivers.framing import instrument_time, parse_line

    rig = SimulatedRig(_raw_kettle(5.0), SEED)
    spec, bindings = logger_bindings("kettle-1", "K", style)
    for batch in rig.run():
        line = render_line(batch, style).removesuffix(b"\r\n")
        fields = parse_line(line, spec)
        t = instrument_time(fields, spec, batch[0].t)
        samples, problems = bind_fields(fields, bindings, t, "test")
        assert problems == []
        assert t == batch[0].t
        # one sample per reading: <role>_emf comes back as <role>, in °C
        assert sorted(s.channel.removesuffix("_emf") for s in batch) == sorted(
            s.channel for s in samples
        )


# ---------------------------------------------------------------------------
# URLs
# ---------------------------------------------------------------------------


def test_serial_url_options() -> None:
    s = parse_serial_url("serial:///dev/ttyUSB0")
    assert (s.port, s.baud, s.parity, s.bytesize, s.stopbits) == ("/dev/ttyUSB0", 9600, "N", 8, 1)
    s = parse_serial_url("serial:///dev/ttyS1?baud=115200&parity=e&bytesize=7&stopbits=1.5")
    assert (s.port, s.baud, s.parity, s.bytesize, s.stopbits) == ("/dev/ttyS1", 115200, "E", 7, 1.5)


@pytest.mark.parametrize(
    ("url", "message"),
    [
        (
            "serial:///dev/ttyUSB0?speed=9600",
            "unknown option 'speed'; known options: baud, bytesize",
        ),
        ("serial:///dev/ttyUSB0?baud=fast", "baud must be a whole number"),
        ("serial:///dev/ttyUSB0?baud=0", "baud must be positive"),
        ("serial:///dev/ttyUSB0?parity=X", "parity must be one of N, E, O, M, S"),
        ("serial:///dev/ttyUSB0?bytesize=9", "bytesize must be one of 5, 6, 7, 8"),
        ("serial:///dev/ttyUSB0?stopbits=3", "stopbits must be one of 1, 1.5, 2"),
        ("serial:///dev/ttyUSB0?baud=1&baud=2", "given more than once"),
        ("serial://dev/ttyUSB0", "three slashes"),
        ("serial://", "no port path"),
        ("mqtt://127.0.0.1/x", "not a serial:// URL"),
    ],
)
def test_serial_url_errors(url: str, message: str) -> None:
    with pytest.raises(ConfigError, match=message):
        parse_serial_url(url)


def test_driver_refuses_bad_options() -> None:
    spec, bindings = logger_bindings("k1", "K")
    with pytest.raises(ConfigError, match="no channel bindings"):
        SerialLineDriver("serial:///dev/null", spec=spec, bindings=[])
    with pytest.raises(ConfigError, match="silence_s"):
        SerialLineDriver("serial:///dev/null", spec=spec, bindings=bindings, silence_s=0.0)


# ---------------------------------------------------------------------------
# Over a real pty
# ---------------------------------------------------------------------------


def test_temperatures_round_trip_through_the_pty(pty: Pty) -> None:
    scenario = _raw_kettle(300.0)  # heats from 15 °C, boils after ~200 s, switches off
    truth = list(SimulatedRig(_plain_twin(scenario), SEED).run())
    raw = list(SimulatedRig(scenario, SEED).run())
    expected = {(s.t, s.channel.removesuffix("_emf")): s for batch in raw for s in batch}
    truth_by_key = {(s.t, s.channel): s.value for batch in truth for s in batch}
    spec, bindings = logger_bindings(scenario.vessel, "K")
    url = f"serial://{pty.slave_path}?baud=115200"

    async def main() -> list[Sample | Quarantined]:
        rig = SimulatedRig(scenario, SEED)
        driver = SerialLineDriver(
            url, spec=spec, bindings=bindings, clock=lambda: _late_clock(scenario)
        )
        async with asyncio.timeout(WAIT_S), driver:
            emulator = LineLoggerEmulator(rig, pty.master_fd, FastClock())
            async with _running(emulator) as task:
                got = await _take(driver, len(expected))
                assert await task == len(raw)
            return got

    got = asyncio.run(main())
    assert not [q for q in got if isinstance(q, Quarantined)]
    samples = [s for s in got if isinstance(s, Sample)]
    assert {(s.t, s.channel) for s in samples} == set(expected)  # instrument time honoured
    assert all(s.source == url and s.quality == Quality.OK for s in samples)
    hottest_c = 0.0
    for s in samples:
        if s.channel in ("water", "element"):
            # 1 µV rounding of the EMF is 0.012 K at ~41 µV/K (type K Seebeck coefficient,
            # derivative of the NIST SRD 60 reference function) and 0.01 K rounding of the
            # cold junction 0.005 K: 0.05 K bounds the round trip with room for the inverse
            # polynomial.
            assert s.value == pytest.approx(truth_by_key[(s.t, s.channel)], abs=0.05)
            hottest_c = max(hottest_c, s.value)
        else:
            # values in their own unit travel as exact decimal text
            assert s.value == expected[(s.t, s.channel)].value
    assert hottest_c > 99.0  # the check covered the whole heat-up, not just cold water


def test_corrupt_lines_are_quarantined_and_the_stream_goes_on(pty: Pty) -> None:
    scenario = _raw_kettle(20.0)
    raw = list(SimulatedRig(scenario, SEED).run())
    t0 = scenario.start_epoch_s
    overlong = b"x" * 1500 + b"\r\n"
    inject = {
        2: b"t=%.3f water_mv=abc cj_c=24.0\r\n" % (t0 + 2.5),
        4: b"\xff\xfe garbage\r\n",
        6: b"LOGGER READY\r\n",
        8: b"t=1767225608 t=1767225609\r\n",
        10: overlong,
        12: b"t=2999999999 ambient_c=20.0\r\n",
        14: b"t=%.3f humidity_pct=40\r\n" % (t0 + 14.5),
        16: b"1767225616,2,3\r\n",
    }
    spec, bindings = logger_bindings(scenario.vessel, "K")
    url = f"serial://{pty.slave_path}"
    n_good = sum(len(batch) for batch in raw)
    # one Quarantined item per bad line, two for the over-long one, one extra Sample
    # (the cold junction of the line whose water_mv is not a number)
    n_items = n_good + len(inject) + 1 + 1

    async def main() -> list[Sample | Quarantined]:
        driver = SerialLineDriver(
            url, spec=spec, bindings=bindings, clock=lambda: _late_clock(scenario)
        )
        async with asyncio.timeout(WAIT_S), driver:
            emulator = LineLoggerEmulator(SimulatedRig(scenario, SEED), pty.master_fd, FastClock())
            async with _running(emulator, inject=inject) as task:
                got = await _take(driver, n_items)
                await task
            return got

    got = asyncio.run(main())
    quarantined = [q for q in got if isinstance(q, Quarantined)]
    reasons = [q.reason for q in quarantined]
    expected_reasons = [
        "field 'water_mv': 'abc' is not a plain decimal number",
        "not valid UTF-8 at byte 0",
        "token 1 'LOGGER' has no '='",
        "key 't' appears more than once",
        "line longer than 1024 bytes: part 1",
        "line longer than 1024 bytes: part 2",
        "after receipt, more than the 300 s allowed",
        "no bound field in the line (fields found: humidity_pct, t)",
        "token 1 '1767225616' has no '='",
    ]
    assert len(reasons) == len(expected_reasons)
    for reason, wanted in zip(reasons, expected_reasons, strict=True):
        assert wanted in reason
    # the raw bytes are kept as they came (line endings removed; the over-long line whole)
    assert quarantined[0].raw == inject[2].removesuffix(b"\r\n")
    assert quarantined[1].raw == inject[4].removesuffix(b"\r\n")
    assert quarantined[4].raw + quarantined[5].raw == overlong.removesuffix(b"\n")
    # instant 2 is the third reading line; the injected line before it is line 3
    assert quarantined[0].where == f"{pty.slave_path} line 3"
    assert all(q.source == url and q.t == _late_clock(scenario) for q in quarantined)
    # every good reading still came through, the ones after each bad line included
    samples = [s for s in got if isinstance(s, Sample)]
    good_keys = {(s.t, s.channel.removesuffix("_emf")) for batch in raw for s in batch}
    assert good_keys <= {(s.t, s.channel) for s in samples}
    assert max(s.t for s in samples) == raw[-1][0].t


def test_unplugging_raises_driver_error_and_keeps_the_unfinished_line(pty: Pty) -> None:
    scenario = _raw_kettle(3.0)
    n_good = sum(len(batch) for batch in SimulatedRig(scenario, SEED).run())
    spec, bindings = logger_bindings(scenario.vessel, "K")

    async def main() -> tuple[list[Sample | Quarantined], DriverError, float]:
        driver = SerialLineDriver(
            f"serial://{pty.slave_path}",
            spec=spec,
            bindings=bindings,
            clock=lambda: _late_clock(scenario),
        )
        got: list[Sample | Quarantined] = []
        async with asyncio.timeout(WAIT_S), driver:
            emulator = LineLoggerEmulator(SimulatedRig(scenario, SEED), pty.master_fd, FastClock())
            async with _running(emulator) as task:
                got += await _take(driver, n_good)
                await task
            before = driver.bytes_received
            await emulator.write(b"t=17672256")  # the cable is pulled mid-line
            while driver.bytes_received < before + 10:  # until the port has read it
                await asyncio.sleep(0.001)
            pty.unplug()
            started = time.monotonic()

            async def drain() -> None:
                async with contextlib.aclosing(driver.samples()) as items:
                    async for item in items:
                        got.append(item)

            with pytest.raises(DriverError) as info:
                await drain()
            with pytest.raises(DriverError, match="lost"):  # asked again: at once, no hang
                await _take(driver, 1)
            return got, info.value, time.monotonic() - started

    got, error, waited_s = asyncio.run(main())
    assert waited_s < 2.0  # bounded: the hang-up is seen at once, not after a timeout
    assert pty.slave_path in str(error)
    assert "lost" in str(error)
    assert sum(isinstance(s, Sample) for s in got) == n_good
    (last,) = [q for q in got if isinstance(q, Quarantined)]
    assert last.raw == b"t=17672256"
    assert "unfinished line" in last.reason


def test_replug_through_the_same_symlink(tmp_path: Path) -> None:
    link = tmp_path / "kettle-logger"
    url = f"serial://{link}?baud=9600"
    scenario = _raw_kettle(2.0)
    n_good = sum(len(batch) for batch in SimulatedRig(scenario, SEED).run())
    spec, bindings = logger_bindings(scenario.vessel, "K")
    first, second = Pty(), Pty()
    try:
        link.symlink_to(first.slave_path)

        async def session(p: Pty) -> SerialLineDriver:
            driver = SerialLineDriver(
                url, spec=spec, bindings=bindings, clock=lambda: _late_clock(scenario)
            )
            async with asyncio.timeout(WAIT_S), driver:
                emulator = LineLoggerEmulator(
                    SimulatedRig(scenario, SEED), p.master_fd, FastClock()
                )
                async with _running(emulator):
                    got = await _take(driver, n_good)
                assert len(got) == n_good
                assert all(isinstance(s, Sample) and s.source == url for s in got)
                p.unplug()
                with pytest.raises(DriverError, match="lost"):
                    await _take(driver, 1)
            return driver

        async def main() -> None:
            old = await session(first)
            # the device comes back as another pty; udev-style, the same name points at it
            staged = tmp_path / "staged-link"
            staged.symlink_to(second.slave_path)
            staged.replace(link)
            await session(second)
            # an instance is used once: the supervisor builds a new one
            with pytest.raises(DriverError, match="used once"):
                async with old:
                    pass

        asyncio.run(main())
    finally:
        first.unplug()
        second.unplug()


def test_opening_a_missing_port_raises_driver_error(tmp_path: Path) -> None:
    spec, bindings = logger_bindings("k1", "K")
    missing = tmp_path / "no-such-tty"

    async def main() -> None:
        async with SerialLineDriver(f"serial://{missing}", spec=spec, bindings=bindings):
            pass

    with pytest.raises(DriverError, match=f"cannot open serial port {missing}"):
        asyncio.run(main())


def test_samples_outside_async_with_is_an_error() -> None:
    spec, bindings = logger_bindings("k1", "K")
    driver = SerialLineDriver("serial:///dev/null", spec=spec, bindings=bindings)

    async def main() -> None:
        await _take(driver, 1)

    with pytest.raises(DriverError, match="inside 'async with'"):
        asyncio.run(main())


def test_a_silent_port_raises_after_silence_s(pty: Pty) -> None:
    spec, bindings = logger_bindings("k1", "K")

    async def main() -> float:
        driver = SerialLineDriver(
            f"serial://{pty.slave_path}", spec=spec, bindings=bindings, silence_s=0.2
        )
        async with asyncio.timeout(WAIT_S), driver:
            started = time.monotonic()
            with pytest.raises(DriverError, match=r"no data for 0\.2 s"):
                await _take(driver, 1)
            return time.monotonic() - started

    assert 0.15 < asyncio.run(main()) < 2.0


def test_receipt_time_and_iso_instrument_time(pty: Pty) -> None:
    binding = [ChannelBinding("ambient_c", "k1", "ambient", "degC")]
    lines = b"ambient_c=20.5\r\nt=2026-01-01T00:00:05+00:00 ambient_c=20.6\r\n"

    async def main(spec: LineSpec) -> list[Sample | Quarantined]:
        driver = SerialLineDriver(
            f"serial://{pty.slave_path}", spec=spec, bindings=binding, clock=lambda: 1767229200.0
        )
        async with asyncio.timeout(WAIT_S), driver:
            os.write(pty.master_fd, lines)
            return await _take(driver, 2)

    # without a time field every line is stamped with the driver's clock at receipt
    untimed = asyncio.run(main(LineSpec("keyvalue")))
    assert [(s.t, s.value) for s in untimed] == [(1767229200.0, 20.5), (1767229200.0, 20.6)]
    # with one, the instrument's stamp wins and a line without it is quarantined
    timed = asyncio.run(main(LineSpec("keyvalue", time_field="t")))
    assert isinstance(timed[0], Quarantined)
    assert "time field 't' is missing" in timed[0].reason
    assert isinstance(timed[1], Sample)
    assert (timed[1].t, timed[1].value) == (1767225605.0, 20.6)  # 2026-01-01T00:00:05Z


def test_paced_logger_stamps_lines_with_its_clock(pty: Pty) -> None:
    scenario = _raw_kettle(4.0)
    n_good = sum(len(batch) for batch in SimulatedRig(scenario, SEED).run())
    spec, bindings = logger_bindings(scenario.vessel, "K", "csv")

    async def main() -> tuple[list[Sample | Quarantined], float]:
        driver = SerialLineDriver(f"serial://{pty.slave_path}", spec=spec, bindings=bindings)
        async with asyncio.timeout(WAIT_S), driver:
            clock = PacedClock(speed=40.0)  # 4 simulated s in 0.1 s
            emulator = LineLoggerEmulator(
                SimulatedRig(scenario, SEED), pty.master_fd, clock, style="csv"
            )
            async with _running(emulator):
                got = await _take(driver, n_good)
            return got, clock.start_epoch_s()

    got, start_s = asyncio.run(main())
    assert all(isinstance(s, Sample) for s in got)
    # the csv logger's clock starts at the paced clock's start, one line per simulated second
    times = sorted({s.t for s in got})
    assert times == pytest.approx([start_s + k for k in range(5)], abs=0.0005)  # t has 3 decimals


def test_backpressure_loses_nothing(pty: Pty, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(serial_line, "MAX_QUEUED_CHUNKS", 2)
    monkeypatch.setattr(serial_line, "READ_SIZE", 256)
    scenario = _raw_kettle(200.0)
    n_good = sum(len(batch) for batch in SimulatedRig(scenario, SEED).run())
    spec, bindings = logger_bindings(scenario.vessel, "K")

    async def main() -> list[Sample | Quarantined]:
        driver = SerialLineDriver(
            f"serial://{pty.slave_path}",
            spec=spec,
            bindings=bindings,
            clock=lambda: _late_clock(scenario),
        )
        async with asyncio.timeout(WAIT_S), driver:
            emulator = LineLoggerEmulator(SimulatedRig(scenario, SEED), pty.master_fd, FastClock())
            async with _running(emulator) as task:
                await asyncio.sleep(0.2)  # a slow consumer: the pty fills, the writer waits
                assert not task.done()
                got = await _take(driver, n_good)
                await task
            return got

    got = asyncio.run(main())
    assert len(got) == n_good
    assert all(isinstance(s, Sample) for s in got)
