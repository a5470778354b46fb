"""A log read as a stream, run by run, holding none of it: each vessel's runs split as
the replay splits them (their spans, :func:`run_spans`), one run's rows
(:func:`run_rows`), one run written out as CSV (:func:`export_run_csv`) and one vessel
(:func:`export_csv`).

:mod:`monitor.runs.replay` replays runs from these streams; the board and the audit
report find and draw a run through them (docs: DEVELOPERS.md, issue 16).
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from itertools import islice
from pathlib import Path
from typing import TextIO, TypeVar

from drivers.errors import LogFormatError
from monitor.records.interchange import (
    CHANNEL_COLUMNS,
    InterchangeLog,
    LogRow,
    iso_utc,
    write_csv,
)
from monitor.records.recorder import is_recorder_log
from monitor.runs.live import settle_channels
from monitor.runs.logs import nan_as_blank, stream_log
from monitor.runs.run import RunEvent, RunFeed, check_columns

_T = TypeVar("_T")


#: Rows read at a time. Parsing a block and then stepping it keeps each at its own work:
#: row by row, the parser pushed the filter's arrays out of the processor's caches and a
#: 2-day heater replay took 12.8-13.0 s where the same rows read whole took 11.5-11.7 s.
READ_AHEAD_ROWS = 2048


def _read_ahead(items: Iterator[_T]) -> Iterator[_T]:
    """Yield ``items`` as they come, read :data:`READ_AHEAD_ROWS` at a time."""
    while block := list(islice(items, READ_AHEAD_ROWS)):
        yield from block


def _with_vessels(
    items: Iterator[tuple[InterchangeLog, LogRow]],
) -> Iterator[tuple[InterchangeLog, str, LogRow]]:
    """Yield (header log, vessel, row): a row that names no vessel is its header log's
    (``vessel`` in the log's metadata, else the file's name without its suffix)."""
    default: dict[int, str] = {}
    for log, row in items:
        vessel = row.vessel
        if not vessel:
            vessel = default.get(id(log))
            if vessel is None:
                vessel = str(log.metadata.get("vessel") or Path(log.path).stem)
                default[id(log)] = vessel
        yield log, vessel, row


@dataclass(frozen=True)
class RunSpan:
    """One run of a vessel as the replay splits it, without its rows (:func:`run_spans`).

    ``number`` is its place among the vessel's runs in the log (0 first: what
    :func:`replay_streamed` takes); ``start_s`` and ``end_s`` are its first and last
    row's times in s from the log's start (``start_epoch_s``, Unix s; 0 when the log
    has none), ``steps`` its rows, and ``points`` per channel (the number of rows with
    a reading, the number of those that are not NaN), which
    :class:`monitor.reports.plots.EnvelopeStream` needs.
    """

    vessel: str
    label: str
    number: int
    start_s: float
    end_s: float
    steps: int
    start_epoch_s: float
    points: Mapping[str, tuple[int, int]]


def vessel_stream(
    path: str, vessel: str | None
) -> tuple[list[InterchangeLog], Iterator[tuple[InterchangeLog, str, LogRow]]]:
    """Return a log's header logs met so far (a list that grows as the stream is read:
    :func:`monitor.runs.logs.stream_log`'s) and an iterator of (header log, vessel, row)
    of its rows, or of ``vessel``'s only (of a recorder log only that vessel's samples
    are read)."""
    seen, items = stream_log(path, vessel)
    if not is_recorder_log(path):
        check_columns(seen[0])
    rows = _with_vessels(_read_ahead(items))
    if vessel is None:
        return seen, rows
    return seen, ((log, name, row) for log, name, row in rows if name == vessel)


class _Counted:
    """One vessel's rows split into runs and counted as they pass (:func:`run_spans`);
    the rows of run number ``keep`` are also handed to ``sink`` (:func:`run_rows`)."""

    def __init__(
        self, vessel: str, spans: list[tuple[int, RunSpan, InterchangeLog]],
        order: Iterator[int], keep: int | None = None,
        sink: Callable[[LogRow], None] | None = None, points: bool = True,
    ) -> None:  # fmt: skip
        self.vessel, self.spans, self.order = vessel, spans, order
        self.keep, self.sink = keep, sink
        self.count_points = points  # each channel's points (RunSpan.points), else none
        self.feed = RunFeed()  # the one split, as the replay's
        self.log: InterchangeLog | None = None
        self.begun = 0
        self.place = 0  # the open run's place among all vessels' runs, as they began
        # the open run's label, number and header log
        self.open: tuple[str, int, InterchangeLog] | None = None
        self.kept = False  # the kept run is open
        self.kept_done = False  # and has ended
        self.steps = 0
        self.start_s = self.end_s = 0.0
        self.points: dict[str, list[int]] = {}

    def take(self, log: InterchangeLog, row: LogRow) -> None:
        """Take the vessel's next row, from ``log``."""
        if log is not self.log:
            self.apply(self.feed.restart())
            self.log = log
        events = self.feed.take(row)
        if events is None:
            self.add(row)
        else:
            self.apply(events)

    def finish(self) -> None:
        """End the open run (the log ended)."""
        self.apply(self.feed.finish())

    def add(self, row: LogRow) -> None:
        if self.open is None:
            return
        if self.kept:
            self.sink(row)  # type: ignore[misc]
        if not self.steps:
            self.start_s = row.time_s
        self.end_s = row.time_s
        self.steps += 1
        if not self.count_points:
            return
        points = self.points
        for channel, value in row.values.items():
            if value is None:
                continue
            seen = points.get(channel)
            if seen is None:
                seen = points[channel] = [0, 0]
            seen[0] += 1
            if value == value:
                seen[1] += 1

    def apply(self, events: list[RunEvent]) -> None:
        for kind, row, label in events:
            if kind == "row":
                if row is not None:
                    self.add(row)
                continue
            self._close()
            if kind == "begin":
                assert self.log is not None
                assert label is not None
                self.open = (label, self.begun, self.log)
                self.kept = self.begun == self.keep and self.sink is not None
                self.begun += 1
                self.place = next(self.order)

    def _close(self) -> None:
        run = self.open
        if run is not None and self.steps:
            points = {channel: (n[0], n[1]) for channel, n in self.points.items()}
            label, number, log = run
            span = RunSpan(self.vessel, label, number, self.start_s, self.end_s, self.steps,
                           log.start_epoch_s or 0.0, points)  # fmt: skip
            self.spans.append((self.place, span, log))
        if self.kept:
            self.kept, self.kept_done = False, True
        self.open, self.steps, self.points = None, 0, {}


