"""The heat-up batch fit: its model against expm, its optimum against scipy, drawn worlds."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy.linalg import expm
from scipy.optimize import least_squares

from drivers.simworld import (
    LidSpec,
    SimulatedRig,
    effective_ua_w_per_k,
    kettle_scenario,
    scenario_metadata,
)
from monitor.estimation import batchfit as bf
from monitor.estimation.estimator import VesselEstimator
from monitor.estimation.settings import EstimatorSettings, VesselConfig


def _theta(ua=1.5, c=5600.0, g=60.0, ce=300.0, tau_w=4.0, t0=15.0, tau_e=1.5, de=0.0):
    return np.array(
        [math.log(ua), math.log(c), math.log(g), math.log(ce), math.log(tau_w), t0,
         math.log(tau_e), de]
    )  # fmt: skip


def _priors(n: int = 8) -> bf.FitPriors:
    mean = np.array([0.0, math.log(5000.0), math.log(50.0), math.log(130.0), math.log(2.5), 15.0,
                     math.log(1.5), 0.0])  # fmt: skip
    sd = np.array([1.0, 1.5, 1.0, 0.8, 0.8, 20.0, 1.0, 5.0])
    return bf.FitPriors(mean[:n], sd[:n])


def _switch_on(n: int = 240, on_at: int = 30, power_w: float = 2000.0) -> np.ndarray:
    return np.r_[np.zeros(on_at), np.full(n - on_at, power_w)]


def _noisy_window(
    truth: np.ndarray,
    n: int,
    on_at: int,
    seed: int,
    power_w: float = 2000.0,
    has_element: bool = True,
) -> tuple[bf.FitData, np.ndarray]:
    """Return (a window of readings of model θ with noise, the clean states) at 1 s.

    Water readings carry 0.08 K of noise and element readings 0.5 K (drawn in that
    order from ``default_rng(seed)``); the room is at 20 °C.
    """
    rng = np.random.default_rng(seed)
    power = _switch_on(n, on_at, power_w)
    ambient = np.full(n, 20.0)
    clean = bf.FitData(1.0, power, ambient, np.zeros(n + 1), np.zeros(n + 1))
    states, _ = bf.simulate(truth, clean)
    water = states[:, 2] + rng.normal(0.0, 0.08, n + 1)
    element = states[:, 3] + rng.normal(0.0, 0.5, n + 1) if has_element else None
    return bf.FitData(1.0, power, ambient, water, element), states


def test_modal_solution_matches_the_matrix_exponential_step_by_step():
    theta = _theta()
    power = _switch_on(60, 10)
    data = bf.FitData(1.0, power, np.full(60, 21.0), np.zeros(61), np.zeros(61))
    states, _ = bf.simulate(theta, data)
    m, b = bf._matrices(theta, True)
    # the augmented matrix [[M, B u], [0, 0]] gives the exact step with constant inputs
    x = np.full(4, 15.0)
    for k in range(60):
        aug = np.zeros((5, 5))
        aug[:4, :4] = m
        aug[:4, 4] = b @ np.array([power[k], 21.0])
        x = (expm(aug) @ np.r_[x, 1.0])[:4]
        np.testing.assert_allclose(states[k + 1], x, rtol=0, atol=1e-8)


def test_a_second_start_from_the_priors_leaves_a_wrong_valley():
    # warm-started in a valley of long lags and a light element, which explains a
    # short window's switch-on nearly as well: the cold start beside it wins on cost
    truth = _theta(ce=330.0, tau_w=1.4, g=25.0, c=2600.0, tau_e=3.0)
    data, states = _noisy_window(truth, 60, 20, seed=8, power_w=2500.0)
    priors = _priors()
    wrong = _theta(ce=40.0, tau_w=8.0, g=21.0, c=3300.0, tau_e=19.0)
    stuck = bf.fit_heat_up(data, priors, wrong, (0.05, 0.3))
    fit = bf.HeatUpFit(priors, has_element=True)
    fit.fit = stuck
    cold = fit._cold_fit(data, (0.05, 0.3))
    assert cold.cost < stuck.cost  # the data say so; the warm start alone stayed put
    chosen = bf.HeatUpFit._better_of(stuck, cold)
    assert chosen is cold
    assert abs(chosen.end_state[1] - states[-1, 1]) < abs(stuck.end_state[1] - states[-1, 1])


def test_a_lag_equal_to_a_thermal_time_constant_does_not_break_the_solution():
    theta = _theta()
    m, _ = bf._matrices(theta, True)
    fast = float(np.min(np.linalg.eigvals(m[:2, :2]).real))
    theta[bf.LN_TAU_W] = math.log(-1.0 / fast)  # the Jordan case
    data = bf.FitData(1.0, _switch_on(60, 10), np.full(60, 21.0), np.zeros(61), np.zeros(61))
    states, _ = bf.simulate(theta, data)
    nearby = theta.copy()
    nearby[bf.LN_TAU_W] += 1e-3
    near_states, _ = bf.simulate(nearby, data)
    assert np.all(np.isfinite(states))
    assert np.max(np.abs(states - near_states)) < 0.05


@pytest.mark.parametrize("has_element", [True, False])
def test_fit_agrees_with_scipy_least_squares_on_the_same_residuals(has_element):
    truth = _theta(tau_w=4.0, ce=420.0)
    data, _ = _noisy_window(truth, 200, 30, seed=11, has_element=has_element)
    p = 8 if has_element else 6
    priors = _priors(p)
    ours = bf.fit_heat_up(data, priors, priors.mean.copy(), (0.05, 0.3))
    assert ours.converged

    def f(theta):
        return bf.residuals(theta, data, priors, (0.05, 0.3))

    ref = least_squares(f, priors.mean.copy(), method="lm", xtol=1e-12, ftol=1e-12)
    cost_ours = float(f(ours.theta) @ f(ours.theta))
    assert cost_ours <= ref.cost * 2.0 * (1.0 + 1e-6)
    # the physical parameters agree to a small fraction of their own uncertainty
    for k in range(4):
        assert abs(ours.theta[k] - ref.x[k]) < 0.05 * ours.ln_sd(k) + 1e-6


def test_fit_recovers_a_heavy_plate_and_a_slow_sensor_from_the_switch_on():
    # a plate three times heavier than the default guess and a 4 s water lag: the
    # switch-on transient must be put down to C_e and τ, not to C and G
    truth = _theta(ce=3.0 * 130.0, tau_w=4.0, g=45.0)
    # two minutes of a heat-up, the countdown's critical part
    data, _ = _noisy_window(truth, 120, 20, seed=3)
    result = bf.fit_heat_up(data, _priors(), _priors().mean.copy(), (0.05, 0.3))
    c, g = result.value(bf.LN_C), result.value(bf.LN_G)
    # tolerances ours: C within 3 %, G within 10 %
    assert abs(c / math.exp(truth[bf.LN_C]) - 1.0) < 0.03
    assert abs(g / math.exp(truth[bf.LN_G]) - 1.0) < 0.10
    # honest: the truth within 3 stated σ for each physical parameter
    for k in (bf.LN_C, bf.LN_G, bf.LN_CE, bf.LN_TAU_W):
        assert abs(result.theta[k] - truth[k]) < 3.0 * result.ln_sd(k)


def test_a_window_the_model_cannot_take_keeps_the_last_fit():
    fit = bf.HeatUpFit(_priors(6), has_element=False)
    for k in range(30):
        power = 2000.0 if k >= 5 else 0.0
        fit.add(float(k), power if k != 20 else math.inf, 20.0, 15.0 + 0.3 * k, None, k >= 5)
    assert fit.due(29.0)
    assert fit.run(29.0, (0.05, 0.3)) is None  # no fit yet, and no exception
    assert fit.failed == 1


def test_a_short_heat_up_is_fitted_more_often_in_its_first_third():
    # the schedule, not a fit: fits, last_fit_s and the countdown are set by hand
    fit = bf.HeatUpFit(_priors(6), has_element=False)
    for k in range(21):
        fit.add(float(k), 2000.0 if k >= 1 else 0.0, 20.0, 15.0 + 0.3 * k, None, k >= 1)
    fit.fits, fit.last_fit_s = 3, 16.0
    assert not fit.due(20.0)  # 4 s after the last fit: the usual spacing is 10 s
    fit.expect_end(80.0)  # 20 s heated + 80 s to go: 5 % of 100 s is 5 s
    assert not fit.due(20.0)
    fit.add(21.0, 2000.0, 20.0, 21.3, None, True)
    assert fit.due(21.0)
    # past 30 % of the expected heat-up the usual 10 s spacing is back
    fit.fits, fit.last_fit_s = 8, 35.0
    fit.add(40.0, 2000.0, 20.0, 27.0, None, True)
    fit.expect_end(60.0)
    assert not fit.due(40.0)
    fit.add(45.0, 2000.0, 20.0, 28.5, None, True)
    assert fit.due(45.0)
    # a four-hour heater: its countdown never brings a fit sooner than every_s
    slow = bf.HeatUpFit(_priors(6), has_element=False)
    for k in range(121):
        slow.add(float(k), 2000.0 if k >= 1 else 0.0, 20.0, 15.0 + 0.01 * k, None, k >= 1)
    slow.fits, slow.last_fit_s = 3, 115.0
    slow.expect_end(14400.0)
    assert not slow.due(120.0)


def test_thinned_grid_keeps_the_energy_and_the_start():
    t = np.arange(0.0, 5001.0)
    power = np.where(t > 100.0, 2500.0, 0.0)
    data = bf.FitData.from_steps(
        t, power, np.full(t.size, 20.0), 15.0 + 0.001 * t, None, max_points=500
    )
    assert len(data.power_w) <= 500
    assert data.h_s * len(data.power_w) >= 5000.0
    energy_fine = float(np.sum(power[1:]))  # each step's power over the second before it
    assert abs(float(np.sum(data.power_w)) * data.h_s - energy_fine) < 1e-6 * energy_fine
    assert np.isfinite(data.water_c[-1])


def _kettle_run(seed: int, two_node: bool, batch_fit: bool, lid: LidSpec | None = None):
    """Return (rows, boil time, scenario) of a drawn kettle given only what a user knows.

    Each row is (t_s, estimate, the water the kettle holds then).
    """
    rng = np.random.default_rng(seed)
    sc = kettle_scenario(
        water_mass_kg=float(rng.uniform(0.6, 1.7)),
        start_water_c=float(rng.uniform(8.0, 25.0)),
        duration_s=600.0,
        lid=lid,
    )
    element = replace(sc.element, heat_capacity_j_per_k=float(rng.uniform(150.0, 500.0)))
    sensors = dict(sc.sensors)
    sensors["water"] = replace(sensors["water"], tau_s=float(rng.uniform(1.0, 6.0)), noise_sd=0.09)
    sensors["element"] = replace(
        sensors["element"], tau_s=float(rng.uniform(0.5, 4.0)), noise_sd=0.5
    )
    sc = replace(sc, element=element, sensors=sensors)
    meta = scenario_metadata(sc, seed)
    meta = {k: meta[k] for k in ("pressure_kpa", "rated_power_w", "vessel_heat_capacity_j_per_k")}
    config = VesselConfig.from_metadata(sc.vessel, meta, two_node)
    est = VesselEstimator(config, EstimatorSettings(batch_fit=batch_fit))
    rig = SimulatedRig(sc, seed)
    rows = []
    for batch in rig.run():
        values = {s.channel: s.value for s in batch if s.channel != "energy"}  # power only
        if not two_node:
            values.pop("element", None)
        e = est.step(rig.elapsed_s, values)
        rows.append((rig.elapsed_s, e, rig.state.water_mass_kg))
    return rows, rig.state.boiling_since_s, sc


def _at_fraction(rows, boiled_s: float, fraction: float):
    """Return the row nearest ``fraction`` of the heat-up (switch-on to the boil)."""
    started_s = next(t for t, e, _ in rows if e is not None and e.power_w > 100.0)
    at_s = started_s + fraction * (boiled_s - started_s)
    return min(rows, key=lambda r: abs(r[0] - at_s))


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("two_node", [True, False])
def test_drawn_kettles_mass_and_countdown_by_mid_heat_up(seed, two_node):
    # tolerances a little looser than the targets (2 % mass, 2 % countdown at
    # the middle of the heat-up; ours): 4 % mass, and the truth within 3 σ; the countdown
    # within 8 % with the element measured and 10 % without it (a hidden element and a
    # power that climbs as the element warms leave a bias of 5-8 %: a known gap)
    rows, boiled_s, _ = _kettle_run(seed, two_node, batch_fit=True)
    t, e, mass = _at_fraction(rows, boiled_s, 0.5)
    err = e.water_mass_kg.value - mass
    assert abs(err) / mass < 0.04
    assert abs(err) < 3.0 * e.water_mass_kg.std
    remaining = boiled_s - t
    assert abs(e.target.eta_s - remaining) / remaining < (0.08 if two_node else 0.10)
    assert e.target.lo_s - 2.0 * (e.target.hi_s - e.target.lo_s) < remaining
    assert remaining < e.target.hi_s + 2.0 * (e.target.hi_s - e.target.lo_s)


def test_batch_fit_beats_the_filter_alone_on_an_unknown_plate():
    # over three drawn kettles, not one: the robust filter alone is right on some
    # kettles (0.6 % on seed 5) and far off on others (33 % on seed 3, 2026-12-03)
    def mass_error(rows, boiled_s):
        _, e, mass = _at_fraction(rows, boiled_s, 0.25)
        return abs(e.water_mass_kg.value - mass) / mass

    fitted, unfitted = [], []
    for seed in (3, 4, 5):
        with_fit, boiled_s, _ = _kettle_run(seed, True, batch_fit=True)
        alone, _, _ = _kettle_run(seed, True, batch_fit=False)
        # both at the quarter of the same heat-up (same rig and seed: same switch-on)
        fitted.append(mass_error(with_fit, boiled_s))
        unfitted.append(mass_error(alone, boiled_s))
    assert max(fitted) < 0.05
    assert max(fitted) < max(unfitted)
    assert sum(fitted) < sum(unfitted)


@pytest.mark.parametrize("seed", [0, 1])
def test_a_heavy_slow_lid_neither_hides_water_nor_makes_ua_overconfident(seed):
    # A lid of 200 J/K on a 1 W/K path to the water (a lag of about 170 s, longer than
    # half this heat-up) is in the vessel's heat capacity the user gives, but a heat-up
    # has barely warmed it: read as it is, the fit's heat capacity made the water 2-3 %
    # light at mid heat-up on bench_worlds.py's kettles, and the heat flowing into the
    # lid read as loss (UA high, error/std RMS 2.2-2.8). Tolerances ours: the mass within
    # 4 % and 3 σ, UA's truth (at that instant's water and room) within 3 σ.
    lid = LidSpec(heat_capacity_j_per_k=200.0, to_water_w_per_k=1.0, to_room_w_per_k=0.2)
    rows, boiled_s, sc = _kettle_run(seed, True, batch_fit=True, lid=lid)
    _, e, mass = _at_fraction(rows, boiled_s, 0.5)
    err = e.water_mass_kg.value - mass
    assert abs(err) / mass < 0.04
    assert abs(err) < 3.0 * e.water_mass_kg.std
    true_ua = effective_ua_w_per_k(sc, e.water_c, e.ambient_c)
    assert abs(e.ua_w_per_k.value - true_ua) < 3.0 * e.ua_w_per_k.std


def test_heating_power_leaves_out_the_off_steps_and_the_switch_on():
    fit = bf.HeatUpFit(_priors(6), has_element=False)
    assert fit.heating_power_w() is None
    for t in range(5):  # idle before switch-on
        fit.add(float(t), 0.0, 20.0, 20.0, None, heating=False)
    fit.add(5.0, 900.0, 20.0, 20.0, None, heating=True)  # the switch-on step itself
    powers = [1980.0, 2020.0, 2000.0, 0.0, 0.0, 1990.0, 2010.0]  # a thermostat's off steps
    for k, p in enumerate(powers):
        fit.add(6.0 + k, p, 20.0, 21.0 + k, None, heating=True)
    mean, rel_sd = fit.heating_power_w()
    on = [p for p in powers if p > 0.0]
    assert mean == pytest.approx(np.mean(on), rel=1e-12)
    assert rel_sd == pytest.approx(np.std(on) / np.mean(on), rel=1e-12)


def test_heating_power_wander_is_read_from_block_means_not_reading_noise():
    # a heater at 10 s samples for an hour: white reading noise of 2 % on a steady
    # 2 kW, then the same with a slow 2 % swing; only the swing is wander
    rng = np.random.default_rng(4)
    for swing, low, high in ((0.0, 0.0, 0.006), (0.02, 0.01, 0.02)):
        fit = bf.HeatUpFit(_priors(6), has_element=False)
        fit.add(0.0, 2000.0, 20.0, 20.0, None, heating=True)
        for k in range(1, 361):
            t = 10.0 * k
            p = 2000.0 * (1.0 + swing * math.sin(2.0 * math.pi * t / 1200.0))
            fit.add(t, p * (1.0 + 0.02 * rng.standard_normal()), 20.0, 20.0 + t / 100.0,
                    None, heating=True)  # fmt: skip
        _, rel_sd = fit.heating_power_w()
        assert low < rel_sd < high


def test_compiled_recursion_is_lfilter_bit_for_bit():
    # the batch fit's modal recursion replaced scipy.signal.lfilter (a second to import);
    # the same arithmetic in the same order, so the same bits
    from scipy.signal import lfilter

    from monitor.physics import kernels

    rng = np.random.default_rng(3)
    drive = rng.normal(size=5000) * 40.0
    for decay in (0.0, 0.5, 0.9993, 1.0):
        want = lfilter([1.0], [1.0, -decay], np.concatenate(([12.5], drive)))
        got = kernels.first_order_recursion(decay, 12.5, drive)
        assert np.array_equal(got, want)


def test_fit_budget_fills_at_its_share_and_charges_each_fit():
    # our own numbers: the token bucket's arithmetic, worked by hand in the comments
    now = [0.0]
    budget = bf.FitBudget(cpu_share=0.2, burst_s=0.5, clock=lambda: now[0])
    assert budget.allow()  # starts full
    budget.charge(0.3)
    budget.charge(0.3)  # two fits take it below zero
    assert not budget.allow()
    now[0] = 0.4  # 0.4 s at 0.2 refills 0.08 s: -0.02, still below zero
    assert not budget.allow()
    now[0] = 1.0  # 1 s in all: +0.1
    assert budget.allow()
    now[0] = 100.0  # never above the burst
    assert budget.allow()
    budget.charge(2.0)  # a 2 s fit (a first compilation) is charged one burst only
    assert not budget.allow()
    now[0] = 100.1  # so 0.1 s later the bucket is above zero again
    assert budget.allow()
    assert budget.deferred == 3
    assert budget.spent_s == pytest.approx(2.6)


def test_fit_budget_gives_the_fits_what_the_rest_leaves():
    # our own numbers: aim 0.8 of the core, the share kept within 0.03-0.5
    budget = bf.FitBudget(cpu_share=0.15)
    assert budget.retune(0.10) == pytest.approx(0.5)  # a small fleet: the ceiling
    assert budget.retune(0.60) == pytest.approx(0.2)
    assert budget.retune(0.79) == pytest.approx(0.03)  # saturated: the floor
    assert budget.cpu_share == pytest.approx(0.03)
    now = [0.0]
    budget = bf.FitBudget(cpu_share=0.15, burst_s=0.5, clock=lambda: now[0])
    budget.allow()
    budget.charge(0.5)
    budget.retune(0.75)  # 0.05 a second: 1 s refills 0.05 s
    now[0] = 1.0
    assert budget.allow()
    budget.charge(0.1)
    now[0] = 1.5
    assert not budget.allow()  # -0.05 + 0.025


def test_a_dry_budget_defers_the_fits_and_a_refilled_one_catches_up():
    # our kettle scenario: with a budget that never refills no fit is made, the vessel
    # goes on with the filter alone; once the budget refills the due fit is made at
    # the next step, and the figures match the unbudgeted run's from the next fit on
    sc = kettle_scenario(duration_s=200.0)
    meta = scenario_metadata(sc, 3)
    now = [0.0]
    budget = bf.FitBudget(cpu_share=1.0, burst_s=1e9, clock=lambda: now[0])
    budget._at, budget._tokens_s = 0.0, -1e9  # dry, and the clock stands still
    config = VesselConfig.from_metadata(sc.vessel, meta, True)
    budgeted = VesselEstimator(config, fit_budget=budget)
    free = VesselEstimator(config)
    rig = SimulatedRig(sc, 3)
    for batch in rig.run():
        values = {s.channel: s.value for s in batch}
        e_b = budgeted.step(rig.elapsed_s, values)
        e_f = free.step(rig.elapsed_s, values)
        names_b = {f.name for f in e_b.flags} if e_b is not None else set()
        names_f = {f.name for f in e_f.flags} if e_f is not None else set()
        assert "fit_waiting" not in names_f  # no budget, never waiting
        if rig.elapsed_s == 20.0:  # the first fit was due at 11 s: not yet 20 s waiting
            assert "fit_waiting" not in names_b
        if rig.elapsed_s == 60.0:
            assert budgeted.heat_up_fit.fits == 0 < free.heat_up_fit.fits
            assert budget.deferred > 0
            # the operator is told the figures come from an older fit (here: none)
            assert "fit_waiting" in names_b
            budget._tokens_s = 1e9  # refilled
        if rig.elapsed_s == 61.0:
            assert "fit_waiting" not in names_b  # the waiting fit was made at this step
    assert budgeted.heat_up_fit.fits > 0
    # the deferred schedule runs a step or two apart from the free one, on nearly the
    # same window by the end: nearly the same figures (our tolerance)
    assert abs(budgeted.heat_up_fit.last_fit_s - free.heat_up_fit.last_fit_s) < 10.0
    assert e_b.water_mass_kg.value == pytest.approx(e_f.water_mass_kg.value, rel=0.01)
    assert e_b.ua_w_per_k.value == pytest.approx(e_f.ua_w_per_k.value, rel=0.05)
