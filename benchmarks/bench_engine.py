"""Print JSON: the NATS engine's throughput with one and two workers, and a worker's take-over.

Run from the repository root (Debian's ``nats-server`` must be installed):

    .venv/bin/python benchmarks/bench_engine.py                  # 64 kettles, 8 partitions
    .venv/bin/python benchmarks/bench_engine.py --vessels 16     # a quick look

One ``nats-server`` on 127.0.0.1 (JetStream, the partition mapping) holds a backlog: each
simulated kettle's ``reading`` messages (seeded, our own scenario, 900 s at 1 Hz)
published over NATS before any worker starts. Then, twice over the same stream (the
buckets emptied in between):

* **one worker** (``ebullio run --engine`` in a child process) takes every message;
* **two workers** share the partitions; at half the backlog one of them is killed
  (SIGKILL) and the other takes its partitions over.

Figures
    ``readings_per_s``: messages taken per second over the measured window (10 % to
    50 % of the backlog with one worker; 10 % to the kill at 50 % with two), from the
    estimates bucket's per-vessel counts, polled every 0.5 s. At one reading per vessel
    a second it is the number of vessels the workers keep up with (``vessels_held``).
    ``speed_up``: two workers over one (target 1.7 on this machine's two cores, shared
    with the server and this process).
    ``take_over_s``: from the kill to the newest lease its partitions got (the leases'
    ``since``); ``readings_lost``: messages in the stream that the vessels' final states
    do not cover; ``vessels_equal``: vessels whose every estimate (the digest chained
    over them) and last estimate equal a replay of the stream in this process, in one go.
    ``other_load_cores``: the CPU the rest of the machine used over the window (cores; not
    the workers, the server or this process): on a shared machine, read the speed-up
    beside it. ``readings_per_worker_cpu_s``: readings per CPU second the workers spent
    over the window; equal for one and two workers means no work is lost to sharing, so
    the speed-up on two free cores would be near 2 (``cpu_scaling``: two workers' figure
    over one's).
    ``cpu_s``: each worker's CPU time (user + system) over its run (``cpu_s_at_kill``: at
    the kill), ``server_cpu_s``: the server's over the run.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import nats

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from monitor.engine.partition import EngineLayout  # noqa: E402
from monitor.rig.config import load_config  # noqa: E402
from tests.support.engine import (  # noqa: E402
    WorkerProcess,
    estimates,
    leases,
    read_stream,
    reference_figures,
)
from tests.support.fleet import fleet_config, kettle_readings  # noqa: E402
from tests.support.nats import NatsCluster  # noqa: E402

#: Where in the backlog one of two workers is killed; both runs are measured from 10 % to
#: here, the same readings (the kettles heat in the first third of their runs, so a
#: stretch of the backlog costs more or less than another).
KILL_AT = 0.5


def _machine_busy_s() -> float:
    """Return the CPU time (s, all cores) the machine has spent busy since boot (/proc/stat)."""
    fields = [int(x) for x in Path("/proc/stat").read_text().split("\n")[0].split()[1:]]
    idle = fields[3] + fields[4]  # idle and iowait
    return (sum(fields[:8]) - idle) / os.sysconf("SC_CLK_TCK")


def _cpu_s(pid: int) -> float:
    """Return a process's CPU time (user + system, s) from /proc."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


async def _publish_backlog(url: str, payloads: dict[str, list[bytes]], layout) -> int:
    nc = await nats.connect(url)
    js = nc.jetstream(timeout=10.0)
    from nats.js.api import StreamConfig

    await js.add_stream(StreamConfig(name=layout.stream, subjects=[layout.readings_subjects]))
    count = max(len(p) for p in payloads.values())
    sent = 0
    for k in range(count):  # instant by instant, as the instruments would
        for vessel, p in payloads.items():
            if k < len(p):
                await nc.publish(f"{layout.prefix}.{vessel}.reading", p[k])
                sent += 1
        if k % 50 == 0:
            await nc.flush()
    await nc.flush()
    while (await js.stream_info(layout.stream)).state.messages < sent:
        await asyncio.sleep(0.1)
    await nc.close()
    return sent


async def _reset(url: str, layout: EngineLayout) -> None:
    """Delete the buckets and the set-aside stream; keep the readings."""
    nc = await nats.connect(url)
    js = nc.jetstream(timeout=10.0)
    for bucket in (layout.leases_bucket, layout.checkpoints_bucket, layout.estimates_bucket):
        with contextlib.suppress(nats.js.errors.NotFoundError):
            await js.delete_key_value(bucket)
    with contextlib.suppress(nats.js.errors.NotFoundError):
        await js.delete_stream(layout.set_aside_stream)
    await nc.close()


async def _progress(js, layout, vessels) -> int:
    try:
        return sum(e["messages"] for e in (await estimates(js, layout, vessels)).values())
    except nats.js.errors.BucketNotFoundError:
        return 0


