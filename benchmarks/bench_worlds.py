"""Print JSON: the live estimator scored on randomised simulated worlds it was not tuned to.

Run from the repository root:

    .venv/bin/python benchmarks/bench_worlds.py                      # 200 runs, 2 processes
    .venv/bin/python benchmarks/bench_worlds.py --quick              # smoke run, about a minute
    .venv/bin/python benchmarks/bench_worlds.py --runs 400 --seed 7 --jobs 2 --out out/w.json

One JSON object goes to stdout (and to ``--out`` when given); progress goes to stderr.
A run that crashes or never reaches its target stays in every figure as a failure
(infinite error, missing z) and is listed under ``runs.failed``. A full run took
50 s of wall time on this 2-core machine (2026-12-05): simulation 48 s, estimator
29 s and offline fit 15 s of CPU (6 min on 2026-12-02, before the fit was compiled).
The JSON's ``estimator_module`` names the file the estimator was imported from:
check it when comparing commits (an editable install can win over a worktree).

The worlds
    Run ``i`` has the seed ``seed + i`` and draws its world from
    ``np.random.default_rng(seed + i)``; the rig is simulated once with that seed.
    Every fifth run is a storage heater, the others are kettles (200 runs: 160 + 40).
    Kettles: element or plate heat capacity 150-500 J/K, fill 0.5-1.7 kg, scale
    0-0.4 mm, rated power 1.8-3 kW, start 8-25 °C, room 16-26 °C, altitude 0-1500 m,
    an idle of 5-120 s before switch-on, a lid with its own capacity and
    conductances, a small plate-to-room path, 1 Hz samples; the steam switch trips
    12 s after the boil and the run goes on for 10 min of cooling. Heaters: 50-150 L
    full, 1.5-3 kW, thermostat at 55-65 °C, the same idle, a top dome with its own
    lag, a flange path from the element to the room, samples every 10 s; the run
    goes on for 4 h of standby after the water first reaches the setpoint. Both:
    water thermocouple lag 1-6 s, plate thermocouple lag 0.5-4 s, reading noise
    1.5-2 times the filter's own settings (``EstimatorSettings.water_noise_sd_c``
    and ``element_noise_sd_c``), the rig's usual dropouts and spikes, an element
    thermocouple reading 0.4 K low to 0.4 K high against the water's. A quarter of
    the kettles and three quarters of the heaters have no element thermocouple
    (their estimator is built one-node, ``has_element_sensor=False``, and sees no
    element readings); half of each kind has no energy counter (the log has no
    ``energy`` channel, only the power meter). The assignments are balanced by run
    number, not drawn. ``worlds`` in the output lists every range.

What the estimator is given, and what not
    Exactly what a user knows: ``VesselConfig.from_metadata(vessel, meta,
    has_element_sensor)`` with ``meta`` holding only ``vessel_heat_capacity_j_per_k``
    (the total heat capacity of the empty vessel: element, tank metal, lid and the
    wall unless it sits behind insulation, as a commissioning run would measure),
    ``pressure_kpa`` (the site's), ``rated_power_w`` and, for heaters, ``target_c``
    (the thermostat setpoint; a kettle has none, so the estimator aims at its own
    boiling point for the site pressure). Not the element's capacity, not the
    sensor lags, not the fill or volume, not the noise. Default
    ``EstimatorSettings()``. It is stepped exactly as ``monitor.runs.replay.replay_run``
    steps a log, ``est.step(t_s, readings)`` once per instant with the channels
    ``water``, ``element``, ``ambient``, ``power``, ``energy`` and ``voltage`` that
    the instant has (a dropout is a missing key).

Instants
    The heat-up runs from switch-on (the control's start delay: the element switches
    on within one simulator sub-step of it) to the true arrival: the kettle's first
    instant at the boiling point (the rig's ``boiling_since_s``), or the heater's
    true water crossing its setpoint (interpolated between samples). The scored
    instant at fraction f is the first sample at or after start + f·heat-up, for
    f = 10 %, 20 % … 90 % (the deciles) and 25 %.

Scores (relative errors are (estimate − truth)/truth; statistics are of |error|)
    ``time_to_target``: ``Estimate.target.eta_s`` against the true remaining time
    (arrival − now) at each scored instant: median, p90, worst, median signed
    error (bias), n and failed (no forecast: an infinite error). ``late_over_25pct``
    counts the runs whose error exceeds 25 % at any sample between 20 % and 90 % of
    the heat-up (closer to the arrival the remaining time shrinks towards zero and
    a relative error stops meaning anything).
    ``coverage_90``: the share of scored instants whose true remaining time lies in
    [lo_s, hi_s] (an absent hi_s is an unbounded interval), per decile and over all
    deciles.
    ``z_rms``: the root mean square of (estimate − truth)/std over the decile
    instants of every run, for the water mass (``water_mass_kg``, truth: the water the
    rig holds), the element conductance (``element_conductance_w_per_k``, runs with an
    element thermocouple; truth: the rig's conductance then, film and scale), the loss
    conductance (``ua_w_per_k``; truth: ``effective_ua_w_per_k`` at the true water and
    room temperatures of that instant, defined as for the cooling below, so the plate's
    extra loss while it runs hot is a loss of power, not of conductance) and the time
    to target (std = (hi − lo)/(2·1.645); an unbounded interval gives 0). An instant
    without the figure makes the RMS infinite (null); ``rms_finite`` leaves those out.
    ``water_mass``: at the middle of the heat-up (the 50 % instant) and at its end
    (the last sample before the arrival), against the water the rig holds then.
    ``element_conductance_at_80pct``: G at the 80 % instant, runs with an element
    thermocouple, against the rig's conductance at that instant (film and scale).
    ``ua_after_10min_cooling``: kettles, UA 600 s after the switch-off, against
    ``drivers.simworld.effective_ua_w_per_k`` at the mean true water and room
    temperatures of those 600 s: the steady loss conductance with the element off,
    that is the wall's convection and radiation, plus the lid's two conductances
    in series, plus the water-to-element conductance in series with the element's
    own path to the room. It is the figure a one-node model should find; it leaves
    out the heat the wall and lid give back as they cool (their lags).
    ``ua_after_10min_cooling_z``: the same UA's error over its stated std, RMS, for
    kettles with and without an element thermocouple (reported, not a target).
    ``standing_loss_after_4h_standby``: heaters, the estimated UA 4 h after the
    arrival times the filter's mean (water − room) over the last 2 h of that
    standby, against the rig's true mean heat flow to the room over the same 2 h
    (every path, W). The first 2 h are left out of the truth so the lid and
    the insulated wall have settled.
    ``offline_fit``: our own reference, not the estimator's code: at each scored
    instant, ``scipy.optimize.least_squares`` (soft-L1) fits the two-node model
    (element and water, each thermocouple with a first-order lag, UA to the room
    reading) to every reading so far; θ = ln UA, ln C, ln G, ln C_e, ln τ_w, T₀
    (and ln τ_e with an element thermocouple), weak priors on all but C and T₀,
    the vessel at rest at T₀ at the start, inputs piecewise constant per interval
    (mean power from the energy counter, else the meter), solved exactly in the
    thermal modes with a first-order hold for the sensor lags. It is given the same
    metadata as the estimator. It forecasts with the mean power of the last 10 s.
    ``filter_over_fit`` divides the filter's median (and p90) |error| by the fit's,
    per fraction and pooled over the deciles.
    ``worst_runs``: the run (seed, kind, sensors) with the largest |error| of each
    figure. ``targets``: the goals of issue 13 with met / not met (UA and standing
    loss are judged on their p90, like G). ``runs_detail`` keeps each run's figures.
    Non-finite numbers are written as null.
"""

from __future__ import annotations

import argparse
import json
import math
import multiprocessing
import os
import platform
import subprocess
import sys
import time
import traceback
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import numpy as np
from scipy.optimize import brentq, least_squares
from scipy.signal import lfilter

from drivers.simworld import (
    ElementSpec,
    KettleSwitch,
    LidSpec,
    Scenario,
    SensorSpec,
    ShellSpec,
    SimulatedRig,
    Thermostat,
    effective_ua_w_per_k,
    kettle_scenario,
    water_heater_scenario,
)
from monitor import __version__
from monitor.estimation.contracts import Estimate
from monitor.estimation.estimator import VesselEstimator
from monitor.estimation.settings import EstimatorSettings, VesselConfig
from monitor.physics import water

