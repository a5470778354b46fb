"""The pack codec (schema 2's readings): exact round trips, its sizes, and bad bytes."""

from __future__ import annotations

import contextlib
import math
import struct

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.records.packs import MAX_SAMPLES, Pack, decode_pack, encode_pack, pack_tail

T0 = 1_767_225_600.0  # an arbitrary Unix time (2026), common practice, no source


def exact(x: float) -> str:
    """A float's IEEE bytes, every NaN alike (NaN has no single bit pattern to keep)."""
    return "nan" if math.isnan(x) else struct.pack(">d", x).hex()


def round_trip(columns: tuple[list, ...]) -> Pack:
    data = encode_pack(*columns)
    pack = decode_pack(data, len(columns[0]))
    assert pack.positions == columns[0]
    assert [exact(t) for t in pack.times] == [exact(t) for t in columns[1]]
    assert (pack.series, pack.qualities) == (columns[2], columns[3])
    assert [exact(v) for v in pack.values] == [exact(v) for v in columns[4]]
    assert pack_tail(data) == (columns[0][-1], columns[1][-1])
    return pack


ANY_FLOAT = st.floats(allow_nan=True, allow_infinity=True)


@st.composite
def packs(draw, values=ANY_FLOAT):
    n = draw(st.integers(1, 300))
    gaps = draw(st.lists(st.integers(1, 70_000), min_size=n, max_size=n))
    positions = [sum(gaps[: i + 1]) - gaps[0] + draw(st.integers(0, 3)) for i in range(n)]
    positions = sorted(set(positions))
    n = len(positions)
    times = draw(st.lists(st.sampled_from([T0, T0 + 0.25, T0 + 1.0, -5.0, 1e-300]),
                          min_size=n, max_size=n))  # fmt: skip
    series = draw(st.lists(st.integers(1, 2**32 - 1) | st.integers(1, 9), min_size=n, max_size=n))
    qualities = draw(st.lists(st.integers(0, 2), min_size=n, max_size=n))
    return positions, times, series, qualities, draw(st.lists(values, min_size=n, max_size=n))


@settings(max_examples=150, deadline=None, derandomize=True)
@given(packs())
def test_any_pack_round_trips_bit_for_bit(columns) -> None:
    round_trip(columns)


decimal_values = st.builds(round, st.floats(-5000.0, 5000.0), st.integers(0, 4))


@settings(max_examples=150, deadline=None, derandomize=True)
@given(packs(values=decimal_values | st.just(math.nan) | st.just(-0.0)))
def test_decimal_readings_round_trip_bit_for_bit(columns) -> None:
    round_trip(columns)


def test_decimal_readings_take_two_or_four_bytes_and_noise_eight() -> None:
    # one instant of five channels, as an instrument writes them
    columns = ([0, 1, 2, 3, 4], [T0] * 5, [1, 2, 3, 4, 5], [0] * 5)
    small = encode_pack(*columns, [23.45, 22.1, 19.87, -3.5, 99.99])  # two decimals: i16
    medium = encode_pack(*columns, [23.45, 22.1, 19.87, 2013.7, 231.4])  # 201370: i32
    noise = encode_pack(*columns, [23.450000000000003, 22.1, 19.87, 2013.7, 231.4])
    header = 1 + 5 + 4 + 8 + 2 + 10  # flags, counts, a run, a time, its count, series
    assert (len(small), len(medium), len(noise)) == (header + 10, header + 20, header + 40)
    round_trip((*columns, [23.450000000000003, 22.1, 19.87, 2013.7, 231.4]))


def test_large_packs_are_compressed_when_it_pays() -> None:
    n = 4096
    columns = (list(range(n)), [T0 + i // 4 for i in range(n)], [1, 2, 3, 4] * (n // 4),
               [0] * n, [round(20.0 + 0.01 * (i // 4), 2) for i in range(n)])  # fmt: skip
    data = encode_pack(*columns)
    assert data[0] & 16  # the zlib flag
    assert len(data) < 4 * n
    round_trip(columns)


@pytest.mark.parametrize(
    ("columns", "why"),
    [
        (([], [], [], [], []), "1 to 65535"),
        (([0, 1], [T0], [1], [0], [1.0]), "one item per sample"),
        ((list(range(MAX_SAMPLES + 1)),) * 5, "1 to 65535"),
    ],
)
def test_a_pack_that_cannot_be_written_is_refused(columns, why) -> None:
    with pytest.raises(ValueError, match=why):
        encode_pack(*columns)


@settings(max_examples=500, deadline=None, derandomize=True)
@given(st.binary(max_size=200), st.integers(1, 40))
def test_bytes_that_are_not_a_pack_raise_value_error_only(data: bytes, n: int) -> None:
    with contextlib.suppress(ValueError):  # anything else fails the test
        decode_pack(data, n)
    with contextlib.suppress(ValueError):
        pack_tail(data)


def test_every_cut_or_extended_pack_is_refused() -> None:
    columns = ([0, 1, 2], [T0, T0, T0 + 1], [1, 2, 1], [0, 2, 0], [20.5, math.nan, 20.75])
    data = encode_pack(*columns)
    for end in range(len(data)):
        with pytest.raises(ValueError, match="pack"):
            decode_pack(data[:end], 3)
    with pytest.raises(ValueError, match="past its samples"):
        decode_pack(data + b"\0", 3)
    with pytest.raises(ValueError, match="pack"):
        decode_pack(data, 4)
