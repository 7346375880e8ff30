"""Spread models checked against plain computations from the orders, scipy, simulation with known truth,
and their leave-one-out twins against brute-force refits."""

import math

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats

from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError
from forecasting.holdout import held_out_orders
from forecasting.variance import (
    RETIRED_SPREAD_MODELS,
    VARIANCE_MODELS,
    classic_pooled_variance,
    gamma_median,
    hill_tail_index,
    order_spread,
    pooled_variance,
    smearing_factor,
    spread_left_out,
    tail_report,
)
from spend_simulation import BULK, GAMMA, LOGNORMAL, ShopSpec, _order_values, simulate_shop


def plant_shop_orders(seed, customers=60, *, lognormal=False):
    """Orders of a small houseplant shop: customers buy 1-6 times, values vary around their own level."""
    rng = np.random.default_rng(seed)
    n = rng.integers(1, 7, customers)
    ids = [f"P{t:03d}" for t in rng.permutation(customers)]  # not pre-sorted
    customer = np.repeat(ids, n)
    level = rng.gamma(6.0, 8.0, customers)
    if lognormal:
        values = np.exp(np.log(np.repeat(level, n)) + rng.normal(0, 0.5, n.sum()))
    else:
        values = np.abs(np.repeat(level, n) + rng.normal(0, 12.0, n.sum())) + 1.0
    dates = pd.Timestamp("2025-01-01") + pd.to_timedelta(rng.integers(0, 300, n.sum()), unit="D")
    return pd.DataFrame({"customer": customer, "order_value": values, "order_date": dates})


def true_smearing(spec, draws=2_000_000):
    """E[x / b] / exp(E[log(x / b)]) of the simulated shops' order factor, by Monte Carlo."""
    factor = _order_values(np.random.default_rng(99), spec, np.ones(draws))
    return factor.mean() / np.exp(np.log(factor).mean())


class TestClassicPooledVariance:
    def test_equals_a_naive_computation_from_the_orders(self):
        orders = plant_shop_orders(1)
        stats_table = customer_statistics(orders)
        ss = dof = 0.0
        for _, group in orders.groupby("customer"):
            x = group["order_value"].to_numpy()
            ss += ((x - x.mean()) ** 2).sum()
            dof += len(x) - 1
        assert pooled_variance(stats_table, model="classic").sigma2 == pytest.approx(ss / dof, rel=1e-12)

    def test_everyone_with_one_order_uses_the_spread_of_all_values(self):
        orders = pd.DataFrame({"customer": ["b", "a", "c"], "order_value": [10.0, 30.0, 14.0],
                               "order_date": pd.to_datetime(["2025-01-01"] * 3)})
        fit = pooled_variance(customer_statistics(orders), model="classic")
        assert fit.sigma2 == pytest.approx(np.var([10.0, 30.0, 14.0], ddof=1), rel=1e-14)
        assert "exactly one order" in fit.notes[0]

    def test_a_single_order_gives_zero(self):
        sigma2, notes = classic_pooled_variance([1], [0.0], [25.0])
        assert sigma2 == 0.0 and "only one order" in notes[0]

    def test_unknown_model_names_the_option_and_the_value(self):
        stats_table = customer_statistics(plant_shop_orders(2))
        with pytest.raises(OrderDataError, match=r"'wobbly'.*proportional") as raised:
            pooled_variance(stats_table, model="wobbly")
        assert raised.value.option == "variance" and "--" not in str(raised.value)


class TestRetiredRobustModel:
    def test_asking_for_it_says_why_it_was_retired(self):
        with pytest.raises(OrderDataError, match=r"retired.*'log'") as raised:
            pooled_variance(customer_statistics(plant_shop_orders(3)), model="robust")
        assert raised.value.option == "variance"
        assert "robust" in RETIRED_SPREAD_MODELS and "robust" not in VARIANCE_MODELS


