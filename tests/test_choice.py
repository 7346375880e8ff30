"""One set of rules for "auto", shared by the command line and the dashboard (forecasting.selection.resolve_choice).

The references are the library's own public doors, called directly: ``choose_method`` (the
shop's own leave-one-out check) and the command line's ``forecast`` file. The dashboard's forecasts for a file and a choice must be the command line's,
byte for byte in the CSV.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from dashboard import state
from forecasting import customer_statistics, read_orders
from forecasting.cli import main as cli_main
from forecasting.evaluation import choose_method, evaluate_methods
from forecasting.forecasts import forecast_customers
from forecasting.options import DEFAULT_CHOICE, LOW_CONFIDENCE_WEIGHT, low_confidence
from forecasting.selection import resolve_choice

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "demo_data" / "plant_shop_orders.csv"


@pytest.fixture(scope="module")
def demo():
    result = read_orders(DEMO)
    return result.orders, customer_statistics(result.orders)


class TestRules:
    def test_both_automatic_is_the_forecasts_automatic_choice(self, demo):
        orders, stats = demo
        choice = resolve_choice(stats, orders, method="auto", variance="auto")
        table = forecast_customers(stats, method="auto", orders=orders)
        reported = table.attrs["fit"]["variance"]
        assert (choice.method, choice.variance if reported != "gamma-model" else "gamma-model") == \
            (table.attrs["fit"]["method"], reported)
        assert choice.chosen_by == "accuracy check" and choice.check == choose_method(orders, stats)

    @pytest.mark.parametrize("variance", ["classic", "log"])
    def test_automatic_method_for_a_spread_model(self, demo, variance):
        orders, stats = demo
        choice = resolve_choice(stats, orders, method="auto", variance=variance)
        expected = choose_method(orders, stats, variances=[variance])
        assert (choice.method, choice.variance) == (expected["method"], expected["variance"])
        assert choice.chosen_by == "accuracy check"

    @pytest.mark.parametrize("method", ["mta", "james-stein", "empirical-bayes"])
    def test_automatic_spread_model_for_a_method_is_the_shops_own_check(self, demo, method):
        orders, stats = demo
        choice = resolve_choice(stats, orders, method=method, variance="auto")
        results = evaluate_methods(orders, methods=[method], bootstrap=0, seed=0).leave_one_out
        rows = results[(results["method"] == method)].sort_values("sse")
        passing = rows[rows["calibrated"].astype(bool)]
        expected = (passing if len(passing) else rows).iloc[0]["variance"]
        assert (choice.method, choice.variance, choice.chosen_by) == (method, expected, "accuracy check")
        table = forecast_customers(stats, method=method, variance="auto", orders=orders)
        assert (table.attrs["fit"]["method"], table.attrs["fit"]["variance"]) == (choice.method, choice.variance)

    def test_a_named_method_is_kept_even_where_it_loses_to_own_averages(self, demo):
        # The shop-wide average loses to own averages on the demo shop; "auto" only picks its spread model.
        orders, stats = demo
        choice = resolve_choice(stats, orders, method="pooled", variance="auto")
        assert choice.method == "pooled" and choice.variance in ("log", "classic", "proportional")
        assert choose_method(orders, stats, methods=["pooled"])["fell_back_to_plain"]

    def test_gamma_gamma_has_its_own_spread(self, demo):
        orders, stats = demo
        choice = resolve_choice(stats, orders, method="gamma-gamma", variance="auto")
        assert (choice.method, choice.variance, choice.chosen_by) == ("gamma-gamma", "gamma-model", "user")
        table = forecast_customers(stats, method=choice.method, variance=choice.variance, orders=orders)
        assert set(table["variance"]) == {"gamma-model"}

    def test_given_choices_are_kept(self, demo):
        orders, stats = demo
        choice = resolve_choice(stats, orders, method="mta", variance="log")
        assert (choice.method, choice.variance, choice.chosen_by, choice.check) == ("mta", "log", "user", None)

    def test_without_orders_the_standing_choice(self, demo):
        _, stats = demo
        choice = resolve_choice(stats, None, method="auto", variance="auto")
        assert (choice.method, choice.variance) == DEFAULT_CHOICE and choice.chosen_by == "default"

    def test_the_accuracy_checks_answer_spares_a_second_pass(self, demo):
        # The dashboard hands over Evaluation.chosen when the Accuracy check ran first: it must be the same choice.
        orders, stats = demo
        found = evaluate_methods(orders, bootstrap=0, seed=0)
        direct = resolve_choice(stats, orders)
        handed = resolve_choice(stats, orders, checked=found.chosen)
        assert (handed.method, handed.variance) == (direct.method, direct.variance)
        assert found.chosen["method"] == direct.check["method"]
        assert found.chosen["variance"] == direct.check["variance"]


class TestLowConfidence:
    def test_one_definition_follows_the_weight(self):
        weights = np.array([0.0, 0.2, LOW_CONFIDENCE_WEIGHT - 1e-9, LOW_CONFIDENCE_WEIGHT, 0.93, 1.0])
        assert low_confidence(weights).tolist() == [True, True, True, False, False, False]


@pytest.mark.parametrize("method,variance", [("auto", "auto"), ("auto", "classic"), ("james-stein", "auto"),
                                             ("mta", "log"), ("gamma-gamma", "auto")])
def test_dashboard_and_command_line_give_the_same_forecasts(tmp_path, method, variance):
    out = tmp_path / "forecasts.csv"
    assert cli_main(["forecast", str(DEMO), "--method", method, "--variance", variance, "--out", str(out)]) == 0
    dataset = state.Dataset.from_bytes(DEMO.read_bytes(), DEMO.name, demo=True)
    assert out.read_bytes().decode("utf-8") == state.forecast_csv(dataset, method, variance)
