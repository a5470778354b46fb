"""``ebullio run --engine nats://...``: one worker of the NATS JetStream engine.

Shape (docs/engine.md has the subjects, buckets and formats)::

    instruments ──MQTT──► nats-server (mapping: vessel ─► partition) ──► stream EBULLIO_READINGS
                                                                            │ (replicated)
        workers: lease loop (KV ebullio-leases) ── holds partitions ──► one consumer each
                 Partition.take per message (LiveVessel) ──► KV ebullio-estimates (latest)
                                                     └──► KV ebullio-checkpoints (state + seq)

* **Leases.** A partition is served by the worker that holds its lease, the key
  ``p.<n>`` of the leases bucket: ``{"worker", "until", "since"}``. A worker takes a
  free or expired lease by compare-and-set on the key's revision (``create``, or
  ``update(last=revision)``), renews it every ``heartbeat_s`` the same way and lets
  go when a renewal finds another revision (someone else holds it) or its own
  ``until`` has passed. The workers list themselves in the ``workers`` key (also by
  compare-and-set), and each holds at most its fair share, ceil(partitions / workers
  alive): a worker above it hands a partition back (final checkpoint, then the
  lease deleted), one below it takes free ones. Lease times are wall-clock Unix
  seconds, so the workers' clocks must agree to well within ``lease_s``.
* **A partition.** The worker loads the partition's checkpoint index ``i.<n>``
  (``{"seq", "vessels"}``: every message of the partition up to ``seq`` is in the
  vessels' saved states) and each listed vessel's state ``v.<vessel>``
  (:mod:`monitor.engine.checkpoint`), then reads the stream from ``seq + 1`` with an
  ephemeral pull consumer filtered on the partition's subjects. A message a vessel's
  state already covers is skipped (:class:`~monitor.engine.partition.Partition`). If
  the consumer fails (a node gone, a leader moving) a new one starts after the last
  message taken. The consumer acknowledges nothing, so the server never sends a
  message again: a message it delivered that was lost on the way (a node's link cut
  while it was in flight) shows as a gap in the consumer's own delivery sequence,
  and a new consumer then starts after the last message taken. Every
  ``checkpoint_every_s`` the vessels stepped since the last checkpoint are saved, then
  the index.
* **Out.** After each batch the newest estimate of each vessel stepped goes to the
  estimates bucket under the vessel's id (:func:`read_estimates` reads them for the
  board's fleet view); input set aside goes to the set-aside stream with its reason,
  with a message id ``<partition>-<seq>`` so a stretch read again after a take-over
  is kept once.

No fit budget: the figures must not depend on which worker made them or how busy it
was, so the heat-up fits are made when due, as in a replay.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import math
import time
import zlib
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import nats
import nats.errors
import nats.js.errors
from nats.js.api import (
    AckPolicy,
    ConsumerConfig,
    DeliverPolicy,
    DiscardPolicy,
    KeyValueConfig,
    StorageType,
    StreamConfig,
)

from drivers.channels import Quarantined
from drivers.errors import EbullioError
from drivers.mqtt import encode_json
from monitor.engine import checkpoint
from monitor.engine.partition import EngineLayout, Message, Partition, VesselStream
from monitor.rig.config import RigConfig, VesselSpec

__all__ = [
    "EngineError", "Worker", "WorkerSettings", "WorkerStats", "engine_layout", "engine_servers",
    "engine_vessels", "read_estimates", "read_runs", "shown_servers",
]  # fmt: skip

log = logging.getLogger("ebullio.engine")

#: Errors of the NATS client that a worker rides out (a node gone, a leader moving).
NATS_ERRORS = (nats.errors.Error, asyncio.TimeoutError, OSError)


#: What the KV client raises for a key that is not there (never written, or deleted).
MISSING = (nats.js.errors.KeyNotFoundError, nats.js.errors.KeyDeletedError)


#: The longest a partition steps its vessels (s of CPU) before the loop's other tasks run.
SLICE_S = 0.02
#: After this long (s) of empty fetches a worker asks its consumer whether it is stuck.
IDLE_CHECK_S = 2.0
#: How long (s) the runs stream remembers a summary's message id: a run ended again by
#: the worker that takes a partition over (it steps again from the last checkpoint,
#: seconds before) is kept once.
RUNS_DUPLICATE_WINDOW_S = 3600.0


class EngineError(EbullioError, RuntimeError):
    """The engine cannot run: the stream or buckets disagree with this worker's layout."""


@dataclass(frozen=True)
class WorkerSettings:
    """A worker's timing (s) and the replication it asks for when it creates things."""

    lease_s: float = 5.0  # a lease not renewed for this long may be taken over
    heartbeat_s: float = 1.0  # leases and the worker list are renewed this often
    checkpoint_every_s: float = 5.0  # the vessels stepped since are saved this often
    fetch_batch: int = 512  # messages asked for at once
    replicas: int = 1  # stream and bucket replicas when this worker creates them
    setup_patience_s: float = 60.0  # how long to try to connect, and to set things up


