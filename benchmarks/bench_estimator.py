"""Print JSON: how closely and how fast the live estimator follows the simulated rig.

Run from the repository root:

    .venv/bin/python benchmarks/bench_estimator.py                  # 20 seeds
    .venv/bin/python benchmarks/bench_estimator.py --quick          # smoke run
    .venv/bin/python benchmarks/bench_estimator.py --seeds 50 --skip-throughput

Each seed draws one kettle and one storage heater from ``np.random.default_rng(seed)``
and simulates each once; every model of that vessel (two-node: with the element
thermocouple, one-node: without it) is fed the same samples, exactly as
``monitor.runs.replay.replay_run`` feeds a log. Progress goes to stderr, one JSON object
to stdout.

Conventions of the output
    Errors are relative (0.05 is 5 %) unless the key says otherwise. Each error
    block gives ``median``, ``p90`` and ``worst`` of |error| over runs, ``bias`` (the
    median signed error, + means the estimate is high), ``n`` and ``failed`` (runs
    with no usable value; they count as an infinite error). Non-finite numbers are
    written as null.

Instants
    Heat-up starts when the rig's element first switches on and ends when its true
    water first reaches the target (kettle: the rig's ``boiling_since_s``; heater:
    60 °C, interpolated between samples). The 25 % and 50 % instants are the first
    samples at or after that fraction of the heat-up.

Consistency
    NIS is the filter's own χ² of each water innovation; NEES is (true − estimated
    water temperature)² over the filter's variance. Their run means are checked
    against the two-sided 95 % band of χ²(K)/K, which assumes K independent
    samples; consecutive NEES samples are strongly correlated, so that band is far
    narrower than the true spread of a run mean of NEES.
"""

from __future__ import annotations

import argparse
import json
import math
import multiprocessing
import platform
import resource
import sys
import tempfile
import time
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy.optimize import least_squares
from scipy.stats import chi2

from drivers.simworld import (
    DrawOff,
    KettleSwitch,
    Scenario,
    SimulatedRig,
    effective_ua_w_per_k,
    kettle_scenario,
    scenario_metadata,
    water_heater_scenario,
)
from monitor import __version__
from monitor.cli import SIM_CHANNELS
from monitor.estimation.contracts import Estimate, Estimated
from monitor.estimation.estimator import VesselEstimator
from monitor.estimation.settings import EstimatorSettings, VesselConfig
from monitor.physics import transition, water
from monitor.records.interchange import read_csv, rows_from_samples, write_csv
from monitor.runs.replay import replay

KETTLE_DURATION_S = 900.0  # heat-up, boil, switch-off and about ten minutes of cooling
HEATER_DURATION_S = 10 * 3600.0  # heat-up (up to ~4.5 h for 150 kg) and 4 h of standby
HEATER_TARGET_C = 60.0  # the heater's thermostat setpoint, °C
STANDBY_AFTER_TARGET_S = 4 * 3600.0
STANDING_LOSS_ROOM_C = 20.0  # room temperature of the standing-loss figure, °C
KWH_PER_24H_PER_W = 24.0 / 1000.0
FRACTIONS = (0.25, 0.50)  # of the heat-up, where time-to-target forecasts are scored
LINE_WINDOW_S = 60.0  # the straight-line baseline fits this much of the latest readings
FIT_POWER_WINDOW_S = 10.0  # the offline fit forecasts with the mean power over this
FIT_ROBUST_SCALE_K = 0.25  # soft-L1 scale of the offline fit: spikes of 8 K count little
BAND_PROBABILITY = 0.95
TWO_NODE, ONE_NODE = "two_node", "one_node"
KETTLE, HEATER = "kettle", "heater"
MODELS = {KETTLE: (TWO_NODE, ONE_NODE), HEATER: (ONE_NODE, TWO_NODE)}
STEP_RATE_RUN_S = 3600.0
STEP_RATE_REPEATS = 3
GATE_NIS = EstimatorSettings().gate_nis  # readings above it are set aside by the filter


@dataclass(frozen=True)
class Options:
    """What one benchmark run covers."""

    seeds: int
    quick: bool
    throughput: bool
    log_days: float


def log(message: str) -> None:
    """Write one progress line to stderr."""
    print(f"bench_estimator: {message}", file=sys.stderr, flush=True)


# ---------------------------------------------------------------------------
# Scenarios
# ---------------------------------------------------------------------------


def draw_kettle(rng: np.random.Generator) -> Scenario:
    """Return a kettle with a random fill, scale, start temperature and site altitude."""
    altitude_m = float(rng.uniform(0.0, 1500.0))
    return kettle_scenario(
        water_mass_kg=float(rng.uniform(1.0, 1.7)),
        scale_mm=float(rng.uniform(0.0, 0.4)),
        start_water_c=float(rng.uniform(8.0, 20.0)),
        altitude_m=altitude_m,
        pressure_kpa=float(water.pressure_at_altitude_kpa(altitude_m)),
        duration_s=KETTLE_DURATION_S,
    )


