"""The forecasts table: its contract, its ranges written out by hand, and the edge cases."""

import json
import sys

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from forecasting import shrinkage as sh
from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError
from forecasting.reading import read_orders
from forecasting.forecasts import FORECAST_COLUMNS, METHODS, MONEY_COLUMNS, forecast_customers
from forecasting.variance import VARIANCE_MODELS, pooled_variance


def garden_orders(seed=0, customers=80, *, segments=True, unit=1.0):
    """Orders of a shop selling houseplants, pots and garden tools (two sales channels)."""
    rng = np.random.default_rng(seed)
    n = rng.integers(1, 7, customers)
    ids = np.array([f"G-{t:04d}" for t in rng.permutation(customers)])
    channel = np.where(rng.random(customers) < 0.4, "market stall", "web")
    level = rng.gamma(5.0, 12.0, customers) * np.where(channel == "web", 1.0, 0.6)
    customer = np.repeat(ids, n)
    values = unit * np.exp(np.log(np.repeat(level, n)) + rng.normal(0, 0.45, n.sum()))
    dates = pd.Timestamp("2024-06-01") + pd.to_timedelta(rng.integers(0, 365, n.sum()), unit="D")
    frame = pd.DataFrame({"customer": customer, "order_value": values, "order_date": dates})
    if segments:
        frame["segment"] = np.repeat(channel, n)
    return frame


ALL_PAIRS = [(m, v) for m in METHODS for v in VARIANCE_MODELS]


