"""The board: data loading, the views' callbacks called directly, and a headless browser."""

from __future__ import annotations

import asyncio
import math
import shutil
import subprocess
import sys
import threading
from dataclasses import replace
from pathlib import Path

import plotly.graph_objects as go
import pytest

from dashboard.app import create_app
from dashboard.data import chart_data, envelope, load_snapshot, run_state
from dashboard.views.fleet import fleet_rows, render_fleet
from dashboard.views.vessel import chart_update, figures, render_vessel, vessel_options
from drivers.simworld import SimulatedRig, kettle_scenario, scenario_metadata
from monitor.rig.config import RigConfig, VesselSpec
from monitor.rig.service import Service
from tests.monitor.test_service import ListDriver, run_until
from tests.support.browser import render_board
from tests.support.tamper import change_one_reading


def test_envelope_keeps_the_extremes_of_every_bucket() -> None:
    t = list(range(10_000))
    y = [0.0] * 10_000
    y[4321] = 50.0  # one spike
    y[8000] = -7.0
    t2, y2 = envelope(t, y, max_points=200)
    assert len(t2) <= 200
    assert 50.0 in y2
    assert -7.0 in y2
    assert t2 == sorted(t2)
    assert envelope([1, 2], [3.0, None]) == ([1, 2], [3.0, None])


@pytest.fixture(scope="module")
def live_log(tmp_path_factory) -> Path:
    """A recorder log written by the live service from two simulated kettles (ours)."""
    path = tmp_path_factory.mktemp("board") / "live.sqlite"
    items = []
    specs = []
    for i, (name, mm) in enumerate((("kettle-a", 0.0), ("kettle-b", 0.0))):
        scenario = replace(kettle_scenario(duration_s=300.0), vessel=name, scale_mm=mm)
        items += [s for batch in SimulatedRig(scenario, seed=i).run() for s in batch]
        meta = {**scenario_metadata(scenario, i), "element_sensor": "yes"}
        specs.append(VesselSpec(name, meta, True, False))
    items.sort(key=lambda s: s.t)
    config = RigConfig("board-test", "# two kettles\n", 101.325, None, (), tuple(specs), 0.05)
    service = Service(config, str(path), extra_sources={"rig": lambda: ListDriver(items, False)})
    asyncio.run(run_until(service, lambda: service.stats.samples >= len(items)))
    return path


def test_snapshot_of_a_recorder_log(live_log) -> None:
    snap = load_snapshot(str(live_log), "kettle-b")
    assert snap["vessels"] == ["kettle-a", "kettle-b"]
    assert snap["chosen"] == "kettle-b"
    assert set(snap["latest"]) == {"kettle-a", "kettle-b"}
    assert snap["latest"]["kettle-b"]["water_mass_kg"] == pytest.approx(1.2, rel=0.05)  # the sim's
    assert snap["runs"]["kettle-a"]["run"] == "1"  # recorded as the service stopped
    # the live service recorded each run's verdict with its summary; the board reads it
    assert snap["runs"]["kettle-a"]["verdict"] == {"status": "trusted", "reasons": []}
    data = chart_data(str(live_log), "kettle-b")
    assert len(data["series"]["water"]["t"]) == 301
    assert data["cursor"]["t"] == data["series"]["water"]["t"][-1]
    newer = chart_data(
        str(live_log),
        "kettle-b",
        after={"t": data["cursor"]["t"] - 10.0, "est_t": data["cursor"]["est_t"]},
    )
    assert len(newer["series"]["water"]["t"]) == 10  # only what is newer than the cursor
    assert newer["estimates"]["t"] == []


