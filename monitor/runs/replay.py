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
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import TextIO

from monitor import __version__
from monitor.estimation.contracts import Estimate, Level
from monitor.estimation.settings import EstimatorSettings, VesselConfig
from monitor.records.interchange import InterchangeLog, LogRow
from monitor.records.schema import ESTIMATE_CSV_COLUMNS, estimate_csv_row, flatten_estimate
from monitor.runs.drift import VERDICT_TEXT, verdict_of
from monitor.runs.logs import log_integrity
from monitor.runs.run import (
    NO_FIGURES,
    OpenRun,
    Run,
    RunEvent,
    RunFeed,
    has_element_sensor,
)
from monitor.runs.streams import vessel_stream

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


#: Rows a run's replay may hold before its filter is built, waiting to see whether the
#: log has element readings (a log that says ``element_sensor`` is not held): an hour
#: at 1 Hz. A run whose first element reading comes later is replayed one-node, where
#: a replay of the whole run read at once would have made it two-node.
ELEMENT_WAIT_ROWS = 3600


class _VesselReplay:
    """One vessel's rows replayed run by run as they are read: the split of
    :class:`monitor.runs.run.RunFeed` (as live and :func:`monitor.runs.run.split_runs`)
    and the filter of :func:`replay_run`, holding no more than a few rows."""

    def __init__(
        self,
        vessel: str,
        settings: EstimatorSettings | None,
        on_estimate: Callable[[OpenRun, Estimate], None],
        finished: Callable[[tuple[int, int], dict[str, object]], None],
        order: Callable[[], tuple[int, int]],
        wanted: Callable[[int], bool] | None = None,
        on_row: Callable[[LogRow], None] | None = None,
    ) -> None:
        self.vessel = vessel
        self.settings = settings
        self.on_estimate = on_estimate
        self.finished = finished  # (start order, summary) as each run ends
        self.order = order
        # which runs to replay, by their number among this vessel's (0 first; None: all);
        # the others are split alike and skipped
        self.wanted = wanted
        self.on_row = on_row  # told every row of a replayed run
        self.begun = 0
        self._skipping = False
        self.log: InterchangeLog | None = None
        self._runs = RunFeed()  # the one split, as live
        self._label: str | None = None
        self._slot = (0, 0)
        self._held: list[LogRow] = []  # rows before the run's filter is built
        self._run: OpenRun | None = None
        self._failed: str | None = None
        self._first: LogRow | None = None
        self._last: LogRow | None = None
        self._steps = 0

    def new_log(self, log: InterchangeLog) -> None:
        """Start afresh at a new file or session: the next row begins a new run."""
        self._apply(self._runs.restart())
        self.log = log

    def take(self, row: LogRow) -> None:
        events = self._runs.take(row)
        run = self._run
        if events is None and run is not None and self._failed is None:
            # the usual row, written out: this loop runs once a row
            self._last = row
            self._steps += 1
            if self.on_row is not None:
                self.on_row(row)
            try:
                e = run.step(row)
            except Exception as exc:  # one run's failure must not end the others' replay
                self._fail(exc)
                return
            if e is not None:
                self.on_estimate(run, e)
            return
        self._apply(events if events is not None else [("row", row, None)])

    def finish(self) -> None:
        """Step a row still held back and end the run (the file or session ended)."""
        self._apply(self._runs.finish())

    def _apply(self, events: list[RunEvent]) -> None:
        for kind, row, label in events:
            if kind == "row":
                self._feed(row)
            elif kind == "end":
                self._end()
            else:  # "begin"
                assert label is not None
                self._begin(label)

    def _begin(self, label: str) -> None:
        self._skipping = self.wanted is not None and not self.wanted(self.begun)
        self.begun += 1
        if self._skipping:
            self._label = None  # rows and the end of a skipped run do nothing
            return
        self._label = label
        self._slot = self.order()
        self._first = self._last = None
        self._steps = 0
        self._failed = None

    def _feed(self, row: LogRow | None) -> None:
        if row is None or self._label is None:
            return
        if self._first is None:
            self._first = row
        self._last = row
        self._steps += 1
        if self.on_row is not None:
            self.on_row(row)
        if self._failed is not None:
            return
        if self._run is None:
            self._held.append(row)
            log = self.log
            assert log is not None
            declared = log.metadata.get("element_sensor") in ("yes", "no")
            if declared or "element" in row.values or len(self._held) >= ELEMENT_WAIT_ROWS:
                self._build()
            return
        self._step(row)

    def _build(self) -> None:
        log = self.log
        assert log is not None
        assert self._label is not None
        meta = log.metadata
        config = VesselConfig.from_metadata(
            self.vessel, meta, has_element_sensor(meta, log.channels, self._held)
        )
        try:
            self._run = OpenRun(self.vessel, self._label, config, meta,
                                log.start_epoch_s or 0.0, settings=self.settings)  # fmt: skip
        except Exception as exc:  # one run's failure must not end the others' replay
            self._fail(exc)
        held, self._held = self._held, []
        for row in held:
            self._step(row)

    def _step(self, row: LogRow) -> None:
        if self._run is None or self._failed is not None:
            return
        try:
            e = self._run.step(row)
        except Exception as exc:  # one run's failure must not end the others' replay
            self._fail(exc)
            return
        if e is not None:
            self.on_estimate(self._run, e)

    def _fail(self, exc: Exception) -> None:
        _log.exception("replay of vessel %s run %s failed", self.vessel, self._label)
        self._failed = f"{type(exc).__name__}: {exc}"
        self._run = None

    def _end(self) -> None:
        if self._label is None:
            return
        if self._run is None and self._held and self._failed is None:
            self._build()  # a short run: built on what it held
        log = self.log
        assert log is not None
        quarantined = 0
        if self._first is not None and self._last is not None:
            lo, hi = self._first.line, self._last.line
            quarantined = sum(1 for r in log.rejected if lo <= r.line <= hi)
        if self._failed is not None or self._run is None:
            summary = _failed_summary(self.vessel, self._label, log.path, self._first,
                                      self._last, self._steps, quarantined,
                                      self._failed or "nothing to replay")  # fmt: skip
        else:
            summary = self._run.summary(quarantined)
            summary["file"] = log.path
            if not log.start_epoch_s:  # a CSV log without a start time: no clock times
                summary |= {"start_t": None, "end_t": None, "start_utc": None}
        self.finished(self._slot, summary)
        self._label, self._run, self._held = None, None, []


