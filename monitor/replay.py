"""Replay recorded logs through the estimator: runs, per-step estimates and run summaries.

A log is a CSV interchange file (docs/csv-format.md) or a recorder log
(docs/recorder.md). Each vessel's rows are split into runs:

* at every change of the ``run`` column, when there is one;
* otherwise at a cold start: a gap of more than :data:`RUN_GAP_S` between rows, or
  two readings in a row more than :data:`REFILL_DROP_K` below the median of the
  last :data:`REFILL_WINDOW_S` (the vessel was emptied and refilled; one spike
  or the slow cooling of a draw-off does not split a run);
* and at every new file (several files are runs in order, per vessel).

Each run gets a fresh filter, so its figures stand on that run alone.

Which instant each run value is taken at
    ``water_mass_kg`` and ``heat_capacity_j_per_k``: the end of the first heat-up
    (the water reaching the target), where C is best known and nothing has boiled
    away yet; at the end of the run if it never got there.
    ``element_conductance_w_per_k``: when the first heat-up passed 80 % of its
    rise, before boiling at the element changes the film; else as for the mass.
    ``ua_w_per_k`` and the standing loss: the end of the run (cooling and standby
    carry most of the information on losses).
    ``efficiency``: heat taken up by water and vessel over the heat-up (C times
    the rise of the filtered water temperature) over the electrical energy in it.
    ``energy_wh``: the whole run. ``heat_up_s``: first heating to reaching the target.

Rows that cannot be used are never dropped silently: each is reported with its
file, line and reason under ``quarantined``, and counted per run.
"""

from __future__ import annotations

import csv
import logging
import math
from collections.abc import Callable
from typing import TextIO

from monitor import __version__
from monitor.contracts import Estimate, Level, finite_or_none
from monitor.drift import VERDICT_TEXT, run_verdict, verdict_of
from monitor.estimator import EstimatorSettings, VesselConfig, VesselEstimator
from monitor.interchange import LogRow, iso_utc
from monitor.runs import Run, estimator_figures, split_runs  # the one run model
from monitor.schema import ESTIMATE_CSV_COLUMNS, estimate_csv_row, flatten_estimate

_log = logging.getLogger("ebullio.replay")


def _mean_sd(values: list[float]) -> dict[str, float] | None:
    """Return {"value": mean, "std": standard error} of ``values``, or None for none.

    Readings one second apart are correlated, so the standard error is computed as if
    only one in ten were independent: an honest, if rough, allowance.
    """
    if not values:
        return None
    mean = math.fsum(values) / len(values)
    if len(values) < 2:
        return {"value": mean, "std": 0.0}
    var = math.fsum((v - mean) ** 2 for v in values) / (len(values) - 1)
    return {"value": mean, "std": math.sqrt(var / max(1.0, len(values) / 10.0))}


#: How long (s) the element must have been off before element and water should agree.
REST_AFTER_S = 300.0


