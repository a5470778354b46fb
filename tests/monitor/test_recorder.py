"""Tests of the recorder: real SQLite files, the hash chain, crashes, tampering, reading back."""

from __future__ import annotations

import hashlib
import json
import math
import os
import selectors
import signal
import sqlite3
import struct
import subprocess
import sys
import tempfile
import time
from itertools import count
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from drivers.channels import Quarantined
from drivers.errors import EbullioError, LogFormatError
from drivers.sample import Quality, Sample
from monitor.estimation.contracts import Estimate, Estimated, Flag, Level, Phase, TargetForecast
from monitor.records.recorder import (
    GENESIS_HASH,
    HASH_LABEL,
    HASHED_TABLES,
    LAYOUTS,
    SCHEMA_VERSION,
    LogReader,
    Recorder,
    block_hash,
    is_recorder_log,
    read_estimates,
    read_events,
    read_flags,
    read_quarantine,
    read_runs,
    read_samples,
    read_vessels,
    schema_version,
    sessions,
    verify,
)
from monitor.records.schema import ESTIMATE_COLUMNS, flag_record, flatten_estimate

ROOT = Path(__file__).resolve().parents[2]
T0 = 1_780_000_000.0  # an arbitrary Unix time (2026), common practice, no source


def fake_clock(start: float = T0):
    """Return a clock that moves 0.25 s a call, so commit times are known and distinct."""
    ticks = count()
    return lambda: start + 0.25 * next(ticks)


def kettle_samples(n: int, start: float = T0, vessel: str = "kettle-1") -> list[Sample]:
    return [Sample(start + i, vessel, "water", 15.0 + 0.125 * i, source="sim://?seed=1")
            for i in range(n)]  # fmt: skip


def connect(path: Path) -> sqlite3.Connection:
    return sqlite3.connect(path, isolation_level=None)


def same_sample(a: Sample, b: Sample) -> bool:
    value_same = (math.isnan(a.value) and math.isnan(b.value)) or a.value == b.value
    return value_same and (a.t, a.vessel, a.channel, a.quality, a.source) == (
        b.t, b.vessel, b.channel, b.quality, b.source)  # fmt: skip


def sample_estimate() -> Estimate:
    return Estimate(
        t_s=T0 + 30.0, vessel="kettle-1", phase=Phase.HEATING, water_c=41.5, water_std_c=0.2,
        element_c=None, ambient_c=21.0, power_w=2000.0,
        ua_w_per_k=Estimated(1.5, 0.25), heat_capacity_j_per_k=Estimated(6800.0, 120.0),
        water_mass_kg=Estimated(1.5, 0.03), element_conductance_w_per_k=None,
        boiling_point_c=99.97, target=TargetForecast(100.0, 180.5, 170.0, math.inf),
        boil_off_to_dry_s=None, evaporation_kg_per_s=0.0, standing_loss_w=None, nis=0.75,
        flags=(Flag("wrong_fill", Level.NOTICE, "Less water than usual.", {"mass_kg": 1.5}),),
    )  # fmt: skip


def three_blocks(path: Path, schema_version: int = SCHEMA_VERSION) -> Path:
    """A log of three blocks: the session (1), samples 0-9 (2), samples 10-19 and more (3)."""
    with Recorder(path, version="0.1.0", config_text="[vessel]\n", clock=fake_clock(),
                  schema_version=schema_version) as rec:  # fmt: skip
        rec.add_vessel("kettle-1", {"vessel_heat_capacity_j_per_k": 450.0, "target_c": 100.0})
        rec.add_samples(kettle_samples(10))
        assert rec.commit() == 2
        rec.add_samples(kettle_samples(10, start=T0 + 10))
        rec.add_quarantined([Quarantined(T0 + 11, "serial:///dev/ttyUSB0", "line 12",
                                         "3 cells where 4 expected", b"12.5,\xff\n")])  # fmt: skip
        rec.add_estimates([flatten_estimate(sample_estimate(), vessel="kettle-1", run="1",
                                            t=T0 + 30.0)])  # fmt: skip
        rec.add_flags([flag_record(T0 + 30, "kettle-1", sample_estimate().flags[0])])
        rec.add_event(T0 + 12, "gap", "sim://?seed=1", {"missing_s": 2.0})
        rec.add_run("kettle-1", "1", T0, T0 + 19, {"heat_up_s": 12.5})
        assert rec.commit() == 3
    return path


@pytest.fixture
def log(tmp_path: Path) -> Path:
    """:func:`three_blocks` in the layout of new logs."""
    return three_blocks(tmp_path / "log.sqlite")


@pytest.fixture
def log_v1(tmp_path: Path) -> Path:
    """:func:`three_blocks` in schema version 1 (one ``samples`` row per reading)."""
    return three_blocks(tmp_path / "log.sqlite", schema_version=1)


# ---------------------------------------------------------------------------------------
# Round trips


