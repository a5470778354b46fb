"""Drift of a vessel's figures across runs: baselines, sequential detection, and flags.

Pure functions and small classes; nothing here reads a log or the clock. The input
is the sequence of a vessel's run summaries (the ``ebullio replay --json`` run
objects, oldest first); the output is, after each run, the drift flags it raises.

Baseline
    A tracked figure's baseline is the mean of its first :data:`BASELINE_RUNS`
    accepted runs (runs where the figure has a value), or of runs a user marked as
    the commissioning baseline. Its spread is the larger of the sample standard
    deviation of those runs and a floor (``DriftRule.min_relative_sd`` times the
    mean): five runs estimate a spread poorly, and a spread of zero would make any
    run look like a fault.

Sequential detection: a one-sided tabular CUSUM (Page 1954) per rule
    Each run after the baseline gives a relative deviation ``d`` in the bad direction
    (for the element conductance G: ``d = 1 - G/G0``, the scaling index) and its
    standard deviation ``σ_d``, from the run's own uncertainty and the baseline's
    spread. The CUSUM runs on ``z = (d - tolerance) / σ_d``::

        S_n = max(0, S_{n-1} + z_n - k)

    with reference value ``k`` = 0.5 and decision interval ``h`` = 5 (in σ units).
    While the figure sits exactly at the tolerance, z has mean 0, and this one-sided
    scheme's in-control average run length is about 938 runs (REFERENCE.md §7.3,
    Siegmund's approximation for k = 0.5, h = 5). A clean vessel sits well inside
    the tolerance, where z is strongly negative and false alarms are far rarer.
    A sustained shift of 1 σ past the tolerance is caught in about 10 runs, and a
    large one in one or two. One noisy run adds at most ``z - k`` and decays after.

Levels
    ``notice`` when S passes h/2, ``warning`` when it passes h, ``alarm`` when it
    passes h and the latest deviation is past ``DriftRule.alarm_at`` (a practical
    size: a quarter of G gone, say). Each flag carries its numbers (the deviation,
    its σ, S, the baseline and the number of runs behind it) and one sentence.

Rules: ``scaling`` (G falling), ``insulation`` (UA rising), ``element`` (the power
delivered at the rated voltage falling). :func:`run_checks` adds the checks that
look at one run on its own: ``fill`` (water mass against the configured fill) and
``sensor`` (thermocouples that disagree at rest). ``dry_boil`` comes from the
estimator's own flags.
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

from monitor.contracts import Level

#: How many accepted runs make a baseline by default.
BASELINE_RUNS = 5
#: Scale thermal conductivity range, W/(m·K): REFERENCE.md §5.1 (plausible 0.5-2.9).
SCALE_CONDUCTIVITY_W_PER_M_K = (0.5, 2.9)
#: CUSUM reference value and decision interval, in standard deviations (module docstring).
CUSUM_K = 0.5
CUSUM_H = 5.0


@dataclass(frozen=True)
class DriftRule:
    """One tracked figure: which summary key, which way is bad, and the sizes that matter.

    ``direction`` is -1 when a fall is the fault (G) and +1 when a rise is (UA);
    ``tolerance`` and ``alarm_at`` are relative deviations in that direction;
    ``min_relative_sd`` floors the baseline spread as a fraction of its mean.
    """

    name: str
    key: str
    direction: int
    tolerance: float
    alarm_at: float
    min_relative_sd: float
    what: str


RULES: tuple[DriftRule, ...] = (
    DriftRule("scaling", "element_conductance_w_per_k", -1, 0.10, 0.40, 0.03,
              "element-to-water conductance"),
    DriftRule("insulation", "ua_w_per_k", +1, 0.15, 0.50, 0.05, "heat-loss coefficient UA"),
    DriftRule("element", "heating_power_at_rated_voltage_w", -1, 0.05, 0.20, 0.01,
              "power delivered at the rated voltage"),
)  # fmt: skip


@dataclass(frozen=True)
class Baseline:
    """A figure's baseline: mean, spread (same unit), and how many runs it rests on."""

    mean: float
    sd: float
    runs: int
    labels: tuple[str, ...] = ()