def draw_heater(rng: np.random.Generator) -> Scenario:
    """Return a full storage heater of random size: heat-up then standby, no draw-offs."""
    mass_kg = float(rng.uniform(50.0, 150.0))
    start_c = water_heater_scenario().start_water_c
    volume_l = mass_kg / float(water.density_kg_per_m3(start_c)) * 1000.0
    return water_heater_scenario(
        water_mass_kg=mass_kg,
        nominal_volume_l=volume_l,
        duration_s=HEATER_DURATION_S,
        draws=(),
    )


# ---------------------------------------------------------------------------
# Simulation: the rig's truth and every model's estimates, step by step
# ---------------------------------------------------------------------------


@dataclass
class Trace:
    """One simulated run: the truth, the readings and each model's estimates per step."""

    kind: str
    scenario: Scenario
    seed: int
    target_c: float
    water_sensor_tau_s: float
    t_s: list[float] = field(default_factory=list)
    true_water_c: list[float] = field(default_factory=list)
    true_ambient_c: list[float] = field(default_factory=list)
    true_mass_kg: list[float] = field(default_factory=list)
    heating: list[bool] = field(default_factory=list)
    readings: list[dict[str, float]] = field(default_factory=list)
    estimates: dict[str, list[Estimate | None]] = field(default_factory=dict)
    conductance_at_80: dict[str, Estimated | None] = field(default_factory=dict)
    boiling_since_s: float | None = None


def _readings_for(model: str, values: dict[str, float]) -> dict[str, float]:
    """Return the readings a model sees: one-node runs lose the element thermocouple."""
    if model == TWO_NODE:
        return values
    return {k: v for k, v in values.items() if k != "element"}


def simulate(kind: str, scenario: Scenario, seed: int) -> Trace:
    """Return the trace of one rig run fed to a fresh estimator per model of ``kind``."""
    rig = SimulatedRig(scenario, seed)
    meta = scenario_metadata(scenario, seed)
    estimators = {
        model: VesselEstimator(
            VesselConfig.from_metadata(scenario.vessel, meta, has_element_sensor=model == TWO_NODE)
        )
        for model in MODELS[kind]
    }
    first = next(iter(estimators.values()))
    trace = Trace(kind, scenario, seed, first.target_c, first.config.water_sensor_tau_s)
    trace.estimates = {model: [] for model in estimators}
    for batch in rig.run():
        values = {s.channel: s.value for s in batch}
        t_s = rig.elapsed_s
        for model, est in estimators.items():
            trace.estimates[model].append(est.step(t_s, _readings_for(model, values)))
        st = rig.state
        trace.t_s.append(t_s)
        trace.true_water_c.append(st.water_c)
        trace.true_ambient_c.append(st.ambient_c)
        trace.true_mass_kg.append(st.water_mass_kg)
        trace.heating.append(st.heating)
        trace.readings.append(values)
    trace.boiling_since_s = rig.state.boiling_since_s
    trace.conductance_at_80 = {m: e.conductance_at_80_percent for m, e in estimators.items()}
    return trace


def heating_start_s(trace: Trace) -> float:
    """Return when the rig's element first switched on, s."""
    return trace.t_s[trace.heating.index(True)]


def true_arrival_s(trace: Trace) -> float | None:
    """Return when the true water first reached the target, s (None: it never did)."""
    if trace.kind == KETTLE:
        return trace.boiling_since_s
    w = trace.true_water_c
    for k in range(1, len(w)):
        if w[k] >= trace.target_c:
            frac = (trace.target_c - w[k - 1]) / (w[k] - w[k - 1])
            return trace.t_s[k - 1] + frac * (trace.t_s[k] - trace.t_s[k - 1])
    return None


def index_at_or_after(trace: Trace, t_s: float) -> int | None:
    """Return the index of the first sample at or after ``t_s``, or None past the end."""
    k = int(np.searchsorted(np.asarray(trace.t_s), t_s - 1e-9))
    return k if k < len(trace.t_s) else None


# ---------------------------------------------------------------------------
# Baselines for the time to target
# ---------------------------------------------------------------------------


def water_readings(trace: Trace, upto: int) -> tuple[np.ndarray, np.ndarray]:
    """Return (times s, water readings °C) of samples 0..upto that have a water reading."""
    pairs = [(trace.t_s[k], r.get("water")) for k, r in enumerate(trace.readings[: upto + 1])]
    pairs = [(t, z) for t, z in pairs if z is not None and math.isfinite(z)]
    t, z = zip(*pairs, strict=True)
    return np.asarray(t), np.asarray(z)


