"""Live assembly of samples into filter steps, and agreement of live and replayed estimates."""

from __future__ import annotations

import math
from dataclasses import replace

import pytest

from drivers.sample import Quality, Sample
from drivers.simworld import SimulatedRig, kettle_scenario, scenario_metadata
from monitor.runs.live import InstantAssembler, LiveVessel, logs_from_steps, steps_from_samples
from monitor.runs.replay import replay_run
from monitor.runs.run import split_runs

T0 = 1_767_225_600.0


def s(t: float, channel: str, value: float, quality: Quality = Quality.OK) -> Sample:
    return Sample(T0 + t, "k1", channel, value, quality, "test")


def test_an_instant_closes_when_the_time_stamp_changes_and_carries_recent_power() -> None:
    a = InstantAssembler("k1")
    assert a.feed(s(0.0, "power", 2000.0)) == []  # no water: only remembered
    assert a.feed(s(0.5, "water", 20.0)) == []
    assert a.feed(s(0.5, "element", 25.0)) == []
    (step,) = a.feed(s(1.0, "power", 2100.0))
    assert step.values == {"water": 20.0, "element": 25.0, "power": 2000.0}
    assert step.time_s == 0.0
    a.feed(s(7.0, "water", 21.0))
    (late,) = a.flush()
    # the power seen at 1.0 s is 6 s old at 7.0 s: older than HOLD_S["power"] (5 s)
    assert late.values == {"water": 21.0}
    assert late.time_s == 7.0 - 0.5


def test_energy_is_never_carried_and_faults_pass_as_nan() -> None:
    a = InstantAssembler("k1")
    a.feed(s(0.5, "water", math.nan, Quality.FAULT))
    # faults alone wait for the next instant with water, to see that it is later
    assert a.feed(s(1.0, "energy", 10.0)) == []
    a.feed(s(1.5, "water", 21.0))
    a.feed(s(1.5, "energy", 10.1))
    step, after = a.flush() + a.finish()
    assert set(step.values) == {"water"}  # the counter read after it is not carried back
    assert math.isnan(step.values["water"])
    assert (step.time_s, after.time_s) == (0.0, 1.0)


def test_a_fault_stamped_ahead_does_not_hold_back_the_good_readings_after_it() -> None:
    """Issue 14's fuzz found it: a fault-only instant from a clock 300 s ahead was
    stepped, and the good readings after it counted out of order."""
    a = InstantAssembler("k1")
    steps = []
    for t in (1.0, 2.0, 3.0):
        steps += a.feed(s(t, "water", 20.0 + t))
    steps += a.feed(s(300.0, "water", math.nan, Quality.FAULT))
    for t in (4.0, 5.0):
        steps += a.feed(s(t, "water", 20.0 + t))
    steps += a.flush() + a.finish()
    assert [st.t - T0 for st in steps] == [1.0, 2.0, 3.0, 4.0, 5.0]
    assert a.out_of_order == 1  # the fault, not the four readings after it


def test_an_instant_not_after_the_last_step_is_counted_not_stepped() -> None:
    a = InstantAssembler("k1")
    a.feed(s(1.0, "water", 20.0))
    assert len(a.flush()) == 1
    a.feed(s(1.0, "water", 20.1))
    assert a.flush() == []
    assert a.out_of_order == 1


def test_a_separate_energy_counter_is_interpolated_at_each_water_reading() -> None:
    a = InstantAssembler("k1")
    a.feed(s(0.2, "energy", 100.0))  # meter polls at 0.2, 1.2, 2.2 ... (made-up numbers)
    assert a.flush() == []
    a.feed(s(1.0, "water", 20.0))
    assert a.flush() == []  # waits for the counter reading after it
    a.feed(s(1.2, "energy", 101.0))
    (step,) = a.flush()
    assert step.values["energy"] == pytest.approx(100.8)  # 0.8 of the way from 0.2 to 1.2
    # a counter that went backwards (a reset) is not interpolated across
    a.feed(s(2.0, "water", 20.5))
    a.flush()
    a.feed(s(2.2, "energy", 3.0))
    (step,) = a.flush()
    assert "energy" not in step.values
    # a meter gone silent: the instant is stepped without it after ENERGY_WAIT_S
    a.feed(s(3.0, "water", 21.0))
    assert a.flush() == []
    a.feed(s(9.0, "water", 22.0))
    (old,) = a.flush()
    assert (old.t, "energy" in old.values) == (T0 + 3.0, False)
    assert [x.t for x in a.finish()] == [T0 + 9.0]