def figure(run: Mapping[str, object], key: str) -> tuple[float, float] | None:
    """Return (value, std) of a run summary's figure, or None when the run has none."""
    entry = run.get(key)
    if not isinstance(entry, Mapping):
        return None
    value, std = entry.get("value"), entry.get("std")
    if not isinstance(value, int | float) or not math.isfinite(value):
        return None
    std_f = float(std) if isinstance(std, int | float) and math.isfinite(std) else 0.0
    return float(value), abs(std_f)


def make_baseline(
    values: Sequence[tuple[float, float]], rule: DriftRule, labels: Sequence[str] = ()
) -> Baseline:
    """Return the baseline of ``values`` ((value, std) per run) under ``rule``.

    Raises ValueError for no values or a mean that is not positive.
    """
    if not values:
        raise ValueError(f"{rule.name}: a baseline needs at least one run")
    mean = statistics.fmean(v for v, _ in values)
    if not mean > 0.0:
        raise ValueError(f"{rule.name}: baseline mean {mean} is not positive")
    scatter = statistics.stdev([v for v, _ in values]) if len(values) > 1 else 0.0
    return Baseline(mean, max(scatter, rule.min_relative_sd * mean), len(values), tuple(labels))


@dataclass
class Cusum:
    """One-sided tabular CUSUM on standardised deviations (module docstring)."""

    k: float = CUSUM_K
    h: float = CUSUM_H
    s: float = 0.0
    runs: int = 0

    def update(self, z: float) -> float:
        """Return the statistic after one standardised deviation ``z``."""
        self.s = max(0.0, self.s + z - self.k)
        self.runs += 1
        return self.s


@dataclass(frozen=True)
class DriftFlag:
    """A drift flag: name, level, the numbers behind it, and a sentence for the operator."""

    name: str
    level: Level
    message: str
    evidence: dict[str, float | int | str | None]

    def as_dict(self) -> dict[str, object]:
        """Return the flag as a JSON-ready dict."""
        return {"name": self.name, "level": str(self.level), "message": self.message,
                "evidence": dict(self.evidence)}  # fmt: skip


@dataclass
class RuleTracker:
    """A rule's state for one vessel: the baseline once there is one, and its CUSUM."""

    rule: DriftRule
    baseline_runs: int = BASELINE_RUNS
    pending: list[tuple[float, float]] = field(default_factory=list)
    pending_labels: list[str] = field(default_factory=list)
    baseline: Baseline | None = None
    cusum: Cusum = field(default_factory=Cusum)

    def rebase(self, values: Sequence[tuple[float, float]], labels: Sequence[str] = ()) -> None:
        """Replace the baseline (after descaling or repair); the CUSUM starts again."""
        self.baseline = make_baseline(values, self.rule, labels)
        self.cusum = Cusum()

    def observe(self, value: float, std: float, label: str) -> DriftFlag | None:
        """Return the flag after one run's figure, or None while in control or baselining."""
        if self.baseline is None:
            self.pending.append((value, std))
            self.pending_labels.append(label)
            if len(self.pending) >= self.baseline_runs:
                self.rebase(self.pending, self.pending_labels)
            return None
        b, rule = self.baseline, self.rule
        deviation = rule.direction * (value - b.mean) / b.mean
        sd = math.hypot(std, b.sd) / b.mean
        s = self.cusum.update((deviation - rule.tolerance) / sd)
        if s <= self.cusum.h / 2.0:
            return None
        if s > self.cusum.h and deviation >= rule.alarm_at:
            level = Level.ALARM
        elif s > self.cusum.h:
            level = Level.WARNING
        else:
            level = Level.NOTICE
        evidence: dict[str, float | int | str | None] = {
            "value": value, "std": std, "baseline": b.mean, "baseline_sd": b.sd,
            "baseline_runs": b.runs, "deviation": deviation, "deviation_sd": sd,
            "tolerance": rule.tolerance, "cusum": s, "cusum_h": self.cusum.h,
        }  # fmt: skip
        return DriftFlag(rule.name, level, _message(rule, level, deviation), evidence)


