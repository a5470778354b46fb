"""Tests of MQTT topic and payload parsing (drivers.payloads): tables and properties."""

from __future__ import annotations

import json
import math
from datetime import UTC, datetime

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from drivers.errors import FrameError
from drivers.payloads import (
    CHANNEL_COLUMNS,
    COLUMN_CHANNELS,
    DEFAULT_MAX_AHEAD_S,
    EARLIEST_T_S,
    check_prefix,
    is_vessel_id,
    parse_message,
)
from drivers.sample import CHANNEL_UNITS, Quality, Sample

# A fixed receipt time: 2025-01-01T00:00:00Z in Unix seconds (from memory; checked below).
RECEIVED_T = 1_735_689_600.0
SOURCE = "mqtt://127.0.0.1:1883"
PREFIX = "ebullio"


def parse(topic: str, payload: bytes, **kw) -> list[Sample]:
    return parse_message(topic, payload, RECEIVED_T, PREFIX, SOURCE, **kw)


def triples(samples: list[Sample]) -> list[tuple[float, str, str, float]]:
    return [(s.t, s.vessel, s.channel, s.value) for s in samples]


# (topic, payload, expected (t, vessel, channel, value) list). Values are made up (no source).
GOOD = [
    ("ebullio/k1/water", b"21.5", [(RECEIVED_T, "k1", "water", 21.5)]),
    ("ebullio/k1/water", b"  -3.25e1\n", [(RECEIVED_T, "k1", "water", -32.5)]),
    ("ebullio/k1/power", b"2950", [(RECEIVED_T, "k1", "power", 2950.0)]),
    ("ebullio/k1/power", b"+.5", [(RECEIVED_T, "k1", "power", 0.5)]),
    ("ebullio/urn-2.a_b/energy", b"12.", [(RECEIVED_T, "urn-2.a_b", "energy", 12.0)]),
    (
        "ebullio/k1/water",
        b'{"t": 1735689590.5, "value": 80.25}',
        [(1_735_689_590.5, "k1", "water", 80.25)],
    ),
    ("ebullio/k1/ambient", b'{"value": 19}', [(RECEIVED_T, "k1", "ambient", 19.0)]),
    (
        "ebullio/k1/water",
        b'{"t": 1735689600, "value": 1e2}',
        [(RECEIVED_T, "k1", "water", 100.0)],
    ),
    (
        "ebullio/k1/reading",
        b'{"t": 1735689599, "water_c": 21.5, "power_w": 2950.0, "energy_wh": 1.5}',
        [
            (1_735_689_599.0, "k1", "water", 21.5),
            (1_735_689_599.0, "k1", "power", 2950.0),
            (1_735_689_599.0, "k1", "energy", 1.5),
        ],
    ),
    (
        "ebullio/k1/reading",
        b'{"cold_junction_c": 23.0, "pressure_kpa": 101.325}',
        [(RECEIVED_T, "k1", "cold_junction", 23.0), (RECEIVED_T, "k1", "pressure", 101.325)],
    ),
    # the future window: exactly at the limit is still taken
    (
        "ebullio/k1/water",
        json.dumps({"t": RECEIVED_T + DEFAULT_MAX_AHEAD_S, "value": 1}).encode(),
        [(RECEIVED_T + DEFAULT_MAX_AHEAD_S, "k1", "water", 1.0)],
    ),
    (
        "ebullio/k1/water",
        json.dumps({"t": EARLIEST_T_S, "value": 1}).encode(),
        [(EARLIEST_T_S, "k1", "water", 1.0)],
    ),
]


@pytest.mark.parametrize(("topic", "payload", "expected"), GOOD)
def test_good_messages_give_their_samples(topic, payload, expected):
    samples = parse(topic, payload)
    assert triples(samples) == expected
    assert all(s.quality == Quality.OK and s.source == SOURCE for s in samples)


