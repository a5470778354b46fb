"""The replay contract: JSON keys, estimate columns, runs, determinism and bad input."""

from __future__ import annotations

import csv
import io
import json
import subprocess
import sys
from pathlib import Path

import pytest

from drivers.errors import LogFormatError
from monitor.cli import main
from monitor.records.interchange import read_csv_text
from monitor.records.schema import ESTIMATE_CSV_COLUMNS
from monitor.runs.replay import replay
from monitor.runs.run import split_runs

LOGS = Path(__file__).resolve().parent.parent.parent / "replay_logs"
KETTLE = str(LOGS / "kettle-clean.csv")

RUN_KEYS = {
    "vessel", "run", "start_s", "end_s", "water_mass_kg", "heat_capacity_j_per_k", "ua_w_per_k",
    "element_conductance_w_per_k", "standing_loss_kwh_per_24h", "standing_loss_at_c",
    "heat_up_s", "energy_wh", "efficiency", "flags",
}  # fmt: skip
ESTIMATE_KEYS = [
    "time_s", "vessel", "run", "phase", "water_c", "water_mass_kg", "water_mass_std",
    "heat_capacity_j_per_k", "heat_capacity_std", "ua_w_per_k", "ua_std",
    "element_conductance_w_per_k", "element_conductance_std", "target_c", "time_to_target_s",
    "time_to_target_lo_s", "time_to_target_hi_s", "nis",
]  # fmt: skip


