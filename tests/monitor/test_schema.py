"""The one mapping of an estimate: MQTT message, recorder row and --estimates CSV agree."""

from __future__ import annotations

import csv
import io
import json
import math
import sqlite3
from pathlib import Path

import pytest

from drivers.mqtt import encode_json
from monitor.estimation.contracts import Estimate, Estimated, Flag, Level, Phase, TargetForecast
from monitor.records.recorder import LogReader, Recorder, read_estimates
from monitor.records.schema import (
    ESTIMATE_COLUMNS,
    ESTIMATE_CSV_COLUMNS,
    ESTIMATE_FIELDS,
    ESTIMATE_KEYS,
    flatten_estimate,
    join_estimate,
)
from monitor.runs.replay import estimate_row
from monitor.runs.run import Run

ROOT = Path(__file__).resolve().parents[2]
T0 = 1_780_000_000.0  # an arbitrary Unix time (2026), common practice, no source


def full_estimate() -> Estimate:
    """An estimate with every figure known, in made-up values with more than six decimals
    (so the CSV's rounding shows), and one unbounded interval end (infinite: not known)."""
    return Estimate(
        t_s=T0 + 12.5, vessel="kettle-1", phase=Phase.HEATING, water_c=41.523456789,
        water_std_c=0.2125, element_c=55.0000004, ambient_c=21.0, power_w=1999.75,
        ua_w_per_k=Estimated(1.512345678, 0.25), heat_capacity_j_per_k=Estimated(6800.5, 120.25),
        water_mass_kg=Estimated(1.5, 0.031234567), element_conductance_w_per_k=Estimated(40.5, 2.0),
        boiling_point_c=99.97, target=TargetForecast(100.0, 180.5, 170.125, math.inf, ""),
        boil_off_to_dry_s=None, evaporation_kg_per_s=0.0, standing_loss_w=Estimated(12.5, 0.5),
        nis=0.75, flags=(Flag("wrong_fill", Level.NOTICE, "Less water.", {"mass_kg": 1.5}),),
    )  # fmt: skip


def test_one_estimate_has_the_same_names_and_values_as_message_row_and_csv(tmp_path: Path):
    e = full_estimate()
    flat = flatten_estimate(e, vessel="kettle-1", run="3", t=T0 + 12.5)
    assert tuple(flat) == ESTIMATE_KEYS
    assert flat["time_to_target_hi_s"] is None  # infinite: not known
    assert (flat["water_c"], flat["standing_loss_std"], flat["run"]) == (41.523456789, 0.5, "3")

    # the MQTT message: the bytes the publisher sends, read back
    message = json.loads(encode_json(flat))
    assert message == flat

    # the recorder's row: as SQLite holds it (columns, and the detail JSON), and read back
    path = tmp_path / "one.sqlite"
    with Recorder(path, version="t") as rec:
        rec.add_estimates([flat])
    conn = sqlite3.connect(path)
    try:
        conn.row_factory = sqlite3.Row
        row = dict(conn.execute("SELECT * FROM estimates").fetchone())
    finally:
        conn.close()
    detail = json.loads(row.pop("detail"))
    del row["id"], row["block"]
    assert not set(row) & set(detail)  # every name in one place only
    assert {**row, **detail} == message
    (stored,) = read_estimates(path)
    assert {k: v for k, v in stored.items() if k not in ("id", "block")} == message
    with LogReader(path) as log:
        assert {k: v for k, v in log.latest_estimate("kettle-1").items()
                if k not in ("id", "block")} == message  # fmt: skip

    # the --estimates CSV row of the same estimate in a replay (its time is the replay's)
    run = Run("kettle-1", 3, "3", [], None)
    out = io.StringIO()
    csv.writer(out, lineterminator="\n").writerows([ESTIMATE_CSV_COLUMNS, estimate_row(run, e)])
    header, values = list(csv.reader(io.StringIO(out.getvalue())))
    assert header[0] == "time_s"
    by_name = dict(zip(["t", *header[1:]], values, strict=True))
    assert set(by_name) <= set(message)
    for name, text in by_name.items():
        expected = message[name]
        if name in ("vessel", "run", "phase"):
            assert text == expected
        elif expected is None:
            assert text == "", name
        else:  # the CSV keeps six decimal places
            assert float(text) == pytest.approx(expected, abs=5e-7), name
    assert by_name["water_c"] == "41.523457"


def test_the_column_fields_are_the_csvs_and_the_tables_and_every_field_is_documented():
    assert ESTIMATE_CSV_COLUMNS[4:] == ESTIMATE_COLUMNS
    names = [f.name for f in ESTIMATE_FIELDS]
    assert len(set(names)) == len(names)
    mqtt = (ROOT / "docs" / "mqtt.md").read_text(encoding="utf-8")
    recorder = (ROOT / "docs" / "recorder.md").read_text(encoding="utf-8")
    for name in ESTIMATE_KEYS:
        assert f"`{name}`" in mqtt, f"docs/mqtt.md does not list {name}"
    for name in ESTIMATE_COLUMNS:
        assert f"`{name}`" in recorder, f"docs/recorder.md does not name the column {name}"


def test_a_row_written_before_the_one_mapping_reads_in_the_flat_form():
    # the detail the service wrote until this change (monitor/records/recorder.py at d67569f)
    old = {"water_std_c": 0.2, "standing_loss_w": {"value": 12.5, "std": 0.5}, "run": 2,
           "target_reason": "", "flags": []}  # fmt: skip
    flat = join_estimate({"t": T0, "vessel": "k", "phase": "idle", "water_c": 20.0}, old)
    assert (flat["standing_loss_w"], flat["standing_loss_std"], flat["run"]) == (12.5, 0.5, "2")
    assert (flat["water_c"], flat["water_std_c"]) == (20.0, 0.2)
    assert join_estimate({}, {"standing_loss_w": None})["standing_loss_w"] is None


def test_a_key_the_flat_form_does_not_have_is_refused_by_the_recorder(tmp_path: Path):
    flat = flatten_estimate(full_estimate(), vessel="k", run="1", t=T0)
    with Recorder(tmp_path / "bad.sqlite", version="t") as rec:
        with pytest.raises(ValueError, match="unknown keys \\['water_temp'\\]"):
            rec.add_estimates([flat, {**flat, "water_temp": 3.0}])
        assert rec.pending() == 0  # the good one of the batch was not kept either
