"""The simulated rig: a virtual heated vessel that emits samples like any driver.

It is deliberately richer than the estimator's lumped model, so the estimator is
always tested against a world it does not assume:

* three thermal nodes: the element (or hot plate), the water, and the wall;
* a resistive element, P = V²/R(T_e) with R rising with temperature, fed by a
  mains voltage that wanders (an Ornstein-Uhlenbeck process);
* element-to-water conductance as a series of the water-side film and a scale
  layer, G = 1 / (1/(h·A) + δ/(k_scale·A)), with the film coefficient rising
  once the element surface passes the boiling point (nucleate boiling);
* optionally a lid (or second wall part) with its own heat capacity and its own
  conductances to the water and to the room, so its own lag
  (:class:`LidSpec`; off by default);
* optionally a small conductance from the element or plate straight to the room,
  a path that bypasses the water (``ElementSpec.to_room_w_per_k``; 0 by default);
* the wall loses heat to the room by natural convection,
  h_c = 1.42·(ΔT/L)^¼ W/(m²·K) (simplified laminar form for air, from memory,
  see shared/reference/REFERENCE.md §4.3), and by grey-body radiation,
  ε·σ·A·(T_s⁴ - T_a⁴);
* at the boiling point of the site pressure the water is clamped and surplus heat
  evaporates water at the latent heat, so the mass falls;
* a kettle that switches off a set time after boiling starts, or a storage heater
  with a thermostat, hysteresis, an optional idle before it first switches on, and
  draw-offs of cold water;
* sensors with first-order lag, noise, quantisation, dropouts and spikes,
  optionally reporting raw thermocouple millivolts with a cold junction.

Water properties come straight from IAPWS-IF97 (``iapws``), memoised on a 0.01 K
grid, not from ``monitor/``: ``drivers/`` imports nothing from ``monitor/``, and
the simulated world should not share the estimator's shortcuts.

Every feature added after the first demo logs defaults to off, so that existing
scenarios and seeds give the same samples, bit for bit (``replay_logs/`` depends
on it). A log without an energy counter is a scenario whose ``sensors`` have no
``energy`` entry; one without an element thermocouple has no ``element`` entry.

Everything random draws from one ``numpy.random.default_rng(seed)``; the same
scenario and seed give the same samples, bit for bit. Time comes from an
injected clock, so a run goes as fast as the CPU allows or in real time.
"""

from __future__ import annotations

import asyncio
import math
import time
from collections.abc import AsyncIterator, Iterator
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from functools import lru_cache
from typing import Protocol
from urllib.parse import parse_qs, urlsplit

import numpy as np
from iapws import IAPWS97
from iapws.iapws97 import _Region1, _TSat_P
from scipy.optimize import brentq

from drivers import thermocouple
from drivers.constants import STEFAN_BOLTZMANN_W_PER_M2_K4, ZERO_CELSIUS_K
from drivers.errors import ConfigError, DriverError
from drivers.sample import Quality, Sample

#: Water left (kg) at which the simulated dry-boil cut-out switches the element off.
DRY_CUTOUT_KG = 0.03
#: Kelvin below the boiling point at which nucleate boiling at the element starts.
BOILING_ONSET_K = 5.0
#: 2026-01-01T00:00:00Z, the default start of a simulated log (fixed so logs repeat).
DEFAULT_START_EPOCH_S = 1767225600.0


# ---------------------------------------------------------------------------
# Water, straight from IAPWS-IF97
# ---------------------------------------------------------------------------


@lru_cache(maxsize=65536)
def _liquid(t_centi_k: int, p_kpa: float) -> tuple[float, float]:
    """Return (c_p J/(kg·K), h J/kg) of liquid water at t_centi_k/100 K and p_kpa."""
    props = _Region1(t_centi_k / 100.0, p_kpa / 1000.0)
    return float(props["cp"]) * 1000.0, float(props["h"]) * 1000.0


def liquid_cp_j_per_kg_k(t_c: float, p_kpa: float) -> float:
    """Return c_p of liquid water in J/(kg·K), IF97 region 1 at the nearest 0.01 K."""
    return _liquid(round((t_c + ZERO_CELSIUS_K) * 100.0), p_kpa)[0]


def liquid_h_j_per_kg(t_c: float, p_kpa: float) -> float:
    """Return the specific enthalpy of liquid water in J/kg, IF97 region 1 (exact T)."""
    return float(_Region1(t_c + ZERO_CELSIUS_K, p_kpa / 1000.0)["h"]) * 1000.0


def _liquid_h_fast(t_c: float, p_kpa: float) -> float:
    """Return the enthalpy of liquid water in J/kg at the nearest 0.01 K (for draw-offs)."""
    return _liquid(round((t_c + ZERO_CELSIUS_K) * 100.0), p_kpa)[1]


