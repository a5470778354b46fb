"""The board: composes the views over one log. ``create_app(log_path)`` returns the Dash app.

The only callback that reads the file is :func:`poll` (through
:func:`dashboard.data.load_snapshot`, read-only); it fills the store, and every view
is a pure function of the store. The log path lives in the app factory's closure,
not in module state. The board never writes to the log.
"""

from __future__ import annotations

from dash import Dash, Input, Output, dcc, html

from dashboard import ids
from dashboard.data import load_snapshot, run_history
from dashboard.views import fleet, maintenance, vessel
from monitor.safety import SAFETY_TEXT

STYLE = """
body { font-family: system-ui, sans-serif; margin: 0; color: #1d1d1d; background: #fbfbfa; }
header, footer, main { padding: .6rem 1.2rem; }
header { background: #123; color: #fff; display: flex; gap: 1rem; align-items: baseline; }
header h1 { font-size: 1.3rem; margin: 0; }
footer { font-size: .85rem; border-top: 2px solid #D55E00; background: #fff7f0; }
.view { margin-bottom: 1.5rem; }
.figures { display: flex; flex-wrap: wrap; gap: .6rem; margin: .6rem 0; }
.figure { background: #fff; border: 1px solid #ddd; padding: .4rem .7rem; min-width: 9rem; }
.figure .label { font-size: .8rem; color: #555; } .figure .value { font-size: 1.15rem; }
table.fleet { border-collapse: collapse; width: 100%; background: #fff; }
table.fleet th, table.fleet td { border-bottom: 1px solid #e3e3e3; padding: .3rem .5rem;
  text-align: left; }
.level-alarm { color: #a11; font-weight: 700; } .level-warning { color: #8a4b00; }
@media (max-width: 900px) { .figure { min-width: 42%; } }
"""


def create_app(log_path: str, poll_ms: int = 2000) -> Dash:
    """Return the board over the log at ``log_path``, refreshing every ``poll_ms`` ms."""
    first = load_snapshot(log_path)  # fails early, with a clear error, on a file that is no log
    app = Dash(__name__, title="ebullio board", update_title=None)
    app.index_string = app.index_string.replace("{%css%}", "{%css%}<style>" + STYLE + "</style>")
    app.layout = html.Div([
        html.Header([html.H1("ebullio board"), html.Span(f"log: {first['log']}",
                                                         id=ids.LOG_NAME)]),
        html.Main([fleet.layout(), vessel.layout(first),
                   maintenance.layout(list(first.get("vessels") or []))]),
        html.Footer([html.B("Caution. "), SAFETY_TEXT]),
        dcc.Store(id=ids.STORE, data=first),
        # a CSV log does not change: read once (each read replays it), poll only a live log
        dcc.Interval(id=ids.POLL, interval=poll_ms, disabled=first["kind"] == "csv"),
    ])  # fmt: skip

    @app.callback(
        Output(ids.STORE, "data"), Input(ids.POLL, "n_intervals"), Input(ids.VESSEL_PICK, "value")
    )
    def poll(_n: int | None, chosen: str | None) -> dict:
        return load_snapshot(log_path, chosen)

    fleet.register(app)
    vessel.register(app)
    maintenance.register(app, lambda chosen: run_history(log_path, chosen))

    @app.server.route("/report")
    def report_page():  # the audit report of one run, made on demand (read-only)
        from flask import Response, request

        from drivers.errors import EbullioError
        from monitor.report import build_report

        try:
            page = build_report(log_path, request.args.get("vessel"), request.args.get("run"))
        except EbullioError as exc:
            return Response(f"no report: {exc}", 404, mimetype="text/plain")
        return Response(page, mimetype="text/html")

    return app
