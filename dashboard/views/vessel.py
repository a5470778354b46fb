"""Vessel view: one vessel live: the figures at a glance, readings with the forecast, estimates."""

from __future__ import annotations

import plotly.graph_objects as go
from dash import Dash, Input, Output, dcc, html
from plotly.subplots import make_subplots

from dashboard import ids
from dashboard.theme import LEVEL_MARK, duration_text
from monitor import plots
from monitor.plots import PALETTE as COLOURS

UIREVISION = "vessel-view"  # constant: the user's zoom survives updates


def _pm(value: object, std: object, digits: int, unit: str) -> str:
    if not isinstance(value, int | float):
        return "-"
    text = f"{value:.{digits}f}"
    if isinstance(std, int | float):
        text += f" ± {std:.{digits}f}"
    return f"{text} {unit}"


def figures(latest: dict | None) -> list[html.Div]:
    """Return the at-a-glance figures of a vessel's latest estimate."""
    e = latest or {}
    eta, lo, hi = (
        e.get("time_to_target_s"),
        e.get("time_to_target_lo_s"),
        e.get("time_to_target_hi_s"),
    )
    if e.get("target_c") is None:
        countdown = "-"
    elif eta is None:
        countdown = e.get("target_reason") or "not reachable"
    else:
        countdown = f"{duration_text(eta)} (90 %: {duration_text(lo)} to {duration_text(hi)})"
    water = e.get("water_c")
    power = e.get("power_w")
    items = [
        ("water", f"{water:.1f} °C" if isinstance(water, int | float) else "-"),
        ("phase", e.get("phase") or "-"),
        ("time to target" + (f" ({e['target_c']:.1f} °C)" if e.get("target_c") else ""),
         countdown),
        ("power", f"{power:.0f} W" if isinstance(power, int | float) else "-"),
        ("water mass", _pm(e.get("water_mass_kg"), e.get("water_mass_std"), 3, "kg")),
        ("UA", _pm(e.get("ua_w_per_k"), e.get("ua_std"), 3, "W/K")),
        ("element conductance", _pm(e.get("element_conductance_w_per_k"),
                                    e.get("element_conductance_std"), 1, "W/K")),
    ]  # fmt: skip
    return [html.Div([html.Div(k, className="label"), html.Div(v, className="value")],
                     className="figure") for k, v in items]  # fmt: skip


def flag_list(latest: dict | None) -> html.Ul:
    """Return the active flags of the latest estimate as plain sentences."""
    flags = (latest or {}).get("flags") or []
    if not flags:
        return html.Ul([html.Li("No flags: nothing needs attention.")])
    return html.Ul([html.Li(f"{LEVEL_MARK.get(str(f['level']), f['level'])}: {f['message']}",
                            className=f"level-{f['level']}") for f in flags])  # fmt: skip


def readings_figure(detail: dict | None) -> go.Figure:
    """Return temperatures and power against time, with the forecast to the target ahead."""
    detail = detail or {}
    series = detail.get("series") or {}
    fig = make_subplots(specs=[[{"secondary_y": True}]])
    now = max((t[-1] for s in series.values() if (t := s.get("t"))), default=None)
    if now is None:
        fig.update_layout(uirevision=UIREVISION, title="no readings yet")
        return fig

    def minutes(ts: list[float]) -> list[float]:
        return [(x - now) / 60.0 for x in ts]

    for channel in ("water", "element", "ambient"):
        s = series.get(channel) or {}
        if s.get("t"):
            fig.add_trace(go.Scatter(x=minutes(s["t"]), y=s["y"], name=f"{channel} (°C)",
                                     mode="lines", line={"color": COLOURS[channel]}))  # fmt: skip
    p = series.get("power") or {}
    if p.get("t"):
        fig.add_trace(go.Scatter(x=minutes(p["t"]), y=p["y"], name="power (W)", mode="lines",
                                 line={"color": COLOURS["power"], "width": 1, "dash": "dot"}),
                      secondary_y=True)  # fmt: skip
    e = detail.get("latest") or {}
    eta, lo, hi, target = (e.get(k) for k in ("time_to_target_s", "time_to_target_lo_s",
                                              "time_to_target_hi_s", "target_c"))  # fmt: skip
    if all(isinstance(v, int | float) for v in (eta, lo, hi, target, e.get("water_c"))):
        fig.add_trace(go.Scatter(x=[0.0, eta / 60.0], y=[e["water_c"], target],
                                 name="forecast to target", mode="lines",
                                 line={"color": COLOURS["forecast"], "dash": "dash"}))  # fmt: skip
        fig.add_vrect(x0=lo / 60.0, x1=hi / 60.0, fillcolor=COLOURS["forecast_band"],
                      line_width=0, annotation_text="90 % interval")  # fmt: skip
    fig.update_xaxes(title_text="minutes from the latest reading")
    fig.update_yaxes(title_text="temperature (°C)", secondary_y=False)
    fig.update_yaxes(title_text="power (W)", secondary_y=True, showgrid=False)
    margin = {"l": 60, "r": 60, "t": 30, "b": 50}
    fig.update_layout(uirevision=UIREVISION, template="plotly_white", height=380,
                      margin=margin, legend={"orientation": "h"})  # fmt: skip
    return fig


