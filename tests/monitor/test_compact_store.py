"""The compact store (schema 2) against the one before it (schema 1), on the same readings.

``tests/data/recorder-v1.sqlite`` was made by the code before the compact layout
(commit f56d495) with ``tests/data/make_recorder_log.py``, and so were its replay's
``--json`` and ``--estimates`` outputs beside it. The same script run with this code
makes the same log in schema 2: both must read, replay, verify and show alike.
"""

from __future__ import annotations

import importlib.util
import json
import math
import shutil
import sqlite3
import struct
from pathlib import Path

import pytest

from drivers.sample import Sample
from monitor.cli import main
from monitor.records.recorder import (
    LAYOUTS,
    LogReader,
    Recorder,
    read_samples,
    read_samples_by_session,
    schema_version,
    verify,
)
from tests.support.tamper import edit_pack

DATA = Path(__file__).resolve().parents[1] / "data"
FIXTURE = "recorder-v1.sqlite"


def _maker():
    spec = importlib.util.spec_from_file_location(
        "make_recorder_log", DATA / "make_recorder_log.py"
    )
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def bits(sample: Sample) -> tuple:
    """A sample as exact bits: times and values by their IEEE bytes, every NaN alike."""
    value = "nan" if math.isnan(sample.value) else struct.pack(">d", sample.value).hex()
    return (struct.pack(">d", sample.t).hex(), sample.vessel, sample.channel, value,
            str(sample.quality), sample.source)  # fmt: skip


@pytest.fixture(scope="module")
def logs(tmp_path_factory) -> dict[int, Path]:
    """The schema-1 log as committed, and the same log written now (schema 2), each under
    the same file name in a folder of its own (so the replay's JSON names them alike)."""
    root = tmp_path_factory.mktemp("compact")
    old = root / "v1" / FIXTURE
    old.parent.mkdir()
    shutil.copy(DATA / FIXTURE, old)
    shutil.copy(DATA / (FIXTURE + ".head"), old.parent / (FIXTURE + ".head"))
    new = root / "v2" / FIXTURE
    new.parent.mkdir()
    _maker().make(str(new))
    return {1: old, 2: new}


def test_the_old_log_is_schema_1_and_the_new_one_schema_2(logs) -> None:
    assert schema_version(logs[1]) == 1
    assert schema_version(logs[2]) == 2
    old, new = verify(logs[1]), verify(logs[2])
    assert (old["state"], old["samples"], old["quarantined"]) == ("intact", 2117, 2)
    assert (new["state"], new["samples"], new["quarantined"]) == ("intact", 2117, 2)
    assert new["blocks"] == old["blocks"] == 53  # the same commits
    assert old["head_checked"] == new["head_checked"] == FIXTURE + ".head"


def test_the_schema_1_samples_read_back_as_stored(logs) -> None:
    # straight from SQLite, not through the recorder's reader
    conn = sqlite3.connect(logs[1])
    rows = conn.execute(
        "SELECT t, vessel, channel, value, quality, source FROM samples ORDER BY id"
    ).fetchall()
    conn.close()
    stored = [(struct.pack(">d", t).hex(), v, c, "nan" if x is None else struct.pack(">d", x).hex(),
               q, s) for t, v, c, x, q, s in rows]  # fmt: skip
    assert [bits(s) for s in read_samples(logs[1])] == stored


def test_both_layouts_give_the_same_samples_bit_for_bit(logs) -> None:
    old = [bits(s) for s in read_samples(logs[1])]
    assert len(old) == 2117
    assert [bits(s) for s in read_samples(logs[2])] == old
    for vessel in ("kettle-1", "kettle-2", "none"):
        assert [bits(s) for s in read_samples(logs[2], vessel)] == [
            bits(s) for s in read_samples(logs[1], vessel)
        ]
    by_session = [(k, bits(s)) for k, s in read_samples_by_session(logs[1])]
    assert {k for k, _ in by_session} == {1, 2}
    assert [(k, bits(s)) for k, s in read_samples_by_session(logs[2])] == by_session
    assert [(k, bits(s)) for k, s in read_samples_by_session(logs[2], "kettle-2")] == [
        (k, bits(s)) for k, s in read_samples_by_session(logs[1], "kettle-2")
    ]


def test_the_compact_log_is_much_smaller(logs) -> None:
    old, new = logs[1].stat().st_size, logs[2].stat().st_size
    assert new < 0.35 * old, (old, new)


@pytest.mark.parametrize("version", [1, 2])
def test_replay_gives_the_figures_the_old_code_gave(logs, version, monkeypatch, capsys) -> None:
    monkeypatch.chdir(logs[version].parent)
    assert main(["replay", FIXTURE, "--json", "--estimates", "estimates.csv"]) == 0
    out = capsys.readouterr().out
    assert out == (DATA / "recorder-v1.replay.json").read_text(encoding="utf-8")
    expected = (DATA / "recorder-v1.estimates.csv").read_text(encoding="utf-8")
    assert Path("estimates.csv").read_text(encoding="utf-8") == expected


