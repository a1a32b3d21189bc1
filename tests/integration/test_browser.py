"""The served dashboard page in a real browser: ``labwatch serve`` (Voilà) of a simulated
source on 127.0.0.1, driven by Playwright with the system Chromium.

No browser is ever downloaded: Chromium is the one from Debian's ``chromium`` package (.ci/run installs
it with apt); the test skips, saying so, only where that binary is absent.  Every request to a
host other than the loopback address is blocked (Voilà's template asks a CDN for an icon font:
the page must work without it).  A screenshot is saved to ``artifacts/``.
"""

from __future__ import annotations

import os
import re
import shutil
import signal
import time
import urllib.request
from pathlib import Path
from urllib.parse import urlparse

import pytest

from tests.conftest import ROOT, free_port

pytestmark = pytest.mark.browser

# Debian's package installs it as /usr/bin/chromium; found on PATH so nothing is hard-wired
CHROMIUM = shutil.which("chromium") or "chromium"
CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]
PANELS = (
    "Bell value",
    "Margin over the local bound",
    "White-noise visibility v*",
    "Evidence against local realism",
    "Alignment",
    "Stream health",
)
# Points of the Bell-value trace: the bqplot Lines marks ("whole run", "rolling window") of
# the figure titled "Bell value over time"; the horizontal bound lines have two points only.
TRACE_POINTS_JS = """() => {
  const fig = Array.from(document.querySelectorAll('.bqplot'))
    .find(f => f.textContent.includes('Bell value over time'));
  if (!fig) return 0;
  return Math.max(0, ...Array.from(fig.querySelectorAll('path.line'))
    .map(p => ((p.getAttribute('d') || '').match(/L/g) || []).length + 1));
}"""


def _wait_http(url: str, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            with urllib.request.urlopen(url, timeout=2) as r:  # noqa: S310 - loopback only
                if r.status == 200:
                    return
        except OSError:
            time.sleep(0.3)
    raise AssertionError(f"{url} did not answer within {timeout} s")


def _stop_group(proc) -> None:
    """SIGTERM the process group we started (serve -> Voila -> kernels), then SIGKILL."""
    if proc.poll() is not None:
        return
    os.killpg(proc.pid, signal.SIGTERM)
    try:
        proc.wait(15)
    except Exception:  # noqa: BLE001 - make sure nothing is left behind
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(5)


def test_served_dashboard_fills_in_a_browser(run_cli):
    if not Path(CHROMIUM).exists():
        pytest.skip(f"{CHROMIUM} is absent: install Debian's chromium (apt-get install chromium)")
    from playwright.sync_api import sync_playwright

    ep = f"tcp://127.0.0.1:{free_port()}"
    port = free_port()
    url = f"http://127.0.0.1:{port}/"
    run_cli("simulate", ep, "--speed", "5", "--duration", "600", "--seed", "12")
    serve = run_cli("serve", ep, "--port", str(port), start_new_session=True)
    blocked: list[str] = []
    try:
        _wait_http(url, timeout=45)
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
            try:
                page = browser.new_page(viewport={"width": 1400, "height": 1800})

                def loopback_only(route) -> None:
                    if urlparse(route.request.url).hostname in ("127.0.0.1", "localhost"):
                        route.continue_()
                    else:
                        blocked.append(route.request.url)
                        route.abort()

                page.route("**/*", loopback_only)
                page.goto(url, wait_until="domcontentloaded", timeout=45_000)
                # the Bell-value trace has points (one per analysis epoch, 5 per second here)
                page.wait_for_function(f"({TRACE_POINTS_JS})() >= 5", timeout=45_000)
                # and the run readout shows a number
                readout = page.locator(".widget-html", has_text="whole run").first
                text = readout.inner_text()
                value = re.search(r"whole run\s+(-?\d+\.\d+)", text)
                assert value, text
                # CHSH of the default simulated source (V = 0.98): between the local bound 2
                # and Tsirelson's 2 sqrt(2) (Cirel'son, Lett. Math. Phys. 4, 93 (1980))
                assert 2.0 < float(value.group(1)) < 2.83, text
                body = page.inner_text("body")
                for title in PANELS:
                    assert title in body, title
                # read-only page: no way to stop the source or record from the browser
                assert "Read-only page" in body
                assert page.get_by_role("button", name="Stop acquisition").count() == 0 or (
                    not page.get_by_role("button", name="Stop acquisition").is_visible()
                )
                assert not page.get_by_role("button", name="Record").is_visible()
                artifacts = ROOT / "artifacts"
                artifacts.mkdir(exist_ok=True)
                page.screenshot(path=str(artifacts / "browser_dashboard.png"), full_page=True)
            finally:
                browser.close()
    finally:
        _stop_group(serve)
    assert all(urlparse(u).hostname not in ("127.0.0.1", "localhost") for u in blocked)
    print(f"blocked non-loopback requests: {blocked}")
