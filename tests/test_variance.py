"""Variance models checked against plain computations from the orders, scipy and simulation."""

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

from forecasting import shrinkage as sh
from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError
from forecasting.variance import (
    VARIANCE_MODELS,
    classic_pooled_variance,
    hill_tail_index,
    iterate_proportional,
    normal_clip_consistency,
    pooled_variance,
    robust_pooled_variance,
    tail_report,
)


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


class TestClassicPooledVariance:
    def test_equals_a_naive_computation_from_the_orders(self):
        orders = plant_shop_orders(1)
        stats = customer_statistics(orders)
        ss = dof = 0.0
        for _, group in orders.groupby("customer"):
            x = group["order_value"].to_numpy()
            ss += ((x - x.mean()) ** 2).sum()
            dof += len(x) - 1
        assert pooled_variance(stats).sigma2 == pytest.approx(ss / dof, rel=1e-12)

    def test_everyone_with_one_order_uses_the_spread_of_all_values(self):
        orders = pd.DataFrame({"customer": ["b", "a", "c"], "order_value": [10.0, 30.0, 14.0],
                               "order_date": pd.to_datetime(["2025-01-01"] * 3)})
        fit = pooled_variance(customer_statistics(orders))
        assert fit.sigma2 == pytest.approx(np.var([10.0, 30.0, 14.0], ddof=1), rel=1e-14)
        assert "exactly one order" in fit.notes[0]

    def test_a_single_order_gives_zero(self):
        sigma2, notes = classic_pooled_variance([1], [0.0], [25.0])
        assert sigma2 == 0.0 and "only one order" in notes[0]

    def test_unknown_model_names_the_option_and_the_value(self):
        stats = customer_statistics(plant_shop_orders(2))
        with pytest.raises(OrderDataError, match=r"--variance.*'wobbly'"):
            pooled_variance(stats, model="wobbly")


class TestNormalClipConsistency:
    def test_equals_numerical_integration(self):
        # kappa(c) = E[min(Z^2, c^2)], by scipy.integrate.quad against the normal density
        for c in (1.0, 2.0, 3.0):
            inner = integrate.quad(lambda z: z * z * stats.norm.pdf(z), -c, c)[0]
            expected = inner + c * c * 2 * stats.norm.sf(c)
            assert normal_clip_consistency(c) == pytest.approx(expected, rel=1e-10)

    def test_equals_monte_carlo(self):
        z = np.random.default_rng(3).standard_normal(2_000_000)
        draws = np.minimum(z * z, 9.0)
        se = draws.std() / np.sqrt(draws.size)
        assert abs(normal_clip_consistency(3.0) - draws.mean()) < 4 * se

    def test_no_clipping_limit_is_one(self):
        assert normal_clip_consistency(40.0) == pytest.approx(1.0, abs=1e-12)


