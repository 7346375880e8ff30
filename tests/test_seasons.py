"""Tests for the seasonal clock and the repeat-order model fitted on it (forecasting.seasons).

External references used here:
- A calendar walked hour by hour with pandas as the slow twin of every clock length.
- The model's story on a seasonal clock, integrated numerically over the order rate and the
  stop chance (scipy dblquad), as the slow twin of the likelihood of repeat orders' dates
  (the order-frequency likelihood on the clock plus the Jacobian sum_m n_m log w_m).
- Shops simulated on a known month-of-year clock (tests/shop_simulation.py): the index the
  fit must recover, and shops without seasons on which the likelihood-ratio test must stay
  quiet at about its stated 5% rate (Wilks' theorem: chi-square with 11 degrees of freedom).
- scipy.optimize.approx_fprime as the check of the joint gradient.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, optimize

from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError
from forecasting.frequency import expected_orders_ahead, fit_order_frequency, repeat_history
from forecasting.seasons import (
    MIN_SEASON_DAYS,
    MONTH_DAYS,
    SEASON_COLUMNS,
    _SeasonalLikelihood,
    _weights,
    clock_between,
    fit_repeat_orders,
    month_edges,
    p_value_words,
    seasonal_days,
)
from shop_simulation import FLAT, SPRING_WEIGHTS, simulate_shop

TRUTH = SPRING_WEIGHTS / (SPRING_WEIGHTS @ MONTH_DAYS / MONTH_DAYS.sum())
# A frequent-ordering shop (about 12 orders a year while active), where seasons matter most.
BUSY = (2.0, 60.0, 0.8, 4.0)


def hourly_clock(start, end, index):
    """Slow twin: walk [start, end) hour by hour and add index[month] / 24; the parts of an hour at
    either end count their share (a month always starts on a whole hour)."""
    start, end, index = pd.Timestamp(start), pd.Timestamp(end), np.asarray(index)
    whole_from, whole_to = start.ceil("h"), end.floor("h")
    if whole_to <= whole_from:
        return float((end - start) / pd.Timedelta(days=1) * index[start.month - 1])
    hours = pd.date_range(whole_from, whole_to, freq="h", inclusive="left")
    return float(index[hours.month - 1].sum() / 24
                 + (whole_from - start) / pd.Timedelta(days=1) * index[start.month - 1]
                 + (end - whole_to) / pd.Timedelta(days=1) * index[end.month - 1])


class TestClock:
    def test_seasonal_days_match_an_hour_by_hour_calendar(self):
        for start, days in [("2025-01-20 06:00", 45.5), ("2025-11-30 23:00", 400.0), ("2028-02-10", 30.0)]:
            end = pd.Timestamp(start) + pd.Timedelta(days=days)
            assert seasonal_days(start, days, SPRING_WEIGHTS) == pytest.approx(
                hourly_clock(start, end, SPRING_WEIGHTS), rel=1e-9)

    def test_many_periods_and_many_indexes_at_once(self):
        # Slow twin: one period and one index at a time.
        starts = pd.to_datetime(["2024-03-03 10:00", "2023-12-31 00:00", "2025-07-15 18:00"])
        ends = pd.to_datetime(["2024-05-01 00:00", "2025-01-02 12:00", "2025-07-16 00:00"])
        indexes = np.vstack([SPRING_WEIGHTS, np.ones(12), np.arange(1.0, 13.0)])
        many = clock_between(starts, ends, indexes)
        assert many.shape == (3, 3)
        for d, index in enumerate(indexes):
            np.testing.assert_allclose(clock_between(starts, ends, index), many[d], rtol=1e-12)
            for k in range(3):
                assert many[d, k] == pytest.approx(hourly_clock(starts[k], ends[k], index), rel=1e-9)

    def test_flat_index_is_calendar_days_and_zero_length_is_zero(self):
        assert seasonal_days("2025-03-03", 90.25, np.ones(12)) == pytest.approx(90.25, rel=1e-12)
        assert seasonal_days("2025-03-03", 0, SPRING_WEIGHTS) == 0.0

    def test_month_edges(self):
        edges = month_edges("2026-10-31 18:00", "2027-01-15")
        assert [str(e) for e in edges] == ["2026-10-31 18:00:00", "2026-11-01 00:00:00", "2026-12-01 00:00:00",
                                           "2027-01-01 00:00:00", "2027-01-15 00:00:00"]

    def test_bad_index_refused(self):
        with pytest.raises(OrderDataError, match="twelve numbers"):
            seasonal_days("2025-03-03", 10, [1.0] * 11)
        with pytest.raises(OrderDataError, match="twelve numbers"):
            seasonal_days("2025-03-03", 10, [-1.0] + [1.0] * 11)

    def test_p_value_words(self):
        assert [p_value_words(p) for p in (0.0001, 0.004, 0.27)] == ["p < 0.001", "p = 0.004", "p = 0.27"]


def one_customer_likelihood(params, dates, as_of, index):
    """Slow twin of the joint likelihood for one customer: the story on the clock of ``index``
    (rate lambda x index[month]) integrated over lambda ~ Gamma(r, alpha) and p ~ Beta(a, b) with
    dblquad. The density of the repeat orders' dates is prod_j lambda index(t_j) times the chance of
    no further order by T (still active) or of stopping right after the last one."""
    r, alpha, a, b = params
    first, repeats = dates[0], dates[1:]
    x = len(repeats)
    known = hourly_clock(first, as_of, index)
    to_last = hourly_clock(first, repeats[-1], index) if x else 0.0
    weights = float(np.prod([index[d.month - 1] for d in repeats]))
    log_norm = r * math.log(alpha) - math.lgamma(r) + math.lgamma(a + b) - math.lgamma(a) - math.lgamma(b)

    def integrand(p, lam):
        if lam <= 0 or p <= 0 or p >= 1:
            return 0.0
        value = (1 - p) ** x * lam ** x * math.exp(-lam * known)
        if x:
            value += p * (1 - p) ** (x - 1) * lam ** x * math.exp(-lam * to_last)
        return weights * value * math.exp(log_norm + (r - 1) * math.log(lam) - alpha * lam + (a - 1) * math.log(p)
                                          + (b - 1) * math.log1p(-p))

    return math.log(integrate.dblquad(integrand, 0, np.inf, 0, 1, epsabs=0, epsrel=1e-10)[0])


def _spring_likelihood(model):
    """The joint likelihood of a simulated busy shop on a spring clock, and a point to check it at."""
    orders = simulate_shop(params=BUSY, arrivals_per_day=0.8, days=500, clock_weights=SPRING_WEIGHTS, seed=4)
    stats = customer_statistics(orders)
    x = (stats["orders"].to_numpy() - 1).astype(float)
    repeat = orders.sort_values(["customer", "order_date"])
    months = repeat.loc[repeat["customer"].duplicated(), "order_date"].dt.month.to_numpy()
    likelihood = _SeasonalLikelihood(x, stats["first_order"].to_numpy(), stats["last_order"].to_numpy(),
                                     stats["last_order"].max(), np.bincount(months - 1, minlength=12).astype(float),
                                     model)
    return likelihood, np.concatenate([np.log([1.5, 50.0, 0.9, 3.0]), np.linspace(-0.3, 0.4, 11)])


class TestJointLikelihood:
    def test_one_customer_against_the_story_integrated_numerically(self):
        # Dates on whole hours so that the hourly walk is exact.
        dates = pd.to_datetime(["2024-01-15 10:00", "2024-03-02 18:00", "2024-07-30 09:00", "2025-02-11 20:00"])
        as_of = pd.Timestamp("2025-06-01")
        params = (1.2, 90.0, 1.1, 3.0)
        index = _weights(np.log(TRUTH[:11]) - np.log(TRUTH[11]))
        np.testing.assert_allclose(index, TRUTH, rtol=1e-12)
        repeat_by_month = np.bincount(dates[1:].month - 1, minlength=12).astype(float)
        likelihood = _SeasonalLikelihood(np.array([3.0]), dates[:1].to_numpy(), dates[-1:].to_numpy(), as_of,
                                         repeat_by_month, "bg-nbd")
        point = np.concatenate([np.log(params), np.log(TRUTH[:11]) - np.log(TRUTH[11])])
        assert likelihood.log_likelihood(point) == pytest.approx(
            one_customer_likelihood(params, dates, as_of, TRUTH), rel=1e-8)

    def test_without_an_index_it_is_the_plain_likelihood(self):
        orders = simulate_shop(params=BUSY, arrivals_per_day=1.0, days=500, seed=3)
        stats = customer_statistics(orders)
        history = repeat_history(stats)
        fit = fit_order_frequency(history)
        likelihood = _SeasonalLikelihood(history["repeat_orders"].to_numpy(dtype=float),
                                         stats["first_order"].to_numpy(), stats["last_order"].to_numpy(),
                                         stats["last_order"].max(), np.zeros(12), "bg-nbd")
        point = np.concatenate([np.log(fit.params), np.zeros(11)])
        assert likelihood.log_likelihood(point) == pytest.approx(fit.log_likelihood, rel=1e-10)

    @pytest.mark.parametrize("model", ["bg-nbd", "mbg-nbd"])
    def test_gradient_matches_finite_differences(self, model):
        likelihood, point = _spring_likelihood(model)
        numeric = optimize.approx_fprime(point, lambda p: likelihood.value_and_gradient(p)[0], 1e-7)
        np.testing.assert_allclose(likelihood.value_and_gradient(point)[1], numeric, rtol=1e-4, atol=1e-7)


    @pytest.mark.parametrize("model", ["bg-nbd", "mbg-nbd"])
    def test_hessian_matches_differences_of_the_gradient(self, model):
        # Slow twin: central differences of the analytic gradient (checked against approx_fprime above).
        from forecasting.frequency import hessian_by_differences

        likelihood, point = _spring_likelihood(model)
        numeric = hessian_by_differences(lambda p: likelihood.value_and_gradient(p)[1], point)
        np.testing.assert_allclose(likelihood.hessian(point), numeric, rtol=1e-6, atol=1e-8)


class TestFitRepeatOrders:
    @pytest.fixture(scope="class")
    @classmethod
    def spring(cls):
        return simulate_shop(params=BUSY, arrivals_per_day=3.0, days=730, clock_weights=SPRING_WEIGHTS, seed=5)

    def test_recovers_a_known_seasonal_clock(self, spring):
        # Reference: the weights the shop was simulated with (scaled to a day-weighted average of 1).
        # About 2,200 customers over two years; tolerance: mean absolute error 0.05, worst month 0.12,
        # and the 90% ranges hold the truth in at least 9 of the 12 months.
        model = fit_repeat_orders(spring)
        assert model.seasons == "month" and model.season_test["p_value"] < 1e-6
        error = np.abs(model.index - TRUTH)
        assert error.mean() < 0.05 and error.max() < 0.12, np.round(model.index - TRUTH, 3)
        assert np.sum((model.index_low <= TRUTH) & (TRUTH <= model.index_high)) >= 9
        assert model.index @ MONTH_DAYS / MONTH_DAYS.sum() == pytest.approx(1.0, rel=1e-12)
        assert list(model.season_table().columns) == SEASON_COLUMNS
        assert "Adjusted for the time of year" in model.season_words and "April" in model.season_words
        # The order-rate parameters come back too (alpha in days of the average month).
        np.testing.assert_allclose(model.fit.params, BUSY, rtol=0.2)

    def test_history_fit_and_window_share_the_clock(self, spring):
        # Slow twin: each customer's first order, last order and the "as of" date put on the fitted
        # clock with the hour-by-hour calendar; the projection is the fit's eq. 10 on those numbers.
        model = fit_repeat_orders(spring)
        stats = customer_statistics(spring)
        as_of = model.as_of
        for customer in stats.index[[0, 17, 400, 1200]]:
            row = stats.loc[customer]
            hist = model.history.loc[customer]
            assert hist["days_known"] == pytest.approx(hourly_clock(row["first_order"], as_of, model.index),
                                                       rel=1e-9)
            assert hist["days_to_last_order"] == pytest.approx(
                clock_between([row["first_order"]], [row["last_order"]], model.index)[0], rel=1e-12)
        window = model.horizon(90)
        assert window == pytest.approx(seasonal_days(as_of, 90, model.index), rel=1e-12)
        np.testing.assert_allclose(model.fit.expected_orders(model.history, window),
                                   expected_orders_ahead(model.fit.params, *(model.history[c] for c in
                                                         ("repeat_orders", "days_to_last_order", "days_known")),
                                                         window, model=model.fit.model), rtol=1e-12)

    def test_draws_follow_the_joint_covariance(self, spring):
        # Reference: the sample mean and covariance of 20,000 draws of the log-parameters and free
        # log-weights; the month indexes drawn keep a day-weighted average of 1.
        model = fit_repeat_orders(spring)
        params, indexes = model.draw(20000, seed=1)
        logs = np.column_stack([np.log(params), np.log(indexes[:, :11]) - np.log(indexes[:, [11]])])
        centre = np.concatenate([np.log(model.fit.params), np.log(model.index[:11]) - np.log(model.index[11])])
        assert np.all(np.abs(logs.mean(axis=0) - centre) < 4 * np.sqrt(np.diag(model.covariance) / 20000))
        np.testing.assert_allclose(np.cov(logs.T), model.covariance, atol=0.05 * np.abs(model.covariance).max())
        np.testing.assert_allclose(indexes @ MONTH_DAYS / MONTH_DAYS.sum(), 1.0, rtol=1e-12)

    def test_a_fit_started_from_an_earlier_one_ends_at_the_same_optimum(self, spring):
        # The rolling check starts each cut-off's fits from the previous cut-off's optima; the answer
        # must be the same as from the default start, to rounding.
        earlier = fit_repeat_orders(spring[spring["order_date"] < pd.Timestamp("2024-10-01")],
                                    as_of="2024-10-01")
        cold = fit_repeat_orders(spring)
        warm = fit_repeat_orders(spring, start=earlier)
        assert set(earlier.optima) == {(m, i) for m in ("bg-nbd", "mbg-nbd") for i in (False, True)}
        assert warm.fit.model == cold.fit.model and warm.seasons == cold.seasons
        np.testing.assert_allclose(warm.fit.params, cold.fit.params, rtol=1e-9)
        np.testing.assert_allclose(warm.index, cold.index, rtol=1e-9)
        assert warm.fit.log_likelihood == pytest.approx(cold.fit.log_likelihood, rel=1e-12)

    def test_shops_without_seasons_are_left_on_the_calendar(self):
        # Twenty shops simulated without seasons: the test keeps an index at the 5% level in about
        # 1 of 20 by chance; accept at most 4 (binomial: a 1.6% chance of more under a true 5% rate).
        kept = 0
        for seed in range(20):
            orders = simulate_shop(params=BUSY, arrivals_per_day=1.0, days=500, clock_weights=FLAT, seed=100 + seed)
            model = fit_repeat_orders(orders, model="bg-nbd")
            kept += model.seasons == "month"
            if model.seasons == "none":
                assert "within chance" in model.season_words
                np.testing.assert_array_equal(model.index, np.ones(12))
        assert kept <= 4, kept

    def test_options(self, spring):
        none = fit_repeat_orders(spring, seasons="none")
        assert none.seasons == "none" and none.season_table() is None and none.horizon(30) == 30
        assert none.history.equals(none.calendar_history)
        young = spring[spring["order_date"] < spring["order_date"].min() + pd.Timedelta(days=MIN_SEASON_DAYS - 30)]
        auto = fit_repeat_orders(young)
        assert auto.seasons == "none" and "full year" in auto.season_words
        with pytest.raises(OrderDataError, match="full year"):
            fit_repeat_orders(young, seasons="month")
        with pytest.raises(OrderDataError, match="auto, month or none"):
            fit_repeat_orders(spring, seasons="weekly")
        with pytest.raises(OrderDataError, match="bg-nbd or mbg-nbd"):
            fit_repeat_orders(spring, model="pareto")
