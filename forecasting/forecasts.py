"""Forecasts: per-customer statistics in, one forecast row per customer out.

This is the one door every front end (command line, dashboard, evaluation) uses.
:func:`forecast_customers` fits the chosen spread model (:mod:`forecasting.variance`), the spread
between customers (REML, :func:`forecasting.estimators.base.fit_between`), runs the chosen
estimator (:mod:`forecasting.estimators`) and returns to money with two ranges per customer:

* ``expected_low`` / ``expected_high`` -- where the customer's true mean order value probably
  lies (``level``, default 90%);
* ``next_order_low`` / ``next_order_high`` -- where the value of their next single order probably
  falls (``next_level``, default 80%).

The return to money and both ranges are written once (:func:`money_forecast`) and used by the
fit on all orders and by its leave-one-out twin (:func:`forecast_left_out`), which the
evaluation calls for every held-out order at once.

The work is split in two: :func:`forecast_rule` fits the shop-wide numbers once on every
customer (a :class:`ForecastRule`: spread model, spread between customers, the estimator's
constants and centre), and :meth:`ForecastRule.forecasts` gives the rows of any part of the
customers from their own statistics -- all of them here, one partition at a time on a cluster
(:func:`forecasting.engines.dask_engine.forecast_on_cluster`).

The fitted shop-wide numbers (spread, amount of shrinkage, centre, notes, cautions, the tail
report) are kept in ``result.attrs["fit"]`` as a plain dict of floats and strings, so that a
front end can explain them.
"""

from __future__ import annotations

import contextvars
from collections import OrderedDict
from contextlib import contextmanager
from dataclasses import dataclass, replace
from statistics import NormalDist

import numpy as np
import pandas as pd
import pyarrow as pa

from forecasting.errors import OrderDataError
from forecasting.estimators.base import (Between, between_left_out, combine, error_variance, fit_between,
                                        rows_of)
from forecasting.exports import rounded_for_reading
from forecasting.options import DEFAULT_METHOD, DEFAULT_VARIANCE, OWN_SPREAD, caution_of, load
from forecasting.options import CHECK_CUSTOMERS, DEFAULT_CHOICE, check_sample, low_confidence
from forecasting.options import METHODS as METHOD_REGISTRY
from forecasting.shrinkage import METHODS, check_method, shrink
from forecasting.variance import (
    VARIANCE_MODELS,
    VarianceFit,
    check_variance_model,
    pooled_variance,
    spread_left_out,
    tail_report,
)

__all__ = ["FORECAST_COLUMNS", "METHODS", "VARIANCE_MODELS", "ForecastRule", "forecast_customers", "forecast_rule",
           "forecasts_for_reading",
           "money_forecast", "forecast_left_out"]

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



def _check_level(value, option):
    if not (isinstance(value, (int, float, np.floating)) and 0 < float(value) < 1):
        raise OrderDataError(f"{option} must be a fraction between 0 and 1", value=value, option=option,
                             fix="Use for example 0.9 for a 90% range")
    return float(value)


def _z(level):
    # Normal quantiles from the standard library (Wichura's AS 241, accurate to about 1e-16),
    # which spares the command line the start-up time of scipy.
    return NormalDist().inv_cdf(0.5 + level / 2.0)


# ---------------------------------------------------------------------------
# The return to money and the ranges, written once
# ---------------------------------------------------------------------------


class MoneyForecast:
    """Forecasts in money with both ranges, and what the shop's own check needs to judge them.

    ``check_centre``, ``check_estimate_var`` and ``check_order_var`` describe the next order on
    the log scale: log(next order) - check_centre has variance check_estimate_var (the
    forecast's own error) + check_order_var (one order's spread). ``next_log`` is the
    next-order range on the log scale, (centre, half-width), when it is symmetric there. The
    ranges in money (``expected_low``, ``expected_high``, ``next_low``, ``next_high``) are
    computed on first use: the shop's own check scores the next-order range on the log scale
    and never needs the expected-value range in money.
    """

    def __init__(self, expected, check_centre, check_estimate_var, check_order_var, *, expected_range, next_range,
                 next_log=None):
        self.expected = expected
        self.check_centre = check_centre
        self.check_estimate_var = check_estimate_var
        self.check_order_var = check_order_var
        self.next_log = next_log
        self._expected_range = expected_range
        self._next_range = next_range

    def _ranges(self, which):
        name = "_" + which + "_range"
        value = getattr(self, name)
        if callable(value):
            value = value()
            setattr(self, name, value)
        return value

    @property
    def expected_low(self):
        return self._ranges("expected")[0]

    @property
    def expected_high(self):
        return self._ranges("expected")[1]

    @property
    def next_low(self):
        return self._ranges("next")[0]

    @property
    def next_high(self):
        return self._ranges("next")[1]


