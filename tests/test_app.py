"""The dashboard, driven through Streamlit's AppTest: every page runs, and the numbers shown are the library's.

The reference for every number on screen is the library called directly
(``read_orders``, ``forecast_customers``, ``evaluate_methods``, ``project_revenue``); the
wording helpers are checked by their doctests and against the library's own errors; the
Excel download is read back with openpyxl (ECMA-376: frozen panes, number formats).
"""

from __future__ import annotations

import csv
import doctest
import io
import json
import re
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pytest
from streamlit.testing.v1 import AppTest

from dashboard import charts, layout, outlook_charts, state, words
from forecasting import OrderDataError, customer_statistics, read_orders
from forecasting import evaluation as evaluation_module
from forecasting import forecasts as forecasts_module
from forecasting import outlook as outlook_module
from forecasting.exports import HEADINGS, pseudonymise
from forecasting.reading import NOTES, REASONS
from forecasting.options import low_confidence

ROOT = Path(__file__).resolve().parent.parent
APP = ROOT / "app.py"
DEMO = ROOT / "demo_data" / "plant_shop_orders.csv"
MESSY = ROOT / "demo_data" / "messy_orders.csv"
PAGES = ["pages/load_orders.py", "pages/forecasts.py", "pages/accuracy.py", "pages/value_tiers.py",
         "pages/revenue_outlook.py"]
CORPUS = ROOT / "tests" / "corpus" / "exports"
PAGE_FILES = {"load": "load_orders.py", "forecasts": "forecasts.py", "accuracy": "accuracy.py",
              "tiers": "value_tiers.py", "outlook": "revenue_outlook.py"}
# The widget of each library option (its key on the page).
WIDGET_KEYS = {"currency": "opt_currency", "date_order": "opt_date_order", "decimal": "opt_decimal",
               "header_row": "opt_header_row", "keep_unpaid": "opt_keep_unpaid",
               "keep_implausible": "opt_keep_implausible", "method": "method", "variance": "variance",
               "horizon": "horizon", "by": "cohort_by", "rank": "tier_rank", "shares": "tier_split"}
# A command-line flag: two dashes and a letter (as in --decimal); plain dashes in prose do not match.
FLAG = re.compile(r"--[a-z]")
SECRET = "fernhollow-secret"
# Every customer id of the demo export: "C-" and five digits, and the shop's test account.
REAL_ID = re.compile(r"C-\d{5}|C-TEST")


def new_app() -> AppTest:
    at = AppTest.from_file(str(APP), default_timeout=120)
    at.run()
    assert not at.exception, at.exception
    return at


def metric(at: AppTest, label: str) -> int:
    """The whole number shown by the metric with this label."""
    for element in at.metric:
        if element.label == label:
            return int(element.value.replace(",", ""))
    raise AssertionError(f"no metric labelled {label!r}; have {[m.label for m in at.metric]}")


def table_with(at: AppTest, column: str) -> pd.DataFrame:
    for element in at.dataframe:
        if column in element.value.columns:
            return element.value
    raise AssertionError(f"no table with a {column!r} column")


def upload(at: AppTest, name: str, data: bytes) -> AppTest:
    at.switch_page("pages/load_orders.py").run()
    at.file_uploader(key="upload").set_value((name, data, "text/csv")).run()
    assert not at.exception, at.exception
    return at


def widget_label(at: AppTest, key: str) -> str:
    """The label of the widget with this key, whatever its kind."""
    for kind in ("selectbox", "text_input", "number_input", "checkbox"):
        for widget in at.get(kind):
            if widget.key == key:
                return widget.label
    raise AssertionError(f"no widget with the key {key!r}")


def errors(at: AppTest) -> list[str]:
    return [element.value for element in at.error]


def page_text(at: AppTest) -> str:
    """Everything the page sends to the browser, as text: labels, help, captions, markdown, table cells."""
    parts = []

    def walk(node):
        proto = getattr(node, "proto", None)
        if proto is not None:
            parts.append(str(proto))
        children = getattr(node, "children", None)
        for child in (children.values() if isinstance(children, dict) else children or []):
            walk(child)

    walk(at._tree)
    for element in at.dataframe:
        parts.append(element.value.to_csv())
    return "\n".join(parts)


def open_forecasts(at: AppTest) -> AppTest:
    at.switch_page("pages/forecasts.py").run()
    assert not at.exception, at.exception
    return at


def find(at: AppTest, text: str) -> AppTest:
    at.text_input(key="search").input(text).run()
    assert not at.exception, at.exception
    return at


def turn_pseudonyms_on(at: AppTest, page: str, phrase: str = SECRET) -> AppTest:
    at.text_input(key=f"pseudonym_phrase_{page}").input(phrase)
    at.button(key=f"pseudonyms_on_{page}").click().run()
    assert not at.exception, at.exception
    return at


def chart_specs(at: AppTest) -> list[dict]:
    """Every Vega-Lite chart on the page, as the spec the browser draws.

    Streamlit sends a spec's top-level ``data.values`` apart from the spec, as an Arrow table;
    they are put back inline here, so a test sees everything the chart carries.
    """
    from streamlit.dataframe_util import convert_arrow_bytes_to_pandas_df

    specs = []
    for chart in at.get("vega_lite_chart"):
        spec = json.loads(chart.proto.spec)
        if chart.proto.data.data:
            spec["data"] = {"values": convert_arrow_bytes_to_pandas_df(chart.proto.data.data).to_dict("records")}
        specs.append(spec)
    return specs


def layers_of(spec: dict) -> list[dict]:
    """A chart's layers, nested ones too, each with the data it draws (its own or its parent's)."""
    found = []

    def walk(node: dict, data: dict | None) -> None:
        data = node.get("data", data)
        if "mark" in node:
            found.append({**node, "data": data})
        for child in node.get("layer", []):
            walk(child, data)

    walk(spec, None)
    return found


def mark_of(layer: dict) -> str:
    return layer["mark"] if isinstance(layer["mark"], str) else layer["mark"]["type"]


def sentence_of(at: AppTest, name: str) -> str:
    return next(m.value for m in at.markdown if m.value.startswith(f"**{name}.**"))


@pytest.fixture(scope="module")
def demo():
    result = read_orders(DEMO)
    return result, customer_statistics(result.orders)


@pytest.fixture(scope="module")
def demo_dataset():
    return state.Dataset.from_bytes(DEMO.read_bytes(), DEMO.name, demo=True)


@pytest.fixture(scope="module")
def automatic(demo):
    """The automatic forecasts and the method and spread model they settled on."""
    result, stats = demo
    table = forecasts_module.forecast_customers(stats, method="auto", orders=result.orders)
    return table, str(table["method"].iloc[0]), str(table["variance"].iloc[0])


class TestEveryPage:
    def test_first_open_loads_the_demo_shop_with_a_note(self, demo):
        at = new_app()
        note = next(info.value for info in at.info if "demo shop's orders are already loaded" in info.value)
        assert "refreshing the page starts over" in note
        assert metric(at, "Rows used") == demo[0].audit()["rows_used"]

    @pytest.mark.parametrize("page", PAGES)
    def test_page_runs_without_exception_and_carries_the_caution(self, page):
        at = new_app()
        at.switch_page(page).run()
        assert not at.exception, at.exception
        assert not errors(at)
        assert any("not guarantees" in caption.value for caption in at.caption)
        assert any("stays on this computer" in caption.value for caption in at.caption)

    @pytest.mark.parametrize("page", PAGES)
    def test_no_command_line_flag_on_any_page(self, page):
        # Labels, help texts, captions, messages and table cells: the demo shop, then the messy export.
        at = new_app()
        at.switch_page(page).run()
        assert not FLAG.search(page_text(at)), FLAG.search(page_text(at))
        upload(at, MESSY.name, MESSY.read_bytes())
        at.switch_page(page).run()
        text = page_text(at)
        assert not FLAG.search(text), text[max(0, FLAG.search(text).start() - 200):][:400] if FLAG.search(text) else ""

    def test_upload_limit_is_the_configured_one(self):
        # .streamlit/config.toml is the reference for the limit stated on the page.
        config = (ROOT / ".streamlit" / "config.toml").read_text()
        limit = re.search(r"maxUploadSize\s*=\s*(\d+)", config).group(1)
        at = new_app()
        assert f"up to {limit} MB" in at.file_uploader(key="upload").label


