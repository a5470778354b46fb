"""The live estimator against the simulated rig, its edge cases, and its filterpy twin."""

from __future__ import annotations

import itertools
import math
from dataclasses import replace

import numpy as np
import pytest

from drivers.simworld import (
    KettleSwitch,
    SimulatedRig,
    effective_ua_w_per_k,
    kettle_scenario,
    scenario_metadata,
    water_heater_scenario,
)
from monitor.estimation.contracts import Phase
from monitor.estimation.cores import FastCore, FilterpyCore
from monitor.estimation.estimator import VesselEstimator
from monitor.estimation.settings import EstimatorSettings, VesselConfig


def _run(scenario, seed, element=True, tamper=None, core=FastCore, kind=VesselEstimator):
    """Replay a simulated run; return (estimator, [(t, estimate, truth)], rig)."""
    rig = SimulatedRig(scenario, seed=seed)
    cfg = VesselConfig.from_metadata(scenario.vessel, scenario_metadata(scenario, seed), element)
    est = kind(cfg, core=core)
    out = []
    for batch in rig.run():
        readings = {s.channel: s.value for s in batch}
        if not element:
            readings.pop("element", None)
        if tamper is not None:
            readings = tamper(rig.elapsed_s, readings)
        e = est.step(rig.elapsed_s, readings)
        out.append((rig.elapsed_s, e, dict(rig.truth(), boiling_since_s=rig.state.boiling_since_s)))
    return est, out, rig


def _boil_time(trace):
    return next(tr["boiling_since_s"] for _, _, tr in trace if tr["boiling_since_s"] is not None)


def _at(trace, t_s):
    return min(trace, key=lambda item: abs(item[0] - t_s))


@pytest.mark.parametrize("element", [True, False], ids=["two-node", "one-node"])
@pytest.mark.parametrize(
    "changes",
    [
        {},
        {"water_mass_kg": 1.6, "scale_mm": 0.3, "start_water_c": 9.0},
        {"water_mass_kg": 1.0, "pressure_kpa": 84.556, "start_water_c": 19.0},
    ],
    ids=["plain", "full-scaled-cold", "light-1500m"],
)
def test_kettle_estimates_against_the_simulated_truth(changes, element):
    scenario = kettle_scenario(**changes)
    est, trace, _ = _run(scenario, seed=21, element=element)
    start = scenario.control.start_delay_s
    boil = _boil_time(trace)
    # time to boil at half way through the heat-up: within 6 % of what remains
    # (benchmark target 3 %, a little looser here)
    t_half, e_half, truth_half = _at(trace, start + 0.5 * (boil - start))
    remaining = boil - t_half
    assert e_half.target is not None
    assert abs(e_half.target.eta_s - remaining) < 0.06 * remaining
    # the water mass by then within 4 % (benchmark 3 %)
    assert e_half.water_mass_kg.value == pytest.approx(truth_half["water_mass_kg"], rel=0.04)
    # UA after ten minutes of cooling within 15 % of the simulator's effective UA (benchmark 10 %)
    _t_end, e_end, truth_end = trace[-1]
    ua_true = effective_ua_w_per_k(scenario, truth_end["water_c"], truth_end["ambient_c"])
    assert e_end.ua_w_per_k.value == pytest.approx(ua_true, rel=0.15)
    assert e_end.phase is Phase.COOLING
    if element:
        g = est.conductance_at_80_percent
        assert g is not None
        assert g.value == pytest.approx(scenario.element_conductance_w_per_k(0.0), rel=0.07)
    else:
        assert e_end.element_conductance_w_per_k is None


def test_phases_of_a_kettle_run():
    _, trace, _ = _run(kettle_scenario(), seed=4)
    phases = [e.phase for _, e, _ in trace]
    seen = list(dict.fromkeys(phases))
    assert seen == [Phase.IDLE, Phase.HEATING, Phase.BOILING, Phase.COOLING]


def test_boiling_clamps_water_and_mass_falls_and_c_is_not_learnt():
    scenario = kettle_scenario(duration_s=420.0)
    scenario = replace(scenario, control=replace(scenario.control, off_delay_s=120.0))
    est, trace, rig = _run(scenario, seed=5)
    boiling = [(t, e) for t, e, _ in trace if e.phase is Phase.BOILING]
    assert len(boiling) > 100
    assert all(e.water_c == pytest.approx(est.boiling_point_c) for _, e in boiling[5:])
    masses = [e.water_mass_kg.value for _, e in boiling]
    lost_true = scenario.water_mass_kg - rig.state.water_mass_kg
    assert masses[0] - masses[-1] == pytest.approx(lost_true, rel=0.25)
    assert est.totals.evaporated_kg == pytest.approx(lost_true, rel=0.25)
    # C is not learnt on the boil: ln C gets no gain from readings, so its spread never
    # shrinks there (it moves only through the evaporation model)
    stds = [e.heat_capacity_j_per_k.std / e.heat_capacity_j_per_k.value for _, e in boiling[2:]]
    assert all(b >= a * (1.0 - 1e-9) for a, b in itertools.pairwise(stds))
    assert all(e.boil_off_to_dry_s and e.boil_off_to_dry_s > 300.0 for _, e in boiling[5:])