def _json(argv, capsys):
    assert main(["replay", *argv, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_json_contract(capsys):
    result = _json([KETTLE], capsys)
    assert set(result) >= {"runs", "quarantined"}
    (run,) = result["runs"]
    assert set(run) >= RUN_KEYS
    for key in ("water_mass_kg", "heat_capacity_j_per_k", "ua_w_per_k",
                "element_conductance_w_per_k"):  # fmt: skip
        assert set(run[key]) == {"value", "std"}
    assert run["standing_loss_kwh_per_24h"] is None  # a kettle holds no temperature
    assert run["vessel"] == "kettle-1"
    assert (run["start_s"], run["end_s"]) == (0.0, 900.0)
    # against the log's own truth_ metadata (simulated: 1.2 kg, G 54 W/K, UA 0.645 W/K)
    assert run["water_mass_kg"]["value"] == pytest.approx(1.2, rel=0.04)
    assert run["element_conductance_w_per_k"]["value"] == pytest.approx(54.0, rel=0.07)
    assert run["ua_w_per_k"]["value"] == pytest.approx(0.645, rel=0.15)
    assert 200.0 < run["heat_up_s"] < 240.0
    assert 0.85 < run["efficiency"] < 1.0
    for flag in run["flags"]:
        assert set(flag) >= {"name", "level", "message"}
    # the run's own diagnostics say the estimate held: it is judged for drift
    assert run["verdict"] == {"status": "trusted", "reasons": []}
    assert not [f for f in run["drift"] if f["name"] == "not_judged"]


def test_a_run_too_short_to_judge_is_doubtful_and_said_to_be_not_judged(tmp_path, capsys):
    rows = ["time_s,water_c,element_c,power_w"]
    rows += [f"{t},{15 + 0.25 * t:.2f},{25 + 0.25 * t:.2f},2000" for t in range(40)]  # made-up
    path = tmp_path / "short.csv"
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")
    (run,) = _json([str(path)], capsys)["runs"]
    assert run["verdict"]["status"] == "doubtful"
    assert any("usable water readings" in r for r in run["verdict"]["reasons"])
    (note,) = [f for f in run["drift"] if f["name"] == "not_judged"]
    assert note["level"] == "notice"
    assert "not judged" in note["message"]
    assert "usable water readings" in note["message"]
    assert note["evidence"]["judged"] == "no"
    assert main(["replay", str(path)]) == 0
    text = capsys.readouterr().out
    assert "DOUBTFUL (not judged)" in text
    assert "why not judged: Only" in text


def test_estimates_columns_and_rows(tmp_path, capsys):
    out = tmp_path / "est.csv"
    assert main(["replay", KETTLE, "--estimates", str(out)]) == 0
    text = capsys.readouterr().out
    assert "kettle-1" in text
    assert "not a safety device" in text
    with out.open(encoding="utf-8") as handle:
        rows = list(csv.reader(handle))
    assert rows[0] == ESTIMATE_KEYS == list(ESTIMATE_CSV_COLUMNS)
    assert len(rows) == 1 + 901
    heating = [r for r in rows[1:] if r[3] == "heating" and r[14] and r[15] and r[16]]
    assert len(heating) > 150, "time to target with its interval is given while heating"
    for r in heating:
        assert float(r[15]) <= float(r[14]) <= float(r[16])


def test_same_log_same_figures_bit_for_bit(tmp_path):
    outputs = []
    for name in ("a", "b"):
        est = tmp_path / f"{name}.csv"
        proc = subprocess.run(
            [sys.executable, "-m", "monitor.cli", "replay", KETTLE, "--json", "--estimates",
             str(est)],
            capture_output=True, text=True, timeout=120, check=True,
        )  # fmt: skip
        outputs.append((proc.stdout, est.read_bytes()))
    assert outputs[0] == outputs[1]


def test_several_files_are_runs_in_order_per_vessel(capsys):
    result = _json([KETTLE, KETTLE, str(LOGS / "water-heater-12h.csv")], capsys)
    runs = [(r["vessel"], r["run"]) for r in result["runs"]]
    assert runs == [("kettle-1", "1"), ("kettle-1", "2"), ("heater-1", "1")]
    heater = result["runs"][2]
    assert heater["standing_loss_kwh_per_24h"] is not None
    assert heater["standing_loss_at_c"] == 60.0
    # truth_effective_ua 1.454 W/K at 60 °C: 1.454 · 40 K · 24 h = 1.40 kWh/24 h
    assert heater["standing_loss_kwh_per_24h"]["value"] == pytest.approx(1.40, rel=0.2)


def _log(text):
    return read_csv_text(io.StringIO(text), "bench.csv")


def test_runs_split_on_run_column_and_at_a_refill():
    rows = ["time_s,water_c,power_w,run"]
    rows += [f"{t},{20 + t / 10},2000,A" for t in range(60)]
    rows += [f"{t},{30 + t / 10},2000,B" for t in range(60, 120)]
    runs, _ = split_runs([_log("\n".join(rows) + "\n")])
    assert [(r.label, len(r.rows)) for r in runs] == [("A", 60), ("B", 60)]
    rows = ["time_s,water_c,power_w"]
    rows += [f"{t},{20 + t / 2},2000" for t in range(100)]  # up to 69.5 °C
    rows += [f"{t},{15 + (t - 100) / 2},2000" for t in range(100, 150)]  # emptied and refilled
    runs, _ = split_runs([_log("\n".join(rows) + "\n")])
    # the first cold reading (t = 100 s) is seen as a refill only at the second, and
    # goes with the new run
    assert [len(r.rows) for r in runs] == [100, 50]
    assert runs[1].rows[0].time_s == 100.0


def test_bad_rows_are_counted_and_reported(tmp_path, capsys):
    lines = Path(KETTLE).read_text(encoding="utf-8").splitlines()
    header_at = next(i for i, line in enumerate(lines) if line.startswith("time_s"))
    lines[header_at + 50] = lines[header_at + 50].replace(",", ",oops,", 1)  # malformed
    lines.insert(header_at + 100, lines[header_at + 20])  # time going backwards
    bad = tmp_path / "bad.csv"
    bad.write_text("\n".join(lines) + "\n", encoding="utf-8")
    result = _json([str(bad)], capsys)
    reasons = [q["reason"] for q in result["quarantined"]]
    assert len(reasons) == 2
    assert any("cells where the header has" in r for r in reasons)
    assert any("does not move forward" in r for r in reasons)
    assert all(q["raw"] for q in result["quarantined"])
    (run,) = result["runs"]
    assert run["quarantined_rows"] == 2
    assert any(f["name"] == "quarantined_rows" for f in run["flags"])
    # and the figures are still there
    assert run["water_mass_kg"]["value"] == pytest.approx(1.2, rel=0.04)


@pytest.mark.parametrize(
    ("header", "message"),
    [
        ("time_s,water_c,power_w,colour", "unknown column 'colour'"),
        ("time_s,element_c,power_w", "required column 'water_c' is missing"),
        ("time_s,water_c,ambient_c", "'power_w' or 'energy_wh'"),
    ],
)
def test_bad_headers_give_a_clear_error_not_a_traceback(tmp_path, header, message):
    path = tmp_path / "h.csv"
    path.write_text(header + "\n0,20,0\n", encoding="utf-8")
    proc = subprocess.run(
        [sys.executable, "-m", "monitor.cli", "replay", str(path), "--json"],
        capture_output=True, text=True, timeout=60, check=False,
    )  # fmt: skip
    assert proc.returncode == 2
    assert message in proc.stderr
    assert str(path) in proc.stderr
    assert "Traceback" not in proc.stderr


def test_missing_file_is_a_clear_error(tmp_path):
    proc = subprocess.run(
        [sys.executable, "-m", "monitor.cli", "replay", str(tmp_path / "nope.csv")],
        capture_output=True, text=True, timeout=60, check=False,
    )  # fmt: skip
    assert proc.returncode == 2
    assert "nope.csv" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_replay_function_returns_the_same_as_the_cli(capsys):
    assert replay([KETTLE])["runs"] == _json([KETTLE], capsys)["runs"]


def test_one_run_that_cannot_be_replayed_leaves_the_others(monkeypatch, capsys):
    """Issue 14: a failure replaying one run (outside the filter, which guards itself)
    is that run's summary, and the other runs and the terminal table still come."""
    import monitor.runs.replay as rp

    original = rp.OpenRun.step

    def failing(run, row):
        if run.label == "2" and run.steps >= 10:  # mid-run, once its filter is going
            raise RuntimeError("injected for the test")
        return original(run, row)

    monkeypatch.setattr(rp.OpenRun, "step", failing)
    result = _json([KETTLE, KETTLE, str(LOGS / "water-heater-12h.csv")], capsys)
    runs = {(r["vessel"], r["run"]): r for r in result["runs"]}
    assert len(runs) == 3
    bad = runs[("kettle-1", "2")]
    assert [f["name"] for f in bad["flags"]] == ["replay_failed"]
    assert bad["verdict"]["status"] == "doubtful"
    assert runs[("kettle-1", "1")]["water_mass_kg"] is not None
    assert runs[("heater-1", "1")]["standing_loss_kwh_per_24h"] is not None
    import jsonschema  # the failed run's summary still follows the documented schema

    schema = json.loads((LOGS.parent / "docs" / "run-summary.schema.json").read_text("utf-8"))
    jsonschema.validate(result, schema)
    assert main(["replay", KETTLE, KETTLE]) == 0  # the text table too
    assert "replay_failed" in capsys.readouterr().out


def test_the_text_tables_keep_their_columns_and_show_drift():
    """Issue 15: the fleet table's columns were pushed by a long time stamp, and the
    replay table left the drift flags out."""
    from monitor.runs.drift import fleet_table
    from monitor.runs.tables import text_table

    lines = text_table(["id", "n", "note"], [["a-very-long-vessel-id", "7", "x"], ["b", "12", "y"]],
                       right=" >")  # fmt: skip
    assert lines[3].startswith("b" + " " * 20 + "  ")  # padded to the widest id
    assert lines[2].index("7") == lines[3].index("12") + 1  # right-aligned numbers
    result = replay([KETTLE])
    result["runs"][0]["drift"] = [{"name": "scaling", "level": "warning", "message": "m"}]
    from monitor.runs.replay import summary_table

    assert "drift scaling(warning)" in summary_table(result)
    row = {"vessel": "heater-with-a-long-name-12", "status": "warning", "scaling_index": 0.8,
           "runs": 12, "runs_since_baseline": 7, "not_judged_runs": 1, "last_run": "12",
           "last_start_utc": "2026-01-01T00:00:00+00:00", "last_verdict": "trusted",
           "flags": ["scaling"]}  # fmt: skip
    table = fleet_table([row, {**row, "vessel": "k1", "runs": 3}]).splitlines()
    assert table[2].index("trusted") == table[3].index("trusted")


def test_replay_json_follows_the_documented_schema(capsys):
    """Issue 15: the run-summary JSON is documented in docs/ with a JSON Schema."""
    import jsonschema

    schema = json.loads((LOGS.parent / "docs" / "run-summary.schema.json").read_text("utf-8"))
    jsonschema.Draft202012Validator.check_schema(schema)
    logs = sorted(str(p) for p in LOGS.glob("*.csv"))
    result = _json(logs, capsys)
    jsonschema.validate(result, schema)
    assert len(result["runs"]) >= 3
    broken = json.loads(json.dumps(result))
    broken["runs"][0]["verdict"]["status"] = "fine"  # not a verdict: the schema says so
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(broken, schema)


def test_set_aside_input_is_one_record_from_a_csv_and_from_a_recorder_log(tmp_path) -> None:
    """Issue 15: one record type for set-aside input, whatever read it."""
    from drivers.channels import Quarantined
    from monitor.records.recorder import Recorder

    csv_log = tmp_path / "bad.csv"
    csv_log.write_text("time_s,water_c,power_w\n0,20,0\n1,oops,0\n2,20.1,0\n", encoding="utf-8")
    (row,) = replay([str(csv_log)])["quarantined"]
    assert row["file"] == str(csv_log)
    assert (row["line"], row["where"], row["t"], row["raw"]) == (3, "line 3", None, "1,oops,0")
    sqlite_log = tmp_path / "bad.sqlite"
    received_t = 1_767_225_600.0
    with Recorder(sqlite_log, version="test", config_text=None) as rec:
        rec.add_quarantined([Quarantined(received_t, "serial:///dev/ttyUSB0", "line 12",
                                         "not a number", b"water=\xff")])  # fmt: skip
    (row,) = replay([str(sqlite_log)])["quarantined"]
    assert row["file"] == str(sqlite_log)
    assert row["where"] == "quarantine id 1, serial:///dev/ttyUSB0 line 12"
    assert (row["line"], row["t"], row["reason"]) == (0, received_t, "not a number")
    assert row["raw"] == "water=\\xff"  # the byte that is not UTF-8, kept and escaped


def _two_vessel_log(tmp_path: Path) -> Path:
    lines = ["time_s,water_c,power_w,vessel,run"]
    for t in range(400):  # two vessels, interleaved; urn-2 labels its runs
        lines.append(f"{t},{min(20 + t * 0.4, 99.0):.2f},{2000 if t < 200 else 0},kettle-a,")
        lines.append(f"{t},{15 + t * 0.05:.2f},1500,urn-2,{'A' if t < 250 else 'B'}")
    for t in range(400, 500):  # kettle-a emptied and refilled: cold water again
        lines.append(f"{t},{15 + (t - 400) * 0.3:.2f},2000,kettle-a,")
    lines.insert(300, "1.5,not-a-number,2000,kettle-a,")  # set aside, inside run 1
    log = tmp_path / "two.csv"
    log.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return log


def test_the_streamed_replay_gives_what_replaying_the_whole_log_gives(tmp_path) -> None:
    """Issue 16: replay reads a log as a stream, run by run; the runs, their order and
    their figures are those of splitting the whole log (split_runs, replay_run)."""
    from monitor.runs.logs import read_log
    from monitor.runs.replay import replay_run

    log = _two_vessel_log(tmp_path)
    whole, _ = split_runs(read_log(log))
    expected = [replay_run(run) for run in whole]
    streamed = replay([str(log)])["runs"]
    assert [(r["vessel"], r["run"]) for r in streamed] == [(r.vessel, r.label) for r in whole]
    assert [(r["vessel"], r["run"]) for r in streamed] == [
        ("kettle-a", "1"), ("urn-2", "A"), ("urn-2", "B"), ("kettle-a", "2")]  # fmt: skip
    for got, want in zip(streamed, expected, strict=True):
        got = {k: v for k, v in got.items() if k != "drift"}
        assert got == want
    assert streamed[0]["quarantined_rows"] == 1


def test_one_run_is_found_and_replayed_from_a_stream_as_the_whole_replay_gives_it(
    tmp_path,
) -> None:
    """Issue 16 (the board's replay view): run_spans splits a log as split_runs does
    without holding its rows, and replay_streamed replays one run of it alone, with the
    summary the whole replay gives that run and every row and estimate told."""
    from monitor.runs.logs import read_log
    from monitor.runs.replay import replay_run, replay_streamed
    from monitor.runs.streams import run_spans

    log = _two_vessel_log(tmp_path)
    whole, _ = split_runs(read_log(log))
    spans = run_spans(str(log))
    assert [(s.vessel, s.label, s.steps, s.start_s, s.end_s) for s in spans] == [
        (r.vessel, r.label, len(r.rows), r.rows[0].time_s, r.rows[-1].time_s) for r in whole
    ]
    for span, run in zip(spans, whole, strict=True):
        water = [r.values["water"] for r in run.rows if r.values.get("water") is not None]
        assert span.points["water"] == (len(water), sum(1 for v in water if v == v))
    assert [(s.vessel, s.number) for s in run_spans(str(log), "urn-2")] == [
        ("urn-2", 0), ("urn-2", 1)]  # fmt: skip
    streamed = replay([str(log)])["runs"]
    for span, run, summary in zip(spans, whole, streamed, strict=True):
        rows: list = []
        estimates: list = []
        mine = replay_streamed(str(log), span.vessel, span.number, rows.append, estimates.append)
        assert mine == {k: v for k, v in summary.items() if k != "drift"}
        assert [r.time_s for r in rows] == [r.time_s for r in run.rows]
        expected: list = []
        replay_run(run, on_estimate=lambda _run, e, out=expected: out.append(e))
        assert repr(estimates) == repr(expected)  # every figure, bit for bit
    assert replay_streamed(str(log), "urn-2", 2) is None  # it has two runs, 0 and 1


def test_the_streamed_envelope_keeps_the_points_the_whole_one_keeps() -> None:
    """EnvelopeStream (the board's replay of a long run) against envelope over the whole
    series: the same points, in the same order, NaN, ties and short series included."""
    import math
    import random

    from monitor.reports.plots import EnvelopeStream, envelope

    rng = random.Random(7)
    for _ in range(200):
        n = rng.choice([0, 1, 9, 10, 11, 40, 41, 2399, 2400, 2401, 4801, 20_000])
        most = rng.choice([10, 11, 100, 2400])
        t = [0.5 * i for i in range(n)]
        y = [math.nan if rng.random() < 0.1 else float(rng.randint(0, 20)) for _ in range(n)]
        if rng.random() < 0.2:
            y = [3.0] * n  # every point a tie
        stream = EnvelopeStream(n, sum(1 for v in y if v == v), most)
        for a, b in zip(t, y, strict=True):
            stream.add(a, b)
        got, want = stream.points(), envelope(t, y, most)
        assert got[0] == want[0]
        assert [v if v == v else "nan" for v in got[1]] == [
            v if v == v else "nan" for v in want[1]]  # fmt: skip


def test_one_run_exported_from_a_stream_is_the_run_the_whole_split_gives(tmp_path) -> None:
    """Issue 16: export_run_csv (the board's /export.csv) reads the log as a stream; the
    file it writes is the one written from the run of the whole log's split."""
    from monitor.records.interchange import iso_utc, write_csv
    from monitor.runs.logs import nan_as_blank, read_log
    from monitor.runs.streams import export_run_csv, run_rows, run_spans

    log = _two_vessel_log(tmp_path)
    whole, _ = split_runs(read_log(log))
    spans = run_spans(str(log))
    assert len(spans) == len(whole) == 4
    for span, run in zip(spans, whole, strict=True):
        assert [r.time_s for r in run_rows(str(log), span.vessel, span.number)] == [
            r.time_s for r in run.rows]  # fmt: skip
        got = io.StringIO()
        written = export_run_csv(log, got, run.vessel, run.label)
        metadata = dict(run.log.metadata)
        if run.log.start_epoch_s is not None:
            metadata["start_utc"] = iso_utc(run.log.start_epoch_s)
        metadata["exported_from"] = f"two.csv, run {run.label}"
        want = io.StringIO()
        assert written == write_csv(want, nan_as_blank(run.rows), metadata, run.log.channels)
        assert got.getvalue() == want.getvalue()
    with pytest.raises(LogFormatError, match="its runs: A, B"):
        export_run_csv(log, io.StringIO(), "urn-2", "C")


def test_one_vessel_of_a_csv_log_of_several_is_exported_alone(tmp_path) -> None:
    """Issue 16: the whole-vessel export reads the log as a stream; of a CSV log holding
    two vessels it writes the one asked for, named in the metadata (it wrote every
    vessel's rows, or refused, when the log was read whole)."""
    from monitor.records.interchange import read_csv
    from monitor.runs.streams import export_csv

    log = _two_vessel_log(tmp_path)
    with pytest.raises(LogFormatError, match="holds vessels kettle-a, urn-2; say which"):
        export_csv(log, io.StringIO())
    with pytest.raises(LogFormatError, match="no vessel 'urn-3'; it holds kettle-a, urn-2"):
        export_csv(log, io.StringIO(), "urn-3")
    out = tmp_path / "urn.csv"
    with out.open("w", encoding="utf-8", newline="") as handle:
        assert export_csv(log, handle, "urn-2") == 400
    exported = read_csv(out)
    assert exported.metadata["vessel"] == "urn-2"
    assert exported.metadata["exported_from"] == "two.csv"
    assert [r.time_s for r in exported.rows] == [float(t) for t in range(400)]
    assert exported.rows[-1].values["water"] == pytest.approx(15 + 399 * 0.05)