class TestLoadOrders:
    def test_row_account_is_the_readers(self, demo):
        audit = demo[0].audit()
        at = new_app()
        assert metric(at, "Rows read") == audit["rows_read"]
        assert metric(at, "Rows left out") == audit["rows_excluded"]
        assert metric(at, "Orders") == audit["orders"]
        assert metric(at, "Customers") == audit["customers"]
        reasons = table_with(at, "Why the rows were left out")
        assert reasons["Rows"].sum() == audit["rows_excluded"]
        left_out = table_with(at, "reason")
        assert left_out["row"].tolist() == demo[0].excluded["row"].head(1000).tolist()

    def test_guessed_mapping_is_shown_in_the_boxes(self, demo):
        at = new_app()
        for role, column in demo[0].mapping.as_dict().items():
            assert at.selectbox(key=f"map_{role}").value == (column or "")

    def test_upload_of_the_messy_export(self):
        data = MESSY.read_bytes()
        audit = read_orders(data, file_name=MESSY.name).audit()
        at = upload(new_app(), MESSY.name, data)
        assert not errors(at)
        assert metric(at, "Rows used") == audit["rows_used"]
        assert metric(at, "Orders") == audit["orders"] == 32  # demo_data/README.md: 32 orders from 9 customers
        assert metric(at, "Customers") == audit["customers"] == 9
        # The row that did not split into fields shows its text, and empty cells rather than "None".
        left_out = table_with(at, "reason")
        split_failed = left_out[left_out["raw_text"] != ""]
        assert len(split_failed) == audit["excluded"]["malformed_row"]
        assert not left_out.isna().any().any()

    def test_an_upload_says_a_refresh_starts_over(self):
        at = upload(new_app(), MESSY.name, MESSY.read_bytes())
        using = next(s.value for s in at.success if f"Using **{MESSY.name}**" in s.value)
        assert layout.SESSION_NOTE in using
        assert "refreshing the page" in layout.SESSION_NOTE and "starts over with the demo shop" in layout.SESSION_NOTE

    def test_messy_export_shows_euros(self):
        at = upload(new_app(), MESSY.name, MESSY.read_bytes())
        open_forecasts(at)
        sentence = next(m.value for m in at.markdown if m.value.startswith("**") and "averaging" in m.value)
        assert "averaging €" in sentence  # demo_data/README.md: amounts like 1.234,50 €

    @pytest.mark.parametrize("kind", ["xlsx", "parquet"])
    def test_workbook_and_parquet_uploads(self, demo, kind):
        orders = demo[0].orders.head(300)
        table = pd.DataFrame({"Customer": orders["customer"], "Order Date": orders["order_date"],
                              "Total": orders["order_value"], "Order Number": orders["order_id"]})
        buffer = io.BytesIO()
        table.to_excel(buffer, index=False) if kind == "xlsx" else table.to_parquet(buffer, index=False)
        data = buffer.getvalue()
        audit = read_orders(data, file_name=f"orders.{kind}").audit()
        at = upload(new_app(), f"orders.{kind}", data)
        assert not errors(at)
        assert metric(at, "Rows used") == audit["rows_used"] == 300
        assert metric(at, "Customers") == audit["customers"]

    def test_currency_comes_from_the_data_not_the_bytes(self, demo):
        # A pound-sterling workbook: the currency column says GBP (one cancelled order among the rows), and no
        # amount carries a mark.
        orders = demo[0].orders.head(200)
        table = pd.DataFrame({"Customer": orders["customer"], "Order Date": orders["order_date"],
                              "Total": orders["order_value"], "Currency": "GBP",
                              "Status": ["cancelled"] + ["paid"] * (len(orders) - 1)})
        buffer = io.BytesIO()
        table.to_excel(buffer, index=False)
        at = upload(new_app(), "pounds.xlsx", buffer.getvalue())
        open_forecasts(at)
        sentence = next(m.value for m in at.markdown if m.value.startswith("**") and "averaging" in m.value)
        assert "averaging £" in sentence and "$" not in sentence
        # Without a currency column or marks, no sign is made up; the reading options can set one.
        table = table.drop(columns="Currency")
        buffer = io.BytesIO()
        table.to_excel(buffer, index=False)
        dataset = state.Dataset.from_bytes(buffer.getvalue(), "plain.xlsx")
        assert state.currency_code(dataset) == ""
        at = upload(new_app(), "plain.xlsx", buffer.getvalue())
        at.selectbox(key="shown_currency").set_value("GBP").run()
        open_forecasts(at)
        sentence = next(m.value for m in at.markdown if m.value.startswith("**") and "averaging" in m.value)
        assert "averaging £" in sentence

    @pytest.mark.parametrize("kept, code", [("EUR", "EUR"), ("C$", "CAD"), ("gbp", "GBP")])
    def test_currency_kept_is_the_currency_shown(self, kept, code):
        # forecasting.io.rules.CURRENCY_SYMBOLS: "C$" is the Canadian dollar, not the US one.
        dataset = state.Dataset.from_bytes(b"customer,date,amount\nA,2025-01-01,10\n", "f.csv")
        assert state.currency_code(dataset.with_options(currency=kept)) == code

    def test_currency_is_found_without_reading_the_file_again(self, monkeypatch):
        # The reader's result answers: the rows left out carry their cells (here a cancelled order in CHF, and
        # a test order with a franc mark beside its amount).
        with_column = (b"customer,date,amount,currency,status\nK1,2025-01-02,10,CHF,cancelled\n"
                       b"K1,2025-01-03,12,CHF,paid\nK2,2025-01-04,14,CHF,paid\n")
        with_marks = "customer,date,amount,status\nK1,2025-01-02,£10.00,test\nK1,2025-01-03,£12.00,paid\n".encode()
        first = state.Dataset.from_bytes(with_column, "francs.csv")
        second = state.Dataset.from_bytes(with_marks, "pounds.csv")
        for dataset in (first, second):
            assert state.read_dataset(dataset).ok
        monkeypatch.setattr(state.reading, "read_cells", lambda *a, **k: pytest.fail("the file was read again"))
        monkeypatch.setattr(state.reading, "load_raw", lambda *a, **k: pytest.fail("the file was read again"))
        assert state.currency_code(first) == "CHF"
        assert state.currency_code(second) == "GBP"

    def test_changing_a_column_box_reads_again(self, demo):
        at = new_app()
        at.selectbox(key="map_order_id").set_value("").run()
        assert not at.exception
        expected = read_orders(DEMO, order_id="").audit()
        assert expected["orders"] != demo[0].audit()["orders"]
        assert metric(at, "Orders") == expected["orders"]

    def test_a_file_fixed_through_the_column_boxes(self):
        data = b"who,when,how much\nA,2025-01-01,10\nA,2025-02-01,20\nB,2025-01-03,5\nB,2025-03-01,7\n"
        at = upload(new_app(), "odd.csv", data)
        assert any("odd.csv cannot be used yet" in text for text in errors(at))
        for role, column in (("customer", "who"), ("date", "when"), ("value", "how much")):
            at.selectbox(key=f"map_{role}").set_value(column).run()
            assert not at.exception
        assert not errors(at)
        audit = read_orders(data, file_name="odd.csv", customer="who", date="when", value="how much").audit()
        assert metric(at, "Orders") == audit["orders"] == 4
        assert metric(at, "Customers") == audit["customers"] == 2

    def test_bad_upload_keeps_the_data_loaded_before(self, demo):
        at = upload(new_app(), "broken.csv", b"\x00\x01\x02 not a table \x00")
        shown = errors(at)
        assert shown and "broken.csv cannot be used yet" in shown[0]
        assert "Traceback" not in shown[0]
        assert metric(at, "Rows used") == demo[0].audit()["rows_used"]
        open_forecasts(at)
        assert any("could not be used yet" in warning.value for warning in at.warning)
        assert metric(at, "Customers") == len(demo[1])

    def test_forgetting_the_bad_file(self):
        at = upload(new_app(), "broken.csv", b"\x00\x01\x02")
        at.button(key="drop_pending").click().run()
        assert not at.exception
        assert not errors(at)

    def test_back_to_the_demo_shop(self, demo):
        at = upload(new_app(), MESSY.name, MESSY.read_bytes())
        at.button(key="use_demo").click().run()
        assert metric(at, "Rows used") == demo[0].audit()["rows_used"]

    def test_reading_option_gives_the_readers_message(self, demo):
        at = new_app()
        at.text_input(key="opt_currency").input("EUR").run()
        assert not at.exception
        with pytest.raises(OrderDataError) as expected:
            read_orders(DEMO, currency="EUR")
        shown = errors(at)
        assert shown and expected.value.problem[:30].lower() in shown[0].lower()
        assert metric(at, "Rows used") == demo[0].audit()["rows_used"]

    def test_date_order_option_matches_the_reader(self):
        data = MESSY.read_bytes()
        at = upload(new_app(), MESSY.name, data)
        at.selectbox(key="opt_date_order").set_value("month-first").run()
        assert not at.exception
        try:
            audit = read_orders(data, file_name=MESSY.name, date_order="month-first").audit()
        except OrderDataError as problem:
            assert any(problem.problem[:30].lower() in text.lower() for text in errors(at))
        else:
            assert metric(at, "Rows used") == audit["rows_used"]

    def test_rows_left_out_with_pseudonyms_on(self, demo):
        at = turn_pseudonyms_on(new_app(), "load")
        left_out = table_with(at, "reason")
        mapping = demo[0].mapping
        assert "raw_text" not in left_out.columns and "Product" not in left_out.columns
        ids = left_out[mapping.customer]
        assert not ids.str.fullmatch(r"C-\d{5}|C-TEST").any()
        assert ids[ids != ""].str.startswith("cust-").all()
        cleaned = table_with(at, HEADINGS["order_date"])
        assert cleaned[HEADINGS["customer"]].str.startswith("cust-").all()