def _failed_summary(
    vessel: str, label: str, path: str, first: LogRow | None, last: LogRow | None,
    steps: int, quarantined: int, reason: str,
) -> dict[str, object]:  # fmt: skip
    """Return the summary of a run whose replay failed outside the filter."""
    return NO_FIGURES | {
        "vessel": vessel, "run": label, "file": path,
        "start_s": first.time_s if first else None, "end_s": last.time_s if last else None,
        "steps": steps, "quarantined_rows": quarantined,
        "flags": [{"name": "replay_failed", "level": str(Level.WARNING),
                   "message": f"This run could not be replayed ({reason}); its readings "
                   "are in the log as recorded."}],
        "verdict": {"status": "doubtful", "reasons": [f"The replay failed: {reason}."]},
    }  # fmt: skip


def replay(
    paths: list[str],
    settings: EstimatorSettings | None = None,
    estimates_out: TextIO | None = None,
    progress: TextIO | None = None,
) -> dict[str, object]:
    """Return the replay result of the logs at ``paths`` (the ``--json`` contract).

    The logs are read and replayed as a stream, run by run, so the memory it takes does
    not grow with a log's length (:func:`monitor.runs.streams.vessel_stream`); the runs are
    those :func:`monitor.runs.run.split_runs` finds and the figures those of
    :func:`replay_run`. Writes per-step estimates to ``estimates_out`` when given, and
    a progress line to ``progress`` every :data:`PROGRESS_STEPS` steps.
    """

    writer = None
    if estimates_out is not None:
        writer = csv.writer(estimates_out, lineterminator="\n")
        writer.writerow(ESTIMATE_CSV_COLUMNS)
    done = 0

    def on_estimate(run: OpenRun, e: Estimate) -> None:
        nonlocal done
        done += 1
        if writer is not None:
            writer.writerow(estimate_row(run, e))
        if progress is not None and done % PROGRESS_STEPS == 0:
            print(f"replay: {done} steps", file=progress, flush=True)

    # runs in the order split_runs gives them: by header log (a file, or a vessel's
    # session in a recorder log, in order of its first step), then as they began
    ended: list[tuple[tuple[int, int], dict[str, object]]] = []
    began = iter(range(1 << 62))
    log_order: dict[int, int] = {}
    vessels: dict[str, _VesselReplay] = {}
    metadata: dict[str, Mapping[str, object]] = {}
    logs: list[InterchangeLog] = []
    for path in paths:
        seen, items = vessel_stream(path, None)
        for log, vessel, row in items:
            feed = vessels.get(vessel)
            if feed is None:
                feed = vessels[vessel] = _VesselReplay(
                    vessel, settings, on_estimate,
                    lambda slot, summary: ended.append((slot, summary)),
                    lambda f=vessel: (log_order[id(vessels[f].log)], next(began)),
                )  # fmt: skip
            if feed.log is not log:
                log_order.setdefault(id(log), len(log_order))
                feed.new_log(log)
                metadata[vessel] = log.metadata
            feed.take(row)
        logs += seen
    for feed in vessels.values():
        feed.finish()
    results = [summary for _, summary in sorted(ended, key=lambda item: item[0])]
    from monitor.runs.drift import drift_over_runs  # here: monitor.runs.drift reads these summaries

    for result, flags in zip(results, drift_over_runs(results, metadata), strict=True):
        result["drift"] = [f.as_dict() for f in flags]
    return {
        "version": __version__,
        "files": list(paths),
        "integrity": [log_integrity(p) for p in paths],
        "runs": results,
        "quarantined": [q.as_dict() for log in logs for q in log.rejected],
    }


