"""The simulated rig's instruments: what its sensors read of the true world.

Each :class:`~drivers.simworld.scenarios.SensorSpec` gives a sensor's first-order lag
(stepped exactly at every sub-step of the world), noise (a fixed sd plus a fraction
of the reading), quantisation, dropouts, spikes and a calibration offset, and may
report raw thermocouple millivolts (channel ``<role>_emf``, with a ``cold_junction``
channel from a terminal block a little above the room). A power meter reports the
mean power over its interval, from the energy counter.

Every reading draws the same random numbers, a dropout included, so a dropout does
not shift later noise; they come from the rig's one generator, as the world's do.
"""

from __future__ import annotations

import math

import numpy as np

from drivers import thermocouple
from drivers.sample import Quality, Sample
from drivers.simworld.physics import World
from drivers.simworld.scenarios import SensorSpec

#: Roles whose sensors lag the truth (the temperatures); the others read it at once.
LAGGED_ROLES = ("water", "element", "ambient", "wall")


class Instruments:
    """The sensors of one simulated vessel: ``read()`` gives their samples now.

    ``lagged`` holds each sensor's lagged true value; :meth:`lag` moves it on. Samples
    carry ``source`` (the rig's ``sim://`` URL).
    """

    def __init__(self, world: World, rng: np.random.Generator, source: str) -> None:
        self._world = world
        self._rng = rng
        self.source = source
        #: sensor states: lagged true values, per role
        self.lagged = {role: world.true_value(role) for role in world.scenario.sensors}
        self._last_energy_j = 0.0
        self._last_read_s = 0.0

    def lag(self, h: float) -> None:
        """Move the lagging sensors on by ``h`` seconds towards the world's true values."""
        for role, spec in self._world.scenario.sensors.items():
            if spec.tau_s > 0.0 and role in LAGGED_ROLES:
                a = -math.expm1(-h / spec.tau_s)
                self.lagged[role] += a * (self._world.true_value(role) - self.lagged[role])

    def _measure(self, role: str, spec: SensorSpec, interval_s: float) -> float | None:
        """Return one reading in the role's unit, or None for a dropout."""
        rng = self._rng
        # draw every random number on every call, so a dropout does not shift later noise
        u_drop, u_spike, noise, sign = (
            rng.random(),
            rng.random(),
            rng.standard_normal(),
            rng.random(),
        )
        if role == "power":
            # a power meter reports the average over its interval
            energy_j = self._world.state.energy_in_j
            true = (energy_j - self._last_energy_j) / interval_s if interval_s else 0.0
        elif role in LAGGED_ROLES and spec.tau_s > 0.0:
            true = self.lagged[role]
        else:
            true = self._world.true_value(role)
        if u_drop < spec.dropout_probability:
            return None
        value = (
            true + spec.offset + (spec.noise_sd + spec.noise_fraction * abs(true)) * float(noise)
        )
        if u_spike < spec.spike_probability:
            value += spec.spike_size if sign < 0.5 else -spec.spike_size
        if role in ("power", "current", "energy"):
            value = max(value, 0.0)
        if spec.resolution > 0.0:
            digits = max(0, -math.floor(math.log10(spec.resolution) + 1e-9))
            value = round(round(value / spec.resolution) * spec.resolution, digits)
        return value

    def read(self) -> list[Sample]:
        """Return the samples the instruments give now (dropouts are simply absent)."""
        world = self._world
        s = world.scenario
        t = s.start_epoch_s + world.elapsed_s
        interval = world.elapsed_s - self._last_read_s
        out: list[Sample] = []
        cold_junction_c = world.state.ambient_c + s.cold_junction_offset_k
        raw_needed = False
        for role, spec in s.sensors.items():
            value = self._measure(role, spec, interval)
            if value is None:
                continue
            if spec.raw_tc_type:
                raw_needed = True
                hot = thermocouple.emf_mv(spec.raw_tc_type, value)
                emf = hot - thermocouple.emf_mv(spec.raw_tc_type, cold_junction_c)
                out.append(
                    Sample(t, s.vessel, f"{role}_emf", round(emf, 3), Quality.OK, self.source)
                )
            else:
                out.append(Sample(t, s.vessel, role, value, Quality.OK, self.source))
        if raw_needed:
            out.append(
                Sample(
                    t, s.vessel, "cold_junction", round(cold_junction_c, 2), Quality.OK, self.source
                )
            )
        self._last_energy_j = world.state.energy_in_j
        self._last_read_s = world.elapsed_s
        return out
