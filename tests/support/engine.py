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
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import nats
from nats.js.api import AckPolicy, ConsumerConfig, DeliverPolicy

from monitor.engine.partition import EngineLayout, Message, VesselStream, replay_messages
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
