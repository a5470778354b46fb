"""Exact one-step transitions of the estimator's temperature states, in closed form.

The estimator's temperatures obey the lumped model of :mod:`monitor.physics.model` plus a
first-order lag for the water thermocouple:

    C   · dT_w/dt = G·(T_e - T_w) - UA·(T_w - T_a)        (two nodes)
    C_e · dT_e/dt = P - G·(T_e - T_w)
          dy/dt   = λ·(T_w - y)                            sensor, λ = 1/τ

(one node: C·dT_w/dt = P - UA·(T_w - T_a)). With inputs constant over a step the
system is linear, x' = A x + b, so x(t) = x_eq + e^{A t}·(x(0) - x_eq). The
filter needs this thousands of times a second, so instead of a general matrix
exponential (:func:`monitor.physics.model.two_node_transition`, ~30 µs) it is written
out here:

* the 2×2 core has real, distinct, negative eigenvalues μ₁ (slow) and μ₂ (fast)
  whenever G > 0 and UA > 0 (A is similar to a symmetric matrix), so by
  Sylvester's formula e^{A t} = e^{μ₁t}·P₁ + e^{μ₂t}·P₂ with the projectors
  P₁ = (A - μ₂I)/(μ₁ - μ₂), P₂ = (A - μ₁I)/(μ₂ - μ₁);
* the lag, driven by T_w(t) - T_eq = Σ cᵢ e^{μᵢt}, integrates to
  y(t) - T_eq = Σ cᵢ·λ·(e^{μᵢt} - e^{-λt})/(μᵢ + λ) + (y(0) - T_eq)·e^{-λt},
  with the ratio taken in a form that stays exact as μᵢ → -λ.

Each function returns the new temperatures and the matrix M = ∂x(t)/∂x(0), which
is the temperature block of the filter's Jacobian. Tests check both against
``scipy.linalg.expm`` and ``solve_ivp``.
"""

from __future__ import annotations

import math

import numba
import numpy as np


@numba.njit(cache=True)
def _expm1_ratio(a: float, b: float, t: float) -> float:
    """Return (e^{a t} - e^{b t}) / (a - b), exact as a → b (then t·e^{b t}).

    Compiled for the two-node kernel; the plain-float code calls its Python original
    (``_expm1_ratio_py``), since a call into compiled code from Python costs more than
    these few operations (one-node step 1.0 against 1.3 µs).
    """
    d = a - b
    x = d * t
    if abs(x) < 1e-6:
        return t * math.exp(b * t) * (1.0 + 0.5 * x + x * x / 6.0)
    return math.exp(b * t) * math.expm1(x) / d


@numba.njit(cache=True)
def _two_node_modes(
    ua: float, c: float, g: float, ce: float
) -> tuple[float, float, float, float, float, float]:
    """Return (a11, a12, a21, a22, μ₁ slow, μ₂ fast) of the two-node matrix A, in 1/s.

    Compiled, for the two-node step and the time to target.
    """
    a11, a12 = -(g + ua) / c, g / c
    a21, a22 = g / ce, -g / ce
    half_trace = 0.5 * (a11 + a22)
    det = ua * g / (c * ce)
    mu2 = half_trace - math.sqrt(max(half_trace * half_trace - det, 0.0))  # no cancellation
    return a11, a12, a21, a22, det / mu2, mu2  # μ₁ from the product of the roots


#: The same function at plain-Python speed, for callers working float by float.
_expm1_ratio_py = _expm1_ratio.py_func

Rows = tuple[tuple[float, ...], ...]


