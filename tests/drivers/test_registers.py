"""Tests of the register table: encode/decode, read planning and power from energy."""

from __future__ import annotations

import math
import struct

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from drivers.errors import ConfigError, FrameError
from drivers.registers import (
    MAX_READ_COUNT,
    EnergyToPower,
    RegisterRead,
    RegisterSpec,
    check_register_map,
    counter_modulus,
    decode,
    encode,
    integer_range,
    read_plan,
    words_for,
    words_to_bytes,
)


def spec(type_: str, *, word_order: str = "big", scale: float = 1.0, address: int = 0, **kw):
    return RegisterSpec(
        name=kw.pop("name", "x"),
        address=address,
        type=type_,
        unit=kw.pop("unit", "W"),
        word_order=word_order,
        scale=scale,
        **kw,
    )


# (type, word order, scale, words on the wire, value)
WORD_TABLE = [
    # two's complement, 16 bit (common practice, no source)
    ("int16", "big", 1.0, [0x0000], 0.0),
    ("int16", "big", 1.0, [0x7FFF], 32767.0),
    ("int16", "big", 1.0, [0xFFFF], -1.0),
    ("int16", "big", 1.0, [0x8000], -32768.0),
    ("int16", "big", 0.1, [0xFF9C], -10.0),  # -100 counts of 0.1 (common practice, no source)
    ("uint16", "big", 1.0, [0xFFFF], 65535.0),
    ("uint16", "big", 0.1, [2301], 230.1),  # 2301 counts of 0.1 V
    # word order only matters for 32-bit types; "little" is ignored for one word
    ("uint16", "little", 1.0, [0x1234], 4660.0),
    # 32-bit integers; 123456789 = 0x075BCD15 (computed with struct.pack('>i', ...))
    ("int32", "big", 1.0, [0x075B, 0xCD15], 123456789.0),
    ("int32", "little", 1.0, [0xCD15, 0x075B], 123456789.0),
    ("int32", "big", 1.0, [0xFFFF, 0xFFFE], -2.0),  # two's complement (common practice)
    ("int32", "little", 1.0, [0xFFFE, 0xFFFF], -2.0),
    ("int32", "big", 0.001, [0xFFFF, 0xDE09], -8.695),  # -8695 mA = 0xFFFFDE09 (struct)
    ("uint32", "big", 1.0, [0x0001, 0x0000], 65536.0),
    ("uint32", "little", 1.0, [0x0000, 0x0001], 65536.0),
    ("uint32", "big", 1.0, [0xFFFF, 0xFFFF], 4294967295.0),
    ("uint32", "big", 0.01, [0x0000, 0x04D2], 12.34),  # 1234 counts of 0.01 Wh
    # IEEE-754 binary32 (common practice, no source)
    ("float32", "big", 1.0, [0x3F80, 0x0000], 1.0),
    ("float32", "big", 1.0, [0xC000, 0x0000], -2.0),
    ("float32", "little", 1.0, [0x0000, 0x3F80], 1.0),
    ("float32", "big", 1.0, [0x44FA, 0x1000], 2000.5),  # struct.pack('>f', 2000.5)
    ("float32", "little", 1.0, [0x1000, 0x44FA], 2000.5),
    ("float32", "big", 1000.0, [0x4000, 0x0000], 2000.0),  # 2.0 kW with scale 1000 -> W
]


@pytest.mark.parametrize(("type_", "order", "scale", "words", "value"), WORD_TABLE)
def test_decode_table(type_, order, scale, words, value):
    assert decode(words, spec(type_, word_order=order, scale=scale)) == pytest.approx(
        value, rel=1e-12, abs=1e-12
    )


@pytest.mark.parametrize(("type_", "order", "scale", "words", "value"), WORD_TABLE)
def test_encode_table(type_, order, scale, words, value):
    assert encode(value, spec(type_, word_order=order, scale=scale)) == words


def test_decoded_float32_is_the_struct_value():
    # 230.1 is not exact in binary32: the decoder must give the float32 value, not 230.1
    (expected,) = struct.unpack(">f", struct.pack(">f", 230.1))
    assert decode(encode(230.1, spec("float32")), spec("float32")) == expected
    assert expected != 230.1