# (topic, payload, a fragment the reason must hold)
BAD = [
    ("ebullio/k1/water", b"\xff\xfe21", "not UTF-8"),
    ("ebullio/k1/water", b"\xef\xbb\xbf21.5", "BOM"),
    ("ebullio/k1/water", b"", "empty payload"),
    ("ebullio/k1/water", b"   ", "not a number or a JSON object"),
    ("ebullio/k1/water", b"warm", "not a number or a JSON object"),
    ("ebullio/k1/water", b"21.5 C", "not a number or a JSON object"),
    ("ebullio/k1/water", b"1_000", "not a number or a JSON object"),
    ("ebullio/k1/water", b"0x10", "not a number or a JSON object"),
    ("ebullio/k1/water", "٣".encode(), "not a number or a JSON object"),  # Arabic-Indic 3
    ("ebullio/k1/water", b"nan", "not a number or a JSON object"),
    ("ebullio/k1/water", b"inf", "not a number or a JSON object"),
    ("ebullio/k1/water", b"NaN", "NaN is not a finite number"),
    ("ebullio/k1/water", b"-Infinity", "-Infinity is not a finite number"),
    ("ebullio/k1/water", b"1e999", "not a finite number"),
    ("ebullio/k1/water", b'{"value": NaN}', "NaN is not a finite number"),
    ("ebullio/k1/water", b'{"value": Infinity}', "Infinity is not a finite number"),
    ("ebullio/k1/water", b'{"value": 1e400}', "not a finite number"),
    ("ebullio/k1/water", b'{"value": ' + b"9" * 400 + b"}", "not a finite number"),
    ("ebullio/k1/water", b"[21.5]", "payload is a list"),
    ("ebullio/k1/water", b'"21.5"', "payload is a string"),
    ("ebullio/k1/water", b"true", "payload is a boolean"),
    ("ebullio/k1/water", b"null", "payload is null"),
    ("ebullio/k1/water", b"{}", "has no 'value'"),
    ("ebullio/k1/water", b'{"t": 1735689600}', "has no 'value'"),
    ("ebullio/k1/water", b'{"value": true}', "'value' is a boolean"),
    ("ebullio/k1/water", b'{"value": "21.5"}', "'value' is a string"),
    ("ebullio/k1/water", b'{"value": null}', "'value' is null"),
    ("ebullio/k1/water", b'{"value": [1]}', "'value' is a list"),
    ("ebullio/k1/water", b'{"value": {"v": 1}}', "'value' is an object"),
    ("ebullio/k1/water", b'{"value": 1, "unit": "degC"}', "unknown key(s) ['unit']"),
    ("ebullio/k1/water", b'{"value": 1, "value": 2}', "'value' appears twice"),
    ("ebullio/k1/water", b'{"value": 1', "not a number or a JSON object"),
    ("ebullio/k1/water", b"[" * 100_000, "nested too deeply"),
    ("ebullio/k1/water", b'{"t": true, "value": 1}', "'t' is a boolean"),
    ("ebullio/k1/water", b'{"t": "2025-01-01", "value": 1}', "'t' is a string"),
    ("ebullio/k1/water", b'{"t": 946684799.9, "value": 1}', "before 2000-01-01"),
    ("ebullio/k1/water", b'{"t": 0, "value": 1}', "before 2000-01-01"),
    ("ebullio/k1/water", b'{"t": 1735689900.5, "value": 1}', "more than 300 s"),
    ("ebullio/k1/water", b'{"t": 1735689600000, "value": 1}', "milliseconds"),
    ("ebullio/k1/reading", b"21.5", "a reading is a JSON object"),
    ("ebullio/k1/reading", b"[]", "a reading is a JSON object"),
    ("ebullio/k1/reading", b"{}", "holds no channel"),
    ("ebullio/k1/reading", b'{"t": 1735689600}', "holds no channel"),
    ("ebullio/k1/reading", b'{"water": 21.5}', "unknown key(s) ['water']"),
    ("ebullio/k1/reading", b'{"water_c": 21.5, "colour_c": 3}', "unknown key(s) ['colour_c']"),
    ("ebullio/k1/reading", b'{"water_c": NaN}', "NaN is not a finite number"),
    ("ebullio/k1/reading", b'{"water_c": false}', "'water_c' is a boolean"),
    ("ebullio/k1/reading", b'{"water_c": {"value": 1}}', "'water_c' is an object"),
    ("ebullio/k1/reading", b'{"water_c": 1, "water_c": 2}', "appears twice"),
    ("ebullio/k1/reading", b'{"t": 1, "water_c": 1}', "before 2000-01-01"),
    ("ebullio/k1/colour", b"1", "unknown channel 'colour'"),
    ("ebullio/k1/water_c", b"1", "unknown channel 'water_c'"),
    ("ebullio/k1/", b"1", "unknown channel ''"),
    ("ebullio//water", b"1", "vessel id '' is empty"),
    ("ebullio/k 1/water", b"1", "vessel id 'k 1'"),
    ("ebullio/-k1/water", b"1", "vessel id '-k1'"),
    ("ebullio/k1$/water", b"1", "vessel id 'k1$'"),
    ("ebullio/kéttle/water", b"1", "vessel id"),
    ("ebullio/" + "k" * 65 + "/water", b"1", "vessel id"),
    ("ebullio/k1", b"1", "1 level(s) after the prefix"),
    ("ebullio/k1/water/extra", b"1", "3 level(s) after the prefix"),
    ("ebullio", b"1", "not under the prefix"),
    ("other/k1/water", b"1", "not under the prefix"),
    ("ebulliox/k1/water", b"1", "not under the prefix"),
    ("", b"1", "not under the prefix"),
]


