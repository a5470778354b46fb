"""Vessel view: one vessel live: the figures at a glance, readings with the forecast, estimates."""

from __future__ import annotations

from collections.abc import Callable

from dash import Dash, Input, Output, Patch, State, dcc, html, no_update

from dashboard import ids
from dashboard.theme import CHART_GROUND, LEVEL_MARK, chart_axis, duration_text
from monitor.reports import plots
from monitor.reports.plots import PALETTE as COLOURS

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


def flag_list(latest: dict | None, drift: list[dict] | None = None) -> html.Ul:
    """Return the active flags as plain sentences: the latest estimate's, then those the
    vessel's last ended run raised against its earlier runs (scaling and the like)."""
    flags = [*((latest or {}).get("flags") or []),
             *({**f, "message": f"Last run: {f['message']}"} for f in drift or [])]  # fmt: skip
    if not flags:
        return html.Ul([html.Li("No flags: nothing needs attention.")])
    return html.Ul([html.Li(f"{LEVEL_MARK.get(str(f['level']), f['level'])}: {f['message']}",
                            className=f"level-{f['level']}") for f in flags])  # fmt: skip


#: Points appended to the live charts before they are drawn afresh (re-downsampled).
MAX_APPENDED = 1800


def _ms(ts: list[float]) -> list[float]:
    """Unix seconds to the milliseconds a Plotly date axis reads (UTC)."""
    return [x * 1000.0 for x in ts]


def _forecast(latest: dict | None) -> tuple[dict, list[dict]]:
    """Return the forecast trace's x/y (empty when there is none) and its interval shape."""
    e = latest or {}
    eta, lo, hi, target, water, now = (e.get(k) for k in (
        "time_to_target_s", "time_to_target_lo_s", "time_to_target_hi_s", "target_c",
        "water_c", "t"))  # fmt: skip
    if not all(isinstance(v, int | float) for v in (eta, lo, hi, target, water, now)):
        return {"x": [], "y": []}, []
    shape = {"type": "rect", "xref": "x", "yref": "paper", "x0": (now + lo) * 1000.0,
             "x1": (now + hi) * 1000.0, "y0": 0, "y1": 1, "line": {"width": 0},
             "fillcolor": COLOURS["forecast_band"], "layer": "below"}  # fmt: skip
    return {"x": [now * 1000.0, (now + eta) * 1000.0], "y": [water, target]}, [shape]


def _line(x: list, y: list, **style: object) -> dict[str, object]:
    return {"type": "scatter", "mode": "lines", "x": x, "y": y, **style}


def readings_figure(detail: dict | None) -> tuple[dict, dict[str, int]]:
    """Return temperatures and power against time (UTC) with the forecast to the target
    ahead of now and its 90 % interval as a band; and which trace holds which series.

    The figure is a plain Plotly figure dict (what Dash sends): building ``go.Figure``
    objects validated every point and cost most of a first draw on a long log.
    """
    detail = detail or {}
    series = detail.get("series") or {}
    data: list[dict[str, object]] = []
    traces: dict[str, int] = {}
    for channel in ("water", "element", "ambient"):
        s = series.get(channel) or {}
        if s.get("t"):
            traces[channel] = len(data)
            data.append(_line(_ms(s["t"]), list(s["y"]), name=f"{channel} (°C)",
                              line={"color": COLOURS[channel]}))  # fmt: skip
    p = series.get("power") or {}
    if p.get("t"):
        traces["power"] = len(data)
        data.append(_line(_ms(p["t"]), list(p["y"]), name="power (W)", yaxis="y2",
                          line={"color": COLOURS["power"], "width": 1, "dash": "dot"}))  # fmt: skip
    if not traces:
        layout = {**CHART_GROUND, "uirevision": UIREVISION, "title": {"text": "no readings yet"}}
        return {"data": [], "layout": layout}, traces
    line, shapes = _forecast(detail.get("latest"))
    traces["forecast"] = len(data)
    data.append(_line(line["x"], line["y"], name="forecast to target (90 % band)",
                      line={"color": COLOURS["forecast"], "dash": "dash"}))  # fmt: skip
    layout = {
        **CHART_GROUND, "uirevision": UIREVISION, "height": 380, "shapes": shapes,
        "margin": {"l": 60, "r": 60, "t": 40, "b": 50},
        "legend": {"orientation": "h", "x": 0.0, "y": 1.02, "yanchor": "bottom"},
        "xaxis": chart_axis(type="date", title={"text": "time (UTC)"}),
        "yaxis": chart_axis(title={"text": "temperature (°C)"}),
        "yaxis2": chart_axis(title={"text": "power (W)"}, overlaying="y", side="right",
                             showgrid=False, rangemode="tozero", tickmode="auto"),
    }  # fmt: skip
    return {"data": data, "layout": layout}, traces


