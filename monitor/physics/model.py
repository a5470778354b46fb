"""Lumped heat-balance models of an electrically heated water vessel.

Pure functions over a frozen parameter object; no I/O, no clock. Two forms:

**One node** (the water and everything that moves with it):

    C · dT_w/dt =   P                      electrical power in, W
                  - UA · (T_w - T_a)       loss to the room, W

**Two nodes** (the element or hot plate, and the water):

    C_e · dT_e/dt =   P                    electrical power in, W
                    - G · (T_e - T_w)      element-to-water transfer, W
    C_w · dT_w/dt =   G · (T_e - T_w)      heat reaching the water, W
                    - UA · (T_w - T_a)     loss to the room, W

At the boiling point T_b of the site pressure the water node is clamped:

    dT_w/dt = 0,   dm/dt = -(net heat into the water) / h_fg

so surplus power leaves as vapour at the latent heat and the water mass falls.

Symbols: C, C_w, C_e heat capacities (J/K); UA loss conductance (W/K); G
element-to-water conductance (W/K); P power (W); T in °C. Radiation and the
temperature dependence of convection are folded into an effective UA here; the
simulated rig models them explicitly.

Between steps with constant inputs the equations are linear, so a step is solved
exactly: a closed form for one node and a matrix exponential for two.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.linalg import expm
from scipy.optimize import brentq

from drivers.errors import PhysicsRangeError


@dataclass(frozen=True, slots=True)
class VesselParams:
    """Parameters of the lumped model.

    ``heat_capacity_j_per_k`` is the water node's capacity C (water plus the
    parts that stay at the water's temperature). ``element_conductance_w_per_k``
    and ``element_heat_capacity_j_per_k`` are set together for the two-node
    model and both left ``None`` for the one-node model.
    """

    ua_w_per_k: float
    heat_capacity_j_per_k: float
    element_conductance_w_per_k: float | None = None
    element_heat_capacity_j_per_k: float | None = None

    def __post_init__(self) -> None:
        if not self.ua_w_per_k >= 0.0:
            raise PhysicsRangeError(f"UA must be >= 0 W/K, got {self.ua_w_per_k}")
        if not self.heat_capacity_j_per_k > 0.0:
            raise PhysicsRangeError(
                f"heat capacity must be > 0 J/K, got {self.heat_capacity_j_per_k}"
            )
        g, ce = self.element_conductance_w_per_k, self.element_heat_capacity_j_per_k
        if (g is None) != (ce is None):
            raise PhysicsRangeError(
                "element conductance and element heat capacity are set together or not at all"
            )
        if g is not None and not (g > 0.0 and ce > 0.0):
            raise PhysicsRangeError(
                f"element conductance and capacity must be > 0, got G={g} W/K, C_e={ce} J/K"
            )

    @property
    def two_node(self) -> bool:
        """Return True when the element is modelled as its own node."""
        return self.element_conductance_w_per_k is not None


@dataclass(frozen=True, slots=True)
class Inputs:
    """Inputs held constant over a step: power (W), room temperature (°C), boiling point (°C)."""

    power_w: float
    ambient_c: float
    boiling_point_c: float = math.inf


@dataclass(frozen=True, slots=True)
class StepResult:
    """The state after a step and what crossed the boundaries during it.

    ``state`` is ``(water_c,)`` or ``(water_c, element_c)``; energies in J over the step.
    """

    state: tuple[float, ...]
    energy_in_j: float
    energy_lost_j: float


@dataclass(frozen=True, slots=True)
class TimeToTarget:
    """Time for the water to reach a target, in s; ``seconds`` is None when it never does."""

    seconds: float | None
    reason: str = ""

    @property
    def reachable(self) -> bool:
        """Return True when the target is reached in finite time."""
        return self.seconds is not None


# ---------------------------------------------------------------------------
# Continuous time
# ---------------------------------------------------------------------------


def rhs(t_s: float, state: np.ndarray, inputs: Inputs, params: VesselParams) -> np.ndarray:
    """Return d(state)/dt in K/s for ``state = [water_c]`` or ``[water_c, element_c]``.

    ``t_s`` is unused (the model is time-invariant) and kept so the function
    plugs straight into ODE solvers. The boiling clamp applies when the water
    is at or above ``inputs.boiling_point_c`` and heat is still flowing in.
    """
    del t_s
    water_c = float(state[0])
    loss_w = params.ua_w_per_k * (water_c - inputs.ambient_c)
    if params.two_node:
        element_c = float(state[1])
        transfer_w = params.element_conductance_w_per_k * (element_c - water_c)
        d_element = (inputs.power_w - transfer_w) / params.element_heat_capacity_j_per_k
        into_water_w = transfer_w - loss_w
    else:
        into_water_w = inputs.power_w - loss_w
    d_water = into_water_w / params.heat_capacity_j_per_k
    if water_c >= inputs.boiling_point_c and d_water > 0.0:
        d_water = 0.0
    if params.two_node:
        return np.array([d_water, d_element])
    return np.array([d_water])


def evaporation_rate_kg_per_s(
    state: tuple[float, ...], inputs: Inputs, params: VesselParams, latent_heat_j_per_kg: float
) -> float:
    """Return the mass of water boiled off per second (kg/s, >= 0) at the boiling clamp.

    Zero unless the water is at the boiling point with heat still flowing in.
    """
    water_c = state[0]
    if water_c < inputs.boiling_point_c:
        return 0.0
    loss_w = params.ua_w_per_k * (water_c - inputs.ambient_c)
    if params.two_node:
        surplus_w = params.element_conductance_w_per_k * (state[1] - water_c) - loss_w
    else:
        surplus_w = inputs.power_w - loss_w
    return max(surplus_w, 0.0) / latent_heat_j_per_kg


def steady_state(inputs: Inputs, params: VesselParams) -> tuple[float, ...]:
    """Return the equilibrium state (°C) under constant inputs, ignoring the boiling clamp.

    Water: T_a + P/UA (infinite when UA = 0 and P > 0). Element: T_w + P/G.
    """
    if params.ua_w_per_k == 0.0:
        water_c = (
            inputs.ambient_c if inputs.power_w == 0.0 else math.copysign(math.inf, inputs.power_w)
        )
    else:
        water_c = inputs.ambient_c + inputs.power_w / params.ua_w_per_k
    if params.two_node:
        return (water_c, water_c + inputs.power_w / params.element_conductance_w_per_k)
    return (water_c,)


# ---------------------------------------------------------------------------
# Exact discretisation
# ---------------------------------------------------------------------------


def _phi1(x: float) -> float:
    """Return (1 - e^-x)/x, stable near x = 0 (→ 1)."""
    if abs(x) < 1e-8:
        return 1.0 - x / 2.0
    return -math.expm1(-x) / x


def _phi2(x: float) -> float:
    """Return (x - 1 + e^-x)/x², stable near x = 0 (→ 1/2)."""
    if abs(x) < 1e-4:
        return 0.5 - x / 6.0 + x * x / 24.0
    return (x + math.expm1(-x)) / (x * x)


def step_one_node(water_c: float, dt_s: float, inputs: Inputs, params: VesselParams) -> StepResult:
    """Return the one-node state after ``dt_s`` seconds of constant inputs, solved exactly.

    With k = UA/C and the drive D = P - UA·(T_w - T_a) at the start of the step:

        T_w(dt) = T_w + D · dt · φ1(k·dt)             φ1(x) = (1 - e^-x)/x
        lost    = UA·(T_w - T_a)·dt + UA·D·dt²/C · φ2(k·dt)
                                                       φ2(x) = (x - 1 + e^-x)/x²

    Both forms stay exact as UA → 0. The boiling clamp is not applied here;
    see :func:`step` for that.
    """
    if dt_s < 0.0:
        raise PhysicsRangeError(f"step length must be >= 0 s, got {dt_s}")
    ua, c = params.ua_w_per_k, params.heat_capacity_j_per_k
    x = ua * dt_s / c
    excess_c = water_c - inputs.ambient_c
    drive_w = inputs.power_w - ua * excess_c
    new_water_c = water_c + drive_w * dt_s / c * _phi1(x)
    lost_j = ua * excess_c * dt_s + ua * drive_w * dt_s * dt_s / c * _phi2(x)
    return StepResult((new_water_c,), inputs.power_w * dt_s, lost_j)


def two_node_matrices(params: VesselParams) -> tuple[np.ndarray, np.ndarray]:
    """Return (A, B) of x' = A x + B u for x = [T_w, T_e, E_lost], u = [P, T_a].

    The third state integrates the loss power (J) so a step also yields the
    energy lost, exactly. Units: A in 1/s, B in K/J and 1/s.
    """
    ua = params.ua_w_per_k
    g = params.element_conductance_w_per_k
    cw, ce = params.heat_capacity_j_per_k, params.element_heat_capacity_j_per_k
    a = np.array(
        [
            [-(g + ua) / cw, g / cw, 0.0],  # water: + G(T_e - T_w) - UA T_w
            [g / ce, -g / ce, 0.0],  # element: - G(T_e - T_w)
            [ua, 0.0, 0.0],  # loss integral: + UA T_w
        ]
    )
    b = np.array(
        [
            [0.0, ua / cw],  # water: + UA T_a
            [1.0 / ce, 0.0],  # element: + P
            [0.0, -ua],  # loss integral: - UA T_a
        ]
    )
    return a, b


def two_node_transition(params: VesselParams, dt_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Return (Φ, Γ) with x(t+dt) = Φ x(t) + Γ u for constant u over the step.

    From the matrix exponential of the augmented system [[A, B], [0, 0]]·dt
    (Van Loan's block form): the top-left block is Φ = e^{A dt} and the
    top-right block is Γ = ∫₀^dt e^{A s} ds · B.
    """
    a, b = two_node_matrices(params)
    n, m = a.shape[0], b.shape[1]
    block = np.zeros((n + m, n + m))
    block[:n, :n] = a * dt_s
    block[:n, n:] = b * dt_s
    full = expm(block)
    return full[:n, :n], full[:n, n:]


