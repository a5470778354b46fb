"""The ``ebullio`` command line.

Verbs so far: ``demo`` (the simulated rig, live in the terminal, recorded to a
log), ``simulate`` (write a synthetic log) and ``replay`` (a recorded log through
the estimator). Each has ``--help`` with an example.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import logging
import sys
from pathlib import Path

from drivers.errors import EbullioError
from drivers.sample import Sample
from drivers.simulator import (
    PacedClock,
    SimulatedRig,
    SimulatedRigDriver,
    scenario_by_name,
    scenario_metadata,
)
from monitor import __version__
from monitor.contracts import Estimate
from monitor.estimator import VesselConfig, VesselEstimator
from monitor.interchange import rows_from_samples, write_csv
from monitor.replay import replay, summary_table
from monitor.water import boiling_point_c, pressure_at_altitude_kpa

log = logging.getLogger("ebullio")

SAFETY_NOTE = (
    "Caution: ebullio monitors; it is not a safety device. Hot water and steam scald, heating "
    "elements run on mains voltage, an element run dry can burn out or start a fire, and a "
    "pressure vessel needs its own relief valve. Follow local codes and licensed practice."
)

#: Channels written to a simulated CSV log, in column order.
SIM_CHANNELS = ["water", "element", "ambient", "power", "energy", "voltage", "current"]


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
    return scenario_by_name(args.scenario, **changes)


def cmd_simulate(args: argparse.Namespace) -> int:
    """Write a simulated run as a CSV interchange log."""
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


def _demo_line(elapsed_s: float, e: Estimate | None, readings: dict[str, float]) -> str:
    """Return one live line of the demo: readings and the estimator's figures."""
    if e is None:
        return f"{elapsed_s:7.0f}  waiting for a water reading"
    if e.target is None:
        eta = "-"
    elif not e.target.reachable:
        eta = "not reachable"
    else:
        lo = f"{e.target.lo_s:.0f}" if e.target.lo_s is not None else "?"
        hi = f"{e.target.hi_s:.0f}" if e.target.hi_s is not None else "?"
        eta = f"{e.target.eta_s:.0f} s ({lo}-{hi})"
    g = e.element_conductance_w_per_k
    mass = e.water_mass_kg
    return (
        f"{elapsed_s:7.0f} {e.phase!s:>8} {e.water_c:8.2f} {readings.get('power', 0.0):7.0f} "
        f"{eta:>20} {mass.value if mass else float('nan'):6.3f}±{mass.std if mass else 0:.3f} "
        f"{e.ua_w_per_k.value:6.3f}±{e.ua_w_per_k.std:.3f} "
        + (f"{g.value:6.1f}±{g.std:.1f}" if g else "     -")
        + ("  " + "; ".join(f.message for f in e.flags if f.level != "notice") if e.flags else "")
    )


async def _demo(args: argparse.Namespace) -> int:
    scenario = _scenario_from(args)
    clock = PacedClock(args.speed)
    url = f"sim://?scenario={scenario.name}&seed={args.seed}&speed={args.speed}"
    driver = SimulatedRigDriver(url, clock=clock, scenario=scenario)
    rig = driver.rig
    meta = {"ebullio_version": __version__, **scenario_metadata(rig.scenario, args.seed)}
    estimator = VesselEstimator(VesselConfig.from_metadata(scenario.vessel, meta, True))
    print(SAFETY_NOTE)
    print(
        f"demo: simulated {scenario.name} {scenario.vessel!r}, {scenario.water_mass_kg} kg of "
        f"water, boiling point {boiling_point_c(scenario.pressure_kpa):.2f} °C at "
        f"{scenario.pressure_kpa:.2f} kPa, running at {args.speed:g}x real time"
    )
    print(
        f"{'time s':>7} {'phase':>8} {'water °C':>8} {'power W':>7} "
        f"{'time to target (90 %)':>20} {'water kg':>12} {'UA W/K':>12} {'G W/K':>10}"
    )
    out_path = Path(args.out)
    out_path.parent.mkdir(parents=True, exist_ok=True)
    batches: list[list[Sample]] = []
    current: list[Sample] = []
    last_print = -1e9

    def instant(batch: list[Sample]) -> None:
        nonlocal last_print
        batches.append(batch)
        readings = {s.channel: s.value for s in batch}
        elapsed = batch[0].t - rig.scenario.start_epoch_s
        e = estimator.step(elapsed, readings)
        if elapsed - last_print >= args.every_s:
            last_print = elapsed
            print(_demo_line(elapsed, e, readings), flush=True)

    async with driver:
        async for sample in driver.samples():
            if current and sample.t != current[0].t:
                instant(current)
                current = []
            current.append(sample)
    if current:
        instant(current)
    with open(out_path, "w", encoding="utf-8", newline="") as handle:
        count = write_csv(
            handle, rows_from_samples(batches, rig.scenario.start_epoch_s), meta, SIM_CHANNELS
        )
    print(f"demo: recorded {count} rows to {out_path}; replay it with: ebullio replay {out_path}")
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    """Run the simulated rig in (accelerated) real time and show it live."""
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
    if args.json:
        print(json.dumps(result, indent=2, allow_nan=False))
    else:
        print(summary_table(result))
        print(SAFETY_NOTE)
    return 0


def _add_scenario_options(p: argparse.ArgumentParser, seed: int) -> None:
    """Add the simulated scenario's options (shared by ``simulate`` and ``demo``)."""
    p.add_argument("--scenario", choices=["kettle", "water-heater"], default="kettle")
    p.add_argument("--seed", type=int, default=seed, help=f"random seed (default {seed})")
    p.add_argument("--scale-mm", type=float, help="limescale on the element, mm (default 0)")
    p.add_argument("--duration-s", type=float, help="length of the run, s")
    p.add_argument("--mass-kg", type=float, help="water fill, kg")
    p.add_argument("--vessel", help="vessel id written to the log")
    _add_site_options(p)


def _add_site_options(p: argparse.ArgumentParser) -> None:
    site = p.add_mutually_exclusive_group()
    site.add_argument("--pressure-kpa", type=float, help="site pressure, kPa (default 101.325)")
    site.add_argument(
        "--altitude-m", type=float, help="site elevation, m; pressure from the ICAO atmosphere"
    )


def build_parser() -> argparse.ArgumentParser:
    """Return the argument parser of the ``ebullio`` command."""
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
        help="run the simulated rig live and record it",
        description="The embedded default: a simulated kettle heated to the boil, with the live "
        "estimator's figures (phase, time to boil with its 90 %% interval, water mass, UA, "
        "element conductance) shown in the terminal, and recorded to a CSV log.",
        epilog="example: ebullio demo --speed 20 --out out/demo.csv",
    )
    _add_scenario_options(demo, seed=7)
    demo.add_argument("--speed", type=float, default=20.0, help="times real time (default 20)")
    demo.add_argument("--every-s", type=float, default=10.0, help="print every N simulated s")
    demo.add_argument("--out", default="out/demo.csv", help="log file (default out/demo.csv)")
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
    rep.add_argument("logs", nargs="+", metavar="LOG", help="CSV logs (several: runs in order)")
    rep.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    rep.add_argument("--estimates", metavar="FILE.csv", help="write every filter step here")
    rep.set_defaults(func=cmd_replay)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run the command line; return the process exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(
        level=logging.DEBUG if args.verbose else logging.INFO,
        format="%(levelname)s %(name)s: %(message)s",
    )
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