def test_live_and_replayed_estimates_reach_the_board_under_the_same_names(live_log) -> None:
    """Issue 15: the board draws the one flat form (monitor.records.schema), whether the recorder
    gives it back or a replay of a CSV log makes it."""
    from dashboard.data import CHART_KEYS, LATEST_KEYS, replay_csv
    from monitor.records.schema import ESTIMATE_KEYS

    assert set(LATEST_KEYS) <= set(ESTIMATE_KEYS)
    kettle = Path(__file__).resolve().parents[2] / "replay_logs" / "kettle-clean.csv"
    replayed = replay_csv(str(kettle))["vessels"]["kettle-1"]
    live = chart_data(str(live_log), "kettle-a")
    assert set(replayed["latest"]) == set(live["latest"]) == set(LATEST_KEYS)
    assert set(live["estimates"]) == set(CHART_KEYS) - {"phase"}
    assert set(replayed["estimates"]) == set(CHART_KEYS)  # the replay view shows the phase
    assert live["latest"]["water_mass_kg"] == load_snapshot(str(live_log))["latest"][
        "kettle-a"]["water_mass_kg"]  # fmt: skip


def test_vessel_callbacks_are_pure_functions_of_the_store(live_log) -> None:
    snap = load_snapshot(str(live_log))
    cards, flags = render_vessel(snap)
    assert flags.children  # a list of sentences, or the one saying nothing needs attention
    text = " ".join(str(c.children) for c in cards)
    assert "°C" in text
    assert " kg" in text
    assert "W/K" in text
    readings, estimates, cursor = chart_update(chart_data(str(live_log), "kettle-a"), None)
    # plain figure dicts; plotly's own validation (go.Figure) accepts every property
    readings, estimates = go.Figure(readings), go.Figure(estimates)
    assert readings.layout.uirevision == estimates.layout.uirevision
    assert readings.layout.xaxis.title.text == "time (UTC)"
    assert readings.layout.xaxis.type == "date"
    assert readings.data[cursor["traces"]["power"]].yaxis == "y2"  # power on its own axis
    assert cursor["traces"]["water"] == 0
    assert len(estimates.data) == 9  # three rows of upper edge, lower edge, mean
    assert [t.yaxis for t in estimates.data[::3]] == ["y", "y2", "y3"]
    assert estimates.layout.xaxis.matches == "x3"  # the rows share the time axis
    assert [a.text for a in estimates.layout.annotations] == [
        "water mass (kg)", "UA (W/K)", "element conductance (W/K)"]  # fmt: skip
    assert vessel_options(snap) == [{"label": v, "value": v} for v in ("kettle-a", "kettle-b")]
    assert go.Figure(chart_update({}, None)[0]).layout.title.text == "no readings yet"


def test_new_readings_are_appended_with_a_patch_until_a_redraw_is_due(live_log) -> None:
    from dash import Patch, no_update

    from dashboard.views.vessel import MAX_APPENDED

    whole = chart_data(str(live_log), "kettle-a")
    _, _, cursor = chart_update(whole, None)
    nothing_new = chart_data(str(live_log), "kettle-a", after=cursor["after"])
    assert chart_update(nothing_new, cursor) == (no_update, no_update, cursor)
    back = {"t": cursor["after"]["t"] - 5.0, "est_t": cursor["after"]["est_t"] - 5.0}
    readings, estimates, after = chart_update(chart_data(str(live_log), "kettle-a", back), cursor)
    assert isinstance(readings, Patch)
    assert isinstance(estimates, Patch)
    ops = readings.to_plotly_json()["operations"]
    extended = [op for op in ops if op["operation"] == "Extend"]
    assert {tuple(op["location"]) for op in extended} >= {("data", 0, "x"), ("data", 0, "y")}
    water_x = next(op for op in extended if op["location"] == ["data", 0, "x"])["params"]["value"]
    assert len(water_x) == 5
    assert after["appended"] == cursor["appended"] + sum(
        len(v["t"]) for k, v in chart_data(str(live_log), "kettle-a", back)["series"].items()
        if k in cursor["traces"]
    )  # fmt: skip
    assert MAX_APPENDED > 0


def test_the_countdown_says_not_reachable_and_why() -> None:
    cards = figures({"target_c": 99.9, "time_to_target_s": None,
                     "target_reason": "not reachable: losses exceed power"})  # fmt: skip
    assert "not reachable: losses exceed power" in str([c.children for c in cards])
    cards = figures({"target_c": 99.9, "time_to_target_s": 125.0,
                     "time_to_target_lo_s": 110.0, "time_to_target_hi_s": 140.0})  # fmt: skip
    assert "2 min 05 s (90 %: 1 min 50 s to 2 min 20 s)" in str([c.children for c in cards])