class TestForecastCustomers:
    def test_columns_rows_and_order(self):
        orders = garden_orders(1)
        st = customer_statistics(orders)
        table = forecast_customers(st, method="mta", variance="classic", orders=orders)
        assert list(table.columns) == FORECAST_COLUMNS
        assert table["customer"].tolist() == st.index.tolist()
        np.testing.assert_array_equal(table["orders"], st["orders"])
        np.testing.assert_array_equal(table["average_order_value"], st["mean"])
        assert (table["method"] == "mta").all() and (table["variance"] == "classic").all()

    def test_defaults_are_the_registrys(self):
        # The library's defaults are the front ends' (forecasting.options): the automatic choice;
        # without order-level values it cannot run the shop's own check and uses empirical Bayes
        # on the log scale, and says so.
        from forecasting.options import DEFAULT_METHOD, DEFAULT_VARIANCE

        assert (DEFAULT_METHOD, DEFAULT_VARIANCE) == ("auto", "auto")
        table = forecast_customers(customer_statistics(garden_orders(1)))
        assert (table["method"].iloc[0], table["variance"].iloc[0]) == ("empirical-bayes", "log")
        assert "order-level table" in table.attrs["fit"]["auto_choice"]
        for column in ("customer", "method", "variance"):
            assert table[column].dtype == "str", column

    @pytest.mark.parametrize("index_kind", ["str", "object"])
    def test_the_customer_column_is_the_tables_own(self, index_kind):
        st = customer_statistics(garden_orders(3))
        st.index = st.index.astype(index_kind)
        before = st.index.tolist()
        table = forecast_customers(st, method="mta", variance="log")
        assert table["customer"].tolist() == before and table["customer"].dtype == "str"
        table.loc[0, "customer"] = "changed"  # a front end may edit its copy
        table.loc[1, "method"] = "edited"
        assert st.index.tolist() == before and table["method"].tolist()[:3] == ["mta", "edited", "mta"]

    @pytest.mark.parametrize("method, variance", ALL_PAIRS)
    def test_every_method_and_variance_gives_sane_numbers(self, method, variance):
        orders = garden_orders(2)
        st = customer_statistics(orders)
        table = forecast_customers(st, method=method, variance=variance, orders=orders)
        numbers = table[FORECAST_COLUMNS[1:9]].to_numpy(dtype=float)
        assert np.isfinite(numbers).all()
        assert (table["expected_low"] <= table["expected_next_order"] * (1 + 1e-12)).all()
        assert (table["expected_next_order"] <= table["expected_high"] * (1 + 1e-12)).all()
        assert (table["next_order_low"] > 0).all()
        assert (table["next_order_low"] < table["next_order_high"]).all()
        assert table["own_history_weight"].between(0, 1).all()
        fit = table.attrs["fit"]
        assert all(isinstance(v, (float, str, bool)) for v in fit.values())
        assert fit["variance"] == ("gamma-model" if method == "gamma-gamma" else variance)

    def test_plain_classic_ranges_written_out(self):
        # The classic model's ranges: the lognormal with the forecast's mean and the variance of
        # its error (sigma2 / n); the next order lognormal around the forecast with that relative
        # uncertainty plus the shop's pooled log spread of one order.
        orders = garden_orders(3)
        st = customer_statistics(orders)
        table = forecast_customers(st, method="plain", variance="classic", level=0.9, next_level=0.8)
        sigma2 = st["sum_sq_dev"].sum() / (st["orders"] - 1).sum()
        n = st["orders"].to_numpy()
        m = st["mean"].to_numpy()
        z90 = 1.6448536269514722  # standard normal 95th percentile (statistical tables)
        z80 = 1.2815515655446004  # standard normal 90th percentile

        def lognormal(mean, variance, z):
            spread = np.log(1 + variance / mean ** 2)
            median = mean * np.exp(-spread / 2)
            return median * np.exp(-z * np.sqrt(spread)), median * np.exp(z * np.sqrt(spread))

        low, high = lognormal(m, sigma2 / n, z90)
        np.testing.assert_allclose(table["expected_low"], np.minimum(low, m), rtol=1e-12)
        np.testing.assert_allclose(table["expected_high"], np.maximum(high, m), rtol=1e-12)
        sigma2_log = st["log_sum_sq_dev"].sum() / (st["orders"] - 1).sum()
        centre = sh.fit_between(m, sigma2 / n).centre
        total = np.log(1 + sigma2 / n / centre ** 2) + sigma2_log
        median = m * np.exp(-total / 2)
        np.testing.assert_allclose(table["next_order_low"], median * np.exp(-z80 * np.sqrt(total)), rtol=1e-12)
        np.testing.assert_allclose(table["next_order_high"], median * np.exp(z80 * np.sqrt(total)), rtol=1e-12)
        assert table.attrs["fit"]["sigma2_log"] == pytest.approx(sigma2_log, rel=1e-12)
        np.testing.assert_allclose(table["expected_next_order"], m, rtol=1e-14)

    def test_log_return_to_money_written_out(self):
        # forecasting.forecasts.money_forecast for mta on the log scale, from its parts: Duan's
        # smearing S, the effective between-customer variance, the REML fit and mta's weights.
        orders = garden_orders(4)
        st = customer_statistics(orders)
        table = forecast_customers(st, method="mta", variance="log")
        fit = pooled_variance(st, model="log")
        sigma2, S, excess = fit.sigma2, fit.details["smearing"], fit.details["excess"]
        n = st["orders"].to_numpy(float)
        l = st["log_mean"].to_numpy()
        shrunk = sh.mta_constant(l, sigma2 / n)
        g = shrunk.weight
        between = sh.fit_between(l, sigma2 / n)
        w = 1 / (between.tau2 + sigma2 / n)
        mean_exp = np.sum(w * np.exp(l - sigma2 / (2 * n) - excess / n ** 2)) / np.sum(w)
        tau2_eff = max(0.0, 2 * (np.log(mean_exp) - between.centre))
        expected = S * np.exp(shrunk.estimate + (1 - g ** 2) * tau2_eff / 2 - g ** 2 * sigma2 / (2 * n)
                              - g ** 3 * excess / n ** 2)
        np.testing.assert_allclose(table["expected_next_order"], expected, rtol=1e-11)
        v = g ** 2 * sigma2 / n + (1 - g) ** 2 * (between.tau2 + between.centre_var)
        z = stats.norm.ppf(0.95)
        np.testing.assert_allclose(table["expected_low"], np.minimum(S * np.exp(shrunk.estimate - z * np.sqrt(v)),
                                                                     expected), rtol=1e-11)
        np.testing.assert_allclose(table["expected_high"], np.maximum(S * np.exp(shrunk.estimate + z * np.sqrt(v)),
                                                                      expected), rtol=1e-11)
        one = fit.details["order_spread"]
        v_next = g ** 2 * one / n + (1 - g) ** 2 * (between.tau2 + between.centre_var)
        z80 = stats.norm.ppf(0.9)
        np.testing.assert_allclose(table["next_order_high"], np.exp(shrunk.estimate + z80 * np.sqrt(v_next + one)),
                                   rtol=1e-11)
        assert table.attrs["fit"]["smearing"] == pytest.approx(S)

    def test_plain_on_the_log_scale_is_unbiased_for_each_customer(self):
        # Known truth: one customer's n lognormal orders; exp(l) S^(1 - 1/n) (the plain forecast on
        # the log scale) is unbiased for the true mean exp(mu + sigma^2/2), where exp(l + (sigma2 + v)/2)
        # overstated one-order customers by a factor exp(sigma2 / 2). Averaged over 200 shops of
        # 300 customers with 1-3 orders each (Monte Carlo error under 0.5%).
        rng = np.random.default_rng(41)
        ratios = []
        for _ in range(200):
            n = rng.integers(1, 4, 300)
            mu = rng.normal(3.5, 0.4, 300)
            who = np.repeat(np.arange(300), n)
            values = np.exp(mu[who] + rng.normal(0, 0.6, who.size))
            frame = pd.DataFrame({"customer": who.astype(str), "order_value": values,
                                  "order_date": pd.Timestamp("2025-01-01")})
            st = customer_statistics(frame)
            table = forecast_customers(st, method="plain", variance="log")
            truth = np.exp(mu[st.index.astype(int)] + 0.18)
            ratios.append([table.loc[st["orders"].to_numpy() == k, "expected_next_order"].sum()
                           / truth[st["orders"].to_numpy() == k].sum() for k in (1, 2, 3)])
        np.testing.assert_allclose(np.mean(ratios, axis=0), 1.0, atol=0.015)

    def test_next_order_range_covers_about_the_stated_share(self):
        # lognormal orders: about 80% of fresh orders fall inside the 80% next-order range
        rng = np.random.default_rng(5)
        orders = garden_orders(5, customers=400, segments=False)
        st = customer_statistics(orders)
        table = forecast_customers(st, method="plain", variance="log").set_index("customer")
        level = st["log_mean"]  # a fresh order around each customer's own level, as plain forecasts assume
        spread = np.sqrt(pooled_variance(st, model="log").sigma2)
        fresh = np.exp(level.to_numpy() + spread * rng.standard_normal(len(st)))
        inside = (fresh >= table["next_order_low"].to_numpy()) & (fresh <= table["next_order_high"].to_numpy())
        assert 0.72 < inside.mean() < 0.9

    def test_low_confidence_rule(self):
        orders = garden_orders(6)
        st = customer_statistics(orders)
        table = forecast_customers(st, method="empirical-bayes", variance="log")
        expected = table["own_history_weight"] < 0.5
        pd.testing.assert_series_equal(table["low_confidence"], expected, check_names=False)

    def test_fit_scalars_are_kept(self):
        orders = garden_orders(7)
        st = customer_statistics(orders)
        fit = forecast_customers(st, method="empirical-bayes", variance="classic", orders=orders).attrs["fit"]
        sigma2 = pooled_variance(st, model="classic").sigma2
        assert fit["tau2"] == pytest.approx(sh.fit_between(st["mean"].to_numpy(), sigma2 / st["orders"]).tau2,
                                            rel=1e-12)
        assert fit["sigma2"] == pytest.approx(sigma2)
        assert "tail_summary" in fit and "centre" in fit
        assert "same amount in money" in fit["caution"]  # the classic spread model is offered with a warning
        quiet = forecast_customers(st, method="empirical-bayes", variance="log", orders=orders).attrs["fit"]
        assert quiet["caution"] == ""

    def test_segments_come_from_the_statistics(self):
        orders = garden_orders(8)
        st = customer_statistics(orders)
        table = forecast_customers(st, method="mta-segments", variance="classic")
        direct = sh.mta_segments(st["mean"].to_numpy(),
                                 pooled_variance(st, model="classic").sigma2 / st["orders"].to_numpy(),
                                 segments=st["segment"].to_numpy())
        np.testing.assert_allclose(table["expected_next_order"], direct.estimate, rtol=1e-12)

    def test_input_is_not_changed(self):
        orders = garden_orders(9)
        st = customer_statistics(orders)
        before_orders, before_stats = orders.copy(), st.copy()
        forecast_customers(st, method="mta-cv", variance="proportional", orders=orders)
        pd.testing.assert_frame_equal(orders, before_orders)
        pd.testing.assert_frame_equal(st, before_stats)


