"""From a stream of samples to filter steps, the same way live and in a replay of a recorded log.

Instruments report channels at their own instants: a line logger gives water and
element temperatures in one line, a power meter is polled on its own clock, an MQTT
``reading`` message carries several channels at once. The filter wants one set of
readings per step. :class:`InstantAssembler` makes those sets, per vessel, by a rule
that depends only on the order and time stamps of the samples, so the recorder's
samples give the same steps again when a log is replayed:

* the samples of one vessel with the same time stamp form an *instant* (the fields
  of one frame share their time stamp);
* an instant closes when a sample of that vessel with another time stamp arrives,
  or when the service has drained its queue (:meth:`InstantAssembler.flush`; the
  frame's samples are all in the queue by then, because a driver yields a frame's
  samples without pausing in between);
* an instant with a water reading is a filter step. It also carries the latest
  reading of every other channel the instant lacks, when that reading is at most
  :data:`HOLD_S` old (power from a meter polled apart from the thermocouples, say).
  An energy counter is never carried over: the filter turns energy differences into
  mean power, and a stale counter would put energy in the wrong interval;
* an instant without water only updates those latest readings;
* an energy counter read apart from the thermocouples (a power meter polled on its
  own clock) gives the exact energy of each interval, whatever the phase of the
  polls: once such a reading has been seen, an instant with water waits for the
  next counter reading and takes the counter's value interpolated at its own time
  (at most :data:`ENERGY_WAIT_S`; then it is stepped without one). The filter then
  takes mean power from the energy difference and not from a power reading that
  may lag by a poll;
* a fault sample (NaN) is a missing reading that is known to be missing: it is
  passed on as NaN, so the filter flags the sensor and predicts across.

An instant whose time is not after the vessel's last step (two sources stamping the
same second, a clock stepping back) is not stepped: its readings update the latest
values and it is counted in :attr:`InstantAssembler.out_of_order`. An instant of
faults alone (every reading of its own NaN) waits for the next instant with water: it
is stepped first if that one is later, and counted out of order if not, so a fault
stamped ahead by a wrong clock never holds back the good readings after it.

:class:`LiveVessel` then splits the steps into runs as :mod:`monitor.runs.replay` does
(a fresh filter after a long gap or a refill) and steps the vessel's estimator.
Live and replayed estimates agree step for step. A replay of a recorder log takes
each session's samples (one process of the service) through fresh assemblers, as the
process did, and starts a new run at each session.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass

from drivers.channels import Quarantined
from drivers.sample import Quality, ReadingLimits, Sample
from monitor.estimation.batchfit import FitBudget
from monitor.estimation.contracts import Estimate
from monitor.estimation.estimator import VesselEstimator
from monitor.estimation.settings import EstimatorSettings, VesselConfig
from monitor.records.interchange import CHANNEL_COLUMNS, InterchangeLog, LogRow
from monitor.runs.drift import VesselDrift, run_checks
from monitor.runs.run import OpenRun, RunEvent, RunFeed

#: How long (s) the latest reading of a channel may stand in for one an instant lacks.
HOLD_S: dict[str, float] = {
    "power": 5.0,
    "voltage": 5.0,
    "current": 5.0,
    "element": 2.0,
    "water_top": 2.0,
    "wall": 10.0,
    "ambient": 120.0,
    "pressure": 120.0,
}


@dataclass(frozen=True, slots=True)
class Step:
    """One filter step of one vessel: Unix time (s), time from the vessel's first step (s)."""

    vessel: str
    t: float
    time_s: float
    values: dict[str, float]
    line: int  # position of the closing sample in the stream (for quarantine references)


#: How long (s, on the samples' clock) an instant may wait for the energy reading that
#: closes its interval before it is stepped without one.
ENERGY_WAIT_S = 5.0