def test_dry_boil_alarm_when_little_water_is_left():
    scenario = kettle_scenario(water_mass_kg=0.25, duration_s=400.0)
    scenario = replace(scenario, control=replace(scenario.control, off_delay_s=1e9))
    _, trace, _ = _run(scenario, seed=6)
    levels = {f.level for _, e, _ in trace for f in e.flags if f.name == "dry_boil"}
    assert "alarm" in levels
    message = next(f.message for _, e, _ in trace for f in e.flags if f.name == "dry_boil")
    assert "runs dry" in message or "switch the element off" in message


def test_power_never_switched_on():
    scenario = kettle_scenario(duration_s=300.0, start_water_c=40.0)
    scenario = replace(scenario, control=replace(scenario.control, start_delay_s=1e9))
    est, trace, _ = _run(scenario, seed=7)
    assert all(e.target is None for _, e, _ in trace)
    assert {e.phase for _, e, _ in trace} <= {Phase.COOLING, Phase.IDLE}
    assert est.totals.heat_up_done_s is None
    assert all(np.isfinite(e.water_c) for _, e, _ in trace)


def test_sixty_second_dropout_mid_heat_up():
    def drop(t_s, readings):
        if 100.0 <= t_s < 160.0:
            return {k: v for k, v in readings.items() if k not in ("water", "element")}
        return readings

    _, trace, _ = _run(kettle_scenario(), seed=8, tamper=drop)
    during = [e for t, e, _ in trace if 100.0 <= t < 160.0]
    assert during[-1].water_std_c > 2.0 * during[0].water_std_c  # uncertainty grows
    t, e, truth = _at(trace, 158.0)
    assert e.water_c == pytest.approx(truth["water_c"], abs=1.5)  # predicted across
    t, e, truth = _at(trace, 175.0)
    # and back on track: within 0.5 K, about 1.5 s of this heat-up (ours; 0.31 K with
    # the batch fit's re-anchoring, 0.3 K was the bound before it)
    assert e.water_c == pytest.approx(truth["water_c"], abs=0.5)
    boil = _boil_time(trace)
    assert abs(e.target.eta_s - (boil - t)) < 0.08 * (boil - t)


def test_one_spike_is_gated_and_flagged():
    def spike(t_s, readings):
        if t_s == 120.0 and "water" in readings:
            return dict(readings, water=readings["water"] + 50.0)
        return readings

    _, trace, _ = _run(kettle_scenario(), seed=9, tamper=spike, element=False)
    _t, e, truth = _at(trace, 120.0)
    assert any(f.name == "water_outlier" for f in e.flags)
    assert e.water_c == pytest.approx(truth["water_c"], abs=0.5)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_a_meter_without_an_energy_counter_still_gives_the_water_mass(seed):
    # power readings alone (their noise does not cancel as a counter's quantisation
    # does); seed 1 came out at 0.617 kg before reacquiring kept the sensor lag
    # (benchmarks/bench_power_timing.py; our own 300 s kettle scenario)
    def no_counter(_t_s, readings):
        return {k: v for k, v in readings.items() if k != "energy"}

    _est, trace, rig = _run(kettle_scenario(duration_s=300.0), seed=seed, tamper=no_counter)
    e = trace[-1][1]
    # against what the simulated kettle still holds; 5 % is our own tolerance
    assert e.water_mass_kg.value == pytest.approx(rig.state.water_mass_kg, rel=0.05)