@dataclass
class WorkerStats:
    """What one worker counted."""

    messages: int = 0
    set_aside: int = 0
    checkpoints: int = 0
    partitions_taken: int = 0
    partitions_handed_back: int = 0
    partitions_lost: int = 0
    consumer_restarts: int = 0
    deliveries_lost: int = 0  # gaps in a consumer's delivery sequence (each restarts it)
    runs_sent: int = 0  # vessels' ended runs put in the runs stream (once per hand-over)
    taken_at: dict[int, float] = field(default_factory=dict)  # partition -> Unix s taken

    def as_dict(self) -> dict[str, object]:
        """Return the counters as a JSON-ready dict."""
        return {k: ({str(p): t for p, t in v.items()} if isinstance(v, dict) else v)
                for k, v in self.__dict__.items()}  # fmt: skip


@dataclass
class _Lease:
    partition: int
    revision: int
    until: float
    since: float
    hand_back: asyncio.Event = field(default_factory=asyncio.Event)
    task: asyncio.Task[None] | None = None


def _lease_key(partition: int) -> str:
    return f"p.{partition}"


class Worker:
    """One engine worker: ``await Worker(...).run()`` until :meth:`stop` (module docstring)."""

    def __init__(
        self,
        servers: Sequence[str],
        vessels: Mapping[str, VesselSpec],
        layout: EngineLayout,
        name: str,
        settings: WorkerSettings | None = None,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.servers = list(servers)
        self.vessels = dict(vessels)
        self.layout = layout
        self.name = name
        self.settings = settings or WorkerSettings()
        self.clock = clock
        self.stats = WorkerStats()
        self.source = shown_servers(servers)
        self._last_said = ""  # the connection's last error, logged once in a row
        self._stop = asyncio.Event()
        self._held: dict[int, _Lease] = {}
        self._nc: Any = None
        self._js: Any = None
        self._leases: Any = None
        self._checkpoints: Any = None
        self._estimates: Any = None

    def stop(self) -> None:
        """Ask the worker to stop: each partition is checkpointed and handed back."""
        self._stop.set()

    async def run(self) -> WorkerStats:
        """Serve partitions until :meth:`stop`; return the counters. A stop while still
        connecting or setting up returns at once."""
        starting = asyncio.create_task(self._start(), name=f"{self.name} start")
        stopping = asyncio.create_task(self._stop.wait())
        await asyncio.wait({starting, stopping}, return_when=asyncio.FIRST_COMPLETED)
        stopping.cancel()
        if not starting.done():
            starting.cancel()
            await asyncio.wait([starting])
        try:
            if starting.cancelled():
                return self.stats
            starting.result()  # EngineError when the server cannot be reached or set up
            leases = asyncio.create_task(self._lease_loop(), name=f"{self.name} leases")
            await self._stop.wait()
            await asyncio.wait([leases])  # the loop ends its round and returns
            await asyncio.gather(*(self._hand_back(p) for p in list(self._held)))
        finally:
            tasks = [lease.task for lease in self._held.values() if lease.task is not None]
            for task in tasks:
                task.cancel()
            if tasks:
                await asyncio.wait(tasks)
            if self._nc is not None:
                with contextlib.suppress(*NATS_ERRORS):
                    await self._nc.close()
        return self.stats

    async def _connection_error(self, exc: Exception) -> None:
        """Log the connection's errors in one line each (a node gone, a reconnect
        refused), once in a row, instead of the client's tracebacks."""
        said = _said(exc)
        if said != self._last_said:
            log.warning("%s: NATS connection: %s", self.name, said)
            self._last_said = said

    async def _reconnected(self) -> None:
        url = self._nc.connected_url if self._nc is not None else None
        log.info("%s: NATS connection back (%s)", self.name,
                 f"{url.hostname}:{url.port}" if url is not None else "?")  # fmt: skip
        self._last_said = ""

    async def _start(self) -> None:
        """Connect (bounded: the client retries for ever once connected) and set up."""
        try:
            self._nc = await asyncio.wait_for(nats.connect(
                servers=self.servers, name=self.name, max_reconnect_attempts=-1,
                reconnect_time_wait=0.25, connect_timeout=2, allow_reconnect=True,
                error_cb=self._connection_error, reconnected_cb=self._reconnected,
            ), self.settings.setup_patience_s)  # fmt: skip
        except NATS_ERRORS as exc:
            why = self._last_said or _said(exc)
            raise EngineError(
                f"cannot reach the NATS server at {self.source} in "
                f"{self.settings.setup_patience_s:g} s: {why}"
            ) from exc
        self._js = self._nc.jetstream(timeout=2.0)
        await self._set_up()

    # -- set-up -------------------------------------------------------------------

    async def _set_up(self) -> None:
        """Create (or find) the stream, the set-aside stream and the three buckets."""
        layout, replicas = self.layout, self.settings.replicas
        deadline = time.monotonic() + self.settings.setup_patience_s
        while True:
            try:
                await self._ensure_stream(StreamConfig(
                    name=layout.stream, subjects=[layout.readings_subjects],
                    num_replicas=replicas, storage=StorageType.FILE,
                ))  # fmt: skip
                await self._ensure_stream(StreamConfig(
                    name=layout.set_aside_stream, subjects=[layout.set_aside_subject("*")],
                    num_replicas=replicas, storage=StorageType.FILE,
                    duplicate_window=600.0, discard=DiscardPolicy.OLD,
                ))  # fmt: skip
                await self._ensure_stream(StreamConfig(
                    name=layout.runs_stream, subjects=[layout.runs_subject("*")],
                    num_replicas=replicas, storage=StorageType.FILE,
                    duplicate_window=RUNS_DUPLICATE_WINDOW_S,
                ))  # fmt: skip
                self._leases = await self._bucket(layout.leases_bucket)
                self._checkpoints = await self._bucket(layout.checkpoints_bucket)
                self._estimates = await self._bucket(layout.estimates_bucket)
                await self._check_layout()
                return
            except NATS_ERRORS as exc:
                if time.monotonic() > deadline:
                    words = f"cannot set up the engine's stream and buckets: {exc}"
                    raise EngineError(words) from exc
                log.info("%s: set-up not ready yet (%s); retrying", self.name, exc)
                await asyncio.sleep(0.5)

    async def _ensure_stream(self, config: StreamConfig) -> None:
        try:
            info = await self._js.stream_info(config.name)
        except nats.js.errors.NotFoundError:
            with contextlib.suppress(nats.js.errors.BadRequestError):
                await self._js.add_stream(config)  # another worker may have won the race
            return
        if info.config.subjects != config.subjects:
            raise EngineError(
                f"stream {config.name} keeps {info.config.subjects}, not {config.subjects}"
            )

    async def _bucket(self, name: str) -> Any:
        try:
            return await self._js.key_value(name)
        except nats.js.errors.BucketNotFoundError:
            config = KeyValueConfig(bucket=name, history=1, replicas=self.settings.replicas)
            with contextlib.suppress(nats.js.errors.BadRequestError):
                return await self._js.create_key_value(config)
            return await self._js.key_value(name)

    async def _check_layout(self) -> None:
        """Refuse to run beside workers (or a server mapping) with another partition count."""
        mine = {"partitions": self.layout.partitions, "prefix": self.layout.prefix}
        try:
            await self._leases.create("layout", json.dumps(mine).encode())
            return
        except nats.js.errors.KeyWrongLastSequenceError:
            entry = await self._leases.get("layout")
        theirs = json.loads(entry.value)
        if theirs != mine:
            raise EngineError(
                f"the engine's buckets were set up for {theirs}, this worker has {mine}: "
                "every worker and the server's mapping must agree"
            )

    # -- leases -------------------------------------------------------------------

    async def _lease_loop(self) -> None:
        # each worker tries the partitions in an order of its own, so they rarely collide
        order = sorted(range(self.layout.partitions),
                       key=lambda p: zlib.crc32(f"{self.name}/{p}".encode()))  # fmt: skip
        # listed a heartbeat before taking anything, so workers started together see
        # each other and share the partitions at once instead of handing them round
        with contextlib.suppress(*NATS_ERRORS):
            await self._roster()
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(self._stop.wait(), self.settings.heartbeat_s)
        while not self._stop.is_set():
            began = time.monotonic()
            # renewals first, all at once: a round must never take longer than a lease
            await asyncio.gather(*(self._renew(p, lease) for p, lease in list(self._held.items())))
            self._forget_expired()
            try:
                alive = await self._roster()
                fair = math.ceil(self.layout.partitions / max(alive, 1))
                while len(self._held) > fair and not self._stop.is_set():
                    await self._hand_back(max(self._held))
                if len(self._held) < fair:
                    await self._take(order, fair)
            except NATS_ERRORS as exc:
                log.info("%s: lease round failed (%s); next round", self.name, exc)
            rest = self.settings.heartbeat_s - (time.monotonic() - began)
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._stop.wait(), max(rest, 0.05))

    async def _roster(self) -> int:
        """Renew this worker's place in the ``workers`` key; return the workers alive."""
        for _ in range(5):
            now = self.clock()
            try:
                entry = await self._leases.get("workers")
                roster, revision = json.loads(entry.value), entry.revision
            except MISSING:
                roster, revision = {}, None
            roster = {w: until for w, until in roster.items() if until > now}
            roster[self.name] = now + self.settings.lease_s
            value = json.dumps(roster).encode()
            try:
                if revision is None:
                    await self._leases.create("workers", value)
                else:
                    await self._leases.update("workers", value, last=revision)
                return len(roster)
            except nats.js.errors.KeyWrongLastSequenceError:
                continue  # another worker wrote it meanwhile: read again
        return len(roster)

    def _lease_value(self, now: float, since: float) -> bytes:
        until = now + self.settings.lease_s
        return json.dumps({"worker": self.name, "until": until, "since": since}).encode()

    async def _renew(self, partition: int, lease: _Lease) -> None:
        """Renew one lease by compare-and-set; let the partition go if another worker
        has written its key since (it holds it now)."""
        if lease.hand_back.is_set():
            return
        now = self.clock()
        try:
            lease.revision = await self._leases.update(
                _lease_key(partition), self._lease_value(now, lease.since), last=lease.revision
            )
            lease.until = now + self.settings.lease_s
        except (nats.js.errors.KeyWrongLastSequenceError, *MISSING):
            log.warning("%s: partition %d is another worker's now", self.name, partition)
            self._drop(partition)
        except NATS_ERRORS as exc:
            log.info("%s: renewing partition %d failed (%s)", self.name, partition, exc)

    def _forget_expired(self) -> None:
        """Stop serving a partition whose lease has gone unrenewed for a second lease time.

        While the cluster cannot renew leases (a leader being elected) nobody can take
        them either; when it can again, the compare-and-set on the revision says whether
        the lease is still this worker's. A worker cut off for longer gives up. If two
        workers ever serve a partition at once, they write the same figures (the
        processing is deterministic), and the one whose renewal fails stops.
        """
        now = self.clock()
        for partition, lease in list(self._held.items()):
            if lease.until + self.settings.lease_s <= now and not lease.hand_back.is_set():
                log.warning("%s: the lease of partition %d ran out", self.name, partition)
                self._drop(partition)

    def _drop(self, partition: int) -> None:
        lease = self._held.pop(partition, None)
        if lease is None:
            return
        self.stats.partitions_lost += 1
        if lease.task is not None:
            lease.task.cancel()

    async def _take(self, order: list[int], fair: int) -> None:
        for partition in order:
            if len(self._held) >= fair or self._stop.is_set():
                return
            if partition in self._held:
                continue
            key, now = _lease_key(partition), self.clock()
            try:
                entry = await self._leases.get(key)
            except MISSING:
                entry = None
            try:
                if entry is None:
                    revision = await self._leases.create(key, self._lease_value(now, now))
                else:
                    if json.loads(entry.value)["until"] > now:
                        continue  # held by a worker alive
                    revision = await self._leases.update(
                        key, self._lease_value(now, now), last=entry.revision
                    )
            except nats.js.errors.KeyWrongLastSequenceError:
                continue  # another worker took it first
            lease = _Lease(partition, revision, now + self.settings.lease_s, now)
            self._held[partition] = lease
            self.stats.partitions_taken += 1
            self.stats.taken_at[partition] = now
            lease.task = asyncio.create_task(self._serve(lease), name=f"partition {partition}")
            lease.task.add_done_callback(lambda task, p=partition: self._served(p, task))
            log.info("%s: took partition %d", self.name, partition)

    def _served(self, partition: int, task: asyncio.Task[None]) -> None:
        """A partition's task ended: if by an error, say so and stop renewing its lease,
        so that it expires and the partition is taken again from its checkpoint."""
        if task.cancelled() or task.exception() is None:
            return
        exc = task.exception()
        log.error("%s: serving partition %d failed; its lease is let go", self.name, partition,
                  exc_info=exc)  # fmt: skip
        lease = self._held.get(partition)
        if lease is not None and lease.task is task:
            del self._held[partition]
            self.stats.partitions_lost += 1

    async def _hand_back(self, partition: int) -> None:
        """Checkpoint a partition, stop serving it and delete its lease."""
        lease = self._held.get(partition)
        if lease is None:
            return
        lease.hand_back.set()
        if lease.task is not None:
            await asyncio.wait([lease.task])  # it checkpoints and returns (or gives up)
        self._held.pop(partition, None)
        self.stats.partitions_handed_back += 1
        with contextlib.suppress(*NATS_ERRORS):
            await self._leases.delete(_lease_key(partition), last=lease.revision)
        log.info("%s: handed partition %d back", self.name, partition)

    # -- one partition -------------------------------------------------------------

    async def _load(self, number: int) -> tuple[Partition, int]:
        """Return the partition as its checkpoints left it and the last sequence they cover."""
        try:
            entry = await self._checkpoints.get(f"i.{number}")
            index = json.loads(entry.value)
        except MISSING:
            index = {"seq": 0, "vessels": []}
        streams: dict[str, VesselStream] = {}
        for vessel in index["vessels"]:
            entry = await self._checkpoints.get(f"v.{vessel}")
            _, _, data = bytes(entry.value).partition(b"\n")  # "<seq>\n" + the checkpoint
            stream = checkpoint.loads(data)
            if not isinstance(stream, VesselStream) or stream.live.vessel != vessel:
                raise EngineError(f"checkpoint v.{vessel} does not hold vessel {vessel!r}")
            streams[vessel] = stream
        part = Partition(self.layout, number, self.vessels, self.source, streams)
        return part, int(index["seq"])

    async def _serve(self, lease: _Lease) -> None:
        number = lease.partition
        while True:
            try:
                part, covered = await self._load(number)
                break
            except (checkpoint.CheckpointError, EngineError) as exc:
                # a checkpoint this version cannot read: the stream still holds every
                # reading, so the partition is rebuilt from its start (same figures)
                log.error("%s: partition %d: its checkpoints are unusable (%s); rebuilding "
                          "it from the start of the stream", self.name, number, exc)  # fmt: skip
                part, covered = Partition(self.layout, number, self.vessels, self.source), 0
                break
            except NATS_ERRORS as exc:
                if lease.hand_back.is_set() or self._nc.is_closed:
                    return
                log.info("%s: loading partition %d failed (%s); again", self.name, number, exc)
                await asyncio.sleep(0.5)
        holder: list[Any] = []  # the partition's consumer, unsubscribed however it ends
        try:
            await self._serve_from(lease, part, covered + 1, holder)
        finally:
            for subscription in holder:
                with contextlib.suppress(*NATS_ERRORS):
                    await subscription.unsubscribe()

    async def _retire(self, subscription: Any, holder: list[Any]) -> None:
        """Count a consumer replaced, let it go (a broken link ignored) and forget it."""
        self.stats.consumer_restarts += 1
        with contextlib.suppress(*NATS_ERRORS):
            await subscription.unsubscribe()
        holder.clear()

    async def _serve_from(self, lease: _Lease, part: Partition, next_seq: int,
                          holder: list[Any]) -> None:  # fmt: skip
        """Read the partition's stream from ``next_seq`` and step its vessels (see
        :meth:`_serve`); the consumer in use is kept in ``holder``."""
        number = lease.partition
        saved_at = time.monotonic()
        subscription = None
        delivered = 0  # the consumer's delivery sequence of the last message it gave
        idle_since: float | None = None  # since when fetches have come back empty
        while True:
            if lease.hand_back.is_set():
                await self._checkpoint(part, next_seq - 1, lease)
                return
            if subscription is None:
                try:
                    subscription = await self._subscribe(number, next_seq)
                    holder[:] = [subscription]
                    delivered = 0
                except NATS_ERRORS as exc:
                    if self._nc.is_closed:
                        return
                    log.info("%s: partition %d: no consumer yet (%s)", self.name, number, exc)
                    await asyncio.sleep(0.5)
                    continue
            try:
                batch = await subscription.fetch(self.settings.fetch_batch, timeout=0.5)
                idle_since = None
            except nats.errors.TimeoutError:
                batch = []
                idle_since = idle_since or time.monotonic()
                if time.monotonic() - idle_since > IDLE_CHECK_S:
                    # after a node's loss a consumer can be left that answers no fetch:
                    # ask it whether it holds messages it has not delivered
                    idle_since = None
                    try:
                        info = await subscription.consumer_info()
                        healthy = info.num_pending == 0
                    except NATS_ERRORS:
                        healthy = False
                    if not healthy:
                        log.info("%s: partition %d: the consumer delivers nothing; a new one "
                                 "from %d", self.name, number, next_seq)  # fmt: skip
                        await self._retire(subscription, holder)
                        subscription = None
                        continue
            except NATS_ERRORS as exc:
                log.info("%s: partition %d: consumer failed (%r); a new one from %d",
                         self.name, number, exc, next_seq)  # fmt: skip
                await self._retire(subscription, holder)
                subscription = None
                continue
            aside: list[tuple[int, Quarantined]] = []
            lost_on_the_way = False
            slice_began = time.perf_counter()
            for msg in batch:
                if time.perf_counter() - slice_began > SLICE_S:
                    # a batch in a heat-up (a fit every few readings) takes seconds: let
                    # the lease loop and the other partitions run between slices of it
                    await asyncio.sleep(0)
                    slice_began = time.perf_counter()
                seq = msg.metadata.sequence.stream
                order = msg.metadata.sequence.consumer
                if order <= delivered:
                    continue  # the same delivery twice
                if order != delivered + 1:
                    # a delivery between was lost on the way: take nothing after it
                    # from this consumer, start a new one after the last message taken
                    log.warning("%s: partition %d: deliveries %d to %d were lost in transit;"
                                " a new consumer from stream seq %d", self.name, number,
                                delivered + 1, order - 1, next_seq)  # fmt: skip
                    self.stats.deliveries_lost += 1
                    lost_on_the_way = True
                    break
                delivered = order
                if seq < next_seq:
                    continue  # delivered again
                stamp_s = msg.metadata.timestamp.timestamp()
                for q in part.take(Message(msg.subject, msg.data, seq, stamp_s)):
                    aside.append((seq, q))
                next_seq = seq + 1
                self.stats.messages += 1
            if lost_on_the_way:
                await self._retire(subscription, holder)
                subscription = None
            await self._send(part, aside, lease)
            if time.monotonic() - saved_at >= self.settings.checkpoint_every_s and part.dirty:
                await self._checkpoint(part, next_seq - 1, lease)
                saved_at = time.monotonic()

    async def _subscribe(self, number: int, start_seq: int) -> Any:
        config = ConsumerConfig(
            deliver_policy=DeliverPolicy.BY_START_SEQUENCE, opt_start_seq=start_seq,
            ack_policy=AckPolicy.NONE, inactive_threshold=max(10.0, 4 * self.settings.lease_s),
            filter_subject=self.layout.partition_subject(number),
        )  # fmt: skip
        return await self._js.pull_subscribe(
            self.layout.partition_subject(number), stream=self.layout.stream, config=config
        )

    async def _until_done(self, what: str, work: Callable[[], Any], lease: _Lease) -> bool:
        """Await ``work()`` again while the cluster is moving; return True once it is done,
        False when the partition is being handed back and a lease time has passed, or the
        connection is closed for good (the next holder starts from the last checkpoint)."""
        began = time.monotonic()
        while True:
            try:
                await work()
                waited_s = time.monotonic() - began
                if waited_s > 1.0:
                    log.info("%s: partition %d: %s written after %.1f s",
                             self.name, lease.partition, what, waited_s)  # fmt: skip
                return True
            except NATS_ERRORS as exc:
                closing = lease.hand_back.is_set() or self._stop.is_set()
                if self._nc.is_closed or (
                    closing and time.monotonic() - began > self.settings.lease_s
                ):
                    log.warning("%s: partition %d: %s not written: %s",
                                self.name, lease.partition, what, exc)  # fmt: skip
                    return False
                log.info("%s: partition %d: %s failed (%s); again",
                         self.name, lease.partition, what, exc)  # fmt: skip
                await asyncio.sleep(0.25)

    async def _send(self, part: Partition, aside: list[tuple[int, Quarantined]],
                    lease: _Lease) -> None:  # fmt: skip
        """Put the newest estimates of the vessels stepped, only forwards, and keep what
        was set aside, trying again while the cluster is moving."""
        fresh, part.fresh = part.fresh, set()
        # after a take-over the stretch since the checkpoint is stepped again: its
        # estimates are older than those the bucket holds, and are not put back (nor
        # those of a worker whose lease lapsed, still stepping for a moment)
        fresh = {v for v in fresh if part.streams[v].seq > part.shown.get(v, (0, None))[0]}
        puts = [(v, part.streams[v].seq, _estimate_value(part.streams[v], self.name, part.number))
                for v in sorted(fresh)]  # fmt: skip
        self.stats.set_aside += len(aside)

        async def put(vessel: str, seq: int, value: bytes) -> None:
            part.shown[vessel] = await _forward(
                self._estimates, vessel, seq, value, _json_seq, part.shown.get(vessel)
            )

        if puts:
            await self._until_done("estimates", lambda: asyncio.gather(
                *(put(v, seq, value) for v, seq, value in puts)), lease)  # fmt: skip
        for seq, q in aside:
            headers = {"Nats-Msg-Id": f"{part.number}-{seq}-{q.where}"[:250]}
            subject, value = self.layout.set_aside_subject(part.number), _set_aside_value(q)
            await self._until_done("set-aside input", lambda s=subject, v=value, h=headers:
                                   self._js.publish(s, v, headers=h), lease)  # fmt: skip
        for vessel in sorted(part.ended):
            stream = part.streams[vessel]
            for summary in stream.unsent_runs:
                # a run is kept once, however often it is ended again after a take-over
                headers = {"Nats-Msg-Id": _run_id(summary)}
                subject, value = self.layout.runs_subject(vessel), encode_json(summary)
                if not await self._until_done("run summary", lambda s=subject, v=value,
                                              h=headers: self._js.publish(s, v, headers=h),
                                              lease):  # fmt: skip
                    return  # kept in the state: the next holder sends it
            self.stats.runs_sent += len(stream.unsent_runs)
            stream.unsent_runs = []
            part.dirty.add(vessel)  # the checkpoint must say they were sent
        part.ended.clear()

    async def _checkpoint(self, part: Partition, covered: int, lease: _Lease) -> None:
        """Save the vessels stepped since the last checkpoint, then the partition's index."""
        dirty = sorted(part.dirty)
        states = []
        for vessel in dirty:  # 3-5 ms each: the loop's other tasks run in between
            seq = part.streams[vessel].seq
            data = b"%d\n" % seq + checkpoint.dumps(part.streams[vessel])
            states.append((f"v.{vessel}", seq, data))
            await asyncio.sleep(0)
        index = json.dumps({"seq": covered, "vessels": sorted(part.streams)}).encode()

        async def write() -> None:
            await asyncio.gather(*(_forward(self._checkpoints, key, seq, data, _state_seq)
                                   for key, seq, data in states))  # fmt: skip
            await _forward(self._checkpoints, f"i.{part.number}", covered, index, _json_seq)

        if await self._until_done("checkpoint", write, lease):
            part.dirty.clear()
            self.stats.checkpoints += 1


