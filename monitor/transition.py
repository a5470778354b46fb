"""Exact one-step transitions of the estimator's temperature states, in closed form.

The estimator's temperatures obey the lumped model of :mod:`monitor.model` plus a
first-order lag for the water thermocouple:

    C   · dT_w/dt = G·(T_e - T_w) - UA·(T_w - T_a)        (two nodes)
    C_e · dT_e/dt = P - G·(T_e - T_w)
          dy/dt   = λ·(T_w - y)                            sensor, λ = 1/τ

(one node: C·dT_w/dt = P - UA·(T_w - T_a)). With inputs constant over a step the
system is linear, x' = A x + b, so x(t) = x_eq + e^{A t}·(x(0) - x_eq). The
filter needs this thousands of times a second, so instead of a general matrix
exponential (:func:`monitor.model.two_node_transition`, ~30 µs) it is written
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


def _expm1_ratio(a: float, b: float, t: float) -> float:
    """Return (e^{a t} - e^{b t}) / (a - b), exact as a → b (then t·e^{b t})."""
    d = a - b
    x = d * t
    if abs(x) < 1e-6:
        return t * math.exp(b * t) * (1.0 + 0.5 * x + x * x / 6.0)
    return math.exp(b * t) * math.expm1(x) / d


def _two_node_modes(
    ua: float, c: float, g: float, ce: float
) -> tuple[float, float, float, float, float, float]:
    """Return (a11, a12, a21, a22, μ₁ slow, μ₂ fast) of the two-node matrix A, in 1/s."""
    a11, a12 = -(g + ua) / c, g / c
    a21, a22 = g / ce, -g / ce
    half_trace = 0.5 * (a11 + a22)
    det = ua * g / (c * ce)
    mu2 = half_trace - math.sqrt(max(half_trace * half_trace - det, 0.0))  # no cancellation
    return a11, a12, a21, a22, det / mu2, mu2  # μ₁ from the product of the roots


def one_node_step(
    water_c: float,
    lagged_c: float | None,
    dt_s: float,
    power_w: float,
    ambient_c: float,
    ua_w_per_k: float,
    capacity_j_per_k: float,
    lag_rate_per_s: float | None,
) -> tuple[tuple[float, ...], tuple[tuple[float, ...], ...]]:
    """Return ((T_w, [y]), M) after ``dt_s`` s: temperatures in °C and M = ∂x(t)/∂x(0).

    ``lagged_c`` and ``lag_rate_per_s`` are None when the sensor lag is not modelled.
    """
    mu = -ua_w_per_k / capacity_j_per_k
    e_mu = math.exp(mu * dt_s)
    # T_w(t) = T_w + (T_eq - T_w)(1 - e^{μt}), written with the drive to stay exact as UA → 0
    drive_w = power_w - ua_w_per_k * (water_c - ambient_c)
    phi = -math.expm1(mu * dt_s) / (-mu) if mu != 0.0 else dt_s
    new_water = water_c + drive_w / capacity_j_per_k * phi
    if lag_rate_per_s is None or lagged_c is None:
        return (new_water,), ((e_mu,),)
    lam = lag_rate_per_s
    e_lam = math.exp(-lam * dt_s)
    gain = lam * _expm1_ratio(mu, -lam, dt_s)
    # y(t) = y·e^{-λt} + ∫₀ᵗ λ e^{-λ(t-s)} T_w(s) ds, with T_w(s) = T_w + (D/C)(1 - e^{μs})/(-μ):
    #   ∫ λ e^{-λ(t-s)} ds        = 1 - e^{-λt}
    #   ∫ λ e^{-λ(t-s)} e^{μs} ds = λ (e^{μt} - e^{-λt})/(μ + λ)        ("gain")
    # so y(t) = y·e^{-λt} + T_w·(1 - e^{-λt}) + (D/C)·forced, forced = (1 - e^{-λt} - gain)/(-μ)
    forced = (1.0 - e_lam - gain) / (-mu) if mu != 0.0 else dt_s - (1.0 - e_lam) / lam
    new_lagged = lagged_c * e_lam + water_c * (1.0 - e_lam) + drive_w / capacity_j_per_k * forced
    # ∂y/∂T_w includes the drive's own dependence on T_w, ∂D/∂T_w = -UA
    d_lag_d_water = (1.0 - e_lam) - ua_w_per_k / capacity_j_per_k * forced
    return (new_water, new_lagged), ((e_mu, 0.0), (d_lag_d_water, e_lam))


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
) -> tuple[tuple[float, ...], tuple[tuple[float, ...], ...]]:
    """Return ((T_w, T_e, [y_w], [y_e]), M) after ``dt_s`` s: °C and M = ∂x(t)/∂x(0).

    ``y_w`` and ``y_e`` are the water and element thermocouples' lagged readings,
    present when their lag rates are given. Requires UA > 0 and G > 0.
    """
    ua, g = ua_w_per_k, conductance_w_per_k
    a11, a12, a21, a22, mu1, mu2 = _two_node_modes(
        ua, capacity_j_per_k, g, element_capacity_j_per_k
    )
    span = mu1 - mu2
    e1, e2 = math.exp(mu1 * dt_s), math.exp(mu2 * dt_s)
    # projectors P1 = (A - μ2 I)/(μ1 - μ2), P2 = (A - μ1 I)/(μ2 - μ1); e^{At} = e1 P1 + e2 P2
    p1 = ((a11 - mu2) / span, a12 / span, a21 / span, (a22 - mu2) / span)
    p2 = (-(a11 - mu1) / span, -a12 / span, -a21 / span, -(a22 - mu1) / span)
    m11 = e1 * p1[0] + e2 * p2[0]
    m12 = e1 * p1[1] + e2 * p2[1]
    m21 = e1 * p1[2] + e2 * p2[2]
    m22 = e1 * p1[3] + e2 * p2[3]
    water_eq = ambient_c + power_w / ua
    element_eq = water_eq + power_w / g
    dw, de = water_c - water_eq, element_c - element_eq
    temps = [water_eq + m11 * dw + m12 * de, element_eq + m21 * dw + m22 * de]
    rows = [[m11, m12], [m21, m22]]
    # each lagged reading follows its node: node(s) - eq = Σ_i e^{μ_i s}·(row of P_i)·(x0 - x_eq)
    has_water_lag = lag_rate_per_s is not None and lagged_c is not None
    has_element_lag = element_lag_rate_per_s is not None and element_lagged_c is not None
    if not (has_water_lag or has_element_lag):
        return tuple(temps), ((m11, m12), (m21, m22))
    width = 2 + has_water_lag + has_element_lag
    rows = [[m11, m12] + [0.0] * (width - 2), [m21, m22] + [0.0] * (width - 2)]
    k = 2
    terms = []
    if has_water_lag:
        terms.append((lagged_c, lag_rate_per_s, water_eq, p1[0], p1[1], p2[0], p2[1]))
    if has_element_lag:
        terms.append((element_lagged_c, element_lag_rate_per_s, element_eq, *p1[2:], *p2[2:]))
    for y0, lam, eq, r1w, r1e, r2w, r2e in terms:
        e_lam = math.exp(-lam * dt_s)
        g1 = lam * _expm1_ratio(mu1, -lam, dt_s)
        g2 = lam * _expm1_ratio(mu2, -lam, dt_s)
        d_w = g1 * r1w + g2 * r2w
        d_e = g1 * r1e + g2 * r2e
        temps.append(eq + (y0 - eq) * e_lam + d_w * dw + d_e * de)
        row = [d_w, d_e] + [0.0] * (width - 2)
        row[k] = e_lam
        rows.append(row)
        k += 1
    return tuple(temps), tuple(tuple(r) for r in rows)


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
        gain = lam * _expm1_ratio(-r, -lam, dt_s)
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
    twin of :func:`monitor.model.time_to_target`.
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
    method kept inside the bracket (bisection when a step would leave it).
    """
    if water_c >= target_c:
        return 0.0
    ua, g = ua_w_per_k, conductance_w_per_k
    if power_w <= 0.0:
        return None
    water_eq = ambient_c + power_w / ua
    if water_eq <= target_c:
        return None
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
            return None
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
