"""The board: composes the views over logs. ``create_app(log_path)`` returns the Dash app.

Reading the files happens in three places only, each through :mod:`dashboard.data`
(read-only): the poll callback fills the store with a small snapshot (fleet and
figures), the vessel charts read what is new since they were last drawn, and the
maintenance and replay views read a run history or a replayed run when one is
picked. Everything else is a pure function of the store. Slow answers (a CSV
replay, a run replayed) are kept in a :class:`Memo` that lives in the app factory's
closure, not in module state, and is keyed by the file's version. The board never
writes to a log.
"""

from __future__ import annotations

import io
import os
import threading
import uuid
from collections import OrderedDict
from collections.abc import Callable
from html import escape
from pathlib import Path
from urllib.parse import urlencode

from dash import Dash, Input, Output, dcc, html

from dashboard import data, ids
from dashboard.jobs import Jobs
from dashboard.views import fleet, maintenance, replay, vessel
from monitor.reports.safety import SAFETY_TEXT

STYLE = """
body { font-family: system-ui, sans-serif; margin: 0; color: #1d1d1d; background: #fbfbfa; }
header, footer, main { padding: .6rem 1.2rem; }
header { background: #123; color: #fff; display: flex; gap: 1rem; align-items: baseline;
  flex-wrap: wrap; }
header h1 { font-size: 1.3rem; margin: 0; }
footer { font-size: .85rem; border-top: 2px solid #D55E00; background: #fff7f0; }
.integrity-failed { margin: .6rem 1.2rem; padding: .3rem .8rem; border: 3px double #a11;
  background: #fff; color: #a11; font-weight: 600; }
.view { margin-bottom: 1.5rem; }
.figures { display: flex; flex-wrap: wrap; gap: .6rem; margin: .6rem 0; }
.figure { background: #fff; border: 1px solid #ddd; padding: .4rem .7rem; min-width: 9rem; }
.figure .label { font-size: .8rem; color: #555; } .figure .value { font-size: 1.15rem; }
table.fleet { border-collapse: collapse; width: 100%; background: #fff; }
table.fleet th, table.fleet td { border-bottom: 1px solid #e3e3e3; padding: .3rem .5rem;
  text-align: left; }
.level-alarm { color: #a11; font-weight: 700; } .level-warning { color: #8a4b00; }
.pickers { display: grid; grid-template-columns: 1fr 2fr; gap: .6rem; }
.scrubber { margin: 1rem 0 .4rem; }
.status { color: #555; font-style: italic; margin: .3rem 0; }
a.button { display: inline-block; padding: .3rem .6rem; border: 1px solid #0072B2;
  color: #0072B2; text-decoration: none; margin: .2rem 0; }
@media (max-width: 900px) {
  .figure { min-width: 42%; }
  .pickers { grid-template-columns: 1fr; }
  table.fleet { font-size: .85rem; }
}
"""


class Memo:
    """Answers of slow reads, kept per (what, arguments, file version); the oldest go first.

    A file's version is its size and modification time, and those of its SQLite WAL,
    so a log that is still being written is read again when it has changed.
    """

    def __init__(self, size: int = 16) -> None:
        self.size = size
        self._answers: OrderedDict[tuple, object] = OrderedDict()
        self._lock = threading.Lock()  # the server answers requests on several threads

    @staticmethod
    def version(path: str) -> tuple:
        stamp = []
        for p in (path, path + "-wal"):
            try:
                st = os.stat(p)
                stamp.append((st.st_size, st.st_mtime_ns))
            except FileNotFoundError:
                stamp.append(None)
        return tuple(stamp)

    def get(self, fn: Callable[..., object], path: str, *args: object) -> object:
        key = (fn.__name__, path, args, self.version(path))
        with self._lock:
            if key in self._answers:
                self._answers.move_to_end(key)
                return self._answers[key]
        answer = fn(path, *args)
        with self._lock:
            self._answers[key] = answer
            while len(self._answers) > self.size:
                self._answers.popitem(last=False)
        return answer


def waiting_page(vessel: str | None, run: str | None) -> str:
    """Return the page shown while a run's audit report is being made (it reloads itself)."""
    what = escape(f"{vessel or 'the vessel'}, run {run or '(last)'}")
    return (
        "<!doctype html><html lang='en'><head><meta charset='utf-8'>"
        "<meta http-equiv='refresh' content='1'><title>ebullio report: preparing</title>"
        f"<style>{STYLE}</style></head><body><main><h1>Preparing the audit report</h1>"
        f"<p class='status'>Replaying {what} through the estimator; this page reloads "
        "until the report is ready. A long log takes a minute or more.</p></main>"
        f"<footer><b>Caution. </b>{escape(SAFETY_TEXT)}</footer></body></html>"
    )


