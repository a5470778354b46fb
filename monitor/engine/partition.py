"""One partition's vessels, message by message: the deterministic part of an engine worker.

Nothing here touches the network or the clock. A worker (:mod:`monitor.engine.worker`)
hands each message of its partitions' stream to :meth:`Partition.take` with the
message's stream sequence and stream time stamp; a single process handing the same
messages to the same code in one go (:func:`replay_messages`) makes the same figures,
whichever workers took which stretch of the stream, because every step depends only
on the messages and on the state a checkpoint carries over (:mod:`monitor.engine.checkpoint`).

Subjects (docs/engine.md): an instrument publishes ``<prefix>/<vessel>/<leaf>`` over
MQTT (or ``<prefix>.<vessel>.<leaf>`` over NATS); the server's mapping
(:meth:`EngineLayout.mapping`) rewrites it to ``<prefix>.part.<p>.<vessel>.<leaf>`` with
``p = partition(N, vessel)``, and the readings stream keeps those.

Each message is parsed as the MQTT driver parses it (:func:`drivers.payloads.parse_message`,
the stream's time stamp standing for the time of receipt), screened against the vessel's
:class:`~drivers.sample.ReadingLimits` and fed to the vessel's
:class:`~monitor.runs.live.LiveVessel`, the live service's own per-vessel path. A ``reading``
message is one whole instant, so its instant is closed at once; the samples of
single-channel messages close their instant when a sample with another time stamp
arrives (the rule a replay of a recorder log follows). A message that cannot be used is
set aside (:class:`drivers.channels.Quarantined`) and the rest goes on.
"""

from __future__ import annotations

import hashlib
import logging
from collections.abc import Iterable, Mapping
from dataclasses import dataclass

from drivers.channels import Quarantined
from drivers.errors import FrameError
from drivers.mqtt import encode_json
from drivers.payloads import READING_LEAF, parse_message
from drivers.sample import ReadingLimits
from monitor.records.schema import flatten_estimate
from monitor.rig.config import VesselSpec
from monitor.runs.live import LiveVessel, Step, screen_sample

__all__ = ["EngineLayout", "Message", "Partition", "VesselStream", "replay_messages"]

log = logging.getLogger("ebullio.engine")

#: The subject token between the prefix and the partition number.
PART_TOKEN = "part"


@dataclass(frozen=True)
class EngineLayout:
    """Where the engine keeps things: subject prefix, partition count, stream and buckets."""

    prefix: str = "ebullio"
    partitions: int = 8
    stream: str = "EBULLIO_READINGS"
    set_aside_stream: str = "EBULLIO_SET_ASIDE"
    runs_stream: str = "EBULLIO_RUNS"
    leases_bucket: str = "ebullio-leases"
    checkpoints_bucket: str = "ebullio-checkpoints"
    estimates_bucket: str = "ebullio-estimates"

    def mapping(self) -> tuple[str, str]:
        """Return the server's subject mapping (source, destination) that partitions readings."""
        return (
            f"{self.prefix}.*.*",
            f"{self.prefix}.{PART_TOKEN}.{{{{partition({self.partitions},1)}}}}"
            ".{{wildcard(1)}}.{{wildcard(2)}}",
        )

    def partition_subject(self, partition: int) -> str:
        """Return the subject filter of one partition's readings."""
        return f"{self.prefix}.{PART_TOKEN}.{partition}.>"

    @property
    def readings_subjects(self) -> str:
        """Return the subject filter of the readings stream (every partition)."""
        return f"{self.prefix}.{PART_TOKEN}.>"

    def set_aside_subject(self, partition: int) -> str:
        """Return the subject where a partition's set-aside input is kept."""
        return f"{self.prefix}-set-aside.{partition}"

    def runs_subject(self, vessel: str) -> str:
        """Return the subject where a vessel's ended runs' summaries are kept."""
        return f"{self.prefix}-runs.{vessel}"

    def server_config(self) -> str:
        """Return the ``mappings`` block of a nats-server configuration for this layout."""
        source, destination = self.mapping()
        return f'mappings = {{\n  "{source}": "{destination}"\n}}\n'


@dataclass(frozen=True, slots=True)
class Message:
    """One message of the readings stream: subject, payload, stream sequence and the
    stream's time stamp (Unix s)."""

    subject: str
    payload: bytes
    seq: int
    stamp_s: float


