"""What the board shows, read from a log: the only module of the board that does I/O.

:func:`load_snapshot` reads a recorder (SQLite) log read-only through the recorder's
own reader (:class:`monitor.records.recorder.LogReader`), so ``ebullio run`` can keep writing
it (WAL), and returns a JSON-ready snapshot that the views' callbacks turn into
figures without touching the file. A CSV log is replayed once through the estimator
instead. Either way an estimate arrives in its one flat form
(:func:`monitor.records.schema.flatten_estimate`); this module only picks what the board
shows of it and shapes it for display: no SQL here. Long series are downsampled for
display with a min/max envelope (:func:`monitor.reports.plots.envelope`, shared with the
audit report): each bucket keeps its lowest and
highest point, so spikes and switch-offs stay visible; every figure on the board is
still computed from the full data by the estimator.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from pathlib import Path

from monitor.records.recorder import LogReader, is_recorder_log
from monitor.records.schema import flatten_estimate
from monitor.reports.plots import MAX_POINTS, Thinned, envelope

#: Channels drawn on the readings chart.
CHANNELS = ("water", "element", "ambient", "power")


#: What the charts draw of each estimate (names of the one mapping, monitor.records.schema).
CHART_KEYS = ("t", "phase", "water_c", "water_mass_kg", "water_mass_std", "ua_w_per_k", "ua_std",
              "element_conductance_w_per_k", "element_conductance_std", "target_c",
              "time_to_target_s", "time_to_target_lo_s", "time_to_target_hi_s")  # fmt: skip
#: What the figures, the flags and the fleet show of a vessel's newest estimate.
LATEST_KEYS = (*CHART_KEYS, "flags", "power_w", "target_reason")


def _latest(estimate: Mapping[str, object] | None) -> dict[str, object] | None:
    """Return the part of a flat estimate the board shows as a vessel's latest figures."""
    if estimate is None:
        return None
    latest = {k: estimate.get(k) for k in LATEST_KEYS}
    latest["flags"] = latest["flags"] or []
    latest["target_reason"] = latest["target_reason"] or ""
    return latest


def _columns(rows: Sequence[Mapping[str, object]], phase: bool = False) -> dict[str, list]:
    """Return flat estimates as the charts' columns (:data:`CHART_KEYS`); the phase only
    when asked for (the replay view's cards show it, the live charts do not).

    The caller thins the rows first (:class:`_RunCharts`; the recorder's reader gives
    :func:`chart_data` its columns thinned already).
    """
    return {k: [r.get(k) for r in rows] for k in CHART_KEYS if phase or k != "phase"}


def run_state(
    runs: Sequence[Mapping[str, object]], into: dict[str, dict[str, object]] | None = None
) -> dict[str, dict[str, object]]:
    """Return, per vessel, its last recorded run and the state of its drift checks.

    ``runs`` are the log's run rows in order (summaries parsed); ``into`` is a state
    made of the runs before them, which takes these too (the board over the engine
    keeps one as the runs come). Each vessel gets its
    last run's label and times, that run's own flags, the drift flags that stand after
    it (:func:`monitor.runs.drift.standing_drift`: a doubtful run keeps the latest judged
    run's), its status (the worst level of the two, as ``ebullio fleet`` gives it) and verdict
    (:func:`monitor.runs.drift.verdict_of`: trusted, or doubtful and not judged, with the
    reasons), and the scaling index (1 - G/G0) of the latest scaling flag among all
    its runs, if any.
    """
    from monitor.runs.drift import standing_drift, verdict_of, worst_level

    out: dict[str, dict[str, object]] = {} if into is None else into
    for row in runs:
        summary = row.get("summary") if isinstance(row.get("summary"), dict) else {}
        assert isinstance(summary, dict)
        vessel = str(row["vessel"])
        state = out.setdefault(vessel, {"scaling_index": None, "runs": 0})
        state["runs"] = int(state["runs"]) + 1  # type: ignore[call-overload]
        drift = [f for f in summary.get("drift") or [] if isinstance(f, dict)]
        for f in drift:
            if f.get("name") == "scaling":
                state["scaling_index"] = (f.get("evidence") or {}).get("scaling_index")
        flags = [f for f in summary.get("flags") or [] if isinstance(f, dict)]
        verdict = verdict_of(summary)
        standing, judged = standing_drift(state.get("judged_drift") or [], drift, verdict)
        state.update(run=row["run"], start_t=row["start_t"], end_t=row.get("end_t"),
                     drift=standing, judged_drift=judged, flags=flags, verdict=verdict,
                     status=worst_level([*flags, *standing]))  # fmt: skip
    return out