@numba.njit(cache=True)
def _one_node_kernel(
    water_c: float,
    lagged_c: float,
    dt_s: float,
    power_w: float,
    ambient_c: float,
    ua: float,
    c: float,
    lag_rate_per_s: float,
    want_sensitivities: bool,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, bool]:
    """Return (temperatures, M, S, S usable) of a one-node step; an absent lag is NaN.

    The state is (T_w, [y]); S = ∂x(t)/∂(ln UA, ln C), formed only when
    ``want_sensitivities`` (see :func:`one_node_step_and_sensitivities`).
    """
    has_lag = not (math.isnan(lag_rate_per_s) or math.isnan(lagged_c))
    n = 2 if has_lag else 1
    temps = np.empty(n)
    m = np.zeros((n, n))
    s = np.zeros((n, 2))
    mu = -ua / c
    e_mu = math.exp(mu * dt_s)
    # T_w(t) = T_w + (T_eq - T_w)(1 - e^{μt}), written with the drive to stay exact as UA → 0
    drive_w = power_w - ua * (water_c - ambient_c)
    phi = -math.expm1(mu * dt_s) / (-mu) if mu != 0.0 else dt_s
    temps[0] = water_c + drive_w / c * phi
    m[0, 0] = e_mu
    # S, columns (ln UA, ln C): T_w(t) = T_eq + e^{μt}(T_w - T_eq) with T_eq = T_a + P/UA,
    # ∂μ/∂ln UA = μ, ∂μ/∂ln C = -μ, ∂T_eq/∂ln UA = -P/UA, ∂T_eq/∂ln C = 0
    d_eq_d_ln_ua = -power_w / ua
    off_eq = water_c - (ambient_c + power_w / ua)
    t_e_mu = dt_s * e_mu  # ∂e^{μt}/∂μ
    s[0, 0] = (1.0 - e_mu) * d_eq_d_ln_ua + t_e_mu * mu * off_eq
    s[0, 1] = -t_e_mu * mu * off_eq
    if not has_lag:
        return temps, m, s, want_sensitivities
    lam = lag_rate_per_s
    e_lam = math.exp(-lam * dt_s)
    gain = lam * _expm1_ratio(mu, -lam, dt_s)
    # y(t) = y·e^{-λt} + ∫₀ᵗ λ e^{-λ(t-s)} T_w(s) ds, with T_w(s) = T_w + (D/C)(1 - e^{μs})/(-μ):
    #   ∫ λ e^{-λ(t-s)} ds        = 1 - e^{-λt}
    #   ∫ λ e^{-λ(t-s)} e^{μs} ds = λ (e^{μt} - e^{-λt})/(μ + λ)        ("gain")
    # so y(t) = y·e^{-λt} + T_w·(1 - e^{-λt}) + (D/C)·forced, forced = (1 - e^{-λt} - gain)/(-μ)
    forced = (1.0 - e_lam - gain) / (-mu) if mu != 0.0 else dt_s - (1.0 - e_lam) / lam
    temps[1] = lagged_c * e_lam + water_c * (1.0 - e_lam) + drive_w / c * forced
    # ∂y/∂T_w includes the drive's own dependence on T_w, ∂D/∂T_w = -UA
    d_lag_d_water = (1.0 - e_lam) - ua / c * forced
    m[1, 0] = d_lag_d_water
    m[1, 1] = e_lam
    if not want_sensitivities:
        return temps, m, s, False
    # y(t) - T_eq = gain·(T_w - T_eq) + e^{-λt}(y - T_eq) and ∂gain/∂μ = λ·Φ₂(μ, -λ, μ)
    # (see _two_node_sensitivities), from the step's own exponentials
    gap = mu + lam
    if abs(gap) * dt_s < 1e-3:
        return temps, m, s, False  # Φ₂ would lose digits: the caller differences this step
    lam_second = (lam * t_e_mu - gain) / gap
    eq_part = (1.0 - d_lag_d_water - e_lam) * d_eq_d_ln_ua
    lag_mu = lam_second * mu * off_eq
    s[1, 0] = eq_part + lag_mu
    s[1, 1] = -lag_mu
    return temps, m, s, True


def _one_node(
    water_c: float,
    lagged_c: float | None,
    dt_s: float,
    power_w: float,
    ambient_c: float,
    ua_w_per_k: float,
    capacity_j_per_k: float,
    lag_rate_per_s: float | None,
    want_sensitivities: bool,
) -> tuple[tuple[float, ...], Rows, Rows | None]:
    """Return (temperatures, M, S or None); see :func:`one_node_step_and_sensitivities`."""
    temps, m, s, usable = _one_node_kernel(
        float(water_c), _nan_if_none(lagged_c), float(dt_s), float(power_w), float(ambient_c),
        float(ua_w_per_k), float(capacity_j_per_k), _nan_if_none(lag_rate_per_s),
        want_sensitivities,
    )  # fmt: skip
    return _as_rows(temps, m, s if usable else None)


