"""The default demo, end to end: ``ebullio demo`` as a user runs it, its board walked view
by view in a real headless Chromium (Debian's chromium and chromedriver), screenshots
kept in out/test-artifacts/demo-*.png for people to look at.

What the board shows is checked against the faults the site put in (which vessel
carries which: drivers/simworld/site.py), never against the simulator's figures.
"""

from __future__ import annotations

import json
import re
import signal
import subprocess
import sys
import time
import urllib.request

import pytest

from drivers.simworld.site import demo_site
from tests.support.browser import chromium_driver, read_settled, severe, shot, wait_for

#: Flags a vessel's fault should raise, in the words of the fleet's "what needs doing".
SAYS = {
    "scaling": "element-to-water conductance",
    "insulation": "heat-loss coefficient UA",
    "element": "power delivered at the rated voltage",
    "fill": "less than its",
}


@pytest.fixture
def browser():
    web = chromium_driver()
    yield web
    web.quit()


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """``ebullio demo`` (the board's command line) into a new log, at 40x real time."""
    out = tmp_path_factory.mktemp("demo") / "demo.sqlite"
    began = time.monotonic()
    proc = subprocess.Popen(
        [sys.executable, "-m", "dashboard.cli", "demo", "--speed", "40", "--board-port", "0",
         "--out", str(out)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip
    lines: list[str] = []
    url = None
    assert proc.stdout is not None
    while url is None:
        line = proc.stdout.readline()
        assert line, f"the demo ended early: {proc.stderr.read() if proc.stderr else ''}"
        lines.append(line)
        found = re.search(r"the board is at (http://127\.0\.0\.1:\d+/)", line)
        url = found.group(1) if found else None
    yield {"proc": proc, "url": url, "log": out, "lines": lines, "began": began}
    if proc.poll() is None:
        proc.send_signal(signal.SIGINT)
        proc.communicate(timeout=60)  # read what is left, so a full pipe cannot hold it


def _rest_of_output(demo, until: str, timeout_s: float = 240.0) -> None:
    """Read the demo's output until a line holding ``until``."""
    deadline = time.monotonic() + timeout_s
    proc = demo["proc"]
    while time.monotonic() < deadline:
        line = proc.stdout.readline()
        assert line, f"the demo ended early: {proc.stderr.read()}"
        demo["lines"].append(line)
        if until in line:
            return
    raise AssertionError(f"no {until!r} within {timeout_s} s")


def _pick(browser, dropdown_id: str, label: str) -> str:
    """Pick the option that starts with ``label`` in a Dash dropdown as a user does: open
    it, type into its search box (a long list shows only a few options at a time), click
    the option; return the option's text."""
    from selenium.webdriver.common.by import By

    box = browser.find_element(By.ID, dropdown_id)
    browser.execute_script("arguments[0].scrollIntoView()", box)
    box.click()
    search = [e for e in browser.find_elements(By.CSS_SELECTOR, ".dash-dropdown-search")
              if e.is_displayed()]  # fmt: skip
    if search:
        search[0].send_keys(label)

    def matching() -> list:
        found = browser.find_elements(By.CSS_SELECTOR, "[role=option]")
        return [o for o in found if o.text == label or o.text.startswith(label + " ")]

    # the search keeps the options holding each of its words: a short list, all drawn
    wait_for(lambda: bool(matching()), what=f"{label} among the options of {dropdown_id}")
    time.sleep(0.3)
    option = matching()[0]
    text = option.text
    browser.execute_script("arguments[0].scrollIntoView({block: 'center'})", option)
    option.click()
    wait_for(lambda: text in browser.find_element(By.ID, dropdown_id).text,
             what=f"{label} picked in {dropdown_id}")  # fmt: skip
    return text


def _scroll_to(browser, element_id: str) -> None:
    from selenium.webdriver.common.by import By

    browser.execute_script("arguments[0].scrollIntoView()", browser.find_element(By.ID, element_id))
    time.sleep(0.5)


@pytest.mark.timeout(600)  # the history takes about a minute, the replays a little more
def test_the_default_demo_walks_through_its_four_views(demo, browser) -> None:
    from selenium.webdriver.common.by import By

    plans = {p.vessel: p for p in demo_site()}
    browser.set_window_size(1280, 1000)
    browser.get(demo["url"])
    # the first screen: the fleet, the vessels listed before their history is written
    wait_for(lambda: len(browser.find_elements(By.CSS_SELECTOR, "#fleet-table tbody tr"))
             == len(plans), timeout_s=60.0, what="every vessel in the fleet view")  # fmt: skip
    _rest_of_output(demo, "the history is written")
    assert "simulated data" in browser.find_element(By.ID, "log-name").text

    def rows() -> dict[str, str]:
        def read() -> dict[str, str]:
            found = browser.find_elements(By.CSS_SELECTOR, "#fleet-table tbody tr")
            return {r.text.split()[0]: r.text for r in found}

        return read_settled(read)

    faulty = [v for v, p in plans.items() if p.fault]
    wait_for(lambda: all(("alarm" in rows().get(v, "") or "warning" in rows().get(v, ""))
                         for v in faulty), timeout_s=60.0,
             what="every planted fault flagged in the fleet view")  # fmt: skip
    shown = rows()
    for vessel, plan in plans.items():
        if plan.fault:
            assert SAYS[plan.fault] in shown[vessel], (vessel, shown[vessel])
        else:
            assert "alarm" not in shown[vessel], (vessel, shown[vessel])
            assert "warning" not in shown[vessel], (vessel, shown[vessel])
    # worst first: the alarms lead
    order = list(shown)
    assert all("alarm" in shown[v] for v in order[:3])
    shot(browser, "demo-fleet")

    # the vessel view of the scaling heater
    scaling = next(v for v, p in plans.items() if p.fault == "scaling" and p.kind != "kettle")
    _pick(browser, "vessel-pick", scaling)
    _scroll_to(browser, "vessel-pick")
    wait_for(lambda: "water mass" in browser.find_element(By.ID, "vessel-figures").text,
             what="the vessel's figures")  # fmt: skip
    shot(browser, "demo-vessel")

    # the maintenance view: where it stands, the figures across the weeks, the reports
    _pick(browser, "maintenance-pick", scaling)
    wait_for(lambda: "mm of scale" in browser.find_element(By.ID, "maintenance-standing").text,
             what="the scaling warning with its scale thickness")  # fmt: skip
    names = browser.execute_script(
        "const g = document.getElementById('maintenance-chart').querySelector('.js-plotly-plot');"
        "return g && g.data ? g.data.map(t => t.name) : [];"
    )
    assert "scaling flag" in names
    assert any("baseline" in str(n) for n in names) or browser.execute_script(
        "const g = document.getElementById('maintenance-chart').querySelector('.js-plotly-plot');"
        "return g.layout.shapes.some(s => s.type === 'rect');"
    )
    links = browser.find_elements(By.CSS_SELECTOR, "#maintenance-reports a")
    assert len(links) >= len(plans[scaling].run_days)
    _scroll_to(browser, "maintenance-pick")
    shot(browser, "demo-maintenance")

    # the report of its latest judged run is one click away: follow that link
    latest = links[len(plans[scaling].run_days) - 1].get_attribute("href")
    report = _fetch_report(latest)
    assert scaling in report
    assert "scale" in report

    # the replay view offers the recorded runs (the oldest among them); it replays the one
    # picked: the scaling heater's latest history run
    runs = len(plans[scaling].run_days)
    _pick(browser, "replay-run", f"{scaling} · run 1 ·")
    picked = _pick(browser, "replay-run", f"{scaling} · run {runs} ·")
    day = picked.split(" · ")[2][:10]  # the run's date, as the picker gives it

    def replayed() -> bool:
        status = browser.find_element(By.ID, "replay-status").text
        first = browser.execute_script(
            "const g = document.getElementById('replay-readings-chart')"
            ".querySelector('.js-plotly-plot');"
            "return g && g.data && g.data.length && g.data[0].x.length ?"
            " new Date(g.data[0].x[0]).toISOString() : '';"  # x is Unix ms
        )
        return not status and day in first

    wait_for(replayed, timeout_s=120.0, what=f"the run of {day} replayed and drawn")
    assert "CSV" in browser.find_element(By.ID, "replay-links").text
    _scroll_to(browser, "replay-run")
    shot(browser, "demo-replay")
    assert severe(browser) == []


def _fetch_report(href: str, timeout_s: float = 120.0) -> str:
    """Return the audit report behind a board link (it is made in a child process: the
    page waits and reloads until it is there)."""
    deadline = time.monotonic() + timeout_s
    url = href
    while time.monotonic() < deadline:
        with urllib.request.urlopen(url, timeout=30) as answer:  # loopback only
            url = answer.geturl()  # the job's own address after the first redirect
            text = answer.read().decode("utf-8", "replace")
        if "http-equiv='refresh'" not in text:  # the waiting page reloads itself
            return text
        time.sleep(1.0)
    raise AssertionError(f"no report from {href} within {timeout_s} s")


@pytest.mark.timeout(600)
def test_the_demo_ends_live_with_a_verified_log_that_says_it_is_simulated(demo) -> None:
    _rest_of_output(demo, "the board stays up")
    text = "".join(demo["lines"])
    assert "not a safety device" in text
    assert "(0 inputs quarantined)" in text
    assert ("Mosquitto at mqtt://127.0.0.1:" in text) or ("Mosquitto is not installed" in text)
    out = demo["log"]
    verified = subprocess.run(
        [sys.executable, "-m", "monitor.cli", "verify", str(out), "--json"],
        capture_output=True, text=True, timeout=120, check=False,
    )  # fmt: skip
    assert verified.returncode == 0, verified.stdout
    from monitor.records.recorder import read_estimates, read_vessels, sessions

    assert all(str(m.get("simulated", "")).startswith("yes") for m in read_vessels(out).values())
    assert "simulated" in str(sessions(out)[1]["config_text"])
    # every vessel ran live after its history: a live estimate for each
    live_t = sessions(out)[-1]["started_t"]
    for vessel in read_vessels(out):
        newest = [e for e in read_estimates(out, vessel) if e["t"] >= live_t]
        assert newest, vessel
    proc = demo["proc"]
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    assert "Traceback" not in err
    print(json.dumps({"demo_lines": len(demo["lines"])}))
