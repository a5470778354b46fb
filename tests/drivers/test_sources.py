"""Tests of opening sources from URLs."""

from __future__ import annotations

import asyncio

import pytest

from drivers.errors import ConfigError
from drivers.registry import open_source
from drivers.sim import SimulatedRigDriver
from drivers.simworld import FastClock


def test_sim_url_opens_the_simulated_rig():
    driver = open_source("sim://?scenario=kettle&seed=2&duration_s=5", clock=FastClock())
    assert isinstance(driver, SimulatedRigDriver)

    async def channels():
        async with driver as d:
            return {s.channel async for s in d.samples()}

    assert {"water", "element", "ambient", "power"} <= asyncio.run(channels())


def test_unknown_scheme_names_the_known_ones():
    with pytest.raises(ConfigError, match=r"known schemes: .*serial://, sim://"):
        open_source("telnet://rig:23")


def test_every_registered_scheme_names_a_driver_class_that_exists():
    from drivers.registry import DRIVERS, driver_kind

    for schemes in DRIVERS.values():
        for scheme in schemes:
            cls = driver_kind(f"{scheme}://somewhere").factory
            assert callable(cls), scheme
            assert hasattr(cls, "samples"), scheme


def test_a_modbus_url_opens_the_meter_driver_with_its_options():
    from drivers.channels import ChannelBinding
    from drivers.modbus import ModbusMeterDriver
    from drivers.registers import RegisterSpec

    driver = open_source(
        "modbus+tcp://127.0.0.1:5020?unit=1",
        registers=[RegisterSpec(name="power", address=0, type="float32", unit="W")],
        bindings=[ChannelBinding("power", "k1", "power", "W")],
    )
    assert isinstance(driver, ModbusMeterDriver)
