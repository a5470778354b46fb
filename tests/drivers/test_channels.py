"""Channel bindings: from one frame's named fields to samples, and what is refused."""

from __future__ import annotations

import math

import pytest

from drivers.channels import ChannelBinding, bind_fields, parse_number
from drivers.errors import ConfigError
from drivers.sample import Quality

T = 1_767_225_600.0


def k_water(**changes: object) -> ChannelBinding:
    options: dict[str, object] = {
        "field": "ch1", "vessel": "k1", "role": "water", "unit": "mV",
        "thermocouple": "K", "cold_junction": "cj",
    }  # fmt: skip
    options.update(changes)
    return ChannelBinding(**options)  # type: ignore[arg-type]


def test_millivolts_with_the_cold_junction_at_zero_give_the_table_temperature() -> None:
    # NIST SRD 60 type K function (NIST Monograph 175, IEC 60584-1): E(100 °C) = 4.0962 mV.
    # The conversion inverts the reference function exactly, so it lands on 100 °C (not on
    # the inverse polynomial's 99.963 °C for 4.096 mV, which carries that polynomial's own
    # error).
    samples, problems = bind_fields({"ch1": "4.0962", "cj": "0"}, [k_water()], T, "test")
    assert problems == []
    assert samples[0].value == pytest.approx(100.0, abs=0.005)
    assert samples[0].quality == Quality.OK
    assert (samples[0].t, samples[0].vessel, samples[0].channel) == (T, "k1", "water")


def test_cold_junction_compensation_adds_the_junctions_emf() -> None:
    # NIST SRD 60 type K function: E(25 °C) = 1.0002 mV, E(100 °C) = 4.0962 mV,
    # so a hot end at 100 °C with the cold end at 25 °C reads 3.0960 mV.
    samples, _ = bind_fields({"ch1": "3.0960", "cj": "25.0"}, [k_water()], T, "test")
    assert samples[0].value == pytest.approx(100.0, abs=0.02)


def test_fixed_cold_junction_and_calibration_apply_in_degrees() -> None:
    binding = k_water(cold_junction=25.0, gain=1.01, offset=-0.5)
    samples, _ = bind_fields({"ch1": "3.0960"}, [binding], T, "test")
    # calibration in °C after conversion: 1.01 * 100 - 0.5 = 100.5 (arithmetic)
    assert samples[0].value == pytest.approx(100.5, abs=0.03)


def test_open_circuit_is_a_fault_sample_not_a_number() -> None:
    samples, problems = bind_fields({"ch1": "99.0", "cj": "20"}, [k_water()], T, "test")
    assert problems == []
    assert samples[0].quality == Quality.FAULT
    assert math.isnan(samples[0].value)


def test_plain_readings_are_scaled_and_absent_fields_give_nothing() -> None:
    power = ChannelBinding("p", "k1", "power", "W", gain=2.0, offset=1.0)
    ambient = ChannelBinding("amb", "k1", "ambient", "degC")
    samples, problems = bind_fields({"p": "1000"}, [power, ambient], T, "test")
    assert problems == []
    assert [(s.channel, s.value) for s in samples] == [("power", 2001.0)]


@pytest.mark.parametrize(
    ("fields", "needle"),
    [
        ({"ch1": "abc", "cj": "20"}, "not a plain decimal number"),
        ({"ch1": "nan", "cj": "20"}, "not a plain decimal number"),
        ({"ch1": "1.0"}, "cold-junction field 'cj' is missing"),
        ({"ch1": "1.0", "cj": "inf"}, "not a plain decimal number"),
        # Python's float() takes these; an instrument's line never means them
        ({"ch1": "1_000", "cj": "20"}, "not a plain decimal number"),
        ({"ch1": "1E1_0", "cj": "20"}, "not a plain decimal number"),
        ({"ch1": "\u0661\u0662", "cj": "20"}, "not a plain decimal number"),
    ],
)
def test_unusable_fields_are_reported_for_quarantine(fields: dict, needle: str) -> None:
    samples, problems = bind_fields(fields, [k_water()], T, "test")
    assert samples == []
    assert len(problems) == 1
    assert "'ch1'" in problems[0]
    assert needle in problems[0]


