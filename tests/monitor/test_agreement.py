"""Issue 15's "done when": one log, one set of runs, wherever it is read.

A log is recorded live by the service with several runs, a refill inside one of them
and a restart of the service in the middle of a heat-up. Then the live service's own
run summaries, ``ebullio replay --json``, ``ebullio fleet --json``, the audit report
and the board's snapshot must agree run for run and flag for flag.
"""

from __future__ import annotations

import asyncio
import json
import re
from dataclasses import replace

import pytest

from dashboard.data import list_runs, load_snapshot
from drivers.simworld import kettle_scenario, run_series, scenario_metadata
from monitor import cli
from monitor.records.recorder import read_runs
from monitor.reports.report import build_report
from monitor.rig.service import Service
from tests.monitor.test_service import ListDriver, config_for, run_until

#: A scenario of our own: a 1.2 kg kettle, 240 s a run.
SCENARIO = replace(kettle_scenario(), duration_s=240.0)


def _instants(scale_mm: list[float], start_s: float, gap_s: float, seed: int) -> list:
    scenario = replace(SCENARIO, start_epoch_s=start_s)
    return [s for batch in run_series(scenario, scale_mm, gap_s=gap_s, seed=seed) for s in batch]


def _serve(log, meta: dict, part: list):
    """Run one session of the live service over ``part``; return its stats."""
    service = Service(config_for(SCENARIO.vessel, meta), str(log),
                      extra_sources={"rig": lambda: ListDriver(part, False)})  # fmt: skip
    # no fit put off for lack of CPU, so the live figures are the replay's exactly
    # (batchfit.FitBudget says when they may differ)
    service.fit_budget.burst_s = 1e9
    return asyncio.run(run_until(service, lambda: service.stats.samples >= len(part)))


def _recorded_log(tmp_path):
    """Record the log: 5 clean runs, a run then a refill 5 s after it, a scaled run cut
    by a restart at mid heat-up, and one more scaled run. Return the path and the
    live service's stats of each session."""
    t0 = SCENARIO.start_epoch_s
    step = SCENARIO.duration_s + 3600.0
    samples = _instants([0.0] * 5, t0, 3600.0, 0)
    # emptied and refilled: the next run's cold water is read 5 s after the last reading
    samples += _instants([0.0, 0.0], t0 + 5 * step, 5.0, 5)
    samples += _instants([0.14, 0.14], t0 + 7 * step, 3600.0, 7)
    scaled_start = t0 + 7 * step
    # the service restarts 40 s into the heat-up of the first scaled run
    cut = next(i for i, s in enumerate(samples) if s.t >= scaled_start + 40.0)
    meta = {**scenario_metadata(SCENARIO, 0), "element_sensor": "yes"}
    log = tmp_path / "agree.sqlite"
    return log, [_serve(log, meta, part) for part in (samples[:cut], samples[cut:])]


def _flags(summary: dict) -> list[tuple[str, str]]:
    return sorted((f["name"], f["level"]) for f in summary.get("flags") or [])


def _drift(summary: dict) -> list[tuple[str, str]]:
    return sorted((f["name"], f["level"]) for f in summary.get("drift") or [])


def _figures(summary: dict) -> tuple:
    def value(key: str) -> float | None:
        entry = summary.get(key)
        return entry["value"] if isinstance(entry, dict) else entry

    return (summary["run"], summary["steps"], summary["verdict"]["status"],
            value("water_mass_kg"), value("element_conductance_w_per_k"),
            value("ua_w_per_k"), summary["heat_up_s"], summary["energy_wh"])  # fmt: skip


def _report_flags(page: str) -> list[tuple[str, str]]:
    found = re.search(r"<ul id=\"report-flags\">(.*?)</ul>", page, re.S)
    assert found is not None
    items = re.findall(r"<li class='[^']*'><b>([^<]+)</b> \(([^)]+)\)", found.group(1))
    return sorted(items)


