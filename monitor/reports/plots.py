"""Plot pieces shared by the audit report and the board (pure: data in, Plotly figures out)."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np
import plotly.graph_objects as go
from plotly.subplots import make_subplots

from monitor.runs.drift import RULES, figure, verdict_of

#: Points per series drawn at most (about two per horizontal pixel), on the board and in
#: the audit report.
MAX_POINTS = 2400


def envelope(
    t: Sequence[float], y: Sequence[float | None], max_points: int = MAX_POINTS
) -> tuple[list[float], list[float | None]]:
    """Return (t, y) reduced to at most ``max_points`` by a min/max envelope per bucket.

    Each bucket of consecutive points gives its minimum and its maximum, in time
    order, so peaks survive; series short enough are returned whole.
    """
    if len(t) <= max_points:
        return list(t), list(y)
    ys = np.array(y, dtype=float)  # None becomes NaN
    keep = ~np.isnan(ys)
    ts, ys = np.asarray(t, dtype=float)[keep], ys[keep]
    if len(ys) <= max_points:
        return ts.tolist(), ys.tolist()
    size = math.ceil(len(ys) / (max_points // 2))
    buckets = math.ceil(len(ys) / size)
    pad = buckets * size - len(ys)
    base = np.arange(buckets) * size
    lo = np.concatenate([ys, np.full(pad, np.inf)]).reshape(buckets, size).argmin(axis=1)
    hi = np.concatenate([ys, np.full(pad, -np.inf)]).reshape(buckets, size).argmax(axis=1)
    picked = np.unique(np.concatenate([base + lo, base + hi]))  # sorted: time order
    return ts[picked].tolist(), ys[picked].tolist()


class EnvelopeStream:
    """:func:`envelope` of a series taken one point at a time, holding at most about
    ``max_points`` of them: the same points in the same order, given how many of the
    series' points will come (``count``) and how many of those are not NaN or None
    (``valid``).
    """

    def __init__(self, count: int, valid: int, max_points: int = MAX_POINTS) -> None:
        self._all = count <= max_points  # short enough: every point, NaN included
        self._valid_only = not self._all and valid <= max_points
        self._size = math.ceil(valid / (max_points // 2)) if valid else 1
        self._t: list[float] = []
        self._y: list[float | None] = []
        self._index = -1  # of the latest point that is not NaN
        # the open bucket's lowest and highest point (the first of equals), as (index, t, y)
        self._lo: tuple[int, float, float] | None = None
        self._hi: tuple[int, float, float] | None = None

    def add(self, t: float, y: float | None) -> None:
        """Take the next point (a NaN or None is dropped unless the series is kept whole)."""
        if self._all:
            self._t.append(t)
            self._y.append(y)
            return
        if y is None or y != y:
            return
        if self._valid_only:
            self._t.append(t)
            self._y.append(y)
            return
        self._index += 1
        if self._index % self._size == 0:
            self._close()
            self._lo = self._hi = (self._index, t, y)
            return
        lo, hi = self._lo, self._hi
        assert lo is not None
        assert hi is not None
        if y < lo[2]:
            self._lo = (self._index, t, y)
        if y > hi[2]:
            self._hi = (self._index, t, y)

    def _close(self) -> None:
        lo, hi = self._lo, self._hi
        if lo is None or hi is None:
            return
        for _, t, y in sorted({lo, hi}):
            self._t.append(t)
            self._y.append(y)
        self._lo = self._hi = None

    def points(self) -> tuple[list[float], list[float | None]]:
        """Return (t, y) as :func:`envelope` gives them for the whole series."""
        self._close()
        return list(self._t), list(self._y)


class Thinned:
    """Every n-th of a stream of about ``expected`` items, so that about ``max_points``
    are kept, and always the last: what a chart draws of a run's estimates (the board's
    replay and the audit report), without holding them all."""

    def __init__(self, expected: int, max_points: int = MAX_POINTS) -> None:
        self.every = max(1, math.ceil(max(expected, 1) / max_points))
        self.count = 0
        self._kept: list = []
        self._last: object = None

    def add(self, item: object) -> None:
        """Take the next item of the stream."""
        self.count += 1
        self._last = item
        if self.count % self.every == 1 or self.every == 1:
            self._kept.append(item)

    def items(self) -> list:
        """Return the items kept, the last of the stream included."""
        if self._last is not None and (not self._kept or self._kept[-1] is not self._last):
            return [*self._kept, self._last]
        return list(self._kept)


#: Okabe and Ito's colour-blind-safe colours (a published set; from memory).
PALETTE = {
    "water": "#0072B2",
    "element": "#D55E00",
    "ambient": "#009E73",
    "power": "#CC79A7",
    "forecast": "#E69F00",
    "band": "rgba(0, 114, 178, 0.18)",
    "forecast_band": "rgba(230, 159, 0, 0.22)",
}
#: Unit of each tracked figure, for axis titles.
UNITS = {"element_conductance_w_per_k": "W/K", "ua_w_per_k": "W/K",
         "heating_power_at_rated_voltage_w": "W"}  # fmt: skip


#: Why a tracked figure can be missing from every run, said in its empty panel.
NOT_MEASURED = {
    "heating_power_at_rated_voltage_w": "not measured: it needs voltage and current readings",
    "element_conductance_w_per_k": "not measured: it needs an element thermocouple",
    "ua_w_per_k": "not estimated in these runs",
}


def band_edges(
    mean: Sequence[float | None], std: Sequence[float | None]
) -> tuple[list[float | None], list[float | None]]:
    """Return the upper and lower edges of a ±2σ band (None where either is missing)."""
    pairs = list(zip(mean, std, strict=True))
    hi = [m + 2 * s if m is not None and s is not None else None for m, s in pairs]
    lo = [m - 2 * s if m is not None and s is not None else None for m, s in pairs]
    return hi, lo


def add_band(
    fig: go.Figure,
    x: Sequence[float],
    mean: Sequence[float | None],
    std: Sequence[float | None],
    row: int,
    col: int = 1,
) -> None:
    """Add a mean line with its ±2σ band (σ per point; None leaves a gap) to a subplot.

    Three traces, in this order: the band's upper edge, its lower edge, the mean.
    """
    hi, lo = band_edges(mean, std)
    edge = {"mode": "lines", "line": {"width": 0}, "showlegend": False, "hoverinfo": "skip"}
    fig.add_trace(go.Scatter(x=x, y=hi, **edge), row=row, col=col)
    fig.add_trace(go.Scatter(x=x, y=lo, fill="tonexty", fillcolor=PALETTE["band"], **edge),
                  row=row, col=col)  # fmt: skip
    fig.add_trace(go.Scatter(x=x, y=list(mean), mode="lines", showlegend=False,
                             line={"color": PALETTE["water"]}), row=row, col=col)  # fmt: skip


def _judged_history_figure(
    runs: Sequence[Mapping[str, object]],
    baselines: Mapping[str, Mapping[str, float]],
    uirevision: str = "history",
) -> go.Figure:
    """Return each tracked figure across runs (±2σ bars), the baseline ±2σ band, and a
    triangle at every run whose drift flag for that figure was a warning or an alarm."""
    fig = make_subplots(rows=len(RULES), cols=1, shared_xaxes=True, vertical_spacing=0.09,
                        subplot_titles=[f"{r.what} ({UNITS[r.key]})" for r in RULES])  # fmt: skip
    labels = [str(r.get("run")) for r in runs]
    for row, rule in enumerate(RULES, start=1):
        pts = [(lab, r.get(rule.key), r) for lab, r in zip(labels, runs, strict=True)]
        pts = [p for p in pts if isinstance(p[1], Mapping) and p[1].get("value") is not None]
        if not pts:
            continue
        fig.add_trace(go.Scatter(
            x=[lab for lab, _, _ in pts], y=[e["value"] for _, e, _ in pts],
            mode="markers+lines", name=rule.name, line={"color": PALETTE["water"]},
            error_y={"type": "data", "array": [2 * (e.get("std") or 0.0) for _, e, _ in pts]},
        ), row=row, col=1)  # fmt: skip
        base = baselines.get(rule.key)
        if base:
            fig.add_hrect(y0=base["mean"] - 2 * base["sd"], y1=base["mean"] + 2 * base["sd"],
                          fillcolor=PALETTE["band"], line_width=0, row=row, col=1)  # fmt: skip
        flagged = [(lab, e) for lab, e, r in pts
                   if any(f.get("name") == rule.name and f.get("level") in ("warning", "alarm")
                          for f in r.get("drift") or [])]  # type: ignore[union-attr]  # fmt: skip
        if flagged:
            fig.add_trace(go.Scatter(
                x=[lab for lab, _ in flagged], y=[e["value"] for _, e in flagged],
                mode="markers", name=f"{rule.name} flag",
                marker={"symbol": "triangle-up", "size": 13, "color": PALETTE["element"]},
            ), row=row, col=1)  # fmt: skip
    fig.update_xaxes(title_text="run", type="category", row=len(RULES), col=1)
    margin = {"l": 60, "r": 30, "t": 40, "b": 50}
    fig.update_layout(height=250 * len(RULES), template="plotly_white", showlegend=False,
                      uirevision=uirevision, margin=margin)  # fmt: skip
    return fig


def history_figure(
    runs: Sequence[Mapping[str, object]],
    baselines: Mapping[str, Mapping[str, float]],
    uirevision: str = "history",
) -> go.Figure:
    """Return each tracked figure across runs, doubtful runs marked as not judged.

    The trusted runs are drawn by :func:`_judged_history_figure`. A doubtful run's
    figures leave the judged line (a diverged estimate would read as a trend) and come
    back as grey open crosses labelled "not judged", the reasons on hover. A cross far
    outside the judged runs and the baseline band is drawn at the edge of the plot and
    says "off scale", so one diverged run does not flatten the rest.
    """
    verdicts = [verdict_of(r) for r in runs]
    judged = [r if v["status"] == "trusted" else {**r, **{rule.key: None for rule in RULES}}
              for r, v in zip(runs, verdicts, strict=True)]  # fmt: skip
    fig = _judged_history_figure(judged, baselines, uirevision=uirevision)
    labels = [str(r.get("run")) for r in runs]
    for row, rule in enumerate(RULES, start=1):
        crosses = [
            (str(r.get("run")), got, v)
            for r, v in zip(runs, verdicts, strict=True)
            if v["status"] == "doubtful" and (got := figure(r, rule.key)) is not None
        ]
        if not crosses:
            continue
        seen = [got[0] for r in judged if (got := figure(r, rule.key)) is not None]
        base = baselines.get(rule.key)
        if base:
            seen += [base["mean"] - 2 * base["sd"], base["mean"] + 2 * base["sd"]]
        edge = None
        if seen:
            pad = 0.15 * ((max(seen) - min(seen)) or abs(max(seen)) or 1.0)
            edge = (min(seen) - pad, max(seen) + pad)
        off = [edge is not None and not edge[0] <= got[0] <= edge[1] for _, got, _ in crosses]
        ys = [min(max(got[0], edge[0]), edge[1]) if out and edge else got[0]
              for (_, got, _), out in zip(crosses, off, strict=True)]  # fmt: skip
        fig.add_trace(go.Scatter(
            x=[lab for lab, _, _ in crosses], y=ys, mode="markers+text",
            text=["not judged (off scale)" if out else "not judged" for out in off],
            # a cross held at the top edge has its words below it, inside the plot
            textposition=["bottom center" if out and edge and got[0] > edge[1] else "top center"
                          for (_, got, _), out in zip(crosses, off, strict=True)],
            name=f"{rule.name} not judged",
            marker={"symbol": "x-open", "size": 12, "color": "#555555"},
            hovertext=[f"run {lab}: doubtful, not judged ({got[0]:.4g}). "
                       + " ".join(str(x) for x in v["reasons"])  # type: ignore[union-attr]
                       for lab, got, v in crosses],
            hoverinfo="text",
        ), row=row, col=1)  # fmt: skip
        if edge is not None and any(off):
            span = edge[1] - edge[0]
            fig.update_yaxes(range=[edge[0] - 0.1 * span, edge[1] + 0.1 * span], row=row, col=1)
    for row, rule in enumerate(RULES, start=1):  # an empty panel says why it is empty
        if runs and all(figure(r, rule.key) is None for r in runs):
            low, high = fig.layout[f"yaxis{'' if row == 1 else row}"].domain
            fig.add_annotation(
                text=NOT_MEASURED.get(rule.key, "no value in these runs"),
                xref="paper", yref="paper", x=0.5, y=(low + high) / 2.0,
                showarrow=False, font={"color": "#555555", "size": 14},
            )  # fmt: skip
    fig.update_xaxes(categoryorder="array", categoryarray=labels)
    return fig