def test_fleet_puts_the_vessels_that_need_attention_first() -> None:
    snap = {"latest": {
        "a": {"flags": [{"level": "notice", "message": "n"}], "phase": "idle"},
        "b": {"flags": [{"level": "alarm", "message": "dry boil"}], "phase": "boiling"},
        "c": {"flags": [], "phase": "heating", "time_to_target_s": 61.0},
        "d": {"flags": [], "phase": "idle"},
    }, "runs": {
        "d": {"run": "9", "start_t": 1.7e9, "scaling_index": 0.27,
              "drift": [{"name": "scaling", "level": "warning", "message": "scaling"}],
              "verdict": {"status": "trusted", "reasons": []}},
        "a": {"run": "4", "start_t": 1.7e9, "scaling_index": None,
              "drift": [{"name": "not_judged", "level": "notice", "message": "not judged"}],
              "verdict": {"status": "doubtful", "reasons": ["The fit did not converge."]}},
    }}  # fmt: skip
    rows = fleet_rows(snap)
    assert [r["vessel"] for r in rows] == ["b", "d", "a", "c"]  # d: its last run's drift
    assert rows[0]["flags"] == ["dry boil"]
    assert rows[-1]["time_to_target"] == "1 min 01 s"
    assert rows[1]["last_run"] == "9 (2023-11-14 22:13)"
    assert (rows[1]["last_verdict"], rows[2]["last_verdict"]) == ("trusted", "doubtful")
    table = str(render_fleet(snap))
    assert "▲ alarm" in table
    assert "27%" in table
    assert "last run's verdict" in table
    assert "✓ trusted" in table
    assert "✕ doubtful: not judged" in table


def test_a_doubtful_last_run_keeps_the_standing_warning_in_the_fleet() -> None:
    # made-up run rows: a trusted run warns of scaling, the next could not be judged
    warned = {
        "name": "scaling",
        "level": "warning",
        "message": "scaling",
        "evidence": {"scaling_index": 0.3},
    }
    rows = [
        {"vessel": "h1", "run": "6", "start_t": 1.0, "summary": {
            "drift": [warned], "verdict": {"status": "trusted", "reasons": []}}},
        {"vessel": "h1", "run": "7", "start_t": 2.0, "summary": {
            "drift": [{"name": "not_judged", "level": "notice", "message": "not judged"}],
            "verdict": {"status": "doubtful", "reasons": ["Too few readings."]}}},
    ]  # fmt: skip
    state = run_state(rows)["h1"]
    assert state["run"] == "7"
    assert [f["name"] for f in state["drift"]] == ["scaling", "not_judged"]
    assert state["status"] == "warning"
    (row,) = fleet_rows({"vessels": ["h1"], "latest": {}, "runs": {"h1": state}})
    assert row["status"] == "warning"
    assert row["last_verdict"] == "doubtful"
    # a trusted run with nothing to say clears it
    rows.append({"vessel": "h1", "run": "8", "start_t": 3.0, "summary": {
        "drift": [], "verdict": {"status": "trusted", "reasons": []}}})  # fmt: skip
    assert run_state(rows)["h1"]["status"] == "ok"


def test_the_maintenance_view_says_what_stands_against_the_vessel() -> None:
    from dashboard.views.maintenance import standing

    # made-up runs: a scaling warning, then a run that could not be judged
    warned = {
        "name": "scaling",
        "level": "warning",
        "message": "G is 30 % down. That is as much as 0.10-0.55 mm of scale.",
    }
    runs = [{"run": "6", "drift": [warned], "verdict": {"status": "trusted", "reasons": []}},
            {"run": "7", "drift": [{"name": "not_judged", "level": "notice",
                                    "message": "Run 7 was not judged."}],
             "verdict": {"status": "doubtful", "reasons": ["Too few readings."]}}]  # fmt: skip
    text = str(standing({"runs": runs}))
    assert "0.10-0.55 mm of scale" in text
    assert "● warning" in text
    assert "Run 7 was not judged." in text
    clean = [{"run": "8", "drift": [], "verdict": {"status": "trusted", "reasons": []}}]
    assert "Nothing stands against this vessel" in str(standing({"runs": runs + clean}))