#: The estimates chart's rows: the figure, its σ, and the row's title.
ESTIMATE_ROWS = (("water_mass_kg", "water_mass_std", "water mass (kg)"),
                 ("ua_w_per_k", "ua_std", "UA (W/K)"),
                 ("element_conductance_w_per_k", "element_conductance_std",
                  "element conductance (W/K)"))  # fmt: skip


def _band_columns(est: dict, key: str, sd: str) -> tuple[list, list, list]:
    """Return the upper edge, lower edge and mean of a figure's ±2σ band."""
    ys = est.get(key) or [None] * len(est.get("t") or [])
    sds = est.get(sd) or [None] * len(ys)
    hi, lo = plots.band_edges(ys, sds)
    return hi, lo, list(ys)


#: Vertical gap between the estimates chart's rows, as a fraction of its plot height.
ROW_GAP = 0.08


def _band(x: list, key: str, sd: str, est: dict, axes: tuple[str, str]) -> list[dict]:
    """Return a figure's three traces: its ±2σ band's upper edge, lower edge, and mean."""
    hi, lo, mean = _band_columns(est, key, sd)
    where = {"xaxis": axes[0], "yaxis": axes[1]}
    edge = {"line": {"width": 0}, "showlegend": False, "hoverinfo": "skip", **where}
    return [_line(x, hi, **edge),
            _line(x, lo, fill="tonexty", fillcolor=COLOURS["band"], **edge),
            _line(x, mean, showlegend=False, name=key, line={"color": COLOURS["water"]},
                  **where)]  # fmt: skip


def estimates_figure(detail: dict | None) -> dict:
    """Return the estimates converging over time, each with its ±2σ band.

    Each row holds three traces (upper edge, lower edge, mean) in that order, present
    even when empty, so that updates can append to them by position. The rows share
    the time axis. A plain figure dict, as :func:`readings_figure`.
    """
    est = (detail or {}).get("estimates") or {}
    x = _ms(est.get("t") or [])
    rows = len(ESTIMATE_ROWS)
    height = (1.0 - ROW_GAP * (rows - 1)) / rows
    data: list[dict] = []
    layout: dict[str, object] = {
        **CHART_GROUND, "uirevision": UIREVISION, "height": 520, "showlegend": False,
        "margin": {"l": 60, "r": 30, "t": 40, "b": 50}, "annotations": [],
    }  # fmt: skip
    for row, (key, sd, title) in enumerate(ESTIMATE_ROWS):
        n = "" if row == 0 else str(row + 1)
        top = 1.0 - row * (height + ROW_GAP)
        data += _band(x, key, sd, est, (f"x{n}", f"y{n}"))
        last = row == rows - 1
        layout[f"xaxis{n}"] = chart_axis(
            type="date", anchor=f"y{n}", showticklabels=last,
            **({"title": {"text": "time (UTC)"}} if last else {"matches": f"x{rows}"}),
        )  # fmt: skip
        layout[f"yaxis{n}"] = chart_axis(anchor=f"x{n}", domain=[max(top - height, 0.0), top])
        layout["annotations"].append(  # type: ignore[attr-defined]
            {"text": title, "x": 0.5, "y": top, "xref": "paper", "yref": "paper",
             "xanchor": "center", "yanchor": "bottom", "showarrow": False,
             "font": {"size": 14}})  # fmt: skip
    return {"data": data, "layout": layout}


