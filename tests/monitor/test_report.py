"""The audit report: what it holds, that it needs nothing online, and a tampered log."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import pytest

from drivers.errors import LogFormatError
from drivers.simworld import SimulatedRig, kettle_scenario, scenario_metadata
from monitor.records.recorder import Recorder
from monitor.reports.report import build_report
from tests.support.tamper import change_one_reading


def recorded_kettle(path, runs: int = 2) -> None:
    """Record simulated kettle runs of our own into a recorder log, as the service would."""
    with Recorder(path, version="test", config_text="# rig for the report test\n") as rec:
        meta = None
        for i in range(runs):
            scenario = replace(
                kettle_scenario(duration_s=300.0),
                start_epoch_s=1_767_225_600.0 + 3600.0 * i,  # an hour apart: separate runs
            )
            meta = scenario_metadata(scenario, seed=i)
            for batch in SimulatedRig(scenario, seed=i).run():
                rec.add_samples(batch)
            rec.commit()
        rec.add_vessel("kettle-1", {**meta, "element_sensor": "yes"})


@pytest.fixture
def log(tmp_path):
    path = tmp_path / "rig.sqlite"
    recorded_kettle(path)
    return path


def test_the_report_holds_the_figures_integrity_and_cautions(log) -> None:
    page = build_report(str(log))
    assert page.startswith("<!DOCTYPE html>")
    assert "kettle-1, run 2" in page
    assert "verified: every block matches" in page
    assert "configuration SHA-256" in page
    assert "water mass" in page
    assert " kg" in page
    assert "not a safety device" in page
    assert 'id="report-run-plot"' in page
    assert 'id="report-history-plot"' in page
    # self-contained: Plotly's code is inside, and nothing is loaded from elsewhere
    assert "plotly.js v" in page or "Plotly" in page
    assert "<script src=" not in page
    assert "truth_water_mass_kg" not in page  # the simulator's truth is not a reading
    # the run's verdict, in a word and a shape
    assert "<h2>Run verdict</h2>" in page
    assert "id='report-verdict' class='verdict-trusted'><b>✓ trusted</b>" in page
    assert "Runs and their verdicts: 1 ✓ trusted, 2 ✓ trusted." in page


def test_a_tampered_log_says_its_integrity_check_failed(log) -> None:
    change_one_reading(log, which=100, by=1.0)
    page = build_report(str(log))
    assert "FAILED (tampered)" in page
    assert "integrity-failed" in page  # the banner at the top
    assert "verified: every block matches" not in page


def test_a_csv_log_is_reported_as_carrying_no_chain(tmp_path) -> None:
    from monitor.cli import main

    csv_log = tmp_path / "k.csv"
    assert main(["simulate", "--duration-s", "200", "--out", str(csv_log)]) == 0
    page = build_report(str(csv_log))
    assert "a CSV log carries no hash chain" in page


def test_wrong_choices_name_the_choices(log) -> None:
    with pytest.raises(LogFormatError, match="has no run '9'; its runs: 1, 2"):
        build_report(str(log), run_label="9")
    with pytest.raises(LogFormatError, match="no vessel 'urn'"):
        build_report(str(log), vessel="urn")


def test_the_report_opens_in_headless_chromium_and_draws_its_plots(log, tmp_path) -> None:
    """Chromium (Debian's, installed by the test command) runs the page's own scripts."""
    import shutil
    import subprocess
    from pathlib import Path

    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    assert browser, "chromium is not installed (scripts/test-all installs it)"
    page = tmp_path / "report.html"
    page.write_text(build_report(str(log)), encoding="utf-8")
    common = [browser, "--headless=new", "--no-sandbox", "--disable-gpu",
              "--virtual-time-budget=8000", "--window-size=1280,2400"]  # fmt: skip
    dom = subprocess.run([*common, "--dump-dom", page.as_uri()],
                         capture_output=True, text=True, timeout=90, check=True).stdout  # fmt: skip
    assert dom.count('class="main-svg"') >= 2  # Plotly drew both figures offline
    assert "verified: every block matches" in dom
    artifacts = Path(__file__).resolve().parents[2] / "out" / "test-artifacts"
    artifacts.mkdir(parents=True, exist_ok=True)
    shot = artifacts / "report.png"
    subprocess.run([*common, f"--screenshot={shot}", page.as_uri()],
                   capture_output=True, timeout=90, check=True)  # fmt: skip
    assert shot.stat().st_size > 20_000


def test_report_cli_writes_html_and_pdf(log, tmp_path) -> None:
    from monitor.cli import main

    out = tmp_path / "r" / "report.html"
    assert main(["report", str(log), "--run", "1", "--out", str(out), "--pdf"]) == 0
    assert "kettle-1, run 1" in out.read_text(encoding="utf-8")
    assert out.with_suffix(".pdf").read_bytes().startswith(b"%PDF")


def test_without_an_element_thermocouple_scaling_is_said_to_be_not_judged(tmp_path) -> None:
    from monitor.records.interchange import read_csv, write_csv
    from monitor.runs.drift import fleet_rows
    from monitor.runs.replay import replay

    full = tmp_path / "full.csv"
    from monitor.cli import main

    assert main(["simulate", "--duration-s", "200", "--out", str(full)]) == 0
    log = read_csv(full)
    bare = tmp_path / "bare.csv"
    with open(bare, "w", encoding="utf-8", newline="") as out:
        channels = [c for c in log.channels if c != "element"]
        write_csv(out, log.rows, log.metadata, channels)
    assert "limescale is not judged" in build_report(str(bare))
    (row,) = fleet_rows(replay([str(bare)]))
    assert row["note"] == "no element thermocouple: scaling is not judged"


def test_a_doubtful_run_is_marked_in_the_report_with_its_reasons(tmp_path) -> None:
    rows = ["time_s,water_c,element_c,power_w"]
    rows += [f"{t},{15 + 0.25 * t:.2f},{25 + 0.25 * t:.2f},2000" for t in range(40)]  # made-up
    path = tmp_path / "short.csv"
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")
    page = build_report(str(path))
    assert "class='verdict-doubtful'><p><b>✕ doubtful: not judged</b>" in page
    assert "usable water readings; at least 60 are needed" in page
    assert "<b>not_judged</b> (notice)" in page
    assert "Runs and their verdicts: 1 ✕ doubtful: not judged." in page


def test_the_history_chart_crosses_doubtful_runs_and_keeps_them_off_the_judged_line() -> None:
    from monitor.reports.plots import history_figure

    def run(label: str, g: float, std: float) -> dict:
        return {"run": label, "element_conductance_w_per_k": {"value": g, "std": std}}

    # made-up figures: five runs near 54 W/K, then one diverged (4.5x with a 25 % std)
    runs = [run(str(i), g, 1.6) for i, g in enumerate([54, 53.5, 54.5, 54, 53.8], start=1)]
    runs.insert(2, run("2b", 243.0, 60.75))
    base = {"element_conductance_w_per_k": {"mean": 54.0, "sd": 1.6, "runs": 5}}
    fig = history_figure(runs, base)
    (judged,) = [t for t in fig.data if t.name == "scaling"]
    assert "2b" not in list(judged.x)
    (cross,) = [t for t in fig.data if t.name == "scaling not judged"]
    assert list(cross.x) == ["2b"]
    assert cross.marker.symbol == "x-open"
    assert list(cross.text) == ["not judged (off scale)"]
    assert cross.y[0] < 100.0  # drawn at the edge, not at 243 W/K
    assert "known only to ±25%" in cross.hovertext[0]
    assert list(fig.layout.xaxis.categoryarray) == ["1", "2", "2b", "3", "4", "5"]


def test_the_printed_report_keeps_plots_whole_and_leaves_the_toolbar_out() -> None:
    """Issue 15: the report's PDF split a plot across pages and printed the chart
    toolbar. The page's print rules say what Chromium's printer must do; the PDF of a
    kettle log was looked at page by page on 2026-12-05 (7 pages, no plot split)."""
    page = build_report(
        str(Path(__file__).resolve().parents[2] / "replay_logs" / "kettle-clean.csv")
    )
    rules = page[page.index("@media print") :]
    assert ".modebar" in rules[: rules.index("</style>")]
    assert "display: none" in rules[: rules.index("</style>")]
    assert "break-inside: avoid" in rules[: rules.index("</style>")]


def test_a_long_runs_chart_is_drawn_from_a_bounded_number_of_points(tmp_path, monkeypatch):
    # a run longer than MAX_POINTS readings: its readings are drawn as a min/max envelope
    # and its estimates every n-th and the last, as the board draws them
    from monitor.cli import main
    from monitor.reports import report as report_module
    from monitor.reports.plots import MAX_POINTS

    csv_log = tmp_path / "long.csv"
    assert main(["simulate", "--duration-s", "6000", "--out", str(csv_log)]) == 0
    drawn = []

    def capture(fig, **_kwargs):
        drawn.append(fig)
        return ""

    monkeypatch.setattr(report_module.pio, "to_html", capture)
    build_report(str(csv_log))
    run_fig = drawn[0]
    lengths = [len(trace.x) for trace in run_fig.data if trace.x is not None]
    assert lengths
    assert max(lengths) <= MAX_POINTS + 2
    assert min(lengths) >= MAX_POINTS // 4  # bounded, not emptied
    # the estimates' traces end at the run's last estimate
    water_mass = [trace for trace in run_fig.data if trace.x is not None][-1]
    assert water_mass.x[-1] >= 5990.0


def test_a_fleet_logs_report_reads_its_vessel_and_names_the_others(tmp_path) -> None:
    # of a recorder log the report reads only the chosen vessel's samples; a vessel the
    # log does not hold is refused naming those it does
    path = tmp_path / "fleet.sqlite"
    with Recorder(path, version="test", config_text="# two kettles of our own\n") as rec:
        for i, name in enumerate(("kettle-1", "kettle-2")):
            scenario = replace(kettle_scenario(duration_s=300.0), vessel=name)
            for batch in SimulatedRig(scenario, seed=i).run():
                rec.add_samples(batch)
            rec.commit()
            rec.add_vessel(name, {**scenario_metadata(scenario, seed=i), "element_sensor": "yes"})
    page = build_report(str(path), vessel="kettle-2")
    assert "ebullio report: kettle-2, run 1" in page
    with pytest.raises(LogFormatError, match="no vessel 'kettle-9'; it holds kettle-1, kettle-2"):
        build_report(str(path), vessel="kettle-9")


def test_the_report_read_as_a_stream_draws_what_the_whole_run_gives(tmp_path, monkeypatch):
    """Issue 16: the report reads its log as a stream (run_spans, then replay_vessel);
    its run chart holds the points envelope() picks from the whole run's readings, and
    its figures are those of replaying the run read whole."""
    from monitor.cli import main
    from monitor.reports import report as report_module
    from monitor.reports.plots import envelope
    from monitor.runs.logs import read_log
    from monitor.runs.replay import replay_run
    from monitor.runs.run import split_runs

    csv_log = tmp_path / "long.csv"
    assert main(["simulate", "--duration-s", "6000", "--out", str(csv_log)]) == 0
    drawn = []
    monkeypatch.setattr(report_module.pio, "to_html", lambda fig, **_: drawn.append(fig) or "")
    page = build_report(str(csv_log))
    run = split_runs(read_log(csv_log))[0][-1]
    t0 = run.rows[0].time_s
    t = [r.time_s - t0 for r in run.rows]
    traces = {trace.name: trace for trace in drawn[0].data}
    for channel, name in (("water", "water °C"), ("ambient", "ambient °C"), ("power", "power W")):
        want_t, want_y = envelope(t, [r.values.get(channel) for r in run.rows])
        assert list(traces[name].x) == want_t
        assert list(traces[name].y) == want_y
    summary = replay_run(run)
    assert f"{summary['water_mass_kg']['value']:.3f}" in page  # type: ignore[index]