@lru_cache(maxsize=64)
def saturation(p_kpa: float) -> tuple[float, float]:
    """Return (boiling point °C, latent heat J/kg) at p_kpa, from IAPWS-IF97."""
    t_sat_c = float(_TSat_P(p_kpa / 1000.0)) - ZERO_CELSIUS_K
    h_f = IAPWS97(P=p_kpa / 1000.0, x=0.0).h
    h_g = IAPWS97(P=p_kpa / 1000.0, x=1.0).h
    return t_sat_c, float(h_g - h_f) * 1000.0


# ---------------------------------------------------------------------------
# Scenario description (frozen; build variants with dataclasses.replace)
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class ElementSpec:
    """A resistive element or hot plate and its contact with the water."""

    rated_power_w: float
    rated_voltage_v: float
    heat_capacity_j_per_k: float
    area_m2: float  # wetted area, m²
    film_w_per_m2_k: float  # clean water-side film coefficient below surface boiling
    boiling_film_factor: float = 1.6  # film multiplier once nucleate boiling is fully developed
    resistance_tempco_per_k: float = 1.0e-4  # nickel-chromium order of magnitude (from memory)
    to_room_w_per_k: float = 0.0  # straight from the element or plate to the room, W/K

    def __post_init__(self) -> None:
        if not self.to_room_w_per_k >= 0.0:
            raise ConfigError(f"element to_room_w_per_k must be >= 0, got {self.to_room_w_per_k}")

    @property
    def resistance_20c_ohm(self) -> float:
        """Return the element resistance at 20 °C in Ω, from the rating."""
        return self.rated_voltage_v**2 / self.rated_power_w


@dataclass(frozen=True)
class ShellSpec:
    """The wall between the water and the room."""

    heat_capacity_j_per_k: float
    inner_conductance_w_per_k: float  # water to wall (film, or film plus insulation), W/K
    outer_area_m2: float
    height_m: float  # characteristic length for natural convection, m
    emissivity: float
    insulated: bool = False  # True: the wall sits behind insulation and stays near the room


@dataclass(frozen=True)
class LidSpec:
    """A lid or second wall part: its own heat capacity (J/K) and conductances (W/K).

    Heat flows water → lid → room through two fixed conductances, so the lid follows
    the water with its own lag, C_lid / (G_water + G_room).
    """

    heat_capacity_j_per_k: float
    to_water_w_per_k: float
    to_room_w_per_k: float

    def __post_init__(self) -> None:
        for key in ("heat_capacity_j_per_k", "to_water_w_per_k", "to_room_w_per_k"):
            if not getattr(self, key) > 0.0:
                raise ConfigError(f"lid {key} must be > 0, got {getattr(self, key)!r}")

    def series_w_per_k(self) -> float:
        """Return the steady conductance water → lid → room, W/K (two in series)."""
        return 1.0 / (1.0 / self.to_water_w_per_k + 1.0 / self.to_room_w_per_k)


@dataclass(frozen=True)
class KettleSwitch:
    """A kettle's steam switch: on from the start, off a fixed time after boiling starts."""

    off_delay_s: float = 12.0
    start_delay_s: float = 5.0


@dataclass(frozen=True)
class Thermostat:
    """A storage heater's thermostat on the water temperature, with its own bulb lag."""

    setpoint_c: float = 60.0
    hysteresis_k: float = 6.0
    bulb_tau_s: float = 90.0
    start_delay_s: float = 0.0  # idle before the heater may first switch on, s


@dataclass(frozen=True)
class DrawOff:
    """A draw of hot water replaced by cold water at the same rate."""

    start_s: float
    volume_l: float
    flow_l_per_min: float = 8.0
    cold_c: float = 12.0


@dataclass(frozen=True)
class SensorSpec:
    """A sensor's imperfections: lag (s), noise (unit sd), quantisation, faults."""

    tau_s: float = 0.0
    noise_sd: float = 0.0
    noise_fraction: float = 0.0  # extra noise sd as a fraction of the reading
    resolution: float = 0.0
    dropout_probability: float = 0.0
    spike_probability: float = 0.0
    spike_size: float = 0.0
    offset: float = 0.0  # a calibration error, in the channel's unit
    raw_tc_type: str | None = None  # report raw thermocouple mV (channel "<role>_emf")


def _default_sensors() -> dict[str, SensorSpec]:
    return {
        "water": SensorSpec(
            tau_s=4.0,
            noise_sd=0.05,
            resolution=0.01,
            dropout_probability=0.002,
            spike_probability=0.001,
            spike_size=8.0,
        ),
        "element": SensorSpec(tau_s=1.5, noise_sd=0.1, resolution=0.01, dropout_probability=0.002),
        "ambient": SensorSpec(tau_s=20.0, noise_sd=0.05, resolution=0.01),
        "power": SensorSpec(noise_sd=0.3, noise_fraction=0.003, resolution=0.1),
        "voltage": SensorSpec(noise_sd=0.1, resolution=0.01),
        "current": SensorSpec(noise_sd=0.002, noise_fraction=0.003, resolution=0.001),
        "energy": SensorSpec(resolution=0.01),
    }