def simulated_vessels(path: str) -> list[str]:
    """Return the vessels of a recorder log that say they are simulated (metadata
    ``simulated``, or a ``sim://`` source: the demo's), so the board can say so."""
    if not is_recorder_log(path):
        return []
    from monitor.records.recorder import read_vessels

    return [name for name, meta in read_vessels(path).items()
            if "simulated" in meta or str(meta.get("source", "")).startswith("sim://")]  # fmt: skip


def _sqlite_snapshot(path: str, vessel: str | None) -> dict[str, object]:
    with LogReader(path) as log:
        names = log.vessels()
        newest = {name: log.latest_estimate(name) for name in names}
        runs = log.runs()
        last_t = log.last_sample_t()
    latest = {name: _latest(e) for name, e in newest.items() if e is not None}
    chosen = vessel if vessel in names else (names[0] if names else None)
    return {"log": Path(path).name, "kind": "recorder", "last_t": last_t, "vessels": names,
            "latest": latest, "runs": run_state(runs), "chosen": chosen}  # fmt: skip


def load_snapshot(
    path: str, vessel: str | None = None, csv_replay: Callable[[str], dict] | None = None
) -> dict[str, object]:
    """Return what the fleet and the vessel figures show of the log at ``path``.

    ``vessels`` (names), ``latest`` (each vessel's newest estimate), ``runs`` (each
    vessel's last run and drift state, :func:`run_state`) and ``chosen`` (``vessel``,
    or the first). Small: the charts' data comes from :func:`chart_data`. A CSV log
    is replayed by ``csv_replay`` (default :func:`replay_csv`; the board passes one that
    remembers). Raises LogFormatError (from the readers) when the file is not a log.
    """
    if is_recorder_log(path):
        return _sqlite_snapshot(path, vessel)
    csv = (csv_replay or replay_csv)(path)
    names = sorted(csv["vessels"])
    chosen = vessel if vessel in names else (names[0] if names else None)
    return {"log": Path(path).name, "kind": "csv", "last_t": None, "vessels": names,
            "latest": {v: d["latest"] for v, d in csv["vessels"].items()},
            "runs": csv["runs"], "chosen": chosen}  # fmt: skip


def chart_data(
    path: str,
    vessel: str | None,
    after: dict | None = None,
    window_s: float = 3 * 3600.0,
    csv_replay: Callable[[str], dict] | None = None,
) -> dict[str, object]:
    """Return a vessel's readings and estimates for the live charts.

    Without ``after``: the last ``window_s`` seconds, downsampled (:func:`envelope`).
    With ``after`` (``{"t": .., "est_t": ..}``, the newest sample and estimate times
    already shown): only what is newer, whole, for appending. ``cursor`` in the result
    is the new ``after``. A CSV log has no live end: its whole replay comes back.
    """
    if vessel is None:
        return {"vessel": None, "series": {}, "estimates": {}, "latest": None, "cursor": None}
    if not is_recorder_log(path):
        detail = (csv_replay or replay_csv)(path)["vessels"].get(vessel) or {}
        return {"vessel": vessel, **detail, "cursor": None}
    newer_only = after is not None
    with LogReader(path) as log:
        if after is None:
            last = log.newest_sample_t(vessel, CHANNELS)
            since = since_est = (last or 0.0) - window_s
        else:
            since, since_est = float(after["t"]), float(after["est_t"])
        series: dict[str, object] = {}
        newest = since
        for channel in CHANNELS:
            t, y = log.readings(vessel, channel, since, newer_only=newer_only)
            if not newer_only:
                t, y = envelope(t, y)
            series[channel] = {"t": t, "y": y}
            if t:
                newest = max(newest, t[-1])
        # a whole window is thinned in the reader; only the newest estimate is read whole
        est = log.estimates(vessel, since_est, newer_only=newer_only,
                            max_rows=None if newer_only else MAX_POINTS,
                            keys=[k for k in CHART_KEYS if k != "phase"])  # fmt: skip
        newest_row = log.latest_estimate(vessel) if est["t"] else None
    est_t = est["t"][-1] if est["t"] else since_est
    return {"vessel": vessel, "series": series, "estimates": est,
            "latest": _latest(newest_row), "cursor": {"t": newest, "est_t": est_t}}  # fmt: skip


