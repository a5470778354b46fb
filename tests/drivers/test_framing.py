"""Tests of the line framer and parsers: byte tables of whole, split and corrupt frames."""

from __future__ import annotations

import itertools

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from drivers.errors import ConfigError, FrameError
from drivers.framing import LineFramer, LineSpec, instrument_time, parse_line

#: 2026-01-01T00:00:00Z in Unix seconds (checked with `date -u -d @1767225600`).
NEW_YEAR_2026_S = 1767225600.0

HYPOTHESIS = settings(derandomize=True, database=None, deadline=None, max_examples=300)


def _items(framer: LineFramer, chunks: list[bytes]) -> list[tuple[str, bytes]]:
    """Feed chunks; return ("line", bytes) / ("error", raw) pairs in order."""
    out: list[tuple[str, bytes]] = []
    for chunk in chunks:
        for item in framer.feed(chunk):
            if isinstance(item, FrameError):
                out.append(("error", item.raw))
            else:
                assert isinstance(item, bytes)
                out.append(("line", item))
    return out


def _split(data: bytes, cuts: tuple[int, ...]) -> list[bytes]:
    bounds = [0, *cuts, len(data)]
    return [data[a:b] for a, b in itertools.pairwise(bounds)]


# ---------------------------------------------------------------------------
# LineFramer: whole frames
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("data", "expected"),
    [
        (b"a=1\n", [("line", b"a=1")]),
        (b"a=1\r\n", [("line", b"a=1")]),
        (b"a=1\r\nb=2\nc=3\r\n", [("line", b"a=1"), ("line", b"b=2"), ("line", b"c=3")]),
        (b"\n\r\n\n", []),  # empty lines are skipped
        (b"a=1", []),  # no newline yet: held back
        (b"a\rb\n", [("line", b"a\rb")]),  # only a CR just before the LF is removed
        (b"a\r\r\n", [("line", b"a\r")]),
        (b"12345678\n", [("line", b"12345678")]),  # exactly the limit (8) is a line
        (b"\x00\xff\n", [("line", b"\x00\xff")]),  # framing does not judge the bytes
    ],
)
def test_whole_frames(data: bytes, expected: list[tuple[str, bytes]]) -> None:
    assert _items(LineFramer(max_line_bytes=8), [data]) == expected


def test_partial_line_is_kept_between_calls() -> None:
    framer = LineFramer()
    assert framer.feed(b"t=1 wat") == []
    assert framer.pending_bytes == 7
    assert framer.feed(b"er_c=20.5\r") == []
    assert framer.feed(b"\nnext") == [b"t=1 water_c=20.5"]
    assert framer.pending_bytes == 4


def test_line_numbers_count_every_newline() -> None:
    framer = LineFramer(max_line_bytes=4)
    got = framer.feed_numbered(b"a\n\nb\n123456\nc\n")
    assert [(n, item if isinstance(item, bytes) else item.raw) for n, item in got] == [
        (1, b"a"),
        (3, b"b"),
        (4, b"1234"),
        (4, b"56"),
        (5, b"c"),
    ]


def test_finish_returns_the_unfinished_line() -> None:
    framer = LineFramer()
    framer.feed(b"a=1\nt=17672")
    ((n, err),) = framer.finish()
    assert n == 2
    assert err.raw == b"t=17672"
    assert "unfinished line" in str(err)
    assert framer.finish() == []
    assert framer.pending_bytes == 0


# ---------------------------------------------------------------------------
# LineFramer: split frames (every split point gives the same items)
# ---------------------------------------------------------------------------

STREAMS = [
    b"t=1767225600.000 water_mv=3.412 cj_c=21.43\r\nt=1767225601.000 water_mv=3.420\r\n",
    b"1,2,3\n\n4,5,6\r\n\r\n7,8\n",
    b"ok\r\n" + b"x" * 20 + b"\r\nok again\n",  # an over-long line between good ones
]