def line_eta_s(trace: Trace, k: int) -> float:
    """Return the straight-line time to target, s: a fit to the last minute of readings.

    Infinite when the fitted slope is not positive.
    """
    t, z = water_readings(trace, k)
    now_s = trace.t_s[k]
    recent = t >= now_s - LINE_WINDOW_S
    slope, level = np.polyfit(t[recent] - now_s, z[recent], 1)
    if slope <= 0.0:
        return math.inf
    return max((trace.target_c - level) / slope, 0.0)


@dataclass(frozen=True)
class FitInputs:
    """What the offline fit sees up to one instant: readings and the measured inputs."""

    dt_s: np.ndarray  # interval k runs from sample k to sample k+1
    power_w: np.ndarray  # mean power over interval k
    ambient_c: np.ndarray  # room reading at sample k (last known)
    water_c: np.ndarray  # water reading at sample k, NaN when missing
    lag_rate_per_s: float | None


def interval_power_w(trace: Trace, k: int) -> float:
    """Return the mean power over the interval ending at sample k, W.

    From the energy counter when both ends have it (as the estimator does), else
    the power meter's reading at sample k.
    """
    now, before = trace.readings[k], trace.readings[k - 1]
    if "energy" in now and "energy" in before and now["energy"] >= before["energy"]:
        return (now["energy"] - before["energy"]) * 3600.0 / (trace.t_s[k] - trace.t_s[k - 1])
    return max(now.get("power", 0.0), 0.0)


def fit_inputs(trace: Trace, upto: int) -> FitInputs:
    """Return the offline fit's inputs over samples 0..upto."""
    t = np.asarray(trace.t_s[: upto + 1])
    ambient, last = [], 20.0
    for r in trace.readings[: upto + 1]:
        last = r.get("ambient", last)
        ambient.append(last)
    water_c = [r.get("water", math.nan) for r in trace.readings[: upto + 1]]
    tau = trace.water_sensor_tau_s
    return FitInputs(
        dt_s=np.diff(t),
        power_w=np.asarray([interval_power_w(trace, k) for k in range(1, upto + 1)]),
        ambient_c=np.asarray(ambient),
        water_c=np.asarray(water_c, dtype=float),
        lag_rate_per_s=1.0 / tau if tau > 0.0 else None,
    )


def one_node_path(theta: Sequence[float], inputs: FitInputs) -> tuple[np.ndarray, float]:
    """Return (modelled sensor readings °C at every sample, modelled water °C at the last).

    θ = (ln UA, ln C, initial water °C); the sensor starts level with the water.
    Each interval is the exact one-node step with that interval's mean power.
    """
    ua, c = math.exp(theta[0]), math.exp(theta[1])
    water_c = sensor_c = float(theta[2])
    lam = inputs.lag_rate_per_s
    out = np.empty(len(inputs.water_c))
    out[0] = sensor_c
    for k, dt in enumerate(inputs.dt_s.tolist()):
        temps, _ = transition.one_node_step(
            water_c, sensor_c, dt, float(inputs.power_w[k]), float(inputs.ambient_c[k]), ua, c, lam
        )
        water_c = temps[0]
        sensor_c = temps[1] if lam is not None else water_c
        out[k + 1] = sensor_c
    return out, water_c


def fit_eta_s(trace: Trace, k: int) -> float:
    """Return the offline least-squares time to target at sample k, s (inf: never).

    Fits ln UA, ln C and the initial water temperature of the one-node model with
    the sensor lag from the metadata to every water reading so far (soft-L1 loss),
    then forecasts from the fitted water temperature with the mean power of the
    last :data:`FIT_POWER_WINDOW_S`.
    """
    inputs = fit_inputs(trace, k)
    seen = np.isfinite(inputs.water_c)
    z = inputs.water_c[seen]
    energy_j = float(np.sum(inputs.power_w * inputs.dt_s))
    c0 = min(max(energy_j / max(z[-5:].mean() - z[:5].mean(), 1.0), 1e3), 1e7)
    x0 = [0.0, math.log(c0), float(np.median(z[:5]))]
    bounds = ([math.log(1e-2), math.log(1e2), -20.0], [math.log(1e2), math.log(1e8), 120.0])

    def residuals(theta: np.ndarray) -> np.ndarray:
        return one_node_path(theta, inputs)[0][seen] - z

    fit = least_squares(
        residuals, x0, bounds=bounds, loss="soft_l1", f_scale=FIT_ROBUST_SCALE_K, x_scale="jac"
    )
    _, water_now_c = one_node_path(fit.x, inputs)
    from_end_s = inputs.dt_s[::-1].cumsum()[::-1]  # from each interval's start to now
    recent = from_end_s <= max(FIT_POWER_WINDOW_S, float(inputs.dt_s[-1])) + 1e-9
    power_w = float(
        np.sum(inputs.power_w[recent] * inputs.dt_s[recent]) / inputs.dt_s[recent].sum()
    )
    eta = transition.one_node_time_to_target(
        water_now_c,
        trace.target_c,
        power_w,
        float(inputs.ambient_c[-1]),
        math.exp(fit.x[0]),
        math.exp(fit.x[1]),
    )
    return math.inf if eta is None else eta


