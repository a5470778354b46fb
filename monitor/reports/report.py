"""``ebullio report``: one self-contained HTML file describing a run, for the audit trail.

The page opens offline: Plotly's JavaScript is written into it once, and nothing is
fetched. It holds the vessel and site, the instruments and calibrations (the rig
configuration the log recorded, with its digest), the test conditions, the results
with their uncertainties, the drift status against the vessel's baseline, the log's
integrity (the hash chain verified or not, the file's digest, the software
versions), the estimator's settings, the plots, and the safety cautions.

Building the page is pure apart from reading the log; :func:`build_report` returns
the HTML text.
"""

from __future__ import annotations

import dataclasses
import hashlib
import html
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path

import plotly.graph_objects as go
import plotly.io as pio
from plotly.subplots import make_subplots

from drivers.errors import LogFormatError
from monitor import __version__
from monitor.estimation.contracts import Estimate
from monitor.estimation.settings import EstimatorSettings
from monitor.records.interchange import LogRow
from monitor.records.recorder import LogReader, is_recorder_log, sessions, verify
from monitor.reports.plots import PALETTE, EnvelopeStream, Thinned, add_band, history_figure
from monitor.reports.safety import SAFETY_TEXT
from monitor.runs.drift import (
    VERDICT_MARK,
    baselines_of,
    drift_over_runs,
    verdict_of,
)
from monitor.runs.replay import replay_vessel
from monitor.runs.streams import run_spans


def file_sha256(path: str | Path) -> str:
    """Return the SHA-256 (hex) of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _fmt(entry: object, digits: int = 3, unit: str = "") -> str:
    if isinstance(entry, Mapping):
        value, std = entry.get("value"), entry.get("std")
        if isinstance(value, int | float):
            text = f"{value:.{digits}f}"
            if isinstance(std, int | float):
                text += f" ± {std:.{digits}f}"
            return f"{text} {unit}".strip()
        return "-"
    if isinstance(entry, float):
        return f"{entry:.{digits}f} {unit}".strip()
    return "-" if entry is None else html.escape(str(entry))


def _table(rows: Sequence[tuple[str, str]]) -> str:
    cells = "".join(f"<tr><th>{html.escape(k)}</th><td>{v}</td></tr>" for k, v in rows)
    return f"<table>{cells}</table>"


def _verdict_html(verdict: Mapping[str, object]) -> str:
    """Return the run's verdict as HTML: a word and a shape, and the reasons if doubtful."""
    status = str(verdict.get("status"))
    if status != "doubtful":
        return ("<p id='report-verdict' class='verdict-trusted'><b>✓ trusted</b>: the run's own "
                "diagnostics show no sign that the estimate failed, so it is judged for drift "
                "against the vessel's baseline.</p>")  # fmt: skip
    reasons = "".join(f"<li>{html.escape(str(r))}</li>"
                      for r in verdict.get("reasons") or [])  # type: ignore[union-attr]  # fmt: skip
    return ("<div id='report-verdict' class='verdict-doubtful'><p><b>✕ doubtful: not judged"
            "</b>. The run's own diagnostics say the estimate failed, so it was not judged "
            "for drift and does not count towards the baseline. Use its figures with care. "
            f"Why:</p><ul>{reasons}</ul></div>")  # fmt: skip