@dataclass(frozen=True)
class Scenario:
    """Everything that defines a simulated run."""

    name: str
    vessel: str
    element: ElementSpec
    shell: ShellSpec
    control: KettleSwitch | Thermostat
    water_mass_kg: float
    start_water_c: float
    ambient_c: float
    duration_s: float
    sample_interval_s: float = 1.0
    pressure_kpa: float = 101.325
    altitude_m: float | None = None
    scale_mm: float = 0.0
    tank_heat_capacity_j_per_k: float = 0.0  # metal in good contact with the water, J/K
    scale_conductivity_w_per_m_k: float = 1.2  # porous scale, inside 0.5-2.9 (REFERENCE §5.1)
    mains_wander_v: float = 2.5  # sd of the mains voltage about its rating, V
    mains_tau_s: float = 120.0
    ambient_wander_k: float = 0.3
    ambient_tau_s: float = 1800.0
    draws: tuple[DrawOff, ...] = ()
    nominal_volume_l: float | None = None
    target_c: float | None = None
    start_epoch_s: float = DEFAULT_START_EPOCH_S
    sensors: dict[str, SensorSpec] = field(default_factory=_default_sensors)
    cold_junction_offset_k: float = 3.0  # terminal block above the room, for raw mV sensors
    lid: LidSpec | None = None  # a lid or second wall part with its own lag (None: none)

    def __post_init__(self) -> None:
        checks = {
            "water_mass_kg": self.water_mass_kg > 0.0,
            "duration_s": self.duration_s > 0.0,
            "sample_interval_s": self.sample_interval_s > 0.0,
            "scale_mm": self.scale_mm >= 0.0,
            "pressure_kpa": 1.0 <= self.pressure_kpa <= 500.0,
        }
        for key, good in checks.items():
            if not good:
                raise ConfigError(f"scenario {self.name!r}: bad {key} = {getattr(self, key)!r}")
        unknown = set(self.sensors) - {
            "water",
            "element",
            "ambient",
            "wall",
            "power",
            "voltage",
            "current",
            "energy",
        }
        if unknown:
            raise ConfigError(f"scenario {self.name!r}: unknown sensor roles {sorted(unknown)}")

    @property
    def vessel_heat_capacity_j_per_k(self) -> float:
        """Return the heat capacity (J/K) of what is not water but follows its temperature.

        The element, the tank metal, the lid if there is one and, unless it sits
        behind insulation, the wall: what a commissioning run of the empty vessel
        would measure.
        """
        wall = 0.0 if self.shell.insulated else self.shell.heat_capacity_j_per_k
        total = self.element.heat_capacity_j_per_k + self.tank_heat_capacity_j_per_k + wall
        if self.lid is not None:
            total += self.lid.heat_capacity_j_per_k
        return total

    def clean_element_conductance_w_per_k(self) -> float:
        """Return the element-to-water conductance without scale, below surface boiling, W/K."""
        return self.element.film_w_per_m2_k * self.element.area_m2

    def element_conductance_w_per_k(self, boiling_fraction: float = 0.0) -> float:
        """Return the element-to-water conductance in W/K with this scenario's scale.

        Series resistances per unit area: water film 1/h and scale δ/k, so
        G = A / (1/h + δ/k). ``boiling_fraction`` (0..1) raises the film
        coefficient towards ``boiling_film_factor``·h as nucleate boiling develops.
        """
        el = self.element
        film = el.film_w_per_m2_k * (1.0 + (el.boiling_film_factor - 1.0) * boiling_fraction)
        scale_m = self.scale_mm / 1000.0
        return el.area_m2 / (1.0 / film + scale_m / self.scale_conductivity_w_per_m_k)


def kettle_scenario(**changes: object) -> Scenario:
    """Return a 2.2 kW jug kettle with 1.2 kg of water from 15 °C (a scenario of our own)."""
    base = Scenario(
        name="kettle",
        vessel="kettle-1",
        element=ElementSpec(
            rated_power_w=2200.0,
            rated_voltage_v=230.0,
            heat_capacity_j_per_k=160.0,
            area_m2=0.018,
            film_w_per_m2_k=3000.0,
        ),
        shell=ShellSpec(
            heat_capacity_j_per_k=260.0,
            inner_conductance_w_per_k=25.0,
            outer_area_m2=0.075,
            height_m=0.2,
            emissivity=0.3,
        ),
        control=KettleSwitch(),
        water_mass_kg=1.2,
        start_water_c=15.0,
        ambient_c=21.0,
        duration_s=900.0,
        nominal_volume_l=1.7,
    )
    return replace(base, **changes)