@pytest.mark.parametrize(("topic", "payload", "reason"), BAD)
def test_bad_messages_raise_frame_error_with_reason_and_raw(topic, payload, reason):
    with pytest.raises(FrameError) as caught:
        parse(topic, payload)
    assert reason in str(caught.value)
    assert caught.value.raw == payload
    assert isinstance(caught.value.raw, bytes)


@pytest.mark.parametrize("leaf", ["estimate", "flags"])
@pytest.mark.parametrize("payload", [b'{"phase": "heating"}', b"[]", b"\xff", b""])
def test_our_own_topics_are_ignored_not_refused(leaf, payload):
    assert parse(f"ebullio/k1/{leaf}", payload) == []


def test_a_long_reason_quotes_only_the_start_of_the_input():
    with pytest.raises(FrameError) as caught:
        parse("ebullio/" + "x y" * 1000 + "/water", b"1")
    assert len(str(caught.value)) < 400


def test_the_future_window_is_a_parameter():
    payload = json.dumps({"t": RECEIVED_T + 10.0, "value": 1}).encode()
    assert len(parse("ebullio/k1/water", payload)) == 1
    with pytest.raises(FrameError, match="more than 5 s"):
        parse("ebullio/k1/water", payload, max_ahead_s=5.0)


def test_a_prefix_of_several_levels_works():
    samples = parse_message("site/a/ebullio/k1/water", b"3", RECEIVED_T, "site/a/ebullio", SOURCE)
    assert triples(samples) == [(RECEIVED_T, "k1", "water", 3.0)]
    with pytest.raises(FrameError, match="not under the prefix"):
        parse_message("site/b/ebullio/k1/water", b"3", RECEIVED_T, "site/a/ebullio", SOURCE)


@pytest.mark.parametrize(
    ("prefix", "reason"),
    [
        ("", "empty"),
        ("$SYS", "reserved for the broker"),
        ("a/+", "wildcard"),
        ("a/#", "wildcard"),
        ("a//b", "empty level"),
        ("a/", "empty level"),
    ],
)
def test_bad_prefixes_are_refused(prefix, reason):
    with pytest.raises(ValueError, match=reason):
        check_prefix(prefix)