def test_live_replay_fleet_report_and_board_agree_run_for_run(tmp_path, capsys) -> None:
    log, stats = _recorded_log(tmp_path)
    assert [s.fits_deferred for s in stats] == [0, 0]
    live = [r["summary"] for r in read_runs(log) if r["summary"].get("source") == "live"]
    # 5 runs, the run before the refill, the refill's run, the scaled run cut by the
    # restart (two runs: each process starts a filter of its own) and the last run
    assert [s["run"] for s in live] == [str(i) for i in range(1, 11)]
    assert live[7].get("ended_by") == "stop"  # the first session stopped in run 8

    assert cli.main(["replay", str(log), "--json"]) == 0
    replayed = json.loads(capsys.readouterr().out)["runs"]
    assert [_figures(r) for r in replayed] == [_figures(s) for s in live]
    assert [_flags(r) for r in replayed] == [_flags(s) for s in live]
    assert [_drift(r) for r in replayed] == [_drift(s) for s in live]
    # the scaled runs were seen as scaled, so the agreement covers drift flags too
    assert ("scaling", "warning") in _drift(live[-1]) or ("scaling", "alarm") in _drift(live[-1])

    assert cli.main(["fleet", str(log), "--json"]) == 0
    (row,) = json.loads(capsys.readouterr().out)["vessels"]
    last = live[-1]
    assert row["runs"] == len(live)
    assert row["last_run"] == last["run"]
    assert row["last_verdict"] == last["verdict"]["status"]
    assert row["flags"] == sorted({n for n, _ in _flags(last) + _drift(last)})

    snapshot = load_snapshot(str(log))
    board = snapshot["runs"][SCENARIO.vessel]
    assert board["runs"] == len(live)
    assert board["run"] == last["run"]
    assert board["verdict"]["status"] == last["verdict"]["status"]
    assert sorted((f["name"], f["level"]) for f in board["drift"]) == _drift(last)
    assert sorted((f["name"], f["level"]) for f in board["flags"]) == _flags(last)
    assert board["status"] == row["status"]
    listed = list_runs(str(log))
    assert [(r["run"], r["steps"]) for r in listed] == [(s["run"], s["steps"]) for s in live]

    for index in (6, 8):  # the refill's run and the run after the restart
        summary = live[index]
        page = build_report(str(log), SCENARIO.vessel, summary["run"])
        assert _report_flags(page) == sorted(_flags(summary) + _drift(summary))
        verdict = "✓ trusted" if summary["verdict"]["status"] == "trusted" else "✕ doubtful"
        assert verdict in page


@pytest.mark.parametrize("vessel_filter", [None, SCENARIO.vessel])
def test_a_restart_splits_the_replay_as_it_split_the_live_runs(tmp_path, vessel_filter) -> None:
    from monitor.runs.logs import read_log
    from monitor.runs.run import split_runs

    t0 = SCENARIO.start_epoch_s
    samples = _instants([0.0], t0, 3600.0, 3)
    cut = next(i for i, s in enumerate(samples) if s.t >= t0 + 60.0)
    meta = {**scenario_metadata(SCENARIO, 3), "element_sensor": "yes"}
    log = tmp_path / "restart.sqlite"
    for part in (samples[:cut], samples[cut:]):
        _serve(log, meta, part)
    runs, _ = split_runs(read_log(log, vessel_filter))
    assert [r.label for r in runs] == ["1", "2"]
    assert [r["run"] for r in read_runs(log)] == ["1", "2"]
    # 60 s apart, far under the 900 s gap: only the restart splits them
    assert runs[1].rows[0].time_s == 0.0


def _export_whole(log_path, out, vessel):
    """The whole-vessel CSV export as it was made from the whole log read into memory
    (before issue 16's stream): the reference :func:`streams.export_csv` is held to."""
    from pathlib import Path

    from monitor.records.interchange import CHANNEL_COLUMNS, LogRow, iso_utc, write_csv
    from monitor.runs.logs import nan_as_blank, read_log
    from monitor.runs.run import split_runs

    mine = [g for g in read_log(log_path) if g.rows and g.metadata.get("vessel") == vessel]
    chosen, metadata = mine[0], dict(mine[-1].metadata)
    metadata["start_utc"] = iso_utc(chosen.start_epoch_s)
    metadata["exported_from"] = Path(str(log_path)).name
    if len(mine) == 1:
        return write_csv(out, nan_as_blank(chosen.rows), metadata, chosen.channels)
    runs, _ = split_runs(mine)
    base = chosen.start_epoch_s or 0.0
    rows: dict[int, LogRow] = {}
    for run in runs:
        shift = (run.log.start_epoch_s or 0.0) - base
        for r in run.rows:
            rows.setdefault(id(r), LogRow(r.line, r.time_s + shift, r.values, vessel, run.label))
    channels = [c for c in CHANNEL_COLUMNS if any(c in g.channels for g in mine)]
    return write_csv(out, nan_as_blank(list(rows.values())), metadata, channels, with_vessel=True)


def test_a_vessel_exported_from_a_stream_is_the_file_the_whole_log_gave(tmp_path) -> None:
    """Issue 16: ``ebullio export --csv`` reads the log as a stream. On a log of two
    sessions (a restart at mid heat-up) with a refill, the file is byte for byte the one
    made from the whole log, and it splits into the same runs again."""
    import io

    from monitor.records.interchange import read_csv
    from monitor.runs.logs import read_log
    from monitor.runs.run import split_runs
    from monitor.runs.streams import export_csv

    log, _ = _recorded_log(tmp_path)
    got, want = io.StringIO(), io.StringIO()
    written = export_csv(log, got)
    assert written == _export_whole(log, want, SCENARIO.vessel)
    assert got.getvalue() == want.getvalue()
    path = tmp_path / "exported.csv"
    path.write_text(got.getvalue(), encoding="utf-8")
    again, _ = split_runs([read_csv(path)])
    recorded, _ = split_runs(read_log(log))
    assert len(recorded) == 10  # nine runs, one cut in two by the restart
    assert [r.label for r in again] == [r.label for r in recorded]
    assert [len(r.rows) for r in again] == [len(r.rows) for r in recorded]