def water_heater_scenario(**changes: object) -> Scenario:
    """Return an 80 L, 2 kW storage water heater heating from cold, with evening draws.

    A scenario of our own: 12 hours at 10 s intervals, thermostat at 60 °C.
    """
    base = Scenario(
        name="water-heater",
        vessel="heater-1",
        element=ElementSpec(
            rated_power_w=2000.0,
            rated_voltage_v=230.0,
            heat_capacity_j_per_k=300.0,
            area_m2=0.03,
            film_w_per_m2_k=2500.0,
        ),
        shell=ShellSpec(
            # 40 mm of foam (k ≈ 0.025 W/(m·K), common practice, no source) on 2.2 m²
            # gives 1.4 W/K; fittings and the flange add a little.
            heat_capacity_j_per_k=3000.0,
            inner_conductance_w_per_k=1.6,
            outer_area_m2=2.2,
            height_m=0.9,
            emissivity=0.9,
            insulated=True,
        ),
        tank_heat_capacity_j_per_k=11500.0,  # about 25 kg of steel at 460 J/(kg·K)
        control=Thermostat(),
        water_mass_kg=79.5,
        start_water_c=12.0,
        ambient_c=19.0,
        duration_s=12 * 3600.0,
        sample_interval_s=10.0,
        draws=(
            DrawOff(start_s=5.5 * 3600, volume_l=25.0),
            DrawOff(start_s=8 * 3600, volume_l=10.0),
            DrawOff(start_s=8.5 * 3600, volume_l=40.0),
        ),
        nominal_volume_l=80.0,
        target_c=60.0,
    )
    return replace(base, **changes)


SCENARIOS = {"kettle": kettle_scenario, "water-heater": water_heater_scenario}


def scenario_by_name(name: str, **changes: object) -> Scenario:
    """Return the named built-in scenario with ``changes`` applied."""
    try:
        factory = SCENARIOS[name]
    except KeyError:
        raise ConfigError(
            f"unknown scenario {name!r}; known scenarios: {', '.join(SCENARIOS)}"
        ) from None
    return factory(**changes)


# ---------------------------------------------------------------------------
# The physics
# ---------------------------------------------------------------------------


@dataclass
class RigState:
    """The true state of the simulated world (mutable, owned by one rig)."""

    element_c: float
    water_c: float
    wall_c: float
    water_mass_kg: float
    ambient_c: float
    voltage_v: float
    heating: bool = False
    cut_out: bool = False  # the dry-boil cut-out has tripped
    boiling_since_s: float | None = None
    bulb_c: float = 0.0
    lid_c: float = 0.0  # the lid's temperature, °C (only moves when the scenario has a lid)
    # running totals, J (and kg) since the start
    energy_in_j: float = 0.0
    energy_lost_j: float = 0.0
    latent_j: float = 0.0
    evaporated_kg: float = 0.0
    evaporated_sensible_j: float = 0.0  # m·h_f of the water that left as vapour
    draw_net_j: float = 0.0  # enthalpy drawn off minus enthalpy of the cold make-up


@dataclass(frozen=True)
class Flows:
    """Heat flows at one instant, W."""

    power_w: float
    to_water_w: float
    to_wall_w: float
    to_room_w: float  # everything that leaves for the room: wall, lid and element paths
    wall_to_room_w: float = 0.0  # the wall's own convection and radiation
    to_lid_w: float = 0.0  # water to lid
    lid_to_room_w: float = 0.0
    element_to_room_w: float = 0.0  # element or plate straight to the room


def wall_loss_w(scenario: Scenario, wall_c: float, ambient_c: float) -> float:
    """Return the heat lost from the wall to the room in W: convection plus radiation."""
    sh = scenario.shell
    dt_k = wall_c - ambient_c
    h_conv = 1.42 * (abs(dt_k) / sh.height_m) ** 0.25
    convection = h_conv * sh.outer_area_m2 * dt_k
    radiation = (
        sh.emissivity
        * STEFAN_BOLTZMANN_W_PER_M2_K4
        * sh.outer_area_m2
        * ((wall_c + ZERO_CELSIUS_K) ** 4 - (ambient_c + ZERO_CELSIUS_K) ** 4)
    )
    return convection + radiation


def effective_ua_w_per_k(scenario: Scenario, water_c: float, ambient_c: float) -> float:
    """Return the steady-state loss conductance (W/K) with the water held at ``water_c``.

    The element is off. The wall settles where the heat reaching it from the
    water equals what it loses to the room, G_in·(T_w - T_s) = loss(T_s); the
    effective UA is that loss over T_w - T_a, plus the paths that are linear: the
    lid's two conductances in series, and the element-to-water conductance (no
    surface boiling) in series with the element's own path to the room. This is
    the figure a one-node estimator should find once the water has been near
    ``water_c`` for longer than the wall and lid lags.
    """
    if water_c == ambient_c:
        water_c = ambient_c + 1e-3
    g_in = scenario.shell.inner_conductance_w_per_k

    def imbalance(wall_c: float) -> float:
        return g_in * (water_c - wall_c) - wall_loss_w(scenario, wall_c, ambient_c)

    wall_c = brentq(imbalance, min(water_c, ambient_c), max(water_c, ambient_c), xtol=1e-9)
    ua = wall_loss_w(scenario, wall_c, ambient_c) / (water_c - ambient_c)
    if scenario.lid is not None:
        ua += scenario.lid.series_w_per_k()
    g_room = scenario.element.to_room_w_per_k
    if g_room > 0.0:
        g = scenario.element_conductance_w_per_k(0.0)
        ua += 1.0 / (1.0 / g + 1.0 / g_room)
    return ua