@pytest.mark.parametrize("data", STREAMS)
def test_every_two_way_split_gives_the_same_items(data: bytes) -> None:
    whole = _items(LineFramer(max_line_bytes=12), [data])
    assert whole  # the table holds real frames
    for cut in range(len(data) + 1):
        assert _items(LineFramer(max_line_bytes=12), _split(data, (cut,))) == whole, cut


@pytest.mark.parametrize("data", STREAMS[1:])
def test_every_three_way_split_gives_the_same_items(data: bytes) -> None:
    whole = _items(LineFramer(max_line_bytes=12), [data])
    for a, b in itertools.combinations(range(len(data) + 1), 2):
        assert _items(LineFramer(max_line_bytes=12), _split(data, (a, b))) == whole, (a, b)


def test_byte_at_a_time() -> None:
    data = STREAMS[0]
    chunks = [data[i : i + 1] for i in range(len(data))]
    assert _items(LineFramer(), chunks) == [
        ("line", b"t=1767225600.000 water_mv=3.412 cj_c=21.43"),
        ("line", b"t=1767225601.000 water_mv=3.420"),
    ]


# ---------------------------------------------------------------------------
# LineFramer: over-long lines
# ---------------------------------------------------------------------------


def test_overlong_line_comes_out_in_pieces_and_the_framer_resynchronises() -> None:
    framer = LineFramer(max_line_bytes=8)
    got = framer.feed(b"123456789ABCDEFGH\r\nnext=1\n")
    errors = [item for item in got if isinstance(item, FrameError)]
    assert [e.raw for e in errors] == [b"12345678", b"9ABCDEFG", b"H\r"]
    assert b"".join(e.raw for e in errors) == b"123456789ABCDEFGH\r"  # nothing lost
    assert "longer than 8 bytes" in str(errors[0])
    assert "end of the line" in str(errors[-1])
    assert got[-1] == b"next=1"


def test_overlong_counts_the_cr() -> None:
    # the limit counts bytes before the newline, a trailing CR included (documented)
    got = LineFramer(max_line_bytes=8).feed(b"12345678\r\n")
    assert [e.raw for e in got if isinstance(e, FrameError)] == [b"12345678", b"\r"]


def test_overlong_memory_stays_bounded() -> None:
    framer = LineFramer(max_line_bytes=16)
    pieces = 0
    for _ in range(100):
        pieces += len(framer.feed(b"z" * 100))
        assert framer.pending_bytes <= 16
    assert pieces == 100 * 100 // 16  # 625 full pieces handed out so far
    assert framer.feed(b"\nok\n")[-1] == b"ok"


@pytest.mark.parametrize("bad", [0, -1, 1.5, True])
def test_framer_rejects_a_bad_limit(bad: object) -> None:
    with pytest.raises(ConfigError, match="max_line_bytes"):
        LineFramer(max_line_bytes=bad)  # type: ignore[arg-type]


# ---------------------------------------------------------------------------
# LineSpec validation
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"framing": "json"}, "unknown; known framings: csv, keyvalue, regex"),
        ({"framing": "csv"}, "csv framing needs fields"),
        ({"framing": "csv", "fields": ("", "")}, "csv framing needs fields"),
        ({"framing": "csv", "fields": ("a", "a")}, r"name \['a'\] more than once"),
        ({"framing": "csv", "fields": ("a",), "delimiter": ""}, "delimiter"),
        ({"framing": "csv", "fields": ("a",), "time_field": "t"}, "not one of the csv fields"),
        ({"framing": "csv", "fields": ("a",), "pattern": "x"}, "pattern does not apply"),
        ({"framing": "keyvalue", "fields": ("a",)}, "fields does not apply"),
        ({"framing": "keyvalue", "key_separator": ""}, "key_separator"),
        ({"framing": "keyvalue", "pair_separator": "="}, "must not contain the key separator"),
        ({"framing": "regex"}, "needs a pattern"),
        ({"framing": "regex", "pattern": "(?P<a>[0-9]"}, "does not compile"),
        ({"framing": "regex", "pattern": "([0-9]+)"}, "no named groups"),
        ({"framing": "regex", "pattern": "(?P<a>.*)", "time_field": "t"}, "not a group"),
        ({"framing": "keyvalue", "time_field": ""}, "time_field must be"),
    ],
)
def test_linespec_rejects_bad_configuration(kwargs: dict, message: str) -> None:
    with pytest.raises(ConfigError, match=message):
        LineSpec(**kwargs)


