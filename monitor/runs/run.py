"""The run: where one vessel's runs begin and end, and the figures that sum one up.

One rule for the live service and the replay (:class:`RunSplitter`): a vessel's
readings start a new run

* at every change of the ``run`` label, when the rows carry one;
* otherwise after a gap of more than :data:`RUN_GAP_S` between readings, or at a
  refill: two water readings in a row more than :data:`REFILL_DROP_K` below the median
  of the last :data:`REFILL_WINDOW_S` (the vessel was emptied and refilled; one spike
  or a draw-off's slow cooling does not split). At a refill the reading just before
  the split belongs to the new run (it is the first of the cold water);
* and, in a replay, at every new file.

:func:`estimator_figures` and :func:`run_diagnostics` are a run's figures from its
filter at the end, the same live and in a replay. Users' description: docs/csv-format.md
(runs) and docs/run-summary.md (the summary).
"""

from __future__ import annotations

import math
from collections import Counter, deque
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path

from drivers.channels import Quarantined
from drivers.errors import LogFormatError
from monitor.estimation import batchfit
from monitor.estimation.batchfit import FitBudget
from monitor.estimation.contracts import Estimate, Estimated, Level, finite_or_none
from monitor.estimation.estimator import VesselEstimator
from monitor.estimation.settings import EstimatorSettings, VesselConfig
from monitor.records.interchange import InterchangeLog, LogRow, iso_utc
from monitor.runs.drift import run_verdict

#: A gap between readings longer than this (s) starts a new run.
RUN_GAP_S = 900.0
#: A refill: the water this far (K) below the recent median, twice in a row ...
REFILL_DROP_K = 10.0
#: ... of the readings of the last this many seconds.
REFILL_WINDOW_S = 30.0
#: Room temperature of the standing-loss figure, °C (the ambient of the storage-heater
#: standing-loss test in EN 60379 / IEC 60379:1987, from memory, no source checked).
STANDING_LOSS_ROOM_C = 20.0


@dataclass
class Run:
    """The rows of one run of one vessel, in time order, with its log's metadata."""

    vessel: str
    number: int
    label: str
    rows: list[LogRow]
    log: InterchangeLog

    @property
    def quarantined(self) -> int:
        """Return how many rejected lines of the log lie inside this run."""
        if not self.rows:
            return 0
        lo, hi = self.rows[0].line, self.rows[-1].line
        return sum(1 for r in self.log.rejected if lo <= r.line <= hi)


def check_columns(log: InterchangeLog) -> None:
    """Raise LogFormatError naming the file and column when a log lacks a required one."""
    if "water" not in log.channels:
        raise LogFormatError(f"{log.path}: the required column 'water_c' is missing")
    if "power" not in log.channels and "energy" not in log.channels:
        raise LogFormatError(f"{log.path}: a power column is required: 'power_w' or 'energy_wh'")