def _lognormal_with(mean, variance, z):
    """The range mean-matched and variance-matched by a lognormal: (low, high, log median, log variance)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        spread = np.log1p(np.where(mean > 0, variance / (mean * mean), 0.0))
    centre = np.log(np.maximum(mean, np.finfo(float).tiny)) - spread / 2.0
    half = z * np.sqrt(spread)
    return np.exp(centre - half), np.exp(centre + half), centre, spread


def effective_between_variance(spread: VarianceFit, between: Between, *, sums):
    """tau2_eff = 2 (log E[exp(theta)] - E[theta]) for the customers' log locations theta.

    ``sums`` gives (sum w exp(l - C), sum w) with w = 1 / (tau2 + s) and
    C = sigma2 / (2 n) + excess / n^2, relative to the log scale's origin (see
    :func:`money_forecast`). For normal log locations this is tau2; for skewed ones (a gamma
    spread of customer means has a long left tail on the log scale) it is what makes the
    shop-wide forecast equal the mean of exp(theta). Never below 0 (Jensen).
    """
    weighted, total, origin = sums
    with np.errstate(divide="ignore", invalid="ignore"):
        value = 2.0 * (np.log(weighted / total) + origin - np.asarray(between.centre, dtype=np.float64))
    return np.maximum(np.where(np.isfinite(value), value, 0.0), 0.0)


def money_forecast(spread: VarianceFit, between: Between, estimate, weight, orders, own_mean, *, posterior,
                   level, next_level, effective_tau2=0.0, customers=None) -> MoneyForecast:
    """Money forecasts and both ranges from an estimate on the spread model's scale.

    Parameters
    ----------
    spread : VarianceFit
        The spread model (floats, or arrays over held-out orders).
    between : Between
        The spread between customers on the same scale.
    estimate, weight, orders, own_mean : array_like
        The estimate, its own-history weight g, the customer's number of orders n and their
        average (or average log value) m.
    posterior : bool
        The estimate is the empirical-Bayes posterior mean (Morris's allowance applies).
    customers : int
        The number of customers (for Morris's allowance).
    level, next_level : float
        Coverage of the expected-value range and of the next-order range.
    effective_tau2 : float or array
        tau2_eff of :func:`effective_between_variance` (the log model only).

    Returns
    -------
    MoneyForecast

    Notes
    -----
    The estimate's error variance is v = g^2 s + (1 - g)^2 (tau2 + var c) (with Morris's
    allowance for the posterior mean; :func:`forecasting.estimators.base.error_variance`):
    the within-customer spread where the forecast rests on the customer's orders, the spread
    between customers and the centre's uncertainty where it leans on the shop.

    Log model (estimate theta^ = c + g (l - c) of the log location theta = E[log x]): the true
    mean order value is exp(theta) S with S Duan's smearing factor
    (:func:`forecasting.variance.smearing_factor`). Over customers with the same n,
    E[exp(theta^)] = exp(c (1 - g)) E[exp(g theta)] E[exp(g e_n)], e_n the average of n log
    deviations, so the forecast

        S exp(theta^ + (1 - g^2) tau2_eff / 2 - g^2 sigma2 / (2 n) - g^3 excess / n^2)

    adds up to the customers' true spend: the middle term is the lognormal mean of the
    between-customer part with the effective variance of :func:`effective_between_variance`,
    the last two are n log E[exp(g e / n)] to third order, with the third cumulant taken from
    the smearing's excess over the lognormal value (excess = log S - sigma2 / 2), exact for
    n = 1 and for lognormal orders. Plain averages (g = 1) become exp(l) S^(1 - 1/n) to that
    order, unbiased for each customer; the shop-wide average (g = 0) becomes the mean of
    exp(theta) S. The expected range is S exp(theta^ +- z sqrt(v)); the next order's range is
    exp(theta^ +- z' sqrt(v + sigma2)), all of the next order's spread on the log scale.

    Money models (classic, proportional): the forecast is the estimate; the expected range is
    the lognormal with the same mean and variance v (so it stays positive; for the proportional
    model v grows with the square of the forecast, scaled by forecast^2 / M2). The next order
    is lognormal around the forecast with log-variance log(1 + v / L^2) plus the shop's pooled
    log spread of one order (``details["log_order_spread"]``), with L the forecast for the
    proportional model and the shop's centre for the classic one.
    """
    g = np.asarray(weight, dtype=np.float64)
    n = np.asarray(orders, dtype=np.float64)
    estimate = np.asarray(estimate, dtype=np.float64)
    s = spread.mean_variance(n)
    offset = np.asarray(own_mean, dtype=np.float64) - np.asarray(between.centre, dtype=np.float64)
    v = error_variance(g, s, between, offset, posterior=posterior, customers=customers)
    z, z_next = _z(level), _z(next_level)
    if spread.scale == "log":
        smearing = np.asarray(spread.details["smearing"], dtype=np.float64)
        excess = np.asarray(spread.details["excess"], dtype=np.float64)
        sigma2 = np.asarray(spread.sigma2, dtype=np.float64)
        g2 = g * g
        shift = (1.0 - g2) * np.asarray(effective_tau2, dtype=np.float64) / 2.0 - g2 * sigma2 / (2.0 * n) \
            - g2 * g * excess / (n * n)
        expected = smearing * np.exp(estimate + shift)
        half = z * np.sqrt(v)

        def expected_range():
            return (np.minimum(smearing * np.exp(estimate - half), expected),
                    np.maximum(smearing * np.exp(estimate + half), expected))

        # The central range of the next order is set by usual orders, in the customer's history as
        # in the next order: the one-order spread w (not the pooled sigma2) on both.
        one_order = np.asarray(spread.details["order_spread"], dtype=np.float64)
        v_next = error_variance(g, one_order / n, between)
        next_half = z_next * np.sqrt(v_next + one_order)
        centre = estimate + np.zeros_like(v)
        return MoneyForecast(expected, centre, v, sigma2 + np.zeros_like(v), expected_range=expected_range,
                             next_range=lambda: (np.exp(estimate - next_half), np.exp(estimate + next_half)),
                             next_log=(centre, next_half))
    expected = estimate
    if spread.model == "proportional":
        v = v * expected * expected / np.asarray(spread.details["mean_square_level"], dtype=np.float64)

    def expected_range():
        low, high, _, _ = _lognormal_with(expected, v, z)
        return np.minimum(low, expected), np.maximum(high, expected)

    # The next order: lognormal around the forecast, with the shop's log spread of one order and the
    # forecast's own uncertainty relative to the level it concerns: the customer's own for the
    # proportional model, the shop's centre for the classic one (whose v is one amount of money for
    # every customer with the same orders).
    if spread.model != "proportional":
        centre_money = np.asarray(between.centre, dtype=np.float64)
        v_log = np.log1p(v / np.maximum(centre_money * centre_money, np.finfo(float).tiny))
    else:
        with np.errstate(divide="ignore", invalid="ignore"):
            v_log = np.log1p(np.where(expected > 0, v / (expected * expected), 0.0))
    order_log = np.asarray(spread.details["log_order_spread"], dtype=np.float64)
    next_log = order_log + v_log
    centre = np.log(np.maximum(expected, np.finfo(float).tiny)) - next_log / 2.0
    half = z_next * np.sqrt(next_log)
    return MoneyForecast(expected, centre, v_log, order_log + np.zeros_like(v_log), expected_range=expected_range,
                         next_range=lambda: (np.exp(centre - half), np.exp(centre + half)), next_log=(centre, half))


def _gamma_forecast(params, n, m, estimate, *, level, next_level) -> MoneyForecast:
    """The Gamma-Gamma model's own posterior mean and ranges (see
    :func:`forecasting.estimators.gamma_gamma.gamma_gamma_ranges`)."""
    from forecasting.estimators.gamma_gamma import gamma_gamma_ranges

    p, q, gam = params["p"], params["q"], params["gamma"]
    low, high, next_low, next_high = gamma_gamma_ranges(params, n, m, level=level, next_level=next_level)
    shape = p * n + q
    rate = gam + n * m
    with np.errstate(divide="ignore", invalid="ignore"):
        posterior_var = p * p * rate * rate / ((shape - 1.0) ** 2 * (shape - 2.0))
        order_var = p * rate * rate / ((shape - 1.0) * (shape - 2.0))  # E[p / nu^2]
    finite = shape > 2.0
    with np.errstate(divide="ignore", invalid="ignore"):
        v_log = np.log1p(np.where(finite, posterior_var / estimate ** 2, np.inf))
        next_log = np.log1p(np.where(finite, (posterior_var + order_var) / estimate ** 2, np.inf))
        order_log = np.where(finite, next_log - v_log, np.inf)
    return MoneyForecast(estimate, np.log(estimate) - next_log / 2.0, v_log, order_log,
                         expected_range=(np.minimum(low, estimate), np.maximum(high, estimate)),
                         next_range=(next_low, next_high))


# ---------------------------------------------------------------------------
# The automatic choice
# ---------------------------------------------------------------------------


def _automatic_choice(fits, method, variance):
    """(method, variance, reason, spread models that passed) by :func:`forecasting.selection.resolve_choice`."""
    from forecasting.selection import resolve_choice  # the only module that imports both sides

    choice = resolve_choice(fits.stats, fits.orders, method=method, variance=variance, fits=fits)
    checked = choice.check.get("spread_checked") if choice.check is not None else None
    return choice.method, choice.variance, choice.reason, checked


# ---------------------------------------------------------------------------
# The one door
# ---------------------------------------------------------------------------


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


def _order_positions(stats, orders):
    """Position in ``stats`` of every order's customer."""
    codes, names = pd.factorize(orders["customer"], sort=True)
    if len(names) == len(stats) and np.array_equal(np.asarray(names, dtype=object),
                                                   stats.index.to_numpy(dtype=object)):
        return codes  # the usual case: stats = customer_statistics(orders), sorted the same way
    codes = stats.index.get_indexer(orders["customer"])
    if (codes < 0).any():
        raise OrderDataError(
            "the orders table has a customer that is missing from the customer statistics",
            column="customer", value=orders["customer"].to_numpy()[codes < 0][0],
            fix="Compute the statistics from the same orders table")
    return codes


def _segment_codes(stats):
    return pd.factorize(stats["segment"].astype("string").fillna(""), sort=True)[0]


def _own_spread_key(method: str, variance: str) -> str:
    """The spread model a method's fits are kept under: a method with its own model of spread
    (Gamma-Gamma) ignores the one it is given, so it is kept once, under ``OWN_SPREAD``."""
    entry = METHOD_REGISTRY.get(method)
    return OWN_SPREAD if entry is not None and entry.own_spread else variance


class ShopFits:
    """What every forecast of one table of per-customer statistics shares, each computed once.

    The spread models (:func:`forecasting.variance.pooled_variance`), the spread between
    customers on each model's scale (:func:`forecasting.estimators.base.fit_between`), the
    effective spread of the log locations, the cross-validated multipliers (with their folds),
    every order's customer position, the tail report, the parts of each method's forecast and
    the held-out bookkeeping of the leave-one-out (:func:`forecasting.holdout.held_out_orders`)
    are computed on first use and kept. Handing the same object to
    :func:`forecast_customers`, :func:`forecast_left_out` and the evaluation
    (:mod:`forecasting.evaluation`, :mod:`forecasting.selection`) makes each of them once
    per dataset, whatever the number of methods asked for.

    Parameters
    ----------
    stats : pandas.DataFrame
        :func:`forecasting.customers.customer_statistics` of ``orders``.
    orders : pandas.DataFrame, optional
        The cleaned orders (the cross-validated methods, the automatic choice, the tail
        report and the leave-one-out need them).
    codes : numpy.ndarray, optional
        Position in ``stats`` of every order's customer, when already known.

    Notes
    -----
    The object holds references to ``stats`` and ``orders``; neither may change while it is
    in use (nothing in the library changes them).
    """

    def __init__(self, stats: pd.DataFrame, orders: pd.DataFrame | None = None, *, codes=None):
        self.stats = stats
        self.orders = orders
        self.cache = {}
        if codes is not None:
            self.cache["codes"] = np.asarray(codes, dtype=np.int64)

    def cached(self, key, compute):
        """``compute()`` the first time ``key`` is asked for, the kept value afterwards."""
        if key not in self.cache:
            self.cache[key] = compute()
        return self.cache[key]

    def for_tables(self, stats, orders) -> "ShopFits":
        """These fits answering for equal tables (what was computed is shared, not copied)."""
        if stats is self.stats and (orders is None or orders is self.orders):
            return self
        twin = ShopFits(stats, orders if orders is not None else self.orders)
        twin.cache = self.cache
        return twin

    # -- per-customer arrays ---------------------------------------------------------------

    def column(self, name) -> np.ndarray:
        """A column of the statistics as float64 (kept: the table is read once per column)."""
        return self.cached(("column", name), lambda: self.stats[name].to_numpy(dtype=np.float64))

    @property
    def customers(self) -> int:
        return len(self.stats)

    def codes(self) -> np.ndarray:
        """Position in ``stats`` of every order's customer."""
        if self.orders is None:
            raise OrderDataError("this needs the order-level table", option="method",
                                 fix="Give the cleaned orders too, or choose a method that is not cross-validated")
        return self.cached("codes", lambda: _order_positions(self.stats, self.orders))

    def order_values(self, scale: str) -> np.ndarray:
        """Every order's value on the scale (``"log"`` or ``"money"``)."""
        def values():
            x = self.orders["order_value"].to_numpy(dtype=np.float64)
            return np.log(x) if scale == "log" else x

        return self.cached(("order values", scale), values)

    def segments(self):
        return self.cached("segments", lambda: _segment_codes(self.stats))

    # -- shop-wide fits --------------------------------------------------------------------

    def spread(self, model: str) -> VarianceFit:
        """The spread model fitted on all customers (money models carry the log spread of one order)."""
        return self.cached(("spread", model),
                           lambda: _with_log_order_spread(pooled_variance(self.stats, model=model), self))

    def between(self, model: str) -> Between:
        """The spread between customers on the spread model's scale (REML)."""
        def fit():
            spread = self.spread(model)
            working = self.column("log_mean" if spread.scale == "log" else "mean")
            return fit_between(working, spread.mean_variance(self.column("orders")))

        return self.cached(("between", model), fit)

    def effective_tau2(self, model: str):
        """tau2_eff of :func:`effective_between_variance` (the log model; 0 for the others)."""
        def fit():
            spread = self.spread(model)
            if spread.scale != "log":
                return 0.0
            between = self.between(model)
            return effective_between_variance(spread, between, sums=_log_location_sums(spread, between, self.stats))

        return self.cached(("effective", model), fit)

    def multiplier(self, method: str, scale: str):
        """(lambda, notes) a cross-validated method chooses on the orders at this scale."""
        from forecasting.estimators.cross_validation import CV_FOLDS, cross_validated_multiplier, cv_folds

        def choose():
            codes, values = self.codes(), self.order_values(scale)
            folds = None
            if values.size >= 2 * CV_FOLDS:  # (fewer orders: no cross-validation, no folds)
                folds = self.cached(("cv folds", scale), lambda: cv_folds(codes, values, self.customers))
            return cross_validated_multiplier(method, codes, values, self.customers, folds=folds)

        return self.cached(("multiplier", method, scale), choose)

    def tail(self, checked=None):
        """The tail report of the order values (:func:`forecasting.variance.tail_report`)."""
        key = ("tail", None if not checked else tuple(sorted(checked.items())))
        return self.cached(key, lambda: tail_report(self.orders["order_value"].to_numpy(dtype=np.float64),
                                                    checked=checked))

    def checked(self, limit=CHECK_CUSTOMERS) -> "ShopFits":
        """The shared fits of the shop the shop's own check runs on: these, or those of a sample
        shop of at most ``limit`` repeat customers (:func:`forecasting.options.check_sample`;
        None: always these). The sample's statistics are the rows of its customers, unchanged."""
        def make():
            kept = check_sample(self.column("orders"), limit) if self.orders is not None else None
            if kept is None:
                return self
            codes = self.codes()
            kept_orders = kept[codes]
            position = np.cumsum(kept) - 1
            return ShopFits(self.stats.iloc[np.flatnonzero(kept)], self.orders[kept_orders],
                            codes=position[codes[kept_orders]])

        return self.cached(("checked shop", limit), make)

    def held(self):
        """Every order of every repeat customer held out in turn (:func:`forecasting.holdout.held_out_orders`)."""
        from forecasting.holdout import held_out_orders

        if self.orders is None:
            raise OrderDataError("the leave-one-out needs the order-level table", option="method",
                                 fix="Give the cleaned orders, or choose a method")
        return self.cached("held", lambda: held_out_orders(self.orders, self.stats, codes=self.codes()))

    def rule(self, method: str, variance: str) -> "ForecastRule":
        """The method x spread model (never ``"auto"``) fitted on every customer (:class:`ForecastRule`)."""
        variance = _own_spread_key(method, variance)
        return self.cached(("rule", method, variance), lambda: _fit_rule(self, method, variance))

    def parts(self, method: str, variance: str, *, level=0.90, next_level=0.80) -> "ForecastParts":
        """The forecast of a method x spread model (never ``"auto"``), kept for each level."""
        variance = _own_spread_key(method, variance)
        return self.cached(("parts", method, variance, float(level), float(next_level)),
                           lambda: _forecast_parts(self, method, variance, level=level, next_level=next_level))


class FitsRegistry:
    """Shared fits kept for the statistics tables a piece of work meets, found again by content.

    A front end's :class:`forecasting.shop.Shop` keeps one and makes it current while it works
    (:func:`reusing_fits`): a library function that builds statistics of its own -- the revenue
    outlook's backtests fit on the orders before a cut-off, two of them on the same cut-off when
    the outlook is checked once and at many cut-offs -- then finds the fits (and the automatic
    choice made with them) computed the first time instead of computing them again.

    Parameters
    ----------
    size : int
        How many tables are kept (the least recently used goes first).

    Notes
    -----
    A table is known by a hash of every value of the statistics (index included) and of the
    orders' values, their customers and their number, so only identical inputs share fits.
    """

    def __init__(self, size: int = 6):
        self.size = size
        self._kept = OrderedDict()

    def fits_for(self, stats: pd.DataFrame, orders: pd.DataFrame | None) -> ShopFits:
        key = _fingerprint(stats, orders)
        found = self._kept.get(key)
        if found is None:
            found = ShopFits(stats, orders)
            self._kept[key] = found
            while len(self._kept) > self.size:
                self._kept.popitem(last=False)
        else:
            self._kept.move_to_end(key)
            # The same content in new tables: the fits answer for them (their values are equal).
            found = found.for_tables(stats, orders)
        return found

    def __len__(self):
        return len(self._kept)


_CURRENT_FITS = contextvars.ContextVar("forecasting_current_fits", default=None)


@contextmanager
def reusing_fits(registry: FitsRegistry):
    """Make ``registry`` current: :func:`forecast_customers` called without ``fits`` looks there."""
    token = _CURRENT_FITS.set(registry)
    try:
        yield registry
    finally:
        _CURRENT_FITS.reset(token)


def _fingerprint(stats, orders):
    import hashlib

    digest = hashlib.blake2b(digest_size=16)
    digest.update(pd.util.hash_pandas_object(stats, index=True).to_numpy().tobytes())
    if orders is not None:
        digest.update(np.int64(len(orders)).tobytes())
        digest.update(orders["order_value"].to_numpy(dtype=np.float64).tobytes())
        digest.update(pd.util.hash_array(orders["customer"].to_numpy(dtype=object)).tobytes())
    return digest.hexdigest()


def shop_fits(stats, orders=None, fits=None) -> ShopFits:
    """``fits`` when it belongs to ``stats`` (and ``orders``), else the current registry's
    (:func:`reusing_fits`), else new ones."""
    if fits is None:
        registry = _CURRENT_FITS.get()
        return registry.fits_for(stats, orders) if registry is not None else ShopFits(stats, orders)
    if fits.stats is not stats:
        raise ValueError("the shared fits belong to another table of customer statistics")
    if orders is not None and fits.orders is not None and fits.orders is not orders:
        raise ValueError("the shared fits belong to another orders table")
    if orders is not None and fits.orders is None:
        fits.orders = orders
    return fits


#: How a rule gets a customer's estimate from their own statistics (see ForecastRule.pull).
PULL_OWN, PULL_BY_ORDERS, PULL_BY_CUSTOMER = "own average", "by orders", "by customer"


@dataclass(frozen=True)
class ForecastRule:
    """A method x spread model fitted on the whole shop, and how it forecasts any of its customers.

    Made once from every customer's statistics (:meth:`ShopFits.rule`): the shop-wide numbers
    (spread model, the spread between customers, the estimator's constants and centre, the
    effective spread of the log locations, the number of customers). :meth:`forecasts` then
    gives the forecast rows of any subset of those customers -- all of them
    (:func:`forecast_customers`) or one partition of a cluster
    (:func:`forecasting.engines.dask_engine.forecast_on_cluster`) -- from their own rows
    only, so the rows of a partition equal those of the whole table.

    Attributes
    ----------
    method, variance : str
        The method and the spread reported (``"gamma-model"`` for gamma-gamma).
    spread : VarianceFit
    between : Between
    effective : float
        tau2_eff of :func:`effective_between_variance` (0 off the log scale).
    customers : int
        The number of customers the rule was fitted on (Morris's allowance).
    centre : float
        The shop-wide value estimates are pulled toward, on the spread model's scale.
    params : dict
        The estimator's fitted scalars.
    notes : tuple of str
    pull : str
        ``"own average"``: every estimate is the customer's own average (g = 1);
        ``"by orders"``: g depends on the customer only through their number of orders and the
        estimate is centre + g (average - centre) -- James-Stein, multi-task averaging, its
        cautious version, empirical Bayes, the shop-wide average and the Gamma-Gamma posterior
        mean all have this form, since s_t = f / n_t; ``"by customer"``: anything else (MTA
        within segments solves the customers of every segment together), the estimates and
        weights of the whole fit are kept per customer.
    counts : numpy.ndarray or None
        The distinct numbers of orders (``"by orders"``), sorted.
    weights : numpy.ndarray or None
        The estimator's own-history weight per distinct count (``"by orders"``) or per customer.
    estimates : numpy.ndarray or None
        Per customer (``"by customer"``).

    Notes
    -----
    The pull is read off the estimator's own result on all customers and kept only when it
    gives back that result to the last bit (:meth:`ShopFits.rule`), so a forecast made by the
    rule equals the estimator's.
    """

    method: str
    variance: str
    spread: VarianceFit
    between: Between
    effective: float
    customers: int
    centre: float
    params: dict
    notes: tuple
    pull: str
    counts: np.ndarray | None = None
    weights: np.ndarray | None = None
    estimates: np.ndarray | None = None

    def for_customers(self, positions) -> "ForecastRule":
        """The rule for the customers at ``positions`` of the table it was fitted on, in that order
        (only a ``"by customer"`` rule keeps anything per customer)."""
        if self.pull != PULL_BY_CUSTOMER:
            return self
        positions = np.asarray(positions, dtype=np.int64)
        return replace(self, weights=self.weights[positions], estimates=self.estimates[positions])

    def shrunk(self, orders, working):
        """(estimate, own-history weight before clipping) of customers with these numbers of orders
        and averages on the spread model's scale."""
        working = np.asarray(working, dtype=np.float64)
        if self.pull == PULL_OWN:
            return working.copy(), np.ones_like(working)
        if self.pull == PULL_BY_CUSTOMER:
            if len(self.estimates) != len(working):
                raise ValueError("this rule is for other customers: take for_customers(positions) first")
            return self.estimates.copy(), self.weights.copy()
        orders = np.asarray(orders, dtype=np.float64)
        where = orders.astype(np.int64)
        top = int(self.counts[-1])
        known = np.zeros(top + 2, dtype=bool)
        known[self.counts] = True
        # A table indexed by the number of orders (no search); a count outside it reads "unknown".
        if not np.all(known[np.clip(where, 0, top + 1)] & (where == orders)):
            raise ValueError("a customer has a number of orders that no customer of the fitted shop has")
        by_count = np.zeros(top + 1)
        by_count[self.counts] = self.weights
        weight = by_count[where]
        return combine(working, weight, self.centre), weight

    def money(self, orders, mean, log_mean, *, level, next_level) -> tuple[np.ndarray, MoneyForecast]:
        """(own-history weight in [0, 1], money forecasts) of customers with these numbers of orders,
        average order values and average log values."""
        n = np.asarray(orders, dtype=np.float64)
        money_mean = np.asarray(mean, dtype=np.float64)
        working = np.asarray(log_mean, dtype=np.float64) if self.spread.scale == "log" else money_mean
        estimate, weight = self.shrunk(n, working)
        weight = np.clip(weight, 0.0, 1.0)
        if self.variance == OWN_SPREAD and "population_mean" in self.params:
            return weight, _gamma_forecast(self.params, n, money_mean, estimate, level=level, next_level=next_level)
        return weight, money_forecast(self.spread, self.between, estimate, weight, n, working,
                                      posterior=self.method == "empirical-bayes", level=level,
                                      next_level=next_level, effective_tau2=self.effective,
                                      customers=self.customers)

    def forecasts(self, stats: pd.DataFrame, *, level=0.90, next_level=0.80) -> pd.DataFrame:
        """The forecast rows (``FORECAST_COLUMNS``) of the customers of ``stats``, in its order."""
        n = stats["orders"].to_numpy(dtype=np.int64)
        money_mean = stats["mean"].to_numpy(dtype=np.float64)
        weight, money = self.money(n, money_mean, stats["log_mean"].to_numpy(dtype=np.float64), level=level,
                                   next_level=next_level)
        return pd.DataFrame({
            # A copy of the index's array (Arrow text is shared until written to): no round trip
            # through Python objects, and the table can be edited without touching the statistics.
            "customer": stats.index.array.copy(),
            "orders": n.copy(),
            "average_order_value": money_mean.copy(),
            "expected_next_order": money.expected,
            "own_history_weight": weight,
            "expected_low": money.expected_low,
            "expected_high": money.expected_high,
            "next_order_low": money.next_low,
            "next_order_high": money.next_high,
            "low_confidence": low_confidence(weight),
            "method": _repeated_text(self.method, len(n)),
            "variance": _repeated_text(self.variance, len(n)),
        }, columns=FORECAST_COLUMNS, copy=False)  # the arrays are the table's own: no copy into one block

    def report(self, *, level, next_level) -> dict:
        """The fitted scalars a front end explains (``attrs["fit"]`` without the automatic choice, the
        tail report and the notes)."""
        spread, on_log = self.spread, self.spread.scale == "log"
        centre = float(self.centre)
        fit = {
            "method": self.method,
            "variance": self.variance,
            "customers": float(self.customers),
            "level": level,
            "next_level": next_level,
            "sigma2": float(spread.sigma2),
            "sigma2_scale": {"classic": "money squared", "log": "log value",
                             "proportional": "squared coefficient of variation"}[spread.model],
            "tau2": float(self.between.tau2),
            "centre": float(np.exp(centre) * spread.details["smearing"]) if on_log else centre,
            "caution": caution_of(self.method, self.variance),
        }
        # The log spread of one order that the next-order range uses (the outlook splits the range with it).
        fit["sigma2_log"] = float(spread.details["order_spread"] if on_log else spread.details["log_order_spread"])
        if on_log:
            fit.update({"centre_log": centre, "smearing": float(spread.details["smearing"]),
                        "tau2_effective": float(self.effective)})
        fit.update(_flat("", {key: value for key, value in self.params.items() if key != "tau2"}))
        fit.update(_flat("variance_", {key: value for key, value in spread.details.items()
                                       if key not in ("smearing", "log_order_spread")}))
        return fit


def _fit_rule(fits: ShopFits, method, variance) -> ForecastRule:
    """The estimator named ``method`` run on every customer, kept as a :class:`ForecastRule`."""
    entry = METHOD_REGISTRY[method]
    stats = fits.stats
    if entry.needs_orders and fits.orders is None:
        raise OrderDataError(f"the '{method}' method needs the order-level table", option="method",
                             fix="Give the cleaned orders too, or choose a method that is not cross-validated")
    if entry.needs_segments and "segment" not in stats.columns:
        raise OrderDataError("the 'mta-segments' method needs a segment for every customer", role="segment",
                             fix="Name the column that holds each customer's segment, or choose another method")
    n_float = fits.column("orders")
    spread_name = "classic" if entry.own_spread else (variance if variance != "auto" else DEFAULT_CHOICE[1])
    spread = fits.spread(spread_name)
    on_log = spread.scale == "log"
    working = fits.column("log_mean") if on_log else fits.column("mean")

    keywords, notes = {}, []
    if entry.needs_orders:
        scale = "log" if on_log else "money"
        multiplier, cv_notes = fits.multiplier(method, scale)
        keywords = {"codes": fits.codes(), "values": fits.order_values(scale), "multiplier": multiplier}
        notes.extend(cv_notes)
    segments = fits.segments() if entry.needs_segments else None

    between = fits.between(spread_name)
    result = shrink(working, spread.mean_variance(n_float), method=method, orders=n_float, segments=segments,
                    between=between, **keywords)
    notes = list(spread.notes) + list(between.notes) + notes + list(result.notes)
    effective = fits.effective_tau2(spread_name) if on_log else 0.0
    g = np.asarray(result.weight, dtype=np.float64)
    pull = {"pull": PULL_BY_CUSTOMER, "weights": g, "estimates": np.asarray(result.estimate, dtype=np.float64)}
    if np.all(g == 1.0) and np.array_equal(result.estimate, working):
        pull = {"pull": PULL_OWN}
    else:
        # g as a table indexed by the number of orders (any customer's value; the check below
        # holds only if every customer with that count has it).
        n_int = n_float.astype(np.int64)
        by_count = np.zeros(int(n_int.max()) + 1)
        by_count[n_int] = g
        seen = np.zeros(by_count.size, dtype=bool)
        seen[n_int] = True
        weight = by_count[n_int]
        if np.array_equal(g, weight) and np.array_equal(result.estimate, combine(working, weight, result.centre)):
            counts = np.flatnonzero(seen)
            pull = {"pull": PULL_BY_ORDERS, "counts": counts, "weights": by_count[counts]}
    return ForecastRule(method, OWN_SPREAD if entry.own_spread else spread_name, spread, between, float(effective),
                        len(stats), float(result.centre), dict(result.params), tuple(notes), **pull)


@dataclass
class ForecastParts:
    """A method x spread model's forecast of every customer before it becomes a table."""

    rule: ForecastRule
    weight: np.ndarray  # own-history weight in [0, 1]
    money: MoneyForecast


def _forecast_parts(fits: ShopFits, method, variance, *, level, next_level) -> ForecastParts:
    rule = fits.rule(method, variance)
    weight, money = rule.money(fits.column("orders"), fits.column("mean"), fits.column("log_mean"), level=level,
                               next_level=next_level)
    return ForecastParts(rule, weight, money)


def forecast_customers(stats: pd.DataFrame, *, method: str = DEFAULT_METHOD, variance: str = DEFAULT_VARIANCE,
                       orders: pd.DataFrame | None = None, level: float = 0.90, next_level: float = 0.80,
                       fits: ShopFits | None = None) -> pd.DataFrame:
    """Expected next-order value, with ranges, for every customer.

    Parameters
    ----------
    stats : pandas.DataFrame
        From :func:`forecasting.customers.customer_statistics` (a ``segment`` column is
        needed for ``"mta-segments"``).
    method : str, default "auto"
        One of ``METHODS`` or ``"auto"``: the method the shop's own check
        (:mod:`forecasting.selection`) finds best among those whose forecasts add up to the
        money and whose ranges hold what they say.
    variance : str, default "auto"
        One of ``VARIANCE_MODELS`` or ``"auto"`` (chosen by the same check); ignored by
        ``"gamma-gamma"``, which has its own spread (reported as ``"gamma-model"``).
    orders : pandas.DataFrame, optional
        The cleaned orders the statistics came from; needed by the cross-validated methods and
        by the automatic choice (without them it uses empirical Bayes with the log spread
        model), and used for the tail report.
    level : float, default 0.90
        Coverage of ``expected_low`` / ``expected_high``.
    next_level : float, default 0.80
        Coverage of ``next_order_low`` / ``next_order_high``.
    fits : ShopFits, optional
        The fits shared by every forecast of ``stats`` (spread models, the spread between
        customers, cross-validated multipliers, the shop's own check...); made afresh when not
        given. Forecasts of several methods of one shop reuse them (see
        :class:`forecasting.shop.Shop`).

    Returns
    -------
    pandas.DataFrame
        One row per customer in the order of ``stats``, columns ``FORECAST_COLUMNS``;
        ``attrs["fit"]`` holds the fitted scalars, notes and the caution of the chosen
        method and spread model (empty when there is none).

    Notes
    -----
    The estimator runs on each customer's average (average log value for the log model) with
    s_t from the spread model; :func:`money_forecast` returns to money and gives both ranges.
    ``low_confidence`` is True when the own-history weight is below
    :data:`forecasting.options.LOW_CONFIDENCE_WEIGHT` (the forecast rests mostly on similar customers).

    Examples
    --------
    >>> import pandas as pd
    >>> from forecasting.customers import customer_statistics
    >>> orders = pd.DataFrame({
    ...     "customer": ["fern", "fern", "ivy", "ivy", "ivy", "moss"],
    ...     "order_value": [24.0, 36.0, 80.0, 64.0, 72.0, 15.0],
    ...     "order_date": pd.to_datetime(["2025-03-01", "2025-04-02", "2025-03-05",
    ...                                   "2025-05-01", "2025-06-01", "2025-06-03"])})
    >>> table = forecast_customers(customer_statistics(orders), method="mta", variance="log")
    >>> table[["customer", "orders", "average_order_value", "own_history_weight", "low_confidence"]].round(3)
      customer  orders  average_order_value  own_history_weight  low_confidence
    0     fern       2                 30.0               0.972           False
    1      ivy       3                 72.0               0.981           False
    2     moss       1                 15.0               0.945           False
    """
    rule, fit = forecast_rule(stats, method=method, variance=variance, orders=orders, level=level,
                              next_level=next_level, fits=fits)
    table = rule.forecasts(stats, level=fit["level"], next_level=fit["next_level"])
    table.attrs["fit"] = fit
    return table


def forecast_rule(stats: pd.DataFrame, *, method: str = DEFAULT_METHOD, variance: str = DEFAULT_VARIANCE,
                  orders: pd.DataFrame | None = None, level: float = 0.90, next_level: float = 0.80,
                  fits: ShopFits | None = None) -> tuple[ForecastRule, dict]:
    """The shop-wide half of :func:`forecast_customers`: the rule and the report, no rows.

    Parameters are those of :func:`forecast_customers`. Returns the :class:`ForecastRule` of the
    method and spread model (``"auto"`` resolved) fitted on every customer of ``stats``, and
    the dict that :func:`forecast_customers` keeps in ``attrs["fit"]``. ``rule.forecasts(part,
    level=..., next_level=...)`` then gives the rows of any part of ``stats``.
    """
    if method != "auto":
        check_method(method)
    if variance != "auto" and variance != OWN_SPREAD:
        check_variance_model(variance)
    level = _check_level(level, "level")
    next_level = _check_level(next_level, "next_level")
    if len(stats) == 0:
        raise OrderDataError("there are no customers to forecast", fix="Check that the file has order rows")
    fits = shop_fits(stats, orders, fits)
    orders = fits.orders
    fit = {}
    checked = None
    if method == "auto" or (variance == "auto" and not METHOD_REGISTRY[method].own_spread):
        method, variance, reason, checked = _automatic_choice(fits, method, variance)
        fit["auto_choice"] = f"{method} with {variance} variance: {reason}"
    rule = fits.rule(method, variance)
    fit.update(rule.report(level=level, next_level=next_level))
    if orders is not None:
        # With the shop's own check at hand, the report suggests only a spread model that passed it.
        tail = fits.tail(checked)
        fit.update({"tail_top1_revenue_share": tail.top1_revenue_share, "tail_log_skewness": tail.log_skewness,
                    "tail_index": tail.tail_index, "tail_orders": float(tail.tail_orders),
                    "tail_suggested_variance": tail.suggested_variance, "tail_summary": tail.summary})
    else:
        fit["tail_summary"] = "Order-level values were not given, so the size of big orders was not described."
    fit["notes"] = " ".join(dict.fromkeys(rule.notes))
    return rule, fit


def _with_log_order_spread(spread, fits):
    """A money spread model with the shop's pooled log spread of one order (for the next-order range)."""
    if spread.scale == "log":
        return spread
    log = fits.spread("log") if isinstance(fits, ShopFits) else pooled_variance(fits, model="log")
    return VarianceFit(spread.model, spread.sigma2, spread.notes, {**spread.details, "log_order_spread": log.sigma2})


def _log_location_sums(spread, between, stats):
    """(sum w exp(l - origin - C), sum w, origin) over all customers (see effective_between_variance)."""
    n = stats["orders"].to_numpy(dtype=np.float64)
    l = stats["log_mean"].to_numpy(dtype=np.float64)
    origin = float(np.mean(l))
    total = between.tau2 + spread.mean_variance(n)
    # No spread at all (every order alike): the customers count alike.
    w = 1.0 / np.where(total > 0, total, 1.0)
    correction = spread.sigma2 / (2.0 * n) + spread.details["excess"] / (n * n)
    return float(w @ np.exp(l - origin - correction)), float(np.sum(w)), origin


# ---------------------------------------------------------------------------
# The leave-one-out twin of forecast_customers
# ---------------------------------------------------------------------------


def forecast_left_out(held, method, variance, *, level=0.90, next_level=0.80, fits=None) -> MoneyForecast:
    """:func:`forecast_customers` refitted without each held-out order, for all of them at once.

    Parameters
    ----------
    held : forecasting.holdout.HeldOut
    method, variance : str
        A method and spread model (``"gamma-model"`` for gamma-gamma).
    fits : ShopFits, optional
        The fits on all orders (where each removal's solve starts, and what an approximate twin
        keeps); made once per ``held`` when not given.

    Returns
    -------
    MoneyForecast
        One entry per held-out order: the forecast of that order's customer from their other
        orders, with the spread model, the spread between customers, the amount of shrinkage,
        the centre and the return to money all refitted without it. Methods whose registry
        entry says ``exact_left_out=False`` keep what ``left_out_keeps`` says from the fit on
        all orders.
    """
    entry = METHOD_REGISTRY[method]
    if fits is None:
        fits = held.cached("fits", lambda: ShopFits(held.stats, held.orders, codes=held.codes))
    fitted = {}
    if not entry.exact_left_out:
        fitted = fits.rule(method, "classic" if variance == OWN_SPREAD else variance).params
    if entry.own_spread:
        spread = spread_left_out(held, "classic")
        if "population_mean" in fitted:
            side = held.money
            d, g = load(entry.left_out)(side, spread.scale_factor, fitted=fitted)
            return _gamma_forecast(fitted, side.n_after, side.mean_after, side.origin + d, level=level,
                                   next_level=next_level)
        method_for_rest, posterior = "plain", False
    else:
        spread = spread_left_out(held, variance)
        method_for_rest, posterior = method, method == "empirical-bayes"
    if spread.scale != "log":
        spread = VarianceFit(spread.model, spread.sigma2, spread.notes,
                             {**spread.details, "log_order_spread": spread_left_out(held, "log").sigma2})
    side = held.side(spread.scale)
    factor = np.asarray(spread.scale_factor, dtype=np.float64) + np.zeros(side.H)
    between = held.cached(("between", spread.model),
                          lambda: between_left_out(side, factor, start=float(fits.between(spread.model).tau2)))
    twin = load(METHOD_REGISTRY[method_for_rest].left_out)
    d, g = twin(side, factor, between=between, segments=held.segment_codes, fitted=fitted)
    effective = 0.0
    if spread.scale == "log":
        effective = held.cached(("effective", spread.model),
                                lambda: effective_between_variance(spread, between,
                                                                   sums=_log_location_sums_left_out(held, spread,
                                                                                                    between)))
    return money_forecast(spread, between, side.origin + d, np.clip(g, 0.0, 1.0), side.n_after, side.mean_after,
                          posterior=posterior, level=level, next_level=next_level, effective_tau2=effective,
                          customers=side.T)


def _log_location_sums_left_out(held, spread, between):
    """The twin of :func:`_log_location_sums` after each removal (sums over order-count groups)."""
    log = held.log
    if "exp" not in log._group_sums:
        log.add_column("exp", np.exp(log.d), np.exp(log.d_before), np.exp(log.d_after))
    tau2 = np.asarray(between.tau2, dtype=np.float64) + np.zeros(log.H)
    factor = np.asarray(spread.scale_factor, dtype=np.float64) + np.zeros(log.H)
    sigma2 = np.asarray(spread.sigma2, dtype=np.float64) + np.zeros(log.H)
    excess = np.asarray(spread.details["excess"], dtype=np.float64) + np.zeros(log.H)

    def precision(k, rows):
        total = rows_of(tau2, rows, k) + rows_of(factor, rows, k) / k
        return 1.0 / np.where(total > 0, total, 1.0)  # no spread at all: the customers count alike

    def weight(k, rows):
        correction = rows_of(sigma2, rows, k) / (2.0 * k) + rows_of(excess, rows, k) / (k * k)
        return precision(k, rows) * np.exp(-correction)

    (weighted,) = log.sums_after(weight, ["exp"])
    (total,) = log.sums_after(precision, ["one"])
    return weighted, total, log.origin


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
