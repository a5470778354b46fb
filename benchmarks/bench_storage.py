"""Bytes per sample on disk, write, read and verify rates of the recorder's layouts; print JSON.

Run from the repository root:

    .venv/bin/python benchmarks/bench_storage.py [--vessels 100] [--seconds 3600]

The load is a fleet as the live service records it: every vessel sends one reading of
five channels (water, element and ambient °C, power W, energy Wh) a second, stamped
at receipt (a few ms of jitter per vessel), and the recorder commits once a second,
as the service does. Each value kind is written in each schema version:

- ``decimal``: readings as instruments write them (°C to 0.01, W to 0.1, Wh to 0.001,
  parsed from text), noisy and drifting;
- ``noise``: the same with full-precision float noise (17 significant digits), the
  worst case for the compact layout's integer form.

For each: ``bytes_per_sample`` (the file and its WAL after the writer closed, over the
samples), ``write_samples_per_s`` (add_samples and commit, wall), ``read_samples_per_s``
(``read_samples`` over the whole log), ``read_vessel_samples_per_s`` (one vessel's
samples through ``read_samples(path, vessel)``), ``board_window_ms`` (a
``LogReader`` answering the board's questions for one vessel over the last hour:
``newest_sample_t`` and four channels' ``readings``), ``verify_s`` and ``verify_ok``.
``target_bytes_per_sample`` is issue 16's target.
"""

from __future__ import annotations

import argparse
import json
import os
import sqlite3
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from drivers.sample import Sample
from monitor import __version__
from monitor.records.recorder import LogReader, Recorder, read_samples, verify

TARGET_BYTES_PER_SAMPLE = 30.0
T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z, an arbitrary start
SOURCE = "mqtt://127.0.0.1:1883/ebullio"
CHANNELS = ("water", "element", "ambient", "power", "energy")
DECIMALS = (2, 2, 2, 1, 3)


def _fleet(vessels: int, seconds: int, kind: str, seed: int) -> list[list[Sample]]:
    """Return one batch per second: every vessel's five readings of that second."""
    rng = np.random.default_rng(seed)
    names = [f"heater-{i:04d}" for i in range(vessels)]
    level = rng.uniform(15.0, 60.0, size=vessels)
    power = rng.choice([0.0, 2000.0, 3000.0], size=vessels)
    energy = rng.uniform(0.0, 5e4, size=vessels)
    jitter = rng.uniform(0.0, 0.05, size=vessels)
    batches = []
    for k in range(seconds):
        level += rng.normal(0.0, 0.01, size=vessels) + power * 2e-6
        energy += power / 3600.0
        rows = np.stack(
            [
                level + rng.normal(0.0, 0.03, size=vessels),
                level + 3.0 + rng.normal(0.0, 0.05, size=vessels),
                20.0 + rng.normal(0.0, 0.05, size=vessels),
                power + rng.normal(0.0, 4.0, size=vessels),
                energy,
            ]
        )
        if kind == "decimal":
            rows = np.stack([np.round(r, d) for r, d in zip(rows, DECIMALS, strict=True)])
        values = rows.T.tolist()
        times = (T0 + k + jitter + rng.uniform(0.0, 0.002, size=vessels)).tolist()
        batches.append(
            [
                Sample(times[v], names[v], channel, values[v][c], source=SOURCE)
                for v in range(vessels)
                for c, channel in enumerate(CHANNELS)
            ]
        )
    return batches


def _size(path: Path) -> int:
    return sum(os.path.getsize(p) for p in (path, Path(f"{path}-wal")) if os.path.exists(p))


def _run(batches: list[list[Sample]], version: int, folder: Path, name: str) -> dict[str, object]:
    path = folder / f"{name}-v{version}.sqlite"
    total = sum(len(b) for b in batches)
    start = time.perf_counter()
    with Recorder(path, version=__version__, config_text="# bench", schema_version=version) as rec:
        for batch in batches:
            rec.add_samples(batch)
            rec.commit()
    write_s = time.perf_counter() - start
    size = _size(path)
    start = time.perf_counter()
    result = verify(path)
    verify_s = time.perf_counter() - start
    start = time.perf_counter()
    read = sum(1 for _ in read_samples(path))
    read_s = time.perf_counter() - start
    vessel = batches[0][0].vessel
    start = time.perf_counter()
    one = sum(1 for _ in read_samples(path, vessel))
    one_s = time.perf_counter() - start
    start = time.perf_counter()
    with LogReader(path) as log:
        last = log.newest_sample_t(vessel, ("water", "element", "ambient", "power"))
        window = [log.readings(vessel, c, last - 3600.0) for c in CHANNELS[:4]]
    board_ms = 1e3 * (time.perf_counter() - start)
    if read != total or result["samples"] != total or not window[0][0]:
        raise SystemExit(f"bench: wrote {total} samples, read {read}, verify saw {result}")
    return {
        "schema_version": version,
        "values": name,
        "samples": total,
        "blocks": result["blocks"],
        "file_bytes": size,
        "bytes_per_sample": round(size / total, 2),
        "write_samples_per_s": round(total / write_s),
        "read_samples_per_s": round(read / read_s),
        "read_vessel_samples_per_s": round(one / one_s),
        "board_window_ms": round(board_ms, 1),
        "verify_s": round(verify_s, 2),
        "verify_ok": result["ok"],
    }


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark and print its JSON; return the exit status (0)."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--vessels", type=int, default=100)
    parser.add_argument("--seconds", type=int, default=3600)
    parser.add_argument("--values", choices=["decimal", "noise", "both"], default="both")
    args = parser.parse_args(argv)
    kinds = ["decimal", "noise"] if args.values == "both" else [args.values]
    runs = []
    with tempfile.TemporaryDirectory(prefix="ebullio-bench-") as folder:
        for kind in kinds:
            batches = _fleet(args.vessels, args.seconds, kind, seed=16)
            for version in (1, 2):
                runs.append(_run(batches, version, Path(folder), kind))
    compact = [r for r in runs if r["schema_version"] == 2]
    out = {
        "version": __version__,
        "sqlite": sqlite3.sqlite_version,
        "vessels": args.vessels,
        "channels": len(CHANNELS),
        "seconds": args.seconds,
        "commit_every_s": 1,
        "target_bytes_per_sample": TARGET_BYTES_PER_SAMPLE,
        "target_met": all(
            r["bytes_per_sample"] <= TARGET_BYTES_PER_SAMPLE and r["verify_ok"] for r in compact
        ),
        "runs": runs,
    }
    json.dump(out, sys.stdout, indent=2)
    sys.stdout.write("\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
