"""Tests for the BG/NBD order-frequency model (forecasting.frequency).

External references used here:
- Fader, Hardie and Lee (2005), Marketing Science 24(2):275-284: the model
  definition (Poisson orders while active, stop with probability p after each
  repeat order, Gamma(r, alpha) rates, Beta(a, b) stop chances), the
  likelihood (eq. 6), E[X(t)] (eq. 7), the conditional expectation (eq. 10) and
  the chance of being active (eq. 11); the CDNOW estimates r = 0.243,
  alpha = 4.414, a = 0.793, b = 2.426 (weeks).
- scipy.integrate (dblquad/quad) integrating the model over lambda and p.
- mpmath.hyp2f1 for the printed, untransformed formulas.
- Batislam, Denizel and Filiztekin (2007), International Journal of Research
  in Marketing 24(3):201-209, and Hoppe and Wagner (2007), Marketing - Journal
  of Research and Management 3(2):75-90: the variant MBG/NBD in which the coin
  is also thrown right after the first order. Its printed formulas (the
  likelihood, E[X(t)], the conditional expectation and the chance of being
  active) are written below from memory of the paper; each is checked against
  numerical integration of the model's story or against simulation, which do
  not depend on the memory.
- Monte Carlo simulation of the model (numpy, seeded), including a literal
  event-by-event simulation (exponential gaps, a coin after each order) as the
  slow twin of the order-count draws.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, optimize, stats

from forecasting.errors import OrderDataError
from forecasting.frequency import (
    HISTORY_COLUMNS,
    MODEL_NAMES,
    FrequencyFit,
    chance_still_active,
    expected_new_customer_orders,
    expected_orders_ahead,
    expected_orders_for_draws,
    fit_order_frequency,
    frequency_forecast,
    frequency_log_likelihood,
    frequency_log_likelihood_gradient,
    choose_order_model,
    repeat_history,
    simulate_new_customer_orders,
    simulate_orders_ahead,
)

# CDNOW estimates in weeks (Fader, Hardie and Lee 2005, section 4).
CDNOW_WEEKS = (0.243, 4.414, 0.793, 2.426)
# Two parameter sets in days used throughout; the second has a < 1 and r > 1.
PARAMS_A = (0.8, 40.0, 1.5, 4.0)
PARAMS_B = (2.5, 100.0, 0.7, 2.0)
# A shop in days: about 3.7 orders a year while active, a 30% chance of stopping after a repeat order.
PARAMS_A_SHOP = (1.2, 120.0, 1.2, 2.8)


def simulate_histories(params, customers, seed, *, known_low=60.0, known_high=730.0):
    """Simulate repeat histories straight from the model's story.

    Each customer orders at Poisson rate lambda ~ Gamma(r, rate alpha) and
    stops after a Geometric(p) number of repeat orders, p ~ Beta(a, b). Seen
    for T days, the customer shows x = min(Poisson(lambda T), stop count)
    repeat orders; given n Poisson arrivals on [0, T], the x-th arrival is
    T times the x-th of n uniform order statistics, i.e. T * Beta(x, n - x + 1).
    """
    r, alpha, a, b = params
    rng = np.random.default_rng(seed)
    rate = rng.gamma(r, 1.0 / alpha, customers)
    stop = rng.beta(a, b, customers)
    known = rng.uniform(known_low, known_high, customers)
    arrivals = rng.poisson(rate * known)
    stop_count = rng.geometric(stop)
    repeat = np.minimum(arrivals, stop_count)
    to_last = np.where(repeat > 0, known * rng.beta(np.maximum(repeat, 1), arrivals - repeat + 1), 0.0)
    return pd.DataFrame({"repeat_orders": repeat, "days_to_last_order": to_last, "days_known": known})


def likelihood_by_integration(params, x, t_x, age):
    """The model's likelihood integrated numerically over lambda and p (scipy dblquad)."""
    r, alpha, a, b = params
    log_gamma_norm = r * math.log(alpha) - math.lgamma(r)
    log_beta_norm = math.lgamma(a + b) - math.lgamma(a) - math.lgamma(b)

    def integrand(p, lam):
        if lam <= 0 or p <= 0 or p >= 1:
            return 0.0
        # Still active at T, or stopped right after the x-th repeat order.
        value = (1 - p) ** x * math.exp(x * math.log(lam) - lam * age)
        if x > 0:
            value += p * (1 - p) ** (x - 1) * math.exp(x * math.log(lam) - lam * t_x)
        prior = math.exp(log_gamma_norm + (r - 1) * math.log(lam) - alpha * lam
                         + log_beta_norm + (a - 1) * math.log(p) + (b - 1) * math.log1p(-p))
        return value * prior

    value, _ = integrate.dblquad(integrand, 0, np.inf, 0, 1, epsabs=0, epsrel=1e-9)
    return value


def new_customer_orders_printed(params, t):
    """Eq. 7 exactly as printed, with mpmath's hypergeometric function (40 digits)."""
    mpmath = pytest.importorskip("mpmath")
    with mpmath.workdps(40):
        r, alpha, a, b = (mpmath.mpf(v) for v in params)
        t = mpmath.mpf(t)
        value = (a + b - 1) / (a - 1) * (1 - (alpha / (alpha + t)) ** r * mpmath.hyp2f1(r, b, a + b - 1, t / (alpha + t)))
        return float(value)


def orders_ahead_printed(params, x, t_x, age, t):
    """Eq. 10 exactly as printed, with mpmath's hypergeometric function (40 digits)."""
    mpmath = pytest.importorskip("mpmath")
    with mpmath.workdps(40):
        r, alpha, a, b = (mpmath.mpf(v) for v in params)
        x, t_x, age, t = (mpmath.mpf(v) for v in (x, t_x, age, t))
        top = (a + b + x - 1) / (a - 1) * (
            1 - ((alpha + age) / (alpha + age + t)) ** (r + x)
            * mpmath.hyp2f1(r + x, b + x, a + b + x - 1, t / (alpha + age + t))
        )
        bottom = 1 + (a / (b + x - 1)) * ((alpha + age) / (alpha + t_x)) ** (r + x) if x > 0 else 1
        return float(top / bottom)


def future_orders_monte_carlo(rate, stop, horizon, rng):
    """Orders in a window for customers active at its start: min(Poisson(rate h), Geometric(stop))."""
    return np.minimum(rng.poisson(rate * horizon), rng.geometric(stop))


class TestRepeatHistory:
    def make_stats(self):
        # Deliberately not sorted by date.
        return pd.DataFrame(
            {
                "orders": [1, 4, 2],
                "first_order": pd.to_datetime(["2025-06-01 12:00", "2025-01-01 00:00", "2025-03-01 00:00"]),
                "last_order": pd.to_datetime(["2025-06-01 12:00", "2025-05-31 00:00", "2025-03-02 06:00"]),
            },
            index=pd.Index(["c", "a", "b"], name="customer"),
        )

    def test_counts_and_days(self):
        history = repeat_history(self.make_stats(), as_of="2025-07-01")
        assert list(history.columns) == HISTORY_COLUMNS
        assert list(history.index) == ["c", "a", "b"]
        assert history["repeat_orders"].tolist() == [0, 3, 1]
        # Days counted by hand on a calendar.
        np.testing.assert_allclose(history["days_to_last_order"], [0.0, 150.0, 1.25])
        np.testing.assert_allclose(history["days_known"], [29.5, 181.0, 122.0])

    def test_default_as_of_is_last_order(self):
        history = repeat_history(self.make_stats())
        # Latest order is 2025-06-01 12:00.
        np.testing.assert_allclose(history["days_known"], [0.0, 151.5, 92.5])

    def test_as_of_before_last_order_is_refused(self):
        with pytest.raises(OrderDataError, match="earlier than the last order"):
            repeat_history(self.make_stats(), as_of="2025-05-01")

    def test_bad_date_is_refused(self):
        with pytest.raises(OrderDataError, match="not a date"):
            repeat_history(self.make_stats(), as_of="soon")

    def test_input_untouched(self):
        stats = self.make_stats()
        before = stats.copy()
        repeat_history(stats, as_of="2025-07-01")
        pd.testing.assert_frame_equal(stats, before)