def sim_url(scenario: Scenario, seed: int) -> str:
    """Return the ``sim://`` URL that rebuilds ``scenario``, with options that differ."""
    base = scenario_by_name(scenario.name)
    parts = [f"scenario={scenario.name}", f"seed={seed}"]
    for option, attr in _URL_OPTIONS:
        value = getattr(scenario, attr)
        if value != getattr(base, attr):
            parts.append(f"{option}={value}")
    return "sim://?" + "&".join(parts)


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


class SimulatedRig:
    """One simulated vessel with its instruments.

    ``advance(dt_s)`` moves the world on; ``read()`` returns the samples its
    instruments would give now. ``run()`` does both at the scenario's sample
    interval, as fast as the CPU allows.
    """

    def __init__(self, scenario: Scenario, seed: int = 0, source: str | None = None) -> None:
        self.scenario = scenario
        self.seed = seed
        self.source = source or f"sim://?scenario={scenario.name}&seed={seed}"
        self._rng = np.random.default_rng(seed)
        self._t_sat_c, self._h_fg = saturation(scenario.pressure_kpa)
        if scenario.start_water_c >= self._t_sat_c:
            raise ConfigError(
                f"scenario {scenario.name!r}: start water {scenario.start_water_c} °C is at or "
                f"above the boiling point {self._t_sat_c:.2f} °C"
            )
        s = scenario
        self.elapsed_s = 0.0
        self.state = RigState(
            element_c=s.start_water_c,
            water_c=s.start_water_c,
            wall_c=(s.start_water_c + s.ambient_c) / 2.0,
            water_mass_kg=s.water_mass_kg,
            ambient_c=s.ambient_c,
            voltage_v=s.element.rated_voltage_v,
            bulb_c=s.start_water_c,
            lid_c=(s.start_water_c + s.ambient_c) / 2.0,
        )
        self._initial = replace(self.state)
        # sensor states: lagged true values, per role
        self._lagged = {role: self._true_value(role) for role in s.sensors}
        self._last_energy_j = 0.0
        self._last_read_s = 0.0
        max_g = s.element_conductance_w_per_k(1.0)
        taus = [
            s.element.heat_capacity_j_per_k / max_g,
            s.shell.heat_capacity_j_per_k / max(s.shell.inner_conductance_w_per_k, 1e-9),
        ]
        if s.lid is not None:
            lid = s.lid
            taus.append(lid.heat_capacity_j_per_k / (lid.to_water_w_per_k + lid.to_room_w_per_k))
        #: RK4 sub-step, s: well inside the stability limit of the stiffest node
        #: (sensor lags are stepped exactly, so they do not limit it).
        self.substep_s = min(s.sample_interval_s, 0.25 * min(taus))

    # -- world ------------------------------------------------------------------------

    @property
    def boiling_point_c(self) -> float:
        """Return the boiling point at the scenario's site pressure, °C."""
        return self._t_sat_c

    @property
    def latent_heat_j_per_kg(self) -> float:
        """Return the latent heat of vaporisation at the site pressure, J/kg."""
        return self._h_fg

    def element_conductance_now_w_per_k(self) -> float:
        """Return the element-to-water conductance at the present state, W/K."""
        return self.scenario.element_conductance_w_per_k(self._boiling_fraction(self.state))

    def _boiling_fraction(self, st: RigState) -> float:
        # nucleate boiling at the element develops over the last few kelvin before the
        # bulk boils (subcooled boiling), raising the film coefficient towards its
        # boiling value; below that the element sees plain convection.
        onset_c = self._t_sat_c - BOILING_ONSET_K
        return min(max((st.water_c - onset_c) / BOILING_ONSET_K, 0.0), 1.0)

    def _power_w(self, st: RigState) -> float:
        if not st.heating:
            return 0.0
        el = self.scenario.element
        resistance = el.resistance_20c_ohm * (
            1.0 + el.resistance_tempco_per_k * (st.element_c - 20.0)
        )
        return st.voltage_v**2 / resistance

    def _draw_flow_kg_per_s(self, t_s: float) -> tuple[float, float]:
        for d in self.scenario.draws:
            length_s = d.volume_l / d.flow_l_per_min * 60.0
            if d.start_s <= t_s < d.start_s + length_s:
                return d.flow_l_per_min / 60.0, d.cold_c  # ~1 kg per litre of cold water
        return 0.0, 0.0

    def flows(self, st: RigState | None = None) -> Flows:
        """Return the heat flows (W) at a state, by default the present one."""
        st = st or self.state
        s = self.scenario
        power = self._power_w(st)
        g = s.element_conductance_w_per_k(self._boiling_fraction(st))
        wall_to_room_w = to_room_w = wall_loss_w(s, st.wall_c, st.ambient_c)
        to_lid_w = lid_to_room_w = element_to_room_w = 0.0
        # the optional paths are added only when present, so a scenario without them
        # gives the same floating-point results as before they existed
        if s.lid is not None:
            to_lid_w = s.lid.to_water_w_per_k * (st.water_c - st.lid_c)
            lid_to_room_w = s.lid.to_room_w_per_k * (st.lid_c - st.ambient_c)
            to_room_w += lid_to_room_w
        if s.element.to_room_w_per_k > 0.0:
            element_to_room_w = s.element.to_room_w_per_k * (st.element_c - st.ambient_c)
            to_room_w += element_to_room_w
        return Flows(
            power_w=power,
            to_water_w=g * (st.element_c - st.water_c),
            to_wall_w=s.shell.inner_conductance_w_per_k * (st.water_c - st.wall_c),
            to_room_w=to_room_w,
            wall_to_room_w=wall_to_room_w,
            to_lid_w=to_lid_w,
            lid_to_room_w=lid_to_room_w,
            element_to_room_w=element_to_room_w,
        )

    def _derivatives(self, st: RigState, t_s: float) -> tuple[float, ...]:
        """Return the rates of [T_e, T_w, T_s] (K/s), [energy in, lost, drawn] (W), T_lid (K/s)."""
        s = self.scenario
        f = self.flows(st)
        p = s.pressure_kpa
        cp = liquid_cp_j_per_kg_k(st.water_c, p)
        flow, cold_c = self._draw_flow_kg_per_s(t_s)
        # a draw takes water out at h(T_w) and lets cold water in at h(T_cold)
        drawn_w = (
            flow * (_liquid_h_fast(st.water_c, p) - _liquid_h_fast(cold_c, p)) if flow else 0.0
        )
        # Subtracting the optional paths' 0.0 when they are absent is exact in IEEE
        # arithmetic, so scenarios without them keep their samples bit for bit.
        d_element = (
            f.power_w - f.to_water_w - f.element_to_room_w
        ) / s.element.heat_capacity_j_per_k
        water_capacity = st.water_mass_kg * cp + s.tank_heat_capacity_j_per_k
        d_water = (f.to_water_w - f.to_wall_w - f.to_lid_w - drawn_w) / water_capacity
        d_wall = (f.to_wall_w - f.wall_to_room_w) / s.shell.heat_capacity_j_per_k
        d_lid = (f.to_lid_w - f.lid_to_room_w) / s.lid.heat_capacity_j_per_k if s.lid else 0.0
        return d_element, d_water, d_wall, f.power_w, f.to_room_w, drawn_w, d_lid

    def _substep(self, h: float) -> None:
        st = self.state
        t0 = self.elapsed_s
        y0 = (st.element_c, st.water_c, st.wall_c, st.lid_c)

        def at(k: tuple[float, ...], frac: float) -> RigState:
            return replace(
                st,
                element_c=y0[0] + frac * h * k[0],
                water_c=y0[1] + frac * h * k[1],
                wall_c=y0[2] + frac * h * k[2],
                lid_c=y0[3] + frac * h * k[6],
            )

        # classical RK4 over the temperatures (element, water, wall, lid) and the three
        # running energy totals
        k1 = self._derivatives(st, t0)
        k2 = self._derivatives(at(k1, 0.5), t0 + 0.5 * h)
        k3 = self._derivatives(at(k2, 0.5), t0 + 0.5 * h)
        k4 = self._derivatives(at(k3, 1.0), t0 + h)
        inc = [
            h / 6.0 * (a + 2.0 * b + 2.0 * c + d) for a, b, c, d in zip(k1, k2, k3, k4, strict=True)
        ]
        st.element_c += inc[0]
        st.water_c += inc[1]
        st.wall_c += inc[2]
        st.energy_in_j += inc[3]
        st.energy_lost_j += inc[4]
        st.draw_net_j += inc[5]
        st.lid_c += inc[6]
        if st.water_c > self._t_sat_c:
            # boiling clamp: the sensible heat above saturation leaves as vapour
            cp = liquid_cp_j_per_kg_k(self._t_sat_c, self.scenario.pressure_kpa)
            capacity = st.water_mass_kg * cp + self.scenario.tank_heat_capacity_j_per_k
            surplus_j = capacity * (st.water_c - self._t_sat_c)
            boiled_kg = surplus_j / self._h_fg
            st.water_c = self._t_sat_c
            st.water_mass_kg -= boiled_kg
            st.latent_j += surplus_j
            st.evaporated_kg += boiled_kg
            st.evaporated_sensible_j += boiled_kg * liquid_h_j_per_kg(
                self._t_sat_c, self.scenario.pressure_kpa
            )
        self.elapsed_s = t0 + h
        self._lag_sensors(h)

    def _control(self) -> None:
        st, s = self.state, self.scenario
        c = s.control
        t = self.elapsed_s
        if st.water_mass_kg < DRY_CUTOUT_KG or st.cut_out:
            # the dry-boil cut-out: once tripped the element stays off for the run
            st.cut_out = True
            st.heating = False
            return
        if isinstance(c, KettleSwitch):
            if st.boiling_since_s is None and st.water_c >= self._t_sat_c - 1e-9:
                st.boiling_since_s = t
            # once the steam switch trips it stays off for the rest of the run
            switched_off = (
                st.boiling_since_s is not None and t >= st.boiling_since_s + c.off_delay_s
            )
            st.heating = t >= c.start_delay_s and not switched_off
        elif t < c.start_delay_s:
            st.heating = False  # the idle before the heater is first switched on
        else:
            if st.bulb_c < c.setpoint_c - c.hysteresis_k:
                st.heating = True
            elif st.bulb_c >= c.setpoint_c:
                st.heating = False

    def _wander(self, dt_s: float) -> None:
        """Move mains voltage and room temperature on by exact OU steps over dt_s."""
        s, st = self.scenario, self.state
        for attr, mean, sd, tau in (
            ("voltage_v", s.element.rated_voltage_v, s.mains_wander_v, s.mains_tau_s),
            ("ambient_c", s.ambient_c, s.ambient_wander_k, s.ambient_tau_s),
        ):
            a = math.exp(-dt_s / tau)
            value = (
                mean
                + (getattr(st, attr) - mean) * a
                + sd * math.sqrt(1.0 - a * a) * float(self._rng.standard_normal())
            )
            setattr(st, attr, value)

    def advance(self, dt_s: float) -> None:
        """Move the world on by ``dt_s`` seconds (several RK4 sub-steps)."""
        end = self.elapsed_s + dt_s
        self._wander(dt_s)
        while self.elapsed_s < end - 1e-12:
            self._control()
            self._substep(min(self.substep_s, end - self.elapsed_s))
            c = self.scenario.control
            if isinstance(c, Thermostat):
                a = 1.0 - math.exp(-self.substep_s / c.bulb_tau_s)
                self.state.bulb_c += a * (self.state.water_c - self.state.bulb_c)
        self._control()

    # -- instruments --------------------------------------------------------------------

    def _true_value(self, role: str) -> float:
        st = self.state
        temps = {
            "water": st.water_c,
            "element": st.element_c,
            "ambient": st.ambient_c,
            "wall": st.wall_c,
            "lid": st.lid_c,
        }
        if role in temps:
            return temps[role]
        power = self._power_w(st)
        if role == "power":
            return power
        if role == "voltage":
            return st.voltage_v
        if role == "current":
            return power / st.voltage_v
        if role == "energy":
            return st.energy_in_j / 3600.0
        raise ConfigError(f"no true value for role {role!r}")

    def _lag_sensors(self, h: float) -> None:
        for role, spec in self.scenario.sensors.items():
            if spec.tau_s > 0.0 and role in ("water", "element", "ambient", "wall"):
                a = -math.expm1(-h / spec.tau_s)
                self._lagged[role] += a * (self._true_value(role) - self._lagged[role])

    def truth(self) -> dict[str, float]:
        """Return the true state now: temperatures °C, mass kg, conductance W/K, power W."""
        st = self.state
        return {
            "elapsed_s": self.elapsed_s,
            "water_c": st.water_c,
            "element_c": st.element_c,
            "wall_c": st.wall_c,
            "lid_c": st.lid_c,
            "ambient_c": st.ambient_c,
            "water_mass_kg": st.water_mass_kg,
            "element_conductance_w_per_k": self.element_conductance_now_w_per_k(),
            "power_w": self._power_w(st),
            "voltage_v": st.voltage_v,
        }

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
            true = (
                (self.state.energy_in_j - self._last_energy_j) / interval_s if interval_s else 0.0
            )
        elif role in ("water", "element", "ambient", "wall") and spec.tau_s > 0.0:
            true = self._lagged[role]
        else:
            true = self._true_value(role)
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
        s = self.scenario
        t = s.start_epoch_s + self.elapsed_s
        interval = self.elapsed_s - self._last_read_s
        out: list[Sample] = []
        cold_junction_c = self.state.ambient_c + s.cold_junction_offset_k
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
        self._last_energy_j = self.state.energy_in_j
        self._last_read_s = self.elapsed_s
        return out

    def run(self) -> Iterator[list[Sample]]:
        """Yield the samples of each instant from t = 0 to the end of the scenario."""
        s = self.scenario
        steps = round(s.duration_s / s.sample_interval_s)
        self._control()
        yield self.read()
        for _ in range(steps):
            self.advance(s.sample_interval_s)
            yield self.read()

    def energy_balance_j(self) -> dict[str, float]:
        """Return the run's energy account so far, J: in, lost, latent, drawn, stored."""
        st, s, p = self.state, self.scenario, self.scenario.pressure_kpa
        first = self._initial
        stored = (
            s.element.heat_capacity_j_per_k * (st.element_c - first.element_c)
            + s.shell.heat_capacity_j_per_k * (st.wall_c - first.wall_c)
            + (s.lid.heat_capacity_j_per_k * (st.lid_c - first.lid_c) if s.lid else 0.0)
            + s.tank_heat_capacity_j_per_k * (st.water_c - first.water_c)
            + st.water_mass_kg * liquid_h_j_per_kg(st.water_c, p)
            + st.evaporated_sensible_j
            - first.water_mass_kg * liquid_h_j_per_kg(first.water_c, p)
        )
        return {
            "in": st.energy_in_j,
            "lost": st.energy_lost_j,
            "latent": st.latent_j,
            "drawn": st.draw_net_j,
            "stored": stored,
        }


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


