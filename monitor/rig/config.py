"""The rig configuration: a TOML file of the site, the broker, the instruments and the vessels.

:func:`load_config` reads and checks the whole file before anything starts; every
mistake is a :class:`~drivers.errors.ConfigError` naming the file, the key (as a
dotted path such as ``vessels[2].channels[0].unit``) and the reason. Unknown keys
are mistakes too, because a misspelt key silently ignored is a setting lost.

An example, with every table::

    [site]
    altitude_m = 350                  # or pressure_kpa = 97.2

    [mqtt]                            # optional: a broker for samples in and estimates out
    url = "mqtt://127.0.0.1:1883"     # mqtt:// or mqtts://
    prefix = "ebullio"                # topics <prefix>/<vessel>/<channel>
    username_env = "EBULLIO_MQTT_USER"      # names of environment variables, never
    password_env = "EBULLIO_MQTT_PASSWORD"  # the credentials themselves
    client_id = "ebullio-lab-1"       # fixed id: a persistent session (QoS 1 kept while away)
    publish = true                    # estimates and flags back, retained
    inflight_window = 20              # the broker's max_inflight_messages (0: no limit)

    [recorder]
    commit_interval_s = 1.0           # readings are acknowledged after each commit
    key_env = "EBULLIO_LOG_KEY"       # optional: signs the chain head kept beside the log
    queue_samples = 100000            # the bounded queue between sources and consumers
    estimate_interval_s = 0.0         # an estimate row per vessel at most this often (0: all)

    [[instruments]]                   # a serial line logger
    url = "serial:///dev/ttyUSB0?baud=9600"
    framing = "keyvalue"              # csv | keyvalue | regex
    time_field = "t"                  # optional: the instrument's own time stamp

    [[instruments]]                   # a Modbus power meter
    url = "modbus+tcp://192.0.2.10:502?unit=1"
    poll_s = 1.0
    power_from_energy = "energy"      # optional: average power from an energy counter
    registers = [
      { name = "power", address = 0, type = "float32", unit = "W" },
      { name = "energy", address = 2, type = "uint32", scale = 0.01, unit = "Wh" },
    ]

    [[vessels]]
    id = "urn-3"
    vessel_heat_capacity_j_per_k = 1800
    target_c = 95                     # optional: a setpoint instead of the boiling point
    rated_power_w = 3000

    [[vessels.channels]]              # one table per channel
    instrument = "serial:///dev/ttyUSB0?baud=9600"   # an [[instruments]] url
    field = "ch1"                     # where the instrument reports it
    role = "water"                    # water, element, ambient, power, energy, ...
    unit = "mV"                       # the role's unit, or mV for a raw thermocouple
    thermocouple = "K"
    cold_junction = "cj"              # a field of the same frame, or a fixed °C
    offset = -0.2                     # calibration, in °C for a thermocouple
    gain = 1.0

    [[vessels.channels]]
    instrument = "modbus+tcp://192.0.2.10:502?unit=1"
    field = "energy"                  # a register name: the counter, from which
    role = "energy"                   # power_from_energy gives this vessel its power
    unit = "Wh"

    [[vessels]]
    id = "heater-7"                   # no channels: it publishes on MQTT itself
    vessel_heat_capacity_j_per_k = 9000
    element_sensor = false            # whether its messages carry an element temperature

    [vessels.metadata]                # optional: more `key: value` lines for the log
    site_note = "plant room B"

A vessel's metadata (what a replay needs: heat capacity, target, site pressure,
sensor time constants) is recorded in the log with its samples.
"""

from __future__ import annotations

import os
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from drivers import registry
from drivers.channels import ChannelBinding
from drivers.config_table import ConfigTable
from drivers.errors import ConfigError, EbullioError
from monitor.physics import water

#: Vessel keys that go to the estimator and the log's metadata as numbers.
VESSEL_NUMBERS = (
    "vessel_heat_capacity_j_per_k",
    "element_heat_capacity_j_per_k",
    "rated_power_w",
    "max_power_w",
    "nominal_volume_l",
    "target_c",
    "water_sensor_tau_s",
    "element_sensor_tau_s",
)


def toml_value(value: object) -> str:
    """Return a string or a number written as a TOML value (a number as a float)."""
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    return repr(float(value))  # type: ignore[arg-type]


