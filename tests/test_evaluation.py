"""Tests of the evaluator: the fast leave-one-out against a brute-force refit,
the backtest, the bootstrap intervals, the automatic choice and the command line."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats as scipy_stats

from forecasting import evaluation
from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError
from forecasting.evaluation import (
    EXACT_METHODS,
    EXACT_VARIANCES,
    choose_method,
    default_cutoff,
    evaluate_methods,
)

REPO = Path(__file__).resolve().parent.parent


# ---------------------------------------------------------------------------
# Data
# ---------------------------------------------------------------------------


def _orders(rows, start="2025-01-01"):
    frame = pd.DataFrame(rows, columns=["customer", "order_value"])
    frame["order_date"] = pd.Timestamp(start) + pd.to_timedelta(np.arange(len(frame)) * 3, "D")
    return frame


def small_shop(seed=1, customers=12):
    """A dozen plant-shop customers plus hand-made edge cases: customers with
    one order, ties at the highest and the lowest average (mta-minimax), a
    customer whose two orders are equal."""
    rng = np.random.default_rng(seed)
    rows = []
    for c in range(customers):
        k = int(rng.integers(1, 6))
        level = rng.lognormal(3.0, 0.5)
        rows += [(f"fern-{c:02d}", float(rng.lognormal(np.log(level), 0.6))) for _ in range(k)]
    rows += [
        ("top-a", 500.0), ("top-a", 500.0),  # average 500, unchanged when one is held out
        ("top-b", 400.0), ("top-b", 600.0),  # also 500: a tie at the maximum
        ("low-a", 1.0), ("low-a", 1.0),
        ("low-b", 0.5), ("low-b", 1.5),  # a tie at the minimum
        ("single", 42.0),
    ]
    order = rng.permutation(len(rows))  # customers' orders not next to each other
    return _orders([rows[i] for i in order])


def simulated_shop(customers=400, seed=0, sigma_level=0.6, sigma_order=0.7, mean_orders=3.0, segments=False):
    """Orders simulated from the lognormal model: customer level ~ lognormal,
    each order ~ lognormal around it; a geometric number of orders."""
    rng = np.random.default_rng(seed)
    n = rng.geometric(1.0 / mean_orders, customers)
    level = rng.lognormal(3.5, sigma_level, customers)
    who = np.repeat(np.arange(customers), n)
    values = rng.lognormal(np.log(level[who]), sigma_order)
    frame = pd.DataFrame(
        {
            "customer": [f"c{c:05d}" for c in who],
            "order_value": values,
            "order_date": pd.Timestamp("2024-01-01") + pd.to_timedelta(rng.integers(0, 730, len(who)), "D"),
        }
    )
    if segments:
        frame["segment"] = np.where(who % 3 == 0, "wholesale", "retail")
    return frame


# ---------------------------------------------------------------------------
# Brute force: refit everything with one order removed
# ---------------------------------------------------------------------------


def _naive_pooled_variance(stats, sum_sq_column, values):
    # sum SS / sum (n - 1), falling back to the sample variance of all orders.
    dof = float((stats["orders"] - 1).sum())
    if dof > 0:
        return float(stats[sum_sq_column].sum()) / dof
    if len(values) < 2:
        return 0.0
    return float(np.var(values, ddof=1))


def _naive_fit(m, n, sigma2, method):
    """Each method written the obvious way; mta by a dense numpy solve of
    (I + (1/T) S L) y = m, the definition of multi-task averaging."""
    T = len(m)
    s = sigma2 / n
    if method == "plain":
        return m, np.ones(T)
    if method == "pooled":
        return np.full(T, (n * m).sum() / n.sum()), np.zeros(T)
    if method == "james-stein":
        if T <= 3:
            return m, np.ones(T)
        xi = m.mean()
        q = ((m - xi) ** 2 / s).sum()
        factor = max(0.0, 1.0 - (T - 3) / q)
        return xi + factor * (m - xi), np.full(T, factor)
    if method in ("mta", "mta-minimax"):
        a = 1.0 / np.var(m, ddof=1) if method == "mta" else 2.0 / (m.max() - m.min()) ** 2
        similarity = np.full((T, T), a)
        laplacian = np.diag(similarity.sum(axis=1)) - similarity
        y = np.linalg.solve(np.eye(T) + np.diag(s) @ laplacian / T, m)
        return y, 1.0 / (1.0 + a * s)
    if method == "empirical-bayes":
        tau2 = max(0.0, np.var(m, ddof=1) - s.mean())
        w = 1.0 / (tau2 + s)
        centre = (w * m).sum() / w.sum()
        g = tau2 / (tau2 + s)
        return g * m + (1 - g) * centre, g
    raise AssertionError(method)


def brute_force_leave_one_out(orders, method, variance, next_level=0.80):
    """Expected value and next-order range for every held-out order, by
    removing it and refitting from the orders."""
    stats = customer_statistics(orders)
    counts = stats["orders"].reindex(orders["customer"]).to_numpy()
    z = scipy_stats.norm.ppf(0.5 + next_level / 2)
    expected, low, high = [], [], []
    for i in np.flatnonzero(counts >= 2):
        rest = orders.drop(orders.index[i])
        s = customer_statistics(rest)
        pos = s.index.get_loc(orders["customer"].iloc[i])
        n = s["orders"].to_numpy(np.float64)
        sigma2_log = _naive_pooled_variance(s, "log_sum_sq_dev", np.log(rest["order_value"].to_numpy()))
        if variance == "classic":
            sigma2 = _naive_pooled_variance(s, "sum_sq_dev", rest["order_value"].to_numpy())
            estimate, g = _naive_fit(s["mean"].to_numpy(), n, sigma2, method)
            e = estimate[pos]
        else:
            estimate, g = _naive_fit(s["log_mean"].to_numpy(), n, sigma2_log, method)
            e = np.exp(estimate[pos] + (sigma2_log + g[pos] * sigma2_log / n[pos]) / 2)
        spread = np.sqrt(sigma2_log + g[pos] * sigma2_log / n[pos])
        median = e * np.exp(-sigma2_log / 2)
        expected.append(e)
        low.append(median * np.exp(-z * spread))
        high.append(median * np.exp(z * spread))
    return np.array(expected), np.array(low), np.array(high)


def fast_leave_one_out(orders, method, variance):
    held = evaluation._held_out_orders(orders, customer_statistics(orders))
    return evaluation._loo_predict(held, method, variance)


class TestExactLeaveOneOut:
    @pytest.mark.parametrize("method", EXACT_METHODS)
    @pytest.mark.parametrize("variance", EXACT_VARIANCES)
    def test_matches_brute_force_refit(self, method, variance):
        orders = small_shop()
        fast = fast_leave_one_out(orders, method, variance)
        expected, low, high = brute_force_leave_one_out(orders, method, variance)
        np.testing.assert_allclose(fast.expected, expected, rtol=1e-9)
        np.testing.assert_allclose(fast.low, low, rtol=1e-9)
        np.testing.assert_allclose(fast.high, high, rtol=1e-9)

    @pytest.mark.parametrize("method", EXACT_METHODS)
    def test_three_customers_and_the_one_order_fallback(self, method):
        # Only one customer has two orders: holding one out leaves every
        # customer with one order, so the pooled variance falls back to the
        # sample variance of all remaining orders.  Three customers also
        # switch James-Stein off (T <= 3).
        orders = _orders([("a", 10.0), ("a", 30.0), ("b", 12.0), ("c", 50.0)])
        for variance in EXACT_VARIANCES:
            fast = fast_leave_one_out(orders, method, variance)
            expected, _, _ = brute_force_leave_one_out(orders, method, variance)
            np.testing.assert_allclose(fast.expected, expected, rtol=1e-9)

    @pytest.mark.parametrize("method", EXACT_METHODS)
    def test_larger_random_shop(self, method):
        orders = simulated_shop(customers=60, seed=3).iloc[::-1].reset_index(drop=True)
        for variance in EXACT_VARIANCES:
            fast = fast_leave_one_out(orders, method, variance)
            expected, _, _ = brute_force_leave_one_out(orders, method, variance)
            np.testing.assert_allclose(fast.expected, expected, rtol=1e-9)

    def test_small_chunks_give_the_same_answer(self, monkeypatch):
        orders = small_shop(seed=5)
        whole = fast_leave_one_out(orders, "mta", "classic").expected
        monkeypatch.setattr(evaluation, "_CHUNK_CELLS", 7)
        np.testing.assert_allclose(fast_leave_one_out(orders, "mta", "classic").expected, whole, rtol=1e-13)

    def test_plain_average_of_remaining_orders(self):
        orders = _orders([("a", 10.0), ("a", 20.0), ("a", 60.0), ("b", 5.0)])
        held = evaluation._held_out_orders(orders, customer_statistics(orders))
        np.testing.assert_allclose(np.sort(held.money.mean_after), [15.0, 35.0, 40.0])

    def test_does_not_change_the_orders(self):
        orders = small_shop()
        before = orders.copy()
        evaluate_methods(orders, methods="mta", variances="classic", bootstrap=10)
        pd.testing.assert_frame_equal(orders, before)
