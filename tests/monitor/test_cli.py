"""Tests of the ebullio command line, run as a real process where it matters."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

import pytest

from monitor.cli import main
from monitor.records.interchange import read_csv
from tests.support.tamper import change_one_reading


def test_simulate_writes_a_log_that_reads_back(tmp_path, capsys):
    out = tmp_path / "k.csv"
    code = main(
        [
            "simulate",
            "--scenario",
            "kettle",
            "--seed",
            "4",
            "--scale-mm",
            "0.2",
            "--duration-s",
            "300",
            "--out",
            str(out),
        ]
    )
    assert code == 0
    assert "wrote 301 rows" in capsys.readouterr().out
    log = read_csv(out)
    assert log.rejected == []
    assert log.metadata["truth_scale_mm"] == 0.2
    assert log.metadata["seed"] == 4.0
    assert max(r.values.get("water", 0.0) for r in log.rows) > 95.0


def test_simulate_is_deterministic(tmp_path):
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    for path in (a, b):
        main(["simulate", "--seed", "9", "--duration-s", "200", "--out", str(path)])
    assert a.read_bytes() == b.read_bytes()


def test_simulate_at_altitude_boils_lower(tmp_path):
    out = tmp_path / "high.csv"
    main(["simulate", "--altitude-m", "2000", "--duration-s", "400", "--out", str(out)])
    log = read_csv(out)
    # ICAO Doc 7488 / ISO 2533 standard atmosphere: 2000 m → 79.5 kPa; boiling point
    # 93.32 °C there, computed from IAPWS R7-97(2012) (IF97). We take the elevation as
    # geometric; geometric and geopotential 2000 m differ by 6 Pa there, which leaves
    # 93.32 °C either way.
    assert log.metadata["boiling_point_c"] == pytest.approx(93.32, abs=0.02)
    assert max(r.values["water"] for r in log.rows if "water" in r.values) < 93.32 + 0.5


def test_bad_input_gives_a_clear_error_and_exit_code(tmp_path, capsys):
    # refused by the option's own check now, before the simulator sees it
    with pytest.raises(SystemExit) as stop:
        main(["simulate", "--mass-kg", "-1", "--out", str(tmp_path / "x.csv")])
    assert stop.value.code == 2
    assert "--mass-kg: -1 must be above 0" in capsys.readouterr().err


def test_the_site_demo_never_writes_its_history_into_an_existing_log(tmp_path, capsys):
    out = tmp_path / "kept.sqlite"
    out.write_bytes(b"someone's log")
    assert main(["demo", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "exists" in err
    assert "--quick" in err
    assert "Traceback" not in err
    assert out.read_bytes() == b"someone's log"


def test_demo_runs_live_through_the_real_drivers_and_records(tmp_path):
    out = tmp_path / "demo.sqlite"
    proc = subprocess.run(
        [sys.executable, "-m", "monitor.cli", "demo", "--quick", "--speed", "30",
         "--duration-s", "300", "--every-s", "60", "--out", str(out)],
        capture_output=True,
        text=True,
        timeout=90,
        check=False,
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    assert "not a safety device" in proc.stdout
    assert "0 inputs quarantined" in proc.stdout
    lines = [line for line in proc.stdout.splitlines() if line.strip().split(" ")[0].isdigit()]
    assert len(lines) >= 5
    verified = subprocess.run(
        [sys.executable, "-m", "monitor.cli", "verify", str(out), "--json"],
        capture_output=True, text=True, timeout=60, check=False,
    )  # fmt: skip
    assert verified.returncode == 0, verified.stdout
    assert json.loads(verified.stdout)["ok"] is True
    assert json.loads(verified.stdout)["samples"] > 300 * 6
    replayed = subprocess.run(
        [sys.executable, "-m", "monitor.cli", "replay", str(out), "--json"],
        capture_output=True, text=True, timeout=60, check=True,
    )  # fmt: skip
    (run,) = json.loads(replayed.stdout)["runs"]
    # the demo kettle holds 1.2 kg (the simulator's default kettle, our own scenario);
    # 5 % is looser than the estimator benchmark's 3 %, the meter being polled apart
    assert run["water_mass_kg"]["value"] == pytest.approx(1.2, rel=0.05)
    recorded = subprocess.run(
        [sys.executable, "-m", "monitor.cli", "replay", str(out), "--record", "--json"],
        capture_output=True, text=True, timeout=60, check=True,
    )  # fmt: skip
    assert json.loads(recorded.stdout)["runs"][0]["water_mass_kg"] == run["water_mass_kg"]
    from monitor.records.recorder import read_runs, verify

    summaries = [r for r in read_runs(out) if r["summary"].get("source") == "replay"]
    assert [s["summary"]["water_mass_kg"] for s in summaries] == [run["water_mass_kg"]]
    assert verify(out)["ok"] is True  # appended as new blocks: the chain still holds
    exported = tmp_path / "demo.csv"
    subprocess.run(
        [sys.executable, "-m", "monitor.cli", "export", str(out), "--csv", str(exported)],
        capture_output=True, text=True, timeout=60, check=True,
    )  # fmt: skip
    log = read_csv(exported)
    assert log.rejected == []
    assert len(log.rows) == 301  # one filter step per simulated second, 0-300 s
    assert {"water", "element", "ambient", "power"} <= set(log.channels)
    assert log.metadata["vessel"] == "kettle-1"


def test_every_verb_has_help_with_an_example():
    for verb in ("simulate", "demo", "replay", "run", "verify", "export", "fleet", "report"):
        proc = subprocess.run(
            [sys.executable, "-m", "monitor.cli", verb, "--help"],
            capture_output=True,
            text=True,
            timeout=30,
            check=True,
        )
        assert "example: ebullio " + verb in proc.stdout


@pytest.mark.parametrize(
    ("argv", "needle"),
    [
        (["demo", "--speed", "0"], "--speed: 0 must be above 0"),
        (["demo", "--speed", "nan"], "is not a finite number"),
        (["demo", "--every-s", "-1"], "--every-s: -1 must be above 0"),
        (["simulate", "--mass-kg", "abc"], "'abc' is not a number"),
    ],
)
def test_numeric_options_are_checked(argv, needle, capsys) -> None:
    """Issue 14: ``demo --speed 0`` ended in a ZeroDivisionError traceback."""
    with pytest.raises(SystemExit) as stop:
        main(argv)
    assert stop.value.code == 2
    err = capsys.readouterr().err
    assert needle in err
    assert "Traceback" not in err


def test_verify_says_intact_altered_damaged_or_not_a_log(tmp_path, capsys) -> None:
    """Issue 14: a missing or non-SQLite file was reported as a broken chain with the
    exit status of tampering, and a log cut short passed."""
    import sqlite3

    from monitor.records.recorder import Recorder

    assert main(["verify", str(tmp_path / "nowhere.sqlite")]) == 2
    assert "cannot be read" in capsys.readouterr().err
    text = tmp_path / "notes.txt"
    text.write_text("not a log\n", encoding="utf-8")
    assert main(["verify", str(text)]) == 2
    assert "not an SQLite file" in capsys.readouterr().err
    path = tmp_path / "log.sqlite"
    with Recorder(path, version="0.1.0") as rec:
        for k in range(3):
            rec.add_event(1_767_225_600.0 + k, "note", "test", f"row {k}")
            rec.commit()
    assert main(["verify", str(path)]) == 0
    assert ": intact:" in capsys.readouterr().out
    conn = sqlite3.connect(path)
    conn.execute("DELETE FROM events WHERE block = (SELECT max(block) FROM blocks)")
    conn.execute("DELETE FROM blocks WHERE block = (SELECT max(block) FROM blocks)")
    conn.commit()
    conn.close()
    assert main(["verify", str(path)]) == 1
    out = capsys.readouterr().out
    assert "ALTERED" in out
    assert "were removed" in out


def test_replay_fleet_report_and_export_say_when_a_log_was_altered(tmp_path, capsys) -> None:
    """Issue 14: these exited 0 on a tampered log and said nothing."""
    from dataclasses import replace

    from drivers.simworld import SimulatedRig, kettle_scenario, scenario_metadata
    from monitor.records.recorder import Recorder

    scenario = replace(kettle_scenario(), duration_s=300.0)
    path = tmp_path / "lab.sqlite"
    with Recorder(path, version="0.1.0") as rec:
        rec.add_vessel(scenario.vessel, scenario_metadata(scenario, 3))
        for batch in SimulatedRig(scenario, seed=3).run():
            rec.add_samples(batch)
        rec.commit()
    checks = {
        "replay": ["replay", str(path), "--json"],
        "fleet": ["fleet", str(path), "--json"],
        "report": ["report", str(path), "--out", str(tmp_path / "r.html")],
        "export": ["export", str(path), "--csv", str(tmp_path / "e.csv")],
    }
    for argv in checks.values():  # intact: quiet, exit 0
        assert main(argv) == 0
    capsys.readouterr()
    change_one_reading(path, which=100)
    for verb, argv in checks.items():
        assert main(argv) == 1, verb
        captured = capsys.readouterr()
        assert "failed its integrity check (tampered)" in captured.err, verb
        if verb in ("replay", "fleet"):
            (check,) = json.loads(captured.out)["integrity"]
            assert check["state"] == "tampered"
    assert "integrity-failed" in (tmp_path / "r.html").read_text(encoding="utf-8")


def _demo(out: Path | None, duration_s: int, cwd: Path | None = None) -> str:
    command = [sys.executable, "-m", "monitor.cli", "demo", "--quick", "--speed", "30",
               "--duration-s", str(duration_s), "--every-s", "600"]  # fmt: skip
    if out is not None:
        command += ["--out", str(out)]
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[2])}
    proc = subprocess.run(command, capture_output=True, text=True, timeout=120, check=False,
                          cwd=cwd, env=env)  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    return proc.stdout


def test_demo_start_is_in_the_past_or_just_after_the_logs_last_reading() -> None:
    from monitor.rig.demo import AFTER_LAST_S, demo_start_s

    # 300 s at 30x take 10 s: the readings start 290 s before now, so they end now
    assert demo_start_s(1000.0, 300.0, 30.0, None) == (pytest.approx(710.0), False)
    assert demo_start_s(1000.0, 300.0, 30.0, 500.0) == (pytest.approx(710.0), False)
    # a log with readings up to 900 s: start just after them, held to the wall clock
    assert demo_start_s(1000.0, 300.0, 30.0, 900.0) == (900.0 + AFTER_LAST_S, True)
    assert demo_start_s(1000.0, 300.0, 30.0, 999.9) == (1000.0, True)
    start, capped = demo_start_s(1000.0, 300.0, 30.0, 1200.0)  # readings from the future
    assert capped
    assert start > 1000.0


def test_a_second_demo_into_one_log_is_a_new_run_after_the_first(tmp_path) -> None:
    """Issue 15: readings never stamped ahead of the wall clock; a second demo into the
    same log starts after the first's readings, as run 2, live and in a replay."""
    from monitor.records.recorder import read_runs, read_samples_by_session

    out = tmp_path / "twice.sqlite"
    _demo(out, 60)
    first_done = time.time()
    said = _demo(out, 8)  # follows readings that end about now: held to real time
    second_done = time.time()
    assert "no faster than real time" in said
    sessions: dict[int, list[float]] = {}
    for session, sample in read_samples_by_session(out):
        sessions.setdefault(session, []).append(sample.t)
    (a, b) = sessions.values()
    assert max(a) <= first_done
    assert max(b) <= second_done
    assert min(b) > max(a)
    assert min(a) < first_done - 50.0  # 60 s of readings that end when the demo did
    assert [r["run"] for r in read_runs(out) if r["summary"]["source"] == "live"] == ["1", "2"]
    replayed = subprocess.run(
        [sys.executable, "-m", "monitor.cli", "replay", str(out), "--json"],
        capture_output=True, text=True, timeout=60, check=True,
    )  # fmt: skip
    assert [r["run"] for r in json.loads(replayed.stdout)["runs"]] == ["1", "2"]


def test_the_default_demo_log_moves_aside_rather_than_slowing_down(tmp_path) -> None:
    _demo(None, 30, cwd=tmp_path)
    said = _demo(None, 30, cwd=tmp_path)
    assert "records to out/demo-2.sqlite" in said
    assert (tmp_path / "out" / "demo.sqlite").exists()
    assert (tmp_path / "out" / "demo-2.sqlite").exists()