def _run_figure(
    series: Mapping[str, tuple[list[float], list[float | None]]],
    estimates: list[Estimate],
    t0: float,
) -> go.Figure:
    """Return temperatures and power against time, and the estimates with their bands.

    ``series`` holds each channel the run has readings of, drawn as the board draws a
    long run (a min/max envelope, :class:`monitor.reports.plots.EnvelopeStream`), in s
    from the run's first row at ``t0`` (s in the log).
    """
    fig = make_subplots(rows=3, cols=1, shared_xaxes=True, vertical_spacing=0.06,
                        subplot_titles=("Readings", "Water mass (±2σ)", "UA (±2σ)"),
                        specs=[[{"secondary_y": True}], [{}], [{}]])  # fmt: skip
    for channel in ("water", "element", "ambient"):
        if channel in series:
            tc, yc = series[channel]
            fig.add_trace(go.Scatter(x=tc, y=yc, name=f"{channel} °C", mode="lines",
                                     line={"color": PALETTE[channel]}), row=1, col=1)  # fmt: skip
    if "power" in series:
        tp, yp = series["power"]
        fig.add_trace(go.Scatter(x=tp, y=yp, name="power W", mode="lines",
                                 line={"color": PALETTE["power"], "width": 1}),
                      row=1, col=1, secondary_y=True)  # fmt: skip
    te = [e.t_s - t0 for e in estimates]
    for row, getter in ((2, lambda e: e.water_mass_kg), (3, lambda e: e.ua_w_per_k)):
        pairs = [getter(e) for e in estimates]
        add_band(fig, te, [p.value if p else None for p in pairs],
                 [p.std if p else None for p in pairs], row=row)  # fmt: skip
    fig.update_xaxes(title_text="time from the start of the run, s", row=3, col=1)
    fig.update_yaxes(title_text="°C", row=1, col=1, secondary_y=False)
    fig.update_yaxes(title_text="W", row=1, col=1, secondary_y=True, showgrid=False)
    fig.update_yaxes(title_text="kg", row=2, col=1)
    fig.update_yaxes(title_text="W/K", row=3, col=1)
    fig.update_layout(height=760, margin={"l": 60, "r": 40, "t": 40, "b": 40},
                      template="plotly_white", uirevision="report")  # fmt: skip
    return fig


