"""Drift detection: baselines, the CUSUM, the flags, and a simulated scale series."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from drivers.simworld import SimulatedRig, kettle_scenario, scenario_metadata
from monitor.estimation.contracts import Level
from monitor.records.interchange import InterchangeLog, rows_from_samples
from monitor.runs.drift import (
    LEVEL_RANK,
    RULES,
    Cusum,
    VesselDrift,
    baselines_of,
    drift_over_runs,
    extra_over_temperature_k,
    fleet_rows,
    fleet_table,
    make_baseline,
    run_verdict,
    scale_thickness_range_mm,
    standing_drift,
)
from monitor.runs.replay import replay_run
from monitor.runs.run import split_runs

SCALING = next(r for r in RULES if r.name == "scaling")


def test_cusum_accumulates_past_the_reference_value_and_never_goes_below_zero() -> None:
    c = Cusum(k=0.5, h=5.0)
    assert [c.update(z) for z in (-3.0, 1.0, 2.0, 0.5, -10.0)] == [0.0, 0.5, 2.0, 2.0, 0.0]


def test_the_baseline_is_the_median_and_mad_of_its_runs() -> None:
    # one diverged run among five: median 51, |x - 51| = 1, 1, 2, 0, 149 -> MAD 1,
    # sd 1.4826 (hand arithmetic; 1.4826 = 1/Φ⁻¹(3/4), common practice, no source)
    b = make_baseline([(50.0, 0.1), (52.0, 0.1), (49.0, 0.1), (51.0, 0.1), (200.0, 0.1)], SCALING)
    assert (b.median, b.runs) == (51.0, 5)
    assert b.mad_sd == pytest.approx(1.4826)
    assert (b.sd, b.spread_from) == (pytest.approx(1.4826), "runs")
    # an even count: median of 40 and 60 is 50, MAD 10 -> sd 14.826 (hand arithmetic)
    wide = make_baseline([(40.0, 0.1), (60.0, 0.1)], SCALING)
    assert (wide.median, wide.sd) == (50.0, pytest.approx(14.826))
    # the runs' own stated std floors the spread, and so does the rule's minimum
    stated = make_baseline([(50.0, 3.0)] * 3 + [(51.0, 2.0)] * 2, SCALING)
    assert (stated.sd, stated.spread_from) == (3.0, "stated")  # median of 3, 3, 3, 2, 2
    same = make_baseline([(50.0, 0.1)] * 5, SCALING)
    assert (same.sd, same.spread_from) == (pytest.approx(0.02 * 50.0), "floor")  # 2 % floor
    with pytest.raises(ValueError, match="at least one run"):
        make_baseline([], SCALING)
    with pytest.raises(ValueError, match="not positive"):
        make_baseline([(0.0, 0.1)], SCALING)


def clean_summary(**diagnostics: object) -> dict[str, object]:
    """A run summary of a clean kettle heat-up (made-up figures like a replay's)."""
    diag: dict[str, object] = {"water_readings": 300, "rejected_fraction": 0.03,
                               "downweighted_fraction": 0.0, "nis_mean": 1.1,
                               "fit": {"converged": True, "residual_rms_k": 0.05}}  # fmt: skip
    diag.update(diagnostics)
    return {"vessel": "k1", "run": "1", "model": "two-node", "start_water_c": 15.0,
            "element_conductance_w_per_k": {"value": 54.0, "std": 1.6},
            "ua_w_per_k": {"value": 0.65, "std": 0.05},
            "heat_capacity_j_per_k": {"value": 5400.0, "std": 54.0},
            "diagnostics": diag}  # fmt: skip


def test_a_run_verdict_names_each_sign_of_a_failed_estimate() -> None:
    assert run_verdict(clean_summary()) == {"status": "trusted", "reasons": []}
    # older summaries without diagnostics, or without the fit, are judged on what they hold
    bare = clean_summary()
    del bare["diagnostics"]
    assert run_verdict(bare)["status"] == "trusted"
    assert run_verdict(clean_summary(fit=None))["status"] == "trusted"
    cases = {
        "Only 20 usable water readings": clean_summary(water_readings=20),
        "set aside as outliers": clean_summary(rejected_fraction=0.3),
        "given less weight": clean_summary(downweighted_fraction=0.9),
        "mean NIS 900": clean_summary(nis_mean=900.0),
        "did not converge": clean_summary(fit={"converged": False, "residual_rms_k": 0.05}),
        "2.50 K RMS": clean_summary(fit={"converged": True, "residual_rms_k": 2.5}),
    }
    diverged = clean_summary()
    diverged["element_conductance_w_per_k"] = {"value": 243.0, "std": 60.75}  # 4.5x, 25 %
    cases["conductance G is known only to ±25%"] = diverged
    cold = clean_summary()
    cold["start_water_c"] = None
    cases["never heated the water"] = cold
    for words, summary in cases.items():
        verdict = run_verdict(summary)
        assert verdict["status"] == "doubtful", words
        assert len(verdict["reasons"]) == 1, verdict
        assert words in verdict["reasons"][0]
    nothing = run_verdict({"vessel": "k1", "run": "1", "flags": []})
    assert nothing["status"] == "doubtful"
    assert "Nothing could be estimated" in nothing["reasons"][0]
    # UA states a wide std honestly on a short run; only past its value is it a failure
    short = clean_summary()
    short["ua_w_per_k"] = {"value": 0.65, "std": 0.5}
    assert run_verdict(short)["status"] == "trusted"
    short["ua_w_per_k"] = {"value": 0.65, "std": 0.8}
    assert run_verdict(short)["status"] == "doubtful"


def test_scale_thickness_follows_the_series_resistance() -> None:
    # 1/G - 1/G0 = 1/40 - 1/50 = 0.005 K/W; δ = k·A·0.005 with A = 0.018 m²:
    # k = 0.5 -> 0.045 mm, k = 2.9 -> 0.261 mm (k range from memory, no source checked)
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


def diverge(run: dict, factor: float = 4.0) -> dict:
    """A copy of ``run`` whose G went ``factor`` times too high with a 25 % std (the
    divergence seen on an independent world: G 4-5x the truth with a 25 % std)."""
    g = run["element_conductance_w_per_k"]["value"] * factor
    out = {**run, "element_conductance_w_per_k": {"value": g, "std": 0.25 * g}}
    out.pop("verdict", None)  # judged again from what it now says
    return out


def test_a_diverged_baseline_run_is_passed_over_and_scaling_is_flagged_as_without_it() -> None:
    ratios = [1.0] * 5 + [0.93] * 20 + [0.75] * 5
    clean = synthetic_runs(ratios, seed=3)
    spoilt = [diverge(r) if i == 2 else r for i, r in enumerate(clean)]
    got_clean = levels(drift_over_runs(clean), "scaling")
    flags = drift_over_runs(spoilt)
    got = levels(flags, "scaling")
    assert [f.name for f in flags[2]] == ["not_judged"]
    assert got[:25] == [None] * 25 == got_clean[:25]
    assert got[26] in ("warning", "alarm")
    assert got_clean[26] in ("warning", "alarm")
    # a mean and sd baseline would have taken the diverged run in: mean about 1.6x G0
    drift = VesselDrift("k1")
    for r in spoilt[:6]:
        drift.observe(r)
    baseline = drift.trackers["scaling"].baseline
    assert baseline is not None
    assert baseline.labels == ("1", "2", "4", "5", "6")  # run 3 replaced by run 6
    assert baseline.median == pytest.approx(54.0, rel=0.05)


def test_a_doubtful_run_is_not_judged_says_why_and_moves_nothing() -> None:
    runs = synthetic_runs([1.0] * 7, seed=12)
    drift = VesselDrift("k1")
    for r in runs[:6]:
        drift.observe(r)
    before = {name: (t.baseline, t.cusum.s, t.cusum.runs, t.shifted_runs)
              for name, t in drift.trackers.items()}  # fmt: skip
    bad = {**runs[6], "element_conductance_w_per_k": {"value": 20.0, "std": 0.3},
           "diagnostics": {"water_readings": 300, "rejected_fraction": 0.4}}  # fmt: skip
    (flag,) = drift.observe(bad)
    assert (flag.name, flag.level) == ("not_judged", Level.NOTICE)
    assert "not judged" in flag.message
    assert "40% of the readings were set aside" in flag.message
    assert flag.evidence["judged"] == "no"
    assert "set aside" in str(flag.evidence["reasons"])
    after = {name: (t.baseline, t.cusum.s, t.cusum.runs, t.shifted_runs)
             for name, t in drift.trackers.items()}  # fmt: skip
    assert after == before
    # a recorded verdict is taken as it stands
    marked = {**runs[6], "verdict": {"status": "doubtful", "reasons": ["Said so live."]}}
    (flag,) = drift.observe(marked)
    assert flag.name == "not_judged"
    assert "Said so live." in flag.message


def test_a_doubtful_marked_baseline_run_is_replaced_by_the_next_trusted_one() -> None:
    runs = synthetic_runs([0.6, 0.6] + [1.0] * 7, seed=8)
    runs[4] = diverge(runs[4], 5.0)  # run 5, one of the marked ones
    drift = VesselDrift("k1", {"baseline_runs": "3,4,5,6,7"})
    for r in runs:
        drift.observe(r)
    baseline = drift.trackers["scaling"].baseline
    assert baseline is not None
    assert baseline.labels == ("3", "4", "6", "7", "8")
    assert baselines_of(runs)["element_conductance_w_per_k"]["runs"] == 5.0


def test_one_run_far_outside_the_baseline_is_a_notice_and_two_in_a_row_a_warning() -> None:
    # five identical runs whose stated std makes σ_d = 4 % (hypot of 1.527 and 1.527 over
    # 54, hand arithmetic), then 20 % down: 5 σ_d out and 2.5 σ_d past the 10 % tolerance,
    # where the CUSUM alone gains 2.0 a run (below its notice at 2.5)
    std = 0.04 * 54.0 / math.sqrt(2.0)
    base = [{"vessel": "k1", "run": str(i + 1), "model": "two-node",
             "element_conductance_w_per_k": {"value": 54.0, "std": std}}
            for i in range(5)]  # fmt: skip
    low = [{**base[0], "run": str(i), "element_conductance_w_per_k": {"value": 43.2, "std": std}}
           for i in (6, 7)]  # fmt: skip
    drift = VesselDrift("k1")
    flags = [drift.observe(r) for r in [*base, low[0], base[1], low[0], low[1]]]
    first = flags[5][0]
    assert (first.name, first.level, first.evidence["raised_by"]) == ("scaling", Level.NOTICE,
                                                                      "shift")  # fmt: skip
    assert first.evidence["shift_sd"] == pytest.approx(5.0)
    assert first.evidence["cusum"] == pytest.approx(2.0)
    assert "in this one run" in first.message
    assert flags[6] == []  # back in line: the streak ends (the CUSUM has fallen to 0)
    assert flags[7][0].level == Level.NOTICE
    second = flags[8][0]
    assert (second.level, second.evidence["shifted_runs"]) == (Level.WARNING, 2)
    assert "two runs in a row" in second.message
    assert "descale" in second.message


def test_fleet_text_and_rows_show_a_doubtful_last_run() -> None:
    runs = synthetic_runs([1.0] * 6, seed=9)
    runs[-1] = diverge(runs[-1])
    result = {"runs": [{**r, "flags": [], "drift": [f.as_dict() for f in fl]}
                       for r, fl in zip(runs, drift_over_runs(runs), strict=True)]}  # fmt: skip
    (row,) = fleet_rows(result)
    assert (row["last_verdict"], row["not_judged_runs"], row["runs_since_baseline"]) == (
        "doubtful", 1, 0)  # fmt: skip
    assert row["status"] == "notice"
    assert "not_judged" in row["flags"]
    text = fleet_table([row])
    assert "DOUBTFUL (not judged)" in text
    assert "why not judged: The element-to-water conductance G is known only to ±25%" in text


def test_a_doubtful_last_run_neither_clears_nor_raises_a_standing_warning() -> None:
    # made-up figures: G falls by a third after five runs, then one run cannot be judged
    runs = synthetic_runs([1.0] * 5 + [0.66] * 3, seed=5)
    runs.append(diverge(runs[-1]))
    flags = drift_over_runs(runs)
    assert "scaling" in [f.name for f in flags[7]]
    assert [f.name for f in flags[8]] == ["not_judged"]
    result = {"runs": [{**r, "flags": [], "drift": [f.as_dict() for f in fl]}
                       for r, fl in zip(runs, flags, strict=True)]}  # fmt: skip
    (row,) = fleet_rows(result)
    assert row["last_verdict"] == "doubtful"
    assert set(row["flags"]) == {"scaling", "not_judged"}
    assert row["status"] == max((f.level.value for f in flags[7]), key=LEVEL_RANK.get)
    # a doubtful run's own fill check stands for that name (not twice)
    judged = [
        {"name": "fill", "level": "alarm", "message": "old"},
        {"name": "scaling", "level": "warning", "message": "s"},
    ]
    own = [
        {"name": "not_judged", "level": "notice"},
        {"name": "fill", "level": "alarm", "message": "new"},
    ]
    shown, kept = standing_drift(judged, own, {"status": "doubtful"})
    assert [(f["name"], f.get("message")) for f in shown] == [
        ("scaling", "s"),
        ("not_judged", None),
        ("fill", "new"),
    ]
    assert kept == judged
    # a trusted run after it speaks for itself again
    shown, judged = standing_drift([{"name": "scaling", "level": "warning"}], [],
                                   {"status": "trusted"})  # fmt: skip
    assert (shown, judged) == ([], [])


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
    assert all(r["verdict"] == {"status": "trusted", "reasons": []} for r in runs)
    got = levels(drift_over_runs(runs), "scaling")
    assert got[:9] == [None] * 9
    assert {"warning", "alarm"} & set(got[9:])
    # the same series with its second run diverged (G 4x the truth, 25 % std): that run
    # is not judged, run 6 takes its place in the baseline, and scaling is flagged alike
    spoilt = [diverge(r) if i == 1 else r for i, r in enumerate(runs)]
    flags = drift_over_runs(spoilt)
    assert [f.name for f in flags[1]] == ["not_judged"]
    got_spoilt = levels(flags, "scaling")
    assert got_spoilt[:9] == [None] * 9
    assert got_spoilt[9:] == got[9:]


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
