"""Readings from an MQTT broker, and estimates back to it (MQTT 5 through aiomqtt 2.x).

:class:`MqttDriver` subscribes to ``<prefix>/+/+`` (or ``<prefix>/<vessel>/+`` for the
vessels it is given) and turns every message into samples with
:func:`drivers.payloads.parse_message`; a message that is not a reading becomes one
:class:`~drivers.channels.Quarantined` item with the raw payload, and the stream goes
on. :class:`MqttPublisher` writes estimates and flags, retained, for boards and other
systems. The topics and payloads are described in :mod:`drivers.payloads`.

URLs: ``mqtt://HOST[:PORT]`` (default port 1883) or ``mqtts://HOST[:PORT]`` (TLS,
default port 8883), optionally with ``USER:PASSWORD@`` before the host; a user name
or password given as an option wins over the URL's. The URL has no path and no
query: the options are keyword arguments. The ``source`` of every sample is the URL
without its credentials, and no password is ever logged or put into a message.

Delivery: readings and flags at QoS 1; estimates at QoS 0 (:data:`ESTIMATE_QOS`).
With a ``client_id`` the driver keeps a persistent session (MQTT 5 needs
``clean_start`` off *and* a session expiry interval, or nothing queued is delivered), so
messages published while it was away are delivered when a new driver with the same
``client_id`` connects, for up to ``session_expiry_s``. The broker must be allowed
to queue them: Mosquitto's default ``max_queued_messages``
of 1000 drops QoS 1 messages beyond that for a slow or absent subscriber without a
word; set it to 0 (no limit) or a large figure. By default a message is acknowledged
on arrival, so one not yet handed on is lost if the process dies; with ``ack_after``
(the live service) it is acknowledged only once its readings are committed.

Retained messages are not asked for at subscribe time: a retained reading is an old
one, and a bare number would be stamped with the time it was re-sent.
"""

from __future__ import annotations

import asyncio
import json
import logging
import math
import ssl
import time
from collections.abc import AsyncIterator, Callable, Collection, Mapping, Sequence
from dataclasses import dataclass
from types import TracebackType
from typing import Self
from urllib.parse import unquote, urlsplit

import aiomqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.subscribeoptions import SubscribeOptions

from drivers.channels import Acknowledge, Quarantined
from drivers.errors import ConfigError, DriverError, FrameError
from drivers.payloads import (
    DEFAULT_MAX_AHEAD_S,
    LOG_LEVEL,
    check_prefix,
    is_vessel_id,
    parse_message,
)
from drivers.registry import MQTT, DriverKind
from drivers.sample import Sample

logger = logging.getLogger(__name__)
# aiomqtt and paho log through this one (paho's packet log never shows the password).
_client_logger = logging.getLogger(__name__ + ".client")

DEFAULT_PORTS = {"mqtt": 1883, "mqtts": 8883}
#: QoS of every subscription and publication.
QOS = 1
#: QoS of the estimates: 0. An estimate is retained and superseded within a second or
#: so, and every one is in the log, so a lost copy costs nothing; at 1,000 vessels the
#: PUBACK of each was a measurable share of the service's core (bench_ingest.py; the
#: 2026-12-02 note measured 750 → 850 estimates a second at QoS 0). Flags, rare and
#: acted on, stay at QoS 1.
ESTIMATE_QOS = 0
#: How long (s) a publish may wait for its PUBACK before the link counts as lost. A
#: broker killed mid-publish sends nothing, and aiomqtt's own default of the client's
#: 10 s timeout held every estimate back that long after a broker restart (9.4 s in
#: bench_faults.py, 2026-12-05).
PUBLISH_TIMEOUT_S = 2.0
#: In-flight calls before aiomqtt warns; its default of 10 warns on every burst.
PENDING_CALLS_THRESHOLD = 10_000
#: Largest session expiry MQTT 5 can express (s); 0xFFFFFFFF means "never expires".
MAX_SESSION_EXPIRY_S = 0xFFFF_FFFF


@dataclass(frozen=True, slots=True)
class BrokerAddress:
    """Where a broker is: ``source`` is the URL without credentials."""

    scheme: str
    host: str
    port: int
    username: str | None
    password: str | None
    source: str


def _redacted(url: str) -> str:
    """Return ``url`` with anything between ``//`` and the last ``@`` of its host part hidden."""
    head, sep, rest = url.partition("://")
    if not sep:
        return url
    netloc, slash, tail = rest.partition("/")
    if "@" in netloc:
        netloc = "***@" + netloc.rsplit("@", 1)[1]
    return f"{head}{sep}{netloc}{slash}{tail}"


