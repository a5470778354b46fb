"""Time the board's callbacks and count what it sends, over a 7-day 1 Hz log; print JSON.

Run from the repository root:

    .venv/bin/python benchmarks/bench_board.py [--days 7] [--no-replay] [--log PATH]

The log is made here: one storage water heater (our own invented demo data, not a
simulation: a thermostat saw-tooth on the water, the element above it while on, a
slowly wandering room, 3 kW while heating), four channels and one estimate a
second for ``--days`` days, one run a day in the runs table with a drift summary.
Each callback is timed by calling what it runs (the same functions the app wires
in, ``dashboard.data`` loaders and the views' pure renders, then the JSON encoding
Dash does); ``bytes`` is that JSON and ``gzip_bytes`` it compressed, as the board
sends it (flask-compress). The first load adds the page, layout, dependencies and
scripts, fetched from the app with a test client asking for gzip. ``max_rss_mib`` is
the process's peak resident memory (the board's work, bar the replay), and
``replay_child_max_rss_mib`` that of the child process a replay runs in.

Target (issue 6): slowest callback under 200 ms, first load under 2 MB.
"""

from __future__ import annotations

import argparse
import gzip
import json
import math
import re
import resource
import tempfile
import time
from pathlib import Path

from plotly.utils import PlotlyJSONEncoder

from dashboard import data
from dashboard.app import create_app
from dashboard.jobs import Jobs
from dashboard.views import fleet, maintenance, replay, vessel
from drivers.sample import Quality, Sample
from monitor.records.recorder import Recorder

START = 1_790_000_000.0  # 2026-09-20, an arbitrary start for the invented log


