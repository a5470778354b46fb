"""What a simulated run is: the vessel, its element, wall, lid, controls, draws and sensors.

A :class:`Scenario` is frozen; build variants with ``dataclasses.replace`` or the
keyword changes of :func:`kettle_scenario` and :func:`water_heater_scenario`. Every
feature added after the first demo logs defaults to off, so that existing scenarios
and seeds give the same samples, bit for bit (``replay_logs/`` depends on it). A log
without an energy counter is a scenario whose ``sensors`` have no ``energy`` entry;
one without an element thermocouple has no ``element`` entry.

The ``sim://`` URL names a built-in scenario and the few options that change it
(:func:`parse_sim_url`, :func:`sim_url`); the driver that reads it is
:mod:`drivers.sim`.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from urllib.parse import parse_qs, urlsplit

from drivers.errors import ConfigError

#: 2026-01-01T00:00:00Z, the default start of a simulated log (fixed so logs repeat).
DEFAULT_START_EPOCH_S = 1767225600.0


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
    scale_conductivity_w_per_m_k: float = 1.2  # porous scale, inside 0.5-2.9 (from memory)
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
    #: the RK4 sub-step, s (None: a quarter of the stiffest node's time constant with the
    #: boiling film; a vessel kept well below the boil may take the plain film's)
    substep_s: float | None = None

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
# The sim:// URL
# ---------------------------------------------------------------------------


#: ``sim://`` URL options that change the scenario, and the Scenario field each sets.
URL_OPTIONS = (
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
    known = {"scenario", "seed", "speed"} | {option for option, _ in URL_OPTIONS}
    unknown = set(query) - known
    if unknown:
        raise ConfigError(f"{url!r}: unknown options {sorted(unknown)}; known: {sorted(known)}")
    try:
        changes: dict[str, object] = {}
        for key, attr in URL_OPTIONS:
            if key in query:
                changes[attr] = query[key] if attr == "vessel" else float(query[key])
        seed = int(query.get("seed", "0"))
        speed = float(query["speed"]) if "speed" in query else None
    except ValueError as exc:
        raise ConfigError(f"{url!r}: {exc}") from exc
    return scenario_by_name(query.get("scenario", "kettle"), **changes), seed, speed


def sim_url(scenario: Scenario, seed: int) -> str:
    """Return the ``sim://`` URL that rebuilds ``scenario``, with options that differ."""
    base = scenario_by_name(scenario.name)
    parts = [f"scenario={scenario.name}", f"seed={seed}"]
    for option, attr in URL_OPTIONS:
        value = getattr(scenario, attr)
        if value != getattr(base, attr):
            parts.append(f"{option}={value}")
    return "sim://?" + "&".join(parts)
