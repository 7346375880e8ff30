"""One shop's orders and everything computed from them, each stage once, on first use.

In: a cleaned orders table (or a file to read), or only per-customer statistics (the scale
engines). Out: a :class:`Shop` whose methods give the stages of the data's journey::

    orders -> statistics -> shared fits -> forecasts  -> evaluation (leave-one-out, backtest)
                                                      -> outlook (revenue ahead, its backtests, tiers)

Each stage is computed the first time it is asked for and kept; every later stage asks the
earlier ones instead of computing them again. The per-customer statistics are made once; the
spread models, the spread between customers, the cross-validated multipliers, the held-out
bookkeeping and every method x spread model's leave-one-out are made once per dataset
(:class:`forecasting.forecasts.ShopFits`) and shared by the forecasts, the automatic choice and
the evaluation; the outlook is handed the forecasts in use instead of making its own; and a
backtest that fits on the orders before a cut-off finds, on that cut-off's second visit, what
the first one computed (:class:`forecasting.forecasts.FitsRegistry`).

The command line calls it for every command, and so can the dashboard: one ``Shop`` per
loaded dataset, its methods called as pages need them (see :class:`Shop` for the list). Results
are shared, not copied: treat every returned table as read-only.

Examples
--------
>>> import pandas as pd
>>> orders = pd.DataFrame({
...     "customer": ["fern", "fern", "ivy", "ivy", "ivy", "moss", "moss"],
...     "order_value": [24.0, 36.0, 80.0, 64.0, 72.0, 15.0, 19.0],
...     "order_date": pd.to_datetime(["2025-03-01", "2025-04-02", "2025-03-05", "2025-05-01",
...                                   "2025-06-01", "2025-06-03", "2025-06-20"])})
>>> shop = Shop(orders)
>>> table = shop.forecasts("mta", "log")
>>> table["customer"].tolist()
['fern', 'ivy', 'moss']
>>> shop.forecasts("mta", "log") is table  # computed once
True
>>> shop.evaluation(methods="plain,mta", variances="log", bootstrap=0).held_out
7
"""

from __future__ import annotations

import threading

import pandas as pd

from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError
from forecasting.forecasts import FitsRegistry, ShopFits, forecast_customers, reusing_fits
from forecasting.options import CHECK_CUSTOMERS, DEFAULT_METHOD, DEFAULT_SEASONS, DEFAULT_VARIANCE, OWN_SPREAD

__all__ = ["Shop"]


def _key(value):
    """A hashable form of an option (lists of names become tuples)."""
    if isinstance(value, list):
        return tuple(value)
    if isinstance(value, dict):
        return tuple(sorted((k, _key(v)) for k, v in value.items()))
    return value


