"""Running the dashboard for real-browser tests: ``streamlit run`` on a loopback port, Chromium flags, waits.

Importing this module skips the importing test module when Debian's Chromium or
Playwright is missing, with the reason and the command that installs it.
"""

from __future__ import annotations

import contextlib
import os
import socket
import subprocess
import sys
import threading
import time
import urllib.parse
import urllib.request
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import pytest

ROOT = Path(__file__).resolve().parent.parent
CHROMIUM = Path("/usr/bin/chromium")
# Flags that let Debian's Chromium run headless as root in a container, with its own background calls off.
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]
LOOPBACK_HOSTS = frozenset({"127.0.0.1", "localhost", "::1", "[::1]"})
READY = '[data-testid="stApp"][data-test-script-state="notRunning"]'
# A Vega-Lite chart, and one that has drawn: Vega-Embed puts an <svg class="marks"> or a <canvas class="marks">
# into the chart's element once the view has rendered.
CHART = '[data-testid="stVegaLiteChart"]'
DRAWN_CHART = f"{CHART} :is(svg.marks, canvas.marks)"
# What Vega-Embed's action menu offers that would send a chart (and its data) off the machine or show its
# source: the online editor, the source views. Matched against the words of every button, link and menu item
# around a chart, case apart.
OFF_MACHINE_ACTIONS = ("vega editor", "view source", "view compiled", "open in")


def require_browser() -> None:
    """Skip the calling test module when Debian's Chromium is missing.

    With ``REQUIRE_BROWSER=1`` (set by ``.ci/run``) a missing browser is a failure,
    not a skip. Playwright is in requirements-dev.txt and is imported plainly.
    """
    if CHROMIUM.exists():
        return
    why = "the browser tests need Debian's Chromium at /usr/bin/chromium (apt-get install chromium)"
    if os.environ.get("REQUIRE_BROWSER") == "1":
        pytest.fail(why, pytrace=False)
    pytest.skip(why, allow_module_level=True)


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@dataclass
class AppServer:
    """A running ``streamlit run app.py``: its address, its process and what it printed so far."""

    url: str
    process: subprocess.Popen
    lines: list[str] = field(default_factory=list)

    @property
    def pid(self) -> int:
        return self.process.pid

    def output(self) -> str:
        return "".join(self.lines)


def _drain(process: subprocess.Popen, lines: list[str]) -> None:
    # Read the server's output as it comes, so a chatty server never blocks on a full pipe.
    for raw in iter(process.stdout.readline, b""):
        lines.append(raw.decode(errors="replace"))


@contextlib.contextmanager
def running_app(*, cwd: Path = ROOT, env: dict[str, str] | None = None, address: str | None = "127.0.0.1",
                start_timeout: float = 60.0) -> Iterator[AppServer]:
    """Start the dashboard on a free port, wait for its health check, stop it on the way out.

    ``env`` replaces the server's whole environment (default: this process's, with usage
    statistics off). ``address=None`` leaves out ``--server.address``, so the server starts
    as ``streamlit run app.py`` does for a user (binding every interface); the test still
    only talks to it over 127.0.0.1.
    """
    port = free_port()
    if env is None:
        env = dict(os.environ, STREAMLIT_BROWSER_GATHER_USAGE_STATS="false")
    command = [sys.executable, "-m", "streamlit", "run", "app.py", "--server.headless", "true",
               "--server.port", str(port), "--server.fileWatcherType", "none"]
    if address is not None:
        command += ["--server.address", address]
    process = subprocess.Popen(command, cwd=cwd, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
    server = AppServer(url=f"http://127.0.0.1:{port}", process=process)
    reader = threading.Thread(target=_drain, args=(process, server.lines), daemon=True)
    reader.start()
    try:
        deadline = time.monotonic() + start_timeout
        while True:
            try:
                with urllib.request.urlopen(f"{server.url}/_stcore/health", timeout=2) as answer:
                    if answer.status == 200:
                        break
            except OSError:
                pass
            if process.poll() is not None or time.monotonic() > deadline:
                pytest.fail(f"streamlit did not start on port {port}: {server.output()[-2000:]}")
            time.sleep(0.3)
        yield server
    finally:
        process.terminate()
        try:
            process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=10)
        reader.join(timeout=5)