class TestFrequencyLogLikelihood:
    @pytest.mark.parametrize("params", [PARAMS_A, PARAMS_B])
    @pytest.mark.parametrize("x, t_x, age", [(0, 0.0, 200.0), (1, 50.0, 300.0), (4, 120.0, 150.0), (7, 600.0, 700.0)])
    def test_equals_numerical_integration_of_the_model(self, params, x, t_x, age):
        # Reference: scipy.integrate.dblquad over lambda in (0, inf) and p in (0, 1).
        expected = math.log(likelihood_by_integration(params, x, t_x, age))
        got = frequency_log_likelihood(params, [x], [t_x], [age])[0]
        assert got == pytest.approx(expected, rel=1e-8, abs=1e-8)

    def test_gradient_matches_finite_differences(self):
        # Reference: scipy.optimize.approx_fprime on the summed log-likelihood.
        history = simulate_histories(PARAMS_A, 300, seed=3)
        args = [history[c].to_numpy() for c in HISTORY_COLUMNS]
        point = np.array([0.9, 35.0, 1.3, 3.5])

        def total(p):
            return frequency_log_likelihood(p, *args).sum()

        numeric = optimize.approx_fprime(point, total, epsilon=1e-6 * point)
        analytic = frequency_log_likelihood_gradient(point, *args)
        np.testing.assert_allclose(analytic, numeric, rtol=1e-4)

    def test_extreme_histories_stay_finite(self):
        values = frequency_log_likelihood(PARAMS_B, [0, 500, 3, 2000], [0.0, 5000.0, 0.0, 1e5], [0.0, 5000.0, 1e6, 1e5])
        assert np.all(np.isfinite(values))
        # A brand-new customer seen for zero days has likelihood 1.
        assert values[0] == pytest.approx(0.0, abs=1e-12)


class TestFitOrderFrequency:
    def test_recovers_simulated_parameters(self):
        # Reference: simulation from the model's own story with known parameters
        # (the CDNOW estimates of Fader, Hardie and Lee 2005, alpha turned into days).
        true = (CDNOW_WEEKS[0], CDNOW_WEEKS[1] * 7, CDNOW_WEEKS[2], CDNOW_WEEKS[3])
        history = simulate_histories(true, 20000, seed=11)
        fit = fit_order_frequency(history)
        assert fit.converged
        got = np.array(fit.params)
        # Tolerance: within 4 standard errors and within 25% of the truth.
        assert np.all(np.abs(got - true) < 4 * fit.standard_errors)
        np.testing.assert_allclose(got, true, rtol=0.25)

    def test_standard_errors_match_spread_over_repeated_samples(self):
        # Reference: the spread of estimates over 40 independent simulated shops.
        # The inverse-Hessian errors should describe it; z-scores should have
        # standard deviation near 1 (tolerance 0.6-1.5 for 40 replicates).
        z_scores = []
        for seed in range(40):
            fit = fit_order_frequency(simulate_histories(PARAMS_A, 2000, seed=1000 + seed))
            errors = np.sqrt(np.diag(fit.covariance))
            z_scores.append((np.log(fit.params) - np.log(PARAMS_A)) / errors)
        spread = np.std(z_scores, axis=0)
        assert np.all((spread > 0.6) & (spread < 1.5)), spread

    def test_hessian_matches_second_differences_of_the_likelihood(self):
        # Slow twin: second differences of the log-likelihood values themselves.
        history = simulate_histories(PARAMS_B, 3000, seed=5)
        fit = fit_order_frequency(history)
        args = [history[c].to_numpy() for c in HISTORY_COLUMNS]
        centre = np.log(fit.params)
        step = 1e-3

        def nll(logs):
            return -frequency_log_likelihood(np.exp(logs), *args).sum()

        hessian = np.empty((4, 4))
        for i in range(4):
            for j in range(4):
                ei, ej = np.eye(4)[i] * step, np.eye(4)[j] * step
                hessian[i, j] = (nll(centre + ei + ej) - nll(centre + ei - ej)
                                 - nll(centre - ei + ej) + nll(centre - ei - ej)) / (4 * step * step)
        np.testing.assert_allclose(np.linalg.inv(fit.covariance), hessian, rtol=2e-3, atol=1e-2)

    @pytest.mark.parametrize("model", ["bg-nbd", "mbg-nbd"])
    def test_analytic_hessian_matches_differences_of_the_gradient(self, model):
        # Slow twin: central differences of the analytic gradient (itself checked against
        # scipy.optimize.approx_fprime above), away from the optimum.
        from forecasting.frequency import _hessian_of_negative_ll, _negative_mean_ll, hessian_by_differences

        history = simulate_histories(PARAMS_B, 3000, seed=12)
        args = tuple(history[c].to_numpy() for c in HISTORY_COLUMNS)
        point = np.log([1.7, 60.0, 1.1, 2.5])
        numeric = hessian_by_differences(lambda p: _negative_mean_ll(p, *args, model)[1], point) * len(history)
        analytic = _hessian_of_negative_ll(point, *args, model=model)
        np.testing.assert_allclose(analytic, numeric, rtol=1e-6, atol=1e-6 * np.abs(numeric).max())

    @pytest.mark.parametrize("model", ["bg-nbd", "mbg-nbd"])
    def test_a_fit_started_near_its_optimum_ends_there_to_rounding(self, model):
        # A rolling check starts each cut-off's fit from the previous optimum: the answer must not
        # depend on it beyond rounding.
        history = simulate_histories(PARAMS_A, 3000, seed=8)
        cold = fit_order_frequency(history, model=model)
        warm = fit_order_frequency(history, model=model, start=tuple(np.array(cold.params) * [1.1, 0.9, 1.2, 0.8]))
        np.testing.assert_allclose(warm.params, cold.params, rtol=1e-10)
        assert warm.log_likelihood == pytest.approx(cold.log_likelihood, rel=1e-13)

    def test_same_answer_from_another_start(self):
        history = simulate_histories(PARAMS_A, 3000, seed=8)
        default = fit_order_frequency(history)
        other = fit_order_frequency(history, start=(3.0, 5.0, 0.3, 10.0))
        np.testing.assert_allclose(other.params, default.params, rtol=1e-4)
        assert other.log_likelihood == pytest.approx(default.log_likelihood, abs=1e-6)

    def test_too_few_repeat_customers_is_not_usable(self):
        # 8 customers, 6 with repeat orders: fitted, but flagged as not sound enough.
        history = pd.DataFrame({"repeat_orders": [3, 3, 1, 1, 2, 2, 0, 0],
                                "days_to_last_order": [150.0, 170.0, 31.0, 56.0, 80.0, 160.0, 0.0, 0.0],
                                "days_known": [217.0, 213.0, 156.0, 111.0, 103.0, 209.0, 40.0, 90.0]})
        fit = fit_order_frequency(history)
        assert fit.repeat_customers == 6
        assert not fit.usable
        assert any("at least 10" in note for note in fit.notes)
        assert fit.as_dict()["usable"] is False

    def test_enough_customers_is_usable(self):
        fit = fit_order_frequency(simulate_histories(PARAMS_A, 500, seed=9))
        assert fit.usable and fit.notes == ()
        assert fit.repeat_customers == int((simulate_histories(PARAMS_A, 500, seed=9)["repeat_orders"] > 0).sum())

    def test_no_repeat_orders_is_refused(self):
        history = pd.DataFrame({"repeat_orders": [0, 0], "days_to_last_order": [0.0, 0.0], "days_known": [5.0, 9.0]})
        with pytest.raises(OrderDataError, match="more than once"):
            fit_order_frequency(history)

    def test_impossible_history_is_refused(self):
        history = pd.DataFrame({"repeat_orders": [2, 1], "days_to_last_order": [50.0, 30.0], "days_known": [40.0, 90.0]})
        with pytest.raises(OrderDataError, match="outside their known time"):
            fit_order_frequency(history)