class TestRobustPooledVariance:
    def naive(self, orders, c=3.0):
        """The formula written out customer by customer."""
        residuals, weights, dof = [], [], 0.0
        for _, group in orders.groupby("customer"):
            x = group["order_value"].to_numpy()
            n = len(x)
            if n < 2:
                continue
            residuals.extend((x - x.mean()) * np.sqrt(n / (n - 1)))
            weights.extend([(n - 1) / n] * n)
            dof += n - 1
        e = np.array(residuals)
        scale0 = 1.4826 * np.median(np.abs(e))  # normal-consistent MAD about 0
        kappa = (2 * stats.norm.cdf(c) - 1) - 2 * c * stats.norm.pdf(c) + 2 * c * c * stats.norm.sf(c)
        clipped = np.minimum(e * e, (c * scale0) ** 2)
        return np.sum(np.array(weights) * clipped) / dof / kappa, e, scale0

    def test_equals_a_plain_numpy_computation(self):
        orders = plant_shop_orders(4)
        stats_table = customer_statistics(orders)
        fit = pooled_variance(stats_table, model="robust", orders=orders)
        expected, e, scale0 = self.naive(orders)
        assert fit.sigma2 == pytest.approx(expected, rel=1e-4)  # 1.4826 is rounded
        # scale0 is scipy's normal-scaled median absolute deviation of the residuals about 0
        mad = stats.median_abs_deviation(e, center=lambda x, axis=None: 0.0, scale="normal")
        assert fit.details["scale0"] == pytest.approx(mad, rel=1e-12)
        assert fit.details["scale0"] == pytest.approx(scale0, rel=1e-4)

    def test_without_clipping_it_is_the_classic_variance(self):
        orders = plant_shop_orders(5)
        st = customer_statistics(orders)
        codes = st.index.get_indexer(orders["customer"])
        sigma2, _ = robust_pooled_variance(codes, orders["order_value"].to_numpy(), st["orders"].to_numpy(),
                                           st["mean"].to_numpy(), clip=40.0)
        assert sigma2 == pytest.approx(pooled_variance(st).sigma2, rel=1e-10)

    def test_consistent_at_the_normal(self):
        # normal orders with known sigma2 = 144: the robust estimate agrees within sampling error
        rng = np.random.default_rng(6)
        n = np.full(3000, 3)
        customer = np.repeat([f"c{t}" for t in range(3000)], n)
        values = 100 + np.repeat(rng.normal(0, 20, 3000), n) + rng.normal(0, 12, n.sum())
        orders = pd.DataFrame({"customer": customer, "order_value": values,
                               "order_date": pd.Timestamp("2025-03-01")})
        fit = pooled_variance(customer_statistics(orders), model="robust", orders=orders)
        assert fit.sigma2 == pytest.approx(144.0, rel=0.05)

    def test_one_huge_order_has_bounded_influence(self):
        # Huber-type bound: however large one order gets, sigma2 stops growing once its
        # customer's residuals are clipped, while the classic variance grows without limit.
        orders = plant_shop_orders(7)
        first = orders["customer"].value_counts().index[0]
        where = orders.index[orders["customer"] == first][0]

        def with_order(value):
            spiked = orders.copy()
            spiked.loc[where, "order_value"] = value
            st = customer_statistics(spiked)
            return (pooled_variance(st, model="robust", orders=spiked).sigma2, pooled_variance(st).sigma2)

        before = pooled_variance(customer_statistics(orders), model="robust", orders=orders).sigma2
        robust_big, classic_big = with_order(5e4)
        robust_huge, classic_huge = with_order(5e7)
        assert robust_huge == pytest.approx(robust_big, rel=1e-12)
        assert robust_big / before < 1.5
        assert classic_huge / classic_big > 1e5

    def test_needs_the_orders(self):
        with pytest.raises(OrderDataError, match="robust.*order-level"):
            pooled_variance(customer_statistics(plant_shop_orders(8)), model="robust")

    def test_zero_robust_scale_falls_back_to_classic(self):
        # four of seven residuals are exactly 0, so their median absolute value is 0
        orders = pd.DataFrame({"customer": ["a"] * 4 + ["b"] * 3,
                               "order_value": [10.0, 10.0, 10.0, 10.0, 20.0, 20.0, 26.0],
                               "order_date": pd.Timestamp("2025-01-01")})
        st = customer_statistics(orders)
        fit = pooled_variance(st, model="robust", orders=orders)
        assert fit.sigma2 == pytest.approx(pooled_variance(st).sigma2)
        assert "classic" in fit.notes[0]


class TestLogModel:
    def test_equals_a_naive_computation_on_log_values(self):
        orders = plant_shop_orders(9, lognormal=True)
        logs = orders.assign(v=np.log(orders["order_value"])).groupby("customer")["v"]
        expected = sum(((g - g.mean()) ** 2).sum() for _, g in logs) / sum(len(g) - 1 for _, g in logs)
        fit = pooled_variance(customer_statistics(orders), model="log")
        assert fit.sigma2 == pytest.approx(expected, rel=1e-12)
        assert fit.scale == "log"

    def test_back_transform_recovers_a_lognormal_mean(self):
        # One customer with many lognormal orders: exp(mu + (sigma2 + v)/2) estimates
        # E[X] = exp(mu + sigma^2/2) (lognormal mean, standard formula).
        rng = np.random.default_rng(10)
        x = np.exp(3.0 + rng.normal(0, 0.8, 20000))
        orders = pd.DataFrame({"customer": "fern", "order_value": x, "order_date": pd.Timestamp("2025-01-01")})
        st = customer_statistics(orders)
        fit = pooled_variance(st, model="log")
        mu = st["log_mean"].iloc[0]
        v = fit.sigma2 / len(x)
        assert np.exp(mu + (fit.sigma2 + v) / 2) == pytest.approx(np.exp(3.0 + 0.32), rel=0.02)


