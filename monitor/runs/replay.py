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
from collections.abc import Callable
from typing import TextIO

from monitor import __version__
from monitor.estimation.contracts import Estimate, Level
from monitor.estimation.settings import EstimatorSettings, VesselConfig
from monitor.records.schema import ESTIMATE_CSV_COLUMNS, estimate_csv_row, flatten_estimate
from monitor.runs.drift import VERDICT_TEXT, verdict_of
from monitor.runs.run import NO_FIGURES, OpenRun, Run, has_element_sensor, split_runs

_log = logging.getLogger("ebullio.replay")


def replay_run(
    run: Run,
    settings: EstimatorSettings | None = None,
    on_estimate: Callable[[Run, Estimate], None] | None = None,
) -> dict[str, object]:
    """Return the summary of one run (the JSON contract) replayed through a fresh estimator.

    The run is stepped as the live service steps one (:class:`monitor.runs.run.OpenRun`),
    so the figures are the ones the live service gave, or would have given.
    """
    meta = run.log.metadata
    config = VesselConfig.from_metadata(
        run.vessel, meta, has_element_sensor(meta, run.log.channels, run.rows)
    )
    start_epoch = run.log.start_epoch_s or 0.0
    open_run = OpenRun(run.vessel, run.label, config, meta, start_epoch, settings=settings)
    for row in run.rows:
        e = open_run.step(row)
        if e is not None and on_estimate is not None:
            on_estimate(run, e)
    summary = open_run.summary(run.quarantined)
    summary["file"] = run.log.path
    if not run.log.start_epoch_s:  # a CSV log without a start time: no clock times
        summary |= {"start_t": None, "end_t": None, "start_utc": None}
    return summary


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
        return NO_FIGURES | {
            "vessel": run.vessel, "run": run.label, "file": run.log.path,
            "start_s": run.rows[0].time_s if run.rows else None,
            "end_s": run.rows[-1].time_s if run.rows else None,
            "steps": len(run.rows), "quarantined_rows": run.quarantined,
            "flags": [{"name": "replay_failed", "level": str(Level.WARNING),
                       "message": f"This run could not be replayed ({reason}); its readings "
                       "are in the log as recorded."}],
            "verdict": {"status": "doubtful", "reasons": [f"The replay failed: {reason}."]},
        }  # fmt: skip


def estimate_row(run: Run, e: Estimate) -> list[str]:
    """Return one ``--estimates`` CSV row (:data:`monitor.records.schema.ESTIMATE_CSV_COLUMNS`; time
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
    from monitor.runs.logs import (  # here: monitor.runs.logs builds on this module
        log_integrity,
        read_log,
    )

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
    from monitor.runs.drift import drift_over_runs  # here: monitor.runs.drift reads these summaries

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

    from monitor.runs.tables import text_table

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
            lines.append(f"  {q['file']} {q['where']}: {q['reason']}")
        if len(quarantined) > 20:  # type: ignore[arg-type]
            lines.append(f"  ... and {len(quarantined) - 20} more (see --json)")  # type: ignore[arg-type]
    return "\n".join(lines)