# ---------------------------------------------------------------------------
# Scoring one trace
# ---------------------------------------------------------------------------


def relative_error(estimate: float | None, truth: float) -> float:
    """Return (estimate − truth)/truth, or inf when there is no estimate."""
    if estimate is None or not math.isfinite(estimate):
        return math.inf
    return (estimate - truth) / truth


@dataclass
class ModelScore:
    """One model's errors on one trace."""

    eta_error: dict[float, float] = field(default_factory=dict)  # by heat-up fraction
    covered: dict[float, bool] = field(default_factory=dict)
    mass_error: float = math.inf
    conductance_error: float | None = None  # two-node only
    loss_error: float = math.inf  # kettle: UA after cooling; heater: 4 h standing loss
    loss_kwh_per_24h: float | None = None  # heater only
    nis_mean: float | None = None  # every water reading's NIS, the gated ones included
    nis_count: int = 0
    nis_accepted_mean: float | None = None  # only the readings the gate let through
    nis_accepted_count: int = 0
    nees_mean: float | None = None
    nees_count: int = 0


@dataclass
class TraceScore:
    """The errors of every model and of the baselines on one trace."""

    kind: str
    seed: int
    heat_up_s: float
    remaining_s: dict[float, float]
    line_error: dict[float, float]
    fit_error: dict[float, float]
    models: dict[str, ModelScore]
    after_switch_off_s: float | None = None
    true_loss_kwh_per_24h: float | None = None


def score_forecast(
    score: ModelScore, fraction: float, e: Estimate | None, remaining_s: float
) -> None:
    """Record a model's time-to-target error and interval coverage at one instant."""
    target = e.target if e is not None else None
    if target is None or target.eta_s is None:
        score.eta_error[fraction] = math.inf
        score.covered[fraction] = False
        return
    score.eta_error[fraction] = relative_error(target.eta_s, remaining_s)
    lo = target.lo_s if target.lo_s is not None else math.inf
    hi = target.hi_s if target.hi_s is not None else math.inf
    score.covered[fraction] = lo <= remaining_s <= hi


def score_consistency(score: ModelScore, trace: Trace, estimates: list[Estimate | None]) -> None:
    """Record a model's run-mean NIS (water updates) and water-temperature NEES."""
    nis = [e.nis for e in estimates if e is not None and e.nis is not None]
    nees = [
        (w - e.water_c) ** 2 / e.water_std_c**2
        for w, e in zip(trace.true_water_c, estimates, strict=True)
        if e is not None and e.water_std_c > 0.0
    ]
    accepted = [x for x in nis if x <= GATE_NIS]
    score.nis_count, score.nees_count = len(nis), len(nees)
    score.nis_accepted_count = len(accepted)
    score.nis_mean = float(np.mean(nis)) if nis else None
    score.nis_accepted_mean = float(np.mean(accepted)) if accepted else None
    score.nees_mean = float(np.mean(nees)) if nees else None


def standing_loss_kwh_per_24h(ua_w_per_k: float) -> float:
    """Return the standing loss in kWh per 24 h of a loss conductance, 60 °C in a 20 °C room."""
    return ua_w_per_k * (HEATER_TARGET_C - STANDING_LOSS_ROOM_C) * KWH_PER_24H_PER_W


def score_losses(
    score: ModelScore, trace: Trace, estimates: list[Estimate | None], arrival_s: float
) -> None:
    """Record the kettle's UA after cooling, or the heater's standing loss after 4 h."""
    sc = trace.scenario
    if trace.kind == KETTLE:
        last = estimates[-1]
        truth = effective_ua_w_per_k(sc, trace.true_water_c[-1], trace.true_ambient_c[-1])
        score.loss_error = relative_error(last.ua_w_per_k.value if last else None, truth)
        return
    k = index_at_or_after(trace, arrival_s + STANDBY_AFTER_TARGET_S)
    e = estimates[k] if k is not None else None
    truth = standing_loss_kwh_per_24h(
        effective_ua_w_per_k(sc, HEATER_TARGET_C, STANDING_LOSS_ROOM_C)
    )
    if e is not None:
        score.loss_kwh_per_24h = standing_loss_kwh_per_24h(e.ua_w_per_k.value)
    score.loss_error = relative_error(score.loss_kwh_per_24h, truth)