def upload_corpus(name: str) -> AppTest:
    """One of the messy exports of tests/corpus (written by make_corpus.py, with what each row should become)."""
    return upload(new_app(), name, (CORPUS / name).read_bytes())


class TestReadingOptions:
    """The reader's options as controls on Load orders, each checked against read_orders with the same option."""

    def test_header_row_box(self):
        # Title lines above the headings: found by itself, or given; a wrong row is refused naming the box.
        data = (CORPUS / "title_lines.csv").read_bytes()
        at = upload_corpus("title_lines.csv")
        assert at.number_input(key="opt_header_row").value is None  # empty: the reader finds it
        assert metric(at, "Orders") == read_orders(data, file_name="title_lines.csv").audit()["orders"]
        at.number_input(key="opt_header_row").set_value(2).run()
        shown = errors(at)
        assert shown and f"'{words.CONTROL_LABELS['header_row']}' under {words.READING_OPTIONS}" in shown[0]
        assert not FLAG.search(shown[0])
        at.number_input(key="opt_header_row").set_value(4).run()
        assert not errors(at)
        expected = read_orders(data, file_name="title_lines.csv", header_row=4).audit()
        assert metric(at, "Rows read") == expected["rows_read"] and metric(at, "Orders") == expected["orders"]

    def test_keep_unpaid_box(self):
        data = (CORPUS / "platform_statuses.csv").read_bytes()
        at = upload_corpus("platform_statuses.csv")
        left_out = read_orders(data, file_name="platform_statuses.csv").audit()
        assert metric(at, "Orders") == left_out["orders"]
        at.checkbox(key="opt_keep_unpaid").check().run()
        kept = read_orders(data, file_name="platform_statuses.csv", keep_unpaid=True).audit()
        assert kept["orders"] > left_out["orders"]
        assert metric(at, "Orders") == kept["orders"] and metric(at, "Rows used") == kept["rows_used"]
        noted = table_with(at, "What was noted")
        assert noted["Rows"].tolist() == list(kept["noted"].values())

    def test_implausible_rows_first_and_the_box_that_keeps_them(self):
        data = (CORPUS / "typo_thousands_of_times.csv").read_bytes()
        result = read_orders(data, file_name="typo_thousands_of_times.csv")
        implausible = result.audit()["excluded"]["implausible_amount"]
        at = upload_corpus("typo_thousands_of_times.csv")
        warning = next(w.value for w in at.warning if "Check these rows first" in w.value)
        assert f"{implausible:,} rows" in warning and words.CONTROL_LABELS["keep_implausible"] in warning
        reasons = table_with(at, "Why the rows were left out")
        assert reasons["Why the rows were left out"].iloc[0] == REASONS["implausible_amount"]
        left_out = table_with(at, "reason")
        assert (left_out["reason"].head(implausible) == REASONS["implausible_amount"]).all()
        at.checkbox(key="opt_keep_implausible").check().run()
        kept = read_orders(data, file_name="typo_thousands_of_times.csv", keep_implausible=True).audit()
        assert metric(at, "Rows used") == kept["rows_used"] == result.audit()["rows_used"] + implausible
        assert not any("Check these rows first" in w.value for w in at.warning)

    def test_statuses_the_reader_does_not_know(self):
        # tests/corpus/expected/unknown_statuses.json: 'Awaiting pickup' on 2 rows and 'Gift' on 1, used as paid.
        at = upload_corpus("unknown_statuses.csv")
        statuses = table_with(at, "Status as written")
        assert dict(zip(statuses["Status as written"], statuses["Rows"])) == {"Awaiting pickup": 2, "Gift": 1}
        assert set(statuses["What was done"]) == {"used as paid orders"}
        # Said once, in the table: not again among the notes above it.
        assert not any(m.value.startswith("- Statuses the reader does not know") for m in at.markdown)

    def test_rows_used_with_a_note(self):
        # Merged e-mail ids: the same address with capitals, and with a zero-width space.
        data = (CORPUS / "email_ids_written_otherwise.csv").read_bytes()
        result = read_orders(data, file_name="email_ids_written_otherwise.csv")
        at = upload_corpus("email_ids_written_otherwise.csv")
        kinds = table_with(at, "What was noted")
        assert kinds["What was noted"].tolist() == [NOTES[code] for code in result.audit()["noted"]]
        assert kinds["Rows"].tolist() == list(result.audit()["noted"].values())
        rows = table_with(at, "note")
        assert rows["row"].tolist() == result.noted["row"].tolist()
        assert "merged_customer_id" in result.audit()["noted"]

    def test_orders_on_another_sheet(self):
        name = "excel_orders_on_another_sheet.xlsx"
        data = (CORPUS / name).read_bytes()
        with pytest.raises(OrderDataError) as refused:
            read_orders(data, file_name=name)
        at = upload_corpus(name)
        shown = errors(at)
        assert shown and f"the '{words.CONTROL_LABELS['sheet']}' box under {words.READING_OPTIONS}" in shown[0]
        assert "'Summary'" in shown[0] and "'Orders'" in shown[0]
        assert refused.value.option == "sheet"
        box = at.selectbox(key="opt_sheet")
        assert box.label == words.CONTROL_LABELS["sheet"] and "Orders" in box.options
        box.set_value("Orders").run()
        assert not errors(at)
        assert metric(at, "Orders") == read_orders(data, file_name=name, sheet="Orders").audit()["orders"]

    @pytest.mark.parametrize("option", ["header_row", "keep_unpaid", "keep_implausible", "sheet"])
    def test_every_reading_option_names_its_control(self, option):
        problem = OrderDataError("something to change", fix="Change it", option=option)
        on_load = state.worded(state.problem_fields(problem), here="load")
        assert f"'{words.CONTROL_LABELS[option]}'" in on_load and f"under {words.READING_OPTIONS}" in on_load
        assert "on the Load orders page" in state.worded(state.problem_fields(problem), here="outlook")

    def test_options_are_the_readers_keyword_arguments(self):
        dataset = state.Dataset.from_bytes(b"x", "f.xlsx").with_options(sheet="Orders", header_row=3,
                                                                        keep_unpaid=True, keep_implausible=True)
        options = dataset.read_options()
        assert options == {"sheet": "Orders", "header_row": 3, "keep_unpaid": True, "keep_implausible": True}
        import inspect

        assert set(options) <= set(inspect.signature(read_orders).parameters)
        assert dataset.cache_key != state.Dataset.from_bytes(b"x", "f.xlsx").cache_key


