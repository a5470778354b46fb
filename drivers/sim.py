"""The simulated rig as a driver: ``sim://`` URLs open :class:`SimulatedRigDriver`.

The world it simulates (scenarios, physics, sensors, clocks) is the package
:mod:`drivers.simworld`; this module is only its face as a sample source. The URL's
options are :func:`drivers.simworld.scenarios.parse_sim_url`'s.
"""

from __future__ import annotations

from collections.abc import AsyncIterator
from dataclasses import replace

from drivers.errors import DriverError
from drivers.registry import DriverKind
from drivers.sample import Sample
from drivers.simworld import (
    Clock,
    FastClock,
    PacedClock,
    Scenario,
    SimulatedRig,
    parse_sim_url,
)


class SimulatedRigDriver:
    """The simulated rig behind the driver interface.

    ``async with SimulatedRigDriver("sim://?seed=7") as rig: async for s in rig.samples():``
    yields every sample of the scenario, then stops. The clock is injected; by
    default a ``speed`` option in the URL paces it, otherwise it runs flat out.
    A ``scenario`` given here replaces the one the URL names (the seed stays).
    """

    def __init__(
        self, url: str, clock: Clock | None = None, scenario: Scenario | None = None
    ) -> None:
        parsed, seed, speed = parse_sim_url(url)
        scenario = scenario or parsed
        self.clock: Clock = clock or (PacedClock(speed) if speed else FastClock())
        epoch = self.clock.start_epoch_s()
        if epoch is not None:
            scenario = replace(scenario, start_epoch_s=epoch)
        self.rig = SimulatedRig(scenario, seed, source=url)
        self._open = False

    async def __aenter__(self) -> SimulatedRigDriver:
        self._open = True
        return self

    async def __aexit__(self, *exc: object) -> None:
        self._open = False

    async def samples(self) -> AsyncIterator[Sample]:
        """Yield samples as the clock allows, until the scenario ends."""
        if not self._open:
            raise DriverError("use the driver inside 'async with'")
        for batch in self.rig.run():
            await self.clock.wait_until(self.rig.elapsed_s)
            for sample in batch:
                yield sample


#: The driver registry's entry (drivers/registry.py). Opened from code and tests only:
#: no configuration table names a ``sim://`` URL (``ebullio demo`` and ``simulate``
#: drive the rig themselves).
DRIVER = DriverKind("sim", ("sim",), SimulatedRigDriver)
