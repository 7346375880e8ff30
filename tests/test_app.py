"""The dashboard, driven through Streamlit's AppTest: every page runs, and the numbers shown are the library's.

The reference for every number on screen is the library called directly
(``read_orders``, ``forecast_customers``, ``evaluate_methods``); the wording helpers
are checked by their doctests and against the library's own error messages.
"""

from __future__ import annotations

import doctest
import io
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from streamlit.testing.v1 import AppTest

from dashboard import charts, state, words
from forecasting import OrderDataError, customer_statistics, read_orders
from forecasting import evaluation as evaluation_module
from forecasting import forecasts as forecasts_module
from forecasting import outlook as outlook_module

ROOT = Path(__file__).resolve().parent.parent
APP = ROOT / "app.py"
DEMO = ROOT / "demo_data" / "plant_shop_orders.csv"
MESSY = ROOT / "demo_data" / "messy_orders.csv"
PAGES = ["pages/load_orders.py", "pages/forecasts.py", "pages/accuracy.py", "pages/value_tiers.py",
         "pages/cohort_outlook.py"]



def new_app() -> AppTest:
    at = AppTest.from_file(str(APP), default_timeout=60)
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


def errors(at: AppTest) -> list[str]:
    return [element.value for element in at.error]


@pytest.fixture(scope="module")
def demo():
    result = read_orders(DEMO)
    return result, customer_statistics(result.orders)


class TestEveryPage:
    def test_first_open_loads_the_demo_shop_with_a_note(self, demo):
        at = new_app()
        assert any("demo shop's orders are already loaded" in info.value for info in at.info)
        assert metric(at, "Rows used") == demo[0].audit()["rows_used"]

    @pytest.mark.parametrize("page", PAGES)
    def test_page_runs_without_exception_and_carries_the_caution(self, page):
        at = new_app()
        at.switch_page(page).run()
        assert not at.exception, at.exception
        assert not errors(at)
        assert any("not guarantees" in caption.value for caption in at.caption)
        assert any("stays on this computer" in caption.value for caption in at.caption)

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

    def test_messy_export_shows_euros(self):
        at = upload(new_app(), MESSY.name, MESSY.read_bytes())
        at.switch_page("pages/forecasts.py").run()
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
        at.switch_page("pages/forecasts.py").run()
        assert not at.exception
        assert any("could not be used yet" in warning.value for warning in at.warning)
        assert len(table_with(at, "expected_next_order")) == len(demo[1])

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