def mixed_over_rates_and_stop_chances(params, per_customer):
    """``per_customer(lambda, p)`` integrated over the Gamma(r, alpha) order rates and the Beta(a, b)
    stop chances (scipy.integrate.dblquad)."""
    r, alpha, a, b = params
    log_norm = r * math.log(alpha) - math.lgamma(r) + math.lgamma(a + b) - math.lgamma(a) - math.lgamma(b)

    def integrand(p, lam):
        if lam <= 0 or p <= 0 or p >= 1:
            return 0.0
        return per_customer(lam, p) * math.exp(
            log_norm + (r - 1) * math.log(lam) - alpha * lam + (a - 1) * math.log(p) + (b - 1) * math.log1p(-p))

    value, _ = integrate.dblquad(integrand, 0, np.inf, 0, 1, epsabs=0, epsrel=1e-9)
    return value


class TestExpectedNewCustomerOrders:
    @pytest.mark.parametrize("params", [PARAMS_A, PARAMS_B, CDNOW_WEEKS])
    @pytest.mark.parametrize("t", [0.5, 30.0, 365.0, 5000.0])
    def test_matches_printed_formula(self, params, t):
        # Reference: eq. 7 as printed, evaluated with mpmath.hyp2f1.
        assert expected_new_customer_orders(params, t) == pytest.approx(new_customer_orders_printed(params, t), rel=1e-10)

    def test_matches_integral_over_rates_and_stop_chances(self):
        # Reference: E[X(t) | lambda, p] = (1 - exp(-lambda p t)) / p integrated over
        # the Gamma and Beta mixing distributions with scipy.integrate.dblquad.
        # a = 1 exactly is included: eq. 7 is 0/0 there.
        for params in (PARAMS_A, (0.8, 40.0, 1.0, 4.0)):
            expected = mixed_over_rates_and_stop_chances(params, lambda lam, p: -math.expm1(-lam * p * 200.0) / p)
            assert expected_new_customer_orders(params, 200.0) == pytest.approx(expected, rel=1e-7)

    def test_matches_monte_carlo(self):
        # Reference: seeded simulation of 400,000 new customers; tolerance 4 standard errors.
        rng = np.random.default_rng(21)
        r, alpha, a, b = PARAMS_B
        n = 400_000
        counts = future_orders_monte_carlo(rng.gamma(r, 1 / alpha, n), rng.beta(a, b, n), 365.0, rng)
        error = counts.std() / math.sqrt(n)
        assert abs(expected_new_customer_orders(PARAMS_B, 365.0) - counts.mean()) < 4 * error

    def test_zero_days_and_growth(self):
        values = expected_new_customer_orders(PARAMS_A, [0.0, 10.0, 100.0, 1000.0])
        assert values[0] == 0.0
        assert np.all(np.diff(values) > 0)

    def test_negative_days_refused(self):
        with pytest.raises(OrderDataError, match="zero or more"):
            expected_new_customer_orders(PARAMS_A, -1.0)


class TestExpectedOrdersAhead:
    def test_worked_example(self):
        # Reference (from memory): Fader, Hardie and Lee's worked example with the
        # CDNOW estimates -- a customer with x = 2, t_x = 30.43, T = 38.86 weeks is
        # expected to make 1.226 repeat purchases in the next 39 weeks.
        value = expected_orders_ahead(CDNOW_WEEKS, 2, 30.43, 38.86, 39.0)
        assert value == pytest.approx(1.226, abs=5e-4)

    @pytest.mark.parametrize("params", [PARAMS_A, PARAMS_B, CDNOW_WEEKS])
    @pytest.mark.parametrize(
        "x, t_x, age, h",
        [(0, 0.0, 30.0, 90.0), (1, 20.0, 400.0, 365.0), (5, 300.0, 320.0, 30.0), (40, 690.0, 700.0, 2000.0)],
    )
    def test_matches_printed_formula(self, params, x, t_x, age, h):
        # Reference: eq. 10 as printed, evaluated with mpmath.hyp2f1.
        got = expected_orders_ahead(params, x, t_x, age, h)
        assert got == pytest.approx(orders_ahead_printed(params, x, t_x, age, h), rel=1e-9)

    @pytest.mark.parametrize("x, t_x, age", [(0, 0.0, 120.0), (3, 200.0, 400.0), (6, 100.0, 500.0)])
    def test_matches_monte_carlo_of_the_posterior(self, x, t_x, age):
        # Reference: seeded simulation. Given the history, the customer is active at T
        # with posterior weight proportional to B(a, b+x)/(alpha+T)^(r+x) (vs
        # B(a+1, b+x-1)/(alpha+t_x)^(r+x) for having stopped); if active,
        # lambda ~ Gamma(r+x, alpha+T) and p ~ Beta(a, b+x) (Bayes' rule on the model);
        # future orders are then simulated. Tolerance 4 standard errors.
        r, alpha, a, b = PARAMS_A
        horizon = 180.0
        log_active = math.lgamma(a) + math.lgamma(b + x) - math.lgamma(a + b + x) - (r + x) * math.log(alpha + age)
        if x > 0:
            log_stopped = math.lgamma(a + 1) + math.lgamma(b + x - 1) - math.lgamma(a + b + x) - (r + x) * math.log(alpha + t_x)
            active_share = 1 / (1 + math.exp(log_stopped - log_active))
        else:
            active_share = 1.0
        rng = np.random.default_rng(99 + x)
        n = 400_000
        active = rng.random(n) < active_share
        counts = future_orders_monte_carlo(rng.gamma(r + x, 1 / (alpha + age), n), rng.beta(a, b + x, n), horizon, rng)
        counts = np.where(active, counts, 0)
        error = counts.std() / math.sqrt(n)
        got = expected_orders_ahead(PARAMS_A, x, t_x, age, horizon)
        assert abs(got - counts.mean()) < 4 * error
        assert chance_still_active(PARAMS_A, x, t_x, age) == pytest.approx(active_share, rel=1e-12)

    def test_extreme_parameters_where_scipy_hypergeometric_fails(self):
        # Near the model's Poisson limit (r, alpha huge; a tiny, b huge) scipy's hyp2f1
        # returns NaN for the transformed arguments; the series fallback must still
        # match the printed formula evaluated by mpmath.
        from scipy import special

        params = (632584.6349232197, 47584332.95218751, 0.00212870552203082, 2949.417036461007)
        r, alpha, a, b = params
        assert np.isnan(special.hyp2f1(a + b - 1 - r, a - 1, a + b + 2, 180 / (alpha + 217 + 180)))
        got = expected_orders_ahead(params, 3, 151.0, 217.0, 180.0)
        assert got == pytest.approx(orders_ahead_printed(params, 3, 151.0, 217.0, 180.0), rel=1e-9)

    @pytest.mark.parametrize("x, t_x, age", [(0, 0.0, 34.3), (4, 200.0, 260.0)])
    def test_huge_a_and_b_where_the_transformed_series_overflows(self, x, t_x, age):
        # A parameter draw with a poorly pinned-down stop chance (a, b in the thousands):
        # the Euler-transformed 2F1 is ~1e383 (beyond float range) although the expected
        # count is modest; the code falls back to the printed form, checked by mpmath.
        params = (0.99, 110.0, 1800.0, 7500.0)
        got = expected_orders_ahead(params, x, t_x, age, 120.0)
        assert np.isfinite(got)
        assert got == pytest.approx(orders_ahead_printed(params, x, t_x, age, 120.0), rel=1e-9)

    def test_zero_horizon_gives_zero(self):
        assert np.all(expected_orders_ahead(PARAMS_B, [0, 3], [0.0, 10.0], [5.0, 50.0], 0.0) == 0.0)

    def test_endless_horizon_gives_expected_remaining_orders(self):
        # With a > 1 an active customer's remaining orders average E[1/p] under
        # Beta(a, b + x), i.e. (a + b + x - 1)/(a - 1) (a Beta-distribution identity).
        r, alpha, a, b = PARAMS_A
        x, t_x, age = 3, 80.0, 100.0
        far = expected_orders_ahead(PARAMS_A, x, t_x, age, 1e12)
        limit = (a + b + x - 1) / (a - 1) * chance_still_active(PARAMS_A, x, t_x, age)
        assert far == pytest.approx(limit, rel=1e-4)

    def test_regular_customers_stay_finite(self):
        values = expected_orders_ahead(PARAMS_B, [300, 1000], [700.0, 720.0], [720.0, 720.0], 365.0)
        assert np.all(np.isfinite(values)) and np.all(values > 0)

    def test_a_equal_one_is_continuous(self):
        near = [expected_orders_ahead((0.8, 40.0, 1.0 + d, 4.0), 2, 50.0, 90.0, 120.0) for d in (-1e-3, 1e-3)]
        at_one = expected_orders_ahead((0.8, 40.0, 1.0, 4.0), 2, 50.0, 90.0, 120.0)
        assert at_one == pytest.approx(np.mean(near), rel=1e-5)

    def test_bad_horizon_refused(self):
        with pytest.raises(OrderDataError, match="horizon"):
            expected_orders_ahead(PARAMS_A, 1, 2.0, 3.0, -5)