def parse_mqtt_url(url: str) -> BrokerAddress:
    """Return the broker address of an ``mqtt://`` or ``mqtts://`` URL.

    Raises :class:`ConfigError` (naming the URL without its credentials) for another
    scheme, a missing host, a bad port, a path, a query or a fragment.
    """
    shown = _redacted(url)
    parts = urlsplit(url)
    if parts.scheme not in DEFAULT_PORTS:
        raise ConfigError(f"{shown!r}: the scheme must be mqtt:// or mqtts://")
    if parts.path not in ("", "/") or parts.query or parts.fragment:
        raise ConfigError(
            f"{shown!r}: an MQTT URL is scheme://[user:password@]host[:port] only; "
            "prefix, vessels and the rest are options"
        )
    if not parts.hostname:
        raise ConfigError(f"{shown!r}: no host")
    try:
        port = parts.port or DEFAULT_PORTS[parts.scheme]
    except ValueError:
        raise ConfigError(f"{shown!r}: the port is not a number from 1 to 65535") from None
    host = parts.hostname
    shown_host = f"[{host}]" if ":" in host else host
    return BrokerAddress(
        scheme=parts.scheme,
        host=host,
        port=port,
        username=unquote(parts.username) if parts.username is not None else None,
        password=unquote(parts.password) if parts.password is not None else None,
        source=f"{parts.scheme}://{shown_host}:{port}",
    )


def _check_vessel(vessel: str) -> str:
    if not isinstance(vessel, str) or not is_vessel_id(vessel):
        raise ConfigError(
            f"vessel id {vessel!r} must be 1-64 letters, digits, '_', '.' or '-', "
            "starting with a letter or digit"
        )
    return vessel


def _check_prefix(prefix: str) -> str:
    try:
        return check_prefix(prefix)
    except ValueError as exc:
        raise ConfigError(str(exc)) from None


def _tls_context(ca_file: str | None) -> ssl.SSLContext:
    # Reads certificate files: call it off the event loop.
    return ssl.create_default_context(cafile=ca_file)


async def _open_client(
    address: BrokerAddress,
    source: str,
    *,
    username: str | None,
    password: str | None,
    client_id: str | None,
    keepalive_s: float,
    timeout_s: float,
    tls_ca_file: str | None,
    session_expiry_s: float | None = None,
) -> aiomqtt.Client:
    """Return a new, connected MQTT 5 client; a persistent session when ``session_expiry_s``.

    Raises DriverError naming ``source`` when the broker cannot be reached.
    """
    extra: dict[str, object] = {}
    if session_expiry_s is not None:
        properties = Properties(PacketTypes.CONNECT)
        properties.SessionExpiryInterval = session_expiry_s
        extra = {"clean_start": False, "properties": properties}
    tls = None
    if address.scheme == "mqtts":
        tls = await asyncio.to_thread(_tls_context, tls_ca_file)
    client = aiomqtt.Client(
        address.host,
        address.port,
        username=username,
        password=password,
        identifier=client_id,
        protocol=aiomqtt.ProtocolVersion.V5,
        keepalive=keepalive_s,
        timeout=timeout_s,
        tls_context=tls,
        logger=_client_logger,
        **extra,  # type: ignore[arg-type]
    )
    client.pending_calls_threshold = PENDING_CALLS_THRESHOLD
    try:
        await client.__aenter__()
    except aiomqtt.MqttError as exc:
        raise DriverError(f"{source}: cannot connect to the broker: {exc}") from exc
    return client


def _manual_acks(client: aiomqtt.Client) -> None:
    """Turn off paho's acknowledgement on arrival (aiomqtt has no option of its own).
    Must be called before subscribing. This and :func:`_acknowledger` are the only
    places that reach past aiomqtt to its paho client."""
    client._client.manual_ack_set(True)


def _acknowledger(client: aiomqtt.Client, message: aiomqtt.Message) -> Callable[[], object]:
    """Return the call that acknowledges ``message`` on ``client``'s link (paho's own
    ``ack``; on a link that has closed it sends nothing and the broker redelivers)."""
    paho, mid, qos = client._client, message.mid, message.qos
    return lambda: paho.ack(mid, qos)


async def _disconnect(client: aiomqtt.Client | None, source: str) -> None:
    """Close ``client``; a dead link is logged, never raised."""
    if client is None:
        return
    try:
        await client.__aexit__(None, None, None)
    except aiomqtt.MqttError as exc:
        logger.debug("%s: the link was already gone at disconnect: %s", source, exc)