class TestProportionalModel:
    def test_cv2_equals_a_naive_computation(self):
        orders = plant_shop_orders(11)
        num = dof = 0.0
        for _, group in orders.groupby("customer"):
            x = group["order_value"].to_numpy()
            num += ((x - x.mean()) ** 2).sum() / x.mean() ** 2
            dof += len(x) - 1
        assert pooled_variance(customer_statistics(orders), model="proportional").sigma2 == pytest.approx(
            num / dof, rel=1e-12)

    @pytest.mark.parametrize("method", ["mta", "empirical-bayes", "james-stein", "mta-minimax"])
    def test_reaches_a_fixed_point(self, method):
        orders = plant_shop_orders(12)
        st = customer_statistics(orders)
        fit = pooled_variance(st, model="proportional")
        m = st["mean"].to_numpy()
        n = st["orders"].to_numpy(float)

        def run(s):
            return sh.shrink(m, s, method=method, orders=n)

        result, s, iterations, converged = iterate_proportional(run, m, n, fit.sigma2)
        assert converged and iterations < 100
        mu = result.estimate
        # the fixed point: rerunning at s = cv2 mu^2 / n gives mu back
        again = run(fit.sigma2 * mu * mu / n).estimate
        np.testing.assert_allclose(again, mu, rtol=1e-9)
        np.testing.assert_allclose(s, fit.mean_variance(n, level=mu), rtol=1e-9)

    def test_oscillating_case_converges(self):
        # one big one-order customer among small ones: undamped iteration jumps between two values
        m = np.array([4800.0] + [60.0, 75.0, 52.0, 90.0, 66.0, 71.0, 58.0] * 5)
        n = np.array([1.0] + [3.0, 2.0, 4.0, 1.0, 5.0, 2.0, 3.0] * 5)

        def run(s):
            return sh.mta_constant(m, s)

        result, _, iterations, converged = iterate_proportional(run, m, n, 0.25)
        assert converged
        np.testing.assert_allclose(run(0.25 * result.estimate ** 2 / n).estimate, result.estimate, rtol=1e-9)

    def test_reports_when_it_does_not_converge(self):
        m = np.array([10.0, 20.0, 30.0, 40.0])

        class Drifting:
            calls = 0

            def __call__(self, s):
                Drifting.calls += 1
                return sh.plain_averages(m * (1 + Drifting.calls), s)

        _, _, iterations, converged = iterate_proportional(Drifting(), m, np.ones(4), 0.1, max_iter=7)
        assert not converged and iterations == 7

    def test_mean_variance_needs_a_level(self):
        fit = pooled_variance(customer_statistics(plant_shop_orders(13)), model="proportional")
        with pytest.raises(ValueError, match="level"):
            fit.mean_variance([1, 2])


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

    def test_heavy_tail_suggests_limiting_big_orders(self):
        x = stats.pareto.rvs(1.5, scale=10.0, size=5000, random_state=np.random.default_rng(17))
        report = tail_report(x)
        assert report.suggested_variance in ("robust", "log")
        assert "very heavy" in report.summary
        assert report.log_skewness == pytest.approx(stats.skew(np.log(x)), rel=1e-12)

    def test_light_tail_suggests_classic(self):
        x = np.random.default_rng(18).normal(60, 5, 5000)
        report = tail_report(x)
        assert report.suggested_variance == "classic" and "'classic'" in report.summary

    def test_few_orders(self):
        report = tail_report([12.0, 30.0, 18.0])
        assert np.isnan(report.tail_index) and "too few" in report.summary


class TestVarianceModels:
    def test_names(self):
        assert VARIANCE_MODELS == ("classic", "robust", "log", "proportional")

    @pytest.mark.parametrize("model", VARIANCE_MODELS)
    def test_input_is_not_changed(self, model):
        orders = plant_shop_orders(19)
        st = customer_statistics(orders)
        before_orders, before_stats = orders.copy(), st.copy()
        pooled_variance(st, model=model, orders=orders)
        pd.testing.assert_frame_equal(orders, before_orders)
        pd.testing.assert_frame_equal(st, before_stats)
