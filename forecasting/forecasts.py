"""Forecasts: per-customer statistics in, one forecast row per customer out.

This is the one door every front end (command line, dashboard, evaluation)
uses. :func:`forecast_customers` fits the chosen variance model
(:mod:`forecasting.variance`), runs the chosen estimator
(:mod:`forecasting.shrinkage`) and turns the result into money amounts with
two ranges per customer:

* ``expected_low`` / ``expected_high`` -- where the customer's true average
  order value probably lies (``level``, default 90%);
* ``next_order_low`` / ``next_order_high`` -- where the value of their next
  single order probably falls (``next_level``, default 80%).

The fitted shop-wide numbers (per-order spread, amount of shrinkage, centre,
notes, the tail report) are kept in ``result.attrs["fit"]`` as a plain dict of
floats and strings, so that a front end can explain them.
"""

from __future__ import annotations

from statistics import NormalDist

import numpy as np
import pandas as pd
import pyarrow as pa

from forecasting.errors import OrderDataError
from forecasting.exports import rounded_for_reading
from forecasting.shrinkage import METHODS, check_method, shrink
from forecasting.variance import (
    VARIANCE_MODELS,
    check_variance_model,
    iterate_proportional,
    pooled_variance,
    tail_report,
)

__all__ = ["FORECAST_COLUMNS", "METHODS", "VARIANCE_MODELS", "forecast_customers", "forecasts_for_reading"]

FORECAST_COLUMNS = [
    "customer",
    "orders",
    "average_order_value",
    "expected_next_order",
    "own_history_weight",
    "expected_low",
    "expected_high",
    "next_order_low",
    "next_order_high",
    "low_confidence",
    "method",
    "variance",
]

#: The forecast columns in money, rounded to cents in files (see forecasts_for_reading).
MONEY_COLUMNS = ["average_order_value", "expected_next_order", "expected_low", "expected_high",
                 "next_order_low", "next_order_high"]

#: Used when method="auto" and the evaluation module cannot choose.
DEFAULT_CHOICE = ("mta", "classic")

_NEEDS_ORDERS = ("james-stein-cv", "mta-cv")


def _check_level(value, option):
    if not (isinstance(value, (int, float, np.floating)) and 0 < float(value) < 1):
        raise OrderDataError(f"{option} must be a fraction between 0 and 1", value=value,
                             fix=f"Use for example {option}=0.9 for a 90% range")
    return float(value)


def _automatic_choice(stats, orders):
    """(method, variance, reason) from the evaluation module, or the default when it is absent."""
    try:
        from forecasting.evaluation import choose_method
    except ImportError as missing:
        if getattr(missing, "name", None) not in ("forecasting.evaluation", None):
            raise
        return DEFAULT_CHOICE + ("the automatic choice is not available, so multi-task averaging is used",)
    if orders is None:
        return DEFAULT_CHOICE + ("the automatic choice needs the order-level table; multi-task averaging is used",)
    chosen = choose_method(orders, stats)
    return chosen["method"], chosen["variance"], str(chosen.get("reason", ""))


def _order_positions(stats, orders):
    codes = stats.index.get_indexer(orders["customer"])
    if (codes < 0).any():
        raise OrderDataError(
            "the orders table has a customer that is missing from the customer statistics",
            column="customer", value=orders["customer"].to_numpy()[codes < 0][0],
            fix="Compute the statistics from the same orders table")
    return codes


def _repeated_text(text: str, rows: int):
    """One text in every row, as pandas text: a one-word dictionary decoded at once (broadcasting
    the word cell by cell costs a tenth of a second per column on millions of rows)."""
    words = pa.DictionaryArray.from_arrays(np.zeros(rows, dtype=np.int8), [text])
    # pandas keeps its text as Arrow large_string: decoding straight to it spares a second cast.
    return pd.array(words.cast(pa.large_string()), dtype="str")


def _flat(prefix, mapping):
    out = {}
    for key, value in mapping.items():
        if isinstance(value, (bool, np.bool_)):
            out[prefix + key] = bool(value)
        elif isinstance(value, (int, float, np.integer, np.floating)):
            out[prefix + key] = float(value)
        else:
            out[prefix + key] = str(value)
    return out