KETTLE, HEATER = "kettle", "heater"
#: The channels the estimator is fed, as monitor.runs.replay feeds a log.
CHANNELS = ("water", "element", "ambient", "power", "energy", "voltage")
DECILES = tuple(round(0.1 * k, 1) for k in range(1, 10))
FRACTIONS = tuple(sorted((*DECILES, 0.25)))
LATE_FROM, LATE_TO = 0.2, 0.9  # of the heat-up: where no run may be over LATE_LIMIT
LATE_LIMIT = 0.25
Z_90 = 1.6448536269514722  # two-sided 90 % normal quantile (scipy.stats.norm.ppf(0.95))
COOLING_S = 600.0  # kettles: UA scored this long after the switch-off
STANDBY_S = 4 * 3600.0  # heaters: standing loss scored this long after the arrival
STANDBY_TRUTH_FROM_S = 2 * 3600.0  # the truth's window starts this far into the standby
KETTLE_MAX_S = 3600.0  # a kettle that has not boiled and cooled by then is a failure
HEATER_MAX_S = 16 * 3600.0
FIT_POWER_WINDOW_S = 10.0
FIT_WATER_SD_K = 0.1  # residual scale of the offline fit, K (about the drawn noise)
FIT_ELEMENT_SD_K = 0.5
FIT_ROBUST_SCALE = 3.0  # soft-L1 scale, in units of the residual scale
SETTINGS = EstimatorSettings()


def log(message: str) -> None:
    """Write one progress line to stderr."""
    print(f"bench_worlds: {message}", file=sys.stderr, flush=True)


# ---------------------------------------------------------------------------
# The worlds
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class World:
    """One drawn run: the scenario, its seed and what the user's rig measures."""

    index: int
    seed: int
    kind: str
    scenario: Scenario
    element_sensor: bool
    energy_counter: bool