def test_reacquiring_widens_the_water_without_a_reset_and_keeps_the_lag():
    # Re-acquiring used to set the temperatures to the reading and zero their
    # covariances (which locked wrong parameters in); now it only adds variance.
    est, _trace, _ = _run(kettle_scenario(duration_s=100.0), seed=4)
    lay = est.layout
    x0, p0 = est.core.x.copy(), est.core.P.copy()
    ahead_k = x0[lay.water] - x0[lay.lagged]
    assert ahead_k > 0.5  # heating at ~0.4 K/s through a 4 s sensor lag (our scenario)
    r = est.reading_noise_sd_c("water") ** 2
    added_c = est._reacquire("water", 2.0)
    assert added_c > 1.9
    p1 = est.core.P
    assert np.array_equal(est.core.x, x0)  # nothing is reset
    assert p1[lay.lagged, lay.lagged] + r == pytest.approx(4.0)  # S now covers a 2 K miss
    others = [i for i in range(lay.size) if i not in (lay.water, lay.lagged)]
    assert np.array_equal(p1[np.ix_(others, range(lay.size))], p0[np.ix_(others, range(lay.size))])
    # an ordinary update then moves the water and its sensor together: the lag is kept
    est.core.update(lay.lagged, float(x0[lay.lagged]) + 2.0, r)
    moved = est.core.x - x0
    assert moved[lay.lagged] > 1.8
    assert moved[lay.water] == pytest.approx(moved[lay.lagged], rel=0.05)


def test_target_not_reachable_says_why():
    # a hot kettle on a 30 W keep-warm element: it cools, so losses exceed power
    scenario = kettle_scenario(start_water_c=85.0, duration_s=1800.0)
    scenario = replace(
        scenario,
        element=replace(scenario.element, rated_power_w=30.0),
        control=replace(scenario.control, start_delay_s=0.0),
    )
    _, trace, _ = _run(scenario, seed=10, element=False)
    last = trace[-1][1]
    assert last.target is not None
    assert not last.target.reachable
    assert last.target.eta_s is None
    assert "not reachable" in last.target.reason
    assert "below the 99.97 °C target" in last.target.reason, last.target.reason
    assert any(f.name == "target_unreachable" for f in last.flags)


def test_thermostat_cycling_holds_and_gives_standing_loss():
    scenario = water_heater_scenario(draws=())
    _est, trace, _ = _run(scenario, seed=11, element=False)
    phases = {e.phase for _, e, _ in trace}
    assert Phase.HOLDING in phases
    last = trace[-1][1]
    ua_true = effective_ua_w_per_k(scenario, 60.0, 20.0)
    # standing loss at 60 °C against a 20 °C room, kWh/24 h, within 20 % (benchmark 10 %)
    kwh = last.ua_w_per_k.value * 40.0 * 24.0 / 1000.0
    assert kwh == pytest.approx(ua_true * 40.0 * 24.0 / 1000.0, rel=0.2)
    assert last.standing_loss_w is not None
    assert last.water_mass_kg.value == pytest.approx(scenario.water_mass_kg, rel=0.05)


def test_time_must_move_forward():
    est = VesselEstimator(VesselConfig("v"))
    est.step(0.0, {"water": 20.0, "power": 0.0})
    with pytest.raises(ValueError, match="not forward"):
        est.step(0.0, {"water": 20.0, "power": 0.0})


def test_open_circuit_reading_goes_predict_only_with_a_flag():
    def open_circuit(t_s, readings):
        if 80.0 <= t_s < 90.0 and "water" in readings:
            return dict(readings, water=1372.0)
        return readings

    _, trace, _ = _run(kettle_scenario(), seed=12, tamper=open_circuit)
    e = _at(trace, 85.0)[1]
    assert any(f.name == "water_sensor_fault" for f in e.flags)
    assert e.water_c < 60.0


class _Lockstep(FastCore):
    """A fast core that drives filterpy's EKF with every same call and compares after each."""

    worst = 0.0
    consider = 0

    def __init__(self, x, p):
        super().__init__(x, p)
        self.twin = FilterpyCore(x, p)

    def _sync(self):
        # each operation starts from the same numbers, so what is compared is one
        # operation's arithmetic, not rounding carried through a chaotic run
        self.twin._ekf.x = self.x.reshape(-1, 1).copy()
        self.twin.P = self.P.copy()

    def _compare(self):
        dx = np.max(np.abs(self.x - self.twin.x) / np.maximum(np.abs(self.x), 1.0))
        dp = np.max(np.abs(self.P - self.twin.P)) / np.max(np.abs(self.P))
        _Lockstep.worst = max(_Lockstep.worst, float(dx), float(dp))

    def predict(self, x_new, f, q):
        self._sync()
        super().predict(x_new, f, q)
        self.twin.predict(x_new, f, q)
        self._compare()

    def update(self, j, z, r, frozen=()):
        self._sync()
        x0, p0 = self.x.copy(), self.P.copy()
        super().update(j, z, r, frozen)
        if not frozen:
            self.twin.update(j, z, r)
            self._compare()
            return
        # filterpy has no consider update: check it against the Joseph form written out,
        # P = (I - K H) P (I - K H)ᵀ + K r Kᵀ with the frozen gains zeroed
        n = len(x0)
        h = np.zeros((1, n))
        h[0, j] = 1.0
        k = p0 @ h.T / (h @ p0 @ h.T + r)
        k[list(frozen)] = 0.0
        a = np.eye(n) - k @ h
        x_ref = x0 + (k * (z - x0[j])).ravel()
        p_ref = a @ p0 @ a.T + r * (k @ k.T)
        dx = np.max(np.abs(self.x - x_ref) / np.maximum(np.abs(x_ref), 1.0))
        dp = np.max(np.abs(self.P - p_ref)) / np.max(np.abs(p_ref))
        _Lockstep.worst = max(_Lockstep.worst, float(dx), float(dp))
        _Lockstep.consider += 1