def _message(rule: DriftRule, level: Level, deviation: float) -> str:
    """Return the operator's sentence for a drift flag."""
    pct = 100.0 * deviation
    way = "down" if rule.direction < 0 else "up"
    text = f"The {rule.what} is {pct:.0f} % {way} on this vessel's baseline"
    if level == Level.NOTICE:
        return text + ", and the trend is building; keep an eye on it."
    advice = {
        "scaling": " Limescale is the likely cause: plan a descale (isolate the supply, let "
        "the vessel cool, and follow the maker's instructions).",
        "insulation": " Check that the lid or door is shut and the seal and insulation are sound.",
        "element": " The element may be failing: have a qualified person check it with the "
        "supply isolated.",
    }[rule.name]
    return text + "." + advice


def scale_thickness_range_mm(
    conductance_w_per_k: float, baseline_w_per_k: float, element_area_m2: float
) -> tuple[float, float] | None:
    """Return the (low, high) equivalent scale thickness in mm, or None when G has not fallen.

    A layer of thickness δ and conductivity k adds a series resistance δ/(k·A):
    1/G - 1/G0 = δ/(k·A), so δ = k·A·(1/G - 1/G0), over the plausible k range
    :data:`SCALE_CONDUCTIVITY_W_PER_M_K` (REFERENCE.md §5.1-5.2). Raises ValueError
    for a non-positive conductance or area.
    """
    if conductance_w_per_k <= 0.0 or baseline_w_per_k <= 0.0 or element_area_m2 <= 0.0:
        raise ValueError("conductances and the element area must be positive")
    extra_k_per_w = 1.0 / conductance_w_per_k - 1.0 / baseline_w_per_k
    if extra_k_per_w <= 0.0:
        return None
    lo_k, hi_k = SCALE_CONDUCTIVITY_W_PER_M_K
    return (1000.0 * lo_k * element_area_m2 * extra_k_per_w,
            1000.0 * hi_k * element_area_m2 * extra_k_per_w)  # fmt: skip


def extra_over_temperature_k(
    power_w: float, conductance_w_per_k: float, baseline_w_per_k: float
) -> float:
    """Return how much hotter (K) the element runs at ``power_w``: P/G - P/G0."""
    return power_w / conductance_w_per_k - power_w / baseline_w_per_k


@dataclass
class VesselDrift:
    """A vessel's drift trackers: feed its run summaries in order, get the flags of each."""

    vessel: str
    metadata: Mapping[str, object] = field(default_factory=dict)
    baseline_runs: int = BASELINE_RUNS
    trackers: dict[str, RuleTracker] = field(default_factory=dict)
    rebased_at: str | None = None

    def __post_init__(self) -> None:
        for rule in RULES:
            self.trackers.setdefault(rule.name, RuleTracker(rule, self.baseline_runs))

    def _labels(self, key: str) -> list[str]:
        text = self.metadata.get(key)
        if text is None:
            return []
        return [part.strip() for part in str(text).split(",") if part.strip()]

    def observe(self, run: Mapping[str, object]) -> list[DriftFlag]:
        """Return the drift flags after one run summary (oldest first).

        The vessel's metadata may say which runs make the baseline
        (``baseline_runs``: run labels, comma-separated, e.g. a commissioning series)
        and where a new baseline starts after descaling or repair
        (``rebaseline_from_run``: the first run label of the new one). Earlier flags
        stay in the history; the trackers start again from that run.
        """
        flags = []
        label = str(run.get("run", ""))
        # a marked baseline holds until a rebaseline; after one, the next runs make it
        chosen = self._labels("baseline_runs") if self.rebased_at is None else []
        if label in self._labels("rebaseline_from_run"):
            for name, tracker in self.trackers.items():
                self.trackers[name] = RuleTracker(tracker.rule, self.baseline_runs)
            self.rebased_at = label
            chosen = []
        for tracker in self.trackers.values():
            got = figure(run, tracker.rule.key)
            if got is None:
                continue
            if chosen and tracker.baseline is None:
                if label in chosen:
                    tracker.pending.append(got)
                    tracker.pending_labels.append(label)
                    if len(tracker.pending) == len(chosen):
                        tracker.rebase(tracker.pending, tracker.pending_labels)
                continue
            if tracker.rule.name == "scaling" and run.get("model") == "one-node":
                continue  # G is poorly observed without an element thermocouple
            flag = tracker.observe(got[0], got[1], label)
            if flag is not None:
                if flag.name == "scaling":
                    flag = self._with_scale_figures(flag)
                flags.append(flag)
        return flags

    def _with_scale_figures(self, flag: DriftFlag) -> DriftFlag:
        """Add the scaling index, extra over-temperature and scale thickness range."""
        ev = dict(flag.evidence)
        g, g0 = float(ev["value"]), float(ev["baseline"])  # type: ignore[arg-type]
        ev["scaling_index"] = 1.0 - g / g0
        power = self.metadata.get("rated_power_w")
        if isinstance(power, int | float) and g > 0.0:
            ev["extra_over_temperature_k"] = extra_over_temperature_k(float(power), g, g0)
        area = self.metadata.get("element_area_m2")
        message = flag.message
        if isinstance(area, int | float) and area > 0.0 and g > 0.0:
            span = scale_thickness_range_mm(g, g0, float(area))
            if span is not None:
                ev["scale_mm_low"], ev["scale_mm_high"] = span
                message += (f" That is as much as {span[0]:.2f}-{span[1]:.2f} mm of scale "
                            "(the range spans scale's thermal conductivity).")  # fmt: skip
        return DriftFlag(flag.name, flag.level, message, ev)