def test_linespec_accepts_a_list_of_fields_and_stays_hashable() -> None:
    spec = LineSpec("csv", fields=["t", "", "water_c"], time_field="t")  # type: ignore[arg-type]
    assert spec.fields == ("t", "", "water_c")
    assert hash(spec) == hash(LineSpec("csv", fields=("t", "", "water_c"), time_field="t"))


# ---------------------------------------------------------------------------
# parse_line: good lines
# ---------------------------------------------------------------------------

CSV = LineSpec("csv", fields=("t", "", "water_mv", "cj_c"))
KV = LineSpec("keyvalue")
REGEX = LineSpec(
    "regex", pattern=r"T(?P<water_c>-?[0-9.]+) +A(?P<ambient_c>-?[0-9.]+)( P(?P<power_w>[0-9.]+))?"
)


@pytest.mark.parametrize(
    ("spec", "line", "expected"),
    [
        (
            CSV,
            b"1767225600,xx,3.412,21.43",
            {"t": "1767225600", "water_mv": "3.412", "cj_c": "21.43"},
        ),
        (CSV, b" 1 , xx , 3.4 , 21 ", {"t": "1", "water_mv": "3.4", "cj_c": "21"}),
        (CSV, b"1,,,21.4", {"t": "1", "cj_c": "21.4"}),  # empty cell: missing reading
        (
            LineSpec("csv", fields=("a", "b"), delimiter=";"),
            b"1,5;2",
            {"a": "1,5", "b": "2"},
        ),
        (KV, b"t=1 water_mv=3.412 cj_c=21.4", {"t": "1", "water_mv": "3.412", "cj_c": "21.4"}),
        (KV, b"a=1,b=2, c=3\tdd=4", {"a": "1", "b": "2", "c": "3", "dd": "4"}),
        (KV, b"  a=1  ", {"a": "1"}),
        (KV, b"a=x=y", {"a": "x=y"}),  # the key ends at the first separator
        (KV, b"a=", {"a": ""}),  # an empty value is bind_fields' problem, not a frame error
        (
            LineSpec("keyvalue", pair_separator=";", key_separator=":"),
            b"water c:20.5; ambient:19",
            {"water c": "20.5", "ambient": "19"},
        ),
        (REGEX, b"T21.5 A20.0", {"water_c": "21.5", "ambient_c": "20.0"}),
        (REGEX, b"T21.5  A-2 P2200", {"water_c": "21.5", "ambient_c": "-2", "power_w": "2200"}),
        (KV, "a=é".encode(), {"a": "é"}),
    ],
)
def test_parse_good_lines(spec: LineSpec, line: bytes, expected: dict[str, str]) -> None:
    assert parse_line(line, spec) == expected


# ---------------------------------------------------------------------------
# parse_line: corrupt lines
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("spec", "line", "reason"),
    [
        (KV, b"a=\xff1", "not valid UTF-8 at byte 2"),
        (CSV, b"1,\xc3,3,4", "not valid UTF-8 at byte 2"),
        (CSV, b"1,2,3", "expected 4 fields separated by ',', found 3"),
        (CSV, b"1,2,3,4,5", "expected 4 fields separated by ',', found 5"),
        (CSV, b"1;2;3;4", "expected 4 fields"),
        (KV, b"a=1 garbage", "token 2 'garbage' has no '='"),
        (KV, b"LOGGER READY", "token 1 'LOGGER' has no '='"),
        (KV, b"a=1 =2", "token 2 '=2' has an empty key"),
        (KV, b"a=1 b=2 a=3", "key 'a' appears more than once"),
        (KV, b"   \t ", "only whitespace"),
        (REGEX, b"T21.5", "does not match the pattern"),
        (REGEX, b"T21.5 A20.0 trailing", "does not match the pattern"),  # full match only
        (REGEX, b"\x01\x02garbage", "does not match"),
    ],
)
def test_parse_corrupt_lines(spec: LineSpec, line: bytes, reason: str) -> None:
    with pytest.raises(FrameError, match=reason) as info:
        parse_line(line, spec)
    assert info.value.raw == line