@pytest.mark.parametrize(
    ("changes", "needle"),
    [
        ({"role": "colour"}, "unknown role"),
        ({"thermocouple": None}, "needs its thermocouple type"),
        ({"thermocouple": "Q"}, "Q"),
        ({"cold_junction": None}, "needs a cold_junction"),
        ({"role": "power"}, "only a temperature role"),
        ({"unit": "W"}, "does not suit the role"),
        ({"gain": 0.0}, "gain must be finite and non-zero"),
        ({"offset": math.inf}, "offset finite"),
    ],
)
def test_bad_bindings_are_refused_with_the_reason(changes: dict, needle: str) -> None:
    with pytest.raises(ConfigError, match=needle):
        k_water(**changes)


@pytest.mark.parametrize("text", ["", " ", "1,0", "0x10", True, "nan", "-inf"])
def test_parse_number_refuses_what_is_not_a_finite_number(text: object) -> None:
    with pytest.raises(ValueError, match="number"):
        parse_number(text)  # type: ignore[arg-type]


def test_parse_number_accepts_numbers_and_padded_text() -> None:
    assert parse_number(" 12.5 ") == 12.5
    assert parse_number(3) == 3.0


def test_reading_limits_know_what_no_instrument_could_give() -> None:
    from drivers.sample import ANY_FINITE, ReadingLimits

    # our own limits (judgement): 4x the rating by default, a noise band of 2 % of that
    limits = ReadingLimits.from_metadata({"rated_power_w": 2000})
    assert limits.max_power_w == 8000.0  # 4x the rating by default
    for channel, value, needle in [
        ("power", 1e200, "above the vessel's 8000 W"),
        ("power", -1e12, "below -160 W"),
        ("water", 1e308, "above any thermocouple's range"),
        ("water", -300.0, "absolute zero"),
        ("ambient", float("nan"), "not a finite number"),
        ("energy", -5.0, "outside 0 to"),
    ]:
        problem = limits.problem(channel, value)
        assert problem is not None, (channel, value)
        assert needle in problem, (channel, value, problem)
    for channel, value in [("power", 2500.0), ("power", -20.0), ("water", 99.9),
                           ("element", 650.0), ("ambient", -30.0), ("energy", 12.5)]:  # fmt: skip
        assert limits.problem(channel, value) is None, (channel, value)
    assert (
        ReadingLimits.from_metadata({"rated_power_w": 2000, "max_power_w": 20000}).problem(
            "power", 15000.0
        )
        is None
    )
    assert ReadingLimits.from_metadata({}).max_power_w == 1.0e6
    # the edges, as the rule has them (a temperature at absolute zero is none; the top
    # of the range and the bottom of the noise band are readings), and the ranges the
    # estimator checks with are that rule's. Absolute zero, -273.15 °C: the kelvin's
    # definition (common practice, no source); 1820 °C, the top of type B's range in the
    # ITS-90 thermocouple tables (from memory, as drivers/sample.py says); the power
    # limits are our own judgement (4x and 2 % of 2000 W)
    import math

    for channel, value, fine in [
        ("water", -273.15, False), ("water", math.nextafter(-273.15, 0.0), True),
        ("element", 1820.0, True), ("element", math.nextafter(1820.0, 2000.0), False),
        ("power", -160.0, True), ("power", 8000.0, True), ("power", 8000.5, False),
        ("energy", 0.0, True), ("voltage", 2000.5, False),
        ("mystery", 1e300, True), ("mystery", math.inf, False), ("mystery", -math.inf, False),
    ]:  # fmt: skip
        assert (limits.problem(channel, value) is None) is fine, (channel, value)
        lo, hi = limits.ranges.get(channel, ANY_FINITE)
        assert (lo <= value <= hi) is fine, (channel, value)