def test_every_table_round_trips(log: Path):
    samples = list(read_samples(log))
    assert samples == kettle_samples(10) + kettle_samples(10, start=T0 + 10)
    assert read_vessels(log) == {
        "kettle-1": {"vessel_heat_capacity_j_per_k": 450.0, "target_c": 100.0}
    }
    (q,) = read_quarantine(log)
    assert (q["t"], q["source"], q["location"], q["reason"], q["raw"], q["block"]) == (
        T0 + 11, "serial:///dev/ttyUSB0", "line 12", "3 cells where 4 expected",
        b"12.5,\xff\n", 3)  # fmt: skip
    (e,) = list(read_estimates(log))
    assert (e["t"], e["vessel"], e["phase"]) == (T0 + 30.0, "kettle-1", "heating")
    assert (e["water_c"], e["water_mass_kg"], e["water_mass_std"]) == (41.5, 1.5, 0.03)
    assert (e["heat_capacity_j_per_k"], e["ua_w_per_k"], e["ua_std"]) == (6800.0, 1.5, 0.25)
    assert (e["element_conductance_w_per_k"], e["element_conductance_std"]) == (None, None)
    assert (e["target_c"], e["time_to_target_s"], e["time_to_target_lo_s"]) == (100.0, 180.5, 170.0)
    assert e["time_to_target_hi_s"] is None  # infinite "never" bound is stored as NULL
    assert e["nis"] == 0.75
    assert (e["ambient_c"], e["element_c"], e["run"]) == (21.0, None, "1")
    assert e["flags"][0]["name"] == "wrong_fill"
    assert list(read_estimates(log, vessel="urn-2")) == []
    assert [r["id"] for r in read_estimates(log, vessel="kettle-1")] == [1]
    (f,) = read_flags(log)
    assert (f["t"], f["vessel"], f["name"], f["level"], f["message"], f["evidence"]) == (
        T0 + 30,
        "kettle-1",
        "wrong_fill",
        "notice",
        "Less water than usual.",
        {"mass_kg": 1.5},
    )
    (ev,) = read_events(log)
    assert (ev["t"], ev["kind"], ev["source"], ev["detail"]) == (
        T0 + 12, "gap", "sim://?seed=1", {"missing_s": 2.0})  # fmt: skip
    (run,) = read_runs(log)
    assert (run["vessel"], run["run"], run["start_t"], run["end_t"], run["summary"]) == (
        "kettle-1", "1", T0, T0 + 19, {"heat_up_s": 12.5})  # fmt: skip
    (s,) = sessions(log)
    assert (s["started_t"], s["version"], s["config_text"], s["block"]) == (
        T0, "0.1.0", "[vessel]\n", 1)  # fmt: skip
    assert is_recorder_log(log)


def test_the_estimates_table_keeps_the_layout_of_schema_version_1():
    # the columns every log of schema version 1 has (monitor/records/recorder.py as of d67569f):
    # the one mapping must not move them, or older logs would no longer read or verify
    assert LAYOUTS[1].table_columns["estimates"] == LAYOUTS[2].table_columns["estimates"] == (
        "id", "block", "t", "vessel", "phase", "water_c", "water_mass_kg", "water_mass_std",
        "heat_capacity_j_per_k", "heat_capacity_std", "ua_w_per_k", "ua_std",
        "element_conductance_w_per_k", "element_conductance_std", "target_c",
        "time_to_target_s", "time_to_target_lo_s", "time_to_target_hi_s", "nis", "detail",
    )  # fmt: skip
    assert LAYOUTS[1].table_columns["estimates"][5:-1] == ESTIMATE_COLUMNS


def test_nan_fault_infinite_and_negative_zero_samples_survive(tmp_path: Path):
    path = tmp_path / "odd.sqlite"
    odd = [
        Sample(T0, "k", "water_emf", math.nan, Quality.FAULT, "serial://a"),
        Sample(T0 + 1, "k", "water", math.nan, Quality.SUSPECT, "serial://a"),
        Sample(T0 + 2, "k", "power", math.inf, Quality.SUSPECT, "modbus+tcp://b"),
        Sample(T0 + 3, "k", "power", -math.inf, Quality.SUSPECT, "modbus+tcp://b"),
        Sample(T0 + 4, "k", "ambient", -0.0),
        Sample(T0 + 5, "k", "ambient", 5e-324),  # the smallest subnormal double
        Sample(T0 + 6, "k", "energy", 1e300),
        Sample(T0 + 7, "k", "water", 3.0),  # SQLite stores an integral REAL as an integer
    ]
    with Recorder(path, version="t") as rec:
        rec.add_samples(odd)
    back = list(read_samples(path))
    assert len(back) == len(odd)
    assert all(same_sample(a, b) for a, b in zip(odd, back, strict=True))
    assert back[0].quality == Quality.FAULT
    assert math.isnan(back[0].value)
    assert math.copysign(1.0, back[4].value) == 1.0  # -0.0 is recorded as 0.0 (documented)
    assert type(back[7].value) is float
    assert verify(path)["ok"]


def test_read_samples_filters_by_vessel_in_recorded_order(tmp_path: Path):
    path = tmp_path / "two.sqlite"
    a, b = kettle_samples(5, vessel="a"), kettle_samples(5, vessel="b")
    mixed = [s for pair in zip(a, b, strict=True) for s in pair]
    with Recorder(path, version="t") as rec:
        rec.add_samples(mixed[:4])
        rec.commit()
        rec.add_samples(mixed[4:])
    assert list(read_samples(path)) == mixed
    assert list(read_samples(path, vessel="b")) == b
    assert list(read_samples(path, vessel="c")) == []


