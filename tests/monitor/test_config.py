"""The rig configuration: a good file loads; every kind of mistake names file, key and reason."""

from __future__ import annotations

import pytest

from drivers.errors import ConfigError
from monitor.physics.water import pressure_at_altitude_kpa
from monitor.rig.config import load_config, parse_config

GOOD = """
[site]
altitude_m = 350

[mqtt]
url = "mqtt://127.0.0.1:1883"
username_env = "RIG_USER"
password_env = "RIG_PASS"
client_id = "lab-1"

[recorder]
commit_interval_s = 0.5

[[instruments]]
url = "serial:///dev/ttyUSB0?baud=9600"
framing = "keyvalue"
time_field = "t"

[[instruments]]
url = "modbus+tcp://127.0.0.1:5020?unit=1"
poll_s = 1.0
power_from_energy = "energy"
registers = [
  { name = "power", address = 0, type = "float32", unit = "W" },
  { name = "energy", address = 2, type = "uint32", scale = 0.01, unit = "Wh" },
]

[[vessels]]
id = "urn-3"
vessel_heat_capacity_j_per_k = 1800
target_c = 95
rated_power_w = 3000

[[vessels.channels]]
instrument = "serial:///dev/ttyUSB0?baud=9600"
field = "ch1"
role = "water"
unit = "mV"
thermocouple = "K"
cold_junction = "cj"
offset = -0.2

[[vessels.channels]]
instrument = "serial:///dev/ttyUSB0?baud=9600"
field = "amb"
role = "ambient"
unit = "degC"

[[vessels.channels]]
instrument = "modbus+tcp://127.0.0.1:5020?unit=1"
field = "energy"
role = "energy"
unit = "Wh"

[[vessels]]
id = "heater-7"
vessel_heat_capacity_j_per_k = 9000
element_sensor = true
"""

ENV = {"RIG_USER": "operator", "RIG_PASS": "s3cret"}


def test_a_good_configuration_loads_with_everything_in_place(tmp_path) -> None:
    path = tmp_path / "rig.toml"
    path.write_text(GOOD, encoding="utf-8")
    cfg = load_config(path, ENV)
    # ICAO Doc 7488 / ISO 2533 standard atmosphere, computed by monitor.physics.water
    assert cfg.pressure_kpa == pytest.approx(pressure_at_altitude_kpa(350.0))
    assert cfg.mqtt is not None
    assert (cfg.mqtt.username, cfg.mqtt.password) == ("operator", "s3cret")
    assert cfg.mqtt.prefix == "ebullio"
    assert "s3cret" not in repr(cfg.mqtt)
    assert cfg.commit_interval_s == 0.5
    assert cfg.estimate_interval_s == 0.0  # every estimate recorded unless asked
    fewer = parse_config(_with("commit_interval_s = 0.5", "estimate_interval_s = 30"),
                         "rig.toml", ENV)  # fmt: skip
    assert fewer.estimate_interval_s == 30.0
    urn, heater = cfg.vessels
    assert urn.metadata["target_c"] == 95.0
    assert urn.metadata["element_sensor"] == "no"
    assert not urn.via_mqtt
    assert heater.via_mqtt
    assert heater.has_element_sensor
    serial, meter = cfg.instruments
    assert [b.role for b in serial.bindings] == ["water", "ambient"]
    assert [b.role for b in meter.bindings] == ["energy"]
    assert (serial.kind, meter.kind) == ("serial", "modbus")
    assert meter.options["derive_power_from"] == "energy"
    assert serial.bindings[0].offset == -0.2


def _with(old: str, new: str) -> str:
    assert old in GOOD
    return GOOD.replace(old, new, 1)