def test_fast_core_matches_filterpy_step_by_step():
    # every predict and update of a whole run (one- and two-node), compared each time;
    # the robust updates reach both cores as an inflated r, so they are compared too
    _Lockstep.worst, _Lockstep.consider = 0.0, 0
    downweighted = 0
    for element in (False, True):
        est, _, _ = _run(
            kettle_scenario(duration_s=300.0), seed=13, element=element, core=_Lockstep
        )
        downweighted += est.totals.downweighted_readings
    assert 0.0 <= _Lockstep.worst < 1e-9
    assert downweighted > 0  # some updates did go through with an inflated r
    assert _Lockstep.consider > 0  # and some consider updates (idle, boil) were checked


class _DifferencedJacobian(VesselEstimator):
    """An estimator that also takes every Jacobian by differences and keeps the worst gap."""

    worst = 0.0
    closed_form = 0

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._fused = False  # every predict through _jacobian (the fused one is checked below)

    def _jacobian(self, x, fx, m, sens, dt_s, power_w, ambient_c, boiling):
        got = super()._jacobian(x, fx, m, sens, dt_s, power_w, ambient_c, boiling)
        if sens is not None:
            _DifferencedJacobian.closed_form += 1
            ref = super()._jacobian(x, fx, m, None, dt_s, power_w, ambient_c, boiling)
            cols = self._param_columns
            gap = np.abs(got[:, cols] - ref[:, cols]) / np.maximum(np.abs(ref[:, cols]), 1e-3)
            _DifferencedJacobian.worst = max(_DifferencedJacobian.worst, float(gap.max()))
        return got


@pytest.mark.parametrize("element", [True, False], ids=["two-node", "one-node"])
def test_closed_form_parameter_columns_match_differences_over_a_run(element):
    # the Jacobian's parameter columns come from transition's sensitivities; over a
    # heat-up with lagged sensors they must agree with forward differences (h = 1e-6 on
    # temperatures near equilibria of hundreds of °C: the differences' own error is
    # about 1e-3 of an entry at worst, a wrong term is of order 1)
    _DifferencedJacobian.worst, _DifferencedJacobian.closed_form = 0.0, 0
    est, _, _ = _run(
        kettle_scenario(duration_s=240.0), seed=15, element=element, kind=_DifferencedJacobian
    )
    assert est.layout.lagged is not None  # the water sensor's lag is in the model
    assert _DifferencedJacobian.closed_form > 200
    assert _DifferencedJacobian.worst < 5e-3