def replay_csv(path: str) -> dict[str, object]:
    """Replay a CSV log: per vessel its last run's series, estimates and latest; run state.

    Read as a stream: once to split it into runs, then once per vessel to replay its
    runs (the last one's charts gathered as they come), so the board holds no more of
    a long log than of a short one. A CSV log does not change, so the board asks for
    this once per file (see :class:`dashboard.app.Memo`).
    """
    from monitor.runs.drift import drift_over_runs
    from monitor.runs.replay import replay_vessel
    from monitor.runs.streams import run_spans

    spans = run_spans(path)
    vessels: dict[str, dict[str, object]] = {}
    found: dict[tuple[str, int], dict[str, object]] = {}
    metadata: dict[str, Mapping[str, object]] = {}
    for vessel in dict.fromkeys(s.vessel for s in spans):
        last = [s for s in spans if s.vessel == vessel][-1]
        charts = _RunCharts(last)
        done = replay_vessel(path, vessel, last.number, charts.take, charts.keep)
        found.update(((vessel, number), summary) for number, summary in done.summaries.items())
        metadata[vessel] = done.chosen_log.metadata if done.chosen_log is not None else {}
        detail = charts.detail(done.summaries[last.number])
        detail.pop("summary")
        vessels[vessel] = detail
    summaries = [found[(s.vessel, s.number)] for s in spans]
    flags = drift_over_runs(summaries, metadata)
    rows = [{"vessel": s["vessel"], "run": s["run"],
             "start_t": span.start_epoch_s + (s["start_s"] or 0.0),
             "end_t": span.start_epoch_s + (s["end_s"] or 0.0),
             "summary": {**s, "drift": [f.as_dict() for f in f_]}}
            for span, s, f_ in zip(spans, summaries, flags, strict=True)]  # fmt: skip
    return {"vessels": vessels, "runs": run_state(rows), "summaries": [r["summary"] for r in rows]}


class _RunCharts:
    """One run's charts gathered as its rows (:meth:`take`) and estimates (:meth:`keep`)
    pass: every n-th estimate (:class:`monitor.reports.plots.Thinned`) and each series
    thinned as it comes (:class:`monitor.reports.plots.EnvelopeStream`), from the counts
    of its :class:`monitor.runs.streams.RunSpan`."""

    def __init__(
        self, span, progress: Callable[[float], None] | None = None,
        max_points: int = MAX_POINTS,
    ) -> None:  # fmt: skip
        from monitor.reports.plots import EnvelopeStream

        self.span, self.progress = span, progress
        self.start = span.start_epoch_s
        self.total = max(span.steps, 1)
        self.thinned = Thinned(self.total, max_points)
        self.lines = {c: EnvelopeStream(*span.points.get(c, (0, 0)), max_points)
                      for c in CHANNELS}  # fmt: skip

    def keep(self, e) -> None:
        thinned = self.thinned
        thinned.add(e)
        if self.progress is not None and thinned.count % 2000 == 0:
            self.progress(thinned.count / self.total)

    def take(self, row) -> None:
        t = self.start + row.time_s
        values = row.values
        for channel, line in self.lines.items():
            value = values.get(channel)
            if value is not None:
                line.add(t, value)

    def detail(self, summary: dict[str, object]) -> dict[str, object]:
        series = {channel: line.points() for channel, line in self.lines.items()}
        span = self.span
        return _run_detail(span.vessel, span.label, self.start, self.thinned.items(), series,
                           summary)  # fmt: skip