class InstantAssembler:
    """Turns one vessel's samples, in arrival order, into filter steps (module docstring)."""

    def __init__(self, vessel: str) -> None:
        self.vessel = vessel
        self.t0: float | None = None
        self.last_step_t: float | None = None
        self.out_of_order = 0
        self._group_t: float | None = None
        self._group: dict[str, float] = {}
        self._latest: dict[str, tuple[float, float]] = {}
        self._position = 0
        self._energy: tuple[float, float] | None = None  # last separate counter reading
        self._pending: list[tuple[float, dict[str, float], int]] = []
        self._faulty: tuple[float, dict[str, float], int] | None = None  # see _emit

    def feed(self, sample: Sample, position: int = 0) -> list[Step]:
        """Return the steps closed by ``sample``'s arrival, then take ``sample`` in."""
        if sample.channel not in CHANNEL_COLUMNS:
            return []  # raw EMF and cold-junction samples are converted before this
        steps: list[Step] = []
        if self._group_t is not None and sample.t != self._group_t:
            steps = self.flush()
        self._group_t = sample.t
        self._position = position
        value = sample.value if sample.quality != Quality.FAULT else math.nan
        self._group[sample.channel] = value
        return steps

    def flush(self) -> list[Step]:
        """Close the open instant; return the steps that are complete now (oldest first)."""
        t, group = self._group_t, self._group
        if t is None:
            return []
        self._group_t, self._group = None, {}
        steps: list[Step] = []
        if "water" in group:
            values = dict(group)
            for channel, (seen_t, value) in self._latest.items():
                if channel not in values and t - seen_t <= HOLD_S.get(channel, 0.0):
                    values[channel] = value
            held, self._faulty = self._faulty, None
            if held is not None:
                if held[0] < t:
                    steps += self._take(*held)
                else:  # a good reading after it is older: the fault's stamp was wrong
                    self.out_of_order += 1
            if all(math.isnan(v) for v in group.values()):
                self._faulty = (t, values, self._position)  # decided at the next instant
            else:
                steps += self._take(t, values, self._position)
        elif "energy" in group and math.isfinite(group["energy"]):
            steps += self._close_intervals(t, group["energy"])
        for channel, value in group.items():
            if channel in HOLD_S and not math.isnan(value):
                self._latest[channel] = (t, value)
        return steps

    def _take(self, t: float, values: dict[str, float], position: int) -> list[Step]:
        """Step one instant with water, or keep it waiting for the energy counter."""
        steps: list[Step] = []
        if self._energy is not None and "energy" not in values:
            self._pending.append((t, values, position))  # wait for the counter
            while self._pending and t - self._pending[0][0] > ENERGY_WAIT_S:
                steps += self._emit(*self._pending.pop(0))
        else:
            steps += self._drain()
            steps += self._emit(t, values, position)
        return steps

    def _drain(self) -> list[Step]:
        steps: list[Step] = []
        while self._pending:
            steps += self._emit(*self._pending.pop(0))
        return steps

    def finish(self) -> list[Step]:
        """Return the instants still waiting for an energy reading, stepped without one,
        and an instant of faults alone still held back (the stream has ended)."""
        steps = self._drain()
        held, self._faulty = self._faulty, None
        if held is not None:
            steps += self._emit(*held)
        return steps

    def _close_intervals(self, t: float, energy_wh: float) -> list[Step]:
        """Step the waiting instants up to ``t`` with the counter interpolated at each."""
        previous, self._energy = self._energy, (t, energy_wh)
        steps: list[Step] = []
        while self._pending and self._pending[0][0] <= t:
            at, values, position = self._pending.pop(0)
            if previous is not None and previous[0] <= at and energy_wh >= previous[1]:
                span = t - previous[0]
                share = (at - previous[0]) / span if span > 0.0 else 1.0
                values = {**values, "energy": previous[1] + share * (energy_wh - previous[1])}
            steps += self._emit(at, values, position)
        return steps

    def _emit(self, t: float, values: dict[str, float], position: int) -> list[Step]:
        if self.last_step_t is not None and t <= self.last_step_t:
            self.out_of_order += 1
            return []
        if self.t0 is None:
            self.t0 = t
        self.last_step_t = t
        return [Step(self.vessel, t, t - self.t0, values, position)]