Held = tuple[int, int | None]  # what a key holds: (stream seq covered, revision or None)


async def _forward(kv: Any, key: str, seq: int, value: bytes, held_seq: Callable[[bytes], int],
                   known: Held | None = None) -> Held:  # fmt: skip
    """Write ``value``, which covers the stream up to ``seq``, to a bucket's key only
    forwards: unless the key already holds a value at ``seq`` or later, by
    compare-and-set on the revision. Return what the key holds now: (seq, revision).

    Two workers can serve a partition for a moment (the one whose lease lapsed during
    an election has not yet seen its renewal fail). Both make the same figures, but the
    late one's older value must not overwrite a newer one: an older checkpoint under an
    index that has moved past it makes the next holder skip the messages between, and
    an older estimate left last in the estimates bucket shows a vessel behind for good.
    ``held_seq`` reads the sequence a stored value covers; ``known`` is the (seq,
    revision) this worker last saw at the key, saving a read when it is still so.
    """
    for _ in range(10):
        if known is None:
            try:
                entry = await kv.get(key)
                known = (_held(held_seq, entry.value), entry.revision)
            except MISSING:
                known = (0, None)
        held, revision = known
        if held >= seq:
            return known
        try:
            if revision is None:
                return (seq, await kv.create(key, value))
            return (seq, await kv.update(key, value, last=revision))
        except nats.js.errors.KeyWrongLastSequenceError:
            known = None  # written meanwhile: read it again
    raise EngineError(f"{key}: ten writers in a row got in first")