class TestExpectedOrdersForDraws:
    def test_equals_one_parameter_set_at_a_time(self):
        # Slow twin: a loop over parameter sets calling expected_orders_ahead.
        history = simulate_histories(PARAMS_A, 50, seed=4)
        args = [history[c].to_numpy() for c in HISTORY_COLUMNS]
        draws = np.array([PARAMS_A, PARAMS_B, CDNOW_WEEKS, (0.8, 40.0, 1.0, 4.0), (0.8, 40.0, 1.0 + 3e-7, 4.0)])
        many = expected_orders_for_draws(draws, *args, 120.0)
        assert many.shape == (5, 50)
        for row, params in zip(many, draws):
            np.testing.assert_allclose(row, expected_orders_ahead(tuple(params), *args, 120.0), rtol=1e-12)

    def test_bad_draws_refused(self):
        with pytest.raises(OrderDataError, match="four positive numbers"):
            expected_orders_for_draws(np.array([[1.0, -2.0, 1.0, 1.0]]), [1], [1.0], [2.0], 10.0)


def orders_event_by_event(params, x, t_x, age, horizon, draws, rng):
    """Slow twin of simulate_orders_ahead: the model's story told one customer and one order at a time.

    Active at T with the posterior chance of eq. 11 (computed here from the two
    likelihood terms, as in test_matches_monte_carlo_of_the_posterior); if active,
    lambda ~ Gamma(r+x, alpha+T) and p ~ Beta(a, b+x); then wait an exponential gap,
    place an order if still inside the horizon, and flip a coin with p after it.
    """
    r, alpha, a, b = params
    log_active = math.lgamma(a) + math.lgamma(b + x) - math.lgamma(a + b + x) - (r + x) * math.log(alpha + age)
    if x > 0:
        log_stopped = (math.lgamma(a + 1) + math.lgamma(b + x - 1) - math.lgamma(a + b + x)
                       - (r + x) * math.log(alpha + t_x))
        active_share = 1 / (1 + math.exp(log_stopped - log_active))
    else:
        active_share = 1.0
    counts = np.zeros(draws, dtype=np.int64)
    for d in range(draws):
        if rng.random() >= active_share:
            continue
        rate = rng.gamma(r + x, 1 / (alpha + age))
        stop = rng.beta(a, b + x)
        clock = 0.0
        while True:
            clock += rng.exponential(1 / rate)
            if clock > horizon:
                break
            counts[d] += 1
            if rng.random() < stop:
                break
    return counts


class TestSimulateOrdersAhead:
    CUSTOMERS = [(0, 0.0, 120.0), (3, 200.0, 400.0), (6, 100.0, 500.0), (12, 340.0, 360.0)]

    def test_matches_the_event_by_event_story(self):
        # Distribution check: counts 0, 1, 2, 3+ from the vectorised draws against the
        # literal simulation, chi-square test of homogeneity (scipy), each customer.
        rng = np.random.default_rng(31)
        x, t_x, age = (np.array(v, dtype=float) for v in zip(*self.CUSTOMERS))
        fast = simulate_orders_ahead(np.tile(PARAMS_A, (4000, 1)), x, t_x, age, 180.0, seed=5)
        for k, (xk, tk, ak) in enumerate(self.CUSTOMERS):
            slow = orders_event_by_event(PARAMS_A, xk, tk, ak, 180.0, 4000, rng)
            table = np.array([[np.sum(np.minimum(c, 3) == j) for j in range(4)] for c in (fast[:, k], slow)])
            table = table[:, table.sum(axis=0) > 0]
            assert stats.chi2_contingency(table).pvalue > 1e-3, (self.CUSTOMERS[k], table)

    def test_average_is_the_expected_count(self):
        # Reference: eq. 10 (expected_orders_ahead); tolerance 4 Monte Carlo standard errors.
        x, t_x, age = (np.array(v, dtype=float) for v in zip(*self.CUSTOMERS))
        for params in (PARAMS_A, PARAMS_B):
            counts = simulate_orders_ahead(np.tile(params, (100_000, 1)), x, t_x, age, 90.0, seed=2)
            expected = expected_orders_ahead(params, x, t_x, age, 90.0)
            error = counts.std(axis=0) / math.sqrt(len(counts))
            assert np.all(np.abs(counts.mean(axis=0) - expected) < 4 * error), (counts.mean(axis=0), expected)

    def test_each_row_uses_its_own_parameters(self):
        draws = np.repeat(np.array([PARAMS_A, PARAMS_B]), 50_000, axis=0)
        counts = simulate_orders_ahead(draws, [2.0], [60.0], [90.0], 120.0, seed=8)[:, 0]
        for block, params in zip((counts[:50_000], counts[50_000:]), (PARAMS_A, PARAMS_B)):
            expected = expected_orders_ahead(params, 2, 60.0, 90.0, 120.0)
            assert abs(block.mean() - expected) < 4 * block.std() / math.sqrt(len(block))

    def test_long_silence_after_repeat_orders_means_mostly_nothing(self):
        # Five repeat orders in the first month, then two years of silence: the
        # chance of still being active is tiny, so almost every draw is zero.
        counts = simulate_orders_ahead(np.tile(PARAMS_A, (2000, 1)), [5], [30.0], [760.0], 90.0, seed=1)
        assert np.mean(counts == 0) > 1 - 3 * chance_still_active(PARAMS_A, 5, 30.0, 760.0) - 0.01

    def test_seeded_and_extremes(self):
        draws = np.tile(PARAMS_B, (30, 1))
        one = simulate_orders_ahead(draws, [0, 4], [0.0, 20.0], [10.0, 40.0], 60.0, seed=3)
        np.testing.assert_array_equal(one, simulate_orders_ahead(draws, [0, 4], [0.0, 20.0], [10.0, 40.0], 60.0,
                                                                 seed=3))
        assert one.dtype == np.int64 and one.shape == (30, 2) and (one >= 0).all()
        assert (simulate_orders_ahead(draws, [0, 4], [0.0, 20.0], [10.0, 40.0], 0.0, seed=3) == 0).all()
        # Absurd draws (as from a flat likelihood) stay finite.
        wild = np.array([[np.exp(40.0), np.exp(-40.0), np.exp(-40.0), np.exp(40.0)]] * 3)
        assert (simulate_orders_ahead(wild, [1], [5.0], [10.0], 30.0, seed=0) >= 0).all()

    def test_bad_input_refused(self):
        with pytest.raises(OrderDataError, match="four positive numbers"):
            simulate_orders_ahead(np.ones((3, 3)), [1], [2.0], [3.0], 10.0)
        with pytest.raises(OrderDataError, match="horizon"):
            simulate_orders_ahead(np.tile(PARAMS_A, (3, 1)), [1], [2.0], [3.0], -1.0)
        with pytest.raises(OrderDataError, match="known time"):
            simulate_orders_ahead(np.tile(PARAMS_A, (3, 1)), [1], [5.0], [3.0], 10.0)