def replay_streamed_run(
    path: str, span, progress: Callable[[float], None] | None = None,
    max_points: int = MAX_POINTS,
) -> dict[str, object]:  # fmt: skip
    """Replay one run of a log (a :class:`monitor.runs.streams.RunSpan` of it) for the
    replay view: its series, thinned estimates, latest and summary, reading the log as
    a stream, so the memory it takes does not grow with the run or the log. Raises
    LogFormatError when the log has no such run.
    """
    from drivers.errors import LogFormatError
    from monitor.runs.replay import replay_streamed

    charts = _RunCharts(span, progress, max_points)
    summary = replay_streamed(path, span.vessel, span.number, on_row=charts.take,
                              on_estimate=charts.keep)  # fmt: skip
    if summary is None:
        raise LogFormatError(f"{path}: vessel {span.vessel!r} has no run {span.label!r}")
    return charts.detail(summary)


def _run_detail(
    vessel: str, label: str, start: float, estimates: list,
    series: Mapping[str, tuple[list[float], list[float | None]]], summary: dict[str, object],
) -> dict[str, object]:  # fmt: skip
    """Return a replayed run's charts: its series, thinned estimates, latest and summary."""
    rows = [flatten_estimate(e, vessel=vessel, run=label, t=start + e.t_s) for e in estimates]
    return {"series": {c: {"t": t, "y": y} for c, (t, y) in series.items()},
            "estimates": _columns(rows, phase=True),
            "latest": _latest(rows[-1]) if rows else None, "summary": summary}  # fmt: skip


def list_runs(path: str, spans: list | None = None) -> list[dict[str, object]]:
    """Return the runs of a log: vessel, label, start and end (Unix s), steps.

    A recorder log whose ``runs`` table has rows is listed from it (the live service
    writes a row as each run ends; cheap however long the log), each marked
    ``recorded``: such a run has ended, and is found again by its span. Otherwise the
    log is read as a stream and split as ``ebullio replay`` splits it
    (:func:`monitor.runs.streams.run_spans`; ``spans`` when the caller has them).
    """
    from monitor.runs.streams import run_spans

    if spans is None and is_recorder_log(path):
        recorded = _table_runs(path)
        if recorded:
            return recorded
    return [{"vessel": r.vessel, "run": r.label, "start_t": r.start_epoch_s + r.start_s,
             "end_t": r.start_epoch_s + r.end_s, "steps": r.steps}
            for r in (run_spans(path) if spans is None else spans)]  # fmt: skip


def _table_runs(path: str) -> list[dict[str, object]]:
    """Return the ended runs of the log's runs table, one per vessel and label (the first
    row kept), marked ``recorded``, in order of start."""
    with LogReader(path) as log:
        rows = log.ended_runs()
    out: dict[tuple[str, str], dict[str, object]] = {}
    for row in rows:
        out.setdefault((str(row["vessel"]), str(row["run"])),
                       {**row, "run": str(row["run"]), "recorded": True})  # fmt: skip
    return sorted(out.values(), key=lambda r: (r["start_t"], r["vessel"]))


def _pick_run(spans: list, vessel: str, label: str, span: tuple[float, float] | None):
    """Return the run of ``vessel`` (a :class:`monitor.runs.streams.RunSpan`) labelled
    ``label``, else the one that overlaps ``span`` (Unix s) most.

    The live service and the replay number runs alike (:mod:`monitor.runs.run`), so the
    label finds the run; the span (Unix s) checks it. A log recorded before they did
    could number them apart after a restart: there the span decides.
    """
    mine = [r for r in spans if r.vessel == vessel and r.steps]
    labelled = next((r for r in mine if r.label == label), None)
    if span is None or not mine:
        return labelled

    def overlap(r) -> float:
        lo, hi = r.start_epoch_s + r.start_s, r.start_epoch_s + r.end_s
        return min(hi, span[1]) - max(lo, span[0])

    if labelled is not None and overlap(labelled) >= 0.0:
        return labelled  # the label and the time agree
    best = max(mine, key=overlap)
    return best if overlap(best) >= 0.0 else labelled


def replay_label(path: str, vessel: str, label: str, span: tuple[float, float]) -> str:
    """Return the replay's label of the run of ``vessel`` over ``span`` (Unix s), else ``label``.

    The report and the CSV export find runs by the replay's labels; a run the live
    service recorded is found by its time span (see :func:`_pick_run`). The log is read
    as a stream, holding none of its rows.
    """
    from monitor.runs.streams import run_spans

    run = _pick_run(run_spans(path, vessel), vessel, label, span)
    return run.label if run is not None else label


