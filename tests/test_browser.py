"""The dashboard in a real browser: Debian's Chromium driven by Playwright against ``streamlit run``.

Uploads the demo export and the messy one through the page's file input, visits
every page, downloads the forecasts CSV and reads it back with Python's csv module
(RFC 4180), checks page by page that no command-line flag (``--date``) and no code name
(``mta-segments``, ``bg-nbd``) is shown, and no method or model name on a primary screen
(only in the details sections, which are opened for the check), and saves a screenshot of
each page to tests/screenshots/tmp/ (not tracked).
``REFRESH_SCREENSHOTS=1 python -m pytest tests/test_browser.py`` writes them to
docs/screenshots/ instead, for the README.

A second session uploads an export of 60,000 customers: the Forecasts page draws a
fixed number of shapes (not one dot per customer), the customer search answers with a
page of matches, and the Excel file of every customer is made on request.
"""

from __future__ import annotations

import csv
import io
import os
import re
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pytest

import browser_support as support
from browser_support import metric_value, no_exception_shown, open_page, open_sections, settle
from dashboard import words
from playwright import sync_api as playwright_sync
from forecasting import customer_statistics, read_orders
from forecasting import forecasts as forecasts_module
from forecasting.exports import HEADINGS
from forecasting.frequency import FREQUENCY_MODELS
from forecasting.options import METHODS, OWN_SPREAD

ROOT = Path(__file__).resolve().parent.parent
CHROMIUM = Path("/usr/bin/chromium")
SHOTS = ROOT / ("docs/screenshots" if os.environ.get("REFRESH_SCREENSHOTS") == "1" else "tests/screenshots/tmp")
DEMO = ROOT / "demo_data" / "plant_shop_orders.csv"
MESSY = ROOT / "demo_data" / "messy_orders.csv"
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]

support.require_browser()

FLAG = re.compile(r"--[a-z]")
PAGE_TITLES = ["Load orders", "Forecasts", "Accuracy check", "Value tiers", "Revenue outlook"]
# The code names of methods, spread models and order-frequency models (forecasting.options, forecasting.frequency):
# never on the page; details sections name methods by their plain labels.
CODE_NAMES = sorted({name for name in METHODS if "-" in name} | {OWN_SPREAD, *FREQUENCY_MODELS, "mta"},
                    key=len, reverse=True)
CODE = re.compile(r"(?<![\w-])(?:" + "|".join(map(re.escape, CODE_NAMES)) + r")(?![\w-])")
# Method and model names, parameters and test statistics: in details sections only, not on a primary screen.
STATISTICS = re.compile(r"BG/NBD|likelihood|month index|\bp [<=] ?0|James-Stein|empirical Bayes|Gamma-Gamma|"
                        r"multi-task|\bMTA\b|REML|smearing|Poisson|spread model", re.IGNORECASE)


@pytest.fixture(scope="module")
def server():
    with support.running_app() as app:
        yield app.url


@pytest.fixture(scope="module")
def browser():
    with playwright_sync.sync_playwright() as p:
        chromium = p.chromium.launch(executable_path=str(CHROMIUM), headless=True, args=CHROMIUM_ARGS)
        try:
            yield chromium
        finally:
            chromium.close()


@pytest.fixture(scope="module")
def page(server, browser):
    context = browser.new_context(viewport={"width": 1400, "height": 1000}, accept_downloads=True)
    tab = context.new_page()
    tab.set_default_timeout(60_000)
    tab.goto(server)
    settle(tab)
    yield tab
    context.close()


def shoot(tab, name: str) -> None:
    """Screenshot the whole page: the window is made as tall as the content, which scrolls inside it."""
    SHOTS.mkdir(parents=True, exist_ok=True)
    height = tab.evaluate("""() => Math.max(...[...document.querySelectorAll('[data-testid="stMain"], '
                             + '[data-testid="stMainBlockContainer"]')].map(e => e.scrollHeight), 0)""")
    tab.set_viewport_size({"width": 1400, "height": int(min(max(height + 40, 1000), 7000))})
    tab.wait_for_timeout(800)  # let charts redraw at the new size
    tab.screenshot(path=str(SHOTS / f"{name}.png"), full_page=True)
    tab.set_viewport_size({"width": 1400, "height": 1000})