class TestSmearing:
    def slow_twin(self, orders, sigma2):
        """The smearing equation written out customer by customer and solved by scipy's brentq."""
        stats_table = customer_statistics(orders)
        rows = [(len(g), g.mean() / np.exp(np.log(g).mean())) for _, g in orders.groupby("customer")["order_value"]]
        rows = [(n, r) for n, r in rows if n >= 2]

        def gap(log_s):
            total = 0.0
            for n, r in rows:
                expected = log_s - sigma2 / (2 * n) - (log_s - sigma2 / 2) * (3 / n - 2 / n ** 2)
                total += (n - 1) * (r - math.exp(expected))
            return total

        return math.exp(optimize.brentq(gap, 0.0, 5.0, xtol=1e-15)), stats_table

    def test_equals_the_equation_written_out(self):
        orders = plant_shop_orders(4, customers=200, lognormal=True)
        sigma2 = pooled_variance(customer_statistics(orders), model="log").sigma2
        expected, stats_table = self.slow_twin(orders, sigma2)
        fit = pooled_variance(stats_table, model="log")
        assert fit.details["smearing"] == pytest.approx(expected, rel=1e-12)
        assert fit.details["excess"] == pytest.approx(math.log(expected) - sigma2 / 2, rel=1e-10)

    @pytest.mark.parametrize("spec, tolerance", [(LOGNORMAL, 0.004), (GAMMA, 0.006), (BULK, 0.02)])
    def test_recovers_the_true_factor(self, spec, tolerance):
        # Known truth: S = E[x / b] / exp(E[log(x / b)]) of the order process (Monte Carlo with
        # 2M draws). For lognormal orders S = exp(0.6^2 / 2) exactly. Tolerances: three times the
        # spread over 8 seeds in the calibration report, 2% for 2% of orders 5-20x larger.
        truth = true_smearing(spec)
        if spec is LOGNORMAL:
            assert truth == pytest.approx(math.exp(0.18), rel=2e-3)
        fit = pooled_variance(customer_statistics(simulate_shop(spec, 3).orders), model="log")
        assert fit.details["smearing"] == pytest.approx(truth, rel=tolerance)

    def test_the_old_lognormal_factor_misses_big_orders(self):
        # exp(sigma2 / 2) treats log order values as normal: with 2% of orders 5-20x larger it
        # returns about 1.27 where the truth is 1.40, 9% of every forecast's money.
        fit = pooled_variance(customer_statistics(simulate_shop(BULK, 4).orders), model="log")
        assert math.exp(fit.sigma2 / 2) < 0.93 * true_smearing(BULK)
        assert fit.details["smearing"] > 0.98 * true_smearing(BULK)

    def test_only_two_order_customers_give_the_lognormal_value(self):
        n = np.array([2, 2, 2, 1])
        value = smearing_factor(n, [12.0, 10.0, 11.0, 9.0], np.log([11.0, 9.5, 10.0, 9.0]), 0.3)
        assert value == pytest.approx(math.exp(0.15), rel=1e-14)

    def test_never_below_one(self):
        # Every customer's orders all equal: arithmetic and geometric means agree (E[exp(e)] >= 1).
        n = np.array([3, 4, 5])
        assert smearing_factor(n, [10.0, 20.0, 30.0], np.log([10.0, 20.0, 30.0]), 0.0) == 1.0


class TestOrderSpread:
    def slow_twin(self, orders):
        """Each customer's variance of log values over the normal's median ratio (scipy.stats.chi2),
        weighted median by a loop."""
        values, weights = [], []
        for _, g in orders.groupby("customer")["order_value"]:
            n = len(g)
            if n >= 2:
                values.append(np.var(np.log(g), ddof=1) / (stats.chi2.median(n - 1) / (n - 1)))
                weights.append(n - 1)
        order = np.argsort(values)
        running = 0.0
        for i in order:
            running += weights[i]
            if running >= sum(weights) / 2:
                return values[i]

    def test_equals_a_loop_with_scipy(self):
        orders = plant_shop_orders(5, customers=150, lognormal=True)
        st = customer_statistics(orders)
        expected = self.slow_twin(orders)
        assert order_spread(st["orders"].to_numpy(), st["log_sum_sq_dev"].to_numpy()) == pytest.approx(expected,
                                                                                                      rel=1e-10)

    def test_consistent_for_normal_log_values(self):
        # lognormal orders with log sd 0.6: the median of spreads estimates 0.36 like the pooled variance
        st = customer_statistics(simulate_shop(LOGNORMAL, 5).orders)
        assert order_spread(st["orders"].to_numpy(), st["log_sum_sq_dev"].to_numpy()) == pytest.approx(0.36, rel=0.03)

    def test_rare_big_orders_do_not_set_it(self):
        # With 2% bulk orders the pooled variance rises from 0.36 to about 0.48; the median of
        # spreads stays near the usual orders' 0.36 (the central 80% of orders is theirs).
        st = customer_statistics(simulate_shop(BULK, 6).orders)
        fit = pooled_variance(st, model="log")
        assert fit.sigma2 > 0.45
        assert fit.details["order_spread"] < 0.44


