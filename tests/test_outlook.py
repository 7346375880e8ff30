"""Tests for the revenue outlook, its backtest and value tiers (forecasting.outlook),
and the ``outlook`` / ``tiers`` commands.

External references used here:
- Fader, Hardie and Lee (2005), Marketing Science 24(2):275-284: the BG/NBD story
  used to simulate shops with known parameters, and eq. 10 (through
  forecasting.frequency, itself checked against mpmath, scipy.integrate and
  Monte Carlo in tests/test_frequency.py).
- The delta method (a first-order Taylor expansion; e.g. Casella and Berger,
  Statistical Inference, 2nd ed., section 5.5.4 -- from memory) as the slow twin
  of the parametric bootstrap.
- Plain pandas group-bys as the slow twins of cohort sums, actual revenue and
  the run-rate baseline.
- Moments of the lognormal distribution (mean exp(mu + s^2/2), variance
  (exp(s^2) - 1) exp(2 mu + s^2)) and conjugate normal updating of a lognormal
  level (e.g. Gelman et al., Bayesian Data Analysis, 3rd ed., section 2.5 --
  from memory) for the order values of shops simulated with known spend.
- Shops simulated past the cut-off from the BG/NBD story: the revenue that
  actually came in, against which the range for actual revenue must hold its
  stated coverage.
- OWASP "CSV Injection" guidance for the formula-safe exports.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError
from forecasting.frequency import (
    expected_orders_ahead,
    fit_order_frequency,
    month_of_year_index,
    repeat_history,
    seasonal_days,
)
from forecasting.outlook import (
    BACKTEST_COLUMNS,
    COHORT_COLUMNS,
    OUTLOOK_COLUMNS,
    TIER_SUMMARY_COLUMNS,
    _order_value_model,
    _spend_draws,
    _value_draws,
    assign_tiers,
    backtest_outlook,
    export_tiers,
    project_revenue,
    tier_summary,
)

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "demo_data" / "plant_shop_orders.csv"
MESSY = REPO / "demo_data" / "messy_orders.csv"
START = pd.Timestamp("2024-11-01")
# A shop in days: an active customer orders r/alpha = 0.01 times a day (about 3.7
# a year) and stops after a repeat order with chance a/(a+b) = 0.3 on average.
SHOP = (1.2, 120.0, 1.2, 2.8)


def simulate_orders(params, customers, seed, *, days=730, segments=("web", "instagram", "market")):
    """A shop simulated from the BG/NBD story, with dates and order values.

    First orders fall uniformly over the period; each active customer orders at
    Poisson rate lambda ~ Gamma(r, alpha) and stops after each repeat order with
    chance p ~ Beta(a, b). Values: a lognormal level per customer times lognormal
    noise (a typical basket around 50).
    """
    r, alpha, a, b = params
    rng = np.random.default_rng(seed)
    rate = rng.gamma(r, 1 / alpha, customers)
    stop = rng.beta(a, b, customers)
    first = rng.uniform(0, days, customers)
    level = np.exp(rng.normal(math.log(50), 0.5, customers))
    who, when = [np.arange(customers)], [first]
    clock, active = first.copy(), np.ones(customers, dtype=bool)
    while active.any():
        clock = clock + rng.exponential(1 / rate)
        active &= clock < days
        who.append(np.flatnonzero(active))
        when.append(clock[active])
        active &= rng.random(customers) >= stop
    who, when = np.concatenate(who), np.concatenate(when)
    order = np.lexsort((who, when))
    who, when = who[order], when[order]
    values = np.round(level[who] * np.exp(rng.normal(0, 0.4, len(who))), 2)
    group = np.asarray(segments, dtype=object)[rng.integers(0, len(segments), customers)]
    return pd.DataFrame({
        "customer": [f"C-{i:05d}" for i in who],
        "order_id": [f"FH-{100000 + k}" for k in range(len(who))],
        "order_date": START + pd.to_timedelta(np.round(when * 1440), unit="min"),
        "order_value": values,
        "segment": group[who],
    })


def simulate_histories(params, customers, seed, *, known_low=60.0, known_high=730.0):
    """Repeat histories straight from the model's story (as in tests/test_frequency.py):
    x = min(Poisson(lambda T), Geometric(p)) and t_x = T * Beta(x, n - x + 1)."""
    r, alpha, a, b = params
    rng = np.random.default_rng(seed)
    rate = rng.gamma(r, 1.0 / alpha, customers)
    stop = rng.beta(a, b, customers)
    known = rng.uniform(known_low, known_high, customers)
    arrivals = rng.poisson(rate * known)
    repeat = np.minimum(arrivals, rng.geometric(stop))
    to_last = np.where(repeat > 0, known * rng.beta(np.maximum(repeat, 1), arrivals - repeat + 1), 0.0)
    return pd.DataFrame({"repeat_orders": repeat, "days_to_last_order": to_last, "days_known": known})


def orders_from_histories(repeat, to_last, known, *, as_of=START + pd.Timedelta(days=800), value=1.0, seed=0):
    """Orders reproducing given repeat histories (x, t_x, T in days up to ``as_of``)."""
    rng = np.random.default_rng(seed)
    n = len(repeat)
    first = as_of - pd.to_timedelta(np.round(known * 86400), unit="s")
    rows_customer, rows_date = [np.arange(n)], [first]
    has = repeat > 0
    rows_customer.append(np.flatnonzero(has))
    rows_date.append(first[has] + pd.to_timedelta(np.round(to_last[has] * 86400), unit="s"))
    middle = np.repeat(np.arange(n), np.maximum(repeat - 1, 0))
    offsets = rng.uniform(0, 1, len(middle)) * to_last[middle]
    rows_customer.append(middle)
    rows_date.append(first[middle] + pd.to_timedelta(np.round(offsets * 86400), unit="s"))
    who = np.concatenate(rows_customer)
    dates = pd.DatetimeIndex(np.concatenate([np.asarray(d, dtype="datetime64[ns]") for d in rows_date]))
    return pd.DataFrame({"customer": [f"C-{i:05d}" for i in who], "order_id": [f"O{k}" for k in range(len(who))],
                         "order_date": dates, "order_value": value})


def stand_in_forecasts(orders, *, level=0.90, value=None):
    """A simple expected next-order value: each customer's plain average, with a
    normal interval from the pooled within-customer spread (or a fixed value)."""
    stats = customer_statistics(orders)
    n = stats["orders"].to_numpy()
    if value is not None:
        mean = np.full(len(stats), float(value))
        half = np.zeros(len(stats))
    else:
        mean = stats["mean"].to_numpy()
        pooled = stats["sum_sq_dev"].sum() / max((n - 1).sum(), 1)
        half = sps.norm.ppf(0.5 + level / 2) * np.sqrt(pooled / n)
    table = pd.DataFrame({
        "customer": stats.index.to_numpy(dtype=object),
        "orders": n,
        "average_order_value": stats["mean"].to_numpy(),
        "expected_next_order": mean,
        "own_history_weight": n / (n + 2.0),
        "expected_low": np.maximum(mean - half, 0.0),
        "expected_high": mean + half,
        "low_confidence": (n / (n + 2.0) < 0.5) | (n == 1),
    })
    table.attrs["fit"] = {"level": level, "method": "stand-in", "variance": "classic"}
    return table


# Spend of the simulated shops (simulate_orders): log level ~ N(log 50, 0.5^2) per
# customer, log order value = log level + N(0, 0.4^2).
LEVEL_MEAN, LEVEL_SD, ORDER_SD = math.log(50), 0.5, 0.4


def exact_forecasts(orders, *, next_level=0.80):
    """Next-order forecasts that know how the simulated shop spends.

    Conjugate normal updating of each customer's log level from their log order
    values gives the posterior N(m, v); the next order is then lognormal with
    log-mean m and log-variance v + ORDER_SD^2, so its mean is
    exp(m + (v + ORDER_SD^2) / 2) and its 80% range exp(m +- z sqrt(v + ORDER_SD^2)).
    The table has the columns and fit entries that forecast_customers provides.
    """
    stats = customer_statistics(orders)
    n = stats["orders"].to_numpy().astype(float)
    log_sum = np.log(orders["order_value"]).groupby(orders["customer"]).sum().reindex(stats.index).to_numpy()
    precision = 1 / LEVEL_SD ** 2 + n / ORDER_SD ** 2
    centre = (LEVEL_MEAN / LEVEL_SD ** 2 + log_sum / ORDER_SD ** 2) / precision
    spread = np.sqrt(1 / precision + ORDER_SD ** 2)
    z = sps.norm.ppf(0.5 + next_level / 2)
    half = sps.norm.ppf(0.95) / np.sqrt(precision)
    table = pd.DataFrame({
        "customer": stats.index.to_numpy(dtype=object),
        "orders": n.astype(np.int64),
        "average_order_value": stats["mean"].to_numpy(),
        "expected_next_order": np.exp(centre + spread ** 2 / 2),
        "own_history_weight": n / (n + 2.0),
        "expected_low": np.exp(centre + ORDER_SD ** 2 / 2 - half),
        "expected_high": np.exp(centre + ORDER_SD ** 2 / 2 + half),
        "next_order_low": np.exp(centre - z * spread),
        "next_order_high": np.exp(centre + z * spread),
        "low_confidence": n == 1,
    })
    table.attrs["fit"] = {"level": 0.90, "next_level": next_level, "sigma2_log": ORDER_SD ** 2,
                          "method": "exact", "variance": "log"}
    return table


@pytest.fixture(scope="module")
def shop_orders():
    return simulate_orders(SHOP, 1500, seed=7)


class TestProjectRevenue:
    def test_columns_and_customer_figures(self, shop_orders):
        forecasts = stand_in_forecasts(shop_orders)
        outlook = project_revenue(shop_orders, horizon=90, forecasts=forecasts, draws=100, seasons="none")
        table = outlook.customers
        assert list(table.columns) == OUTLOOK_COLUMNS
        assert list(outlook.cohorts.columns) == COHORT_COLUMNS
        # Slow twin: one customer at a time with the fitted parameters.
        stats = customer_statistics(shop_orders)
        history = repeat_history(stats)
        params = outlook.fit.params
        sample = np.random.default_rng(0).choice(len(table), 40, replace=False)
        for i in sample:
            row = history.iloc[i]
            expected = expected_orders_ahead(params, row["repeat_orders"], row["days_to_last_order"],
                                             row["days_known"], 90.0)
            assert table["expected_orders"].iloc[i] == pytest.approx(float(expected), rel=1e-12)
            assert table["projected_revenue"].iloc[i] == pytest.approx(
                float(expected) * forecasts["expected_next_order"].iloc[i], rel=1e-12)
        assert (table["projected_low"] <= table["projected_revenue"]).all()
        assert (table["projected_revenue"] <= table["projected_high"]).all()
        assert (table["mostly_shop_pattern"] == (table["own_history_weight"] < 0.5)).all()

    def test_cohorts_are_first_order_quarters_summed(self, shop_orders):
        outlook = project_revenue(shop_orders, horizon=60, forecasts=stand_in_forecasts(shop_orders), draws=50)
        # Slow twin: pandas Period labels of each customer's first order, group-by sums.
        first = shop_orders.groupby("customer")["order_date"].min()
        quarter = first.dt.to_period("Q").map(lambda p: f"{p.year}-Q{p.quarter}")
        per_customer = outlook.customers.set_index("customer")
        expected = per_customer["projected_revenue"].groupby(quarter.reindex(per_customer.index)).sum()
        cohorts = outlook.cohorts.set_index("cohort")
        np.testing.assert_allclose(cohorts["projected_revenue"], expected.reindex(cohorts.index), rtol=1e-12)
        assert cohorts["customers"].sum() == len(first)
        assert cohorts["share_of_projected_revenue"].sum() == pytest.approx(1.0)
        assert outlook.total["projected_revenue"] == pytest.approx(per_customer["projected_revenue"].sum())
        assert (cohorts["projected_low"] <= cohorts["projected_revenue"]).all()
        assert (cohorts["projected_revenue"] <= cohorts["projected_high"]).all()

    def test_months_and_segments(self, shop_orders):
        forecasts = stand_in_forecasts(shop_orders)
        by_month = project_revenue(shop_orders, horizon=30, by="month", forecasts=forecasts, draws=30)
        assert by_month.cohorts["cohort"].str.fullmatch(r"\d{4}-\d{2}").all()
        assert len(by_month.cohorts) == 24
        by_channel = project_revenue(shop_orders, horizon=30, by="segment", forecasts=forecasts, draws=30)
        assert by_channel.cohorts["cohort"].tolist() == ["instagram", "market", "web"]
        latest = shop_orders.sort_values("order_date").groupby("customer")["segment"].last()
        counts = latest.value_counts().sort_index()
        assert by_channel.cohorts["customers"].tolist() == counts.tolist()

    def test_same_seed_same_interval(self, shop_orders):
        forecasts = stand_in_forecasts(shop_orders)
        one = project_revenue(shop_orders, horizon=90, forecasts=forecasts, draws=60, seed=3)
        two = project_revenue(shop_orders, horizon=90, forecasts=forecasts, draws=60, seed=3)
        other = project_revenue(shop_orders, horizon=90, forecasts=forecasts, draws=60, seed=4)
        pd.testing.assert_frame_equal(one.cohorts, two.cohorts)
        assert one.total["projected_low"] != other.total["projected_low"]

    def test_parameter_interval_matches_delta_method(self):
        # Slow twin: delta method for the total expected orders (value 1 for everyone,
        # no value uncertainty): sd^2 = g' Sigma g with g the finite-difference
        # gradient of the total in the log-parameters. The bootstrap's 90% interval
        # half-width should be about 1.645 sd (tolerance 15%: skew and Monte Carlo).
        history = simulate_histories(SHOP, 1000, seed=12)
        x, t_x, age = (history[c].to_numpy() for c in ("repeat_orders", "days_to_last_order", "days_known"))
        orders = orders_from_histories(x, t_x, age)
        forecasts = stand_in_forecasts(orders, value=1.0)
        outlook = project_revenue(orders, horizon=180, forecasts=forecasts, draws=3000, seed=1, seasons="none")
        fit = outlook.fit
        centre = np.log(fit.params)
        stats = customer_statistics(orders)
        hist = repeat_history(stats, as_of=outlook.as_of)
        args = [hist[c].to_numpy() for c in ("repeat_orders", "days_to_last_order", "days_known")]

        def total(logs):
            return expected_orders_ahead(tuple(np.exp(logs)), *args, 180.0).sum()

        step = 1e-5
        gradient = np.array([(total(centre + step * e) - total(centre - step * e)) / (2 * step) for e in np.eye(4)])
        sd = math.sqrt(gradient @ fit.covariance @ gradient)
        half = (outlook.total["projected_high"] - outlook.total["projected_low"]) / 2
        assert half == pytest.approx(sps.norm.ppf(0.95) * sd, rel=0.15)
        assert outlook.total["projected_revenue"] == pytest.approx(total(centre), rel=1e-12)

    def test_interval_covers_the_true_expectation(self):
        # Simulated shops with known parameters: the 90% interval for the total
        # expected orders should contain the total under the true parameters in
        # about 90% of shops. 30 shops; accept 23 or more (binomial, about 2.5 sd below 27).
        inside = 0
        for seed in range(30):
            history = simulate_histories(SHOP, 1000, seed=500 + seed)
            x, t_x, age = (history[c].to_numpy() for c in ("repeat_orders", "days_to_last_order", "days_known"))
            orders = orders_from_histories(x, t_x, age, seed=seed)
            stats = customer_statistics(orders)
            hist = repeat_history(stats)
            truth = expected_orders_ahead(SHOP, hist["repeat_orders"], hist["days_to_last_order"],
                                          hist["days_known"], 120.0).sum()
            outlook = project_revenue(orders, horizon=120, forecasts=stand_in_forecasts(orders, value=1.0),
                                      draws=150, seed=seed, seasons="none")
            inside += outlook.total["projected_low"] <= truth <= outlook.total["projected_high"]
        assert inside >= 23, inside

    def test_as_of_later_than_last_order(self, shop_orders):
        forecasts = stand_in_forecasts(shop_orders)
        now = project_revenue(shop_orders, horizon=90, forecasts=forecasts, draws=30)
        later = project_revenue(shop_orders, horizon=90, as_of=now.as_of + pd.Timedelta(days=100),
                                forecasts=forecasts, draws=30)
        assert (later.customers["days_known"] - now.customers["days_known"]).round(9).eq(100).all()
        # More silence means a lower chance of still being active.
        assert (later.customers["chance_active"] <= now.customers["chance_active"] + 1e-12).all()

    def test_input_untouched(self, shop_orders):
        before = shop_orders.copy()
        forecasts = stand_in_forecasts(shop_orders)
        forecasts_before = forecasts.copy()
        project_revenue(shop_orders, horizon=30, forecasts=forecasts, draws=20)
        pd.testing.assert_frame_equal(shop_orders, before)
        pd.testing.assert_frame_equal(forecasts, forecasts_before)

    @pytest.mark.parametrize(
        "options, message",
        [({"horizon": 0}, "--horizon must be more than zero"),
         ({"horizon": "soon"}, "--horizon must be a number"),
         ({"horizon": 30, "by": "region"}, "--by"),
         ({"horizon": 30, "by": "order_id"}, "--by"),
         ({"horizon": 30, "level": 1.5}, "between 0 and 1"),
         ({"horizon": 30, "draws": 5}, "at least 20"),
         ({"horizon": 30, "as_of": "2020-01-01"}, "earlier than the last order")],
    )
    def test_bad_options(self, shop_orders, options, message):
        with pytest.raises(OrderDataError, match=message):
            project_revenue(shop_orders, forecasts=stand_in_forecasts(shop_orders), **options)

    def test_forecasts_for_other_customers_refused(self, shop_orders):
        forecasts = stand_in_forecasts(shop_orders).iloc[5:]
        with pytest.raises(OrderDataError, match="no expected next-order value"):
            project_revenue(shop_orders, horizon=30, forecasts=forecasts)

    def test_with_the_shops_own_forecasts(self, shop_orders):
        import forecasting.forecasts as forecasts_module
        outlook = project_revenue(shop_orders, horizon=90, draws=50)
        direct = forecasts_module.forecast_customers(customer_statistics(shop_orders), method="mta",
                                                     variance="classic", orders=shop_orders)
        np.testing.assert_allclose(outlook.customers["expected_next_order"], direct["expected_next_order"])
        assert outlook.summary()["method"] == "mta"


class TestTooLittleHistory:
    def test_nan_with_reasons_and_a_message(self):
        # The small hand-made messy file: 9 customers, too few to fit how often they come back.
        from forecasting.outlook import require_projection
        from forecasting.reading import read_orders

        orders = read_orders(MESSY).orders
        outlook = project_revenue(orders, horizon=90, draws=20)
        assert math.isnan(outlook.total["projected_revenue"])
        assert outlook.fit.notes and not np.isfinite(outlook.fit.covariance).any()
        with pytest.raises(OrderDataError, match="could not be fitted"):
            require_projection(outlook)
        # Tiers by next-order value still work; revenue shares are unknown.
        summary = tier_summary(assign_tiers(outlook.customers))
        assert summary["customers"].sum() == 9
        assert summary["share_of_projected_revenue"].isna().all()


class TestValueDraws:
    def test_mean_and_spread_kept_and_positive(self):
        # Reference: moments of the Gamma distribution (mean k theta, variance k theta^2);
        # Monte Carlo tolerance 4 standard errors.
        rng = np.random.default_rng(5)
        mean = np.array([50.0, 20.0, 300.0, 40.0])
        sd = np.array([5.0, 60.0, 0.0, 40.0])
        draws = _value_draws(mean, sd, 200_000, rng)
        assert (draws >= 0).all()
        np.testing.assert_array_equal(draws[:, 2], 300.0)
        for k in (0, 1, 3):
            assert abs(draws[:, k].mean() - mean[k]) < 4 * sd[k] / math.sqrt(200_000)
            assert draws[:, k].std() == pytest.approx(sd[k], rel=0.03)


class TestOrderValueModel:
    def test_from_the_next_order_range_and_the_shops_spread(self):
        # The shop's own forecasts: the lognormal's total log-variance is read off the
        # 80% next-order range, split into the shop's per-order sigma2_log and the rest;
        # its mean (lognormal moments) is the expected next order.
        import forecasting.forecasts as forecasts_module
        orders = simulate_orders(SHOP, 300, seed=3)
        stats = customer_statistics(orders)
        table = forecasts_module.forecast_customers(stats, method="mta", variance="classic", orders=orders)
        fit = table.attrs["fit"]
        centre, level_sd, order_sd = _order_value_model(table, fit, stats)
        total = level_sd ** 2 + order_sd ** 2
        z = sps.norm.ppf(0.5 + fit["next_level"] / 2)
        width = np.log(table["next_order_high"] / table["next_order_low"]).to_numpy()
        np.testing.assert_allclose(np.sqrt(total), width / (2 * z), rtol=1e-12)
        np.testing.assert_allclose(order_sd ** 2, fit["sigma2_log"], rtol=1e-12)
        np.testing.assert_allclose(np.exp(centre + total / 2), table["expected_next_order"], rtol=1e-12)
        # More orders, less unknown about the customer's level.
        many, one = table["orders"].to_numpy() >= 5, table["orders"].to_numpy() == 1
        assert level_sd[many].max() < level_sd[one].min()

    def test_exact_forecasts_give_the_true_predictive(self):
        orders = simulate_orders(SHOP, 200, seed=4)
        table = exact_forecasts(orders)
        centre, level_sd, order_sd = _order_value_model(table, table.attrs["fit"], customer_statistics(orders))
        np.testing.assert_allclose(order_sd, ORDER_SD, rtol=1e-12)
        n = table["orders"].to_numpy()
        np.testing.assert_allclose(level_sd ** 2, 1 / (1 / LEVEL_SD ** 2 + n / ORDER_SD ** 2), rtol=1e-9)

    def test_without_a_range_the_pooled_log_spread(self):
        # Slow twin: pooled within-customer variance of log order values, by pandas.
        orders = simulate_orders(SHOP, 200, seed=5)
        stats = customer_statistics(orders)
        table = stand_in_forecasts(orders)
        centre, level_sd, order_sd = _order_value_model(table, {}, stats)
        logs = np.log(orders["order_value"])
        deviations = logs - logs.groupby(orders["customer"]).transform("mean")
        pooled = (deviations ** 2).sum() / (len(orders) - orders["customer"].nunique())
        np.testing.assert_allclose(order_sd ** 2, pooled, rtol=1e-9)
        assert (level_sd == 0).all()
        np.testing.assert_allclose(np.exp(centre + pooled / 2), table["expected_next_order"], rtol=1e-12)


class TestSpendDraws:
    def test_equals_a_loop_over_orders(self, monkeypatch):
        # Slow twin: walk the cells in order, one normal draw per order from the same
        # stream; blocks of 7 orders must give the same sums as one block.
        import forecasting.outlook as outlook_module

        counts = np.array([[0, 3, 1, 12], [2, 0, 5, 0], [1, 1, 0, 30]])
        sd = np.array([0.2, 0.5, 0.0, 1.1])
        rng = np.random.default_rng(4)
        slow = np.zeros(counts.shape)
        for d in range(counts.shape[0]):
            for c in range(counts.shape[1]):
                slow[d, c] = np.exp(sd[c] * rng.standard_normal(counts[d, c])).sum()
        np.testing.assert_allclose(_spend_draws(counts, sd, np.random.default_rng(4)), slow, rtol=1e-12)
        monkeypatch.setattr(outlook_module, "_ORDERS_PER_BLOCK", 7)
        np.testing.assert_allclose(_spend_draws(counts, sd, np.random.default_rng(4)), slow, rtol=1e-12)

    def test_lognormal_moments(self):
        # Reference: a sum of n lognormal(0, s^2) values has mean n exp(s^2/2) and
        # variance n (exp(s^2) - 1) exp(s^2). Tolerance: 4 standard errors / 5% on the variance.
        counts = np.full((200_000, 2), 3)
        sd = np.array([0.4, 0.9])
        sums = _spend_draws(counts, sd, np.random.default_rng(9))
        mean = 3 * np.exp(sd ** 2 / 2)
        var = 3 * (np.exp(sd ** 2) - 1) * np.exp(sd ** 2)
        assert np.all(np.abs(sums.mean(axis=0) - mean) < 4 * np.sqrt(var / len(sums)))
        np.testing.assert_allclose(sums.var(axis=0), var, rtol=0.05)


class TestRangeForActualRevenue:
    def test_covers_simulated_revenue_at_its_stated_rate(self):
        # Shops simulated from the BG/NBD story for 730 + 120 days (simulate_orders);
        # fitted on the first 730, with next-order forecasts that know the shop's spend
        # (exact_forecasts), so what is tested is the order-count and value simulation
        # and the parameter draws. 80% ranges, 24 shops x 9 quarterly cohorts = 216
        # cohort ranges: the share holding the actual cohort revenue must lie within
        # 0.80 +- 0.08 (about 3 binomial standard errors; an offline run of 200 shops
        # gave 0.80), and the range of the expected amount must hold far fewer (it
        # leaves out chance; offline 0.22).
        inside = inside_expected = ranges = totals_inside = 0
        for seed in range(24):
            orders = simulate_orders(SHOP, 600, seed=300 + seed, days=850)
            cut = START + pd.Timedelta(days=730)
            before, after = orders[orders["order_date"] < cut], orders[orders["order_date"] >= cut]
            outlook = project_revenue(before, horizon=120, as_of=cut, forecasts=exact_forecasts(before),
                                      level=0.80, draws=150, seed=seed, seasons="none")
            groups = outlook.customers.set_index("customer")["cohort"]
            actual_by_customer = after.groupby("customer")["order_value"].sum().reindex(groups.index, fill_value=0)
            actual = actual_by_customer.groupby(groups).sum().reindex(outlook.cohorts["cohort"]).to_numpy()
            cohorts = outlook.cohorts
            inside += int(((cohorts["revenue_range_low"] <= actual) & (actual <= cohorts["revenue_range_high"])).sum())
            inside_expected += int(((cohorts["projected_low"] <= actual) & (actual <= cohorts["projected_high"])).sum())
            ranges += len(cohorts)
            total = actual_by_customer.sum()
            totals_inside += outlook.total["revenue_range_low"] <= total <= outlook.total["revenue_range_high"]
        assert abs(inside / ranges - 0.80) <= 0.08, (inside, ranges)
        assert inside_expected / ranges < 0.5
        # Totals: 24 shops, expected 19.2 inside (binomial sd 2): accept 14 to 23.
        assert 14 <= totals_inside <= 23, totals_inside

    def test_wider_than_the_expected_amount_and_seeded(self, shop_orders):
        forecasts = exact_forecasts(shop_orders)
        one = project_revenue(shop_orders, horizon=90, forecasts=forecasts, draws=100, seed=2)
        two = project_revenue(shop_orders, horizon=90, forecasts=forecasts, draws=100, seed=2)
        pd.testing.assert_frame_equal(one.cohorts, two.cohorts)
        other = project_revenue(shop_orders, horizon=90, forecasts=forecasts, draws=100, seed=3)
        assert other.total["revenue_range_low"] != one.total["revenue_range_low"]
        cohorts = one.cohorts
        assert (cohorts["revenue_range_low"] < cohorts["projected_low"]).all()
        assert (cohorts["revenue_range_high"] > cohorts["projected_high"]).all()
        # One customer over 90 days: most order nothing, so the range starts at zero.
        assert (one.customers["revenue_range_low"] == 0).mean() > 0.5
        assert (one.customers["revenue_range_high"] >= 0).all()

    def test_memory_blocks_do_not_change_the_answer(self, shop_orders, monkeypatch):
        # Tiny blocks of customers and of orders give the same range up to Monte Carlo
        # noise (different streams; 400 draws: within 4%).
        import forecasting.outlook as outlook_module

        forecasts = exact_forecasts(shop_orders)
        whole = project_revenue(shop_orders, horizon=60, forecasts=forecasts, draws=400, seasons="none")
        monkeypatch.setattr(outlook_module, "_SIMULATION_CELLS_PER_CHUNK", 4000)
        monkeypatch.setattr(outlook_module, "_ORDERS_PER_BLOCK", 500)
        blocked = project_revenue(shop_orders, horizon=60, forecasts=forecasts, draws=400, seasons="none")
        for end in ("revenue_range_low", "revenue_range_high"):
            assert blocked.total[end] == pytest.approx(whole.total[end], rel=0.04)


class TestSeasonalAdjustment:
    def test_month_index_from_the_orders_on_the_seasonal_clock(self, shop_orders):
        # Slow twin from the public pieces: the plain fit's expected orders over the
        # horizon measured in seasonal days.
        forecasts = stand_in_forecasts(shop_orders)
        outlook = project_revenue(shop_orders, horizon=75, forecasts=forecasts, draws=30, seasons="month")
        stats = customer_statistics(shop_orders)
        history = repeat_history(stats)
        fit = fit_order_frequency(history)
        index = month_of_year_index(shop_orders, fit)
        pd.testing.assert_frame_equal(outlook.season_index, index)
        clock = seasonal_days(outlook.as_of, 75, index["index"])
        assert outlook.seasonal_days == pytest.approx(clock, rel=1e-12)
        np.testing.assert_allclose(outlook.customers["expected_orders"], fit.expected_orders(history, clock),
                                   rtol=1e-12)
        assert outlook.summary()["seasons"] == "month"

    def test_auto_needs_a_full_year(self, shop_orders):
        forecasts = stand_in_forecasts(shop_orders)
        auto = project_revenue(shop_orders, horizon=30, forecasts=forecasts, draws=20)
        assert auto.seasons == "month"
        young = shop_orders[shop_orders["order_date"] < START + pd.Timedelta(days=300)]
        short = project_revenue(young, horizon=30, forecasts=stand_in_forecasts(young), draws=20)
        assert short.seasons == "none" and short.season_index is None and short.seasonal_days == 30
        with pytest.raises(OrderDataError, match="full year"):
            project_revenue(young, horizon=30, forecasts=stand_in_forecasts(young), draws=20, seasons="month")
        with pytest.raises(OrderDataError, match="--seasons"):
            project_revenue(young, horizon=30, forecasts=stand_in_forecasts(young), draws=20, seasons="weekly")

    def test_backtest_index_sees_only_orders_before_the_cutoff(self, shop_orders):
        result = backtest_outlook(shop_orders, horizon=60, cutoff="2026-04-01", draws=20, seasons="month")
        before = shop_orders[shop_orders["order_date"] < pd.Timestamp("2026-04-01")]
        fit = fit_order_frequency(repeat_history(customer_statistics(before), as_of="2026-04-01"))
        pd.testing.assert_frame_equal(result.outlook.season_index,
                                      month_of_year_index(before, fit, as_of="2026-04-01"))
        assert result.total["seasons"] == "month"
        plain = backtest_outlook(shop_orders, horizon=60, cutoff="2026-04-01", draws=20, seasons="none")
        assert plain.total["seasons"] == "none" and plain.total["seasonal_days"] == 60


class TestBacktestOutlook:
    @pytest.fixture(scope="class")
    @classmethod
    def backtest(cls, shop_orders):
        return backtest_outlook(shop_orders, horizon=120, draws=100)

    def test_cutoff_and_window(self, shop_orders, backtest):
        end = shop_orders["order_date"].max().normalize() + pd.Timedelta(days=1)
        assert backtest.window_days == 120
        assert backtest.cutoff == end - pd.Timedelta(days=120)
        assert list(backtest.cohorts.columns) == BACKTEST_COLUMNS

    def test_default_leaves_last_fifth(self, shop_orders):
        result = backtest_outlook(shop_orders, draws=20)
        first = shop_orders["order_date"].min().normalize()
        end = shop_orders["order_date"].max().normalize() + pd.Timedelta(days=1)
        span = (end - first).days
        assert result.window_days == round(0.2 * span)
        assert result.cutoff == end - pd.Timedelta(days=round(0.2 * span))

    def test_long_horizon_falls_back_to_last_fifth(self, shop_orders):
        result = backtest_outlook(shop_orders, horizon=500, draws=20)
        assert result.window_days == round(0.2 * 730)

    def test_actual_and_run_rate_by_plain_pandas(self, shop_orders, backtest):
        # Slow twin: plain pandas on the raw orders.
        cutoff, end = backtest.cutoff, backtest.cutoff + pd.Timedelta(days=backtest.window_days)
        before = shop_orders[shop_orders["order_date"] < cutoff]
        window = shop_orders[(shop_orders["order_date"] >= cutoff) & (shop_orders["order_date"] < end)]
        first = before.groupby("customer")["order_date"].min()
        quarter = first.dt.to_period("Q").map(lambda p: f"{p.year}-Q{p.quarter}")
        known_window = window[window["customer"].isin(first.index)]
        actual = known_window.groupby(known_window["customer"].map(quarter))["order_value"].sum()
        cohorts = backtest.cohorts.set_index("cohort")
        np.testing.assert_allclose(cohorts["actual_revenue"], actual.reindex(cohorts.index, fill_value=0.0))
        assert backtest.total["new_customer_revenue"] == pytest.approx(
            window.loc[~window["customer"].isin(first.index), "order_value"].sum())
        # Run rate: repeat orders per day known, times the window, times the plain average.
        count = before.groupby("customer").size()
        mean = before.groupby("customer")["order_value"].mean()
        days = (cutoff - first).dt.total_seconds() / 86400
        pace = (count - 1) / days * backtest.window_days * mean
        run_rate = pace.groupby(quarter).sum()
        np.testing.assert_allclose(cohorts["run_rate_revenue"], run_rate.reindex(cohorts.index), rtol=1e-10)
        np.testing.assert_allclose(cohorts["error"], cohorts["projected_revenue"] - cohorts["actual_revenue"])

    def test_projection_is_the_outlook_at_the_cutoff(self, shop_orders, backtest):
        before = shop_orders[shop_orders["order_date"] < backtest.cutoff]
        direct = project_revenue(before, horizon=backtest.window_days, as_of=backtest.cutoff, draws=100)
        np.testing.assert_allclose(backtest.cohorts["projected_revenue"], direct.cohorts["projected_revenue"])

    def test_close_on_a_shop_that_follows_the_model(self, backtest):
        # The simulated shop follows the BG/NBD story exactly (no seasons), so the
        # projection should land near what came in (within 15% overall) and
        # nearer than the run rate, which ignores that customers stop.
        assert abs(backtest.total["error_pct"]) < 15
        assert abs(backtest.total["error"]) < abs(backtest.total["run_rate_error"])

    def test_given_cutoff(self, shop_orders):
        result = backtest_outlook(shop_orders, horizon=400, cutoff="2026-06-01", draws=20)
        assert result.cutoff == pd.Timestamp("2026-06-01")
        end = shop_orders["order_date"].max().normalize() + pd.Timedelta(days=1)
        assert result.window_days == (end - pd.Timestamp("2026-06-01")).days

    @pytest.mark.parametrize("cutoff", ["2019-01-01", "2031-01-01", "next week"])
    def test_bad_cutoff(self, shop_orders, cutoff):
        with pytest.raises(OrderDataError, match="--cutoff"):
            backtest_outlook(shop_orders, cutoff=cutoff, draws=20)


def tier_table(values, weights=None, revenue=None):
    n = len(values)
    table = pd.DataFrame({
        "customer": [f"C-{i:03d}" for i in range(n)],
        "expected_next_order": np.asarray(values, dtype=float),
        "own_history_weight": np.full(n, 0.8) if weights is None else np.asarray(weights, dtype=float),
    })
    if revenue is not None:
        table["projected_revenue"] = np.asarray(revenue, dtype=float)
    return table


def naive_share_tiers(values, shares):
    """Slow twin of the share rule: walk down the sorted list; a tier takes its
    quota of customers plus anyone tied with the last one taken."""
    order = sorted(range(len(values)), key=lambda i: -values[i])
    tiers = [None] * len(values)
    position = 0
    for tier, share in enumerate(shares):
        quota = math.ceil(sum(shares[: tier + 1]) * len(values) - 1e-9)
        if position >= quota:
            continue
        boundary = values[order[quota - 1]]
        while position < len(values) and values[order[position]] >= boundary:
            tiers[order[position]] = tier
            position += 1
    for i in range(position, len(values)):
        tiers[order[i]] = len(shares)
    return tiers


class TestAssignTiers:
    def test_default_shares(self):
        # Input deliberately not sorted.
        values = [12.0, 95.0, 40.0, 7.0, 66.0, 23.0, 51.0, 88.0, 30.0, 15.0]
        tiered = assign_tiers(tier_table(values))
        assert tiered["customer"].tolist()[:2] == ["C-001", "C-007"]
        assert tiered["tier"].value_counts().to_dict() == {"occasional": 6, "regulars": 3, "top customers": 1}
        assert tiered["rank"].tolist() == list(range(1, 11))
        assert tiered.attrs["tiers"][0] == {"tier": "top customers", "rule": "top 10%"}

    def test_matches_naive_rule_with_ties(self):
        rng = np.random.default_rng(2)
        for _ in range(30):
            n = int(rng.integers(1, 60))
            values = rng.integers(1, 8, n).astype(float).tolist()  # many ties
            shares = (0.1, 0.3)
            tiered = assign_tiers(tier_table(values), shares=shares)
            got = tiered.set_index("customer")["tier"].map({"top customers": 0, "regulars": 1, "occasional": 2})
            expected = naive_share_tiers(values, list(shares))
            assert [got[f"C-{i:03d}"] for i in range(n)] == expected

    def test_ties_are_never_split(self):
        tiered = assign_tiers(tier_table([50.0] * 4 + [10.0] * 6), shares=(0.1, 0.3))
        assert tiered.loc[tiered["expected_next_order"] == 50, "tier"].unique().tolist() == ["top customers"]
        assert tiered.loc[tiered["expected_next_order"] == 50, "rank"].unique().tolist() == [1]

    def test_all_equal_is_one_tier(self):
        tiered = assign_tiers(tier_table([20.0] * 7))
        assert set(tiered["tier"]) == {"top customers"}

    def test_one_customer(self):
        tiered = assign_tiers(tier_table([20.0]))
        assert tiered["tier"].tolist() == ["top customers"]

    def test_shares_adding_to_one_leave_no_rest(self):
        tiered = assign_tiers(tier_table(list(range(1, 11))), shares=(0.5, 0.5))
        assert [t["tier"] for t in tiered.attrs["tiers"]] == ["top customers", "everyone else"]
        assert tiered["tier"].value_counts().tolist() == [5, 5]

    def test_money_thresholds(self):
        tiered = assign_tiers(tier_table([10.0, 49.99, 50.0, 199.0, 200.0, 900.0]), thresholds="200,50")
        tiers = tiered.set_index("expected_next_order")["tier"]
        assert tiers[900.0] == tiers[200.0] == "top customers"
        assert tiers[199.0] == tiers[50.0] == "regulars"
        assert tiers[49.99] == tiers[10.0] == "occasional"
        assert [t["rule"] for t in tiered.attrs["tiers"]] == ["200.00 and above", "50.00 to under 200.00",
                                                              "under 50.00"]

    def test_rank_by_revenue(self):
        tiered = assign_tiers(tier_table([10.0, 20.0, 30.0], revenue=[300.0, 5.0, 40.0]), rank="revenue",
                              shares=(0.3,))
        assert tiered["customer"].tolist() == ["C-000", "C-002", "C-001"]
        assert tiered["tier"].tolist() == ["top customers", "everyone else", "everyone else"]

    def test_shop_pattern_flag(self):
        tiered = assign_tiers(tier_table([1.0, 2.0, 3.0], weights=[0.49, 0.5, 0.9]))
        flags = tiered.set_index("customer")["mostly_shop_pattern"]
        assert flags.to_dict() == {"C-000": True, "C-001": False, "C-002": False}

    def test_custom_names(self):
        tiered = assign_tiers(tier_table([1.0, 2.0, 3.0, 4.0]), shares=(0.25,), names=("ferns", "seedlings"))
        assert tiered["tier"].tolist() == ["ferns", "seedlings", "seedlings", "seedlings"]

    def test_input_untouched(self):
        table = tier_table([3.0, 1.0, 2.0])
        before = table.copy()
        assign_tiers(table)
        pd.testing.assert_frame_equal(table, before)

    @pytest.mark.parametrize(
        "options, message",
        [({"rank": "size"}, "--rank"),
         ({"shares": (0.1,), "thresholds": (50,)}, "not both"),
         ({"shares": (0.6, 0.6)}, "--quantiles"),
         ({"shares": (0.0,)}, "--quantiles"),
         ({"shares": "a,b"}, "--quantiles"),
         ({"thresholds": (-5,)}, "--thresholds"),
         ({"thresholds": (50, 50)}, "--thresholds"),
         ({"names": ("one",)}, "tier names"),
         ({"rank": "revenue"}, "projected_revenue")],
    )
    def test_bad_options(self, options, message):
        with pytest.raises(OrderDataError, match=message):
            assign_tiers(tier_table([1.0, 2.0, 3.0]), **options)


class TestTierSummary:
    def test_sizes_shares_and_confidence(self):
        rng = np.random.default_rng(8)
        values = rng.lognormal(4, 0.6, 200)
        weights = rng.uniform(0.2, 1.0, 200)
        revenue = values * rng.uniform(0.2, 3, 200)
        tiered = assign_tiers(tier_table(values, weights, revenue))
        summary = tier_summary(tiered)
        assert list(summary.columns) == TIER_SUMMARY_COLUMNS
        assert summary["customers"].tolist() == [20, 60, 120]
        assert summary["share_of_customers"].sum() == pytest.approx(1.0)
        assert summary["share_of_projected_revenue"].sum() == pytest.approx(1.0)
        # Slow twin: pandas group-by.
        grouped = tiered.groupby("tier")
        by_tier = summary.set_index("tier")
        np.testing.assert_allclose(by_tier["average_own_history_weight"],
                                   grouped["own_history_weight"].mean().reindex(by_tier.index))
        np.testing.assert_allclose(by_tier["projected_revenue"],
                                   grouped["projected_revenue"].sum().reindex(by_tier.index))
        assert by_tier["mostly_shop_pattern"].sum() == int((weights < 0.5).sum())
        assert (summary["lowest_figure"].iloc[:-1].to_numpy() >= summary["highest_figure"].iloc[1:].to_numpy()).all()

    def test_empty_tier_kept_and_no_revenue(self):
        tiered = assign_tiers(tier_table([10.0, 20.0]), thresholds=(500, 15))
        summary = tier_summary(tiered)
        assert summary["customers"].tolist() == [0, 1, 1]
        assert summary["projected_revenue"].isna().all()


class TestExportTiers:
    def test_files_and_formula_safety(self, tmp_path):
        table = tier_table([5.0, 80.0, 40.0, 12.0], revenue=[1.0, 2.0, 3.0, 4.0])
        table.loc[0, "customer"] = "=HYPERLINK(\"http://x\")"
        tiered = assign_tiers(table, shares=(0.25, 0.25))
        written = export_tiers(tiered, tmp_path / "tiers.csv")
        assert set(written) == {"all", "top customers", "regulars", "occasional"}
        assert written["top customers"].name == "tiers-top-customers.csv"
        everything = pd.read_csv(written["all"])
        assert len(everything) == 4
        # OWASP CSV Injection: a cell starting with "=" is prefixed with a quote.
        assert "'=HYPERLINK(\"http://x\")" in everything["customer"].tolist()
        top = pd.read_csv(written["top customers"])
        assert top["customer"].tolist() == ["C-001"]
        assert pd.read_csv(written["occasional"])["tier"].unique().tolist() == ["occasional"]

    def test_in_memory_lists_equal_the_files(self, tmp_path):
        from forecasting.outlook import tier_csv_texts

        tiered = assign_tiers(tier_table([5.0, 80.0, 40.0, 12.0], revenue=[1.0, 2.0, 3.0, 4.0]), shares=(0.25, 0.25))
        written = export_tiers(tiered, tmp_path / "tiers.csv")
        texts = tier_csv_texts(tiered)
        assert set(texts) == set(written)
        for name, path in written.items():
            assert texts[name].encode("utf-8") == path.read_bytes()


# --------------------------------------------------------------------------- #
# Command line (run as a user would, in a separate process)
# --------------------------------------------------------------------------- #
def run_cli(*arguments, cwd=None):
    return subprocess.run([sys.executable, "-m", "forecasting", *arguments], capture_output=True, text=True,
                          cwd=cwd or REPO, timeout=300)


@pytest.fixture(scope="module")
def shop_file(tmp_path_factory, shop_orders):
    path = tmp_path_factory.mktemp("shop") / "orders.csv"
    out = shop_orders.assign(order_date=shop_orders["order_date"].dt.strftime("%Y-%m-%d %H:%M"))
    out.rename(columns={"customer": "Customer", "order_id": "Order Number", "order_date": "Order Date",
                        "order_value": "Order Total", "segment": "Channel"}).to_csv(path, index=False)
    return path


class TestOutlookCommand:
    def test_json(self, shop_file):
        done = run_cli("outlook", str(shop_file), "--horizon", "90", "--segment", "Channel", "--json")
        assert done.returncode == 0, done.stderr
        payload = json.loads(done.stdout)
        assert set(payload) == {"customers", "horizon_days", "as_of", "by", "level", "total", "cohorts",
                                "order_frequency", "method", "variance", "backtest", "seasons", "seasonal_days",
                                "season_index"}
        assert payload["seasons"] == "month" and len(payload["season_index"]) == 12
        assert payload["horizon_days"] == 90
        assert payload["customers"] == sum(c["customers"] for c in payload["cohorts"])
        assert set(payload["cohorts"][0]) == set(COHORT_COLUMNS)
        assert set(payload["backtest"]) == {"cutoff", "window_days", "by", "total", "cohorts", "order_frequency",
                                            "seasons"}
        assert set(payload["backtest"]["cohorts"][0]) == set(BACKTEST_COLUMNS)
        total = payload["total"]
        assert total["projected_low"] <= total["projected_revenue"] <= total["projected_high"]
        assert total["revenue_range_low"] < total["projected_low"] < total["projected_high"] \
            < total["revenue_range_high"]

    def test_by_channel_and_cutoff(self, shop_file):
        done = run_cli("outlook", str(shop_file), "--horizon", "60", "--by", "Channel", "--cutoff", "2026-07-01",
                       "--json")
        assert done.returncode == 0, done.stderr
        payload = json.loads(done.stdout)
        assert [c["cohort"] for c in payload["cohorts"]] == ["instagram", "market", "web"]
        assert payload["backtest"]["cutoff"].startswith("2026-07-01")
        assert payload["backtest"]["window_days"] == 60

    def test_text(self, shop_file):
        done = run_cli("outlook", str(shop_file), "--horizon", "90", "--by", "month")
        assert done.returncode == 0, done.stderr
        assert "Projected revenue" in done.stdout and "Backtest" in done.stdout
        assert "what may come in" in done.stdout and "Seasons:" in done.stdout

    def test_seasons_off(self, shop_file):
        done = run_cli("outlook", str(shop_file), "--horizon", "90", "--seasons", "none", "--no-backtest", "--json")
        assert done.returncode == 0, done.stderr
        payload = json.loads(done.stdout)
        assert payload["seasons"] == "none" and payload["season_index"] is None
        assert payload["seasonal_days"] == 90

    @pytest.mark.parametrize("arguments, message",
                             [(["--horizon", "-3"], "--horizon"), (["--horizon", "30", "--cutoff", "someday"],
                                                                    "--cutoff"),
                              (["--horizon", "30", "--seasons", "weekly"], "--seasons")])
    def test_problems_are_messages(self, shop_file, arguments, message):
        done = run_cli("outlook", str(shop_file), *arguments)
        assert done.returncode == 2
        assert message in done.stderr and "Traceback" not in done.stderr


    def test_too_little_history(self):
        done = run_cli("outlook", str(MESSY), "--horizon", "90", "--json")
        assert done.returncode == 2
        assert "could not be fitted" in done.stderr and "Traceback" not in done.stderr


class TestTiersCommand:
    def test_json_and_files(self, shop_file, tmp_path):
        out = tmp_path / "tiers.csv"
        done = run_cli("tiers", str(shop_file), "--rank", "revenue", "--quantiles", "0.1,0.3", "--out", str(out),
                       "--json")
        assert done.returncode == 0, done.stderr
        payload = json.loads(done.stdout)
        assert set(payload) == {"customers", "rank", "horizon_days", "seasons", "method", "variance", "tiers",
                                "tiers_written", "files"}
        assert [t["tier"] for t in payload["tiers"]] == ["top customers", "regulars", "occasional"]
        assert set(payload["tiers"][0]) == set(TIER_SUMMARY_COLUMNS)
        assert sum(t["customers"] for t in payload["tiers"]) == payload["customers"]
        written = pd.read_csv(out)
        assert len(written) == payload["customers"]
        for tier in payload["tiers"]:
            part = pd.read_csv(payload["files"][tier["tier"]])
            assert len(part) == tier["customers"]

    def test_thresholds_text(self, shop_file, tmp_path):
        out = tmp_path / "money.csv"
        done = run_cli("tiers", str(shop_file), "--thresholds", "50,200", "--out", str(out))
        assert done.returncode == 0, done.stderr
        assert "200.00 and above" in done.stdout
        assert (tmp_path / "money-top-customers.csv").exists()

    def test_demo_shop(self, tmp_path):
        out = tmp_path / "demo.csv"
        done = run_cli("tiers", str(DEMO), "--out", str(out), "--json")
        assert done.returncode == 0, done.stderr
        payload = json.loads(done.stdout)
        assert 1500 < payload["customers"] < 2500

    def test_problem_is_a_message(self, shop_file, tmp_path):
        done = run_cli("tiers", str(shop_file), "--quantiles", "0.7,0.7", "--out", str(tmp_path / "x.csv"))
        assert done.returncode == 2
        assert "--quantiles" in done.stderr and "Traceback" not in done.stderr
