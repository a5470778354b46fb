"""The demo's live part with no broker: a heater comes in through a simulated line logger
on a pseudo-terminal (the real serial driver), beside a kettle on its bench (a logger and
a Modbus TCP meter on 127.0.0.1), both into one verified log."""

from __future__ import annotations

import asyncio
from dataclasses import replace
from itertools import pairwise

from drivers.simworld.site import HEATER_INTERVAL_S, demo_site
from monitor.records.recorder import read_estimates, read_samples, read_vessels, verify
from monitor.rig.demo import DemoVessel, run_live


def test_a_heater_through_a_line_logger_and_a_kettle_on_its_bench(tmp_path) -> None:
    plans = {p.vessel: p for p in demo_site()}
    kettle, heater = plans["bench-a"], plans["flat-01"]

    def live(plan, via: str, duration_s: float) -> DemoVessel:
        scenario = plan.scenario(60.0, 0.0, len(plan.run_days))
        return DemoVessel(replace(scenario, duration_s=duration_s), plan.seed, via,
                          plan.metadata())  # fmt: skip

    vessels = [live(kettle, "bench", 120.0), live(heater, "logger", 300.0)]
    log = tmp_path / "live.sqlite"
    said: list[str] = []
    stats, config = asyncio.run(run_live(vessels, str(log), 60.0, 1000.0, said.append))
    assert config.mqtt is None
    assert verify(log)["ok"] is True
    assert set(read_vessels(log)) == {"bench-a", "flat-01"}
    by_vessel: dict[str, set[str]] = {}
    for s in read_samples(log):
        by_vessel.setdefault(s.vessel, set()).add(s.channel)
    # the heater's logger line carries its meter channels too; the kettle's go by Modbus
    assert {"water", "element", "ambient", "power", "energy"} <= by_vessel["flat-01"]
    assert {"water", "element", "power", "energy"} <= by_vessel["bench-a"]
    for vessel in ("bench-a", "flat-01"):
        assert any(True for _ in read_estimates(log, vessel)), vessel
    assert stats.quarantined == 0
    assert said  # the first vessel's figures were said
    # the heater's readings were stamped on its sample grid (our own scenario's 10 s), as
    # its logger printed them (a reading the simulated sensor dropped leaves a double step)
    times = sorted({s.t for s in read_samples(log, "flat-01") if s.channel == "water"})
    assert len(times) >= 25
    step_s = HEATER_INTERVAL_S
    steps = [b - a for a, b in pairwise(times)]
    assert all(abs(d / step_s - round(d / step_s)) < 1e-6 and d >= step_s - 1e-6 for d in steps)