class TestCountSampler:
    """The one-uniform draw of order counts (inverting their closed-form distribution) against the
    direct draw of rate and stop chance (itself checked against the event-by-event story above)."""

    @pytest.mark.parametrize("model", ["bg-nbd", "mbg-nbd"])
    def test_same_distribution_as_the_direct_draw(self, model):
        from forecasting.frequency import _draw_counts, _posterior_cells, _sample_counts

        # Customers from silent to busy; the last two expect more than the inversion's limit while
        # active and are drawn the direct way inside the fast sampler too.
        x = np.array([0.0, 1.0, 3.0, 8.0, 20.0, 40.0])
        t_x = np.array([0.0, 30.0, 200.0, 300.0, 350.0, 395.0])
        age = np.array([40.0, 90.0, 400.0, 320.0, 360.0, 400.0])
        draws = 20_000
        params = tuple(np.full((draws, 1), value) for value in PARAMS_B)
        fast = _sample_counts(np.random.default_rng(3), *_posterior_cells(params, x, t_x, age, 120.0, model))
        slow = _draw_counts(np.random.default_rng(4), *params, x, t_x, age, 120.0, model)
        assert fast.shape == slow.shape == (draws, len(x))
        for k in range(len(x)):
            top = max(3, int(np.quantile(slow[:, k], 0.99)))
            table = np.array([np.bincount(np.minimum(c[:, k], top), minlength=top + 1) for c in (fast, slow)])
            table = table[:, table.sum(axis=0) > 0]
            if table.shape[1] > 1:
                assert stats.chi2_contingency(table).pvalue > 1e-3, (k, table)
            expected = expected_orders_ahead(PARAMS_B, x[k], t_x[k], age[k], 120.0, model=model)
            assert abs(fast[:, k].mean() - expected) < 4 * fast[:, k].std() / math.sqrt(draws) + 1e-12

    def test_a_zero_horizon_and_a_customer_surely_gone_order_nothing(self):
        from forecasting.frequency import _sample_counts

        rng = np.random.default_rng(0)
        assert not _sample_counts(rng, np.full(50, 0.8), 2.0, 0.0, 1.0, 3.0).any()
        assert not _sample_counts(rng, np.zeros(50), 2.0, -0.5, 1.0, 3.0).any()


class TestActiveOrdersGrid:
    @pytest.mark.parametrize("model", ["bg-nbd", "mbg-nbd"])
    def test_matches_the_exact_expectation_for_every_draw(self, model):
        # Slow twin: expected_orders_for_draws (eq. 10 for each parameter set), divided by the chance
        # of being active; parameter draws spread wide around a shop's estimate, a horizon per draw
        # (as on a seasonal clock), and customers with the same number of repeat orders at once.
        from forecasting.frequency import _ActiveOrdersGrid, _posterior_cells

        history = simulate_histories(PARAMS_A_SHOP, 3000, seed=21, known_low=0.5, known_high=1100.0)
        args = [history[c].to_numpy() for c in HISTORY_COLUMNS]
        rng = np.random.default_rng(5)
        draws = np.exp(np.log(PARAMS_A_SHOP) + rng.normal(0.0, 0.3, (40, 4)))
        horizons = rng.uniform(20.0, 400.0, 40)
        grid = _ActiveOrdersGrid(draws, args[0], args[2], horizons, model)
        approx = grid.values()  # customers x draws
        for d in range(40):
            exact = expected_orders_for_draws(draws[d:d + 1], *args, horizons[d], model=model)[0]
            alive = _posterior_cells(tuple(draws[d]), args[0], args[1], args[2], horizons[d], model)[0]
            np.testing.assert_allclose(approx[:, d] * alive, exact, rtol=1e-5, atol=1e-12)
        np.testing.assert_allclose(grid.values(slice(10, 20)), approx[10:20], rtol=1e-15)


class TestChanceStillActive:
    def test_no_repeat_means_still_active(self):
        assert np.all(chance_still_active(PARAMS_B, [0, 0], [0.0, 0.0], [1.0, 900.0]) == 1.0)

    def test_matches_numerical_posterior(self):
        # Reference: scipy dblquad of the "still active" part of the likelihood over
        # lambda and p, divided by the whole likelihood.
        r, alpha, a, b = PARAMS_B
        x, t_x, age = 2, 40.0, 300.0
        log_norm = r * math.log(alpha) - math.lgamma(r) + math.lgamma(a + b) - math.lgamma(a) - math.lgamma(b)

        def active_part(p, lam):
            if lam <= 0 or p <= 0 or p >= 1:
                return 0.0
            return (1 - p) ** x * math.exp(x * math.log(lam) - lam * age + log_norm + (r - 1) * math.log(lam)
                                           - alpha * lam + (a - 1) * math.log(p) + (b - 1) * math.log1p(-p))

        numerator, _ = integrate.dblquad(active_part, 0, np.inf, 0, 1, epsabs=0, epsrel=1e-9)
        expected = numerator / likelihood_by_integration(PARAMS_B, x, t_x, age)
        assert chance_still_active(PARAMS_B, x, t_x, age) == pytest.approx(expected, rel=1e-7)

    def test_just_ordered_versus_long_silence(self):
        # Ordered at T: only the chance of stopping right after that order remains,
        # 1 - E[p | Beta(a, b + x - 1)] = (b + x - 1)/(a + b + x - 1) (eq. 11 with t_x = T).
        r, alpha, a, b = PARAMS_A
        chances = chance_still_active(PARAMS_A, [10, 10], [700.0, 50.0], [700.0, 700.0])
        assert chances[0] == pytest.approx((b + 9) / (a + b + 9), rel=1e-12)
        # A regular customer silent for 650 days is very likely gone.
        assert chances[1] < 0.01