def run_spans(
    path: str,
    vessel: str | None = None,
    logs: list[InterchangeLog] | None = None,
    *,
    points: bool = True,
) -> list[RunSpan]:
    """Return the runs in a log (``vessel``'s only, when given), split as the replay
    splits them, in the order they began (as :func:`monitor.runs.run.split_runs` lists
    them), reading the log as a stream and holding none of its rows. ``logs``, when
    given, is filled with each run's header log (its metadata and channels), in step.
    With ``points`` false the spans' ``points`` are left empty (a little faster)."""
    spans: list[tuple[int, RunSpan, InterchangeLog]] = []
    order = itertools.count()
    vessels: dict[str, _Counted] = {}
    for log, name, row in vessel_stream(path, vessel)[1]:
        counted = vessels.get(name)
        if counted is None:
            counted = vessels[name] = _Counted(name, spans, order, points=points)
        counted.take(log, row)
    for counted in vessels.values():
        counted.finish()
    spans.sort(key=lambda item: item[0])
    if logs is not None:
        logs[:] = [log for _, _, log in spans]
    return [span for _, span, _ in spans]


def run_rows(path: str, vessel: str, number: int) -> Iterator[LogRow]:
    """Yield the rows of ``vessel``'s run numbered ``number`` (:attr:`RunSpan.number`)
    as the replay splits the log, reading it as a stream; reading stops once the run
    has ended."""
    found: list[LogRow] = []
    counted = _Counted(vessel, [], itertools.count(), keep=number, sink=found.append,
                       points=False)  # fmt: skip
    for log, _, row in vessel_stream(path, vessel)[1]:
        counted.take(log, row)
        if found:
            yield from found
            found.clear()
        if counted.kept_done:
            return
    counted.finish()
    yield from found