def _held(held_seq: Callable[[bytes], int], value: bytes) -> int:
    """Return the sequence a stored value covers; 0 for one that cannot be read."""
    try:
        return held_seq(bytes(value))
    except (ValueError, TypeError, KeyError, AttributeError):
        return 0


def _state_seq(value: bytes) -> int:
    """A vessel's checkpoint: ``<seq>\n`` then the state."""
    return int(value.partition(b"\n")[0])


def _json_seq(value: bytes) -> int:
    """A partition's checkpoint index, or an entry of the estimates bucket: JSON with
    ``seq``."""
    return int(json.loads(value)["seq"])


def _estimate_value(stream: VesselStream, worker: str, partition: int) -> bytes:
    """Return what the estimates bucket keeps for a vessel (docs/engine.md)."""
    return encode_json({
        "estimate": stream.latest, "seq": stream.seq, "messages": stream.messages,
        "set_aside": stream.set_aside, "estimates": stream.estimates, "digest": stream.digest,
        "worker": worker, "partition": partition,
    })  # fmt: skip


def _run_id(summary: Mapping[str, object]) -> str:
    """Return a run summary's message id in the runs stream: its vessel, run label and
    first step's time, which every worker that ends the run gives alike."""
    return f"{summary.get('vessel')}/{summary.get('run')}/{summary.get('start_t')!r}"[:250]