# ---------------------------------------------------------------------------
# Clocks and the driver face
# ---------------------------------------------------------------------------


class Clock(Protocol):
    """Where simulated time meets real time."""

    def start_epoch_s(self) -> float | None:
        """Return the epoch at which the run starts, or None to keep the scenario's."""

    async def wait_until(self, elapsed_s: float) -> None:
        """Return once ``elapsed_s`` seconds of the run have passed on this clock."""


class FastClock:
    """Runs as fast as the CPU allows; keeps the scenario's fixed start time."""

    def start_epoch_s(self) -> float | None:
        """Return None: keep the scenario's start time."""
        return None

    async def wait_until(self, elapsed_s: float) -> None:
        """Return at once, after letting other tasks run."""
        del elapsed_s
        await asyncio.sleep(0)


class PacedClock:
    """Runs at ``speed`` times real time from now, stamping samples with the wall clock."""

    def __init__(self, speed: float = 1.0) -> None:
        if not speed > 0.0:
            raise ConfigError(f"clock speed must be > 0, got {speed}")
        self.speed = speed
        self._t0_mono = time.monotonic()
        self._t0_wall = time.time()

    def start_epoch_s(self) -> float | None:
        """Return the wall-clock time at which the clock was made, s since the epoch."""
        return self._t0_wall

    async def wait_until(self, elapsed_s: float) -> None:
        """Sleep until ``elapsed_s`` simulated seconds have passed at this speed."""
        delay = self._t0_mono + elapsed_s / self.speed - time.monotonic()
        await asyncio.sleep(max(delay, 0.0))

    def slip(self, elapsed_s: float) -> float:
        """Move the clock's start on by however late it is for ``elapsed_s``; return that (s).

        Called after :meth:`wait_until`, a stalled run then goes on at pace from where
        it stalled, instead of catching up in a burst of back-to-back instants.
        """
        late_s = time.monotonic() - (self._t0_mono + elapsed_s / self.speed)
        if late_s > 0.0:
            self._t0_mono += late_s
            return late_s
        return 0.0