class TestOptionChecks:
    def test_unknown_method(self):
        with pytest.raises(OrderDataError, match=r"'best'.*mta-segments") as raised:
            forecast_customers(customer_statistics(garden_orders()), method="best")
        assert raised.value.option == "method"

    def test_unknown_variance(self):
        with pytest.raises(OrderDataError, match=r"'huge'.*proportional") as raised:
            forecast_customers(customer_statistics(garden_orders()), method="mta", variance="huge")
        assert raised.value.option == "variance"

    def test_retired_robust_spread_model(self):
        with pytest.raises(OrderDataError, match="retired") as raised:
            forecast_customers(customer_statistics(garden_orders()), method="mta", variance="robust")
        assert raised.value.option == "variance"

    @pytest.mark.parametrize("level", [0, 1, 1.5, -0.2, "90%"])
    def test_bad_levels(self, level):
        with pytest.raises(OrderDataError, match="level"):
            forecast_customers(customer_statistics(garden_orders()), method="mta", level=level)

    def test_segments_needed(self):
        with pytest.raises(OrderDataError, match="segment") as raised:
            forecast_customers(customer_statistics(garden_orders(segments=False)), method="mta-segments",
                               variance="log")
        assert raised.value.role == "segment"

    @pytest.mark.parametrize("method, variance", [("mta-cv", "classic"), ("james-stein-cv", "log")])
    def test_order_level_data_needed(self, method, variance):
        with pytest.raises(OrderDataError, match="order-level"):
            forecast_customers(customer_statistics(garden_orders()), method=method, variance=variance)