def test_fleet_and_the_boards_questions_agree(logs, capsys) -> None:
    from dashboard.data import chart_data, load_snapshot

    answers = {}
    for version, path in logs.items():
        assert main(["fleet", str(path), "--json"]) == 0
        fleet = capsys.readouterr().out.replace(str(path), "LOG")
        with LogReader(path) as log:
            board = {
                "vessels": log.vessels(),
                "last": log.last_sample_t(),
                "newest": [log.newest_sample_t(v, ch) for v in ("kettle-1", "kettle-2", "x")
                           for ch in (["water"], ["power", "pressure"], ["nothing"])],
                "readings": [log.readings(v, ch, since, newer_only=newer)
                             for v in ("kettle-1", "kettle-2")
                             for ch in ("water", "power", "pressure", "water_top", "none")
                             for since in (0.0, 1_767_225_640.0, 1_767_225_700.0)
                             for newer in (False, True)],
            }  # fmt: skip
        snapshot = load_snapshot(str(path), "kettle-2")
        charts = [chart_data(str(path), v, window_s=60.0) for v in ("kettle-1", "kettle-2")]
        answers[version] = (fleet, board, snapshot, charts)
    assert answers[2] == answers[1]
    board = answers[2][1]
    assert board["readings"][0][0]  # the questions had answers
    assert board["newest"][2] is None


def test_appending_to_a_schema_1_log_keeps_schema_1(logs, tmp_path) -> None:
    path = tmp_path / "old.sqlite"
    shutil.copy(logs[1], path)
    with Recorder(path, version="now", config_text="# again\n") as rec:
        assert rec.layout is LAYOUTS[1]
        rec.add_samples([Sample(1_767_226_000.0, "kettle-1", "water", 21.5, source="s")])
    assert schema_version(path) == 1
    result = verify(path)
    assert (result["ok"], result["samples"]) == (True, 2118)
    assert list(read_samples(path))[-1] == Sample(1_767_226_000.0, "kettle-1", "water", 21.5,
                                                  source="s")  # fmt: skip


# ---------------------------------------------------------------------------------------
# Tampering with the compact store


def _connect(path: Path) -> sqlite3.Connection:
    return sqlite3.connect(path, isolation_level=None)


@pytest.fixture
def compact(logs, tmp_path) -> Path:
    path = tmp_path / FIXTURE
    shutil.copy(logs[2], path)
    shutil.copy(logs[2].parent / (FIXTURE + ".head"), tmp_path / (FIXTURE + ".head"))
    assert verify(path)["ok"]
    return path


def _set(column: int, index: int, value):
    def change(columns):
        columns[column][index] = value

    return change


def _nudge_value(columns):
    columns[4][1] = math.nextafter(columns[4][1], math.inf)  # one ulp: the least change


def _drop(columns):
    for c in columns:
        del c[2]
    columns[0][2:] = [p - 1 for p in columns[0][2:]]


def _insert(columns):
    for c, value in zip(columns, (columns[0][-1] + 1, columns[1][-1], columns[2][0], 0, 20.0),
                        strict=True):  # fmt: skip
        c.append(value)


@pytest.mark.parametrize(
    ("what", "change"),
    [
        ("a value by one ulp", _nudge_value),
        ("a time", lambda c: c[1].__setitem__(0, c[1][0] + 1.0)),
        ("a channel (another series)", lambda c: c[2].__setitem__(0, c[2][1])),
        ("a quality", _set(3, 0, 1)),
        ("a value to NaN", _set(4, 0, math.nan)),
        ("a sample deleted", _drop),
        ("a sample inserted", _insert),
        ("the order of two samples", lambda c: c[4].__setitem__(slice(0, 2), c[4][1::-1])),
    ],
)
def test_verify_catches_a_changed_sample_inside_a_pack(compact, what, change) -> None:
    block = edit_pack(compact, 40, change)
    result = verify(compact)
    assert result["state"] == "tampered", what
    assert result["first_bad_block"] == block
    assert f"block {block}" in result["reason"]


@pytest.mark.parametrize(
    ("statement", "block"),
    [
        ("DELETE FROM sample_packs WHERE id = 40", None),
        (
            "INSERT INTO sample_packs SELECT 100000, block, vessel, t_last, n, data "
            "FROM sample_packs WHERE id = 40",
            None,
        ),
        ("UPDATE sample_packs SET vessel = 3 - vessel WHERE id = 40", None),
        ("UPDATE sample_packs SET n = n - 1 WHERE id = 40", None),
        ("UPDATE sample_packs SET t_last = t_last + 1 WHERE id = 40", None),
        ("UPDATE sample_packs SET block = block + 1 WHERE id = 40", None),
        ("UPDATE sample_series SET channel = 'element' WHERE channel = 'water'", 2),
        ("UPDATE sample_vessels SET vessel = 'urn-9' WHERE id = 2", 2),
    ],
)
def test_verify_catches_changed_pack_rows_and_names(compact, statement, block) -> None:
    conn = _connect(compact)
    if block is None:
        (block,) = conn.execute("SELECT block FROM sample_packs WHERE id = 40").fetchone()
    conn.execute(statement)
    conn.close()
    result = verify(compact)
    assert result["state"] == "tampered", statement
    assert result["first_bad_block"] == block, result["problems"]