class _GeneralPredict(VesselEstimator):
    """An estimator whose every predict takes the general path (no fused kernel)."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._fused = False


def _spiky(t_s, readings):
    """Every 37th second the water reads 6 K high: outliers for the robust update."""
    if int(t_s) % 37 == 0 and "water" in readings:
        return {**readings, "water": readings["water"] + 6.0}
    return readings


@pytest.mark.parametrize("element", [True, False], ids=["two-node", "one-node"])
@pytest.mark.parametrize("tamper", [None, _spiky], ids=["clean", "spiky"])
def test_fused_predict_and_update_give_the_general_paths_figures_bit_for_bit(element, tamper):
    # transition.two_node_predict / one_node_predict and kernels.bounded_update do the
    # usual predict and update each in one compiled call; over a heat-up to the boil (the
    # general path takes the clamped steps), with outliers that the general path must
    # take, every estimate, state and covariance must be the general path's exactly
    fused, a, _ = _run(kettle_scenario(duration_s=420.0), seed=21, element=element, tamper=tamper)
    general, b, _ = _run(
        kettle_scenario(duration_s=420.0), seed=21, element=element, tamper=tamper,
        kind=_GeneralPredict,
    )  # fmt: skip
    if tamper is not None:  # the spikes reached the general path and bounded updates
        assert fused.totals.downweighted_readings > 0
        assert any(f.name == "water_outlier" for _, e, _ in a if e is not None for f in e.flags)
    assert fused._fused
    assert not general._fused
    assert any(e is not None and e.phase is Phase.BOILING for _, e, _ in a)
    assert [e for _, e, _ in a] == [e for _, e, _ in b]
    assert np.array_equal(fused.core.P, general.core.P)
    assert np.array_equal(fused.core.x, general.core.x)


def test_same_log_same_figures_bit_for_bit():
    _, a, _ = _run(kettle_scenario(duration_s=400.0), seed=14)
    _, b, _ = _run(kettle_scenario(duration_s=400.0), seed=14)
    assert [e for _, e, _ in a] == [e for _, e, _ in b]


# -- robust updates (issue 13, item 3) ---------------------------------------------------


class _Recorder(FastCore):
    """A fast core that keeps each update's reading, r, prior and move, and each P."""

    def __init__(self, x, p):
        super().__init__(x, p)
        self.updates = []  # (j, z, r, x before, P before, x after - x before)
        self.covariances = []

    def predict(self, x_new, f, q):
        super().predict(x_new, f, q)
        self.covariances.append(self.P.copy())

    def update(self, j, z, r, frozen=()):
        x0, p0 = self.x.copy(), self.P.copy()
        super().update(j, z, r, frozen)
        self.updates.append((j, z, r, x0, p0, self.x - x0))
        self.covariances.append(self.P.copy())


def _noisy_kettle(**changes):
    """Return our kettle with a noisier world than the settings assume (a scenario of our own).

    Water thermocouple noise 0.1 K and element 0.6 K (twice the settings), slower
    sensors (6 s and 2.5 s) and a heavier element (240 J/K); the metadata handed to
    the estimator leaves out the element capacity and both lags, as a user's would.
    """
    sc = kettle_scenario(**changes)
    sensors = dict(sc.sensors)
    sensors["water"] = replace(sensors["water"], noise_sd=0.1, tau_s=6.0)
    sensors["element"] = replace(sensors["element"], noise_sd=0.6, tau_s=2.5)
    return replace(sc, sensors=sensors, element=replace(sc.element, heat_capacity_j_per_k=240.0))


def _run_with(scenario, seed, settings, element=True, tamper=None, hide=True):
    """Return (estimator, [(t, estimate, truth)]) of a run on a _Recorder core."""
    rig = SimulatedRig(scenario, seed=seed)
    meta = scenario_metadata(scenario, seed)
    if hide:
        for key in ("element_heat_capacity_j_per_k", "water_sensor_tau_s", "element_sensor_tau_s"):
            meta.pop(key, None)
    est = VesselEstimator(
        VesselConfig.from_metadata(scenario.vessel, meta, element), settings, core=_Recorder
    )
    out, rows = [], []
    for batch in rig.run():
        readings = {s.channel: s.value for s in batch}
        if not element:
            readings.pop("element", None)
        rows.append(readings)
        if tamper is not None:
            readings = tamper(rig.elapsed_s, readings, rows)
        out.append((rig.elapsed_s, est.step(rig.elapsed_s, readings), dict(rig.truth())))
    return est, out


def _power_one_sample_late(_t_s, readings, rows):
    # a meter polled apart from the thermocouples, without an energy counter
    late = dict(readings)
    late.pop("energy", None)
    if len(rows) > 1 and "power" in rows[-2]:
        late["power"] = rows[-2]["power"]
    return late


def _largest_parameter_move(est):
    lay = est.layout
    params = [lay.ln_ua, lay.ln_c] + ([lay.ln_g] if lay.ln_g is not None else [])
    return max(float(np.max(np.abs(move[params]))) for *_, move in est.core.updates)


def test_a_switch_on_transient_cannot_throw_c_or_g_in_one_update():
    # The filter alone (no batch fit) through a switch-on with late power on a world
    # noisier and slower than it is told. Without the bound one update moves a
    # parameter by far more than 0.05 (checked below, so the bound is what holds it).
    scenario = _noisy_kettle(duration_s=120.0)
    bound = EstimatorSettings().max_param_step
    loose = EstimatorSettings(batch_fit=False, max_param_step=1e9)
    est_loose, _ = _run_with(scenario, 3, loose, tamper=_power_one_sample_late)
    assert _largest_parameter_move(est_loose) > 4.0 * bound
    est, trace = _run_with(
        scenario, 3, EstimatorSettings(batch_fit=False), tamper=_power_one_sample_late
    )
    assert _largest_parameter_move(est) <= bound * (1.0 + 1e-9)
    # large innovations were still used (down-weighted, flagged), not thrown away
    used = [
        f
        for t, e, _ in trace
        if e is not None and t < 40.0
        for f in e.flags
        if f.name.endswith("_outlier") and f.evidence["weight"] > 0.0
    ]
    assert used
    assert est.totals.downweighted_readings > 0