def screen_sample(sample: Sample, limits: ReadingLimits) -> tuple[Sample, Quarantined | None]:
    """Return the sample to feed the filter and what to set aside, if anything.

    A value no instrument could give for its vessel (:class:`drivers.sample.ReadingLimits`)
    becomes a ``fault`` sample (NaN), so the filter never takes it, and is kept as it came
    in a :class:`drivers.channels.Quarantined` with the reason. The live service and the
    NATS engine's workers both screen every reading here.
    """
    if sample.quality == Quality.FAULT:
        return sample, None
    problem = limits.problem(sample.channel, sample.value)
    if problem is None:
        return sample, None
    where = f"vessel {sample.vessel!r} channel {sample.channel!r}"
    kept = Quarantined(sample.t, sample.source, where, problem, repr(sample.value).encode())
    fault = Sample(sample.t, sample.vessel, sample.channel, math.nan, Quality.FAULT, sample.source)
    return fault, kept


def steps_from_samples(samples: Iterable[tuple[int, Sample]]) -> Iterator[Step]:
    """Yield the filter steps of every vessel from (position, sample) pairs in arrival order.

    The replay of a recorded log uses this; the live service feeds the same
    assemblers and flushes them when its queue runs dry.
    """
    assemblers: dict[str, InstantAssembler] = {}
    for position, sample in samples:
        assembler = assemblers.get(sample.vessel)
        if assembler is None:
            assembler = assemblers[sample.vessel] = InstantAssembler(sample.vessel)
        yield from assembler.feed(sample, position)
    for assembler in assemblers.values():
        yield from assembler.flush()
        yield from assembler.finish()


def rows_of_steps(
    steps: Iterable[Step], metadata: Mapping[str, Mapping[str, str | float]], path: str
) -> Iterator[tuple[InterchangeLog, LogRow]]:
    """Yield each step as (its vessel's header log, row) for replay: one header log per
    vessel (``rows`` empty), made at its first step, its channels added as they are seen."""
    logs: dict[str, InterchangeLog] = {}
    for step in steps:
        log = logs.get(step.vessel)
        if log is None:
            meta = {**metadata.get(step.vessel, {}), "vessel": step.vessel}
            log = logs[step.vessel] = InterchangeLog(
                f"{path}#{step.vessel}", meta, [], start_epoch_s=step.t - step.time_s
            )
        for channel in step.values:
            if channel not in log.channels:
                log.channels.append(channel)
        yield log, LogRow(step.line, step.time_s, step.values, step.vessel)


def logs_from_steps(
    steps: Iterable[Step], metadata: Mapping[str, Mapping[str, str | float]], path: str
) -> list[InterchangeLog]:
    """Return one :class:`InterchangeLog` per vessel (in order of first step), rows and
    all, with the channels in the CSV format's order (power always among them)."""
    logs: list[InterchangeLog] = []
    for log, row in rows_of_steps(steps, metadata, path):
        if not log.rows:
            logs.append(log)
        log.rows.append(row)
    for log in logs:
        settle_channels(log)
    return logs


def settle_channels(log: InterchangeLog) -> None:
    """Put a log's channels in the CSV format's order, with power among them (a vessel
    whose heater was never on has no power reading at all)."""
    order = list(CHANNEL_COLUMNS)
    log.channels.sort(key=order.index)
    if "power" not in log.channels and "energy" not in log.channels:
        log.channels.append("power")