class TestForecasts:
    def test_table_is_the_librarys_automatic_forecast(self, demo):
        result, stats = demo
        expected = forecasts_module.forecast_customers(stats, method="auto", orders=result.orders)
        at = new_app()
        at.switch_page("pages/forecasts.py").run()
        shown = table_with(at, "expected_next_order")
        assert shown["customer"].tolist() == expected["customer"].tolist()
        np.testing.assert_allclose(shown["expected_next_order"], expected["expected_next_order"], rtol=1e-12)
        np.testing.assert_allclose(shown["own_history_weight"], expected["own_history_weight"], rtol=1e-12)
        assert shown["low_confidence"].tolist() == expected["low_confidence"].tolist()

    def test_method_and_spread_model_by_key(self, demo):
        result, stats = demo
        at = new_app()
        at.switch_page("pages/forecasts.py").run()
        at.selectbox(key="method").set_value("james-stein").run()
        at.selectbox(key="variance").set_value("classic").run()
        assert not at.exception
        expected = forecasts_module.forecast_customers(stats, method="james-stein", variance="classic",
                                                       orders=result.orders)
        shown = table_with(at, "expected_next_order")
        np.testing.assert_allclose(shown["expected_next_order"], expected["expected_next_order"], rtol=1e-12)
        assert set(shown["method"]) == {"james-stein"}

    def test_automatic_method_for_a_chosen_spread_model(self, demo):
        result, stats = demo
        chosen = evaluation_module.choose_method(result.orders, stats, variances=["classic"])
        expected = forecasts_module.forecast_customers(stats, method=chosen["method"], variance="classic",
                                                       orders=result.orders)
        at = new_app()
        at.switch_page("pages/forecasts.py").run()
        at.selectbox(key="variance").set_value("classic").run()
        shown = table_with(at, "expected_next_order")
        np.testing.assert_allclose(shown["expected_next_order"], expected["expected_next_order"], rtol=1e-12)

    def test_choice_survives_a_visit_to_another_page(self):
        at = new_app()
        at.switch_page("pages/forecasts.py").run()
        at.selectbox(key="method").set_value("empirical-bayes").run()
        at.switch_page("pages/load_orders.py").run()
        at.switch_page("pages/forecasts.py").run()
        assert at.selectbox(key="method").value == "empirical-bayes"
        assert set(table_with(at, "expected_next_order")["method"]) == {"empirical-bayes"}

    def test_search_box(self, demo):
        at = new_app()
        at.switch_page("pages/forecasts.py").run()
        at.text_input(key="search").input("c-0001").run()
        shown = table_with(at, "expected_next_order")
        expected = [c for c in demo[1].index if "c-0001" in c.lower()]
        assert shown["customer"].tolist() == expected and len(expected) > 0

    def test_one_customer_explained(self, demo):
        result, stats = demo
        name = stats.index[stats["orders"] == 2][0]
        at = new_app()
        at.switch_page("pages/forecasts.py").run()
        at.selectbox(key="customer").set_value(name).run()
        assert not at.exception
        table = table_with(at, "expected_next_order")
        row = table[table["customer"] == name].iloc[0]
        sentence = next(m.value for m in at.markdown if m.value.startswith(f"**{name}.**"))
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

    def test_method_problem_is_a_message(self):
        # The messy export has no segment column, so "mta-segments" cannot run.
        at = upload(new_app(), MESSY.name, MESSY.read_bytes())
        at.switch_page("pages/forecasts.py").run()
        at.selectbox(key="method").set_value("mta-segments").run()
        assert not at.exception
        assert any("segment" in text for text in errors(at))
        assert not any("--" in text for text in errors(at))


    def test_pseudonym_downloads(self, demo):
        # Turning pseudonyms on asks for a secret first; with one, the files carry the library's pseudonyms.
        from forecasting.exports import pseudonymise

        at = new_app()
        at.switch_page("pages/forecasts.py").run()
        at.toggle(key="pseudonyms_on").set_value(True).run()
        assert not at.exception
        assert any("secret phrase" in element.value for element in at.info)
        at.text_input(key="pseudonym_salt").input("fernhollow-secret").run()
        assert not at.exception
        assert not any("secret phrase of at least" in element.value for element in at.info)
        dataset = state.Dataset.from_bytes(DEMO.read_bytes(), DEMO.name, demo=True)
        method, variance = at.selectbox(key="method").value, at.selectbox(key="variance").value
        text, _ = state.forecast_files(dataset, method, variance, "fernhollow-secret")
        shared = pd.read_csv(io.StringIO(text))
        plain = state.forecasts(dataset, method, variance).value
        assert shared["customer"].tolist() == pseudonymise(plain, salt="fernhollow-secret")["customer"].tolist()
        # The download gives money to the cent, as the command line's file does.
        np.testing.assert_allclose(shared["expected_next_order"], plain["expected_next_order"].round(2), atol=1e-9)


class TestAccuracy:
    def test_verdict_is_the_evaluations(self, demo):
        result, _ = demo
        found = evaluation_module.evaluate_methods(result.orders, bootstrap=200, seed=0)
        chosen = found.chosen
        row = found.backtest[(found.backtest["method"] == chosen["method"])
                             & (found.backtest["variance"] == chosen["variance"])].iloc[0]
        at = new_app()
        at.switch_page("pages/accuracy.py").run()
        assert not at.exception
        verdict = at.success[0].value
        sentence = words.verdict_sentence(row["error_reduction_pct"], low=row["ci_low"], high=row["ci_high"])
        assert verdict == f"**{sentence}**"
        assert f"{row['error_reduction_pct']:.0f}%" in verdict
        shown = table_with(at, "coverage")
        assert len(shown) == len(found.leave_one_out) + len(found.backtest)

    def test_follows_the_method_in_use(self, demo):
        result, _ = demo
        found = evaluation_module.evaluate_methods(result.orders, bootstrap=200, seed=0)
        row = found.backtest[(found.backtest["method"] == "james-stein")
                             & (found.backtest["variance"] == "classic")].iloc[0]
        at = new_app()
        at.switch_page("pages/forecasts.py").run()
        at.selectbox(key="method").set_value("james-stein").run()
        at.selectbox(key="variance").set_value("classic").run()
        at.switch_page("pages/accuracy.py").run()
        assert f"{row['error_reduction_pct']:.0f}%" in at.success[0].value
        assert any("James-Stein with the classic spread model" in m.value for m in at.markdown)




@pytest.fixture(scope="module")
def automatic(demo):
    """The automatic forecasts and the method and spread model they settled on."""
    result, stats = demo
    table = forecasts_module.forecast_customers(stats, method="auto", orders=result.orders)
    return table, str(table["method"].iloc[0]), str(table["variance"].iloc[0])


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

    def test_no_projection_falls_back_to_next_order_value(self):
        # Nine customers are too few for the order-frequency fit (see forecasting/frequency.py notes).
        at = upload(new_app(), MESSY.name, MESSY.read_bytes())
        at.switch_page("pages/value_tiers.py").run()
        assert not at.exception
        assert not errors(at)
        assert any("ranked by their expected next order" in w.value for w in at.warning)


