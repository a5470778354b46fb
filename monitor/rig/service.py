"""The live service behind ``ebullio run``: sources, one queue, the recorder, the estimators.

Shape (all in one asyncio loop, except the recorder's SQLite writes)::

    source tasks ──► bounded queue ──► consumer ──► LiveVessel per vessel ──► estimates
     (supervised)                          │                                     │
                                           └──► recorder thread (SQLite) ◄───────┤
                                                                                 └──► MQTT publisher

* **Sources.** Each instrument, and the MQTT broker when the configuration has one,
  runs in its own named task under :func:`supervise`: it opens a fresh driver
  (:func:`drivers.registry.open_source`), forwards what the driver yields, and when
  the driver raises :class:`~drivers.errors.DriverError` it records a ``link_lost``
  event, waits a capped, jittered, exponential backoff (:class:`Backoff`) and opens
  a new driver.
  When the link is back it records a ``gap`` event from the last item before the loss
  to the first one after it, so the log shows the gap as a gap.
* **Back-pressure.** The queue holds ``[recorder] queue_samples`` items. When it is
  full a source waits (it does not drop): a serial port's or the broker's own buffer
  then holds the data, and for MQTT at QoS 1 the broker keeps the unacknowledged
  messages (see the broker notes in DEVELOPERS.md: raise Mosquitto's
  ``max_queued_messages``). Every wait is counted (``backpressure_waits``, and the
  seconds spent, ``backpressure_s``) and recorded as an event, so a slow consumer
  never loses data silently.
* **Consumer.** Takes everything queued at once, hands samples and quarantined input
  to the recorder thread, feeds each vessel's :class:`~monitor.runs.live.InstantAssembler`
  and, when the queue is empty, closes the open instants and steps the filters.
  Samples of vessels the configuration does not know are quarantined with that reason.
  A value no instrument could give (not finite, a temperature at or below absolute
  zero, a power far above the vessel's; :class:`drivers.sample.ReadingLimits`) is
  recorded as a ``fault`` sample (NaN), its value kept in the quarantine with the
  reason, and never given to the filter. A failure inside one vessel's filter stays
  with that vessel (:meth:`monitor.estimation.estimator.VesselEstimator.step`).
* **Recorder thread.** Owns the SQLite connection. It commits one block every
  ``[recorder] commit_interval_s`` (default 1 s); what was committed stays (WAL, see
  :mod:`monitor.records.recorder`). MQTT readings are acknowledged to the broker only after
  the commit that holds them (:class:`~drivers.channels.Acknowledge`, sent from the
  loop's thread), so a crash loses nothing acknowledged: the broker delivers the rest
  again and the recorder records each reading once (``once_from``). When half the
  broker's in-flight window (``[mqtt] inflight_window``) waits, it commits at once.
* **Publisher.** The latest estimate of each vessel, and its flags when they change,
  are published retained on ``<prefix>/<vessel>/estimate`` and ``.../flags``. When the
  broker is slower than the estimates, only the newest estimate per vessel is sent
  (``estimates_coalesced`` counts the ones skipped); every estimate is still recorded,
  or with ``[recorder] estimate_interval_s`` one per vessel per interval and each whose
  phase or flags changed (``estimates_not_recorded`` counts the others).
* **Stopping.** :meth:`Service.stop` (SIGINT or SIGTERM from ``ebullio run``) cancels
  the sources (their drivers close), drains the queue, steps the last instants,
  commits the last block and closes the log.
"""

from __future__ import annotations

import asyncio
import contextlib
import gc
import logging
import math
import os
import queue
import random
import threading
import time
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any, Protocol
from urllib.parse import urlsplit, urlunsplit

from drivers.channels import Acknowledge, Quarantined
from drivers.errors import DriverError, EbullioError
from drivers.registry import open_source
from drivers.sample import ReadingLimits, Sample
from monitor import __version__
from monitor.estimation.batchfit import FitBudget, warm_up
from monitor.records.recorder import Recorder
from monitor.records.schema import flag_record, flatten_estimate, run_record
from monitor.rig.config import Instrument, MqttSettings, RigConfig
from monitor.runs.live import LiveVessel, screen_sample

log = logging.getLogger("ebullio.service")