@pytest.mark.parametrize(
    ("words", "match"),
    [
        ([0x3F80], r"needs 2 word\(s\), got 1"),
        ([0x3F80, 0, 0], r"needs 2 word\(s\), got 3"),
        ([0x1_0000, 0], "not a 16-bit word"),
        ([-1, 0], "not a 16-bit word"),
        ([0x7FC0, 0x0000], "not a finite number"),  # quiet NaN (struct.pack('>f', nan))
        ([0x7F80, 0x0000], "not a finite number"),  # +infinity (IEEE-754, common practice)
    ],
)
def test_decode_refuses_bad_words_and_keeps_them(words, match):
    s = spec("float32", name="power", address=10)
    with pytest.raises(FrameError, match=match) as info:
        decode(words, s)
    assert "register 'power'@10" in str(info.value)
    assert info.value.raw == words_to_bytes(words)


def test_words_to_bytes_is_big_endian_per_word():
    assert words_to_bytes([0x44FA, 0x1000]) == b"\x44\xfa\x10\x00"
    assert words_to_bytes([]) == b""


@pytest.mark.parametrize(
    ("type_", "scale", "value", "match"),
    [
        ("int16", 1.0, 32768.0, "outside int16"),
        ("int16", 0.1, -3276.9, "outside int16"),
        ("uint16", 1.0, -1.0, "outside uint16"),
        ("uint32", 0.01, 42949672.96, "outside uint32"),
        ("float32", 1.0, 1e39, "overflows a float32"),
        ("float32", 1.0, math.nan, "finite number is needed"),
        ("int32", 1.0, math.inf, "finite number is needed"),
    ],
)
def test_encode_refuses_values_the_register_cannot_hold(type_, scale, value, match):
    with pytest.raises(ConfigError, match=match):
        encode(value, spec(type_, scale=scale))


def test_encode_rounds_to_the_nearest_count():
    s = spec("uint16", scale=0.1, unit="V")
    assert encode(230.14, s) == [2301]
    assert encode(230.16, s) == [2302]


@pytest.mark.parametrize(
    ("fields", "match"),
    [
        ({"type": "int64"}, "unknown type 'int64'; known types: int16, uint16"),
        ({"address": -1}, "outside 0..65535"),
        ({"address": 65535, "type": "uint32"}, "outside 0..65535"),
        ({"address": 1.5}, "address must be an integer"),
        ({"word_order": "middle"}, "word_order 'middle'"),
        ({"scale": 0.0}, "scale must be a finite, non-zero number"),
        ({"scale": math.nan}, "scale must be a finite, non-zero number"),
        ({"unit": "kW"}, "unit 'kW' is not a sample unit; use one of"),
        ({"table": "coil"}, "table 'coil' must be one of holding, input"),
    ],
)
def test_register_spec_validation_names_register_and_reason(fields, match):
    base = {"name": "power", "address": 0, "type": "float32", "unit": "W"}
    with pytest.raises(ConfigError, match="register 'power'") as info:
        RegisterSpec(**(base | fields))
    assert info.match(match)


def test_register_spec_needs_a_name():
    with pytest.raises(ConfigError, match="name must be a non-empty text"):
        RegisterSpec(name=" ", address=3, type="uint16", unit="V")


def test_register_map_needs_unique_names_and_an_entry():
    with pytest.raises(ConfigError, match="at least one register"):
        check_register_map([])
    with pytest.raises(ConfigError, match="'x' is defined twice"):
        check_register_map([spec("uint16"), spec("uint16", address=5)])


def test_integer_range_and_counter_modulus():
    assert integer_range(spec("int16")) == (-32768, 32767)  # two's complement (common practice)
    assert integer_range(spec("uint32")) == (0, 2**32 - 1)
    with pytest.raises(ConfigError, match="no integer range"):
        integer_range(spec("float32"))
    assert counter_modulus(spec("uint32", scale=0.01, unit="Wh")) == pytest.approx(42949672.96)
    assert counter_modulus(spec("uint16", unit="Wh")) == 65536.0
    assert counter_modulus(spec("float32", unit="Wh")) is None