# ---------------------------------------------------------------------------
# instrument_time
# ---------------------------------------------------------------------------

TIMED = LineSpec("keyvalue", time_field="t")
RECEIVED = NEW_YEAR_2026_S + 60.0


@pytest.mark.parametrize(
    ("text", "expected_s"),
    [
        ("1767225600", NEW_YEAR_2026_S),
        ("1767225600.250", NEW_YEAR_2026_S + 0.25),
        ("1.7672256e9", NEW_YEAR_2026_S),
        ("2026-01-01T00:00:00+00:00", NEW_YEAR_2026_S),
        ("2026-01-01T00:00:00Z", NEW_YEAR_2026_S),
        ("2026-01-01T01:00:00.5+01:00", NEW_YEAR_2026_S + 0.5),
        ("2025-12-31T19:00:00-05:00", NEW_YEAR_2026_S),
        ("2026-01-01T00:05:59+00:00", NEW_YEAR_2026_S + 359.0),  # 299 s ahead of receipt
    ],
)
def test_instrument_time_reads_unix_and_iso(text: str, expected_s: float) -> None:
    assert instrument_time({"t": text}, TIMED, RECEIVED) == pytest.approx(expected_s, abs=1e-6)


@pytest.mark.parametrize(
    ("text", "reason"),
    [
        ("yesterday", "neither Unix seconds nor ISO 8601"),
        ("1_767_225_600", "neither Unix seconds nor ISO 8601"),
        ("nan", "neither Unix seconds nor ISO 8601"),
        ("1e999", "not a finite time"),
        ("2026-01-01T00:00:00", "no UTC offset"),
        ("946684799", "before 946684800 s"),  # one second before 2000-01-01
        ("1999-12-31T23:59:59Z", "before"),
        ("2026-01-01T00:06:01+00:00", r"301\.0 s after receipt, more than the 300 s"),
        ("1767225900000", "after receipt"),  # milliseconds mistaken for seconds
    ],
)
def test_instrument_time_refuses_bad_or_absurd_stamps(text: str, reason: str) -> None:
    with pytest.raises(FrameError, match=reason):
        instrument_time({"t": text}, TIMED, RECEIVED)


def test_instrument_time_window_is_a_parameter() -> None:
    fields = {"t": str(RECEIVED + 10.0)}
    assert instrument_time(fields, TIMED, RECEIVED) == RECEIVED + 10.0
    with pytest.raises(FrameError, match="more than the 5 s allowed"):
        instrument_time(fields, TIMED, RECEIVED, max_ahead_s=5.0)


def test_instrument_time_missing_field_and_no_time_field() -> None:
    with pytest.raises(FrameError, match="time field 't' is missing"):
        instrument_time({"water_c": "20"}, TIMED, RECEIVED)
    assert instrument_time({"t": "garbage"}, KV, RECEIVED) == RECEIVED  # stamped at receipt


# ---------------------------------------------------------------------------
# Properties over arbitrary input
# ---------------------------------------------------------------------------


def _parse_or_error(line: bytes, spec: LineSpec) -> dict[str, str] | FrameError:
    """Return the parsed fields, or the FrameError (any other exception propagates)."""
    try:
        return parse_line(line, spec)
    except FrameError as exc:
        return exc


def _reference_frames(data: bytes, limit: int) -> tuple[list[tuple[str, bytes]], bytes]:
    """Frame the whole stream at once, the obvious way: (items of complete lines, tail)."""
    *complete, tail = data.split(b"\n")
    out: list[tuple[str, bytes]] = []
    for seg in complete:
        if len(seg) > limit:
            out += [("error", seg[i : i + limit]) for i in range(0, len(seg), limit)]
        else:
            line = seg[:-1] if seg.endswith(b"\r") else seg
            if line:
                out.append(("line", line))
    return out, tail