def test_later_vessel_metadata_replaces_earlier(tmp_path: Path):
    path = tmp_path / "v.sqlite"
    with Recorder(path, version="t") as rec:
        rec.add_vessel("urn", {"nominal_volume_l": 20.0})
        rec.add_vessel("kettle", {"target_c": 100.0})
        rec.commit()
        rec.add_vessel("urn", {"nominal_volume_l": 25.0, "pressure_kpa": 95.5})
    assert read_vessels(path) == {
        "urn": {"nominal_volume_l": 25.0, "pressure_kpa": 95.5},
        "kettle": {"target_c": 100.0},
    }


def _estimates_log(path: Path) -> Path:
    """A log of ten estimates of kettle-1 at T0..T0+9 (water 20..29 °C) with samples on
    two channels, one of them at T0 + 20, and one open and two ended runs."""
    e = sample_estimate()
    with Recorder(path, version="t", clock=fake_clock()) as rec:
        rec.add_samples(kettle_samples(10))
        fault = Sample(T0 + 3, "kettle-1", "power", math.nan, Quality.FAULT, "m")
        rec.add_samples([Sample(T0 + 20, "kettle-1", "power", 2000.0, source="m"), fault])
        for i in range(10):
            flat = flatten_estimate(e, vessel="kettle-1", run="1", t=T0 + i)
            rec.add_estimates([{**flat, "water_c": 20.0 + i}])
        rec.add_run("kettle-1", "1", T0, T0 + 9, {"steps": 10})
        rec.add_run("kettle-1", "2", T0 + 10, None, {})
        rec.add_run("kettle-1", "2", T0 + 10, T0 + 19, {"steps": 9})
    return path


def test_the_log_reader_answers_the_boards_questions(tmp_path: Path):
    path = _estimates_log(tmp_path / "est.sqlite")
    with LogReader(path) as log:
        assert log.vessels() == ["kettle-1"]  # no vessels rows: found from the samples
        assert log.last_sample_t() == T0 + 3  # the last recorded, not the newest
        assert log.newest_sample_t("kettle-1", ["water", "power"]) == T0 + 20
        assert log.newest_sample_t("kettle-1", ["ambient"]) is None
        t, y = log.readings("kettle-1", "power", T0)
        assert (t, y) == ([T0 + 3, T0 + 20], [None, 2000.0])  # a fault reads as None
        assert log.readings("kettle-1", "water", T0 + 8, newer_only=True) == (
            [T0 + 9], [15.0 + 0.125 * 9])  # fmt: skip
        every = log.estimates("kettle-1", T0)
        assert every["t"] == [T0 + i for i in range(10)]
        assert list(every) == ["t", "vessel", "phase", *ESTIMATE_COLUMNS]  # no detail
        assert every["vessel"] == ["kettle-1"] * 10
        # thinned to every 4th (ceil(10 / 3)) by id, and the newest kept
        assert log.estimates("kettle-1", T0, max_rows=3)["water_c"] == [20.0, 24.0, 28.0, 29.0]
        assert log.estimates("kettle-1", T0 + 7, newer_only=True)["t"] == [T0 + 8, T0 + 9]
        none = log.estimates("kettle-1", T0 + 9, newer_only=True)
        assert none == {k: [] for k in every}
        assert log.estimates("kettle-1", T0 + 8, keys=["nis"]) == {
            "t": [T0 + 8, T0 + 9],
            "nis": [0.75, 0.75],
        }
        with pytest.raises(ValueError, match="no stored columns \\['flags'\\]"):
            log.estimates("kettle-1", T0, keys=["flags"])  # in detail, not a column
        latest = log.latest_estimate("kettle-1")
        assert (latest["t"], latest["water_c"], latest["run"]) == (T0 + 9, 29.0, "1")
        assert latest["flags"][0]["name"] == "wrong_fill"  # the detail is read for this one
        assert log.latest_estimate("urn-2") is None
        assert [r["run"] for r in log.runs()] == ["1", "2", "2"]
        assert log.ended_runs() == [
            {"vessel": "kettle-1", "run": "1", "start_t": T0, "end_t": T0 + 9, "steps": 10},
            {"vessel": "kettle-1", "run": "2", "start_t": T0 + 10, "end_t": T0 + 19, "steps": 9},
        ]
        assert read_runs(path) == log.runs()


def test_the_log_reader_refuses_a_file_that_is_not_a_log(tmp_path: Path):
    other = tmp_path / "other.csv"
    other.write_text("time_s,water_c\n0,20\n", encoding="utf-8")
    with pytest.raises(LogFormatError, match="not an SQLite file"):
        LogReader(other)


# ---------------------------------------------------------------------------------------
# Committing


def test_nothing_is_written_before_commit(tmp_path: Path):
    path = tmp_path / "c.sqlite"
    with Recorder(path, version="t", clock=fake_clock()) as rec:
        assert rec.pending() == 0  # the session row went in as block 1 at once
        assert rec.last_block == 1
        assert rec.add_samples(kettle_samples(7)) == 7
        rec.add_event(T0, "reconnect", "mqtt://127.0.0.1:1883/x")
        assert rec.pending() == 8
        assert list(read_samples(path)) == []
        assert read_events(path) == []
        assert rec.commit() == 2
        assert rec.pending() == 0
        assert rec.commit() is None
        assert len(list(read_samples(path))) == 7
        live = verify(path)  # a reader beside the open writer sees the committed blocks
        assert (live["ok"], live["blocks"], live["samples"]) == (True, 2, 7)
        rec.add_samples(kettle_samples(3, start=T0 + 7))
    # close() committed the last three
    assert len(list(read_samples(path))) == 10
    result = verify(path)
    assert (result["ok"], result["blocks"], result["samples"]) == (True, 3, 10)