def drift_over_runs(
    runs: Iterable[Mapping[str, object]],
    metadata: Mapping[str, Mapping[str, object]] | None = None,
    baseline_runs: int = BASELINE_RUNS,
) -> list[list[DriftFlag]]:
    """Return, for each run summary in order, the drift flags it raised on its vessel."""
    vessels: dict[str, VesselDrift] = {}
    out = []
    for run in runs:
        vessel = str(run.get("vessel", ""))
        if vessel not in vessels:
            meta = (metadata or {}).get(vessel, {})
            vessels[vessel] = VesselDrift(vessel, meta, baseline_runs)
        drift = vessels[vessel]
        out.append(drift.observe(run) + run_checks(run, drift.metadata))
    return out


#: Element and water readings at rest may differ by this much (K) before ``sensor`` is
#: raised: two type K class 1 thermocouples may each be 1.5 K out (REFERENCE.md §8),
#: but a pair in one vessel usually agrees far better; past 1.5 K one of them is suspect.
SENSOR_DISAGREEMENT_K = 1.5
#: Default fill tolerance as a fraction of the configured fill.
FILL_TOLERANCE_FRACTION = 0.05


def run_checks(run: Mapping[str, object], metadata: Mapping[str, object]) -> list[DriftFlag]:
    """Return the flags one run raises on its own: ``fill`` and ``sensor``.

    ``fill``: the water mass (at the end of the first heat-up) outside ``fill_kg`` ±
    ``fill_tolerance_kg`` from the vessel's configuration (default 5 % of the fill),
    beyond its own 2σ. ``sensor``: element and water thermocouples disagreeing by more
    than :data:`SENSOR_DISAGREEMENT_K` at rest (``rest_element_minus_water_k``).
    """
    flags: list[DriftFlag] = []
    fill = metadata.get("fill_kg")
    mass = figure(run, "water_mass_kg")
    if isinstance(fill, int | float) and fill > 0 and mass is not None:
        tol = metadata.get("fill_tolerance_kg")
        tol_kg = float(tol) if isinstance(tol, int | float) else FILL_TOLERANCE_FRACTION * fill
        off = mass[0] - float(fill)
        if abs(off) > tol_kg + 2.0 * mass[1]:
            level = Level.ALARM if off < 0 and abs(off) > 3.0 * tol_kg else Level.WARNING
            way = "less" if off < 0 else "more"
            caution = (
                " An underfilled vessel can leave the element dry: do not run it until it is "
                "filled."
                if off < 0
                else ""
            )
            flags.append(DriftFlag(
                "fill", level,
                f"The vessel holds {mass[0]:.2f} kg of water, {abs(off):.2f} kg {way} than its "
                f"{fill:.2f} kg fill (tolerance {tol_kg:.2f} kg).{caution}",
                {"water_mass_kg": mass[0], "water_mass_std": mass[1], "fill_kg": float(fill),
                 "fill_tolerance_kg": tol_kg, "difference_kg": off},
            ))  # fmt: skip
    rest = figure(run, "rest_element_minus_water_k")
    if rest is not None and abs(rest[0]) > SENSOR_DISAGREEMENT_K:
        flags.append(DriftFlag(
            "sensor", Level.WARNING,
            f"At rest the element thermocouple reads {rest[0]:+.1f} K against the water "
            "thermocouple, where both should agree: check both sensors, their wiring and "
            "the cold junction.",
            {"element_minus_water_k": rest[0], "spread_k": rest[1],
             "limit_k": SENSOR_DISAGREEMENT_K},
        ))  # fmt: skip
    return flags


