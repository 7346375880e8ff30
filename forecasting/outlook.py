"""Revenue outlook and value tiers: what the shop's customers are likely to bring in next.

Input: the cleaned orders table (``customer``, ``order_date``, ``order_value``,
optionally ``segment``; see :mod:`forecasting.reading`).

Output:

* :func:`project_revenue` -- the whole revenue of the next ``horizon`` days:
  the customers the shop already has (per customer, the expected number of
  orders from the repeat-order model of :mod:`forecasting.seasons` times the
  expected value of their next order from
  :func:`forecasting.forecasts.forecast_customers`) and the new customers
  still to come (arrivals from :mod:`forecasting.arrivals`, their first
  order and their repeat orders by the same model). Each figure has two
  ranges -- one for the expected amount, one for the revenue that will
  actually come in -- and comes per group of existing customers (first-order
  month or quarter, or any customer group such as the sales channel), for new
  customers, in total, and month by month (the schedule).
* :func:`backtest_outlook` -- the outlook made on orders before a cut-off
  date, compared per group and in total with all revenue that came in after
  it, next to the run-rate guess.
* :func:`rolling_backtest` -- the same at several cut-offs spread over the
  last year, with the mean absolute error beside the run-rate guess and a
  recency/frequency-cell baseline, and a warning when that baseline does better.
* :func:`assign_tiers`, :func:`tier_summary`, :func:`export_tiers` -- customers
  ranked by expected next-order value or by projected revenue, grouped into
  value tiers by shares of customers or by money thresholds, with each tier's
  size, share of projected revenue and how much its forecasts rest on the
  customers' own history.

Every function returns new tables; no input is changed.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from statistics import NormalDist

import numpy as np
import pandas as pd
from scipy import special

from .arrivals import ArrivalFit, fit_arrivals
from .customers import customer_statistics
from .errors import OrderDataError
from .exports import rounded_for_reading
from .frequency import (
    _INVERSION_MEAN,
    FREQUENCY_MODELS,
    MODEL_NAMES,
    _ActiveOrdersGrid,
    _coins,
    _log_stop_odds_from,
    _posterior_cells,
    _sample_counts,
    _total_counts,
    expected_orders_for_draws,
)
from .options import DEFAULT_METHOD, DEFAULT_SEASONS, DEFAULT_VARIANCE
from .options import low_confidence as rests_on_shop
from .seasons import SEASONS, RepeatOrderModel, check_seasons, clock_between, fit_repeat_orders, month_edges

__all__ = [
    "COHORT_PERIODS",
    "DEFAULT_DRAWS",
    "RANK_BY",
    "SEASONS",
    "FREQUENCY_CHOICES",
    "NEW_CUSTOMERS",
    "OUTLOOK_COLUMNS",
    "COHORT_COLUMNS",
    "SCHEDULE_COLUMNS",
    "BACKTEST_COLUMNS",
    "ROLLING_COLUMNS",
    "TIER_SUMMARY_COLUMNS",
    "Outlook",
    "OutlookBacktest",
    "RollingBacktest",
    "require_projection",
    "project_revenue",
    "backtest_outlook",
    "rolling_backtest",
    "rolling_cutoffs",
    "cell_baseline",
    "assign_tiers",
    "tier_summary",
    "tier_lists",
    "tier_csv_texts",
    "export_tiers",
]

COHORT_PERIODS = ("month", "quarter")
RANK_BY = ("value", "revenue")
#: The order-frequency model: chosen from the shop's orders ("auto"), or one of FREQUENCY_MODELS.
FREQUENCY_CHOICES = ("auto",) + FREQUENCY_MODELS
#: The group label of customers who have not yet placed their first order.
NEW_CUSTOMERS = "(new customers)"

OUTLOOK_COLUMNS = [
    "customer",
    "cohort",
    "orders",
    "first_order",
    "last_order",
    "days_known",
    "chance_active",
    "expected_orders",
    "expected_next_order",
    "expected_low",
    "expected_high",
    "own_history_weight",
    "low_confidence",
    "mostly_shop_pattern",
    "projected_revenue",
    "projected_low",
    "projected_high",
    "revenue_range_low",
    "revenue_range_high",
]
COHORT_COLUMNS = [
    "cohort",
    "customers",
    "expected_orders",
    "projected_revenue",
    "projected_low",
    "projected_high",
    "revenue_range_low",
    "revenue_range_high",
    "share_of_projected_revenue",
]
SCHEDULE_COLUMNS = [
    "month",
    "days",
    "expected_orders_existing",
    "projected_revenue_existing",
    "new_customers",
    "expected_orders_new",
    "projected_revenue_new",
    "projected_revenue",
    "cumulative_revenue",
]
BACKTEST_COLUMNS = [
    "cohort",
    "customers",
    "projected_revenue",
    "projected_low",
    "projected_high",
    "revenue_range_low",
    "revenue_range_high",
    "actual_revenue",
    "error",
    "error_pct",
    "run_rate_revenue",
    "run_rate_error",
    "run_rate_error_pct",
    "actual_inside_interval",
    "actual_inside_revenue_range",
]
ROLLING_COLUMNS = [
    "cutoff",
    "window_days",
    "actual_revenue",
    "projected_revenue",
    "revenue_range_low",
    "revenue_range_high",
    "error_pct",
    "inside_revenue_range",
    "actual_revenue_existing",
    "projected_revenue_existing",
    "error_existing_pct",
    "actual_revenue_new",
    "projected_revenue_new",
    "error_new_pct",
    "run_rate_revenue",
    "run_rate_error_pct",
    "cell_revenue",
    "cell_error_pct",
    "cell_revenue_existing",
    "cell_error_existing_pct",
    "seasons",
    "frequency_model",
]
TIER_SUMMARY_COLUMNS = [
    "tier",
    "rule",
    "customers",
    "share_of_customers",
    "lowest_figure",
    "highest_figure",
    "projected_revenue",
    "share_of_projected_revenue",
    "average_own_history_weight",
    "mostly_shop_pattern",
]

# Cells (customers x draws) of the simulations handled at once: about ten such arrays live at a time,
# a megabyte each, so they stay in the processor's cache (four times as many cells cost half as much
# again per cell); and the simulated orders whose values are drawn at once.
_SIMULATION_CELLS_PER_CHUNK = 131_072
_ORDERS_PER_BLOCK = 1_000_000
_NO_GROUP = "(none)"
# A projection within this share of actual revenue counts as "within 10%" in rolling checks.
CLOSE_ENOUGH = 0.10
# Rolling checks: how many cut-offs by default (at least MIN_CUTOFFS), spread over the last year.
DEFAULT_CUTOFFS = 10
MIN_CUTOFFS = 6
_ROLLING_SPAN_DAYS = 365
# Draws of the simulations at each cut-off of a rolling check (its figures are the point projections;
# the ranges only say whether each actual amount fell inside).
_ROLLING_DRAWS = 100
#: Draws of the simulations of an outlook and its backtest by default: the number with which the tests
#: hold the ranges to their stated coverage (shops simulated with known truth, tests/test_outlook.py).
DEFAULT_DRAWS = 150
# The cell baseline "clearly beats" the model when the model's typical miss on existing customers is above
# 5% and the baseline's is at most two thirds of it (our rule, see _slowing_down_warning).
_WARN_ABOVE_PCT = 5.0
_WARN_SHARE = 2.0 / 3.0


# --------------------------------------------------------------------------- #
# Option checks (before any heavy work)
# --------------------------------------------------------------------------- #
def _check_horizon(horizon, option="horizon"):
    try:
        value = float(horizon)
    except (TypeError, ValueError):
        raise OrderDataError("the horizon must be a number of days", value=horizon, option=option,
                             fix="Give a number of days such as 90") from None
    if not math.isfinite(value) or value <= 0:
        raise OrderDataError("the horizon must be more than zero days", value=horizon, option=option,
                             fix="Give a number of days such as 90")
    return value


def _check_level(level):
    try:
        value = float(level)
    except (TypeError, ValueError):
        raise OrderDataError("the interval level must be a number between 0 and 1", value=level,
                             option="level") from None
    if not 0 < value < 1:
        raise OrderDataError("the interval level must be between 0 and 1", value=level, option="level",
                             fix="Give for example 0.9 for a 90% range")
    return value


def _check_draws(draws):
    if isinstance(draws, bool) or not isinstance(draws, (int, np.integer)) or draws < 20:
        raise OrderDataError("the number of draws must be a whole number of at least 20", value=draws,
                             option="draws")
    return int(draws)


def _check_orders(orders):
    if not isinstance(orders, pd.DataFrame):
        raise OrderDataError("the orders must be a table (pandas DataFrame)")
    missing = [c for c in ("customer", "order_date", "order_value") if c not in orders.columns]
    if missing:
        raise OrderDataError("the orders table lacks columns", value=", ".join(missing),
                             fix="Read the file with forecasting.read_orders")
    if len(orders) == 0:
        raise OrderDataError("there are no orders to work with")


def _check_stats(stats, book):
    """Statistics handed over must be those of the orders: the same customers, in the same order."""
    needed = ("orders", "first_order", "last_order")
    if not isinstance(stats, pd.DataFrame) or any(c not in stats.columns for c in needed):
        raise OrderDataError("the customer statistics lack columns", value=", ".join(needed),
                             fix="Make them with forecasting.customers.customer_statistics(orders)")
    if len(stats) != len(book.names) or not stats.index.equals(book.names):
        raise OrderDataError("the customer statistics are not those of these orders (other customers)",
                             fix="Make them with forecasting.customers.customer_statistics from the same orders")
    return stats


def _check_by(by, orders):
    if by in COHORT_PERIODS:
        return by
    not_groups = ("customer", "order_date", "order_value", "order_id", "row")
    if isinstance(by, str) and by in orders.columns and by not in not_groups:
        return by
    available = [c for c in orders.columns if c not in not_groups]
    raise OrderDataError(
        "customers can be grouped by first-order month or quarter, or by a column of the orders",
        value=by, option="by",
        fix="Group by month or quarter" + (f", or by one of: {', '.join(available)}" if available
                                           else ", or read the file with a segment column"),
    )


def _check_run_options(level, draws, seasons, frequency_model):
    """The options every outlook run takes, checked: ``(level, draws, seasons, frequency_model)``."""
    return _check_level(level), _check_draws(draws), check_seasons(seasons), _check_frequency_model(frequency_model)


def _check_frequency_model(model):
    if model not in FREQUENCY_CHOICES:
        raise OrderDataError("the order-frequency model can be auto, bg-nbd or mbg-nbd", value=model,
                             option="frequency_model", fix="Choose auto, bg-nbd or mbg-nbd")
    return model


def _parse_date(value, option):
    try:
        stamp = pd.Timestamp(value)
    except (TypeError, ValueError):
        stamp = pd.NaT
    if pd.isna(stamp):
        what = {"cutoff": "the cut-off", "as_of": "the 'as of' date"}.get(option, option)
        raise OrderDataError(f"{what} is not a date", value=value, option=option,
                             fix="Give a date such as 2026-05-01")
    return stamp


# --------------------------------------------------------------------------- #
# The orders, sorted once
# --------------------------------------------------------------------------- #
class _OrderBook:
    """The orders sorted once by date, each with its customer's number: the work every cut-off shares.

    The orders before any moment are then the first ``count`` rows; each
    customer's earliest order (the first in date order, ties in the file's
    order) is marked once, so per-customer figures at any cut-off are sums
    over a prefix (``numpy.bincount``), never a new sort or group-by of text.
    Customers are numbered in the sorted order of their ids, the order of
    :func:`forecasting.customers.customer_statistics`.
    """

    def __init__(self, orders: pd.DataFrame):
        dates = pd.to_datetime(orders["order_date"]).to_numpy(dtype="datetime64[ns]")
        order = np.argsort(dates, kind="stable")
        self.table = orders.iloc[order]
        self.dates = dates[order]
        codes, names = pd.factorize(self.table["customer"], sort=True)
        self.codes = codes.astype(np.int64)
        self.names = pd.Index(names)
        self.values = self.table["order_value"].to_numpy(dtype=np.float64)
        size = len(self.codes)
        first_at = np.full(len(self.names), size, dtype=np.int64)
        np.minimum.at(first_at, self.codes, np.arange(size))
        self.first_at = first_at
        self.is_first = np.zeros(size, dtype=bool)
        self.is_first[first_at] = True
        self.month = (self.dates.astype("datetime64[M]").astype(np.int64) % 12).astype(np.int64)

    def __len__(self):
        return len(self.codes)

    def before(self, moment) -> int:
        """How many orders fall before ``moment``."""
        return int(np.searchsorted(self.dates, pd.Timestamp(moment).to_datetime64(), side="left"))

    def orders(self, count: int) -> pd.DataFrame:
        """The first ``count`` orders (date order), as the table they came in."""
        return self.table.iloc[:count]

    def present(self, count: int) -> np.ndarray:
        """Numbers of the customers with an order among the first ``count`` (ascending)."""
        return np.flatnonzero(self.first_at < count)

    def statistics(self, count: int) -> pd.DataFrame:
        """:func:`forecasting.customers.customer_statistics` of the first ``count`` orders.

        The customer ids go in as categories whose codes are already known, so no text is
        sorted or hashed again at each cut-off.
        """
        columns = {"customer": pd.Categorical.from_codes(self.codes[:count], categories=self.names),
                   "order_value": self.values[:count],
                   "order_date": self.dates[:count]}
        if "segment" in self.table.columns:
            columns["segment"] = self.table["segment"].to_numpy()[:count]
        return customer_statistics(pd.DataFrame(columns))

    def repeat_by_month(self, count: int) -> np.ndarray:
        """Repeat orders (all but each customer's earliest) among the first ``count``, by month of the year."""
        repeat = ~self.is_first[:count]
        return np.bincount(self.month[:count][repeat], minlength=12).astype(np.float64)

    def latest(self, column: str, count: int) -> np.ndarray:
        """Each present customer's latest non-missing value of ``column`` among the first ``count`` orders."""
        values = self.table[column].to_numpy(dtype=object)[:count]
        known = ~pd.isna(values)
        last = np.full(len(self.names), -1, dtype=np.int64)
        np.maximum.at(last, self.codes[:count][known], np.flatnonzero(known))
        picked = last[self.present(count)]
        out = np.full(len(picked), None, dtype=object)
        out[picked >= 0] = values[picked[picked >= 0]]
        return out

    def new_customer_values(self, count: int) -> dict:
        """What a new customer's orders are worth, from the customers among the first ``count`` orders.

        ``first_mean`` is the average first order; ``repeat_mean`` is all repeat
        orders' value over their number (a ratio estimate: the value per repeat
        order across customers, weighted as a new customer's repeat orders will
        be); each with a standard error (the ratio's from the customers' totals,
        delta method, customers counted as independent units). The samples are
        kept for the simulation of what may actually come in.
        """
        values = self.values[:count]
        first_flag = self.is_first[:count]
        first = values[first_flag]
        later = values[~first_flag]
        first_mean = float(first.mean())
        first_se = float(first.std(ddof=1) / math.sqrt(len(first))) if len(first) > 1 else 0.0
        if len(later):
            owners = self.codes[:count][~first_flag]
            totals = np.bincount(owners, weights=later, minlength=len(self.names))
            counts = np.bincount(owners, minlength=len(self.names)).astype(np.float64)
            repeat_mean = float(later.sum() / len(later))
            repeat_se = float(np.sqrt(np.sum((totals - repeat_mean * counts) ** 2)) / counts.sum())
        else:
            later = first
            repeat_mean, repeat_se = first_mean, first_se
        return {"first_mean": first_mean, "first_se": first_se, "repeat_mean": repeat_mean,
                "repeat_se": repeat_se, "first_values": first, "repeat_values": later}


# --------------------------------------------------------------------------- #
# Grouping customers
# --------------------------------------------------------------------------- #
def _cohort_labels(first_order, period: str) -> np.ndarray:
    stamps = pd.DatetimeIndex(pd.to_datetime(first_order))
    years = stamps.year.to_numpy().astype(np.int64)
    if period == "month":
        keys = years * 12 + stamps.month.to_numpy() - 1
        unique, where = np.unique(keys, return_inverse=True)
        names = np.array([f"{k // 12:04d}-{k % 12 + 1:02d}" for k in unique], dtype=object)
    else:
        keys = years * 4 + stamps.quarter.to_numpy() - 1
        unique, where = np.unique(keys, return_inverse=True)
        names = np.array([f"{k // 4:04d}-Q{k % 4 + 1}" for k in unique], dtype=object)
    return names[where.reshape(-1)]


def _group_labels(stats: pd.DataFrame, book: _OrderBook, count: int, by: str) -> np.ndarray:
    """One label per customer of ``stats``: their cohort or their latest value of column ``by``."""
    if by in COHORT_PERIODS:
        return _cohort_labels(stats["first_order"], by)
    latest = book.latest(by, count)
    codes, uniques = pd.factorize(pd.Series(latest, dtype=object))
    words = np.array([str(value) for value in uniques] + [_NO_GROUP], dtype=object)
    return words[np.where(codes >= 0, codes, len(uniques))]


# --------------------------------------------------------------------------- #
# Projection core
# --------------------------------------------------------------------------- #
def _forecasts_for(stats, orders, *, method, variance, forecasts):
    """The per-customer expected next-order values, aligned with ``stats``."""
    if forecasts is None:
        from .forecasts import forecast_customers  # the estimators' public door

        try:
            forecasts = forecast_customers(stats, method=method, variance=variance, orders=orders)
        except OrderDataError:
            if variance != "auto":
                raise
            # A forecasting library whose spread models do not include "auto" chooses the spread
            # itself when left to its default (with the automatic method, as the dashboard asks).
            forecasts = forecast_customers(stats, method=method, orders=orders)
    needed = ["customer", "expected_next_order", "expected_low", "expected_high", "own_history_weight"]
    missing = [c for c in needed if c not in forecasts.columns]
    if missing:
        raise OrderDataError("the forecast table lacks columns", value=", ".join(missing),
                             fix="Make it with forecasting.forecasts.forecast_customers")
    aligned = forecasts.set_index("customer").reindex(stats.index)
    if aligned["expected_next_order"].isna().any():
        lacking = aligned.index[aligned["expected_next_order"].isna()][0]
        raise OrderDataError("a customer has no expected next-order value", value=lacking,
                             fix="Make the forecasts from the same orders")
    fit = dict(forecasts.attrs.get("fit", {}))
    return aligned, fit


def _tails(level):
    return (1 - level) / 2, 1 - (1 - level) / 2


def _normal_quantile(p: float) -> float:
    return NormalDist().inv_cdf(p)


def _value_draws(mean, sd, draws, rng, *, by_customer=False):
    """Draws of positive values with the given means and standard deviations.

    Gamma with shape (mean/sd)^2 and scale sd^2/mean; exactly ``mean`` where sd = 0.
    Shape (draws x customers), or (customers x draws) with ``by_customer``.
    """
    spread = sd > 0
    shape = np.where(spread, (mean / np.where(spread, sd, 1.0)) ** 2, 1.0)
    scale = np.where(spread, sd * sd / mean, 0.0)
    if by_customer:
        values = rng.standard_gamma(np.broadcast_to(shape[:, None], (len(mean), draws))) * scale[:, None]
        return np.where(spread[:, None], values, mean[:, None])
    values = rng.standard_gamma(np.broadcast_to(shape, (draws, len(mean)))) * scale[None, :]
    return np.where(spread[None, :], values, mean[None, :])


def _value_spread(forecasts, level):
    """Standard deviation of each expected next-order value, read off its interval.

    The interval is estimate +- z sd (classic) or multiplicative (log model);
    either way (high - low) / 2z is the spread. Intervals cut at zero lose their
    lower half, so there the upper half-width / z is used.
    """
    z = _normal_quantile(0.5 + level / 2)
    low = forecasts["expected_low"].to_numpy(dtype=np.float64)
    high = forecasts["expected_high"].to_numpy(dtype=np.float64)
    mean = forecasts["expected_next_order"].to_numpy(dtype=np.float64)
    sd = np.where(low > 0, (high - low) / (2 * z), (high - mean) / z)
    return np.where(np.isfinite(sd) & (sd > 0), sd, 0.0)


def _order_value_model(aligned, forecast_fit, stats):
    """Lognormal of one order's value per customer: log-centre, level spread, per-order spread.

    The value of an order of customer t in draw d is
    ``exp(centre_t + level_sd_t * u_dt + order_sd_t * e)``, u and e standard
    normal, u shared by all of the customer's orders in the draw (what we do
    not know about their own level), e new for each order (how one order
    differs from the next). See project_revenue, Notes.
    """
    expected = aligned["expected_next_order"].to_numpy(dtype=np.float64)
    sigma2 = forecast_fit.get("sigma2_log")
    sigma2 = float(sigma2) if sigma2 is not None and math.isfinite(float(sigma2)) and sigma2 >= 0 else None
    has_range = {"next_order_low", "next_order_high"} <= set(aligned.columns)
    if has_range:
        low = aligned["next_order_low"].to_numpy(dtype=np.float64)
        high = aligned["next_order_high"].to_numpy(dtype=np.float64)
        has_range = bool(np.all(np.isfinite(low) & np.isfinite(high) & (low > 0) & (high >= low)))
    if has_range:
        z_next = _normal_quantile(0.5 + float(forecast_fit.get("next_level", 0.80)) / 2)
        total_var = (np.log(high / low) / (2 * z_next)) ** 2
        order_var = total_var if sigma2 is None else np.minimum(sigma2, total_var)
    else:
        # No next-order range: every order spreads with the shop's pooled log spread.
        if sigma2 is None:
            repeat = stats["orders"].to_numpy(dtype=np.float64) - 1
            sigma2 = float(stats["log_sum_sq_dev"].sum() / repeat.sum()) if repeat.sum() > 0 else 0.0
        total_var = order_var = np.full(len(expected), sigma2)
    level_var = np.maximum(total_var - order_var, 0.0)
    centre = np.log(expected) - total_var / 2
    return centre, np.sqrt(level_var), np.sqrt(order_var)


def _spend_draws(counts, order_sd, rng):
    """Sum over each cell's simulated orders of exp(order_sd * e), e standard normal.

    ``counts`` is a matrix of order counts and ``order_sd`` broadcasts against
    it (one per column, as (draws x customers), or one per row as
    ``sd[:, None]``). The cells are walked in order, one normal draw per order;
    the orders are drawn in blocks of at most ``_ORDERS_PER_BLOCK`` so memory
    stays bounded for long horizons.
    """
    shape = counts.shape
    flat = counts.reshape(-1)
    sums = np.zeros(flat.size)
    cells = np.flatnonzero(flat)
    if cells.size == 0:
        return sums.reshape(shape)
    spread = np.asarray(order_sd, dtype=np.float64)
    same = spread.size > 0 and bool(np.all(spread == spread.reshape(-1)[0]))
    if same:
        spreads = None
    elif spread.ndim == 2 and spread.shape[1] == 1 and len(shape) == 2:
        spreads = spread[cells // shape[1], 0]  # one per row, without building the broadcast array
    else:
        spreads = np.broadcast_to(spread, shape).reshape(-1)[cells]
    placed = flat[cells]
    running = np.cumsum(placed)
    start = 0
    while start < cells.size:
        done = running[start - 1] if start else 0
        stop = max(start + 1, int(np.searchsorted(running, done + _ORDERS_PER_BLOCK, side="right")))
        stop = min(stop, cells.size)
        owners = np.repeat(np.arange(start, stop), placed[start:stop])
        draws = rng.standard_normal(owners.size)
        draws *= spread.reshape(-1)[0] if same else spreads[owners]
        np.exp(draws, out=draws)
        sums[cells[start:stop]] = np.bincount(owners - start, weights=draws, minlength=stop - start)
        start = stop
    return sums.reshape(shape)


def _row_quantiles(matrix, low_q, high_q):
    """Each row's ``low_q`` and ``high_q`` quantiles, as numpy.quantile's default (linear) method gives them.

    One partial sort (numpy.partition) at the four order statistics needed, instead of two.
    """
    width = matrix.shape[1]
    spots = []
    for q in (low_q, high_q):
        virtual = q * (width - 1)
        below = int(math.floor(virtual))
        spots.append((below, min(below + 1, width - 1), virtual - below))
    kth = sorted({k for spot in spots for k in spot[:2]})
    ordered = np.partition(matrix, kth, axis=1)
    out = []
    for below, above, fraction in spots:
        lower, upper = ordered[:, below], ordered[:, above]
        gap = upper - lower
        # numpy's lerp: from the nearer end, so that a fraction of 0 or 1 gives the end exactly.
        out.append(lower + gap * fraction if fraction < 0.5 else upper - gap * (1 - fraction))
    return out


def _add_by_group(sums, matrix, groups):
    """Add the rows of ``matrix`` into ``sums[group]``; ``groups`` is ascending (rows sorted by group)."""
    starts = np.flatnonzero(np.r_[True, groups[1:] != groups[:-1]])
    sums[groups[starts]] += np.add.reduceat(matrix, starts, axis=0)


def _simulate_existing(params_draws, clock_draws, x, t_x, age, value, value_sd, centre, level_sd, order_sd, codes,
                       n_groups, level, rng_expected, rng_actual, model, *, customer_ranges=True,
                       expected_ranges=True):
    """Both ranges for the customers the shop has: per customer (optional) and each group's draws.

    Draw d takes one parameter set of the order-frequency model and its
    horizon on the model's clock (shared by every customer, so group totals
    carry their correlation). The expected amount of customer t is
    E[orders | history, params_d] x value_dt, value_dt ~ Gamma with the
    forecast's expected value as mean and its spread as standard deviation.
    What may actually come in: orders in the horizon drawn from the
    customer's posterior (:func:`forecasting.frequency._sample_counts`), each
    order's value from the customer's lognormal (:func:`_order_value_model`).

    Customers are taken a block at a time (rows: customers sorted by group,
    columns: draws), so memory stays bounded for any shop; the expected
    orders come from :class:`forecasting.frequency._ActiveOrdersGrid`.

    Returns
    -------
    (low, high, expected_sums, range_low, range_high, actual_sums)
        Per-customer ends (NaN without ``customer_ranges``) and the
        (draws x groups) sums of both simulations (the expected amount's NaN
        without ``expected_ranges``).
    """
    draws = len(params_draws)
    n = len(x)
    grid = _ActiveOrdersGrid(params_draws, x, age, clock_draws, model) if expected_ranges else None
    r, alpha, a, b = (params_draws[:, j][None, :] for j in range(4))
    ahead = np.asarray(clock_draws, dtype=np.float64)[None, :]
    low_q, high_q = _tails(level)
    ends = {name: np.full(n, np.nan) for name in ("low", "high", "range_low", "range_high")}
    expected_sums = np.zeros((n_groups, draws)) if expected_ranges else np.full((n_groups, draws), np.nan)
    actual_sums = np.zeros((n_groups, draws))
    r_most, alpha_least, ahead_most = float(r.max()), float(alpha.min()), float(ahead.max())
    order = np.argsort(codes, kind="stable")
    chunk = max(1, _SIMULATION_CELLS_PER_CHUNK // draws)
    for start in range(0, n, chunk):
        rows = order[start:start + chunk]
        groups = codes[rows]
        xs = x[rows][:, None]
        ages = age[rows][:, None]
        log_age = np.log(alpha + ages)
        alive = special.expit(-_log_stop_odds_from(log_age, np.log(alpha + t_x[rows][:, None]), r, a, b, xs, model))
        if expected_ranges:
            expected = alive * grid.values(rows)
            expected *= _value_draws(value[rows], value_sd[rows], draws, rng_expected, by_customer=True)
            _add_by_group(expected_sums, expected, groups)
        # Customers who may expect many orders while active, (r + x) h / (alpha + T), in some draw.
        suspect = (r_most + x[rows]) * ahead_most / (alpha_least + age[rows]) > _INVERSION_MEAN
        heavy = False
        if suspect.any():
            heavy = np.zeros((len(rows), draws), dtype=bool)
            heavy[suspect] = (r + xs[suspect]) * ahead / (alpha + ages[suspect]) > _INVERSION_MEAN
        counts = _sample_counts(rng_actual, alive, r + xs, log_age - np.log(alpha + ages + ahead), a,
                                b + _coins(xs, model), heavy=heavy)
        actual = _spend_draws(counts, order_sd[rows][:, None], rng_actual)
        ordered = np.flatnonzero(counts)
        owner = ordered // draws
        actual.reshape(-1)[ordered] *= np.exp(centre[rows][owner]
                                              + level_sd[rows][owner] * rng_actual.standard_normal(ordered.size))
        _add_by_group(actual_sums, actual, groups)
        if customer_ranges and expected_ranges:
            ends["low"][rows], ends["high"][rows] = _row_quantiles(expected, low_q, high_q)
        if customer_ranges:
            ends["range_low"][rows], ends["range_high"][rows] = _row_quantiles(actual, low_q, high_q)
    return ends["low"], ends["high"], expected_sums.T, ends["range_low"], ends["range_high"], actual_sums.T


def _sums_of_picks(values, picks, rng):
    """For each draw, the sum of ``picks[d]`` values picked at random (with replacement) from ``values``."""
    total = int(picks.sum())
    sums = np.zeros(len(picks))
    if total == 0:
        return sums
    chosen = values[rng.integers(0, len(values), total)]
    starts = np.concatenate([[0], np.cumsum(picks)[:-1]])
    some = picks > 0
    sums[some] = np.add.reduceat(chosen, starts[some])
    return sums


def _positive_normal(mean, sd, size, rng):
    """Normal draws kept above a hundredth of the mean (an average order value cannot be negative)."""
    return np.maximum(rng.normal(mean, sd, size), 0.01 * mean)


def _project_new(arrivals: ArrivalFit, repeat_model: RepeatOrderModel, values: dict, *, as_of, horizon,
                 params_draws, index_draws, rng_expected, rng_actual):
    """New customers of the next ``horizon`` days: point figures, draws, and figures per day piece.

    Each piece of the window (cut at midnights) expects ``e_d`` arrivals; each
    places a first order worth ``first_mean`` and then, on the repeat-order
    model's clock, ``E[X(C(end) - C(s_d))]`` repeat orders worth
    ``repeat_mean`` each before the window closes (s_d the piece's midpoint).
    """
    end = as_of + pd.Timedelta(days=horizon)
    middles, lengths, expected = arrivals.expected(as_of, end)
    fit = repeat_model.fit
    ends = np.repeat(end.to_datetime64().astype("datetime64[ns]"), len(middles))
    remaining = clock_between(middles, ends, repeat_model.index) if len(middles) else np.array([])
    repeats = fit.new_customer_orders(remaining)
    first_mean, repeat_mean = values["first_mean"], values["repeat_mean"]
    revenue = float(np.sum(expected * (first_mean + repeat_mean * repeats)))

    draws = params_draws.shape[0]
    pieces = len(middles)
    zeros = np.zeros(pieces)
    # Each draw's own clock (month index drawn with the parameters).
    remaining_drawn = (clock_between(middles, ends, index_draws) if pieces else np.zeros((draws, 0)))
    arrivals_drawn = arrivals.expected_draws(as_of, end, draws, rng_expected)
    repeats_drawn = expected_orders_for_draws(params_draws, zeros, zeros, zeros, remaining_drawn, model=fit.model)
    first_drawn = _positive_normal(first_mean, values["first_se"], draws, rng_expected)
    repeat_drawn = _positive_normal(repeat_mean, values["repeat_se"], draws, rng_expected)
    expected_draws = np.sum(arrivals_drawn * (first_drawn[:, None] + repeat_drawn[:, None] * repeats_drawn), axis=1)

    # What may actually come in: how many arrive, what each first order is worth (drawn from the shop's
    # first orders), how many repeat orders each places (the model's story from its first order to the
    # window's end, on its draw's clock) and what those are worth (drawn from the shop's repeat orders).
    counts = arrivals.simulate_counts(arrivals_drawn, rng_actual)
    arrived = counts.sum(axis=1)
    story = _posterior_cells(tuple(params_draws[:, [j]] for j in range(4)), 0.0, 0.0, 0.0, remaining_drawn,
                             fit.model)
    repeat_orders = _total_counts(rng_actual, counts, *story).sum(axis=1) if pieces else np.zeros(draws, np.int64)
    spend = (_sums_of_picks(values["first_values"], arrived, rng_actual)
             + _sums_of_picks(values["repeat_values"], repeat_orders, rng_actual))
    return {
        "revenue": revenue,
        "customers": float(expected.sum()),
        "orders": float(np.sum(expected * (1.0 + repeats))),
        "expected_draws": expected_draws,
        "actual_draws": spend,
        "middles": middles,
        "expected": expected,
    }


def _schedule(repeat_model: RepeatOrderModel, history, value, new, values, *, as_of, horizon,
              orders_to_end=None) -> pd.DataFrame:
    """Projected revenue month by month over the horizon (point figures), existing and new customers.

    Rows are calendar months; the first and last are the parts of their months inside the horizon
    (a part shorter than a day joins the next or previous row).

    A customer's expected orders up to each month edge e are E[Y(C(e) - C(as_of))]
    on the model's clock; a month's orders are the differences. New customers
    arriving on piece d place their first order then and their repeat orders
    up to edge e number E[X(C(e) - C(s_d))]. ``orders_to_end``: each customer's
    expected orders over the whole horizon, when already worked out.
    """
    end = as_of + pd.Timedelta(days=horizon)
    edges = month_edges(as_of, end)
    # A stub of less than a day at either end (an "as of" late on the month's last day) joins its neighbour.
    if len(edges) > 2 and edges[1] - edges[0] < pd.Timedelta(days=1):
        edges = edges.delete(1)
    if len(edges) > 2 and edges[-1] - edges[-2] < pd.Timedelta(days=1):
        edges = edges.delete(len(edges) - 2)
    fit = repeat_model.fit
    edge_times = edges.to_numpy(dtype="datetime64[ns]")
    starts = np.repeat(as_of.to_datetime64().astype("datetime64[ns]"), len(edges))
    clock_edges = clock_between(starts, edge_times, repeat_model.index)
    cumulative_orders = np.zeros(len(edges))
    cumulative_revenue = np.zeros(len(edges))
    for k, length in enumerate(clock_edges):
        if length <= 0:
            continue
        ahead = (orders_to_end if orders_to_end is not None and k == len(edges) - 1
                 else fit.expected_orders(history, length))
        cumulative_orders[k] = float(np.sum(ahead))
        cumulative_revenue[k] = float(np.sum(value * ahead))
    months = len(edges) - 1
    table = pd.DataFrame({
        # Each row is named by the calendar month holding its middle.
        "month": [f"{left + (right - left) / 2:%Y-%m}" for left, right in zip(edges[:-1], edges[1:])],
        "days": np.diff(edge_times).astype(np.float64) / 86400e9,
        "expected_orders_existing": np.diff(cumulative_orders),
        "projected_revenue_existing": np.diff(cumulative_revenue),
        "new_customers": np.zeros(months),
        "expected_orders_new": np.zeros(months),
        "projected_revenue_new": np.zeros(months),
    })
    if new is not None and len(new["middles"]):
        middles, expected = new["middles"], new["expected"]
        arrival_month = np.clip(np.searchsorted(edge_times, middles, side="right") - 1, 0, months - 1)
        table["new_customers"] = np.bincount(arrival_month, weights=expected, minlength=months)
        # Repeat orders of each piece's arrivals up to each later edge.
        after = clock_between(np.repeat(middles, len(edges)), np.tile(edge_times, len(middles)),
                              repeat_model.index).reshape(len(middles), len(edges))
        cumulative = fit.new_customer_orders(np.maximum(after, 0.0))
        repeat_by_month = np.diff(cumulative, axis=1).clip(min=0.0).T @ expected
        first_by_month = table["new_customers"].to_numpy()
        table["expected_orders_new"] = first_by_month + repeat_by_month
        table["projected_revenue_new"] = first_by_month * values["first_mean"] + repeat_by_month * values["repeat_mean"]
    table["projected_revenue"] = table["projected_revenue_existing"] + table["projected_revenue_new"]
    table["cumulative_revenue"] = table["projected_revenue"].cumsum()
    return table[SCHEDULE_COLUMNS]


def _part(total, draws_expected, draws_actual, level):
    """A figure with its two ranges: (low, high) of the expected amount and of what may come in."""
    low_q, high_q = _tails(level)
    low, high = np.quantile(draws_expected, [low_q, high_q])
    range_low, range_high = np.quantile(draws_actual, [low_q, high_q])
    return min(float(low), total), max(float(high), total), float(range_low), float(range_high)


def _project(book: _OrderBook, count: int, stats, *, horizon, by, as_of, method, variance, forecasts, level, draws,
             seed, seasons, frequency_model, new_customers, start=None, detail="customers"):
    """Shared work of project_revenue, backtest_outlook and rolling_backtest: the outlook from the first
    ``count`` orders of ``book``. ``start``: an earlier repeat-order model to start the fits from.
    ``detail``: what else is worked out -- "customers": everything (each customer's two ranges and the
    month-by-month schedule too); "groups": both ranges of each group and the totals (a backtest);
    "actual": only the range of what may come in of each group and the totals (a rolling check)."""
    orders = book.orders(count)
    repeat_model = fit_repeat_orders(orders, as_of=as_of, model=frequency_model, seasons=seasons, stats=stats,
                                     repeat_by_month=book.repeat_by_month(count), start=start)
    fit = repeat_model.fit
    history = repeat_model.history
    clock = repeat_model.horizon(horizon)
    aligned, forecast_fit = _forecasts_for(stats, orders, method=method, variance=variance, forecasts=forecasts)
    x = history["repeat_orders"].to_numpy(dtype=np.float64)
    t_x = history["days_to_last_order"].to_numpy(dtype=np.float64)
    age = history["days_known"].to_numpy(dtype=np.float64)
    n = len(history)
    if fit.usable:
        expected_orders = fit.expected_orders(history, clock)
        chance = fit.chance_active(history)
    else:
        # No projection from a fit that cannot support one (see fit.notes).
        expected_orders = np.full(n, np.nan)
        chance = np.full(n, np.nan)
    value = aligned["expected_next_order"].to_numpy(dtype=np.float64)
    value_sd = _value_spread(aligned, float(forecast_fit.get("level", 0.90)))

    labels = _group_labels(stats, book, count, by)
    codes, group_names = pd.factorize(labels, sort=True)
    group_names = list(np.asarray(group_names, dtype=object))
    n_groups = len(group_names)
    projected = expected_orders * value
    group_revenue = np.bincount(codes, weights=projected, minlength=n_groups)
    group_orders = np.bincount(codes, weights=expected_orders, minlength=n_groups)
    group_customers = np.bincount(codes, minlength=n_groups).astype(np.float64)
    arrivals = new = values = None
    if fit.usable:
        rng = np.random.default_rng(seed)
        params_draws, index_draws = repeat_model.draw(draws, seed=rng)
        # The horizon on each draw's clock: the month index's uncertainty enters both ranges.
        clock_draws = (clock_between([as_of], [as_of + pd.Timedelta(days=horizon)], index_draws)[:, 0]
                       if repeat_model.seasons == "month" else np.full(draws, clock))
        # Their own streams, so that one range does not move when another changes.
        streams = np.random.SeedSequence(entropy=seed, spawn_key=(1,)).spawn(3)
        centre, level_sd, order_sd = _order_value_model(aligned, forecast_fit, stats)
        cust_low, cust_high, expected_sums, cust_range_low, cust_range_high, actual_sums = _simulate_existing(
            params_draws, clock_draws, x, t_x, age, value, value_sd, centre, level_sd, order_sd, codes, n_groups,
            level, rng, np.random.default_rng(streams[0]), fit.model, customer_ranges=detail == "customers",
            expected_ranges=detail != "actual")
        if new_customers:
            arrivals = fit_arrivals(stats["first_order"], as_of=as_of)
            values = book.new_customer_values(count)
            new = _project_new(arrivals, repeat_model, values, as_of=as_of, horizon=horizon,
                               params_draws=params_draws, index_draws=index_draws,
                               rng_expected=np.random.default_rng(streams[1]),
                               rng_actual=np.random.default_rng(streams[2]))
            expected_sums = np.column_stack([expected_sums, new["expected_draws"]])
            actual_sums = np.column_stack([actual_sums, new["actual_draws"]])
            group_names.append(NEW_CUSTOMERS)
            group_revenue = np.append(group_revenue, new["revenue"])
            group_orders = np.append(group_orders, new["orders"])
            group_customers = np.append(group_customers, new["customers"])
        low_q, high_q = _tails(level)
        group_low, group_high = np.quantile(expected_sums, [low_q, high_q], axis=0)
        group_range_low, group_range_high = np.quantile(actual_sums, [low_q, high_q], axis=0)
        existing_columns = slice(0, n_groups)
        parts = {
            "existing": _part(float(projected.sum()), expected_sums[:, existing_columns].sum(axis=1),
                              actual_sums[:, existing_columns].sum(axis=1), level),
            "whole": _part(float(group_revenue.sum()), expected_sums.sum(axis=1), actual_sums.sum(axis=1), level),
        }
        if new is not None:
            parts["new"] = _part(new["revenue"], new["expected_draws"], new["actual_draws"], level)
    else:
        cust_low = cust_high = cust_range_low = cust_range_high = np.full(n, np.nan)
        group_low = group_high = group_range_low = group_range_high = np.full(n_groups, np.nan)
        nan4 = (float("nan"),) * 4
        parts = {"existing": nan4, "whole": nan4}
        if new_customers:
            parts["new"] = nan4

    weight = aligned["own_history_weight"].to_numpy(dtype=np.float64)
    low_confidence = rests_on_shop(weight)
    customers = pd.DataFrame(
        {
            "customer": stats.index.to_numpy(dtype=object),
            "cohort": labels,
            "orders": stats["orders"].to_numpy(dtype=np.int64),
            "first_order": stats["first_order"].to_numpy(),
            "last_order": stats["last_order"].to_numpy(),
            "days_known": repeat_model.calendar_history["days_known"].to_numpy(dtype=np.float64),
            "chance_active": chance,
            "expected_orders": expected_orders,
            "expected_next_order": value,
            "expected_low": aligned["expected_low"].to_numpy(dtype=np.float64),
            "expected_high": aligned["expected_high"].to_numpy(dtype=np.float64),
            "own_history_weight": weight,
            "low_confidence": low_confidence,
            "mostly_shop_pattern": low_confidence,
            "projected_revenue": projected,
            # The plug-in projection always lies inside its interval, even when
            # the value draws are cut at zero.
            "projected_low": np.minimum(cust_low, projected),
            "projected_high": np.maximum(cust_high, projected),
            "revenue_range_low": cust_range_low,
            "revenue_range_high": cust_range_high,
        }
    )
    existing_total = float(projected.sum())
    # Whole revenue is its two parts added (not the groups re-added in another order), so that
    # without new customers it is the existing customers' figure to the last digit.
    total = existing_total + (float(new["revenue"]) if new_customers and new is not None else 0.0)
    cohorts = pd.DataFrame(
        {
            "cohort": np.asarray(group_names, dtype=object),
            "customers": group_customers,
            "expected_orders": group_orders,
            "projected_revenue": group_revenue,
            "projected_low": np.minimum(group_low, group_revenue),
            "projected_high": np.maximum(group_high, group_revenue),
            "revenue_range_low": group_range_low,
            "revenue_range_high": group_range_high,
            "share_of_projected_revenue": (group_revenue / total if total > 0 else
                                           np.full(len(group_names), 0.0 if total == 0 else np.nan)),
        }
    )
    totals = {"customers": int(len(stats)),
              "expected_orders": float(group_orders.sum()),
              "projected_revenue": total}
    totals.update(zip(("projected_low", "projected_high", "revenue_range_low", "revenue_range_high"),
                      parts["whole"]))
    totals["projected_revenue_existing"] = existing_total
    totals.update(zip(("projected_existing_low", "projected_existing_high", "revenue_range_existing_low",
                       "revenue_range_existing_high"), parts["existing"]))
    totals["expected_orders_existing"] = float(expected_orders.sum())
    if new_customers:
        totals["projected_revenue_new"] = new["revenue"] if new is not None else float("nan")
        totals.update(zip(("projected_new_low", "projected_new_high", "revenue_range_new_low",
                           "revenue_range_new_high"), parts["new"]))
        totals["new_customers_expected"] = new["customers"] if new is not None else float("nan")
        totals["expected_orders_new"] = new["orders"] if new is not None else float("nan")
    schedule = (_schedule(repeat_model, history, value, new, values, as_of=as_of, horizon=horizon,
                          orders_to_end=expected_orders) if fit.usable and detail == "customers" else None)
    return {"customers": customers, "cohorts": cohorts, "total": totals, "repeat_model": repeat_model,
            "forecast_fit": forecast_fit, "clock": clock, "arrivals": arrivals, "new_values": values,
            "schedule": schedule}


# --------------------------------------------------------------------------- #
# Public: projection
# --------------------------------------------------------------------------- #
@dataclass(frozen=True)
class Outlook:
    """Projected revenue over a horizon: in total, per group, per customer and month by month.

    Attributes
    ----------
    customers : pandas.DataFrame
        One row per existing customer, columns ``OUTLOOK_COLUMNS``.
    cohorts : pandas.DataFrame
        One row per group of existing customers, then (when new customers are
        projected) one row ``NEW_CUSTOMERS``; columns ``COHORT_COLUMNS``. For
        the new-customers row ``customers`` is the expected number of them.
    total : dict
        ``projected_revenue`` is the whole revenue (existing and new
        customers), with ``projected_low`` / ``projected_high`` (interval of
        the expected amount) and ``revenue_range_low`` / ``revenue_range_high``
        (range for the revenue that will actually come in).
        ``projected_revenue_existing`` and ``projected_revenue_new`` are its two
        parts, each with the same four ends (``projected_existing_low``,
        ``projected_existing_high``, ``revenue_range_existing_low``,
        ``revenue_range_existing_high``, and ``..._new_...``); also
        ``customers`` (existing), ``expected_orders`` (all),
        ``expected_orders_existing``, ``expected_orders_new`` and
        ``new_customers_expected``. Without new customers the ``_new`` keys
        are absent and the whole is the existing part.
    repeat_model : RepeatOrderModel
        The repeat-order model (BG/NBD or MBG/NBD, with or without a month
        index), :mod:`forecasting.seasons`.
    arrivals : ArrivalFit or None
        The model of new customers' arrivals.
    schedule : pandas.DataFrame or None
        Month by month (``SCHEDULE_COLUMNS``), point figures.
    forecast_fit : dict
        ``attrs["fit"]`` of the next-order forecasts used.
    new_customer_values : dict or None
        ``first_mean``, ``first_se``, ``repeat_mean``, ``repeat_se``: what a
        new customer's first and repeat orders are worth on average.
    horizon_days, as_of, by, level, draws, seed
        The options the outlook was made with.
    seasons : str
        The seasonal adjustment used: ``"month"`` or ``"none"``.
    seasonal_days : float
        The horizon on the repeat-order clock (equal to ``horizon_days``
        without an index): the expected orders are those of this many average days.
    """

    customers: pd.DataFrame
    cohorts: pd.DataFrame
    total: dict
    repeat_model: RepeatOrderModel = field(repr=False)
    arrivals: ArrivalFit | None = field(repr=False)
    schedule: pd.DataFrame | None = field(repr=False)
    forecast_fit: dict = field(repr=False)
    new_customer_values: dict | None = field(repr=False)
    horizon_days: float
    as_of: pd.Timestamp
    by: str
    level: float
    draws: int
    seed: int

    @property
    def fit(self):
        """The order-frequency fit (``repeat_model.fit``)."""
        return self.repeat_model.fit

    @property
    def seasons(self) -> str:
        return self.repeat_model.seasons

    @property
    def seasonal_days(self) -> float:
        return self.repeat_model.horizon(self.horizon_days)

    @property
    def season_index(self) -> pd.DataFrame | None:
        """The month index of repeat orders, when used (``RepeatOrderModel.season_table``)."""
        return self.repeat_model.season_table()

    def summary(self) -> dict:
        """Plain numbers and strings, one object (for JSON and the dashboard)."""
        values = self.new_customer_values
        return {
            "customers": self.total["customers"],
            "horizon_days": self.horizon_days,
            "as_of": self.as_of.isoformat(),
            "by": self.by,
            "level": self.level,
            "total": {key: _plain(value) for key, value in self.total.items()},
            "cohorts": _records(self.cohorts),
            "schedule": None if self.schedule is None else _records(self.schedule),
            "order_frequency": self.fit.as_dict(),
            "new_customers": None if self.arrivals is None else dict(
                self.arrivals.as_dict(), **{k: values[k] for k in ("first_mean", "first_se", "repeat_mean",
                                                                   "repeat_se")}),
            "method": self.forecast_fit.get("method"),
            "variance": self.forecast_fit.get("variance"),
            "seasons": self.seasons,
            "seasonal_days": self.seasonal_days,
            **{key: value for key, value in self.repeat_model.as_dict().items() if key != "seasons"},
        }


def project_revenue(orders: pd.DataFrame, *, horizon, by: str = "quarter", as_of=None,
                    method: str = DEFAULT_METHOD, variance: str = DEFAULT_VARIANCE,
                    forecasts: pd.DataFrame | None = None, level: float = 0.90, draws: int = DEFAULT_DRAWS,
                    seed: int = 0, seasons: str = DEFAULT_SEASONS, frequency_model: str = "auto",
                    new_customers: bool = True, stats: pd.DataFrame | None = None) -> Outlook:
    """Project the revenue of the next ``horizon`` days: existing customers, new ones, and the whole.

    Parameters
    ----------
    orders : pandas.DataFrame
        Cleaned orders (``customer``, ``order_date``, ``order_value``, optional
        ``segment`` or other group columns).
    horizon : float
        Days ahead of ``as_of``.
    by : str, default "quarter"
        Group existing customers by the ``"month"`` or ``"quarter"`` of their
        first order, or by the name of a column of ``orders`` (the customer's
        latest value, e.g. ``"segment"``).
    as_of : date-like, optional
        Date the projection starts from; default the last order date.
    method, variance : str
        Passed to :func:`forecasting.forecasts.forecast_customers` for the
        expected next-order values; defaults from :mod:`forecasting.options`.
    forecasts : pandas.DataFrame, optional
        Ready-made output of ``forecast_customers`` for these customers (then
        ``method``/``variance`` are not used).
    level : float, default 0.90
        Coverage of the ranges.
    draws : int, default ``DEFAULT_DRAWS``
        Number of simulation draws for the ranges (at least 20).
    seed : int, default 0
        Seed of the draws; the same seed gives the same ranges.
    seasons : {"auto", "month", "none"}
        Month-of-year clock for repeat orders (:func:`forecasting.seasons.fit_repeat_orders`);
        default from :mod:`forecasting.options`.
    frequency_model : {"auto", "bg-nbd", "mbg-nbd"}, default "auto"
        The order-frequency model; ``"auto"`` keeps the one with the higher likelihood.
    new_customers : bool, default True
        Project the customers still to come as well (the whole revenue).
    stats : pandas.DataFrame, optional
        ``customer_statistics(orders)``, when already at hand (a pipeline that
        computes each stage once hands it over); it must describe exactly the
        customers of ``orders``.

    Returns
    -------
    Outlook
        When the order-frequency model cannot be fitted soundly
        (``outlook.fit.usable`` is False: it did not converge, or fewer than
        ``MIN_REPEAT_CUSTOMERS`` customers ordered twice; see
        ``outlook.fit.notes``), expected orders, chances and projected revenue
        are NaN rather than a made-up number.

    Notes
    -----
    Existing customers. Projected revenue of a customer = E[orders in
    horizon | history] (eq. 10 of BG/NBD or its MBG/NBD form,
    :func:`forecasting.frequency.expected_orders_ahead`, on the model's clock)
    x expected next-order value. Multiplying assumes how often a customer
    orders and how much they spend per order are independent (the usual
    assumption of spend models that sit on BG/NBD).

    New customers. Arrivals per day from a Poisson regression of the shop's
    first orders per day (:func:`forecasting.arrivals.fit_arrivals`, with a
    month pattern and a trend when tests keep them); each arrival's first
    order is worth the shop's average first order, and its repeat orders until
    the window closes follow the same order-frequency model from x = 0
    (eq. 7 or its MBG/NBD form) at the average value of a repeat order.

    Two ranges answer two questions.

    ``projected_low`` / ``projected_high`` -- *interval of the expected
    amount*: a parametric bootstrap of what the customers spend on average,
    not of what they will actually spend. Each draw takes the model's
    parameters from the normal approximation of their log-scale estimates
    (inverse Hessian), per existing customer a next-order value with the
    forecast's expected value as mean and its interval's half-width / z as
    standard deviation (Gamma draws: they stay positive with the mean
    unchanged where a normal cut at zero would not), the arrival model's
    coefficients from their normal approximation and the average first and
    repeat order values from theirs. Chance -- which customers happen to
    order, and how much -- is not in it, so actual revenue usually falls
    outside it.

    ``revenue_range_low`` / ``revenue_range_high`` -- *range for the revenue
    that will actually come in* (prediction interval), from a seeded
    simulation of the whole story per customer and draw: the same parameter
    draw; still active or not, the ordering rate and the stop chance drawn
    from the customer's posterior, and the orders in the horizon from the
    model's process itself (:func:`forecasting.frequency.simulate_orders_ahead`);
    then each order's value. Order values are lognormal, derived from the
    forecasts' 80% next-order range ``next_order_low`` / ``next_order_high``:
    its log-width gives the customer's log spread ``s_t`` (``s_t =
    log(high/low) / (2 z)``), of which the shop's per-order log spread
    ``sigma2_log`` (from the forecasts' fit) is drawn afresh for every order
    and the rest, ``s_t^2 - sigma2_log`` (what the customer's few orders
    leave unknown about their own level), once per customer and draw, shared
    by all their orders. The log-centre is ``log(expected_next_order) -
    s_t^2 / 2``, so the simulated orders average exactly the expected
    next-order value and the range is centred on the same projection as the
    point figure. Without a next-order range (a hand-made forecast table),
    each order spreads with the pooled log spread of the customers' own orders.
    New customers: the number arriving on each day is drawn (Poisson, or
    negative binomial when the daily counts spread more), each first order's
    value is drawn from the shop's first orders, their repeat orders from the
    model's story and each repeat order's value from the shop's repeat orders.
    Work is done in blocks of customers and of simulated orders, so memory
    stays bounded for any shop size and horizon.

    Both ranges treat customers' value forecasts as independent, which
    ignores that shrunk forecasts share a shop-wide centre. With a month
    index, each draw takes the index together with the parameters (joint
    normal approximation) and measures the window on its own clock; each
    customer's past stays on the fitted clock (an error in a month's weight
    moves a window of a few months far more than a history of years).

    Seasons. With a month index (``seasons="month"``, or ``"auto"`` when a
    likelihood-ratio test keeps it) every customer's history, the fit and
    the window are measured on the same seasonal clock; see
    :mod:`forecasting.seasons`. The README lists rolling backtests on the
    demo shop and on simulated shops.

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). "Counting your
    customers" the easy way. Marketing Science 24(2), 275-284.

    Batislam, E. P., Denizel, M. and Filiztekin, A. (2007). Empirical
    validation and comparison of models for customer base analysis.
    International Journal of Research in Marketing 24(3), 201-209.
    """
    horizon = _check_horizon(horizon)
    level, draws, seasons, frequency_model = _check_run_options(level, draws, seasons, frequency_model)
    _check_orders(orders)
    by = _check_by(by, orders)
    book = _OrderBook(orders)
    stats = customer_statistics(orders) if stats is None else _check_stats(stats, book)
    if as_of is None:
        as_of_ts = pd.Timestamp(stats["last_order"].max())
    else:
        as_of_ts = _parse_date(as_of, "as_of")
    work = _project(book, len(book), stats, horizon=horizon, by=by, as_of=as_of_ts, method=method,
                    variance=variance, forecasts=forecasts, level=level, draws=draws, seed=seed, seasons=seasons,
                    frequency_model=frequency_model, new_customers=bool(new_customers))
    return Outlook(customers=work["customers"], cohorts=work["cohorts"], total=work["total"],
                   repeat_model=work["repeat_model"], arrivals=work["arrivals"], schedule=work["schedule"],
                   forecast_fit=work["forecast_fit"], new_customer_values=work["new_values"], horizon_days=horizon,
                   as_of=as_of_ts, by=by, level=level, draws=draws, seed=seed)


def _plain(value):
    if isinstance(value, (np.floating, float)):
        return float(value) if math.isfinite(float(value)) else None
    if isinstance(value, np.integer):
        return int(value)
    return value


# --------------------------------------------------------------------------- #
# Public: backtest
# --------------------------------------------------------------------------- #
def require_projection(outlook: Outlook, *, what: str = "the outlook") -> Outlook:
    """Return ``outlook`` if its projection is a number, else raise a plain-words error.

    For front ends that must show a figure or nothing (the command line).
    """
    if math.isfinite(float(outlook.total["projected_revenue"])):
        return outlook
    reasons = " ".join(outlook.fit.notes)
    raise OrderDataError(
        f"how often customers come back could not be fitted on this data, so {what} cannot be worked out"
        + (f" ({reasons.rstrip('.')})" if reasons else ""),
        fix="A longer order history with more repeat customers helps",
    )


@dataclass(frozen=True)
class OutlookBacktest:
    """Projected against actual revenue after a cut-off date.

    Attributes
    ----------
    cohorts : pandas.DataFrame
        One row per group of the customers known at the cut-off, then (when
        new customers are projected) the ``NEW_CUSTOMERS`` row with the
        revenue of customers first seen in the window; columns
        ``BACKTEST_COLUMNS``. ``actual_inside_interval`` says whether the
        actual revenue fell inside the interval of the *expected* amount
        (``projected_low``..``projected_high``); chance (which customers
        happen to order) is not in that interval, so actual revenue often
        falls outside it. ``actual_inside_revenue_range`` says whether it fell
        inside the range for actual revenue
        (``revenue_range_low``..``revenue_range_high``), which should happen
        for about ``level`` of groups when the model holds.
    total : dict
        ``actual_revenue`` is all revenue in the window and
        ``projected_revenue`` the whole projection (with the outlook's
        ranges); ``..._existing`` and ``..._new`` split both (``actual_revenue_existing``,
        ``projected_revenue_existing``, ``error_existing_pct`` and the same
        for ``new``); ``run_rate_revenue`` the run-rate guess;
        ``cohort_abs_error`` / ``run_rate_cohort_abs_error`` (sums over groups
        of absolute errors); ``new_customer_revenue`` (the same as
        ``actual_revenue_new``); ``cohorts_inside_interval`` /
        ``cohorts_inside_revenue_range`` (counts of groups); ``seasons`` /
        ``seasonal_days`` / ``frequency_model`` (what the projection used).
    cutoff : pandas.Timestamp
        Orders before it were used to fit; the window starts there.
    window_days : float
        Length of the compared window.
    outlook : Outlook
        The projection made at the cut-off. The check compares groups and
        totals, so its per-customer ranges (``projected_low`` ...
        ``revenue_range_high`` of ``outlook.customers``) are not worked out
        (NaN) and it has no month-by-month schedule; :func:`project_revenue`
        with ``as_of`` gives them.
    """

    cohorts: pd.DataFrame
    total: dict
    cutoff: pd.Timestamp
    window_days: float
    outlook: Outlook = field(repr=False)

    def summary(self) -> dict:
        """Plain numbers and strings, one object (for JSON and the dashboard)."""
        return {
            "cutoff": self.cutoff.isoformat(),
            "window_days": self.window_days,
            "by": self.outlook.by,
            "total": {key: _plain(value) for key, value in self.total.items()},
            "cohorts": _records(self.cohorts),
            "order_frequency": self.outlook.fit.as_dict(),
            "seasons": self.outlook.seasons,
        }


def _default_window(first, end, horizon):
    """The backtest window: the horizon when it leaves at least half the span to fit on, else the last 20%."""
    span_days = (end - first) / pd.Timedelta(days=1)
    if horizon is not None and horizon <= 0.5 * span_days:
        return float(horizon)
    return float(max(1.0, round(0.2 * span_days)))


def _percent_error(projected, actual):
    return 100.0 * (projected - actual) / actual if actual > 0 and math.isfinite(projected) else None


def _new_customers_before(book: _OrderBook, count: int, cutoff, window):
    """Revenue in the ``window`` days before the cut-off from customers first seen in them, and those days."""
    start = max(cutoff - pd.Timedelta(days=window), pd.Timestamp(book.dates[0]).normalize())
    since = book.before(start)
    recent = book.first_at[book.codes[since:count]] >= since
    return float(book.values[since:count][recent].sum()), (cutoff - start) / pd.Timedelta(days=1)


def backtest_outlook(orders: pd.DataFrame, *, horizon=None, cutoff=None, by: str = "quarter",
                     method: str = DEFAULT_METHOD, variance: str = DEFAULT_VARIANCE, level: float = 0.90,
                     draws: int = DEFAULT_DRAWS, seed: int = 0, seasons: str = DEFAULT_SEASONS,
                     frequency_model: str = "auto", new_customers: bool = True) -> OutlookBacktest:
    """Fit the outlook on orders before a cut-off and compare with all revenue that came after.

    Parameters
    ----------
    orders : pandas.DataFrame
        Cleaned orders.
    horizon : float, optional
        Length of the compared window in days. Default: the last 20% of the
        time span. A horizon that would leave less than half the span to fit on
        is replaced by the last 20% (see ``window_days`` of the result).
    cutoff : date-like, optional
        Start of the compared window. Default: the end of the last order's day
        minus the window. With a cut-off, the window is ``horizon`` days or up
        to the end of the data, whichever is shorter.
    by : str, default "quarter"
        Grouping, as in :func:`project_revenue` (groups are taken from the
        orders before the cut-off).
    method, variance, level, draws, seed, seasons, frequency_model, new_customers
        As in :func:`project_revenue`; every model (month index, order
        frequency, arrivals, the forecasting method's choice) sees the orders
        before the cut-off only.

    Returns
    -------
    OutlookBacktest

    Notes
    -----
    Orders dated before the cut-off are used to fit; orders from the cut-off
    up to ``cutoff + window`` (exclusive) are the actual revenue: from the
    customers known at the cut-off (compared per group) and from customers
    first seen in the window (compared with the projection for new customers).

    The run-rate guess carries the recent past forward: each known customer's
    own pace (repeat orders / days known x window days x their plain average
    order value; zero for one-time customers) plus as much new-customer
    revenue as the customers first seen in the ``window`` days before the
    cut-off brought in then (scaled to the window when less history exists).
    ``error = projected - actual``; ``error_pct = 100 error / actual``.
    """
    level, draws, seasons, frequency_model = _check_run_options(level, draws, seasons, frequency_model)
    if horizon is not None:
        horizon = _check_horizon(horizon)
    _check_orders(orders)
    by = _check_by(by, orders)
    book = _OrderBook(orders)
    cutoff_ts, window = _window(book, cutoff, horizon)
    return _backtest_at(book, cutoff_ts, window, by=by, method=method, variance=variance, level=level,
                        draws=draws, seed=seed, seasons=seasons, frequency_model=frequency_model,
                        new_customers=bool(new_customers), detail="groups")


def _window(book: _OrderBook, cutoff, horizon):
    """The cut-off and the length of the compared window (see backtest_outlook)."""
    first_day = pd.Timestamp(book.dates[0]).normalize()
    end = pd.Timestamp(book.dates[-1]).normalize() + pd.Timedelta(days=1)
    if cutoff is None:
        window = _default_window(first_day, end, horizon)
        return end - pd.Timedelta(days=window), window
    cutoff_ts = _parse_date(cutoff, "cutoff")
    if not first_day < cutoff_ts < end:
        raise OrderDataError(
            f"the cut-off must fall inside the orders' dates ({first_day:%Y-%m-%d} to "
            f"{pd.Timestamp(book.dates[-1]):%Y-%m-%d})", value=cutoff, option="cutoff",
            fix="Choose a date with orders on both sides")
    room = (end - cutoff_ts) / pd.Timedelta(days=1)
    return cutoff_ts, float(min(horizon, room)) if horizon is not None else float(room)


def _backtest_at(book: _OrderBook, cutoff_ts, window, *, by, method, variance, level, draws, seed, seasons,
                 frequency_model, new_customers, start=None, detail="groups") -> OutlookBacktest:
    """The backtest at one cut-off (see backtest_outlook), from orders sorted once (``book``)."""
    count = book.before(cutoff_ts)
    if count == 0:
        raise OrderDataError("no orders fall before the cut-off date", value=cutoff_ts.date(), option="cutoff",
                             fix="Choose a later cut-off")
    window_end = cutoff_ts + pd.Timedelta(days=window)
    closing = book.before(window_end)
    stats_before = book.statistics(count)
    work = _project(book, count, stats_before, horizon=window, by=by, as_of=cutoff_ts, method=method,
                    variance=variance, forecasts=None, level=level, draws=draws, seed=seed, seasons=seasons,
                    frequency_model=frequency_model, new_customers=new_customers, start=start, detail=detail)
    outlook = Outlook(customers=work["customers"], cohorts=work["cohorts"], total=work["total"],
                      repeat_model=work["repeat_model"], arrivals=work["arrivals"], schedule=work["schedule"],
                      forecast_fit=work["forecast_fit"], new_customer_values=work["new_values"],
                      horizon_days=window, as_of=cutoff_ts, by=by, level=level, draws=draws, seed=seed)
    projection = outlook.customers
    known = book.present(count)
    spent_after = np.bincount(book.codes[count:closing], weights=book.values[count:closing],
                              minlength=len(book.names))
    actual = spent_after[known]
    existing_actual = float(actual.sum())
    new_revenue = float(book.values[count:closing].sum()) - existing_actual

    days_known = projection["days_known"].to_numpy(dtype=np.float64)
    orders_so_far = projection["orders"].to_numpy(dtype=np.float64)
    rate = np.where(days_known > 0, (orders_so_far - 1) / np.maximum(days_known, 1e-300), 0.0)
    run_rate = rate * window * stats_before["mean"].to_numpy(dtype=np.float64)
    recent_new, recent_days = _new_customers_before(book, count, cutoff_ts, window)
    run_rate_new = recent_new * window / recent_days if recent_days > 0 else float("nan")

    cohorts = outlook.cohorts.set_index("cohort")
    group_codes = cohorts.index.get_indexer(projection["cohort"].to_numpy(dtype=object))
    act = np.bincount(group_codes, weights=actual, minlength=len(cohorts))
    base = np.bincount(group_codes, weights=run_rate, minlength=len(cohorts))
    has_new = NEW_CUSTOMERS in cohorts.index
    if has_new:
        position = cohorts.index.get_loc(NEW_CUSTOMERS)
        act[position] = new_revenue
        base[position] = run_rate_new
    proj = cohorts["projected_revenue"].to_numpy()
    with np.errstate(divide="ignore", invalid="ignore"):
        result = pd.DataFrame(
            {
                "cohort": cohorts.index.to_numpy(dtype=object),
                "customers": cohorts["customers"].to_numpy(),
                "projected_revenue": proj,
                "projected_low": cohorts["projected_low"].to_numpy(),
                "projected_high": cohorts["projected_high"].to_numpy(),
                "revenue_range_low": cohorts["revenue_range_low"].to_numpy(),
                "revenue_range_high": cohorts["revenue_range_high"].to_numpy(),
                "actual_revenue": act,
                "error": proj - act,
                "error_pct": np.where(act > 0, 100 * (proj - act) / act, np.nan),
                "run_rate_revenue": base,
                "run_rate_error": base - act,
                "run_rate_error_pct": np.where(act > 0, 100 * (base - act) / act, np.nan),
                "actual_inside_interval": (cohorts["projected_low"].to_numpy() <= act)
                & (act <= cohorts["projected_high"].to_numpy()),
                "actual_inside_revenue_range": (cohorts["revenue_range_low"].to_numpy() <= act)
                & (act <= cohorts["revenue_range_high"].to_numpy()),
            }
        )
    total_actual = existing_actual + new_revenue
    projected = outlook.total
    total_proj = float(projected["projected_revenue"])
    total_base = float(np.nansum(base))
    total = {
        "customers": int(projected["customers"]),
        "projected_revenue": total_proj,
        "projected_low": projected["projected_low"],
        "projected_high": projected["projected_high"],
        "revenue_range_low": projected["revenue_range_low"],
        "revenue_range_high": projected["revenue_range_high"],
        "actual_revenue": total_actual,
        "error": total_proj - total_actual,
        "error_pct": _percent_error(total_proj, total_actual),
        "projected_revenue_existing": projected["projected_revenue_existing"],
        "actual_revenue_existing": existing_actual,
        "error_existing_pct": _percent_error(projected["projected_revenue_existing"], existing_actual),
        "projected_revenue_new": projected.get("projected_revenue_new", float("nan")),
        "actual_revenue_new": new_revenue,
        "error_new_pct": _percent_error(projected.get("projected_revenue_new", float("nan")), new_revenue),
        "run_rate_revenue": total_base,
        "run_rate_error": total_base - total_actual,
        "run_rate_error_pct": _percent_error(total_base, total_actual),
        "cohort_abs_error": float(np.nansum(np.abs(result["error"]))),
        "run_rate_cohort_abs_error": float(np.nansum(np.abs(result["run_rate_error"]))),
        "new_customer_revenue": new_revenue,
        "orders_fitted": int(count),
        "orders_in_window": int(closing - count),
        "actual_inside_revenue_range": bool(projected["revenue_range_low"] <= total_actual
                                            <= projected["revenue_range_high"]),
        "cohorts_inside_interval": int(result["actual_inside_interval"].sum()),
        "cohorts_inside_revenue_range": int(result["actual_inside_revenue_range"].sum()),
        "seasons": outlook.seasons,
        "seasonal_days": outlook.seasonal_days,
        "frequency_model": outlook.fit.model,
    }
    if not new_customers:
        # Only the customers known at the cut-off were projected: compare them alone.
        total.update(actual_revenue=existing_actual, error=total_proj - existing_actual,
                     error_pct=_percent_error(total_proj, existing_actual))
    return OutlookBacktest(cohorts=result, total=total, cutoff=cutoff_ts, window_days=window, outlook=outlook)


# --------------------------------------------------------------------------- #
# Public: the outlook checked at many cut-offs, beside two baselines
# --------------------------------------------------------------------------- #
#: Frequency cells of the baseline: orders placed so far (1, 2, 3-4, 5 or more).
FREQUENCY_CELLS = (1, 2, 3, 5)
#: Recency cells of the baseline: days since the last order (under 30, 30-89, 90-179, 180-364, 365 or more).
RECENCY_CELLS = (0, 30, 90, 180, 365)


def _cells(orders_so_far, days_since_last):
    frequency = np.searchsorted(FREQUENCY_CELLS, orders_so_far, side="right") - 1
    recency = np.searchsorted(RECENCY_CELLS, days_since_last, side="right") - 1
    return frequency * len(RECENCY_CELLS) + recency, frequency


def cell_baseline(orders: pd.DataFrame, *, cutoff, window, repeat_index=None, arrival_index=None) -> dict:
    """A plain empirical baseline of the next ``window`` days: recency x frequency cells carried forward.

    Parameters
    ----------
    orders : pandas.DataFrame
        Cleaned orders; only those before ``cutoff`` are read.
    cutoff : date-like
        Start of the projected window.
    window : float
        Its length in days.
    repeat_index, arrival_index : array_like of 12 floats, optional
        Month-of-year indexes of repeat orders and of new customers (the
        outlook's); the baseline's revenue is scaled by how much busier the
        window is than the stretch it learnt from. Default: calendar days.

    Returns
    -------
    dict
        ``existing`` (revenue of the customers known at the cut-off),
        ``new`` (of customers still to come), ``total``, ``cells`` (the
        learnt revenue per customer of each cell) and ``learnt_from`` (the
        start of the stretch it learnt from).

    Notes
    -----
    Customers known at ``cutoff - window`` are put into cells by how many
    orders they had placed (``FREQUENCY_CELLS``) and how long ago the last
    one was (``RECENCY_CELLS``); each cell's revenue per customer over the
    following ``window`` days (up to the cut-off) is learnt. At the cut-off,
    every known customer gets their cell's figure (a cell nobody was in gets
    the average of its frequency row, then of everyone). New customers bring
    what new customers brought in the learning stretch. Both are scaled by
    the ratio of the window's length to the learning stretch's on the
    month-of-year clock. This is the recency/frequency grid of common
    practice, a check that assumes no model of how customers behave: when it
    does better than the model, customers probably change their pace in a
    way the model does not allow for (slowing down before they stop).
    """
    _check_orders(orders)
    return _cell_baseline(_OrderBook(orders), pd.Timestamp(cutoff), window, repeat_index=repeat_index,
                          arrival_index=arrival_index)


def _last_positions(book: _OrderBook, count: int) -> np.ndarray:
    """Each customer's latest order among the first ``count`` (date order), -1 for none yet."""
    last = np.full(len(book.names), -1, dtype=np.int64)
    np.maximum.at(last, book.codes[:count], np.arange(count))
    return last


def _days_before(moment, stamps):
    return (pd.Timestamp(moment).value - stamps.astype(np.int64)) / 86400e9


def _cell_baseline(book: _OrderBook, cutoff, window, *, repeat_index=None, arrival_index=None) -> dict:
    """:func:`cell_baseline` from orders sorted once: per-customer counts and last orders by prefix sums."""
    count = book.before(cutoff)
    start = max(cutoff - pd.Timedelta(days=window), pd.Timestamp(book.dates[0]).normalize())
    learn_days = (cutoff - start) / pd.Timedelta(days=1)
    empty = {"existing": float("nan"), "new": float("nan"), "total": float("nan"), "cells": None,
             "learnt_from": start}
    if learn_days <= 0 or count == 0:
        return empty
    since = book.before(start)
    customers = len(book.names)
    # State at the start of the learning stretch, and what each then-known customer spent in it.
    size_then = np.bincount(book.codes[:since], minlength=customers)
    known_then = size_then > 0
    if not known_then.any():
        return empty
    last_then = _last_positions(book, since)[known_then]
    spent = np.bincount(book.codes[since:count], weights=book.values[since:count], minlength=customers)
    learnt_cells, learnt_rows = _cells(size_then[known_then], _days_before(start, book.dates[last_then]))
    revenue = spent[known_then]
    size = len(FREQUENCY_CELLS) * len(RECENCY_CELLS)
    cell_sum = np.bincount(learnt_cells, weights=revenue, minlength=size)
    cell_count = np.bincount(learnt_cells, minlength=size)
    row_sum = np.bincount(learnt_rows, weights=revenue, minlength=len(FREQUENCY_CELLS))
    row_count = np.bincount(learnt_rows, minlength=len(FREQUENCY_CELLS))
    overall = revenue.sum() / len(revenue)
    with np.errstate(divide="ignore", invalid="ignore"):
        row_mean = np.where(row_count > 0, row_sum / row_count, overall)
        cell_mean = np.where(cell_count > 0, cell_sum / cell_count,
                             np.repeat(row_mean, len(RECENCY_CELLS)))
    # Everyone known at the cut-off, put into the cells.
    size_now = np.bincount(book.codes[:count], minlength=customers)
    known_now = size_now > 0
    now_cells, _ = _cells(size_now[known_now],
                          _days_before(cutoff, book.dates[_last_positions(book, count)[known_now]]))
    end = cutoff + pd.Timedelta(days=window)
    repeat_scale = _clock_ratio(repeat_index, start, cutoff, end)
    existing = float(cell_mean[now_cells].sum()) * repeat_scale
    newcomers = (book.first_at >= since) & (book.first_at < count)
    new_spent = float(spent[newcomers].sum())
    new = new_spent * _clock_ratio(arrival_index, start, cutoff, end)
    frequency_labels = ["1", "2", "3-4", "5+"]
    recency_labels = ["under 30", "30-89", "90-179", "180-364", "365+"]
    cells = pd.DataFrame({
        "orders_so_far": np.repeat(frequency_labels, len(RECENCY_CELLS)),
        "days_since_last_order": np.tile(recency_labels, len(FREQUENCY_CELLS)),
        "customers_learnt_from": cell_count,
        "revenue_per_customer": cell_mean,
    })
    return {"existing": existing, "new": new, "total": existing + new, "cells": cells, "learnt_from": start}


def _clock_ratio(index, start, cutoff, end):
    """Length of [cutoff, end) over the length of [start, cutoff), on the clock of ``index`` (calendar without)."""
    weights = np.ones(12) if index is None else np.asarray(index, dtype=np.float64)
    lengths = clock_between([start, cutoff], [cutoff, end], weights)
    return float(lengths[1] / lengths[0]) if lengths[0] > 0 else float("nan")


def rolling_cutoffs(orders: pd.DataFrame, *, horizon, count: int = DEFAULT_CUTOFFS) -> list:
    """Cut-off dates spread evenly over the last year whose windows of ``horizon`` days end by the last order.

    The latest cut-off leaves exactly ``horizon`` days to the end of the data
    (the midnight after the last order); the earliest is a year before the
    end, or later when the orders cover less than two years: every cut-off
    keeps at least half the history before it.

    Raises
    ------
    OrderDataError
        When the orders are too short for any such cut-off.
    """
    horizon = _check_horizon(horizon)
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < 2:
        raise OrderDataError("the number of cut-offs must be a whole number of at least 2", value=count,
                             option="cutoffs", fix=f"Give for example {DEFAULT_CUTOFFS}")
    dates = pd.to_datetime(orders["order_date"])
    first_day = dates.min().normalize()
    end = dates.max().normalize() + pd.Timedelta(days=1)
    latest = end - pd.Timedelta(days=horizon)
    earliest = max(end - pd.Timedelta(days=_ROLLING_SPAN_DAYS), first_day + (end - first_day) / 2)
    if latest < earliest:
        raise OrderDataError(
            f"checking a {horizon:g}-day outlook at several cut-offs needs at least twice that long a history "
            f"(these orders cover {(end - first_day).days} days)", value=horizon, option="horizon",
            fix="Choose a shorter horizon, or use a longer order history")
    steps = [(earliest + (latest - earliest) * k / (count - 1)).normalize() for k in range(count)]
    return sorted(set(steps))


@dataclass(frozen=True)
class RollingBacktest:
    """The outlook made at several cut-offs and compared with all revenue that came in after each.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per cut-off, columns ``ROLLING_COLUMNS``: actual and projected
        whole revenue (with the range for what may come in), their split into
        existing and new customers, the run-rate guess and the
        recency/frequency-cell baseline (:func:`cell_baseline`), errors in
        percent of actual revenue.
    summary : dict
        ``cutoffs``, ``window_days``, ``mean_abs_error_pct`` (the outlook's
        mean absolute error), ``within_10pct`` (cut-offs within 10%),
        ``inside_revenue_range``, the same mean absolute error for the
        run-rate guess and the cell baseline, for existing customers alone
        (``..._existing``), ``mean_error_pct`` (signed), and ``warning`` (a
        sentence when the cell baseline projected existing customers better
        than the model, else "" (see ``_slowing_down_warning``).
    backtests : list of OutlookBacktest
        The backtest at each cut-off. The check reports whether actual revenue
        fell inside the range of what may come in, so the range of the
        expected amount (``projected_low`` / ``projected_high``) is not worked
        out at the cut-offs (NaN); :func:`backtest_outlook` gives it.
    """

    table: pd.DataFrame
    summary: dict
    backtests: list = field(repr=False)

    def as_dict(self) -> dict:
        """Plain numbers and strings, for JSON."""
        table = self.table.assign(cutoff=self.table["cutoff"].map(lambda c: c.date().isoformat()))
        return {"summary": {k: _plain(v) for k, v in self.summary.items()}, "cutoffs": _records(table)}


def _mean_abs(values):
    values = np.asarray([v for v in values if v is not None and math.isfinite(v)], dtype=np.float64)
    return float(np.mean(np.abs(values))) if len(values) else float("nan")


def rolling_backtest(orders: pd.DataFrame, *, horizon, cutoffs=DEFAULT_CUTOFFS, by: str = "quarter",
                     method: str = DEFAULT_METHOD, variance: str = DEFAULT_VARIANCE, level: float = 0.90,
                     draws: int = _ROLLING_DRAWS, seed: int = 0, seasons: str = DEFAULT_SEASONS,
                     frequency_model: str = "auto") -> RollingBacktest:
    """Check the whole-revenue outlook at several cut-offs, beside the run-rate guess and a cell baseline.

    Parameters
    ----------
    orders : pandas.DataFrame
        Cleaned orders.
    horizon : float
        Days ahead, as in :func:`project_revenue`; every window has this length.
    cutoffs : int or sequence of dates, default 10
        How many cut-offs (:func:`rolling_cutoffs`: spread over the last year),
        or the dates themselves.
    by, method, variance, level, seed, seasons, frequency_model
        As in :func:`project_revenue`; at each cut-off every choice is made
        again from the orders before it.
    draws : int, default 100
        Simulation draws per cut-off (the ranges only say whether the actual
        amount fell inside).

    The work the cut-offs share is done once: the orders are sorted by date
    once and each cut-off's statistics are sums over the orders before it;
    each cut-off's order-frequency fits start from the previous cut-off's
    optima (the result is the same to rounding as a fit from scratch,
    :func:`backtest_outlook` at that cut-off).

    Returns
    -------
    RollingBacktest

    Notes
    -----
    One cut-off says little: a handful of big customers can move a single
    window by a tenth or more. The mean absolute error over cut-offs spread
    through a year says how far off the outlook typically is, through the
    seasons. The windows of neighbouring cut-offs overlap when they are
    closer than the horizon, so the cut-offs are not independent checks.
    """
    horizon = _check_horizon(horizon)
    level, draws, seasons, frequency_model = _check_run_options(level, draws, seasons, frequency_model)
    _check_orders(orders)
    by = _check_by(by, orders)
    if isinstance(cutoffs, (int, np.integer)) and not isinstance(cutoffs, bool):
        dates = rolling_cutoffs(orders, horizon=horizon, count=int(cutoffs))
    else:
        dates = sorted(_parse_date(c, "cutoff") for c in cutoffs)
    book = _OrderBook(orders)
    rows, backtests = [], []
    earlier = None
    for cutoff in dates:
        cutoff_ts, window = _window(book, cutoff, horizon)
        check = _backtest_at(book, cutoff_ts, window, by=by, method=method, variance=variance, level=level,
                             draws=draws, seed=seed, seasons=seasons, frequency_model=frequency_model,
                             new_customers=True, start=earlier, detail="actual")
        earlier = check.outlook.repeat_model
        backtests.append(check)
        total = check.total
        outlook = check.outlook
        repeat_index = outlook.repeat_model.index
        arrival_index = outlook.arrivals.month_index if outlook.arrivals is not None else None
        cells = _cell_baseline(book, check.cutoff, check.window_days, repeat_index=repeat_index,
                               arrival_index=arrival_index)
        rows.append({
            "cutoff": check.cutoff,
            "window_days": check.window_days,
            "actual_revenue": total["actual_revenue"],
            "projected_revenue": total["projected_revenue"],
            "revenue_range_low": total["revenue_range_low"],
            "revenue_range_high": total["revenue_range_high"],
            "error_pct": total["error_pct"],
            "inside_revenue_range": total["actual_inside_revenue_range"],
            "actual_revenue_existing": total["actual_revenue_existing"],
            "projected_revenue_existing": total["projected_revenue_existing"],
            "error_existing_pct": total["error_existing_pct"],
            "actual_revenue_new": total["actual_revenue_new"],
            "projected_revenue_new": total["projected_revenue_new"],
            "error_new_pct": total["error_new_pct"],
            "run_rate_revenue": total["run_rate_revenue"],
            "run_rate_error_pct": total["run_rate_error_pct"],
            "cell_revenue": cells["total"],
            "cell_error_pct": _percent_error(cells["total"], total["actual_revenue"]),
            "cell_revenue_existing": cells["existing"],
            "cell_error_existing_pct": _percent_error(cells["existing"], total["actual_revenue_existing"]),
            "seasons": total["seasons"],
            "frequency_model": total["frequency_model"],
        })
    table = pd.DataFrame(rows, columns=ROLLING_COLUMNS)
    for column in ("error_pct", "error_existing_pct", "error_new_pct", "run_rate_error_pct", "cell_error_pct",
                   "cell_error_existing_pct"):
        table[column] = pd.to_numeric(table[column], errors="coerce").astype(np.float64)
    errors = table["error_pct"].to_numpy()
    summary = {
        "cutoffs": int(len(table)),
        "window_days": float(horizon),
        "first_cutoff": dates[0].date().isoformat(),
        "last_cutoff": dates[-1].date().isoformat(),
        "mean_abs_error_pct": _mean_abs(errors),
        "mean_error_pct": float(np.nanmean(errors)) if np.isfinite(errors).any() else float("nan"),
        "within_10pct": int(np.sum(np.abs(errors) <= 100 * CLOSE_ENOUGH)),
        "inside_revenue_range": int(table["inside_revenue_range"].sum()),
        "run_rate_mean_abs_error_pct": _mean_abs(table["run_rate_error_pct"]),
        "cell_mean_abs_error_pct": _mean_abs(table["cell_error_pct"]),
        "mean_abs_error_existing_pct": _mean_abs(table["error_existing_pct"]),
        "cell_mean_abs_error_existing_pct": _mean_abs(table["cell_error_existing_pct"]),
        "mean_abs_error_new_pct": _mean_abs(table["error_new_pct"]),
    }
    summary["warning"] = _slowing_down_warning(summary, table)
    return RollingBacktest(table=table, summary=summary, backtests=backtests)


def _slowing_down_warning(summary, table) -> str:
    """A sentence when the cell baseline clearly beat the model on existing customers, else "".

    Clearly: the model's typical miss is over ``_WARN_ABOVE_PCT`` and the baseline's at most
    ``_WARN_SHARE`` of it. On shops that follow the model the two land close together, and a
    difference of a point or two between them is chance.
    """
    model, cells = summary["mean_abs_error_existing_pct"], summary["cell_mean_abs_error_existing_pct"]
    if not (math.isfinite(model) and math.isfinite(cells)) or model <= _WARN_ABOVE_PCT or cells > _WARN_SHARE * model:
        return ""
    signed = float(np.nanmean(table["error_existing_pct"]))
    direction = ("over-projected" if signed > 0 else "under-projected")
    return (f"The simple recency-and-frequency baseline projected the existing customers' revenue better than "
            f"the model at these cut-offs (typical miss {cells:.0f}% against {model:.0f}%; the model "
            f"{direction} by {abs(signed):.0f}% on average). Customers may be changing their pace in a way the "
            f"model does not allow for, such as slowing down before they stop; read the outlook for existing "
            f"customers with that in mind.")


# --------------------------------------------------------------------------- #
# Public: value tiers
# --------------------------------------------------------------------------- #
# Tier names say where a customer stands on the ranked figure, nothing about how loyal or how
# frequent they are (a ranking by order value says nothing of that).
_DEFAULT_TIER_NAMES = {
    1: ("all customers",),
    2: ("upper tier", "lower tier"),
    3: ("upper tier", "middle tier", "lower tier"),
    4: ("upper tier", "upper middle tier", "lower middle tier", "lower tier"),
}
#: The one tier when every customer has the same figure (a ranking would be arbitrary).
SAME_FIGURE_TIER = "all customers"
_RANK_COLUMN = {"value": "expected_next_order", "revenue": "projected_revenue"}


def _check_tier_options(rank, shares, thresholds, names):
    if rank not in RANK_BY:
        raise OrderDataError("customers can be ranked by next-order value or by projected revenue",
                             value=rank, option="rank", fix="Rank by value or by revenue")
    if shares is not None and thresholds is not None:
        raise OrderDataError("give either shares of customers or money thresholds for the tiers, not both",
                             option="shares", fix="Keep the shares or the thresholds, not both")
    if thresholds is not None:
        values = _as_floats(thresholds, "thresholds")
        if any(not math.isfinite(v) or v <= 0 for v in values):
            raise OrderDataError("tier thresholds must be positive amounts", option="thresholds",
                                 value=",".join(str(v) for v in values), fix="Give for example 50,200")
        if len(set(values)) != len(values):
            raise OrderDataError("tier thresholds must all differ", option="thresholds",
                                 value=",".join(str(v) for v in values))
        cuts = sorted(values, reverse=True)
        kind = "thresholds"
    else:
        values = _as_floats((0.10, 0.30) if shares is None else shares, "shares")
        if any(not math.isfinite(v) or not 0 < v < 1 for v in values) or sum(values) > 1 + 1e-12:
            raise OrderDataError(
                "tier shares must each be between 0 and 1 and add up to at most 1",
                option="shares", value=",".join(str(v) for v in values),
                fix="Give for example 0.1,0.3 for the top 10%, the next 30% and the rest")
        cuts = values
        kind = "shares"
    count = len(cuts) + 1
    if kind == "shares" and abs(sum(cuts) - 1) <= 1e-12:
        count = len(cuts)
    if names is None:
        names = _DEFAULT_TIER_NAMES.get(count, tuple(f"tier {k}" for k in range(1, count + 1)))
    else:
        names = tuple(str(n) for n in names)
        if len(names) != count or len(set(names)) != count:
            raise OrderDataError(f"give {count} different tier names", option="names", value=", ".join(names))
    return kind, cuts, names


def _as_floats(values, option):
    if isinstance(values, str):
        values = [v for v in values.split(",") if v.strip()]
    try:
        out = [float(v) for v in values]
    except (TypeError, ValueError):
        raise OrderDataError(f"the tier {option} must be numbers separated by commas", option=option,
                             value=values) from None
    if not out:
        raise OrderDataError(f"the tier {option} need at least one number", option=option)
    return out


def _money(v):
    return f"{v:,.2f}"


def assign_tiers(customers: pd.DataFrame, *, rank: str = "value", shares=None, thresholds=None,
                 names=None) -> pd.DataFrame:
    """Rank customers and put each into a value tier.

    Parameters
    ----------
    customers : pandas.DataFrame
        Per-customer table with ``customer``, ``expected_next_order``,
        ``own_history_weight`` and, for ``rank="revenue"``,
        ``projected_revenue`` -- e.g. ``project_revenue(...).customers`` or
        the output of ``forecast_customers``.
    rank : {"value", "revenue"}, default "value"
        Rank by expected next-order value or by projected revenue in the horizon.
    shares : sequence of float, optional
        Shares of customers in each tier from the top; the rest form the last
        tier. Default ``(0.10, 0.30)``: top 10%, next 30%, the rest.
    thresholds : sequence of float, optional
        Money amounts instead of shares: ``(50, 200)`` gives 200 and above,
        50 to under 200, under 50.
    names : sequence of str, optional
        Tier names from the top; by default words that say only where a
        customer stands on the ranked figure ("upper tier", "middle tier",
        "lower tier" for three tiers), nothing about loyalty or frequency.

    Returns
    -------
    pandas.DataFrame
        A copy sorted from the top, with ``rank`` (1 = highest; ties share a
        rank), ``tier``, ``tier_rule`` and ``mostly_shop_pattern``
        (own-history weight below 0.5) added. ``attrs["tiers"]`` lists the
        tier names and rules in order; ``attrs["note"]`` says when the
        customers could not be ranked ("" otherwise).

    Notes
    -----
    With shares, the tier boundary is the figure of the customer at that
    position (e.g. the 200th of 2,000 for the top 10%); customers tied with
    it join the higher tier, so a tier can be slightly larger than its
    share, and two customers with the same figure are never split. When
    every customer has the same figure (a shop where the forecasts could
    only give everyone the shop-wide average, say), shares cannot rank
    anyone: all customers form one tier, ``SAME_FIGURE_TIER``, with a note,
    rather than all being called the top.

    Examples
    --------
    >>> import pandas as pd
    >>> table = pd.DataFrame({"customer": list("abcde"),
    ...                       "expected_next_order": [10.0, 80.0, 40.0, 40.0, 5.0],
    ...                       "own_history_weight": [0.9, 0.8, 0.3, 0.6, 0.2]})
    >>> assign_tiers(table, shares=(0.2, 0.4))[["customer", "rank", "tier"]]
      customer  rank         tier
    0        b     1   upper tier
    1        c     2  middle tier
    2        d     2  middle tier
    3        a     4   lower tier
    4        e     5   lower tier
    """
    kind, cuts, names = _check_tier_options(rank, shares, thresholds, names)
    column = _RANK_COLUMN[rank]
    needed = ["customer", column, "own_history_weight"]
    missing = [c for c in needed if c not in customers.columns]
    if missing:
        fix = ("Rank by revenue after projecting revenue (project_revenue / the outlook command)"
               if column == "projected_revenue" else "Make the table with forecast_customers or project_revenue")
        raise OrderDataError("the customer table lacks columns needed for tiers", value=", ".join(missing), fix=fix)
    if len(customers) == 0:
        raise OrderDataError("there are no customers to put into tiers")
    figures = customers[column].to_numpy(dtype=np.float64)
    if not np.all(np.isfinite(figures)):
        raise OrderDataError("some customers have no figure to rank by", column=column)

    order = np.lexsort((customers["customer"].astype(str).to_numpy(), -figures))
    table = customers.iloc[order].reset_index(drop=True).copy()
    sorted_figures = figures[order]
    n = len(table)
    note = ""
    if kind == "shares" and sorted_figures[0] == sorted_figures[-1] and n > 1:
        figure = "expected next order" if rank == "value" else "projected revenue"
        note = (f"Every customer has the same {figure} ({_money(sorted_figures[0])}), so they cannot be ranked "
                "into tiers: all are in one.")
        names, boundaries, rules = (SAME_FIGURE_TIER,), [], ["the same figure for everyone"]
    elif kind == "shares":
        positions = [min(n, max(1, math.ceil(s * n - 1e-9))) for s in np.cumsum(cuts)]
        boundaries = [sorted_figures[p - 1] for p in positions]
        rules = []
        cumulative = 0.0
        for s in cuts:
            rules.append(f"top {100 * s:g}%" if cumulative == 0 else f"next {100 * s:g}%")
            cumulative += s
        if len(names) > len(cuts):
            rules.append("the rest")
        # Shares adding up to 1: the last boundary is the lowest figure, nobody falls below it.
    else:
        boundaries = list(cuts)
        rules = [f"{_money(cuts[0])} and above"]
        rules += [f"{_money(lo)} to under {_money(hi)}" for hi, lo in zip(cuts[:-1], cuts[1:])]
        rules.append(f"under {_money(cuts[-1])}")
    # Tier index = how many boundaries the figure falls below (boundaries go down).
    tier_index = np.zeros(n, dtype=np.int64)
    for boundary in boundaries:
        tier_index += sorted_figures < boundary
    tier_index = np.minimum(tier_index, len(names) - 1)
    ranks = pd.Series(-sorted_figures).rank(method="min").astype(np.int64).to_numpy()
    weight = table["own_history_weight"].to_numpy(dtype=np.float64)
    table.insert(1, "rank", ranks)
    table.insert(2, "tier", np.asarray(names, dtype=object)[tier_index])
    table.insert(3, "tier_rule", np.asarray(rules, dtype=object)[tier_index])
    table["mostly_shop_pattern"] = rests_on_shop(weight)
    table.attrs = {"tiers": [{"tier": t, "rule": r} for t, r in zip(names, rules)], "rank": rank,
                   "rank_column": column, "note": note}
    return table


def tier_summary(tiered: pd.DataFrame) -> pd.DataFrame:
    """One row per tier: size, figures, share of projected revenue, confidence.

    Parameters
    ----------
    tiered : pandas.DataFrame
        Output of :func:`assign_tiers`.

    Returns
    -------
    pandas.DataFrame
        Columns ``TIER_SUMMARY_COLUMNS``, tiers from the top (empty tiers
        included with zero customers). ``lowest_figure``/``highest_figure`` are
        the ranked figure's range in the tier; ``projected_revenue`` and its
        share are NaN when the table has no projected revenue;
        ``average_own_history_weight`` is the plain average of the customers'
        own-history weights; ``mostly_shop_pattern`` counts customers whose
        forecast rests mostly on the shop-wide pattern.
    """
    if "tier" not in tiered.columns or "tiers" not in tiered.attrs:
        raise OrderDataError("the table has no tiers yet", fix="Make it with assign_tiers")
    column = tiered.attrs["rank_column"]
    # Revenue that could not be projected (no order-frequency fit) is missing for every customer: no sum.
    has_revenue = "projected_revenue" in tiered.columns and bool(tiered["projected_revenue"].notna().any())
    total_revenue = float(tiered["projected_revenue"].sum()) if has_revenue else float("nan")
    rows = []
    n = len(tiered)
    for spec in tiered.attrs["tiers"]:
        part = tiered.loc[tiered["tier"] == spec["tier"]]
        revenue = float(part["projected_revenue"].sum()) if has_revenue else float("nan")
        rows.append(
            {
                "tier": spec["tier"],
                "rule": spec["rule"],
                "customers": int(len(part)),
                "share_of_customers": len(part) / n,
                "lowest_figure": float(part[column].min()) if len(part) else float("nan"),
                "highest_figure": float(part[column].max()) if len(part) else float("nan"),
                "projected_revenue": revenue,
                "share_of_projected_revenue": revenue / total_revenue if has_revenue and total_revenue > 0
                else float("nan"),
                "average_own_history_weight": float(part["own_history_weight"].mean()) if len(part)
                else float("nan"),
                "mostly_shop_pattern": int(part["mostly_shop_pattern"].sum()),
            }
        )
    return pd.DataFrame(rows, columns=TIER_SUMMARY_COLUMNS)


_EXPORT_COLUMNS = [
    "customer", "tier", "rank", "tier_rule", "orders", "last_order", "chance_active", "expected_next_order",
    "expected_low", "expected_high",
    "expected_orders", "projected_revenue", "projected_low", "projected_high",
    "revenue_range_low", "revenue_range_high", "own_history_weight", "low_confidence", "mostly_shop_pattern", "cohort",
]


def _slug(name: str) -> str:
    return re.sub(r"[^a-z0-9]+", "-", name.lower()).strip("-") or "tier"


def tier_lists(tiered: pd.DataFrame) -> dict:
    """The lists to hand out: ``{"all": table, <tier name>: table, ...}``, rounded for reading.

    Money figures are rounded to cents, weights and chances to three decimals.
    """
    if "tiers" not in tiered.attrs:
        raise OrderDataError("the table has no tiers yet", fix="Make it with assign_tiers")
    columns = [c for c in _EXPORT_COLUMNS if c in tiered.columns]
    table = rounded_for_reading(
        tiered[columns],
        money=("expected_next_order", "expected_low", "expected_high", "projected_revenue", "projected_low",
               "projected_high", "revenue_range_low", "revenue_range_high"),
        shares=("own_history_weight", "chance_active", "expected_orders"))
    if "last_order" in table.columns:
        # A list for people: the day of the last order, not the minute.
        table = table.assign(last_order=pd.to_datetime(table["last_order"]).dt.strftime("%Y-%m-%d"))
    lists = {"all": table}
    for spec in tiered.attrs["tiers"]:
        lists[spec["tier"]] = table.loc[table["tier"] == spec["tier"]]
    return lists


def tier_csv_texts(tiered: pd.DataFrame) -> dict:
    """The tier lists as formula-safe CSV text, in memory (for downloads that touch no disk)."""
    from .exports import csv_text

    return {name: csv_text(table) for name, table in tier_lists(tiered).items()}


def export_tiers(tiered: pd.DataFrame, path) -> dict:
    """Write all customers and each tier as CSV lists (formula-safe).

    Parameters
    ----------
    tiered : pandas.DataFrame
        Output of :func:`assign_tiers`.
    path : str or pathlib.Path
        The file for the whole list; each tier also gets its own file beside
        it, named ``<stem>-<tier>.csv`` (e.g. ``tiers-top-customers.csv``).

    Returns
    -------
    dict
        ``{"all": Path, <tier name>: Path, ...}``.

    Notes
    -----
    Written with :func:`forecasting.exports.write_csv`, which neutralises text
    that a spreadsheet would run as a formula; the lists are :func:`tier_lists`.
    """
    from .exports import write_csv

    path = Path(path)
    suffix = path.suffix or ".csv"
    written = {}
    for name, table in tier_lists(tiered).items():
        target = path if name == "all" else path.with_name(f"{path.stem}-{_slug(name)}{suffix}")
        written[name] = write_csv(table, target)
    return written


def _records(table: pd.DataFrame) -> list:
    """Rows as plain dicts of Python scalars (NaN -> None) for JSON."""
    out = []
    for row in table.to_dict(orient="records"):
        clean = {}
        for key, value in row.items():
            if isinstance(value, (np.bool_, bool)):
                clean[key] = bool(value)
            elif isinstance(value, (np.integer,)):
                clean[key] = int(value)
            elif isinstance(value, (float, np.floating)):
                clean[key] = None if not math.isfinite(float(value)) else float(value)
            else:
                clean[key] = value
        out.append(clean)
    return out
