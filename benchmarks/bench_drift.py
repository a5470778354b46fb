"""Print JSON: how fast the scaling flag catches limescale, and how often clean vessels alarm.

Run from the repository root:

    .venv/bin/python benchmarks/bench_drift.py                      # 20 series, 1000 clean runs
    .venv/bin/python benchmarks/bench_drift.py --series 5 --clean-runs 100   # a quick look

Each run is a simulated kettle heated to the boil (our own scenarios): fill
1.0-1.7 kg, start 8-20 °C and room 16-26 °C drawn per run from
``np.random.default_rng``, replayed through the estimator, its summary fed to
:mod:`monitor.drift` in order.

Detection delay
    Each scale series starts with five clean runs (the baseline); then the scale
    grows by ``--step-mm`` per run. The delay is the number of runs from the first
    run whose true element conductance (from the simulator) is 25 % or more below
    the clean one, to the first ``warning`` or ``alarm`` of ``scaling``; negative
    when the flag came earlier (it may, from about 10 % down). ``early_notice``
    counts series whose first flag of any level came while the truth was within
    10 % of the baseline.

False alarms
    ``--clean-runs`` clean runs of one vessel in a row: every ``warning`` or
    ``alarm`` of any drift rule counts, reported per 1000 runs.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from drivers.simulator import SimulatedRig, kettle_scenario, scenario_metadata
from monitor.drift import VesselDrift, run_checks
from monitor.interchange import InterchangeLog, rows_from_samples
from monitor.replay import replay_run, split_runs

CHANNELS = ["water", "element", "ambient", "power", "voltage"]


def one_run(rng: np.random.Generator, seed: int, scale_mm: float) -> tuple[dict, float]:
    """Return (run summary, true G ratio to clean) for one simulated kettle run."""
    scenario = kettle_scenario(
        scale_mm=scale_mm,
        water_mass_kg=float(rng.uniform(1.0, 1.7)),
        start_water_c=float(rng.uniform(8.0, 20.0)),
        ambient_c=float(rng.uniform(16.0, 26.0)),
        duration_s=360.0,
    )
    clean = replace(scenario, scale_mm=0.0)
    ratio = scenario.element_conductance_w_per_k() / clean.element_conductance_w_per_k()
    rows = list(rows_from_samples(SimulatedRig(scenario, seed=seed).run(), scenario.start_epoch_s))
    meta = scenario_metadata(scenario, seed)
    log = InterchangeLog(f"sim-{seed}", meta, CHANNELS, rows, start_epoch_s=scenario.start_epoch_s)
    (run,) = split_runs([log])[0]
    return replay_run(run), ratio


def series(index: int, step_mm: float, max_runs: int) -> dict[str, object]:
    """Return one scale series' detection figures."""
    rng = np.random.default_rng(1000 + index)
    drift = VesselDrift("kettle-1", {"rated_power_w": 2200.0, "element_area_m2": 0.018})
    first_25 = first_warning = first_flag = None
    flag_ratio = None
    for n in range(max_runs):
        mm = 0.0 if n < 5 else step_mm * (n - 4)
        summary, ratio = one_run(rng, 10_000 * index + n, mm)
        flags = [f for f in drift.observe(summary) if f.name == "scaling"]
        if first_25 is None and ratio <= 0.75:
            first_25 = n
        if flags and first_flag is None:
            first_flag, flag_ratio = n, ratio
        if first_warning is None and any(str(f.level) in ("warning", "alarm") for f in flags):
            first_warning = n
        if first_warning is not None and first_25 is not None:
            break
    delay = None if first_warning is None or first_25 is None else first_warning - first_25
    return {
        "delay_runs": delay,
        "early_notice": flag_ratio is not None and flag_ratio > 0.90,
        "first_flag_truth_ratio": flag_ratio,
    }


def clean(runs: int) -> dict[str, object]:
    """Return the false alarms of ``runs`` clean runs of one vessel."""
    rng = np.random.default_rng(7)
    drift = VesselDrift("kettle-1", {"rated_power_w": 2200.0, "fill_kg": None})
    warnings = notices = 0
    for n in range(runs):
        summary, _ = one_run(rng, 500_000 + n, 0.0)
        flags = drift.observe(summary) + run_checks(summary, drift.metadata)
        warnings += sum(str(f.level) in ("warning", "alarm") for f in flags)
        notices += sum(str(f.level) == "notice" for f in flags)
    return {
        "runs": runs,
        "warnings_or_alarms": warnings,
        "per_1000_runs": 1000.0 * warnings / runs,
        "notices_per_1000_runs": 1000.0 * notices / runs,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=20)
    parser.add_argument("--step-mm", type=float, default=0.01, help="scale added per run, mm")
    parser.add_argument("--clean-runs", type=int, default=1000)
    args = parser.parse_args()
    started = time.perf_counter()
    results = []
    for i in range(args.series):
        results.append(series(i, args.step_mm, max_runs=80))
        print(f"bench_drift: series {i + 1} of {args.series}", file=sys.stderr, flush=True)
    delays = [r["delay_runs"] for r in results if r["delay_runs"] is not None]
    print("bench_drift: clean runs", file=sys.stderr, flush=True)
    false_alarms = clean(args.clean_runs)
    print(json.dumps({
        "benchmark": "drift",
        "step_mm_per_run": args.step_mm,
        "series": args.series,
        "detected": len(delays),
        "delay_runs": {
            "median": statistics.median(delays) if delays else None,
            "max": max(delays) if delays else None,
            "min": min(delays) if delays else None,
        },
        "early_notices": sum(bool(r["early_notice"]) for r in results),
        "false_alarms": false_alarms,
        "wall_s": round(time.perf_counter() - started, 1),
    }, indent=2))  # fmt: skip


if __name__ == "__main__":
    main()
