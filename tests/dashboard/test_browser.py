"""The board in a real headless Chromium driven by selenium (Debian's chromium and driver).

The live log is written by the service while the page is open, so these tests see
the board update as a rig runs; screenshots go to out/test-artifacts/.
"""

from __future__ import annotations

import asyncio
import contextlib
import threading
import time
from dataclasses import replace

import pytest
from werkzeug.serving import make_server

from dashboard.app import create_app
from drivers.simworld import kettle_scenario, run_series, scenario_metadata
from monitor.rig.config import RigConfig, VesselSpec
from monitor.rig.service import Service
from tests.monitor.test_service import ListDriver, run_until
from tests.support.browser import chromium_driver, read_settled, severe, shot, wait_for


class PacedDriver(ListDriver):
    """Yields its samples at ``rate`` instants per wall second (a rig run sped up)."""

    def __init__(self, items, rate: float) -> None:
        super().__init__(items, fail=False)
        self.rate = rate

    async def samples(self):
        last_t = None
        for item in self.items:
            if item.t != last_t:
                last_t = item.t
                await asyncio.sleep(1.0 / self.rate)
            yield item
        await asyncio.Event().wait()


@pytest.fixture
def browser():
    web = chromium_driver()
    yield web
    web.quit()


@contextlib.contextmanager
def serve(app):
    """Serve ``app`` on 127.0.0.1 (any free port) for the block; yield its address."""
    server = make_server("127.0.0.1", 0, app.server, threaded=True)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_port}/"
    finally:
        server.shutdown()
        thread.join(timeout=10)


def one_kettle(vessel: str, meta: dict) -> RigConfig:
    """A rig configuration of one kettle with an element thermocouple (our own)."""
    return RigConfig("browser-test", "# one kettle\n", 101.325, None, (),
                     (VesselSpec(vessel, meta, True, False),), 0.05)  # fmt: skip


def test_live_board_updates_and_flags_scaling_as_the_rig_runs(tmp_path, browser) -> None:
    from selenium.webdriver.common.by import By

    # five clean kettle runs, then one with 0.10 mm of scale and one with 0.14 mm (our own
    # scenario): about 20 % of G lost and then 26 %. The first is a notice (a one-run
    # shift, the CUSUM past h/2), the second a warning; with the same 26 % in both runs
    # the first alone is already a warning since G's std tightened (2026-12-03)
    scenario = replace(kettle_scenario(), duration_s=240.0)
    meta = {**scenario_metadata(scenario, 0), "element_sensor": "yes"}
    series = [0.0] * 5 + [0.10, 0.14]
    samples = [s for b in run_series(scenario, series, gap_s=1000.0) for s in b]
    cut = next(i for i, s in enumerate(samples) if s.t >= samples[-1].t - 240.0)
    log = tmp_path / "live.sqlite"
    config = one_kettle(scenario.vessel, meta)
    first = samples[:cut]
    service = Service(config, str(log), extra_sources={"rig": lambda: ListDriver(first, False)})
    asyncio.run(run_until(service, lambda: service.stats.samples >= len(first)))
    with serve(create_app(str(log), poll_ms=500)) as url:
        browser.get(url)

        def fleet() -> str:
            return browser.find_element(By.ID, "fleet-table").text

        # after the first scaled run: the scaling index shows, the drift check is unsure yet
        wait_for(lambda: "%" in fleet(), what="the scaling index in the fleet view")
        assert "scale" in browser.find_element(By.ID, "vessel-flags").text
        assert "● warning" not in fleet()

        # the seventh run is played live, paced, while the page is open
        def water_points() -> int:
            return browser.execute_script(
                "const g = document.getElementById('vessel-readings-chart')"
                ".querySelector('.js-plotly-plot');"
                "return g && g.data && g.data.length ? g.data[0].x.length : 0;"
            )

        wait_for(lambda: water_points() > 0, what="the readings chart")
        before = water_points()
        last = samples[cut:]
        service2 = Service(config, str(log), extra_sources={"rig": lambda: PacedDriver(last, 40.0)})
        loop = asyncio.new_event_loop()
        runner2 = threading.Thread(target=loop.run_until_complete, args=(service2.run(),),
                                   daemon=True)  # fmt: skip
        runner2.start()
        figures = browser.find_element(By.ID, "vessel-figures").text
        wait_for(lambda: water_points() > before + 40, what="new readings appended live")
        wait_for(lambda: browser.find_element(By.ID, "vessel-figures").text != figures,
                 what="the figures to change")  # fmt: skip
        shot(browser, "board-live")
        browser.set_window_size(820, 1180)  # a tablet in portrait (common practice, no source)
        time.sleep(1.0)
        shot(browser, "board-tablet")
        width = browser.execute_script("return document.documentElement.scrollWidth")
        assert width <= 820  # nothing sticks out sideways at tablet width
        # the whole seventh run is in before the service stops and ends it: a run cut
        # off early states G too loosely to be judged (or is doubtful), not a warning
        wait_for(lambda: service2.stats.samples >= len(last), timeout_s=120.0,
                 what="the seventh run played to its end")  # fmt: skip
        loop.call_soon_threadsafe(service2.stop)
        runner2.join(timeout=30)
        loop.close()
        # the second scaled run has ended: now it is a warning (or worse) on the board
        wait_for(lambda: "● warning" in fleet() or "▲ alarm" in fleet(),
                 what="the scaling warning in the fleet view")  # fmt: skip
        assert "scal" in fleet().split("\n")[1]
        shot(browser, "board-scaling-flag")
        assert severe(browser) == []


