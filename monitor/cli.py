"""The ``ebullio`` command line.

Verbs so far: ``demo`` (the simulated rig through the real drivers, live in the
terminal, recorded to a log), ``run`` (live, from a TOML rig configuration),
``simulate`` (write a synthetic log), ``replay`` (a recorded log through the
estimator), ``verify`` (a recorder log's hash chain) and ``export`` (a recorder log
to the CSV interchange format). Each has ``--help`` with an example.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import logging
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

from drivers.errors import EbullioError
from monitor import __version__
from monitor.physics.water import boiling_point_c, pressure_at_altitude_kpa
from monitor.records.interchange import rows_from_samples, write_csv
from monitor.reports.safety import SAFETY_NOTE
from monitor.runs.replay import replay, summary_table

if TYPE_CHECKING:
    from monitor.rig.demo import DemoVessel

log = logging.getLogger("ebullio")


#: Channels written to a simulated CSV log, in column order.
SIM_CHANNELS = ["water", "element", "ambient", "power", "energy", "voltage", "current"]


def number_option(low: float | None = None, high: float | None = None, *, above: bool = False):
    """Return an argparse ``type`` taking a finite number within [low, high].

    With ``above`` the low end is excluded (``--speed 0`` is refused). The message
    names the range, and argparse prints it as a usage error (exit 2), no traceback.
    """

    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
        if value != value or value in (float("inf"), float("-inf")):
            raise argparse.ArgumentTypeError(f"{text!r} is not a finite number")
        if low is not None and (value <= low if above else value < low):
            word = "above" if above else "at least"
            raise argparse.ArgumentTypeError(f"{text} must be {word} {low:g}")
        if high is not None and value > high:
            raise argparse.ArgumentTypeError(f"{text} must be at most {high:g}")
        return value

    parse.__name__ = "number"
    return parse


def port_option(text: str) -> int:
    """Argparse ``type`` of a TCP port: 0 (any free one) to 65535."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a port number") from None
    if not 0 <= value <= 65535:
        raise argparse.ArgumentTypeError(f"{text} is not a port (0-65535)")
    return value


def _site_pressure_kpa(args: argparse.Namespace) -> float:
    if args.pressure_kpa is not None:
        return args.pressure_kpa
    if args.altitude_m is not None:
        return pressure_at_altitude_kpa(args.altitude_m)
    return 101.325


def _scenario_from(args: argparse.Namespace):
    changes: dict[str, object] = {"pressure_kpa": _site_pressure_kpa(args)}
    if args.altitude_m is not None:
        changes["altitude_m"] = args.altitude_m
    for name, attr in (
        ("scale_mm", "scale_mm"),
        ("duration_s", "duration_s"),
        ("mass_kg", "water_mass_kg"),
        ("vessel", "vessel"),
    ):
        value = getattr(args, name, None)
        if value is not None:
            changes[attr] = value
    # the simulated world (and scipy.optimize under it) is loaded by the commands that
    # simulate: a replay or a report starts 0.4 s sooner and 40 MiB smaller without it
    from drivers.simworld import scenario_by_name

    return scenario_by_name(args.scenario, **changes)