def forecast_customers(stats: pd.DataFrame, *, method: str = "mta", variance: str = "classic",
                       orders: pd.DataFrame | None = None, level: float = 0.90,
                       next_level: float = 0.80) -> pd.DataFrame:
    """Expected next-order value, with ranges, for every customer.

    Parameters
    ----------
    stats : pandas.DataFrame
        From :func:`forecasting.customers.customer_statistics` (a ``segment``
        column is needed for ``"mta-segments"``).
    method : str, default "mta"
        One of ``METHODS`` or ``"auto"`` (the method and variance model with
        the lowest leave-one-out error, from :mod:`forecasting.evaluation`).
    variance : str, default "classic"
        One of ``VARIANCE_MODELS``; ignored by ``"gamma-gamma"``, which has
        its own spread (reported as ``"gamma-model"``).
    orders : pandas.DataFrame, optional
        The cleaned orders the statistics came from; needed by the
        ``"robust"`` variance model, the ``-cv`` methods and ``"auto"``, and
        used for the tail report.
    level : float, default 0.90
        Coverage of ``expected_low`` / ``expected_high``.
    next_level : float, default 0.80
        Coverage of ``next_order_low`` / ``next_order_high``.

    Returns
    -------
    pandas.DataFrame
        One row per customer in the order of ``stats``, columns
        ``FORECAST_COLUMNS``; ``attrs["fit"]`` holds the fitted scalars.

    Notes
    -----
    With estimate y_t, own-history weight g_t and s_t the variance of the
    customer's average, the estimate's variance is v_t = g_t s_t (the
    posterior variance of a shrunk mean with the centre treated as known;
    gamma-gamma uses its exact posterior variance). The expected range is
    y_t +- z sqrt(v_t), cut at 0; for the ``"log"`` model it is
    exp(mu_t + sigma2_log / 2 +- z sqrt(v_t)).

    The next order is modelled as lognormal with the shop's pooled log-scale
    spread sigma2_log (classic pooled variance of log order values), whatever
    the variance model: median_t = expected_t exp(-sigma2_log / 2) and the
    range is median_t exp(+- z sqrt(sigma2_log + g_t sigma2_log / n_t)).

    ``low_confidence`` is True when the own-history weight is below 0.5 or
    the customer has a single order.

    Examples
    --------
    >>> import pandas as pd
    >>> from forecasting.customers import customer_statistics
    >>> orders = pd.DataFrame({
    ...     "customer": ["fern", "fern", "ivy", "ivy", "ivy", "moss"],
    ...     "order_value": [24.0, 36.0, 80.0, 64.0, 72.0, 15.0],
    ...     "order_date": pd.to_datetime(["2025-03-01", "2025-04-02", "2025-03-05",
    ...                                   "2025-05-01", "2025-06-01", "2025-06-03"])})
    >>> table = forecast_customers(customer_statistics(orders), method="mta")
    >>> table[["customer", "orders", "average_order_value", "low_confidence"]]
      customer  orders  average_order_value  low_confidence
    0     fern       2                 30.0           False
    1      ivy       3                 72.0           False
    2     moss       1                 15.0            True
    """
    if method != "auto":
        check_method(method)
    check_variance_model(variance)
    level = _check_level(level, "level")
    next_level = _check_level(next_level, "next_level")
    if len(stats) == 0:
        raise OrderDataError("there are no customers to forecast", fix="Check that the file has order rows")
    fit = {}
    if method == "auto":
        method, variance, reason = _automatic_choice(stats, orders)
        fit["auto_choice"] = f"{method} with {variance} variance: {reason}"
    if method in _NEEDS_ORDERS and orders is None:
        raise OrderDataError(f"the '{method}' method needs the order-level table",
                             fix="Pass orders=..., or choose a --method without -cv")
    if method == "mta-segments" and "segment" not in stats.columns:
        raise OrderDataError("the 'mta-segments' method needs a segment for every customer",
                             fix="Name the segment column with --segment, or choose another --method")

    n = stats["orders"].to_numpy(dtype=np.int64)
    n_float = n.astype(np.float64)
    money_mean = stats["mean"].to_numpy(dtype=np.float64)
    log_fit = pooled_variance(stats, model="log")
    sigma2_log = log_fit.sigma2
    # gamma-gamma has its own spread; the classic variance only backs up its intervals.
    vfit = pooled_variance(stats, model="classic" if method == "gamma-gamma" else variance, orders=orders)
    on_log = vfit.scale == "log"
    working = stats["log_mean"].to_numpy(dtype=np.float64) if on_log else money_mean

    codes = values = None
    if orders is not None and method in _NEEDS_ORDERS:
        codes = _order_positions(stats, orders)
        values = orders["order_value"].to_numpy(dtype=np.float64)
        if on_log:
            values = np.log(values)
    segments = None
    if "segment" in stats.columns and method == "mta-segments":
        segments = pd.factorize(stats["segment"].astype("string").fillna(""), sort=True)[0]

    def run(mean_vars, multiplier=None):
        return shrink(working, mean_vars, method=method, orders=n_float, segments=segments,
                      codes=codes, values=values, multiplier=multiplier)

    notes = list(log_fit.notes) if on_log else list(vfit.notes)
    if vfit.model == "proportional" and method != "gamma-gamma":
        first = run(vfit.mean_variance(n_float, level=working))
        multiplier = first.params.get("lambda")
        result, mean_vars, iterations, converged = iterate_proportional(
            lambda s: run(s, multiplier), working, n_float, vfit.sigma2)
        fit["iterations"] = float(iterations)
        fit["converged"] = bool(converged)
        if not converged:
            notes.append(f"The proportional variance model did not settle within {iterations} refits; "
                         "the last refit is used.")
    else:
        mean_vars = vfit.mean_variance(n_float)
        result = run(mean_vars)
    notes.extend(result.notes)

    estimate = result.estimate
    weight = np.clip(result.weight, 0.0, 1.0)
    v = np.maximum(result.estimate_var, 0.0)
    # Normal quantiles from the standard library (Wichura's AS 241, accurate to about 1e-16),
    # which spares the command line the start-up time of scipy.
    z = NormalDist().inv_cdf(0.5 + level / 2.0)
    z_next = NormalDist().inv_cdf(0.5 + next_level / 2.0)
    # In-place steps below: on millions of customers every temporary array is fresh memory.
    half = np.sqrt(v)
    half *= z
    if on_log:
        expected = np.exp(estimate + (sigma2_log + v) / 2.0)
        expected_low = np.exp(estimate + sigma2_log / 2.0 - half)
        expected_high = np.exp(estimate + sigma2_log / 2.0 + half)
        centre_money = float(np.exp(result.centre + sigma2_log / 2.0))
    else:
        expected = estimate
        expected_low = estimate - half
        np.maximum(expected_low, 0.0, out=expected_low)
        expected_high = estimate + half
        centre_money = float(result.centre)
    median = expected * np.exp(-sigma2_log / 2.0)
    spread = weight * sigma2_log  # z_next * sqrt(sigma2_log + weight * sigma2_log / n)
    spread /= n_float
    spread += sigma2_log
    np.sqrt(spread, out=spread)
    spread *= z_next
    next_high = np.exp(spread)
    next_high *= median
    next_low = np.exp(np.negative(spread, out=spread), out=spread)
    next_low *= median

    variance_name = "gamma-model" if method == "gamma-gamma" else variance
    table = pd.DataFrame({
        # A copy of the index's array (Arrow text is shared until written to): no round trip
        # through Python objects, and the table can be edited without touching the statistics.
        "customer": stats.index.array.copy(),
        "orders": n.copy(),
        "average_order_value": money_mean.copy(),
        "expected_next_order": expected,
        "own_history_weight": weight,
        "expected_low": expected_low,
        "expected_high": expected_high,
        "next_order_low": next_low,
        "next_order_high": next_high,
        "low_confidence": (weight < 0.5) | (n == 1),
        "method": _repeated_text(method, len(n)),
        "variance": _repeated_text(variance_name, len(n)),
    }, columns=FORECAST_COLUMNS, copy=False)  # the arrays are the table's own: no copy into one block

    fit.update({
        "method": method,
        "variance": variance_name,
        "customers": float(len(stats)),
        "level": level,
        "next_level": next_level,
        "sigma2": float(vfit.sigma2),
        "sigma2_scale": {"classic": "money squared", "robust": "money squared", "log": "log value",
                         "proportional": "squared coefficient of variation"}[vfit.model],
        "sigma2_log": float(sigma2_log),
        "centre": centre_money,
    })
    if on_log:
        fit["centre_log"] = float(result.centre)
    fit.update(_flat("", result.params))
    fit.update(_flat("variance_", vfit.details))
    if orders is not None:
        tail = tail_report(orders["order_value"].to_numpy(dtype=np.float64))
        fit.update({"tail_top1_revenue_share": tail.top1_revenue_share, "tail_log_skewness": tail.log_skewness,
                    "tail_index": tail.tail_index, "tail_orders": float(tail.tail_orders),
                    "tail_suggested_variance": tail.suggested_variance, "tail_summary": tail.summary})
    else:
        fit["tail_summary"] = "Order-level values were not given, so the size of big orders was not described."
    fit["notes"] = " ".join(notes)
    table.attrs["fit"] = fit
    return table


def forecasts_for_reading(table: pd.DataFrame) -> pd.DataFrame:
    """The forecast table as its files give it: money to the cent, the own-history weight to three
    decimals (:func:`forecasting.exports.rounded_for_reading`); ``attrs`` are kept.

    Examples
    --------
    >>> import pandas as pd
    >>> table = pd.DataFrame({"customer": ["fern"], "expected_next_order": [70.48625530890325],
    ...                       "own_history_weight": [0.5549598407592873]})
    >>> forecasts_for_reading(table)
      customer  expected_next_order  own_history_weight
    0     fern                70.49               0.555
    """
    return rounded_for_reading(table, money=MONEY_COLUMNS, shares=["own_history_weight"])