def vessel_table(
    vessel: str, metadata: Mapping[str, object], element_sensor: bool | None = None
) -> list[str]:
    """Return one ``[[vessels]]`` table as TOML lines: the id, ``element_sensor`` when
    given, the numbers a vessel takes as keys of its own (:data:`VESSEL_NUMBERS`), and the
    rest of ``metadata`` under ``[vessels.metadata]`` (the site's pressure and altitude
    and the vessel's own name left out: they have places of their own). The vessel's
    ``[[vessels.channels]]`` tables may follow."""
    lines = ["[[vessels]]", f"id = {toml_value(vessel)}"]
    if element_sensor is not None:
        lines.append(f"element_sensor = {'true' if element_sensor else 'false'}")
    lines += [f"{k} = {toml_value(metadata[k])}" for k in VESSEL_NUMBERS if k in metadata]
    own = {*VESSEL_NUMBERS, "vessel", "pressure_kpa", "altitude_m"}
    lines += ["", "[vessels.metadata]"]
    lines += [f"{k} = {toml_value(v)}" for k, v in metadata.items() if k not in own]
    return [*lines, ""]


@dataclass(frozen=True)
class MqttSettings:
    """The broker: where, the topic prefix, credentials (from the environment), session."""

    url: str
    prefix: str = "ebullio"
    username: str | None = None
    password: str | None = field(default=None, repr=False)
    client_id: str | None = None
    publish: bool = True
    session_expiry_s: float = 3600.0
    #: the broker's limit of unacknowledged QoS 1 messages to one client (Mosquitto's
    #: ``max_inflight_messages``, 20 unless raised; 0: no limit). Readings are
    #: acknowledged only once committed, so the recorder commits early when half this
    #: many wait: the broker would otherwise stop sending until the next commit.
    inflight_window: int = 20


@dataclass(frozen=True)
class Instrument:
    """One instrument: its URL, its kind, the driver options and the channels read from it.

    ``kind`` names the driver that reads the URL (``drivers.registry``: ``serial``,
    ``modbus``); ``options`` are that driver's keyword options as its ``read_table``
    gave them. The driver is ``drivers.registry.open_source(url, bindings=bindings,
    clock=..., **options)``.
    """

    url: str
    kind: str
    options: dict[str, Any]
    bindings: tuple[ChannelBinding, ...] = ()


@dataclass(frozen=True)
class VesselSpec:
    """One vessel: id, the metadata its estimator and log need, and where its data comes from."""

    id: str
    metadata: dict[str, str | float]
    has_element_sensor: bool
    via_mqtt: bool


@dataclass(frozen=True)
class RigConfig:
    """A checked rig configuration (see the module docstring)."""

    path: str
    text: str
    pressure_kpa: float
    mqtt: MqttSettings | None
    instruments: tuple[Instrument, ...]
    vessels: tuple[VesselSpec, ...]
    commit_interval_s: float = 1.0
    queue_samples: int = 100_000
    #: record a vessel's estimate at most this often, besides each change of its phase
    #: or flags (``[recorder] estimate_interval_s``; 0: every estimate)
    estimate_interval_s: float = 0.0
    #: signs the log's chain head (HMAC-SHA-256), from ``[recorder] key_env``; never logged
    log_key: bytes | None = field(default=None, repr=False)


def load_config(path: str | Path, environ: Mapping[str, str] | None = None) -> RigConfig:
    """Return the checked configuration in the TOML file at ``path``.

    ``environ`` (default ``os.environ``) supplies the MQTT credentials named in the
    file. Raises :class:`ConfigError` naming the file, the key and the reason.
    """
    file = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{file}: cannot read the configuration: {exc}") from None
    return parse_config(text, file, os.environ if environ is None else environ)