def export_run_csv(log_path: str | Path, out: TextIO, vessel: str, run_label: str) -> int:
    """Write one run of one vessel, as the replay splits the log, as a CSV interchange file.

    The log is read as a stream twice (to find the run, then to write its rows as they
    come), holding none of it. Returns the rows written. Raises LogFormatError naming
    the runs when there is no such run.
    """
    path = str(log_path)
    logs: list[InterchangeLog] = []
    spans = run_spans(path, vessel, logs, points=False)
    mine = [(span, log) for span, log in zip(spans, logs, strict=True) if span.vessel == vessel]
    found = next(((span, log) for span, log in mine if span.label == run_label), None)
    if found is None:
        labels = ", ".join(span.label for span, _ in mine) or "(none)"
        raise LogFormatError(f"{log_path}: vessel {vessel!r} has no run {run_label!r}; "
                             f"its runs: {labels}")  # fmt: skip
    span, log = found
    metadata = dict(log.metadata)
    if log.start_epoch_s is not None:
        metadata["start_utc"] = iso_utc(log.start_epoch_s)
    metadata["exported_from"] = f"{Path(path).name}, run {run_label}"
    rows = nan_as_blank(run_rows(path, vessel, span.number))
    return write_csv(out, rows, metadata, log.channels)


def export_csv(log_path: str | Path, out: TextIO, vessel: str | None = None) -> int:
    """Write one vessel of a log as a CSV interchange file to ``out``; return rows written.

    ``vessel`` may be left out when the log holds one vessel. The log is read as a
    stream twice (to find the vessel's sessions and channels, then to write its rows
    as they come), holding none of it. A vessel recorded over several sessions of the
    service gets one time axis, from its first session's start, and each row's run
    written out, so the file splits into the same runs. Raises LogFormatError naming
    the vessels when ``vessel`` is needed, or when the log does not hold it.
    """
    path = str(log_path)
    found: dict[str, dict[int, InterchangeLog]] = {}  # each vessel's header logs, in order
    for log, name, _ in vessel_stream(path, None)[1]:
        logs = found.get(name)
        if logs is None:
            logs = found[name] = {}
        if id(log) not in logs:
            logs[id(log)] = log
    names = list(found)
    if vessel is None:
        if len(names) != 1:
            raise LogFormatError(
                f"{log_path}: holds vessels {', '.join(names) or '(none)'}; say which with --vessel"
            )
        vessel = names[0]
    elif vessel not in names:
        raise LogFormatError(f"{log_path}: no vessel {vessel!r}; it holds {', '.join(names)}")
    mine = list(found[vessel].values())  # one per session of a recorder log; a CSV's one
    if is_recorder_log(path):
        for log in mine:
            settle_channels(log)
    chosen = mine[0]
    metadata = dict(mine[-1].metadata)
    if len(names) > 1:
        metadata["vessel"] = vessel  # the file holds this vessel alone
    if chosen.start_epoch_s is not None:
        metadata["start_utc"] = iso_utc(chosen.start_epoch_s)
    metadata["exported_from"] = Path(path).name
    items = vessel_stream(path, vessel)[1]
    if len(mine) == 1:
        rows = (row for _, _, row in items)
        return write_csv(out, nan_as_blank(rows), metadata, chosen.channels)
    channels = [c for c in CHANNEL_COLUMNS if any(c in log.channels for log in mine)]
    labelled = _labelled(items, vessel, chosen.start_epoch_s or 0.0)
    return write_csv(out, nan_as_blank(labelled), metadata, channels, with_vessel=True)


def _labelled(
    items: Iterator[tuple[InterchangeLog, str, LogRow]], vessel: str, base_epoch_s: float
) -> Iterator[LogRow]:
    """Yield one vessel's rows on one time axis (Unix ``base_epoch_s`` at 0), each with
    its run's label, split as the replay splits them (:class:`RunFeed` hands each row
    on once: a refill's first cold reading to the run it begins)."""
    feed = RunFeed()
    current: InterchangeLog | None = None
    label, shift = "", 0.0

    def out(events: list[RunEvent]) -> Iterator[LogRow]:
        nonlocal label, shift
        for kind, row, begun in events:
            if kind == "begin":
                assert begun is not None
                assert current is not None
                label, shift = begun, (current.start_epoch_s or 0.0) - base_epoch_s
            elif kind == "row" and row is not None:
                yield LogRow(row.line, row.time_s + shift, row.values, vessel, label)

    for log, _, row in items:
        if log is not current:
            yield from out(feed.restart())
            current = log
        events = feed.take(row)
        yield from out(events if events is not None else [("row", row, None)])
    yield from out(feed.finish())