def cmd_simulate(args: argparse.Namespace) -> int:
    """Write a simulated run as a CSV interchange log."""
    from drivers.simworld import SimulatedRig, scenario_metadata

    scenario = _scenario_from(args)
    rig = SimulatedRig(scenario, seed=args.seed)
    meta = {"ebullio_version": __version__, **scenario_metadata(scenario, args.seed)}
    steps = round(scenario.duration_s / scenario.sample_interval_s)
    out_path = Path(args.out)
    out_path.parent.mkdir(parents=True, exist_ok=True)

    def batches():
        for i, batch in enumerate(rig.run()):
            if steps >= 2000 and i % (steps // 10) == 0:
                print(f"simulate: {100 * i // steps:3d} %", file=sys.stderr, flush=True)
            yield batch

    with open(out_path, "w", encoding="utf-8", newline="") as handle:
        count = write_csv(
            handle, rows_from_samples(batches(), scenario.start_epoch_s), meta, SIM_CHANNELS
        )
    print(f"wrote {count} rows of {scenario.name!r} (seed {args.seed}) to {out_path}")
    return 0


async def _live(
    args: argparse.Namespace, vessels: list[DemoVessel], out_path: Path, *,
    on_started: Callable[[], None] | None = None, mqtt_url: str | None = None,
) -> None:  # fmt: skip
    """Run the demo's vessels live into ``out_path`` with the first one's table in the
    terminal, then what the board's command line asked to do after (``args.after_demo``)."""
    from monitor.rig.demo import run_live

    print(
        f"{'time s':>7} {'phase':>8} {'water °C':>8} {'power W':>7} "
        f"{'time to target (90 %)':>20} {'water kg':>12} {'UA W/K':>12} {'G W/K':>12}"
    )
    stats, _ = await run_live(
        vessels, str(out_path), args.speed, args.every_s,
        say=lambda line: print(line, flush=True), on_started=on_started, mqtt_url=mqtt_url,
    )  # fmt: skip
    print(
        f"demo: recorded {stats.samples} samples and {stats.estimates} estimates "
        f"({stats.quarantined} inputs quarantined) to {out_path}; "
        f"check it with: ebullio verify {out_path}; replay it with: ebullio replay {out_path}; "
        f"see the fleet with: ebullio fleet {out_path}"
    )
    after = getattr(args, "after_demo", None)
    if after is not None:
        await after()


#: The site demo's history session, said in its recorded configuration.
SITE_HISTORY_NOTE = (
    "ebullio demo: the simulated history of an invented site (a test rig and a building's\n"
    "storage water heaters), written at full speed. No instrument or broker was read in\n"
    "this session: every reading was simulated. The [mqtt] table is only the form."
)


async def _site_demo(args: argparse.Namespace) -> int:
    """The full demo: the site's weeks of history, then every vessel live."""
    import contextlib
    import tempfile
    from dataclasses import replace

    from drivers.emulators.mosquitto import MosquittoBroker, mosquitto_program
    from drivers.simworld.site import HISTORY_DAYS, demo_site
    from monitor.rig.demo import DemoVessel
    from monitor.rig.history import History, site_config_text, write_history

    plans = tuple(demo_site())
    out_path = Path(args.out)
    out_path.parent.mkdir(parents=True, exist_ok=True)
    print(SAFETY_NOTE)
    kettles = [p for p in plans if p.kind == "kettle"]
    heaters = [p for p in plans if p.kind != "kettle"]
    print(
        f"demo: an invented site, all simulated: {len(kettles)} kettles on a test rig and "
        f"{len(heaters)} storage water heaters in a building. First their last {HISTORY_DAYS} "
        f"days are simulated at full speed into {out_path}; then they all run live.",
        flush=True,
    )
    on_started = getattr(args, "on_started", None)  # set by the board's command line
    text = site_config_text(plans, "mqtt://127.0.0.1:1883", SITE_HISTORY_NOTE)
    history = History(plans, text, end_s=time.time(), days=HISTORY_DAYS)
    figures = await asyncio.to_thread(
        write_history, str(out_path), history, say=lambda line: print(line, flush=True),
        on_open=on_started,
    )  # fmt: skip
    print(f"demo: the history is written: {figures['rows']} rows in {figures['seconds']} s "
          f"(the workers' CPU: {figures['worker_cpu_s']} s)", flush=True)  # fmt: skip
    # the live part: the scaling kettle first (its figures go to the terminal), every
    # run as long as a kettle's (the heaters' recovery runs cut to it)
    kettles.sort(key=lambda p: p.fault is None)
    span_s = kettles[0].base.duration_s
    with contextlib.ExitStack() as stack:
        broker = None
        if mosquitto_program() is not None:
            workdir = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="ebullio-")))
            broker = await asyncio.to_thread(MosquittoBroker(workdir).start)
            stack.callback(broker.stop)
            print(f"demo: the heaters publish over MQTT to the demo's own Mosquitto at "
                  f"{broker.url} (stopped with the demo)", flush=True)  # fmt: skip
        else:
            print("demo: Mosquitto is not installed (apt-get install mosquitto), so the heaters "
                  "come in through simulated line loggers on pseudo-terminals instead of MQTT",
                  flush=True)  # fmt: skip
        live = []
        for p in (*kettles, *heaters):
            scenario = p.scenario(float(HISTORY_DAYS), 0.0, len(p.run_days))
            if p.kind == "kettle":
                live.append(DemoVessel(scenario, p.seed, "bench", p.metadata()))
            else:
                via = "mqtt" if broker else "logger"
                scenario = replace(scenario, duration_s=span_s)
                live.append(DemoVessel(scenario, p.seed, via, p.metadata()))
        watched = kettles[0]
        print(f"demo: now live at {args.speed:g}x real time: {watched.vessel} ({watched.place}, "
              "its element scaling) heats to the boil, shown below; the other kettle and the "
              "heaters are on the board. Each kettle has a simulated thermocouple logger on a "
              "pseudo-terminal and a simulated Modbus TCP meter on 127.0.0.1",
              flush=True)  # fmt: skip
        await _live(args, live, out_path, mqtt_url=broker.url if broker else None)
    return 0


