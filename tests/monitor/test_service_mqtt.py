"""The live service against a real Mosquitto broker on 127.0.0.1: readings in, estimates out."""

from __future__ import annotations

import asyncio
import json

import aiomqtt

from drivers.emulators.mosquitto import MosquittoBroker
from monitor.records.recorder import (
    read_estimates,
    read_events,
    read_quarantine,
    read_samples,
    verify,
)
from monitor.rig.config import parse_config
from monitor.rig.service import Service

T0 = 1_767_225_600.0


def rig_toml(url: str, client_id: str | None = None) -> str:
    host_port = url.removeprefix("mqtt://")
    lines = ["[mqtt]", f'url = "mqtt://{host_port}"', 'prefix = "lab"']
    if client_id:
        lines.append(f'client_id = "{client_id}"')
    lines += [
        "[recorder]",
        "commit_interval_s = 0.1",
        "[[vessels]]",
        'id = "urn-1"',
        "vessel_heat_capacity_j_per_k = 900",
        "rated_power_w = 2000",
    ]
    return "\n".join(lines) + "\n"


def reading(i: int, t0: float) -> bytes:
    # a made-up heat-up at 2 kW: 0.2 K per second (demo numbers of our own)
    return json.dumps(
        {"t": t0 + i, "water_c": 20.0 + 0.2 * i, "power_w": 2000.0, "ambient_c": 21.0}
    ).encode()


async def publish(url: str, payloads: list[tuple[str, bytes]]) -> None:
    host, port = url.removeprefix("mqtt://").split(":")
    async with aiomqtt.Client(host, int(port), identifier="test-publisher") as client:
        for topic, payload in payloads:
            await client.publish(topic, payload, qos=1)


async def retained(url: str, topic: str, identifier: str) -> dict:
    """Return the JSON message a new subscriber to ``topic`` gets first (the retained one)."""
    host, port = url.removeprefix("mqtt://").split(":")
    async with aiomqtt.Client(host, int(port), identifier=identifier) as client:
        await client.subscribe(topic, qos=1)
        async with asyncio.timeout(10):
            async for message in client.messages:
                return json.loads(message.payload)
    raise AssertionError(f"no message on {topic}")  # not reached: the timeout raises first


async def wait_for(condition, timeout_s: float = 15.0) -> None:
    async with asyncio.timeout(timeout_s):
        while not condition():
            await asyncio.sleep(0.02)


def test_readings_are_recorded_estimated_and_published_back(mosquitto, tmp_path) -> None:
    import time

    t0 = time.time() - 60.0
    config = parse_config(rig_toml(mosquitto.url), "rig.toml", {})
    log = tmp_path / "live.sqlite"

    async def scenario():
        service = Service(config, str(log))
        task = asyncio.create_task(service.run())
        await service.started.wait()
        await asyncio.sleep(0.3)  # let it subscribe
        payloads = [("lab/urn-1/reading", reading(i, t0)) for i in range(30)]
        payloads.append(("lab/urn-1/water", b"not a number"))
        payloads.append(("lab/ghost/reading", reading(0, t0)))
        await publish(mosquitto.url, payloads)
        await wait_for(lambda: service.stats.samples >= 90 and service.stats.quarantined >= 1)
        await wait_for(lambda: service.stats.published >= 1)
        estimate = await retained(mosquitto.url, "lab/urn-1/estimate", "test-board")
        service.stop()
        return await task, estimate

    stats, estimate = asyncio.run(scenario())
    assert stats.samples == 90  # 30 messages x water, power and ambient
    assert estimate["vessel"] == "urn-1"
    assert estimate["water_c"] > 20.0
    assert {"ua_w_per_k", "time_to_target_s", "flags"} <= set(estimate)
    # the message as the broker kept it is the log's row of that instant, key for key
    (stored,) = [r for r in read_estimates(log) if r["t"] == estimate["t"]]
    assert {k: v for k, v in stored.items() if k not in ("id", "block")} == estimate
    reasons = [q["reason"] for q in read_quarantine(log)]
    assert any("not a number" in r for r in reasons)
    # the ghost vessel is not configured, so the driver was not subscribed to it
    assert verify(log)["ok"]
    assert len(list(read_samples(log))) == 90