class TestAutomaticChoice:
    def test_uses_the_shops_own_check(self):
        from forecasting.selection import choose_method

        orders = garden_orders(10)
        st = customer_statistics(orders)
        chosen = choose_method(orders, st)
        table = forecast_customers(st, method="auto", orders=orders)
        assert table["method"].iloc[0] == chosen["method"]
        assert table["variance"].iloc[0] == chosen["variance"]
        assert table.attrs["fit"]["auto_choice"].startswith(chosen["method"])
        # the tail report suggests only a spread model that passed the same check
        assert chosen["spread_checked"][table.attrs["fit"]["tail_suggested_variance"]]

    def test_a_chosen_method_gets_its_spread_model_from_the_check(self):
        from forecasting.selection import choose_method

        orders = garden_orders(10)
        st = customer_statistics(orders)
        chosen = choose_method(orders, st, methods=["mta"])
        table = forecast_customers(st, method="mta", variance="auto", orders=orders)
        assert (table["method"].iloc[0], table["variance"].iloc[0]) == ("mta", chosen["variance"])

    def test_without_orders_the_model_based_default(self):
        table = forecast_customers(customer_statistics(garden_orders(11)), method="auto")
        assert (table["method"] == "empirical-bayes").all() and (table["variance"] == "log").all()
        assert "order-level table" in table.attrs["fit"]["auto_choice"]


def stats_of(customers, values):
    frame = pd.DataFrame({"customer": customers, "order_value": np.asarray(values, dtype=float),
                          "order_date": pd.Timestamp("2025-04-01")})
    return customer_statistics(frame), frame


SIMPLE_PAIRS = [(m, v) for m in METHODS if m != "mta-segments" for v in VARIANCE_MODELS]