def score_model(
    trace: Trace, model: str, instants: dict[float, int], arrival_s: float
) -> ModelScore:
    """Return one model's errors on a trace (see the module docstring for the instants)."""
    estimates = trace.estimates[model]
    score = ModelScore()
    for fraction, k in instants.items():
        score_forecast(score, fraction, estimates[k], arrival_s - trace.t_s[k])
    k_mid = instants[0.5]
    e_mid = estimates[k_mid]
    mass = e_mid.water_mass_kg.value if e_mid and e_mid.water_mass_kg else None
    score.mass_error = relative_error(mass, trace.true_mass_kg[k_mid])
    if model == TWO_NODE:
        g = trace.conductance_at_80.get(model)
        truth = trace.scenario.element_conductance_w_per_k(0.0)
        score.conductance_error = relative_error(g.value if g else None, truth)
    score_losses(score, trace, estimates, arrival_s)
    score_consistency(score, trace, estimates)
    return score


def score_trace(trace: Trace) -> TraceScore:
    """Return every error of one trace: the models and the two baselines."""
    arrival_s = true_arrival_s(trace)
    if arrival_s is None:
        raise RuntimeError(f"{trace.kind} seed {trace.seed} never reached its target")
    start_s = heating_start_s(trace)
    instants = {}
    for f in FRACTIONS:
        k = index_at_or_after(trace, start_s + f * (arrival_s - start_s))
        if k is None:
            raise RuntimeError(f"{trace.kind} seed {trace.seed}: no sample at {f:.0%}")
        instants[f] = k
    remaining = {f: arrival_s - trace.t_s[k] for f, k in instants.items()}
    score = TraceScore(
        kind=trace.kind,
        seed=trace.seed,
        heat_up_s=arrival_s - start_s,
        remaining_s=remaining,
        line_error={
            f: relative_error(line_eta_s(trace, k), remaining[f]) for f, k in instants.items()
        },
        fit_error={
            f: relative_error(fit_eta_s(trace, k), remaining[f]) for f, k in instants.items()
        },
        models={m: score_model(trace, m, instants, arrival_s) for m in trace.estimates},
    )
    sc = trace.scenario
    if trace.kind == KETTLE and isinstance(sc.control, KettleSwitch):
        score.after_switch_off_s = trace.t_s[-1] - (arrival_s + sc.control.off_delay_s)
    else:
        truth = effective_ua_w_per_k(sc, HEATER_TARGET_C, STANDING_LOSS_ROOM_C)
        score.true_loss_kwh_per_24h = standing_loss_kwh_per_24h(truth)
    return score


# ---------------------------------------------------------------------------
# Summaries
# ---------------------------------------------------------------------------


def num(value: float | None, digits: int = 4) -> float | None:
    """Return ``value`` to ``digits`` significant figures, or None when not finite."""
    if value is None or not math.isfinite(value):
        return None
    return float(f"{value:.{digits}g}")


def percentile(values: np.ndarray, q: float) -> float:
    """Return the q-th percentile (linear), infinite when it falls among failures."""
    with np.errstate(invalid="ignore"):
        out = float(np.percentile(values, q))
    return math.inf if math.isnan(out) else out


def error_stats(errors: Iterable[float]) -> dict[str, float | int | None]:
    """Return median, 90th percentile and worst of |error|, the median signed error, n."""
    signed = np.asarray(list(errors), dtype=float)
    if signed.size == 0:
        return {"n": 0}
    size = np.abs(signed)
    finite = signed[np.isfinite(signed)]
    return {
        "median": num(percentile(size, 50.0)),
        "p90": num(percentile(size, 90.0)),
        "worst": num(float(size.max())),
        "bias": num(float(np.median(finite))) if finite.size else None,
        "n": int(size.size),
        "failed": int(size.size - finite.size),
    }


def spread(values: Iterable[float | None]) -> dict[str, float | None]:
    """Return min, median and max of the values that exist."""
    a = np.asarray([v for v in values if v is not None], dtype=float)
    if a.size == 0:
        return {"min": None, "median": None, "max": None}
    return {"min": num(a.min()), "median": num(float(np.median(a))), "max": num(a.max())}


def chi2_band(k: int) -> tuple[float, float]:
    """Return the two-sided 95 % band of a mean of k χ²₁ samples."""
    tail = (1.0 - BAND_PROBABILITY) / 2.0
    return float(chi2.ppf(tail, k) / k), float(chi2.ppf(1.0 - tail, k) / k)


def consistency_stats(means: list[float | None], counts: list[int]) -> dict[str, object]:
    """Return the spread of run means and the fraction of runs inside their χ² band."""
    inside = []
    for mean, k in zip(means, counts, strict=True):
        if mean is not None and k > 0:
            lo, hi = chi2_band(k)
            inside.append(lo <= mean <= hi)
    return {
        "run_mean": spread(means),
        "samples_per_run": spread([float(k) for k in counts]),
        "band_for_median_k": [num(v) for v in chi2_band(int(np.median(counts)))]
        if counts
        else None,
        "fraction_of_runs_in_band": num(float(np.mean(inside))) if inside else None,
    }