def _set_aside_value(q: Quarantined) -> bytes:
    return encode_json({
        "t": q.t, "source": q.source, "where": q.where, "reason": q.reason,
        "raw": q.raw.decode("utf-8", errors="backslashreplace"),
    })  # fmt: skip


def shown_servers(servers: Sequence[str]) -> str:
    """Return server URLs as they may be shown: hosts and ports, no credentials."""
    return "nats://" + ",".join(s.split("://")[-1].split("@")[-1] for s in servers)


def _said(exc: BaseException) -> str:
    """Return an error of the NATS client in one line."""
    return str(exc).strip() or type(exc).__name__


async def _connect_once(servers: Sequence[str], timeout_s: float) -> Any:
    """Connect to one of ``servers`` for a short read, trying each twice at most (the
    client's default retries for minutes); raise EngineError saying why when none will
    (refused, a certificate not trusted, a wrong password)."""
    seen: list[BaseException] = []

    async def keep(exc: Exception) -> None:  # instead of the client's traceback
        seen.append(exc)

    try:
        return await asyncio.wait_for(nats.connect(
            servers=list(servers), connect_timeout=timeout_s, max_reconnect_attempts=1,
            reconnect_time_wait=0.2, allow_reconnect=False, error_cb=keep,
        ), 2 * timeout_s + 1.0)  # fmt: skip
    except NATS_ERRORS as exc:
        why = _said(seen[-1]) if seen else _said(exc)
        where = shown_servers(servers)
        raise EngineError(f"cannot reach the NATS server at {where}: {why}") from exc