#: The share of one core the vessels' heat-up fits may take between them at the start
#: (:class:`monitor.estimation.batchfit.FitBudget`). When many vessels heat up at once their
#: fits wait their turn rather than the readings: bench_ingest.py's 1,000 kettles
#: all heating fell 40 % behind the readings without it (2026-12-05). Every
#: ``FIT_RETUNE_S`` the share then follows the slack (``FitBudget.retune``): what the
#: service's thread spent on everything else over that time, taken from 0.8 of the
#: core (judgement: room for the recorder thread's hold on the interpreter lock).
FIT_CPU_SHARE = 0.15
FIT_RETUNE_S = 2.0
#: At most one log line per source this often (s) about input set aside: a publisher
#: gone wrong must not flood the service's log. Every item is in the log's quarantine.
QUARANTINE_NOTE_S = 10.0

#: A driver factory: called for every (re)connection, returns an unentered driver.
DriverFactory = Callable[[], Any]


@dataclass
class Backoff:
    """Capped exponential backoff with jitter: ``next_s()`` returns the wait in seconds.

    The n-th wait is ``min(cap_s, base_s·2ⁿ)`` times a factor drawn uniformly from
    0.5-1.0, so many sources that lost the same link do not all retry at once.
    ``reset()`` after a good connection.
    """

    base_s: float = 0.5
    cap_s: float = 30.0
    rng: random.Random = field(default_factory=lambda: random.Random(0))
    attempts: int = 0

    def next_s(self) -> float:
        """Return the next wait in seconds."""
        wait = min(self.cap_s, self.base_s * 2.0**self.attempts)
        self.attempts += 1
        return wait * self.rng.uniform(0.5, 1.0)

    def reset(self) -> None:
        """Start again from the shortest wait."""
        self.attempts = 0


@dataclass
class Stats:
    """What the service counted; printed at the end of ``ebullio run`` and kept in the log."""

    samples: int = 0
    quarantined: int = 0
    steps: int = 0
    estimates: int = 0
    published: int = 0
    estimates_coalesced: int = 0
    estimates_not_recorded: int = 0  # left out of the log by [recorder] estimate_interval_s
    reconnects: int = 0
    link_losses: int = 0
    backpressure_waits: int = 0
    backpressure_s: float = 0.0
    blocks: int = 0
    repeats_skipped: int = 0  # readings a broker delivered again, recorded once
    fits_deferred: int = 0  # steps at which a due heat-up fit waited for the fit budget
    fit_cpu_s: float = 0.0

    def as_dict(self) -> dict[str, float]:
        """Return the counters as a JSON-ready dict."""
        return dict(self.__dict__)


def public_url(url: str) -> str:
    """Return ``url`` without a user name or password (for logs and sample sources)."""
    parts = urlsplit(url)
    if parts.username is None and parts.password is None:
        return url
    host = parts.hostname or ""
    if parts.port:
        host = f"{host}:{parts.port}"
    return urlunsplit((parts.scheme, host, parts.path, parts.query, parts.fragment))


def instrument_factory(inst: Instrument, clock: Callable[[], float]) -> DriverFactory:
    """Return a factory of fresh drivers for a configured instrument (``drivers.registry``)."""
    return lambda: open_source(inst.url, bindings=inst.bindings, clock=clock, **inst.options)


async def supervise(
    name: str,
    factory: DriverFactory,
    deliver: Callable[[Sample | Quarantined], Any],
    event: Callable[[float, str, str, str], None],
    stats: Stats,
    clock: Callable[[], float] = time.time,
    backoff: Backoff | None = None,
) -> None:
    """Run one source for ever: open, forward each item to ``deliver``, reconnect on loss.

    ``deliver`` is awaited; ``event(t, kind, source, detail)`` records link events.
    Returns only when cancelled.
    """
    backoff = backoff or Backoff(rng=random.Random(name))
    lost_at: float | None = None
    last_item_t: float | None = None
    while True:
        try:
            async with factory() as driver:
                if lost_at is not None:
                    stats.reconnects += 1
                    log.info("%s: connected again", name)
                async for item in driver.samples():
                    now = clock()
                    if lost_at is not None:
                        event(now, "gap", name, f"from {last_item_t or lost_at:.3f} to {now:.3f}")
                        lost_at = None
                        backoff.reset()
                    last_item_t = now
                    await deliver(item)
                raise DriverError(f"{name}: the source ended")
        except DriverError as exc:
            stats.link_losses += 1
            now = clock()
            if lost_at is None:
                lost_at = now
            event(now, "link_lost", name, str(exc))
            wait_s = backoff.next_s()
            log.warning("%s: %s; retrying in %.1f s", name, exc, wait_s)
            await asyncio.sleep(wait_s)