def test_verify_catches_flipped_bytes_in_a_pack(compact) -> None:
    conn = _connect(compact)
    block, data = conn.execute("SELECT block, data FROM sample_packs WHERE id = 41").fetchone()
    for at in range(len(data)):
        changed = bytearray(data)
        changed[at] ^= 0x01
        conn.execute("UPDATE sample_packs SET data = ? WHERE id = 41", (bytes(changed),))
        result = verify(compact)
        assert (result["state"], result["first_bad_block"]) == ("tampered", block), at
    conn.close()


def test_a_pack_that_does_not_decode_is_a_clear_error_for_readers(compact) -> None:
    from drivers.errors import LogFormatError

    conn = _connect(compact)
    conn.execute("UPDATE sample_packs SET data = X'00ff' WHERE id = 41")
    conn.close()
    with pytest.raises(LogFormatError, match="sample_packs id 41"):
        list(read_samples(compact))
    assert verify(compact)["state"] == "tampered"


def test_a_compact_log_cut_short_fails_against_its_head(compact) -> None:
    conn = _connect(compact)
    (last,) = conn.execute("SELECT max(block) FROM blocks").fetchone()
    for table in (*LAYOUTS[2].hashed_tables, "blocks"):
        conn.execute(f"DELETE FROM {table} WHERE block = ?", (last,))
    conn.close()
    result = verify(compact)
    assert result["state"] == "tampered"
    assert f"blocks {last} to {last} were removed" in result["reason"]


# ---------------------------------------------------------------------------------------
# Parquet


@pytest.mark.parametrize("version", [1, 2])
def test_the_parquet_export_holds_every_reading(logs, version, tmp_path, capsys) -> None:
    import datetime as dt

    import pyarrow.parquet as pq

    out = tmp_path / "samples.parquet"
    assert main(["export", str(logs[version]), "--parquet", str(out)]) == 0
    assert "wrote 2117 samples" in capsys.readouterr().err
    table = pq.read_table(out)
    assert table.column_names == ["time", "t", "session", "vessel", "channel", "unit", "value",
                                  "quality", "source"]  # fmt: skip
    rows = table.to_pylist()
    expected = list(read_samples_by_session(logs[1]))
    assert len(rows) == len(expected)
    for row, (session, s) in zip(rows, expected, strict=True):
        value = math.nan if row["value"] is None else row["value"]
        back = Sample(row["t"], row["vessel"], row["channel"], value, row["quality"], row["source"])
        assert bits(back) == bits(s)
        assert row["session"] == session
        assert row["time"] == dt.datetime.fromtimestamp(round(s.t * 1e6) / 1e6, dt.UTC)
    assert rows[0]["time"].isoformat() == "2026-01-01T00:00:00+00:00"
    assert {r["unit"] for r in rows if r["channel"] == "water"} == {"degC"}
    faults = [r for r in rows if r["quality"] == "fault"]
    assert faults
    assert all(r["value"] is None for r in faults)  # no value: null, not a number


def test_the_parquet_export_of_estimates_and_of_one_vessel(tmp_path, capsys) -> None:
    import pyarrow.parquet as pq

    from monitor.records.recorder import read_estimates
    from monitor.records.schema import ESTIMATE_FIELDS, flatten_estimate
    from tests.monitor.test_recorder import T0, kettle_samples, sample_estimate

    path = tmp_path / "e.sqlite"
    with Recorder(path, version="t") as rec:
        rec.add_samples(kettle_samples(5) + kettle_samples(3, vessel="urn-2"))
        for i, vessel in enumerate(["kettle-1", "urn-2", "kettle-1"]):
            rec.add_estimates([flatten_estimate(sample_estimate(), vessel=vessel, run="1",
                                                t=T0 + i)])  # fmt: skip
    samples, estimates = tmp_path / "s.parquet", tmp_path / "e.parquet"
    argv = ["export", str(path), "--parquet", str(samples), "--estimates-parquet", str(estimates)]
    assert main([*argv, "--vessel", "kettle-1"]) == 0
    assert pq.read_table(samples).column("vessel").to_pylist() == ["kettle-1"] * 5
    rows = pq.read_table(estimates).to_pylist()
    assert [r["t"] for r in rows] == [T0, T0 + 2]
    recorded = [e for e in read_estimates(path) if e["vessel"] == "kettle-1"]
    for row, e in zip(rows, recorded, strict=True):
        for field in ESTIMATE_FIELDS:
            assert row[field.name] == e[field.name], field.name
        assert (row["run"], row["phase"]) == ("1", "heating")
        assert json.loads(row["flags"]) == e["flags"]
    assert main(["export", str(path)]) == 2  # nothing asked for
    csv_log = tmp_path / "k.csv"
    csv_log.write_text("time_s,water_c\n0,20\n", encoding="utf-8")
    assert main(["export", str(csv_log), "--parquet", str(samples)]) == 2
    assert "reads a recorder (SQLite) log" in capsys.readouterr().err