def step_two_node(
    state: tuple[float, float], dt_s: float, inputs: Inputs, params: VesselParams
) -> StepResult:
    """Return the two-node state ``(water_c, element_c)`` after ``dt_s`` s, solved exactly.

    The boiling clamp is not applied here; see :func:`step` for that.
    """
    if dt_s < 0.0:
        raise PhysicsRangeError(f"step length must be >= 0 s, got {dt_s}")
    phi, gamma = two_node_transition(params, dt_s)
    x = np.array([state[0], state[1], 0.0])
    u = np.array([inputs.power_w, inputs.ambient_c])
    nxt = phi @ x + gamma @ u
    return StepResult((float(nxt[0]), float(nxt[1])), inputs.power_w * dt_s, float(nxt[2]))


def step(
    state: tuple[float, ...], dt_s: float, inputs: Inputs, params: VesselParams
) -> tuple[StepResult, float]:
    """Return (result, heat to evaporation in J) after a step, with the boiling clamp.

    When the exact linear step carries the water above ``inputs.boiling_point_c``
    the water is put back at the boiling point and the sensible heat above it,
    C·(T_w - T_b), is returned as heat that evaporated water (divide by h_fg for
    the mass). Losses are taken from the unclamped step, a slight overestimate
    during the part of the step spent above the boiling point (< 1 % of the loss
    when steps are short against C/UA).
    """
    if params.two_node:
        result = step_two_node((state[0], state[1]), dt_s, inputs, params)
    else:
        result = step_one_node(state[0], dt_s, inputs, params)
    water_c = result.state[0]
    if water_c <= inputs.boiling_point_c:
        return result, 0.0
    evaporated_j = params.heat_capacity_j_per_k * (water_c - inputs.boiling_point_c)
    clamped = (inputs.boiling_point_c, *result.state[1:])
    return StepResult(clamped, result.energy_in_j, result.energy_lost_j), evaporated_j