def row_adders(
    rec: Recorder, redelivering: frozenset[str] = frozenset()
) -> dict[str, Callable[[Any], object]]:
    """Return how each kind of rows the service hands over (:meth:`RecorderThread.put`)
    goes into ``rec``: the one rule, for the live recorder thread and for a history
    written flat out (:mod:`monitor.rig.history`)."""
    return {
        # a reading a source may deliver again (MQTT, acknowledged after the commit)
        # is recorded once; every other source's samples are all kept
        "samples": lambda rows: rec.add_samples(rows, once_from=redelivering),
        "quarantined": rec.add_quarantined,
        "estimates": rec.add_estimates,
        "flags": rec.add_flags,
        "event": lambda e: rec.add_event(*e),
        "runs": lambda runs: [rec.add_run(**r) for r in runs],
    }


class RowSink(Protocol):
    """Where the service hands the rows it records: :class:`RecorderThread`, or a list
    kept for a history written flat out."""

    def put(self, kind: str, rows: Any) -> None: ...


class RecorderThread:
    """The recorder in its own thread: rows go in through a queue, a block every interval."""

    def __init__(
        self, path: str, config_text: str | None, vessels: Mapping[str, Mapping[str, object]],
        commit_interval_s: float, stats: Stats,
        loop: asyncio.AbstractEventLoop | None = None, ack_early: int = 0,
        key: bytes | None = None,
        on_head: Callable[[dict[str, object]], None] | None = None,
        redelivering: frozenset[str] = frozenset(),
    ) -> None:  # fmt: skip
        self._queue: queue.SimpleQueue[tuple[str, Any] | None] = queue.SimpleQueue()
        self._loop = loop  # where acknowledgements are sent from (the sources' loop)
        self._acks: list[Acknowledge] = []  # queued behind rows not yet committed
        self._ack_early = ack_early  # commit at once when this many acks wait (0: never)
        self._on_head = on_head  # called in the loop's thread with each new chain head
        self.redelivering = redelivering  # sources that may deliver a reading again
        self._head_sent: object = None
        self._interval_s = commit_interval_s
        self._stats = stats
        self._error: BaseException | None = None
        # open here so a bad path fails before the sources start; then hand it over
        self._recorder = Recorder(path, version=__version__, config_text=config_text, key=key)
        for vessel, metadata in vessels.items():
            self._recorder.add_vessel(vessel, dict(metadata))
        self._recorder.commit()
        self._thread = threading.Thread(target=self._run, name="ebullio-recorder", daemon=True)

    def start(self) -> None:
        """Start the writer thread."""
        self._thread.start()

    def put(self, kind: str, rows: Any) -> None:
        """Queue rows of one kind (samples, quarantined, estimates, flags, event) for writing."""
        self._queue.put((kind, rows))

    def _run(self) -> None:
        rec = self._recorder
        adders = {
            **row_adders(rec, self.redelivering),
            "acks": lambda acks: self._acks.extend(acks),  # self._acks is replaced on send
        }
        deadline = time.monotonic() + self._interval_s
        try:
            while True:
                timeout = max(0.0, deadline - time.monotonic())
                try:
                    item = self._queue.get(timeout=timeout)
                except queue.Empty:
                    item = ("tick", None)
                if item is None:
                    break
                kind, rows = item
                if kind != "tick":
                    adders[kind](rows)
                early = self._ack_early and len(self._acks) >= self._ack_early
                if early or time.monotonic() >= deadline:
                    if rec.commit() is not None:
                        self._stats.blocks += 1
                    self._after_commit()
                    deadline = time.monotonic() + self._interval_s
            if rec.commit() is not None:
                self._stats.blocks += 1
            self._after_commit()
        except BaseException as exc:  # kept and raised again in the loop by close()
            self._error = exc
            log.exception("recorder: writing the log failed")
        finally:
            rec.close()

    def _after_commit(self) -> None:
        """Send the acknowledgements of everything committed so far, in arrival order, and
        hand a new chain head to the publisher.

        Called right after a commit, so every acknowledgement queued before it covers
        rows that are on disk now. They are sent from the loop's thread (the MQTT
        client is not thread-safe); one whose link has gone sends nothing, and the
        broker delivers that message again (recorded once: ``once_from``).
        """
        acks, self._acks = self._acks, []
        self._stats.repeats_skipped = self._recorder.repeats_skipped
        head = self._recorder.last_head
        new_head = self._on_head is not None and head is not self._head_sent
        if (not acks and not new_head) or self._loop is None:
            return
        try:
            if acks:
                self._loop.call_soon_threadsafe(_send_acks, acks)
            if new_head:
                self._head_sent = head
                self._loop.call_soon_threadsafe(self._on_head, head)  # type: ignore[arg-type]
        except RuntimeError:  # the loop has closed: nothing is acknowledged, all redelivered
            log.warning("recorder: %d acknowledgements not sent (the loop had stopped)", len(acks))

    def close(self) -> None:
        """Write what is queued, commit the last block, close the log (blocks: call in a thread)."""
        self._queue.put(None)
        self._thread.join()
        if self._error is not None:
            raise EbullioError(f"the recorder failed: {self._error}") from self._error


