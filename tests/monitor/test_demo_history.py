"""The demo's simulated history: written as the live service would have recorded it, and
the drift a replay of it finds matches the faults the site put in, vessel for vessel.

The expectations come from the site's plan (which vessel carries which fault), never
from the simulator's truth about the figures: the figures are the replay's own.
"""

from __future__ import annotations

import time

import pytest

from drivers.simworld.site import HISTORY_DAYS, RUN_EVERY_DAYS, demo_site
from monitor.records.recorder import read_runs, read_vessels, verify
from monitor.rig.history import HISTORY_SOURCE, History, site_config_text, write_history
from monitor.runs.replay import replay

#: Drift levels that say "act on this" (a notice is a hint and may come and go).
ACTED_ON = {"warning", "alarm"}


@pytest.fixture(scope="module")
def history_log(tmp_path_factory):
    plans = tuple(demo_site())
    text = site_config_text(plans, "mqtt://127.0.0.1:1883", "test: a simulated history")
    history = History(plans, text, end_s=time.time() - 3600.0, days=HISTORY_DAYS)
    path = str(tmp_path_factory.mktemp("history") / "site.sqlite")
    said: list[str] = []
    figures = write_history(path, history, workers=2, say=said.append)
    return path, plans, figures, said


@pytest.fixture(scope="module")
def replayed(history_log):
    return replay([history_log[0]])


def _acted_on(summary: dict) -> set[str]:
    return {f["name"] for f in summary.get("drift", []) if f["level"] in ACTED_ON}


def test_the_history_is_a_verified_log_of_every_vessel(history_log):
    path, plans, figures, said = history_log
    assert verify(path)["ok"] is True
    assert set(read_vessels(path)) == {p.vessel for p in plans}
    assert figures["vessels"] == len(plans)
    assert len(said) == len(plans)
    assert all(v["simulated"].startswith("yes") for v in read_vessels(path).values())
    runs = read_runs(path)
    for plan in plans:
        mine = [r for r in runs if r["vessel"] == plan.vessel]
        assert len(mine) == len(plan.run_days), plan.vessel
        assert all(r["summary"]["source"] == "live" for r in mine)
    # heaters every RUN_EVERY_DAYS days over the whole history
    heater = next(p for p in plans if p.kind == "storage heater")
    assert len(heater.run_days) == len(range(1, HISTORY_DAYS, RUN_EVERY_DAYS))


def test_a_replay_flags_each_fault_on_its_vessel_and_nothing_on_the_healthy(history_log, replayed):
    _, plans, _, _ = history_log
    result = replayed
    by_vessel: dict[str, list[dict]] = {}
    for run in result["runs"]:
        by_vessel.setdefault(run["vessel"], []).append(run)
    for plan in plans:
        last = by_vessel[plan.vessel][-1]
        expected = {plan.fault} if plan.fault else set()  # named after its check
        assert _acted_on(last) == expected, (plan.vessel, last.get("drift"))
        # and every run of it was judged (a doubtful run would hide a drift)
        assert all(r["verdict"]["status"] == "trusted" for r in by_vessel[plan.vessel])
    # no healthy vessel's run ever raised a drift warning on the way
    for plan in plans:
        if plan.fault is None:
            assert not any(_acted_on(r) for r in by_vessel[plan.vessel]), plan.vessel


def test_the_recorded_summaries_are_the_replays(history_log, replayed):
    """The board reads the recorded summaries: they are the replay's, flag for flag."""
    path, _, _, _ = history_log
    recorded = {(r["vessel"], r["run"]): r["summary"] for r in read_runs(path)}
    again_by_key = {(r["vessel"], r["run"]): r for r in replayed["runs"]}
    assert recorded.keys() == again_by_key.keys()
    for key, live in recorded.items():
        again = again_by_key[key]
        assert [(f["name"], f["level"]) for f in live["drift"]] == [
            (f["name"], f["level"]) for f in again["drift"]
        ], key
        for figure in ("water_mass_kg", "ua_w_per_k", "element_conductance_w_per_k"):
            assert live[figure] == again[figure], (key, figure)


def test_history_readings_say_they_were_simulated(history_log):
    path, _, _, _ = history_log
    from monitor.records.recorder import read_samples

    first = next(iter(read_samples(path)))
    assert first.source == HISTORY_SOURCE


def test_a_vessel_whose_history_fails_is_said_and_the_others_go_on(tmp_path):
    from dataclasses import replace

    good, other = (p for p in demo_site() if p.kind == "kettle")
    good = replace(good, run_days=(58.0, 59.0))
    # made-up: a fault kind the site does not know, so its scenario cannot be made
    bad = replace(other, run_days=(59.0,), fault="bogus", onset_day=0.0, severity=1.0)
    plans = (good, bad)
    text = site_config_text(plans, "mqtt://127.0.0.1:1883", "test: one history fails")
    history = History(plans, text, end_s=time.time() - 3600.0, days=HISTORY_DAYS)
    path = tmp_path / "partial.sqlite"
    said: list[str] = []
    figures = write_history(str(path), history, workers=1, say=said.append)
    assert figures["failed"] == [bad.vessel]
    assert any(bad.vessel in line and "could not be made" in line for line in said)
    assert "Traceback" not in "".join(said)
    assert verify(path)["ok"] is True
    assert [r["vessel"] for r in read_runs(path)] == [good.vessel, good.vessel]