async def _demo(args: argparse.Namespace) -> int:
    from monitor.rig.demo import DemoVessel

    if not args.quick:
        return await _site_demo(args)
    scenario = _scenario_from(args)
    print(SAFETY_NOTE)
    print(
        f"demo: simulated {scenario.name} {scenario.vessel!r}, {scenario.water_mass_kg} kg of "
        f"water, boiling point {boiling_point_c(scenario.pressure_kpa):.2f} °C at "
        f"{scenario.pressure_kpa:.2f} kPa, {args.speed:g}x real time; a simulated thermocouple "
        "logger on a pseudo-terminal and a simulated Modbus TCP meter on 127.0.0.1"
    )
    out_path = Path(args.out)
    out_path.parent.mkdir(parents=True, exist_ok=True)
    on_started = getattr(args, "on_started", None)  # set by the board's command line
    await _live(args, [DemoVessel(scenario, args.seed)], out_path, on_started=on_started)
    return 0


#: Where the demo records when no --out is given (the next free demo-N.sqlite beside it
#: when this one holds readings too recent for a demo at speed to follow).
DEMO_LOG = "out/demo.sqlite"


def _first_free(taken: Callable[[Path], bool]) -> Path:
    """Return :data:`DEMO_LOG`, or the first ``demo-N.sqlite`` beside it not ``taken``."""
    base = path = Path(DEMO_LOG)
    n = 1
    while taken(path):
        n += 1
        path = base.with_name(f"{base.stem}-{n}{base.suffix}")
    return path


def _demo_log(args: argparse.Namespace) -> str:
    """Return the demo's log: ``--out``, or :data:`DEMO_LOG` unless a demo at this speed
    would have to slow down to follow its readings; then the next free ``demo-N.sqlite``."""
    from monitor.records.recorder import last_sample_t
    from monitor.rig.demo import demo_start_s

    if not args.quick:  # the site demo writes weeks of history: always a new log
        if args.out is not None:
            if Path(args.out).exists():
                raise EbullioError(
                    f"{args.out} exists: the site demo writes weeks of history into a new "
                    "log; give another --out (or --quick to add a kettle run to it)"
                )
            return str(args.out)
        return str(_first_free(Path.exists))
    if args.out is not None:
        return str(args.out)
    base = Path(DEMO_LOG)
    duration_s = _scenario_from(args).duration_s
    path = _first_free(
        lambda p: demo_start_s(time.time(), duration_s, args.speed, last_sample_t(p))[1]
    )
    if path != base:
        print(f"demo: {base} holds readings from a demo a few minutes ago, so this one records "
              f"to {path} and runs at full speed (--out {base} adds to it, no faster than "
              "real time)")  # fmt: skip
    return str(path)


def cmd_demo(args: argparse.Namespace) -> int:
    """Run the simulated rig in (accelerated) real time and show it live."""
    args.out = _demo_log(args)
    return asyncio.run(_demo(args))