# --- read planning ------------------------------------------------------------------


def test_read_plan_merges_contiguous_registers_into_one_read():
    specs = [
        spec("float32", name="p", address=0),
        spec("uint32", name="e", address=2, unit="Wh"),
        spec("uint16", name="v", address=4, unit="V"),
        spec("int32", name="i", address=5, unit="A"),
    ]
    assert read_plan(specs) == [RegisterRead("holding", 0, 7)]


def test_read_plan_splits_at_gaps_and_tables_and_sorts():
    specs = [
        spec("uint16", name="c", address=20, unit="V"),
        spec("float32", name="a", address=0),
        spec("uint16", name="b", address=3, unit="V"),  # gap at address 2
        spec("float32", name="d", address=0, table="input"),
        spec("float32", name="e", address=2, table="input"),
    ]
    assert read_plan(specs) == [
        RegisterRead("holding", 0, 2),
        RegisterRead("holding", 3, 1),
        RegisterRead("holding", 20, 1),
        RegisterRead("input", 0, 4),
    ]


def test_read_plan_merges_overlapping_views_of_the_same_words():
    specs = [spec("uint32", name="whole", address=10), spec("uint16", name="high", address=10)]
    assert read_plan(specs) == [RegisterRead("holding", 10, 2)]


def test_read_plan_caps_each_read_at_125_registers():
    specs = [spec("float32", name=f"f{i}", address=2 * i) for i in range(70)]  # 140 words
    plan = read_plan(specs)
    assert plan == [RegisterRead("holding", 0, 124), RegisterRead("holding", 124, 16)]
    assert all(r.count <= MAX_READ_COUNT for r in plan)
    covered = {a for r in plan for a in range(r.start, r.start + r.count)}
    assert covered == set(range(140))


def test_read_plan_accepts_a_generator_and_an_empty_map():
    assert read_plan(spec("uint16", name=f"r{i}", address=i) for i in range(3)) == [
        RegisterRead("holding", 0, 3)
    ]
    assert read_plan([]) == []


def test_words_for_slices_a_register_out_of_a_read():
    read = RegisterRead("holding", 0, 7)
    answer = [0x44FA, 0x1000, 0, 1234, 2301, 0xDE09, 0xFFFF]
    assert words_for(spec("int32", address=5, unit="A"), read, answer) == [0xDE09, 0xFFFF]
    with pytest.raises(FrameError, match="answer holds 4 word"):
        words_for(spec("uint16", address=4, unit="V"), read, answer[:4])
    with pytest.raises(FrameError, match="not inside the read"):
        words_for(spec("uint16", address=9, unit="V"), read, answer)


# --- power from the energy counter ------------------------------------------------


def test_energy_to_power_constant_power():
    conv = EnergyToPower()
    first = conv.update(0.0, 100.0)
    assert first.power_w is None
    assert "first" in first.reason
    # 0.5 Wh in 1 s = 1800 W (1 Wh = 3600 J)
    step = conv.update(1.0, 100.5)
    assert step.power_w == pytest.approx(1800.0)
    assert step.interval_s == 1.0
    assert not step.wrapped
    assert conv.update(3.0, 100.5).power_w == 0.0  # no increase: 0 W


def test_energy_to_power_across_a_roll_over():
    modulus = counter_modulus(spec("uint16", unit="Wh"))  # 65536 Wh
    conv = EnergyToPower(modulus_wh=modulus)
    conv.update(0.0, 65535.5)
    step = conv.update(3.6, 0.5)  # 1 Wh across the wrap in 3.6 s = 1000 W
    assert step.wrapped
    assert step.power_w == pytest.approx(1000.0)


def test_energy_to_power_refuses_a_reset_and_recovers():
    conv = EnergyToPower(modulus_wh=counter_modulus(spec("uint32", scale=0.01, unit="Wh")))
    conv.update(0.0, 5000.0)
    step = conv.update(1.0, 10.0)  # counter cleared: a wrap would mean ~1.5e11 W
    assert step.power_w is None
    assert "reset" in step.reason
    assert conv.update(2.0, 10.5).power_w == pytest.approx(1800.0)  # new baseline


