"""Tests for the model of new customers' arrivals (forecasting.arrivals).

External references used here:
- statsmodels' GLM with a Poisson family and an exposure (statsmodels.api.GLM) as the reference
  for the coefficients, their standard errors and the Pearson dispersion (scale="X2").
- Arrivals simulated with a known daily rate (a month-of-year pattern and a yearly growth)
  and with a known overdispersion (negative binomial counts, numpy): what the fit must find.
- A calendar walked day by day with pandas as the slow twin of the day pieces.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from forecasting.arrivals import _design, daily_steps, fit_arrivals
from forecasting.errors import OrderDataError
from shop_simulation import SPRING_WEIGHTS

MONTH_DAYS = np.array([31.0, 28.2425, 31.0, 30.0, 31.0, 30.0, 31.0, 31.0, 30.0, 31.0, 30.0, 31.0])
SPRING = SPRING_WEIGHTS / (SPRING_WEIGHTS @ MONTH_DAYS / MONTH_DAYS.sum())


def simulate_first_orders(*, per_day=3.0, days=1000, start="2023-03-01", weights=np.ones(12), growth=0.0,
                          dispersion=1.0, seed=0):
    """First-order moments: each day's count Poisson (or negative binomial with variance
    dispersion x mean) with mean per_day x weight[month] x (1 + growth)^(years from start);
    moments uniform within the day."""
    rng = np.random.default_rng(seed)
    day_starts = pd.date_range(start, periods=days, freq="D")
    mean = per_day * np.asarray(weights)[day_starts.month - 1] * (1 + growth) ** ((np.arange(days) + 0.5) / 365.25)
    if dispersion > 1:
        counts = rng.negative_binomial(mean / (dispersion - 1), 1 / dispersion)
    else:
        counts = rng.poisson(mean)
    moments = np.repeat(day_starts.to_numpy(), counts) + (rng.random(counts.sum()) * 86400e9).astype("timedelta64[ns]")
    return pd.Series(moments), pd.Timestamp(start) + pd.Timedelta(days=days)


class TestDailySteps:
    def test_against_a_day_by_day_walk(self):
        starts, lengths, middles, months = daily_steps("2025-01-30 18:00", "2025-02-02 06:00")
        assert [str(pd.Timestamp(s)) for s in starts] == ["2025-01-30 18:00:00", "2025-01-31 00:00:00",
                                                          "2025-02-01 00:00:00", "2025-02-02 00:00:00"]
        np.testing.assert_allclose(lengths, [0.25, 1.0, 1.0, 0.25])
        assert months.tolist() == [1, 1, 2, 2]
        assert str(pd.Timestamp(middles[0])) == "2025-01-30 21:00:00"
        assert daily_steps("2025-01-01", "2025-01-01")[1].size == 0


class TestFitArrivals:
    def test_coefficients_and_errors_match_statsmodels(self):
        # Reference: statsmodels GLM(Poisson) with the same design and exposure; the Pearson
        # dispersion is statsmodels' X2 scale.
        import statsmodels.api as sm

        firsts, as_of = simulate_first_orders(weights=SPRING, growth=0.3, seed=1)
        fit = fit_arrivals(firsts, as_of=as_of)
        assert fit.terms == ("trend", "month")
        _, lengths, middles, months = daily_steps(firsts.min().normalize(), as_of)
        years = np.asarray((pd.DatetimeIndex(middles) - as_of) / pd.Timedelta(days=365.25))
        position = np.searchsorted(daily_steps(firsts.min().normalize(), as_of)[0], firsts.to_numpy(), side="right") - 1
        counts = np.bincount(position, minlength=len(lengths))
        design = _design(years, months, fit.terms)
        reference = sm.GLM(counts, design, family=sm.families.Poisson(), exposure=lengths).fit(tol=1e-12)
        np.testing.assert_allclose(fit.coefficients, reference.params, rtol=1e-7, atol=1e-9)
        pearson = sm.GLM(counts, design, family=sm.families.Poisson(), exposure=lengths).fit(scale="X2", tol=1e-12)
        assert fit.dispersion == pytest.approx(pearson.scale, rel=1e-7)
        expected_se = reference.bse * math.sqrt(max(1.0, pearson.scale))
        np.testing.assert_allclose(np.sqrt(np.diag(fit.covariance)), expected_se, rtol=1e-6)

    def test_finds_the_growth_and_the_month_pattern_it_was_simulated_with(self):
        # Reference: the simulation's truth. Growth 40% a year within 3 standard errors; month
        # pattern within 0.12 in every month.
        firsts, as_of = simulate_first_orders(per_day=4.0, weights=SPRING, growth=0.4, seed=2)
        fit = fit_arrivals(firsts, as_of=as_of)
        assert fit.terms == ("trend", "month")
        se = math.sqrt(fit.covariance[1, 1])
        assert abs(fit.coefficients[1] - math.log(1.4)) < 3 * se
        assert np.abs(fit.month_index - SPRING).max() < 0.12
        assert "growing by" in fit.words and "most in April" in fit.words
        # Expected arrivals over the next 90 days against the truth carried forward.
        _, lengths, middles, months = daily_steps(as_of, as_of + pd.Timedelta(days=90))
        years_from_start = np.asarray((pd.DatetimeIndex(middles) - pd.Timestamp("2023-03-01")) / pd.Timedelta(days=365.25))
        truth = np.sum(4.0 * SPRING[months - 1] * 1.4 ** years_from_start * lengths)
        assert fit.expected(as_of, as_of + pd.Timedelta(days=90))[2].sum() == pytest.approx(truth, rel=0.1)

    def test_a_steady_shop_gets_neither_term_most_of_the_time(self):
        # Twenty shops with a constant rate: each term is kept at the 5% level in about 1 of 20 by
        # chance; accept at most 4 of each (binomial: a 1.6% chance of more under a true 5% rate).
        trend = month = 0
        for seed in range(20):
            firsts, as_of = simulate_first_orders(per_day=2.0, days=800, seed=100 + seed)
            fit = fit_arrivals(firsts, as_of=as_of)
            trend += "trend" in fit.terms
            month += "month" in fit.terms
        assert trend <= 4 and month <= 4, (trend, month)

    def test_overdispersed_counts_widen_the_errors(self):
        # Reference: counts simulated with variance 3 x mean; the Pearson dispersion comes out near 3
        # and scales the covariance; simulated counts spread as much.
        firsts, as_of = simulate_first_orders(per_day=5.0, dispersion=3.0, seed=4)
        fit = fit_arrivals(firsts, as_of=as_of)
        assert fit.dispersion == pytest.approx(3.0, rel=0.2)
        rng = np.random.default_rng(0)
        draws = fit.simulate_counts(np.full(200_000, 5.0), rng)
        assert draws.mean() == pytest.approx(5.0, rel=0.02)
        assert draws.var() == pytest.approx(5.0 * fit.dispersion, rel=0.05)

    def test_draws_of_the_expected_counts_centre_on_the_estimate(self):
        firsts, as_of = simulate_first_orders(weights=SPRING, growth=0.2, seed=5)
        fit = fit_arrivals(firsts, as_of=as_of)
        end = as_of + pd.Timedelta(days=60)
        _, _, point = fit.expected(as_of, end)
        drawn = fit.expected_draws(as_of, end, 4000, np.random.default_rng(1)).sum(axis=1)
        # The lognormal's mean sits a little above the point figure; the median on it.
        assert np.median(drawn) == pytest.approx(point.sum(), rel=0.01)

    def test_short_histories_try_fewer_terms(self):
        firsts, as_of = simulate_first_orders(days=150, weights=SPRING, seed=6)
        fit = fit_arrivals(firsts, as_of=as_of)
        assert fit.tests == {} and fit.terms == ()
        assert "needs a full year" in fit.words
        firsts, as_of = simulate_first_orders(days=400, weights=SPRING, growth=0.5, seed=7)
        fit = fit_arrivals(firsts, as_of=as_of)
        assert len(fit.terms) <= 1  # both together need a year and a half

    def test_bad_input(self):
        with pytest.raises(OrderDataError, match="no first orders"):
            fit_arrivals(pd.Series([], dtype="datetime64[ns]"), as_of="2025-01-01")
        with pytest.raises(OrderDataError, match="after the 'as of' date"):
            fit_arrivals(pd.to_datetime(pd.Series(["2025-03-01"])), as_of="2025-01-01")