def test_a_failed_commit_writes_nothing_and_keeps_the_rows_pending(tmp_path: Path):
    path = tmp_path / "atomic.sqlite"
    with Recorder(path, version="t", clock=fake_clock()) as rec:
        rec.add_samples(kettle_samples(50))
        rec.add_quarantined([Quarantined(T0, "s", "line 1", "bad", b"x")])
        other = connect(path)
        # the block row is the last write of the transaction: refuse it
        other.execute("CREATE TRIGGER refuse BEFORE INSERT ON blocks "
                      "BEGIN SELECT RAISE(ABORT, 'refused by the test'); END")  # fmt: skip
        with pytest.raises(EbullioError, match="refused by the test"):
            rec.commit()
        assert other.execute("SELECT count(*) FROM sample_packs").fetchone() == (0,)
        assert other.execute("SELECT count(*) FROM quarantine").fetchone() == (0,)
        assert other.execute("SELECT count(*) FROM blocks").fetchone() == (1,)
        assert rec.pending() == 51
        other.execute("DROP TRIGGER refuse")
        other.close()
        assert rec.commit() == 2
    assert list(read_samples(path)) == kettle_samples(50)
    assert verify(path)["ok"]


def test_bad_rows_are_refused_whole_batch_with_a_clear_error(tmp_path: Path):
    with Recorder(tmp_path / "bad.sqlite", version="t") as rec:
        batch = [*kettle_samples(3), Sample(math.inf, "k", "water", 1.0)]
        with pytest.raises(ValueError, match="finite Unix time"):
            rec.add_samples(batch)
        assert rec.pending() == 0
        with pytest.raises(ValueError, match="unknown keys"):
            rec.add_estimates([{"t": T0, "vessel": "k", "phase": "idle", "wattage": 3.0}])
        with pytest.raises(ValueError, match="phase"):
            rec.add_estimates([{"t": T0, "vessel": "k", "phase": "simmering"}])
        with pytest.raises(ValueError, match="level"):
            rec.add_flags([{"t": T0, "vessel": "k", "name": "n", "level": "panic",
                            "message": "m"}])  # fmt: skip
        with pytest.raises(ValueError, match="not usable"):
            rec.add_vessel("k", {"target_c": math.nan})
        with pytest.raises(ValueError, match="JSON"):
            rec.add_event(T0, "gap", "s", {"when": object()})
        assert rec.pending() == 0


def test_non_finite_json_numbers_become_null_and_str_raw_is_kept(tmp_path: Path):
    path = tmp_path / "j.sqlite"
    with Recorder(path, version="t") as rec:
        rec.add_flags([{"t": T0, "vessel": "k", "name": "n", "level": Level.ALARM,
                        "message": "m", "evidence": {"nis": math.inf, "k": 2}}])  # fmt: skip
        rec.add_quarantined([Quarantined(T0, "mqtt", "topic a/b", "not JSON", "{\udcff")])
    assert read_flags(path)[0]["evidence"] == {"nis": None, "k": 2}
    assert read_flags(path)[0]["level"] == "alarm"
    # a str raw (lone surrogates from a surrogateescape decode) goes back to its bytes
    assert read_quarantine(path)[0]["raw"] == b"{\xff"


def test_a_reopened_log_appends_blocks_that_chain_to_the_old_ones(tmp_path: Path):
    path = tmp_path / "re.sqlite"
    with Recorder(path, version="0.1.0", config_text="first") as rec:
        rec.add_samples(kettle_samples(5))
    with Recorder(path, version="0.2.0", config_text="second") as rec:
        assert rec.session_block == 3
        rec.add_samples(kettle_samples(5, start=T0 + 5))
        assert rec.commit() == 4
    assert [(s["version"], s["config_text"], s["block"]) for s in sessions(path)] == [
        ("0.1.0", "first", 1), ("0.2.0", "second", 3)]  # fmt: skip
    assert list(read_samples(path)) == kettle_samples(5) + kettle_samples(5, start=T0 + 5)
    db = connect(path)
    chain = db.execute("SELECT block, prev_hash, hash FROM blocks ORDER BY block").fetchall()
    db.close()
    assert [b for b, _, _ in chain] == [1, 2, 3, 4]
    assert chain[0][1] == GENESIS_HASH
    assert all(chain[i][1] == chain[i - 1][2] for i in range(1, 4))
    packs = connect(path).execute("SELECT id, block, n FROM sample_packs ORDER BY id").fetchall()
    assert packs == [(1, 2, 5), (2, 4, 5)]  # one pack per vessel and block
    result = verify(path)
    assert result["ok"]
    assert result["head_hash"] == chain[-1][2]


# ---------------------------------------------------------------------------------------
# The hash