def _as_rows(
    temps: np.ndarray, m: np.ndarray, s: np.ndarray | None
) -> tuple[tuple[float, ...], Rows, Rows | None]:
    """Return a step's (temperatures, M, S or None) arrays as tuples of plain floats."""
    rows = tuple(tuple(row) for row in m.tolist())
    sens = tuple(tuple(row) for row in s.tolist()) if s is not None else None
    return tuple(temps.tolist()), rows, sens


def one_node_step(
    water_c: float,
    lagged_c: float | None,
    dt_s: float,
    power_w: float,
    ambient_c: float,
    ua_w_per_k: float,
    capacity_j_per_k: float,
    lag_rate_per_s: float | None,
) -> tuple[tuple[float, ...], Rows]:
    """Return ((T_w, [y]), M) after ``dt_s`` s: temperatures in °C and M = ∂x(t)/∂x(0).

    ``lagged_c`` and ``lag_rate_per_s`` are None when the sensor lag is not modelled.
    """
    temps, m, _ = _one_node(
        water_c,
        lagged_c,
        dt_s,
        power_w,
        ambient_c,
        ua_w_per_k,
        capacity_j_per_k,
        lag_rate_per_s,
        False,
    )
    return temps, m


def one_node_step_and_sensitivities(
    water_c: float,
    lagged_c: float | None,
    dt_s: float,
    power_w: float,
    ambient_c: float,
    ua_w_per_k: float,
    capacity_j_per_k: float,
    lag_rate_per_s: float | None,
) -> tuple[tuple[float, ...], Rows, Rows | None]:
    """Return :func:`one_node_step`'s (temperatures, M) and S = ∂x(t)/∂(ln UA, ln C).

    S has one row per temperature and a column per log-parameter, in the
    estimator's order. S is None where the closed form would lose digits (the lag
    rate within 0.1 %/dt of the mode's rate); the caller differences that step.
    """
    return _one_node(
        water_c,
        lagged_c,
        dt_s,
        power_w,
        ambient_c,
        ua_w_per_k,
        capacity_j_per_k,
        lag_rate_per_s,
        True,
    )