chunk_cuts = st.lists(st.integers(min_value=0, max_value=400), max_size=12)
noisy_bytes = st.binary(max_size=300) | st.lists(
    st.sampled_from([b"\n", b"\r", b"\r\n", b"a=1", b"\xff", b"=", b",", b" ", b"xxxxxxxx"]),
    max_size=60,
).map(b"".join)


@HYPOTHESIS
@given(data=noisy_bytes, cuts=chunk_cuts, limit=st.integers(min_value=1, max_value=24))
def test_arbitrary_bytes_in_arbitrary_chunks(data: bytes, cuts: list[int], limit: int) -> None:
    framer = LineFramer(max_line_bytes=limit)
    chunks = _split(data, tuple(sorted(c for c in cuts if c <= len(data))))
    numbered = [pair for chunk in chunks for pair in framer.feed_numbered(chunk)]
    numbered += framer.finish()
    complete_lines = data.count(b"\n")
    items = [
        ("error", item.raw) if isinstance(item, FrameError) else ("line", item)
        for n, item in numbered
        if n <= complete_lines
    ]
    expected, tail = _reference_frames(data, limit)
    assert items == expected
    # the unfinished tail comes back whole, in order, through over-long pieces and finish()
    tail_items = [item for n, item in numbered if n > complete_lines]
    assert all(isinstance(item, FrameError) for item in tail_items)
    assert b"".join(item.raw for item in tail_items) == tail  # type: ignore[union-attr]
    # and no line parser raises anything but FrameError on any of it
    for _, item in numbered:
        raw = item.raw if isinstance(item, FrameError) else item
        for spec in (CSV, KV, REGEX):
            result = _parse_or_error(raw, spec)  # type: ignore[arg-type]
            if isinstance(result, FrameError):
                assert result.raw == raw
                assert str(result)
            else:
                assert all(isinstance(v, str) for v in result.values())


printable_line = st.text(
    alphabet=st.characters(min_codepoint=0x20, max_codepoint=0x7E), min_size=1, max_size=40
).map(str.encode)


@HYPOTHESIS
@given(
    lines=st.lists(printable_line, min_size=1, max_size=20),
    endings=st.lists(st.sampled_from([b"\n", b"\r\n"]), min_size=20, max_size=20),
    blank_after=st.lists(st.booleans(), min_size=20, max_size=20),
    cuts=chunk_cuts,
)
def test_valid_lines_survive_any_chunking(
    lines: list[bytes], endings: list[bytes], blank_after: list[bool], cuts: list[int]
) -> None:
    data = b"".join(
        line + end + (b"\r\n" if blank else b"")
        for line, end, blank in zip(lines, endings, blank_after, strict=False)
    )
    chunks = _split(data, tuple(sorted(c for c in cuts if c <= len(data))))
    framer = LineFramer(max_line_bytes=40)
    assert _items(framer, chunks) == [("line", line) for line in lines]
    assert framer.pending_bytes == 0


keys = st.text(alphabet="abcdefghij_", min_size=1, max_size=8)
values = st.floats(allow_nan=False, allow_infinity=False).map(repr)


@HYPOTHESIS
@given(fields=st.dictionaries(keys, values, min_size=1, max_size=8), cuts=chunk_cuts)
def test_keyvalue_lines_round_trip_through_framer_and_parser(
    fields: dict[str, str], cuts: list[int]
) -> None:
    line = " ".join(f"{k}={v}" for k, v in fields.items()).encode() + b"\r\n"
    csv_spec = LineSpec("csv", fields=tuple(fields))
    csv_line = ",".join(fields.values()).encode() + b"\n"
    data = line + csv_line
    framer = LineFramer()
    got = [
        item
        for chunk in _split(data, tuple(sorted(c for c in cuts if c <= len(data))))
        for item in framer.feed(chunk)
    ]
    assert len(got) == 2
    assert parse_line(got[0], KV) == fields  # type: ignore[arg-type]
    assert parse_line(got[1], csv_spec) == fields  # type: ignore[arg-type]
