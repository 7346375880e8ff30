"""The two baselines: each customer's own average, and one shop-wide average for everyone."""

from __future__ import annotations

import numpy as np

from forecasting.estimators.base import Shrunk, as_arrays, plain_result


def plain_averages(means, mean_vars) -> Shrunk:
    """Each customer's own average: estimate m_t, g_t = 1, variance s_t."""
    m, s = as_arrays(means, mean_vars)
    return plain_result(m, s)


def plain_left_out(side, s_factor, **context):
    """Leave-one-out twin of :func:`plain_averages`: the mean of the customer's other orders."""
    return side.d_after, np.ones(side.H)


def pooled_average(means, mean_vars, *, orders) -> Shrunk:
    """One shop-wide average for everyone.

    centre = sum_t n_t m_t / sum_t n_t (the average over all orders); g_t = 0. The estimate's
    own variance is 0 with the centre treated as known; the forecasts' ranges add the spread
    between customers (:func:`forecasting.estimators.base.error_variance`), so a customer's
    range is as wide as customers differ, never zero.
    """
    m, s = as_arrays(means, mean_vars)
    n = np.asarray(orders, dtype=np.float64)
    centre = float(np.sum(n * m) / np.sum(n))
    zeros = np.zeros_like(m)
    return Shrunk(np.full_like(m, centre), zeros, centre, zeros.copy())


def pooled_left_out(side, s_factor, **context):
    """Leave-one-out twin of :func:`pooled_average`: the order-weighted centre without the order."""
    return side.order_weighted_centre_after(), np.zeros(side.H)
