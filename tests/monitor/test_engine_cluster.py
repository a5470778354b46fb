"""The NATS engine on a real three-node cluster: fail-over of a worker and of a node (issue 16).

The scenario is tests/support/failover.py's (three nodes, three workers, kettles over
MQTT, a worker and then a node killed). This test checks what must hold whatever the
machine's load:

* the killed worker's partitions get new holders, and after the node's kill every
  partition's lease names a live worker and is renewed: within 30 s and 45 s here, a
  bound on liveness; issue 16's 10 s target is timed by benchmarks/bench_failover.py,
  since a shared machine stretches every wait (10.4 s seen once in a full suite);
* 0 readings lost: the stream holds, per vessel and in order, exactly the payloads the
  instruments published, and each vessel's entry in the estimates bucket has taken
  every one of them;
* each vessel's figures (every estimate, through the digest chained over them, and the
  latest in full) equal a replay of the stream in one uninterrupted process, and the
  fleet view's reader gives the same latest estimates;
* the bad messages are set aside once each.
"""

from __future__ import annotations

import asyncio
import json

import nats
import pytest

from monitor.engine.partition import EngineLayout
from monitor.engine.worker import EngineError, Worker, WorkerSettings, read_estimates
from tests.support.engine import (
    estimates,
    publish_readings,
    read_stream,
    reference_figures,
    stream_exists,
    wait_for,
)
from tests.support.failover import BAD_INPUT, LAYOUT, VESSELS, run_failover
from tests.support.fleet import fleet_specs, kettle_readings, two_kettle_runs
from tests.support.nats import NatsCluster

#: Liveness bounds (s): a take-over that has not happened by then has not happened.
LIVENESS_S = 30.0


@pytest.mark.timeout(150)
def test_three_workers_on_three_nodes_survive_a_worker_and_a_node_killed(tmp_path):
    report, final, logs = run_failover(tmp_path)
    print(json.dumps(report, indent=1))
    assert report["killed_worker_take_over_s"] <= LIVENESS_S, logs
    held_s = report["after_node_kill_all_held_s"]
    renewed_s = report["after_node_kill_all_renewed_s"]
    assert held_s is not None, logs  # None: not within the scenario's wait
    assert renewed_s is not None, logs
    assert held_s <= LIVENESS_S, logs
    assert renewed_s <= 1.5 * LIVENESS_S, logs
    assert report["published"] == report["published_expected"]
    assert report["stream_matches_published"], "the stream is not what the instruments sent"
    assert report["readings_lost"] == 0, (report["short"], report["unequal"], logs)
    assert report["short"] == {}  # nor any taken twice
    assert report["vessels_equal"] == len(VESSELS), report["unequal"]
    assert report["fleet_view_same"]
    assert report["set_aside"] == len(BAD_INPUT)  # each once, though read again after a kill
    survivors = [f for f in final if f is not None]
    assert len(survivors) == 2  # the killed worker printed nothing
    assert sum(f["partitions_taken"] for f in survivors) >= LAYOUT.partitions


def test_a_worker_stopped_hands_its_state_on_to_the_next_one(tmp_path):
    """One node, workers in this process: the first takes a backlog and stops (every
    partition checkpointed and handed back); the second loads those checkpoints, takes
    what came meanwhile, and every vessel's figures equal one uninterrupted replay."""
    layout = EngineLayout(partitions=3)
    vessels = ["kettle-a", "kettle-b", "kettle-c"]
    payloads = {v: kettle_readings(v, seed=i, duration_s=300.0) for i, v in enumerate(vessels)}
    with NatsCluster(tmp_path / "nats", nodes=1, layout=layout) as server:
        specs = fleet_specs(tmp_path, vessels, server.mqtt_ports[0])
        report = asyncio.run(_hand_on(server.urls, layout, specs, payloads))
    assert report["first"]["partitions_handed_back"] == layout.partitions
    assert report["second_messages"] == 3 * 101  # only what came after the first stopped
    assert report["equal"] == vessels
    assert sorted(report["fleet"]) == vessels


