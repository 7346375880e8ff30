"""The dashboard in a real browser: Debian's Chromium driven by Playwright against ``streamlit run``.

Uploads the demo export and the messy one through the page's file input, visits
every page, downloads the forecasts CSV and reads it back with Python's csv module
(RFC 4180), and saves a screenshot of each page to tests/screenshots/tmp/ (not tracked).
``REFRESH_SCREENSHOTS=1 python -m pytest tests/test_browser.py`` writes them to
docs/screenshots/ instead, for the README.
"""

from __future__ import annotations

import csv
import io
import os
from pathlib import Path

import pytest

import browser_support as support
from playwright import sync_api as playwright_sync
from forecasting import customer_statistics, read_orders
from forecasting import forecasts as forecasts_module

ROOT = Path(__file__).resolve().parent.parent
CHROMIUM = Path("/usr/bin/chromium")
SHOTS = ROOT / ("docs/screenshots" if os.environ.get("REFRESH_SCREENSHOTS") == "1" else "tests/screenshots/tmp")
DEMO = ROOT / "demo_data" / "plant_shop_orders.csv"
MESSY = ROOT / "demo_data" / "messy_orders.csv"
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]

support.require_browser()


@pytest.fixture(scope="module")
def server():
    with support.running_app() as app:
        yield app.url


@pytest.fixture(scope="module")
def page(server):
    with playwright_sync.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), headless=True, args=CHROMIUM_ARGS)
        try:
            context = browser.new_context(viewport={"width": 1400, "height": 1000}, accept_downloads=True)
            tab = context.new_page()
            tab.set_default_timeout(60_000)
            tab.goto(server)
            settle(tab)
            yield tab
        finally:
            browser.close()


def settle(tab) -> None:
    """Wait until the app has finished its run and drawn the page."""
    tab.wait_for_selector('[data-testid="stApp"][data-test-script-state="notRunning"]')
    tab.wait_for_timeout(300)
    tab.wait_for_selector('[data-testid="stApp"][data-test-script-state="notRunning"]')


def metric_value(tab, label: str) -> str:
    box = tab.locator('[data-testid="stMetric"]', has_text=label).first
    return box.locator('[data-testid="stMetricValue"]').inner_text().strip()


def open_page(tab, title: str, heading: str) -> None:
    tab.get_by_role("link", name=title).first.click()
    tab.get_by_role("heading", name=heading).first.wait_for()
    settle(tab)


def shoot(tab, name: str) -> None:
    """Screenshot the whole page: the window is made as tall as the content, which scrolls inside it."""
    SHOTS.mkdir(parents=True, exist_ok=True)
    height = tab.evaluate("""() => Math.max(...[...document.querySelectorAll('[data-testid="stMain"], '
                             + '[data-testid="stMainBlockContainer"]')].map(e => e.scrollHeight), 0)""")
    tab.set_viewport_size({"width": 1400, "height": int(min(max(height + 40, 1000), 7000))})
    tab.wait_for_timeout(800)  # let charts redraw at the new size
    tab.screenshot(path=str(SHOTS / f"{name}.png"), full_page=True)
    tab.set_viewport_size({"width": 1400, "height": 1000})


def no_exception_shown(tab) -> None:
    assert tab.locator('[data-testid="stException"]').count() == 0
    assert "Traceback" not in tab.content()


class TestInTheBrowser:
    def test_demo_loaded_on_first_open(self, page):
        page.get_by_text("already loaded").first.wait_for()
        audit = read_orders(DEMO).audit()
        assert metric_value(page, "Rows used") == f"{audit['rows_used']:,}"
        no_exception_shown(page)
        shoot(page, "load_orders")

    def test_upload_the_messy_export(self, page):
        page.locator('input[type="file"]').set_input_files(str(MESSY))
        page.get_by_text(f"Using {MESSY.name}").first.wait_for()
        settle(page)
        audit = read_orders(MESSY).audit()
        assert metric_value(page, "Rows used") == f"{audit['rows_used']:,}"
        assert metric_value(page, "Customers") == f"{audit['customers']:,}"
        no_exception_shown(page)
        shoot(page, "load_orders_messy")

    def test_upload_the_demo_export(self, page):
        page.locator('input[type="file"]').set_input_files(str(DEMO))
        page.get_by_text(f"Using {DEMO.name}").first.wait_for()
        settle(page)
        assert metric_value(page, "Orders") == f"{read_orders(DEMO).audit()['orders']:,}"
        no_exception_shown(page)

    def test_forecasts_page_and_csv_download(self, page, tmp_path):
        open_page(page, "Forecasts", "Forecasts")
        page.locator(".js-plotly-plot").first.wait_for()
        no_exception_shown(page)
        shoot(page, "forecasts")
        with page.expect_download() as waiting:
            page.get_by_role("button", name="Download all forecasts (CSV)").click()
        download = waiting.value
        assert download.suggested_filename == "plant_shop_orders_forecasts.csv"
        target = tmp_path / download.suggested_filename
        download.save_as(target)
        rows = list(csv.reader(io.StringIO(target.read_text(encoding="utf-8"), newline="")))
        assert rows[0] == forecasts_module.FORECAST_COLUMNS
        result = read_orders(DEMO)
        assert len(rows) - 1 == len(customer_statistics(result.orders))
        assert all(float(r[3]) > 0 for r in rows[1:])  # expected_next_order, a positive amount

    def test_accuracy_page(self, page):
        open_page(page, "Accuracy check", "Accuracy check")
        page.get_by_text("On your data").first.wait_for()
        page.locator(".js-plotly-plot").first.wait_for()
        no_exception_shown(page)
        shoot(page, "accuracy")

    def test_value_tiers_page(self, page):
        open_page(page, "Value tiers", "Value tiers")
        page.get_by_text("are expected to bring in").first.wait_for()
        page.locator(".js-plotly-plot").first.wait_for()
        no_exception_shown(page)
        shoot(page, "value_tiers")

    def test_cohort_outlook_page(self, page):
        open_page(page, "Cohort outlook", "Cohort outlook")
        page.get_by_text("they actually spent").first.wait_for()
        page.locator(".js-plotly-plot").nth(1).wait_for()
        no_exception_shown(page)
        shoot(page, "cohort_outlook")