def test_block_hash_follows_the_documented_encoding():
    # bytes spelled out by hand from the module docstring, not by the module's encoder
    row = (1, 2, 1.5, "k", None, b"\x00\xff")
    expected = hashlib.sha256(
        HASH_LABEL
        + struct.pack(">qdq", 2, 10.25, 1)
        + bytes(32)
        + b"".join(
            b"x" + struct.pack(">I", len(name)) + name.encode()
            + struct.pack(">q", 1 if name == "events" else 0)
            + (b"i" + struct.pack(">q", 1) + b"i" + struct.pack(">q", 2)
               + b"f" + struct.pack(">d", 1.5) + b"x\x00\x00\x00\x01k" + b"n"
               + b"x\x00\x00\x00\x02\x00\xff" if name == "events" else b"")
            for name in HASHED_TABLES
        )
    ).hexdigest()  # fmt: skip
    assert block_hash(2, 10.25, 1, GENESIS_HASH, {"events": [row]}) == expected
    # every part of the block is in the hash
    others = {
        block_hash(3, 10.25, 1, GENESIS_HASH, {"events": [row]}),
        block_hash(2, 10.5, 1, GENESIS_HASH, {"events": [row]}),
        block_hash(2, 10.25, 2, GENESIS_HASH, {"events": [row]}),
        block_hash(2, 10.25, 1, "1" + GENESIS_HASH[1:], {"events": [row]}),
        block_hash(2, 10.25, 1, GENESIS_HASH, {"flags": [row]}),
        block_hash(
            2,
            10.25,
            1,
            GENESIS_HASH,
            {"events": [(1, 2, 1.5000000000000002, "k", None, b"\x00\xff")]},
        ),
        block_hash(2, 10.25, 1, GENESIS_HASH, {"events": [row, row]}),
    }
    assert expected not in others
    assert len(others) == 7


# ---------------------------------------------------------------------------------------
# Verify: tampering


def sql(path: Path, statement: str, params: tuple = ()) -> None:
    db = connect(path)
    db.execute(statement, params)
    db.close()


def test_verify_passes_a_good_log(log: Path):
    result = verify(log)
    assert result == {
        "ok": True, "state": "intact", "samples": 20, "quarantined": 1, "blocks": 3,
        "first_bad_block": None, "reason": None, "problems": [],
        "head_hash": result["head_hash"], "head_checked": "log.sqlite.head",
    }  # fmt: skip
    assert len(result["head_hash"]) == 64


#: Edits of the tables every schema version has, and the first block each alters.
COMMON_EDITS = [
        ("UPDATE quarantine SET raw = X'00' WHERE id = 1", 3),
        ("UPDATE estimates SET nis = 0.5 WHERE id = 1", 3),
        ("UPDATE flags SET message = 'All is well.' WHERE id = 1", 3),
        ("UPDATE events SET kind = 'reconnect' WHERE id = 1", 3),
        ("UPDATE vessels SET metadata = '{}' WHERE id = 1", 2),
        ("UPDATE runs SET end_t = NULL WHERE id = 1", 3),
        ("UPDATE sessions SET version = '9.9' WHERE id = 1", 1),
        ("UPDATE blocks SET committed_t = committed_t + 1 WHERE block = 2", 2),
        ("UPDATE blocks SET rows = 3 WHERE block = 3", 3),
        ("DELETE FROM quarantine", 3),
        ("UPDATE blocks SET prev_hash = hash WHERE block = 2", 2),
        ("DELETE FROM blocks WHERE block = 2", 2),
        ("DELETE FROM blocks WHERE block = 3", 3),
        ("UPDATE blocks SET block = block + 10 WHERE block = 2", 2),
]  # fmt: skip
#: Edits of schema 1's ``samples`` (schema 2's packs: tests/monitor/test_compact_store.py).
SAMPLE_EDITS_V1 = [
        ("UPDATE samples SET value = value + 1e-9 WHERE id = 15", 3),
        ("UPDATE samples SET t = t + 1 WHERE id = 3", 2),
        ("UPDATE samples SET quality = 'suspect' WHERE id = 1", 2),
        ("UPDATE samples SET source = 'other' WHERE id = 20", 3),
        ("UPDATE samples SET value = NULL WHERE id = 4", 2),
        ("DELETE FROM samples WHERE id = 12", 3),
        ("INSERT INTO samples VALUES (21, 3, 1, 'k', 'water', 1.0, 'ok', '')", 3),
        ("UPDATE samples SET block = 3 WHERE id = 10", 2),
]  # fmt: skip


def assert_edit_caught(log: Path, statement: str, block: int) -> None:
    assert verify(log)["ok"]
    sql(log, statement)
    result = verify(log)
    assert result["ok"] is False
    assert result["first_bad_block"] == block
    assert str(block) in result["reason"]


@pytest.mark.parametrize(("statement", "block"), COMMON_EDITS)
def test_verify_names_the_first_altered_block(log: Path, statement: str, block: int):
    assert_edit_caught(log, statement, block)


@pytest.mark.parametrize(("statement", "block"), COMMON_EDITS + SAMPLE_EDITS_V1)
def test_verify_names_the_first_altered_block_of_a_schema_1_log(
    log_v1: Path, statement: str, block: int
):
    assert schema_version(log_v1) == 1
    assert_edit_caught(log_v1, statement, block)


