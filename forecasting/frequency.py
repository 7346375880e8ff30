"""How often customers order again: the BG/NBD order-frequency model and its variant MBG/NBD.

Input: the per-customer statistics table (``orders``, ``first_order``,
``last_order``; see :mod:`forecasting.customers`) and an "as of" date.

Output:

* :func:`repeat_history` -- one row per customer with ``repeat_orders``
  (x, orders after the first), ``days_to_last_order`` (t_x, days from the first
  order to the last) and ``days_known`` (T, days from the first order to the
  "as of" date). Time is measured in days (fractions of a day kept).
* :func:`fit_order_frequency` -- the four model parameters r, alpha, a, b by
  maximum likelihood, with their covariance (a :class:`FrequencyFit`).
* :func:`frequency_forecast` -- per customer, the expected number of orders in
  the next ``horizon`` days and the chance the customer still shops here.
* :func:`simulate_orders_ahead` -- draws of how many orders each customer
  places in the horizon, following the model's story from their posterior.
* :func:`choose_order_model` -- both models fitted, the one the shop's own
  orders support better (higher likelihood; both have four parameters).

BG/NBD (Fader, Hardie and Lee 2005): while a customer is active, orders
arrive as a Poisson process with rate lambda; after each repeat order the
customer stops for good with probability p. Across customers lambda follows a
Gamma(r, rate alpha) and p a Beta(a, b) distribution. Because time is in days,
alpha is in days too (the paper works in weeks: alpha_days = 7 alpha_weeks, r,
a and b are unchanged).

MBG/NBD (Batislam, Denizel and Filiztekin 2007; Hoppe and Wagner 2007 tell
the same story): the same, except that the
coin is also thrown right after the first order, so a customer may never come
back at all. In BG/NBD a customer without a repeat order is certain to be
still active; in MBG/NBD not. Every formula of the variant is BG/NBD's with
the number of coins survived counted as ``x + 1`` instead of ``x`` in the
Beta parts (the Gamma parts, which count orders, keep ``x``); the code
writes each formula once with ``k`` = coins survived.

Time is whatever clock the history is measured on: calendar days by default,
or the shop's seasonal clock (:mod:`forecasting.seasons`), on which the same
formulas hold.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd
from scipy import special

from .errors import OrderDataError
from .newton import log_scale, minimise

__all__ = [
    "FREQUENCY_MODELS",
    "MODEL_NAMES",
    "HISTORY_COLUMNS",
    "MIN_REPEAT_CUSTOMERS",
    "FrequencyFit",
    "repeat_history",
    "frequency_log_likelihood",
    "frequency_log_likelihood_gradient",
    "fit_order_frequency",
    "expected_orders_ahead",
    "expected_orders_for_draws",
    "simulate_orders_ahead",
    "simulate_new_customer_orders",
    "expected_new_customer_orders",
    "chance_still_active",
    "frequency_forecast",
    "judge_optimum",
    "hessian_by_differences",
    "check_repeat_history",
    "default_start",
    "pick_by_likelihood",
    "choose_order_model",
    "MODEL_WORDS",
]

#: The order-frequency models: BG/NBD, and MBG/NBD where a customer may stop right after the first order.
FREQUENCY_MODELS = ("bg-nbd", "mbg-nbd")
#: Their published names, for tables and text.
MODEL_NAMES = {"bg-nbd": "BG/NBD", "mbg-nbd": "MBG/NBD"}
#: What each one assumes, in a line a shop owner can read.
MODEL_WORDS = {
    "bg-nbd": "customers stop for good only right after a repeat order, so a one-time buyer counts as "
              "still active",
    "mbg-nbd": "customers may stop for good after any order, the first included, so a one-time buyer may "
               "already be gone",
}

HISTORY_COLUMNS = ["repeat_orders", "days_to_last_order", "days_known"]

_SECONDS_PER_DAY = 86400.0
# Bounds on the log-parameters during the fit: wide enough for any shop measured
# in days (alpha up to e^18 days), narrow enough to keep every term finite.
_LOG_BOUND = 18.0
# Fewer customers with a repeat order than this cannot support four parameters
# (a rule of thumb: a handful of repeat customers per parameter).
MIN_REPEAT_CUSTOMERS = 10
# Largest standard error of a log-parameter that still describes real uncertainty.
_MAX_LOG_SE = 5.0
# Bound on drawn log-parameters (exp(40) ~ 2e17 stays finite in every formula).
_DRAW_BOUND = 40.0
# Largest expected number of arrivals handed to the Poisson sampler in a simulation.
_MAX_SIMULATED_ARRIVALS = 1e12


# --------------------------------------------------------------------------- #
# Data preparation
# --------------------------------------------------------------------------- #
def repeat_history(stats: pd.DataFrame, *, as_of=None) -> pd.DataFrame:
    """Turn per-customer statistics into repeat-order histories, in days.

    Parameters
    ----------
    stats : pandas.DataFrame
        Per-customer statistics indexed by ``customer`` with ``orders``,
        ``first_order`` and ``last_order`` (from
        :func:`forecasting.customers.customer_statistics`).
    as_of : date-like, optional
        The date the histories are measured up to. Defaults to the last order
        date in the table. It must not be earlier than any customer's last order.

    Returns
    -------
    pandas.DataFrame
        Same index as ``stats`` with ``repeat_orders`` (int, x = orders - 1),
        ``days_to_last_order`` (float, t_x) and ``days_known`` (float, T).

    Raises
    ------
    OrderDataError
        If ``as_of`` is not a date or is before some customer's last order.

    Examples
    --------
    >>> import pandas as pd
    >>> stats = pd.DataFrame(
    ...     {"orders": [3, 1],
    ...      "first_order": pd.to_datetime(["2025-01-01", "2025-03-01"]),
    ...      "last_order": pd.to_datetime(["2025-02-01", "2025-03-01"])},
    ...     index=pd.Index(["a", "b"], name="customer"))
    >>> repeat_history(stats, as_of="2025-03-11")
              repeat_orders  days_to_last_order  days_known
    customer
    a                     2                31.0        69.0
    b                     0                 0.0        10.0
    """
    missing = [c for c in ("orders", "first_order", "last_order") if c not in stats.columns]
    if missing:
        raise OrderDataError(
            "the customer table lacks the columns needed for order frequency",
            value=", ".join(missing),
            fix="Build it with forecasting.customers.customer_statistics(orders)",
        )
    if len(stats) == 0:
        raise OrderDataError("there are no customers to measure order frequency on")
    first = pd.to_datetime(stats["first_order"])
    last = pd.to_datetime(stats["last_order"])
    if as_of is None:
        as_of_ts = last.max()
    else:
        try:
            as_of_ts = pd.Timestamp(as_of)
        except (TypeError, ValueError):
            raise OrderDataError(
                "the 'as of' date is not a date", column="as_of", value=as_of,
                fix="Give a date such as 2026-06-30",
            ) from None
        if pd.isna(as_of_ts):
            raise OrderDataError("the 'as of' date is missing", column="as_of", value=as_of,
                                 fix="Give a date such as 2026-06-30")
    latest = last.max()
    if as_of_ts < latest:
        raise OrderDataError(
            f"the 'as of' date is earlier than the last order in the data ({latest:%Y-%m-%d %H:%M})",
            column="as_of",
            value=as_of,
            fix="Choose a date on or after the last order, or drop the later orders first",
        )
    repeat = stats["orders"].to_numpy(dtype=np.int64) - 1
    to_last = (last - first).dt.total_seconds().to_numpy(dtype=np.float64) / _SECONDS_PER_DAY
    known = (as_of_ts - first).dt.total_seconds().to_numpy(dtype=np.float64) / _SECONDS_PER_DAY
    return pd.DataFrame(
        {"repeat_orders": repeat, "days_to_last_order": to_last, "days_known": known},
        index=stats.index.copy(),
    )


def _history_arrays(history: pd.DataFrame):
    """Return x, t_x, T as arrays after checking they describe real histories."""
    missing = [c for c in HISTORY_COLUMNS if c not in history.columns]
    if missing:
        raise OrderDataError(
            "the order history table lacks columns",
            value=", ".join(missing),
            fix="Build it with forecasting.frequency.repeat_history(stats)",
        )
    x = history["repeat_orders"].to_numpy(dtype=np.float64)
    t_x = history["days_to_last_order"].to_numpy(dtype=np.float64)
    age = history["days_known"].to_numpy(dtype=np.float64)
    _check_arrays(x, t_x, age)
    return x, t_x, age


def _check_arrays(x, t_x, age):
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(t_x)) and np.all(np.isfinite(age))):
        raise OrderDataError("the order history has missing or infinite values",
                             fix="Check the order dates")
    if np.any(x < 0) or np.any(x != np.round(x)):
        raise OrderDataError("repeat order counts must be whole numbers of at least 0",
                             column="repeat_orders")
    # Allow a rounding hair between t_x and T (both come from timestamps).
    if np.any(t_x < 0) or np.any(t_x > age * (1 + 1e-12) + 1e-9):
        raise OrderDataError(
            "a customer's last order falls outside their known time (0 <= days_to_last_order <= days_known)",
            column="days_to_last_order",
        )


# --------------------------------------------------------------------------- #
# Likelihood
# --------------------------------------------------------------------------- #
def _check_model(model):
    if model not in FREQUENCY_MODELS:
        raise OrderDataError("the order-frequency model can be bg-nbd or mbg-nbd", value=model,
                             option="frequency_model", fix="Choose bg-nbd, mbg-nbd, or let the data choose")
    return model


def _coins(x, model):
    """k: the stop-or-go coins a customer with x repeat orders has survived (x, or x + 1 in MBG/NBD)."""
    return x + 1.0 if model == "mbg-nbd" else x


class _Histories:
    """x, t_x and T of every customer, with the distinct order counts among them.

    The special functions of the likelihood (log-gamma, log-beta, digamma,
    trigamma) depend on a customer's history only through x, which takes few
    distinct values (a shop of 60,000 customers has a few dozen), so they are
    evaluated once per distinct count and spread to the customers.
    """

    __slots__ = ("x", "t_x", "age", "counts", "which")

    def __init__(self, x, t_x, age):
        self.x = np.asarray(x, dtype=np.float64)
        self.t_x = np.asarray(t_x, dtype=np.float64)
        self.age = np.asarray(age, dtype=np.float64)
        self.counts, self.which = np.unique(self.x, return_inverse=True)
        self.which = self.which.reshape(-1)

    def at(self, t_x, age):
        """The same customers at other times (a seasonal clock): the counts stay as they are."""
        other = object.__new__(_Histories)
        other.x, other.t_x, other.age = self.x, np.asarray(t_x, dtype=np.float64), np.asarray(age, dtype=np.float64)
        other.counts, other.which = self.counts, self.which
        return other


class _Terms:
    """The likelihood of every customer and, on request, its first and second derivatives.

    log L = base + log(exp(A) + [k > 0] exp(S)) with k the coins survived
    (:func:`_coins`),

    * base = log Gamma(r+x) - log Gamma(r) + r log(alpha)
    * A = log B(a, b+k) - log B(a, b) - (r+x) log(alpha+T)      (still active)
    * S = log B(a+1, b+k-1) - log B(a, b) - (r+x) log(alpha+t_x)  (stopped after the last order)

    With w = exp(A) / (exp(A) + exp(S)), the share of the "still active" term,
    every derivative follows from those of base, A and S:
    d log L = d base + w dA + (1-w) dS and
    d2 log L = d2 base + w d2A + (1-w) d2S + w (1-w) (dA - dS)(dA - dS)'.
    The derivatives of A and S in (r, alpha, a, b, T, t_x) are written out in
    :meth:`gradient_parts`, :meth:`hessian` and :meth:`time_curvature`;
    digamma differences such as psi(a+1) - psi(a) = 1/a are simplified. The
    tests check the gradient against finite differences of the likelihood and
    the Hessian against finite differences of the gradient and second
    differences of the likelihood.
    """

    def __init__(self, params, histories: _Histories, model, *, order=0):
        r, alpha, a, b = (float(v) for v in params)
        self.params = (r, alpha, a, b)
        h = histories
        self.h = h
        counts = h.counts
        coins = _coins(counts, model)
        has_coin = coins > 0
        coins1 = np.where(has_coin, coins, 1.0)  # keeps b + k - 1 > 0 where the stopped term is unused
        which = h.which
        self.rx = r + h.x
        beta_ab = special.betaln(a, b)
        self.log_alpha_age = np.log(alpha + h.age)
        self.log_alpha_last = np.log(alpha + h.t_x)
        base = (special.gammaln(r + counts) - special.gammaln(r))[which] + r * math.log(alpha)
        alive = (special.betaln(a, b + coins) - beta_ab)[which] - self.rx * self.log_alpha_age
        stopped = np.where(has_coin, special.betaln(a + 1.0, b + coins1 - 1.0) - beta_ab, -np.inf)[which] \
            - self.rx * self.log_alpha_last
        total = np.logaddexp(alive, stopped)
        self.value = base + total
        self._pieces = (alive, stopped, total, counts, coins, coins1)
        self.order = 0
        self.prepare(order)

    def prepare(self, order):
        """Work out the pieces of the first (order 1) or also the second (order 2) derivatives."""
        if order <= self.order:
            return self
        r, alpha, a, b = self.params
        h = self.h
        which = h.which
        alive, stopped, total, counts, coins, coins1 = self._pieces
        if self.order < 1:
            self._first(r, alpha, a, b, h, which, alive, stopped, total, counts, coins, coins1)
        if order >= 2:
            self._second(r, a, b, which, counts, coins, coins1)
        self.order = order
        return self

    def _first(self, r, alpha, a, b, h, which, alive, stopped, total, counts, coins, coins1):
        self.w = np.exp(alive - total)
        self.w_stop = np.exp(stopped - total)
        psi = special.digamma
        common = psi(a + b) - psi(a + b + coins)  # dA/da
        self.d_a_alive = common[which]
        self.d_b_alive = (psi(b + coins) - psi(b) + common)[which]
        self.d_b_stop = (psi(b + coins1 - 1.0) - psi(b) + common)[which]
        self.d_r_base = (psi(r + counts) - psi(r))[which] + math.log(alpha)
        self.inv_age = 1.0 / (alpha + h.age)
        self.inv_last = 1.0 / (alpha + h.t_x)

    def _second(self, r, a, b, which, counts, coins, coins1):
        tri = lambda v: special.polygamma(1, v)  # noqa: E731 - trigamma
        tri_common = tri(a + b) - tri(a + b + coins)
        self.dd_rr_base = (tri(r + counts) - tri(r))[which]
        self.dd_aa_alive = tri_common[which]
        self.dd_bb_alive = (tri(b + coins) - tri(b) + tri_common)[which]
        self.dd_bb_stop = (tri(b + coins1 - 1.0) - tri(b) + tri_common)[which]
        self.tri_common = self.dd_aa_alive

    # ----------------------------------------------------------------- slopes
    def gradient_parts(self):
        """Per-customer d log L / d(r, alpha, a, b), and d/dT, d/dt_x."""
        r, alpha, a, b = self.params
        w, v = self.w, self.w_stop
        d_r = self.d_r_base - w * self.log_alpha_age - v * self.log_alpha_last
        d_alpha = r / alpha - self.rx * (w * self.inv_age + v * self.inv_last)
        d_a = self.d_a_alive + v / a  # psi(a+1) - psi(a) = 1/a in the stopped term
        d_b = w * self.d_b_alive + v * self.d_b_stop
        d_age = -w * self.rx * self.inv_age
        d_last = -v * self.rx * self.inv_last
        return (d_r, d_alpha, d_a, d_b), d_age, d_last

    def gradient(self):
        """Summed d log L / d(r, alpha, a, b)."""
        parts, _, _ = self.gradient_parts()
        return np.array([part.sum() for part in parts])

    def _differences(self):
        """dA - dS per customer in (r, alpha, a, b) and dA/dT, -dS/dt_x (the terms with w (1-w))."""
        a, b = self.params[2], self.params[3]
        diff_r = self.log_alpha_last - self.log_alpha_age
        diff_alpha = self.rx * (self.inv_last - self.inv_age)
        diff_a = np.full(len(self.rx), -1.0 / a)
        diff_b = self.d_b_alive - self.d_b_stop  # = 1 / (b + k - 1) where the stopped term exists
        return (diff_r, diff_alpha, diff_a, diff_b)

    def hessian(self):
        """Summed second derivatives of log L in (r, alpha, a, b): a 4 x 4 matrix."""
        r, alpha, a, b = self.params
        w, v = self.w, self.w_stop
        mix = w * v
        diffs = self._differences()
        h = np.empty((4, 4))
        # Direct second derivatives (base, and the w / (1-w) weighted ones of A and S).
        direct = {
            (0, 0): self.dd_rr_base,
            (0, 1): 1.0 / alpha - w * self.inv_age - v * self.inv_last,
            (1, 1): -r / alpha ** 2 + self.rx * (w * self.inv_age ** 2 + v * self.inv_last ** 2),
            (2, 2): self.dd_aa_alive - v / a ** 2,  # trigamma(a+1) - trigamma(a) = -1/a^2
            (2, 3): self.tri_common,
            (3, 3): w * self.dd_bb_alive + v * self.dd_bb_stop,
        }
        for i in range(4):
            for j in range(i, 4):
                # Elementwise products and sums, not a BLAS dot (its threads only wait on a busy machine).
                total = float(np.sum(mix * diffs[i] * diffs[j]))
                part = direct.get((i, j))
                if part is not None:
                    total += float(np.sum(part))
                h[i, j] = h[j, i] = total
        return h

    def time_curvature(self):
        """Per-customer second derivatives that involve T and t_x.

        Returns (d2/dT2, d2/dT dt_x, d2/dt_x2, d2/dp dT (4 arrays), d2/dp dt_x (4 arrays)), p = (r, alpha, a, b).
        """
        w, v = self.w, self.w_stop
        mix = w * v
        a_age = self.rx * self.inv_age  # -dA/dT
        s_last = self.rx * self.inv_last  # -dS/dt_x
        diffs = self._differences()
        d_tt = w * self.rx * self.inv_age ** 2 + mix * a_age ** 2
        d_ll = v * self.rx * self.inv_last ** 2 + mix * s_last ** 2
        d_tl = -mix * a_age * s_last
        # d2A/dr dT = -1/(alpha+T), d2A/dalpha dT = (r+x)/(alpha+T)^2, and the same for S with t_x.
        direct_t = (-w * self.inv_age, w * self.rx * self.inv_age ** 2, 0.0, 0.0)
        direct_l = (-v * self.inv_last, v * self.rx * self.inv_last ** 2, 0.0, 0.0)
        cross_t = tuple(direct_t[j] - mix * diffs[j] * a_age for j in range(4))
        cross_l = tuple(direct_l[j] + mix * diffs[j] * s_last for j in range(4))
        return d_tt, d_tl, d_ll, cross_t, cross_l


def _log_terms(params, x, t_x, age, model="bg-nbd"):
    """Per-customer log-likelihood (see :class:`_Terms`), for arrays that broadcast."""
    x, t_x, age = np.broadcast_arrays(*(np.asarray(v, dtype=np.float64) for v in (x, t_x, age)))
    shape = x.shape
    terms = _Terms(params, _Histories(x.ravel(), t_x.ravel(), age.ravel()), model)
    return terms.value.reshape(shape)


def frequency_log_likelihood(params, repeat_orders, days_to_last_order, days_known, *,
                             model: str = "bg-nbd") -> np.ndarray:
    """Log-likelihood of each customer's repeat history under BG/NBD or MBG/NBD.

    Parameters
    ----------
    params : sequence of 4 floats
        ``(r, alpha, a, b)``, all positive; ``alpha`` in days.
    repeat_orders, days_to_last_order, days_known : array_like
        x, t_x and T per customer (days).
    model : {"bg-nbd", "mbg-nbd"}
        The order-frequency model.

    Returns
    -------
    numpy.ndarray
        One log-likelihood per customer.

    Notes
    -----
    The likelihood of one customer under BG/NBD (Fader, Hardie and Lee 2005,
    eq. 6) is

    .. math::

        L = \\frac{\\Gamma(r+x)\\,\\alpha^r}{\\Gamma(r)}
            \\left[\\frac{B(a, b+x)}{B(a,b)}\\,\\frac{1}{(\\alpha+T)^{r+x}}
            + \\delta_{x>0}\\,\\frac{B(a+1, b+x-1)}{B(a,b)}\\,
            \\frac{1}{(\\alpha+t_x)^{r+x}}\\right].

    Under MBG/NBD (Batislam, Denizel and Filiztekin 2007) the Beta parts
    read ``B(a, b+x+1)`` and ``B(a+1, b+x)`` and the second term is present
    for every customer (at x = 0, t_x = 0 it is the chance a/(a+b) of
    stopping right after the first order). This form is written from memory
    of the paper and checked in the tests by integrating the model's story
    numerically.

    It is evaluated on the log scale with ``gammaln``/``betaln`` and the two
    bracketed terms combined by ``logaddexp``, so customers with hundreds of
    orders or very long histories do not overflow.

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). "Counting your
    customers" the easy way: an alternative to the Pareto/NBD model.
    Marketing Science 24(2), 275-284.

    Batislam, E. P., Denizel, M. and Filiztekin, A. (2007). Empirical
    validation and comparison of models for customer base analysis.
    International Journal of Research in Marketing 24(3), 201-209.

    Hoppe, D. and Wagner, U. (2007). Marketing - Journal of Research and
    Management 3(2), 75-90 (the same model, where a customer may stop right
    after the first order).
    """
    model = _check_model(model)
    return _log_terms(params, repeat_orders, days_to_last_order, days_known, model)


def frequency_log_likelihood_gradient(params, repeat_orders, days_to_last_order, days_known, *,
                                      model: str = "bg-nbd") -> np.ndarray:
    """Gradient of the summed log-likelihood with respect to (r, alpha, a, b).

    Parameters
    ----------
    params : sequence of 4 floats
        ``(r, alpha, a, b)``.
    repeat_orders, days_to_last_order, days_known : array_like
        x, t_x and T per customer (days).
    model : {"bg-nbd", "mbg-nbd"}
        The order-frequency model.

    Returns
    -------
    numpy.ndarray
        Shape (4,): d(sum log L)/d(r, alpha, a, b).

    Notes
    -----
    With w the share of each customer's likelihood in the "still active" term
    and k = x (BG/NBD) or x + 1 (MBG/NBD):

    * d/dr     = psi(r+x) - psi(r) + log(alpha) - w log(alpha+T) - (1-w) log(alpha+t_x)
    * d/dalpha = r/alpha - (r+x) [w/(alpha+T) + (1-w)/(alpha+t_x)]
    * d/da     = w [psi(a+b) - psi(a+b+k)] + (1-w) [psi(a+1) - psi(a) + psi(a+b) - psi(a+b+k)]
    * d/db     = w [psi(b+k) - psi(b) + psi(a+b) - psi(a+b+k)]
      + (1-w) [psi(b+k-1) - psi(b) + psi(a+b) - psi(a+b+k)]
    """
    model = _check_model(model)
    x, t_x, age = np.broadcast_arrays(*(np.asarray(v, dtype=np.float64).ravel()
                                        for v in (repeat_orders, days_to_last_order, days_known)))
    return _Terms(params, _Histories(x, t_x, age), model, order=1).gradient()


# --------------------------------------------------------------------------- #
# Expectations
# --------------------------------------------------------------------------- #
def _gauss_hypergeometric(first, second, third, z, *, max_terms=5000):
    """2F1(first, second; third; z) for 0 <= z < 1: scipy, with a plain series where scipy fails.

    scipy's hyp2f1 returns NaN for some extreme arguments (e.g. first around
    -1e6 with z around 1e-6, as when the fit drifts toward its boundary); the
    Gauss series sum_k (first)_k (second)_k / ((third)_k k!) z^k converges for
    |z| < 1 and is summed there term by term until terms stop mattering.
    """
    first, second, third, z = np.broadcast_arrays(*(np.asarray(v, dtype=np.float64) for v in (first, second, third, z)))
    value = np.array(special.hyp2f1(first, second, third, z), dtype=np.float64)
    failed = ~np.isfinite(value)
    if not np.any(failed):
        return value
    f, s, t, zz = first[failed], second[failed], third[failed], z[failed]
    term = np.ones_like(zz)
    total = np.ones_like(zz)
    with np.errstate(over="ignore", invalid="ignore"):  # a diverging sum ends as NaN below
        for k in range(max_terms):
            term = term * (f + k) * (s + k) / ((t + k) * (k + 1.0)) * zz
            total = total + term
            if np.all(np.abs(term) <= 1e-17 * np.abs(total)):
                break
        else:
            total = np.where(np.abs(term) <= 1e-12 * np.abs(total), total, np.nan)
    value[failed] = np.where(np.isfinite(total), total, np.nan)
    return value


def _orders_while_active(params, x, age, horizon, k=None):
    """Expected orders in (T, T + horizon] for a customer active at T.

    Fader, Hardie and Lee (2005), numerator of eq. 10, with k the coins
    survived (k = x in BG/NBD, x + 1 in MBG/NBD):
    (a+b+k-1)/(a-1) [1 - ((alpha+T)/(alpha+T+h))^(r+x) 2F1(r+x, b+k; a+b+k-1; z)],
    z = h/(alpha+T+h). Euler's transformation 2F1(A,B;C;z) =
    (1-z)^(C-A-B) 2F1(C-A, C-B; C; z) turns the bracket into
    1 - (1-z)^(a-1) 2F1(a+b+k-1-r-x, a-1; a+b+k-1; z), whose first two
    hypergeometric parameters do not grow with x (better conditioned for
    regular customers). Parameters may be arrays broadcasting against x.
    """
    r, alpha, a, b = params
    k = x if k is None else k
    near_one = np.abs(np.asarray(a, dtype=np.float64) - 1.0) < 1e-6
    if np.any(near_one):
        # (a+b+k-1)/(a-1) [...] is 0/0 at a = 1; the expectation is smooth in a,
        # so there it is the average of the two sides a = 1 +- 1e-5 (error ~1e-10).
        step = 1e-5
        upper = _orders_while_active((r, alpha, np.where(near_one, 1.0 + step, a), b), x, age, horizon, k)
        lower = _orders_while_active((r, alpha, np.where(near_one, 1.0 - step, a), b), x, age, horizon, k)
        return np.where(near_one, 0.5 * (upper + lower), upper)
    z = horizon / (alpha + age + horizon)
    hyper = _gauss_hypergeometric(a + b + k - 1.0 - r - x, a - 1.0, a + b + k - 1.0, z)
    bracket = 1.0 - np.exp((a - 1.0) * np.log1p(-z)) * hyper
    factor = (a + b + k - 1.0) / (a - 1.0)
    value = factor * bracket
    failed = ~np.isfinite(value)
    if np.any(failed):
        # With a and b in the thousands (a stop chance the data barely pin down,
        # met in parameter draws) the transformed 2F1 overflows although the
        # product is modest; the printed form's parameters r+x, b+k stay tame there.
        shape = np.shape(value)
        pick = [np.broadcast_to(v, shape)[failed] for v in (r + x, b + k, a + b + k - 1.0, z, factor)]
        printed = 1.0 - np.exp(pick[0] * np.log1p(-pick[3])) * _gauss_hypergeometric(*pick[:4])
        value = np.array(np.broadcast_to(value, shape), dtype=np.float64)
        value[failed] = pick[4] * printed
    # Never below zero (also turns -0.0 at a zero horizon into 0.0).
    return np.maximum(value, 0.0)


def _check_params(params):
    values = np.asarray(params, dtype=np.float64)
    if values.shape != (4,) or not np.all(np.isfinite(values)) or np.any(values <= 0):
        raise OrderDataError(
            "order frequency parameters must be four positive numbers (r, alpha, a, b)",
            value=params,
        )
    return tuple(float(v) for v in values)


def _check_horizon(horizon):
    try:
        value = float(horizon)
    except (TypeError, ValueError):
        raise OrderDataError("the horizon must be a number of days", value=horizon, option="horizon",
                             fix="Give a number of days such as 90") from None
    if not np.isfinite(value) or value < 0:
        raise OrderDataError("the horizon must be zero or more days", value=horizon, option="horizon",
                             fix="Give a number of days such as 90")
    return value


def _check_draws_array(param_draws):
    draws = np.asarray(param_draws, dtype=np.float64)
    if draws.ndim != 2 or draws.shape[1] != 4 or not np.all(np.isfinite(draws)) or np.any(draws <= 0):
        raise OrderDataError("parameter draws must be rows of four positive numbers (r, alpha, a, b)")
    return draws


def expected_new_customer_orders(params, days, *, model: str = "bg-nbd") -> np.ndarray:
    r"""Expected repeat orders in the first ``days`` days of a new customer.

    Parameters
    ----------
    params : sequence of 4 floats
        ``(r, alpha, a, b)`` with ``alpha`` in days.
    days : float or array_like
        Length of the period after the first order, in days (>= 0).
    model : {"bg-nbd", "mbg-nbd"}
        The order-frequency model.

    Returns
    -------
    numpy.ndarray
        E[X(t)], same shape as ``days``.

    Notes
    -----
    BG/NBD: Fader, Hardie and Lee (2005), eq. 7:

    .. math::

        E[X(t)] = \frac{a+b-1}{a-1}\left[1 - \left(\frac{\alpha}{\alpha+t}\right)^r
        {}_2F_1\!\left(r, b; a+b-1; \frac{t}{\alpha+t}\right)\right].

    MBG/NBD (Batislam, Denizel and Filiztekin 2007):

    .. math::

        E[X(t)] = \frac{b}{a-1}\left[1 - \left(\frac{\alpha}{\alpha+t}\right)^r
        {}_2F_1\!\left(r, b+1; a+b; \frac{t}{\alpha+t}\right)\right],

    the chance b/(a+b) of not stopping at the first order times the BG/NBD
    expression with b + 1. Both are eq. 10 with x = 0 and T = 0 and are
    evaluated through Euler's transformation of the hypergeometric function
    (an identity; see :func:`expected_orders_ahead`).

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). Marketing Science
    24(2), 275-284.

    Batislam, E. P., Denizel, M. and Filiztekin, A. (2007). International
    Journal of Research in Marketing 24(3), 201-209.
    """
    params = _check_params(params)
    model = _check_model(model)
    days = np.asarray(days, dtype=np.float64)
    if np.any(days < 0) or not np.all(np.isfinite(days)):
        raise OrderDataError("the number of days must be zero or more", value=days)
    zeros = np.zeros_like(days)
    active = special.expit(-_log_stop_odds(params, zeros, zeros, zeros, model))
    return _orders_while_active(params, zeros, zeros, days, _coins(zeros, model)) * active


def _log_stop_odds(params, x, t_x, age, model="bg-nbd"):
    """log of (a/(b+k-1)) ((alpha+T)/(alpha+t_x))^(r+x) for k > 0; -inf for k = 0."""
    r, alpha, a, b = params
    k = _coins(x, model)
    has_coin = k > 0
    k1 = np.where(has_coin, k, 1.0)
    odds = np.log(a) - np.log(b + (k1 - 1.0)) + (r + x) * (np.log(alpha + age) - np.log(alpha + t_x))
    return np.where(has_coin, odds, -np.inf)


def chance_still_active(params, repeat_orders, days_to_last_order, days_known, *,
                        model: str = "bg-nbd") -> np.ndarray:
    """Probability each customer is still an active customer at T.

    Parameters
    ----------
    params : sequence of 4 floats
        ``(r, alpha, a, b)``.
    repeat_orders, days_to_last_order, days_known : array_like
        x, t_x and T per customer (days).
    model : {"bg-nbd", "mbg-nbd"}
        The order-frequency model.

    Returns
    -------
    numpy.ndarray
        P(active | x, t_x, T) in (0, 1]. Under BG/NBD exactly 1 for customers
        without a repeat order (they can only stop right after a repeat
        order); under MBG/NBD below 1 for everyone.

    Notes
    -----
    BG/NBD: Fader, Hardie and Lee (2005), eq. 11:
    1 / (1 + [x > 0] (a/(b+x-1)) ((alpha+T)/(alpha+t_x))^(r+x)). MBG/NBD
    (Batislam, Denizel and Filiztekin 2007):
    1 / (1 + (a/(b+x)) ((alpha+T)/(alpha+t_x))^(r+x)) for every x. Computed as
    a logistic function of the log-odds so it never overflows.
    """
    params = _check_params(params)
    model = _check_model(model)
    x, t_x, age = (np.asarray(v, dtype=np.float64) for v in (repeat_orders, days_to_last_order, days_known))
    return special.expit(-_log_stop_odds(params, x, t_x, age, model))


def expected_orders_ahead(params, repeat_orders, days_to_last_order, days_known, horizon, *,
                          model: str = "bg-nbd") -> np.ndarray:
    r"""Expected number of orders in the next ``horizon`` days, per customer.

    Parameters
    ----------
    params : sequence of 4 floats
        ``(r, alpha, a, b)``, ``alpha`` in days.
    repeat_orders, days_to_last_order, days_known : array_like
        x, t_x and T per customer (days).
    horizon : float
        Days ahead of T (>= 0).
    model : {"bg-nbd", "mbg-nbd"}
        The order-frequency model.

    Returns
    -------
    numpy.ndarray
        E[Y(horizon) | x, t_x, T] per customer.

    Notes
    -----
    BG/NBD: Fader, Hardie and Lee (2005), eq. 10:

    .. math::

        E[Y(t)\mid x, t_x, T] = \frac{\frac{a+b+x-1}{a-1}\left[1 -
        \left(\frac{\alpha+T}{\alpha+T+t}\right)^{r+x}
        {}_2F_1\!\left(r+x, b+x; a+b+x-1; \frac{t}{\alpha+T+t}\right)\right]}
        {1 + \delta_{x>0}\frac{a}{b+x-1}\left(\frac{\alpha+T}{\alpha+t_x}\right)^{r+x}}.

    MBG/NBD (Batislam, Denizel and Filiztekin 2007): the same with
    ``a+b+x``, ``b+x+1`` in place of ``a+b+x-1``, ``b+x`` and the
    denominator ``1 + a/(b+x) ((alpha+T)/(alpha+t_x))^(r+x)`` for every x.

    The code departs from the printed form in two harmless ways: the
    hypergeometric term is evaluated after Euler's transformation,
    ``(1-z)^(a-1) 2F1(a+b+k-1-r-x, a-1; a+b+k-1; z)`` (k = x or x + 1), which
    equals the printed ``(1-z)^(r+x) 2F1(r+x, b+k; a+b+k-1; z)`` but keeps its
    parameters small for customers with many orders; and the denominator is
    applied as the chance of still being active (eq. 11), a logistic
    function of log-odds. At a = 1 the formula is 0/0; the code then averages
    a = 1 +- 1e-5.

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). "Counting your
    customers" the easy way. Marketing Science 24(2), 275-284.

    Batislam, E. P., Denizel, M. and Filiztekin, A. (2007). International
    Journal of Research in Marketing 24(3), 201-209.

    Examples
    --------
    The worked example with the CDNOW estimates (in weeks): a customer with two
    repeat orders, the last at week 30.43, seen for 38.86 weeks, over 39 weeks:

    >>> round(float(expected_orders_ahead((0.243, 4.414, 0.793, 2.426), 2, 30.43, 38.86, 39)), 3)
    1.226
    """
    params = _check_params(params)
    model = _check_model(model)
    horizon = _check_horizon(horizon)
    x, t_x, age = (np.asarray(v, dtype=np.float64) for v in (repeat_orders, days_to_last_order, days_known))
    active = special.expit(-_log_stop_odds(params, x, t_x, age, model))
    return _orders_while_active(params, x, age, horizon, _coins(x, model)) * active


def expected_orders_for_draws(param_draws, repeat_orders, days_to_last_order, days_known, horizon, *,
                              model: str = "bg-nbd") -> np.ndarray:
    """:func:`expected_orders_ahead` for many parameter sets at once.

    Parameters
    ----------
    param_draws : array_like, shape (D, 4)
        Rows of ``(r, alpha, a, b)``, e.g. from :meth:`FrequencyFit.draw_parameters`.
    repeat_orders, days_to_last_order, days_known : array_like, shape (N,)
        x, t_x and T per customer (days).
    horizon : float or array_like of shape (N,)
        Days ahead of T (one for everyone, or one per customer).
    model : {"bg-nbd", "mbg-nbd"}
        The order-frequency model.

    Returns
    -------
    numpy.ndarray
        Shape (D, N): row d is ``expected_orders_ahead(param_draws[d], ...)``.
    """
    draws = _check_draws_array(param_draws)
    model = _check_model(model)
    horizon = _check_horizons(horizon)
    x, t_x, age = (np.asarray(v, dtype=np.float64)[None, :] for v in (repeat_orders, days_to_last_order, days_known))
    params = tuple(draws[:, [k]] for k in range(4))
    active = special.expit(-_log_stop_odds(params, x, t_x, age, model))
    return _orders_while_active(params, x, age, horizon, _coins(x, model)) * active


def _check_horizons(horizon):
    """One horizon, or an array of them (each zero or more)."""
    values = np.asarray(horizon, dtype=np.float64) if np.ndim(horizon) else None
    if values is None:
        return _check_horizon(horizon)
    if not np.all(np.isfinite(values)) or np.any(values < 0):
        raise OrderDataError("every horizon must be zero or more days", option="horizon")
    return values


# Cells whose expected number of orders while active is above this are drawn the direct way (rate
# and stop chance first, then Poisson and geometric counts); below it by inverting the count's
# distribution with one uniform number, which is several times cheaper.
_INVERSION_MEAN = 12.0
# Order numbers worked out for every ordering cell at once before the loop takes the rest one at a time.
_FIRST_STEPS = 6


def _draw_counts(rng, r, alpha, a, b, x, t_x, age, horizon, model):
    """Orders placed in the horizon, drawn from each customer's posterior (arrays broadcast together).

    The direct way: still active with the chance of eq. 11, then the ordering rate
    lambda ~ Gamma(r + x, alpha + T), the stop chance p ~ Beta(a, b + k) and
    min(Poisson(lambda h), Geometric(p)). The slow twin of :func:`_sample_counts`.
    """
    shape = np.broadcast_shapes(*(np.shape(v) for v in (r, alpha, a, b, x, t_x, age, horizon)))
    k = _coins(x, model)
    active = rng.random(shape) < special.expit(-_log_stop_odds((r, alpha, a, b), x, t_x, age, model))
    rate = rng.gamma(np.broadcast_to(r + x, shape), 1.0) / (alpha + age)
    stop = rng.beta(np.broadcast_to(a, shape), np.broadcast_to(b + k, shape))
    # Keep both draws inside what numpy's samplers accept (a rate of 1e12 orders
    # in the horizon, or a stop chance of 1e-300, already means "no limit").
    arrivals = rng.poisson(np.minimum(rate * horizon, _MAX_SIMULATED_ARRIVALS))
    stop_count = rng.geometric(np.clip(stop, 1e-300, 1.0))
    return np.where(active, np.minimum(arrivals, stop_count), 0).astype(np.int64)


def _sample_counts(rng, alive, shape, keep_log, a, stop_b, *, heavy=None):
    """Orders placed in the horizon, one draw per cell: the count's distribution inverted.

    Parameters
    ----------
    rng : numpy.random.Generator
    alive : array
        Chance the customer is still active (eq. 11), per cell.
    shape : array
        r + x, the shape of the posterior ordering rate.
    keep_log : array
        log((alpha + T) / (alpha + T + h)) <= 0, per cell.
    a, stop_b : array
        The posterior Beta(a, b + k) of the stop chance.
    heavy : array of bool, optional
        Cells that may expect more than ``_INVERSION_MEAN`` orders while
        active (a superset is fine); worked out here when not given.

    All broadcast together; the result has their broadcast shape.

    Notes
    -----
    Given active, the rate's Gamma(r+x, alpha+T) posterior makes the arrivals
    in the horizon negative binomial, N ~ NB(r+x, q) with q = h / (alpha+T+h):
    P(N = 0) = (1-q)^(r+x) and P(N = n) = P(N = n-1) q (r+x+n-1) / n. The
    stop chance's Beta(a, b+k) posterior makes the orders up to and including
    the one after which the customer stops beta-geometric, G >= 1 with
    P(G >= n+1) = P(G >= n) (b+k+n-1) / (a+b+k+n-1). Rate and stop chance are
    independent given the history, so the orders placed, min(N, G), reach n
    with chance S(n) = P(N >= n) P(G >= n) for n >= 1. One uniform u per
    cell: the customer orders at all when u < alive S(1), and then places the
    largest n with u / alive < S(n) (a loop over n that keeps only the cells
    still going, so the work follows the orders, not the cells). Cells
    expecting more than ``_INVERSION_MEAN`` orders while active (or with
    parameters beyond the samplers' range) are drawn the direct way
    (:func:`_draw_counts`); both give the same distribution, which the tests
    check against a literal event-by-event simulation.
    """
    out = np.broadcast_shapes(*(np.shape(v) for v in (alive, shape, keep_log, a, stop_b)))
    if heavy is None:
        with np.errstate(over="ignore", invalid="ignore"):
            heavy = ~(shape * np.expm1(-keep_log) <= _INVERSION_MEAN)  # E[N] = (r+x) q / (1-q)
    heavy = np.broadcast_to(heavy, out)
    u = rng.random(out)
    counts = np.zeros(out, dtype=np.int64)
    flat = counts.reshape(-1)
    # P(the customer orders at all) = alive (1 - P(N = 0)), P(N = 0) = (1-q)^(r+x).
    ordering = np.empty(out)
    np.multiply(shape, keep_log, out=ordering)
    np.exp(ordering, out=ordering)
    np.subtract(1.0, ordering, out=ordering)
    np.multiply(ordering, alive, out=ordering)
    cells = np.flatnonzero((u < ordering) & ~heavy)
    if cells.size:
        place = _Places(cells, out)
        rate_shape = place.take(shape)
        keep = place.take(keep_log)
        log_none = rate_shape * keep
        beta_b = place.take(stop_b)
        beta_ab = place.take(a) + beta_b
        # The first _FIRST_STEPS order numbers for every ordering cell without dropping any (most
        # customers place one to three orders; dropping cells costs more than these few passes).
        # (1 - exp rather than expm1: only differences of 1e-16 against a uniform number matter here.)
        q = 1.0 - np.exp(keep)
        chance_n = np.exp(log_none)  # P(N = n), from n = 0
        tail_n = 1.0 - chance_n  # P(N >= n + 1), from n = 0
        tail_g = np.ones(cells.size)  # P(G >= n + 1), from n = 0
        v = u.reshape(-1)[cells] / place.take(alive)
        more = np.zeros(cells.size, dtype=np.int64)
        for n in range(1, _FIRST_STEPS + 1):
            chance_n *= q * (rate_shape + (n - 1)) / n
            tail_n -= chance_n
            tail_g *= (beta_b + (n - 1)) / (beta_ab + (n - 1))
            more += v < tail_n * tail_g  # S decreases, so this counts a prefix
        flat[cells] = 1 + more
        # The few cells still going after that: one order number at a time, keeping only those.
        going = np.flatnonzero(more == _FIRST_STEPS)
        if going.size:
            cells, v, rate_shape, q, beta_b, beta_ab = (arr[going] for arr in (cells, v, rate_shape, q, beta_b,
                                                                               beta_ab))
            chance_n, tail_n, tail_g = chance_n[going], tail_n[going], tail_g[going]
            n = _FIRST_STEPS + 1
            while cells.size and n < 100_000:
                chance_n = chance_n * q * (rate_shape + (n - 1)) / n
                tail_n = tail_n - chance_n
                tail_g = tail_g * (beta_b + (n - 1)) / (beta_ab + (n - 1))
                going = np.flatnonzero(v < tail_n * tail_g)
                cells = cells[going]
                flat[cells] += 1
                v, rate_shape, q, chance_n, tail_n, beta_b, beta_ab, tail_g = (
                    arr[going] for arr in (v, rate_shape, q, chance_n, tail_n, beta_b, beta_ab, tail_g))
                n += 1
    far = np.flatnonzero(heavy)
    if far.size:
        far = far[u.reshape(-1)[far] < _Places(far, out).take(alive)]
        place = _Places(far, out)
        with np.errstate(over="ignore"):
            rate = rng.gamma(place.take(shape), 1.0) * np.expm1(-place.take(keep_log))
        stop = rng.beta(place.take(a), place.take(stop_b))
        arrivals = rng.poisson(np.minimum(np.nan_to_num(rate, nan=_MAX_SIMULATED_ARRIVALS), _MAX_SIMULATED_ARRIVALS))
        stop_count = rng.geometric(np.clip(stop, 1e-300, 1.0))
        flat[far] = np.minimum(arrivals, stop_count)
    return counts


class _Places:
    """Cells of a one- or two-axis array of shape ``out``, by flat position: values of broadcast arrays there."""

    def __init__(self, cells, out):
        self.cells = cells
        self.out = tuple(out)
        self._rows = self._columns = None

    def take(self, values):
        """``np.broadcast_to(values, out).reshape(-1)[cells]`` without building the broadcast array."""
        values = np.asarray(values, dtype=np.float64)
        out = self.out
        if values.ndim == 0:
            return np.full(len(self.cells), float(values))
        if values.shape == out:
            return values.reshape(-1)[self.cells]
        if len(out) == 1:
            return np.broadcast_to(values.reshape(-1), out)[self.cells]
        values = values.reshape((1,) * (2 - values.ndim) + values.shape)
        rows, columns = values.shape
        if rows == 1 and columns == 1:
            return np.full(len(self.cells), float(values[0, 0]))
        if rows == 1:
            if self._columns is None:
                self._columns = self.cells % out[1]
            return values[0, self._columns]
        if self._rows is None:
            self._rows = self.cells // out[1]
        return values[self._rows, 0]


def _total_counts(rng, customers, alive, shape, keep_log, a, stop_b):
    """Orders placed by groups of customers who share their story, in total per group.

    ``customers`` (integers) customers in each group (cell), each following
    :func:`_sample_counts`'s story with the group's parameters, independently.
    Of the k customers who placed at least n - 1 orders, the number who place
    at least n is Binomial(k, S(n) / S(n-1)) (S as in :func:`_sample_counts`,
    S(0) = 1, alive folded into S(1)); the total is the sum of those numbers
    over n. One binomial draw per group and order number instead of a draw
    per customer: exact, and the work follows the orders. Groups expecting
    more than ``_INVERSION_MEAN`` orders while active are drawn one customer
    at a time (:func:`_sample_counts`).
    """
    out = np.broadcast_shapes(*(np.shape(v) for v in (customers, alive, shape, keep_log, a, stop_b)))
    customers = np.broadcast_to(np.asarray(customers, dtype=np.int64), out).reshape(-1)
    totals = np.zeros(customers.size, dtype=np.int64)
    every = _Places(np.arange(customers.size), out)
    take = {name: every.take(v) for name, v in
            (("alive", alive), ("shape", shape), ("keep_log", keep_log), ("a", a), ("stop_b", stop_b))}
    with np.errstate(over="ignore", invalid="ignore"):
        direct = ~(take["shape"] * (np.exp(-take["keep_log"]) - 1.0) <= _INVERSION_MEAN)
    groups = np.flatnonzero(~direct & (customers > 0))
    if groups.size:
        log_none = take["shape"][groups] * take["keep_log"][groups]
        q = 1.0 - np.exp(take["keep_log"][groups])
        rate_shape = take["shape"][groups]
        beta_b = take["stop_b"][groups]
        beta_ab = take["a"][groups] + beta_b
        chance_n = np.exp(log_none)
        tail_n = -np.expm1(log_none)
        tail_g = np.ones(groups.size)
        previous = np.ones(groups.size)  # S(n - 1)
        still = customers[groups]
        alive_now = take["alive"][groups]
        n = 1
        while groups.size and n < 100_000:
            if n > 1:
                chance_n = chance_n * q * (rate_shape + (n - 2)) / (n - 1)
                tail_n = tail_n - chance_n
                tail_g = tail_g * (beta_b + (n - 2)) / (beta_ab + (n - 2))
            survive = alive_now * tail_n * tail_g  # S(n)
            with np.errstate(invalid="ignore", divide="ignore"):
                share = np.clip(np.where(previous > 0, survive / previous, 0.0), 0.0, 1.0)
            still = rng.binomial(still, share)
            totals[groups] += still
            previous = survive
            going = np.flatnonzero(still > 0)
            groups, still, previous, chance_n, tail_n, tail_g, q, rate_shape, beta_b, beta_ab, alive_now = (
                arr[going] for arr in (groups, still, previous, chance_n, tail_n, tail_g, q, rate_shape, beta_b,
                                       beta_ab, alive_now))
            n += 1
    heavy = np.flatnonzero(direct & (customers > 0))
    if heavy.size:
        owner = np.repeat(heavy, customers[heavy])
        placed = _sample_counts(rng, *(take[name][owner] for name in ("alive", "shape", "keep_log", "a", "stop_b")))
        totals += np.bincount(owner, weights=placed, minlength=customers.size).astype(np.int64)
    return totals.reshape(out)


def _posterior_cells(params, x, t_x, age, horizon, model):
    """Per cell (parameter set x customer, broadcast): the pieces :func:`_sample_counts` wants.

    Returns (alive, shape, keep_log, a, stop_b) with alive the chance of eq. 11, shape = r + x,
    keep_log = log((alpha+T)/(alpha+T+h)), and the stop chance's posterior Beta(a, b + k).
    """
    r, alpha, a, b = params
    log_age = np.log(alpha + age)
    alive = special.expit(-_log_stop_odds_from(log_age, np.log(alpha + t_x), r, a, b, x, model))
    keep_log = log_age - np.log(alpha + age + horizon)
    return alive, r + x, keep_log, a, b + _coins(x, model)


def _log_stop_odds_from(log_age, log_last, r, a, b, x, model):
    """:func:`_log_stop_odds` with log(alpha + T) and log(alpha + t_x) already taken."""
    k = _coins(x, model)
    has_coin = k > 0
    k1 = np.where(has_coin, k, 1.0)
    odds = np.log(a) - np.log(b + (k1 - 1.0)) + (r + x) * (log_age - log_last)
    return np.where(has_coin, odds, -np.inf)


class _ActiveOrdersGrid:
    """Expected orders in the horizon while still active, for many parameter draws, by interpolation.

    The expected orders of a customer (eq. 10) are the chance of still being
    active (cheap: a few logarithms) times the orders expected while active,
    ``_orders_while_active``, whose hypergeometric function costs about a
    quarter of a microsecond; for D draws and N customers that is D x N of
    them. That factor depends on the history only through x and T, and
    smoothly on T: for each distinct x and each draw it is evaluated exactly
    on ``nodes`` points spread evenly in log(alpha + T) over the T of the
    customers with that x, and each customer's value is the cubic through the
    four nodes around their T (Lagrange's formula; the weights are the same
    for every draw, so they are worked out once). The tests hold it to the
    exact values within 1e-5 of their size (far below the simulations' own
    noise).
    """

    def __init__(self, param_draws, x, age, horizon, model, *, nodes=32):
        draws = np.asarray(param_draws, dtype=np.float64)
        x = np.asarray(x, dtype=np.float64)
        age = np.asarray(age, dtype=np.float64)
        counts, which = np.unique(x, return_inverse=True)
        which = which.reshape(-1)
        # Nodes even in log(shift + T): denser where the factor bends most, at short histories
        # (half the typical alpha does better than alpha itself, by a factor of five in the tests).
        shift = 0.5 * float(np.median(draws[:, 1]))
        position = np.log(shift + age)
        low = np.full(len(counts), np.inf)
        high = np.full(len(counts), -np.inf)
        np.minimum.at(low, which, position)
        np.maximum.at(high, which, position)
        step = np.maximum(high - low, 1e-9) / (nodes - 1)
        grid = np.maximum(np.exp(low[:, None] + step[:, None] * np.arange(nodes)) - shift, 0.0)
        params = tuple(draws[:, j][None, None, :] for j in range(4))
        ahead = np.broadcast_to(np.asarray(horizon, dtype=np.float64).reshape(-1), (len(draws),))[None, None, :]
        table = _orders_while_active(params, counts[:, None, None], grid[:, :, None], ahead,
                                     _coins(counts, model)[:, None, None])
        self.table = np.ascontiguousarray(table.reshape(len(counts) * nodes, len(draws)))
        place = (position - low[which]) / step[which]
        first = np.clip(np.floor(place).astype(np.int64) - 1, 0, nodes - 4)
        t = place - first
        self.rows = which * nodes + first
        self.weights = np.column_stack([-(t - 1) * (t - 2) * (t - 3) / 6, t * (t - 2) * (t - 3) / 2,
                                        -t * (t - 1) * (t - 3) / 2, t * (t - 1) * (t - 2) / 6])

    def values(self, part=slice(None)) -> np.ndarray:
        """(customers in ``part``) x draws: expected orders while active."""
        rows = self.rows[part]
        weights = self.weights[part]
        out = weights[:, :1] * self.table[rows]
        for j in range(1, 4):
            out += weights[:, j:j + 1] * self.table[rows + j]
        return out


def simulate_orders_ahead(param_draws, repeat_orders, days_to_last_order, days_known, horizon, *,
                          seed=0, model: str = "bg-nbd") -> np.ndarray:
    """Draw how many orders each customer places in the next ``horizon`` days.

    Parameters
    ----------
    param_draws : array_like, shape (D, 4)
        Rows of ``(r, alpha, a, b)``; row d is used for draw d (e.g. from
        :meth:`FrequencyFit.draw_parameters`, or the point estimate repeated).
    repeat_orders, days_to_last_order, days_known : array_like, shape (N,)
        x, t_x and T per customer (days).
    horizon : float or array_like of shape (N,)
        Days ahead of T (>= 0), one for everyone or one per customer.
    seed : int or numpy.random.Generator
        Seed for ``numpy.random.default_rng``.
    model : {"bg-nbd", "mbg-nbd"}
        The order-frequency model.

    Returns
    -------
    numpy.ndarray of int64, shape (D, N)
        One simulated order count per draw and customer. Its average over
        draws is the expected count of :func:`expected_orders_ahead`.

    Notes
    -----
    Each draw follows the model's own story from the customer's posterior
    (Bayes' rule on the model's assumptions, Fader, Hardie and Lee 2005),
    with k = x (BG/NBD) or x + 1 (MBG/NBD) coins survived:

    1. still active at T with the chance of eq. 11; a customer who has
       stopped orders nothing more;
    2. if active, the ordering rate lambda ~ Gamma(r + x, rate alpha + T)
       and the stop chance p ~ Beta(a, b + k) (the prior updated by the
       orders, the coins survived and the silence since the last order);
    3. orders then arrive after exponential gaps with rate lambda, and after
       each one the customer stops for good with chance p.

    Step 3 is drawn exactly without a loop over orders: the count of arrivals
    in the horizon is Poisson(lambda h) and the number of orders up to and
    including the one after which the customer stops is Geometric(p), so the
    orders placed are min(Poisson(lambda h), Geometric(p)). Steps 2 and 3
    together have a closed-form distribution, which is drawn from with one
    uniform number per cell (:func:`_sample_counts`). The tests check this
    against a literal event-by-event simulation.
    """
    draws = _check_draws_array(param_draws)
    model = _check_model(model)
    horizon = _check_horizons(horizon)
    rng = np.random.default_rng(seed)
    x, t_x, age = (np.asarray(v, dtype=np.float64)[None, :] for v in (repeat_orders, days_to_last_order, days_known))
    _check_arrays(x, t_x, age)
    params = tuple(draws[:, [k]] for k in range(4))
    return _sample_counts(rng, *_posterior_cells(params, x, t_x, age, horizon, model))


def simulate_new_customer_orders(param_rows, days, *, seed=0, model: str = "bg-nbd") -> np.ndarray:
    """Draw the repeat orders of brand-new customers, each with its own parameters and period.

    Parameters
    ----------
    param_rows : array_like, shape (N, 4)
        One ``(r, alpha, a, b)`` row per new customer (e.g. the parameter
        draw of the simulation round the customer belongs to).
    days : array_like, shape (N,)
        How long after their first order each customer is followed (>= 0).
    seed : int or numpy.random.Generator
        Seed for ``numpy.random.default_rng``.
    model : {"bg-nbd", "mbg-nbd"}
        The order-frequency model.

    Returns
    -------
    numpy.ndarray of int64, shape (N,)
        Repeat orders placed within ``days`` of the first order. Their
        average is :func:`expected_new_customer_orders`.

    Notes
    -----
    The story of :func:`simulate_orders_ahead` for x = 0, t_x = 0, T = 0:
    under MBG/NBD the customer first survives the coin of the first order
    with chance b/(a+b).
    """
    rows = _check_draws_array(param_rows)
    model = _check_model(model)
    days = np.asarray(days, dtype=np.float64)
    if days.shape != (rows.shape[0],) or not np.all(np.isfinite(days)) or np.any(days < 0):
        raise OrderDataError("give one number of days, zero or more, per new customer", option="horizon")
    rng = np.random.default_rng(seed)
    zeros = np.zeros(len(days))
    params = tuple(rows[:, k] for k in range(4))
    return _sample_counts(rng, *_posterior_cells(params, zeros, zeros, zeros, days, model))


# --------------------------------------------------------------------------- #
# Fitting
# --------------------------------------------------------------------------- #
@dataclass(frozen=True)
class FrequencyFit:
    """Fitted order-frequency parameters, BG/NBD or MBG/NBD (time in days of the fit's clock).

    Attributes
    ----------
    r, alpha : float
        Shape and rate (per day) of the Gamma spread of ordering rates; the
        average active customer orders r/alpha times a day.
    a, b : float
        Beta spread of the chance of stopping after each repeat order (and,
        in MBG/NBD, after the first order too); the average chance is a/(a+b).
    log_likelihood : float
        Summed log-likelihood at the fit.
    covariance : numpy.ndarray
        4 x 4 covariance of (log r, log alpha, log a, log b) from the inverse
        Hessian of the negative log-likelihood; NaN when the Hessian was not
        positive definite.
    customers : int
        Number of customers the fit used.
    converged : bool
        Whether the fit sits at an optimum (see :func:`judge_optimum`): small
        projected gradient, positive definite Hessian, away from the bounds.
    notes : tuple of str
        Plain-words remarks about the fit.
    repeat_customers : int
        Number of those customers with at least one repeat order.
    model : {"bg-nbd", "mbg-nbd"}
        Which model the parameters belong to.
    choice : str
        How the model was chosen, in plain words (empty when it was given).
    """

    r: float
    alpha: float
    a: float
    b: float
    log_likelihood: float
    covariance: np.ndarray = field(repr=False)
    customers: int
    converged: bool
    notes: tuple = ()
    repeat_customers: int = 0
    model: str = "bg-nbd"
    choice: str = ""

    @property
    def params(self) -> tuple:
        """``(r, alpha, a, b)``."""
        return (self.r, self.alpha, self.a, self.b)

    @property
    def usable(self) -> bool:
        """Whether the fit is sound enough to project from: it converged and at
        least ``MIN_REPEAT_CUSTOMERS`` customers ordered more than once."""
        return self.converged and self.repeat_customers >= MIN_REPEAT_CUSTOMERS

    @property
    def standard_errors(self) -> np.ndarray:
        """Delta-method standard errors of (r, alpha, a, b)."""
        return np.sqrt(np.diag(self.covariance)) * np.asarray(self.params)

    def expected_orders(self, history: pd.DataFrame, horizon) -> np.ndarray:
        """Expected orders in the next ``horizon`` days for each customer of ``history``."""
        x, t_x, age = _history_arrays(history)
        return expected_orders_ahead(self.params, x, t_x, age, horizon, model=self.model)

    def chance_active(self, history: pd.DataFrame) -> np.ndarray:
        """Chance each customer of ``history`` is still active."""
        x, t_x, age = _history_arrays(history)
        return chance_still_active(self.params, x, t_x, age, model=self.model)

    def new_customer_orders(self, days) -> np.ndarray:
        """Expected repeat orders of a brand-new customer within ``days``."""
        return expected_new_customer_orders(self.params, days, model=self.model)

    def draw_parameters(self, draws: int, *, seed=0) -> np.ndarray:
        """Draw parameter sets from the fit's normal approximation (log scale).

        Parameters
        ----------
        draws : int
            Number of parameter sets.
        seed : int or numpy.random.Generator
            Seed for ``numpy.random.default_rng``.

        Returns
        -------
        numpy.ndarray
            Shape (draws, 4): rows of (r, alpha, a, b). With an unusable
            covariance every row equals the point estimate.
        """
        rng = np.random.default_rng(seed)
        centre = np.log(np.asarray(self.params))
        if not np.all(np.isfinite(self.covariance)):
            return np.tile(np.asarray(self.params), (draws, 1))
        logs = rng.multivariate_normal(centre, self.covariance, size=draws, method="cholesky")
        # A very uncertain fit can draw absurd values; keep them finite and positive.
        return np.exp(np.clip(logs, -_DRAW_BOUND, _DRAW_BOUND))

    def as_dict(self) -> dict:
        """Plain floats and strings, for JSON and the dashboard (unknown values are None)."""
        errors = [float(e) if np.isfinite(e) else None for e in self.standard_errors]
        return {
            "model": self.model,
            "model_name": MODEL_NAMES[self.model],
            "model_choice": self.choice,
            "r": self.r,
            "alpha_days": self.alpha,
            "a": self.a,
            "b": self.b,
            "r_se": errors[0],
            "alpha_days_se": errors[1],
            "a_se": errors[2],
            "b_se": errors[3],
            "log_likelihood": self.log_likelihood,
            "customers": self.customers,
            "repeat_customers": self.repeat_customers,
            "converged": self.converged,
            "usable": self.usable,
            "orders_per_year_active": 365.25 * self.r / self.alpha,
            "chance_stop_after_order": self.a / (self.a + self.b),
            "chance_gone_after_first_order": self.a / (self.a + self.b) if self.model == "mbg-nbd" else 0.0,
            "notes": " ".join(self.notes),
        }


@dataclass(frozen=True)
class OptimumVerdict:
    """Whether a maximum-likelihood fit sits at an optimum, judged by the optimum itself.

    Attributes
    ----------
    reached : bool
        The projected gradient is small and the Hessian positive definite.
    covariance : numpy.ndarray
        Inverse Hessian (NaN where ``reached`` is False or a parameter is not
        pinned down by the data).
    notes : tuple of str
        Plain-words remarks, true to what was found.
    """

    reached: bool
    covariance: np.ndarray
    notes: tuple


# Largest projected slope of the mean negative log-likelihood (per customer, on
# the log-parameter scale) accepted at an optimum. The mean log-likelihood per
# customer is of order 1-10; 1e-5 relative to it is far below the change one
# customer more or less makes, yet well above the rounding noise of the sums.
_GRADIENT_TOLERANCE = 1e-5


def judge_optimum(log_params, mean_gradient, hessian, *, bound, names, scale=1.0) -> OptimumVerdict:
    """Judge a fit by the optimum it reached, not by the optimiser's message.

    Parameters
    ----------
    log_params : array of float
        The fitted log-parameters.
    mean_gradient : array of float
        Gradient of the *mean* negative log-likelihood (per customer) there.
    hessian : array of float
        Hessian of the *summed* negative log-likelihood there.
    bound : float
        The box |log parameter| <= bound the fit was held in.
    names : sequence of str
        Parameter names, for the notes.
    scale : float
        Size of the mean log-likelihood; the gradient test is relative to
        ``max(1, scale)``.

    Returns
    -------
    OptimumVerdict

    Notes
    -----
    A fit is accepted when the projected gradient (components pushing against
    a bound they already sit on are dropped) is below
    ``_GRADIENT_TOLERANCE * max(1, scale)`` and the Hessian is positive
    definite (a Cholesky factorisation succeeds). An optimiser can end with a
    complaint (a line search that found no lower value, a step limit) at a
    point that passes both tests; such a fit is sound, and its covariance is
    the inverse Hessian. A parameter whose log standard error exceeds
    ``_MAX_LOG_SE`` is reported as not pinned down.
    """
    log_params = np.asarray(log_params, dtype=np.float64)
    gradient = np.asarray(mean_gradient, dtype=np.float64).copy()
    at_upper = log_params > bound - 1e-6
    at_lower = log_params < -bound + 1e-6
    # At a bound, a slope pointing further out cannot be followed: it does not count.
    gradient[at_upper & (gradient < 0)] = 0.0
    gradient[at_lower & (gradient > 0)] = 0.0
    nan = np.full(hessian.shape, np.nan)
    notes = []
    at_bound = at_upper | at_lower
    if np.any(at_bound):
        hit = ", ".join(n for n, h in zip(names, at_bound) if h)
        notes.append(f"The order-frequency fit ran to the edge of the allowed range for {hit}; "
                     "the data say little about it.")
        return OptimumVerdict(False, nan, tuple(notes))
    slope = float(np.max(np.abs(gradient))) if gradient.size else 0.0
    if not np.isfinite(slope) or slope > _GRADIENT_TOLERANCE * max(1.0, abs(scale)):
        notes.append(f"The order-frequency fit stopped before reaching the best fit "
                     f"(the likelihood still slopes by {slope:.2g} per customer).")
        return OptimumVerdict(False, nan, tuple(notes))
    try:
        np.linalg.cholesky(hessian)
    except np.linalg.LinAlgError:
        notes.append("The order-frequency fit is not at a clear peak of the likelihood (it is flat or "
                     "saddle-shaped in some direction), so its parameters are not pinned down.")
        return OptimumVerdict(False, nan, tuple(notes))
    covariance = np.linalg.inv(hessian)
    log_se = np.sqrt(np.diag(covariance))
    loose = log_se > _MAX_LOG_SE
    if np.any(loose):
        # A standard error of e^5 ~ 150-fold either way: the data do not pin the
        # parameter down, and draws from such a normal would be meaningless.
        which = ", ".join(n for n, h in zip(names, loose) if h)
        notes.append(f"The data barely pin down {which}, so the uncertainty of the order-frequency fit "
                     "is not stated.")
        return OptimumVerdict(True, nan, tuple(notes))
    return OptimumVerdict(True, covariance, tuple(notes))


def _flat_objective(histories: _Histories, model):
    """The mean negative log-likelihood per customer in the log-parameters, with its slope and curvature."""
    n = len(histories.x)

    def objective(log_params):
        params = np.exp(log_params)
        terms = _Terms(params, histories, model)
        value = -float(terms.value.sum()) / n

        def derivatives():
            terms.prepare(2)
            gradient, hessian = log_scale(params, terms.gradient(), terms.hessian())
            return -gradient / n, -hessian / n

        return (value, derivatives) if np.isfinite(value) else (np.inf, None)

    return objective


def _negative_mean_ll(log_params, x, t_x, age, model="bg-nbd"):
    """Mean negative log-likelihood per customer at the log-parameters, and its gradient (1e300 off the domain)."""
    value, derivatives = _flat_objective(_Histories(x, t_x, age), model)(np.asarray(log_params, dtype=np.float64))
    if derivatives is None:
        return 1e300, np.zeros(4)
    return value, derivatives()[0]


def hessian_by_differences(gradient_of, point, *, step=1e-5) -> np.ndarray:
    """Central differences of an analytic gradient, symmetrised.

    Parameters
    ----------
    gradient_of : callable
        ``gradient_of(point) -> array`` of the same length as ``point``.
    point : array of float
        Where to take the Hessian.
    step : float
        Step of the differences.

    Returns
    -------
    numpy.ndarray
        The (len(point) x len(point)) Hessian.
    """
    point = np.asarray(point, dtype=np.float64)
    size = len(point)
    hessian = np.empty((size, size))
    for j in range(size):
        shift = np.zeros(size)
        shift[j] = step
        hessian[:, j] = (gradient_of(point + shift) - gradient_of(point - shift)) / (2 * step)
    return 0.5 * (hessian + hessian.T)


def _hessian_of_negative_ll(log_params, x, t_x, age, model="bg-nbd"):
    """Hessian of the summed negative log-likelihood in the log-parameters (analytic, :class:`_Terms`)."""
    _, derivatives = _flat_objective(_Histories(x, t_x, age), model)(np.asarray(log_params, dtype=np.float64))
    if derivatives is None:
        return np.full((4, 4), np.nan)
    return derivatives()[1] * len(np.atleast_1d(x))


def _data_notes(x):
    """Plain-words remarks on how much the history can say, and the count of repeat customers."""
    notes = []
    repeat_customers = int(np.count_nonzero(x > 0))
    if repeat_customers < MIN_REPEAT_CUSTOMERS:
        notes.append(f"Only {repeat_customers} customers ordered more than once; at least "
                     f"{MIN_REPEAT_CUSTOMERS} are needed to say how often customers come back.")
    elif len(x) < 30:
        notes.append(f"Only {len(x)} customers: the order-frequency fit is rough.")
    return notes, repeat_customers


def check_repeat_history(x) -> None:
    """Refuse a history no order-frequency model can be fitted on (no customers, or no repeat order)."""
    if len(x) == 0:
        raise OrderDataError("there are no customers to fit order frequency on")
    if not np.any(np.asarray(x) > 0):
        raise OrderDataError(
            "no customer has ordered more than once, so how often customers come back cannot be estimated",
            fix="Use a longer stretch of orders (or a later cut-off date)",
        )


def default_start(x, age) -> tuple:
    """Starting (r, alpha, a, b): r = 1, alpha = days known / repeat orders, a = 1, b = 3."""
    return (1.0, max(float(np.sum(age)), 1.0) / max(float(np.sum(x)), 1.0), 1.0, 3.0)


def fit_order_frequency(history: pd.DataFrame, *, model: str = "bg-nbd", start=None) -> FrequencyFit:
    """Fit an order-frequency model (BG/NBD or MBG/NBD) by maximum likelihood.

    Parameters
    ----------
    history : pandas.DataFrame
        Output of :func:`repeat_history` (``repeat_orders``,
        ``days_to_last_order``, ``days_known``).
    model : {"bg-nbd", "mbg-nbd", "auto"}, default "bg-nbd"
        The model; ``"auto"`` fits both and keeps the one the history
        supports better (:func:`choose_order_model`).
    start : sequence of 4 floats, optional
        Starting ``(r, alpha, a, b)``. By default r = 1, alpha = total days
        known / total repeat orders (so r/alpha matches the shop's overall
        repeat rate), a = 1, b = 3.

    Returns
    -------
    FrequencyFit

    Raises
    ------
    OrderDataError
        If no customer has a repeat order (the ordering rate cannot be
        estimated) or the history is malformed.

    Notes
    -----
    Maximises the summed log-likelihood of :func:`frequency_log_likelihood`
    over the log-parameters (so every parameter stays positive) by Newton
    steps with the analytic gradient and Hessian (:func:`forecasting.newton.minimise`; the
    special functions are evaluated once per distinct number of repeat
    orders, :class:`_Histories`). Whether the fit reached the optimum is
    judged at the point it returns (:func:`judge_optimum`), not by the
    optimiser's own message. The covariance of the log-parameters is the
    inverse of the analytic Hessian of the negative log-likelihood there
    (the tests check it against second differences of the likelihood); the
    parameter standard errors follow by the delta method. ``start`` lets a
    fit begin from a nearby optimum (the previous cut-off's in a rolling
    check): Newton steps end where the slope vanishes to rounding, so the
    result does not depend on the start. Every customer counts once; repeat
    orders on the same day count as separate orders.

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). "Counting your
    customers" the easy way: an alternative to the Pareto/NBD model.
    Marketing Science 24(2), 275-284.

    Batislam, E. P., Denizel, M. and Filiztekin, A. (2007). Empirical
    validation and comparison of models for customer base analysis.
    International Journal of Research in Marketing 24(3), 201-209.
    """
    if model == "auto":
        return choose_order_model(history, start=start)
    model = _check_model(model)
    x, t_x, age = _history_arrays(history)
    check_repeat_history(x)
    notes, repeat_customers = _data_notes(x)
    start = _check_params(default_start(x, age) if start is None else start)
    histories = _Histories(x, t_x, age)
    bound = np.full(4, _LOG_BOUND)
    descent = minimise(_flat_objective(histories, model), np.log(start), -bound, bound)
    log_params = descent.point
    verdict = judge_optimum(log_params, descent.gradient, descent.hessian * len(x), bound=_LOG_BOUND,
                            names=("r", "alpha", "a", "b"), scale=descent.value)
    notes.extend(verdict.notes)
    params = np.exp(log_params)
    log_likelihood = -descent.value * len(x)
    return FrequencyFit(
        r=float(params[0]),
        alpha=float(params[1]),
        a=float(params[2]),
        b=float(params[3]),
        log_likelihood=log_likelihood,
        covariance=verdict.covariance,
        customers=int(len(x)),
        converged=verdict.reached,
        notes=tuple(notes),
        repeat_customers=repeat_customers,
        model=model,
    )


def pick_by_likelihood(fits: dict) -> tuple:
    """The better of fitted models with equally many parameters, and the words saying why.

    Parameters
    ----------
    fits : dict
        ``{model name: fit}``; each fit has ``log_likelihood`` and ``usable``.

    Returns
    -------
    (str, str)
        The chosen model's name and a plain-words sentence with both log-likelihoods.

    Notes
    -----
    Models with the same number of parameters are compared by their
    maximised likelihood (Akaike's criterion then agrees). A fit that is not
    usable (did not reach an optimum) loses to one that is; when neither is
    usable, or the likelihoods tie, BG/NBD is kept.
    """
    usable = {name: fit for name, fit in fits.items() if fit.usable and math.isfinite(fit.log_likelihood)}
    pool = usable or fits
    best = max(sorted(pool), key=lambda name: (pool[name].log_likelihood, name == "bg-nbd"))
    others = [name for name in sorted(fits) if name != best]
    if not others:
        return best, ""
    other = others[0]
    if other not in usable and best in usable:
        reason = f"{MODEL_NAMES[other]} could not be fitted soundly on these orders"
    else:
        reason = (f"log-likelihood {fits[best].log_likelihood:,.1f} against {fits[other].log_likelihood:,.1f} "
                  f"for {MODEL_NAMES[other]}, with as many parameters")
    return best, f"{MODEL_NAMES[best]} fits these orders better ({reason})."


def choose_order_model(history: pd.DataFrame, *, start=None) -> FrequencyFit:
    """Fit BG/NBD and MBG/NBD and keep the one the shop's orders support better.

    Parameters
    ----------
    history : pandas.DataFrame
        Output of :func:`repeat_history`.
    start : sequence of 4 floats, optional
        Starting values for both fits.

    Returns
    -------
    FrequencyFit
        The chosen fit, with ``choice`` saying why (see :func:`pick_by_likelihood`).

    Notes
    -----
    Both models have four parameters, so they are compared by their
    maximised log-likelihood on the same histories. The tests check on
    simulated shops that this picks the model a shop was simulated from.
    """
    fits = {name: fit_order_frequency(history, model=name, start=start) for name in FREQUENCY_MODELS}
    best, words = pick_by_likelihood(fits)
    return replace(fits[best], choice=words)


def frequency_forecast(history: pd.DataFrame, *, horizon, fit: FrequencyFit | None = None,
                       model: str = "bg-nbd") -> pd.DataFrame:
    """Expected orders in the horizon and chance of being active, per customer.

    Parameters
    ----------
    history : pandas.DataFrame
        Output of :func:`repeat_history`.
    horizon : float
        Days ahead of each customer's "as of" date.
    fit : FrequencyFit, optional
        A fitted model; fitted on ``history`` when not given.
    model : {"bg-nbd", "mbg-nbd", "auto"}, default "bg-nbd"
        The model fitted when ``fit`` is not given.

    Returns
    -------
    pandas.DataFrame
        ``history``'s columns plus ``expected_orders`` and ``chance_active``,
        same index; ``attrs["fit"]`` holds :meth:`FrequencyFit.as_dict`.
    """
    horizon = _check_horizon(horizon)
    if fit is None:
        fit = fit_order_frequency(history, model=model)
    table = history[HISTORY_COLUMNS].copy()
    table["expected_orders"] = fit.expected_orders(history, horizon)
    table["chance_active"] = fit.chance_active(history)
    table.attrs["fit"] = fit.as_dict()
    return table
