"""Print JSON: the live service and the log under faults and bad input (issue 14's targets).

Run from the repository root (Debian's ``mosquitto`` must be installed):

    .venv/bin/python benchmarks/bench_faults.py              # everything, about 2 min
    .venv/bin/python benchmarks/bench_faults.py --fuzz 1000  # fewer fuzzed inputs

Parts (each a key of the JSON, each with ``ok`` for its target):

``kill_9``
    ``ebullio run`` in its own process with a persistent MQTT session reads a steady
    QoS 1 stream (100 readings a second, each with its sequence number as its time);
    it is killed with SIGKILL three times and started again. ``verify`` is run on the
    log after each kill, while the service is down. Target: every published sequence
    number recorded once (``missing`` 0, ``duplicates`` 0), verify passes each time.
``broker_restart``
    The broker (persistence on, saved on every change) is killed with SIGKILL and
    started again under the same stream. Target: nothing lost or doubled, the gap and
    the link loss recorded as events, and the service publishing estimates again within
    ``RESUME_WITHIN_S`` of the restart (``estimates_back_after_restart_s``).
``fuzz_mqtt`` and ``fuzz_serial``
    Two vessels: one takes fuzzed input interleaved with good readings (random bytes,
    truncated and mangled JSON, non-finite and extreme numbers, numbers Python's
    ``float()`` would take but an instrument never sends), the other only good
    readings. MQTT payloads go through Mosquitto; serial lines through a real
    pseudo-terminal into the line-logger driver. Target: the service stays up, both
    vessels are estimating at the end, and every bad input is accounted for (a
    quarantine row or a ``fault`` sample; ``unaccounted`` 0).
``tamper``
    A recorder log with its head file is altered in each of these ways, each on a fresh
    copy: the last block removed; one byte flipped at 40 drawn places; one sample row
    changed, deleted, or added. Target: ``verify`` says not ok every time (a flipped
    byte may land in free space and change nothing: those are counted apart, checked by
    comparing the rows read back).

Readings are from our own made-up heat-up; the fuzz is seeded.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import random
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import aiomqtt

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from drivers.emulators.line_logger import logger_bindings, open_pty_pair  # noqa: E402
from drivers.emulators.mosquitto import MosquittoBroker  # noqa: E402
from drivers.serial_line import SerialLineDriver  # noqa: E402
from monitor.records.recorder import (  # noqa: E402
    head_path,
    read_events,
    read_quarantine,
    read_samples,
    verify,
)
from monitor.rig.config import parse_config  # noqa: E402
from monitor.rig.service import Service  # noqa: E402

PREFIX = "fault"
#: Estimates must come again this soon (s) after a broker that was down 1 s is back: the
#: reconnect backoff's first three waits add up to 3.5 s at most, and one more second.
RESUME_WITHIN_S = 4.5
T0 = 1_767_225_600.0


def rig_toml(url: str, client_id: str | None, vessels: list[str], commit_s: float) -> str:
    """Return a rig configuration with MQTT vessels (our made-up kettles)."""
    lines = ["[mqtt]", f'url = "{url}"', f'prefix = "{PREFIX}"']
    if client_id:
        lines.append(f'client_id = "{client_id}"')
    lines += ["[recorder]", f"commit_interval_s = {commit_s}"]
    for v in vessels:
        lines += ["[[vessels]]", f'id = "{v}"', "vessel_heat_capacity_j_per_k = 900",
                  "rated_power_w = 2000"]  # fmt: skip
    return "\n".join(lines) + "\n"


def reading(i: int) -> bytes:
    """Return reading ``i`` of a made-up 2 kW heat-up: its time is its sequence number."""
    water = 20.0 + 0.2 * (i % 350)
    return json.dumps(
        {"t": T0 + i, "water_c": water, "power_w": 2000.0, "ambient_c": 21.0}
    ).encode()


def start_service(cfg: Path, log: Path) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "monitor.cli", "run", "--config", str(cfg), "--log", str(log)],
        cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )  # fmt: skip


def stream(url: str, n: int, rate_hz: float, done: threading.Event) -> None:
    """Publish readings 0..n-1 at QoS 1 at ``rate_hz``, in a thread of its own."""

    async def run() -> None:
        host, port = url.removeprefix("mqtt://").split(":")
        i = 0
        while i < n:
            try:
                async with aiomqtt.Client(host, int(port), identifier="fault-publisher") as c:
                    began = time.monotonic() - i / rate_hz
                    while i < n:
                        await c.publish(f"{PREFIX}/urn-1/reading", reading(i), qos=1, timeout=1.0)
                        i += 1
                        await asyncio.sleep(max(0.0, began + i / rate_hz - time.monotonic()))
            except aiomqtt.MqttError:
                await asyncio.sleep(0.2)  # the broker is down: publish again once it is back
                i = max(i - 1, 0)  # the one in flight may not have arrived: send it again

    asyncio.run(run())
    done.set()


def count_water(log: Path, n: int) -> dict[str, int]:
    seq = [round(s.t - T0) for s in read_samples(log) if s.channel == "water"]
    return {"recorded": len(seq), "missing": len(set(range(n)) - set(seq)),
            "duplicates": len(seq) - len(set(seq))}  # fmt: skip


def wait_all(log: Path, n: int, patience_s: float = 60.0) -> None:
    deadline = time.monotonic() + patience_s
    while time.monotonic() < deadline:
        time.sleep(1.0)
        try:
            if count_water(log, n)["missing"] == 0:
                return
        except Exception:  # the log is being written: look again
            continue


def part_kill_9(work: Path) -> dict[str, object]:
    n = 1500
    with MosquittoBroker(work / "broker-kill") as broker:
        cfg = work / "kill.toml"
        cfg.write_text(rig_toml(broker.url, "fault-kill", ["urn-1"], 0.5), encoding="utf-8")
        log = work / "kill.sqlite"
        service = start_service(cfg, log)
        time.sleep(3.0)
        done = threading.Event()
        threading.Thread(target=stream, args=(broker.url, n, 100.0, done), daemon=True).start()
        verified = []
        try:
            for _ in range(3):
                time.sleep(3.0)
                service.send_signal(signal.SIGKILL)
                service.wait(timeout=10)
                verified.append(bool(verify(log)["ok"]))
                service = start_service(cfg, log)
            done.wait(timeout=120)
            wait_all(log, n)
        finally:
            service.send_signal(signal.SIGTERM)
            service.wait(timeout=30)
        counts = count_water(log, n)
    ok = counts["missing"] == 0 and counts["duplicates"] == 0 and all(verified)
    return {"published": n, "kills": 3, **counts, "verify_after_each_kill": verified,
            "verify_at_end": bool(verify(log)["ok"]), "ok": ok}  # fmt: skip


def part_broker_restart(work: Path) -> dict[str, object]:
    n = 1000
    broker = MosquittoBroker(
        work / "broker-restart", persistence=True,
        extra_config=("autosave_interval 1", "autosave_on_changes true"),
    ).start()  # fmt: skip
    cfg = work / "restart.toml"
    cfg.write_text(rig_toml(broker.url, "fault-restart", ["urn-1"], 0.5), encoding="utf-8")
    log = work / "restart.sqlite"
    service = start_service(cfg, log)
    try:
        time.sleep(3.0)
        done = threading.Event()
        threading.Thread(target=stream, args=(broker.url, n, 100.0, done), daemon=True).start()
        time.sleep(3.0)
        broker.kill()
        time.sleep(1.0)
        broker.restart()
        back_s = first_live_estimate_s(broker.url, time.monotonic())
        done.wait(timeout=120)
        wait_all(log, n)
    finally:
        service.send_signal(signal.SIGTERM)
        service.wait(timeout=30)
        broker.stop()
    counts = count_water(log, n)
    kinds = [e["kind"] for e in read_events(log)]
    events = {k: kinds.count(k) for k in ("link_lost", "gap")}
    ok = counts["missing"] == 0 and counts["duplicates"] == 0 and events["gap"] >= 1
    ok = ok and back_s is not None and back_s <= RESUME_WITHIN_S
    return {"published": n, **counts, "events": events,
            "estimates_back_after_restart_s": back_s, "ok": ok}  # fmt: skip


def first_live_estimate_s(url: str, since: float, patience_s: float = 60.0) -> float | None:
    """Return seconds from ``since`` to the first estimate the service publishes anew
    (not the broker's retained copy), or None within ``patience_s``."""

    async def run() -> float | None:
        host, port = url.removeprefix("mqtt://").split(":")
        deadline = since + patience_s
        while time.monotonic() < deadline:
            try:
                async with aiomqtt.Client(host, int(port), identifier="fault-watcher") as c:
                    await c.subscribe(f"{PREFIX}/urn-1/estimate", qos=0)
                    async with asyncio.timeout(max(deadline - time.monotonic(), 0.1)):
                        async for message in c.messages:
                            if not message.retain:
                                return round(time.monotonic() - since, 2)
            except (aiomqtt.MqttError, TimeoutError):
                await asyncio.sleep(0.1)
        return None

    return asyncio.run(run())


def fuzz_payload(rng: random.Random, t: float) -> bytes:
    """Return one bad MQTT payload for vessel urn-1 stamped ``t`` where it has a time (seeded)."""
    kind = rng.randrange(8)
    if kind == 0:
        return bytes(rng.randrange(256) for _ in range(rng.randrange(1, 80)))
    if kind == 1:
        good = reading(rng.randrange(300))
        return good[: rng.randrange(1, len(good))]
    if kind == 2:
        value = rng.choice(["1e200", "-1e12", "1e308", "-300", "NaN", "Infinity", "-1e400"])
        key = rng.choice(["water_c", "power_w", "ambient_c"])
        return f'{{"t": {t}, "{key}": {value}}}'.encode()
    if kind == 3:
        return rng.choice([b"1_000", b"\xd9\xa1\xd9\xa2", b"0x10", b"nan", b"inf", b""])
    if kind == 4:
        return json.dumps({"t": t, "water_c": [1, 2], "power_w": {"a": 1}}).encode()
    if kind == 5:
        return json.dumps({"t": "yesterday", "water_c": 20.0}).encode()
    if kind == 6:
        return json.dumps({"t": t, "water_c": 20.0, "humidity": 3}).encode()
    return b'{"t": %f, "power_w": 1e200, "water_c": 1e308}' % t


async def fuzz_mqtt(work: Path, count: int) -> dict[str, object]:
    rng = random.Random(14)
    with MosquittoBroker(work / "broker-fuzz") as broker:
        config = parse_config(rig_toml(broker.url, None, ["urn-1", "urn-2"], 0.2), "fuzz", {})
        log = work / "fuzz-mqtt.sqlite"
        service = Service(config, str(log))
        task = asyncio.create_task(service.run())
        await service.started.wait()
        await asyncio.sleep(0.3)
        host, port = broker.url.removeprefix("mqtt://").split(":")
        good = 0
        async with aiomqtt.Client(host, int(port), identifier="fuzzer") as client:
            for i in range(count):
                if i % 20 == 0:  # good readings go on for both vessels
                    for v in ("urn-1", "urn-2"):
                        await client.publish(f"{PREFIX}/{v}/reading", reading(good), qos=1)
                    good += 1
                # between two good readings: a bad one never stands in the way of the next
                t = T0 + good - 1 + (i % 20 + 1) / 21.0
                await client.publish(f"{PREFIX}/urn-1/reading", fuzz_payload(rng, t), qos=1)
        deadline = time.monotonic() + 60
        while service.stats.quarantined + service.stats.samples < count and (
            time.monotonic() < deadline
        ):
            await asyncio.sleep(0.2)
        await asyncio.sleep(1.0)
        alive = not task.done()
        last = {v: service.vessels[v].latest for v in ("urn-1", "urn-2")}
        service.stop()
        await task
    return _fuzz_figures(log, count, alive, last, "urn-1")


def _fuzz_figures(log: Path, count: int, alive: bool, last: dict, bad_vessel: str) -> dict:
    quarantined = read_quarantine(log)
    faults = [s for s in read_samples(log) if s.quality == "fault" and s.vessel == bad_vessel]
    # a bad input is one quarantine row, or (a well-formed payload with impossible values)
    # one quarantine row per impossible value beside its fault sample
    accounted = len(quarantined)
    estimating = {v: e is not None for v, e in last.items()}
    return {
        "bad_inputs": count, "quarantine_rows": len(quarantined), "fault_samples": len(faults),
        "unaccounted": max(0, count - accounted), "service_stayed_up": alive,
        "vessels_estimating_at_end": estimating,
        "ok": alive and all(estimating.values()) and accounted >= count,
    }  # fmt: skip


def fuzz_line(rng: random.Random, t: float) -> bytes:
    kind = rng.randrange(7)
    if kind == 0:
        return (
            bytes(rng.randrange(1, 256) for _ in range(rng.randrange(1, 60))).replace(b"\n", b"?")
            + b"\r\n"
        )
    if kind == 1:
        return b"t=%.3f power_w=%s cj_c=24.0\r\n" % (t, rng.choice([b"1e200", b"-1e12", b"1_000"]))
    if kind == 2:
        return b"t=%.3f water_c=%s\r\n" % (t, rng.choice([b"1e308", b"-300", b"nan", b"inf"]))
    if kind == 3:
        return b"t=%.3f t=%.3f\r\n" % (t, t)
    if kind == 4:
        return b"x" * rng.randrange(1100, 3000) + b"\r\n"
    if kind == 5:
        return b"t=%.3f ambient_c=\xd9\xa1\xd9\xa2\r\n" % t
    return b"LOGGER NOISE %d\r\n" % rng.randrange(1000)


async def fuzz_serial(work: Path, count: int) -> dict[str, object]:
    rng = random.Random(41)
    master_fd, slave_path = open_pty_pair()
    spec, bindings = logger_bindings("line-1", "K")
    from monitor.rig.config import RigConfig, VesselSpec

    meta: dict[str, str | float] = {"vessel_heat_capacity_j_per_k": 900.0, "rated_power_w": 2000.0}
    config = RigConfig(
        path="fuzz", text="# fuzzed line logger\n", pressure_kpa=101.325, mqtt=None,
        instruments=(), vessels=(VesselSpec("line-1", meta, False, False),),
        commit_interval_s=0.2,
    )  # fmt: skip
    log = work / "fuzz-serial.sqlite"
    service = Service(
        config, str(log),
        extra_sources={"serial": lambda: SerialLineDriver(
            f"serial://{slave_path}", spec=spec, bindings=bindings)},
    )  # fmt: skip
    task = asyncio.create_task(service.run())
    await service.started.wait()
    await asyncio.sleep(0.5)
    now = time.time() - 3600.0

    def write_all() -> None:  # a thread of its own: a full pty blocks the writer only
        good = 0
        for i in range(count):
            t = now + i * 0.01
            os.write(master_fd, fuzz_line(rng, t))
            if i % 10 == 0:
                good += 1
                line = b"t=%.3f water_c=%.3f ambient_c=21.0 power_w=2000.0 cj_c=24.0\r\n"
                os.write(master_fd, line % (t + 0.005, 20.0 + 0.01 * good))

    await asyncio.to_thread(write_all)
    await asyncio.sleep(2.0)
    alive = not task.done()
    last = {"line-1": service.vessels["line-1"].latest}
    service.stop()
    await task
    os.close(master_fd)
    out = _fuzz_figures(log, count, alive, last, "line-1")
    out["note"] = ("an over-long line is set aside in parts, so quarantine rows may exceed "
                   "the bad lines")  # fmt: skip
    return out


def part_tamper(work: Path) -> dict[str, object]:
    from dataclasses import replace as dc_replace

    from drivers.simworld import SimulatedRig, kettle_scenario
    from monitor.records.recorder import Recorder

    base = work / "tamper-base.sqlite"
    scenario = dc_replace(kettle_scenario(), duration_s=200.0)
    with Recorder(base, version="bench") as rec:
        for k, batch in enumerate(SimulatedRig(scenario, seed=1).run()):
            rec.add_samples(batch)
            if k % 20 == 19:
                rec.commit()
    rng = random.Random(7)
    results: dict[str, object] = {}

    def fresh(name: str) -> Path:
        path = work / f"tamper-{name}.sqlite"
        shutil.copy(base, path)
        shutil.copy(head_path(base), head_path(path))
        return path

    def edit(path: Path, statement: str) -> None:
        conn = sqlite3.connect(path)
        conn.execute(statement)
        conn.commit()
        conn.close()

    path = fresh("cut")
    conn = sqlite3.connect(path)
    last = conn.execute("SELECT max(block) FROM blocks").fetchone()[0]
    for table in ("sample_packs", "sample_series", "sample_vessels", "blocks"):
        conn.execute(f"DELETE FROM {table} WHERE block = ?", (last,))
    conn.commit()
    conn.close()
    results["last_block_removed"] = _caught(path)

    def nudge(columns: list[list]) -> None:  # one reading's value by 0.001
        columns[4][30] += 0.001

    def drop(columns: list[list]) -> None:  # one reading taken out
        for column in columns:
            del column[30]
        columns[0][30:] = [p - 1 for p in columns[0][30:]]

    def add(columns: list[list]) -> None:  # a reading put in, half a second after another
        for column, item in zip(
            columns,
            (columns[0][-1] + 1, columns[1][30] + 0.5, columns[2][30], 0, columns[4][30]),
            strict=True,
        ):
            column.append(item)  # fmt: skip

    for name, change in (("row_changed", nudge), ("row_deleted", drop), ("row_added", add)):
        path = fresh(name)
        _edit_pack(path, 3, change)
        results[name] = _caught(path)
    path = fresh("pack_deleted")
    edit(path, "DELETE FROM sample_packs WHERE id = 3")
    results["pack_deleted"] = _caught(path)
    size = base.stat().st_size
    caught = harmless = missed = 0
    where: list[str] = []
    reference = _rows(base)
    for k in range(40):
        path = fresh(f"flip{k}")
        data = bytearray(path.read_bytes())
        at = rng.randrange(size)
        data[at] ^= 1 << rng.randrange(8)
        path.write_bytes(bytes(data))
        check = verify(path)
        if not check["ok"]:
            caught += 1
            where.append(str(check["state"]))
        elif _rows(path) == reference:
            harmless += 1  # free space or an unused byte: nothing a reader sees changed
        else:
            missed += 1
    results["byte_flipped"] = {"tries": 40, "caught": caught, "changed_nothing": harmless,
                               "missed": missed,
                               "states": {s: where.count(s) for s in set(where)}}  # fmt: skip
    named = [results[k] for k in ("last_block_removed", "row_changed", "row_deleted", "row_added",
                                  "pack_deleted")]  # fmt: skip
    results["ok"] = all(r["caught"] for r in named) and missed == 0  # type: ignore[index]
    return results


def _edit_pack(path: Path, pack_id: int, change) -> None:
    """Unpack one pack of readings, let ``change`` alter its columns, pack it back."""
    from monitor.records.packs import decode_pack, encode_pack

    conn = sqlite3.connect(path)
    n, data = conn.execute("SELECT n, data FROM sample_packs WHERE id = ?", (pack_id,)).fetchone()
    pack = decode_pack(data, n)
    columns = [list(pack.positions), list(pack.times), list(pack.series), list(pack.qualities),
               list(pack.values)]  # fmt: skip
    change(columns)
    conn.execute("UPDATE sample_packs SET n = ?, t_last = ?, data = ? WHERE id = ?",
                 (len(columns[0]), max(columns[1]), encode_pack(*columns), pack_id))  # fmt: skip
    conn.commit()
    conn.close()


def _caught(path: Path) -> dict[str, object]:
    check = verify(path)
    return {"caught": not check["ok"], "state": check["state"], "reason": check["reason"]}


def _rows(path: Path) -> object:
    try:
        conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
        rows = {t: conn.execute(f"SELECT * FROM {t} ORDER BY id").fetchall()
                for t in ("sample_packs", "sample_series", "sample_vessels", "blocks",
                          "sessions")}  # fmt: skip
        conn.close()
        return rows
    except sqlite3.Error as exc:
        return f"unreadable: {exc}"


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--fuzz", type=int, default=10_000, help="fuzzed inputs per path")
    args = parser.parse_args()
    began = time.monotonic()
    with tempfile.TemporaryDirectory(prefix="ebullio-faults-") as tmp:
        work = Path(tmp)
        out: dict[str, object] = {"benchmark": "faults", "python": sys.version.split()[0]}
        out["tamper"] = part_tamper(work)
        out["fuzz_mqtt"] = asyncio.run(fuzz_mqtt(work, args.fuzz))
        out["fuzz_serial"] = asyncio.run(fuzz_serial(work, args.fuzz))
        out["kill_9"] = part_kill_9(work)
        out["broker_restart"] = part_broker_restart(work)
    out["all_ok"] = all(
        part["ok"] for part in out.values() if isinstance(part, dict) and "ok" in part
    )
    out["seconds"] = round(time.monotonic() - began, 1)
    print(json.dumps(out, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