def estimates_figure(detail: dict | None) -> go.Figure:
    """Return the estimates converging over time, each with its ±2σ band."""
    est = (detail or {}).get("estimates") or {}
    fig = make_subplots(rows=3, cols=1, shared_xaxes=True, vertical_spacing=0.08,
                        subplot_titles=("water mass (kg)", "UA (W/K)",
                                        "element conductance (W/K)"))  # fmt: skip
    t = est.get("t") or []
    if t:
        now = t[-1]
        x = [(v - now) / 60.0 for v in t]
        for row, (key, sd) in enumerate((("water_mass_kg", "water_mass_std"),
                                          ("ua_w_per_k", "ua_std"),
                                          ("element_conductance_w_per_k",
                                           "element_conductance_std")), start=1):  # fmt: skip
            ys, sds = est.get(key) or [], est.get(sd) or []
            if any(v is not None for v in ys):
                plots.add_band(fig, x, ys, sds, row=row)
    fig.update_xaxes(title_text="minutes from the latest estimate", row=3, col=1)
    fig.update_layout(uirevision=UIREVISION, template="plotly_white", height=520,
                      margin={"l": 60, "r": 30, "t": 40, "b": 50})  # fmt: skip
    return fig


def render_vessel(snapshot: dict | None) -> tuple[list, html.Ul, go.Figure, go.Figure]:
    """Return the figures, flags and both charts of the snapshot's chosen vessel."""
    detail = (snapshot or {}).get("detail") or {}
    latest = detail.get("latest")
    return figures(latest), flag_list(latest), readings_figure(detail), estimates_figure(detail)


def vessel_options(snapshot: dict | None) -> list[dict[str, str]]:
    """Return the vessel picker's options."""
    return [{"label": v, "value": v} for v in (snapshot or {}).get("vessels") or []]


def layout(first: dict | None = None) -> html.Section:
    """Return the vessel view's layout, showing the first snapshot's chosen vessel."""
    return html.Section([
        html.H2("Vessel"),
        dcc.Dropdown(id=ids.VESSEL_PICK, clearable=False, placeholder="pick a vessel",
                     options=vessel_options(first), value=(first or {}).get("chosen")),
        html.Div(id=ids.VESSEL_FIGURES, className="figures"),
        html.Div(id=ids.VESSEL_FLAGS, className="flags"),
        dcc.Graph(id=ids.VESSEL_READINGS, config={"displaylogo": False}),
        dcc.Graph(id=ids.VESSEL_ESTIMATES, config={"displaylogo": False}),
    ], className="view")  # fmt: skip


def register(app: Dash) -> None:
    """Attach the vessel view's callbacks to ``app``."""
    app.callback(
        Output(ids.VESSEL_FIGURES, "children"),
        Output(ids.VESSEL_FLAGS, "children"),
        Output(ids.VESSEL_READINGS, "figure"),
        Output(ids.VESSEL_ESTIMATES, "figure"),
        Input(ids.STORE, "data"),
    )(render_vessel)
    app.callback(Output(ids.VESSEL_PICK, "options"), Input(ids.STORE, "data"))(vessel_options)