class TestFrequencyFitResult:
    def test_unknown_uncertainty(self):
        # A flat likelihood leaves the covariance unknown: draws repeat the estimate and
        # the summary stays valid JSON (no NaN).
        import json

        fit = FrequencyFit(r=0.5, alpha=30.0, a=0.9, b=2.0, log_likelihood=-10.0,
                           covariance=np.full((4, 4), np.nan), customers=3, converged=True)
        np.testing.assert_array_equal(fit.draw_parameters(5), np.tile([0.5, 30.0, 0.9, 2.0], (5, 1)))
        summary = json.loads(json.dumps(fit.as_dict(), allow_nan=False))
        assert summary["r_se"] is None
        assert summary["chance_stop_after_order"] == pytest.approx(0.9 / 2.9)

    def test_draws_follow_the_covariance(self):
        # Reference: sample covariance of 20,000 draws of the log-parameters.
        fit = fit_order_frequency(simulate_histories(PARAMS_A, 2000, seed=6))
        logs = np.log(fit.draw_parameters(20000, seed=1))
        assert np.all(np.abs(logs.mean(axis=0) - np.log(fit.params)) < 4 * np.sqrt(np.diag(fit.covariance) / 20000))
        np.testing.assert_allclose(np.cov(logs.T), fit.covariance, rtol=0.1, atol=0.05 * np.abs(fit.covariance).max())


class TestFrequencyForecast:
    def test_table(self):
        history = simulate_histories(PARAMS_A, 500, seed=2)
        history.index = pd.Index([f"C-{i:04d}" for i in range(500)], name="customer")
        before = history.copy()
        table = frequency_forecast(history, horizon=90)
        pd.testing.assert_frame_equal(history, before)
        assert list(table.columns) == HISTORY_COLUMNS + ["expected_orders", "chance_active"]
        assert table.index.equals(history.index)
        fit = table.attrs["fit"]
        np.testing.assert_allclose(
            table["expected_orders"],
            expected_orders_ahead((fit["r"], fit["alpha_days"], fit["a"], fit["b"]),
                                  *(history[c] for c in HISTORY_COLUMNS), 90.0),
        )
        assert ((table["chance_active"] > 0) & (table["chance_active"] <= 1)).all()


class TestJudgeOptimum:
    """The fit is judged by the point it reached, not by the optimiser's message."""

    def test_forty_simulated_shops_all_reach_their_optimum(self):
        # Reference: simulation from the model's own story with known parameters;
        # every shop of 1,500 customers has a clear optimum. A second optimiser
        # (scipy's Nelder-Mead, derivative-free) started at the fit must not find
        # a better likelihood, and the standard errors must exist.
        from forecasting.frequency import _negative_mean_ll

        # PARAMS_B seed 23 is one where a quasi-Newton optimiser (scipy 1.17's L-BFGS-B) ended
        # with "ABNORMAL" at the optimum (largest gradient about 5e-9).
        for seed in range(40):
            history = simulate_histories(PARAMS_B, 1500, seed=seed)
            fit = fit_order_frequency(history)
            assert fit.converged and fit.usable, (seed, fit.notes)
            assert np.all(np.isfinite(fit.standard_errors)), seed
            assert not any("optimiser" in note or "ABNORMAL" in note for note in fit.notes)
            args = tuple(history[c].to_numpy() for c in HISTORY_COLUMNS)
            polish = optimize.minimize(lambda p: _negative_mean_ll(p, *args)[0], np.log(fit.params),
                                       method="Nelder-Mead",
                                       options={"xatol": 1e-9, "fatol": 1e-14, "maxiter": 4000})
            gain = (-polish.fun * len(history)) - fit.log_likelihood
            assert gain < 1e-4, (seed, gain)

    def test_an_optimiser_warning_at_the_optimum_is_accepted(self, monkeypatch):
        # The optimiser's message is not the judge: the same point, reported as a failed
        # line search, gives the same fit with its standard errors.
        import dataclasses

        import forecasting.frequency as frequency

        history = simulate_histories(PARAMS_A, 1500, seed=7)
        sound = fit_order_frequency(history)
        real_minimise = frequency.minimise

        def complaining(*args, **kwargs):
            return dataclasses.replace(real_minimise(*args, **kwargs), message="no step lowered the value")

        monkeypatch.setattr(frequency, "minimise", complaining)
        warned = fit_order_frequency(history)
        assert warned.converged and warned.usable
        assert warned.params == sound.params
        np.testing.assert_array_equal(warned.covariance, sound.covariance)
        assert not any("lowered" in note for note in warned.notes)

    def test_a_point_short_of_the_optimum_is_not_accepted(self):
        from forecasting.frequency import _hessian_of_negative_ll, _negative_mean_ll, judge_optimum

        history = simulate_histories(PARAMS_A, 1500, seed=7)
        args = tuple(history[c].to_numpy() for c in HISTORY_COLUMNS)
        fit = fit_order_frequency(history)
        away = np.log(fit.params) + np.array([0.2, -0.1, 0.1, 0.0])
        value, gradient = _negative_mean_ll(away, *args)
        verdict = judge_optimum(away, gradient, _hessian_of_negative_ll(away, *args), bound=18.0,
                                names=("r", "alpha", "a", "b"), scale=value)
        assert not verdict.reached
        assert np.all(np.isnan(verdict.covariance))
        assert "stopped before reaching the best fit" in verdict.notes[0]

    def test_a_saddle_is_not_called_flat_or_accepted(self):
        from forecasting.frequency import judge_optimum

        saddle = np.diag([4.0, 1.0, -1.0, 2.0])
        verdict = judge_optimum(np.zeros(4), np.zeros(4), saddle, bound=18.0, names=("r", "alpha", "a", "b"))
        assert not verdict.reached
        assert "not at a clear peak" in verdict.notes[0]

    def test_a_parameter_at_the_bound_is_named(self):
        from forecasting.frequency import judge_optimum

        point = np.array([0.0, 18.0, 0.0, 0.0])
        # The slope pushes alpha further out: it cannot be followed, so it does not count.
        verdict = judge_optimum(point, np.array([0.0, -1.0, 0.0, 0.0]), np.eye(4), bound=18.0,
                                names=("r", "alpha", "a", "b"))
        assert not verdict.reached
        assert "alpha" in verdict.notes[0] and "edge" in verdict.notes[0]

    def test_an_optimum_with_a_loose_parameter_keeps_no_covariance(self):
        from forecasting.frequency import judge_optimum

        nearly_flat = np.diag([1e4, 1e4, 1e-6, 1e4])
        verdict = judge_optimum(np.zeros(4), np.zeros(4), nearly_flat, bound=18.0, names=("r", "alpha", "a", "b"))
        assert verdict.reached
        assert np.all(np.isnan(verdict.covariance))
        assert "barely pin down a" in verdict.notes[0]


# --------------------------------------------------------------------------- #
# MBG/NBD: a customer may stop right after the first order too
# --------------------------------------------------------------------------- #
def simulate_histories_dropping(params, customers, seed, *, known_low=60.0, known_high=730.0):
    """Repeat histories from the MBG/NBD story: a coin after the first order as well.

    With chance p the customer stops right after the first order (x = 0);
    otherwise x = min(Poisson(lambda T), Geometric(p)) as in BG/NBD.
    """
    r, alpha, a, b = params
    rng = np.random.default_rng(seed)
    rate = rng.gamma(r, 1.0 / alpha, customers)
    stop = rng.beta(a, b, customers)
    known = rng.uniform(known_low, known_high, customers)
    first_coin = rng.random(customers) < stop
    arrivals = rng.poisson(rate * known)
    repeat = np.where(first_coin, 0, np.minimum(arrivals, rng.geometric(stop)))
    to_last = np.where(repeat > 0, known * rng.beta(np.maximum(repeat, 1), arrivals - repeat + 1), 0.0)
    return pd.DataFrame({"repeat_orders": repeat, "days_to_last_order": to_last, "days_known": known})


