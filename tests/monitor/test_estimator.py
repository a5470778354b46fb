"""The live estimator against the simulated rig, its edge cases, and its filterpy twin."""

from __future__ import annotations

import itertools
from dataclasses import replace

import numpy as np
import pytest

from drivers.simulator import (
    SimulatedRig,
    effective_ua_w_per_k,
    kettle_scenario,
    scenario_metadata,
    water_heater_scenario,
)
from monitor.contracts import Phase
from monitor.estimator import FastCore, FilterpyCore, VesselConfig, VesselEstimator


def _run(scenario, seed, element=True, tamper=None, core=FastCore):
    """Replay a simulated run; return (estimator, [(t, estimate, truth)], rig)."""
    rig = SimulatedRig(scenario, seed=seed)
    cfg = VesselConfig.from_metadata(scenario.vessel, scenario_metadata(scenario, seed), element)
    est = VesselEstimator(cfg, core=core)
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


def test_reacquiring_a_lagged_thermocouple_keeps_the_water_ahead_of_it():
    est, _trace, _ = _run(kettle_scenario(duration_s=100.0), seed=4)
    lay = est.layout
    before = est.core.x.copy()
    ahead_k = before[lay.water] - before[lay.lagged]
    assert ahead_k > 0.5  # heating at ~0.4 K/s through a 4 s sensor lag (our scenario)
    reading = float(before[lay.lagged]) + 2.0
    est._reacquire("water", reading)
    after = est.core.x
    assert after[lay.lagged] == pytest.approx(reading)  # the sensor now reads the reading
    assert after[lay.water] - after[lay.lagged] == pytest.approx(ahead_k)  # lag kept
    assert after[lay.element] == before[lay.element]  # the element is not touched


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
        super().update(j, z, r, frozen)
        if not frozen:
            self.twin.update(j, z, r)
            self._compare()


def test_fast_core_matches_filterpy_step_by_step():
    # every predict and update of a whole run (one- and two-node), compared each time
    _Lockstep.worst = 0.0
    for element in (False, True):
        _run(kettle_scenario(duration_s=300.0), seed=13, element=element, core=_Lockstep)
    assert 0.0 <= _Lockstep.worst < 1e-9


def test_same_log_same_figures_bit_for_bit():
    _, a, _ = _run(kettle_scenario(duration_s=400.0), seed=14)
    _, b, _ = _run(kettle_scenario(duration_s=400.0), seed=14)
    assert [e for _, e, _ in a] == [e for _, e, _ in b]
