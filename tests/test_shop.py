"""The pipeline: one shop, each stage computed once (forecasting.shop.Shop).

The references are the library's own public doors called one by one on the same orders
(customer_statistics, forecast_customers, evaluate_methods, resolve_choice, project_revenue,
backtest_outlook, rolling_backtest, assign_tiers): the shop must give exactly what they give, while
counting, with the functions it calls wrapped, that each stage ran once.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from forecasting import evaluation, forecasts, selection
from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError
from forecasting.evaluation import evaluate_methods
from forecasting.forecasts import FitsRegistry, ShopFits, forecast_customers, reusing_fits
from forecasting.outlook import assign_tiers, backtest_outlook, project_revenue, rolling_backtest
from forecasting.selection import resolve_choice
from forecasting.shop import Shop
from shop_simulation import simulate_shop

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "demo_data" / "plant_shop_orders.csv"


def spend_orders(customers=300, seed=3):
    """Plant-shop orders: lognormal customer levels, lognormal orders, geometric counts, two years."""
    rng = np.random.default_rng(seed)
    n = rng.geometric(0.35, customers)
    level = rng.lognormal(3.6, 0.5, customers)
    who = np.repeat(np.arange(customers), n)
    return pd.DataFrame({
        "customer": [f"pot-{c:04d}" for c in who],
        "order_value": rng.lognormal(np.log(level[who]), 0.6),
        "order_date": pd.Timestamp("2024-01-01") + pd.to_timedelta(rng.integers(0, 730, who.size), "D"),
    })


class Counter:
    """Wraps a module's function and counts its calls (by their first arguments when asked)."""

    def __init__(self, monkeypatch, module, name, key=None):
        self.calls = []
        original = getattr(module, name)

        def counted(*args, **kwargs):
            self.calls.append(key(*args, **kwargs) if key else None)
            return original(*args, **kwargs)

        monkeypatch.setattr(module, name, counted)


class TestSameAnswersAsTheFunctions:
    def test_forecasts_choice_and_evaluation(self):
        orders = spend_orders()
        shop = Shop(orders)
        stats = customer_statistics(orders)
        pd.testing.assert_frame_equal(shop.statistics, stats)
        for method, variance in (("mta", "log"), ("empirical-bayes", "classic"), ("gamma-gamma", "auto"),
                                 ("auto", "auto"), ("james-stein", "auto"), ("auto", "proportional")):
            direct = forecast_customers(stats, method=method, variance=variance, orders=orders)
            mine = shop.forecasts(method, variance)
            pd.testing.assert_frame_equal(mine, direct)
            assert mine.attrs["fit"] == direct.attrs["fit"]
        found = shop.evaluation(bootstrap=50, seed=2)
        alone = evaluate_methods(orders, bootstrap=50, seed=2)
        pd.testing.assert_frame_equal(found.leave_one_out, alone.leave_one_out)
        pd.testing.assert_frame_equal(found.backtest, alone.backtest)
        pd.testing.assert_frame_equal(found.margins, alone.margins)
        assert found.chosen == alone.chosen
        choice = shop.choice()
        assert (choice.method, choice.variance) == (resolve_choice(stats, orders).method,
                                                    resolve_choice(stats, orders).variance)

    def test_evaluation_first_gives_the_same_forecasts(self):
        # The accuracy check made the choice: the forecasts take it and are the same as alone.
        orders = spend_orders(seed=5)
        shop = Shop(orders)
        shop.evaluation(bootstrap=0)
        pd.testing.assert_frame_equal(shop.forecasts(),
                                      forecast_customers(customer_statistics(orders), orders=orders))

    def test_outlook_backtest_and_tiers(self):
        orders = simulate_shop(days=2 * 365, arrivals_per_day=2.0, seed=4)
        shop = Shop(orders)
        outlook = shop.outlook(horizon=90, by="quarter", draws=40)
        alone = project_revenue(orders, horizon=90, by="quarter", draws=40)
        pd.testing.assert_frame_equal(outlook.customers, alone.customers)
        assert outlook.total == alone.total
        back = shop.outlook_backtest(horizon=90, draws=40)
        back_alone = backtest_outlook(orders, horizon=90, draws=40)
        pd.testing.assert_frame_equal(back.cohorts, back_alone.cohorts)
        rolling = shop.rolling_backtest(horizon=90, cutoffs=2, draws=40)
        pd.testing.assert_frame_equal(rolling.table, rolling_backtest(orders, horizon=90, cutoffs=2, draws=40).table)
        _, tiered = shop.tiers(horizon=365, rank="value")
        expected = assign_tiers(project_revenue(orders, horizon=365, new_customers=False).customers, rank="value")
        pd.testing.assert_frame_equal(tiered, expected)