async def _hand_on(urls, layout, specs, payloads) -> dict[str, object]:
    nc = await nats.connect(urls[0])
    js = nc.jetstream(timeout=5.0)
    settings = WorkerSettings(checkpoint_every_s=0.5)
    out: dict[str, object] = {}

    async def taken(count: int):
        try:
            got = await estimates(js, layout, list(payloads))
        except nats.js.errors.BucketNotFoundError:
            return None
        return len(got) == 3 and all(e["messages"] >= count for e in got.values())

    try:
        first = Worker(urls, specs, layout, "first", settings)
        task = asyncio.create_task(first.run())
        await wait_for(lambda: stream_exists(js, layout), 20.0)  # the worker sets it up
        await publish_readings(nc, layout, payloads, 0, 200)
        ok, _ = await wait_for(lambda: taken(200), 30.0)
        first.stop()
        await asyncio.wait_for(task, 30.0)
        assert ok, "the first worker did not take the readings in 30 s"
        out["first"] = first.stats.as_dict()
        await publish_readings(nc, layout, payloads, 200, 301)  # while no worker runs
        second = Worker(urls, specs, layout, "second", settings)
        task = asyncio.create_task(second.run())
        ok, _ = await wait_for(lambda: taken(301), 30.0)
        second.stop()
        await asyncio.wait_for(task, 30.0)
        assert ok, "the second worker did not take the readings in 30 s"
        out["second_messages"] = second.stats.messages
        figures = await estimates(js, layout, list(payloads))
        reference = reference_figures(layout, specs, await read_stream(js, layout))
        out["equal"] = sorted(
            v for v, ref in reference.items()
            if figures[v]["digest"] == ref.digest and figures[v]["messages"] == ref.messages
        )  # fmt: skip
        out["fleet"] = sorted(await read_estimates(urls, layout))  # keys listed
    finally:
        await nc.close()
    return out


def test_each_ended_run_reaches_the_runs_stream_once_across_a_crash(tmp_path):
    """Issue 16: the engine keeps run summaries. One node, workers in this process: the
    first takes two runs of three kettles and dies without a checkpoint; the second
    steps it all again (ending each first run again) and the runs stream holds each
    vessel's ended run once, equal to one uninterrupted replay's, drift flags and all."""
    from monitor.engine.worker import read_runs

    layout = EngineLayout(partitions=2)
    vessels = ["kettle-a", "kettle-b", "kettle-c"]
    payloads = {v: two_kettle_runs(v, i) for i, v in enumerate(vessels)}
    with NatsCluster(tmp_path / "nats", nodes=1, layout=layout) as server:
        specs = fleet_specs(tmp_path, vessels, server.mqtt_ports[0])
        report = asyncio.run(_crash_and_redo(server.urls, layout, specs, payloads))
        runs = asyncio.run(read_runs(server.urls, layout))
        # read from the middle: only what came after
        after = asyncio.run(read_runs(server.urls, layout, runs[1][0]))
    with pytest.raises(EngineError, match="cannot reach the NATS server"):
        asyncio.run(read_runs(server.urls, layout, timeout_s=1.0))  # it has stopped
    assert after == runs[2:]
    assert report["first_runs_sent"] == 3
    assert report["second_runs_sent"] == 3  # sent again, kept once
    summaries = [summary for _, summary in runs]
    assert sorted(s["vessel"] for s in summaries) == vessels
    want = {v: stream.unsent_runs for v, stream in report["reference"].items()}
    for summary in summaries:
        assert json.dumps([summary]) == json.dumps(want[summary["vessel"]])


async def _crash_and_redo(urls, layout, specs, payloads) -> dict[str, object]:
    nc = await nats.connect(urls[0])
    js = nc.jetstream(timeout=5.0)
    total = sum(len(p) for p in payloads.values())
    out: dict[str, object] = {}
    try:
        # no checkpoint but at a hand-back, which a crash never makes
        first = Worker(urls, specs, layout, "first", WorkerSettings(checkpoint_every_s=1e9))
        task = asyncio.create_task(first.run())
        await wait_for(lambda: stream_exists(js, layout), 20.0)
        await publish_readings(nc, layout, payloads)

        async def done(worker):
            return worker.stats.messages >= total and worker.stats.runs_sent >= 3

        ok, _ = await wait_for(lambda: done(first), 60.0)
        assert ok, f"the first worker took {first.stats.messages} of {total} in 60 s"
        task.cancel()  # dies: no checkpoint, its leases left to run out
        await asyncio.wait([task])
        out["first_runs_sent"] = first.stats.runs_sent
        second = Worker(urls, specs, layout, "second", WorkerSettings(checkpoint_every_s=1.0))
        task = asyncio.create_task(second.run())
        ok, _ = await wait_for(lambda: done(second), 60.0)
        second.stop()
        await asyncio.wait_for(task, 30.0)
        assert ok, f"the second worker took {second.stats.messages} of {total} in 60 s"
        out["second_runs_sent"] = second.stats.runs_sent
        out["reference"] = reference_figures(layout, specs, await read_stream(js, layout))
    finally:
        await nc.close()
    return out