def _as_bytes(payload: object) -> bytes:
    if isinstance(payload, bytes | bytearray | memoryview):
        return bytes(payload)
    if payload is None:
        return b""
    return str(payload).encode("utf-8")


class MqttDriver:
    """Samples from the readings instruments publish on an MQTT broker.

    ``async with MqttDriver("mqtt://127.0.0.1:1883") as d: async for item in d.samples():``
    yields :class:`~drivers.sample.Sample` and, for messages that are not readings,
    :class:`~drivers.channels.Quarantined` items. Raises :class:`DriverError` naming the
    URL when it cannot connect or subscribe, and from ``samples()`` when the broker goes
    away. Use an instance once; build a new one to reconnect.

    Options (keyword arguments):

    * ``prefix``: topic prefix, one or more levels; default ``"ebullio"``.
    * ``vessels``: vessel ids to subscribe to; default ``None``, every vessel under the
      prefix (``<prefix>/+/+``).
    * ``client_id``: MQTT client identifier. Given, the session is persistent (see the
      module docstring); default ``None``, a clean session with an id the broker picks.
    * ``username``, ``password``: credentials; default from the URL, else none.
    * ``session_expiry_s``: how long (s) the broker keeps a persistent session after
      the link drops; default 3600; only with ``client_id``.
    * ``keepalive_s``: MQTT keep-alive (s); a silently dead link is noticed within
      about 1.5 times this; default 30.
    * ``timeout_s``: how long (s) to wait for the broker's answers to connect and
      subscribe; default 10.
    * ``max_ahead_s``: how far (s) an instrument's own time may run ahead of the receipt
      time before the message is refused; default 300.
    * ``tls_ca_file``: CA certificate file for ``mqtts://``; default the system's.
    * ``clock``: receipt time source, Unix s; default :func:`time.time`.
    * ``ack_after``: when True, QoS 1 messages are not acknowledged on arrival: after
      each message's items the driver yields an :class:`~drivers.channels.Acknowledge`
      whose ``send()`` acknowledges it (the live service calls it once the block that
      holds the items is committed); default False, acknowledged on arrival.
    """

    def __init__(
        self,
        url: str,
        *,
        prefix: str = "ebullio",
        vessels: Collection[str] | None = None,
        client_id: str | None = None,
        username: str | None = None,
        password: str | None = None,
        session_expiry_s: int = 3600,
        keepalive_s: int = 30,
        timeout_s: float = 10.0,
        max_ahead_s: float = DEFAULT_MAX_AHEAD_S,
        tls_ca_file: str | None = None,
        clock: Callable[[], float] = time.time,
        ack_after: bool = False,
    ) -> None:
        self._address = parse_mqtt_url(url)
        self.source = self._address.source
        self.ack_after = bool(ack_after)
        self.prefix = _check_prefix(prefix)
        if vessels is not None:
            if isinstance(vessels, str):
                raise ConfigError("vessels must be a collection of ids, not one string")
            if not vessels:
                raise ConfigError("vessels is empty; pass None to take every vessel")
            vessels = tuple(sorted({_check_vessel(v) for v in vessels}))
        self.vessels: tuple[str, ...] | None = vessels
        if client_id is not None and (not client_id or "\x00" in client_id):
            raise ConfigError("client_id must be a non-empty string without NUL")
        self.client_id = client_id
        if not 1 <= session_expiry_s <= MAX_SESSION_EXPIRY_S:
            raise ConfigError(f"session_expiry_s must be 1 to {MAX_SESSION_EXPIRY_S} s")
        self.session_expiry_s = int(session_expiry_s)
        if not 1 <= keepalive_s <= 65535:
            raise ConfigError("keepalive_s must be 1 to 65535 s")
        self.keepalive_s = int(keepalive_s)
        if not (math.isfinite(timeout_s) and timeout_s > 0):
            raise ConfigError("timeout_s must be a positive number of seconds")
        self.timeout_s = float(timeout_s)
        if not (math.isfinite(max_ahead_s) and max_ahead_s >= 0):
            raise ConfigError("max_ahead_s must be a finite number of seconds >= 0")
        self.max_ahead_s = float(max_ahead_s)
        self._username = username if username is not None else self._address.username
        self._password = password if password is not None else self._address.password
        self._tls_ca_file = tls_ca_file
        self._clock = clock
        self._client: aiomqtt.Client | None = None
        self._used = False
        #: QoS the broker granted for each subscription (set on entry).
        self.granted_qos: tuple[int, ...] = ()

    def __repr__(self) -> str:
        return f"MqttDriver({self.source!r}, prefix={self.prefix!r}, client_id={self.client_id!r})"

    @property
    def topics(self) -> tuple[str, ...]:
        """Return the topic filters this driver subscribes to."""
        if self.vessels is None:
            return (f"{self.prefix}/+/+",)
        return tuple(f"{self.prefix}/{vessel}/+" for vessel in self.vessels)

    async def __aenter__(self) -> Self:
        if self._used:
            raise DriverError(f"{self.source}: a driver is used once; make a new one")
        self._used = True
        persistent = self.client_id is not None
        client = await _open_client(
            self._address,
            self.source,
            username=self._username,
            password=self._password,
            client_id=self.client_id,
            keepalive_s=self.keepalive_s,
            timeout_s=self.timeout_s,
            tls_ca_file=self._tls_ca_file,
            session_expiry_s=self.session_expiry_s if persistent else None,
        )
        self._client = client
        if self.ack_after:
            _manual_acks(client)
        options = SubscribeOptions(qos=QOS, retainHandling=SubscribeOptions.RETAIN_DO_NOT_SEND)
        try:
            codes = await client.subscribe([(topic, options) for topic in self.topics])
        except aiomqtt.MqttError as exc:
            await self.__aexit__(None, None, None)
            raise DriverError(f"{self.source}: cannot subscribe to {self.topics}: {exc}") from exc
        granted = tuple(int(getattr(code, "value", code)) for code in codes)
        if any(code > 2 for code in granted):  # reason codes of 0x80 and above are refusals
            await self.__aexit__(None, None, None)
            raise DriverError(
                f"{self.source}: the broker refused the subscription to {self.topics} "
                f"(reason codes {granted})"
            )
        self.granted_qos = granted
        logger.info(
            "%s: subscribed to %s (%s session)",
            self.source,
            ", ".join(self.topics),
            "persistent" if persistent else "clean",
        )
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        client, self._client = self._client, None
        await _disconnect(client, self.source)

    def _items(self, message: aiomqtt.Message, received_t: float) -> list[Sample | Quarantined]:
        topic = message.topic.value
        raw = _as_bytes(message.payload)
        try:
            return list(
                parse_message(
                    topic, raw, received_t, self.prefix, self.source, max_ahead_s=self.max_ahead_s
                )
            )
        except FrameError as exc:
            # told at a bounded rate by the service (every item is in the quarantine)
            logger.debug("%s: quarantined a message: %s", self.source, exc)
            return [Quarantined(received_t, self.source, topic, str(exc), raw)]

    async def samples(self) -> AsyncIterator[Sample | Quarantined | Acknowledge]:
        """Yield samples (value in the channel's unit) and quarantined messages as they come,
        each QoS 1 message's items followed by its :class:`Acknowledge` with ``ack_after``.

        Raises :class:`DriverError` when the broker goes away.
        """
        client = self._client
        if client is None:
            raise DriverError(f"{self.source}: use the driver inside 'async with'")
        try:
            async for message in client.messages:
                for item in self._items(message, self._clock()):
                    yield item
                if self.ack_after and message.qos > 0:
                    yield Acknowledge(self.source, _acknowledger(client, message))
        except aiomqtt.MqttError as exc:
            raise DriverError(f"{self.source}: lost the broker: {exc}") from exc