@numba.njit(cache=True)
def _two_node_kernel(
    water_c: float,
    element_c: float,
    lagged_c: float,
    dt_s: float,
    power_w: float,
    ambient_c: float,
    ua: float,
    c: float,
    g: float,
    ce: float,
    lag_rate_per_s: float,
    element_lagged_c: float,
    element_lag_rate_per_s: float,
    want_sensitivities: bool,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, bool]:
    """Return (temperatures, M, S, S usable) of a two-node step; absent lags are NaN.

    The state is (T_w, T_e, [y_w], [y_e]); M = ∂x(t)/∂x(0); S = ∂x(t)/∂(ln UA, ln C,
    ln G), formed only when ``want_sensitivities`` (see :func:`two_node_step` and
    :func:`two_node_step_and_sensitivities` for the equations).
    """
    a11, a12, a21, a22, mu1, mu2 = _two_node_modes(ua, c, g, ce)
    span = mu1 - mu2
    e1 = math.exp(mu1 * dt_s)
    e2 = math.exp(mu2 * dt_s)
    # projectors P1 = (A - μ2 I)/(μ1 - μ2), P2 = (A - μ1 I)/(μ2 - μ1); e^{At} = e1 P1 + e2 P2
    proj = np.empty((2, 2, 2))
    proj[0, 0, 0] = (a11 - mu2) / span
    proj[0, 0, 1] = a12 / span
    proj[0, 1, 0] = a21 / span
    proj[0, 1, 1] = (a22 - mu2) / span
    proj[1, 0, 0] = -(a11 - mu1) / span
    proj[1, 0, 1] = -a12 / span
    proj[1, 1, 0] = -a21 / span
    proj[1, 1, 1] = -(a22 - mu1) / span
    has_lag = (not math.isnan(lag_rate_per_s), not math.isnan(element_lag_rate_per_s))
    n = 2 + int(has_lag[0]) + int(has_lag[1])
    temps = np.empty(n)
    m = np.zeros((n, n))
    for r in range(2):
        for q in range(2):
            m[r, q] = e1 * proj[0, r, q] + e2 * proj[1, r, q]
    eq = np.empty(2)
    eq[0] = ambient_c + power_w / ua
    eq[1] = eq[0] + power_w / g
    off = np.empty(2)
    off[0] = water_c - eq[0]
    off[1] = element_c - eq[1]
    for r in range(2):
        temps[r] = eq[r] + m[r, 0] * off[0] + m[r, 1] * off[1]
    # each lagged reading follows its node: node(s) - eq = Σ_i e^{μ_i s}·(row of P_i)·(x0 - x_eq)
    lag_node = np.empty(2, dtype=np.int64)
    lag_rate = np.empty(2)
    lag_gain = np.empty((2, 2))  # λ·Φ(μ_i, -λ) per lag
    k = 2
    for node in range(2):
        if not has_lag[node]:
            continue
        y0 = lagged_c if node == 0 else element_lagged_c
        lam = lag_rate_per_s if node == 0 else element_lag_rate_per_s
        e_lam = math.exp(-lam * dt_s)
        g1 = lam * _expm1_ratio(mu1, -lam, dt_s)
        g2 = lam * _expm1_ratio(mu2, -lam, dt_s)
        d_w = g1 * proj[0, node, 0] + g2 * proj[1, node, 0]
        d_e = g1 * proj[0, node, 1] + g2 * proj[1, node, 1]
        temps[k] = eq[node] + (y0 - eq[node]) * e_lam + d_w * off[0] + d_e * off[1]
        m[k, 0] = d_w
        m[k, 1] = d_e
        m[k, k] = e_lam
        lag_node[k - 2] = node
        lag_rate[k - 2] = lam
        lag_gain[k - 2, 0] = g1
        lag_gain[k - 2, 1] = g2
        k += 1
    s = np.zeros((n, 3))
    if not want_sensitivities:
        return temps, m, s, False
    # S: ∂x(t) = (I - E)·∂z_eq + ∂E·(x(0) - z_eq); ∂E by Duhamel's formula through the modes
    mus = (mu1, mu2)
    phi = np.empty((2, 2))
    phi[0, 0] = dt_s * e1
    phi[1, 1] = dt_s * e2
    phi[0, 1] = phi[1, 0] = (e1 - e2) / span
    second = np.empty((2, 2, 2))  # λ·Φ₂(μ_i, -λ, μ_j) per lag
    for lag in range(n - 2):
        lam = lag_rate[lag]
        for i in range(2):
            gap = mus[i] + lam
            if abs(gap) * dt_s < 1e-3:
                return temps, m, s, False  # Φ₂ would lose digits
            for j in range(2):
                second[lag, i, j] = (lam * phi[i, j] - lag_gain[lag, j]) / gap
    # v_j = P_j·(x(0) - z_eq), the node offsets carried by each mode
    v = np.empty((2, 2))
    for j in range(2):
        for r in range(2):
            v[j, r] = proj[j, r, 0] * off[0] + proj[j, r, 1] * off[1]
    # ∂K/∂ln θ = θ·∂K/∂θ (C_e is not a state) and ∂(water_eq, element_eq)/∂ln θ
    dk = np.zeros((3, 2, 2))
    dk[0, 0, 0] = -ua / c  # ln UA
    dk[1, 0, 0] = -a11  # ln C: the water row scales as 1/C
    dk[1, 0, 1] = -a12
    dk[2, 0, 0] = -g / c  # ln G
    dk[2, 0, 1] = a12
    dk[2, 1, 0] = a21
    dk[2, 1, 1] = a22
    d_eq = np.zeros((3, 2))
    d_eq[0, 0] = d_eq[0, 1] = -power_w / ua
    d_eq[2, 1] = -power_w / g
    u = np.empty(2)
    for par in range(3):
        # (I - E)·∂z_eq; a lag's equilibrium is its node's
        for r in range(n):
            node = r if r < 2 else lag_node[r - 2]
            s[r, par] = d_eq[par, node] - m[r, 0] * d_eq[par, 0] - m[r, 1] * d_eq[par, 1]
            if r >= 2:
                s[r, par] -= m[r, r] * d_eq[par, node]
        for j in range(2):
            w0 = dk[par, 0, 0] * v[j, 0] + dk[par, 0, 1] * v[j, 1]
            w1 = dk[par, 1, 0] * v[j, 0] + dk[par, 1, 1] * v[j, 1]
            for i in range(2):
                u[0] = proj[i, 0, 0] * w0 + proj[i, 0, 1] * w1  # P_i ∂K v_j
                u[1] = proj[i, 1, 0] * w0 + proj[i, 1, 1] * w1
                s[0, par] += phi[i, j] * u[0]
                s[1, par] += phi[i, j] * u[1]
                for lag in range(n - 2):
                    s[2 + lag, par] += second[lag, i, j] * u[lag_node[lag]]
    return temps, m, s, True