class TestEdgeCases:
    def assert_finite(self, table):
        assert np.isfinite(table[FORECAST_COLUMNS[1:9]].to_numpy(dtype=float)).all()

    @pytest.mark.parametrize("method, variance", SIMPLE_PAIRS)
    def test_one_customer(self, method, variance):
        st, orders = stats_of(["fern"] * 3, [20.0, 25.0, 30.0])
        table = forecast_customers(st, method=method, variance=variance, orders=orders)
        self.assert_finite(table)
        if variance != "log" or method == "gamma-gamma":
            # with no one to compare with, every money-scale method keeps the customer's own average
            assert table["expected_next_order"].iloc[0] == pytest.approx(25.0, rel=1e-12)
        else:
            # on the log scale: the geometric mean times the smearing, less the part of it the
            # customer's own average already carries (weight 1: sigma2 / (2 n) + excess / n^2);
            # the shop-wide average (weight 0) keeps all of it
            fit = pooled_variance(st, model="log")
            geometric = np.exp(np.log([20.0, 25.0, 30.0]).mean())
            S, sigma2, excess = fit.details["smearing"], fit.sigma2, fit.details["excess"]
            expected = geometric * S if method == "pooled" else \
                geometric * S * np.exp(-sigma2 / 6 - excess / 9)
            assert table["expected_next_order"].iloc[0] == pytest.approx(expected, rel=1e-12)

    @pytest.mark.parametrize("T", [2, 3])
    @pytest.mark.parametrize("method, variance", SIMPLE_PAIRS)
    def test_two_and_three_customers(self, T, method, variance):
        names = ["fern", "ivy", "moss"][:T]
        st, orders = stats_of(np.repeat(names, 2), [20.0, 26.0, 50.0, 41.0, 8.0, 11.0][: 2 * T])
        self.assert_finite(forecast_customers(st, method=method, variance=variance, orders=orders))

    @pytest.mark.parametrize("method, variance", SIMPLE_PAIRS)
    def test_everyone_has_one_order(self, method, variance):
        st, orders = stats_of(["a", "b", "c", "d", "e"], [12.0, 30.0, 18.0, 55.0, 21.0])
        table = forecast_customers(st, method=method, variance=variance, orders=orders)
        self.assert_finite(table)
        # One definition (options.low_confidence): the flag follows the own-history weight shown.
        np.testing.assert_array_equal(table["low_confidence"], table["own_history_weight"] < 0.5)

    @pytest.mark.parametrize("method, variance", SIMPLE_PAIRS)
    def test_no_spread_within_customers(self, method, variance):
        st, orders = stats_of(np.repeat(["a", "b", "c", "d", "e"], 2), np.repeat([12.0, 30.0, 18.0, 55.0, 21.0], 2))
        table = forecast_customers(st, method=method, variance=variance, orders=orders)
        self.assert_finite(table)
        if method != "pooled":  # with no noise, every average is exact
            np.testing.assert_allclose(table["expected_next_order"], table["average_order_value"], rtol=1e-12)

    @pytest.mark.parametrize("method, variance", SIMPLE_PAIRS)
    def test_all_averages_equal(self, method, variance):
        st, orders = stats_of(np.repeat(["a", "b", "c", "d", "e"], 2), [10.0, 30.0] * 5)
        table = forecast_customers(st, method=method, variance=variance, orders=orders)
        self.assert_finite(table)
        expected = table["expected_next_order"].to_numpy()
        np.testing.assert_allclose(expected, expected[0], rtol=1e-12)
        if variance != "log" or method == "gamma-gamma":
            np.testing.assert_allclose(expected, 20.0, rtol=1e-12)

    @pytest.mark.parametrize("unit", [1e-6, 1e9])
    @pytest.mark.parametrize("method, variance", ALL_PAIRS)
    def test_tiny_and_huge_amounts(self, unit, method, variance):
        orders = garden_orders(12, customers=30, unit=unit)
        table = forecast_customers(customer_statistics(orders), method=method, variance=variance, orders=orders)
        self.assert_finite(table)
        reference = forecast_customers(customer_statistics(garden_orders(12, customers=30)), method=method,
                                       variance=variance, orders=garden_orders(12, customers=30))
        # money amounts scale with the unit (gamma-gamma only up to its optimiser's tolerance)
        np.testing.assert_allclose(table["expected_next_order"] / unit, reference["expected_next_order"],
                                   rtol=1e-4 if method == "gamma-gamma" else 1e-8)

    def test_no_customers(self):
        empty = customer_statistics(pd.DataFrame({"customer": pd.Series([], dtype=str),
                                                  "order_value": pd.Series([], dtype=float),
                                                  "order_date": pd.Series([], dtype="datetime64[ns]")}))
        with pytest.raises(OrderDataError, match="no customers"):
            forecast_customers(empty)