def test_energy_to_power_refuses_a_fall_without_modulus():
    conv = EnergyToPower()
    conv.update(0.0, 50.0)
    step = conv.update(1.0, 49.0)
    assert step.power_w is None
    assert "fell by 1 Wh" in step.reason


def test_energy_to_power_refuses_an_implausible_jump():
    conv = EnergyToPower(max_power_w=10_000.0)
    conv.update(0.0, 0.0)
    step = conv.update(1.0, 100.0)  # 360 kW
    assert step.power_w is None
    assert "above max_power_w" in step.reason
    assert conv.update(2.0, 100.5).power_w == pytest.approx(1800.0)


def test_energy_to_power_needs_time_to_advance():
    conv = EnergyToPower()
    conv.update(10.0, 1.0)
    step = conv.update(10.0, 1.5)
    assert step.power_w is None
    assert "did not advance" in step.reason
    # the older baseline (t=10 s, 1.0 Wh) is kept: 0.5 Wh more in 1 s is 1800 W
    assert conv.update(11.0, 1.5).power_w == pytest.approx(1800.0)


def test_energy_to_power_options_are_checked():
    with pytest.raises(ConfigError, match="modulus_wh"):
        EnergyToPower(modulus_wh=0.0)
    with pytest.raises(ConfigError, match="max_power_w"):
        EnergyToPower(max_power_w=-1.0)


@settings(max_examples=200, deadline=None, derandomize=True)
@given(
    st.lists(
        st.tuples(
            st.floats(min_value=-5.0, max_value=100.0),
            st.floats(min_value=0.0, max_value=65535.99),
        ),
        max_size=30,
    )
)
def test_energy_to_power_is_never_negative(readings):
    conv = EnergyToPower(modulus_wh=65536.0)
    for t_s, e_wh in readings:
        step = conv.update(t_s, e_wh)
        assert step.power_w is None or step.power_w >= 0.0
        assert step.power_w is not None or step.reason


# --- round trips ------------------------------------------------------------------

_SCALES = st.sampled_from([1.0, 0.1, 0.01, 0.001, 10.0])
_ORDERS = st.sampled_from(["big", "little"])


@pytest.mark.parametrize("type_", ["int16", "uint16", "int32", "uint32"])
@settings(max_examples=150, deadline=None, derandomize=True)
@given(data=st.data(), order=_ORDERS, scale=_SCALES)
def test_integer_round_trip(type_, data, order, scale):
    s = spec(type_, word_order=order, scale=scale)
    lo, hi = integer_range(s)
    count = data.draw(st.integers(min_value=lo, max_value=hi))
    value = count * scale
    words = encode(value, s)
    assert len(words) == s.words
    assert decode(words, s) == pytest.approx(value, rel=1e-12, abs=1e-12)
    assert encode(decode(words, s), s) == words


@settings(max_examples=300, deadline=None, derandomize=True)
@given(
    value=st.floats(width=32, allow_nan=False, allow_infinity=False),
    order=_ORDERS,
)
def test_float32_round_trip(value, order):
    s = spec("float32", word_order=order)
    assert decode(encode(value, s), s) == value


@pytest.mark.parametrize("type_", ["int16", "uint16", "int32", "uint32", "float32"])
@settings(max_examples=150, deadline=None, derandomize=True)
@given(data=st.data(), order=_ORDERS)
def test_words_round_trip(type_, data, order):
    s = spec(type_, word_order=order)
    words = data.draw(st.lists(st.integers(0, 0xFFFF), min_size=s.words, max_size=s.words))
    try:
        value = decode(words, s)
    except FrameError:
        assert type_ == "float32"  # only NaN and infinity are refused
        (raw,) = struct.unpack(">f", words_to_bytes(words if order == "big" else words[::-1]))
        assert not math.isfinite(raw)
        return
    assert encode(value, s) == words