def model_summary(kind: str, model: str, scores: list[TraceScore]) -> dict[str, object]:
    """Return one model's accuracy and consistency summary over the traces of a kind."""
    ms = [s.models[model] for s in scores]
    covered = [m.covered[f] for m in ms for f in FRACTIONS]
    out: dict[str, object] = {
        "runs": len(ms),
        "time_to_target": {f"{f:.0%}": error_stats(m.eta_error[f] for m in ms) for f in FRACTIONS},
        "time_to_target_coverage_90": {
            **{f"{f:.0%}": num(float(np.mean([m.covered[f] for m in ms]))) for f in FRACTIONS},
            "both": num(float(np.mean(covered))),
        },
        "water_mass_at_50pct": error_stats(m.mass_error for m in ms),
    }
    if model == TWO_NODE:
        out["element_conductance_at_80pct"] = error_stats(m.conductance_error for m in ms)
    key = "ua_after_cooling" if kind == KETTLE else "standing_loss_after_4h_standby"
    out[key] = error_stats(m.loss_error for m in ms)
    out["nis"] = consistency_stats([m.nis_mean for m in ms], [m.nis_count for m in ms])
    out["nis_accepted_only"] = consistency_stats(
        [m.nis_accepted_mean for m in ms], [m.nis_accepted_count for m in ms]
    )
    out["nees_water"] = consistency_stats([m.nees_mean for m in ms], [m.nees_count for m in ms])
    return out


def kind_summary(kind: str, scores: list[TraceScore]) -> dict[str, object]:
    """Return the summary of one vessel kind: its models side by side with the baselines."""
    ss = [s for s in scores if s.kind == kind]
    out: dict[str, object] = {
        "runs": len(ss),
        "heat_up_s": spread(s.heat_up_s for s in ss),
        "baselines_time_to_target": {
            "line_last_60s": {
                f"{f:.0%}": error_stats(s.line_error[f] for s in ss) for f in FRACTIONS
            },
            "offline_fit": {f"{f:.0%}": error_stats(s.fit_error[f] for s in ss) for f in FRACTIONS},
        },
        "models": {m: model_summary(kind, m, ss) for m in MODELS[kind]},
    }
    if kind == KETTLE:
        out["ua_taken_after_switch_off_s"] = spread(s.after_switch_off_s for s in ss)
    else:
        out["true_standing_loss_kwh_per_24h"] = spread(s.true_loss_kwh_per_24h for s in ss)
        out["estimated_standing_loss_kwh_per_24h"] = {
            m: spread(s.models[m].loss_kwh_per_24h for s in ss) for m in MODELS[kind]
        }
    return out


# ---------------------------------------------------------------------------
# Targets
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Check:
    """One target: the figure, its limit and whether it was met."""

    name: str
    value: float | None
    low: float | None = None
    high: float | None = None

    def as_dict(self) -> dict[str, object]:
        """Return the check as a JSON-ready dict."""
        met = self.value is not None
        met = met and (self.low is None or self.value >= self.low)
        met = met and (self.high is None or self.value <= self.high)
        return {
            "name": self.name,
            "value": self.value,
            "low": self.low,
            "high": self.high,
            "met": met,
        }


def accuracy_checks(kind: str, summary: dict[str, object]) -> Iterator[Check]:
    """Yield the accuracy targets of one vessel kind."""
    base = summary["baselines_time_to_target"]
    for model, ms in summary["models"].items():
        tag = f"{kind}.{model}"
        for pct, median_max in (("25%", 0.05), ("50%", 0.03)):
            tt = ms["time_to_target"][pct]
            yield Check(f"{tag}.time_to_target_{pct}.median", tt["median"], high=median_max)
            yield Check(f"{tag}.time_to_target_{pct}.worst", tt["worst"], high=2.0 * median_max)
            line, fit = base["line_last_60s"][pct]["median"], base["offline_fit"][pct]["median"]
            ratio_line = tt["median"] / line if tt["median"] is not None and line else None
            ratio_fit = tt["median"] / fit if tt["median"] is not None and fit else None
            yield Check(f"{tag}.time_to_target_{pct}.median_over_line", num(ratio_line), high=0.5)
            yield Check(f"{tag}.time_to_target_{pct}.median_over_fit", num(ratio_fit), high=1.5)
        cover = ms["time_to_target_coverage_90"]["both"]
        yield Check(f"{tag}.time_to_target_coverage_90", cover, low=0.85, high=0.95)
        yield Check(
            f"{tag}.water_mass_at_50pct.worst", ms["water_mass_at_50pct"]["worst"], high=0.03
        )
        if "element_conductance_at_80pct" in ms:
            g = ms["element_conductance_at_80pct"]["worst"]
            yield Check(f"{tag}.element_conductance_at_80pct.worst", g, high=0.05)
        key = "ua_after_cooling" if kind == KETTLE else "standing_loss_after_4h_standby"
        yield Check(f"{tag}.{key}.worst", ms[key]["worst"], high=0.10)