class TestForecastCommand:
    """``python -m forecasting forecast``, run as a user runs it."""

    def run_cli(self, *args):
        import subprocess
        from pathlib import Path

        root = Path(__file__).resolve().parents[1]
        return subprocess.run([sys.executable, "-m", "forecasting", "forecast", *args], cwd=root,
                              capture_output=True, text=True, timeout=120)

    def write_export(self, path):
        orders = garden_orders(13, customers=25)
        frame = pd.DataFrame({"Customer": orders["customer"], "Order Date": orders["order_date"].dt.strftime("%Y-%m-%d"),
                              "Total": orders["order_value"].round(2), "Channel": orders["segment"]})
        frame.loc[0, "Customer"] = "=HYPERLINK(1)"  # a hostile id must reach the CSV harmless
        frame.to_csv(path, index=False)
        return frame

    def test_json_and_csv(self, tmp_path):
        import json

        source = tmp_path / "orders.csv"
        frame = self.write_export(source)
        out = tmp_path / "forecast.csv"
        done = self.run_cli(str(source), "--customer", "Customer", "--value", "Total", "--date", "Order Date",
                            "--segment", "Channel", "--method", "mta-segments", "--variance", "classic", "--out",
                            str(out), "--json")
        assert done.returncode == 0, done.stderr
        payload = json.loads(done.stdout)
        assert set(payload) == {"customers", "method", "variance", "fit", "forecasts_written"}
        assert payload["customers"] == frame["Customer"].nunique()
        assert payload["method"] == "mta-segments" and payload["variance"] == "classic"
        assert payload["fit"]["segments"] == 2.0
        written = pd.read_csv(out)
        assert list(written.columns) == FORECAST_COLUMNS
        assert len(written) == payload["customers"]
        assert "'=HYPERLINK(1)" in written["customer"].tolist()
        # The file gives money to the cent and the weight to three decimals, of the library's numbers.
        result = read_orders(source, customer="Customer", value="Total", date="Order Date", segment="Channel")
        table = forecast_customers(customer_statistics(result.orders), method="mta-segments", variance="classic",
                                   orders=result.orders)
        for column, decimals in [(c, 2) for c in MONEY_COLUMNS] + [("own_history_weight", 3)]:
            np.testing.assert_allclose(written[column], table[column].round(decimals), rtol=0, atol=1e-9)
            assert not np.allclose(written[column], table[column], rtol=0, atol=1e-9)  # rounding did happen

    def test_bad_method_exits_2_with_the_allowed_names(self, tmp_path):
        source = tmp_path / "orders.csv"
        self.write_export(source)
        done = self.run_cli(str(source), "--method", "guess", "--out", str(tmp_path / "f.csv"))
        assert done.returncode == 2
        assert "--method" in done.stderr and "empirical-bayes" in done.stderr
        assert "Traceback" not in done.stderr

    def test_text_summary(self, tmp_path):
        source = tmp_path / "orders.csv"
        self.write_export(source)
        out = tmp_path / "f.csv"
        done = self.run_cli(str(source), "--method", "mta", "--variance", "log", "--out", str(out))
        assert done.returncode == 0, done.stderr
        assert "method: mta, variance: log" in done.stdout
        assert "caution" not in done.stdout
        cautioned = self.run_cli(str(source), "--method", "mta", "--variance", "classic", "--out", str(out))
        assert "caution: Its ranges assume every customer's orders vary by the same amount" in cautioned.stdout

    def test_defaults_are_automatic(self, tmp_path):
        source = tmp_path / "orders.csv"
        self.write_export(source)
        done = self.run_cli(str(source), "--out", str(tmp_path / "f.csv"), "--json")
        assert done.returncode == 0, done.stderr
        assert "auto_choice" in json.loads(done.stdout)["fit"]

    def test_text_summary_names_the_output(self, tmp_path):
        source = tmp_path / "orders.csv"
        self.write_export(source)
        out = tmp_path / "f.csv"
        done = self.run_cli(str(source), "--method", "mta", "--variance", "log", "--out", str(out))
        assert done.returncode == 0, done.stderr
        assert str(out) in done.stdout and out.exists()


class TestForecastPseudonyms:
    def test_ids_replaced_and_short_secret_refused(self, tmp_path):
        import subprocess
        import sys
        from pathlib import Path

        from forecasting.exports import pseudonymise

        root = Path(__file__).resolve().parents[1]
        plain, shared = tmp_path / "plain.csv", tmp_path / "shared.csv"
        base = [sys.executable, "-m", "forecasting", "forecast", "demo_data/messy_orders.csv"]
        assert subprocess.run(base + ["--out", str(plain)], cwd=root, capture_output=True).returncode == 0
        done = subprocess.run(base + ["--out", str(shared), "--pseudonym-salt", "a-secret-phrase"], cwd=root,
                              capture_output=True, text=True)
        assert done.returncode == 0, done.stderr
        original, hidden = pd.read_csv(plain), pd.read_csv(shared)
        expected = pseudonymise(original, salt="a-secret-phrase")["customer"]
        assert hidden["customer"].tolist() == expected.tolist()
        assert not set(hidden["customer"]) & set(original["customer"])
        short = subprocess.run(base + ["--out", str(shared), "--pseudonym-salt", "abc"], cwd=root,
                               capture_output=True, text=True)
        assert short.returncode == 2 and "at least 8 characters" in short.stderr