class TestEachStageOnce:
    def test_statistics_fits_and_each_pair_once(self, monkeypatch):
        import forecasting.shop as shop_module

        statistics = Counter(monkeypatch, shop_module, "customer_statistics")
        between = Counter(monkeypatch, forecasts, "fit_between")
        left_out = Counter(monkeypatch, evaluation, "forecast_left_out", key=lambda held, m, v, **kw: (m, v))
        orders = spend_orders(seed=7)
        shop = Shop(orders)
        shop.forecasts()  # the automatic choice: the leave-one-out of the pairs it may use
        shop.evaluation(bootstrap=20)  # every pair; the ones above are not computed again
        shop.forecasts("mta", "log")
        shop.forecasts("empirical-bayes", "classic")
        shop.choice("auto", "log")
        shop.evaluation(bootstrap=20)
        assert len(statistics.calls) == 1
        # One REML fit per spread model on all orders, one per spread model on the backtest's orders.
        assert len(between.calls) == 2 * 3
        assert len(left_out.calls) == len(set(left_out.calls)) == len(shop.evaluation(bootstrap=20).leave_one_out)

    def test_kept_answers_are_the_same_objects(self):
        shop = Shop(spend_orders(seed=8))
        assert shop.forecasts("mta", "log") is shop.forecasts("mta", "log")
        assert shop.evaluation(bootstrap=0) is shop.evaluation(bootstrap=0)
        assert shop.evaluation(bootstrap=0) is not shop.evaluation(bootstrap=10)
        assert shop.choice() is shop.choice()

    def test_the_backtest_at_one_cut_off_is_fitted_once(self, monkeypatch):
        # The outlook checked once and at many cut-offs meets the same cut-off twice: the forecasts'
        # check on the orders before it runs the first time only.
        orders = simulate_shop(days=2 * 365, arrivals_per_day=2.0, seed=6)
        checks = Counter(monkeypatch, selection, "_checked_pairs", key=lambda fits, *a: len(fits.stats))
        shop = Shop(orders)
        back = shop.outlook_backtest(horizon=90, draws=30)
        rolling = shop.rolling_backtest(horizon=90, cutoffs=2, draws=30)
        cutoffs = [row.cutoff for row in rolling.table.itertuples()]
        assert back.cutoff == cutoffs[-1]
        assert len(checks.calls) == 2  # the two cut-offs, the shared one once

    def test_registry_finds_equal_tables(self, monkeypatch):
        orders = spend_orders(seed=9)
        left_out = Counter(monkeypatch, evaluation, "forecast_left_out")
        registry = FitsRegistry(size=2)
        with reusing_fits(registry):
            first = forecast_customers(customer_statistics(orders), orders=orders)
            again = forecast_customers(customer_statistics(orders.copy()), orders=orders.copy())
        pd.testing.assert_frame_equal(first, again)
        once = len(left_out.calls)
        assert once > 0 and len(registry) == 1
        other = orders.assign(order_value=orders["order_value"] * 1.01)
        with reusing_fits(registry):
            forecast_customers(customer_statistics(other), orders=other)
        assert len(left_out.calls) == 2 * once and len(registry) == 2  # another shop is computed


class TestScaleEngineStatistics:
    def test_statistics_alone(self):
        orders = spend_orders(seed=10)
        stats = customer_statistics(orders)
        shop = Shop(statistics=stats, account={"orders": len(orders)})
        table = shop.forecasts()
        pd.testing.assert_frame_equal(table, forecast_customers(stats))
        assert shop.choice().chosen_by == "default"
        with pytest.raises(OrderDataError, match="every order") as raised:
            shop.evaluation()
        assert raised.value.option == "engine"

    def test_needs_something(self):
        with pytest.raises(ValueError):
            Shop()


class TestReading:
    def test_read_keeps_the_account(self):
        shop = Shop.read(DEMO)
        assert shop.account["orders"] == len(shop.orders)
        assert shop.account["rows_used"] + shop.account["rows_excluded"] == shop.account["rows_read"]
        assert shop.read_result.orders is shop.orders


class TestSharedFits:
    def test_other_tables_are_refused(self):
        orders = spend_orders(seed=11)
        fits = ShopFits(customer_statistics(orders), orders)
        with pytest.raises(ValueError, match="another"):
            forecast_customers(customer_statistics(orders), orders=orders, fits=fits)
        with pytest.raises(ValueError, match="another"):
            evaluate_methods(orders.copy(), fits=fits)

    def test_a_kept_forecast_is_not_changed_by_editing_a_table(self):
        orders = spend_orders(seed=12)
        shop = Shop(orders)
        table = forecast_customers(shop.statistics, method="mta", variance="log", orders=orders, fits=shop.fits)
        table["expected_next_order"] = 0.0
        again = forecast_customers(shop.statistics, method="mta", variance="log", orders=orders, fits=shop.fits)
        assert (again["expected_next_order"] > 0).all()


