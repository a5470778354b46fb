"""Drift detection: baselines, the CUSUM, the flags, and a simulated scale series."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from drivers.simulator import SimulatedRig, kettle_scenario, scenario_metadata
from monitor.contracts import Level
from monitor.drift import (
    RULES,
    Cusum,
    VesselDrift,
    drift_over_runs,
    extra_over_temperature_k,
    make_baseline,
    scale_thickness_range_mm,
)
from monitor.interchange import InterchangeLog, rows_from_samples
from monitor.replay import replay_run, split_runs

SCALING = next(r for r in RULES if r.name == "scaling")


def test_cusum_accumulates_past_the_reference_value_and_never_goes_below_zero() -> None:
    c = Cusum(k=0.5, h=5.0)
    assert [c.update(z) for z in (-3.0, 1.0, 2.0, 0.5, -10.0)] == [0.0, 0.5, 2.0, 2.0, 0.0]


def test_baseline_spread_has_a_floor() -> None:
    b = make_baseline([(50.0, 0.1)] * 5, SCALING)
    assert (b.mean, b.runs) == (50.0, 5)
    assert b.sd == pytest.approx(0.03 * 50.0)  # the rule's 3 % floor
    wide = make_baseline([(40.0, 0.1), (60.0, 0.1)], SCALING)
    assert wide.sd == pytest.approx(math.sqrt(200.0))  # sample sd of 40 and 60
    with pytest.raises(ValueError, match="at least one run"):
        make_baseline([], SCALING)


def test_scale_thickness_follows_the_series_resistance() -> None:
    # 1/G - 1/G0 = 1/40 - 1/50 = 0.005 K/W; δ = k·A·0.005 with A = 0.018 m²:
    # k = 0.5 -> 0.045 mm, k = 2.9 -> 0.261 mm (arithmetic on REFERENCE.md §5.1's range)
    lo, hi = scale_thickness_range_mm(40.0, 50.0, 0.018)  # type: ignore[misc]
    assert lo == pytest.approx(0.045)
    assert hi == pytest.approx(0.261)
    assert scale_thickness_range_mm(55.0, 50.0, 0.018) is None
    # P/G - P/G0 at 2000 W: 50 K - 40 K (arithmetic)
    assert extra_over_temperature_k(2000.0, 40.0, 50.0) == pytest.approx(10.0)


def synthetic_runs(g_ratios, seed: int, scatter: float = 0.02):
    """Run summaries whose G is g0·ratio with run-to-run scatter (made-up demo numbers)."""
    rng = np.random.default_rng(seed)
    out = []
    for i, ratio in enumerate(g_ratios):
        g = 54.0 * ratio * (1.0 + scatter * rng.standard_normal())
        out.append({"vessel": "k1", "run": str(i + 1), "model": "two-node",
                    "element_conductance_w_per_k": {"value": g, "std": 0.3},
                    "ua_w_per_k": {"value": 0.7 * (1 + 0.04 * rng.standard_normal()),
                                   "std": 0.05}})  # fmt: skip
    return out


def levels(flags_per_run, name: str) -> list[str | None]:
    out = []
    for flags in flags_per_run:
        mine = [f for f in flags if f.name == name]
        out.append(str(mine[0].level) if mine else None)
    return out


def test_clean_runs_raise_no_warning_in_a_thousand() -> None:
    flags = drift_over_runs(synthetic_runs([1.0] * 1000, seed=11))
    assert not any(f.level in (Level.WARNING, Level.ALARM) for run in flags for f in run)


def test_a_quarter_down_is_caught_in_two_runs_and_ten_percent_stays_silent() -> None:
    ratios = [1.0] * 5 + [0.93] * 20 + [0.75] * 5
    got = levels(drift_over_runs(synthetic_runs(ratios, seed=3)), "scaling")
    assert got[:25] == [None] * 25
    assert got[26] in ("warning", "alarm")  # the second run at 25 % down


def test_a_scaling_flag_carries_its_numbers_and_a_sentence() -> None:
    drift = VesselDrift("k1", {"rated_power_w": 2200.0, "element_area_m2": 0.018})
    runs = synthetic_runs([1.0] * 5 + [0.55] * 3, seed=5, scatter=0.0)
    flags = [drift.observe(r) for r in runs][-1]
    (flag,) = [f for f in flags if f.name == "scaling"]
    assert flag.level == Level.ALARM  # 45 % down is past the rule's 40 % alarm size
    ev = flag.evidence
    assert ev["scaling_index"] == pytest.approx(0.45)
    assert ev["baseline_runs"] == 5
    assert ev["scale_mm_low"] < ev["scale_mm_high"]  # a range, never one number
    assert ev["extra_over_temperature_k"] == pytest.approx(2200 / (54 * 0.55) - 2200 / 54)
    assert "descale" in flag.message
    assert "isolate the supply" in flag.message


def test_one_node_runs_never_raise_scaling() -> None:
    runs = synthetic_runs([1.0] * 5 + [0.5] * 5, seed=2)
    for r in runs:
        r["model"] = "one-node"
    assert levels(drift_over_runs(runs), "scaling") == [None] * 10


def test_rising_ua_raises_insulation() -> None:
    runs = synthetic_runs([1.0] * 12, seed=4)
    for r in runs[5:]:
        r["ua_w_per_k"] = {"value": 0.7 * 1.6, "std": 0.05}  # a lid left open (made-up)
    got = levels(drift_over_runs(runs), "insulation")
    assert got[:5] == [None] * 5
    assert "alarm" in got[6:]


def simulated_run(
    seed: int,
    scale_mm: float = 0.0,
    power_fraction: float = 1.0,
    duration_s: float = 500.0,
    element_offset_k: float = 0.0,
    mass_kg: float | None = None,
    lid_open: bool = False,
) -> dict[str, object]:
    """Replay one simulated kettle run of our own (fill, start and room drawn from seed).

    ``power_fraction`` < 1 is an element that lost part of its power (a broken coil),
    while the vessel's metadata still gives the original rating.
    """
    rng = np.random.default_rng(seed)
    scenario = kettle_scenario(
        scale_mm=scale_mm,
        water_mass_kg=float(rng.uniform(1.0, 1.7)),
        start_water_c=float(rng.uniform(8.0, 20.0)),
        ambient_c=float(rng.uniform(16.0, 26.0)),
        duration_s=duration_s,
    )
    if mass_kg is not None:
        scenario = replace(scenario, water_mass_kg=mass_kg)
    if lid_open:  # an open lid: about twice the wetted and outer loss area (our own fault)
        shell = scenario.shell
        scenario = replace(scenario, shell=replace(
            shell, outer_area_m2=2.0 * shell.outer_area_m2,
            inner_conductance_w_per_k=2.0 * shell.inner_conductance_w_per_k))  # fmt: skip
    if element_offset_k:
        sensors = dict(scenario.sensors)
        sensors["element"] = replace(sensors["element"], offset=element_offset_k)
        scenario = replace(scenario, sensors=sensors)
    meta = scenario_metadata(scenario, seed)
    if power_fraction != 1.0:
        element = replace(
            scenario.element, rated_power_w=scenario.element.rated_power_w * power_fraction
        )
        scenario = replace(scenario, element=element)
    rig = SimulatedRig(scenario, seed=seed)
    rows = list(rows_from_samples(rig.run(), scenario.start_epoch_s))
    channels = ["water", "element", "ambient", "power", "voltage"]
    log = InterchangeLog(f"sim-{seed}", meta, channels, rows, start_epoch_s=scenario.start_epoch_s)
    (run,) = split_runs([log])[0]
    return replay_run(run)


def test_run_summary_has_the_electrical_figures() -> None:
    run = simulated_run(7, duration_s=300.0)
    # the simulated element: 2200 W at 230 V, so 24.05 Ω at 20 °C, and about 0.8 % more
    # when hot (its 1e-4 /K temperature coefficient; our scenario's own figures)
    assert run["element_resistance_ohm"]["value"] == pytest.approx(230.0**2 / 2200.0, rel=0.015)
    assert run["heating_power_at_rated_voltage_w"]["value"] == pytest.approx(2200.0, rel=0.015)
    assert run["heating_power_w"]["std"] > 0.0
    assert run["start_utc"].startswith("2026-01-01T00:00")
    assert 16.0 <= run["ambient_c"] <= 26.5
    assert 8.0 <= run["start_water_c"] <= 20.5


def test_an_element_losing_a_third_of_its_power_raises_element() -> None:
    runs = [simulated_run(200 + i, duration_s=200.0) for i in range(5)]
    runs += [simulated_run(210 + i, power_fraction=2.0 / 3.0, duration_s=200.0) for i in range(2)]
    got = levels(drift_over_runs(runs), "element")
    assert got[:5] == [None] * 5
    assert got[5] == "alarm"  # 33 % down at once: far past the 20 % alarm size


def test_simulated_scale_series_silent_within_ten_percent_warned_at_a_quarter() -> None:
    # clean runs, then 0.04 mm of scale (G about 9 % down), then 0.14 mm (about 25 % down)
    # (scale figures from the simulator's own element model, our scenarios)
    series = [0.0] * 5 + [0.04] * 4 + [0.14] * 3
    runs = [simulated_run(100 + i, mm) for i, mm in enumerate(series)]
    got = levels(drift_over_runs(runs), "scaling")
    assert got[:9] == [None] * 9
    assert {"warning", "alarm"} & set(got[9:])


def test_an_underfilled_vessel_raises_fill() -> None:
    meta = {"kettle-1": {"fill_kg": 1.5}}  # the operator's fill for this test (made-up)
    full = simulated_run(31, mass_kg=1.5, duration_s=300.0)
    low = simulated_run(32, mass_kg=1.0, duration_s=300.0)
    flags = drift_over_runs([full, low], meta)
    assert [f.name for f in flags[0]] == []
    (fill,) = [f for f in flags[1] if f.name == "fill"]
    assert fill.level == Level.ALARM
    assert fill.evidence["difference_kg"] == pytest.approx(-0.5, abs=0.05)
    assert "element dry" in fill.message


def test_a_thermocouple_three_kelvin_off_raises_sensor_and_a_good_one_does_not() -> None:
    good = simulated_run(41, duration_s=900.0)
    bad = simulated_run(42, duration_s=900.0, element_offset_k=3.0)
    assert abs(good["rest_element_minus_water_k"]["value"]) < 0.5
    flags = drift_over_runs([good, bad])
    assert "sensor" not in [f.name for f in flags[0]]
    (sensor,) = [f for f in flags[1] if f.name == "sensor"]
    assert sensor.evidence["element_minus_water_k"] == pytest.approx(3.0, abs=0.3)


def test_fleet_lists_the_scaled_vessel_first(tmp_path, capsys) -> None:
    import json

    from monitor.cli import main

    logs = []
    plan = [("urn-a", 0.0)] * 5 + [("urn-a", 0.2)] * 2 + [("urn-b", 0.0)] * 6
    for i, (vessel, mm) in enumerate(plan):
        out = tmp_path / f"{i:02d}-{vessel}.csv"
        code = main(["simulate", "--seed", str(300 + i), "--vessel", vessel, "--scale-mm", str(mm),
                     "--duration-s", "300", "--out", str(out)])  # fmt: skip
        assert code == 0
        logs.append(str(out))
    capsys.readouterr()
    assert main(["fleet", *logs, "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)["vessels"]
    assert [r["vessel"] for r in rows] == ["urn-a", "urn-b"]
    assert rows[0]["status"] in ("warning", "alarm")
    assert "scaling" in rows[0]["flags"]
    assert rows[0]["scaling_index"] == pytest.approx(1 - 2 / 3, abs=0.05)  # 0.2 mm: G x 0.667
    assert rows[0]["runs_since_baseline"] == 2
    assert "scaling" not in rows[1]["flags"]
    assert main(["fleet", *logs]) == 0
    assert "urn-a" in capsys.readouterr().out


def test_a_marked_commissioning_baseline_and_a_new_baseline_after_descaling() -> None:
    # runs 1-2 are bad (a fouled element at hand-over), runs 3-7 the commissioning series
    ratios = [0.6, 0.6] + [1.0] * 5 + [0.7] * 3 + [0.7] * 6 + [0.45] * 3
    runs = synthetic_runs(ratios, seed=8)
    meta = {"k1": {"baseline_runs": "3,4,5,6,7", "rebaseline_from_run": "11"}}
    got = levels(drift_over_runs(runs, meta), "scaling")
    assert got[:7] == [None] * 7  # nothing is judged before the marked baseline is complete
    assert {"warning", "alarm"} & set(got[7:10])  # 30 % down on the commissioning baseline
    # run 11 starts a new baseline (say a replacement element with 0.7 of the old G):
    # silent while it is built and while G holds, flagged when G falls on the new one
    assert got[10:16] == [None] * 6
    assert {"warning", "alarm"} & set(got[16:])


def test_fifty_clean_simulated_runs_raise_no_warning() -> None:
    runs = [simulated_run(600 + i, duration_s=400.0) for i in range(50)]
    flags = drift_over_runs(runs)
    assert not [f.name for run in flags for f in run if f.level in (Level.WARNING, Level.ALARM)]


def test_a_lid_left_open_raises_insulation() -> None:
    runs = [simulated_run(700 + i, duration_s=600.0) for i in range(5)]
    runs += [simulated_run(710 + i, duration_s=600.0, lid_open=True) for i in range(3)]
    got = levels(drift_over_runs(runs), "insulation")
    assert got[:5] == [None] * 5
    assert {"warning", "alarm"} & set(got[5:])