async def _run(url, layout, workdir, config, vessels, total, workers_n, kill_at, server_pid):
    nc = await nats.connect(url)
    js = nc.jetstream(timeout=10.0)
    workers = [WorkerProcess(workdir, f"bench-w{i}", config, [url], layout.partitions,
                             replicas=1, checkpoint_s=5.0) for i in range(workers_n)]  # fmt: skip
    out: dict[str, object] = {"workers": workers_n}
    server_cpu_before = _cpu_s(server_pid)
    samples: list[tuple[float, int]] = []
    killed_at = None
    try:
        deadline = time.monotonic() + 900.0
        while time.monotonic() < deadline:
            done = await _progress(js, layout, vessels)
            workers_cpu = sum(_cpu_s(w.process.pid) for w in workers if w.process.poll() is None)
            ours = workers_cpu + _cpu_s(server_pid) + _cpu_s(os.getpid())
            samples.append((time.monotonic(), done, _machine_busy_s(), ours, workers_cpu))
            if kill_at is not None and killed_at is None and done >= kill_at * total:
                held = await leases(js, layout)
                victim = workers[0]
                victim_parts = [p for p, h in held.items() if h["worker"] == victim.name]
                out["cpu_s_at_kill"] = {w.name: round(_cpu_s(w.process.pid), 2) for w in workers}
                victim.kill()
                killed_at = time.time()
                killed_mono = time.monotonic()
            if done >= total:
                break
            await asyncio.sleep(0.5)
        if killed_at is not None:
            held = await leases(js, layout)
            out["take_over_s"] = round(max(held[p]["since"] for p in victim_parts) - killed_at, 2)
            out["victim_partitions"] = victim_parts
        out["cpu_s"] = {w.name: round(_cpu_s(w.process.pid), 2)
                        for w in workers if w.process.poll() is None}  # fmt: skip
        out["server_cpu_s"] = round(_cpu_s(server_pid) - server_cpu_before, 2)
        out["final"] = await estimates(js, layout, vessels)
    finally:
        for w in workers:
            w.stop()
        await nc.close()

    def at(fraction: float) -> tuple[float, int]:
        return next(s for s in samples if s[1] >= fraction * total)

    start = at(0.10)  # the same stretch of the backlog for one worker and for two
    # with two workers: the last sample before the kill (taken with both alive)
    end = [s for s in samples if s[0] <= killed_mono][-1] if killed_at else at(KILL_AT)
    out["window_readings"] = end[1] - start[1]
    # the machine is shared: what else ran beside the workers and the server (cores)
    out["other_load_cores"] = round(
        ((end[2] - start[2]) - (end[3] - start[3])) / (end[0] - start[0]), 2
    )
    out["workers_cpu_s"] = round(end[4] - start[4], 2)
    out["readings_per_worker_cpu_s"] = round((end[1] - start[1]) / (end[4] - start[4]), 1)
    out["window_s"] = round(end[0] - start[0], 2)
    out["readings_per_s"] = round((end[1] - start[1]) / (end[0] - start[0]), 1)
    out["vessels_held"] = int(out["readings_per_s"])
    out["all_taken_s"] = round(samples[-1][0] - samples[0][0], 1)
    return out


async def bench(args) -> dict[str, object]:
    layout = EngineLayout(partitions=args.partitions)
    vessels = [f"kettle-{i:03d}" for i in range(args.vessels)]
    payloads = {v: kettle_readings(v, seed=i, duration_s=args.duration_s)
                for i, v in enumerate(vessels)}  # fmt: skip
    with tempfile.TemporaryDirectory(prefix="bench-engine-") as tmp:
        workdir = Path(tmp)
        with NatsCluster(workdir / "nats", nodes=1, layout=layout) as server:
            url = server.urls[0]
            config = workdir / "fleet.toml"
            config.write_text(fleet_config(vessels, server.mqtt_ports[0]))
            total = await _publish_backlog(url, payloads, layout)
            pid = server.pid(0)
            one = await _run(url, layout, workdir, config, vessels, total, 1, None, pid)
            await _reset(url, layout)
            two = await _run(url, layout, workdir, config, vessels, total, 2, KILL_AT, pid)
            nc = await nats.connect(url)
            stream = await read_stream(nc.jetstream(timeout=10.0), layout)
            await nc.close()
            specs = {v.id: v for v in load_config(config).vessels}
            began = time.perf_counter()
            reference = reference_figures(layout, specs, stream)
            replay_s = time.perf_counter() - began
    final = two.pop("final")
    one.pop("final")
    equal = sum(
        1 for v, ref in reference.items()
        if final.get(v, {}).get("digest") == ref.digest
        and json.dumps(final[v]["estimate"]) == json.dumps(ref.latest)
    )  # fmt: skip
    covered = sum(min(final.get(v, {}).get("messages", 0), ref.messages)
                  for v, ref in reference.items())  # fmt: skip
    return {
        "vessels": args.vessels,
        "partitions": args.partitions,
        "readings": total,
        "one_worker": one,
        "two_workers": two,
        "speed_up": round(two["readings_per_s"] / one["readings_per_s"], 2),
        "cpu_scaling": round(
            two["readings_per_worker_cpu_s"] / one["readings_per_worker_cpu_s"], 2
        ),
        "take_over_s": two.get("take_over_s"),
        "readings_lost": len(stream) - covered,
        "vessels_equal": equal,
        "one_process_replay_readings_per_s": round(len(stream) / replay_s, 1),
        "cpus": os.cpu_count(),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--vessels", type=int, default=64)
    parser.add_argument("--partitions", type=int, default=8)
    parser.add_argument("--duration-s", type=float, default=900.0)
    args = parser.parse_args()
    print(json.dumps(asyncio.run(bench(args)), indent=1))


if __name__ == "__main__":
    main()