class TestGammaMedian:
    """The median of Gamma(a, 1) behind the spread of one order, written without scipy.special."""

    def test_equals_scipys_inverse_incomplete_gamma(self):
        # Reference: scipy.special.gammaincinv(a, 0.5), for every number of degrees of freedom k of
        # a customer with up to 3,001 orders (a = k / 2) and a few far larger.
        from scipy import special

        k = np.concatenate([np.arange(1, 3001), [5_000, 10_001, 20_000, 100_000, 1_000_000]])
        ours = gamma_median(k / 2.0)
        assert ours == pytest.approx(special.gammaincinv(k / 2.0, 0.5), rel=2e-12)

    def test_published_values(self):
        # Gamma(1, 1) is the exponential distribution: median ln 2. The median of chi2 with one degree of
        # freedom is 0.454936... (the square of the normal's upper quartile 0.67449, from memory; here
        # taken from scipy.stats.norm).
        assert float(gamma_median(1.0)) == pytest.approx(math.log(2.0), rel=1e-15)
        assert 2.0 * float(gamma_median(0.5)) == pytest.approx(stats.norm.ppf(0.75) ** 2, rel=1e-13)

    def test_keeps_the_shape_of_its_input(self):
        assert gamma_median(np.array([[1.0, 2.0], [3.0, 4.0]])).shape == (2, 2)
        assert gamma_median(np.zeros(0)).shape == (0,)

    def test_shapes_below_one_half_are_refused(self):
        # A customer with two orders has k = 1, a = 1/2: smaller shapes never arise.
        with pytest.raises(ValueError, match="1/2 or more"):
            gamma_median(np.array([0.25, 1.0]))


class TestLogModel:
    def test_equals_a_naive_computation_on_log_values(self):
        orders = plant_shop_orders(9, lognormal=True)
        logs = orders.assign(v=np.log(orders["order_value"])).groupby("customer")["v"]
        expected = sum(((g - g.mean()) ** 2).sum() for _, g in logs) / sum(len(g) - 1 for _, g in logs)
        fit = pooled_variance(customer_statistics(orders), model="log")
        assert fit.sigma2 == pytest.approx(expected, rel=1e-12)
        assert fit.scale == "log"

    def test_one_customer_with_many_orders_recovers_the_lognormal_mean(self):
        # E[X] = exp(mu + sigma^2 / 2) for a lognormal (standard formula): the smearing of one
        # customer's 20000 orders gives exp(sigma^2 / 2) within sampling error.
        rng = np.random.default_rng(10)
        x = np.exp(3.0 + rng.normal(0, 0.8, 20000))
        orders = pd.DataFrame({"customer": "fern", "order_value": x, "order_date": pd.Timestamp("2025-01-01")})
        st = customer_statistics(orders)
        fit = pooled_variance(st, model="log")
        assert np.exp(st["log_mean"].iloc[0]) * fit.details["smearing"] == pytest.approx(np.exp(3.0 + 0.32), rel=0.02)


class TestProportionalModel:
    def test_cv2_equals_the_formula_written_out(self):
        orders = plant_shop_orders(11)
        num = den = 0.0
        squares = []
        for _, group in orders.groupby("customer"):
            x = group["order_value"].to_numpy()
            n, m, ss = len(x), x.mean(), ((x - x.mean()) ** 2).sum()
            num += ss
            den += (n - 1) * m * m - ss / n
            squares.append((n, m))
        fit = pooled_variance(customer_statistics(orders), model="proportional")
        assert fit.sigma2 == pytest.approx(num / den, rel=1e-12)
        m2 = np.mean([m * m / (1 + fit.sigma2 / n) for n, m in squares])
        assert fit.details["mean_square_level"] == pytest.approx(m2, rel=1e-12)

    @pytest.mark.parametrize("spec", [BULK, ShopSpec(bulk_share=0.02, order_counts="geometric")])
    def test_not_biased_low(self, spec):
        # Known truth: each order is b_t x factor, so its squared coefficient of variation is
        # Var(factor) / E[factor]^2 (3.24 with 2% bulk orders; Monte Carlo with 2M draws). Dividing
        # each customer's spread by their own average gives far less (0.7-1.2 on these shops).
        # One shop's estimate varies by about 11% (12 seeds): the mean of 8 shops is held to 8%.
        factor = _order_values(np.random.default_rng(98), spec, np.ones(2_000_000))
        truth = factor.var() / factor.mean() ** 2
        estimates = []
        for seed in range(8):
            st = customer_statistics(simulate_shop(spec, seed).orders)
            estimates.append(pooled_variance(st, model="proportional").sigma2)
            own = st["sum_sq_dev"] / st["mean"] ** 2
            assert own.sum() / (st["orders"] - 1).sum() < 0.5 * truth
        assert np.mean(estimates) == pytest.approx(truth, rel=0.08)


def brute_force_spreads(orders, model):
    """The spread model refitted on the orders without each held-out order in turn."""
    stats_table = customer_statistics(orders)
    counts = stats_table["orders"].reindex(orders["customer"]).to_numpy()
    fits = [pooled_variance(customer_statistics(orders.drop(orders.index[i])), model=model)
            for i in np.flatnonzero(counts >= 2)]
    return fits


