"""The closed-form transitions against scipy's matrix exponential, ODE solver and the model."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.linalg import expm

from monitor.physics import model, transition

P_W, AMB_C, UA, C, G, CE = 2000.0, 20.0, 0.7, 5300.0, 54.0, 160.0


def _ode(rhs, x0, dt_s):
    sol = solve_ivp(rhs, (0.0, dt_s), x0, rtol=1e-12, atol=1e-12, method="LSODA")
    return sol.y[:, -1]


@pytest.mark.parametrize("dt_s", [0.2, 1.0, 10.0, 300.0])
@pytest.mark.parametrize("lag", [None, 0.25])
def test_one_node_step_with_and_without_lag(dt_s, lag):
    def rhs(_t, x):
        out = [(P_W - UA * (x[0] - AMB_C)) / C]
        if lag:
            out.append(lag * (x[0] - x[1]))
        return out

    x0 = [30.0, 29.0] if lag else [30.0]
    got, m = transition.one_node_step(30.0, 29.0 if lag else None, dt_s, P_W, AMB_C, UA, C, lag)
    np.testing.assert_allclose(got, _ode(rhs, x0, dt_s), atol=1e-8)
    # M is ∂x(t)/∂x(0): compare with central differences
    for k in range(len(x0)):
        up, down = list(x0), list(x0)
        up[k] += 1e-3
        down[k] -= 1e-3
        a, _ = transition.one_node_step(
            *up[:1], up[1] if lag else None, dt_s, P_W, AMB_C, UA, C, lag
        )
        b, _ = transition.one_node_step(
            *down[:1], down[1] if lag else None, dt_s, P_W, AMB_C, UA, C, lag
        )
        column = (np.array(a) - np.array(b)) / 2e-3
        np.testing.assert_allclose(column, [row[k] for row in m], atol=1e-8)


@pytest.mark.parametrize("dt_s", [0.2, 1.0, 10.0, 300.0])
def test_two_node_step_with_both_lags_matches_expm(dt_s):
    lw, le = 0.25, 1 / 1.5
    # x = [T_w, T_e, y_w, y_e]; x' = A x + b
    a = np.array(
        [
            [-(G + UA) / C, G / C, 0.0, 0.0],
            [G / CE, -G / CE, 0.0, 0.0],
            [lw, 0.0, -lw, 0.0],
            [0.0, le, 0.0, -le],
        ]
    )
    b = np.array([UA * AMB_C / C, P_W / CE, 0.0, 0.0])
    block = np.zeros((5, 5))
    block[:4, :4] = a * dt_s
    block[:4, 4] = b * dt_s
    full = expm(block)
    x0 = np.array([30.0, 60.0, 29.0, 55.0])
    want = full[:4, :4] @ x0 + full[:4, 4]
    got, m = transition.two_node_step(
        30.0, 60.0, 29.0, dt_s, P_W, AMB_C, UA, C, G, CE, lw, 55.0, le
    )
    np.testing.assert_allclose(got, want, atol=1e-8)
    np.testing.assert_allclose(np.array(m), full[:4, :4], atol=1e-9)


def test_lag_equal_to_a_mode_stays_exact():
    # when the sensor's rate equals the element mode's, the closed form's ratio is 0/0
    lam = -(0.5 * ((-(G + UA) / C) + (-G / CE)) - np.sqrt(
        0.25 * ((-(G + UA) / C) + (-G / CE)) ** 2 - UA * G / (C * CE)))  # fmt: skip
    got, _ = transition.two_node_step(30.0, 60.0, 29.0, 1.0, P_W, AMB_C, UA, C, G, CE, lam)

    def rhs(_t, x):
        return [(G * (x[1] - x[0]) - UA * (x[0] - AMB_C)) / C, (P_W - G * (x[1] - x[0])) / CE,
                lam * (x[0] - x[2])]  # fmt: skip

    np.testing.assert_allclose(got, _ode(rhs, [30.0, 60.0, 29.0], 1.0), atol=1e-8)


def test_clamped_step_balances_energy():
    temps, evaporated_j = transition.clamped_step(
        99.97, 120.0, 99.0, 5.0, P_W, AMB_C, UA, G, CE, 0.25
    )
    assert temps[0] == 99.97
    stored_j = CE * (temps[1] - 120.0)
    # energy in = element storage + loss + evaporation (hand balance of the clamp)
    assert pytest.approx(stored_j + UA * (99.97 - AMB_C) * 5.0 + evaporated_j) == P_W * 5.0


@pytest.mark.parametrize("state", [(15.0, 15.0), (50.0, 90.0), (15.0, 80.0), (95.0, 100.0)])
def test_fast_time_to_target_matches_the_model(state):
    params = model.VesselParams(UA, C, G, CE)
    want = model.time_to_target(state, 99.97, model.Inputs(P_W, AMB_C), params).seconds
    got = transition.two_node_time_to_target(*state, 99.97, P_W, AMB_C, UA, C, G, CE)
    assert got == pytest.approx(want, rel=1e-8)
    one = model.time_to_target(
        state[:1], 99.97, model.Inputs(P_W, AMB_C), model.VesselParams(UA, C)
    )
    assert transition.one_node_time_to_target(state[0], 99.97, P_W, AMB_C, UA, C) == pytest.approx(
        one.seconds, rel=1e-12
    )


def test_times_to_target_of_many_points_are_each_points_own():
    # the forecast's batch (mean and sigma points in one compiled call) must give each
    # point's time exactly, and NaN where the scalar function says never (None)
    rng = np.random.default_rng(4)
    rows = np.column_stack(
        [
            rng.uniform(10.0, 99.0, 40),
            rng.uniform(10.0, 140.0, 40),
            np.log(rng.uniform(0.2, 5.0, 40)),
            np.log(rng.uniform(2e3, 4e5, 40)),
            np.log(rng.uniform(5.0, 200.0, 40)),
        ]
    )
    rows[0, 2] = math.log(40.0)  # losses that hold it below the target: never
    got = transition.two_node_times_to_target(rows, 99.97, 300.0, AMB_C, CE)
    for row, t in zip(rows.tolist(), got.tolist(), strict=True):
        want = transition.two_node_time_to_target(
            row[0], row[1], 99.97, 300.0, AMB_C, *(math.exp(v) for v in row[2:]), CE
        )
        assert (want is None and math.isnan(t)) or want == t
    assert math.isnan(got[0])
    assert np.isfinite(got[1:]).sum() > 10


def test_fast_time_to_target_never():
    assert transition.two_node_time_to_target(15.0, 15.0, 99.97, 50.0, AMB_C, UA, C, G, CE) is None
    assert transition.one_node_time_to_target(15.0, 99.97, 50.0, AMB_C, UA, C) is None
    assert transition.one_node_time_to_target(15.0, 99.97, 0.0, AMB_C, UA, C) is None


def _two_node_system(ua, c, g, lw, le):
    """Return (A, b) of x = [T_w, T_e, y_w, y_e] for the test's vessel (x' = A x + b)."""
    a = np.array(
        [
            [-(g + ua) / c, g / c, 0.0, 0.0],
            [g / CE, -g / CE, 0.0, 0.0],
            [lw, 0.0, -lw, 0.0],
            [0.0, le, 0.0, -le],
        ]
    )
    return a, np.array([ua * AMB_C / c, P_W / CE, 0.0, 0.0])


def _van_loan_sensitivities(x0, dt_s, ua, c, g, lw, le):
    """Return ∂x(t)/∂(ln UA, ln C, ln G) by Van Loan's block exponential, independently.

    With Ã = [[A, b], [0, 0]] the step is expm(Ã t); the derivative of expm(Ã t) by θ
    is the top-right block of expm([[Ã, ∂Ã], [0, Ã]]·t) (Van Loan 1978, from memory).
    ∂Ã/∂ln θ is taken by central differences of the (linear-in-1/θ) matrix entries.
    """
    columns = []
    for k in range(3):
        theta = np.log([ua, c, g])

        def aug(th):
            a, b = _two_node_system(*np.exp(th), lw, le)
            out = np.zeros((5, 5))
            out[:4, :4], out[:4, 4] = a, b
            return out

        h = 1e-6
        up, down = theta.copy(), theta.copy()
        up[k] += h
        down[k] -= h
        d_aug = (aug(up) - aug(down)) / (2 * h)
        big = np.zeros((10, 10))
        big[:5, :5] = big[5:, 5:] = aug(theta) * dt_s
        big[:5, 5:] = d_aug * dt_s
        d_step = expm(big)[:5, 5:]
        columns.append(d_step[:4, :4] @ x0 + d_step[:4, 4])
    return np.array(columns).T


@pytest.mark.parametrize("dt_s", [0.5, 1.0, 10.0, 120.0])
@pytest.mark.parametrize("vessel", [(UA, C, G), (4.0, 180e3, 25.0), (0.3, 2500.0, 8.0)])
def test_parameter_sensitivities_match_van_loan(dt_s, vessel):
    ua, c, g = vessel
    lw, le = 1 / 4.0, 1 / 1.5
    x0 = np.array([30.0, 60.0, 29.0, 55.0])
    _, _, s = transition.two_node_step_and_sensitivities(
        30.0, 60.0, 29.0, dt_s, P_W, AMB_C, ua, c, g, CE, lw, 55.0, le
    )
    want = _van_loan_sensitivities(x0, dt_s, ua, c, g, lw, le)
    # tolerances ours: the reference's central difference of the generator (h = 1e-6)
    # is good to about 1e-8 relative; a wrong term would be off by order 1
    np.testing.assert_allclose(np.array(s), want, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("lagged", [False, True])
def test_sensitivities_without_one_or_both_lags_and_for_one_node(lagged):
    # the two-node rows without the element lag are the full system's rows [T_w, T_e, y_w]
    lw = 0.25 if lagged else None
    _, _, s = transition.two_node_step_and_sensitivities(
        30.0, 60.0, 29.0 if lagged else None, 2.0, P_W, AMB_C, UA, C, G, CE, lw
    )
    full = _van_loan_sensitivities(np.array([30.0, 60.0, 29.0, 55.0]), 2.0, UA, C, G, 0.25, 0.5)
    np.testing.assert_allclose(np.array(s), full[: 3 if lagged else 2], rtol=1e-6, atol=1e-9)
    # one node: central differences of the closed form (C = 6 kJ/K, no element); the
    # tolerances here are ours, as above (rtol 1e-5 for a difference step of 1e-5)
    _, _, s1 = transition.one_node_step_and_sensitivities(
        30.0, 29.0 if lagged else None, 2.0, P_W, AMB_C, UA, 6000.0, lw
    )
    for k, (ua, c) in enumerate([(UA * np.exp(1e-5), 6000.0), (UA, 6000.0 * np.exp(1e-5))]):
        up, _ = transition.one_node_step(30.0, 29.0 if lagged else None, 2.0, P_W, AMB_C,
                                         ua, c, lw)  # fmt: skip
        down, _ = transition.one_node_step(
            30.0, 29.0 if lagged else None, 2.0, P_W, AMB_C,
            UA * np.exp(-1e-5) if k == 0 else UA, 6000.0 * np.exp(-1e-5) if k else 6000.0, lw,
        )  # fmt: skip
        np.testing.assert_allclose(
            [row[k] for row in s1], (np.array(up) - np.array(down)) / 2e-5, rtol=1e-5, atol=1e-10
        )


def test_sensitivities_step_aside_where_a_lag_matches_a_mode():
    # the closed form divides by (μ + λ): at a coincidence it says so instead of guessing
    a11, a22 = -(G + UA) / C, -G / CE
    half = 0.5 * (a11 + a22)
    fast = half - np.sqrt(half * half - UA * G / (C * CE))
    temps, m, s = transition.two_node_step_and_sensitivities(
        30.0, 60.0, 29.0, 1.0, P_W, AMB_C, UA, C, G, CE, -fast
    )
    assert s is None
    assert len(temps) == 3  # the step itself is still given
    assert len(m) == 3
    _, _, s1 = transition.one_node_step_and_sensitivities(
        30.0, 29.0, 1.0, P_W, AMB_C, UA, 6000.0, UA / 6000.0
    )
    assert s1 is None