def throughput_checks(result: dict[str, object]) -> Iterator[Check]:
    """Yield the speed targets."""
    rep = result["replay"]
    if rep["log_days"] >= 7.0:
        yield Check("throughput.replay_7_day_log_s", rep["seconds"], high=30.0)
    for model, rate in result["step_only"].items():
        yield Check(f"throughput.step_only.{model}_steps_per_s", rate["steps_per_s"], low=20_000.0)


# ---------------------------------------------------------------------------
# Throughput
# ---------------------------------------------------------------------------


def daily_draws(days: float) -> tuple[DrawOff, ...]:
    """Return a household's draw-offs: morning, evening and late, every day."""
    hours = ((7.0, 40.0), (19.0, 30.0), (21.5, 20.0))
    return tuple(
        DrawOff(start_s=(day * 24.0 + hour) * 3600.0, volume_l=litres)
        for day in range(math.ceil(days))
        for hour, litres in hours
        if (day * 24.0 + hour) * 3600.0 < days * 86400.0
    )


def write_heater_log(path: Path, days: float, seed: int) -> int:
    """Write a 1 Hz water-heater log of ``days`` (simulated in full); return its rows."""
    scenario = water_heater_scenario(
        duration_s=days * 86400.0, sample_interval_s=1.0, draws=daily_draws(days)
    )
    rig = SimulatedRig(scenario, seed)
    meta = {"ebullio_version": __version__, **scenario_metadata(scenario, seed)}
    per_day = round(86400.0 / scenario.sample_interval_s)

    def batches() -> Iterator[list]:
        for i, batch in enumerate(rig.run()):
            if i and i % per_day == 0:
                log(f"simulated day {i // per_day} of {days:g} of the throughput log")
            yield batch

    with open(path, "w", encoding="utf-8", newline="") as handle:
        return write_csv(
            handle, rows_from_samples(batches(), scenario.start_epoch_s), meta, SIM_CHANNELS
        )


def timed_replay(path: str) -> dict[str, float | int]:
    """Return seconds, steps and peak RSS of ``monitor.runs.replay.replay`` on one log.

    Meant to run in a fresh process, so the peak RSS is the replay's own (plus the
    interpreter and its imports, given separately as ``rss_before_replay_mib``).
    ``read_csv_alone_s`` times a second parse of the log on its own, afterwards.
    """
    before_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    started = time.perf_counter()
    result = replay([path])
    seconds = time.perf_counter() - started
    peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    started = time.perf_counter()
    read_csv(path)
    read_s = time.perf_counter() - started
    runs = result["runs"]
    return {
        "seconds": seconds,
        "read_csv_alone_s": read_s,
        "steps": sum(r["steps"] for r in runs),
        "runs": len(runs),
        "models": sorted({str(r["model"]) for r in runs}),
        "peak_rss_mib": peak_kib / 1024.0,
        "rss_before_replay_mib": before_kib / 1024.0,
    }


def replay_throughput(days: float, seed: int) -> dict[str, object]:
    """Return how fast ``replay`` reads and estimates a simulated 1 Hz heater log."""
    with tempfile.TemporaryDirectory(prefix="bench_estimator_") as tmp:
        path = Path(tmp) / "heater_1hz.csv"
        started = time.perf_counter()
        rows = write_heater_log(path, days, seed)
        sim_s = time.perf_counter() - started
        size_mib = path.stat().st_size / 2**20
        log(f"replaying {rows} rows ({size_mib:.0f} MiB) in a fresh process")
        with multiprocessing.get_context("spawn").Pool(1) as pool:
            rep = pool.apply(timed_replay, (str(path),))
    return {
        "log": "water_heater_scenario at 1 Hz with daily draw-offs, simulated in full (not tiled)",
        "log_days": days,
        "rows": rows,
        "csv_mib": num(size_mib),
        "simulate_and_write_s": num(sim_s),
        "seconds": num(rep["seconds"]),
        "steps": rep["steps"],
        "runs": rep["runs"],
        "models": rep["models"],
        "read_csv_alone_s": num(rep["read_csv_alone_s"]),
        "steps_per_s": num(rep["steps"] / rep["seconds"]),
        "peak_rss_mib": num(rep["peak_rss_mib"]),
        "rss_before_replay_mib": num(rep["rss_before_replay_mib"]),
    }


