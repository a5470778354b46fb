"""The physics of the simulated world: one vessel's true state and how it moves.

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
  (:class:`~drivers.simworld.scenarios.LidSpec`; off by default);
* optionally a small conductance from the element or plate straight to the room,
  a path that bypasses the water (``ElementSpec.to_room_w_per_k``; 0 by default);
* the wall loses heat to the room by natural convection,
  h_c = 1.42·(ΔT/L)^¼ W/(m²·K) (simplified laminar form for air, from memory,
  no source checked), and by grey-body radiation,
  ε·σ·A·(T_s⁴ - T_a⁴);
* at the boiling point of the site pressure the water is clamped and surplus heat
  evaporates water at the latent heat, so the mass falls;
* a kettle that switches off a set time after boiling starts, or a storage heater
  with a thermostat, hysteresis, an optional idle before it first switches on, and
  draw-offs of cold water.

The temperatures are stepped by classical RK4 sub-steps; the mains voltage and the
room wander by exact OU steps drawn from the rig's one random generator.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy.optimize import brentq

from drivers.constants import STEFAN_BOLTZMANN_W_PER_M2_K4, ZERO_CELSIUS_K
from drivers.errors import ConfigError
from drivers.simworld.scenarios import KettleSwitch, Scenario, Thermostat
from drivers.simworld.water import (
    liquid_cp_j_per_kg_k,
    liquid_h_grid_j_per_kg,
    liquid_h_j_per_kg,
    saturation,
)

#: Water left (kg) at which the simulated dry-boil cut-out switches the element off.
DRY_CUTOUT_KG = 0.03
#: Kelvin below the boiling point at which nucleate boiling at the element starts.
BOILING_ONSET_K = 5.0


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


class World:
    """The true world of one simulated vessel: its state and the heat flows that move it.

    ``advance(dt_s)`` moves it on; ``truth()`` and :meth:`true_value` say what it holds
    now. The mains voltage and the room wander by draws from ``rng``, the rig's one
    random generator. :class:`~drivers.simworld.rig.SimulatedRig` adds the instruments.
    """

    def __init__(self, scenario: Scenario, rng: np.random.Generator) -> None:
        self.scenario = scenario
        self._rng = rng
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
        self.substep_s = min(s.sample_interval_s, s.substep_s or 0.25 * min(taus))

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
            flow * (liquid_h_grid_j_per_kg(st.water_c, p) - liquid_h_grid_j_per_kg(cold_c, p))
            if flow
            else 0.0
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
        self._after_substep(h)

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

    def _after_substep(self, h: float) -> None:
        """Called after each sub-step of ``h`` seconds (the rig steps its sensor lags here)."""
        del h

    def true_value(self, role: str) -> float:
        """Return what a perfect instrument of ``role`` would read now, in the role's unit."""
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
