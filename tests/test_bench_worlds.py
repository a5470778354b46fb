"""The scoring helpers of benchmarks/bench_worlds.py on small made-up inputs."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.linalg import expm

from benchmarks import bench_worlds as bw


def test_error_stats_counts_failures_and_reports_size_and_bias():
    stats = bw.error_stats([0.01, -0.02, 0.03, math.inf, None])
    # |e| = 0.01, 0.02, 0.03, inf: the median is halfway between 0.02 and 0.03; the
    # p90 and the worst fall on the failure, so they are unknown (null)
    assert stats["median"] == pytest.approx(0.025)
    assert stats["p90"] is None
    assert stats["worst"] is None
    assert stats["bias"] == pytest.approx(0.01)  # median of -0.02, 0.01, 0.03
    assert (stats["n"], stats["failed"]) == (4, 1)
    assert bw.error_stats([None]) == {"n": 0}


def test_rms_of_z_is_infinite_when_a_figure_is_missing():
    good = bw.rms_stats([1.0, -1.0, 2.0])
    assert good["rms"] == pytest.approx(math.sqrt(2.0), rel=1e-3)  # 4 significant figures
    assert good["missing"] == 0
    bad = bw.rms_stats([1.0, -1.0, 2.0, math.inf])
    assert bad["rms"] is None
    assert bad["rms_finite"] == pytest.approx(math.sqrt(2.0), rel=1e-3)
    assert bad["missing"] == 1


def test_interval_std_z_and_coverage():
    lo, hi = 100.0, 100.0 + 2.0 * bw.Z_90 * 5.0
    assert bw.interval_std_s(lo, hi) == pytest.approx(5.0)
    assert math.isinf(bw.interval_std_s(lo, None))
    assert bw.z_score(110.0, 5.0, 100.0) == pytest.approx(2.0)
    assert bw.z_score(110.0, math.inf, 100.0) == 0.0  # an open interval claims nothing
    assert math.isinf(bw.z_score(None, 5.0, 100.0))
    assert bw.covered(lo, hi, 110.0)
    assert not bw.covered(lo, hi, 99.0)
    assert bw.covered(lo, None, 1e9)
    assert not bw.covered(None, None, 100.0)


def test_relative_error_and_instants():
    assert bw.relative_error(110.0, 100.0) == pytest.approx(0.1)
    assert math.isinf(bw.relative_error(None, 100.0))
    t = [float(k) for k in range(21)]
    got = bw.fraction_instants(t, 5.0, 15.0, (0.1, 0.25, 0.5))
    assert got == {0.1: 6, 0.25: 8, 0.5: 10}  # 6, 7.5 → 8, 10 s
    with pytest.raises(ValueError, match="no sample"):
        bw.fraction_instants(t, 5.0, 30.0, (0.9,))


def test_late_worst_error_looks_only_between_a_fifth_and_nine_tenths():
    t = [float(k) for k in range(11)]
    errors = [math.nan, 0.9, 0.05, -0.3, 0.1, 0.0, 0.0, 0.0, 0.0, 0.02, 5.0]
    worst, where = bw.late_worst_error(t, errors, 0.0, 10.0)
    assert worst == pytest.approx(0.3)
    assert where == pytest.approx(0.3)
    worst, _ = bw.late_worst_error(t, [0.0, 0.0, 0.0, math.inf] + [0.0] * 7, 0.0, 10.0)
    assert math.isinf(worst)  # no forecast in the window is a failure


def test_the_plan_balances_kinds_and_sensors():
    plans = [bw.world_plan(i) for i in range(200)]
    kettles = [p for p in plans if p[0] == bw.KETTLE]
    heaters = [p for p in plans if p[0] == bw.HEATER]
    assert (len(kettles), len(heaters)) == (160, 40)
    assert sum(not p[1] for p in kettles) == 40  # a quarter without the element
    assert sum(not p[2] for p in kettles) == 80  # half power-only
    assert sum(not p[1] and not p[2] for p in kettles) == 20  # the two crossed evenly
    assert sum(not p[1] for p in heaters) == 30
    assert sum(not p[2] for p in heaters) == 20


def test_the_estimator_is_given_only_what_a_user_knows():
    for index in (0, 3, 4):
        world = bw.draw_world(index, 0)
        meta = bw.user_metadata(world)
        allowed = {"vessel_heat_capacity_j_per_k", "pressure_kpa", "rated_power_w", "target_c"}
        assert set(meta) <= allowed
        assert ("target_c" in meta) == (world.kind == bw.HEATER)
        sc = world.scenario
        assert meta["vessel_heat_capacity_j_per_k"] > sc.element.heat_capacity_j_per_k
        assert ("element" in sc.sensors) == world.element_sensor
        assert ("energy" in sc.sensors) == world.energy_counter
    assert bw.draw_world(7, 0) == bw.draw_world(7, 0)  # seeded


def test_interval_powers_prefer_the_counter_then_the_meter():
    rows = [
        {"energy": 0.0, "power": 0.0},
        {"energy": 0.5, "power": 1700.0},  # 0.5 Wh in 1 s is 1800 W
        {"power": 1750.0},  # the counter dropped out: the meter
        {},  # neither: the previous interval's
    ]
    assert bw.interval_powers_w(rows, 1.0).tolist() == pytest.approx([1800.0, 1750.0, 1750.0])
    powers = np.array([0.0, 0.0, 0.0, 2000.0, 2010.0, 1990.0])
    # only the intervals since the switch-on count
    assert bw.recent_power_w(powers, 6, 10, 400.0) == pytest.approx(2000.0)


def test_first_order_hold_lag_is_exact_for_a_ramp():
    tau, h = 3.0, 1.0
    t = np.arange(0.0, 30.0, h)
    x = 20.0 + 0.5 * t
    y = bw.first_order_hold_lag(x, tau, h)
    # a first-order lag on a ramp from rest: y = x - s·τ·(1 - e^(-t/τ)) (by hand)
    want = x - 0.5 * tau * (1.0 - np.exp(-t / tau))
    assert y == pytest.approx(want, abs=1e-9)


def _fit_data(n: int, power_w: float, element: bool) -> bw.FitData:
    return bw.FitData(
        h_s=1.0,
        power_w=np.full(n - 1, power_w),
        ambient_c=np.full(n - 1, 20.0),
        water_c=np.full(n, 15.0),
        element_c=np.full(n, 15.0) if element else None,
    )


def test_fit_path_matches_the_matrix_exponential():
    ua, c, g, c_e, tau_w, tau_e, t0 = 0.8, 5500.0, 50.0, 300.0, 3.0, 1.5, 15.0
    theta = [*np.log([ua, c, g, c_e, tau_w]).tolist(), t0, math.log(tau_e)]
    data = _fit_data(200, 2000.0, element=True)
    t_e, t_w, sensed = bw.fit_path(np.array(theta), data)
    # the reference: the augmented 3-state system [T_e, T_w, 1] stepped by expm
    a = np.array(
        [
            [-g / c_e, g / c_e, 2000.0 / c_e],
            [g / c, -(g + ua) / c, ua * 20.0 / c],
            [0.0, 0.0, 0.0],
        ]
    )
    step = expm(a * 1.0)
    x = np.array([t0, t0, 1.0])
    for k in range(1, 200):
        x = step @ x
        assert t_e[k] == pytest.approx(x[0], abs=1e-8)
        assert t_w[k] == pytest.approx(x[1], abs=1e-8)
    # the sensors lag: behind the nodes while they rise, within 1 % of τ·dT/dt at the end
    slope_w = t_w[-1] - t_w[-2]
    assert t_w[-1] - sensed[1][-1] == pytest.approx(tau_w * slope_w, rel=0.01)
    assert sensed[0][-1] < t_e[-1]


def test_fit_time_to_target_lands_on_the_target():
    ua, c, g, c_e = 0.8, 5500.0, 50.0, 300.0
    theta = np.array([*np.log([ua, c, g, c_e, 3.0]), 15.0])
    data = _fit_data(60, 2000.0, element=False)
    eta = bw.fit_time_to_target_s(theta, data, 99.0, 2000.0, 20.0)
    # about C·ΔT/P once the element has settled: 5500·(99 − 30)/2000 ≈ 190 s (hand sum)
    assert 150.0 < eta < 230.0
    longer = bw.FitData(
        h_s=1.0,
        power_w=np.full(59 + round(eta) + 5, 2000.0),
        ambient_c=np.full(59 + round(eta) + 5, 20.0),
        water_c=np.full(60 + round(eta) + 5, 15.0),
        element_c=None,
    )
    _, t_w, _ = bw.fit_path(theta, longer)
    k = 59 + math.floor(eta)
    assert t_w[k] <= 99.0 <= t_w[k + 1]
    # the losses hold the water below a target it cannot reach
    assert math.isinf(bw.fit_time_to_target_s(theta, data, 99.0, 50.0, 20.0))


def test_checks_meet_only_inside_their_limits():
    assert bw.Check("a", 0.02, high=0.03).met
    assert not bw.Check("a", 0.04, high=0.03).met
    assert bw.Check("b", 0.9, low=0.85, high=0.95).met
    assert not bw.Check("b", 0.8, low=0.85, high=0.95).met
    assert not bw.Check("c", None, high=1.0).met
    assert bw.Check("d", 0, high=0).met