def found_on_screen(tab, pattern: re.Pattern) -> list[str]:
    """What matches ``pattern`` in the text the page shows (collapsed sections' text is not shown), in context."""
    text = tab.inner_text("body")
    return [text[max(0, m.start() - 60):m.end() + 60] for m in pattern.finditer(text)]


def flags_on_screen(tab) -> list[str]:
    """Command-line flags in the text the page shows, with what stands around them."""
    return found_on_screen(tab, FLAG)


def ask_for_the_check_of_the_past(tab) -> None:
    """On the Revenue outlook page: make the check at ten earlier dates (it is made on request) and wait for it."""
    button = tab.get_by_role("button", name="Check it at ten earlier dates")
    if button.count():
        button.first.click()
        tab.get_by_text("dates over the last year").first.wait_for()
    settle(tab)


def check_every_page_speaks_plainly(tab) -> None:
    """Page by page: the primary screen (sections closed) shows no flag, no code name and no statistics; with
    every section open there is still no flag and no code name."""
    for title in PAGE_TITLES:
        open_page(tab, title)
        if title == "Revenue outlook":
            ask_for_the_check_of_the_past(tab)
        no_exception_shown(tab)
        assert flags_on_screen(tab) == [], title
        assert found_on_screen(tab, CODE) == [], title
        assert found_on_screen(tab, STATISTICS) == [], title
        open_sections(tab)
        assert flags_on_screen(tab) == [], title
        assert found_on_screen(tab, CODE) == [], title
        if title in ("Forecasts", "Revenue outlook"):
            # The details sections are open now and name the methods: the check above sees what they say.
            assert found_on_screen(tab, STATISTICS) != [], title
    open_page(tab, "Load orders")


class TestInTheBrowser:
    def test_demo_loaded_on_first_open(self, page):
        page.get_by_text("already loaded").first.wait_for()
        audit = read_orders(DEMO).audit()
        assert metric_value(page, "Rows used") == f"{audit['rows_used']:,}"
        no_exception_shown(page)
        shoot(page, "load_orders")

    def test_every_page_of_the_demo_speaks_plainly(self, page):
        check_every_page_speaks_plainly(page)

    def test_upload_the_messy_export(self, page):
        page.locator('input[type="file"]').set_input_files(str(MESSY))
        page.get_by_text(f"Using {MESSY.name}").first.wait_for()
        settle(page)
        audit = read_orders(MESSY).audit()
        assert metric_value(page, "Rows used") == f"{audit['rows_used']:,}"
        assert metric_value(page, "Customers") == f"{audit['customers']:,}"
        no_exception_shown(page)
        page.locator('[data-testid="stExpander"] summary', has_text="Reading options").first.click()
        page.get_by_text(words.CONTROL_LABELS["keep_implausible"]).first.wait_for()
        page.wait_for_timeout(500)  # the section's opening, before the page is measured for the screenshot
        shoot(page, "load_orders_messy")

    def test_every_page_of_the_messy_export_speaks_plainly(self, page):
        check_every_page_speaks_plainly(page)

    def test_upload_the_demo_export(self, page):
        page.locator('input[type="file"]').set_input_files(str(DEMO))
        page.get_by_text(f"Using {DEMO.name}").first.wait_for()
        settle(page)
        assert metric_value(page, "Orders") == f"{read_orders(DEMO).audit()['orders']:,}"
        no_exception_shown(page)

    def test_forecasts_page_and_csv_download(self, page, tmp_path):
        open_page(page, "Forecasts")
        support.drawn_chart(page)
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
        open_page(page, "Accuracy check")
        page.get_by_text("On your data").first.wait_for()
        support.drawn_chart(page)
        no_exception_shown(page)
        shoot(page, "accuracy")

    def test_value_tiers_page(self, page):
        open_page(page, "Value tiers")
        page.get_by_text("are expected to bring in").first.wait_for()
        support.drawn_chart(page)
        no_exception_shown(page)
        shoot(page, "value_tiers")

    def test_revenue_outlook_page(self, page):
        open_page(page, "Revenue outlook")
        support.drawn_chart(page, 1)
        ask_for_the_check_of_the_past(page)
        page.get_by_text("they actually spent").first.wait_for()
        support.drawn_chart(page, 3)
        no_exception_shown(page)
        shoot(page, "revenue_outlook")


# ---------------------------------------------------------------------------
# 60,000 customers


BIG_CUSTOMERS = 60_000