def test_a_row_added_later_to_an_old_block_is_caught(log_v1: Path):
    # id after every row of block 3, but claiming block 2: out of id order
    log = log_v1
    sql(log, "INSERT INTO samples VALUES (21, 2, 1, 'k', 'water', 1.0, 'ok', '')")
    result = verify(log)
    assert (result["ok"], result["first_bad_block"]) == (False, 2)
    assert "out of order" in result["reason"]


def test_rows_of_a_block_that_does_not_exist_are_caught(log: Path):
    sql(log, "INSERT INTO events VALUES (2, 7, 1.0, 'gap', 's', '\"\"')")
    result = verify(log)
    assert (result["ok"], result["first_bad_block"]) == (False, 7)
    assert "not there" in result["reason"]


def test_swapped_blocks_are_caught(log: Path):
    db = connect(log)
    db.execute("BEGIN")
    db.execute("UPDATE blocks SET block = -2 WHERE block = 2")
    db.execute("UPDATE blocks SET block = 2 WHERE block = 3")
    db.execute("UPDATE blocks SET block = 3 WHERE block = -2")
    db.execute("COMMIT")
    db.close()
    result = verify(log)
    assert (result["ok"], result["first_bad_block"]) == (False, 2)


@pytest.mark.parametrize("version", [1, 2])
def test_a_rewritten_block_with_a_fresh_hash_breaks_the_next_link(tmp_path: Path, version: int):
    log = three_blocks(tmp_path / "log.sqlite", schema_version=version)
    layout = LAYOUTS[version]
    db = connect(log)
    if version == 1:
        db.execute("UPDATE samples SET value = 99.0 WHERE id = 5")
    else:
        db.execute("UPDATE sample_packs SET t_last = 0.5 WHERE block = 2")
    committed_t, rows, prev = db.execute(
        "SELECT committed_t, rows, prev_hash FROM blocks WHERE block = 2"
    ).fetchone()
    tables = {name: db.execute(f"SELECT {', '.join(layout.table_columns[name])} FROM {name} "
                               "WHERE block = 2 ORDER BY id").fetchall()
              for name in layout.hashed_tables}  # fmt: skip
    forged = block_hash(2, committed_t, rows, prev, tables, layout)
    db.execute("UPDATE blocks SET hash = ? WHERE block = 2", (forged,))
    db.close()
    result = verify(log)
    assert (result["ok"], result["first_bad_block"]) == (False, 3)
    assert "chain" in result["reason"]


#: How each schema stores the marker below: schema 1 as SQLite's big-endian REAL, schema 2
#: in a pack of seven-decimal values as the little-endian i32 987654321.
MARKER = 98.7654321
MARKER_BYTES = {1: struct.pack(">d", MARKER), 2: struct.pack("<i", 987654321)}


def checkpointed_log(tmp_path: Path, marker: float, version: int) -> Path:
    path = tmp_path / "flip.sqlite"
    with Recorder(path, version="t", clock=fake_clock(), schema_version=version) as rec:
        rec.add_samples(kettle_samples(40))
        rec.commit()
        rec.add_samples([*kettle_samples(3, start=T0 + 40), Sample(T0 + 43, "k", "water", marker)])
        rec.commit()  # block 3 holds the marker
        rec.add_samples(kettle_samples(5, start=T0 + 50))
    db = connect(path)
    db.execute("PRAGMA wal_checkpoint(TRUNCATE)")  # every row now in the main file
    db.close()
    return path


@pytest.mark.parametrize("version", [1, 2])
def test_one_flipped_byte_in_the_file_is_caught(tmp_path: Path, version: int):
    marker = MARKER  # a value with a fraction, so schema 1 stores its 8 IEEE bytes
    path = checkpointed_log(tmp_path, marker, version)
    data = bytearray(path.read_bytes())
    where = data.find(MARKER_BYTES[version])
    assert where > 0
    assert data.count(MARKER_BYTES[version]) == 1
    # the lowest bit of the number: SQLite cannot notice
    data[where + (7 if version == 1 else 0)] ^= 0x01
    path.write_bytes(bytes(data))
    (changed,) = [s for s in read_samples(path) if s.t == T0 + 43]
    assert changed.value != marker
    assert abs(changed.value - marker) < (1e-12 if version == 1 else 2e-7)
    result = verify(path)
    assert (result["ok"], result["first_bad_block"]) == (False, 3)
    assert result["samples"] == 49


@pytest.mark.parametrize("version", [1, 2])
def test_a_flipped_page_header_gives_a_reason_not_an_exception(tmp_path: Path, version: int):
    path = checkpointed_log(tmp_path, MARKER, version)
    data = bytearray(path.read_bytes())
    page_size = struct.unpack(">H", data[16:18])[0]
    page_start = data.find(MARKER_BYTES[version]) // page_size * page_size
    assert data[page_start] == 0x0D  # a table b-tree leaf (SQLite file format, from memory)
    data[page_start] = 0x00  # no valid page type
    path.write_bytes(bytes(data))
    result = verify(path)
    assert result["ok"] is False
    assert result["state"] == "damaged"  # told apart from an edit of rows
    assert "SQLite finds the file damaged" in result["reason"]
    with pytest.raises(LogFormatError, match="SQLite cannot read"):
        list(read_samples(path))