def make_log(path: str, days: float) -> int:
    """Write the invented log; return the number of samples."""
    n = int(days * 86400)
    count = 0
    with Recorder(path, version="bench", config_text="# bench\n") as rec:
        rec.add_vessel("heater-1", {"rated_power_w": 3000.0, "element_sensor": "yes"})
        water, heating = 55.0, True
        for i in range(n):
            t = START + i
            water += 0.02 if heating else -0.004
            if water > 62.0:
                heating = False
            elif water < 56.0:
                heating = True
            ambient = 20.0 + 2.0 * math.sin(2 * math.pi * i / 86400.0)
            element = water + (50.0 if heating else 0.5)
            power = 3000.0 if heating else 0.0
            rec.add_samples([Sample(t, "heater-1", ch, v, Quality.OK, "bench")
                             for ch, v in (("water", water), ("element", element),
                                           ("ambient", ambient), ("power", power))])  # fmt: skip
            count += 4
            # the flat form (monitor.records.schema), the figures the board shows
            rec.add_estimates([{
                "t": t, "vessel": "heater-1", "run": str(i // 86400 + 1),
                "phase": "heating" if heating else "holding",
                "water_c": water, "water_mass_kg": 150.0, "water_mass_std": 2.0,
                "heat_capacity_j_per_k": 6.3e5, "heat_capacity_std": 8e3,
                "ua_w_per_k": 1.8, "ua_std": 0.1, "element_conductance_w_per_k": 60.0,
                "element_conductance_std": 2.0, "target_c": 62.0,
                "time_to_target_s": 300.0 if heating else None,
                "time_to_target_lo_s": 250.0 if heating else None,
                "time_to_target_hi_s": 350.0 if heating else None, "nis": 1.0,
                "flags": [], "power_w": power, "target_reason": ""}])  # fmt: skip
            if i % 86400 == 86399:
                day = i // 86400 + 1
                g = {"value": 60.0 - day, "std": 1.0}
                rec.add_run("heater-1", str(day), t - 86399, t,
                            {"source": "live", "run": str(day), "model": "two-node",
                             "element_conductance_w_per_k": g, "drift": []})  # fmt: skip
            if i % 20_000 == 0:
                rec.commit()
    return count


def encoded(value: object) -> tuple[int, int]:
    text = json.dumps(value, cls=PlotlyJSONEncoder).encode()
    return len(text), len(gzip.compress(text, 6))


def timed(fn, *args, **kwargs) -> tuple[float, object]:
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    return (time.perf_counter() - t0) * 1000.0, out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=float, default=7.0)
    parser.add_argument("--no-replay", action="store_true", help="skip the replay view")
    parser.add_argument(
        "--log", help="keep the invented log at this path and reuse it when it exists"
    )
    args = parser.parse_args()
    out: dict[str, object] = {"days": args.days}
    with tempfile.TemporaryDirectory() as tmp:
        path = args.log or str(Path(tmp) / "week.sqlite")
        t0 = time.perf_counter()
        if args.log and Path(path).exists():
            out["samples"] = "reused"
        else:
            out["samples"] = make_log(path, args.days)
        out["make_log_s"] = round(time.perf_counter() - t0, 1)
        out["log_mib"] = round(Path(path).stat().st_size / 2**20, 1)

        app = create_app(path, poll_ms=2000)
        client = app.server.test_client()
        first = 0
        page = client.get("/", headers={"Accept-Encoding": "gzip"})
        first += len(page.data)
        html = gzip.decompress(page.data).decode() if page.headers.get(
            "Content-Encoding") == "gzip" else page.get_data(as_text=True)  # fmt: skip
        for url in ("/_dash-layout", "/_dash-dependencies",
                    *re.findall(r'<script src="([^"]+)"', html)):  # fmt: skip
            first += len(client.get(url, headers={"Accept-Encoding": "gzip"}).data)
        # plotly.js and the async component bundles, fetched once the page runs
        for url in re.findall(r'"(/_dash-component-suites/[^"]+async-(?:graph|dropdown|slider)'
                              r'\.js)"', html) or []:  # fmt: skip
            first += len(client.get(url, headers={"Accept-Encoding": "gzip"}).data)
        plotly_js = client.get("/_dash-component-suites/plotly/package_data/plotly.min.js",
                               headers={"Accept-Encoding": "gzip"})  # fmt: skip
        first += len(plotly_js.data)

        callbacks: dict[str, dict[str, float]] = {}

        def record(name: str, ms: float, value: object) -> None:
            raw, gz = encoded(value)
            callbacks[name] = {"ms": round(ms, 1), "bytes": raw, "gzip_bytes": gz}

        ms, snap = timed(data.load_snapshot, path, None)
        record("poll (snapshot)", ms, snap)
        ms, fleet_table = timed(fleet.render_fleet, snap)
        record("fleet table", ms, fleet_table.to_plotly_json())
        ms, cards = timed(vessel.render_vessel, snap)
        record("vessel figures", ms, [c.to_plotly_json() for c in cards[0]])

        def charts_full():
            return vessel.chart_update(data.chart_data(path, "heater-1"), None)

        ms, (readings, estimates, cursor) = timed(charts_full)
        record("vessel charts, first draw", ms, [readings, estimates, cursor])
        after = {"t": cursor["after"]["t"] - 2.0, "est_t": cursor["after"]["est_t"] - 2.0}

        def charts_patch():
            return vessel.chart_update(data.chart_data(path, "heater-1", after), cursor)

        ms, patch = timed(charts_patch)
        record(
            "vessel charts, 2 s update (Patch)",
            ms,
            [p.to_plotly_json() if hasattr(p, "to_plotly_json") else None for p in patch[:2]],
        )
        ms, history = timed(data.run_history, path, "heater-1")
        record("maintenance history", ms, maintenance.history_figure(history))
        if not args.no_replay:
            ms, runs = timed(data.list_runs, path)
            record("replay: list runs", ms, runs)
            if runs:
                # the replay itself runs on the board's worker thread; the callbacks only
                # ask how far it has got, then draw the answer
                r = runs[-1]
                span = (r["start_t"], r["end_t"])
                jobs = Jobs()
                t_job = time.perf_counter()
                asks = []
                state = None
                while state is None or state.status == "running":
                    ms, state = timed(jobs.ask, ("bench",), data.replay_detail, path,
                                      r["vessel"], r["run"], None, span,
                                      separate=True)  # fmt: skip
                    asks.append(ms)
                    if len(asks) == 4 and state.status == "running":
                        # the worker holds the GIL much of the time: the live board slows
                        ms, busy = timed(charts_full)
                        record("vessel charts, first draw, during a replay", ms, list(busy[:2]))
                    time.sleep(0.5)
                out["replay_job"] = {
                    "status": state.status, "error": state.error,
                    "s": round(time.perf_counter() - t_job, 1),
                    "steps": (state.answer or {}).get("steps"),
                    "ask_ms_max": round(max(asks), 1),
                    "ask_ms_median": round(sorted(asks)[len(asks) // 2], 1),
                }  # fmt: skip
                jobs.close()
                if state.status == "done":
                    ms, shown = timed(replay.show_run, state.answer)
                    record("replay: draw the replayed run", ms, list(shown[:2]))
                    ms, moved = timed(replay.scrub, state.answer, 3600.0)
                    record("replay: scrub (Patch)", ms, [p.to_plotly_json() for p in moved[:2]])
        first_load = first + sum(callbacks[k]["gzip_bytes"] for k in (
            "poll (snapshot)", "fleet table", "vessel figures", "vessel charts, first draw",
            "maintenance history"))  # fmt: skip
        slowest = max(callbacks.items(), key=lambda kv: kv[1]["ms"])
        out.update({
            "callbacks": callbacks,
            "slowest_callback": {"name": slowest[0], "ms": slowest[1]["ms"]},
            "first_load_bytes_gzip": first_load,
            "per_update_bytes_gzip": callbacks["poll (snapshot)"]["gzip_bytes"]
            + callbacks["vessel charts, 2 s update (Patch)"]["gzip_bytes"],
            "max_rss_mib": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
            "replay_child_max_rss_mib": round(
                resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024, 1),
            "target_slowest_ms": 200, "target_first_load_bytes": 2_000_000,
        })  # fmt: skip
    print(json.dumps(out, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