async def read_estimates(servers: Sequence[str], layout: EngineLayout | None = None,
                         vessels: Sequence[str] | None = None,
                         timeout_s: float = 5.0) -> dict[str, dict[str, Any]]:  # fmt: skip
    """Return each vessel's newest entry of the estimates bucket (the fleet view's source):
    ``{"estimate": <flat estimate>, "seq", "messages", ...}``; {} when there is none yet.

    With ``vessels`` (the configuration's) each is read by its key; without, the keys are
    listed first, which needs a consumer on the bucket and may wait out a leader
    election. A vessel without an entry is left out.
    """
    layout = layout or EngineLayout()
    nc = await _connect_once(servers, timeout_s)
    try:
        js = nc.jetstream(timeout=timeout_s)
        try:
            kv = await js.key_value(layout.estimates_bucket)
        except nats.js.errors.BucketNotFoundError:
            return {}
        if vessels is None:
            try:
                vessels = await kv.keys()
            except nats.js.errors.NoKeysError:
                return {}
        out: dict[str, dict[str, Any]] = {}
        for key in vessels:
            with contextlib.suppress(*MISSING):
                entry = await kv.get(key)
                out[key] = json.loads(entry.value)
        return out
    finally:
        await nc.close()


async def read_runs(servers: Sequence[str], layout: EngineLayout | None = None,
                    after_seq: int = 0, timeout_s: float = 5.0,
                    ) -> list[tuple[int, dict[str, Any]]]:  # fmt: skip
    """Return the run summaries in the runs stream after sequence ``after_seq``, in the
    order they were put, each with its sequence: ``[(seq, summary), ...]`` ([] when the
    stream is not there yet). A summary is the live service's (docs/run-summary.md),
    with its ``drift`` flags; :func:`monitor.records.schema.run_record` makes it a row of
    a fleet's run history."""
    layout = layout or EngineLayout()
    nc = await _connect_once(servers, timeout_s)
    try:
        js = nc.jetstream(timeout=timeout_s)
        try:
            last = (await js.stream_info(layout.runs_stream)).state.last_seq
        except nats.js.errors.NotFoundError:
            return []
        out: list[tuple[int, dict[str, Any]]] = []
        if last <= after_seq:
            return out
        config = ConsumerConfig(deliver_policy=DeliverPolicy.BY_START_SEQUENCE,
                                opt_start_seq=after_seq + 1, ack_policy=AckPolicy.NONE,
                                inactive_threshold=30.0)  # fmt: skip
        sub = await js.pull_subscribe(layout.runs_subject("*"), stream=layout.runs_stream,
                                      config=config)  # fmt: skip
        try:
            seq, delivered = after_seq, 0
            while seq < last:
                for msg in await sub.fetch(256, timeout=timeout_s):
                    delivered += 1
                    if msg.metadata.sequence.consumer != delivered:
                        return out  # one lost on the way: the next read starts after seq
                    seq = msg.metadata.sequence.stream
                    with contextlib.suppress(ValueError):
                        summary = json.loads(msg.data)
                        if isinstance(summary, dict):
                            out.append((seq, summary))
        finally:
            with contextlib.suppress(*NATS_ERRORS):
                await sub.unsubscribe()
        return out
    finally:
        await nc.close()