def big_export(path: Path, *, customers: int = BIG_CUSTOMERS, seed: int = 60) -> Path:
    """A plant shop's export with ``customers`` customers, one row per order (about 2.5 orders each).

    Spend levels lognormal around $45 (log spread 0.5 between customers, 0.45 between one
    customer's orders), order counts geometric, dates over two years: a quick stand-in for
    bench/big_shop.py's export, small enough to read in seconds.
    """
    rng = np.random.default_rng(seed)
    counts = rng.geometric(0.4, customers)
    who = np.repeat(np.arange(customers), counts)
    level = rng.lognormal(np.log(45.0), 0.5, customers)
    amount = np.round(rng.lognormal(np.log(level[who]), 0.45), 2).clip(0.5)
    day = np.datetime64("2024-11-01") + rng.integers(0, 730, len(who)).astype("timedelta64[D]")
    pd.DataFrame({"Order Number": [f"FH-{100001 + i}" for i in range(len(who))],
                  "Order Date": day.astype(str),
                  "Customer": [f"C-{c + 1:05d}" for c in who],
                  "Total": amount}).to_csv(path, index=False)
    return path


@pytest.fixture(scope="module")
def big_page(server, browser, tmp_path_factory):
    path = big_export(tmp_path_factory.mktemp("big") / "plant_shop_60k_customers.csv")
    context = browser.new_context(viewport={"width": 1400, "height": 1000}, accept_downloads=True)
    tab = context.new_page()
    tab.set_default_timeout(300_000)
    tab.goto(server)
    settle(tab)
    tab.locator('input[type="file"]').set_input_files(str(path))
    tab.get_by_text(f"Using {path.name}").first.wait_for()
    settle(tab)
    yield tab, path
    context.close()


class TestSixtyThousandCustomers:
    def test_upload_accounts_for_every_customer(self, big_page):
        tab, path = big_page
        audit = read_orders(path).audit()
        assert audit["customers"] == BIG_CUSTOMERS
        assert metric_value(tab, "Customers") == f"{BIG_CUSTOMERS:,}"
        assert metric_value(tab, "Orders") == f"{audit['orders']:,}"
        no_exception_shown(tab)

    def test_forecasts_page_draws_a_fixed_number_of_shapes(self, big_page):
        tab, _ = big_page
        open_page(tab, "Forecasts")
        chart = support.drawn_chart(tab)
        no_exception_shown(tab)
        assert metric_value(tab, "Customers") == f"{BIG_CUSTOMERS:,}"
        # The grid of customers per cell is drawn on one canvas: no shape per customer in the page.
        assert chart.locator("canvas.marks").count() == 1
        assert chart.locator("svg.marks, path, circle").count() == 0
        tab.get_by_text(f"Customers 1 to 50 of {BIG_CUSTOMERS:,}").first.wait_for()
        shoot(tab, "forecasts_60k")

    def test_search_answers_with_a_page_of_matches(self, big_page):
        tab, _ = big_page
        box = tab.get_by_role("textbox", name="Find a customer")
        box.fill("C-04711")
        box.press("Enter")
        tab.get_by_text(f"1 of {BIG_CUSTOMERS:,} customers match 'C-04711'").first.wait_for()
        settle(tab)
        tab.get_by_text("C-04711.", exact=False).first.wait_for()  # the customer explained beside the chart
        box.fill("C-047")
        box.press("Enter")
        tab.get_by_text(f"100 of {BIG_CUSTOMERS:,} customers match 'C-047'").first.wait_for()
        settle(tab)
        no_exception_shown(tab)

    def test_excel_of_every_customer_is_made_on_request(self, big_page, tmp_path):
        tab, path = big_page
        tab.get_by_role("button", name="Download all forecasts (Excel): prepare the file").click()
        tab.get_by_role("button", name="Download all forecasts (Excel)", exact=True).wait_for()
        settle(tab)
        with tab.expect_download() as waiting:
            tab.get_by_role("button", name="Download all forecasts (Excel)", exact=True).click()
        target = tmp_path / waiting.value.suggested_filename
        waiting.value.save_as(target)
        sheet = openpyxl.load_workbook(target, read_only=True).active
        rows = sheet.iter_rows(values_only=True)
        assert list(next(rows)) == [HEADINGS[c] for c in forecasts_module.FORECAST_COLUMNS]
        assert sum(1 for _ in rows) == BIG_CUSTOMERS
