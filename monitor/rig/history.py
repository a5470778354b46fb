"""A simulated history written into a recorder log, as the live service would have made it.

The demo (:mod:`monitor.rig.demo`) opens with weeks of its site's past runs
(:mod:`drivers.simworld.site`) so the fleet, maintenance and replay views have
something to show. Each vessel's runs are simulated and processed in worker
processes, one vessel at a time: its readings go through a :class:`Service` of the
site's configuration with no loop and no sources (:meth:`Service.process_flat_out`),
so the estimates, flags, run summaries and drift flags are the ones the live service
would have recorded, by the same code, with every heat-up fit made when due (as a
replay makes them). The main process writes each vessel's rows into the log, in the
order the service handed them over, a block every :data:`BLOCK_ROWS` rows, with its
hash chain as always.

Runs lie :data:`~drivers.simworld.site.RUN_EVERY_DAYS` days apart (kettles a day
apart), so a replay splits them where the service did (a gap of over
:data:`monitor.runs.run.RUN_GAP_S`). The history's readings carry the source
:data:`HISTORY_SOURCE`, and the session's configuration says that they were simulated.
"""

from __future__ import annotations

import multiprocessing
import os
import time
from collections.abc import Callable, Iterator
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass
from typing import Any

from drivers.sample import Sample
from drivers.simworld.rig import SimulatedRig
from drivers.simworld.site import VesselPlan
from monitor import __version__
from monitor.records.recorder import Recorder
from monitor.rig.config import parse_config, toml_value, vessel_table
from monitor.rig.service import Service, row_adders

#: The source of every simulated history reading.
HISTORY_SOURCE = "demo-history (simulated)"
#: Rows handed over between two commits (one block each).
BLOCK_ROWS = 20_000
#: Hour of the day (UTC) a past run starts: a kettle's at 09:00, a heater's recovery
#: after the morning draw-off at 07:30.
KETTLE_START_H = 9.0
HEATER_START_H = 7.5


@dataclass(frozen=True)
class History:
    """Where the history lies: its plans, the configuration text of its session, and
    its end (Unix s; the first day starts ``days`` days before it, at midnight UTC)."""

    plans: tuple[VesselPlan, ...]
    config_text: str
    end_s: float
    days: int

    def run_start_s(self, plan: VesselPlan, day: float) -> float:
        """Return the Unix time a past run of ``plan`` on ``day`` starts."""
        midnight = (self.end_s // 86400.0 - self.days) * 86400.0
        hour = KETTLE_START_H if plan.kind == "kettle" else HEATER_START_H
        return midnight + day * 86400.0 + hour * 3600.0


def site_config_text(plans: tuple[VesselPlan, ...], mqtt_url: str, note: str) -> str:
    """Return the rig configuration (TOML) of the demo site's vessels, each publishing
    on MQTT at ``mqtt_url``; ``note`` opens it as a comment (what the session was)."""
    lines = [f"# {line}" for line in note.splitlines()]
    lines += ["[site]", "pressure_kpa = 101.325", "", "[mqtt]", f"url = {toml_value(mqtt_url)}",
              'prefix = "ebullio-demo"', ""]  # fmt: skip
    for plan in plans:
        lines += vessel_table(plan.vessel, plan.metadata(), element_sensor=True)
    return "\n".join(lines)


def vessel_batches(history: History, plan: VesselPlan) -> Iterator[list[Sample]]:
    """Yield ``plan``'s past runs, instant by instant, as the service would receive them."""
    for index, day in enumerate(plan.run_days):
        scenario = plan.scenario(day, history.run_start_s(plan, day), index)
        rig = SimulatedRig(scenario, seed=plan.seed * 1000 + index, source=HISTORY_SOURCE)
        for batch in rig.run():
            if batch:
                yield batch


class _Kept:
    """A row sink that keeps what the service hands over, in order."""

    def __init__(self) -> None:
        self.items: list[tuple[str, Any]] = []

    def put(self, kind: str, rows: Any) -> None:
        self.items.append((kind, rows))


def process_vessel(history: History, plan: VesselPlan) -> tuple[list[tuple[str, Any]], float]:
    """Return (the rows the service would have recorded, CPU s) of one vessel's history:
    run in a worker process."""
    began = time.process_time()
    config = parse_config(history.config_text, "<demo history>", {})
    service = Service(config, os.devnull, fits_on_time=True)
    kept = _Kept()
    service.process_flat_out(vessel_batches(history, plan), kept)
    return kept.items, time.process_time() - began


def write_history(
    log_path: str,
    history: History,
    *,
    workers: int | None = None,
    say: Callable[[str], None] = print,
    on_open: Callable[[], None] | None = None,
) -> dict[str, object]:
    """Write ``history`` into a new session of ``log_path``; return what it took.

    Vessels are processed ``workers`` at a time (default: the machine's cores) in
    worker processes; their rows are written here as each vessel is done, the vessels'
    metadata first. ``say`` hears the progress, a line per vessel. ``on_open`` is
    called once the log holds the vessels (a board may open it then).
    """
    began = time.monotonic()
    config = parse_config(history.config_text, "<demo history>", {})
    workers = workers or os.cpu_count() or 1
    cpu_s = 0.0
    rows_written = 0
    failed: list[str] = []
    with Recorder(log_path, version=__version__, config_text=history.config_text) as rec:
        for v in config.vessels:
            rec.add_vessel(v.id, dict(v.metadata))
        rec.commit()
        if on_open is not None:
            on_open()
        adders = row_adders(rec)
        order = sorted(history.plans, key=_cost, reverse=True)
        # spawn: the board's server thread may already run in this process
        context = multiprocessing.get_context("spawn")
        with ProcessPoolExecutor(max_workers=workers, mp_context=context) as pool:
            futures = {pool.submit(process_vessel, history, p): p.vessel for p in order}
            for done, future in enumerate(as_completed(futures), 1):
                vessel = futures[future]
                try:
                    items, spent_s = future.result()
                except Exception as exc:  # one vessel's history lost, the others go on
                    failed.append(vessel)
                    say(f"demo: the history of {vessel} could not be made "
                        f"({type(exc).__name__}: {exc}); the other vessels go on")  # fmt: skip
                    continue
                cpu_s += spent_s
                pending = 0
                for kind, rows in items:
                    adders[kind](rows)
                    pending += len(rows) if isinstance(rows, list) else 1
                    if pending >= BLOCK_ROWS:
                        rec.commit()
                        rows_written += pending
                        pending = 0
                rec.commit()
                rows_written += pending
                say(f"demo: history {done} of {len(order)} vessels written ({vessel}, "
                    f"{time.monotonic() - began:.0f} s)")  # fmt: skip
    return {
        "vessels": len(order),
        "rows": rows_written,
        "seconds": round(time.monotonic() - began, 2),
        "worker_cpu_s": round(cpu_s, 2),
        "failed": failed,
    }


def _cost(plan: VesselPlan) -> float:
    """Return a rough cost of simulating ``plan``'s history (its simulated seconds)."""
    return len(plan.run_days) * plan.base.water_mass_kg**0.5
