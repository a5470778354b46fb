"""Maintenance view: each tracked figure of a vessel across its runs, the baseline, the flags.

The history comes from a replay of the whole log (:func:`dashboard.data.run_history`),
run when a vessel is picked, not on every poll; the chart is a pure function of it.
Each run links to its audit report, made on demand by the board's ``/report`` page.
"""

from __future__ import annotations

from collections.abc import Callable
from urllib.parse import urlencode

import plotly.graph_objects as go
from dash import Dash, Input, Output, dcc, html
from plotly.subplots import make_subplots

from dashboard import ids
from dashboard.theme import COLOURS
from monitor.drift import RULES

UNITS = {"element_conductance_w_per_k": "W/K", "ua_w_per_k": "W/K",
         "heating_power_at_rated_voltage_w": "W"}  # fmt: skip


def history_figure(history: dict | None) -> go.Figure:
    """Return each tracked figure across runs (±2σ bars), the baseline ±2σ band and flags."""
    history = history or {}
    runs = history.get("runs") or []
    fig = make_subplots(rows=len(RULES), cols=1, shared_xaxes=True, vertical_spacing=0.09,
                        subplot_titles=[f"{r.what} ({UNITS[r.key]})" for r in RULES])  # fmt: skip
    labels = [str(r.get("run")) for r in runs]
    for row, rule in enumerate(RULES, start=1):
        pts = [(lab, r.get(rule.key)) for lab, r in zip(labels, runs, strict=True)]
        pts = [(lab, e) for lab, e in pts if isinstance(e, dict) and e.get("value") is not None]
        if not pts:
            continue
        fig.add_trace(go.Scatter(
            x=[lab for lab, _ in pts], y=[e["value"] for _, e in pts], mode="markers+lines",
            name=rule.name, line={"color": COLOURS["water"]},
            error_y={"type": "data", "array": [2 * (e.get("std") or 0.0) for _, e in pts]},
        ), row=row, col=1)  # fmt: skip
        base = (history.get("baselines") or {}).get(rule.key)
        if base:
            fig.add_hrect(y0=base["mean"] - 2 * base["sd"], y1=base["mean"] + 2 * base["sd"],
                          fillcolor=COLOURS["band"], line_width=0, row=row, col=1)  # fmt: skip
        flagged = [(lab, r.get(rule.key)) for lab, r in zip(labels, runs, strict=True)
                   if any(f["name"] == rule.name and f["level"] in ("warning", "alarm")
                          for f in r.get("drift") or [])]  # fmt: skip
        flagged = [(lab, e) for lab, e in flagged if isinstance(e, dict)]
        if flagged:
            fig.add_trace(go.Scatter(
                x=[lab for lab, _ in flagged], y=[e["value"] for _, e in flagged],
                mode="markers", name=f"{rule.name} flag",
                marker={"symbol": "triangle-up", "size": 13, "color": COLOURS["element"]},
            ), row=row, col=1)  # fmt: skip
    fig.update_xaxes(title_text="run", type="category", row=len(RULES), col=1)
    margin = {"l": 60, "r": 30, "t": 40, "b": 50}
    fig.update_layout(height=250 * len(RULES), template="plotly_white", showlegend=False,
                      uirevision="maintenance", margin=margin)  # fmt: skip
    return fig


def report_links(history: dict | None) -> html.Ul:
    """Return a link to the audit report of every run of the vessel."""
    history = history or {}
    vessel = history.get("chosen")
    items = []
    for r in history.get("runs") or []:
        query = urlencode({"vessel": vessel, "run": r.get("run")})
        items.append(html.Li(html.A(f"audit report of run {r.get('run')} "
                                    f"({r.get('start_utc') or 'time not recorded'})",
                                    href=f"/report?{query}", target="_blank")))  # fmt: skip
    return html.Ul(items or [html.Li("No runs yet.")])


def layout(vessels: list[str]) -> html.Section:
    """Return the maintenance view's layout."""
    return html.Section([
        html.H2("Maintenance"),
        dcc.Dropdown(id=ids.MAINT_PICK, options=[{"label": v, "value": v} for v in vessels],
                     value=vessels[0] if vessels else None, clearable=False),
        dcc.Loading(dcc.Graph(id=ids.MAINT_CHART, config={"displaylogo": False})),
        html.Div(id=ids.MAINT_REPORTS),
    ], className="view")  # fmt: skip


def register(app: Dash, load_history: Callable[[str | None], dict]) -> None:
    """Attach the view's callback; ``load_history(vessel)`` reads the log (the app's I/O)."""

    @app.callback(Output(ids.MAINT_CHART, "figure"), Output(ids.MAINT_REPORTS, "children"),
                  Input(ids.MAINT_PICK, "value"))  # fmt: skip
    def show(vessel: str | None):
        history = load_history(vessel)
        return history_figure(history), report_links(history)
