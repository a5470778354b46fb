"""Engine workers as child processes, and what the engine keeps, for tests and benchmarks.

``WorkerProcess`` runs ``python -m monitor.cli run --engine ...`` as a child process;
the helpers read the leases, the estimates and the whole readings stream back, and
:func:`reference_figures` replays the stream in this process for the comparison.
"""

from __future__ import annotations

import asyncio
import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import nats
from nats.js.api import AckPolicy, ConsumerConfig, DeliverPolicy

from monitor.engine.partition import EngineLayout, Message, VesselStream, replay_messages
from monitor.engine.worker import Worker, WorkerSettings, read_estimates
from monitor.rig.config import VesselSpec

ROOT = Path(__file__).resolve().parents[2]


class WorkerProcess:
    """One ``ebullio run --engine`` worker in a child process."""

    def __init__(self, workdir: Path, name: str, config: Path, servers: Sequence[str],
                 partitions: int, replicas: int, checkpoint_s: float) -> None:  # fmt: skip
        self.name = name
        self.out = workdir / f"{name}.out"
        self.err = workdir / f"{name}.err"
        env = {**os.environ, "PYTHONPATH": str(ROOT)}
        command = [
            sys.executable, "-m", "monitor.cli", "run", "--config", str(config),
            "--engine", ",".join(servers), "--partitions", str(partitions),
            "--replicas", str(replicas), "--worker", name, "--checkpoint-s", str(checkpoint_s),
        ]  # fmt: skip
        with self.out.open("wb") as out, self.err.open("wb") as err:
            self.process = subprocess.Popen(command, stdout=out, stderr=err, env=env, cwd=ROOT)

    def kill(self) -> None:
        """SIGKILL: no checkpoint, no goodbye."""
        self.process.kill()
        self.process.wait(timeout=10)

    def stop(self, timeout_s: float = 20.0) -> dict[str, Any] | None:
        """SIGTERM and wait; return the worker's printed counters (None if it printed none)."""
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=10)
        text = self.out.read_text().strip()
        return json.loads(text.splitlines()[-1]) if text else None

    def log_tail(self) -> str:
        return self.err.read_text(errors="replace")[-3000:]


async def leases(js: Any, layout: EngineLayout) -> dict[int, dict[str, Any]]:
    """Return each partition's lease value (absent partitions are not in the dict)."""
    kv = await js.key_value(layout.leases_bucket)
    out: dict[int, dict[str, Any]] = {}
    for partition in range(layout.partitions):
        try:
            entry = await kv.get(f"p.{partition}")
        except (nats.js.errors.KeyNotFoundError, nats.js.errors.KeyDeletedError):
            continue
        out[partition] = json.loads(entry.value)
    return out


async def estimates(js: Any, layout: EngineLayout, vessels: Sequence[str]) -> dict[str, Any]:
    """Return the estimates bucket's entry of each vessel that has one."""
    kv = await js.key_value(layout.estimates_bucket)
    out: dict[str, Any] = {}
    for vessel in vessels:
        try:
            out[vessel] = json.loads((await kv.get(vessel)).value)
        except (nats.js.errors.KeyNotFoundError, nats.js.errors.KeyDeletedError):
            continue
    return out