def test_a_long_run_of_bad_readings_never_zeroes_a_cross_covariance():
    def offset(t_s, readings, _rows):
        if 60.0 <= t_s < 100.0 and "water" in readings:
            return dict(readings, water=readings["water"] + 3.0)  # a 3 K wiring fault
        return readings

    est, trace = _run_with(
        kettle_scenario(duration_s=150.0), 5, EstimatorSettings(), tamper=offset, hide=False
    )
    names = {f.name for _, e, _ in trace if e is not None for f in e.flags}
    assert "water_reacquired" in names  # the run of bad readings did trigger it
    lay = est.layout
    temps = lay.temperatures
    params = [lay.ln_ua, lay.ln_c, lay.ln_g]
    block = np.ix_(temps, params)
    # once a temperature-parameter covariance is non-zero it never goes back to zero
    # (the old re-acquisition set them all to zero)
    seen = np.zeros((len(temps), len(params)), dtype=bool)
    for p in est.core.covariances:
        nonzero = p[block] != 0.0
        assert np.all(nonzero[seen])
        seen |= nonzero
    assert seen.all()
    _t, e, truth = _at(trace, 140.0)
    assert e.water_c == pytest.approx(truth["water_c"], abs=0.5)  # and it came back


@pytest.mark.parametrize("element", [True, False], ids=["two-node", "one-node"])
def test_c_is_not_learnt_while_idle(element):
    scenario = kettle_scenario(start_water_c=60.0, duration_s=600.0)
    scenario = replace(scenario, control=replace(scenario.control, start_delay_s=1e9))
    _est, trace = _run_with(scenario, 7, EstimatorSettings(), element=element)
    c = [e.heat_capacity_j_per_k for _, e, _ in trace if e is not None]
    ua = [e.ua_w_per_k for _, e, _ in trace if e is not None]
    assert len(c) > 500
    assert len({v.value for v in c}) == 1  # C does not move, exactly
    # nor its std (to rounding: the Jacobian's finite difference of ln C by itself is
    # 1 only to about 1e-10)
    stds = [v.std for v in c]
    assert max(stds) / min(stds) - 1.0 < 1e-6
    # while UA moves with the same readings (they show UA/C; with C unknown by 0.7 in
    # ln, UA's relative spread cannot fall far below that until a heat-up pins C)
    assert len({v.value for v in ua}) > 500
    # and in a whole run, C moves while heating and stands still once the kettle cools
    _est, trace = _run_with(kettle_scenario(), 7, EstimatorSettings(batch_fit=False))
    heating = [e.heat_capacity_j_per_k.value for _, e, _ in trace if e and e.phase is Phase.HEATING]
    assert len(set(heating)) > 10
    off_s = next(t for t, e, _ in trace if e and e.phase is Phase.COOLING)
    cooling = {
        e.heat_capacity_j_per_k.value
        for t, e, _ in trace
        if e and e.phase is Phase.COOLING and t > off_s + 30.0
    }
    assert len(cooling) == 1


def test_the_reading_noise_is_measured_while_idle():
    # 15 minutes idle at 1 Hz; the world's noise is twice the settings', with
    # 0.01 K quantisation and an 8 K spike in one water reading of 200
    scenario = _noisy_kettle(duration_s=900.0, start_water_c=40.0)
    sensors = dict(scenario.sensors)
    sensors["water"] = replace(sensors["water"], spike_probability=0.005)
    scenario = replace(
        scenario, sensors=sensors, control=replace(scenario.control, start_delay_s=1e9)
    )
    est, _ = _run_with(scenario, 11, EstimatorSettings())
    # within 15 % of the simulated noise (our own tolerance: over seeds 0-11 this
    # world gave 0.93-1.08 of it for the water, 0.92-1.07 for the element, and
    # 0.93-1.10 for the quieter water sensor below)
    assert est.idle_noise_sd_c("water") == pytest.approx(0.1, rel=0.15)
    assert est.idle_noise_sd_c("element") == pytest.approx(0.6, rel=0.15)
    assert est.reading_noise_sd_c("water") == est.idle_noise_sd_c("water")
    # a quieter sensor than the setting: measured, but the setting stays the floor
    sensors["water"] = replace(sensors["water"], noise_sd=0.025)
    est, _ = _run_with(replace(scenario, sensors=sensors), 11, EstimatorSettings())
    assert est.idle_noise_sd_c("water") == pytest.approx(0.025, rel=0.15)
    assert est.reading_noise_sd_c("water") == EstimatorSettings().water_noise_sd_c