def cmd_replay(args: argparse.Namespace) -> int:
    """Replay logs through the estimator and print the run summaries."""
    estimates = None
    try:
        if args.estimates:
            Path(args.estimates).parent.mkdir(parents=True, exist_ok=True)
            estimates = open(args.estimates, "w", encoding="utf-8", newline="")  # noqa: SIM115
        result = replay(args.logs, estimates_out=estimates, progress=sys.stderr)
    finally:
        if estimates is not None:
            estimates.close()
    if args.record:
        from monitor.runs.logs import record_summaries

        count = record_summaries(args.logs, result)
        print(f"replay: recorded {count} run summaries in {', '.join(args.logs)}", file=sys.stderr)
    if args.json:
        print(json.dumps(result, indent=2, allow_nan=False))
    else:
        print(summary_table(result))
        print(SAFETY_NOTE)
    return _say_integrity(result["integrity"])  # type: ignore[arg-type]


def _say_integrity(checks: list[dict[str, object]]) -> int:
    """Print a warning for each recorder log that is not intact; return 1 if any, else 0."""
    from monitor.runs.logs import integrity_warnings

    warnings = integrity_warnings(checks)
    for line in warnings:
        print(f"ebullio: {line}", file=sys.stderr)
    return 1 if warnings else 0


def cmd_run(args: argparse.Namespace) -> int:
    """Run the live service from a rig configuration until SIGINT or SIGTERM."""
    from monitor.rig.config import load_config

    config = load_config(args.config)
    if args.engine is not None:
        return _run_engine_worker(config, args)
    if args.log is None:
        raise EbullioError("--log is needed (or --engine, where the stream is the log)")
    Path(args.log).parent.mkdir(parents=True, exist_ok=True)
    stats = asyncio.run(_run_service(config, args.log, args.for_s))
    print(json.dumps({"log": args.log, **stats.as_dict()}))
    print(SAFETY_NOTE, file=sys.stderr)
    return 0


async def _run_service(config, log_path: str, for_s: float | None):
    """Run the service with signal handlers installed; return its counters."""
    import signal

    from monitor.rig.service import Service

    service = Service(config, log_path)
    loop = asyncio.get_running_loop()
    for signum in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(signum, service.stop)
    if for_s is not None:
        loop.call_later(for_s, service.stop)
    log.info("running %d instruments and %d vessels; log %s (stop with Ctrl-C)",
             len(config.instruments), len(config.vessels), log_path)  # fmt: skip
    try:
        return await service.run()
    finally:
        for signum in (signal.SIGINT, signal.SIGTERM):
            loop.remove_signal_handler(signum)


def _run_engine_worker(config, args: argparse.Namespace) -> int:
    """Run one worker of the NATS engine until SIGINT, SIGTERM or ``--for-s``."""
    import os
    import signal
    import socket

    from monitor.engine.worker import (
        Worker,
        WorkerSettings,
        engine_layout,
        engine_servers,
        engine_vessels,
    )

    servers = engine_servers(args.engine)
    name = args.worker or f"{socket.gethostname()}-{os.getpid()}"
    stamped = logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s")
    for handler in logging.getLogger().handlers:  # a fleet's workers' logs are read side by side
        handler.setFormatter(stamped)
    settings = WorkerSettings(replicas=args.replicas, checkpoint_every_s=args.checkpoint_s)
    worker = Worker(servers, engine_vessels(config), engine_layout(config, args.partitions),
                    name, settings)  # fmt: skip

    async def serve():
        loop = asyncio.get_running_loop()
        for signum in (signal.SIGINT, signal.SIGTERM):
            loop.add_signal_handler(signum, worker.stop)
        if args.for_s is not None:
            loop.call_later(args.for_s, worker.stop)
        log.info("worker %s: %d vessels, %d partitions, engine %s",
                 name, len(worker.vessels), args.partitions, worker.source)  # fmt: skip
        return await worker.run()

    stats = asyncio.run(serve())
    print(json.dumps({"worker": name, **stats.as_dict()}))
    print(SAFETY_NOTE, file=sys.stderr)
    return 0