async def read_stream(js: Any, layout: EngineLayout, patience_s: float = 60.0) -> list[Message]:
    """Return every message of the readings stream, in stream order.

    A consumer that fails, falls silent (after a node's loss one can) or skips a delivery
    (lost in transit) is replaced by a new one from the next sequence, as the workers
    do, for up to ``patience_s``.
    """
    last = (await js.stream_info(layout.stream)).state.last_seq
    messages: list[Message] = []
    deadline = asyncio.get_running_loop().time() + patience_s
    while not messages or messages[-1].seq < last:
        start = messages[-1].seq + 1 if messages else 1
        config = ConsumerConfig(deliver_policy=DeliverPolicy.BY_START_SEQUENCE,
                                opt_start_seq=start, ack_policy=AckPolicy.NONE,
                                inactive_threshold=30.0)  # fmt: skip
        try:
            sub = await js.pull_subscribe(layout.readings_subjects, stream=layout.stream,
                                          config=config)  # fmt: skip
            delivered = 0
            while not messages or messages[-1].seq < last:
                for msg in await sub.fetch(2000, timeout=5.0):
                    if msg.metadata.sequence.consumer != delivered + 1:
                        # lost in transit (the worker's rule): a new consumer
                        raise nats.errors.Error("a delivery was lost on the way")
                    delivered += 1
                    seq = msg.metadata.sequence.stream
                    if messages and seq <= messages[-1].seq:
                        continue
                    stamp = msg.metadata.timestamp.timestamp()
                    messages.append(Message(msg.subject, msg.data, seq, stamp))
            await sub.unsubscribe()
        except (TimeoutError, nats.errors.Error):
            if asyncio.get_running_loop().time() > deadline:
                raise
    return messages


def reference_figures(layout: EngineLayout, vessels: dict[str, VesselSpec],
                      messages: list[Message]) -> dict[str, VesselStream]:  # fmt: skip
    """Return each vessel after one uninterrupted process took every message."""
    streams, _ = replay_messages(layout, vessels, messages)
    return streams


async def wait_for(condition, limit_s: float, step_s: float = 0.2):
    """Await ``condition()`` until it returns something true; return (it, seconds taken)."""
    begun = time.monotonic()
    while True:
        result = await condition()
        if result:
            return result, time.monotonic() - begun
        if time.monotonic() - begun > limit_s:
            return result, time.monotonic() - begun
        await asyncio.sleep(step_s)


async def stream_exists(js: Any, layout: EngineLayout) -> bool:
    """Return whether the readings stream is there (a worker sets it up)."""
    try:
        await js.stream_info(layout.stream)
    except nats.js.errors.NotFoundError:
        return False
    return True


async def publish_readings(nc: Any, layout: EngineLayout, payloads: dict[str, list[bytes]],
                           first: int = 0, last: int | None = None) -> None:  # fmt: skip
    """Publish every vessel's ``reading`` payloads from index ``first`` to ``last`` over
    NATS, instant by instant (a vessel with fewer has none past its end), then flush."""
    last = max(len(p) for p in payloads.values()) if last is None else last
    for k in range(first, last):
        for vessel, p in payloads.items():
            if k < len(p):
                await nc.publish(f"{layout.prefix}.{vessel}.reading", p[k])
    await nc.flush()


async def take_with_one_worker(servers: Sequence[str], layout: EngineLayout,
                               specs: dict[str, VesselSpec], payloads: dict[str, list[bytes]],
                               runs: int = 0) -> dict[str, Any]:  # fmt: skip
    """Start one worker in this process, publish every vessel's readings over the same
    URLs (TLS and passwords as they say), wait until the estimates bucket shows every
    reading taken and ``runs`` ended runs sent, stop it; return the bucket's entries."""
    nc = await nats.connect(servers=list(servers))
    js = nc.jetstream(timeout=5.0)
    worker = Worker(servers, specs, layout, "w0", WorkerSettings(checkpoint_every_s=0.5))
    task = asyncio.create_task(worker.run())
    try:
        await wait_for(lambda: stream_exists(js, layout), 20.0)
        await publish_readings(nc, layout, payloads)

        async def taken():
            got = await read_estimates(servers, layout, list(payloads))
            done = len(got) == len(payloads) and all(
                e["messages"] == len(payloads[v]) for v, e in got.items()
            )
            return got if done and worker.stats.runs_sent >= runs else None

        got, _ = await wait_for(taken, 30.0)
        assert got, "the worker did not take the readings in 30 s"
        return got
    finally:
        worker.stop()
        await asyncio.wait_for(task, 30.0)
        await nc.close()