def test_the_fleet_view_puts_the_vessels_that_need_attention_first(tmp_path, browser) -> None:
    from selenium.webdriver.common.by import By

    from drivers.simworld import SimulatedRig

    # three kettles (our own scenario): "a-clean" is fine; "b-no-room" has no room
    # thermometer (a notice); "c-open-tc" has its element thermocouple open-circuit, read
    # as 1500 degC (a warning). By name they sort a, b, c; by need c, b, a.
    samples, specs = [], []
    for i, name in enumerate(("a-clean", "b-no-room", "c-open-tc")):
        scenario = replace(kettle_scenario(duration_s=120.0), vessel=name)
        for batch in SimulatedRig(scenario, seed=i).run():
            for smp in batch:
                if name == "b-no-room" and smp.channel == "ambient":
                    continue
                if name == "c-open-tc" and smp.channel == "element":
                    smp = replace(smp, value=1500.0)
                samples.append(smp)
        specs.append(VesselSpec(name, {**scenario_metadata(scenario, i), "element_sensor": "yes"},
                                True, False))  # fmt: skip
    samples.sort(key=lambda smp: smp.t)
    config = RigConfig("browser-test", "# three kettles\n", 101.325, None, (), tuple(specs), 0.05)
    log = tmp_path / "fleet.sqlite"
    service = Service(config, str(log), extra_sources={"rig": lambda: ListDriver(samples, False)})
    asyncio.run(run_until(service, lambda: service.stats.samples >= len(samples)))
    with serve(create_app(str(log), poll_ms=1000)) as url:
        browser.get(url)

        def order() -> list[str]:
            def names() -> list[str]:
                rows = browser.find_elements(By.CSS_SELECTOR, "#fleet-table tbody tr")
                return [r.text.split(" ")[0] for r in rows]

            return read_settled(names)

        wait_for(lambda: len(order()) == 3, what="three vessels in the fleet view")
        assert order() == ["c-open-tc", "b-no-room", "a-clean"]
        # the vessel view opens on the vessel that needs attention most
        assert "c-open-tc" in browser.find_element(By.ID, "vessel-pick").text
        wait_for(lambda: "1500" in browser.find_element(By.ID, "vessel-flags").text,
                 what="its open thermocouple in the vessel's flags")  # fmt: skip
        rows = read_settled(lambda: browser.find_element(By.ID, "fleet-table").text).split("\n")
        assert "● warning" in rows[1]
        assert "○ notice" in rows[2]
        assert " ok " in f" {rows[3]} "
        shot(browser, "board-fleet-order")
        assert severe(browser) == []


def test_replay_scrubbing_moves_the_cursor_on_both_charts(tmp_path, browser) -> None:
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.by import By

    scenario = replace(kettle_scenario(), duration_s=300.0)
    meta = {**scenario_metadata(scenario, 1), "element_sensor": "yes"}
    samples = [s for b in run_series(scenario, [0.0]) for s in b]
    log = tmp_path / "replay.sqlite"
    config = one_kettle(scenario.vessel, meta)
    service = Service(config, str(log), extra_sources={"rig": lambda: ListDriver(samples, False)})
    asyncio.run(run_until(service, lambda: service.stats.samples >= len(samples)))
    with serve(create_app(str(log), poll_ms=60_000)) as url:
        browser.get(url)

        def cursor_x(chart: str) -> str | None:
            return browser.execute_script(
                f"const g = document.getElementById('{chart}').querySelector('.js-plotly-plot');"
                "return g && g.layout && g.layout.shapes && g.layout.shapes.length ?"
                " String(g.layout.shapes[0].x0) : null;"
            )

        wait_for(lambda: cursor_x("replay-readings-chart") is not None, what="the replay charts")
        start = cursor_x("replay-readings-chart")
        rail = browser.find_element(By.CSS_SELECTOR, ".scrubber")
        offset = int(rail.size["width"] * 0.2)  # from the centre: to about 70 % of the run
        ActionChains(browser).move_to_element_with_offset(rail, offset, 0).click().perform()
        wait_for(lambda: cursor_x("replay-readings-chart") != start, what="the cursor to move")
        wait_for(lambda: cursor_x("replay-estimates-chart") == cursor_x("replay-readings-chart"),
                 what="both charts' cursors together")  # fmt: skip
        assert float(cursor_x("replay-readings-chart")) > float(start)
        links = browser.find_element(By.ID, "replay-links").text
        assert "CSV" in links
        assert "report" in links
        shot(browser, "board-replay")
        assert severe(browser) == []