class RunSplitter:
    """Where one vessel's runs begin (the module docstring's rule), fed row by row.

    :meth:`take` answers for each row, in time order: ``"first"`` for the first row,
    ``"new"`` when it begins a new run, ``"refill"`` when it begins one at a refill
    (the row before it belongs to the new run too), None when it goes on the current run.
    """

    def __init__(self) -> None:
        #: whether the row just taken lay far below the recent median: the first reading
        #: of a refill, or a spike (the next row tells which)
        self.cold = False
        self._open = False
        self._label: str | None = None
        self._previous_s: float | None = None
        # time (s) and water (°C) of the readings of the last 30 s
        self._times: deque[float] = deque()
        self._temps: deque[float] = deque()
        self._nans = 0  # NaN readings (a faulted sensor, live) among them

    def take(self, row: LogRow) -> str | None:
        """Return how ``row`` stands to the runs so far (see the class docstring)."""
        start: str | None = None
        if not self._open:
            start = "first"
        elif self._begins(row):
            gap_s = row.time_s - self._previous_s if self._previous_s is not None else None
            refill = row.run is None and gap_s is not None and gap_s <= RUN_GAP_S
            start = "refill" if refill else "new"
        if start is not None:
            self._open = True
            self._label = row.run
            self._times.clear()
            self._temps.clear()
            self._nans = 0
        self._previous_s = row.time_s
        water_c = row.values.get("water")
        if water_c is not None:
            times, temps = self._times, self._temps
            times.append(row.time_s)
            temps.append(water_c)
            self._nans += water_c != water_c
            while times and row.time_s - times[0] > REFILL_WINDOW_S:
                times.popleft()
                gone_c = temps.popleft()
                self._nans -= gone_c != gone_c
        return start

    def _begins(self, row: LogRow) -> bool:
        self.cold = False
        if row.run is not None:
            return row.run != self._label
        if self._previous_s is not None and row.time_s - self._previous_s > RUN_GAP_S:
            return True
        # a refill: the reading and the one before it both lie well below the recent
        # median, so a single spike (either way) or a draw-off's cooling does not split
        water_c = row.values.get("water")
        temps = self._temps
        if water_c is None or not math.isfinite(water_c) or len(temps) < 3:
            return False
        if not self._nans and not max(temps) - water_c > REFILL_DROP_K:
            return False  # the median is no higher than the largest: not cold (the usual row)
        last_c = temps.pop()
        recent = sorted(temps)
        temps.append(last_c)
        median = recent[len(recent) // 2]
        self.cold = median - water_c > REFILL_DROP_K
        return self.cold and median - last_c > REFILL_DROP_K


#: One thing for a run's consumer to do, in order (:meth:`RunFeed.take`): ``("begin",
#: first row, label)``, ``("row", row, None)`` (step it in the open run) or ``("end",
#: None, None)``.
RunEvent = tuple[str, LogRow | None, str | None]


class RunFeed:
    """One vessel's rows, in time order, turned into runs: the one rule
    (:class:`RunSplitter`) and the one place a refill's first cold reading goes.

    A water reading far below the recent ones (:attr:`RunSplitter.cold`) is held back
    one row: the next says whether it began a refill (it is then the new run's first
    row) or was a spike (it stays in the run it came in). So no filter ever takes the
    cold water into the old run. Runs are numbered 1, 2, ... for as long as the feed
    lives; a ``run`` label replaces the number. The live service
    (:class:`monitor.runs.live.LiveVessel`), the streamed replay and :func:`split_runs`
    all go through it, so they split alike to the row.
    """

    def __init__(self) -> None:
        self.number = 0
        self._splitter = RunSplitter()
        self._held: LogRow | None = None
        self._open = False

    def take(self, row: LogRow) -> list[RunEvent] | None:
        """Return what to do with ``row`` and any row held before it: None for the usual
        case (step ``row`` in the open run), else the events in order."""
        start = self._splitter.take(row)
        held = self._held
        cold = start is None and self._splitter.cold
        if start is None and held is None and not cold:
            return None
        self._held = None
        events: list[RunEvent] = []
        if start is not None:
            if held is not None and start != "refill":
                events.append(("row", held, None))  # a spike in the old run after all
                held = None
            if self._open:
                events.append(("end", None, None))
            self.number += 1
            self._open = True
            events.append(("begin", held or row, row.run or str(self.number)))
        if held is not None:
            events.append(("row", held, None))
        if cold:
            self._held = row
        else:
            events.append(("row", row, None))
        return events

    def finish(self) -> list[RunEvent]:
        """Return the events that end the open run: a row still held, then its end."""
        events: list[RunEvent] = []
        if self._held is not None:
            events.append(("row", self._held, None))
            self._held = None
        if self._open:
            events.append(("end", None, None))
            self._open = False
        return events

    def restart(self) -> list[RunEvent]:
        """Return :meth:`finish`'s events and start afresh: a new file, or a new session
        of the service; the next row begins a new run (the numbering goes on)."""
        events = self.finish()
        self._splitter = RunSplitter()
        return events


def split_runs(logs: Iterable[InterchangeLog]) -> tuple[list[Run], list[Quarantined]]:
    """Return the runs of every vessel across the logs, and the rows set aside.

    Each vessel's runs are numbered 1, 2, ... across the logs (a label from a ``run``
    column replaces the number), and each new log starts every vessel afresh; the
    split is :class:`RunFeed`'s, as live.

    Raises LogFormatError naming the file and column when a required column is missing.
    """
    runs: list[Run] = []
    quarantined: list[Quarantined] = []
    feeds: dict[str, RunFeed] = {}
    current: dict[str, Run] = {}

    def apply(vessel: str, log: InterchangeLog, events: list[RunEvent]) -> None:
        for kind, row, label in events:
            if kind == "begin":
                assert label is not None
                run = current[vessel] = Run(vessel, feeds[vessel].number, label, [], log)
                runs.append(run)
            elif kind == "row":
                assert row is not None
                current[vessel].rows.append(row)

    for log in logs:
        check_columns(log)
        quarantined += log.rejected
        default_vessel = str(log.metadata.get("vessel") or Path(log.path).stem)
        for vessel, feed in feeds.items():  # a new file starts every vessel afresh
            apply(vessel, current[vessel].log, feed.restart())
        for row in log.rows:
            vessel = row.vessel or default_vessel
            feed = feeds.get(vessel)
            if feed is None:
                feed = feeds[vessel] = RunFeed()
            events = feed.take(row)
            if events is None:
                current[vessel].rows.append(row)
            else:
                apply(vessel, log, events)
    for vessel, feed in feeds.items():
        apply(vessel, current[vessel].log, feed.finish())
    return runs, quarantined


def _value(est: Estimated | None) -> dict[str, float] | None:
    if est is None or not math.isfinite(est.value):
        return None
    return {"value": est.value, "std": est.std if math.isfinite(est.std) else None}


def estimator_figures(
    est: VesselEstimator, last: Estimate, at_heat_up: Estimate | None, start_c: float | None
) -> dict[str, object]:
    """Return a run's figures from its filter at the end (the summary's estimator part).

    ``last`` is the run's last estimate, ``at_heat_up`` the one where the heat-up
    ended (None if it did not) and ``start_c`` the water temperature it started at.
    Used by the replay and, as each run ends, by the live service. ``verdict`` is
    :func:`monitor.runs.drift.run_verdict` of these figures: ``trusted`` or ``doubtful``
    with its reasons (a doubtful run is not judged for drift).
    """
    tot, cfg = est.totals, est.config
    at = at_heat_up or last
    heat_up_s = None
    if tot.heat_up_done_s is not None and tot.heating_started_s is not None:
        heat_up_s = tot.heat_up_done_s - tot.heating_started_s
    efficiency = None
    if at_heat_up is not None and start_c is not None and tot.heat_up_energy_j:
        efficiency = at.heat_capacity_j_per_k.value * (at.water_c - start_c) / tot.heat_up_energy_j
    conductance = None
    if cfg.has_element_sensor:
        conductance = est.conductance_at_80_percent or at.element_conductance_w_per_k
    standing = None
    standing_at = None
    if cfg.target_c is not None and tot.holding_steps:
        standing_at = cfg.target_c
        scale = (standing_at - STANDING_LOSS_ROOM_C) * 24.0 / 1000.0  # W/K → kWh per 24 h
        standing = Estimated(last.ua_w_per_k.value * scale, last.ua_w_per_k.std * abs(scale))
    flags = [
        {"name": f.name, "level": str(f.level), "message": f.message}
        for f in tot.flags_raised.values()
    ]
    figures: dict[str, object] = {
        "water_mass_kg": _value(at.water_mass_kg),
        "heat_capacity_j_per_k": _value(at.heat_capacity_j_per_k),
        "ua_w_per_k": _value(last.ua_w_per_k),
        "element_conductance_w_per_k": _value(conductance),
        "standing_loss_kwh_per_24h": _value(standing),
        "standing_loss_at_c": standing_at,
        "heat_up_s": heat_up_s,
        "energy_wh": tot.energy_j / 3600.0,
        "efficiency": finite_or_none(efficiency),
        "flags": flags,
        "evaporated_kg": tot.evaporated_kg,
        "phase_at_end": str(last.phase),
        "diagnostics": run_diagnostics(est),
    }
    # the run's verdict (monitor.runs.drift.run_verdict) from these figures, for replay and live
    figures["verdict"] = run_verdict(figures | {"start_water_c": finite_or_none(start_c)})
    return figures


def run_diagnostics(est: VesselEstimator) -> dict[str, object]:
    """Return what a run's filter says of its own health (the summary's ``diagnostics``).

    ``water_readings``: plausible water readings offered; ``rejected_fraction`` and
    ``downweighted_fraction``: of those, set aside or given less weight;
    ``nis_mean``: the mean NIS of the water readings (about 1 when the filter's
    stated uncertainty is right); ``estimator_faults``: how often the filter failed
    and started afresh (:meth:`monitor.estimation.estimator.VesselEstimator.step`); ``fit``: the
    heat-up's last batch fit (how many fits, whether it converged, its residual RMS
    in K, the share of readings it down-weighted, its variance inflation s²·f, and
    the element capacity and water sensor lag it found), or None when no heat-up was
    fitted.
    """
    tot = est.totals
    n = tot.water_readings
    fit = est.heat_up_fit.fit if est.heat_up_fit is not None else None
    return {
        "estimator_faults": len(est.faults),
        "water_readings": n,
        "rejected_fraction": tot.rejected_readings / n if n else None,
        "downweighted_fraction": tot.downweighted_readings / n if n else None,
        "nis_mean": tot.nis_sum / n if n else None,
        "fit": None
        if fit is None
        else {
            "fits": est.heat_up_fit.fits,
            "converged": fit.converged,
            "residual_rms_k": finite_or_none(fit.residual_rms_k),
            "downweighted_fraction": fit.downweighted / fit.readings if fit.readings else None,
            "variance_factor": finite_or_none(fit.variance_factor),
            "element_heat_capacity_j_per_k": fit.value(batchfit.LN_CE),
            "water_sensor_tau_s": fit.value(batchfit.LN_TAU_W),
        },
    }


#: How long (s) the element must have been off before element and water should agree.
REST_AFTER_S = 300.0
#: Fewest rest readings for the element-minus-water figure.
REST_READINGS_MIN = 30


class _MeanSd:
    """A running mean and its rough standard error (Welford), for the electrical figures.

    Readings one second apart are correlated, so the standard error is computed as if
    only one in ten were independent: an honest, if rough, allowance.
    """

    __slots__ = ("m2", "mean", "n")

    def __init__(self) -> None:
        self.n, self.mean, self.m2 = 0, 0.0, 0.0

    def add(self, value: float) -> None:
        self.n += 1
        delta = value - self.mean
        self.mean += delta / self.n
        self.m2 += delta * (value - self.mean)

    def figure(self) -> dict[str, float] | None:
        if not self.n:
            return None
        if self.n < 2:
            return {"value": self.mean, "std": 0.0}
        var = max(0.0, self.m2 / (self.n - 1))
        return {"value": self.mean, "std": math.sqrt(var / max(1.0, self.n / 10.0))}


class _Electrical:
    """The run's electrical figures, gathered row by row (kept small: no row is held).

    ``heating_power_w``: mean power (W) while on (above half the rating, or 100 W
    without one). Where voltage is logged, ``element_resistance_ohm`` = V²/P (Ω), and,
    with ``rated_voltage_v`` in the metadata, ``heating_power_at_rated_voltage_w`` =
    P·(V_rated/V)²: the power the element would give at its rated voltage, which mains
    wander does not move (a resistive element; common practice, no source).
    ``rest_element_minus_water_k``: the median element minus water reading (K) once the
    element has been off for :data:`REST_AFTER_S`, with the spread (IQR/1.349) as its std:
    at rest both thermocouples sit in still water and should agree to well under a
    kelvin, so a steady difference is a sensor or cold-junction fault, not physics. The
    differences are counted to the millikelvin, so a week at rest costs little memory.
    """

    def __init__(self, metadata: Mapping[str, object]) -> None:
        def number(key: str) -> float | None:
            value = metadata.get(key)
            return float(value) if isinstance(value, int | float) and value > 0 else None

        rated_w, self.rated_v = number("rated_power_w"), number("rated_voltage_v")
        self.on_w = 0.5 * rated_w if rated_w else 100.0
        self.power, self.ohms, self.at_rated = _MeanSd(), _MeanSd(), _MeanSd()
        self.rest = Counter[int]()  # element minus water at rest, in mK
        self._off_since: float | None = None

    def add(self, row: LogRow) -> None:
        values = row.values
        p = values.get("power")
        if p is not None and math.isfinite(p) and p >= 0.1 * self.on_w:
            self._off_since = None
            if p >= self.on_w:
                self.power.add(p)
                v = values.get("voltage")
                if v is not None and math.isfinite(v) and v > 0.0:
                    self.ohms.add(v * v / p)
                    if self.rated_v:
                        self.at_rated.add(p * (self.rated_v / v) ** 2)
            return
        if self._off_since is None:
            self._off_since = row.time_s
        e, w = values.get("element"), values.get("water")
        if row.time_s - self._off_since < REST_AFTER_S or e is None or w is None:
            return
        if math.isfinite(e) and math.isfinite(w):
            self.rest[round((e - w) * 1000.0)] += 1

    def _rest_figure(self) -> dict[str, float] | None:
        n = sum(self.rest.values())
        if n < REST_READINGS_MIN:
            return None
        ordered = sorted(self.rest.items())

        def at(rank: int) -> float:  # the rank-th smallest difference (0-based), in K
            seen = 0
            for mk, count in ordered:
                seen += count
                if seen > rank:
                    return mk / 1000.0
            return ordered[-1][0] / 1000.0

        spread = at((3 * n) // 4) - at(n // 4)
        return {"value": at(n // 2), "std": spread / 1.349, "n": float(n)}

    def figures(self) -> dict[str, object]:
        return {
            "rest_element_minus_water_k": self._rest_figure(),
            "heating_power_w": self.power.figure(),
            "element_resistance_ohm": self.ohms.figure(),
            "heating_power_at_rated_voltage_w": self.at_rated.figure(),
        }


#: A summary's figures when there are none (nothing estimated, or the replay failed).
NO_FIGURES: dict[str, object] = {
    "water_mass_kg": None, "heat_capacity_j_per_k": None, "ua_w_per_k": None,
    "element_conductance_w_per_k": None, "standing_loss_kwh_per_24h": None,
    "standing_loss_at_c": None, "heat_up_s": None, "energy_wh": None, "efficiency": None,
}  # fmt: skip


def has_element_sensor(metadata: Mapping[str, object], channels: Iterable[str],
                       rows: Iterable[LogRow]) -> bool:  # fmt: skip
    """Return whether a logged vessel's filter is two-node: as the log says (a live log
    records what the live filter was built with), else whether element readings came."""
    declared = metadata.get("element_sensor")
    if declared in ("yes", "no"):
        return declared == "yes"
    return "element" in channels and any("element" in r.values for r in rows)


class OpenRun:
    """One run while its rows are stepped: its own fresh filter and what its summary needs.

    The live service (:class:`monitor.runs.live.LiveVessel`) and the replay
    (:func:`monitor.runs.replay.replay_run`) both step a run through this, and both take its
    :meth:`summary`, so a run has the same figures live and replayed.
    ``start_epoch_s`` turns the rows' times (s from the vessel's first step) into Unix
    time. ``estimator`` may be a filter built beforehand (the live service builds the
    first one early); it must be fresh.
    """

    def __init__(
        self,
        vessel: str,
        label: str,
        config: VesselConfig,
        metadata: Mapping[str, object],
        start_epoch_s: float,
        *,
        settings: EstimatorSettings | None = None,
        fit_budget: FitBudget | None = None,
        estimator: VesselEstimator | None = None,
    ) -> None:
        self.vessel, self.label = vessel, label
        self.start_epoch_s = start_epoch_s
        self.estimator = estimator or VesselEstimator(config, settings, fit_budget=fit_budget)
        self.latest: Estimate | None = None
        self.steps = 0
        self.first: LogRow | None = None
        self.last: LogRow | None = None
        self._at_heat_up: Estimate | None = None
        self._start_c: float | None = None
        self._electrical = _Electrical(metadata)
        self._ambient = _MeanSd()

    def step(self, row: LogRow) -> Estimate | None:
        """Step the run's filter with one row; return its estimate (None before one)."""
        estimate = self.estimator.step(row.time_s, row.values)
        self.steps += 1
        if self.first is None:
            self.first = row
        self.last = row
        self._electrical.add(row)
        ambient = row.values.get("ambient")
        if ambient is not None and math.isfinite(ambient):
            self._ambient.add(ambient)
        if estimate is not None:
            self.latest = estimate
            totals = self.estimator.totals
            if self._at_heat_up is None and totals.heat_up_done_s is not None:
                self._at_heat_up = estimate
            if self._start_c is None and totals.heat_up_start_c is not None:
                self._start_c = totals.heat_up_start_c
        return estimate

    def summary(self, quarantined_rows: int = 0) -> dict[str, object]:
        """Return the run's summary (docs/run-summary.md) as it stands now.

        Which instant each figure is taken at: ``water_mass_kg`` and
        ``heat_capacity_j_per_k`` the end of the first heat-up (the water reaching the
        target), where C is best known and nothing has boiled away yet, else the end of
        the run; ``element_conductance_w_per_k`` when the first heat-up passed 80 % of its
        rise, before boiling at the element changes the film, else as for the mass;
        ``ua_w_per_k`` and the standing loss the end of the run (cooling and standby carry
        most of the information on losses); ``efficiency`` the heat taken up by water and
        vessel over the heat-up (C times the rise of the filtered water temperature) over
        the electrical energy in it; ``energy_wh`` the whole run; ``heat_up_s`` from the
        first heating to reaching the target.
        """
        est, cfg = self.estimator, self.estimator.config
        first_s = self.first.time_s if self.first is not None else None
        last_s = self.last.time_s if self.last is not None else None
        base: dict[str, object] = {
            "vessel": self.vessel,
            "run": self.label,
            "start_s": first_s,
            "end_s": last_s,
            "start_t": None if first_s is None else self.start_epoch_s + first_s,
            "end_t": None if last_s is None else self.start_epoch_s + last_s,
            "start_utc": None if first_s is None else iso_utc(self.start_epoch_s + first_s),
            "steps": self.steps,
            "quarantined_rows": quarantined_rows,
            "rejected_readings": est.totals.rejected_readings,
            "boiling_point_c": est.boiling_point_c,
            "target_c": est.target_c,
            "pressure_kpa": cfg.pressure_kpa,
            "model": "two-node" if cfg.has_element_sensor else "one-node",
            "water_sensor_tau_s": cfg.water_sensor_tau_s,
        }
        if self.latest is None:
            return base | NO_FIGURES | {
                "energy_wh": est.totals.energy_j / 3600.0,
                "flags": [{"name": "no_water_reading", "level": str(Level.WARNING),
                           "message": "The run has no usable water temperature, so nothing "
                           "could be estimated."}],
                "verdict": run_verdict({}),
            }  # fmt: skip
        ambient = self._ambient.figure()
        figures = estimator_figures(est, self.latest, self._at_heat_up, self._start_c)
        if quarantined_rows:
            flags = figures["flags"]
            assert isinstance(flags, list)
            flags.append({"name": "quarantined_rows", "level": str(Level.NOTICE),
                          "message": f"{quarantined_rows} rows of this run could not be used "
                          "and were set aside (see 'quarantined')."})  # fmt: skip
        return (
            base
            | self._electrical.figures()
            | {
                "start_water_c": finite_or_none(self._start_c),
                "ambient_c": ambient["value"] if ambient else None,
            }
            | figures
        )
