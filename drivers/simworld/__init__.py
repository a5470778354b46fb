"""The simulated world: a virtual heated vessel whose instruments give samples like a rig's.

It is deliberately richer than the estimator's lumped model, so the estimator is
always tested against a world it does not assume. The modules:

* :mod:`~drivers.simworld.scenarios`: what a run is (:class:`Scenario`: the element,
  wall, lid, controls, draw-offs and sensors), the built-in kettle and water heater,
  and the ``sim://`` URL that names one;
* :mod:`~drivers.simworld.water`: water straight from IAPWS-IF97 (``iapws``), not
  from ``monitor/``, so the world shares none of the estimator's shortcuts;
* :mod:`~drivers.simworld.physics`: the true world (:class:`~drivers.simworld.physics.World`):
  three nodes and an optional lid, natural convection and radiation, boiling with
  evaporation, scale, the steam switch or thermostat, wandering mains and room;
* :mod:`~drivers.simworld.sensors`: the instruments: lag, noise, quantisation,
  dropouts, spikes, raw thermocouple millivolts;
* :mod:`~drivers.simworld.clocks`: fast or paced time;
* :mod:`~drivers.simworld.rig`: :class:`SimulatedRig`, the world with its instruments,
  sample by sample, and :func:`scenario_metadata`, the description of a simulated log.

The driver that opens ``sim://`` URLs is :mod:`drivers.sim`. Everything random draws
from one ``numpy.random.default_rng(seed)``; the same scenario and seed give the same
samples, bit for bit (``replay_logs/`` depends on it). The names most callers need are
imported here.
"""

from drivers.simworld.clocks import Clock, FastClock, PacedClock
from drivers.simworld.physics import (
    BOILING_ONSET_K,
    DRY_CUTOUT_KG,
    Flows,
    RigState,
    World,
    effective_ua_w_per_k,
    wall_loss_w,
)
from drivers.simworld.rig import SimulatedRig, run_series, scenario_metadata
from drivers.simworld.scenarios import (
    DEFAULT_START_EPOCH_S,
    SCENARIOS,
    DrawOff,
    ElementSpec,
    KettleSwitch,
    LidSpec,
    Scenario,
    SensorSpec,
    ShellSpec,
    Thermostat,
    kettle_scenario,
    parse_sim_url,
    scenario_by_name,
    sim_url,
    water_heater_scenario,
)
from drivers.simworld.water import liquid_cp_j_per_kg_k, liquid_h_j_per_kg, saturation

__all__ = [
    "BOILING_ONSET_K",
    "DEFAULT_START_EPOCH_S",
    "DRY_CUTOUT_KG",
    "SCENARIOS",
    "Clock",
    "DrawOff",
    "ElementSpec",
    "FastClock",
    "Flows",
    "KettleSwitch",
    "LidSpec",
    "PacedClock",
    "RigState",
    "Scenario",
    "SensorSpec",
    "ShellSpec",
    "SimulatedRig",
    "Thermostat",
    "World",
    "effective_ua_w_per_k",
    "kettle_scenario",
    "liquid_cp_j_per_kg_k",
    "liquid_h_j_per_kg",
    "parse_sim_url",
    "run_series",
    "saturation",
    "scenario_by_name",
    "scenario_metadata",
    "sim_url",
    "wall_loss_w",
    "water_heater_scenario",
]