def _rest_disagreement(rows: list[LogRow], on_w: float) -> dict[str, float] | None:
    """Return the median element minus water reading (K) at rest, with its spread, or None.

    At rest (no power for :data:`REST_AFTER_S`) the element sits in still water, and
    both thermocouples should read the same to well under a kelvin; a steady
    difference is a sensor or cold-junction fault, not physics.
    """
    diffs: list[float] = []
    off_since: float | None = None
    for row in rows:
        p = row.values.get("power")
        if p is not None and math.isfinite(p) and p >= on_w * 0.1:
            off_since = None
            continue
        if off_since is None:
            off_since = row.time_s
        e, w = row.values.get("element"), row.values.get("water")
        if row.time_s - off_since < REST_AFTER_S or e is None or w is None:
            continue
        if math.isfinite(e) and math.isfinite(w):
            diffs.append(e - w)
    if len(diffs) < 30:
        return None
    diffs.sort()
    median = diffs[len(diffs) // 2]
    spread = diffs[(3 * len(diffs)) // 4] - diffs[len(diffs) // 4]
    return {"value": median, "std": spread / 1.349, "n": float(len(diffs))}


def electrical_figures(run: Run) -> dict[str, object]:
    """Return the run's electrical figures from the rows where the element was on.

    ``heating_power_w``: mean power (W) while on (above half the rating, or 100 W
    without one). Where voltage is logged, ``element_resistance_ohm`` = V²/P (Ω),
    and, with ``rated_voltage_v`` in the metadata, ``heating_power_at_rated_voltage_w``
    = P·(V_rated/V)²: the power the element would give at its rated voltage, which
    mains wander does not move (a resistive element; common practice, no source).
    Each is {"value", "std"} or None.
    """
    meta = run.log.metadata

    def number(key: str) -> float | None:
        value = meta.get(key)
        return float(value) if isinstance(value, int | float) and value > 0 else None

    rated_w, rated_v = number("rated_power_w"), number("rated_voltage_v")
    on_w = 0.5 * rated_w if rated_w else 100.0
    powers, ohms, at_rated = [], [], []
    for row in run.rows:
        p = row.values.get("power")
        if p is None or not math.isfinite(p) or p < on_w:
            continue
        powers.append(p)
        v = row.values.get("voltage")
        if v is not None and math.isfinite(v) and v > 0.0:
            ohms.append(v * v / p)
            if rated_v:
                at_rated.append(p * (rated_v / v) ** 2)
    return {
        "rest_element_minus_water_k": _rest_disagreement(run.rows, on_w),
        "heating_power_w": _mean_sd(powers),
        "element_resistance_ohm": _mean_sd(ohms),
        "heating_power_at_rated_voltage_w": _mean_sd(at_rated),
    }


def replay_run(
    run: Run,
    settings: EstimatorSettings | None = None,
    on_estimate: Callable[[Run, Estimate], None] | None = None,
) -> dict[str, object]:
    """Return the summary of one run (the JSON contract) replayed through a fresh estimator."""
    declared = run.log.metadata.get("element_sensor")
    if declared in ("yes", "no"):  # a live log says what the live filter was built with
        has_element = declared == "yes"
    else:
        has_element = "element" in run.log.channels and any("element" in r.values for r in run.rows)
    config = VesselConfig.from_metadata(run.vessel, run.log.metadata, has_element)
    est = VesselEstimator(config, settings)
    last: Estimate | None = None
    at_heat_up: Estimate | None = None
    start_c: float | None = None
    for row in run.rows:
        e = est.step(row.time_s, row.values)
        if e is None:
            continue
        last = e
        if at_heat_up is None and est.totals.heat_up_done_s is not None:
            at_heat_up = e
        if start_c is None and est.totals.heat_up_start_c is not None:
            start_c = est.totals.heat_up_start_c
        if on_estimate is not None:
            on_estimate(run, e)
    return _summary(run, est, last, at_heat_up, start_c)


#: A summary's figures when there are none (nothing estimated, or the replay failed).
_NO_FIGURES: dict[str, object] = {
    "water_mass_kg": None, "heat_capacity_j_per_k": None, "ua_w_per_k": None,
    "element_conductance_w_per_k": None, "standing_loss_kwh_per_24h": None,
    "standing_loss_at_c": None, "heat_up_s": None, "energy_wh": None, "efficiency": None,
}  # fmt: skip


def _replay_isolated(
    run: Run,
    settings: EstimatorSettings | None,
    on_estimate: Callable[[Run, Estimate], None] | None,
) -> dict[str, object]:
    """Return :func:`replay_run`'s summary, or, when replaying this run fails outside
    the filter (which guards itself), a summary that says so: one bad run does not
    end the replay of the others. The traceback goes to the log once per run."""
    try:
        return replay_run(run, settings, on_estimate=on_estimate)
    except Exception as exc:  # one run's failure must not end the others' replay
        _log.exception("replay of vessel %s run %s failed", run.vessel, run.label)
        reason = f"{type(exc).__name__}: {exc}"
        return _NO_FIGURES | {
            "vessel": run.vessel, "run": run.label, "file": run.log.path,
            "start_s": run.rows[0].time_s if run.rows else None,
            "end_s": run.rows[-1].time_s if run.rows else None,
            "steps": len(run.rows), "quarantined_rows": run.quarantined,
            "flags": [{"name": "replay_failed", "level": str(Level.WARNING),
                       "message": f"This run could not be replayed ({reason}); its readings "
                       "are in the log as recorded."}],
            "verdict": {"status": "doubtful", "reasons": [f"The replay failed: {reason}."]},
        }  # fmt: skip


def _summary(
    run: Run,
    est: VesselEstimator,
    last: Estimate | None,
    at_heat_up: Estimate | None,
    start_c: float | None,
) -> dict[str, object]:
    tot, cfg = est.totals, est.config
    base = {
        "vessel": run.vessel,
        "run": run.label,
        "start_s": run.rows[0].time_s if run.rows else None,
        "end_s": run.rows[-1].time_s if run.rows else None,
        "file": run.log.path,
        "steps": len(run.rows),
        "quarantined_rows": run.quarantined,
        "rejected_readings": tot.rejected_readings,
        "boiling_point_c": est.boiling_point_c,
        "target_c": est.target_c,
        "pressure_kpa": cfg.pressure_kpa,
        "model": "two-node" if cfg.has_element_sensor else "one-node",
        "water_sensor_tau_s": cfg.water_sensor_tau_s,
    }
    if last is None:
        return base | _NO_FIGURES | {
            "energy_wh": tot.energy_j / 3600.0,
            "flags": [{"name": "no_water_reading", "level": str(Level.WARNING),
                       "message": "The run has no usable water temperature, so nothing "
                       "could be estimated."}],
            "verdict": run_verdict({}),
        }  # fmt: skip
    ambient = [r.values["ambient"] for r in run.rows if "ambient" in r.values]
    ambient = [a for a in ambient if math.isfinite(a)]
    start_epoch = run.log.start_epoch_s
    figures = estimator_figures(est, last, at_heat_up, start_c)
    if run.quarantined:
        figures["flags"].append({"name": "quarantined_rows", "level": str(Level.NOTICE),  # type: ignore[attr-defined]
                                 "message": f"{run.quarantined} rows of this run could not be "
                                 "used and were set aside (see 'quarantined')."})  # fmt: skip
    return (
        base
        | electrical_figures(run)
        | {
            "start_utc": iso_utc(start_epoch + run.rows[0].time_s) if start_epoch else None,
            "start_water_c": finite_or_none(start_c),
            "ambient_c": math.fsum(ambient) / len(ambient) if ambient else None,
        }
        | figures
    )


def estimate_row(run: Run, e: Estimate) -> list[str]:
    """Return one ``--estimates`` CSV row (:data:`monitor.schema.ESTIMATE_CSV_COLUMNS`; time
    in s from the log's start)."""
    return estimate_csv_row(flatten_estimate(e, vessel=run.vessel, run=run.label, t=e.t_s))


def replay(
    paths: list[str],
    settings: EstimatorSettings | None = None,
    estimates_out: TextIO | None = None,
    progress: TextIO | None = None,
) -> dict[str, object]:
    """Return the replay result of the logs at ``paths`` (the ``--json`` contract).

    Writes per-step estimates to ``estimates_out`` when given, and progress lines to
    ``progress`` for long logs.
    """
    from monitor.logs import log_integrity, read_log  # here: monitor.logs builds on this module

    logs = [log for p in paths for log in read_log(p)]
    runs, quarantined = split_runs(logs)
    total = sum(len(r.rows) for r in runs)
    writer = None
    if estimates_out is not None:
        writer = csv.writer(estimates_out, lineterminator="\n")
        writer.writerow(ESTIMATE_CSV_COLUMNS)
    done = 0
    next_report = total // 10 if total >= 50_000 else None

    def on_estimate(run: Run, e: Estimate) -> None:
        nonlocal done, next_report
        done += 1
        if writer is not None:
            writer.writerow(estimate_row(run, e))
        if progress is not None and next_report is not None and done >= next_report:
            print(f"replay: {100 * done // total:3d} % ({done} of {total} steps)",
                  file=progress, flush=True)  # fmt: skip
            next_report += total // 10

    results = [_replay_isolated(run, settings, on_estimate) for run in runs]
    from monitor.drift import drift_over_runs  # here: monitor.drift reads these summaries

    metadata = {run.vessel: run.log.metadata for run in runs}
    for result, flags in zip(results, drift_over_runs(results, metadata), strict=True):
        result["drift"] = [f.as_dict() for f in flags]
    return {
        "version": __version__,
        "files": list(paths),
        "integrity": [log_integrity(p) for p in paths],
        "runs": results,
        "quarantined": [q.as_dict() for q in quarantined],
    }


def summary_table(result: dict[str, object]) -> str:
    """Return a readable table of the runs in a replay result."""

    def fmt(entry: object, digits: int) -> str:
        if isinstance(entry, dict):
            return f"{entry['value']:.{digits}f} ± {entry['std']:.{digits}f}"
        if isinstance(entry, float):
            return f"{entry:.{digits}f}"
        return "-" if entry is None else str(entry)

    from monitor.tables import text_table

    headers = ["vessel", "run", "heat-up s", "energy Wh", "water kg", "UA W/K", "G W/K",
               "loss kWh/24h", "eff.", "verdict", "flags"]  # fmt: skip
    cells, reasons = [], []
    for run in result["runs"]:  # type: ignore[union-attr]
        flags = [f"{f['name']}({f['level']})" for f in run["flags"]]
        # the drift flags against the vessel's earlier runs, as the fleet shows them
        flags += [f"drift {f['name']}({f['level']})" for f in run.get("drift") or []]
        verdict = verdict_of(run)
        cells.append([
            str(run["vessel"]), str(run["run"]), fmt(run["heat_up_s"], 0),
            fmt(run["energy_wh"], 1), fmt(run["water_mass_kg"], 3), fmt(run["ua_w_per_k"], 3),
            fmt(run["element_conductance_w_per_k"], 1), fmt(run["standing_loss_kwh_per_24h"], 2),
            fmt(run["efficiency"], 3), VERDICT_TEXT[str(verdict["status"])],
            ", ".join(flags) or "-",
        ])  # fmt: skip
        reasons.append(list(verdict["reasons"]))  # type: ignore[call-overload]
    table = text_table(headers, cells, right=" >>>>>>>>")
    lines = table[:2]
    for line, why in zip(table[2:], reasons, strict=True):
        lines.append(line)
        lines += [f"    why not judged: {reason}" for reason in why]
    quarantined = result["quarantined"]
    if quarantined:
        lines.append(f"{len(quarantined)} rows set aside:")  # type: ignore[arg-type]
        for q in quarantined[:20]:  # type: ignore[index]
            lines.append(f"  {q['file']} line {q['line']}: {q['reason']}")
        if len(quarantined) > 20:  # type: ignore[arg-type]
            lines.append(f"  ... and {len(quarantined) - 20} more (see --json)")  # type: ignore[arg-type]
    return "\n".join(lines)