def test_the_board_renders_in_headless_chromium(live_log) -> None:
    dom = render_board(create_app(str(live_log), poll_ms=60_000), "board.png")
    assert dom.count('class="main-svg"') >= 2  # both charts drawn
    assert "kettle-a" in dom
    assert "kettle-b" in dom
    assert "water mass" in dom
    assert "not a safety device" in dom


def test_demo_serves_the_board_and_stops_on_sigint(tmp_path) -> None:
    import re
    import signal
    import time
    import urllib.request

    out = tmp_path / "demo.sqlite"
    proc = subprocess.Popen(
        [sys.executable, "-m", "dashboard.cli", "demo", "--quick", "--speed", "60",
         "--duration-s", "60", "--board-port", "0", "--out", str(out),
         "--access-log", str(tmp_path / "web.log")],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip
    try:
        url = None
        deadline = time.monotonic() + 60
        lines = []
        while time.monotonic() < deadline:
            line = proc.stdout.readline()
            lines.append(line)
            found = re.search(r"the board is at (http://127\.0\.0\.1:\d+/)", line)
            if found:
                url = found.group(1)
            if "stays up" in line:
                break
        assert url, "".join(lines)
        page = urllib.request.urlopen(url, timeout=10).read().decode()  # loopback only
        assert "<title>ebullio board</title>" in page
        proc.send_signal(signal.SIGINT)
        assert proc.wait(timeout=30) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
        rest_out, rest_err = proc.communicate()
    # issue 15: the web server's request lines buried the demo's live table; they go
    # to the access log now, and none reach the terminal
    assert '"GET / HTTP/1.1" 200' in (tmp_path / "web.log").read_text(encoding="utf-8")
    terminal = "".join(lines) + rest_out + rest_err
    assert "GET /" not in terminal


def test_board_help_and_refusing_an_open_host_without_a_login(live_log) -> None:
    import os

    proc = subprocess.run([sys.executable, "-m", "dashboard.cli", "board", "--help"],
                          capture_output=True, text=True, timeout=60, check=True)  # fmt: skip
    assert "examples: ebullio board" in proc.stdout
    assert "--engine" in proc.stdout
    env = {k: v for k, v in os.environ.items() if not k.startswith("EBULLIO_BOARD_")}
    proc = subprocess.run(
        [sys.executable, "-m", "dashboard.cli", "board", str(live_log), "--host", "0.0.0.0"],
        capture_output=True, text=True, timeout=60, check=False, env=env,
    )  # fmt: skip
    assert proc.returncode == 2
    assert "reachable from other machines" in proc.stderr
    assert "EBULLIO_BOARD_USER" in proc.stderr


def test_maintenance_history_figure_and_report_links() -> None:
    from dashboard.views.maintenance import history_figure, report_links

    runs = [
        {"run": str(i), "start_utc": None,
         "element_conductance_w_per_k": {"value": g, "std": 0.3},
         "drift": [{"name": "scaling", "level": "warning"}] if g < 45 else [],
         "verdict": {"status": "trusted", "reasons": []}}
        for i, g in enumerate([54, 54, 53.8, 54.2, 54, 40, 39], start=1)
    ]  # fmt: skip
    # a doubtful run between them (made-up: G 4.5x with a 25 % std), shown, not judged
    runs.insert(3, {"run": "3b", "start_utc": None,
                    "element_conductance_w_per_k": {"value": 243.0, "std": 60.75},
                    "drift": [{"name": "not_judged", "level": "notice"}],
                    "verdict": {"status": "doubtful",
                                "reasons": ["The G is known only to ±25%."]}})  # fmt: skip
    history = {
        "chosen": "k1",
        "runs": runs,
        "baselines": {"element_conductance_w_per_k": {"mean": 54.0, "sd": 1.6, "runs": 5}},
    }
    fig = history_figure(history)
    flags = [t for t in fig.data if t.name == "scaling flag"]
    assert len(flags) == 1
    assert list(flags[0].x) == ["6", "7"]  # the runs where the warning was raised
    assert any(s.type == "rect" for s in fig.layout.shapes)  # the baseline band
    (cross,) = [t for t in fig.data if t.name == "scaling not judged"]
    assert list(cross.x) == ["3b"]
    assert list(cross.text) == ["not judged (off scale)"]
    links = str(report_links(history))
    assert "/report?vessel=k1&run=7" in links
    assert "✓ trusted" in links
    assert "✕ doubtful: not judged: The G is known only to ±25%." in links


def fetch_report(client, url: str):
    """Follow a report link as a browser does: to its job's address, reloading meanwhile."""
    first = client.get(url)
    assert first.status_code == 303  # a fresh job, at an address of its own
    job_url = first.headers["Location"]
    assert "job=" in job_url
    waited = []
    wait_until(lambda: waited.append(client.get(job_url)) or
               "Preparing the audit report" not in waited[-1].get_data(as_text=True),
               timeout_s=60.0)  # fmt: skip
    if len(waited) > 1:  # it said it was working, reloading itself, with the cautions
        text = waited[0].get_data(as_text=True)
        assert "http-equiv='refresh'" in text
        assert "not a safety device" in text
    return waited[-1]


def test_the_board_serves_the_audit_report_of_a_run(live_log) -> None:
    app = create_app(str(live_log), poll_ms=60_000)
    client = app.server.test_client()
    page = fetch_report(client, "/report?vessel=kettle-a&run=1")
    assert page.status_code == 200
    assert "ebullio report: kettle-a, run 1" in page.get_data(as_text=True)
    missing = fetch_report(client, "/report?vessel=kettle-a&run=9")
    assert missing.status_code == 404
    assert "has no run '9'" in missing.get_data(as_text=True)
    # the maintenance view's links carry the run's span: a label the replay does not
    # use (as after a restart mid-run) still finds the run
    from dashboard.data import run_history
    from dashboard.views.maintenance import report_links

    history = run_history(str(live_log), "kettle-a")
    (link,) = [li.children[0].href for li in report_links(history).children]  # A, then verdict
    assert "&from=" in link
    assert "&to=" in link
    relabelled = link.replace("run=1", "run=9")
    page = fetch_report(client, relabelled)
    assert page.status_code == 200
    assert "ebullio report: kettle-a, run 1" in page.get_data(as_text=True)
    exported = client.get(relabelled.replace("/report", "/export.csv"))
    assert exported.status_code == 200
    assert "kettle-a" in exported.get_data(as_text=True)


def _split_whole(path: str) -> list:
    """The runs of a log read whole (the reference the streamed paths are held to)."""
    from monitor.runs.logs import read_log
    from monitor.runs.run import split_runs

    return split_runs(read_log(path))[0]


def _drawn_whole(run) -> dict:
    """A run held whole, drawn as the board draws a run (the streamed paths' reference):
    every estimate made, every n-th kept and the last, each series through envelope()."""
    from dashboard.data import CHANNELS, _run_detail
    from monitor.reports.plots import Thinned, envelope
    from monitor.runs.replay import replay_run

    start = run.log.start_epoch_s or 0.0
    thinned = Thinned(max(len(run.rows), 1))
    summary = replay_run(run, on_estimate=lambda _run, e: thinned.add(e))
    series = {}
    for channel in CHANNELS:
        pts = [(start + r.time_s, r.values.get(channel)) for r in run.rows]
        pts = [p for p in pts if p[1] is not None]
        series[channel] = envelope([p[0] for p in pts], [p[1] for p in pts])
    return _run_detail(run.vessel, run.label, start, thinned.items(), series, summary)


def test_replay_view_lists_runs_replays_one_and_scrubs_with_a_patch(live_log) -> None:
    from dash import Patch

    from dashboard.data import list_runs, replay_detail
    from dashboard.views.replay import latest_at, parse_choice, run_options, scrub, show_run
    from monitor.runs.streams import run_spans

    runs = list_runs(str(live_log))  # from the runs table the service wrote
    assert [(r["vessel"], r["run"]) for r in runs] == [("kettle-a", "1"), ("kettle-b", "1")]
    split = list_runs(str(live_log), run_spans(str(live_log)))  # as the replay splits it
    assert [(r["vessel"], r["run"]) for r in split] == [(r["vessel"], r["run"]) for r in runs]
    assert [r["steps"] for r in runs] == [r["steps"] for r in split] == [301, 301]
    # the streamed split gives what the whole log's split gives, run for run
    whole_runs = _split_whole(str(live_log))
    assert [(r.vessel, r.label, len(r.rows), r.rows[0].time_s, r.rows[-1].time_s)
            for r in whole_runs] == [(s.vessel, s.label, s.steps, s.start_s, s.end_s)
                                     for s in run_spans(str(live_log))]  # fmt: skip
    options = run_options(runs)
    vessel, label, span = parse_choice(options[0]["value"])
    assert (vessel, label) == ("kettle-a", "1")
    assert span == (runs[0]["start_t"], runs[0]["end_t"])
    seen: list[float] = []
    detail = replay_detail(str(live_log), vessel, "no such label", span=span,
                           progress=seen.append)  # fmt: skip
    assert detail["run"] == "1"  # found by its time span, named by the replay's label
    # streamed, it read only kettle-a's samples; the whole log read and replayed in
    # memory gives the same run, estimates and series
    whole = _drawn_whole(next(r for r in whole_runs if r.vessel == vessel))
    assert whole["estimates"] == detail["estimates"]
    assert whole["series"] == detail["series"]
    assert whole["latest"] == detail["latest"]
    assert len(detail["estimates"]["t"]) == 301  # short: every estimate kept
    readings, _estimates, length, value, _marks, cards = show_run(detail)
    assert length == 300  # the simulated 300 s run (our scenario)
    assert value == 0
    assert readings["layout"]["shapes"][0]["x0"] == detail["series"]["water"]["t"][0] * 1000.0
    go.Figure(readings), go.Figure(_estimates)  # valid figures by plotly's own checks
    moved, _, cards_later = scrub(detail, 200.0)
    assert isinstance(moved, Patch)
    start = detail["series"]["water"]["t"][0]
    shapes = moved.to_plotly_json()["operations"][0]["params"]["value"]
    assert shapes[0]["x0"] == (start + 200.0) * 1000.0
    early, late = latest_at(detail, start + 20.0), latest_at(detail, start + 200.0)
    assert late["water_c"] > early["water_c"] + 10.0  # the kettle heats (our scenario)
    assert str(cards) != str(cards_later)
    # issue 15: the phase card always showed "-" (the phase was left out of the replay)
    assert late["phase"] == "heating"
    assert "heating" in str(cards_later)


def test_the_board_exports_one_run_as_csv(live_log) -> None:
    app = create_app(str(live_log), poll_ms=60_000)
    client = app.server.test_client()
    page = client.get("/export.csv?log=0&vessel=kettle-b&run=1")
    assert page.status_code == 200
    text = page.get_data(as_text=True)
    assert "kettle-b" in text
    assert len(text.splitlines()) > 300  # a header, then one row a second of the 300 s run
    assert client.get("/export.csv?vessel=kettle-b&run=7").status_code == 404


def test_a_long_replay_keeps_every_nth_estimate_and_the_last(live_log) -> None:
    from dashboard.data import replay_streamed_run
    from monitor.runs.streams import run_spans

    span = run_spans(str(live_log))[0]
    told: list[float] = []
    thin = replay_streamed_run(str(live_log), span, told.append, max_points=50)
    whole = replay_streamed_run(str(live_log), span)
    t_thin, t_whole = thin["estimates"]["t"], whole["estimates"]["t"]
    every = math.ceil(301 / 50)  # 301 steps of our 300 s scenario
    assert len(t_thin) == len(range(0, 301, every)) + 1 <= 50  # every 7th, and the last
    assert t_thin[-1] == t_whole[-1]
    assert set(t_thin) <= set(t_whole)
    assert thin["summary"]["water_mass_kg"] == whole["summary"]["water_mass_kg"]  # all computed
    assert thin["latest"] == whole["latest"]


def test_jobs_answer_at_once_with_progress_then_the_answer_or_the_failure() -> None:

    from dashboard.jobs import Jobs

    gate = threading.Event()

    def slow(x, progress):
        progress(0.25)
        gate.wait(10.0)
        return x * 2

    calls = []

    def broken(progress):  # noqa: ARG001 (Jobs passes it to every job)
        calls.append(1)
        raise ValueError("the log ends mid-row")

    jobs = Jobs(keep=2)
    try:
        first = jobs.ask(("slow", 21), slow, 21)
        assert first.status == "running"
        wait_until(lambda: jobs.ask(("slow", 21), slow, 21).progress == 0.25)
        gate.set()
        wait_until(lambda: jobs.ask(("slow", 21), slow, 21).status == "done")
        assert jobs.ask(("slow", 21), slow, 21).answer == 42  # kept, not run again
        states = []
        wait_until(lambda: states.append(jobs.ask(("broken",), broken)) or
                   states[-1].status == "failed")  # fmt: skip
        assert "mid-row" in states[-1].error
        # a failure is returned once and forgotten: asked again, the work runs again
        wait_until(lambda: jobs.ask(("broken",), broken).status == "failed")
        assert len(calls) == 2
    finally:
        gate.set()
        jobs.close()


def wait_until(check, timeout_s: float = 10.0) -> None:
    import time

    end = time.monotonic() + timeout_s
    while not check():
        assert time.monotonic() < end, "timed out"
        time.sleep(0.01)


def test_a_replay_in_a_child_process_gives_the_same_answer_or_says_why_not(live_log) -> None:
    from dashboard.data import replay_detail
    from dashboard.jobs import Jobs

    jobs = Jobs()
    try:

        def ask(vessel: str):
            return jobs.ask(("child", vessel), replay_detail, str(live_log), vessel, "1",
                            separate=True)  # fmt: skip

        wait_until(lambda: ask("kettle-a").status != "running", timeout_s=60.0)
        state = ask("kettle-a")
        assert state.status == "done", state.error
        here = replay_detail(str(live_log), "kettle-a", "1")
        assert state.answer["latest"] == here["latest"]
        assert state.answer["estimates"] == here["estimates"]
        states = []  # a failure is returned once (then forgotten): keep what came back
        wait_until(lambda: states.append(ask("no-such-vessel")) or
                   states[-1].status != "running", timeout_s=60.0)  # fmt: skip
        assert states[-1].status == "failed"
        assert "has no run '1'" in states[-1].error
    finally:
        jobs.close()


def test_the_replay_view_says_how_far_a_replay_has_got_and_why_one_failed() -> None:
    from dashboard.jobs import JobState
    from dashboard.views.replay import parse_choice, waiting_text

    assert "42 % done" in waiting_text(JobState("running", progress=0.42))
    assert "replaying" in waiting_text(JobState("running"))
    assert "could not be replayed: the log ends" in waiting_text(
        JobState("failed", error="the log ends")
    )
    assert waiting_text(JobState("done", answer={})) == ""
    assert parse_choice("heater|3|1790000000.5|1790086399.0") == (
        "heater", "3", (1790000000.5, 1790086399.0))  # fmt: skip
    assert parse_choice("heater|3") == ("heater", "3", None)  # a run split from the log


def test_a_csv_logs_history_reuses_the_boards_replay_and_matches_a_fresh_one(tmp_path) -> None:
    from dashboard.data import replay_csv, run_history
    from monitor.cli import main

    log = tmp_path / "sim.csv"
    assert main(["simulate", "--duration-s", "300", "--out", str(log)]) == 0  # our scenario
    calls: list[str] = []

    def remembered(path: str) -> dict:
        calls.append(path)
        return replay_csv(path)

    reused = run_history(str(log), None, csv_replay=remembered)
    fresh = run_history(str(log), None)  # replays the log through `ebullio replay`'s path
    assert calls == [str(log)]
    assert reused["chosen"] == fresh["chosen"] == "kettle-1"
    assert [r["run"] for r in reused["runs"]] == [r["run"] for r in fresh["runs"]] == ["1"]
    assert reused["runs"] == fresh["runs"]
    assert reused["baselines"] == fresh["baselines"]


def test_jobs_once_closed_take_no_more_work_and_do_not_hold_the_process() -> None:

    from dashboard.jobs import Jobs

    gate = threading.Event()

    def slow(progress):  # noqa: ARG001 (Jobs passes it to every job)
        gate.wait(10.0)
        return "late"

    jobs = Jobs(workers=1)
    try:
        assert jobs.ask(("first",), slow).status == "running"
        assert jobs.ask(("queued",), slow).status == "running"  # waits for the one slot
        jobs.close()
        assert jobs.ask(("after",), slow).error == "the board is stopping"
        wait_until(lambda: jobs.ask(("queued",), slow).status == "failed")  # dropped
        watchers = [t for t in threading.enumerate() if t.name == "board-job"]
        assert watchers
        assert all(t.daemon for t in watchers)  # the interpreter will not wait for them
    finally:
        gate.set()


def test_the_board_warns_of_a_log_that_failed_its_integrity_check(live_log, tmp_path) -> None:
    """Issue 14: the board showed an altered log as if nothing were wrong."""
    import time

    from dashboard.app import IntegrityWatch

    altered = tmp_path / "altered.sqlite"
    shutil.copy(live_log, altered)
    change_one_reading(altered, which=50)
    watch = IntegrityWatch([str(live_log), str(altered)])
    deadline = time.monotonic() + 30.0
    while not watch.warnings() and time.monotonic() < deadline:
        time.sleep(0.1)
    (line,) = watch.warnings()  # the intact log says nothing
    assert "altered.sqlite failed its integrity check (tampered)" in line
    app = create_app(str(altered), poll_ms=60_000)
    assert "log-integrity" in str(app.layout)  # the banner's place on every page


def test_an_empty_maintenance_panel_says_why() -> None:
    """Issue 15: on a kettle log (no voltage or current readings) the panel of the power
    at the rated voltage was empty without a word."""
    from monitor.reports.plots import history_figure

    runs = [{"run": str(k), "verdict": {"status": "trusted", "reasons": []},
             "ua_w_per_k": {"value": 1.0 + 0.01 * k, "std": 0.1},
             "element_conductance_w_per_k": {"value": 50.0, "std": 1.0}}
            for k in range(1, 4)]  # fmt: skip
    notes = [a.text for a in history_figure(runs, {}).layout.annotations]
    assert "not measured: it needs voltage and current readings" in notes
    assert not any("element thermocouple" in n for n in notes)  # that panel has points
    assert not [a for a in history_figure([], {}).layout.annotations if "measured" in a.text]


def test_the_scrub_box_says_its_unit() -> None:
    """Issue 15: the replay view's scrub box took seconds with no unit beside an axis in
    minutes."""
    from dashboard.views.replay import layout

    text = str(layout(["a.sqlite"]))
    assert "s from its start (marks in minutes)" in text


def test_a_csv_log_on_the_board_is_read_as_a_stream_with_the_whole_replays_figures(
    tmp_path,
) -> None:
    """Issue 16: the board's snapshot of a CSV log (replay_csv) reads it as a stream; each
    vessel's last run is drawn as _drawn_whole draws it read whole, and the summaries and
    drift are ebullio replay's."""
    from dashboard.data import replay_csv
    from monitor.runs.logs import read_log
    from monitor.runs.replay import replay
    from monitor.runs.run import split_runs

    lines = ["time_s,water_c,power_w,vessel,run"]
    for t in range(400):  # two vessels, interleaved; urn-2 labels its runs (our own)
        lines.append(f"{t},{min(20 + t * 0.4, 99.0):.2f},{2000 if t < 200 else 0},kettle-a,")
        lines.append(f"{t},{15 + t * 0.05:.2f},1500,urn-2,{'A' if t < 250 else 'B'}")
    path = tmp_path / "two.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    board = replay_csv(str(path))
    runs, _ = split_runs(read_log(path))
    for vessel in ("kettle-a", "urn-2"):
        whole = _drawn_whole([r for r in runs if r.vessel == vessel][-1])
        whole.pop("summary")
        assert board["vessels"][vessel] == whole
    assert board["summaries"] == replay([str(path)])["runs"]
    assert [s["run"] for s in board["summaries"]] == ["1", "A", "B"]
