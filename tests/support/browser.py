"""The board rendered in headless Chromium (Debian's ``chromium``, installed by the test
command): its page served on 127.0.0.1, the DOM after the callbacks ran, a screenshot
kept in out/test-artifacts/ for people to look at; and the selenium driver and waits
the browser tests and ``benchmarks/bench_demo.py`` share."""

from __future__ import annotations

import shutil
import subprocess
import threading
import time
from pathlib import Path

from werkzeug.serving import make_server

ARTIFACTS = Path(__file__).resolve().parents[2] / "out" / "test-artifacts"


def render_board(app, screenshot: str) -> str:
    """Serve ``app`` (a Dash app) on a free loopback port, return the page's DOM as
    headless Chromium leaves it, and save a screenshot as ``screenshot`` in
    :data:`ARTIFACTS`."""
    browser = shutil.which("chromium")
    assert browser, "chromium is not installed (scripts/test-all installs it)"
    server = make_server("127.0.0.1", 0, app.server, threaded=True)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    url = f"http://127.0.0.1:{server.server_port}/"
    try:
        common = [browser, "--headless=new", "--no-sandbox", "--disable-gpu",
                  "--virtual-time-budget=10000", "--window-size=1280,800"]  # fmt: skip
        dom = subprocess.run([*common, "--dump-dom", url], capture_output=True, text=True,
                             timeout=90, check=True).stdout  # fmt: skip
        ARTIFACTS.mkdir(parents=True, exist_ok=True)
        subprocess.run([*common, f"--screenshot={ARTIFACTS / screenshot}", url],
                       capture_output=True, timeout=90, check=True)  # fmt: skip
    finally:
        server.shutdown()
        thread.join(timeout=10)
    return dom


def chromium_driver():
    """Return a selenium driver of Debian's headless chromium through its chromedriver
    (its browser log kept, for :func:`severe`); the caller quits it."""
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service as DriverService

    chromium, driver = shutil.which("chromium"), shutil.which("chromedriver")
    assert chromium, "chromium is not installed (scripts/test-all installs it)"
    assert driver, "chromedriver is not installed (Debian's chromium-driver)"
    options = webdriver.ChromeOptions()
    options.binary_location = chromium
    for arg in ("--headless=new", "--no-sandbox", "--disable-gpu", "--window-size=1280,800"):
        options.add_argument(arg)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    return webdriver.Chrome(options=options, service=DriverService(executable_path=driver))


def shot(web, name: str) -> None:
    """Save a screenshot of the page as a test artifact."""
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    web.save_screenshot(str(ARTIFACTS / f"{name}.png"))


def wait_for(check, timeout_s: float = 60.0, what: str = "") -> None:
    """Wait until ``check()`` is true; an element not there yet counts as not yet."""
    from selenium.common.exceptions import WebDriverException

    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        try:
            if check():
                return
        except WebDriverException:
            pass  # the page is still loading (Dash renders the layout after its scripts)
        time.sleep(0.25)
    raise AssertionError(f"timed out waiting for {what}")


def read_settled(read, tries: int = 40):
    """Return ``read()``, tried again while the board re-renders what it reads.

    The board polls, so an element found a moment ago can be replaced before its text
    is read (a stale element); that is a re-render, not a failure.
    """
    from selenium.common.exceptions import StaleElementReferenceException

    for _ in range(tries - 1):
        try:
            return read()
        except StaleElementReferenceException:
            time.sleep(0.1)
    return read()


def severe(web) -> list[str]:
    """Return the page's SEVERE browser log messages."""
    return [e["message"] for e in web.get_log("browser") if e["level"] == "SEVERE"]