@pytest.mark.parametrize(
    ("text", "needle"),
    [
        ("[site\n", "not valid TOML"),
        (_with("altitude_m = 350", "altitude_m = 350\npressure_kpa = 97"), "site.altitude_m"),
        (_with("altitude_m = 350", "altitude_m = 'high'"), "site.altitude_m: must be a number"),
        (_with("[site]", "[site]\ncolour = 'red'"), "site.colour: unknown key"),
        (_with('url = "mqtt://127.0.0.1:1883"', 'url = "http://127.0.0.1"'), "mqtt.url"),
        (
            _with('url = "mqtt://127.0.0.1:1883"', 'url = "mqtt://u:p@127.0.0.1"'),
            "no credentials in the URL",
        ),
        (
            _with('password_env = "RIG_PASS"', 'password_env = "NOT_SET_ANYWHERE"'),
            "mqtt.password_env: the environment variable 'NOT_SET_ANYWHERE' is not set",
        ),
        (_with('framing = "keyvalue"', 'framing = "xml"'), "instruments[0].framing"),
        (
            _with('url = "serial:///dev/ttyUSB0?baud=9600"\nframing', 'url = "gpib://3"\nframing'),
            "no instrument driver",
        ),
        (_with('id = "urn-3"', 'id = "urn/3"'), "vessels[0].id"),
        (
            _with("vessel_heat_capacity_j_per_k = 1800\n", ""),
            "vessels[0].vessel_heat_capacity_j_per_k: is required",
        ),
        (_with("target_c = 95", "target_c = 950"), "vessels[0].target_c"),
        (_with('role = "water"', 'role = "colour"'), "vessels[0].channels[0]: channel"),
        (_with('thermocouple = "K"', 'thermocouple = "Q"'), "vessels[0].channels[0]"),
        (
            _with(
                'instrument = "modbus+tcp://127.0.0.1:5020?unit=1"\nfield',
                'instrument = "modbus+tcp://127.0.0.2?unit=1"\nfield',
            ),
            "channels[2].instrument",
        ),
        (_with('field = "energy"', 'field = "watts"'), "register 'watts'"),
        (
            _with('power_from_energy = "energy"', 'power_from_energy = "joules"'),
            "instruments[1].power_from_energy: 'joules' is not one of the registers",
        ),
        (
            _with('unit = "W" },', 'unit = "W", colour = "red" },'),
            "instruments[1].registers[0].colour: unknown key",
        ),
        (
            # found when the meter's driver is built at load (issue 15): before, the
            # file loaded and `ebullio run` stopped when it opened the meter
            _with(
                'field = "energy"\nrole = "energy"\nunit = "Wh"',
                'field = "power"\nrole = "power"\nunit = "W"',
            ),
            "derive_power_from register 'energy' is bound to no vessel",
        ),
        (
            _with('framing = "keyvalue"', 'framing = "csv"'),
            "instruments[0]: csv framing needs fields",
        ),
        (_with("element_sensor = true", "element_sensor = 1"), "vessels[1].element_sensor"),
        (
            _with("commit_interval_s = 0.5", "commit_interval_s = 0.5\nestimate_interval_s = -1"),
            "recorder.estimate_interval_s",
        ),
    ],
)
def test_mistakes_name_file_key_and_reason(text: str, needle: str) -> None:
    with pytest.raises(ConfigError) as caught:
        parse_config(text, "rig.toml", ENV)
    message = str(caught.value)
    assert message.startswith("rig.toml")
    assert needle in message


def test_a_vessel_without_channels_needs_a_broker() -> None:
    text = """
[[vessels]]
id = "k1"
vessel_heat_capacity_j_per_k = 300
"""
    with pytest.raises(ConfigError, match=r"vessels\[0\]\.channels: .*needs an \[mqtt\] broker"):
        parse_config(text, "rig.toml", {})


def test_an_instrument_feeding_no_vessel_is_a_mistake() -> None:
    text = _with(
        "[[vessels]]",
        '[[instruments]]\nurl = "serial:///dev/ttyS9"\nframing = "csv"\n'
        'fields = ["a"]\n\n[[vessels]]',
    )
    with pytest.raises(ConfigError, match="'serial:///dev/ttyS9' feeds no vessel channel"):
        parse_config(text, "rig.toml", ENV)


def test_a_missing_file_is_a_config_error(tmp_path) -> None:
    with pytest.raises(ConfigError, match="cannot read the configuration"):
        load_config(tmp_path / "nope.toml", {})


def test_the_example_in_the_module_docstring_is_a_valid_configuration() -> None:
    import textwrap

    import monitor.rig.config

    doc = monitor.rig.config.__doc__ or ""
    example = doc[doc.index("[site]") - 4 : doc.index("A vessel's metadata")]
    cfg = parse_config(
        textwrap.dedent(example),
        "docstring",
        {
            "EBULLIO_MQTT_USER": "u",
            "EBULLIO_MQTT_PASSWORD": "p",
            "EBULLIO_LOG_KEY": "s3cret-for-test",
        },
    )
    assert [v.id for v in cfg.vessels] == ["urn-3", "heater-7"]
    assert cfg.log_key == b"s3cret-for-test"
    assert "s3cret" not in repr(cfg)  # the key is never printed
