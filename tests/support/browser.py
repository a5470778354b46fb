"""The board rendered in headless Chromium (Debian's ``chromium``, installed by the test
command): its page served on 127.0.0.1, the DOM after the callbacks ran, a screenshot
kept in out/test-artifacts/ for people to look at."""

from __future__ import annotations

import shutil
import subprocess
import threading
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