_LEVEL_RANK = {None: 0, "notice": 1, "warning": 2, "alarm": 3}


def fleet_rows(result: Mapping[str, object]) -> list[dict[str, object]]:
    """Return one row per vessel from a replay result, worst first.

    Each row: vessel, status (the worst level among its last run's flags and drift
    flags, or ``ok``), the names of those flags, the latest scaling index (1 - G/G0)
    where there is a baseline, the last run's label and start, the runs so far and
    the runs since the baseline was complete.
    """
    by_vessel: dict[str, list[Mapping[str, object]]] = {}
    for run in result.get("runs", []):  # type: ignore[union-attr]
        by_vessel.setdefault(str(run["vessel"]), []).append(run)
    rows = []
    for vessel, runs in by_vessel.items():
        last = runs[-1]
        flags = [*last.get("flags", []), *last.get("drift", [])]  # type: ignore[misc]
        worst = max((f.get("level") for f in flags), key=lambda lv: _LEVEL_RANK.get(lv, 0),
                    default=None)  # fmt: skip
        scaling = None
        for run in runs:
            for f in run.get("drift", []):  # type: ignore[union-attr]
                if f["name"] == "scaling":
                    scaling = f["evidence"].get("scaling_index")
        rows.append({
            "vessel": vessel,
            "status": worst or "ok",
            "flags": sorted({str(f["name"]) for f in flags}),
            "scaling_index": scaling,
            "last_run": last.get("run"),
            "last_start_utc": last.get("start_utc"),
            "runs": len(runs),
            "runs_since_baseline": max(0, len(runs) - BASELINE_RUNS),
            "note": "no element thermocouple: scaling is not judged"
            if last.get("model") == "one-node"
            else "",
        })  # fmt: skip
    rows.sort(key=lambda r: (-_LEVEL_RANK.get(r["status"], 0), str(r["vessel"])))  # type: ignore[arg-type]
    return rows


def fleet_table(rows: Sequence[Mapping[str, object]]) -> str:
    """Return the fleet rows as a plain text table."""
    header = f"{'vessel':<14} {'status':<8} {'scaling':>8} {'runs':>5} {'since base':>10}  " \
             f"{'last run':<26} flags"  # fmt: skip
    lines = [header, "-" * len(header)]
    for r in rows:
        index = r["scaling_index"]
        scaling = f"{index:8.2f}" if isinstance(index, float) else f"{'-':>8}"
        last = f"{r['last_run']} {r['last_start_utc'] or ''}".strip()
        lines.append(
            f"{r['vessel']!s:<14} {r['status']!s:<8} {scaling} {r['runs']:>5} "
            f"{r['runs_since_baseline']:>10}  {last:<26} {', '.join(r['flags']) or '-'}"  # type: ignore[arg-type]
            + (f"  ({r['note']})" if r.get("note") else "")
        )
    return "\n".join(lines)


def baselines_of(
    runs: Sequence[Mapping[str, object]], baseline_runs: int = BASELINE_RUNS
) -> dict[str, dict[str, float]]:
    """Return each rule's default baseline (mean, sd, runs) from a vessel's first runs."""
    out: dict[str, dict[str, float]] = {}
    for rule in RULES:
        values = [got for r in runs if (got := figure(r, rule.key)) is not None][:baseline_runs]
        if values:
            b = make_baseline(values, rule)
            out[rule.key] = {"mean": b.mean, "sd": b.sd, "runs": float(b.runs)}
    return out