def _kettle_samples(seed: int) -> tuple[list[Sample], dict]:
    scenario = replace(kettle_scenario(), duration_s=900.0)
    rig = SimulatedRig(scenario, seed=seed)
    samples = [x for batch in rig.run() for x in batch]
    return samples, scenario_metadata(scenario, seed)


def test_live_estimates_equal_a_replay_of_the_same_samples_bit_for_bit() -> None:
    samples, meta = _kettle_samples(3)
    meta = {**meta, "element_sensor": "yes"}
    live = LiveVessel("kettle-1", meta, has_element_sensor=True)
    live_rows = []
    for step in steps_from_samples(enumerate(samples)):
        e = live.step(step)
        if e is not None:
            live_rows.append((e.t_s, e.water_c, e.ua_w_per_k.value, e.heat_capacity_j_per_k.std))
    assert len(live_rows) > 800
    logs = logs_from_steps(steps_from_samples(enumerate(samples)), {"kettle-1": meta}, "mem")
    runs, quarantined = split_runs(logs)
    assert quarantined == []
    assert len(runs) == 1
    replayed = []
    replay_run(
        runs[0],
        on_estimate=lambda _run, e: replayed.append(
            (e.t_s, e.water_c, e.ua_w_per_k.value, e.heat_capacity_j_per_k.std)
        ),
    )
    assert replayed == live_rows


def _live_summary(samples: list[Sample], meta: dict, earlier: list[dict] | None = None) -> dict:
    live = LiveVessel("kettle-1", meta, has_element_sensor=True)
    if earlier:
        live.resume(earlier)
    for step in steps_from_samples(enumerate(samples)):
        live.step(step)
    summary = live.end_run()
    assert summary is not None
    return summary


def test_a_live_run_summary_carries_the_verdict_the_replay_gives() -> None:
    samples, meta = _kettle_samples(3)
    meta = {**meta, "element_sensor": "yes"}
    summary = _live_summary(samples, meta)
    assert summary["verdict"] == {"status": "trusted", "reasons": []}
    logs = logs_from_steps(steps_from_samples(enumerate(samples)), {"kettle-1": meta}, "mem")
    (run,) = split_runs(logs)[0]
    assert replay_run(run)["verdict"] == summary["verdict"]


def test_a_restart_keeps_the_baseline_of_the_trusted_runs_and_passes_over_a_doubtful_one() -> None:
    samples, meta = _kettle_samples(3)
    meta = {**meta, "element_sensor": "yes"}

    def recorded(label: str, g: float, status: str = "trusted") -> dict:
        # run summaries as an earlier session recorded them (made-up figures: a G of
        # 80 W/K, far above this kettle's 54, so the live run must read as scaled)
        reasons = [] if status == "trusted" else ["The heat-up fit did not converge."]
        return {"vessel": "kettle-1", "run": label, "model": "two-node",
                "element_conductance_w_per_k": {"value": g, "std": 1.0},
                "verdict": {"status": status, "reasons": reasons}}  # fmt: skip

    earlier = [recorded("1", 80.0), recorded("2", 80.0), recorded("3", 20.0, "doubtful"),
               recorded("4", 80.0), recorded("5", 80.0), recorded("6", 80.0)]  # fmt: skip
    live = LiveVessel("kettle-1", meta, has_element_sensor=True)
    live.resume(earlier)
    baseline = live.drift.trackers["scaling"].baseline
    assert baseline is not None
    assert baseline.labels == ("1", "2", "4", "5", "6")
    assert baseline.median == 80.0
    assert live.run_number == 6
    summary = _live_summary(samples, meta, earlier)
    (scaling,) = [f for f in summary["drift"] if f["name"] == "scaling"]
    assert scaling["level"] in ("warning", "alarm")  # about 32 % down on 80 W/K
    assert scaling["evidence"]["baseline_runs"] == 5
    assert summary["run"] == "7"