def cmd_verify(args: argparse.Namespace) -> int:
    """Check a recorder log's hash chain; exit 1 when it is broken."""
    import os

    from monitor.records.recorder import verify

    key = None
    if args.key_env:
        if not os.environ.get(args.key_env):
            print(f"ebullio verify: the environment variable {args.key_env!r} is not set",
                  file=sys.stderr)  # fmt: skip
            return 2
        key = os.environ[args.key_env].encode("utf-8")
    head = None
    if args.head:
        try:
            head = json.loads(Path(args.head).read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            print(f"ebullio verify: cannot read the head {args.head}: {exc}", file=sys.stderr)
            return 2
        if not isinstance(head, dict):
            print(f"ebullio verify: {args.head} is not a JSON object", file=sys.stderr)
            return 2
    result = verify(args.log, head=head, key=key)
    if result["state"] == "not_a_log":
        if args.json:
            print(json.dumps(result, allow_nan=False))
        print(f"ebullio verify: {result['reason']}", file=sys.stderr)
        return 2
    if args.json:
        print(json.dumps(result, allow_nan=False))
    else:
        words = {"intact": "intact", "tampered": "ALTERED", "damaged": "DAMAGED"}
        counts = f"{result['blocks']} blocks, {result['samples']} samples"
        print(f"{args.log}: {words[str(result['state'])]}: {counts}, "
              f"{result['quarantined']} quarantined")  # fmt: skip
        if result["head_checked"] is None and result["ok"]:
            print("no chain head to check against: blocks removed from the end would not show")
        if not result["ok"]:
            where = result["first_bad_block"]
            print((f"first bad block: {where}; " if where is not None else "")
                  + str(result.get("reason") or "no reason given"))  # fmt: skip
    return 0 if result["ok"] else 1


def cmd_export(args: argparse.Namespace) -> int:
    """Write one vessel of a log as a CSV interchange file, and/or a recorder log's
    readings and estimates as Parquet."""
    from monitor.runs.logs import log_integrity
    from monitor.runs.streams import export_csv

    if not (args.csv or args.parquet or args.estimates_parquet):
        print("ebullio export: say what to write: --csv, --parquet and/or --estimates-parquet",
              file=sys.stderr)  # fmt: skip
        return 2
    if args.parquet or args.estimates_parquet:
        from monitor.records.parquet import export_parquet

        written = export_parquet(args.log, args.parquet, args.estimates_parquet, args.vessel)
        for kind, out_name in (("samples", args.parquet), ("estimates", args.estimates_parquet)):
            if kind in written:
                print(f"wrote {written[kind]} {kind} to {out_name}", file=sys.stderr)
    if args.csv:
        out_path = Path(args.csv)
        out_path.parent.mkdir(parents=True, exist_ok=True)
        with open(out_path, "w", encoding="utf-8", newline="") as out:
            rows = export_csv(args.log, out, args.vessel)
        print(f"wrote {rows} rows to {out_path}", file=sys.stderr)
    return _say_integrity([log_integrity(args.log)])


def cmd_fleet(args: argparse.Namespace) -> int:
    """Print every vessel in the logs, worst first, with its drift status."""
    from monitor.runs.drift import fleet_rows, fleet_table

    result = replay(args.logs, progress=sys.stderr)
    rows = fleet_rows(result)
    if args.json:
        print(json.dumps({"vessels": rows, "integrity": result["integrity"]}, indent=2,
                         allow_nan=False))  # fmt: skip
    else:
        print(fleet_table(rows))
        print(SAFETY_NOTE)
    return _say_integrity(result["integrity"])  # type: ignore[arg-type]


def cmd_report(args: argparse.Namespace) -> int:
    """Write the audit report of one run as a self-contained HTML file."""
    from monitor.records.recorder import is_recorder_log, verify
    from monitor.reports.report import build_report
    from monitor.runs.logs import log_integrity

    # one pass over the chain for both the report's integrity section and the warning
    verified = verify(args.log) if is_recorder_log(args.log) else None
    page = build_report(args.log, args.vessel, args.run, verified=verified)
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(page, encoding="utf-8")
    print(f"wrote the report to {out} ({len(page) // 1024} KiB, opens offline)", file=sys.stderr)
    if args.pdf:
        from monitor.reports.report import print_pdf

        pdf = out.with_suffix(".pdf")
        print_pdf(out, pdf)
        print(f"printed it to {pdf}", file=sys.stderr)
    return _say_integrity([log_integrity(args.log, verified)])


def _add_scenario_options(p: argparse.ArgumentParser, seed: int) -> None:
    """Add the simulated scenario's options (shared by ``simulate`` and ``demo``)."""
    p.add_argument("--scenario", choices=["kettle", "water-heater"], default="kettle")
    p.add_argument("--seed", type=int, default=seed, help=f"random seed (default {seed})")
    p.add_argument(
        "--scale-mm", type=number_option(0.0, 10.0), help="limescale on the element, mm (default 0)"
    )
    p.add_argument("--duration-s", type=number_option(0.0, above=True), help="length of the run, s")
    p.add_argument("--mass-kg", type=number_option(0.0, above=True), help="water fill, kg")
    p.add_argument("--vessel", help="vessel id written to the log")
    _add_site_options(p)


def _add_site_options(p: argparse.ArgumentParser) -> None:
    site = p.add_mutually_exclusive_group()
    site.add_argument(
        "--pressure-kpa",
        type=number_option(1.0, 500.0),
        help="site pressure, kPa (default 101.325)",
    )
    site.add_argument(
        "--altitude-m",
        type=number_option(-500.0, 9000.0),
        help="site elevation, m; pressure from the ICAO atmosphere",
    )


def build_parser(extend=None) -> argparse.ArgumentParser:
    """Return the argument parser of the ``ebullio`` command.

    ``extend(verbs, parsers)``, when given, adds to it: ``verbs`` is the sub-command
    action and ``parsers`` maps each verb to its parser. The board's package uses it
    for ``board`` and the demo's board (``dashboard/cli.py``), because ``monitor``
    may not import ``dashboard``.
    """
    parser = argparse.ArgumentParser(
        prog="ebullio",
        description="Sensor logging and live heat-balance monitoring for heated water vessels.",
        epilog=SAFETY_NOTE,
    )
    parser.add_argument("--version", action="version", version=f"ebullio {__version__}")
    parser.add_argument("-v", "--verbose", action="store_true", help="log more detail")
    verbs = parser.add_subparsers(dest="verb", required=True, metavar="VERB")

    sim = verbs.add_parser(
        "simulate",
        help="write a synthetic log from the simulated rig",
        description="Run a simulated vessel flat out and write a CSV interchange log.",
        epilog="example: ebullio simulate --scenario kettle --seed 7 --scale-mm 0.2 "
        "--out kettle.csv",
    )
    _add_scenario_options(sim, seed=0)
    sim.add_argument("--out", required=True, help="CSV file to write")
    sim.set_defaults(func=cmd_simulate)

    demo = verbs.add_parser(
        "demo",
        help="run a simulated site with its history, and a kettle live, and record it",
        description="The embedded default, an invented site, all simulated: two kettles on a "
        "test rig and eight storage water heaters in a building, with weeks of past runs "
        "(some vessels scaling, losing insulation, weakening or under-filled) written into a "
        "new SQLite log at full speed, then the scaled kettle heated to the boil live through "
        "the real drivers (a thermocouple logger on a pseudo-terminal, a Modbus TCP power "
        "meter on 127.0.0.1), its live figures (phase, time to boil with its 90 % interval, "
        "water mass, UA, element conductance) shown in the terminal. --quick runs one vessel "
        "live, without the history.",
        epilog="example: ebullio demo (or, one kettle without the history: ebullio demo --quick "
        "--speed 20 --out out/kettle.sqlite)",
    )
    _add_scenario_options(demo, seed=7)
    demo.add_argument(
        "--quick",
        action="store_true",
        help="only one simulated vessel, live (the scenario options above choose it), without "
        "the site's history: for tests and slow machines",
    )
    demo.add_argument(
        "--speed",
        type=number_option(0.0, above=True),
        default=20.0,
        help="times real time (default 20)",
    )
    demo.add_argument(
        "--every-s",
        type=number_option(0.0, above=True),
        default=10.0,
        help="print every N simulated s",
    )
    demo.add_argument(
        "--out",
        default=None,
        help=f"SQLite log (default {DEMO_LOG}, or the next free demo-N.sqlite beside it when "
        "it holds readings from a demo a few minutes ago)",
    )
    demo.set_defaults(func=cmd_demo)
    rep = verbs.add_parser(
        "replay",
        help="run recorded logs through the estimator",
        description="Replay CSV interchange logs through the live estimator at full speed and "
        "summarise each run: water mass, heat capacity, UA, element conductance, standing loss, "
        "heat-up time, energy, efficiency and flags. The same log and version give the same "
        "figures, bit for bit.",
        epilog="example: ebullio replay replay_logs/kettle-clean.csv --json "
        "--estimates out/kettle-estimates.csv",
    )
    rep.add_argument(
        "logs", nargs="+", metavar="LOG",
        help="CSV interchange or recorder (SQLite) logs; several are runs in order",
    )  # fmt: skip
    rep.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    rep.add_argument("--estimates", metavar="FILE.csv", help="write every filter step here")
    rep.add_argument(
        "--record", action="store_true",
        help="append the run summaries (drift flags included) to the recorder log, as new "
        "blocks of its hash chain",
    )  # fmt: skip
    rep.set_defaults(func=cmd_replay)

    run = verbs.add_parser(
        "run",
        help="monitor live instruments from a rig configuration",
        description="Read the instruments and broker named in a TOML rig configuration, run "
        "one estimator per vessel, record everything to an SQLite log and publish estimates. "
        "Stops cleanly on Ctrl-C or SIGTERM; see DEVELOPERS.md for the configuration keys.",
        epilog="example: ebullio run --config rig.toml --log logs/lab.sqlite; one worker of "
        "a fleet: ebullio run --config fleet.toml --engine nats://127.0.0.1:4222 --partitions 8",
    )
    run.add_argument("--config", required=True, help="TOML rig configuration")
    run.add_argument("--log", help="SQLite log to write (appended if it exists)")
    run.add_argument(
        "--engine", metavar="NATS_URLS",
        help="be one worker of the NATS JetStream engine instead (nats://HOST:PORT, several "
        "comma-separated): readings from the partitioned stream, no SQLite log (docs/engine.md)",
    )  # fmt: skip
    run.add_argument(
        "--partitions",
        type=int,
        default=8,
        help="with --engine: partitions, as in the server's mapping (default 8)",
    )
    run.add_argument(
        "--replicas",
        type=int,
        default=1,
        choices=(1, 3, 5),
        help="with --engine: replicas of the stream and buckets it creates",
    )
    run.add_argument(
        "--checkpoint-s",
        type=number_option(0.1, 3600.0),
        default=5.0,
        help="with --engine: seconds between checkpoints (default 5)",
    )
    run.add_argument("--worker", help="with --engine: this worker's name (default host-pid)")
    run.add_argument(
        "--for-s",
        type=number_option(0.0, above=True),
        help="stop by itself after this many seconds",
    )
    run.set_defaults(func=cmd_run)

    ver = verbs.add_parser(
        "verify",
        help="check that a recorder log was not altered",
        description="Recompute the SHA-256 chain over every committed block of a recorder log, "
        "check that the log reaches its chain head (the LOG.head file the recorder keeps, or "
        "--head) so removed trailing blocks are seen, and run SQLite's own quick_check. "
        "Exits 0 when intact, 1 when altered or damaged (saying which), 2 when LOG is "
        "missing or not a recorder log.",
        epilog="example: ebullio verify logs/lab.sqlite --key-env EBULLIO_LOG_KEY --json",
    )
    ver.add_argument("log", metavar="LOG", help="recorder (SQLite) log")
    ver.add_argument("--json", action="store_true", help="print one JSON object")
    ver.add_argument(
        "--head", metavar="FILE", help="a chain head kept elsewhere (JSON, as in LOG.head)"
    )
    ver.add_argument(
        "--key-env", metavar="NAME", help="environment variable holding the head's signing key"
    )
    ver.set_defaults(func=cmd_verify)

    fleet = verbs.add_parser(
        "fleet",
        help="every vessel in the logs, worst first",
        description="Replay the logs and list every vessel with its status (the worst flag "
        "of its last run, drift included), the flags, the scaling index against its "
        "baseline, its last run, and the runs since the baseline.",
        epilog="example: ebullio fleet logs/plant.sqlite",
    )
    fleet.add_argument("logs", nargs="+", metavar="LOG", help="recorder or CSV logs")
    fleet.add_argument("--json", action="store_true", help="print one JSON object")
    fleet.set_defaults(func=cmd_fleet)

    rpt = verbs.add_parser(
        "report",
        help="write the audit report of a run (one HTML file)",
        description="Replay a log and write one self-contained HTML file (it opens offline) "
        "for one run of one vessel: the vessel and site, instruments and calibrations, test "
        "conditions, results with uncertainties, drift against the baseline, the log's "
        "integrity (hash chain, digests, versions), the estimator's settings, plots and the "
        "safety cautions.",
        epilog="example: ebullio report logs/lab.sqlite --vessel urn-3 --run 2 --out urn-3.html",
    )
    rpt.add_argument("log", metavar="LOG", help="recorder (SQLite) or CSV log")
    rpt.add_argument("--vessel", help="which vessel (needed when the log holds several)")
    rpt.add_argument("--run", help="which run, by its label (default: the last)")
    rpt.add_argument("--out", required=True, metavar="FILE.html", help="where to write it")
    rpt.add_argument("--pdf", action="store_true", help="also print it to FILE.pdf (Chromium)")
    rpt.set_defaults(func=cmd_report)

    exp = verbs.add_parser(
        "export",
        help="write a log as a CSV interchange file, or a recorder log as Parquet",
        description="Write the steps one vessel's filter took, with the vessel's metadata, in "
        "the CSV interchange format (times rounded to 1 ms); and/or a recorder log's readings "
        "(one row per reading) and estimates as Parquet files (docs/parquet.md).",
        epilog="example: ebullio export logs/lab.sqlite --vessel urn-3 --csv out/urn-3.csv\n"
        "         ebullio export logs/lab.sqlite --parquet out/lab-samples.parquet "
        "--estimates-parquet out/lab-estimates.parquet",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    exp.add_argument("log", metavar="LOG", help="recorder (SQLite) or CSV log")
    exp.add_argument("--csv", metavar="FILE", help="CSV interchange file to write")
    exp.add_argument("--parquet", metavar="FILE", help="Parquet file of every reading to write")
    exp.add_argument(
        "--estimates-parquet", metavar="FILE", help="Parquet file of every estimate to write"
    )
    exp.add_argument(
        "--vessel",
        help="which vessel (needed for --csv when the log holds several; Parquet: all by default)",
    )
    exp.set_defaults(func=cmd_export)
    if extend is not None:
        extend(verbs, {"demo": demo, "run": run, "replay": rep, "report": rpt})
    return parser


def main(argv: list[str] | None = None, extend=None) -> int:
    """Run the command line; return the process exit code."""
    parser = build_parser(extend)
    args = parser.parse_args(argv)
    logging.basicConfig(
        level=logging.DEBUG if args.verbose else logging.INFO,
        format="%(levelname)s %(name)s: %(message)s",
    )
    if not args.verbose:
        logging.getLogger("pymodbus").setLevel(logging.WARNING)  # it announces every start
    try:
        return args.func(args)
    except EbullioError as exc:
        print(f"ebullio {args.verb}: error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        print(f"ebullio {args.verb}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"ebullio {args.verb}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    raise SystemExit(main())