def step_rate(model: str, seed: int) -> dict[str, object]:
    """Return the best-of-3 rate of ``est.step`` alone on a 1-h kettle run (steps/s)."""
    scenario = kettle_scenario(duration_s=STEP_RATE_RUN_S)
    rig = SimulatedRig(scenario, seed)
    steps = [
        (rig.elapsed_s, _readings_for(model, {s.channel: s.value for s in b})) for b in rig.run()
    ]
    config = VesselConfig.from_metadata(
        scenario.vessel, scenario_metadata(scenario, seed), has_element_sensor=model == TWO_NODE
    )
    best_s = math.inf
    for _ in range(STEP_RATE_REPEATS):
        est = VesselEstimator(config)
        started = time.perf_counter()
        for t_s, readings in steps:
            est.step(t_s, readings)
        best_s = min(best_s, time.perf_counter() - started)
    return {"steps": len(steps), "seconds": num(best_s), "steps_per_s": num(len(steps) / best_s)}


# ---------------------------------------------------------------------------
# The benchmark
# ---------------------------------------------------------------------------


def accuracy_runs(seeds: int) -> list[TraceScore]:
    """Return the scores of one kettle and one heater per seed."""
    scores = []
    for seed in range(seeds):
        rng = np.random.default_rng(seed)
        for kind, scenario in ((KETTLE, draw_kettle(rng)), (HEATER, draw_heater(rng))):
            scores.append(score_trace(simulate(kind, scenario, seed)))
        log(f"seed {seed + 1} of {seeds} done")
    return scores


def scenario_ranges() -> dict[str, dict[str, object]]:
    """Return what each kind of run draws, for the record."""
    return {
        KETTLE: {
            "water_mass_kg": [1.0, 1.7],
            "scale_mm": [0.0, 0.4],
            "start_water_c": [8.0, 20.0],
            "altitude_m": [0.0, 1500.0],
            "duration_s": KETTLE_DURATION_S,
            "sample_interval_s": kettle_scenario().sample_interval_s,
        },
        HEATER: {
            "water_mass_kg": [50.0, 150.0],
            "nominal_volume_l": "full: mass over the density at the start temperature",
            "draws": "none",
            "target_c": HEATER_TARGET_C,
            "duration_s": HEATER_DURATION_S,
            "sample_interval_s": water_heater_scenario().sample_interval_s,
        },
    }


def run(options: Options) -> dict[str, object]:
    """Return the whole benchmark result (the printed JSON object)."""
    started = time.perf_counter()
    scores = accuracy_runs(options.seeds)
    result: dict[str, object] = {
        "benchmark": "bench_estimator",
        "ebullio_version": __version__,
        "python": platform.python_version(),
        "machine": platform.machine(),
        "seeds": options.seeds,
        "quick": options.quick,
        "scenarios": scenario_ranges(),
        "baselines": {
            "line_last_60s": "least-squares line through the last 60 s of water readings",
            "offline_fit": "scipy least_squares (soft-L1, 0.25 K) of the one-node model with "
            "the metadata's sensor lag, exact steps with the measured mean power, fitting ln UA, "
            "ln C and the initial water temperature on all readings so far; forecast with "
            "the mean power of the last 10 s",
        },
    }
    result |= {kind: kind_summary(kind, scores) for kind in MODELS}
    checks = [c for kind in MODELS for c in accuracy_checks(kind, result[kind])]
    if options.throughput:
        log("step-only rates on a 1-h kettle run")
        speed = {"step_only": {m: step_rate(m, 1) for m in (ONE_NODE, TWO_NODE)}}
        speed["replay"] = replay_throughput(options.log_days, 1)
        result["throughput"] = speed
        checks += list(throughput_checks(speed))
    rows = [c.as_dict() for c in checks]
    result["targets"] = {
        "runs": {f"{k}.{m}": sum(s.kind == k for s in scores) for k in MODELS for m in MODELS[k]},
        "met": sum(r["met"] for r in rows),
        "of": len(rows),
        "checks": rows,
    }
    result["wall_time_s"] = num(time.perf_counter() - started)
    return result


def parse_options(argv: Sequence[str] | None = None) -> Options:
    """Return the options from the command line."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=None, help="seeds to run (default 20)")
    parser.add_argument(
        "--quick", action="store_true", help="3 seeds and a 1-day throughput log (smoke run)"
    )
    parser.add_argument("--skip-throughput", action="store_true", help="accuracy only")
    args = parser.parse_args(argv)
    seeds = args.seeds if args.seeds is not None else (3 if args.quick else 20)
    if seeds < 1:
        parser.error("--seeds must be at least 1")
    return Options(
        seeds=seeds,
        quick=args.quick,
        throughput=not args.skip_throughput,
        log_days=1.0 if args.quick else 7.0,
    )


def main(argv: Sequence[str] | None = None) -> int:
    """Run the benchmark and print its JSON object; return the exit status."""
    print(json.dumps(run(parse_options(argv)), indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