class IntegrityWatch:
    """Checks the board's recorder logs in a thread of its own, at start and then every
    ``every_s``; :meth:`warnings` gives the sentences to show (no I/O in a callback).

    A whole-chain check of a long log takes seconds, so it never runs in a request.
    """

    def __init__(self, paths: list[str], every_s: float = 600.0) -> None:
        self._paths = paths
        self._every_s = every_s
        self._checks: list[dict[str, object]] = []
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="board-integrity", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        from monitor.runs.logs import log_integrity

        while True:
            checks = []
            for path in self._paths:
                try:
                    checks.append(log_integrity(path))
                except Exception as exc:  # a log that cannot be read is said so, not raised
                    checks.append({"file": path, "state": "damaged", "reason": str(exc)})
            with self._lock:
                self._checks = checks
            if self._stop.wait(self._every_s):
                return

    def warnings(self) -> list[str]:
        """Return one sentence per log that is not intact (none before the first check)."""
        from monitor.runs.logs import integrity_warnings

        with self._lock:
            return integrity_warnings(self._checks)


def _board(source: str, first: dict, views: list, poll_ms: int, poll: bool = True) -> Dash:
    """Return a Dash app with the board's page around ``views``: the header naming the
    ``source``, the integrity banner, the caution, the store holding ``first`` and the
    poll (off when ``poll`` is False)."""
    app = Dash(__name__, title="ebullio board", update_title=None, compress=True)
    app.index_string = app.index_string.replace("{%css%}", "{%css%}<style>" + STYLE + "</style>")
    app.layout = html.Div([
        html.Header([html.H1("ebullio board"), html.Span(source, id=ids.LOG_NAME)]),
        html.Div(id=ids.INTEGRITY, className="integrity-failed", hidden=True),
        html.Main(views),
        html.Footer([html.B("Caution. "), SAFETY_TEXT]),
        dcc.Store(id=ids.STORE, data=first),
        dcc.Interval(id=ids.POLL, interval=poll_ms, disabled=not poll),
    ])  # fmt: skip
    return app


#: What the board over the engine says of what it shows and what it cannot.
ENGINE_NOTE = (
    "Figures from the NATS engine: each vessel's newest estimate as its worker put it in "
    "the estimates bucket, and the summaries of the runs that have ended, with their "
    "drift checks, from the runs stream. The charts hold the estimates this board has "
    "seen since it started (the filtered temperatures and the power, not the raw "
    "readings). Replaying a run and its audit report need a log, which the engine does "
    "not write yet: the readings stay in the engine's stream (docs/engine.md)."
)


def create_engine_app(servers: list[str], poll_ms: int = 2000,
                      watch: data.EngineWatch | None = None) -> Dash:  # fmt: skip
    """Return the board over the NATS engine's estimates bucket at ``servers``: the fleet
    and the vessel view, from a :class:`dashboard.data.EngineWatch` reading the bucket
    every ``poll_ms`` ms in its own thread (``watch`` given: that one)."""
    watch = watch or data.EngineWatch(servers, every_s=poll_ms / 1000.0)
    watch.wait_read(timeout_s=5.0)  # the first page shows the fleet when the engine answers
    first = watch.snapshot()
    ranked = fleet.fleet_rows(first)
    if ranked:
        first = {**first, "chosen": ranked[0]["vessel"]}
    note = html.Section([html.P(ENGINE_NOTE, className="status")], className="view")
    app = _board(f"engine: {watch.source}", first, [
        fleet.layout(), vessel.layout(first),
        maintenance.layout(list(first.get("vessels") or []), first.get("chosen")), note,
    ], poll_ms)  # fmt: skip

    @app.callback(
        Output(ids.STORE, "data"), Input(ids.POLL, "n_intervals"), Input(ids.VESSEL_PICK, "value")
    )
    def poll(_n: int | None, chosen: str | None) -> dict:
        return watch.snapshot(chosen)

    @app.callback(
        Output(ids.INTEGRITY, "children"), Output(ids.INTEGRITY, "hidden"),
        Input(ids.STORE, "data"),
    )  # fmt: skip
    def trouble(snapshot: dict | None) -> tuple[list, bool]:
        problem = (snapshot or {}).get("problem")
        if not problem:
            return [], True
        return [html.P(f"The engine's estimates bucket could not be read ({problem}): the "
                       "figures shown are the last read, and may be old.")], False  # fmt: skip

    fleet.register(app)
    vessel.register(app, watch.chart_data)
    maintenance.register(app, watch.history, reports=False, follow=True)
    return app