def _nan_if_none(value: float | None) -> float:
    return math.nan if value is None else float(value)


def two_node_step_arrays(
    water_c: float,
    element_c: float,
    lagged_c: float | None,
    dt_s: float,
    power_w: float,
    ambient_c: float,
    ua_w_per_k: float,
    capacity_j_per_k: float,
    conductance_w_per_k: float,
    element_capacity_j_per_k: float,
    lag_rate_per_s: float | None,
    element_lagged_c: float | None,
    element_lag_rate_per_s: float | None,
    want_sensitivities: bool,
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Return :func:`two_node_step_and_sensitivities`'s (temperatures, M, S) as arrays.

    S is None when not wanted or when it could not be formed without losing digits.
    A lag is modelled when both its reading and its rate are given.
    """
    water_lag = lag_rate_per_s if lagged_c is not None else None
    element_lag = element_lag_rate_per_s if element_lagged_c is not None else None
    temps, m, s, usable = _two_node_kernel(
        float(water_c),
        float(element_c),
        _nan_if_none(lagged_c),
        float(dt_s),
        float(power_w),
        float(ambient_c),
        float(ua_w_per_k),
        float(capacity_j_per_k),
        float(conductance_w_per_k),
        float(element_capacity_j_per_k),
        _nan_if_none(water_lag),
        _nan_if_none(element_lagged_c),
        _nan_if_none(element_lag),
        want_sensitivities,
    )
    return temps, m, (s if usable else None)


def _two_node(*args: object) -> tuple[tuple[float, ...], Rows, Rows | None]:
    """Return :func:`two_node_step_arrays` as tuples of floats."""
    return _as_rows(*two_node_step_arrays(*args))  # type: ignore[arg-type]


def two_node_step(
    water_c: float,
    element_c: float,
    lagged_c: float | None,
    dt_s: float,
    power_w: float,
    ambient_c: float,
    ua_w_per_k: float,
    capacity_j_per_k: float,
    conductance_w_per_k: float,
    element_capacity_j_per_k: float,
    lag_rate_per_s: float | None,
    element_lagged_c: float | None = None,
    element_lag_rate_per_s: float | None = None,
) -> tuple[tuple[float, ...], Rows]:
    """Return ((T_w, T_e, [y_w], [y_e]), M) after ``dt_s`` s: °C and M = ∂x(t)/∂x(0).

    ``y_w`` and ``y_e`` are the water and element thermocouples' lagged readings,
    present when their lag rates are given. Requires UA > 0 and G > 0.
    """
    temps, m, _ = _two_node(
        water_c,
        element_c,
        lagged_c,
        dt_s,
        power_w,
        ambient_c,
        ua_w_per_k,
        capacity_j_per_k,
        conductance_w_per_k,
        element_capacity_j_per_k,
        lag_rate_per_s,
        element_lagged_c,
        element_lag_rate_per_s,
        False,
    )
    return temps, m


def two_node_step_and_sensitivities(
    water_c: float,
    element_c: float,
    lagged_c: float | None,
    dt_s: float,
    power_w: float,
    ambient_c: float,
    ua_w_per_k: float,
    capacity_j_per_k: float,
    conductance_w_per_k: float,
    element_capacity_j_per_k: float,
    lag_rate_per_s: float | None,
    element_lagged_c: float | None = None,
    element_lag_rate_per_s: float | None = None,
) -> tuple[tuple[float, ...], Rows, Rows | None]:
    """Return :func:`two_node_step`'s (temperatures, M) and S = ∂x(t)/∂(ln UA, ln C, ln G).

    S has one row per temperature (as in M) and a column per log-parameter, in
    the estimator's order; it replaces three finite-difference propagations. S is
    None where the closed form would lose digits (a lag's rate within 0.1 %/dt of
    a mode's); the caller differences that step instead.
    """
    return _two_node(
        water_c,
        element_c,
        lagged_c,
        dt_s,
        power_w,
        ambient_c,
        ua_w_per_k,
        capacity_j_per_k,
        conductance_w_per_k,
        element_capacity_j_per_k,
        lag_rate_per_s,
        element_lagged_c,
        element_lag_rate_per_s,
        True,
    )


def clamped_step(
    boiling_c: float,
    element_c: float | None,
    lagged_c: float | None,
    dt_s: float,
    power_w: float,
    ambient_c: float,
    ua_w_per_k: float,
    conductance_w_per_k: float | None,
    element_capacity_j_per_k: float | None,
    lag_rate_per_s: float | None,
    element_lagged_c: float | None = None,
    element_lag_rate_per_s: float | None = None,
) -> tuple[tuple[float, ...], float]:
    """Return ((T_b, [T_e], [y_w], [y_e]), heat to evaporation in J) over a step on the boil.

    The water is held at ``boiling_c``; the element relaxes towards T_b + P/G; the
    sensor lags towards T_b; what reaches the water beyond its losses evaporates it.
    """
    loss_w = ua_w_per_k * (boiling_c - ambient_c)
    temps: list[float] = [boiling_c]
    if element_c is not None and conductance_w_per_k is not None and element_capacity_j_per_k:
        rate = conductance_w_per_k / element_capacity_j_per_k
        element_eq = boiling_c + power_w / conductance_w_per_k
        decay = math.exp(-rate * dt_s)
        new_element = element_eq + (element_c - element_eq) * decay
        # ∫ G (T_e - T_b) dt = P·dt - C_e·(T_e(t) - T_e(0))
        into_water_j = power_w * dt_s - element_capacity_j_per_k * (new_element - element_c)
        temps.append(new_element)
    else:
        into_water_j = power_w * dt_s
    if lag_rate_per_s is not None and lagged_c is not None:
        temps.append(boiling_c + (lagged_c - boiling_c) * math.exp(-lag_rate_per_s * dt_s))
    if (
        element_lag_rate_per_s is not None
        and element_lagged_c is not None
        and element_c is not None
        and conductance_w_per_k is not None
        and element_capacity_j_per_k
    ):
        # the element decays at rate r towards T_e_eq; its sensor lags behind at rate λ
        lam = element_lag_rate_per_s
        r = conductance_w_per_k / element_capacity_j_per_k
        element_eq = boiling_c + power_w / conductance_w_per_k
        gain = lam * _expm1_ratio_py(-r, -lam, dt_s)
        temps.append(
            element_eq
            + (element_c - element_eq) * gain
            + (element_lagged_c - element_eq) * math.exp(-lam * dt_s)
        )
    return tuple(temps), max(into_water_j - loss_w * dt_s, 0.0)


def one_node_time_to_target(
    water_c: float,
    target_c: float,
    power_w: float,
    ambient_c: float,
    ua_w_per_k: float,
    capacity_j_per_k: float,
) -> float | None:
    """Return the time (s) for one node to reach ``target_c``, or None when it never does.

    t = (C/UA)·ln[(T_eq - T_w)/(T_eq - T_target)], T_eq = T_a + P/UA; the fast
    twin of :func:`monitor.physics.model.time_to_target`.
    """
    if water_c >= target_c:
        return 0.0
    if power_w <= 0.0:
        return None
    if ua_w_per_k <= 0.0:
        return capacity_j_per_k * (target_c - water_c) / power_w
    water_eq = ambient_c + power_w / ua_w_per_k
    if water_eq <= target_c:
        return None
    # log1p form: ln((T_eq - T_w)/(T_eq - T_t)) = log1p((T_t - T_w)/(T_eq - T_t))
    return capacity_j_per_k / ua_w_per_k * math.log1p((target_c - water_c) / (water_eq - target_c))


@numba.njit(cache=True)
def _two_node_time_to_target_kernel(
    water_c: float,
    element_c: float,
    target_c: float,
    power_w: float,
    ambient_c: float,
    ua_w_per_k: float,
    capacity_j_per_k: float,
    conductance_w_per_k: float,
    element_capacity_j_per_k: float,
    horizon_s: float,
) -> float:
    """:func:`two_node_time_to_target` compiled, with NaN for None."""
    if water_c >= target_c:
        return 0.0
    ua, g = ua_w_per_k, conductance_w_per_k
    if power_w <= 0.0:
        return math.nan
    water_eq = ambient_c + power_w / ua
    if water_eq <= target_c:
        return math.nan
    a11, a12, _, _, mu1, mu2 = _two_node_modes(ua, capacity_j_per_k, g, element_capacity_j_per_k)
    span = mu1 - mu2
    dw = water_c - water_eq
    de = element_c - (water_eq + power_w / g)
    c1 = ((a11 - mu2) * dw + a12 * de) / span
    c2 = (-(a11 - mu1) * dw - a12 * de) / span

    def gap(t: float) -> float:
        return water_eq + c1 * math.exp(mu1 * t) + c2 * math.exp(mu2 * t) - target_c

    def slope(t: float) -> float:
        return c1 * mu1 * math.exp(mu1 * t) + c2 * mu2 * math.exp(mu2 * t)

    lo = 0.0
    guess = math.log((target_c - water_eq) / c1) / mu1 if c1 < 0.0 else 1.0
    if guess > 0.0 and abs(c2 * math.exp(mu2 * guess)) < 1e-10:
        # the fast (element) mode has died away by then: the slow mode's closed form
        # is the root to well under a microkelvin, so no iteration is needed
        return guess
    hi = max(guess, 1e-3)
    while gap(hi) < 0.0:
        lo, hi = hi, hi * 2.0
        if hi > horizon_s:
            return math.nan
    t = min(max(guess, lo), hi)
    for _ in range(60):
        f = gap(t)
        if f < 0.0:
            lo = t
        else:
            hi = t
        d = slope(t)
        step = t - f / d if d > 0.0 else 0.5 * (lo + hi)
        t_next = step if lo < step < hi else 0.5 * (lo + hi)
        if abs(t_next - t) < 1e-7 * max(1.0, t):
            return t_next
        t = t_next
    return t


def two_node_time_to_target(
    water_c: float,
    element_c: float,
    target_c: float,
    power_w: float,
    ambient_c: float,
    ua_w_per_k: float,
    capacity_j_per_k: float,
    conductance_w_per_k: float,
    element_capacity_j_per_k: float,
    horizon_s: float = 30 * 86400.0,
) -> float | None:
    """Return the time (s) for the water of two nodes to reach ``target_c``, or None.

    The water follows T_eq + c₁e^{μ₁t} + c₂e^{μ₂t} (see the module docstring). The
    root is bracketed from the slow mode's closed-form guess and found by Newton's
    method kept inside the bracket (bisection when a step would leave it). Compiled
    (:func:`_two_node_time_to_target_kernel`): the same operations in the same order.
    """
    t = _two_node_time_to_target_kernel(
        float(water_c), float(element_c), float(target_c), float(power_w), float(ambient_c),
        float(ua_w_per_k), float(capacity_j_per_k), float(conductance_w_per_k),
        float(element_capacity_j_per_k), float(horizon_s),
    )  # fmt: skip
    return None if math.isnan(t) else t


@numba.njit(cache=True)
def two_node_predict(
    x: np.ndarray,
    p: np.ndarray,
    q: np.ndarray,
    dt_s: float,
    power_w: float,
    ambient_c: float,
    ce: float,
    lagged_ix: int,
    lag_rate_per_s: float,
    element_lagged_ix: int,
    element_lag_rate_per_s: float,
    boiling_point_c: float,
) -> tuple[bool, np.ndarray, np.ndarray]:
    """Return (done, x⁻, P⁻) of the two-node filter's predict off the boil, in one call.

    The state is (T_w, T_e, [y_w], [y_e], ln UA, ln C, ln G) in °C and log-parameters;
    a lag's index is -1 where it is not modelled. x⁻ = f(x) by :func:`_two_node_kernel`,
    F = ∂f/∂x with the temperature block M and the parameter columns S, and
    P⁻ = F P Fᵀ + Q, multiplied in the order of numpy's ``f @ P @ f.T`` (both go to the
    same BLAS product), so the figures are the filter's general path's bit for bit.
    ``done`` is False, and the arrays are not to be used, where the step needs the
    general path: S would lose digits, or the water passes ``boiling_point_c``.
    """
    n = x.shape[0]
    k = n - 3  # the temperatures come first, the three log-parameters last
    ua = math.exp(x[k])
    c = math.exp(x[k + 1])
    g = math.exp(x[k + 2])
    lagged_c = x[lagged_ix] if lagged_ix >= 0 else math.nan
    water_lag = lag_rate_per_s if lagged_ix >= 0 else math.nan
    element_lagged_c = x[element_lagged_ix] if element_lagged_ix >= 0 else math.nan
    element_lag = element_lag_rate_per_s if element_lagged_ix >= 0 else math.nan
    temps, m, s, usable = _two_node_kernel(
        x[0], x[1], lagged_c, dt_s, power_w, ambient_c, ua, c, g, ce,
        water_lag, element_lagged_c, element_lag, True,
    )  # fmt: skip
    return _predicted(x, p, q, temps, m, s, usable, boiling_point_c)


@numba.njit(cache=True)
def _predicted(
    x: np.ndarray,
    p: np.ndarray,
    q: np.ndarray,
    temps: np.ndarray,
    m: np.ndarray,
    s: np.ndarray,
    usable: bool,
    boiling_point_c: float,
) -> tuple[bool, np.ndarray, np.ndarray]:
    """Return (done, x⁻, P⁻) from a step's temperatures, M and S (the predicts above):
    F is the identity with M and S in the temperature rows, P⁻ = F P Fᵀ + Q."""
    n, k = x.shape[0], temps.shape[0]
    fx = x.copy()
    if not usable or temps[0] > boiling_point_c:
        return False, fx, p
    f = np.eye(n)
    for r in range(k):
        fx[r] = temps[r]
        for col in range(k):
            f[r, col] = m[r, col]
        for par in range(s.shape[1]):
            f[r, k + par] = s[r, par]
    return True, fx, np.dot(np.dot(f, p), f.T) + q


@numba.njit(cache=True)
def two_node_times_to_target(
    points: np.ndarray,
    target_c: float,
    power_w: float,
    ambient_c: float,
    element_capacity_j_per_k: float,
    horizon_s: float = 30 * 86400.0,
) -> np.ndarray:
    """Return :func:`two_node_time_to_target` (s; NaN for never) at each row of ``points``.

    A row is (T_w °C, T_e °C, ln UA, ln C, ln G): the forecast's mean and sigma points,
    in one compiled call.
    """
    out = np.empty(points.shape[0])
    for i in range(points.shape[0]):
        out[i] = _two_node_time_to_target_kernel(
            points[i, 0], points[i, 1], target_c, power_w, ambient_c, math.exp(points[i, 2]),
            math.exp(points[i, 3]), math.exp(points[i, 4]), element_capacity_j_per_k, horizon_s,
        )  # fmt: skip
    return out


@numba.njit(cache=True)
def one_node_predict(
    x: np.ndarray,
    p: np.ndarray,
    q: np.ndarray,
    dt_s: float,
    power_w: float,
    ambient_c: float,
    lagged_ix: int,
    lag_rate_per_s: float,
    boiling_point_c: float,
) -> tuple[bool, np.ndarray, np.ndarray]:
    """Return (done, x⁻, P⁻) of the one-node filter's predict off the boil, in one call.

    The state is (T_w, [y_w], ln UA, ln C); as :func:`two_node_predict`, with
    :func:`_one_node_kernel` for the step.
    """
    n = x.shape[0]
    k = n - 2  # the temperatures come first, the two log-parameters last
    lagged_c = x[lagged_ix] if lagged_ix >= 0 else math.nan
    lag = lag_rate_per_s if lagged_ix >= 0 else math.nan
    temps, m, s, usable = _one_node_kernel(
        x[0], lagged_c, dt_s, power_w, ambient_c, math.exp(x[k]), math.exp(x[k + 1]), lag, True
    )
    return _predicted(x, p, q, temps, m, s, usable, boiling_point_c)