class TestForecasts:
    def test_table_is_the_librarys_automatic_forecast(self, demo, automatic):
        expected = automatic[0].sort_values("expected_next_order", ascending=False, kind="stable")
        at = open_forecasts(new_app())
        shown = table_with(at, "expected_next_order")
        assert len(shown) == 50 and metric(at, "Customers") == len(demo[1])
        assert shown["customer"].tolist() == expected["customer"].head(50).tolist()
        np.testing.assert_allclose(shown["expected_next_order"], expected["expected_next_order"].head(50), rtol=1e-12)
        np.testing.assert_allclose(shown["own_history_weight"], expected["own_history_weight"].head(50), rtol=1e-12)

    def test_pages_of_customers(self, automatic):
        expected = automatic[0].sort_values("orders", ascending=False, kind="stable")
        at = open_forecasts(new_app())
        at.selectbox(key="forecast_sort").set_value("orders").run()
        at.number_input(key="forecast_page").set_value(3).run()
        shown = table_with(at, "expected_next_order")
        assert shown["customer"].tolist() == expected["customer"].iloc[100:150].tolist()
        assert at.number_input(key="forecast_page").max == -(-len(expected) // 50)

    def test_low_confidence_agrees_with_the_weight_shown(self, automatic):
        table = automatic[0]
        at = open_forecasts(new_app())
        assert metric(at, "Low confidence") == int((table["own_history_weight"] < 0.5).sum())
        shown = table_with(at, "expected_next_order")
        assert shown["low_confidence"].tolist() == (shown["own_history_weight"] < 0.5).tolist()

    def test_method_and_spread_model_by_key(self, demo):
        result, stats = demo
        at = open_forecasts(new_app())
        at.selectbox(key="method").set_value("james-stein").run()
        at.selectbox(key="variance").set_value("classic").run()
        assert not at.exception
        expected = forecasts_module.forecast_customers(stats, method="james-stein", variance="classic",
                                                       orders=result.orders)
        expected = expected.sort_values("expected_next_order", ascending=False, kind="stable").head(50)
        shown = table_with(at, "expected_next_order")
        np.testing.assert_allclose(shown["expected_next_order"], expected["expected_next_order"], rtol=1e-12)
        assert set(shown["method"]) == {"james-stein"}

    def test_automatic_method_for_a_chosen_spread_model(self, demo):
        result, stats = demo
        chosen = evaluation_module.choose_method(result.orders, stats, variances=["classic"])
        expected = forecasts_module.forecast_customers(stats, method=chosen["method"], variance="classic",
                                                       orders=result.orders)
        at = open_forecasts(new_app())
        at.selectbox(key="variance").set_value("classic").run()
        shown = table_with(at, "expected_next_order")
        top = expected.sort_values("expected_next_order", ascending=False, kind="stable").head(50)
        np.testing.assert_allclose(shown["expected_next_order"], top["expected_next_order"], rtol=1e-12)

    def test_choice_survives_a_visit_to_another_page(self):
        at = open_forecasts(new_app())
        at.selectbox(key="method").set_value("empirical-bayes").run()
        at.switch_page("pages/load_orders.py").run()
        open_forecasts(at)
        assert at.selectbox(key="method").value == "empirical-bayes"
        assert set(table_with(at, "expected_next_order")["method"]) == {"empirical-bayes"}

    def test_search_finds_on_the_server(self, demo):
        at = find(open_forecasts(new_app()), "c-0001")
        shown = table_with(at, "expected_next_order")
        expected = [c for c in demo[1].index if "c-0001" in c.lower()]
        assert sorted(shown["customer"]) == sorted(expected) and len(expected) > 0
        assert any(f"{len(expected)} of {len(demo[1]):,} customers match 'c-0001'" in c.value for c in at.caption)
        # The customer to explain is picked among the matches, not from every customer.
        assert sorted(at.selectbox(key="customer").options) == sorted(expected)

    def test_one_customer_explained(self, demo):
        result, stats = demo
        name = stats.index[stats["orders"] == 2][0]
        at = find(open_forecasts(new_app()), name)
        at.selectbox(key="customer").set_value(name).run()
        assert not at.exception
        table = table_with(at, "expected_next_order")
        row = table[table["customer"] == name].iloc[0]
        sentence = sentence_of(at, name)
        assert f"With 2 orders averaging {words.money(stats.loc[name, 'mean'])}" in sentence
        assert words.money(row["expected_next_order"]) in sentence
        assert f"{1 - row['own_history_weight']:.0%}" in sentence
        orders = table_with(at, "order_value")
        assert sorted(orders["order_value"]) == sorted(result.orders.loc[result.orders["customer"] == name,
                                                                         "order_value"])

    def test_money_centre_read_back_from_a_row(self, demo):
        # On the money scale the forecast is w * own average + (1 - w) * centre (forecasting/shrinkage.py).
        result, stats = demo
        table = forecasts_module.forecast_customers(stats, method="mta", variance="classic", orders=result.orders)
        w = table["own_history_weight"].to_numpy()
        keep = w < 0.98
        centre = (table["expected_next_order"] - w * table["average_order_value"]).to_numpy()[keep] / (1 - w[keep])
        np.testing.assert_allclose(centre, table.attrs["fit"]["centre"], rtol=1e-9)

    def test_log_model_never_names_a_value_the_forecast_moved_away_from(self, demo):
        result, stats = demo
        table = forecasts_module.forecast_customers(stats, method="mta", variance="log", orders=result.orders)
        centre = table.attrs["fit"]["centre"]
        outside = 0
        for row in table.itertuples():
            sentence = words.forecast_sentence(orders=row.orders, average=row.average_order_value,
                                               forecast=row.expected_next_order, own_weight=row.own_history_weight,
                                               centre=centre, log_scale=True)
            between = (min(row.average_order_value, centre) - 0.005 <= row.expected_next_order
                       <= max(row.average_order_value, centre) + 0.005)
            outside += not between
            assert (f"({words.money(centre)})" in sentence) == (between and row.own_history_weight < 0.995)
        assert outside > 0  # the demo has such customers: the case is really met

    def test_own_averages_pull_toward_nothing(self):
        at = open_forecasts(new_app())
        at.selectbox(key="method").set_value("plain").run()
        sentence = next(m.value for m in at.markdown if m.value.startswith("**") and "averaging" in m.value)
        assert "own orders alone" in sentence and "similar customers" not in sentence
        assert "centre" not in table_with(at, "what it is")["number"].tolist()

    def test_a_range_that_does_not_open_is_not_called_one(self):
        # The shop-wide average gives every customer one figure; its ranges carry the spread between
        # customers, and no sentence says "between $75.96 and $75.96".
        at = open_forecasts(new_app())
        at.selectbox(key="method").set_value("pooled").run()
        text = page_text(at)
        assert not re.search(r"between (\$[\d,.]+) and \1\b", text)
        sentence = next(m.value for m in at.markdown if m.value.startswith("**") and "averaging" in m.value)
        assert "rests entirely on what similar customers spend" in sentence

    def test_gamma_gamma_is_not_called_a_spread_model(self):
        at = open_forecasts(new_app())
        at.selectbox(key="method").set_value("gamma-gamma").run()
        assert not at.exception
        assert "Gamma-Gamma spread model" not in page_text(at)
        assert any("Gamma-Gamma spend model (it has its own spread)" in m.value for m in at.markdown)

    def test_method_problem_names_the_controls(self):
        # The messy export has no segment column, so "mta-segments" cannot run.
        at = upload(new_app(), MESSY.name, MESSY.read_bytes())
        open_forecasts(at)
        at.selectbox(key="method").set_value("mta-segments").run()
        assert not at.exception
        shown = errors(at)
        assert shown and "segment" in shown[0]

    def test_method_problem_has_no_flag(self):
        at = upload(new_app(), MESSY.name, MESSY.read_bytes())
        open_forecasts(at)
        at.selectbox(key="method").set_value("mta-segments").run()
        shown = errors(at)
        assert shown and not FLAG.search(shown[0])
        assert "the 'Segment' box on the Load orders page" in shown[0]

    def test_pseudonyms_on_every_table_and_download(self, demo, demo_dataset):
        at = open_forecasts(new_app())
        at.text_input(key="pseudonym_phrase_forecasts").input("short")
        at.button(key="pseudonyms_on_forecasts").click().run()
        assert any("at least 8 characters" in w.value for w in at.warning)
        assert not table_with(at, "expected_next_order")["customer"].str.startswith("cust-").any()

        turn_pseudonyms_on(at, "forecasts")
        assert any("Pseudonyms are on" in info.value for info in at.info)
        shown = table_with(at, "expected_next_order")
        codes = pseudonymise(pd.DataFrame({"customer": demo[1].index.astype(str)}), salt=SECRET)["customer"]
        assert shown["customer"].str.startswith("cust-").all()
        assert set(shown["customer"]) <= set(codes)
        picked = at.selectbox(key="customer")
        assert sentence_of(at, picked.format_func(picked.value)).startswith("**cust-")
        # The chart too: the ringed customer is named by code, and no real id is anywhere in its spec.
        (pull,) = chart_specs(at)
        assert not REAL_ID.search(json.dumps(pull))
        ring = [layer for layer in layers_of(pull) if mark_of(layer) == "point"]
        assert [layer["encoding"]["color"]["datum"] for layer in ring] == [picked.format_func(picked.value)]
        shared = pd.read_csv(io.StringIO(state.forecast_csv(demo_dataset, "auto", "auto", SECRET)))
        plain = state.forecasts(demo_dataset, "auto", "auto").value
        assert shared["customer"].tolist() == pseudonymise(plain, salt=SECRET)["customer"].tolist()
        # The download gives money to the cent, as the command line's file does.
        np.testing.assert_allclose(shared["expected_next_order"], plain["expected_next_order"].round(2), atol=1e-9)
        # The codes hold on the other pages too, and the search finds a customer by code or by id.
        at.switch_page("pages/value_tiers.py").run()
        assert table_with(at, "chance_active")["customer"].str.startswith("cust-").all()
        open_forecasts(at)
        real = str(demo[1].index[7])
        find(at, real)
        assert table_with(at, "expected_next_order")["customer"].tolist() == [
            pseudonymise(pd.DataFrame({"customer": [real]}), salt=SECRET)["customer"].iloc[0]]
        at.button(key="pseudonyms_off_forecasts").click().run()
        assert table_with(at, "expected_next_order")["customer"].tolist() == [real]

    def test_pseudonyms_in_the_dots_of_a_small_shop(self):
        # A shop small enough for one dot per customer: the demo export's orders of its first 300 customers.
        kept = {f"C-{number:05d}" for number in range(1, 301)}
        rows = list(csv.reader(io.StringIO(DEMO.read_text(encoding="utf-8"), newline="")))
        out = io.StringIO()
        csv.writer(out).writerows([rows[0], *(row for row in rows[1:] if len(row) > 2 and row[2] in kept)])
        small = out.getvalue().encode()
        at = open_forecasts(upload(new_app(), "small_shop.csv", small))
        (pull,) = chart_specs(at)
        (dots,) = [layer for layer in layers_of(pull) if mark_of(layer) == "circle"]
        real = [row["customer"] for row in dots["data"]["values"]]
        assert set(real) <= set(kept) and len(real) > 250  # real ids while the codes are off
        turn_pseudonyms_on(at, "forecasts")
        (pull,) = chart_specs(at)
        (dots,) = [layer for layer in layers_of(pull) if mark_of(layer) == "circle"]
        codes = pseudonymise(pd.DataFrame({"customer": real}), salt=SECRET)["customer"]
        assert sorted(row["customer"] for row in dots["data"]["values"]) == sorted(codes)
        assert not REAL_ID.search(json.dumps(pull))

    def test_excel_download_has_headings_formats_and_a_frozen_header(self, demo_dataset, automatic):
        book = openpyxl.load_workbook(io.BytesIO(state.forecast_excel(demo_dataset, "auto", "auto", "", "$")))
        sheet = book.active
        headings = [cell.value for cell in sheet[1]]
        assert headings == [HEADINGS[c] for c in forecasts_module.FORECAST_COLUMNS]
        assert sheet.freeze_panes == "A2"  # ECMA-376 pane: rows above row 2 stay in view
        second = dict(zip(forecasts_module.FORECAST_COLUMNS, sheet[2]))
        assert second["expected_next_order"].number_format == '"$"#,##0.00'
        assert second["own_history_weight"].number_format == "0.0%"
        assert second["orders"].number_format == "#,##0"
        table = automatic[0]
        assert second["customer"].value == table["customer"].iloc[0]
        assert second["expected_next_order"].value == pytest.approx(round(table["expected_next_order"].iloc[0], 2))
        assert sheet.max_row == len(table) + 1
        # The CSV keeps the names scripts rely on.
        csv = state.forecast_csv(demo_dataset, "auto", "auto")
        assert csv.splitlines()[0] == ",".join(forecasts_module.FORECAST_COLUMNS)

    def test_big_excel_is_made_on_request_with_named_progress(self, monkeypatch):
        monkeypatch.setattr(layout, "EXCEL_AT_ONCE", 100)
        monkeypatch.setattr(state, "_DONE", set())  # as on a fresh server: no workbook made yet
        at = open_forecasts(new_app())
        prepare = at.button(key="download_forecasts_xlsx_prepare")
        assert "prepare the file" in prepare.label
        prepare.click().run()
        assert not at.exception


class TestAccuracy:
    def test_verdict_follows_its_interval(self, demo):
        result, _ = demo
        found = evaluation_module.evaluate_methods(result.orders, bootstrap=200, seed=0)
        chosen = found.chosen
        row = found.backtest[(found.backtest["method"] == chosen["method"])
                             & (found.backtest["variance"] == chosen["variance"])].iloc[0]
        tone, sentence = words.verdict(row["error_reduction_pct"], low=row["ci_low"], high=row["ci_high"])
        at = new_app()
        at.switch_page("pages/accuracy.py").run()
        assert not at.exception
        boxes = {words.GOOD: at.success, words.UNSETTLED: at.warning, words.WORSE: at.error}[tone]
        assert any(box.value == f"**{sentence}**" for box in boxes)
        assert f"{row['error_reduction_pct']:.0f}%" in sentence
        # Green only when the whole interval is a gain.
        assert (tone == words.GOOD) == (row["ci_low"] > 0 and row["error_reduction_pct"] > 0)
        assert not any(box.value == f"**{sentence}**" for box in at.success) or tone == words.GOOD

    def test_short_table_and_every_result_on_request(self, demo):
        result, _ = demo
        found = evaluation_module.evaluate_methods(result.orders, bootstrap=200, seed=0)
        at = new_app()
        at.switch_page("pages/accuracy.py").run()
        short = table_with(at, "error_reduction_pct_loo")
        assert len(short) <= len(set(found.leave_one_out["method"]))
        at.toggle(key="accuracy_all").set_value(True).run()
        shown = table_with(at, "variance_name")
        assert len(shown) == len(found.leave_one_out) + len(found.backtest)

    def test_compared_charts_share_one_scale(self):
        at = new_app()
        at.switch_page("pages/accuracy.py").run()
        ranges = [layer["encoding"]["x"]["scale"]["domain"] for spec in chart_specs(at)
                  for layer in layers_of(spec)[:1] if "domain" in layer["encoding"]["x"].get("scale", {})]
        assert len(ranges) == 2 and ranges[0] == ranges[1]

    def test_follows_the_method_in_use(self, demo):
        result, _ = demo
        found = evaluation_module.evaluate_methods(result.orders, bootstrap=200, seed=0)
        row = found.backtest[(found.backtest["method"] == "james-stein")
                             & (found.backtest["variance"] == "classic")].iloc[0]
        at = open_forecasts(new_app())
        at.selectbox(key="method").set_value("james-stein").run()
        at.selectbox(key="variance").set_value("classic").run()
        at.switch_page("pages/accuracy.py").run()
        verdicts = [box.value for box in [*at.success, *at.warning, *at.error]]
        assert any(f"{row['error_reduction_pct']:.0f}%" in text for text in verdicts)
        assert any("James-Stein with the classic spread model" in m.value for m in at.markdown)

    def test_verdict_tones(self):
        assert words.verdict(14.0, low=-34.0, high=77.0)[0] == words.UNSETTLED
        assert words.verdict(14.0, low=2.0, high=30.0)[0] == words.GOOD
        assert words.verdict(14.0)[0] == words.UNSETTLED  # no interval: not called good
        assert words.verdict(-5.0, low=-9.0, high=-1.0)[0] == words.WORSE
        assert words.verdict(-5.0, low=-9.0, high=4.0)[0] == words.UNSETTLED
        assert words.verdict(float("nan"))[0] == words.UNKNOWN
        assert "by 100%" in words.verdict(100.0, low=99.0, high=100.0)[1]


class TestValueTiers:
    def test_tier_table_is_the_librarys(self, demo, automatic):
        result, _ = demo
        table, method, variance = automatic
        projection = outlook_module.project_revenue(result.orders, horizon=180, by="quarter", forecasts=table,
                                                    method=method, variance=variance)
        expected = outlook_module.tier_summary(
            outlook_module.assign_tiers(projection.customers, rank="revenue", shares=(0.1, 0.3)))
        at = new_app()
        at.switch_page("pages/value_tiers.py").run()
        assert not at.exception
        shown = table_with(at, "share_of_projected_revenue")
        assert shown["tier"].tolist() == expected["tier"].tolist()
        assert shown["customers"].tolist() == expected["customers"].tolist()
        np.testing.assert_allclose(shown["projected_revenue"], expected["projected_revenue"], rtol=1e-12)

    def test_revenue_columns_left_out_when_revenue_cannot_be_projected(self):
        # The messy export's 9 customers are too few for the order-frequency model: its tiers rank by
        # the expected next order, and the table shows no revenue column rather than revenue of 0.
        at = upload(new_app(), MESSY.name, MESSY.read_bytes())
        at.switch_page("pages/value_tiers.py").run()
        assert not at.exception
        element = next(e for e in at.dataframe if "share_of_projected_revenue" in e.value.columns)
        assert element.value["projected_revenue"].isna().all()
        shown = list(element.proto.column_order)
        assert "lowest_figure" in shown and "projected_revenue" not in shown and "revenue_pct" not in shown

    def test_rank_and_split_by_key(self, demo, automatic):
        result, _ = demo
        table, method, variance = automatic
        projection = outlook_module.project_revenue(result.orders, horizon=90, by="quarter", forecasts=table,
                                                    method=method, variance=variance)
        expected = outlook_module.assign_tiers(projection.customers, rank="value", shares=(0.05, 0.15, 0.3))
        at = new_app()
        at.switch_page("pages/value_tiers.py").run()
        at.selectbox(key="horizon").set_value(90).run()
        at.selectbox(key="tier_rank").set_value("value").run()
        at.selectbox(key="tier_split").set_value((0.05, 0.15, 0.3)).run()
        assert not at.exception
        shown = table_with(at, "share_of_projected_revenue")
        assert len(shown) == 4
        members = table_with(at, "chance_active")
        top = expected[expected["tier"] == expected.attrs["tiers"][0]["tier"]]
        assert members["customer"].tolist() == top["customer"].tolist()

    def test_tier_lists_narrowed_to_a_segment(self, demo, automatic):
        result, stats = demo
        table, method, variance = automatic
        projection = outlook_module.project_revenue(result.orders, horizon=180, by="quarter", forecasts=table,
                                                    method=method, variance=variance)
        tiered = outlook_module.assign_tiers(projection.customers, rank="revenue", shares=(0.1, 0.3))
        top = tiered.attrs["tiers"][0]["tier"]
        # A customer's segment is their latest order's (forecasting.customers.customer_statistics).
        latest = result.orders.sort_values("order_date", kind="stable").groupby("customer")["segment"].last()
        expected = tiered[(tiered["tier"] == top) & (tiered["customer"].map(latest) == "market")]
        at = new_app()
        at.switch_page("pages/value_tiers.py").run()
        assert at.selectbox(key="tier_segment").options == ["every segment", "instagram", "market", "web"]
        at.selectbox(key="tier_segment").set_value("market").run()
        assert not at.exception
        members = table_with(at, "chance_active")
        assert members["customer"].tolist() == expected["customer"].tolist()
        assert set(members["segment"]) == {"market"}
        assert any(f"{len(expected):,} of the {int((latest == 'market').sum()):,} customers of segment market"
                   in c.value for c in at.caption)
        # The tiers stay the whole shop's.
        assert table_with(at, "share_of_projected_revenue")["customers"].tolist() == \
            outlook_module.tier_summary(tiered)["customers"].tolist()

    def test_no_projection_falls_back_to_next_order_value(self):
        # Nine customers are too few for the order-frequency fit (see forecasting/frequency.py notes).
        at = upload(new_app(), MESSY.name, MESSY.read_bytes())
        at.switch_page("pages/value_tiers.py").run()
        assert not at.exception
        assert not errors(at)
        assert any("ranked by their expected next order" in w.value for w in at.warning)

    def test_one_label_for_the_own_history_weight(self):
        at = new_app()
        labels = []
        for page in ("pages/forecasts.py", "pages/value_tiers.py"):
            at.switch_page(page).run()
            labels.append(page_text(at))
        text = "\n".join(labels)
        assert "Own-history weight" not in text and "Weight on own history" not in text
        assert "shop pattern" not in text.lower()  # low confidence has one name, the Forecasts page's
        assert text.count(HEADINGS["own_history_weight"]) >= 3


# Model names and test statistics: in the outlook's details section only, never on its primary screen.
MODEL_WORDS = re.compile(r"BG/NBD|likelihood|month index|\bp [<=]|Poisson|alpha", re.IGNORECASE)


def primary_text(at: AppTest) -> str:
    """The text elements shown outside every collapsed section (markdown, captions, alerts, metrics)."""
    parts = []

    def walk(node, inside=False):
        kind = getattr(node, "type", "")
        inside = inside or kind == "expander"
        if not inside and kind in ("markdown", "caption", "error", "warning", "info", "success", "metric"):
            parts.append(str(getattr(node, "value", "")) + " " + str(getattr(node, "label", "")))
        children = getattr(node, "children", None)
        for child in (children.values() if isinstance(children, dict) else children or []):
            walk(child, inside)

    walk(at._tree)
    return "\n".join(parts)


class TestRevenueOutlook:
    def test_cohorts_are_the_librarys_and_the_past_waits_to_be_asked(self, demo, automatic):
        result, _ = demo
        table, method, variance = automatic
        projection = outlook_module.project_revenue(result.orders, horizon=180, by="quarter", forecasts=table,
                                                    method=method, variance=variance)
        at = new_app()
        at.switch_page("pages/revenue_outlook.py").run()
        assert not at.exception
        assert any(title.value == "Revenue outlook" for title in at.title)
        shown = table_with(at, "share_of_projected_revenue")
        assert shown["cohort"].tolist() == projection.cohorts["cohort"].tolist()
        np.testing.assert_allclose(shown["projected_revenue"], projection.cohorts["projected_revenue"], rtol=1e-12)
        # The check at ten earlier dates is made on request, not on a first visit.
        assert at.button(key="rolling_check").label == "Check it at ten earlier dates"
        assert "actually spent" not in " ".join(m.value for m in at.markdown)

    def test_check_at_ten_dates_on_request(self, demo):
        result, _ = demo
        checked = outlook_module.rolling_backtest(result.orders, horizon=180, by="quarter", method="auto",
                                                  variance="auto")
        at = new_app()
        at.switch_page("pages/revenue_outlook.py").run()
        at.button(key="rolling_check").click().run()
        assert not at.exception
        text = " ".join(m.value for m in at.markdown)
        summary = checked.summary
        assert (f"At {summary['cutoffs']} dates over the last year** the outlook of all revenue missed by "
                f"**{summary['mean_abs_error_pct']:.1f}%**") in text
        latest = checked.backtests[-1]
        assert f"they actually spent {words.money(latest.total['actual_revenue'])}" in text
        assert f"projected {words.money(latest.total['projected_revenue'])}" in text
        shown = table_with(at, "cutoff")
        np.testing.assert_allclose(shown["projected_revenue"], checked.table["projected_revenue"], rtol=1e-12)
        assert set(shown["frequency_model"]) <= {"BG/NBD", "MBG/NBD"}  # plain labels, not code names
        # Done once: the next run shows it without asking again.
        at.run()
        assert not [b for b in at.button if b.key == "rolling_check"]
        assert any("dates over the last year" in m.value for m in at.markdown)

    def test_primary_screen_speaks_of_customers_and_money(self, demo):
        at = new_app()
        at.switch_page("pages/revenue_outlook.py").run()
        primary = primary_text(at)
        assert "An active customer orders about" in primary and "new customers are expected" in primary
        assert not MODEL_WORDS.search(primary), MODEL_WORDS.search(primary)
        # The details section names the models, each with its line.
        details = next(e for e in at.expander if e.label.startswith("How this is worked out"))
        said = " ".join(m.value for m in details.markdown)
        assert "MBG/NBD" in said and "BG/NBD" in said and "likelihood" in said and "month index" in said
        assert words.OUTLOOK_WORDS["MBG/NBD"] in said and words.OUTLOOK_WORDS["BG/NBD"] in said

    def test_group_by_segment(self, demo, automatic):
        result, _ = demo
        table, method, variance = automatic
        projection = outlook_module.project_revenue(result.orders, horizon=180, by="segment", forecasts=table,
                                                    method=method, variance=variance)
        at = new_app()
        at.switch_page("pages/revenue_outlook.py").run()
        at.selectbox(key="cohort_by").set_value("segment").run()
        assert not at.exception
        shown = table_with(at, "share_of_projected_revenue")
        assert sorted(shown["cohort"]) == sorted(projection.cohorts["cohort"]) \
            == [outlook_module.NEW_CUSTOMERS, "instagram", "market", "web"]

    def test_too_little_history_is_a_message(self):
        at = upload(new_app(), MESSY.name, MESSY.read_bytes())
        at.switch_page("pages/revenue_outlook.py").run()
        assert not at.exception
        assert any("could not be worked out well enough" in w.value for w in at.warning)
        assert not MODEL_WORDS.search(primary_text(at))


class TestCharts:
    """The Vega-Lite specs: what each chart draws is the library's numbers, and a spec is strict JSON."""

    @staticmethod
    def layers(spec: dict, mark: str) -> list[dict]:
        return [layer for layer in layers_of(spec) if mark_of(layer) == mark]

    def test_pull_chart_dots_are_every_customer_at_average_and_forecast(self, automatic):
        table = automatic[0].head(charts.DOTS_AT_MOST)  # a small shop: one dot per customer
        spec = charts.pull_toward_centre(table, highlight=table["customer"].iloc[0])
        json.dumps(spec, allow_nan=False)  # strict JSON: no NaN reaches the browser
        (dots,) = self.layers(spec, "circle")
        rows = dots["data"]["values"]
        assert len(rows) == len(table)
        assert sorted((r["average"], r["forecast"]) for r in rows) == sorted(
            zip(table["average_order_value"], table["expected_next_order"]))
        assert sorted(r["customer"] for r in rows) == sorted(table["customer"].astype(str))
        # The tooltip's money, to the cent with the currency symbol, as on the rest of the page.
        first = next(r for r in rows if r["customer"] == str(table["customer"].iloc[0]))
        assert first["average_text"] == f"${table['average_order_value'].iloc[0]:,.2f}"
        # Both axes are log scales over one money range, ticked where money_ticks puts them.
        x, y = dots["encoding"]["x"], dots["encoding"]["y"]
        assert x["scale"]["type"] == y["scale"]["type"] == "log" and x["scale"]["domain"] == y["scale"]["domain"]
        assert x["axis"]["values"] == charts.money_ticks(*x["scale"]["domain"], "$")[0]
        (diagonal,) = self.layers(spec, "line")
        assert [r["average"] for r in diagonal["data"]["values"]] == [r["forecast"] for r in diagonal["data"]["values"]]
        # Coloured as the one definition of low confidence.
        leaning = [r for r in rows if r["group"] == "mostly from similar customers"]
        assert len(leaning) == int(low_confidence(table["own_history_weight"]).sum())
        assert spec["usermeta"]["embedOptions"]["renderer"] == "svg"

    def test_pull_chart_stays_light_for_a_big_shop(self):
        rng = np.random.default_rng(7)
        n = 60_000
        average = rng.lognormal(np.log(50), 0.6, n)
        weight = rng.uniform(0.05, 1.0, n)
        table = pd.DataFrame({"customer": [f"K{i}" for i in range(n)], "orders": rng.integers(1, 20, n),
                              "average_order_value": average,
                              "expected_next_order": weight * average + (1 - weight) * 52.0,
                              "own_history_weight": weight})
        spec = charts.pull_toward_centre(table, highlight="K123", label="K123")
        json.dumps(spec, allow_nan=False)
        assert not self.layers(spec, "circle")  # no dot per customer
        (cells,) = self.layers(spec, "rect")
        rows = cells["data"]["values"]
        assert len(rows) <= charts.GRID_CELLS ** 2
        assert sum(r["customers"] for r in rows) == n
        # Each cell's count, counted again the slow obvious way: customers whose point lies inside the cell.
        # (The grid's last row and column are closed on the upper side, as numpy.histogram2d's are.)
        for r in rows[:: max(len(rows) // 25, 1)]:
            top_x = r["average_end"] >= cells["encoding"]["x"]["scale"]["domain"][1] * (1 - 1e-12)
            top_y = r["forecast_end"] >= cells["encoding"]["y"]["scale"]["domain"][1] * (1 - 1e-12)
            inside_x = (average >= r["average"] * (1 - 1e-12)) & (
                (average <= r["average_end"]) if top_x else (average < r["average_end"] * (1 - 1e-12)))
            forecast = table["expected_next_order"].to_numpy()
            inside_y = (forecast >= r["forecast"] * (1 - 1e-12)) & (
                (forecast <= r["forecast_end"]) if top_y else (forecast < r["forecast_end"] * (1 - 1e-12)))
            assert int((inside_x & inside_y).sum()) == r["customers"]
        assert spec["usermeta"]["embedOptions"]["renderer"] == "canvas"
        (ring,) = self.layers(spec, "point")
        assert ring["encoding"]["color"]["datum"] == "K123"
        assert ring["data"]["values"][0]["average"] == pytest.approx(average[123])

    def test_method_bars_and_intervals_are_the_evaluations(self, demo):
        found = evaluation_module.evaluate_methods(demo[0].orders, bootstrap=50, seed=1)
        part = found.leave_one_out[found.leave_one_out["variance"] == "classic"]
        spec = charts.method_comparison(part, title="t", highlight="mta", x_range=charts.shared_range(part))
        json.dumps(spec, allow_nan=False)
        rows = spec["data"]["values"]
        np.testing.assert_allclose([r["reduction"] for r in rows], part["error_reduction_pct"])
        np.testing.assert_allclose([r["high"] for r in rows], part["ci_high"])
        np.testing.assert_allclose([r["low"] for r in rows], part["ci_low"])
        (bars,) = self.layers(spec, "bar")
        assert bars["encoding"]["y"]["sort"] == [words.method_label(m) for m in part["method"]]
        assert [r["colour"] == charts.PALETTE["vermilion"] for r in rows] == list(part["method"] == "mta")
        low, high = bars["encoding"]["x"]["scale"]["domain"]
        assert low <= min(0, part["ci_low"].min()) and high >= part["ci_high"].max()
        assert len(self.layers(spec, "rule")) == 2 and len(self.layers(spec, "tick")) == 2  # whiskers, zero line

    def test_a_missing_interval_draws_no_whisker_and_stays_json(self, demo):
        found = evaluation_module.evaluate_methods(demo[0].orders, bootstrap=50, seed=1)
        part = found.leave_one_out[found.leave_one_out["variance"] == "classic"].copy()
        part.loc[part.index[0], ["ci_low", "ci_high"]] = np.nan
        spec = charts.method_comparison(part, title="t")
        text = json.dumps(spec, allow_nan=False)
        assert spec["data"]["values"][0]["low"] is None and "isValid(datum.low)" in text

    def test_schedule_stacks_both_parts_under_a_running_total_on_its_own_scale(self, demo, automatic):
        table, method, variance = automatic
        projection = outlook_module.project_revenue(demo[0].orders, horizon=180, by="quarter", forecasts=table,
                                                    method=method, variance=variance)
        schedule = projection.schedule
        spec = outlook_charts.monthly_schedule(schedule, symbol="€", title="t")
        json.dumps(spec, allow_nan=False)
        assert spec["resolve"]["scale"]["y"] == "independent"
        (bars,) = self.layers(spec, "bar")
        stacked = pd.DataFrame(bars["data"]["values"]).groupby("month", sort=False)["revenue"].sum()
        np.testing.assert_allclose(stacked.to_numpy(), (schedule["projected_revenue_existing"]
                                                        + schedule["projected_revenue_new"]).to_numpy())
        (line,) = self.layers(spec, "line")
        np.testing.assert_allclose([r["total"] for r in line["data"]["values"]], schedule["cumulative_revenue"])
        assert line["data"]["values"][0]["tip"].startswith(f"{schedule['month'].iloc[0]}: €")
        assert line["encoding"]["y"]["axis"]["orient"] == "right"
        assert '"€" + format(datum.value' in line["encoding"]["y"]["axis"]["labelExpr"]

    def test_every_chart_keeps_to_the_palette_and_offers_no_outside_link(self, demo, automatic):
        table, method, variance = automatic
        projection = outlook_module.project_revenue(demo[0].orders, horizon=180, by="quarter", forecasts=table,
                                                    method=method, variance=variance)
        specs = [charts.pull_toward_centre(table), charts.tier_shares(outlook_module.tier_summary(
                     outlook_module.assign_tiers(projection.customers, rank="revenue", shares=(0.1, 0.3))), title="t"),
                 outlook_charts.group_projection(projection.cohorts, symbol="$", title="t", grouped_by="quarter"),
                 outlook_charts.monthly_schedule(projection.schedule, symbol="$", title="t")]
        allowed = set(charts.PALETTE.values()) | {charts.INK, charts.DIAGONAL, "white", "#DCEBF5"}
        for spec in specs:
            text = json.dumps(spec, allow_nan=False)
            assert not re.search(r"https?:|//", text)  # nothing for the browser to fetch or open
            assert spec["config"]["legend"]["orient"] == "top"
            colours = set(re.findall(r"#[0-9A-Fa-f]{6}\b", text)) - {charts.GRID, "#BBBBBB"}
            assert colours <= allowed, colours - allowed


class TestWords:
    @pytest.mark.parametrize("module", [words, charts])
    def test_doctests(self, module):
        failures, tried = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
        assert tried > 0 and failures == 0

    @pytest.mark.parametrize("role", list(words.ROLE_LABELS))
    def test_every_column_role_names_its_box(self, role):
        problem = OrderDataError("no column holds them", file="f.csv", fix="Choose the column", role=role)
        on_load = state.worded(state.problem_fields(problem), here="load")
        elsewhere = state.worded(state.problem_fields(problem), here="forecasts")
        assert f"the '{words.ROLE_LABELS[role]}' box under Which column is which" in on_load
        assert "on the Load orders page" in elsewhere
        assert "f.csv" not in on_load and not FLAG.search(on_load + elsewhere)

    @pytest.mark.parametrize("option", list(words.OPTION_CONTROLS))
    def test_every_option_with_a_control_names_it(self, option):
        problem = OrderDataError("not readable", fix="Set it", option=option)
        pages, where = words.OPTION_CONTROLS[option]
        for page in pages:  # named plainly on a page that has the control, with its page elsewhere
            on_page = state.worded(state.problem_fields(problem), here=page)
            assert where in on_page and " page" not in on_page
        elsewhere = next(page for page in words.PAGE_TITLES if page not in pages)
        assert (f"{where} on the {words.PAGE_TITLES[pages[0]]} page"
                in state.worded(state.problem_fields(problem), here=elsewhere))
        # The control on the page is drawn with the words the message uses.
        assert f"'{words.CONTROL_LABELS[option]}'" in where
        if option in WIDGET_KEYS:  # the sheet box is drawn for workbooks of several sheets only (tested there)
            at = new_app()
            for page in pages:
                at.switch_page(f"pages/{PAGE_FILES[page]}").run()
                assert widget_label(at, WIDGET_KEYS[option]) == words.CONTROL_LABELS[option]

    def test_a_problem_outlives_the_cache(self):
        # Cached outcomes are pickled: the role and option must come back with the message.
        import pickle

        outcome = state.Outcome(error=state.problem_fields(OrderDataError("x", role="date", option="date_order")))
        again = pickle.loads(pickle.dumps(outcome))
        assert again.worded("load") == outcome.worded("load")
        assert "'Dates are written'" in again.worded("load")

    @pytest.mark.parametrize("data", [b"customer,date,amount\nA,2025-01-01,$10\nB,2025-01-02,EUR 12\n",
                                      b"customer,date,amount\nA,03/04/2025,10\nB,05/06/2025,12\n",
                                      b"x,y,z\n1,2,3\n"], ids=["currencies", "date order", "columns"])
    def test_readers_messages_reach_the_page_without_flags(self, data):
        at = upload(new_app(), "f.csv", data)
        shown = errors(at)
        assert shown and not FLAG.search(shown[0])