class TestCheckOnASampleShop:
    """A shop with more than CHECK_CUSTOMERS repeat customers is checked on a sample shop of its own."""

    def test_the_sample_is_checked_exactly_as_a_shop_of_its_own(self):
        # The slow obvious twin: cut the sample's orders out, compute their statistics afresh, and
        # check that shop whole.
        from forecasting.options import check_sample

        orders = spend_orders(customers=400, seed=13)
        stats = customer_statistics(orders)
        fits = ShopFits(stats, orders)
        pairs = [("mta", "log"), ("empirical-bayes", "classic"), ("gamma-gamma", "gamma-model")]
        some = evaluation.left_out_scores(fits, pairs, limit=60)
        kept = check_sample(stats["orders"].to_numpy(), 60)
        alone = orders[orders["customer"].isin(stats.index[kept])]
        twin = evaluation.left_out_scores(ShopFits(customer_statistics(alone), alone), pairs, limit=None)
        assert len(some.count) == len(twin.count) == 60
        np.testing.assert_array_equal(some.count, twin.count)
        for i in range(len(pairs)):
            np.testing.assert_allclose(some.sq[i], twin.sq[i], rtol=1e-9)
            np.testing.assert_allclose(some.inside[i], twin.inside[i], rtol=1e-12)

    def test_the_sample_keeps_the_shops_mix_of_one_time_customers(self):
        from forecasting.options import check_sample

        orders = np.array([1] * 3000 + [2] * 1500 + [7] * 500)
        kept = check_sample(orders, 400)
        assert int(kept[orders >= 2].sum()) == 400
        assert int(kept[orders == 1].sum()) == 600  # 3,000 one-time for 2,000 repeat: 1.5 per repeat
        # the repeat customers drawn at random: both kinds of repeat customer are there
        assert 0 < int(kept[orders == 7].sum()) < 400
        np.testing.assert_array_equal(check_sample(orders, 400), kept)  # seeded
        assert check_sample(orders, 2000) is None and check_sample(orders, None) is None

    def test_the_draw_is_seeded_and_stated(self):
        orders = spend_orders(customers=400, seed=14)
        found = evaluate_methods(orders, methods="mta", variances="log", bootstrap=0, check_customers=50)
        again = evaluate_methods(orders, methods="mta", variances="log", bootstrap=0, check_customers=50)
        pd.testing.assert_frame_equal(found.leave_one_out, again.leave_one_out)
        assert found.customers_checked == 50 and found.backtest_scored <= 50
        assert found.customers == 400  # the whole shop is still counted
        assert any("drawn at random" in note for note in found.notes)
        whole = evaluate_methods(orders, methods="mta", variances="log", bootstrap=0, check_customers=None)
        assert whole.customers_checked == int((customer_statistics(orders)["orders"] >= 2).sum())
        assert not any("drawn at random" in note for note in whole.notes)
        # the backtest keeps the whole shop's cut-off
        assert found.cutoff == whole.cutoff

    @pytest.mark.parametrize("seed", [21, 22, 23])
    def test_a_sample_measures_what_the_whole_check_measures(self, seed):
        # Against the whole check on simulated shops: a quarter of the repeat customers must give
        # each pair's error cut within its own 95% bootstrap interval (widened by the whole check's
        # interval, which has its own noise), and the money bias within three standard errors.
        orders = spend_orders(customers=2400, seed=seed)
        pairs = dict(methods="plain,mta,empirical-bayes", variances="log,classic", bootstrap=200)
        repeat = int((customer_statistics(orders)["orders"] >= 2).sum())
        whole = evaluate_methods(orders, check_customers=None, **pairs).leave_one_out.set_index(["method", "variance"])
        some = evaluate_methods(orders, check_customers=repeat // 4, **pairs).leave_one_out.set_index(
            ["method", "variance"])
        for pair in whole.index:
            if pair[0] == "plain":
                continue
            a, b = whole.loc[pair], some.loc[pair]
            half = (b["ci_high"] - b["ci_low"]) / 2 + (a["ci_high"] - a["ci_low"]) / 2
            assert abs(b["error_reduction_pct"] - a["error_reduction_pct"]) <= half, pair
            spread = 3 * np.hypot(a["money_bias_se"], b["money_bias_se"])
            assert abs(b["money_bias_pct"] - a["money_bias_pct"]) <= spread, pair