class VesselStream:
    """One vessel as the engine keeps it: its live path and what it has covered.

    ``seq`` is the last stream sequence taken into the state (0 before any), ``messages``
    the messages taken, ``set_aside`` those set aside, ``estimates`` the estimates made,
    ``digest`` a SHA-256 chained over every estimate's flat form (so two processings of
    a vessel that end with the same digest made the same figures at every step) and
    ``latest`` the newest flat estimate. ``unsent_runs`` are the summaries of the runs
    that have ended (their drift flags included, as the live service records them) and
    that the worker has not yet put in the runs stream. The whole object is what a
    checkpoint saves.
    """

    #: a state saved before runs were kept has none (a class default, never changed)
    unsent_runs: list[dict[str, object]] = []  # noqa: RUF012

    def __init__(self, spec: VesselSpec) -> None:
        # no fit budget: a budget defers fits by CPU time, and the figures must not
        # depend on which worker ran them or how busy it was
        self.live = LiveVessel(spec.id, spec.metadata, spec.has_element_sensor, fit_budget=None)
        self.limits = ReadingLimits.from_metadata(spec.metadata)
        self.seq = 0
        self.messages = 0
        self.set_aside = 0
        self.estimates = 0
        self.digest = hashlib.sha256(spec.id.encode()).hexdigest()
        self.latest: dict[str, object] | None = None
        self.runs_ended = 0
        self.unsent_runs = []

    def _steps(self, steps: list[Step]) -> None:
        live = self.live
        for step in steps:
            estimate = live.step(step)
            if live.ended:  # the worker puts them in the runs stream (docs/engine.md)
                self.runs_ended += len(live.ended)
                self.unsent_runs = [*self.unsent_runs, *live.ended]
                live.ended.clear()
            live.begun.clear()
            if estimate is None:
                continue
            record = flatten_estimate(estimate, vessel=live.vessel, run=str(live.run_number),
                                      t=step.t)  # fmt: skip
            chained = bytes.fromhex(self.digest) + encode_json(record)
            self.digest = hashlib.sha256(chained).hexdigest()
            self.estimates += 1
            self.latest = record

    def take(self, topic: str, leaf: str, message: Message, source: str,
             prefix: str) -> list[Quarantined]:  # fmt: skip
        """Take one message of this vessel; return what was set aside."""
        self.seq = message.seq
        self.messages += 1
        try:
            samples = parse_message(topic, message.payload, message.stamp_s, prefix, source)
        except FrameError as exc:
            self.set_aside += 1
            where = f"{message.subject} seq {message.seq}"
            return [Quarantined(message.stamp_s, source, where, str(exc), exc.raw)]
        kept: list[Quarantined] = []
        assembler = self.live.assembler
        for sample in samples:
            screened, problem = screen_sample(sample, self.limits)
            if problem is not None:
                kept.append(problem)
            self._steps(assembler.feed(screened, message.seq))
        if leaf == READING_LEAF and samples:
            self._steps(assembler.flush())
        return kept


class Partition:
    """The vessels of one partition; :meth:`take` steps them message by message."""

    def __init__(
        self,
        layout: EngineLayout,
        number: int,
        vessels: Mapping[str, VesselSpec],
        source: str,
        streams: Mapping[str, VesselStream] | None = None,
    ) -> None:
        self.layout = layout
        self.number = number
        self.vessels = vessels
        self.source = source
        self.streams: dict[str, VesselStream] = dict(streams or {})
        self.dirty: set[str] = set()  # vessels stepped since the last checkpoint
        self.fresh: set[str] = set()  # vessels with a new estimate since the last hand-over
        #: vessels with ended runs not yet in the runs stream
        self.ended: set[str] = {v for v, s in self.streams.items() if s.unsent_runs}
        self.unknown = 0  # messages set aside for their subject or vessel
        self.faulted: set[str] = set()  # vessels whose processing failed (logged once each)
        #: each vessel's entry in the estimates bucket as a worker last saw it: the stream
        #: sequence it covers and its revision (None: no entry)
        self.shown: dict[str, tuple[int, int | None]] = {}

    def take(self, message: Message) -> list[Quarantined]:
        """Take one message; return what was set aside (never raises for bad input)."""
        tokens = message.subject.split(".")
        prefix = self.layout.prefix
        if len(tokens) != 5 or tokens[0] != prefix or tokens[1] != PART_TOKEN:
            self.unknown += 1
            reason = f"subject is not {prefix}.{PART_TOKEN}.<p>.<vessel>.<leaf>"
            return [self._aside(message, reason)]
        vessel, leaf = tokens[3], tokens[4]
        spec = self.vessels.get(vessel)
        if spec is None:
            self.unknown += 1
            return [self._aside(message, f"vessel {vessel!r} is not in the configuration")]
        stream = self.streams.get(vessel)
        if stream is None:
            stream = self.streams[vessel] = VesselStream(spec)
        if message.seq <= stream.seq:
            return []  # already in the state a checkpoint carried over
        self.dirty.add(vessel)
        before = stream.estimates
        try:
            kept = stream.take(f"{prefix}/{vessel}/{leaf}", leaf, message, self.source, prefix)
        except Exception as exc:  # one vessel's failure must not stop its partition
            if vessel not in self.faulted:
                log.exception("vessel %s: processing stream seq %d failed; it goes on",
                              vessel, message.seq)  # fmt: skip
            self.faulted.add(vessel)
            stream.seq = message.seq
            reason = f"processing failed: {type(exc).__name__}: {exc}"
            kept = [self._aside(message, reason)]
        if stream.estimates != before:
            self.fresh.add(vessel)
        if stream.unsent_runs:
            self.ended.add(vessel)
        return kept

    def _aside(self, message: Message, reason: str) -> Quarantined:
        where = f"{message.subject} seq {message.seq}"
        return Quarantined(message.stamp_s, self.source, where, reason, message.payload)


def partition_of(subject: str) -> int | None:
    """Return the partition number a stream subject names, None if it names none."""
    tokens = subject.split(".")
    if len(tokens) < 3 or tokens[1] != PART_TOKEN or not tokens[2].isdigit():
        return None
    return int(tokens[2])


def replay_messages(layout: EngineLayout, vessels: Mapping[str, VesselSpec],
                    messages: Iterable[Message], source: str = "replay",
                    ) -> tuple[dict[str, VesselStream], list[Quarantined]]:  # fmt: skip
    """Return every vessel's stream after taking ``messages`` in one process, in order,
    and what was set aside: the reference an engine's figures must equal."""
    parts: dict[int, Partition] = {}
    aside: list[Quarantined] = []
    for message in messages:
        number = partition_of(message.subject)
        part = parts.get(number if number is not None else -1)
        if part is None:
            part = parts[number if number is not None else -1] = Partition(
                layout, number if number is not None else -1, vessels, source
            )
        aside += part.take(message)
    streams: dict[str, VesselStream] = {}
    for part in parts.values():
        streams.update(part.streams)
    return streams, aside
