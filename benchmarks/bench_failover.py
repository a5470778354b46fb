"""Print JSON: the NATS engine's fail-over on a three-node cluster, timed (issue 16).

Run from the repository root (Debian's ``nats-server`` must be installed):

    .venv/bin/python benchmarks/bench_failover.py             # 3 runs
    .venv/bin/python benchmarks/bench_failover.py --runs 1

Each run is tests/support/failover.py's scenario: three ``nats-server`` nodes on
127.0.0.1 (routes, JetStream, replicas 3), three ``ebullio run --engine`` workers, 18
simulated kettles publishing over MQTT, one worker killed (SIGKILL) and then one node.
The test (tests/monitor/test_engine_cluster.py) checks what must hold on any machine;
this times it against issue 16's targets.

Figures per run
    ``killed_worker_take_over_s``: from the kill to the newest new lease of the killed
    worker's partitions. ``after_node_kill_all_held_s``: from the node's kill until every
    partition's lease names a live worker; ``..._renewed_s``: and has been renewed since
    (null: not within the wait). ``readings_lost``: messages of the stream that the
    workers' final states do not cover. ``deliveries_lost``: gaps in a consumer's
    deliveries the workers saw (messages lost on the way, each stretch read again from
    a new consumer). ``vessels_equal``: vessels whose every estimate (the digest chained
    over them) equals a one-process replay of the stream.
    ``machine_busy_cores``: the whole machine's busy cores over the run (the cluster
    and the workers use about one; more is other work, which stretches every wait).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from tests.support.failover import TAKE_OVER_TARGET_S, VESSELS, run_failover  # noqa: E402

KEPT = (
    "killed_worker_take_over_s",
    "after_node_kill_all_held_s",
    "after_node_kill_all_renewed_s",
    "published",
    "readings_lost",
    "vessels_equal",
    "set_aside",
    "publisher_reconnects",
    "deliveries_lost",
    "killed_node",
)


def busy_s() -> float:
    """Return the whole machine's busy CPU seconds so far (all cores, /proc/stat)."""
    fields = [int(v) for v in Path("/proc/stat").read_text().split("\n", 1)[0].split()[1:]]
    idle = fields[3] + fields[4]
    return (sum(fields) - idle) / os.sysconf("SC_CLK_TCK")


def one_run() -> dict[str, object]:
    wall0, busy0 = time.monotonic(), busy_s()
    with tempfile.TemporaryDirectory(prefix="ebullio-failover-") as tmp:
        report, _, _ = run_failover(Path(tmp))
    wall = time.monotonic() - wall0
    out = {key: report.get(key) for key in KEPT}
    out["run_s"] = round(wall, 1)
    out["machine_busy_cores"] = round((busy_s() - busy0) / wall, 2)
    times = [out[k] for k in KEPT[:3]]
    out["targets"] = {
        "worker_take_over_within_10_s": times[0] is not None and times[0] <= TAKE_OVER_TARGET_S,
        "node_loss_all_held_within_10_s": times[1] is not None and times[1] <= TAKE_OVER_TARGET_S,
        "none_lost": report.get("readings_lost") == 0,
        "figures_equal_to_one_process": report.get("vessels_equal") == len(VESSELS),
    }
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=3)
    args = parser.parse_args()
    runs = []
    for k in range(args.runs):
        print(f"bench_failover: run {k + 1} of {args.runs}", file=sys.stderr, flush=True)
        runs.append(one_run())
    print(
        json.dumps(
            {
                "benchmark": "failover",
                "python": platform.python_version(),
                "cores": os.cpu_count(),
                "target_s": TAKE_OVER_TARGET_S,
                "runs": runs,
                "all_targets_met": all(all(r["targets"].values()) for r in runs),
            },
            indent=2,
        )
    )


if __name__ == "__main__":
    main()