def test_a_large_innovation_is_down_weighted_and_a_gross_one_set_aside():
    s = EstimatorSettings(batch_fit=False)
    est = VesselEstimator(VesselConfig("v"), s, core=_Recorder)
    for t in range(30):
        est.step(float(t), {"water": 20.0, "ambient": 20.0, "power": 0.0})
    j = est.layout.water  # one node, no lag given: the reading is of T_w
    n_updates = len(est.core.updates)
    est.step(30.0, {"water": 20.6, "ambient": 20.0, "power": 0.0})  # ~10 sd out
    _j, z, r_used, x0, p0, move = est.core.updates[-1]
    r = s.water_noise_sd_c**2
    var = p0[j, j] + r
    miss = abs(z - x0[j]) / np.sqrt(var)
    assert 8.0 < miss < s.gross_error_sd
    # Huber: S' = S·z/k, so the water moves k/z of what a full update would move it
    assert r_used == pytest.approx(var * miss / s.huber_k - p0[j, j], rel=1e-12)
    full = p0[j, j] / var * (z - x0[j])
    assert move[j] == pytest.approx(full * s.huber_k / miss, rel=1e-9)
    assert est.totals.downweighted_readings == 1
    assert est.totals.rejected_readings == 0
    assert len(est.core.updates) == n_updates + 1
    e = est.step(31.0, {"water": 28.0, "ambient": 20.0, "power": 0.0})  # an 8 K spike
    assert len(est.core.updates) == n_updates + 1  # set aside: no update at all
    assert est.totals.rejected_readings == 1
    assert any(f.name == "water_outlier" and f.evidence["weight"] == 0.0 for f in e.flags)
    assert e.water_c == pytest.approx(20.0, abs=0.1)


@pytest.mark.parametrize("element", [True, False], ids=["two-node", "one-node"])
def test_the_covariance_stays_a_covariance_on_a_heater_with_lagged_sensors(element):
    # A storage heater sampled every 10 s with both thermocouples lagging: the first
    # slow update once met an initial covariance whose element cross term (0.5 K²)
    # passed what the two variances allow, and P's diagonal went negative (a math
    # domain error on four heaters of benchmarks/bench_worlds.py). Every step here
    # must leave P symmetric with no eigenvalue below rounding.
    scenario = water_heater_scenario(draws=(), duration_s=3600.0)
    meta = {**scenario_metadata(scenario, 3), "water_sensor_tau_s": 4.0,
            "element_sensor_tau_s": 2.0}  # fmt: skip
    cfg = VesselConfig.from_metadata(scenario.vessel, meta, element)
    est = VesselEstimator(cfg)
    assert est.layout.lagged is not None
    if element:
        assert est.layout.element_lagged is not None
    worst = 0.0
    rig = SimulatedRig(scenario, seed=3)
    for batch in rig.run():
        readings = {s.channel: s.value for s in batch}
        if not element:
            readings.pop("element", None)
        est.step(rig.elapsed_s, readings)
        if est.core is not None:
            p = est.core.P
            scale = float(np.max(np.abs(np.diag(p))))
            worst = min(worst, float(np.linalg.eigvalsh(0.5 * (p + p.T)).min()) / scale)
    assert worst > -1e-9


def _plate_kettle(offset_c):
    """Return our kettle with a plate that also loses 0.6 W/K straight to the room, a
    90 s idle before switch-on and an element thermocouple reading ``offset_c`` high
    (a scenario of our own), and its run long enough for 600 s of cooling."""
    sc = kettle_scenario(
        duration_s=1100.0,
        control=KettleSwitch(start_delay_s=90.0),
        start_water_c=21.0,
    )
    sensors = dict(sc.sensors)
    sensors["element"] = replace(sensors["element"], offset=offset_c)
    return replace(sc, sensors=sensors, element=replace(sc.element, to_room_w_per_k=0.6))