def audit_report(
    path: str,
    vessel: str | None,
    label: str | None,
    span: tuple[float, float] | None = None,
    progress: Callable[[float], None] | None = None,  # noqa: ARG001 (the report says none)
) -> str:
    """Return the audit report page of a run (:func:`monitor.reports.report.build_report`).

    ``span`` (Unix s) finds a live-recorded run by its time (:func:`replay_label`).
    The board makes it as a job; ``progress`` is not told anything.
    """
    from monitor.reports.report import build_report

    if span is not None and vessel:
        label = replay_label(path, vessel, label or "", span)
    return build_report(path, vessel, label)


def replay_detail(
    path: str,
    vessel: str,
    label: str,
    spans: list | None = None,
    span: tuple[float, float] | None = None,
    progress: Callable[[float], None] | None = None,
) -> dict[str, object]:
    """Return one run of a log replayed through a fresh estimator, for the replay view.

    The figures are the replay's (as ``ebullio replay`` gives them), not the ones the
    live service recorded. The log is read as a stream twice, once to find the run and
    once to replay it, in memory that does not grow with it. ``spans`` is
    :func:`monitor.runs.streams.run_spans` of the log when the caller has them. ``span``
    (start and end, Unix s) finds the run by time, as listed from the runs table;
    ``run`` in the answer is then the replay's label. ``progress`` is told how far the
    replay has got. Raises LogFormatError when the log has no such run.
    """
    from drivers.errors import LogFormatError
    from monitor.runs.streams import run_spans

    spans = run_spans(path, vessel) if spans is None else spans
    run = _pick_run(spans, vessel, label, span)
    if run is None:
        raise LogFormatError(f"{path}: vessel {vessel!r} has no run {label!r}")
    detail = replay_streamed_run(path, run, progress)
    summary = detail.pop("summary")
    return {"vessel": vessel, "run": run.label, "steps": run.steps, **detail,
            "summary": {k: summary.get(k) for k in ("start_utc", "heat_up_s", "energy_wh",
                                                     "phase_at_end", "model")}}  # fmt: skip


def run_history(
    path: str, vessel: str | None = None, csv_replay: Callable[[str], dict] | None = None
) -> dict[str, object]:
    """Return a vessel's run summaries with their drift flags, and each rule's baseline.

    A recorder log carries them in its ``runs`` table (the live service writes one as
    each run ends; ``ebullio replay --record`` adds the replay's, which are preferred
    when there). A CSV log's come from ``csv_replay`` (:func:`replay_csv`, which the
    board has run already) when given. Otherwise, or when the table holds none with
    figures, the whole log is replayed (the figures come from the full data).
    """
    if is_recorder_log(path):
        runs = _recorded_summaries(path)
    elif csv_replay is not None:
        runs = list(csv_replay(path).get("summaries") or [])
    else:
        runs = []
    if not runs:
        from monitor.runs.replay import replay

        runs = [r for r in replay([path])["runs"] if isinstance(r, dict)]  # type: ignore[union-attr]
    return history_of(runs, vessel)


def history_of(runs: Sequence[Mapping[str, object]], vessel: str | None) -> dict[str, object]:
    """Return :func:`run_history`'s answer from run summaries at hand (with their
    ``drift``), in the order the runs began."""
    from monitor.runs.drift import RULES, baselines_of, verdict_of

    names = sorted({str(r["vessel"]) for r in runs})
    chosen = vessel if vessel in names else (names[0] if names else None)
    mine = [r for r in runs if r["vessel"] == chosen]
    keep = ("run", "start_utc", "start_t", "end_t", "model", "drift", *(rule.key for rule in RULES))
    baselines = baselines_of(mine)
    # each run's verdict, judged here for a summary recorded before runs carried one
    return {"vessels": names, "chosen": chosen, "baselines": baselines,
            "runs": [{**{k: r.get(k) for k in keep}, "verdict": verdict_of(r)}
                     for r in mine]}  # fmt: skip


