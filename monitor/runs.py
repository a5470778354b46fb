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
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

from drivers.errors import LogFormatError
from monitor import batchfit
from monitor.contracts import Estimate, Estimated, finite_or_none
from monitor.drift import run_verdict
from monitor.estimator import VesselEstimator
from monitor.interchange import InterchangeLog, LogRow

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
class Quarantined:
    """A row set aside: where it was, why, and the raw text."""

    file: str
    line: int
    reason: str
    raw: str

    def as_dict(self) -> dict[str, object]:
        """Return the row as a JSON-ready dict."""
        return {"file": self.file, "line": self.line, "reason": self.reason, "raw": self.raw}


@dataclass
class Run:
    """The rows of one run of one vessel, in time order, with its log's metadata."""

    vessel: str
    number: int
    label: str
    rows: list[LogRow]
    log: InterchangeLog | None  # None live: the service's runs have no file

    @property
    def quarantined(self) -> int:
        """Return how many rejected lines of the log lie inside this run."""
        if not self.rows or self.log is None:
            return 0
        lo, hi = self.rows[0].line, self.rows[-1].line
        return sum(1 for r in self.log.rejected if lo <= r.line <= hi)


def _check_columns(log: InterchangeLog) -> None:
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
        self._open = False
        self._label: str | None = None
        self._previous_s: float | None = None
        self._window: list[tuple[float, float]] = []  # (time s, water °C) of the last 30 s

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
            self._window.clear()
        self._previous_s = row.time_s
        water_c = row.values.get("water")
        if water_c is not None:
            self._window.append((row.time_s, water_c))
            while self._window and row.time_s - self._window[0][0] > REFILL_WINDOW_S:
                self._window.pop(0)
        return start

    def _begins(self, row: LogRow) -> bool:
        if row.run is not None:
            return row.run != self._label
        if self._previous_s is not None and row.time_s - self._previous_s > RUN_GAP_S:
            return True
        # a refill: the reading and the one before it both lie well below the recent
        # median, so a single spike (either way) or a draw-off's cooling does not split
        water_c = row.values.get("water")
        window = self._window
        if water_c is None or len(window) < 3:
            return False
        recent = sorted(w for _, w in window[:-1])
        median = recent[len(recent) // 2]
        return median - water_c > REFILL_DROP_K and median - window[-1][1] > REFILL_DROP_K


def split_runs(logs: Iterable[InterchangeLog]) -> tuple[list[Run], list[Quarantined]]:
    """Return the runs of every vessel across the logs, and the rows set aside.

    Raises LogFormatError naming the file and column when a required column is missing.
    """
    runs: list[Run] = []
    quarantined: list[Quarantined] = []
    counters: dict[str, int] = {}
    for log in logs:
        _check_columns(log)
        quarantined += [Quarantined(log.path, r.line, r.reason, r.raw) for r in log.rejected]
        default_vessel = str(log.metadata.get("vessel") or Path(log.path).stem)
        open_runs: dict[str, Run] = {}
        splitters: dict[str, RunSplitter] = {}  # a new file starts every vessel afresh
        for row in log.rows:
            vessel = row.vessel or default_vessel
            start = splitters.setdefault(vessel, RunSplitter()).take(row)
            current = open_runs.get(vessel)
            if start is not None:
                carried = (
                    [current.rows.pop()] if start == "refill" and current and current.rows else []
                )
                counters[vessel] = counters.get(vessel, 0) + 1
                current = Run(
                    vessel, counters[vessel], row.run or str(counters[vessel]), carried, log
                )
                open_runs[vessel] = current
                runs.append(current)
            assert current is not None
            current.rows.append(row)
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
    :func:`monitor.drift.run_verdict` of these figures: ``trusted`` or ``doubtful``
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
    # the run's verdict (monitor.drift.run_verdict) from these figures, for replay and live
    figures["verdict"] = run_verdict(figures | {"start_water_c": finite_or_none(start_c)})
    return figures


def run_diagnostics(est: VesselEstimator) -> dict[str, object]:
    """Return what a run's filter says of its own health (the summary's ``diagnostics``).

    ``water_readings``: plausible water readings offered; ``rejected_fraction`` and
    ``downweighted_fraction``: of those, set aside or given less weight;
    ``nis_mean``: the mean NIS of the water readings (about 1 when the filter's
    stated uncertainty is right); ``estimator_faults``: how often the filter failed
    and started afresh (:meth:`monitor.estimator.VesselEstimator.step`); ``fit``: the
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
