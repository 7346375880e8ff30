"""Per-customer statistics: cleaned orders in, one row per customer out.

Input: the cleaned orders table (one row per order) with columns
``customer``, ``order_date`` and ``order_value`` (and optionally ``segment``).

Output: one row per customer, indexed by ``customer``, with

=================  ==========================================================
``orders``         number of orders n_t
``total``          sum of order values
``mean``           average order value m_t
``sum_sq_dev``     sum of squared deviations from m_t, SS_t
``log_mean``       average of log order value
``log_sum_sq_dev`` sum of squared deviations of log order value from log_mean
``log_var``        log_sum_sq_dev / (n_t - 1); NaN for one order
``first_order``    date of the first order
``last_order``     date of the last order
``segment``        the customer's segment (most recent order's), if given
=================  ==========================================================

Every estimator starts from this table. It is computed in one vectorised
pass (group codes and ``numpy.bincount``), never with a loop over customers,
and two-pass sums of squares keep it exact for values from cents to billions.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

STATISTICS_COLUMNS = [
    "orders",
    "total",
    "mean",
    "sum_sq_dev",
    "log_mean",
    "log_sum_sq_dev",
    "log_var",
    "first_order",
    "last_order",
]


def _group_mean_and_ss(codes: np.ndarray, values: np.ndarray, counts: np.ndarray, n_groups: int):
    """Return per-group sums, means and sums of squared deviations (two passes)."""
    totals = np.bincount(codes, weights=values, minlength=n_groups)
    means = totals / counts
    deviations = values - means[codes]
    sum_sq = np.bincount(codes, weights=deviations * deviations, minlength=n_groups)
    return totals, means, sum_sq


def _all_equal(codes: np.ndarray, values: np.ndarray, n_groups: int) -> np.ndarray:
    """Per group: are all its values equal? (Compared with one of them, whichever was stored last.)"""
    member = np.empty(n_groups, dtype=values.dtype)
    member[codes] = values
    return np.bincount(codes, weights=values != member[codes], minlength=n_groups) == 0


def customer_statistics(orders: pd.DataFrame) -> pd.DataFrame:
    """Summarise cleaned orders into one row per customer.

    Parameters
    ----------
    orders : pandas.DataFrame
        One row per order with ``customer``, ``order_value`` (positive) and
        ``order_date``; ``segment`` is carried through when present.

    Returns
    -------
    pandas.DataFrame
        Indexed by ``customer`` (sorted), columns as in the module docstring.

    Examples
    --------
    >>> import pandas as pd
    >>> orders = pd.DataFrame({"customer": ["a", "a", "b"],
    ...                        "order_value": [10.0, 30.0, 5.0],
    ...                        "order_date": pd.to_datetime(["2025-01-01", "2025-02-01", "2025-01-05"])})
    >>> customer_statistics(orders)[["orders", "mean", "sum_sq_dev"]]
              orders  mean  sum_sq_dev
    customer
    a              2  20.0       200.0
    b              1   5.0         0.0
    """
    codes, names = pd.factorize(orders["customer"], sort=True)
    n_groups = len(names)
    values = orders["order_value"].to_numpy(dtype=np.float64)
    counts = np.bincount(codes, minlength=n_groups)
    totals, means, sum_sq = _group_mean_and_ss(codes, values, counts, n_groups)
    _, log_means, log_sum_sq = _group_mean_and_ss(codes, np.log(values), counts, n_groups)
    # Orders all of one value have no spread, exactly (their deviations from a rounded mean need
    # not be zero); every engine applies this rule.
    no_spread = _all_equal(codes, values, n_groups)
    sum_sq[no_spread] = 0.0
    log_sum_sq[no_spread] = 0.0
    with np.errstate(invalid="ignore", divide="ignore"):
        log_var = np.where(counts > 1, log_sum_sq / (counts - 1), np.nan)

    dates = orders["order_date"]
    date_codes = pd.Series(dates.to_numpy(), index=codes)
    first = date_codes.groupby(level=0).min()
    last = date_codes.groupby(level=0).max()

    table = pd.DataFrame(
        {
            "orders": counts.astype(np.int64),
            "total": totals,
            "mean": means,
            "sum_sq_dev": sum_sq,
            "log_mean": log_means,
            "log_sum_sq_dev": log_sum_sq,
            "log_var": log_var,
            "first_order": first.reindex(range(n_groups)).to_numpy(),
            "last_order": last.reindex(range(n_groups)).to_numpy(),
        },
        index=pd.Index(np.asarray(names, dtype=object), name="customer"),
    )
    if "segment" in orders.columns:
        # A customer who moved between segments is placed by their latest order.
        latest = orders.assign(_code=codes).sort_values("order_date", kind="stable")
        segment = latest.groupby("_code")["segment"].last()
        table["segment"] = segment.reindex(range(n_groups)).to_numpy()
    return table