def _ack_early(mqtt: MqttSettings | None) -> int:
    """Return how many waiting acknowledgements make the recorder commit at once: half
    the broker's in-flight window (``[mqtt] inflight_window``; 0 for no limit: never)."""
    window = mqtt.inflight_window if mqtt is not None else 0
    return max(window // 2, 1) if window else 0


def _redelivering(mqtt: MqttSettings | None) -> frozenset[str]:
    """Return the sources that may deliver a reading again: the MQTT driver's (the
    ``source`` it stamps on its samples), none without a broker."""
    if mqtt is None:
        return frozenset()
    from drivers.mqtt import parse_mqtt_url

    return frozenset([parse_mqtt_url(mqtt.url).source])


def _send_acks(acks: list[Acknowledge]) -> None:
    """Send acknowledgements in order (in the loop's thread); a failure is logged, not raised."""
    for ack in acks:
        try:
            ack.send()
        except Exception as exc:  # the link went: the broker will deliver the message again
            log.debug("%s: an acknowledgement was not sent: %s", ack.source, exc)


class Service:
    """``ebullio run``: see the module docstring. ``await Service(...).run()`` until ``stop()``."""

    def __init__(
        self,
        config: RigConfig,
        log_path: str,
        *,
        clock: Callable[[], float] = time.time,
        extra_sources: Mapping[str, DriverFactory] | None = None,
        on_estimate: Callable[[dict[str, object]], None] | None = None,
        fits_on_time: bool = False,
    ) -> None:
        self.config = config
        self.log_path = log_path
        self.clock = clock
        self.stats = Stats()
        self.fit_budget = FitBudget(FIT_CPU_SHARE)
        budget = None if fits_on_time else self.fit_budget
        self.vessels = {
            v.id: LiveVessel(v.id, v.metadata, v.has_element_sensor, fit_budget=budget)
            for v in config.vessels
        }
        #: what each vessel's readings may physically be (drivers.sample.ReadingLimits)
        self.limits = {v.id: ReadingLimits.from_metadata(v.metadata) for v in config.vessels}
        self.sources: dict[str, DriverFactory] = {
            public_url(i.url): instrument_factory(i, clock) for i in config.instruments
        }
        mqtt = config.mqtt
        if mqtt is not None and any(v.via_mqtt for v in config.vessels):
            mqtt_vessels = [v.id for v in config.vessels if v.via_mqtt]
            client_id = f"{mqtt.client_id}-in" if mqtt.client_id else None
            self.sources[public_url(mqtt.url)] = lambda: open_source(
                mqtt.url, prefix=mqtt.prefix, vessels=mqtt_vessels, client_id=client_id,
                username=mqtt.username, password=mqtt.password,
                session_expiry_s=mqtt.session_expiry_s, clock=clock, ack_after=True,
            )  # fmt: skip
        self.sources.update(extra_sources or {})
        self.on_estimate = on_estimate
        self._queue: asyncio.Queue[Sample | Quarantined | Acknowledge] = asyncio.Queue(
            config.queue_samples
        )
        self._stop = asyncio.Event()
        self._recorder: RecorderThread | None = None
        self._to_publish: dict[str, dict[str, object]] = {}
        self._flags_to_publish: dict[str, list[dict[str, object]]] = {}
        self._estimate_rows: list[dict[str, object]] = []
        self._flag_rows: list[dict[str, object]] = []
        self._flags_sent: dict[str, tuple[str, ...]] = {}
        # each vessel's last estimate in the log: (time, phase, flags)
        self._recorded: dict[str, tuple[float, str, tuple[str, ...]]] = {}
        self._head_to_publish: dict[str, object] | None = None  # the newest chain head
        self._publish_ready = asyncio.Event()
        self._faulted: set[str] = set()  # vessels whose failure has been logged in full
        self._element_told: set[str] = set()  # vessels told their element readings go unused
        # set-aside input not yet told in the service's log, by source: (count, latest reason)
        self._untold: dict[str, tuple[int, str]] = {}
        self._told_at: dict[str, float] = {}
        self.started = asyncio.Event()

    def stop(self) -> None:
        """Ask the service to stop cleanly (safe to call from a signal handler)."""
        self._stop.set()

    def _new_head(self, head: dict[str, object]) -> None:
        """Take the chain head after a commit (in the loop's thread) for the publisher."""
        self._head_to_publish = head
        self._publish_ready.set()

    def _event(self, t: float, kind: str, source: str, detail: str) -> None:
        if self._recorder is not None:
            self._recorder.put("event", (t, kind, source, detail))

    async def _deliver(self, item: Sample | Quarantined | Acknowledge) -> None:
        try:
            self._queue.put_nowait(item)
            return
        except asyncio.QueueFull:
            pass
        began = time.monotonic()
        self.stats.backpressure_waits += 1
        await self._queue.put(item)
        waited = time.monotonic() - began
        self.stats.backpressure_s += waited
        source = item.source
        self._event(self.clock(), "backpressure", source, f"waited {waited:.3f} s for queue space")

    def _take(self, items: list[Sample | Quarantined | Acknowledge]) -> None:
        samples: list[Sample] = []
        quarantined: list[Quarantined] = []
        acks: list[Acknowledge] = []
        touched: dict[str, LiveVessel] = {}
        for item in items:
            if isinstance(item, Quarantined):
                quarantined.append(item)
                continue
            if isinstance(item, Acknowledge):
                acks.append(item)
                continue
            vessel = self.vessels.get(item.vessel)
            if vessel is None:
                quarantined.append(
                    Quarantined(
                        item.t,
                        item.source,
                        f"vessel {item.vessel!r}",
                        f"vessel {item.vessel!r} is not in the configuration",
                        repr(item).encode(),
                    )
                )
                continue
            item, kept = screen_sample(item, self.limits[item.vessel])
            if kept is not None:  # kept as it came, and never given to the filter
                quarantined.append(kept)
            samples.append(item)
            touched[item.vessel] = vessel
            try:  # as _isolated, written out: this runs for every reading
                steps = vessel.assembler.feed(item, 0)
                if steps:
                    self._steps(vessel, steps)
            except Exception as exc:  # one vessel's failure must not stop the others
                self._vessel_failed(vessel, item.t, exc)
        for vessel in touched.values():  # only these can have an open instant
            self._isolated(vessel, None, lambda v=vessel: self._steps(v, v.assembler.flush()))
        self.stats.samples += len(samples)
        self.stats.quarantined += len(quarantined)
        if quarantined or self._untold:
            self._tell_quarantine(quarantined)
        assert self._recorder is not None
        if samples:
            self._recorder.put("samples", samples)
        if quarantined:
            self._recorder.put("quarantined", quarantined)
        if acks:  # behind the rows they cover: sent once those are committed
            self._recorder.put("acks", acks)
        self._flush_to_recorder()

    def _tell_quarantine(self, items: list[Quarantined], *, now: float | None = None,
                         everything: bool = False) -> None:  # fmt: skip
        """Log set-aside input at a bounded rate: one line per source per
        ``QUARANTINE_NOTE_S`` with the count since the last line and the latest reason
        (the first item of a source is told at once). ``everything`` tells the rest."""
        for q in items:
            count, _ = self._untold.get(q.source, (0, ""))
            self._untold[q.source] = (count + 1, q.reason)
        now = time.monotonic() if now is None else now
        for source, (count, reason) in list(self._untold.items()):
            if everything or now - self._told_at.get(source, -math.inf) >= QUARANTINE_NOTE_S:
                words = "%s: %d input(s) set aside since the last note, the latest because %s"
                log.warning(words + " (all kept in the log's quarantine)", source, count, reason)
                self._told_at[source] = now
                del self._untold[source]

    def _tell_unused_element(self, vessel: LiveVessel, t: float) -> None:
        """Say once per vessel that element readings arrive but are not used."""
        if vessel.vessel in self._element_told:
            return
        self._element_told.add(vessel.vessel)
        words = (
            f"vessel {vessel.vessel}: its readings carry an element temperature, but it is "
            "configured without an element thermocouple (element_sensor = false): the "
            "one-node model is used and the element readings are only recorded. Set "
            "element_sensor = true in its [[vessels]] table to use them."
        )
        log.warning("%s", words)
        self._event(t, "config_notice", vessel.vessel, words)

    def _steps(self, vessel: LiveVessel, steps: list[Any]) -> None:
        for step in steps:
            self._step(vessel, step)

    def _isolated(self, vessel: LiveVessel, t: float | None, work: Callable[[], None]) -> None:
        """Run one vessel's ``work``; a failure stays with that vessel and is recorded.

        The estimator guards its own filter (``VesselEstimator.step``); this catches
        the rest of a vessel's code (assembling instants, splitting runs, summaries and
        drift). The traceback is logged once per vessel, every failure is recorded as a
        ``vessel_fault`` event, and the other vessels go on. The readings themselves
        are recorded before any of this runs.
        """
        try:
            work()
        except Exception as exc:  # one vessel's failure must not stop the others
            self._vessel_failed(vessel, t, exc)

    def _vessel_failed(self, vessel: LiveVessel, t: float | None, exc: Exception) -> None:
        """Log (the traceback once per vessel) and record a failure of one vessel's work."""
        first = vessel.vessel not in self._faulted
        self._faulted.add(vessel.vessel)
        if first:
            log.exception("vessel %s: its processing failed; it goes on", vessel.vessel)
        else:
            log.warning("vessel %s: its processing failed again: %s", vessel.vessel, exc)
        when = t if t is not None else self.clock()
        self._event(when, "vessel_fault", vessel.vessel, f"{type(exc).__name__}: {exc}")

    def _flush_to_recorder(self) -> None:
        """Hand the estimates and flags gathered so far to the recorder thread."""
        assert self._recorder is not None
        if self._estimate_rows:  # one hand-over per batch, not one per estimate
            self._recorder.put("estimates", self._estimate_rows)
            self._estimate_rows = []
        if self._flag_rows:
            self._recorder.put("flags", self._flag_rows)
            self._flag_rows = []

    def _step(self, vessel: LiveVessel, step: Any) -> None:
        self.stats.steps += 1
        if "element" in step.values and not vessel.config.has_element_sensor:
            self._tell_unused_element(vessel, step.t)
        e = vessel.step(step)
        if vessel.ended:  # a run ended: its summary and drift flags go in the log now
            assert self._recorder is not None
            self._recorder.put("runs", [run_record(r) for r in vessel.ended])
            vessel.ended = []
        for t, label in vessel.begun:  # kept, so a restart numbers on after a killed run
            self._event(t, RUN_BEGUN, vessel.vessel, label)
        vessel.begun.clear()
        if e is None:
            return
        self.stats.estimates += 1
        # one flat form: published as it is, and the recorder's estimates row
        record = flatten_estimate(e, vessel=vessel.vessel, run=str(vessel.run_number), t=step.t)
        names = tuple(sorted(f.name for f in e.flags))
        if self._to_record(vessel.vessel, step.t, str(e.phase), names):
            self._estimate_rows.append(record)
        else:
            self.stats.estimates_not_recorded += 1
        if names != self._flags_sent.get(vessel.vessel):
            self._flags_sent[vessel.vessel] = names
            self._flag_rows += [flag_record(step.t, vessel.vessel, f) for f in e.flags]
            self._flags_to_publish[vessel.vessel] = record["flags"]  # type: ignore[assignment]
        if vessel.vessel in self._to_publish:
            self.stats.estimates_coalesced += 1
        self._to_publish[vessel.vessel] = record
        self._publish_ready.set()
        if self.on_estimate is not None:
            self.on_estimate(record)

    def _to_record(self, vessel: str, t: float, phase: str, flags: tuple[str, ...]) -> bool:
        """Return whether this estimate of ``vessel`` goes in the log: every one, or with
        ``[recorder] estimate_interval_s`` one per interval and each whose phase or flags
        differ from the last recorded (so no change of either is missing from the log)."""
        interval = self.config.estimate_interval_s
        if not interval:
            return True
        last = self._recorded.get(vessel)
        if last is not None and t - last[0] < interval and last[1] == phase and last[2] == flags:
            return False
        self._recorded[vessel] = (t, phase, flags)
        return True

    async def _consume(self) -> None:
        while True:
            items = [await self._queue.get()]
            while True:
                try:
                    items.append(self._queue.get_nowait())
                except asyncio.QueueEmpty:
                    break
            self._take(items)

    async def _retune_fits(self) -> None:
        """Every ``FIT_RETUNE_S``, give the fits what the rest of the work left of the core.

        Runs in the loop's thread, so ``time.thread_time`` is that thread's CPU: the
        consumer, the filters, the MQTT clients and the fits themselves (taken out).
        """
        budget = self.fit_budget
        cpu, wall, spent = time.thread_time(), time.monotonic(), budget.spent_s
        while True:
            await asyncio.sleep(FIT_RETUNE_S)
            cpu_now, wall_now, spent_now = time.thread_time(), time.monotonic(), budget.spent_s
            if wall_now > wall:
                budget.retune(((cpu_now - cpu) - (spent_now - spent)) / (wall_now - wall))
            cpu, wall, spent = cpu_now, wall_now, spent_now

    async def _publish(self) -> None:
        mqtt = self.config.mqtt
        if mqtt is None or not mqtt.publish:
            await asyncio.Event().wait()  # nothing to publish to: wait to be cancelled
            return
        from drivers.mqtt import MqttPublisher

        backoff = Backoff(rng=random.Random("publisher"))
        client_id = f"{mqtt.client_id}-out" if mqtt.client_id else None
        while True:
            try:
                async with MqttPublisher(
                    mqtt.url, prefix=mqtt.prefix, client_id=client_id,
                    username=mqtt.username, password=mqtt.password,
                ) as pub:  # fmt: skip
                    backoff.reset()
                    while True:
                        await self._publish_ready.wait()
                        self._publish_ready.clear()
                        estimates, self._to_publish = self._to_publish, {}
                        flags, self._flags_to_publish = self._flags_to_publish, {}
                        head, self._head_to_publish = self._head_to_publish, None
                        try:
                            # all at once: each flags publish waits for its own PUBACK. Every
                            # outcome is collected (return_exceptions), so a lost link leaves
                            # no failed future unretrieved; the first failure is raised.
                            outcomes = await asyncio.gather(
                                *(pub.publish_estimate(v, r) for v, r in estimates.items()),
                                *(pub.publish_flags(v, f) for v, f in flags.items()),
                                *([pub.publish_head(head)] if head is not None else []),
                                return_exceptions=True,
                            )
                            failed = [o for o in outcomes if isinstance(o, BaseException)]
                            if failed:
                                raise failed[0]
                        except DriverError:
                            for v, r in estimates.items():  # send again after reconnecting
                                self._to_publish.setdefault(v, r)
                            for v, f in flags.items():
                                self._flags_to_publish.setdefault(v, f)
                            if self._head_to_publish is None:
                                self._head_to_publish = head
                            raise
                        self.stats.published += len(estimates)
            except DriverError as exc:
                self._publish_ready.set()  # what is pending goes out after the reconnect
                wait_s = backoff.next_s()
                log.warning("publisher: %s; retrying in %.1f s", exc, wait_s)
                await asyncio.sleep(wait_s)

    async def run(self) -> Stats:
        """Run until :meth:`stop`; return the counters. The log is closed on return."""
        vessels_meta = {v.id: v.metadata for v in self.config.vessels}
        earlier, begun = await asyncio.to_thread(_earlier_runs, self.log_path)
        await asyncio.to_thread(warm_up)  # the fit's kernels compiled before any reading
        for name, vessel in self.vessels.items():
            vessel.resume(earlier.get(name, []), begun.get(name, 0))
        self._recorder = await asyncio.to_thread(
            RecorderThread, self.log_path, self.config.text, vessels_meta,
            self.config.commit_interval_s, self.stats, asyncio.get_running_loop(),
            _ack_early(self.config.mqtt), self.config.log_key, self._new_head,
            _redelivering(self.config.mqtt),
        )  # fmt: skip
        self._recorder.start()
        # What is built by now (every vessel's filter, the modules) lives as long as the
        # service: out of the cycle collector's sight, its full collections no longer walk
        # it (at 1,000 vessels each took up to 0.1 s and held every reading behind it). The
        # filters hold no reference cycles, so one a run's end drops is still freed.
        # Collected first, so no garbage is frozen; let go of when the service stops.
        gc.collect()
        gc.freeze()
        self._event(self.clock(), "start", "service", f"ebullio {__version__}")
        try:
            async with asyncio.TaskGroup() as group:
                sources = [
                    group.create_task(
                        supervise(
                            name, factory, self._deliver, self._event, self.stats, self.clock
                        ),
                        name=f"source {name}",
                    )
                    for name, factory in self.sources.items()
                ]
                consumer = group.create_task(self._consume(), name="consumer")
                retuner = group.create_task(self._retune_fits(), name="fit budget")
                publisher = group.create_task(self._publish(), name="publisher")
                self.started.set()
                await self._stop.wait()
                await _cancel_all(sources)
                consumer.cancel()
                retuner.cancel()
                with contextlib.suppress(asyncio.CancelledError):
                    await consumer
                with contextlib.suppress(asyncio.CancelledError):
                    await retuner
                leftovers: list[Sample | Quarantined | Acknowledge] = []
                while not self._queue.empty():
                    leftovers.append(self._queue.get_nowait())
                self._take(leftovers)
                self._finish_vessels()
                await self._flush_publish(publisher)
        finally:
            gc.unfreeze()
            self.stats.fits_deferred = self.fit_budget.deferred
            self.stats.fit_cpu_s = round(self.fit_budget.spent_s, 3)
            self._event(self.clock(), "stop", "service", repr(self.stats.as_dict()))
            await asyncio.to_thread(self._recorder.close)
        return self.stats

    def _finish_vessels(self) -> None:
        """Step what each vessel still holds and record the runs open at the stop."""
        for vessel in self.vessels.values():  # as a replay ends: nothing left waiting
            self._isolated(vessel, None, lambda v=vessel: self._steps(v, v.assembler.finish()))
        self._flush_to_recorder()
        self._tell_quarantine([], everything=True)
        self._record_runs()

    def process_flat_out(self, batches: Iterable[list[Sample]], sink: RowSink) -> None:
        """Process recorded-to-be readings with no loop, no sources and no clock, and hand
        every row the live service would record to ``sink`` (``put(kind, rows)``), runs
        ended at the end as at a stop: a simulated history written at full speed
        (:mod:`monitor.rig.history`) is what this service would have recorded live.

        Call it on a fresh service, once. Fits are made when due only if the service was
        built with ``fits_on_time`` (else the live budget may put some off).
        """
        self._recorder = sink  # type: ignore[assignment]
        try:
            for batch in batches:
                self._take(batch)  # type: ignore[arg-type]
            self._finish_vessels()
        finally:
            self._recorder = None

    def _record_runs(self) -> None:
        """Record the run each vessel is in as the service stops (ended runs are in already)."""
        assert self._recorder is not None
        rows: list[dict[str, object]] = []

        def end(vessel: LiveVessel) -> None:
            summary = vessel.end_run()
            if summary is not None:
                rows.append(run_record(summary | {"ended_by": "stop"}))

        for vessel in self.vessels.values():
            self._isolated(vessel, None, lambda v=vessel: end(v))
        if rows:
            self._recorder.put("runs", rows)

    async def _flush_publish(self, publisher: asyncio.Task[None]) -> None:
        """Give the publisher a moment to send the last estimates, then stop it."""
        if self._to_publish and self.config.mqtt is not None and self.config.mqtt.publish:
            with contextlib.suppress(TimeoutError):
                async with asyncio.timeout(2.0):
                    while self._to_publish:
                        await asyncio.sleep(0.02)
        publisher.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await publisher


async def _cancel_all(tasks: list[asyncio.Task[None]], patience_s: float = 10.0) -> None:
    """Cancel ``tasks`` and wait for them, cancelling again every 0.2 s.

    A library that swallows a cancellation (pymodbus can, mid-request) would
    otherwise keep a source running after the service was told to stop.
    """
    deadline = time.monotonic() + patience_s
    pending = set(tasks)
    while pending:
        for task in pending:
            task.cancel()
        _, pending = await asyncio.wait(pending, timeout=0.2)
        if pending and time.monotonic() > deadline:
            names = ", ".join(t.get_name() for t in pending)
            log.error("sources still running %.0f s after the stop: %s", patience_s, names)
            deadline = time.monotonic() + patience_s


#: The event kind recorded as a vessel's run begins (source: the vessel; detail: its label).
RUN_BEGUN = "run_begun"


def _earlier_runs(path: str) -> tuple[dict[str, list[dict[str, object]]], dict[str, int]]:
    """Return the live run summaries an existing log holds, by vessel, and each vessel's
    highest run number begun (a ``run_begun`` event; a killed process left no summary)."""
    from monitor.records.recorder import is_recorder_log, read_events, read_runs

    if not os.path.exists(path) or not is_recorder_log(path):
        return {}, {}
    out: dict[str, list[dict[str, object]]] = {}
    for row in read_runs(path):
        summary = row.get("summary")
        if isinstance(summary, dict) and summary.get("source") == "live":
            out.setdefault(str(row["vessel"]), []).append(summary)
    begun: dict[str, int] = {}
    for event in read_events(path):
        label = str(event.get("detail"))
        if event.get("kind") == RUN_BEGUN and label.isdigit():
            vessel = str(event.get("source"))
            begun[vessel] = max(begun.get(vessel, 0), int(label))
    return out, begun