def test_the_fixed_times_are_the_dates_they_claim():
    assert datetime.fromtimestamp(RECEIVED_T, UTC) == datetime(2025, 1, 1, tzinfo=UTC)
    assert datetime.fromtimestamp(EARLIEST_T_S, UTC) == datetime(2000, 1, 1, tzinfo=UTC)


def test_vessel_ids():
    assert all(is_vessel_id(v) for v in ["k1", "K", "urn-2", "a.b_c", "9", "x" * 64])
    assert not any(is_vessel_id(v) for v in ["", "_a", ".a", "a b", "a/b", "a+", "#", "x" * 65])


def test_every_role_has_a_column_with_its_unit():
    assert set(CHANNEL_COLUMNS) == set(CHANNEL_UNITS)
    assert {COLUMN_CHANNELS[c] for c in CHANNEL_COLUMNS.values()} == set(CHANNEL_UNITS)
    assert CHANNEL_COLUMNS["water"] == "water_c"
    assert CHANNEL_COLUMNS["power"] == "power_w"
    assert CHANNEL_COLUMNS["energy"] == "energy_wh"
    assert CHANNEL_COLUMNS["pressure"] == "pressure_kpa"


def test_columns_agree_with_the_csv_interchange_format():
    # The CSV format (monitor/records/interchange.py) names the same columns for the roles it has.
    from monitor.records.interchange import CHANNEL_COLUMNS as CSV_COLUMNS

    for role, column in CSV_COLUMNS.items():
        assert CHANNEL_COLUMNS[role] == column


# --- properties -----------------------------------------------------------------------

_SETTINGS = settings(derandomize=True, max_examples=400, deadline=None)

_LEAVES = st.sampled_from([*CHANNEL_UNITS, "reading", "estimate", "flags", "x", ""])
_TOPICS = st.one_of(
    st.text(max_size=40),
    st.builds(
        lambda v, leaf: f"ebullio/{v}/{leaf}",
        st.text(max_size=12),
        _LEAVES,
    ),
)
_JSON = st.recursive(
    st.none()
    | st.booleans()
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.integers()
    | st.text(max_size=8),
    lambda inner: (
        st.lists(inner, max_size=4)
        | st.dictionaries(
            st.sampled_from(["t", "value", "water_c", "power_w", "x"]) | st.text(max_size=5),
            inner,
            max_size=5,
        )
    ),
    max_leaves=12,
)


def _only_samples_or_frame_error(topic: str, payload: bytes) -> None:
    refused: FrameError | None = None
    samples: list[Sample] = []
    try:
        samples = parse(topic, payload)
    except FrameError as exc:
        refused = exc
    if refused is not None:
        assert refused.raw == payload
        assert str(refused)
    for s in samples:
        assert isinstance(s, Sample)
        assert math.isfinite(s.value)
        assert math.isfinite(s.t)
        assert s.channel in CHANNEL_UNITS
        assert EARLIEST_T_S <= s.t <= RECEIVED_T + DEFAULT_MAX_AHEAD_S


@_SETTINGS
@given(topic=_TOPICS, payload=st.binary(max_size=64))
def test_arbitrary_bytes_and_topics_give_samples_or_frame_error(topic, payload):
    _only_samples_or_frame_error(topic, payload)


@_SETTINGS
@given(leaf=_LEAVES, value=_JSON)
def test_arbitrary_json_gives_samples_or_frame_error(leaf, value):
    payload = json.dumps(value).encode("utf-8")  # json.dumps writes NaN and Infinity tokens
    _only_samples_or_frame_error(f"ebullio/k1/{leaf}", payload)


@_SETTINGS
@given(value=st.floats(allow_nan=False, allow_infinity=False))
def test_every_finite_float_survives_as_a_bare_number_and_as_json(value):
    assert parse("ebullio/k1/power", repr(value).encode())[0].value == value
    as_json = json.dumps({"value": value}).encode()
    assert parse("ebullio/k1/power", as_json)[0].value == value