class TestLeaveOneOutTwins:
    @pytest.mark.parametrize("model", VARIANCE_MODELS)
    def test_match_brute_force_refits(self, model):
        orders = plant_shop_orders(12, customers=40, lognormal=True)
        # a customer whose removal leaves everyone else: one with two orders, one with three
        fast = spread_left_out(held_out_orders(orders, customer_statistics(orders)), model)
        slow = brute_force_spreads(orders, model)
        np.testing.assert_allclose(fast.sigma2, [f.sigma2 for f in slow], rtol=1e-10)
        for key in slow[0].details:
            np.testing.assert_allclose(fast.details[key], [f.details[key] for f in slow], rtol=1e-9, err_msg=key)

    @pytest.mark.parametrize("model", VARIANCE_MODELS)
    def test_match_when_the_last_repeat_customer_loses_an_order(self, model):
        # one customer with two orders: holding one out leaves nobody with two orders (fallbacks)
        orders = pd.DataFrame({"customer": ["a", "a", "b", "c", "d"], "order_value": [10.0, 30.0, 12.0, 50.0, 7.0],
                               "order_date": pd.Timestamp("2025-01-01")})
        fast = spread_left_out(held_out_orders(orders, customer_statistics(orders)), model)
        slow = brute_force_spreads(orders, model)
        np.testing.assert_allclose(fast.sigma2, [f.sigma2 for f in slow], rtol=1e-10)
        for key in slow[0].details:
            np.testing.assert_allclose(fast.details[key], [f.details[key] for f in slow], rtol=1e-9, err_msg=key)


class TestHillTailIndex:
    def test_known_pareto_sample(self):
        # Pareto with tail index 2.5 (scipy.stats.pareto); Hill on the top 5%: k = 1000 of 20000,
        # standard error about alpha / sqrt(k) = 0.08 (Hill 1975, asymptotic normality)
        x = stats.pareto.rvs(2.5, scale=20.0, size=20000, random_state=np.random.default_rng(14))
        report = tail_report(x)
        assert report.tail_orders == 1000
        assert report.tail_index == pytest.approx(2.5, abs=0.3)
        assert hill_tail_index(x, 1000) == report.tail_index

    def test_matches_the_formula_on_sorted_values(self):
        x = np.random.default_rng(15).lognormal(3, 1, 500)
        top = np.sort(x)[::-1]
        k = 25
        assert hill_tail_index(x, k) == pytest.approx(k / np.sum(np.log(top[:k]) - np.log(top[k])), rel=1e-12)


class TestTailReport:
    def test_revenue_share_of_the_top_one_percent(self):
        x = np.random.default_rng(16).gamma(2.0, 30.0, 1234)
        top = np.sort(x)[::-1][:13]  # ceil(1% of 1234) = 13 orders
        assert tail_report(x).top1_revenue_share == pytest.approx(top.sum() / x.sum(), rel=1e-12)

    def test_heavy_tail_suggests_the_log_model(self):
        x = stats.pareto.rvs(1.5, scale=10.0, size=5000, random_state=np.random.default_rng(17))
        report = tail_report(x)
        assert report.suggested_variance == "log"
        assert "very heavy" in report.summary
        assert report.log_skewness == pytest.approx(stats.skew(np.log(x)), rel=1e-12)

    def test_light_tail_suggests_classic(self):
        x = np.random.default_rng(18).normal(60, 5, 5000)
        report = tail_report(x)
        assert report.suggested_variance == "classic" and "'classic'" in report.summary

    def test_suggests_only_a_model_that_passed_the_shops_own_check(self):
        x = np.random.default_rng(18).normal(60, 5, 5000)
        report = tail_report(x, checked={"classic": False, "log": True, "proportional": False})
        assert report.suggested_variance == "log" and "missed its targets" in report.summary
        nothing = tail_report(x, checked={"classic": False, "log": False})
        assert "no spread model met every target" in nothing.summary

    def test_few_orders(self):
        report = tail_report([12.0, 30.0, 18.0])
        assert np.isnan(report.tail_index) and "too few" in report.summary


class TestVarianceModels:
    def test_names(self):
        assert VARIANCE_MODELS == ("log", "classic", "proportional")

    @pytest.mark.parametrize("model", VARIANCE_MODELS)
    def test_input_is_not_changed(self, model):
        orders = plant_shop_orders(19)
        st = customer_statistics(orders)
        before = st.copy()
        pooled_variance(st, model=model)
        pd.testing.assert_frame_equal(st, before)
