"""The demo's site: a test rig of two kettles and a building's storage water heaters.

A scenario of our own, every name and number invented for the demo (nothing here
describes a real building, product or person). :func:`demo_site` returns it:

* **the rig** (``bench-a``, ``bench-b``): two 2.2 kW jug kettles tested once a day
  from a cold fill to the boil. ``bench-b``'s element scales over its last runs.
* **the building** (``flat-01`` … ``flat-08``): eight storage water heaters of
  80-150 L. Every :data:`RUN_EVERY_DAYS` days each logs a recovery run: from a
  minute before its thermostat switches the element on after the morning's
  draw-off (the water at 40-50 °C), through the reheat to the setpoint, and
  :data:`STANDBY_S` of standby after it. Four carry a fault that grows over the
  weeks, from its ``onset_day`` on; the rest stay healthy:

  ===========  ================================================================
  ``flat-03``  limescale on the element (the element-to-water conductance falls)
  ``flat-05``  insulation failing (wet or crushed lagging: UA rises)
  ``flat-06``  the element weakening (its resistance rises: less power)
  ``flat-07``  under-filled (a vented tank whose float valve sticks: less water)
  ===========  ================================================================

Each :class:`VesselPlan` says what a vessel is, which fault it carries and how each of
its runs is simulated (:meth:`VesselPlan.scenario`). Each run has its own seed, so a
vessel's runs can be simulated in any order, on any process, with the same samples.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from drivers.simworld.scenarios import (
    Scenario,
    ShellSpec,
    Thermostat,
    kettle_scenario,
    water_heater_scenario,
)

#: Days of history before the live part.
HISTORY_DAYS = 60
#: A heater logs a recovery run every this many days.
RUN_EVERY_DAYS = 4
#: Standby logged after a heater's thermostat first switches off, s.
STANDBY_S = 1500.0
#: Seconds a recovery run is logged before the thermostat switches on (a rest: the
#: estimator takes the element thermocouple's offset from it).
REST_S = 60.0
#: The building heaters' sample interval, s (a building logger's usual rate).
HEATER_INTERVAL_S = 10.0
#: Daily test runs of each rig kettle in the history.
KETTLE_RUNS = 12


@dataclass(frozen=True)
class VesselPlan:
    """One demo vessel: what it is, where it stands, its fault and its runs.

    ``base`` is the healthy vessel (its ``vessel`` is the id); ``fault`` is ``scaling``,
    ``insulation``, ``element`` or ``fill``, each named after the drift or run check
    that flags it (:mod:`monitor.runs.drift`), or None (healthy); it
    grows linearly from ``onset_day`` to the end of the history, to ``severity`` (the
    fault's own measure: scale mm, UA factor, power fraction lost, fill fraction
    missing). ``run_days`` are the days (from the history's start) of its past runs.
    """

    base: Scenario
    place: str
    kind: str  # "kettle" or "storage heater"
    run_days: tuple[float, ...]
    fault: str | None = None
    onset_day: float = 0.0
    severity: float = 0.0
    seed: int = 0

    @property
    def vessel(self) -> str:
        """The vessel's id (its scenario's)."""
        return self.base.vessel

    def fault_share(self, day: float) -> float:
        """Return how far the fault has grown by ``day`` (0 before its onset, 1 at the end)."""
        if self.fault is None or day <= self.onset_day:
            return 0.0
        return min((day - self.onset_day) / (HISTORY_DAYS - self.onset_day), 1.0)

    def metadata(self) -> dict[str, str | float]:
        """Return the vessel's metadata as a user would configure it: its nameplate, its
        fill, where it stands, and that it is simulated (never the simulator's truth)."""
        s = self.base
        meta: dict[str, str | float] = {
            "rated_power_w": s.element.rated_power_w,
            "rated_voltage_v": s.element.rated_voltage_v,
            "vessel_heat_capacity_j_per_k": s.vessel_heat_capacity_j_per_k,
            "element_heat_capacity_j_per_k": s.element.heat_capacity_j_per_k,
            "element_area_m2": s.element.area_m2,  # the maker's data sheet gives it
            "fill_kg": s.water_mass_kg,
            "place": self.place,
            "kind": self.kind,
            "simulated": "yes: an invented demo vessel, not a real one",
        }
        for role in ("water", "element"):
            spec = s.sensors.get(role)
            if spec is not None:
                meta[f"{role}_sensor_tau_s"] = spec.tau_s
        if s.nominal_volume_l is not None:
            meta["nominal_volume_l"] = s.nominal_volume_l
        if s.target_c is not None:
            meta["target_c"] = s.target_c
        return meta

    def scenario(self, day: float, start_epoch_s: float, run_index: int) -> Scenario:
        """Return the scenario of the run on ``day``, starting at ``start_epoch_s``.

        The run's own conditions (start temperature, room) are drawn from a generator
        seeded by the vessel and the run, so they do not depend on the order of runs.
        """
        rng = np.random.default_rng([self.seed, run_index])
        share = self.fault_share(day)
        s = self.base
        if self.kind == "kettle":
            run = replace(
                s,
                start_water_c=float(rng.uniform(12.0, 22.0)),
                ambient_c=float(rng.uniform(18.0, 24.0)),
                water_mass_kg=float(rng.uniform(0.95, 1.05)) * s.water_mass_kg,
            )
        else:
            start_c = float(rng.uniform(40.0, 50.0))
            run = replace(
                s,
                start_water_c=start_c,
                ambient_c=float(rng.uniform(14.0, 22.0)),
                control=replace(s.control, start_delay_s=REST_S),
            )
            run = replace(run, duration_s=_recovery_duration_s(run))
        if share > 0.0:
            run = _with_fault(run, self.fault, share * self.severity)
        return replace(run, start_epoch_s=start_epoch_s)


def _recovery_duration_s(s: Scenario) -> float:
    """Return how long a heater's recovery run is logged: the rest, the reheat at full
    power with no losses (plus a fifth for the losses and the element's lag), and
    :data:`STANDBY_S`, rounded up to the sample interval."""
    assert isinstance(s.control, Thermostat)
    capacity = s.water_mass_kg * 4186.0 + s.vessel_heat_capacity_j_per_k
    heat_s = 1.2 * capacity * (s.control.setpoint_c - s.start_water_c) / s.element.rated_power_w
    total = REST_S + heat_s + STANDBY_S
    return math.ceil(total / s.sample_interval_s) * s.sample_interval_s


def _with_fault(s: Scenario, fault: str | None, size: float) -> Scenario:
    """Return ``s`` carrying ``fault`` at ``size`` (the fault's own measure)."""
    if fault == "scaling":  # mm of scale on the element
        return replace(s, scale_mm=s.scale_mm + size)
    if fault == "insulation":  # UA multiplied by 1 + size
        shell = s.shell
        return replace(
            s, shell=replace(shell, inner_conductance_w_per_k=shell.inner_conductance_w_per_k
                             * (1.0 + size))
        )  # fmt: skip
    if fault == "element":  # a share of the rated power lost (the resistance rises)
        return replace(s, element=replace(s.element, rated_power_w=s.element.rated_power_w
                                          * (1.0 - size)))  # fmt: skip
    if fault == "fill":  # a share of the water missing
        return replace(s, water_mass_kg=s.water_mass_kg * (1.0 - size))
    raise ValueError(f"unknown fault {fault!r}")


def _heater(number: int, volume_l: float, power_w: float, lagging_w_per_k: float) -> Scenario:
    """Return a healthy storage heater of ``volume_l`` litres and ``power_w`` watts."""
    base = water_heater_scenario()
    shell: ShellSpec = replace(
        base.shell,
        inner_conductance_w_per_k=lagging_w_per_k,
        outer_area_m2=base.shell.outer_area_m2 * (volume_l / 80.0) ** (2.0 / 3.0),
    )
    return replace(
        base,
        vessel=f"flat-{number:02d}",
        element=replace(base.element, rated_power_w=power_w),
        shell=shell,
        water_mass_kg=round(volume_l * 0.983, 1),  # water at 60 °C, about 983 kg/m³
        nominal_volume_l=volume_l,
        tank_heat_capacity_j_per_k=base.tank_heat_capacity_j_per_k * volume_l / 80.0,
        sample_interval_s=HEATER_INTERVAL_S,
        draws=(),
        # kept 10 K or more below the boil, its element sees the plain film: a quarter
        # of that time constant (the default takes the boiling film's, 1.6 times faster)
        substep_s=0.25
        * base.element.heat_capacity_j_per_k
        / (base.element.film_w_per_m2_k * base.element.area_m2),
    )


def demo_site() -> list[VesselPlan]:
    """Return the demo's vessels (the module docstring), rig kettles first."""
    heater_days = tuple(float(d) for d in range(1, HISTORY_DAYS, RUN_EVERY_DAYS))
    kettle_days = tuple(float(HISTORY_DAYS - KETTLE_RUNS + i) for i in range(KETTLE_RUNS))
    heaters = [
        # (volume L, power W, lagging W/K, place, fault, onset day, severity)
        (80.0, 2000.0, 1.5, "flat 1, airing cupboard", None, 0.0, 0.0),
        (120.0, 3000.0, 1.9, "flat 2, kitchen", None, 0.0, 0.0),
        (100.0, 2000.0, 1.7, "flat 3, airing cupboard", "scaling", 18.0, 0.45),
        (80.0, 2000.0, 1.4, "flat 4, bathroom", None, 0.0, 0.0),
        (150.0, 3000.0, 2.1, "flat 5, loft", "insulation", 15.0, 1.6),
        (100.0, 2500.0, 1.7, "flat 6, airing cupboard", "element", 20.0, 0.14),
        (120.0, 3000.0, 1.9, "flat 7, kitchen", "fill", 36.0, 0.22),
        (80.0, 2000.0, 1.5, "flat 8, airing cupboard", None, 0.0, 0.0),
    ]
    plans = [
        VesselPlan(
            base=_heater(i, volume, power, lagging),
            place=place,
            kind="storage heater",
            run_days=heater_days,
            fault=fault,
            onset_day=onset,
            severity=severity,
            seed=1000 + i,
        )
        for i, (volume, power, lagging, place, fault, onset, severity) in enumerate(heaters, 1)
    ]
    kettle = kettle_scenario()
    plans[:0] = [
        VesselPlan(replace(kettle, vessel="bench-a"), "test rig, bench A", "kettle",
                   kettle_days, seed=2001),
        VesselPlan(replace(kettle, vessel="bench-b"), "test rig, bench B", "kettle",
                   kettle_days, fault="scaling", onset_day=HISTORY_DAYS - 7.0, severity=0.25,
                   seed=2002),
    ]  # fmt: skip
    return plans
