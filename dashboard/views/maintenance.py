"""Maintenance view: each tracked figure of a vessel across its runs, the baseline, the flags.

The history comes from the run summaries in the log, else from a replay of it
(:func:`dashboard.data.run_history`), read when a vessel is picked, not on every
poll; the chart is a pure function of it.
Each run links to its audit report, made on demand by the board's ``/report`` page,
and says its verdict: a doubtful run (not judged for drift) is crossed on the chart
and spelt out, with its reasons, beside its link.
"""

from __future__ import annotations

from collections.abc import Callable
from urllib.parse import urlencode

import plotly.graph_objects as go
from dash import Dash, Input, Output, State, dcc, html

from dashboard import ids
from dashboard.theme import LEVEL_MARK, verdict_mark
from monitor.reports import plots


def history_figure(history: dict | None) -> go.Figure:
    """Return the vessel's tracked figures across runs, doubtful runs crossed as not judged.

    :func:`monitor.reports.plots.history_figure`, the audit report's own chart.
    """
    history = history or {}
    return plots.history_figure(history.get("runs") or [], history.get("baselines") or {},
                                uirevision="maintenance")  # fmt: skip


def standing(history: dict | None) -> html.Div:
    """Return what stands against the vessel after its runs: each warning of its latest
    judged run (:func:`monitor.runs.drift.standing_after`; a scaling warning says the
    equivalent scale thickness range when the element's area is known), and a
    not-judged last run; or that nothing does."""
    from monitor.runs.drift import standing_after

    flags = standing_after((history or {}).get("runs") or [])
    items = []
    for f in flags:
        if f.get("level") not in ("warning", "alarm") and f.get("name") != "not_judged":
            continue
        text = str(f.get("message") or f.get("name"))  # scaling's gives the scale thickness
        level = str(f.get("level"))
        mark = html.Span(LEVEL_MARK.get(level, level), className=f"level-{level}")
        items.append(html.Li([mark, " " + text]))
    if not items:
        return html.Div([html.P("Nothing stands against this vessel: no drift warning on its "
                                "latest judged run.")])  # fmt: skip
    return html.Div([html.H3("Where it stands"), html.Ul(items)])


def report_links(history: dict | None, reports: bool = True) -> html.Ul:
    """Return a link to the audit report of every run of the vessel (with ``reports``
    False, as over the engine, which keeps no log to report from: each run and its
    verdict, without a link)."""
    history = history or {}
    vessel = history.get("chosen")
    items = []
    for r in history.get("runs") or []:
        span = (r.get("start_t"), r.get("end_t"))
        # the span lets the report find a live-recorded run whatever the replay calls it
        where = {"from": span[0], "to": span[1]} if all(
            isinstance(v, int | float) for v in span) else {}  # fmt: skip
        query = urlencode({"vessel": vessel, "run": r.get("run"), **where})
        verdict = r.get("verdict") or {}
        doubtful = verdict.get("status") == "doubtful"
        why = " ".join(str(x) for x in verdict.get("reasons") or [])
        when = r.get("start_utc") or "time not recorded"
        items.append(html.Li([
            html.A(f"audit report of run {r.get('run')} ({when})",
                   href=f"/report?{query}", target="_blank")
            if reports else html.Span(f"run {r.get('run')} ({when})"),
            html.Span(f" {verdict_mark(verdict)}" + (f": {why}" if doubtful and why else ""),
                      className=f"verdict-{verdict.get('status', 'unknown')}",
                      style={"fontWeight": 700} if doubtful else {}),
        ]))  # fmt: skip
    return html.Ul(items or [html.Li("No runs yet.")])


def layout(vessels: list[str], chosen: str | None = None) -> html.Section:
    """Return the maintenance view's layout, open on ``chosen`` (else the first vessel)."""
    return html.Section([
        html.H2("Maintenance"),
        dcc.Dropdown(id=ids.MAINT_PICK, options=[{"label": v, "value": v} for v in vessels],
                     value=chosen if chosen in vessels else (vessels[0] if vessels else None),
                     clearable=False),
        html.Div(id=ids.MAINT_STANDING),
        dcc.Loading(dcc.Graph(id=ids.MAINT_CHART, config={"displaylogo": False})),
        html.Div(id=ids.MAINT_REPORTS),
    ], className="view")  # fmt: skip


def picker(snapshot: dict | None, chosen: str | None) -> tuple[list[dict[str, str]], str | None]:
    """Return the vessel picker's options from a snapshot, and its value: the one
    chosen while it is still there, else the first (a fleet met after the page opened,
    as over the engine)."""
    vessels = list((snapshot or {}).get("vessels") or [])
    value = chosen if chosen in vessels else (vessels[0] if vessels else None)
    return [{"label": v, "value": v} for v in vessels], value


def register(app: Dash, load_history: Callable[[str | None], dict], reports: bool = True,
             follow: bool = False) -> None:  # fmt: skip
    """Attach the view's callback; ``load_history(vessel)`` reads the log (the app's I/O);
    ``reports`` False: no audit report links (:func:`report_links`); ``follow``: the
    picker's vessels follow the store's (:func:`picker`), for a fleet that changes."""
    if follow:
        app.callback(Output(ids.MAINT_PICK, "options"), Output(ids.MAINT_PICK, "value"),
                     Input(ids.STORE, "data"), State(ids.MAINT_PICK, "value"))(picker)  # fmt: skip

    @app.callback(Output(ids.MAINT_STANDING, "children"), Output(ids.MAINT_CHART, "figure"),
                  Output(ids.MAINT_REPORTS, "children"),
                  Input(ids.MAINT_PICK, "value"))  # fmt: skip
    def show(vessel: str | None):
        history = load_history(vessel)
        return standing(history), history_figure(history), report_links(history, reports)
