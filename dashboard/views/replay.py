"""Replay view: pick a log and a run, scrub through it, download its CSV and its report.

The run is replayed through a fresh estimator (the figures ``ebullio replay`` gives,
not the ones recorded live). A long run takes a while (a week at 1 Hz, most of a
minute), so the replay runs in a child process (:mod:`dashboard.jobs`)
and the view polls it, saying how far it has got; no callback waits for it. The
app keeps each replay, so moving the scrubber only moves the cursor on the charts
(a ``Patch``) and shows the figures at that instant.
"""

from __future__ import annotations

from bisect import bisect_right
from collections.abc import Callable
from urllib.parse import urlencode

from dash import Dash, Input, Output, Patch, State, ctx, dcc, html, no_update

from dashboard import ids
from dashboard.theme import iso_minutes
from dashboard.views.vessel import estimates_figure, figures, readings_figure
from monitor.reports.plots import PALETTE

UIREVISION = "replay-view"


def run_options(runs: list[dict]) -> list[dict[str, str]]:
    """Return the run picker's options; a value is 'vessel|run', then '|start|end' (Unix s)
    for a run from the runs table (ended, found again by its span)."""
    return [{"label": f"{r['vessel']} · run {r['run']} · {iso_minutes(r['start_t'])} UTC · "
                      f"{_length_text(r['end_t'] - r['start_t'])}",
             "value": f"{r['vessel']}|{r['run']}"
                      + (f"|{r['start_t']!r}|{r['end_t']!r}" if r.get("recorded") else "")}
            for r in runs]  # fmt: skip


def parse_choice(value: str) -> tuple[str, str, tuple[float, float] | None]:
    """Return (vessel, run label, span or None) from a run picker value."""
    head, *times = value.rsplit("|", 2)
    vessel, _, label = head.partition("|")
    try:
        return vessel, label, (float(times[0]), float(times[1]))
    except (IndexError, ValueError):  # 'vessel|run': a run split from the log
        return value.partition("|")[0], value.partition("|")[2], None


def _length_text(seconds: float) -> str:
    hours = seconds / 3600.0
    return f"{hours:.1f} h" if hours >= 2.0 else f"{seconds / 60.0:.0f} min"


def waiting_text(state) -> str:
    """Return what the view says while a run is being replayed (or why it could not be)."""
    if state.status == "failed":
        return f"This run could not be replayed: {state.error}"
    if state.status == "running":
        done = "" if state.progress is None else f" ({state.progress * 100.0:.0f} % done)"
        return f"Reading the log and replaying the run through the estimator{done}..."
    return ""


def _span(detail: dict) -> tuple[float, float]:
    ts = [t for s in (detail.get("series") or {}).values() for t in (s.get("t") or [])[:1]]
    ends = [s["t"][-1] for s in (detail.get("series") or {}).values() if s.get("t")]
    return (min(ts), max(ends)) if ts else (0.0, 0.0)


def cursor_shape(t_s: float) -> dict:
    """Return the scrub cursor: a vertical line at Unix time ``t_s`` across the chart."""
    return {"type": "line", "xref": "x", "yref": "paper", "x0": t_s * 1000.0,
            "x1": t_s * 1000.0, "y0": 0, "y1": 1,
            "line": {"color": PALETTE["forecast"], "width": 2}}  # fmt: skip


def latest_at(detail: dict, t_s: float) -> dict | None:
    """Return the figures of the last estimate at or before ``t_s`` (None before the first)."""
    est = detail.get("estimates") or {}
    times = est.get("t") or []
    i = bisect_right(times, t_s) - 1
    if i < 0:
        return None
    out = {k: v[i] for k, v in est.items() if isinstance(v, list) and len(v) == len(times)}
    power = (detail.get("series") or {}).get("power") or {}
    pt, py = power.get("t") or [], power.get("y") or []
    j = bisect_right(pt, t_s) - 1
    out["power_w"] = py[j] if j >= 0 else None
    return out


def show_run(detail: dict) -> tuple:
    """Return the charts at the start of a run, the scrubber's range and the figures."""
    start, end = _span(detail)
    readings, _ = readings_figure({"series": detail.get("series")})
    estimates = estimates_figure(detail)
    for fig in (readings, estimates):
        fig["layout"].update(uirevision=UIREVISION, shapes=[cursor_shape(start)])
    length = max(1.0, end - start)
    marks = {round(length * f): f"{length * f / 60.0:.0f} min" for f in (0, 0.25, 0.5, 0.75, 1)}
    return readings, estimates, round(length), 0, marks, figures(latest_at(detail, start))


def scrub(detail: dict, offset_s: float) -> tuple:
    """Return patches that move both charts' cursor ``offset_s`` into the run, and the
    figures at that instant."""
    start, _ = _span(detail)
    at = start + float(offset_s or 0.0)
    patches = []
    for _ in range(2):
        p = Patch()
        p["layout"]["shapes"] = [cursor_shape(at)]
        patches.append(p)
    return patches[0], patches[1], figures(latest_at(detail, at))


def download_links(log_index: int, vessel: str, run: str) -> list:
    """Return the links to the run's CSV export and its audit report."""
    query = urlencode({"log": log_index, "vessel": vessel, "run": run})
    return [html.A("download this run as CSV", href=f"/export.csv?{query}",
                   className="button"), " ",
            html.A("open the audit report of this run", href=f"/report?{query}",
                   target="_blank", className="button")]  # fmt: skip