@dataclass
class VesselReplay:
    """What :func:`replay_vessel` gives: each replayed run's summary by its number
    (:attr:`monitor.runs.streams.RunSpan.number`), in order, the header log the chosen
    run came from (its metadata), and every header log the stream met (their
    ``rejected`` rows included)."""

    summaries: dict[int, dict[str, object]]
    chosen_log: InterchangeLog | None
    logs: list[InterchangeLog]


def replay_vessel(
    path: str,
    vessel: str,
    chosen: int,
    on_row: Callable[[LogRow], None] | None = None,
    on_estimate: Callable[[Estimate], None] | None = None,
    *,
    only_chosen: bool = False,
    settings: EstimatorSettings | None = None,
) -> VesselReplay:
    """Replay ``vessel``'s runs in a log as ``ebullio replay`` replays them, reading it as a
    stream: every run, or with ``only_chosen`` the run numbered ``chosen`` alone (the
    others split and skipped, and reading stops once it has ended).

    ``on_row`` is told each row of run ``chosen`` and ``on_estimate`` each of its
    estimates, as they come; nothing of the log is held.
    """
    summaries: dict[int, dict[str, object]] = {}
    chosen_log: list[InterchangeLog] = []

    def finished(slot: tuple[int, int], summary: dict[str, object]) -> None:
        summaries[slot[1]] = summary

    def estimate(_run: OpenRun, e: Estimate) -> None:
        if on_estimate is not None and feed.begun - 1 == chosen:
            on_estimate(e)

    def row(r: LogRow) -> None:
        if feed.begun - 1 == chosen:
            if not chosen_log and feed.log is not None:
                chosen_log.append(feed.log)
            if on_row is not None:
                on_row(r)

    feed = _VesselReplay(vessel, settings, estimate, finished, lambda: (0, feed.begun - 1),
                         wanted=(lambda n: n == chosen) if only_chosen else None,
                         on_row=row)  # fmt: skip
    logs, rows = vessel_stream(path, vessel)
    for log, _, r in rows:
        if feed.log is not log:
            feed.new_log(log)
        feed.take(r)
        if only_chosen and chosen in summaries:
            break
    else:
        feed.finish()
    return VesselReplay(dict(sorted(summaries.items())),
                        chosen_log[0] if chosen_log else None, logs)  # fmt: skip


def replay_streamed(
    path: str,
    vessel: str,
    number: int,
    on_row: Callable[[LogRow], None] | None = None,
    on_estimate: Callable[[Estimate], None] | None = None,
    settings: EstimatorSettings | None = None,
) -> dict[str, object] | None:
    """Return the summary of ``vessel``'s run numbered ``number``
    (:attr:`monitor.runs.streams.RunSpan.number`) replayed alone (:func:`replay_vessel`
    with ``only_chosen``), or None when there is no such run."""
    done = replay_vessel(path, vessel, number, on_row, on_estimate, only_chosen=True,
                         settings=settings)  # fmt: skip
    return done.summaries.get(number)


#: A progress line every this many steps (``replay --json`` on a long log).
PROGRESS_STEPS = 100_000


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