# ---------------------------------------------------------------------------
# Time to a target
# ---------------------------------------------------------------------------


def water_temperature_at(
    t_s: float, state: tuple[float, ...], inputs: Inputs, params: VesselParams
) -> float:
    """Return the water temperature (°C) ``t_s`` seconds ahead under constant inputs, no clamp."""
    if params.two_node:
        return step_two_node((state[0], state[1]), t_s, inputs, params).state[0]
    return step_one_node(state[0], t_s, inputs, params).state[0]


def _never(target_c: float, inputs: Inputs, params: VesselParams) -> TimeToTarget:
    equilibrium_c = steady_state(inputs, params)[0]
    if inputs.power_w <= 0.0:
        reason = "no heating power"
    else:
        reason = (
            f"losses exceed power: at {inputs.power_w:.0f} W the water levels off at "
            f"{equilibrium_c:.1f} °C, below the {target_c:.1f} °C target"
        )
    return TimeToTarget(None, reason)


def time_to_target(
    state: tuple[float, ...],
    target_c: float,
    inputs: Inputs,
    params: VesselParams,
    horizon_s: float = 30 * 86400.0,
) -> TimeToTarget:
    """Return the time (s) for the water to reach ``target_c`` under constant inputs.

    One node, closed form with τ = C/UA and T_eq = T_a + P/UA:

        t = τ · ln[(T_eq - T_w) / (T_eq - T_target)]        (UA > 0)
        t = C · (T_target - T_w) / P                         (UA = 0, lossless)

    Two nodes: the exact step solution is bracketed and solved by Brent's method.
    The answer is "never" (``seconds`` None, with the reason) when the equilibrium
    lies at or below the target, or, for two nodes, when it is not reached within
    ``horizon_s``. A water temperature already at or above the target gives 0.
    """
    water_c = state[0]
    if water_c >= target_c:
        return TimeToTarget(0.0, "already at or above the target")
    equilibrium_c = steady_state(inputs, params)[0]
    if not equilibrium_c > target_c:
        return _never(target_c, inputs, params)
    if not params.two_node:
        ua, c = params.ua_w_per_k, params.heat_capacity_j_per_k
        if ua == 0.0:
            return TimeToTarget(c * (target_c - water_c) / inputs.power_w)
        return TimeToTarget(
            c / ua * math.log((equilibrium_c - water_c) / (equilibrium_c - target_c))
        )

    def gap(t: float) -> float:
        return water_temperature_at(t, state, inputs, params) - target_c

    lo, hi = 0.0, 1.0
    while gap(hi) < 0.0:
        lo, hi = hi, hi * 2.0
        if hi > horizon_s:
            if gap(horizon_s) < 0.0:
                return TimeToTarget(None, f"not reached within {horizon_s:.0f} s")
            hi = horizon_s
            break
    return TimeToTarget(brentq(gap, lo, hi, xtol=1e-6, rtol=1e-12))
