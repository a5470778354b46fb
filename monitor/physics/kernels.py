"""Compiled arithmetic for the filter's hottest loops (numba, cached to disk).

Only plain array arithmetic lives here; what it means is documented where it is
used (:class:`monitor.estimation.estimator.FastCore`,
:mod:`monitor.estimation.batchfit`). The filter's update is checked against the
filterpy reference path by the estimator's tests, to 1e-9 on every predict and
update; the fit's kernels against the matrix exponential and
``scipy.optimize.least_squares`` by the batch fit's tests.

numba compiles a kernel the first time it is called in a process and keeps the
machine code in ``__pycache__`` beside this file (``cache=True``), so later
processes load it in milliseconds. Where that folder is not writable numba
compiles in memory instead (about a second, once per process); set
``NUMBA_CACHE_DIR`` to a writable folder to keep the cache elsewhere.
"""

from __future__ import annotations

import math

import numba
import numpy as np


@numba.njit(cache=True)
def scalar_update(
    x: np.ndarray, p: np.ndarray, j: int, z: float, r: float, frozen: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Return (x⁺, P⁺) after a reading z of state j with variance r (new arrays).

    The gain is K = P[:, j] / (P_jj + r) with K_i = 0 where ``frozen[i]``, and
    P⁺ = (I - K H) P (I - K H)ᵀ + r K Kᵀ (Joseph form), which for H = e_jᵀ is
    P - K cᵀ - c Kᵀ + S K Kᵀ with c = P[:, j] and S = P_jj + r: exact for any
    gain, and written so that P⁺ is symmetric by construction.
    """
    n = x.shape[0]
    s = p[j, j] + r
    nu = z - x[j]
    c = np.empty(n)
    k = np.empty(n)
    for i in range(n):
        c[i] = p[i, j]
        k[i] = 0.0 if frozen[i] else c[i] / s
    x_new = np.empty(n)
    for i in range(n):
        x_new[i] = x[i] + k[i] * nu
    p_new = np.empty((n, n))
    for a in range(n):
        for b in range(a, n):
            value = p[a, b] - k[a] * c[b] - c[a] * k[b] + s * k[a] * k[b]
            p_new[a, b] = value
            p_new[b, a] = value
    return x_new, p_new


@numba.njit(cache=True)
def first_order_recursion(decay: float, start: float, drive: np.ndarray) -> np.ndarray:
    """Return z with z[0] = start and z[k+1] = decay·z[k] + drive[k] (length len(drive) + 1).

    The same arithmetic, in the same order, as ``scipy.signal.lfilter([1], [1, -decay],
    [start, *drive])``, without importing scipy.signal (over a second at start-up).
    """
    out = np.empty(drive.shape[0] + 1)
    value = start
    out[0] = value
    for k in range(drive.shape[0]):
        value = decay * value + drive[k]
        out[k + 1] = value
    return out


@numba.njit(cache=True)
def modal_response(
    m: np.ndarray, b: np.ndarray, x0: np.ndarray, h_s: float, power_w: np.ndarray,
    ambient_c: np.ndarray, nudge_row: int,
) -> tuple[np.ndarray, np.ndarray]:  # fmt: skip
    """Return (x, λ): x[k] the state of dx/dt = M x + B [P, T_a] at step k from x0,
    with P and T_a held over each step of h_s s, shape (len(P) + 1, n); λ the modes.

    The exact discretisation through the modes (M = V·diag(λ)·V⁻¹, all real): each
    mode z_i obeys z_i[k+1] = e^(λ_i h)·z_i[k] + (e^(λ_i h) - 1)/λ_i · (V⁻¹B u[k])_i.
    Where two modes nearly coincide (a Jordan block) row ``nudge_row`` of M is
    scaled by 1 + 1e-5 first, so the modes part. M's modes must be real (numba's
    eig raises otherwise; the two-node model's are: its thermal block is similar to
    a symmetric one and the lags are triangular).
    """
    lam, v = np.linalg.eig(m)
    order = np.sort(lam)
    n = lam.shape[0]
    smallest_gap, largest = np.inf, 0.0
    for i in range(n):
        largest = max(largest, abs(order[i]))
        if i > 0:
            smallest_gap = min(smallest_gap, order[i] - order[i - 1])
    if n > 1 and smallest_gap < 1e-7 * largest:
        m = m.copy()
        for j in range(n):
            m[nudge_row, j] *= 1.0 + 1e-5
        lam, v = np.linalg.eig(m)
    v_inv = np.linalg.inv(v)
    w = v_inv @ b
    z0 = v_inv @ x0
    z = np.empty((n, power_w.shape[0] + 1))
    for i in range(n):
        lh = lam[i] * h_s
        gain = np.expm1(lh) / lam[i]
        drive = gain * (w[i, 0] * power_w + w[i, 1] * ambient_c)
        z[i] = first_order_recursion(np.exp(lh), z0[i], drive)
    return (v @ z).T.copy(), lam


@numba.njit(cache=True)
def fit_matrices(theta: np.ndarray, has_element: bool) -> tuple[np.ndarray, np.ndarray]:
    """Return (M, B) of the heat-up fit's model, dx/dt = M x + B [P, T_a].

    θ is :mod:`monitor.estimation.batchfit`'s: [ln UA, ln C, ln G, ln C_e, ln τ_w, T₀, ln τ_e,
    ΔT_e0] (the last two with an element thermocouple); x = [T_e, T_w, y_w, (y_e)].
    """
    ua, c, g, ce, tau_w = (np.exp(theta[0]), np.exp(theta[1]), np.exp(theta[2]),
                           np.exp(theta[3]), np.exp(theta[4]))  # fmt: skip
    n = 4 if has_element else 3
    m = np.zeros((n, n))
    m[0, 0], m[0, 1] = -g / ce, g / ce
    m[1, 0], m[1, 1] = g / c, -(g + ua) / c
    m[2, 1], m[2, 2] = 1.0 / tau_w, -1.0 / tau_w
    if has_element:
        tau_e = np.exp(theta[6])
        m[3, 0], m[3, 3] = 1.0 / tau_e, -1.0 / tau_e
    b = np.zeros((n, 2))
    b[0, 0] = 1.0 / ce
    b[1, 1] = ua / c
    return m, b


@numba.njit(cache=True)
def fit_start_state(theta: np.ndarray, has_element: bool) -> np.ndarray:
    """Return the heat-up fit's state at its window's start: every node at T₀, the
    element and its thermocouple ΔT_e0 above (θ as :func:`fit_matrices`)."""
    n = 4 if has_element else 3
    x0 = np.full(n, theta[5])
    if has_element:
        x0[0] += theta[7]
        x0[3] += theta[7]
    return x0


@numba.njit(cache=True)
def fit_residuals(
    theta: np.ndarray, has_element: bool, h_s: float, power_w: np.ndarray,
    ambient_c: np.ndarray, at_w: np.ndarray, water_c: np.ndarray, scale_w: np.ndarray,
    at_e: np.ndarray, element_c: np.ndarray, scale_e: np.ndarray,
    prior_mean: np.ndarray, prior_sd: np.ndarray,
) -> np.ndarray:  # fmt: skip
    """Return the heat-up fit's residuals at θ: (y_w - reading)·scale at the grid
    points ``at_w``, the same for the element thermocouple at ``at_e`` (empty
    without one), then (θ - prior mean)/prior sd. :class:`monitor.estimation.batchfit.Residuals`
    says what the scales are."""
    m, b = fit_matrices(theta, has_element)
    x, _ = modal_response(m, b, fit_start_state(theta, has_element), h_s, power_w,
                          ambient_c, 2)  # fmt: skip
    nw, ne, p = at_w.shape[0], at_e.shape[0], theta.shape[0]
    out = np.empty(nw + ne + p)
    for i in range(nw):
        out[i] = (x[at_w[i], 2] - water_c[i]) * scale_w[i]
    for i in range(ne):
        out[nw + i] = (x[at_e[i], 3] - element_c[i]) * scale_e[i]
    for i in range(p):
        out[nw + ne + i] = (theta[i] - prior_mean[i]) / prior_sd[i]
    return out


@numba.njit(cache=True)
def bounded_update(
    x: np.ndarray,
    p: np.ndarray,
    j: int,
    z: float,
    r: float,
    aside_above: float,
    gate_nis: float,
    max_param_step: float,
    learnt: np.ndarray,
    frozen: np.ndarray,
) -> tuple[int, float, np.ndarray, np.ndarray]:
    """Return (code, NIS, x⁺, P⁺) of the filter's usual robust update of a reading z of
    state j with variance r (the rules are VesselEstimator._update's).

    code 2: the reading lies more than ``aside_above`` sd's out or past ``gate_nis``, so
    the caller takes it through its general path (x and P come back as they were);
    else the update is made, with r raised where a learnt parameter (indices
    ``learnt``) would move by more than ``max_param_step``: code 1 when it was, 0 when
    not. The same operations in the same order as the general path, so the same bits.
    """
    nu = z - x[j]
    var = p[j, j] + r
    nis = nu * nu / var
    if math.sqrt(nis) > aside_above or nis > gate_nis:
        return 2, nis, x, p
    p_jj = var - r
    r_used = r
    if learnt.shape[0] > 0:
        largest = abs(p[learnt[0], j])
        for k in range(1, learnt.shape[0]):
            if abs(p[learnt[k], j]) > largest:
                largest = abs(p[learnt[k], j])
        pull = largest * abs(nu)
        if pull > max_param_step * (p_jj + r_used):
            r_used = pull / max_param_step - p_jj
    x_new, p_new = scalar_update(x, p, j, z, r_used, frozen)
    return (1 if r_used > r else 0), nis, x_new, p_new