def likelihood_dropping_by_integration(params, x, t_x, age):
    """MBG/NBD's likelihood integrated numerically over lambda and p (scipy dblquad): still active
    after x + 1 coins, or stopped at the coin right after the x-th repeat order (or the first order)."""
    r, alpha, a, b = params
    log_norm = r * math.log(alpha) - math.lgamma(r) + math.lgamma(a + b) - math.lgamma(a) - math.lgamma(b)

    def integrand(p, lam):
        if lam <= 0 or p <= 0 or p >= 1:
            return 0.0
        value = ((1 - p) ** (x + 1) * math.exp(x * math.log(lam) - lam * age)
                 + p * (1 - p) ** x * math.exp(x * math.log(lam) - lam * t_x))
        return value * math.exp(log_norm + (r - 1) * math.log(lam) - alpha * lam + (a - 1) * math.log(p)
                                + (b - 1) * math.log1p(-p))

    value, _ = integrate.dblquad(integrand, 0, np.inf, 0, 1, epsabs=0, epsrel=1e-10)
    return value


def dropping_new_customer_orders_printed(params, t):
    """E[X(t)] of MBG/NBD as printed (from memory): b/(a-1) [1 - (alpha/(alpha+t))^r 2F1(r, b+1; a+b; t/(alpha+t))]."""
    mpmath = pytest.importorskip("mpmath")
    with mpmath.workdps(40):
        r, alpha, a, b = (mpmath.mpf(v) for v in params)
        t = mpmath.mpf(t)
        return float(b / (a - 1) * (1 - (alpha / (alpha + t)) ** r * mpmath.hyp2f1(r, b + 1, a + b, t / (alpha + t))))


def dropping_orders_ahead_printed(params, x, t_x, age, t):
    """E[Y(t) | x, t_x, T] of MBG/NBD as printed (from memory), with mpmath's 2F1:
    (a+b+x)/(a-1) [1 - ((alpha+T)/(alpha+T+t))^(r+x) 2F1(r+x, b+x+1; a+b+x; t/(alpha+T+t))]
    / (1 + a/(b+x) ((alpha+T)/(alpha+t_x))^(r+x))."""
    mpmath = pytest.importorskip("mpmath")
    with mpmath.workdps(40):
        r, alpha, a, b = (mpmath.mpf(v) for v in params)
        x, t_x, age, t = (mpmath.mpf(v) for v in (x, t_x, age, t))
        top = (a + b + x) / (a - 1) * (
            1 - ((alpha + age) / (alpha + age + t)) ** (r + x)
            * mpmath.hyp2f1(r + x, b + x + 1, a + b + x, t / (alpha + age + t)))
        bottom = 1 + (a / (b + x)) * ((alpha + age) / (alpha + t_x)) ** (r + x)
        return float(top / bottom)


def dropping_active_share(params, x, t_x, age):
    """Posterior chance of being active under MBG/NBD, from the two likelihood terms (Bayes' rule)."""
    r, alpha, a, b = params
    log_active = math.lgamma(a) + math.lgamma(b + x + 1) - (r + x) * math.log(alpha + age)
    log_stopped = math.lgamma(a + 1) + math.lgamma(b + x) - (r + x) * math.log(alpha + t_x)
    return 1 / (1 + math.exp(log_stopped - log_active))


