"""Time the recorder's writer, reader and verifier on a temporary log; print JSON.

Run from the repository root:

    .venv/bin/python benchmarks/bench_recorder.py [--samples N]

The load is what a busy service hands the recorder: batches of 10 samples (one
instant of 10 channels; 20 vessels in turn), through ``add_samples``, with a commit
every ``commit_every`` samples. Two commit sizes are timed: 20,000 samples (one
second at the 20,000 samples/s target, as the service commits once a second) and
1,000 (fifty commits a second: the cost of the sync on every commit shows).

The output is one JSON object, per commit size:

- ``samples_per_s`` and ``us_per_sample``: add_samples + commit, wall time;
- ``file_bytes_per_sample``: the file (and WAL) after closing, over the samples;
- ``verify_s`` and ``verify_samples_per_s``: ``verify()`` over the whole log;
- ``read_samples_per_s``: ``read_samples()`` over the whole log;
- ``verify_ok``: what verify said (must be true).

``target_samples_per_s`` is the throughput target and ``target_met`` says whether
the one-second commit size met it.
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
from monitor.records.recorder import Recorder, read_samples, verify

TARGET_SAMPLES_PER_S = 20_000
CHANNELS = ("water", "water_top", "element", "ambient", "power", "energy",
            "voltage", "current", "pressure", "wall")  # fmt: skip
VESSELS = tuple(f"vessel-{i:02d}" for i in range(20))


def _batches(total: int, seed: int) -> list[list[Sample]]:
    rng = np.random.default_rng(seed)
    values = np.round(rng.normal(50.0, 20.0, size=total), 3).tolist()
    batches = []
    start_s = 1_780_000_000.0
    for first in range(0, total, len(CHANNELS)):
        instant = first // len(CHANNELS)
        vessel = VESSELS[instant % len(VESSELS)]
        t = start_s + instant * 0.05
        batches.append(
            [
                Sample(t, vessel, channel, values[first + k], source="sim://?seed=7")
                for k, channel in enumerate(CHANNELS)
                if first + k < total
            ]
        )
    return batches


def _size(path: Path) -> int:
    return sum(os.path.getsize(p) for p in (path, Path(f"{path}-wal")) if os.path.exists(p))


def _run(total: int, commit_every: int, folder: Path) -> dict[str, object]:
    path = folder / f"bench-{commit_every}.sqlite"
    batches = _batches(total, seed=11)
    start = time.perf_counter()
    with Recorder(path, version=__version__, config_text="# bench") as rec:
        for batch in batches:
            rec.add_samples(batch)
            if rec.pending() >= commit_every:
                rec.commit()
    write_s = time.perf_counter() - start
    start = time.perf_counter()
    result = verify(path)
    verify_s = time.perf_counter() - start
    start = time.perf_counter()
    read = sum(1 for _ in read_samples(path))
    read_s = time.perf_counter() - start
    if read != total or result["samples"] != total:
        raise SystemExit(f"bench: wrote {total} samples, read {read}, verify saw {result}")
    return {
        "commit_every": commit_every,
        "samples": total,
        "blocks": result["blocks"],
        "samples_per_s": round(total / write_s),
        "us_per_sample": round(1e6 * write_s / total, 2),
        "file_bytes_per_sample": round(_size(path) / total, 1),
        "verify_s": round(verify_s, 3),
        "verify_samples_per_s": round(total / verify_s),
        "read_samples_per_s": round(read / read_s),
        "verify_ok": result["ok"],
    }


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark and print its JSON; return the exit status (0)."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=int, default=400_000, help="samples per run")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="ebullio-bench-") as folder:
        runs = [_run(args.samples, every, Path(folder)) for every in (20_000, 1_000)]
    out = {
        "version": __version__,
        "sqlite": sqlite3.sqlite_version,
        "target_samples_per_s": TARGET_SAMPLES_PER_S,
        "target_met": runs[0]["samples_per_s"] >= TARGET_SAMPLES_PER_S and runs[0]["verify_ok"],
        "runs": runs,
    }
    json.dump(out, sys.stdout, indent=2)
    sys.stdout.write("\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
