"""The simulated rig: the true world of one vessel with its instruments, sample by sample.

:class:`SimulatedRig` is the :class:`~drivers.simworld.physics.World` plus its
:class:`~drivers.simworld.sensors.Instruments`: ``advance(dt_s)`` moves the world on,
``read()`` returns the samples its instruments would give now, and ``run()`` does both
at the scenario's sample interval, as fast as the CPU allows. :func:`scenario_metadata`
is the ``key: value`` description of a simulated log, its ``truth_`` keys included.

Everything random draws from one ``numpy.random.default_rng(seed)``; the same
scenario and seed give the same samples, bit for bit.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import replace
from datetime import UTC, datetime

import numpy as np

from drivers.sample import Sample
from drivers.simworld.physics import World, effective_ua_w_per_k
from drivers.simworld.scenarios import Scenario, sim_url
from drivers.simworld.sensors import Instruments
from drivers.simworld.water import saturation


class SimulatedRig(World):
    """One simulated vessel with its instruments.

    ``advance(dt_s)`` moves the world on; ``read()`` returns the samples its
    instruments would give now. ``run()`` does both at the scenario's sample
    interval, as fast as the CPU allows.
    """

    def __init__(self, scenario: Scenario, seed: int = 0, source: str | None = None) -> None:
        rng = np.random.default_rng(seed)
        super().__init__(scenario, rng)
        self.seed = seed
        self.source = source or f"sim://?scenario={scenario.name}&seed={seed}"
        self.instruments = Instruments(self, rng, self.source)

    def _after_substep(self, h: float) -> None:
        self.instruments.lag(h)

    def read(self) -> list[Sample]:
        """Return the samples the instruments give now (dropouts are simply absent)."""
        return self.instruments.read()

    def run(self) -> Iterator[list[Sample]]:
        """Yield the samples of each instant from t = 0 to the end of the scenario."""
        s = self.scenario
        steps = round(s.duration_s / s.sample_interval_s)
        self._control()
        yield self.read()
        for _ in range(steps):
            self.advance(s.sample_interval_s)
            yield self.read()


def run_series(
    scenario: Scenario, scale_mm: list[float], gap_s: float = 3600.0, seed: int = 0
) -> Iterator[list[Sample]]:
    """Yield the instants of successive runs of one vessel, its element scaling run by run.

    Run ``i`` is ``scenario`` with ``scale_mm[i]`` mm of scale on the element (seed
    ``seed + i``), starting ``gap_s`` seconds after run ``i - 1`` ended, long enough
    for any reader to see a new run. A series of our own for demos, tests and
    benchmarks of the drift checks.
    """
    start = scenario.start_epoch_s
    for i, mm in enumerate(scale_mm):
        run = replace(scenario, scale_mm=mm, start_epoch_s=start)
        yield from SimulatedRig(run, seed=seed + i).run()
        start += scenario.duration_s + gap_s


def scenario_metadata(scenario: Scenario, seed: int) -> dict[str, str | float]:
    """Return the ``key: value`` metadata that describes a simulated log.

    Keys starting ``truth_`` are what the simulated world really held, for
    checking estimators; a real log has none of them.
    """
    s = scenario
    t_sat_c, h_fg = saturation(s.pressure_kpa)
    meta: dict[str, str | float] = {
        "source": sim_url(s, seed),
        "scenario": s.name,
        "seed": str(seed),
        "vessel": s.vessel,
        "start_time": datetime.fromtimestamp(s.start_epoch_s, tz=UTC).isoformat(),
        "sample_interval_s": s.sample_interval_s,
        "pressure_kpa": s.pressure_kpa,
        "boiling_point_c": round(t_sat_c, 4),
        "vessel_heat_capacity_j_per_k": s.vessel_heat_capacity_j_per_k,
        "element_heat_capacity_j_per_k": s.element.heat_capacity_j_per_k,
        "rated_power_w": s.element.rated_power_w,
        "rated_voltage_v": s.element.rated_voltage_v,
        "element_area_m2": s.element.area_m2,
    }
    for role in ("water", "element"):
        spec = s.sensors.get(role)
        if spec is not None:
            meta[f"{role}_sensor_tau_s"] = spec.tau_s  # the instrument's stated time constant
    if s.altitude_m is not None:
        meta["altitude_m"] = s.altitude_m
    if s.nominal_volume_l is not None:
        meta["nominal_volume_l"] = s.nominal_volume_l
    if s.target_c is not None:
        meta["target_c"] = s.target_c
    hot_c = s.target_c if s.target_c is not None else t_sat_c
    meta |= {
        "truth_water_mass_kg": s.water_mass_kg,
        "truth_scale_mm": s.scale_mm,
        "truth_element_conductance_w_per_k": round(s.element_conductance_w_per_k(), 4),
        "truth_clean_element_conductance_w_per_k": round(s.clean_element_conductance_w_per_k(), 4),
        "truth_effective_ua_w_per_k": round(effective_ua_w_per_k(s, hot_c, s.ambient_c), 5),
        "truth_effective_ua_at_c": round(hot_c, 2),
        "truth_latent_heat_j_per_kg": round(h_fg, 1),
    }
    return meta
