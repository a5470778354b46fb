"""Write the small recorder log the schema tests read: two simulated kettles, two sessions.

    PYTHONPATH=<a checkout> python tests/data/make_recorder_log.py OUT.sqlite

It uses only the recorder's public writer, so any ebullio makes it in its own layout
with the same readings, blocks and commit times: ``recorder-v1.sqlite`` beside this
file was made at commit f56d495 (schema version 1, before the compact layout), and
``tests/monitor/test_compact_store.py`` makes the same log with the current code to
check that both read, replay and verify alike. The scenarios are our own.
"""

from __future__ import annotations

import math
import sys
from dataclasses import replace
from itertools import count

from drivers.channels import Quarantined
from drivers.sample import Quality, Sample
from drivers.simworld import SimulatedRig, kettle_scenario, scenario_metadata
from monitor.records.recorder import Recorder

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z, an arbitrary start (common practice, no source)
SECONDS = 150.0


def _clock():
    ticks = count()
    return lambda: T0 + 1000.0 + 0.5 * next(ticks)


def make(path: str) -> None:
    """Write the log at ``path`` (which must not exist)."""
    rigs = []
    for seed, vessel in ((3, "kettle-1"), (4, "kettle-2")):
        scenario = replace(kettle_scenario(), vessel=vessel, duration_s=SECONDS, start_epoch_s=T0)
        rigs.append((scenario, iter(SimulatedRig(scenario, seed=seed).run()), seed))
    clock = _clock()
    half = int(SECONDS) // 2
    for session in (1, 2):
        with Recorder(path, version="fixture", config_text=f"# session {session}\n",
                      clock=clock) as rec:  # fmt: skip
            if session == 1:
                for scenario, _, seed in rigs:
                    rec.add_vessel(scenario.vessel, scenario_metadata(scenario, seed))
            for step in range(half + (1 if session == 2 else 0)):
                for _, batch_iter, _ in rigs:
                    batch = next(batch_iter, None)
                    if batch:
                        rec.add_samples(batch)
                if step == 7:
                    t = T0 + step
                    rec.add_samples([
                        Sample(t, "kettle-1", "water_top", math.nan, Quality.FAULT, "serial://x"),
                        Sample(t, "kettle-2", "pressure", 101.325, Quality.SUSPECT, "modbus://m"),
                    ])  # fmt: skip
                    rec.add_quarantined([Quarantined(t, "serial://x", "line 9", "not a number",
                                                     b"water=\xff")])  # fmt: skip
                    rec.add_event(t, "gap", "serial://x", {"missing_s": 1.5})
                if step % 3 == 2:
                    rec.commit()


if __name__ == "__main__":
    make(sys.argv[1])