def test_broker_restart_loses_no_qos1_message_and_the_service_resumes(tmp_path) -> None:
    """Killed with SIGKILL, the broker keeps only what it had saved: with autosave after
    every change (as DEVELOPERS.md advises for production brokers) the service's session
    survives, so readings published after the restart, before the service is back,
    are delivered too."""
    import time

    import monitor.rig.service as svc

    t0 = time.time() - 300.0
    broker = MosquittoBroker(
        tmp_path / "broker",
        persistence=True,
        extra_config=("autosave_interval 1", "autosave_on_changes true"),
    ).start()
    config = parse_config(rig_toml(broker.url, client_id="svc-test"), "rig.toml", {})
    log = tmp_path / "restart.sqlite"
    original = svc.Backoff.next_s
    svc.Backoff.next_s = lambda _self: 0.05  # quick retries in a test

    async def scenario():
        service = Service(config, str(log))
        task = asyncio.create_task(service.run())
        await service.started.wait()
        await asyncio.sleep(0.3)
        await publish(broker.url, [("lab/urn-1/reading", reading(i, t0)) for i in range(20)])
        await wait_for(lambda: service.stats.samples >= 60)
        broker.kill()
        await wait_for(lambda: service.stats.link_losses >= 1)
        broker.restart()
        # published while the service is still reconnecting: kept in its persistent session
        await publish(broker.url, [("lab/urn-1/reading", reading(i, t0)) for i in range(20, 60)])
        await wait_for(lambda: service.stats.reconnects >= 1)
        await publish(broker.url, [("lab/urn-1/reading", reading(i, t0)) for i in range(60, 80)])
        await wait_for(lambda: len({s.t for s in service_samples(log)}) >= 80, timeout_s=20)
        service.stop()
        return await task

    try:
        stats = asyncio.run(scenario())
    finally:
        svc.Backoff.next_s = original
        broker.stop()
    times = {round(s.t - t0) for s in read_samples(log) if s.channel == "water"}
    assert times == set(range(80)), sorted(set(range(80)) - times)
    assert stats.reconnects >= 1
    kinds = [e["kind"] for e in read_events(log)]
    assert "link_lost" in kinds
    assert "gap" in kinds
    assert verify(log)["ok"]


def service_samples(log):
    try:
        return list(read_samples(log))
    except Exception:  # the log may be mid-commit; try again on the next poll
        return []


