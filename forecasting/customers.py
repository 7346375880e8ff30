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


def _first_and_last(codes: np.ndarray, dates: pd.Series, n_groups: int) -> tuple[np.ndarray, np.ndarray]:
    """Each customer's first and last order date (NaT where a customer has no date)."""
    stamps = dates.to_numpy(dtype="datetime64[ns]")
    moments = stamps.view(np.int64)
    valid = ~np.isnat(stamps)
    first = np.full(n_groups, np.iinfo(np.int64).max, dtype=np.int64)
    last = np.full(n_groups, np.iinfo(np.int64).min, dtype=np.int64)
    np.minimum.at(first, codes[valid], moments[valid])
    np.maximum.at(last, codes[valid], moments[valid])
    none = np.bincount(codes[valid], minlength=n_groups) == 0
    first[none] = last[none] = np.iinfo(np.int64).min  # NaT
    return first.view("datetime64[ns]"), last.view("datetime64[ns]")


def _latest_segment(codes: np.ndarray, dates: pd.Series, segment: pd.Series, n_groups: int) -> np.ndarray:
    """Each customer's segment on their latest order that names one (by date, then place)."""
    stamps = dates.to_numpy(dtype="datetime64[ns]").view(np.int64)
    if len(stamps) < 2 or bool((stamps[1:] >= stamps[:-1]).all()):
        rank = np.arange(len(stamps))
    else:
        order = np.argsort(stamps, kind="stable")
        rank = np.empty(len(stamps), dtype=np.int64)
        rank[order] = np.arange(len(stamps))
    named = segment.notna().to_numpy()
    latest = np.full(n_groups, -1, dtype=np.int64)
    np.maximum.at(latest, codes[named], rank[named])
    at_rank = np.empty(len(stamps), dtype=np.int64)
    at_rank[rank] = np.arange(len(stamps))
    found = latest >= 0
    values = np.full(n_groups, np.nan, dtype=object)
    values[found] = segment.to_numpy(dtype=object)[at_rank[latest[found]]]
    return values


def _customer_index(names) -> pd.Index:
    """The customers as the table's index (text as pandas keeps text: a sorted reader's categories are
    used as they are)."""
    if isinstance(names, pd.Index) and not isinstance(names, pd.CategoricalIndex) \
            and isinstance(names.dtype, pd.StringDtype):
        return names.rename("customer")
    return pd.Index(np.asarray(names, dtype=object), name="customer")


def customer_codes(customer: pd.Series) -> tuple[np.ndarray, pd.Index]:
    """``(codes, names)``: each order's customer as its place among the customers, sorted.

    The same as ``pandas.factorize(customer, sort=True)``; a Categorical column whose categories
    are sorted (as the reader makes it) gives its codes as they are, without hashing the ids."""
    if isinstance(customer.dtype, pd.CategoricalDtype):
        categories = customer.cat.categories
        codes = customer.cat.codes.to_numpy()
        if len(codes) and categories.is_monotonic_increasing and codes.min() >= 0:
            used = np.bincount(codes, minlength=len(categories)) > 0
            if used.all():
                return codes, categories
            remap = np.cumsum(used) - 1
            return remap[codes], categories[used]
    return pd.factorize(customer, sort=True)


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
    codes, names = customer_codes(orders["customer"])
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

    first, last = _first_and_last(codes, orders["order_date"], n_groups)
    table = pd.DataFrame(
        {
            "orders": counts.astype(np.int64),
            "total": totals,
            "mean": means,
            "sum_sq_dev": sum_sq,
            "log_mean": log_means,
            "log_sum_sq_dev": log_sum_sq,
            "log_var": log_var,
            "first_order": first,
            "last_order": last,
        },
        index=_customer_index(names),
    )
    if "segment" in orders.columns:
        # A customer who moved between segments is placed by their latest order (the last in date
        # order, then file order, with a segment).
        table["segment"] = _latest_segment(codes, orders["order_date"], orders["segment"], n_groups)
    return table