class TestCohortOutlook:
    def test_cohorts_and_backtest_are_the_librarys(self, demo, automatic):
        result, _ = demo
        table, method, variance = automatic
        projection = outlook_module.project_revenue(result.orders, horizon=180, by="quarter", forecasts=table,
                                                    method=method, variance=variance)
        check = outlook_module.backtest_outlook(result.orders, horizon=180, by="quarter", method=method,
                                                variance=variance)
        at = new_app()
        at.switch_page("pages/cohort_outlook.py").run()
        assert not at.exception
        shown = table_with(at, "share_of_projected_revenue")
        assert shown["cohort"].tolist() == projection.cohorts["cohort"].tolist()
        np.testing.assert_allclose(shown["projected_revenue"], projection.cohorts["projected_revenue"], rtol=1e-12)
        text = " ".join(m.value for m in at.markdown)
        assert f"they actually spent {words.money(check.total['actual_revenue'])}" in text

    def test_group_by_segment(self, demo, automatic):
        result, _ = demo
        table, method, variance = automatic
        projection = outlook_module.project_revenue(result.orders, horizon=180, by="segment", forecasts=table,
                                                    method=method, variance=variance)
        at = new_app()
        at.switch_page("pages/cohort_outlook.py").run()
        at.selectbox(key="cohort_by").set_value("segment").run()
        assert not at.exception
        shown = table_with(at, "share_of_projected_revenue")
        assert sorted(shown["cohort"]) == sorted(projection.cohorts["cohort"]) \
            == [outlook_module.NEW_CUSTOMERS, "instagram", "market", "web"]

    def test_too_little_history_is_a_message(self):
        at = upload(new_app(), MESSY.name, MESSY.read_bytes())
        at.switch_page("pages/cohort_outlook.py").run()
        assert not at.exception
        assert any("could not be fitted" in w.value for w in at.warning)


class TestCharts:
    def test_pull_chart_plots_every_customer_at_average_and_forecast(self, automatic):
        table, _, _ = automatic
        figure = charts.pull_toward_centre(table, highlight=table["customer"].iloc[0])
        points = [trace for trace in figure.data if trace.mode == "markers" and trace.customdata is not None]
        x = np.concatenate([np.asarray(trace.x, dtype=float) for trace in points])
        y = np.concatenate([np.asarray(trace.y, dtype=float) for trace in points])
        assert len(x) == len(table)
        assert sorted(zip(x, y)) == sorted(zip(table["average_order_value"], table["expected_next_order"]))
        diagonal = figure.data[0]
        assert list(diagonal.x) == list(diagonal.y)

    def test_method_bars_and_intervals_are_the_evaluations(self, demo):
        found = evaluation_module.evaluate_methods(demo[0].orders, bootstrap=50, seed=1)
        part = found.leave_one_out[found.leave_one_out["variance"] == "classic"]
        figure = charts.method_comparison(part, title="t", highlight="mta")
        bar = figure.data[0]
        np.testing.assert_allclose(bar.x, part["error_reduction_pct"])
        np.testing.assert_allclose(np.asarray(bar.x) + np.asarray(bar.error_x.array), part["ci_high"])
        np.testing.assert_allclose(np.asarray(bar.x) - np.asarray(bar.error_x.arrayminus), part["ci_low"])
        assert list(bar.y) == [words.method_label(m) for m in part["method"]]
        assert [c == charts.PALETTE["vermilion"] for c in bar.marker.color] == list(part["method"] == "mta")


class TestWords:
    @pytest.mark.parametrize("module", [words, charts])
    def test_doctests(self, module):
        failures, tried = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
        assert tried > 0 and failures == 0

    def test_library_messages_lose_their_command_line_options(self):
        mixed = b"customer,date,amount\nA,2025-01-01,$10\nB,2025-01-02,EUR 12\n"
        ambiguous = b"customer,date,amount\nA,03/04/2025,10\nB,05/06/2025,12\n"
        unknown = b"x,y,z\n1,2,3\n"
        for data in (mixed, ambiguous, unknown):
            with pytest.raises(OrderDataError) as problem:
                read_orders(data, file_name="f.csv")
            assert "--" in str(problem.value)
            assert "--" not in words.on_screen(str(problem.value))

    def test_verdict_extremes(self):
        assert "did not beat" in words.verdict_sentence(0.0)
        assert "not enough" in words.verdict_sentence(float("nan"))
        assert "by 100%" in words.verdict_sentence(100.0)