def launch_chromium(playwright):
    """Debian's Chromium, headless, through a started sync or async Playwright."""
    return playwright.chromium.launch(executable_path=str(CHROMIUM), headless=True, args=CHROMIUM_ARGS)


def settle(tab) -> None:
    """Wait until the app has finished its run and drawn the page (sync Playwright)."""
    tab.wait_for_selector(READY)
    tab.wait_for_timeout(300)
    tab.wait_for_selector(READY)


async def settle_async(tab) -> None:
    """:func:`settle` for async Playwright."""
    await tab.wait_for_selector(READY)
    await tab.wait_for_timeout(300)
    await tab.wait_for_selector(READY)


def open_page(tab, title: str) -> None:
    """Click a page's link in the top navigation and wait for its heading and a finished run."""
    tab.get_by_role("link", name=title).first.click()
    tab.get_by_role("heading", name=title).first.wait_for()
    settle(tab)


def open_sections(tab) -> None:
    """Open the collapsed sections, so that their text (and downloads) are on screen too."""
    closed = tab.locator('[data-testid="stExpander"] details:not([open]) > summary')
    for _ in range(20):
        if closed.count() == 0:
            break
        closed.first.click()
        tab.wait_for_timeout(200)
    settle(tab)


def drawn_chart(tab, index: int = 0):
    """Wait until the page's chart number ``index`` (counted from 0) has drawn, and return it."""
    tab.locator(DRAWN_CHART).nth(index).wait_for()
    return tab.locator(CHART).nth(index)


def chart_actions(tab) -> list[dict]:
    """Everything a person can click around each chart of the page: its words and the address it leads to.

    The chart's frame holds Vega-Embed's own output (an action menu would be a ``details.vega-actions``
    with links) and Streamlit's toolbar, which shows on hover, so each chart is hovered first.
    """
    found = []
    charts = tab.locator(CHART)
    for i in range(charts.count()):
        charts.nth(i).scroll_into_view_if_needed()
        charts.nth(i).hover()
        tab.wait_for_timeout(150)
        found += charts.nth(i).evaluate("""(chart) => {
          const frame = chart.closest('[data-testid="stFullScreenFrame"]') || chart.parentElement;
          return [...frame.querySelectorAll('a, button, summary, [role="menuitem"], .vega-actions')].map((e) => ({
            words: [e.textContent, e.getAttribute('aria-label'), e.getAttribute('title')].filter(Boolean).join(' '),
            href: e.getAttribute('href') || '', menu: e.classList.contains('vega-actions')}));
        }""")
    tab.mouse.move(0, 0)
    return found


def charts_offer_nothing_off_machine(tab) -> int:
    """Assert no chart of the page offers a link or an action that leaves the machine; the number of charts."""
    actions, charts = chart_actions(tab), tab.locator(CHART).count()
    if charts:  # what was looked at: Streamlit's toolbar of the chart (fullscreen, show data, ...)
        assert any("fullscreen" in action["words"].lower() for action in actions), actions
    for action in actions:
        assert not action["menu"], action
        assert not any(words in action["words"].lower() for words in OFF_MACHINE_ACTIONS), action
        host = urllib.parse.urlsplit(action["href"]).hostname
        assert not action["href"] or host is None or host in LOOPBACK_HOSTS, action
    return charts


def metric_value(tab, label: str) -> str:
    box = tab.locator('[data-testid="stMetric"]', has_text=label).first
    return box.locator('[data-testid="stMetricValue"]').inner_text().strip()


def no_exception_shown(tab) -> None:
    assert tab.locator('[data-testid="stException"]').count() == 0
    assert "Traceback" not in tab.content()