def parse_config(text: str, file: str, environ: Mapping[str, str]) -> RigConfig:
    """Return the checked configuration in TOML ``text`` (``file`` names it in errors)."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{file}: not valid TOML: {exc}") from None
    top = ConfigTable(data, "", file)
    pressure_kpa = _site(top.table("site"))
    mqtt = _mqtt(top.table("mqtt"), environ)
    recorder = top.table("recorder")
    commit_interval_s, queue_samples, estimate_interval_s = 1.0, 100_000, 0.0
    log_key: bytes | None = None
    if recorder is not None:
        commit_interval_s = recorder.number("commit_interval_s", 1.0, lo=0.05, hi=60.0)
        queue_samples = int(recorder.number("queue_samples", 100_000, lo=100, hi=1e8))
        estimate_interval_s = recorder.number("estimate_interval_s", 0.0, lo=0.0, hi=3600.0)
        key_env = recorder.string("key_env")
        if key_env is not None:
            if not environ.get(key_env):
                raise recorder.fail("key_env", f"the environment variable {key_env!r} is not set")
            log_key = environ[key_env].encode("utf-8")
        recorder.done()
    instruments = {}
    for table in top.tables("instruments"):
        inst = _instrument(table)
        if inst.url in instruments:
            raise table.fail("url", f"instrument {inst.url!r} is listed twice")
        instruments[inst.url] = inst
    vessels: list[VesselSpec] = []
    bindings: dict[str, list[ChannelBinding]] = {url: [] for url in instruments}
    for table in top.tables("vessels"):
        spec, channels = _vessel(table, pressure_kpa, instruments, mqtt is not None)
        if any(v.id == spec.id for v in vessels):
            raise table.fail("id", f"vessel {spec.id!r} is listed twice")
        vessels.append(spec)
        for url, binding in channels:
            bindings[url].append(binding)
    top.done()
    if not vessels:
        raise ConfigError(f"{file}: vessels: at least one [[vessels]] table is needed")
    unused = [url for url, b in bindings.items() if not b]
    if unused:
        raise ConfigError(f"{file}: instruments: {unused[0]!r} feeds no vessel channel")
    built = tuple(
        Instrument(i.url, i.kind, i.options, tuple(bindings[i.url])) for i in instruments.values()
    )
    for inst in built:
        _check_driver_options(inst, file)
    return RigConfig(
        path=file,
        text=text,
        pressure_kpa=pressure_kpa,
        mqtt=mqtt,
        instruments=built,
        vessels=tuple(vessels),
        commit_interval_s=commit_interval_s,
        queue_samples=queue_samples,
        estimate_interval_s=estimate_interval_s,
        log_key=log_key,
    )


def _site(site: ConfigTable | None) -> float:
    if site is None:
        return 101.325
    if site.has("pressure_kpa") and site.has("altitude_m"):
        raise site.fail("altitude_m", "give pressure_kpa or altitude_m, not both")
    pressure = site.number("pressure_kpa", lo=water.P_MIN_KPA, hi=water.P_MAX_KPA)
    altitude = site.number("altitude_m", lo=-500.0, hi=8000.0)
    site.done()
    if pressure is not None:
        return pressure
    return water.pressure_at_altitude_kpa(altitude) if altitude is not None else 101.325


def _mqtt(table: ConfigTable | None, environ: Mapping[str, str]) -> MqttSettings | None:
    if table is None:
        return None
    url = table.string("url", required=True)
    parts = urlsplit(url)
    if _kind_of(url, registry.MQTT) is None or not parts.hostname:
        shown = " or ".join(f"{s}://" for s in _schemes(registry.MQTT))
        raise table.fail("url", f"{url!r} is not an {shown} URL with a host")
    if parts.username or parts.password:
        raise table.fail("url", "put no credentials in the URL; name them with username_env")
    prefix = table.string("prefix", "ebullio")
    if "/" in prefix.strip("/") or any(c in prefix for c in "+#"):
        raise table.fail("prefix", f"{prefix!r} must be one topic level without + or #")
    credentials: dict[str, str | None] = {}
    for key in ("username_env", "password_env"):
        name = table.string(key)
        if name is None:
            credentials[key] = None
            continue
        if name not in environ:
            raise table.fail(key, f"the environment variable {name!r} is not set")
        credentials[key] = environ[name]
    if credentials["password_env"] is not None and credentials["username_env"] is None:
        raise table.fail("password_env", "a password needs username_env too")
    settings = MqttSettings(
        url=url,
        prefix=prefix.strip("/"),
        username=credentials["username_env"],
        password=credentials["password_env"],
        client_id=table.string("client_id"),
        publish=table.boolean("publish", True),
        session_expiry_s=table.number("session_expiry_s", 3600.0, lo=0.0, hi=4294967295.0),
        inflight_window=int(table.number("inflight_window", 20.0, lo=0.0, hi=65535.0)),
    )
    table.done()
    return settings


def _kind_of(url: str, configured_in: str) -> registry.DriverKind | None:
    """Return the registry's driver for ``url`` if it is one configured in
    ``configured_in`` (``[[instruments]]`` or ``[mqtt]``), else None."""
    try:
        kind = registry.driver_kind(url)
    except ConfigError:
        return None
    return kind if kind.configured_in == configured_in else None


def _schemes(configured_in: str) -> tuple[str, ...]:
    """Return the URL schemes of the drivers configured in ``configured_in``, sorted (for
    messages: every driver module is imported)."""
    kinds = registry.driver_kinds(configured_in)
    return tuple(sorted(scheme for kind in kinds for scheme in kind.schemes))


def _instrument(table: ConfigTable) -> Instrument:
    """Return the instrument of an ``[[instruments]]`` table: its driver (found in the
    driver registry by the URL's scheme) reads the table's other keys."""
    url = table.string("url", required=True)
    kind = _kind_of(url, registry.INSTRUMENTS)
    if kind is None or kind.read_table is None:
        known = registry.shown_schemes(_schemes(registry.INSTRUMENTS))
        mqtt = registry.shown_schemes(_schemes(registry.MQTT))
        raise table.fail("url", f"no instrument driver for {url!r}; known schemes: {known} "
                         f"({mqtt} sources go in [mqtt])")  # fmt: skip
    options = kind.read_table(table)
    table.done()
    return Instrument(url, kind.name, options)


def _vessel(
    table: ConfigTable, pressure_kpa: float, instruments: Mapping[str, Instrument], has_mqtt: bool
) -> tuple[VesselSpec, list[tuple[str, ChannelBinding]]]:
    vessel_id = table.string("id", required=True)
    if any(c in vessel_id for c in "/+#") or vessel_id != vessel_id.strip():
        raise table.fail("id", f"{vessel_id!r} may not hold '/', '+', '#' or outer spaces")
    metadata: dict[str, str | float] = {"vessel": vessel_id, "pressure_kpa": pressure_kpa}
    for key in VESSEL_NUMBERS:
        bounds = {"lo": 0.0, "hi": 1e9}
        if key == "target_c":
            bounds = {"lo": 1.0, "hi": 200.0}
        value = table.number(key, required=key == "vessel_heat_capacity_j_per_k", **bounds)
        if value is not None:
            metadata[key] = value
    extra = table.table("metadata")
    if extra is not None:
        for key in list(extra.data):
            value = extra.get(key)
            if key in metadata or key in ("element_sensor", *VESSEL_NUMBERS):
                raise extra.fail(key, "is set by the vessel's own keys; give it there")
            if isinstance(value, bool) or not isinstance(value, str | int | float):
                raise extra.fail(key, "must be a string or a number")
            if isinstance(value, str) and "\n" in value:
                raise extra.fail(key, "must fit on one line")
            metadata[key] = float(value) if isinstance(value, int | float) else value
    channels: list[tuple[str, ChannelBinding]] = []
    for ch in table.tables("channels"):
        url = ch.string("instrument", required=True)
        if url not in instruments:
            raise ch.fail("instrument", f"{url!r} is not one of the [[instruments]] urls")
        cold = ch.get("cold_junction")
        if cold is not None and (isinstance(cold, bool) or not isinstance(cold, str | int | float)):
            raise ch.fail("cold_junction", "must be a field name or a fixed temperature in °C")
        try:
            binding = ChannelBinding(
                field=ch.string("field", required=True),
                vessel=vessel_id,
                role=ch.string("role", required=True),
                unit=ch.string("unit", required=True),
                thermocouple=ch.string("thermocouple"),
                cold_junction=float(cold) if isinstance(cold, int | float) else cold,
                offset=ch.number("offset", 0.0),
                gain=ch.number("gain", 1.0),
            )
        except ConfigError as exc:
            raise ch.fail_here(str(exc)) from None
        ch.done()
        channels.append((url, binding))
    roles = {b.role for _, b in channels}
    if channels:
        if "water" not in roles:
            raise table.fail("channels", "a vessel needs a channel with role 'water'")
        if "power" not in roles and "energy" not in roles:
            raise table.fail("channels", "a vessel needs a 'power' or 'energy' channel")
        if table.has("element_sensor"):
            raise table.fail("element_sensor", "only for vessels without channels (MQTT)")
        has_element = "element" in roles
    else:
        if not has_mqtt:
            raise table.fail("channels", "a vessel without channels needs an [mqtt] broker")
        has_element = table.boolean("element_sensor", False)
    metadata["element_sensor"] = "yes" if has_element else "no"
    table.done()
    return VesselSpec(vessel_id, metadata, has_element, not channels), channels


def _check_driver_options(inst: Instrument, file: str) -> None:
    """Build the instrument's driver once (not entered), so that a bad option, or a
    channel its driver cannot read, fails before anything starts."""
    try:
        registry.open_source(inst.url, bindings=inst.bindings, **inst.options)
    except EbullioError as exc:
        raise ConfigError(f"{file}: instrument {inst.url!r}: {exc}") from None