def build_report(
    log_path: str,
    vessel: str | None = None,
    run_label: str | None = None,
    verified: Mapping[str, object] | None = None,
) -> str:
    """Return the audit report of one run of one vessel as a self-contained HTML page.

    ``vessel`` may be left out when the log holds one; ``run_label`` defaults to the
    last run. Raises LogFormatError naming the choices when a choice is needed or wrong.
    """
    recorder = is_recorder_log(log_path)
    # read as a stream, twice: to split the runs, then to replay the vessel's (of a
    # recorder log only the chosen vessel's samples; a CSV log's rows all pass)
    spans = run_spans(log_path, vessel if recorder else None)
    vessels = sorted({s.vessel for s in spans})
    if recorder and vessel is not None and vessel not in vessels:
        with LogReader(log_path) as reader:
            vessels = reader.vessels()  # to name the choices
    if vessel is None:
        if len(vessels) != 1:
            raise LogFormatError(f"{log_path}: holds vessels {', '.join(vessels) or '(none)'}; "
                                 "say which with --vessel")  # fmt: skip
        vessel = vessels[0]
    mine = [s for s in spans if s.vessel == vessel]
    if not mine:
        raise LogFormatError(f"{log_path}: no vessel {vessel!r}; it holds {', '.join(vessels)}")
    labels = [s.label for s in mine]
    chosen = mine[-1] if run_label is None else next((s for s in mine if s.label == run_label),
                                                     None)  # fmt: skip
    if chosen is None:
        raise LogFormatError(f"{log_path}: vessel {vessel!r} has no run {run_label!r}; "
                             f"its runs: {', '.join(labels)}")  # fmt: skip
    # the chosen run's estimates for its chart: every n-th (about MAX_POINTS) and the
    # last, and its readings thinned as they come, so a week-long run's report neither
    # holds nor draws a week of them
    thinned = Thinned(chosen.steps)
    t0 = chosen.start_s
    lines = {c: EnvelopeStream(chosen.steps, n[1]) for c, n in chosen.points.items()
             if c in ("water", "element", "ambient", "power") and n[0]}  # fmt: skip

    def take(row: LogRow) -> None:
        t = row.time_s - t0
        values = row.values
        for channel, line in lines.items():
            line.add(t, values.get(channel))

    done = replay_vessel(log_path, vessel, chosen.number, take, thinned.add)
    results = list(done.summaries.values())
    estimates: list[Estimate] = thinned.items()
    meta = done.chosen_log.metadata if done.chosen_log is not None else {}
    drift = drift_over_runs(results, {vessel: meta})
    index = list(done.summaries).index(chosen.number)
    result, flags = results[index], drift[index]
    quarantined = sum(len(log.rejected) for log in done.logs)

    integrity_rows: list[tuple[str, str]] = [("log file", html.escape(str(log_path))),
                                             ("file SHA-256", file_sha256(log_path))]  # fmt: skip
    config_text = None
    banner = ""
    if recorder:
        check = verify(log_path) if verified is None else verified
        state = (
            "verified: every block matches"
            if check["ok"]
            else (f"FAILED ({check['state']}): {check.get('reason', '')}")
        )
        if not check["ok"]:
            banner = (
                "<div class='caution' id='integrity-failed'><b>This log failed its integrity "
                f"check ({html.escape(str(check['state']))}).</b> "
                f"{html.escape(str(check.get('reason') or ''))} The figures below come from "
                "a log that was altered or damaged: do not rely on them.</div>"
            )
        integrity_rows += [
            ("hash chain", f"<b class='{'ok' if check['ok'] else 'bad'}'>"
                           f"{html.escape(state)}</b>"),
            ("blocks, samples, quarantined",
             f"{check['blocks']}, {check['samples']}, {check['quarantined']}"),
            ("head hash", html.escape(str(check.get("head_hash")))),
        ]  # fmt: skip
        recorded = sessions(log_path)
        versions = sorted({str(s["version"]) for s in recorded})
        integrity_rows.append(("software that wrote the log", html.escape(", ".join(versions))))
        config_text = next((s["config_text"] for s in recorded if s.get("config_text")), None)
    else:
        no_chain = "none: a CSV log carries no hash chain, so it cannot be shown unaltered"
        integrity_rows.append(("hash chain", f"<b class='bad'>{no_chain}</b>"))
    if config_text:
        digest = hashlib.sha256(str(config_text).encode()).hexdigest()
        integrity_rows.append(("configuration SHA-256", digest))
    integrity_rows.append(("this report made by", f"ebullio {html.escape(__version__)}"))

    conditions = [
        ("site pressure", _fmt(result.get("pressure_kpa"), 2, "kPa")),
        ("boiling point", _fmt(result.get("boiling_point_c"), 2, "°C")),
        ("target", _fmt(result.get("target_c"), 2, "°C")),
        ("start (UTC)", _fmt(result.get("start_utc"))),
        ("start water temperature", _fmt(result.get("start_water_c"), 2, "°C")),
        ("mean room temperature", _fmt(result.get("ambient_c"), 2, "°C")),
        ("model", _fmt(result.get("model"))),
    ]
    results_rows = [
        ("water mass", _fmt(result.get("water_mass_kg"), 3, "kg")),
        ("heat capacity", _fmt(result.get("heat_capacity_j_per_k"), 0, "J/K")),
        ("UA (loss coefficient)", _fmt(result.get("ua_w_per_k"), 3, "W/K")),
        (
            "element-to-water conductance",
            _fmt(result.get("element_conductance_w_per_k"), 2, "W/K"),
        ),
        ("standing loss", _fmt(result.get("standing_loss_kwh_per_24h"), 3, "kWh/24 h")),
        ("heat-up time", _fmt(result.get("heat_up_s"), 0, "s")),
        ("electrical energy", _fmt(result.get("energy_wh"), 1, "Wh")),
        ("heat-up efficiency", _fmt(result.get("efficiency"), 3)),
        ("heating power", _fmt(result.get("heating_power_w"), 0, "W")),
        ("element resistance", _fmt(result.get("element_resistance_ohm"), 3, "Ω")),
    ]
    flag_items = [*result.get("flags", []), *(f.as_dict() for f in flags)]  # type: ignore[misc]
    if result.get("model") == "one-node":
        unobserved = (
            "Without an element thermocouple the element-to-water conductance is poorly "
            "observed, so limescale is not judged."
        )
        flag_items.append({"name": "scaling", "level": "not judged", "message": unobserved})
    flag_html = (
        "".join(
            f"<li class='{html.escape(str(f['level']))}'><b>{html.escape(str(f['name']))}</b> "
            f"({html.escape(str(f['level']))}): {html.escape(str(f['message']))}</li>"
            for f in flag_items
        )
        or "<li>none</li>"
    )
    settings = dataclasses.asdict(EstimatorSettings())
    settings_rows = [(k, html.escape(repr(v))) for k, v in settings.items()]
    meta_rows = [
        (str(k), html.escape(str(v))) for k, v in meta.items() if not k.startswith("truth_")
    ]

    series = {channel: line.points() for channel, line in lines.items()}
    run_fig = pio.to_html(_run_figure(series, estimates, t0), include_plotlyjs=True,
                          full_html=False, div_id="report-run-plot")  # fmt: skip
    history = history_figure(results, baselines_of(results), uirevision="report")
    hist_fig = pio.to_html(history, include_plotlyjs=False, full_html=False,
                           div_id="report-history-plot")  # fmt: skip
    marks = [f"{r.get('run')} {VERDICT_MARK[str(verdict_of(r)['status'])]}" for r in results]
    runs_verdicts = html.escape(", ".join(marks))
    made = datetime.now(tz=UTC).isoformat(timespec="seconds")
    title = f"ebullio report: {vessel}, run {chosen.label}"
    config_html = (f"<pre>{html.escape(str(config_text))}</pre>" if config_text
                   else "<p>No rig configuration is recorded in this log.</p>")  # fmt: skip
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>
<style>
body {{ font-family: system-ui, sans-serif; margin: 2rem auto; max-width: 70rem; color: #222; }}
h1 {{ font-size: 1.6rem; }} h2 {{ font-size: 1.2rem; border-bottom: 1px solid #ccc; }}
table {{ border-collapse: collapse; margin: .5rem 0; }}
th, td {{ text-align: left; padding: .2rem .8rem .2rem 0; vertical-align: top; }}
th {{ font-weight: 600; color: #444; }}
.ok {{ color: #1b7a3a; }} .bad {{ color: #b3261e; }}
li.warning, li.alarm {{ color: #b3261e; }}
.verdict-doubtful {{ border: 2px dashed #555; padding: .2rem 1rem; background: #f4f4f4; }}
.caution {{ border: 2px solid #b3261e; padding: .6rem 1rem; background: #fff6f5; }}
pre {{ background: #f5f5f5; padding: .6rem; overflow-x: auto; }}
@media print {{
  .modebar-container, .modebar {{ display: none !important; }}
  .plotly-graph-div, table, .caution, .verdict-doubtful {{ break-inside: avoid;
    page-break-inside: avoid; }}
  h2 {{ break-after: avoid; page-break-after: avoid; }}
}}
</style></head><body>
<h1>{html.escape(title)}</h1>
{banner}
<p>Made {made} from <code>{html.escape(Path(log_path).name)}</code>; runs of this vessel in
the log: {html.escape(", ".join(labels))}.</p>
<div class="caution"><b>Caution.</b> {html.escape(SAFETY_TEXT)}</div>
<h2>Integrity</h2>{_table(integrity_rows)}
<h2>Test conditions</h2>{_table(conditions)}
<h2>Run verdict</h2>{_verdict_html(verdict_of(result))}
<h2>Results (value ± one standard deviation)</h2>{_table(results_rows)}
<h2>Flags and drift against the vessel's baseline</h2><ul id="report-flags">{flag_html}</ul>
<h2>Plots of this run</h2>{run_fig}
<h2>This vessel across its runs (band: baseline ± 2σ; ✕ a doubtful run, not judged)</h2>
<p>Runs and their verdicts: {runs_verdicts}.</p>{hist_fig}
<h2>Vessel and site</h2>{_table(meta_rows)}
<h2>Instruments and calibrations (the recorded rig configuration)</h2>{config_html}
<h2>Estimator settings</h2>{_table(settings_rows)}
<p>Rows set aside as unusable in these logs: {quarantined}.
Values that are missing or not finite are shown as "-".</p>
</body></html>
"""


def print_pdf(html_path: Path, pdf_path: Path) -> None:
    """Print the report to PDF with headless Chromium; raise EbullioError if it cannot."""
    import shutil
    import subprocess

    from drivers.errors import EbullioError

    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        raise EbullioError("--pdf needs Chromium (Debian package 'chromium'); it is not installed")
    done = subprocess.run(
        [browser, "--headless=new", "--no-sandbox", "--disable-gpu", "--no-pdf-header-footer",
         "--virtual-time-budget=8000", f"--print-to-pdf={pdf_path}", html_path.resolve().as_uri()],
        capture_output=True, text=True, timeout=120, check=False,
    )  # fmt: skip
    if done.returncode != 0 or not pdf_path.exists():
        raise EbullioError(f"Chromium could not print the PDF: {done.stderr.strip()[-300:]}")