class LiveVessel:
    """One vessel's live filter: steps in, estimates out, a fresh filter at each new run.

    The runs are split as everywhere (:class:`monitor.runs.run.RunFeed`) and each is
    stepped as a replay steps it (:class:`monitor.runs.run.OpenRun`), so the run summaries
    the service records are the ones ``ebullio replay`` gives of the same log. A new
    process starts a new run (its first step), as a replay of a recorder log starts
    one at every session that recorded samples.
    """

    def __init__(
        self,
        vessel: str,
        metadata: Mapping[str, str | float],
        has_element_sensor: bool,
        settings: EstimatorSettings | None = None,
        fit_budget: FitBudget | None = None,
    ) -> None:
        self.vessel = vessel
        self.fit_budget = fit_budget
        self.metadata = dict(metadata)
        self.config = VesselConfig.from_metadata(vessel, self.metadata, has_element_sensor)
        self.settings = settings
        self.assembler = InstantAssembler(vessel)
        # Built now, not at the first reading: the first filter of a process builds the
        # water-property tables (about half a second), which would stall a live loop.
        self._fresh: VesselEstimator | None = self._new_estimator()
        self.run: OpenRun | None = None
        self.steps = 0
        self._feed = RunFeed()  # the one split, as a replay splits runs
        self._epoch_s = 0.0  # Unix time of the vessel's time_s 0 (its assembler's t0)
        #: The vessel's drift trackers, fed each run's summary as the run ends.
        self.drift = VesselDrift(vessel, self.metadata)
        #: Summaries of the runs that have ended, until the service takes them.
        self.ended: list[dict[str, object]] = []
        #: (Unix s, label) of each run begun, until the service records them
        self.begun: list[tuple[float, str]] = []

    def _new_estimator(self) -> VesselEstimator:
        return VesselEstimator(self.config, self.settings, fit_budget=self.fit_budget)

    @property
    def estimator(self) -> VesselEstimator | None:
        """The current run's filter (None before the first step)."""
        return self.run.estimator if self.run is not None else None

    @property
    def run_number(self) -> int:
        """The number of the latest run begun (0 before one)."""
        return self._feed.number

    @property
    def latest(self) -> Estimate | None:
        """The current run's newest estimate (None before one)."""
        return self.run.latest if self.run is not None else None

    def resume(self, earlier: list[Mapping[str, object]], last_label: int = 0) -> None:
        """Carry on from runs an earlier session recorded (their summaries, oldest first).

        Their figures feed the drift trackers, so the baseline survives a restart (a
        doubtful run, by its recorded verdict or, in a summary without one, by
        :func:`monitor.runs.drift.run_verdict`, is passed over as it was live), and run labels
        go on from the highest numbered one, or ``last_label``, the highest run begun
        (a run whose process was killed has no summary).
        """
        number = max(self._feed.number, last_label)
        for summary in earlier:
            self.drift.observe(summary)
            label = str(summary.get("run", ""))
            if label.isdigit():
                number = max(number, int(label))
        self._feed.number = number

    def end_run(self) -> dict[str, object] | None:
        """End the current run (a reading still held back is stepped into it first) and
        return its summary, None before any estimate.

        It is :meth:`monitor.runs.run.OpenRun.summary` of the live filter, ``verdict``
        included, with ``source`` "live"; its ``drift`` flags compare its figures with
        the vessel's earlier runs, or say that a doubtful run was not judged.
        """
        before = len(self.ended)
        self._apply(self._feed.finish(), None)
        return self.ended.pop() if len(self.ended) > before else None

    def _summary(self) -> dict[str, object] | None:
        if self.run is None or self.run.latest is None:
            return None
        summary: dict[str, object] = {"source": "live"} | self.run.summary()
        flags = self.drift.observe(summary) + run_checks(summary, self.metadata)
        summary["drift"] = [f.as_dict() for f in flags]
        return summary

    def step(self, step: Step) -> Estimate | None:
        """Return the estimate after one step (None while the filter is not yet
        initialised, or while the step is held back).

        A water reading far below the recent ones is held back one step
        (:class:`monitor.runs.run.RunFeed`): the next reading tells whether it was the
        first of a refill, and so of a new run, or a spike within this one. So the old
        run's filter never takes the cold water, as the replay's does not.
        """
        self._epoch_s = step.t - step.time_s
        row = LogRow(step.line, step.time_s, step.values, step.vessel)
        events = self._feed.take(row)
        if events is None:  # the usual step
            assert self.run is not None
            self.steps += 1
            return self.run.step(row)
        return self._apply(events, row)

    def _apply(self, events: list[RunEvent], row: LogRow | None) -> Estimate | None:
        """Carry out a feed's events; return the estimate of ``row`` if it was stepped."""
        estimate: Estimate | None = None
        for kind, item, label in events:
            if kind == "row":
                assert self.run is not None
                assert item is not None
                self.steps += 1
                e = self.run.step(item)
                if item is row:
                    estimate = e
            elif kind == "end":
                ended = self._summary()
                self.run = None
                if ended is not None:
                    self.ended.append(ended)
            else:  # "begin"
                assert item is not None
                assert label is not None
                self.run = OpenRun(
                    self.vessel, label, self.config, self.metadata, self._epoch_s,
                    estimator=self._fresh or self._new_estimator(),
                )  # fmt: skip
                self._fresh = None
                self.begun.append((self._epoch_s + item.time_s, label))
        return estimate