def layout(log_names: list[str]) -> html.Section:
    """Return the replay view's layout over the logs the board was given."""
    return html.Section([
        html.H2("Replay"),
        html.P("Any run of a log, replayed through the estimator as an auditor would."),
        html.Div([
            dcc.Dropdown(id=ids.REPLAY_LOG, clearable=False, value=0,
                         options=[{"label": n, "value": i} for i, n in enumerate(log_names)]),
            dcc.Dropdown(id=ids.REPLAY_RUN, clearable=False, placeholder="pick a run"),
        ], className="pickers"),
        html.Div([
            # the box beside the slider takes seconds; the marks under it are minutes
            html.Label("Position in the run, s from its start (marks in minutes)",
                       htmlFor=ids.REPLAY_SCRUB, className="status"),
            dcc.Slider(id=ids.REPLAY_SCRUB, min=0, max=1, step=1, value=0, updatemode="drag"),
        ], className="scrubber"),
        html.Div(id=ids.REPLAY_STATUS, className="status", role="status"),
        dcc.Interval(id=ids.REPLAY_WAIT, interval=700, disabled=True),
        html.Div(id=ids.REPLAY_FIGURES, className="figures"),
        html.Div(id=ids.REPLAY_LINKS, className="links"),
        dcc.Loading(dcc.Graph(id=ids.REPLAY_READINGS, config={"displaylogo": False})),
        dcc.Graph(id=ids.REPLAY_ESTIMATES, config={"displaylogo": False}),
    ], className="view")  # fmt: skip


def register(
    app: Dash,
    list_runs: Callable[[int], list[dict]],
    ask_run: Callable[[int, str, str, tuple[float, float] | None], object],
) -> None:
    """Attach the view's callbacks; ``list_runs(log)`` lists a log's runs and
    ``ask_run(log, vessel, run, span)`` returns the replay's :class:`~dashboard.jobs.JobState`
    (the replay runs in a child process of the board's; the view polls until it is done)."""

    @app.callback(Output(ids.REPLAY_RUN, "options"), Output(ids.REPLAY_RUN, "value"),
                  Input(ids.REPLAY_LOG, "value"), Input(ids.POLL, "n_intervals"),
                  State(ids.REPLAY_RUN, "options"), State(ids.REPLAY_RUN, "value"))  # fmt: skip
    def pick_log(log_index: int | None, _n: int | None, shown: list | None, chosen: str | None):
        # runs that end while the page is open join the list; the one picked stays picked
        options = run_options(list_runs(int(log_index or 0)))
        if options == shown and ctx.triggered_id == ids.POLL:
            return no_update, no_update
        values = [o["value"] for o in options]
        keep = chosen in values and ctx.triggered_id == ids.POLL
        return options, chosen if keep else (values[-1] if values else None)

    @app.callback(
        Output(ids.REPLAY_READINGS, "figure"),
        Output(ids.REPLAY_ESTIMATES, "figure"),
        Output(ids.REPLAY_SCRUB, "max"),
        Output(ids.REPLAY_SCRUB, "value"),
        Output(ids.REPLAY_SCRUB, "marks"),
        Output(ids.REPLAY_FIGURES, "children", allow_duplicate=True),
        Output(ids.REPLAY_LINKS, "children"),
        Output(ids.REPLAY_STATUS, "children"),
        Output(ids.REPLAY_WAIT, "disabled"),
        Input(ids.REPLAY_RUN, "value"),
        Input(ids.REPLAY_LOG, "value"),
        Input(ids.REPLAY_WAIT, "n_intervals"),
        prevent_initial_call="initial_duplicate",
    )
    def pick_run(choice: str | None, log_index: int | None, _n: int | None):
        if not choice:
            return (*(no_update,) * 7, "", True)
        vessel, run, span = parse_choice(choice)
        state = ask_run(int(log_index or 0), vessel, run, span)
        if state.status != "done":  # type: ignore[attr-defined]
            return (*(no_update,) * 7, waiting_text(state), state.status == "failed")  # type: ignore[attr-defined]
        detail = state.answer  # type: ignore[attr-defined]
        links = download_links(int(log_index or 0), vessel, detail["run"])
        return (*show_run(detail), links, "", True)

    @app.callback(
        Output(ids.REPLAY_READINGS, "figure", allow_duplicate=True),
        Output(ids.REPLAY_ESTIMATES, "figure", allow_duplicate=True),
        Output(ids.REPLAY_FIGURES, "children"),
        Input(ids.REPLAY_SCRUB, "value"),
        State(ids.REPLAY_RUN, "value"),
        State(ids.REPLAY_LOG, "value"),
        prevent_initial_call=True,
    )
    def move(offset_s: float | None, choice: str | None, log_index: int | None):
        if not choice:
            return no_update, no_update, no_update
        vessel, run, span = parse_choice(choice)
        state = ask_run(int(log_index or 0), vessel, run, span)
        if state.status != "done":  # type: ignore[attr-defined]
            return no_update, no_update, no_update
        return scrub(state.answer, offset_s or 0.0)  # type: ignore[attr-defined]