def _json_ready(value: object) -> object:
    """Return ``value`` with every non-finite float replaced by None (JSON has no NaN)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {key: _json_ready(item) for key, item in value.items()}
    if isinstance(value, list | tuple):
        return [_json_ready(item) for item in value]
    return value


def encode_json(value: object) -> bytes:
    """Return ``value`` as compact UTF-8 JSON; NaN and infinities become ``null``.

    Raises TypeError for a value JSON cannot hold (a caller's mistake, not bad input).
    """
    options = {"separators": (",", ":"), "ensure_ascii": False, "allow_nan": False}
    try:  # the usual value holds no NaN and only plain containers: no walk first
        text = json.dumps(value, **options)
    except (ValueError, TypeError):
        text = json.dumps(_json_ready(value), **options)
    return text.encode("utf-8")


class MqttPublisher:
    """Publishes estimates (QoS 0) and flags (QoS 1), retained, for boards and other systems.

    ``async with MqttPublisher(url) as pub: await pub.publish_estimate("k1", {...})``.
    Topics: ``<prefix>/<vessel>/estimate`` (a JSON object) and ``<prefix>/<vessel>/flags``
    (a JSON list of objects). Retained, so a board that subscribes later gets the
    latest at once. Non-finite numbers are written as ``null``. Raises
    :class:`DriverError` naming the URL when the broker cannot be reached or goes away.

    Options (keyword arguments): ``prefix`` (default ``"ebullio"``), ``client_id``
    (default ``None``, the broker picks), ``username``, ``password`` (default from the
    URL), ``keepalive_s`` (default 30), ``timeout_s`` (how long (s) to wait for the
    broker to acknowledge a connect or a publication; default 10), ``tls_ca_file``
    (for ``mqtts://``; default the system's CAs).
    """

    def __init__(
        self,
        url: str,
        *,
        prefix: str = "ebullio",
        client_id: str | None = None,
        username: str | None = None,
        password: str | None = None,
        keepalive_s: int = 30,
        timeout_s: float = 10.0,
        tls_ca_file: str | None = None,
    ) -> None:
        self._address = parse_mqtt_url(url)
        self.source = self._address.source
        self.prefix = _check_prefix(prefix)
        if client_id is not None and (not client_id or "\x00" in client_id):
            raise ConfigError("client_id must be a non-empty string without NUL")
        self.client_id = client_id
        if not 1 <= keepalive_s <= 65535:
            raise ConfigError("keepalive_s must be 1 to 65535 s")
        self.keepalive_s = int(keepalive_s)
        if not (math.isfinite(timeout_s) and timeout_s > 0):
            raise ConfigError("timeout_s must be a positive number of seconds")
        self.timeout_s = float(timeout_s)
        self._username = username if username is not None else self._address.username
        self._password = password if password is not None else self._address.password
        self._tls_ca_file = tls_ca_file
        self._client: aiomqtt.Client | None = None

    def __repr__(self) -> str:
        return f"MqttPublisher({self.source!r}, prefix={self.prefix!r})"

    async def __aenter__(self) -> Self:
        self._client = await _open_client(
            self._address,
            self.source,
            username=self._username,
            password=self._password,
            client_id=self.client_id,
            keepalive_s=self.keepalive_s,
            timeout_s=self.timeout_s,
            tls_ca_file=self._tls_ca_file,
        )
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        client, self._client = self._client, None
        await _disconnect(client, self.source)

    async def _publish(self, vessel: str, leaf: str, value: object, qos: int = QOS) -> None:
        await self._publish_topic(f"{self.prefix}/{_check_vessel(vessel)}/{leaf}", value, qos)

    async def publish_head(self, head: Mapping[str, object]) -> None:
        """Publish the log's chain head (JSON object) retained at QoS 1 on
        ``<prefix>/_log/chain_head``: a copy away from the log's disk, so a log cut
        short fails ``ebullio verify --head``."""
        await self._publish_topic(f"{self.prefix}/{LOG_LEVEL}/chain_head", dict(head), QOS)

    async def _publish_topic(self, topic: str, value: object, qos: int) -> None:
        client = self._client
        if client is None:
            raise DriverError(f"{self.source}: use the publisher inside 'async with'")
        payload = encode_json(value)
        try:
            await client.publish(topic, payload, qos=qos, retain=True, timeout=PUBLISH_TIMEOUT_S)
        except aiomqtt.MqttError as exc:
            raise DriverError(f"{self.source}: cannot publish on {topic}: {exc}") from exc

    async def publish_estimate(self, vessel: str, payload: Mapping[str, object]) -> None:
        """Publish one vessel's estimate (JSON object) retained at :data:`ESTIMATE_QOS` (0)."""
        if not isinstance(payload, Mapping):
            raise TypeError("an estimate is a mapping of names to values")
        await self._publish(vessel, "estimate", payload, ESTIMATE_QOS)

    async def publish_flags(self, vessel: str, flags: Sequence[Mapping[str, object]]) -> None:
        """Publish one vessel's current flags (JSON list) retained at QoS 1; returns on PUBACK."""
        if isinstance(flags, str | bytes) or not all(isinstance(f, Mapping) for f in flags):
            raise TypeError("flags are a sequence of mappings")
        await self._publish(vessel, "flags", list(flags))


#: The driver registry's entry (drivers/registry.py). Its URL is configured in ``[mqtt]``,
#: which monitor/rig/config.py reads itself: the estimates are published there too.
DRIVER = DriverKind("mqtt", tuple(DEFAULT_PORTS), MqttDriver, configured_in=MQTT)