@pytest.mark.parametrize("offset_c", [0.0, 0.4])
def test_ua_in_cooling_counts_the_element_path_to_the_room(offset_c):
    scenario = _plate_kettle(offset_c)
    est, trace, _ = _run(scenario, seed=5)
    _t, last, truth = trace[-1]
    assert last.phase is Phase.COOLING
    ua_true = effective_ua_w_per_k(scenario, last.water_c, truth["ambient_c"])
    # the plate's path in series with G, against the walls' and lid's: what the filter's
    # water-only UA misses (about 0.6 of 1.2 W/K here; our scenario, our arithmetic)
    g_true = scenario.element_conductance_w_per_k(0.0)
    path_true = 1.0 / (1.0 / g_true + 1.0 / 0.6)
    ua = last.ua_w_per_k
    # within 8 % and within 3 stated σ (tolerances ours; bench_worlds: p90 10.5 % over
    # 200 drawn worlds)
    assert ua.value == pytest.approx(ua_true, rel=0.08)
    assert abs(ua.value - ua_true) < 3.0 * ua.std
    # without the path the figure would be about half low: the test can fail
    water_only = ua.value - path_true
    assert abs(water_only - ua_true) > 0.2 * ua_true
    # the thermocouples' mismatch was measured in the idle and zeroed at switch-on
    # (the idle's own path share, 0.01 of its 0-1 K excess, is in it too; the 0.08 K
    # and the 25 % on the path below are our tolerances)
    assert est._element_zero_c == pytest.approx(offset_c, abs=0.08)
    share = est._element_path.share(*est._lag_difference_s(), est.settings)
    assert share is not None
    path = share.value * last.element_conductance_w_per_k.value
    assert path == pytest.approx(path_true, rel=0.25)


def test_a_failure_inside_the_filter_restarts_it_and_says_so(monkeypatch) -> None:
    """Issue 14: an exception inside one vessel's filter stays there; the filter starts
    afresh, the step gives no estimate, and the rest of the run carries the flag."""
    from monitor.estimation.estimator import VesselEstimator
    from monitor.estimation.settings import VesselConfig

    meta = {"vessel_heat_capacity_j_per_k": 700, "rated_power_w": 2000}
    est = VesselEstimator(VesselConfig.from_metadata("k", meta, False))
    original = VesselEstimator._step

    def failing(self, t_s, readings):
        if t_s == 60.0:
            raise FloatingPointError("injected for the test")
        return original(self, t_s, readings)

    monkeypatch.setattr(VesselEstimator, "_step", failing)
    got = {}
    for k in range(120):
        # a made-up heat-up of our own: 0.1 K/s at 2 kW after 20 s
        readings = {"water": 15.0 + 0.1 * max(k - 20, 0), "power": 2000.0 * (k > 20),
                    "ambient": 20.0}  # fmt: skip
        got[k] = est.step(float(k), readings)
    assert got[60] is None
    assert all(got[k] is not None for k in range(61, 120))
    assert "estimator_fault" not in {f.name for f in got[59].flags}
    flag = next(f for f in got[119].flags if f.name == "estimator_fault")
    assert "injected for the test" in flag.message
    assert est.faults == [(60.0, "FloatingPointError: injected for the test")]
    assert "estimator_fault" in est.totals.flags_raised
    assert abs(got[119].water_c - (15.0 + 0.1 * 99)) < 0.5  # tracking again
    with pytest.raises(ValueError, match="not forward"):  # the caller's error still raises
        est.step(119.0, {"water": 25.0})


def test_readings_no_instrument_could_give_are_left_out() -> None:
    from monitor.estimation.estimator import VesselEstimator
    from monitor.estimation.settings import VesselConfig

    meta = {"vessel_heat_capacity_j_per_k": 700, "rated_power_w": 2000}
    est = VesselEstimator(VesselConfig.from_metadata("k", meta, False))
    bad = {50: {"power": 1e200}, 60: {"water": 1e308}, 70: {"water": -300.0},
           80: {"power": -1e12}, 90: {"ambient": math.nan}, 95: {"energy": math.inf}}  # fmt: skip
    for k in range(150):
        readings = {"water": 15.0 + 0.1 * max(k - 20, 0), "power": 2000.0 * (k > 20),
                    "ambient": 20.0} | bad.get(k, {})  # fmt: skip
        e = est.step(float(k), readings)
    assert est.faults == []  # none of them reached the filter's arithmetic
    assert abs(e.water_c - (15.0 + 0.1 * 129)) < 0.5
    assert abs(e.power_w - 2000.0) < 1.0


def test_noise_trackers_median_is_numpys():
    # NoiseTracker's own median (a partition, without np.median's general machinery)
    # must give np.median's value exactly, for odd and even counts
    from monitor.estimation.sensors import _median

    rng = np.random.default_rng(8)
    for n in [1, 2, 3, 4, 7, 10, 599, 600]:
        values = rng.normal(size=n) * 10.0 ** rng.uniform(-5.0, 2.0)
        assert _median(values) == float(np.median(values))