@pytest.mark.parametrize(
    ("content", "why"),
    [
        (b"time_s,water_c\n0,20.5\n", "not an SQLite file"),
        (b"", "not an SQLite file"),
        (b"SQLite format 3\x00" + bytes(50), "SQLite"),
    ],
)
def test_files_that_are_not_logs_give_ok_false(tmp_path: Path, content: bytes, why: str):
    path = tmp_path / "not-a-log.sqlite"
    path.write_bytes(content)
    result = verify(path)
    assert result["ok"] is False
    assert why in result["reason"]
    assert result["first_bad_block"] is None
    assert not is_recorder_log(path)
    with pytest.raises(LogFormatError):
        read_samples(path)


def test_a_missing_file_and_a_foreign_sqlite_file(tmp_path: Path):
    missing = tmp_path / "nowhere.sqlite"
    assert verify(missing)["ok"] is False
    assert "cannot be read" in verify(missing)["reason"]
    assert not is_recorder_log(missing)
    assert not missing.exists()  # verify and the readers never create a file
    foreign = tmp_path / "foreign.sqlite"
    sql(foreign, "CREATE TABLE readings (t REAL, v REAL)")
    assert "not a recorder log" in verify(foreign)["reason"]
    before = foreign.read_bytes()
    with pytest.raises(LogFormatError, match="not a recorder log"):
        Recorder(foreign, version="t")
    text = tmp_path / "notes.txt"
    text.write_text("hello\n")
    with pytest.raises(LogFormatError, match="not an SQLite file"):
        Recorder(text, version="t")
    assert foreign.read_bytes() == before
    assert text.read_text() == "hello\n"


# ---------------------------------------------------------------------------------------
# A killed writer


WRITER = """
import sys
from drivers.sample import Sample
from monitor.records.recorder import Recorder
path, per = sys.argv[1], int(sys.argv[2])
total = 0
with Recorder(path, version="kill-test") as rec:
    for n in range(20000):
        rec.add_samples(Sample(1.78e9 + total + i, "k", "water", 20.0 + 0.001 * i, source="w")
                        for i in range(per))
        rec.commit()
        total += per
        print(total, flush=True)
"""


def read_totals_until(proc: subprocess.Popen, wanted: int, timeout_s: float) -> list[int]:
    """Return the totals the writer printed, reading until ``wanted`` of them or timeout."""
    totals: list[int] = []
    buffer = b""
    deadline = time.monotonic() + timeout_s
    with selectors.DefaultSelector() as sel:
        sel.register(proc.stdout, selectors.EVENT_READ)
        while len(totals) < wanted:
            remaining = deadline - time.monotonic()
            if remaining <= 0 or not sel.select(remaining):
                break
            chunk = os.read(proc.stdout.fileno(), 65536)
            if not chunk:
                break
            buffer += chunk
            *lines, buffer = buffer.split(b"\n")
            totals += [int(line) for line in lines if line]
    return totals


def test_kill_9_of_a_writer_loses_nothing_committed(tmp_path: Path):
    path = tmp_path / "killed.sqlite"
    per = 500
    proc = subprocess.Popen(
        [sys.executable, "-c", WRITER, str(path), str(per)],
        cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
    )  # fmt: skip
    try:
        totals = read_totals_until(proc, wanted=40, timeout_s=60.0)
        # more output may be in the pipe: the writer keeps committing until it dies
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
        totals += read_totals_until(proc, wanted=10**9, timeout_s=5.0)
        stderr = proc.stderr.read().decode()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(timeout=30)
        proc.stdout.close()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL, stderr
    assert len(totals) >= 40, stderr
    assert totals == [per * (i + 1) for i in range(len(totals))]
    recorded = list(read_samples(path))
    assert len(recorded) >= totals[-1]
    assert len(recorded) % per == 0  # whole blocks only
    assert [s.t for s in recorded] == [1.78e9 + i for i in range(len(recorded))]
    result = verify(path)
    assert result["ok"], result
    assert result["samples"] == len(recorded)
    # the next session carries on the chain
    with Recorder(path, version="after-kill") as rec:
        rec.add_samples(kettle_samples(3))
    result = verify(path)
    assert result["ok"]
    assert result["samples"] == len(recorded) + 3
    assert [s["version"] for s in sessions(path)] == ["kill-test", "after-kill"]


# ---------------------------------------------------------------------------------------
# Property: random batches


text = st.text(max_size=12)  # includes NUL and non-ASCII; never lone surrogates
samples_strategy = st.builds(
    Sample,
    t=st.floats(allow_nan=False, allow_infinity=False),
    vessel=text,
    channel=text,
    value=st.floats(allow_nan=True, allow_infinity=True),
    quality=st.sampled_from([Quality.OK, Quality.SUSPECT]),
    source=text,
)
fault_strategy = st.builds(Sample, t=st.floats(-1e12, 1e12), vessel=text, channel=text,
                           value=st.just(math.nan), quality=st.just(Quality.FAULT),
                           source=text)  # fmt: skip


