"""Tests of opening sources from URLs."""

from __future__ import annotations

import asyncio

import pytest

from drivers.errors import ConfigError
from drivers.simulator import FastClock, SimulatedRigDriver
from drivers.sources import open_source


def test_sim_url_opens_the_simulated_rig():
    driver = open_source("sim://?scenario=kettle&seed=2&duration_s=5", clock=FastClock())
    assert isinstance(driver, SimulatedRigDriver)

    async def channels():
        async with driver as d:
            return {s.channel async for s in d.samples()}

    assert {"water", "element", "ambient", "power"} <= asyncio.run(channels())


def test_unknown_scheme_names_the_known_ones():
    with pytest.raises(ConfigError, match=r"known schemes: sim://"):
        open_source("telnet://rig:23")
