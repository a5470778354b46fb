"""Print JSON: live ingest through Mosquitto into the recorder and the estimators.

Run from the repository root (Debian's ``mosquitto`` must be installed):

    .venv/bin/python benchmarks/bench_ingest.py                    # 100 and 1000 vessels
    .venv/bin/python benchmarks/bench_ingest.py --vessels 50 --seconds 10   # a quick look
    .venv/bin/python benchmarks/bench_ingest.py --vessels 1000 --fleet heaters \
        --estimate-interval-s 10    # a building's fleet, estimates recorded every 10 s

For each fleet size a fresh broker starts on 127.0.0.1 (``max_queued_messages 0``,
``max_inflight_messages 0``: the README's settings for acknowledgement after commit),
``ebullio run`` starts in its own process with one MQTT vessel per simulated kettle,
and this process publishes one multi-channel ``<prefix>/<vessel>/reading`` message
per vessel per second (water, power and ambient; QoS 1), spread evenly over each
second, while it listens to the estimates the service publishes back. The readings
come from seeded simulated kettle runs (our own scenarios).

Figures
    ``messages_per_s``: readings published per second over the measured window, and
    ``estimates_per_s``: estimates received back (counted on one vessel in ten, whose
    estimates the listener follows, times ten: a listener for all of them would take
    a core of this two-core machine from the service). ``cpu_per_vessel_ms_per_s``: the
    service process's CPU time (user + system, /proc) per vessel per second of wall
    time; ``service_cpu_fraction``: of one core. ``latency_ms``: from the reading's
    own time stamp (set when published) to the arrival of the estimate it produced.
    ``lost``: readings published but not recorded (samples in the log / 3), after
    the service was stopped with SIGTERM; ``exit_code`` is the service's.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import math
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import aiomqtt
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from drivers.emulators.mosquitto import MosquittoBroker  # noqa: E402
from drivers.simworld import (  # noqa: E402
    Scenario,
    SimulatedRig,
    kettle_scenario,
    water_heater_scenario,
)
from monitor.records.recorder import verify  # noqa: E402

PREFIX = "bench"
TRAJECTORIES = 10
#: The listener follows one vessel in this many (estimates_per_s is scaled back up).
LISTEN_EVERY = 10


def fleet_scenario(fleet: str, seed: int, seconds: int) -> Scenario:
    """Return one vessel's scenario: a kettle heating from cold (every vessel's fit due
    at once: the worst case), or a building's 80 L heater standing near its 60 °C
    thermostat, some cooling, some heating (the usual case of a building's fleet)."""
    if fleet == "kettles":
        return kettle_scenario(duration_s=float(seconds))
    start_c = 57.0 + 4.0 * np.random.default_rng(seed).random()
    return water_heater_scenario(
        duration_s=float(seconds), sample_interval_s=1.0, start_water_c=start_c
    )


def trajectories(seconds: int, fleet: str) -> list[list[dict[str, float]]]:
    """Return seeded runs of the fleet's vessels, one dict of water/power/ambient per second."""
    out = []
    for seed in range(TRAJECTORIES):
        scenario = fleet_scenario(fleet, seed, seconds)
        rows = []
        for batch in SimulatedRig(scenario, seed=seed).run():
            values = {s.channel: s.value for s in batch}
            rows.append(
                {
                    "water_c": values.get("water", rows[-1]["water_c"] if rows else 15.0),
                    "power_w": values.get("power", 0.0),
                    "ambient_c": values.get("ambient", 20.0),
                }
            )
        out.append(rows)
    return out


def config_text(url: str, vessels: list[str], fleet: str, estimate_interval_s: float = 0.0) -> str:
    """Return the rig configuration: every vessel reports on MQTT."""
    lines = [
        "[mqtt]",
        f'url = "{url}"',
        f'prefix = "{PREFIX}"',
        'client_id = "bench-service"',
        "inflight_window = 0",  # the broker below has no in-flight limit (README)
        "[recorder]",
        "commit_interval_s = 1.0",
        "queue_samples = 200000",
        f"estimate_interval_s = {estimate_interval_s}",
    ]
    for v in vessels:
        lines += ["[[vessels]]", f'id = "{v}"']
        if fleet == "kettles":
            lines += ["vessel_heat_capacity_j_per_k = 420", "rated_power_w = 2200"]
        else:
            lines += [
                "vessel_heat_capacity_j_per_k = 14800",
                "rated_power_w = 2000",
                "nominal_volume_l = 80",
                "target_c = 60",
            ]
    return "\n".join(lines) + "\n"


def cpu_s(pid: int) -> float:
    """Return a process's user + system CPU time in seconds (Linux /proc)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


async def drive(
    url: str, vessels: list[str], seconds: int, warmup_s: int, pid: int, fleet: str
) -> dict[str, object]:
    host, port = url.removeprefix("mqtt://").split(":")
    runs = trajectories(seconds + warmup_s + 5, fleet)
    latencies: list[float] = []
    received = 0
    window: dict[str, float] = {}

    async def listen(client: aiomqtt.Client) -> None:
        nonlocal received
        async for message in client.messages:
            now = time.time()
            data = json.loads(message.payload)
            received += 1
            if window.get("start", math.inf) <= data["t"] <= window.get("end", math.inf):
                latencies.append(now - data["t"])

    async with (
        aiomqtt.Client(host, int(port), identifier="bench-listener") as listener,
        aiomqtt.Client(host, int(port), identifier="bench-publisher") as publisher,
    ):
        publisher.pending_calls_threshold = 100_000
        # listen to every LISTEN_EVERY-th vessel only: on two cores the load generator
        # competes with the service, and a sample of vessels gives the latency as well
        watched = vessels[::LISTEN_EVERY]
        await listener.subscribe([(f"{PREFIX}/{v}/estimate", 1) for v in watched])
        listening = asyncio.create_task(listen(listener))
        slots = 20  # publishing rounds per second
        per_slot = [vessels[i::slots] for i in range(slots)]
        published = published_watched = 0
        watched_set = set(watched)
        start = time.monotonic()
        cpu0 = wall0 = None
        received0 = 0
        for second in range(warmup_s + seconds):
            if second == warmup_s:
                cpu0, wall0, received0 = cpu_s(pid), time.monotonic(), received
                published0 = published
                window["start"] = time.time()
            for slot, group in enumerate(per_slot):
                due = start + second + slot / slots
                await asyncio.sleep(max(0.0, due - time.monotonic()))
                t = time.time()
                sends = []
                for v in group:
                    row = runs[int(v[1:]) % TRAJECTORIES][second]
                    payload = json.dumps({"t": t, **row}).encode()
                    sends.append(publisher.publish(f"{PREFIX}/{v}/reading", payload, qos=1))
                await asyncio.gather(*sends)
                published += len(group)
                published_watched += sum(1 for v in group if v in watched_set)
        await asyncio.sleep(max(0.0, start + warmup_s + seconds - time.monotonic()))
        wall1, cpu1, received1 = time.monotonic(), cpu_s(pid), received
        window["end"] = time.time()
        # let the service catch up, then stop it
        # every reading gives one estimate: wait for them all (up to a minute), then for
        # one commit window, so what the service holds is on disk before it is stopped
        deadline = time.monotonic() + 60.0
        while time.monotonic() < deadline and received < published_watched:
            await asyncio.sleep(0.2)
        await asyncio.sleep(1.5)
        if listening.done():
            raise RuntimeError(f"the listener stopped: {listening.exception()!r}")
        listening.cancel()
    span = wall1 - wall0
    latencies.sort()

    def pct(q: float) -> float | None:
        if not latencies:
            return None
        return round(1000 * latencies[min(len(latencies) - 1, int(q * len(latencies)))], 1)

    return {
        "published": published,
        "messages_per_s": round((published - published0) / span, 1),
        "estimates_per_s": round(LISTEN_EVERY * (received1 - received0) / span, 1),
        "service_cpu_fraction": round((cpu1 - cpu0) / span, 3),
        "cpu_per_vessel_ms_per_s": round(1000 * (cpu1 - cpu0) / span / len(vessels), 3),
        "latency_ms": {
            "p50": pct(0.50),
            "p99": pct(0.99),
            "max": pct(1.0),
            "mean": round(1000 * statistics.fmean(latencies), 1) if latencies else None,
            "n": len(latencies),
        },
    }


async def bare_client(url: str) -> None:
    """Receive every reading at QoS 1 and publish one small message back for each, on the
    topic the benchmark listens to and as the service publishes its estimates (QoS 0,
    retained): the least an MQTT service does for the same load."""
    host, port = url.removeprefix("mqtt://").split(":")
    # MQTT 5, as the service's own client speaks it (drivers/mqtt.py)
    async with aiomqtt.Client(
        host, int(port), identifier="bench-bare", protocol=aiomqtt.ProtocolVersion.V5
    ) as client:
        client.pending_calls_threshold = 100_000
        await client.subscribe(f"{PREFIX}/+/reading", qos=1)
        async for message in client.messages:
            vessel = message.topic.value.split("/")[1]
            t = json.loads(message.payload)["t"]
            payload = json.dumps({"t": t, "vessel": vessel}).encode()
            # as the service publishes its estimates: QoS 0, retained
            await client.publish(f"{PREFIX}/{vessel}/estimate", payload, qos=0, retain=True)


def bench_bare(n: int, seconds: int, warmup_s: int, fleet: str) -> dict[str, object]:
    """Return drive()'s figures with the bare client in the service's place."""
    vessels = [f"v{i:04d}" for i in range(n)]
    with tempfile.TemporaryDirectory(prefix="ebullio-ingest-") as tmp:
        work = Path(tmp)
        with MosquittoBroker(work / "broker", extra_config=("max_inflight_messages 0",)) as broker:
            client = subprocess.Popen(
                [sys.executable, __file__, "--bare-client", broker.url],
                cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
            )  # fmt: skip
            try:
                time.sleep(2.0)  # connected and subscribed
                return asyncio.run(drive(broker.url, vessels, seconds, warmup_s, client.pid, fleet))
            finally:
                client.send_signal(signal.SIGTERM)
                client.communicate(timeout=60)


def bench(
    n: int, seconds: int, warmup_s: int, fleet: str, estimate_interval_s: float = 0.0
) -> dict[str, object]:
    vessels = [f"v{i:04d}" for i in range(n)]
    with tempfile.TemporaryDirectory(prefix="ebullio-ingest-") as tmp:
        work = Path(tmp)
        # readings are acknowledged once committed (a block a second): the broker must
        # let that many wait unacknowledged, as the README's broker settings say
        with MosquittoBroker(work / "broker", extra_config=("max_inflight_messages 0",)) as broker:
            cfg = work / "rig.toml"
            text = config_text(broker.url, vessels, fleet, estimate_interval_s)
            cfg.write_text(text, encoding="utf-8")
            log = work / "ingest.sqlite"
            service = subprocess.Popen(
                [sys.executable, "-m", "monitor.cli", "run", "--config", str(cfg),
                 "--log", str(log)],
                cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
            )  # fmt: skip
            try:
                deadline = time.monotonic() + 60
                while not log.exists() and time.monotonic() < deadline:
                    time.sleep(0.1)
                time.sleep(2.0)  # filters built, subscription made
                figures = asyncio.run(
                    drive(broker.url, vessels, seconds, warmup_s, service.pid, fleet)
                )
            finally:
                service.send_signal(signal.SIGTERM)
                out, err = service.communicate(timeout=120)
            check = verify(log)
            recorded = check["samples"] or 0
            stats = json.loads(out.strip().splitlines()[-1]) if out else None
            figures.update(
                {
                    "vessels": n,
                    "fleet": fleet,
                    "estimate_interval_s": estimate_interval_s,
                    "seconds": seconds,
                    "exit_code": service.returncode,
                    "recorded_samples": recorded,
                    "lost": figures["published"] - recorded // 3,  # type: ignore[operator]
                    "verify_ok": check["ok"],
                    "service_stats": stats,
                    "service_errors": [line for line in err.splitlines() if "ERROR" in line][:5],
                }
            )
    return figures


def issue_16_targets(
    result: dict[str, object], bare: dict[str, object] | None
) -> dict[str, object]:
    """Return issue 16's live targets for one fleet size: within 40 % of a core, p99 at
    most 100 ms, at most twice the bare client's CPU, nothing lost."""
    cpu = result["service_cpu_fraction"]
    p99 = result["latency_ms"]["p99"]  # type: ignore[index]
    out: dict[str, object] = {
        "cpu_at_most_40_percent": cpu <= 0.40,
        "p99_at_most_100_ms": p99 is not None and p99 <= 100.0,
        "none_lost": result["lost"] == 0,
    }
    if bare is not None:
        ratio = cpu / bare["service_cpu_fraction"] if bare["service_cpu_fraction"] else None
        out["cpu_over_bare_client"] = None if ratio is None else round(ratio, 2)
        out["at_most_twice_the_bare_client"] = ratio is not None and ratio <= 2.0
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--vessels", type=int, nargs="+", default=[100, 1000])
    parser.add_argument("--seconds", type=int, default=30, help="measured seconds per size")
    parser.add_argument("--warmup-s", type=int, default=5)
    parser.add_argument(
        "--fleet", choices=("kettles", "heaters"), default="kettles",
        help="kettles heating from cold (every fit due at once) or heaters near their "
        "thermostat (a building's usual load)",
    )  # fmt: skip
    parser.add_argument("--no-bare", action="store_true", help="skip the bare client's run")
    parser.add_argument(
        "--estimate-interval-s", type=float, default=0.0,
        help="the service's [recorder] estimate_interval_s (0: every estimate recorded)",
    )  # fmt: skip
    parser.add_argument("--bare-client", metavar="URL", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.bare_client:
        signal.signal(signal.SIGTERM, lambda *_: sys.exit(0))
        asyncio.run(bare_client(args.bare_client))
        return
    results = []
    for n in args.vessels:
        bare = None
        if not args.no_bare:
            print(f"bench_ingest: bare client, {n} vessels", file=sys.stderr, flush=True)
            bare = bench_bare(n, args.seconds, args.warmup_s, args.fleet)
        print(f"bench_ingest: {n} vessels for {args.seconds} s", file=sys.stderr, flush=True)
        result = bench(n, args.seconds, args.warmup_s, args.fleet, args.estimate_interval_s)
        result["bare_client"] = bare
        result["issue_16_targets"] = issue_16_targets(result, bare)
        results.append(result)
    target = next((r for r in results if r["vessels"] == 1000), None)
    print(
        json.dumps(
            {
                "benchmark": "ingest",
                "python": sys.version.split()[0],
                "cores": os.cpu_count(),
                "fleet": args.fleet,
                "results": results,
                # held: nothing lost, an estimate back for (nearly) every reading as it
                # comes, latency bounded (no growing backlog), within one core
                "target_1000_vessels_on_one_core": None
                if target is None
                else bool(
                    target["lost"] == 0
                    and target["estimates_per_s"] >= 0.98 * 1000
                    and (target["latency_ms"]["p99"] or math.inf) < 2000.0
                    and target["service_cpu_fraction"] < 1.0
                ),
            },
            indent=2,
        )
    )


if __name__ == "__main__":
    main()