class TestDropOutAfterFirstOrder:
    """MBG/NBD (Batislam, Denizel and Filiztekin 2007; Hoppe and Wagner 2007)."""

    @pytest.mark.parametrize("params", [PARAMS_A, PARAMS_B])
    @pytest.mark.parametrize("x, t_x, age", [(0, 0.0, 200.0), (1, 50.0, 300.0), (4, 120.0, 150.0),
                                             (7, 600.0, 700.0)])
    def test_likelihood_equals_numerical_integration_of_the_story(self, params, x, t_x, age):
        # Reference: scipy.integrate.dblquad over lambda in (0, inf) and p in (0, 1).
        expected = math.log(likelihood_dropping_by_integration(params, x, t_x, age))
        got = frequency_log_likelihood(params, [x], [t_x], [age], model="mbg-nbd")[0]
        assert got == pytest.approx(expected, rel=1e-8, abs=1e-8)

    def test_a_customer_seen_for_no_time_has_likelihood_one(self):
        # x = 0, t_x = T = 0: still active with chance b/(a+b), stopped with a/(a+b); together 1.
        assert frequency_log_likelihood(PARAMS_B, [0], [0.0], [0.0], model="mbg-nbd")[0] == pytest.approx(0.0, abs=1e-12)

    def test_gradient_matches_finite_differences(self):
        # Reference: scipy.optimize.approx_fprime on the summed log-likelihood.
        history = simulate_histories_dropping(PARAMS_A, 300, seed=3)
        args = [history[c].to_numpy() for c in HISTORY_COLUMNS]
        point = np.array([0.9, 35.0, 1.3, 3.5])
        numeric = optimize.approx_fprime(
            point, lambda p: frequency_log_likelihood(p, *args, model="mbg-nbd").sum(), epsilon=1e-6 * point)
        analytic = frequency_log_likelihood_gradient(point, *args, model="mbg-nbd")
        np.testing.assert_allclose(analytic, numeric, rtol=1e-4)

    @pytest.mark.parametrize("params", [PARAMS_A, PARAMS_B, CDNOW_WEEKS])
    @pytest.mark.parametrize("t", [0.5, 30.0, 365.0, 5000.0])
    def test_new_customer_orders_match_the_printed_formula(self, params, t):
        got = expected_new_customer_orders(params, t, model="mbg-nbd")
        assert got == pytest.approx(dropping_new_customer_orders_printed(params, t), rel=1e-10)

    def test_new_customer_orders_match_an_integral_over_rates_and_stop_chances(self):
        # Reference: E[X(t) | lambda, p] = (1 - p)(1 - exp(-lambda p t)) / p (the first coin, then
        # BG/NBD's count), integrated over the Gamma and Beta mixing distributions with dblquad.
        for params in (PARAMS_A, (0.8, 40.0, 1.0, 4.0)):
            expected = mixed_over_rates_and_stop_chances(
                params, lambda lam, p: (1 - p) * -math.expm1(-lam * p * 200.0) / p)
            assert expected_new_customer_orders(params, 200.0, model="mbg-nbd") == pytest.approx(expected, rel=1e-7)

    @pytest.mark.parametrize("params", [PARAMS_A, PARAMS_B, CDNOW_WEEKS])
    @pytest.mark.parametrize("x, t_x, age, h",
                             [(0, 0.0, 30.0, 90.0), (1, 20.0, 400.0, 365.0), (5, 300.0, 320.0, 30.0),
                              (40, 690.0, 700.0, 2000.0)])
    def test_orders_ahead_match_the_printed_formula(self, params, x, t_x, age, h):
        got = expected_orders_ahead(params, x, t_x, age, h, model="mbg-nbd")
        assert got == pytest.approx(dropping_orders_ahead_printed(params, x, t_x, age, h), rel=1e-9)

    @pytest.mark.parametrize("x, t_x, age", [(0, 0.0, 120.0), (3, 200.0, 400.0), (6, 100.0, 500.0)])
    def test_orders_ahead_match_monte_carlo_of_the_posterior(self, x, t_x, age):
        # Reference: seeded simulation. Active with the posterior share of the "still active" term;
        # if active, lambda ~ Gamma(r+x, alpha+T) and p ~ Beta(a, b+x+1) (x + 1 coins survived);
        # future orders simulated. Tolerance 4 standard errors.
        r, alpha, a, b = PARAMS_A
        share = dropping_active_share(PARAMS_A, x, t_x, age)
        rng = np.random.default_rng(199 + x)
        n = 400_000
        active = rng.random(n) < share
        counts = future_orders_monte_carlo(rng.gamma(r + x, 1 / (alpha + age), n), rng.beta(a, b + x + 1, n), 180.0,
                                           rng)
        counts = np.where(active, counts, 0)
        got = expected_orders_ahead(PARAMS_A, x, t_x, age, 180.0, model="mbg-nbd")
        assert abs(got - counts.mean()) < 4 * counts.std() / math.sqrt(n)
        assert chance_still_active(PARAMS_A, x, t_x, age, model="mbg-nbd") == pytest.approx(share, rel=1e-12)

    def test_chance_active_matches_numerical_posterior(self):
        # Reference: dblquad of the "still active" part of the likelihood over the whole likelihood.
        r, alpha, a, b = PARAMS_B
        x, t_x, age = 0, 0.0, 300.0
        log_norm = r * math.log(alpha) - math.lgamma(r) + math.lgamma(a + b) - math.lgamma(a) - math.lgamma(b)

        def active_part(p, lam):
            if lam <= 0 or p <= 0 or p >= 1:
                return 0.0
            return (1 - p) ** (x + 1) * math.exp(x * math.log(lam) - lam * age + log_norm + (r - 1) * math.log(lam)
                                                 - alpha * lam + (a - 1) * math.log(p) + (b - 1) * math.log1p(-p))

        numerator, _ = integrate.dblquad(active_part, 0, np.inf, 0, 1, epsabs=0, epsrel=1e-9)
        expected = numerator / likelihood_dropping_by_integration(PARAMS_B, x, t_x, age)
        got = chance_still_active(PARAMS_B, x, t_x, age, model="mbg-nbd")
        assert got == pytest.approx(expected, rel=1e-7)
        # A one-time buyer is no longer certain to be active (as in BG/NBD), and less so the longer the silence.
        longer = chance_still_active(PARAMS_B, [0, 0], [0.0, 0.0], [10.0, 600.0], model="mbg-nbd")
        assert 0 < longer[1] < longer[0] < 1
        assert np.all(chance_still_active(PARAMS_B, [0, 0], [0.0, 0.0], [10.0, 600.0]) == 1.0)

    def test_simulated_orders_match_the_event_by_event_story(self):
        # Slow twin: one customer and one order at a time (active with the posterior share, then
        # exponential gaps and a coin after each order); chi-square test of homogeneity on 0, 1, 2, 3+.
        rng = np.random.default_rng(41)
        customers = [(0, 0.0, 120.0), (3, 200.0, 400.0), (6, 100.0, 500.0)]
        x, t_x, age = (np.array(v, dtype=float) for v in zip(*customers))
        fast = simulate_orders_ahead(np.tile(PARAMS_A, (4000, 1)), x, t_x, age, 180.0, seed=6, model="mbg-nbd")
        r, alpha, a, b = PARAMS_A
        for k, (xk, tk, ak) in enumerate(customers):
            share = dropping_active_share(PARAMS_A, xk, tk, ak)
            slow = np.zeros(4000, dtype=np.int64)
            for d in range(4000):
                if rng.random() >= share:
                    continue
                rate, stop, clock = rng.gamma(r + xk, 1 / (alpha + ak)), rng.beta(a, b + xk + 1), 0.0
                while True:
                    clock += rng.exponential(1 / rate)
                    if clock > 180.0:
                        break
                    slow[d] += 1
                    if rng.random() < stop:
                        break
            table = np.array([[np.sum(np.minimum(c, 3) == j) for j in range(4)] for c in (fast[:, k], slow)])
            table = table[:, table.sum(axis=0) > 0]
            assert stats.chi2_contingency(table).pvalue > 1e-3, (customers[k], table)

    def test_new_customer_draws_average_the_expected_count(self):
        # Reference: eq. 7's MBG/NBD form (expected_new_customer_orders); 4 standard errors.
        days = np.repeat([30.0, 200.0, 700.0], 60_000)
        for model in ("bg-nbd", "mbg-nbd"):
            counts = simulate_new_customer_orders(np.tile(PARAMS_B, (len(days), 1)), days, seed=3, model=model)
            for period in (30.0, 200.0, 700.0):
                part = counts[days == period]
                expected = expected_new_customer_orders(PARAMS_B, period, model=model)
                assert abs(part.mean() - expected) < 4 * part.std() / math.sqrt(len(part)), (model, period)

    def test_fit_recovers_simulated_parameters(self):
        # Reference: simulation from the MBG/NBD story with known parameters; within 4 standard
        # errors and 25% of the truth.
        true = (0.9, 50.0, 1.3, 1.8)
        fit = fit_order_frequency(simulate_histories_dropping(true, 20000, seed=12), model="mbg-nbd")
        assert fit.converged and fit.model == "mbg-nbd"
        got = np.array(fit.params)
        assert np.all(np.abs(got - true) < 4 * fit.standard_errors)
        np.testing.assert_allclose(got, true, rtol=0.25)
        assert fit.as_dict()["chance_gone_after_first_order"] == pytest.approx(fit.a / (fit.a + fit.b))

    def test_twenty_shops_reach_their_optimum(self):
        # The fit is judged by judge_optimum as BG/NBD's is; a derivative-free polish from the
        # fit (scipy's Nelder-Mead) must not find a better likelihood.
        from forecasting.frequency import _negative_mean_ll

        for seed in range(20):
            history = simulate_histories_dropping(PARAMS_B, 1500, seed=seed)
            fit = fit_order_frequency(history, model="mbg-nbd")
            assert fit.converged and fit.usable, (seed, fit.notes)
            args = tuple(history[c].to_numpy() for c in HISTORY_COLUMNS)
            polish = optimize.minimize(lambda p: _negative_mean_ll(p, *args, "mbg-nbd")[0], np.log(fit.params),
                                       method="Nelder-Mead", options={"xatol": 1e-9, "fatol": 1e-14, "maxiter": 4000})
            assert (-polish.fun * len(history)) - fit.log_likelihood < 1e-4, seed

    def test_the_shops_own_orders_pick_the_model_they_follow(self):
        # Simulated shops of 2,000 customers: ten from each story. The likelihood must pick the
        # story a shop was simulated from in at least 9 of 10 (an offline run of 40 each: 40/40 and 40/40).
        picks = {"bg-nbd": 0, "mbg-nbd": 0}
        for seed in range(10):
            picks["bg-nbd"] += choose_order_model(simulate_histories(PARAMS_A_SHOP, 2000, seed=300 + seed)).model == "bg-nbd"
            chosen = choose_order_model(simulate_histories_dropping(PARAMS_A_SHOP, 2000, seed=400 + seed))
            picks["mbg-nbd"] += chosen.model == "mbg-nbd"
        assert picks["bg-nbd"] >= 9 and picks["mbg-nbd"] >= 9, picks
        assert "MBG/NBD fits these orders better" in chosen.choice and MODEL_NAMES[chosen.model] == "MBG/NBD"

    def test_unknown_model_refused(self):
        with pytest.raises(OrderDataError, match="bg-nbd or mbg-nbd"):
            frequency_log_likelihood(PARAMS_A, [1], [2.0], [3.0], model="pareto")