def _recorded_summaries(path: str) -> list[dict[str, object]]:
    from monitor.records.interchange import iso_utc
    from monitor.records.recorder import read_runs

    found: dict[str, list[dict[str, object]]] = {"replay": [], "live": []}
    for row in read_runs(path):
        summary = row.get("summary")
        if isinstance(summary, dict) and "drift" in summary:
            source = "replay" if summary.get("source") == "replay" else "live"
            start = summary.get("start_utc") or iso_utc(float(row["start_t"]))  # type: ignore[arg-type]
            found[source].append({**summary, "vessel": row["vessel"], "start_utc": start,
                                  "start_t": row["start_t"], "end_t": row["end_t"]})  # fmt: skip
    return found["replay"] or found["live"]


#: How much of an engine vessel's estimates the board keeps for its charts (s of their time).
ENGINE_WINDOW_S = 3 * 3600.0
#: The estimates bucket's entries by vessel (:func:`monitor.engine.worker.read_estimates`).
BucketEntries = Mapping[str, Mapping[str, object]]
#: Run summaries with their sequence in the runs stream (:func:`monitor.engine.worker.read_runs`).
RunEntries = Sequence[tuple[int, Mapping[str, object]]]


class EngineWatch:
    """The NATS engine's estimates bucket and runs stream, read in a thread of its own
    every ``every_s``.

    The workers keep each vessel's newest estimate in the bucket and each ended run's
    summary in the runs stream (docs/engine.md); this reads the bucket
    (:func:`monitor.engine.worker.read_estimates`, every key) and the runs put since the
    last read (:func:`monitor.engine.worker.read_runs`), and keeps each vessel's
    estimates as they come, the last ``window_s`` of them, and every run summary, so
    the fleet (last run, verdict, drift flags, scaling index), the vessel's figures and
    charts and the maintenance history are answered from memory (no I/O in a callback).
    The charts hold what this board has seen since it started: the bucket keeps only
    the newest estimate, and the stream holds the readings. A read that fails (a node
    down, a leader being elected) is said in :meth:`snapshot` and tried again; what was
    kept stays. ``read`` and ``read_runs`` stand in for the readers in tests.
    """

    def __init__(self, servers: Sequence[str], every_s: float = 2.0,
                 window_s: float = ENGINE_WINDOW_S,
                 read: Callable[[], BucketEntries] | None = None,
                 read_runs: Callable[[int], RunEntries] | None = None) -> None:  # fmt: skip
        import threading

        from monitor.engine.worker import shown_servers

        self.source = shown_servers(servers)
        self._servers = list(servers)
        self._every_s, self._window_s = every_s, window_s
        self._read = read or self._read_bucket
        self._read_runs = read_runs or self._read_runs_stream
        self._kept: dict[str, list[dict[str, object]]] = {}
        self._runs: list[dict[str, object]] = []  # every run summary read, in order
        self._run_state: dict[str, dict[str, object]] = {}  # run_state of them, kept up
        self._runs_seq = 0  # the runs stream's sequence read up to
        self._problem: str | None = None
        self._reads = 0
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="board-engine", daemon=True)
        self._thread.start()

    def _read_bucket(self) -> BucketEntries:
        import asyncio

        from monitor.engine.worker import read_estimates

        return asyncio.run(read_estimates(self._servers, timeout_s=max(self._every_s, 2.0)))

    def _read_runs_stream(self, after_seq: int) -> RunEntries:
        import asyncio

        from monitor.engine.worker import read_runs

        return asyncio.run(read_runs(self._servers, after_seq=after_seq,
                                     timeout_s=max(self._every_s, 2.0)))  # fmt: skip

    def _run(self) -> None:
        while True:
            try:
                entries = self._read()
                runs = self._read_runs(self._runs_seq)
                problem = None
            except Exception as exc:  # said on the board; the next read may succeed
                entries, runs = {}, []
                problem = f"{type(exc).__name__}: {exc}".rstrip(": ")
            with self._lock:
                self.take(entries)
                self.take_runs(runs)
                self._problem = problem
                self._reads += 1
            if self._stop.wait(self._every_s):
                return

    def take(self, entries: BucketEntries) -> None:
        """Keep each vessel's estimate from the bucket's entries if it is newer than the
        last kept (call with the lock held, or before the thread has read)."""
        for vessel, entry in entries.items():
            estimate = entry.get("estimate") if isinstance(entry, Mapping) else None
            if not isinstance(estimate, dict) or not isinstance(estimate.get("t"), int | float):
                continue
            kept = self._kept.setdefault(str(vessel), [])
            t = float(estimate["t"])  # type: ignore[arg-type]
            if kept and t <= float(kept[-1]["t"]):  # type: ignore[arg-type]
                continue  # the same estimate as last time (or an older one)
            kept.append(estimate)
            first = 0
            while t - float(kept[first]["t"]) > self._window_s:  # type: ignore[arg-type]
                first += 1
            del kept[:first]

    def take_runs(self, runs: RunEntries) -> None:
        """Keep the run summaries read after the last, and the fleet's run state with
        them (call with the lock held)."""
        from monitor.records.schema import run_record

        new = []
        for seq, summary in runs:
            if seq > self._runs_seq and isinstance(summary, dict) and summary.get("vessel"):
                new.append(summary)
                self._runs_seq = seq
        self._runs += new
        run_state([run_record(summary) for summary in new], self._run_state)

    def history(self, vessel: str | None) -> dict[str, object]:
        """Return the maintenance view's history of a vessel (:func:`run_history`'s
        answer) from the run summaries read so far."""
        with self._lock:
            runs = list(self._runs)
        return history_of(runs, vessel)

    def wait_read(self, count: int = 1, timeout_s: float = 10.0) -> bool:
        """Wait until the bucket has been read ``count`` times; True if it has."""
        import time

        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            with self._lock:
                if self._reads >= count:
                    return True
            time.sleep(0.02)
        return False

    def close(self) -> None:
        """Stop reading (the thread ends after its current read)."""
        self._stop.set()

    def snapshot(self, vessel: str | None = None) -> dict[str, object]:
        """Return what the fleet and the vessel figures show, as :func:`load_snapshot`
        does for a log (``kind`` "engine", ``runs`` from the runs stream), and ``problem``: why the
        last read failed, or None."""
        with self._lock:
            latest = {v: _latest(kept[-1]) for v, kept in self._kept.items() if kept}
            problem = self._problem
            runs = {v: dict(state) for v, state in self._run_state.items()}
        names = sorted({*latest, *runs})
        last = [float(e["t"]) for e in latest.values() if e is not None]  # type: ignore[arg-type]
        chosen = vessel if vessel in names else (names[0] if names else None)
        return {"log": self.source, "kind": "engine", "last_t": max(last, default=None),
                "vessels": names, "latest": latest, "runs": runs,
                "chosen": chosen, "problem": problem}  # fmt: skip

    def chart_data(self, vessel: str | None, after: dict | None = None) -> dict[str, object]:
        """Return a vessel's charts as :func:`chart_data` does for a log, from the
        estimates kept: the filtered water and element temperatures, the room's and the
        power stand for the readings. With ``after`` only what is newer."""
        empty = {"vessel": vessel, "series": {}, "estimates": {}, "latest": None, "cursor": None}
        if vessel is None:
            return empty
        with self._lock:
            rows = list(self._kept.get(vessel) or ())
        if not rows:
            return {**empty, "cursor": after}
        newest = rows[-1]
        if after is not None:
            rows = [r for r in rows if float(r["t"]) > float(after["est_t"])]  # type: ignore[arg-type]
        else:  # every n-th and the newest, as the replay view thins
            thinned = Thinned(len(rows))
            for row in rows:
                thinned.add(row)
            rows = thinned.items()
        ts = [r["t"] for r in rows]
        series = {}
        for channel, key in (("water", "water_c"), ("element", "element_c"),
                             ("ambient", "ambient_c"), ("power", "power_w")):  # fmt: skip
            ys = [r.get(key) for r in rows]
            if any(y is not None for y in ys):  # a one-node vessel has no element
                series[channel] = {"t": ts, "y": ys}
        t = float(newest["t"])  # type: ignore[arg-type]
        return {
            "vessel": vessel,
            "series": series,
            "estimates": _columns(rows),
            "latest": _latest(newest),
            "cursor": {"t": t, "est_t": t},
        }