def _run_and_signal(broker_url: str, tmp_path, signum) -> tuple[int, str, str, object]:
    import subprocess
    import sys
    import time

    cfg = tmp_path / "rig.toml"
    cfg.write_text(rig_toml(broker_url), encoding="utf-8")
    log = tmp_path / "run.sqlite"
    proc = subprocess.Popen(
        [sys.executable, "-m", "monitor.cli", "run", "--config", str(cfg), "--log", str(log)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        deadline = time.monotonic() + 30
        while not log.exists() and time.monotonic() < deadline:
            time.sleep(0.05)
        time.sleep(1.0)  # subscribed
        t0 = time.time() - 30.0
        asyncio.run(publish(broker_url, [("lab/urn-1/reading", reading(i, t0)) for i in range(10)]))
        deadline = time.monotonic() + 15
        while time.monotonic() < deadline and verify(log)["samples"] < 30:
            time.sleep(0.2)
        proc.send_signal(signum)
        out, err = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    return proc.returncode, out, err, log


def test_ebullio_run_stops_cleanly_on_sigterm_and_sigint(mosquitto, tmp_path) -> None:
    import signal

    for signum in (signal.SIGTERM, signal.SIGINT):
        folder = tmp_path / signum.name
        folder.mkdir()
        code, out, err, log = _run_and_signal(mosquitto.url, folder, signum)
        assert code == 0, err
        stats = json.loads(out.strip().splitlines()[-1])
        assert stats["samples"] == 30
        assert "not a safety device" in err
        result = verify(log)
        assert result["ok"] is True
        assert result["samples"] == 30


def test_ebullio_run_refuses_a_bad_configuration_before_starting(tmp_path) -> None:
    import subprocess
    import sys

    cfg = tmp_path / "rig.toml"
    cfg.write_text('[[vessels]]\nid = "k1"\n', encoding="utf-8")
    proc = subprocess.run(
        [sys.executable, "-m", "monitor.cli", "run", "--config", str(cfg), "--log",
         str(tmp_path / "x.sqlite")],
        capture_output=True, text=True, timeout=60, check=False,
    )  # fmt: skip
    assert proc.returncode == 2
    assert "rig.toml: vessels[0].vessel_heat_capacity_j_per_k: is required" in proc.stderr
    assert "Traceback" not in proc.stderr
    assert not (tmp_path / "x.sqlite").exists()


def test_an_impossible_reading_is_set_aside_and_every_vessel_goes_on(mosquitto, tmp_path) -> None:
    """Issue 14: one reading of power_w = 1e200 used to stop the whole service. Now it
    is recorded as a fault with its value kept in the quarantine, and both vessels keep
    estimating after it."""
    import time

    t0 = time.time() - 120.0
    second = ["[[vessels]]", 'id = "urn-2"', "vessel_heat_capacity_j_per_k = 900"]
    toml = rig_toml(mosquitto.url) + "\n".join([*second, "rated_power_w = 2000", ""])
    config = parse_config(toml, "rig.toml", {})
    log = tmp_path / "bad.sqlite"

    def bad(i: int, **values: float) -> bytes:
        good = json.loads(reading(i, t0))
        return json.dumps(good | values).encode()

    async def scenario():
        estimates: list[dict] = []
        service = Service(config, str(log), on_estimate=estimates.append)
        task = asyncio.create_task(service.run())
        await service.started.wait()
        await asyncio.sleep(0.3)
        payloads = []
        for i in range(40):
            for vessel in ("urn-1", "urn-2"):
                payload = reading(i, t0)
                if vessel == "urn-1" and i == 15:
                    payload = bad(i, power_w=1e200)
                if vessel == "urn-1" and i == 20:
                    payload = bad(i, water_c=1e308, power_w=-1e12)
                if vessel == "urn-1" and i == 25:
                    payload = bad(i, water_c=-300.0)
                payloads.append((f"lab/{vessel}/reading", payload))
        await publish(mosquitto.url, payloads)
        await wait_for(lambda: service.stats.samples >= 240)
        await wait_for(lambda: {e["t"] for e in estimates if e["vessel"] == "urn-1"} >= {t0 + 39})
        service.stop()
        return await task, estimates

    stats, estimates = asyncio.run(scenario())
    assert stats.samples == 240
    for vessel in ("urn-1", "urn-2"):
        after = [e for e in estimates if e["vessel"] == vessel and e["t"] > t0 + 25]
        assert len(after) == 14, vessel  # every step after the bad ones was estimated
        assert all(e["water_c"] is not None and 20.0 < e["water_c"] < 40.0 for e in after)
    faults = [s for s in read_samples(log) if s.quality == "fault"]
    assert sorted((round(s.t - t0), s.channel) for s in faults) == [
        (15, "power"),
        (20, "power"),
        (20, "water"),
        (25, "water"),
    ]
    kept = {q["reason"]: bytes(q["raw"]) for q in read_quarantine(log)}
    assert any("1e+200" in raw.decode() and "power" in reason for reason, raw in kept.items())
    assert any("absolute zero" in reason for reason in kept)
    assert verify(log)["ok"]


def test_kill_9_loses_no_acknowledged_reading_and_records_none_twice(mosquitto, tmp_path) -> None:
    """Issue 14: ``kill -9`` lost 19 of 571 QoS 1 readings that had been acknowledged
    before their commit. Now a reading is acknowledged once its block is committed, so
    the broker delivers again whatever the killed service had not committed, and the
    recorder records a delivered-again reading once. Three kills under a steady stream;
    every published sequence number must be in the log exactly once."""
    import os
    import signal
    import subprocess
    import sys
    import threading
    import time
    from pathlib import Path

    root = Path(__file__).resolve().parents[2]
    cfg = tmp_path / "rig.toml"
    toml = rig_toml(mosquitto.url, client_id="kill-test").replace(
        "commit_interval_s = 0.1", "commit_interval_s = 0.5"
    )
    cfg.write_text(toml, encoding="utf-8")
    log = tmp_path / "kill.sqlite"
    n = 900  # 100 a second for 9 s
    t0 = time.time() - 3600.0

    def start() -> subprocess.Popen:
        return subprocess.Popen(
            [sys.executable, "-m", "monitor.cli", "run", "--config", str(cfg), "--log", str(log)],
            cwd=root, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        )  # fmt: skip

    def publisher() -> None:
        async def run() -> None:
            host, port = mosquitto.url.removeprefix("mqtt://").split(":")
            async with aiomqtt.Client(host, int(port), identifier="kill-publisher") as client:
                began = time.monotonic()
                for i in range(n):
                    await client.publish("lab/urn-1/reading", reading(i, t0), qos=1)
                    await asyncio.sleep(max(0.0, began + 0.01 * (i + 1) - time.monotonic()))

        asyncio.run(run())

    service = start()
    time.sleep(3.0)  # up and subscribed (its persistent session then keeps the rest)
    sender = threading.Thread(target=publisher)
    sender.start()
    kills = 0
    try:
        for _ in range(3):
            time.sleep(2.0)
            os.kill(service.pid, signal.SIGKILL)
            service.wait(timeout=10)
            kills += 1
            time.sleep(0.5)
            service = start()
        sender.join(timeout=60)
        deadline = time.monotonic() + 60.0
        while time.monotonic() < deadline:
            time.sleep(1.0)
            try:
                seen = {round(s.t - t0) for s in read_samples(log) if s.channel == "water"}
            except Exception:  # the log is being written; look again
                continue
            if len(seen) == n:
                break
    finally:
        service.send_signal(signal.SIGTERM)
        service.wait(timeout=30)
    assert kills == 3
    water = [round(s.t - t0) for s in read_samples(log) if s.channel == "water"]
    assert sorted(set(water)) == list(range(n)), sorted(set(range(n)) - set(water))[:20]
    assert len(water) == n  # none recorded twice
    assert verify(log)["ok"]


def test_the_chain_head_is_published_retained_and_checks_the_log(mosquitto, tmp_path) -> None:
    """Issue 14: a copy of the chain head away from the log's disk (the broker)."""
    import time

    t0 = time.time() - 60.0
    config = parse_config(rig_toml(mosquitto.url), "rig.toml", {})
    log = tmp_path / "head.sqlite"

    async def scenario():
        service = Service(config, str(log))
        task = asyncio.create_task(service.run())
        await service.started.wait()
        await asyncio.sleep(0.3)
        await publish(mosquitto.url, [("lab/urn-1/reading", reading(i, t0)) for i in range(20)])
        await wait_for(lambda: service.stats.samples >= 60 and service.stats.blocks >= 3)
        await asyncio.sleep(0.5)
        service.stop()
        await task
        return await retained(mosquitto.url, "lab/_log/chain_head", "test-auditor")

    head = asyncio.run(scenario())
    assert head["block"] >= 2
    assert len(head["hash"]) == 64
    assert verify(log, head=head)["ok"]
    assert verify(log, head={**head, "block": head["block"] + 50})["ok"] is False