class Shop:
    """A shop's orders and every stage computed from them, each once, on first use.

    Parameters
    ----------
    orders : pandas.DataFrame, optional
        Cleaned orders (``customer``, ``order_value``, ``order_date``, optionally ``segment``),
        as :func:`forecasting.reading.read_orders` gives them. Not changed.
    statistics : pandas.DataFrame, optional
        :func:`forecasting.customers.customer_statistics` of ``orders`` when already made, or
        the statistics alone (a scale engine's: then only :meth:`forecasts` is offered, with
        ``"auto"`` meaning :data:`forecasting.options.DEFAULT_CHOICE`).
    account : dict, optional
        The row account of the reading (``ReadResult.audit()``), kept for the front ends.
    read : forecasting.reading.ReadResult, optional
        The whole result of the reading (its excluded and noted rows).

    Notes
    -----
    What a front end needs, and the one call for each:

    ==================================  =====================================================
    per-customer statistics             :attr:`statistics`
    the method and spread model "auto"  :meth:`choice` (the shop's own check; the accuracy
    settles                             check's answer when it ran first)
    forecasts with their ranges         :meth:`forecasts`
    the accuracy check                  :meth:`evaluation`
    how heavy the tail of big orders is :meth:`tail`
    revenue ahead                       :meth:`outlook`
    the outlook checked at a cut-off    :meth:`outlook_backtest`
    ... and at many cut-offs            :meth:`rolling_backtest`
    value tiers                         :meth:`tiers`
    ==================================  =====================================================

    Every method keeps its answer for its arguments; asking again returns the same object.
    Methods may be called from several threads (each answer is computed once under a lock).
    """

    def __init__(self, orders: pd.DataFrame | None = None, *, statistics: pd.DataFrame | None = None,
                 account: dict | None = None, read=None):
        if orders is None and statistics is None:
            raise ValueError("a shop needs its orders or its customer statistics")
        self.orders = orders
        self.account = account
        self.read_result = read
        self._statistics = statistics
        self._fits = None
        self._answers = {}
        self._lock = threading.RLock()
        self.registry = FitsRegistry()

    # -- making one ------------------------------------------------------------------------

    @classmethod
    def from_read(cls, result) -> "Shop":
        """A shop from :func:`forecasting.reading.read_orders`' result (orders and row account)."""
        return cls(result.orders, account=result.audit(), read=result)

    @classmethod
    def read(cls, source, **options) -> "Shop":
        """Read and clean an export (:func:`forecasting.reading.read_orders` with ``options``)."""
        from forecasting.reading import read_orders

        return cls.from_read(read_orders(source, **options))

    # -- the stages ------------------------------------------------------------------------

    def _once(self, key, compute):
        with self._lock:
            if key not in self._answers:
                with reusing_fits(self.registry):
                    self._answers[key] = compute()
            return self._answers[key]

    @property
    def statistics(self) -> pd.DataFrame:
        """Per-customer statistics (:func:`forecasting.customers.customer_statistics`), made once."""
        with self._lock:
            if self._statistics is None:
                self._statistics = customer_statistics(self.orders)
            return self._statistics

    @property
    def fits(self) -> ShopFits:
        """The fits every forecast and check of this shop shares (:class:`forecasting.forecasts.ShopFits`)."""
        with self._lock:
            if self._fits is None:
                self._fits = ShopFits(self.statistics, self.orders)
            return self._fits

    def _needs_orders(self, what):
        if self.orders is None:
            raise OrderDataError(f"{what} needs every order, not only the per-customer sums", option="engine",
                                 fix="Read the file with the pandas engine")

    def choice(self, method: str = DEFAULT_METHOD, variance: str = DEFAULT_VARIANCE):
        """The method and spread model to forecast with, ``"auto"`` settled by the shop's own check.

        Returns
        -------
        forecasting.selection.Choice
            As :func:`forecasting.selection.resolve_choice` (kept with the shared fits, so the
            forecasts use the same). When the accuracy check with its defaults
            (:meth:`evaluation`) has run, its choice is taken: it is the same choice, and its
            split-half check need not run again.
        """
        def settle():
            from forecasting.selection import resolve_choice  # loads the evaluator: only when a choice is settled

            checked = None
            if method == "auto" and variance == "auto":
                for key, found in list(self._answers.items()):
                    # methods, variances, customers checked, seed and levels as the automatic choice's
                    if key[0] == "evaluation" and key[1:4] == (None, None, CHECK_CUSTOMERS) and key[6:] == (0, 0.9,
                                                                                                           0.8):
                        checked = found.chosen
                        break
            return resolve_choice(self.statistics, self.orders, method=method, variance=variance, checked=checked,
                                  fits=self.fits)

        return self._once(("choice", method, variance), settle)

    def forecasts(self, method: str = DEFAULT_METHOD, variance: str = DEFAULT_VARIANCE, *, level: float = 0.90,
                  next_level: float = 0.80) -> pd.DataFrame:
        """One row per customer: the expected next order and its ranges
        (:func:`forecasting.forecasts.forecast_customers`), ``"auto"`` settled by :meth:`choice`."""
        def make():
            if self._asks_for_choice(method, variance):
                self.choice(method, variance)  # settled once, kept with the fits the forecasts use
            return forecast_customers(self.statistics, method=method, variance=variance, orders=self.orders,
                                      level=level, next_level=next_level, fits=self.fits)

        return self._once(("forecasts", method, variance, float(level), float(next_level)), make)

    def _asks_for_choice(self, method, variance):
        from forecasting.options import METHODS

        return method == "auto" or (variance == "auto" and method in METHODS and not METHODS[method].own_spread)

    def evaluation(self, *, methods=None, variances=None, cutoff=None, bootstrap: int = 500, seed: int = 0,
                   level: float = 0.90, next_level: float = 0.80, check_customers=CHECK_CUSTOMERS):
        """The accuracy check (:func:`forecasting.evaluation.evaluate_methods`) with the shared fits."""
        self._needs_orders("the accuracy check")

        def run():
            from forecasting.evaluation import evaluate_methods

            return evaluate_methods(self.orders, methods=methods, variances=variances, cutoff=cutoff,
                                    bootstrap=bootstrap, seed=seed, level=level, next_level=next_level,
                                    fits=self.fits, check_customers=check_customers)

        key = ("evaluation", _key(methods), _key(variances), check_customers, cutoff, bootstrap, seed, float(level),
               float(next_level))
        return self._once(key, run)

    def tail(self, checked=None):
        """How heavy the tail of big orders is (:func:`forecasting.variance.tail_report`)."""
        self._needs_orders("the tail report")
        return self.fits.tail(checked)

    # -- the outlook ------------------------------------------------------------------------

    def _outlook_variance(self, variance):
        # Gamma-Gamma reports its own spread; the outlook's functions take a spread model's name.
        return "classic" if variance == OWN_SPREAD else variance

    def outlook(self, *, horizon, by: str = "quarter", method: str = DEFAULT_METHOD,
                variance: str = DEFAULT_VARIANCE, **options):
        """Revenue ahead (:func:`forecasting.outlook.project_revenue`) from the forecasts in use.

        ``options`` are :func:`~forecasting.outlook.project_revenue`'s (``as_of``, ``level``,
        ``draws``, ``seed``, ``seasons``, ``frequency_model``, ``new_customers``). The
        expected next-order values are :meth:`forecasts` for ``method`` and ``variance``.
        """
        self._needs_orders("the revenue outlook")

        def run():
            from forecasting.outlook import project_revenue

            table = self.forecasts(method, self._outlook_variance(variance))
            return project_revenue(self.orders, horizon=horizon, by=by, forecasts=table, method=method,
                                   variance=self._outlook_variance(variance), stats=self.statistics, **options)

        return self._once(("outlook", horizon, by, method, variance, _key(options)), run)

    def outlook_backtest(self, *, horizon=None, cutoff=None, by: str = "quarter", method: str = DEFAULT_METHOD,
                         variance: str = DEFAULT_VARIANCE, **options):
        """The outlook made at an earlier date against what came in after it
        (:func:`forecasting.outlook.backtest_outlook`; every choice made again on the orders
        before the cut-off, its fits kept for a second visit of the same cut-off)."""
        self._needs_orders("the outlook's backtest")

        def run():
            from forecasting.outlook import backtest_outlook

            return backtest_outlook(self.orders, horizon=horizon, cutoff=cutoff, by=by, method=method,
                                    variance=self._outlook_variance(variance), **options)

        return self._once(("outlook backtest", horizon, cutoff, by, method, variance, _key(options)), run)

    def rolling_backtest(self, *, horizon, cutoffs=None, by: str = "quarter", method: str = DEFAULT_METHOD,
                         variance: str = DEFAULT_VARIANCE, **options):
        """The outlook checked at several cut-offs (:func:`forecasting.outlook.rolling_backtest`)."""
        self._needs_orders("the outlook's checks")

        def run():
            from forecasting.outlook import DEFAULT_CUTOFFS, rolling_backtest

            return rolling_backtest(self.orders, horizon=horizon, cutoffs=DEFAULT_CUTOFFS if cutoffs is None
                                    else cutoffs, by=by, method=method, variance=self._outlook_variance(variance),
                                    **options)

        return self._once(("rolling backtest", horizon, _key(cutoffs), by, method, variance, _key(options)), run)

    def tiers(self, *, horizon, rank: str = "value", shares=None, thresholds=None, names=None,
              method: str = DEFAULT_METHOD, variance: str = DEFAULT_VARIANCE, seasons: str = DEFAULT_SEASONS):
        """Customers in value tiers (:func:`forecasting.outlook.assign_tiers`) from the outlook of the
        customers the shop has (:meth:`outlook` with ``new_customers=False``)."""
        def run():
            from forecasting.outlook import assign_tiers, require_projection

            outlook = self.outlook(horizon=horizon, method=method, variance=variance, seasons=seasons,
                                   new_customers=False)
            if rank == "revenue":
                require_projection(outlook, what="projected revenue")
            return outlook, assign_tiers(outlook.customers, rank=rank, shares=shares, thresholds=thresholds,
                                         names=names)

        return self._once(("tiers", horizon, rank, _key(shares), _key(thresholds), _key(names), method, variance,
                           seasons), run)