@settings(max_examples=40, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])  # fmt: skip
@given(st.lists(st.lists(st.one_of(samples_strategy, fault_strategy), max_size=30), max_size=5))
def test_random_batches_round_trip_exactly(batches: list[list[Sample]]):
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "h.sqlite"
        with Recorder(path, version="h") as rec:
            for batch in batches:
                rec.add_samples(batch)
                rec.commit()
        sent = [s for batch in batches for s in batch]
        back = list(read_samples(path))
        assert len(back) == len(sent)
        for a, b in zip(sent, back, strict=True):
            if a.value == 0.0:  # -0.0 is written as 0.0 (module docstring)
                assert b.value == 0.0
                assert math.copysign(1.0, b.value) == 1.0
                a = Sample(a.t, a.vessel, a.channel, 0.0, a.quality, a.source)
            assert same_sample(a, b)
        result = verify(path)
        assert result["ok"], result
        assert result["samples"] == len(sent)
        assert result["blocks"] == 1 + sum(1 for batch in batches if batch)


def test_two_writers_on_one_file_interleave_whole_chained_blocks(tmp_path: Path):
    path = tmp_path / "two-writers.sqlite"
    with Recorder(path, version="a") as a, Recorder(path, version="b") as b:
        for i in range(5):
            a.add_samples(kettle_samples(3, start=T0 + 10 * i, vessel="a"))
            b.add_samples(kettle_samples(2, start=T0 + 10 * i, vessel="b"))
            assert a.commit() == 3 + 2 * i
            assert b.commit() == 4 + 2 * i
    result = verify(path)
    assert result["ok"], result
    assert (result["blocks"], result["samples"]) == (12, 25)
    assert [s["version"] for s in sessions(path)] == ["a", "b"]
    assert len(list(read_samples(path, vessel="a"))) == 15


def _remove_last_block(path: Path) -> None:
    """Cut the log's last block away, rows and block row alike (what issue 14's probe did)."""
    conn = sqlite3.connect(path)
    last = conn.execute("SELECT max(block) FROM blocks").fetchone()[0]
    for table in (*LAYOUTS[schema_version(path)].hashed_tables, "blocks"):
        conn.execute(f"DELETE FROM {table} WHERE block = ?", (last,))
    conn.commit()
    conn.close()


def test_a_log_cut_short_fails_against_its_head(log: Path) -> None:
    """Issue 14: removing the last block passed verify. The recorder keeps the chain's
    head beside the log at every commit, and verify checks the log reaches it."""
    from monitor.records.recorder import head_path

    head = json.loads(head_path(log).read_text(encoding="utf-8"))
    assert head["block"] == 3
    _remove_last_block(log)
    result = verify(log)
    assert result["ok"] is False
    assert result["state"] == "tampered"
    assert "ends at block 2" in result["reason"]
    assert "blocks 3 to 3 were removed" in result["reason"]
    # a head kept elsewhere (copied off the broker, say) does the same
    head_path(log).unlink()
    assert verify(log)["ok"] is True  # without a head, a cut log cannot be told apart
    assert verify(log)["head_checked"] is None
    assert "were removed" in verify(log, head=head)["reason"]


def test_a_signed_head_cannot_be_rewritten_without_the_key(tmp_path: Path) -> None:
    from monitor.records.recorder import head_path, head_record

    path = tmp_path / "signed.sqlite"
    key = b"a key of our own for the test"
    with Recorder(path, version="0.1.0", clock=fake_clock(), key=key) as rec:
        rec.add_samples(kettle_samples(5))
        rec.commit()
        rec.add_samples(kettle_samples(5, start=T0 + 5))
        rec.commit()
    assert verify(path, key=key)["ok"] is True
    assert verify(path, key=b"another key")["ok"] is False
    _remove_last_block(path)
    # someone rewrites the head to match the cut log, but has no key
    conn = sqlite3.connect(path)
    block, digest = conn.execute("SELECT block, hash FROM blocks ORDER BY block DESC").fetchone()
    conn.close()
    forged = head_record(block, digest, T0, None)
    head_path(path).write_text(json.dumps(forged), encoding="utf-8")
    result = verify(path, key=key)
    assert result["ok"] is False
    assert "does not carry a valid signature" in result["reason"]
    assert verify(path)["ok"] is True  # unsigned, the forged head passes: hence the key


def test_a_reading_delivered_again_is_recorded_once_and_only_from_such_a_source(tmp_path):
    """A broker may deliver a QoS 1 reading again; a meter polled twice in one instant
    gives two equal readings that are both real. Only the first kind is recorded once."""
    path = tmp_path / "once.sqlite"
    broker, meter = "mqtt://127.0.0.1:1883", "modbus+tcp://127.0.0.1:502"
    reading = Sample(T0, "kettle-1", "water", 20.5, Quality.OK, broker)
    polled = Sample(T0, "kettle-1", "power", 2000.0, Quality.OK, meter)
    with Recorder(path, version="0.1.0", clock=fake_clock()) as rec:
        assert rec.add_samples([reading, polled, polled], once_from={broker}) == 3
        rec.commit()
        # after a crash the broker sends the reading again: the log already holds it
        assert rec.add_samples([reading, polled], once_from={broker}) == 1
        rec.commit()
        assert rec.repeats_skipped == 1
    got = [(s.channel, s.source) for s in read_samples(path)]
    assert got.count(("water", broker)) == 1
    assert got.count(("power", meter)) == 3
