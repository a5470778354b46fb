"""Tests of the CSV interchange format: round trips, bad rows kept, bad headers refused."""

from __future__ import annotations

import io

import pytest

from drivers.errors import LogFormatError
from drivers.simworld import SimulatedRig, kettle_scenario, scenario_metadata
from monitor.records.interchange import (
    LogRow,
    read_csv,
    read_csv_text,
    rows_from_samples,
    to_text,
    write_csv,
)


def test_round_trip_of_a_simulated_log(tmp_path):
    scenario = kettle_scenario(duration_s=120.0)
    rig = SimulatedRig(scenario, seed=3)
    batches = list(rig.run())
    meta = scenario_metadata(scenario, 3)
    path = tmp_path / "kettle.csv"
    channels = ["water", "element", "ambient", "power", "energy"]
    with open(path, "w", encoding="utf-8", newline="") as handle:
        count = write_csv(
            handle, rows_from_samples(batches, scenario.start_epoch_s), meta, channels
        )
    assert count == 121
    log = read_csv(path)
    assert log.rejected == []
    assert log.channels == channels
    assert log.metadata["vessel_heat_capacity_j_per_k"] == scenario.vessel_heat_capacity_j_per_k
    assert log.metadata["scenario"] == "kettle"
    assert log.start_epoch_s == scenario.start_epoch_s
    assert [r.time_s for r in log.rows] == [float(i) for i in range(121)]
    # every value survives exactly (the simulator quantises, the writer keeps 10 digits)
    for row, batch in zip(log.rows, batches, strict=True):
        want = {s.channel: s.value for s in batch if s.channel in channels}
        assert row.values == pytest.approx(want, rel=1e-9, abs=1e-12)


def test_blank_cells_are_missing_readings():
    text = "time_s,water_c,power_w\n0,15.0,\n1,,2000\n"
    log = read_csv_text(io.StringIO(text))
    assert log.rows[0].values == {"water": 15.0}
    assert log.rows[1].values == {"power": 2000.0}


def test_bad_rows_are_kept_with_line_and_reason_and_reading_goes_on():
    text = (
        "# vessel: urn-3\n"
        "# a note without a key\n"
        "time_s,water_c,power_w\n"
        "0,15.0,2000\n"
        "1,hot,2000\n"  # not a number
        "2,15.2\n"  # too few cells
        "x,15.3,2000\n"  # bad time
        "4,nan,2000\n"  # not a plain decimal number (float() would take it)
        "5,15.5,2000\n"
    )
    log = read_csv_text(io.StringIO(text), "bench.csv")
    assert [r.time_s for r in log.rows] == [0.0, 5.0]
    reasons = {r.line: r.reason for r in log.rejected}
    assert set(reasons) == {2, 5, 6, 7, 8}
    assert "'water_c' holds 'hot'" in reasons[5]
    assert "2 cells where the header has 3" in reasons[6]
    assert "bad time 'x'" in reasons[7]
    assert "'water_c' holds 'nan', not a number" in reasons[8]
    assert next(r.text for r in log.rejected if r.line == 5) == "1,hot,2000"


@pytest.mark.parametrize(
    ("cell", "kept", "reason"),
    [
        ("15.25", 15.25, None),
        ("+.5e-3", 0.0005, None),
        ("-7.", -7.0, None),
        ("1E+02", 100.0, None),
        ("1_000", None, "not a number"),  # float() takes these four; the format does not
        ("\u0661\u0662", None, "not a number"),
        ("Infinity", None, "not a number"),
        ("-nan", None, "not a number"),
        ("1e400", None, "is not finite"),
        ("0x10", None, "not a number"),
        ("1.2.3", None, "not a number"),
    ],
)
def test_a_cell_is_a_plain_decimal_number_or_its_line_is_set_aside(cell, kept, reason):
    # the reader parses with float() and keeps the format's own grammar (PLAIN_NUMBER)
    # for what float() would take beyond it
    log = read_csv_text(io.StringIO(f"time_s,water_c\n0,{cell}\n1,15.0\n"), "cells.csv")
    if reason is None:
        assert log.rows[0].values == {"water": kept}
        assert not log.rejected
    else:
        assert [r.time_s for r in log.rows] == [1.0]
        assert reason in log.rejected[0].reason


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("", "no header row"),
        ("water_c,time_s\n", "first column must be 'time_s' or 'time'"),
        ("time_s,water_f\n", "unknown column 'water_f'"),
        ("time_s,water_c,water_c\n", "repeated"),
    ],
)
def test_bad_headers_are_refused_with_file_and_line(text, message):
    with pytest.raises(LogFormatError, match=message) as info:
        read_csv_text(io.StringIO("# site: lab\n" + text), "rig.csv")
    assert "rig.csv" in str(info.value)