def create_app(log_path: str, poll_ms: int = 2000, more_logs: tuple[str, ...] = ()) -> Dash:
    """Return the board over the log at ``log_path``, refreshing every ``poll_ms`` ms.

    ``more_logs`` are further logs offered in the replay view (the first is always
    ``log_path``).
    """
    logs = [log_path, *more_logs]
    memo = Memo()
    watch = IntegrityWatch(logs)
    jobs = Jobs()  # slow work (a run replayed), away from the request threads

    def csv_replay(path: str) -> dict:
        return memo.get(data.replay_csv, path)  # type: ignore[return-value]

    first = data.load_snapshot(log_path, csv_replay=csv_replay)  # a file that is no log fails now
    ranked = fleet.fleet_rows(first)
    if ranked:  # open on the vessel that needs attention most (then the first by name)
        first = {**first, "chosen": ranked[0]["vessel"]}
    for extra in more_logs:
        data.load_snapshot(extra, csv_replay=csv_replay)
    shown = f"log: {first['log']}"
    if data.simulated_vessels(log_path):
        shown += " · simulated data: invented demo vessels, not real ones"
    app = _board(shown, first, [
        fleet.layout(), vessel.layout(first),
        maintenance.layout(list(first.get("vessels") or []), first.get("chosen")),
        replay.layout([Path(p).name for p in logs]),
    ], poll_ms, poll=first["kind"] != "csv")  # a CSV log does not change: read once  # fmt: skip

    @app.callback(
        Output(ids.STORE, "data"), Input(ids.POLL, "n_intervals"), Input(ids.VESSEL_PICK, "value")
    )
    def poll(_n: int | None, chosen: str | None) -> dict:
        return data.load_snapshot(log_path, chosen, csv_replay=csv_replay)

    @app.callback(
        Output(ids.INTEGRITY, "children"), Output(ids.INTEGRITY, "hidden"),
        Input(ids.POLL, "n_intervals"),
    )  # fmt: skip
    def integrity(_n: int | None) -> tuple[list, bool]:
        lines = watch.warnings()
        return [html.P(line) for line in lines], not lines

    fleet.register(app)
    vessel.register(
        app, lambda v, after: data.chart_data(log_path, v, after, csv_replay=csv_replay)
    )

    def history(path: str, chosen: str | None) -> dict:  # a CSV log's replay is reused
        return data.run_history(path, chosen, csv_replay)

    maintenance.register(app, lambda chosen: memo.get(history, log_path, chosen))  # type: ignore[arg-type,return-value]

    def listed(path: str) -> list:  # from the runs table, else a split, per file version
        return memo.get(data.list_runs, path)  # type: ignore[return-value]

    def ask_run(i: int, vessel_id: str, run: str, span: tuple[float, float] | None):
        path = logs[i]
        # a run with its span is from the runs table: it has ended and does not change;
        # one split from a log without that table is asked for again as the file grows
        key = ("replay", path, vessel_id, run, span, None if span else memo.version(path))
        return jobs.ask(key, data.replay_detail, path, vessel_id, run, None, span, separate=True)

    replay.register(app, lambda i: listed(logs[i]), ask_run)

    def pick_log() -> str:
        from flask import request

        try:
            return logs[int(request.args.get("log", "0"))]
        except (ValueError, IndexError):
            return log_path

    def pick_span() -> tuple[float, float] | None:
        """The run's span (``from``, ``to``, Unix s) when the link gives one."""
        from flask import request

        try:
            return float(request.args["from"]), float(request.args["to"])
        except (KeyError, ValueError):
            return None

    def pick_label(path: str, vessel_id: str | None, run: str | None) -> str | None:
        """The run asked for: by its span when given, else by its label."""
        span = pick_span()
        if span is None or not vessel_id:
            return run
        return data.replay_label(path, vessel_id, run or "", span)

    @app.server.route("/report")
    def report_page():  # the audit report of one run, made on demand (read-only)
        from flask import Response, redirect, request

        # A report replays the vessel's runs: a job in a child process, like a replay.
        # A link starts a fresh one and is sent on to its own address, which the
        # waiting page reloads until the report is there.
        job = request.args.get("job", "")
        if not job:
            query = {**request.args.to_dict(), "job": uuid.uuid4().hex}
            return redirect(f"/report?{urlencode(query)}", code=303)
        vessel_id, run = request.args.get("vessel"), request.args.get("run")
        state = jobs.ask(("report", job), data.audit_report, pick_log(), vessel_id, run,
                         pick_span(), separate=True)  # fmt: skip
        if state.status == "done":
            return Response(state.answer, mimetype="text/html")
        if state.status == "failed":
            return Response(f"no report: {state.error}", 404, mimetype="text/plain")
        return Response(waiting_page(vessel_id, run), mimetype="text/html")

    @app.server.route("/export.csv")
    def export_page():  # one run as a CSV interchange file, made on demand (read-only)
        from flask import Response, request

        from drivers.errors import EbullioError
        from monitor.runs.streams import export_run_csv

        vessel_id, run = request.args.get("vessel", ""), request.args.get("run", "")
        out = io.StringIO()
        try:
            run = pick_label(pick_log(), vessel_id, run) or run
            export_run_csv(pick_log(), out, vessel_id, run)
        except EbullioError as exc:
            return Response(f"no export: {exc}", 404, mimetype="text/plain")
        name = f"{Path(pick_log()).stem}-{vessel_id}-run{run}.csv".replace("/", "_")
        disposition = {"Content-Disposition": f'attachment; filename="{name}"'}
        return Response(out.getvalue(), mimetype="text/csv", headers=disposition)

    return app