def engine_servers(text: str) -> list[str]:
    """Return the NATS server URLs of an ``--engine`` option (comma-separated); raise
    EngineError naming the option when one is not ``nats://`` or ``tls://``."""
    servers = [url.strip() for url in text.split(",") if url.strip()]
    if not servers or not all(url.startswith(("nats://", "tls://")) for url in servers):
        raise EngineError(f"--engine {text!r}: give nats://HOST:PORT[,nats://...]")
    return servers


def engine_vessels(config: RigConfig) -> dict[str, VesselSpec]:
    """Return the vessels a worker serves from a rig configuration.

    With the engine every reading comes from the stream (instruments publish over MQTT
    to the NATS server), so a configuration with ``[[instruments]]`` is refused rather
    than have them silently go unread.
    """
    if config.instruments:
        raise EngineError(
            f"{config.path}: with --engine the readings come from the NATS stream; "
            "[[instruments]] are read by `ebullio run` without --engine"
        )
    return {v.id: v for v in config.vessels}


def engine_layout(config: RigConfig, partitions: int) -> EngineLayout:
    """Return the layout for a configuration: its ``[mqtt] prefix`` and ``partitions``."""
    prefix = config.mqtt.prefix if config.mqtt is not None else "ebullio"
    return EngineLayout(prefix=prefix, partitions=partitions)