def chart_update(data: dict, cursor: dict | None) -> tuple[object, object, dict]:
    """Return the readings and estimates figures (or patches to them) and the new cursor.

    ``data`` is :func:`dashboard.data.chart_data`: a whole window when ``cursor`` is None,
    else only what is newer than the cursor. Whole data draws both charts afresh;
    newer data is appended with ``Patch`` (a few hundred bytes a second of readings)
    and the forecast redrawn, until :data:`MAX_APPENDED` points have been appended,
    when the next poll draws afresh so that the browser never holds more than that
    beyond the downsampled window.
    """
    if cursor is None:
        readings, traces = readings_figure(data)
        new = {"vessel": data.get("vessel"), "after": data.get("cursor"), "traces": traces,
               "appended": 0}  # fmt: skip
        return readings, estimates_figure(data), new
    series = data.get("series") or {}
    est = data.get("estimates") or {}
    count = sum(len((series.get(c) or {}).get("t") or []) for c in cursor["traces"])
    if not count and not est.get("t"):
        return no_update, no_update, cursor
    readings = Patch()
    for channel, index in cursor["traces"].items():
        s = series.get(channel) or {}
        if channel != "forecast" and s.get("t"):
            readings["data"][index]["x"].extend(_ms(s["t"]))
            readings["data"][index]["y"].extend(s["y"])
    if "forecast" in cursor["traces"] and data.get("latest"):
        line, shapes = _forecast(data.get("latest"))
        readings["data"][cursor["traces"]["forecast"]]["x"] = line["x"]
        readings["data"][cursor["traces"]["forecast"]]["y"] = line["y"]
        readings["layout"]["shapes"] = shapes
    estimates: object = no_update
    if est.get("t"):
        estimates = Patch()
        x = _ms(est["t"])
        for row, (key, sd, _title) in enumerate(ESTIMATE_ROWS):
            for offset, ys in enumerate(_band_columns(est, key, sd)):
                estimates["data"][3 * row + offset]["x"].extend(x)  # type: ignore[index]
                estimates["data"][3 * row + offset]["y"].extend(ys)  # type: ignore[index]
    new = {**cursor, "after": data.get("cursor") or cursor["after"],
           "appended": cursor["appended"] + count}  # fmt: skip
    return readings, estimates, new


def render_vessel(snapshot: dict | None) -> tuple[list, html.Ul]:
    """Return the figures and flags of the snapshot's chosen vessel."""
    snapshot = snapshot or {}
    chosen = snapshot.get("chosen")
    latest = (snapshot.get("latest") or {}).get(chosen) if chosen else None
    drift = ((snapshot.get("runs") or {}).get(chosen) or {}).get("drift") or []
    return figures(latest), flag_list(latest, drift)


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
        dcc.Store(id=ids.VESSEL_CURSOR),
    ], className="view")  # fmt: skip


def register(app: Dash, load: Callable[[str | None, dict | None], dict]) -> None:
    """Attach the vessel view's callbacks; ``load(vessel, after)`` reads the charts' data."""
    app.callback(
        Output(ids.VESSEL_FIGURES, "children"),
        Output(ids.VESSEL_FLAGS, "children"),
        Input(ids.STORE, "data"),
    )(render_vessel)
    app.callback(Output(ids.VESSEL_PICK, "options"), Input(ids.STORE, "data"))(vessel_options)

    @app.callback(
        Output(ids.VESSEL_READINGS, "figure"),
        Output(ids.VESSEL_ESTIMATES, "figure"),
        Output(ids.VESSEL_CURSOR, "data"),
        Input(ids.POLL, "n_intervals"),
        Input(ids.VESSEL_PICK, "value"),
        State(ids.VESSEL_CURSOR, "data"),
    )
    def charts(_n: int | None, vessel: str | None, cursor: dict | None):
        same = cursor is not None and cursor.get("vessel") == vessel and cursor.get("after")
        if same and cursor["appended"] >= MAX_APPENDED:
            same = False
        keep = cursor if same else None
        return chart_update(load(vessel, keep["after"] if keep else None), keep)