#: ``sim://`` URL options that change the scenario, and the Scenario field each sets.
_URL_OPTIONS = (
    ("vessel", "vessel"),
    ("scale_mm", "scale_mm"),
    ("duration_s", "duration_s"),
    ("mass_kg", "water_mass_kg"),
    ("pressure_kpa", "pressure_kpa"),
)


def parse_sim_url(url: str) -> tuple[Scenario, int, float | None]:
    """Return (scenario, seed, speed or None for fast) from a ``sim://`` URL.

    Options: ``scenario`` (kettle, water-heater; default kettle), ``seed`` (int,
    default 0), ``scale_mm`` (scale on the element, mm), ``speed`` (times real
    time; absent = as fast as possible), ``vessel`` (id), ``duration_s``,
    ``mass_kg`` (water fill), ``pressure_kpa``. Example:
    ``sim://?scenario=kettle&seed=7&scale_mm=0.3&speed=10``.
    """
    parts = urlsplit(url)
    if parts.scheme != "sim":
        raise ConfigError(f"not a sim:// URL: {url!r}")
    query = {k: v[-1] for k, v in parse_qs(parts.query, strict_parsing=False).items()}
    known = {"scenario", "seed", "speed"} | {option for option, _ in _URL_OPTIONS}
    unknown = set(query) - known
    if unknown:
        raise ConfigError(f"{url!r}: unknown options {sorted(unknown)}; known: {sorted(known)}")
    try:
        changes: dict[str, object] = {}
        for key, attr in _URL_OPTIONS:
            if key in query:
                changes[attr] = query[key] if attr == "vessel" else float(query[key])
        seed = int(query.get("seed", "0"))
        speed = float(query["speed"]) if "speed" in query else None
    except ValueError as exc:
        raise ConfigError(f"{url!r}: {exc}") from exc
    return scenario_by_name(query.get("scenario", "kettle"), **changes), seed, speed


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