def world_plan(index: int) -> tuple[str, bool, bool]:
    """Return (kind, element thermocouple?, energy counter?) of run ``index``.

    Every fifth run is a heater. Among kettles, numbered in order, one in four has no
    element thermocouple and runs 4-7 of every 8 have no energy counter, so the two
    are crossed evenly; among heaters three in four have no element thermocouple.
    """
    if index % 5 == 4:
        h = index // 5
        return HEATER, h % 4 == 0, (h // 4) % 2 == 0
    j = index - index // 5
    return KETTLE, j % 4 != 3, j % 8 < 4


#: What a kettle draws, uniform in each range (our own choice of a broad spread).
KETTLE_RANGES: dict[str, tuple[float, float]] = {
    "rated_power_w": (1800.0, 3000.0),
    "element_heat_capacity_j_per_k": (150.0, 500.0),
    "element_area_m2": (0.012, 0.025),
    "film_w_per_m2_k": (2500.0, 3500.0),
    "element_to_room_w_per_k": (0.05, 0.3),
    "wall_heat_capacity_j_per_k": (150.0, 400.0),
    "wall_inner_conductance_w_per_k": (15.0, 35.0),
    "wall_area_m2": (0.05, 0.1),
    "wall_height_m": (0.15, 0.25),
    "wall_emissivity": (0.1, 0.9),
    "lid_heat_capacity_j_per_k": (40.0, 200.0),
    "lid_to_water_w_per_k": (0.5, 3.0),
    "lid_to_room_w_per_k": (0.1, 0.6),
    "idle_before_switch_on_s": (5.0, 120.0),
    "water_mass_kg": (0.5, 1.7),
    "scale_mm": (0.0, 0.4),
    "start_water_c": (8.0, 25.0),
    "ambient_c": (16.0, 26.0),
    "altitude_m": (0.0, 1500.0),
}
#: What a heater draws. Insulation, tank metal and wall scale with (V / 80 L)^(2/3)
#: from water_heater_scenario's 80 L tank; the factors multiply those.
HEATER_RANGES: dict[str, tuple[float, float]] = {
    "volume_l": (50.0, 150.0),
    "start_water_c": (8.0, 25.0),
    "altitude_m": (0.0, 1500.0),
    "rated_power_w": (1500.0, 3000.0),
    "element_heat_capacity_j_per_k": (200.0, 600.0),
    "element_area_m2": (0.02, 0.04),
    "film_w_per_m2_k": (2000.0, 3000.0),
    "element_to_room_w_per_k": (0.05, 0.3),
    "insulation_factor": (0.6, 1.6),
    "lid_heat_capacity_j_per_k": (1000.0, 4000.0),
    "lid_to_water_w_per_k": (2.0, 10.0),
    "lid_to_room_w_per_k": (0.1, 0.5),
    "setpoint_c": (55.0, 65.0),
    "idle_before_switch_on_s": (5.0, 120.0),
    "tank_metal_factor": (0.8, 1.2),
    "scale_mm": (0.0, 1.0),
    "ambient_c": (15.0, 25.0),
}
#: Both kinds: thermocouple lags (s) and reading noise as multiples of the filter's.
SENSOR_RANGES: dict[str, tuple[float, float]] = {
    "water_sensor_tau_s": (1.0, 6.0),
    "element_sensor_tau_s": (0.5, 4.0),
    "noise_over_filter_setting": (1.5, 2.0),
}
#: The element thermocouple's calibration error against the water's, K: two type K
#: junctions agree within their tolerance, not exactly (judgement, from memory). Drawn
#: from a stream of its own, ``default_rng([seed, OFFSET_STREAM])``, so adding it left
#: every other draw of every world as it was.
ELEMENT_OFFSET_RANGE_C: tuple[float, float] = (-0.4, 0.4)
OFFSET_STREAM = 17


def uniform(rng: np.random.Generator, ranges: dict[str, tuple[float, float]], key: str) -> float:
    """Return one uniform draw from ``ranges[key]``, in that key's unit."""
    lo, hi = ranges[key]
    return float(rng.uniform(lo, hi))


def sensors_for(
    rng: np.random.Generator, element_sensor: bool, energy_counter: bool
) -> dict[str, SensorSpec]:
    """Return the rig's instruments: drawn lags and noise, the rig's usual faults."""
    base = kettle_scenario().sensors
    sensors = dict(base)
    sensors["water"] = replace(
        base["water"],
        tau_s=uniform(rng, SENSOR_RANGES, "water_sensor_tau_s"),
        noise_sd=SETTINGS.water_noise_sd_c
        * uniform(rng, SENSOR_RANGES, "noise_over_filter_setting"),
    )
    sensors["element"] = replace(
        base["element"],
        tau_s=uniform(rng, SENSOR_RANGES, "element_sensor_tau_s"),
        noise_sd=SETTINGS.element_noise_sd_c
        * uniform(rng, SENSOR_RANGES, "noise_over_filter_setting"),
    )
    if not element_sensor:
        del sensors["element"]
    if not energy_counter:
        del sensors["energy"]
    return sensors


def draw_kettle(rng: np.random.Generator, element_sensor: bool, energy_counter: bool) -> Scenario:
    """Return a kettle of random build, fill, scale, start, room and site (1 Hz)."""

    def u(key: str) -> float:
        return uniform(rng, KETTLE_RANGES, key)

    altitude_m = u("altitude_m")
    element = ElementSpec(
        rated_power_w=u("rated_power_w"),
        rated_voltage_v=230.0,
        heat_capacity_j_per_k=u("element_heat_capacity_j_per_k"),
        area_m2=u("element_area_m2"),
        film_w_per_m2_k=u("film_w_per_m2_k"),
        to_room_w_per_k=u("element_to_room_w_per_k"),
    )
    shell = ShellSpec(
        heat_capacity_j_per_k=u("wall_heat_capacity_j_per_k"),
        inner_conductance_w_per_k=u("wall_inner_conductance_w_per_k"),
        outer_area_m2=u("wall_area_m2"),
        height_m=u("wall_height_m"),
        emissivity=u("wall_emissivity"),
    )
    lid = LidSpec(
        heat_capacity_j_per_k=u("lid_heat_capacity_j_per_k"),
        to_water_w_per_k=u("lid_to_water_w_per_k"),
        to_room_w_per_k=u("lid_to_room_w_per_k"),
    )
    return kettle_scenario(
        element=element,
        shell=shell,
        lid=lid,
        control=KettleSwitch(start_delay_s=u("idle_before_switch_on_s")),
        water_mass_kg=u("water_mass_kg"),
        scale_mm=u("scale_mm"),
        start_water_c=u("start_water_c"),
        ambient_c=u("ambient_c"),
        altitude_m=altitude_m,
        pressure_kpa=float(water.pressure_at_altitude_kpa(altitude_m)),
        duration_s=KETTLE_MAX_S,
        nominal_volume_l=None,
        sensors=sensors_for(rng, element_sensor, energy_counter),
    )


def draw_heater(rng: np.random.Generator, element_sensor: bool, energy_counter: bool) -> Scenario:
    """Return a full storage heater of random size, power, setpoint and site (10 s)."""

    def u(key: str) -> float:
        return uniform(rng, HEATER_RANGES, key)

    volume_l = u("volume_l")
    start_c = u("start_water_c")
    size = (volume_l / 80.0) ** (2.0 / 3.0)  # surface and metal scale with V^(2/3)
    altitude_m = u("altitude_m")
    element = ElementSpec(
        rated_power_w=u("rated_power_w"),
        rated_voltage_v=230.0,
        heat_capacity_j_per_k=u("element_heat_capacity_j_per_k"),
        area_m2=u("element_area_m2"),
        film_w_per_m2_k=u("film_w_per_m2_k"),
        to_room_w_per_k=u("element_to_room_w_per_k"),
    )
    shell = ShellSpec(
        heat_capacity_j_per_k=3000.0 * size,
        inner_conductance_w_per_k=1.6 * size * u("insulation_factor"),
        outer_area_m2=2.2 * size,
        height_m=0.9 * (volume_l / 80.0) ** (1.0 / 3.0),
        emissivity=0.9,
        insulated=True,
    )
    lid = LidSpec(
        heat_capacity_j_per_k=u("lid_heat_capacity_j_per_k"),
        to_water_w_per_k=u("lid_to_water_w_per_k"),
        to_room_w_per_k=u("lid_to_room_w_per_k"),
    )
    setpoint_c = u("setpoint_c")
    return water_heater_scenario(
        element=element,
        shell=shell,
        lid=lid,
        control=Thermostat(setpoint_c=setpoint_c, start_delay_s=u("idle_before_switch_on_s")),
        tank_heat_capacity_j_per_k=11500.0 * size * u("tank_metal_factor"),
        water_mass_kg=volume_l / 1000.0 * float(water.density_kg_per_m3(start_c)),
        scale_mm=u("scale_mm"),
        start_water_c=start_c,
        ambient_c=u("ambient_c"),
        altitude_m=altitude_m,
        pressure_kpa=float(water.pressure_at_altitude_kpa(altitude_m)),
        duration_s=HEATER_MAX_S,
        draws=(),
        nominal_volume_l=volume_l,
        target_c=setpoint_c,
        sensors=sensors_for(rng, element_sensor, energy_counter),
    )


def draw_world(index: int, base_seed: int) -> World:
    """Return run ``index``'s world, drawn from ``default_rng(base_seed + index)``."""
    seed = base_seed + index
    kind, element_sensor, energy_counter = world_plan(index)
    rng = np.random.default_rng(seed)
    draw = draw_kettle if kind == KETTLE else draw_heater
    scenario = draw(rng, element_sensor, energy_counter)
    if element_sensor:
        offset_c = float(
            np.random.default_rng([seed, OFFSET_STREAM]).uniform(*ELEMENT_OFFSET_RANGE_C)
        )
        sensors = dict(scenario.sensors)
        sensors["element"] = replace(sensors["element"], offset=offset_c)
        scenario = replace(scenario, sensors=sensors)
    return World(index, seed, kind, scenario, element_sensor, energy_counter)


def user_metadata(world: World) -> dict[str, float]:
    """Return the only metadata the estimator and the offline fit get (what a user knows)."""
    sc = world.scenario
    meta = {
        "vessel_heat_capacity_j_per_k": sc.vessel_heat_capacity_j_per_k,
        "pressure_kpa": sc.pressure_kpa,
        "rated_power_w": sc.element.rated_power_w,
    }
    if sc.target_c is not None:
        meta["target_c"] = sc.target_c
    return meta


# ---------------------------------------------------------------------------
# One run: simulate once, step the estimator, keep what scoring needs
# ---------------------------------------------------------------------------


@dataclass
class Trace:
    """One simulated run: per-sample readings, truth and the estimator's answers."""

    world: World
    target_c: float  # the estimator's target (its boiling point, or the setpoint)
    t_s: list[float] = field(default_factory=list)
    readings: list[dict[str, float]] = field(default_factory=list)
    true_water_c: list[float] = field(default_factory=list)
    true_ambient_c: list[float] = field(default_factory=list)
    true_mass_kg: list[float] = field(default_factory=list)
    true_g_w_per_k: list[float] = field(default_factory=list)
    lost_j: list[float] = field(default_factory=list)
    estimates: list[Estimate | None] = field(default_factory=list)
    start_s: float = 0.0
    arrival_s: float | None = None
    switch_off_s: float | None = None
    sim_s: float = 0.0
    estimator_s: float = 0.0


def simulate(world: World) -> Trace:
    """Return the trace of one world fed to a fresh estimator, stopping once scored."""
    sc = world.scenario
    config = VesselConfig.from_metadata(sc.vessel, user_metadata(world), world.element_sensor)
    est = VesselEstimator(config)
    trace = Trace(world, est.target_c, start_s=sc.control.start_delay_s)
    rig = SimulatedRig(sc, world.seed)
    heater = world.kind == HEATER
    setpoint_c = sc.target_c if sc.target_c is not None else math.inf
    clock = time.perf_counter()
    for batch in rig.run():
        now = time.perf_counter()
        trace.sim_s += now - clock
        t_s = rig.elapsed_s
        readings = {s.channel: s.value for s in batch if s.channel in CHANNELS}
        e = est.step(t_s, readings)
        clock = time.perf_counter()
        trace.estimator_s += clock - now
        st = rig.state
        if heater and trace.arrival_s is None and st.water_c >= setpoint_c and trace.t_s:
            w0, t0 = trace.true_water_c[-1], trace.t_s[-1]
            trace.arrival_s = t0 + (setpoint_c - w0) / (st.water_c - w0) * (t_s - t0)
        trace.t_s.append(t_s)
        trace.readings.append(readings)
        trace.true_water_c.append(st.water_c)
        trace.true_ambient_c.append(st.ambient_c)
        trace.true_mass_kg.append(st.water_mass_kg)
        trace.true_g_w_per_k.append(rig.element_conductance_now_w_per_k())
        trace.lost_j.append(st.energy_lost_j)
        trace.estimates.append(e)
        if heater:
            if trace.arrival_s is not None and t_s >= trace.arrival_s + STANDBY_S:
                break
            continue
        if trace.arrival_s is None and st.boiling_since_s is not None:
            trace.arrival_s = st.boiling_since_s
        if trace.switch_off_s is None and trace.arrival_s is not None and not st.heating:
            trace.switch_off_s = trace.arrival_s + sc.control.off_delay_s
        if trace.switch_off_s is not None and t_s >= trace.switch_off_s + COOLING_S:
            break
    return trace


def index_at_or_after(t_s: Sequence[float], at_s: float) -> int | None:
    """Return the index of the first time at or after ``at_s``, or None past the end."""
    k = int(np.searchsorted(np.asarray(t_s), at_s - 1e-9))
    return k if k < len(t_s) else None


def fraction_instants(
    t_s: Sequence[float], start_s: float, arrival_s: float, fractions: Iterable[float]
) -> dict[float, int]:
    """Return the sample index of each heat-up fraction: the first sample at or after it."""
    out = {}
    for f in fractions:
        k = index_at_or_after(t_s, start_s + f * (arrival_s - start_s))
        if k is None:
            raise ValueError(f"no sample at {f:.0%} of the heat-up")
        out[f] = k
    return out


# ---------------------------------------------------------------------------
# The offline fit (our own reference: two nodes, both sensor lags)
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class FitData:
    """What the offline fit sees up to one instant, on a uniform grid of step ``h_s``."""

    h_s: float
    power_w: np.ndarray  # mean power over interval k (sample k to k+1), W
    ambient_c: np.ndarray  # room reading over interval k (last known at sample k), °C
    water_c: np.ndarray  # water reading at each sample, NaN when missing
    element_c: np.ndarray | None  # element reading at each sample, or None: not measured


def interval_powers_w(readings: Sequence[dict[str, float]], h_s: float) -> np.ndarray:
    """Return the mean power (W) of each interval between consecutive samples.

    From the energy counter when both ends have it and it did not fall, else the
    power meter's reading at the interval's end (it averages over its interval),
    else the previous interval's.
    """
    out = np.zeros(max(len(readings) - 1, 0))
    last = 0.0
    for k in range(len(out)):
        a, b = readings[k], readings[k + 1]
        if "energy" in a and "energy" in b and b["energy"] >= a["energy"]:
            last = (b["energy"] - a["energy"]) * 3600.0 / h_s
        elif "power" in b:
            last = max(b["power"], 0.0)
        out[k] = last
    return out


def fit_data(trace: Trace, upto: int, powers_w: np.ndarray) -> FitData:
    """Return the offline fit's inputs over samples 0..upto of a trace."""
    rows = trace.readings[: upto + 1]
    ambient, last = [], 20.0
    for r in rows[:-1]:
        last = r.get("ambient", last)
        ambient.append(last)
    element = (
        np.asarray([r.get("element", math.nan) for r in rows], dtype=float)
        if trace.world.element_sensor
        else None
    )
    return FitData(
        h_s=trace.t_s[1] - trace.t_s[0],
        power_w=powers_w[:upto],
        ambient_c=np.asarray(ambient, dtype=float),
        water_c=np.asarray([r.get("water", math.nan) for r in rows], dtype=float),
        element_c=element,
    )


def thermal_modes(
    ua: float, c: float, g: float, c_e: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return (λ 1/s, V, V⁻¹) of the element-water block, A = V·diag(λ)·V⁻¹.

    A = [[-G/C_e, G/C_e], [G/C, -(G+UA)/C]] for x = [T_e, T_w]. With D = diag(C_e, C),
    S = D^½·A·D^-½ is symmetric, so S = Q·diag(λ)·Qᵀ with real λ and orthogonal Q,
    and V = D^-½·Q, V⁻¹ = Qᵀ·D^½.
    """
    off = g / math.sqrt(c_e * c)
    s = np.array([[-g / c_e, off], [off, -(g + ua) / c]])
    lam, q = np.linalg.eigh(s)
    half = np.sqrt(np.array([c_e, c]))
    return lam, q / half[:, None], q.T * half[None, :]


def first_order_hold_lag(x: np.ndarray, tau_s: float, h_s: float) -> np.ndarray:
    """Return a first-order sensor (lag τ) reading a signal sampled every h_s, at rest.

    The signal is taken as linear between samples, which makes the step exact:
    y[k+1] = a·y[k] + (1 - c)·x[k+1] + (c - a)·x[k], a = e^(-h/τ), c = (τ/h)(1 - a).
    The sensor starts level with x[0].
    """
    a = math.exp(-h_s / tau_s)
    c = tau_s / h_s * (1.0 - a)
    return x[0] + lfilter([1.0 - c, c - a], [1.0, -a], x - x[0])


def fit_path(theta: np.ndarray, data: FitData) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return (T_e, T_w, their sensor readings stacked 2×n) at every sample, °C.

    θ = [ln UA, ln C, ln G, ln C_e, ln τ_w, T₀, (ln τ_e)]; everything starts at T₀.
    Each mode m obeys z[k+1] = e^(λh)·z[k] + (e^(λh) - 1)/λ · (V⁻¹·b[k])_m, with
    b[k] = [P[k]/C_e, UA·T_a[k]/C], run as a first-order recursion by lfilter.
    """
    ua, c, g, c_e, tau_w = (math.exp(v) for v in theta[:5])
    t0 = float(theta[5])
    lam, v, v_inv = thermal_modes(ua, c, g, c_e)
    b = np.vstack((data.power_w / c_e, ua * data.ambient_c / c))
    drive = v_inv @ b
    z0 = v_inv @ np.array([t0, t0])
    n = len(data.water_c)
    modes = np.empty((2, n))
    for m in range(2):
        a = math.exp(lam[m] * data.h_s)
        gain = math.expm1(lam[m] * data.h_s) / lam[m]
        modes[m, 0] = z0[m]
        if n > 1:
            modes[m, 1:], _ = lfilter([1.0], [1.0, -a], gain * drive[m], zi=[a * z0[m]])
    temps = v @ modes
    tau_e = math.exp(theta[6]) if len(theta) > 6 else None
    sensed = np.empty_like(temps)
    sensed[1] = first_order_hold_lag(temps[1], tau_w, data.h_s)
    sensed[0] = first_order_hold_lag(temps[0], tau_e, data.h_s) if tau_e else temps[0]
    return temps[0], temps[1], sensed


@dataclass(frozen=True)
class FitPrior:
    """Weak priors of the offline fit: mean and sd per θ entry (inf sd: none)."""

    mean: np.ndarray
    sd: np.ndarray


def fit_prior(meta: dict[str, float], element_sensor: bool) -> FitPrior:
    """Return the fit's priors from what the user knows (rated power) and common values.

    UA about 1 W/K, G about rated/40 K, C_e about 300 J/K, τ_w about 3 s, τ_e about
    2 s, each ±1 in ln (UA ±1.5); no prior on C or T₀. These are typical orders of
    magnitude of our own, common practice, no source.
    """
    rated = meta.get("rated_power_w", 2000.0)
    mean = [0.0, 0.0, math.log(rated / 40.0), math.log(300.0), math.log(3.0), 0.0]
    sd = [1.5, math.inf, 1.0, 1.0, 1.0, math.inf]
    if element_sensor:
        mean.append(math.log(2.0))
        sd.append(1.0)
    return FitPrior(np.asarray(mean), np.asarray(sd))


def fit_residuals(theta: np.ndarray, data: FitData, prior: FitPrior) -> np.ndarray:
    """Return the fit's residuals: readings over their scale, then the priors."""
    _, _, sensed = fit_path(theta, data)
    seen_w = np.isfinite(data.water_c)
    parts = [(sensed[1][seen_w] - data.water_c[seen_w]) / FIT_WATER_SD_K]
    if data.element_c is not None:
        seen_e = np.isfinite(data.element_c)
        parts.append((sensed[0][seen_e] - data.element_c[seen_e]) / FIT_ELEMENT_SD_K)
    has = np.isfinite(prior.sd)
    parts.append((theta[has] - prior.mean[has]) / prior.sd[has])
    return np.concatenate(parts)


def fit_start(data: FitData, meta: dict[str, float], element_sensor: bool) -> np.ndarray:
    """Return the fit's first guess: C from the energy over the rise, priors elsewhere."""
    z = data.water_c[np.isfinite(data.water_c)]
    energy_j = float(np.sum(data.power_w) * data.h_s)
    rise_k = max(float(z[-5:].mean() - z[:5].mean()), 1.0)
    c0 = min(max(energy_j / rise_k, 1e3), 1e7)
    theta = [
        0.0,
        math.log(c0),
        math.log(meta.get("rated_power_w", 2000.0) / 40.0),
        math.log(300.0),
        math.log(3.0),
        float(np.median(z[:5])),
    ]
    if element_sensor:
        theta.append(math.log(2.0))
    return np.asarray(theta)


def fit_bounds(element_sensor: bool) -> tuple[list[float], list[float]]:
    """Return the fit's (lower, upper) bounds on θ."""
    ln = math.log
    lo = [ln(1e-2), ln(1e2), ln(0.5), ln(10.0), ln(0.05), -20.0]
    hi = [ln(1e2), ln(1e8), ln(1e4), ln(1e5), ln(300.0), 120.0]
    if element_sensor:
        lo.append(ln(0.05))
        hi.append(ln(300.0))
    return lo, hi


def fit_time_to_target_s(
    theta: np.ndarray, data: FitData, target_c: float, power_w: float, ambient_c: float
) -> float:
    """Return the fitted model's time (s) for the water to reach ``target_c`` from now.

    From the fitted temperatures at the last sample, power and room held. Infinite
    when the steady water temperature is not above the target.
    """
    ua, c, g, c_e = (math.exp(v) for v in theta[:4])
    t_e, t_w, _ = fit_path(theta, data)
    x = np.array([t_e[-1], t_w[-1]])
    if x[1] >= target_c:
        return 0.0
    lam, v, v_inv = thermal_modes(ua, c, g, c_e)
    steady_w = ambient_c + power_w / ua  # the element's heat all reaches the water
    if steady_w <= target_c:
        return math.inf
    steady = np.array([steady_w + power_w / g, steady_w])
    weights = v[1] * (v_inv @ (x - steady))

    def short_of(t: float) -> float:
        return steady_w + float(np.sum(weights * np.exp(lam * t))) - target_c

    hi = max((target_c - x[1]) * c / power_w, 1.0) if power_w > 0.0 else 1.0
    while short_of(hi) < 0.0:
        hi *= 2.0
        if hi > 1e8:
            return math.inf
    return float(brentq(short_of, 0.0, hi, xtol=1e-3))


def recent_power_w(powers_w: np.ndarray, k: int, window: int, switch_w: float) -> float:
    """Return the mean power (W) of the last ``window`` intervals before sample k.

    Only the intervals since the power last jumped by more than ``switch_w`` count,
    so a forecast just after switch-on does not average in the idle.
    """
    recent = powers_w[max(k - window, 0) : k]
    jumps = np.flatnonzero(np.abs(np.diff(recent)) > switch_w)
    if jumps.size:
        recent = recent[jumps[-1] + 1 :]
    return float(recent.mean())


def offline_fit_errors(
    trace: Trace, instants: dict[float, int], arrival_s: float
) -> dict[float, float]:
    """Return the offline fit's relative time-to-target error at each scored instant."""
    world = trace.world
    meta = user_metadata(world)
    prior = fit_prior(meta, world.element_sensor)
    lo, hi = fit_bounds(world.element_sensor)
    h_s = trace.t_s[1] - trace.t_s[0]
    powers = interval_powers_w(trace.readings, h_s)
    window = max(round(FIT_POWER_WINDOW_S / h_s), 1)
    theta = None
    out = {}
    for f, k in sorted(instants.items()):
        data = fit_data(trace, k, powers)
        start = fit_start(data, meta, world.element_sensor) if theta is None else theta
        start = np.clip(start, np.asarray(lo) + 1e-9, np.asarray(hi) - 1e-9)
        result = least_squares(
            fit_residuals,
            start,
            args=(data, prior),
            bounds=(lo, hi),
            loss="soft_l1",
            f_scale=FIT_ROBUST_SCALE,
            x_scale="jac",
            max_nfev=400,
        )
        theta = result.x
        power_w = recent_power_w(powers, k, window, 0.2 * meta["rated_power_w"])
        eta = fit_time_to_target_s(theta, data, trace.target_c, power_w, float(data.ambient_c[-1]))
        out[f] = relative_error(eta, arrival_s - trace.t_s[k])
    return out


# ---------------------------------------------------------------------------
# Scoring one run (pure helpers first)
# ---------------------------------------------------------------------------


def relative_error(estimate: float | None, truth: float) -> float:
    """Return (estimate − truth)/truth, or inf when there is no estimate."""
    if estimate is None or not math.isfinite(estimate):
        return math.inf
    return (estimate - truth) / truth


def interval_std_s(lo_s: float | None, hi_s: float | None) -> float:
    """Return the std (s) a 90 % interval implies, (hi − lo)/(2·1.645); inf if open."""
    if lo_s is None or hi_s is None or not math.isfinite(hi_s):
        return math.inf
    return (hi_s - lo_s) / (2.0 * Z_90)


def z_score(estimate: float | None, std: float | None, truth: float) -> float:
    """Return (estimate − truth)/std; inf without an estimate or a positive std.

    An infinite std (an unbounded interval) gives 0: it claims nothing.
    """
    if estimate is None or std is None or not math.isfinite(estimate) or not std > 0.0:
        return math.inf
    if math.isinf(std):
        return 0.0
    return (estimate - truth) / std


def covered(lo_s: float | None, hi_s: float | None, truth_s: float) -> bool:
    """Return True when ``truth_s`` lies in [lo, hi] (an absent hi is unbounded)."""
    if lo_s is None:
        return False
    return lo_s <= truth_s <= (hi_s if hi_s is not None else math.inf)


def eta_error(e: Estimate | None, remaining_s: float) -> float:
    """Return the relative time-to-target error of an estimate (inf: no forecast)."""
    if e is None or e.target is None:
        return math.inf
    return relative_error(e.target.eta_s, remaining_s)


def late_worst_error(
    t_s: Sequence[float], errors: Sequence[float], start_s: float, arrival_s: float
) -> tuple[float, float | None]:
    """Return (worst |error|, at which heat-up fraction) between LATE_FROM and LATE_TO."""
    worst, where = 0.0, None
    span = arrival_s - start_s
    for t, err in zip(t_s, errors, strict=True):
        f = (t - start_s) / span
        if LATE_FROM <= f <= LATE_TO and not abs(err) <= worst:
            worst, where = abs(err), f
    return worst, where


@dataclass
class RunScore:
    """Every figure of one run (errors relative, z in standard deviations)."""

    index: int
    seed: int
    kind: str
    element_sensor: bool
    energy_counter: bool
    heat_up_s: float = math.nan
    failure: str | None = None
    eta_error: dict[str, float] = field(default_factory=dict)  # by fraction label
    eta_covered: dict[str, bool] = field(default_factory=dict)
    eta_z: dict[str, float] = field(default_factory=dict)
    mass_z: dict[str, float] = field(default_factory=dict)
    g_z: dict[str, float] = field(default_factory=dict)
    ua_z: dict[str, float] = field(default_factory=dict)
    fit_error: dict[str, float] = field(default_factory=dict)
    late_worst: float = math.inf
    late_worst_at: float | None = None
    mass_mid_error: float = math.inf
    mass_end_error: float = math.inf
    g80_error: float | None = None
    ua_cooling_error: float | None = None
    ua_cooling_z: float | None = None
    standing_loss_error: float | None = None
    sim_s: float = 0.0
    estimator_s: float = 0.0
    fit_s: float = 0.0


def label(f: float) -> str:
    """Return a fraction's key, '10%'."""
    return f"{f:.0%}"


def value_of(e: Estimate | None, name: str) -> tuple[float | None, float | None]:
    """Return (value, std) of an estimated figure of ``e``, or (None, None)."""
    est = getattr(e, name, None) if e is not None else None
    return (est.value, est.std) if est is not None else (None, None)


def score_trace(trace: Trace) -> RunScore:
    """Return the scores of one run (see the module docstring for each figure)."""
    w = trace.world
    score = RunScore(
        w.index,
        w.seed,
        w.kind,
        w.element_sensor,
        w.energy_counter,
        sim_s=trace.sim_s,
        estimator_s=trace.estimator_s,
    )
    arrival = trace.arrival_s
    if arrival is None:
        return failed_score(w, "never reached the target")
    start = trace.start_s
    score.heat_up_s = arrival - start
    instants = fraction_instants(trace.t_s, start, arrival, FRACTIONS)
    sc = w.scenario
    for f, k in instants.items():
        e, key = trace.estimates[k], label(f)
        remaining = arrival - trace.t_s[k]
        score.eta_error[key] = eta_error(e, remaining)
        target = e.target if e is not None else None
        score.eta_covered[key] = target is not None and covered(target.lo_s, target.hi_s, remaining)
        score.eta_z[key] = (
            z_score(target.eta_s, interval_std_s(target.lo_s, target.hi_s), remaining)
            if target is not None
            else math.inf
        )
        score.mass_z[key] = z_score(*value_of(e, "water_mass_kg"), trace.true_mass_kg[k])
        if w.element_sensor:
            score.g_z[key] = z_score(
                *value_of(e, "element_conductance_w_per_k"), trace.true_g_w_per_k[k]
            )
        true_ua = effective_ua_w_per_k(sc, trace.true_water_c[k], trace.true_ambient_c[k])
        score.ua_z[key] = z_score(*value_of(e, "ua_w_per_k"), true_ua)
    errors = [
        eta_error(e, arrival - t) if t < arrival else math.nan
        for e, t in zip(trace.estimates, trace.t_s, strict=True)
    ]
    score.late_worst, score.late_worst_at = late_worst_error(trace.t_s, errors, start, arrival)
    k_mid = instants[0.5]
    score.mass_mid_error = relative_error(
        value_of(trace.estimates[k_mid], "water_mass_kg")[0], trace.true_mass_kg[k_mid]
    )
    k_end = max(index_at_or_after(trace.t_s, arrival) - 1, 0)
    score.mass_end_error = relative_error(
        value_of(trace.estimates[k_end], "water_mass_kg")[0], trace.true_mass_kg[k_end]
    )
    if w.element_sensor:
        k80 = instants[0.8]
        score.g80_error = relative_error(
            value_of(trace.estimates[k80], "element_conductance_w_per_k")[0],
            trace.true_g_w_per_k[k80],
        )
    if w.kind == KETTLE:
        score_cooling(score, trace)
    else:
        score_standby(score, trace, arrival)
    started = time.perf_counter()
    fit = offline_fit_errors(trace, instants, arrival)
    score.fit_s = time.perf_counter() - started
    score.fit_error = {label(f): err for f, err in fit.items()}
    return score


def score_cooling(score: RunScore, trace: Trace) -> None:
    """Record a kettle's UA error 600 s after the switch-off."""
    off = trace.switch_off_s
    if off is None or trace.t_s[-1] < off + COOLING_S - 1e-9:
        score.ua_cooling_error = math.inf
        return
    k0 = index_at_or_after(trace.t_s, off)
    k1 = index_at_or_after(trace.t_s, off + COOLING_S)
    water_c = float(np.mean(trace.true_water_c[k0 : k1 + 1]))
    room_c = float(np.mean(trace.true_ambient_c[k0 : k1 + 1]))
    truth = effective_ua_w_per_k(trace.world.scenario, water_c, room_c)
    score.ua_cooling_error = relative_error(value_of(trace.estimates[k1], "ua_w_per_k")[0], truth)
    score.ua_cooling_z = z_score(*value_of(trace.estimates[k1], "ua_w_per_k"), truth)


def score_standby(score: RunScore, trace: Trace, arrival_s: float) -> None:
    """Record a heater's standing-loss error after 4 h of standby (W, every path)."""
    k0 = index_at_or_after(trace.t_s, arrival_s + STANDBY_TRUTH_FROM_S)
    k1 = index_at_or_after(trace.t_s, arrival_s + STANDBY_S)
    if k0 is None or k1 is None or k1 <= k0:
        score.standing_loss_error = math.inf
        return
    truth_w = (trace.lost_j[k1] - trace.lost_j[k0]) / (trace.t_s[k1] - trace.t_s[k0])
    window = [e for e in trace.estimates[k0 : k1 + 1] if e is not None]
    ua, _ = value_of(trace.estimates[k1], "ua_w_per_k")
    if ua is None or not window:
        score.standing_loss_error = math.inf
        return
    excess_k = float(np.mean([e.water_c - e.ambient_c for e in window]))
    score.standing_loss_error = relative_error(ua * excess_k, truth_w)


def run_world(args: tuple[int, int]) -> RunScore:
    """Return the scores of run ``index`` of the benchmark with base seed ``seed``."""
    index, seed = args
    world = draw_world(index, seed)
    try:
        return score_trace(simulate(world))
    except Exception as exc:  # a crash of the estimator is a scored failure, with its place
        where = traceback.extract_tb(exc.__traceback__)[-1]
        place = f"{Path(where.filename).name}:{where.lineno}"
        return failed_score(world, f"{type(exc).__name__}: {exc} (at {place})")


def failed_score(world: World, why: str) -> RunScore:
    """Return the scores of a run that could not be scored: every figure a failure (inf)."""
    score = RunScore(world.index, world.seed, world.kind, world.element_sensor,
                     world.energy_counter, failure=why)  # fmt: skip
    if world.element_sensor:
        score.g80_error = math.inf
    if world.kind == KETTLE:
        score.ua_cooling_error = math.inf
    else:
        score.standing_loss_error = math.inf
    return score


# ---------------------------------------------------------------------------
# Summaries
# ---------------------------------------------------------------------------


def num(value: float | None, digits: int = 4) -> float | None:
    """Return ``value`` to ``digits`` significant figures, or None when not finite."""
    if value is None or not math.isfinite(value):
        return None
    return float(f"{value:.{digits}g}")


def percentile(values: np.ndarray, q: float) -> float:
    """Return the q-th percentile (linear), infinite when it falls among failures."""
    with np.errstate(invalid="ignore"):
        out = float(np.percentile(values, q))
    return math.inf if math.isnan(out) else out


def error_stats(errors: Iterable[float | None]) -> dict[str, float | int | None]:
    """Return median, p90 and worst of |error|, the median signed error, n and failed.

    None entries are skipped (the figure does not apply); infinite ones are failures.
    """
    signed = np.asarray([e for e in errors if e is not None], dtype=float)
    if signed.size == 0:
        return {"n": 0}
    size = np.abs(signed)
    finite = signed[np.isfinite(signed)]
    return {
        "median": num(percentile(size, 50.0)),
        "p90": num(percentile(size, 90.0)),
        "worst": num(float(size.max())),
        "bias": num(float(np.median(finite))) if finite.size else None,
        "n": int(size.size),
        "failed": int(size.size - finite.size),
    }


def rms_stats(z: Iterable[float]) -> dict[str, float | int | None]:
    """Return the RMS of z (inf if any is missing), the RMS of the finite ones, counts."""
    a = np.asarray(list(z), dtype=float)
    if a.size == 0:
        return {"n": 0}
    finite = a[np.isfinite(a)]
    return {
        "rms": num(float(np.sqrt(np.mean(a * a)))),
        "rms_finite": num(float(np.sqrt(np.mean(finite * finite)))) if finite.size else None,
        "worst_abs": num(float(np.max(np.abs(finite)))) if finite.size else None,
        "n": int(a.size),
        "missing": int(a.size - finite.size),
    }


def coverage_share(flags: Iterable[bool]) -> float | None:
    """Return the share of True among ``flags`` (None when there are none)."""
    a = list(flags)
    return float(np.mean(a)) if a else None


def ratio(a: float | None, b: float | None) -> float | None:
    """Return a/b, or None when either is missing or b is 0."""
    if a is None or b is None or b == 0.0:
        return None
    return a / b


def worst_run(
    scores: Sequence[RunScore], get: Callable[[RunScore], float | None]
) -> dict[str, object] | None:
    """Return the run with the largest |figure| (get(score) -> float or None)."""
    best: tuple[float, RunScore, float] | None = None
    for s in scores:
        value = get(s)
        if value is None:
            continue
        size = abs(value) if not math.isnan(value) else math.inf
        if best is None or size > best[0]:
            best = (size, s, value)
    if best is None:
        return None
    _, s, value = best
    return {
        "seed": s.seed,
        "index": s.index,
        "kind": s.kind,
        "element_sensor": s.element_sensor,
        "energy_counter": s.energy_counter,
        "error": num(value),
    }


def time_to_target_summary(scores: Sequence[RunScore]) -> dict[str, object]:
    """Return the time-to-target error per fraction and the late-error count."""
    over = [s for s in scores if not s.late_worst <= LATE_LIMIT]
    return {
        "per_fraction": {
            label(f): error_stats(s.eta_error.get(label(f), math.inf) for s in scores)
            for f in FRACTIONS
        },
        "late_over_25pct": {
            "runs": len(over),
            "of": len(scores),
            "worst": num(max((s.late_worst for s in scores), default=None)),
            "window": [LATE_FROM, LATE_TO],
        },
    }


def coverage_summary(scores: Sequence[RunScore]) -> dict[str, object]:
    """Return the 90 % interval's coverage per decile and over all deciles."""
    per = {
        label(f): num(coverage_share(s.eta_covered.get(label(f), False) for s in scores))
        for f in DECILES
    }
    overall = coverage_share(s.eta_covered.get(label(f), False) for s in scores for f in DECILES)
    return {"per_decile": per, "overall": num(overall)}


def z_summary(scores: Sequence[RunScore]) -> dict[str, object]:
    """Return the RMS of error/std per figure over the decile instants."""

    def pooled(attr: str, runs: Iterable[RunScore]) -> list[float]:
        return [getattr(s, attr).get(label(f), math.inf) for s in runs for f in DECILES]

    measured = [s for s in scores if s.element_sensor]
    return {
        "water_mass": rms_stats(pooled("mass_z", scores)),
        "element_conductance": rms_stats(pooled("g_z", measured)),
        "ua": rms_stats(pooled("ua_z", scores)),
        "time_to_target": rms_stats(pooled("eta_z", scores)),
    }


def z_per_decile(scores: Sequence[RunScore]) -> dict[str, object]:
    """Return, per figure and decile, the RMS and the median of the finite error/std.

    Where in a heat-up a figure is over- or under-confident (RMS far from 1) and
    biased (median far from 0): what a structural floor is set on.
    """
    measured = [s for s in scores if s.element_sensor]
    out: dict[str, object] = {}
    for name, attr, runs in (("water_mass", "mass_z", scores), ("element_conductance", "g_z",
                             measured), ("ua", "ua_z", scores), ("time_to_target", "eta_z",
                             scores)):  # fmt: skip
        per: dict[str, object] = {}
        for f in DECILES:
            z = np.array([getattr(s, attr).get(label(f), math.inf) for s in runs], dtype=float)
            z = z[np.isfinite(z)]
            per[label(f)] = (
                {"rms": num(float(np.sqrt(np.mean(z * z)))), "median": num(float(np.median(z)))}
                if z.size
                else None
            )
        out[name] = per
    return out


def fit_summary(scores: Sequence[RunScore]) -> dict[str, object]:
    """Return the offline fit's errors and the filter's over the fit's, per fraction."""
    per: dict[str, object] = {}
    ratios: dict[str, object] = {}
    for f in FRACTIONS:
        key = label(f)
        fit = error_stats(s.fit_error.get(key, math.inf) for s in scores)
        filt = error_stats(s.eta_error.get(key, math.inf) for s in scores)
        per[key] = fit
        ratios[key] = {
            "median": num(ratio(filt.get("median"), fit.get("median"))),
            "p90": num(ratio(filt.get("p90"), fit.get("p90"))),
        }
    fit_all = error_stats(s.fit_error.get(label(f), math.inf) for s in scores for f in DECILES)
    filt_all = error_stats(s.eta_error.get(label(f), math.inf) for s in scores for f in DECILES)
    ratios["deciles_pooled"] = {
        "median": num(ratio(filt_all.get("median"), fit_all.get("median"))),
        "p90": num(ratio(filt_all.get("p90"), fit_all.get("p90"))),
    }
    return {"time_to_target": per, "deciles_pooled": fit_all, "filter_over_fit": ratios}


def figures(scores: Sequence[RunScore]) -> dict[str, object]:
    """Return every summary figure over a set of runs."""
    kettles = [s for s in scores if s.kind == KETTLE]
    heaters = [s for s in scores if s.kind == HEATER]
    return {
        "scored_runs": len(scores),
        "heat_up_s": error_stats(s.heat_up_s for s in scores if math.isfinite(s.heat_up_s)),
        "time_to_target": time_to_target_summary(scores),
        "coverage_90": coverage_summary(scores),
        "z_rms": z_summary(scores),
        "z_per_decile": z_per_decile(scores),
        "water_mass": {
            "mid_heat_up": error_stats(s.mass_mid_error for s in scores),
            "end_heat_up": error_stats(s.mass_end_error for s in scores),
        },
        "element_conductance_at_80pct": error_stats(s.g80_error for s in scores),
        "ua_after_10min_cooling": error_stats(s.ua_cooling_error for s in kettles),
        # error over the stated std there (reported, not a target): with and without
        # an element thermocouple, whose UA in cooling is worked out differently
        "ua_after_10min_cooling_z": {
            "element_thermocouple": rms_stats(
                s.ua_cooling_z for s in kettles if s.element_sensor and s.ua_cooling_z is not None
            ),
            "no_element_thermocouple": rms_stats(
                s.ua_cooling_z
                for s in kettles
                if not s.element_sensor and s.ua_cooling_z is not None
            ),
        },
        "standing_loss_after_4h_standby": error_stats(s.standing_loss_error for s in heaters),
        "offline_fit": fit_summary(scores),
    }


def worst_runs(scores: Sequence[RunScore]) -> dict[str, object]:
    """Return the worst run of each per-run figure."""
    out: dict[str, object] = {
        f"time_to_target_{key}": worst_run(scores, lambda s, k=key: s.eta_error.get(k))
        for key in map(label, FRACTIONS)
    }
    out |= {
        "time_to_target_late": worst_run(scores, lambda s: s.late_worst),
        "water_mass_mid": worst_run(scores, lambda s: s.mass_mid_error),
        "water_mass_end": worst_run(scores, lambda s: s.mass_end_error),
        "element_conductance_at_80pct": worst_run(scores, lambda s: s.g80_error),
        "ua_after_10min_cooling": worst_run(scores, lambda s: s.ua_cooling_error),
        "standing_loss_after_4h_standby": worst_run(scores, lambda s: s.standing_loss_error),
        "z_water_mass": worst_run(scores, lambda s: max(s.mass_z.values(), key=abs, default=None)),
        "z_element_conductance": worst_run(
            scores, lambda s: max(s.g_z.values(), key=abs, default=None)
        ),
        "z_ua": worst_run(scores, lambda s: max(s.ua_z.values(), key=abs, default=None)),
        "z_time_to_target": worst_run(
            scores, lambda s: max(s.eta_z.values(), key=abs, default=None)
        ),
        "offline_fit_time_to_target": worst_run(
            scores, lambda s: max(s.fit_error.values(), key=abs, default=None)
        ),
    }
    return out


# ---------------------------------------------------------------------------
# Targets (issue 13)
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Check:
    """One target: the figure, its limits and whether it was met."""

    name: str
    value: float | int | None
    low: float | None = None
    high: float | None = None

    @property
    def met(self) -> bool:
        """Return True when the value exists and lies inside the limits."""
        if self.value is None or not math.isfinite(self.value):
            return False
        return (self.low is None or self.value >= self.low) and (
            self.high is None or self.value <= self.high
        )

    def as_dict(self) -> dict[str, object]:
        """Return the check as a JSON-ready dict."""
        return {
            "name": self.name,
            "value": self.value,
            "low": self.low,
            "high": self.high,
            "met": self.met,
        }


def target_checks(fig: dict[str, object]) -> list[Check]:
    """Return the targets of issue 13 checked against the summary figures."""
    tt = fig["time_to_target"]["per_fraction"]
    checks = [
        Check("time_to_target.25%.median", tt["25%"].get("median"), high=0.03),
        Check("time_to_target.50%.median", tt["50%"].get("median"), high=0.02),
        Check("time_to_target.25%.p90", tt["25%"].get("p90"), high=0.08),
        Check("time_to_target.50%.p90", tt["50%"].get("p90"), high=0.05),
        Check(
            "time_to_target.runs_over_25pct_after_first_fifth",
            fig["time_to_target"]["late_over_25pct"]["runs"],
            high=0,
        ),
    ]
    for key, share in fig["coverage_90"]["per_decile"].items():
        checks.append(Check(f"coverage_90.{key}", share, low=0.85, high=0.95))
    for key, z in fig["z_rms"].items():
        checks.append(Check(f"z_rms.{key}", z.get("rms"), low=0.7, high=1.5))
    mid = fig["water_mass"]["mid_heat_up"]
    checks += [
        Check("water_mass.mid_heat_up.median", mid.get("median"), high=0.02),
        Check("water_mass.mid_heat_up.p90", mid.get("p90"), high=0.04),
        Check(
            "element_conductance_at_80pct.p90",
            fig["element_conductance_at_80pct"].get("p90"),
            high=0.05,
        ),
        Check("ua_after_10min_cooling.p90", fig["ua_after_10min_cooling"].get("p90"), high=0.15),
        Check(
            "standing_loss_after_4h_standby.p90",
            fig["standing_loss_after_4h_standby"].get("p90"),
            high=0.10,
        ),
    ]
    pooled = fig["offline_fit"]["filter_over_fit"]["deciles_pooled"]
    checks += [
        Check("filter_over_fit.deciles_pooled.median", pooled["median"], high=1.25),
        Check("filter_over_fit.deciles_pooled.p90", pooled["p90"], high=1.25),
    ]
    return checks


# ---------------------------------------------------------------------------
# The benchmark
# ---------------------------------------------------------------------------


def world_ranges() -> dict[str, object]:
    """Return what each kind of run draws, for the record."""
    both = {k: list(v) for k, v in SENSOR_RANGES.items()}
    both["element_sensor_offset_c"] = list(ELEMENT_OFFSET_RANGE_C)
    return {
        KETTLE: {k: list(v) for k, v in KETTLE_RANGES.items()}
        | {"sample_interval_s": 1.0, "switch_off_after_boil_s": KettleSwitch().off_delay_s,
           "ua_scored_after_switch_off_s": COOLING_S},
        HEATER: {k: list(v) for k, v in HEATER_RANGES.items()}
        | {"sample_interval_s": 10.0, "hysteresis_k": Thermostat().hysteresis_k,
           "standing_loss_scored_after_s": STANDBY_S},
        "both": both
        | {"no_element_thermocouple": "1 in 4 kettles, 3 in 4 heaters",
           "no_energy_counter": "half of each kind", "dropouts_and_spikes": "the rig's defaults"},
    }  # fmt: skip


def git_state() -> dict[str, object]:
    """Return the commit the benchmark ran on and whether monitor/ differs from it."""
    root = Path(__file__).resolve().parent.parent
    try:
        head = subprocess.run(
            ["git", "rev-parse", "HEAD"],
            cwd=root,
            capture_output=True,
            text=True,
            check=True,
            timeout=10,
        ).stdout.strip()
        dirty = (
            subprocess.run(
                ["git", "diff", "--quiet", "HEAD", "--", "monitor", "drivers"],
                cwd=root,
                capture_output=True,
                timeout=10,
            ).returncode
            != 0
        )
    except (OSError, subprocess.SubprocessError):
        return {"head": None, "monitor_or_drivers_modified": None}
    return {"head": head, "monitor_or_drivers_modified": dirty}


@dataclass(frozen=True)
class Options:
    """What one benchmark run covers."""

    runs: int
    seed: int
    jobs: int
    quick: bool
    out: Path | None
    note: str = ""


def scored_runs(options: Options) -> Iterator[RunScore]:
    """Yield each run's scores as it finishes (heaters, the long ones, first)."""
    order = sorted(range(options.runs), key=lambda i: (world_plan(i)[0] != HEATER, i))
    tasks = [(i, options.seed) for i in order]
    if options.jobs <= 1:
        yield from map(run_world, tasks)
        return
    with multiprocessing.get_context("spawn").Pool(options.jobs) as pool:
        yield from pool.imap_unordered(run_world, tasks)


def run(options: Options) -> dict[str, object]:
    """Return the whole benchmark result (the printed JSON object)."""
    started = time.perf_counter()
    scores: list[RunScore] = []
    for s in scored_runs(options):
        scores.append(s)
        note = s.failure or (
            f"25% error {num(s.eta_error.get('25%'), 3)}, fit {num(s.fit_error.get('25%'), 3)}"
        )
        log(
            f"{len(scores)}/{options.runs} {s.kind} seed {s.seed}: {note} "
            f"({time.perf_counter() - started:.0f} s)"
        )
    scores.sort(key=lambda s: s.index)
    # a run that failed stays in every figure, as infinite errors and missing z
    fig = figures(scores)
    checks = target_checks(fig)
    result: dict[str, object] = {
        "benchmark": "bench_worlds",
        "ebullio_version": __version__,
        "git": git_state(),
        "note": options.note,
        "estimator_module": str(Path(sys.modules[VesselEstimator.__module__].__file__)),
        "python": platform.python_version(),
        "machine": platform.machine(),
        "options": {
            "runs": options.runs,
            "seed": options.seed,
            "jobs": options.jobs,
            "quick": options.quick,
        },
        "runs": {
            "total": len(scores),
            "scored": sum(s.failure is None for s in scores),
            "failed": [
                {"seed": s.seed, "kind": s.kind, "why": s.failure} for s in scores if s.failure
            ],
            KETTLE: sum(s.kind == KETTLE for s in scores),
            HEATER: sum(s.kind == HEATER for s in scores),
            "with_element_thermocouple": sum(s.element_sensor for s in scores),
            "with_energy_counter": sum(s.energy_counter for s in scores),
        },
        "given_to_estimator": sorted(
            {
                "vessel_heat_capacity_j_per_k",
                "pressure_kpa",
                "rated_power_w",
                "target_c (heaters only)",
            }
        ),
        "worlds": world_ranges(),
        **fig,
        "by_kind": {
            kind: {
                "time_to_target": time_to_target_summary([s for s in scores if s.kind == kind]),
                "coverage_90": coverage_summary([s for s in scores if s.kind == kind]),
                "z_rms": z_summary([s for s in scores if s.kind == kind]),
                "z_per_decile": z_per_decile([s for s in scores if s.kind == kind]),
            }
            for kind in (KETTLE, HEATER)
        },
        "by_sensors": {
            name: {
                "runs": len(group),
                "time_to_target_50%": error_stats(s.eta_error.get("50%") for s in group),
                "coverage_90": coverage_summary(group)["overall"],
                "water_mass_mid_heat_up": error_stats(s.mass_mid_error for s in group),
            }
            for name, group in (
                (
                    "element_and_energy",
                    [s for s in scores if s.element_sensor and s.energy_counter],
                ),
                (
                    "element_power_only",
                    [s for s in scores if s.element_sensor and not s.energy_counter],
                ),
                (
                    "no_element_energy",
                    [s for s in scores if not s.element_sensor and s.energy_counter],
                ),
                (
                    "no_element_power_only",
                    [s for s in scores if not s.element_sensor and not s.energy_counter],
                ),
            )
        },
        "worst_runs": worst_runs(scores),
        "targets": {
            "met": sum(c.met for c in checks),
            "of": len(checks),
            "checks": [c.as_dict() for c in checks],
        },
        "seconds": {
            "wall": num(time.perf_counter() - started),
            "simulation_cpu": num(sum(s.sim_s for s in scores)),
            "estimator_cpu": num(sum(s.estimator_s for s in scores)),
            "offline_fit_cpu": num(sum(s.fit_s for s in scores)),
        },
        "runs_detail": [detail(s) for s in scores],
    }
    return result


def detail(s: RunScore) -> dict[str, object]:
    """Return one run's figures, JSON-ready (non-finite numbers as null)."""

    def clean(value: object) -> object:
        if isinstance(value, float):
            return num(value)
        if isinstance(value, dict):
            return {k: clean(v) for k, v in value.items()}
        return value

    keep = asdict(s)
    for key in ("mass_z", "g_z", "ua_z", "eta_covered"):
        keep.pop(key)
    return {k: clean(v) for k, v in keep.items()}


def parse_options(argv: Sequence[str] | None = None) -> Options:
    """Return the options from the command line."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=None, help="runs to score (default 200)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the first run (default 0)")
    parser.add_argument("--jobs", type=int, default=2, help="worker processes (default 2)")
    parser.add_argument("--quick", action="store_true", help="10 runs: a smoke run")
    parser.add_argument("--out", type=Path, default=None, help="also write the JSON here")
    parser.add_argument("--note", default="", help="a line kept in the JSON (what was run)")
    args = parser.parse_args(argv)
    runs = args.runs if args.runs is not None else (10 if args.quick else 200)
    if runs < 5:
        parser.error("--runs must be at least 5 (one heater in every five runs)")
    if args.jobs < 1 or args.jobs > (os.cpu_count() or 1) * 4:
        parser.error("--jobs must be between 1 and four per CPU")
    return Options(
        runs=runs, seed=args.seed, jobs=args.jobs, quick=args.quick, out=args.out, note=args.note
    )


def main(argv: Sequence[str] | None = None) -> int:
    """Run the benchmark, print its JSON object (and write it to --out); return 0."""
    options = parse_options(argv)
    text = json.dumps(run(options), indent=2)
    if options.out is not None:
        try:
            options.out.parent.mkdir(parents=True, exist_ok=True)
            options.out.write_text(text + "\n", encoding="utf-8")
        except OSError as exc:
            print(f"bench_worlds: cannot write {options.out}: {exc}", file=sys.stderr)
            print(text)
            return 1
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