def test_iso_time_column_with_offset_and_vessel_and_run_columns():
    text = (
        "time,water_c,vessel,run\n"
        "2026-03-01T10:00:00+01:00,15.0,urn-1,1\n"
        "2026-03-01T10:00:05+01:00,15.5,urn-1,1\n"
        "2026-03-01T10:00:07,15.6,urn-1,1\n"  # no offset: rejected, not guessed
    )
    log = read_csv_text(io.StringIO(text))
    assert [r.time_s for r in log.rows] == [0.0, 5.0]
    assert log.start_epoch_s == pytest.approx(1772355600.0)  # 09:00 UTC, by hand
    assert log.rows[0].vessel == "urn-1"
    assert log.rows[0].run == "1"
    assert "no UTC offset" in log.rejected[0].reason


def test_writer_refuses_metadata_that_would_break_the_format():
    with pytest.raises(LogFormatError, match="one '# key: value' line"):
        to_text([], {"note": "two\nlines"}, ["water"])
    text = to_text([LogRow(0, 0.5, {"water": 20.25})], {"k": 1.5}, ["water", "power"])
    assert text == "# k: 1.5\ntime_s,water_c,power_w\n0.5,20.25,\n"


def _file_with(tmp_path, name: str, mangle) -> str:
    """Write our own small three-row log, mangled by ``mangle(bytes) -> bytes``."""
    text = "# vessel: k1\ntime_s,water_c,power_w\n0,20.0,0\n1,20.5,2000\n2,21.0,2000\n"
    path = tmp_path / name
    path.write_bytes(mangle(text.encode()))
    return str(path)


def test_any_bytes_are_read_and_bad_lines_set_aside_with_where_and_why(tmp_path) -> None:
    """Issue 14: these gave tracebacks (UnicodeDecodeError, csv field limit) or a
    header error showing '\\ufefftime_s'."""
    from monitor.records.interchange import read_csv

    bom = read_csv(_file_with(tmp_path, "bom.csv", lambda b: b"\xef\xbb\xbf" + b))
    assert len(bom.rows) == 3
    assert bom.metadata["vessel"] == "k1"
    bad_byte = read_csv(_file_with(tmp_path, "latin.csv", lambda b: b.replace(b"20.5", b"2\xff.5")))
    assert [r.time_s for r in bad_byte.rows] == [0.0, 2.0]
    (rejected,) = bad_byte.rejected
    assert rejected.line == 4
    assert "not UTF-8" in rejected.reason
    assert "0xff" in rejected.reason
    assert "\\xff" in rejected.text  # the byte kept, escaped
    huge = read_csv(
        _file_with(tmp_path, "huge.csv", lambda b: b.replace(b"20.5", b'"' + b"9" * 200_000 + b'"'))
    )
    assert [r.time_s for r in huge.rows] == [0.0, 2.0]
    assert "field larger than field limit" in huge.rejected[0].reason
    nul = read_csv(_file_with(tmp_path, "nul.csv", lambda b: b.replace(b"21.0", b"2\x001.0")))
    assert [r.time_s for r in nul.rows] == [0.0, 1.0]
    assert "not a number" in nul.rejected[0].reason
    # Python's float() would take these; a log's cell is a plain decimal number
    under = read_csv(
        _file_with(tmp_path, "under.csv", lambda b: b.replace(b"2000\n2", b"2_000\n2"))
    )
    assert [r.time_s for r in under.rows] == [0.0, 2.0]
    with pytest.raises(LogFormatError, match="line 1: the header row is not UTF-8"):
        read_csv(_file_with(tmp_path, "head.csv", lambda b: b"\xfe" + b.split(b"\n", 1)[1]))


def test_a_plain_line_is_split_as_the_csv_module_splits_it() -> None:
    """Issue 16: a line without quotes is split on its commas, skipping the csv module;
    the cells must be the module's (lines of our own making)."""
    import csv

    from monitor.records.interchange import _parse_row

    header = ["time_s", "water_c", "power_w", "vessel", "run"]
    lines = ["0,20.5,2000,k1,1\n", " 1 , 21 ,, k1 ,\r\n", "2,,,,\n", "3,1e3,-5,,A\n"]
    for number, raw in enumerate(lines, start=1):
        fast, _ = _parse_row(number, raw, header, False)
        cells = next(csv.reader([raw]))
        quoted = ",".join(f'"{c}"' for c in cells) + "\n"  # the same cells, through csv
        slow, _ = _parse_row(number, quoted, header, False)
        assert fast == slow
