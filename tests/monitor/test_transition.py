"""The closed-form transitions against scipy's matrix exponential, ODE solver and the model."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.linalg import expm

from monitor import model, transition

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


def test_fast_time_to_target_never():
    assert transition.two_node_time_to_target(15.0, 15.0, 99.97, 50.0, AMB_C, UA, C, G, CE) is None
    assert transition.one_node_time_to_target(15.0, 99.97, 50.0, AMB_C, UA, C) is None
    assert transition.one_node_time_to_target(15.0, 99.97, 0.0, AMB_C, UA, C) is None
