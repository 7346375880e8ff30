"""How often customers order again: the BG/NBD order-frequency model.

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
* :func:`month_of_year_index` and :func:`seasonal_days` -- how much busier each
  calendar month is for repeat orders than the model says, and the length of a
  period on the seasonal clock that index defines.

The model (Fader, Hardie and Lee 2005): while a customer is active, orders
arrive as a Poisson process with rate lambda; after each repeat order the
customer stops for good with probability p. Across customers lambda follows a
Gamma(r, rate alpha) and p a Beta(a, b) distribution. Because time is in days,
alpha is in days too (the paper works in weeks: alpha_days = 7 alpha_weeks, r,
a and b are unchanged).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import optimize, special

from .errors import OrderDataError

__all__ = [
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
    "expected_new_customer_orders",
    "chance_still_active",
    "frequency_forecast",
    "judge_optimum",
    "MIN_SEASON_DAYS",
    "SEASON_COLUMNS",
    "month_of_year_index",
    "seasonal_days",
]

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
def _log_terms(params, x, t_x, age):
    """Return the three log-pieces of the published likelihood.

    log L = base + log(exp(alive) + [x > 0] exp(stopped)).
    """
    r, alpha, a, b = params
    base = special.gammaln(r + x) - special.gammaln(r) + r * np.log(alpha)
    beta_ab = special.betaln(a, b)
    alive = special.betaln(a, b + x) - beta_ab - (r + x) * np.log(alpha + age)
    has_repeat = x > 0
    x1 = np.where(has_repeat, x, 1.0)  # keeps b + x - 1 > 0 where the term is unused
    stopped = special.betaln(a + 1.0, b + (x1 - 1.0)) - beta_ab - (r + x) * np.log(alpha + t_x)
    stopped = np.where(has_repeat, stopped, -np.inf)
    return base, alive, stopped


def frequency_log_likelihood(params, repeat_orders, days_to_last_order, days_known) -> np.ndarray:
    """Log-likelihood of each customer's repeat history under BG/NBD.

    Parameters
    ----------
    params : sequence of 4 floats
        ``(r, alpha, a, b)``, all positive; ``alpha`` in days.
    repeat_orders, days_to_last_order, days_known : array_like
        x, t_x and T per customer (days).

    Returns
    -------
    numpy.ndarray
        One log-likelihood per customer.

    Notes
    -----
    The likelihood of one customer (Fader, Hardie and Lee 2005, eq. 6) is

    .. math::

        L = \\frac{\\Gamma(r+x)\\,\\alpha^r}{\\Gamma(r)}
            \\left[\\frac{B(a, b+x)}{B(a,b)}\\,\\frac{1}{(\\alpha+T)^{r+x}}
            + \\delta_{x>0}\\,\\frac{B(a+1, b+x-1)}{B(a,b)}\\,
            \\frac{1}{(\\alpha+t_x)^{r+x}}\\right].

    It is evaluated on the log scale with ``gammaln``/``betaln`` and the two
    bracketed terms combined by ``logaddexp``, so customers with hundreds of
    orders or very long histories do not overflow.

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). "Counting your
    customers" the easy way: an alternative to the Pareto/NBD model.
    Marketing Science 24(2), 275-284.
    """
    x, t_x, age = (np.asarray(v, dtype=np.float64) for v in (repeat_orders, days_to_last_order, days_known))
    base, alive, stopped = _log_terms(params, x, t_x, age)
    return base + np.logaddexp(alive, stopped)


def frequency_log_likelihood_gradient(params, repeat_orders, days_to_last_order, days_known) -> np.ndarray:
    """Gradient of the summed log-likelihood with respect to (r, alpha, a, b).

    Parameters
    ----------
    params : sequence of 4 floats
        ``(r, alpha, a, b)``.
    repeat_orders, days_to_last_order, days_known : array_like
        x, t_x and T per customer (days).

    Returns
    -------
    numpy.ndarray
        Shape (4,): d(sum log L)/d(r, alpha, a, b).

    Notes
    -----
    With w the share of each customer's likelihood in the "still active" term,

    * d/dr     = psi(r+x) - psi(r) + log(alpha) - w log(alpha+T) - (1-w) log(alpha+t_x)
    * d/dalpha = r/alpha - (r+x) [w/(alpha+T) + (1-w)/(alpha+t_x)]
    * d/da     = w [psi(a+b) - psi(a+b+x)] + (1-w) [psi(a+1) - psi(a) + psi(a+b) - psi(a+b+x)]
    * d/db     = w [psi(b+x) - psi(b) + psi(a+b) - psi(a+b+x)]
      + (1-w) [psi(b+x-1) - psi(b) + psi(a+b) - psi(a+b+x)]
    """
    r, alpha, a, b = params
    x, t_x, age = (np.asarray(v, dtype=np.float64) for v in (repeat_orders, days_to_last_order, days_known))
    _, alive, stopped = _log_terms(params, x, t_x, age)
    w_alive = np.exp(alive - np.logaddexp(alive, stopped))
    w_stop = 1.0 - w_alive
    psi = special.digamma
    x1 = np.where(x > 0, x, 1.0)
    d_r = psi(r + x) - psi(r) + np.log(alpha) - w_alive * np.log(alpha + age) - w_stop * np.log(alpha + t_x)
    d_alpha = r / alpha - (r + x) * (w_alive / (alpha + age) + w_stop / (alpha + t_x))
    common = psi(a + b) - psi(a + b + x)
    d_a = w_alive * common + w_stop * (psi(a + 1.0) - psi(a) + common)
    d_b = w_alive * (psi(b + x) - psi(b) + common) + w_stop * (psi(b + (x1 - 1.0)) - psi(b) + common)
    return np.array([d_r.sum(), d_alpha.sum(), d_a.sum(), d_b.sum()])


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


def _orders_while_active(params, x, age, horizon):
    """Expected orders in (T, T + horizon] for a customer active at T.

    Fader, Hardie and Lee (2005), numerator of eq. 10:
    (a+b+x-1)/(a-1) [1 - ((alpha+T)/(alpha+T+h))^(r+x) 2F1(r+x, b+x; a+b+x-1; z)],
    z = h/(alpha+T+h). Euler's transformation 2F1(A,B;C;z) =
    (1-z)^(C-A-B) 2F1(C-A, C-B; C; z) turns the bracket into
    1 - (1-z)^(a-1) 2F1(a+b-1-r, a-1; a+b+x-1; z), whose first two
    hypergeometric parameters do not grow with x (better conditioned for
    regular customers). Parameters may be arrays broadcasting against x.
    """
    r, alpha, a, b = params
    near_one = np.abs(np.asarray(a, dtype=np.float64) - 1.0) < 1e-6
    if np.any(near_one):
        # (a+b+x-1)/(a-1) [...] is 0/0 at a = 1; the expectation is smooth in a,
        # so there it is the average of the two sides a = 1 +- 1e-5 (error ~1e-10).
        step = 1e-5
        upper = _orders_while_active((r, alpha, np.where(near_one, 1.0 + step, a), b), x, age, horizon)
        lower = _orders_while_active((r, alpha, np.where(near_one, 1.0 - step, a), b), x, age, horizon)
        return np.where(near_one, 0.5 * (upper + lower), upper)
    z = horizon / (alpha + age + horizon)
    hyper = _gauss_hypergeometric(a + b - 1.0 - r, a - 1.0, a + b + x - 1.0, z)
    bracket = 1.0 - np.exp((a - 1.0) * np.log1p(-z)) * hyper
    factor = (a + b + x - 1.0) / (a - 1.0)
    value = factor * bracket
    failed = ~np.isfinite(value)
    if np.any(failed):
        # With a and b in the thousands (a stop chance the data barely pin down,
        # met in parameter draws) the transformed 2F1 overflows although the
        # product is modest; the printed form's parameters r+x, b+x stay tame there.
        shape = np.shape(value)
        pick = [np.broadcast_to(v, shape)[failed] for v in (r + x, b + x, a + b + x - 1.0, z, factor)]
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
        raise OrderDataError("the horizon must be a number of days", column="horizon", value=horizon,
                             fix="Use for example --horizon 90") from None
    if not np.isfinite(value) or value < 0:
        raise OrderDataError("the horizon must be zero or more days", column="horizon", value=horizon,
                             fix="Use for example --horizon 90")
    return value


def expected_new_customer_orders(params, days) -> np.ndarray:
    """Expected repeat orders in the first ``days`` days of a new customer.

    Parameters
    ----------
    params : sequence of 4 floats
        ``(r, alpha, a, b)`` with ``alpha`` in days.
    days : float or array_like
        Length of the period after the first order, in days (>= 0).

    Returns
    -------
    numpy.ndarray
        E[X(t)], same shape as ``days``.

    Notes
    -----
    Fader, Hardie and Lee (2005), eq. 7:

    .. math::

        E[X(t)] = \\frac{a+b-1}{a-1}\\left[1 - \\left(\\frac{\\alpha}{\\alpha+t}\\right)^r
        {}_2F_1\\!\\left(r, b; a+b-1; \\frac{t}{\\alpha+t}\\right)\\right],

    evaluated through Euler's transformation of the hypergeometric function
    (an identity; see :func:`expected_orders_ahead`). It is eq. 10 with
    x = 0 and T = 0.

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). Marketing Science
    24(2), 275-284.
    """
    params = _check_params(params)
    days = np.asarray(days, dtype=np.float64)
    if np.any(days < 0) or not np.all(np.isfinite(days)):
        raise OrderDataError("the number of days must be zero or more", value=days)
    return _orders_while_active(params, np.zeros_like(days), np.zeros_like(days), days)


def _log_stop_odds(params, x, t_x, age):
    """log of (a/(b+x-1)) ((alpha+T)/(alpha+t_x))^(r+x) for x > 0; -inf for x = 0."""
    r, alpha, a, b = params
    has_repeat = x > 0
    x1 = np.where(has_repeat, x, 1.0)
    odds = np.log(a) - np.log(b + (x1 - 1.0)) + (r + x) * (np.log(alpha + age) - np.log(alpha + t_x))
    return np.where(has_repeat, odds, -np.inf)


def chance_still_active(params, repeat_orders, days_to_last_order, days_known) -> np.ndarray:
    """Probability each customer is still an active customer at T.

    Parameters
    ----------
    params : sequence of 4 floats
        ``(r, alpha, a, b)``.
    repeat_orders, days_to_last_order, days_known : array_like
        x, t_x and T per customer (days).

    Returns
    -------
    numpy.ndarray
        P(active | x, t_x, T) in (0, 1]; exactly 1 for customers without a
        repeat order (in this model customers can only stop right after a
        repeat order).

    Notes
    -----
    Fader, Hardie and Lee (2005), eq. 11:
    1 / (1 + [x > 0] (a/(b+x-1)) ((alpha+T)/(alpha+t_x))^(r+x)), computed as a
    logistic function of the log-odds so it never overflows.
    """
    params = _check_params(params)
    x, t_x, age = (np.asarray(v, dtype=np.float64) for v in (repeat_orders, days_to_last_order, days_known))
    return special.expit(-_log_stop_odds(params, x, t_x, age))


def expected_orders_ahead(params, repeat_orders, days_to_last_order, days_known, horizon) -> np.ndarray:
    """Expected number of orders in the next ``horizon`` days, per customer.

    Parameters
    ----------
    params : sequence of 4 floats
        ``(r, alpha, a, b)``, ``alpha`` in days.
    repeat_orders, days_to_last_order, days_known : array_like
        x, t_x and T per customer (days).
    horizon : float
        Days ahead of T (>= 0).

    Returns
    -------
    numpy.ndarray
        E[Y(horizon) | x, t_x, T] per customer.

    Notes
    -----
    Fader, Hardie and Lee (2005), eq. 10:

    .. math::

        E[Y(t)\\mid x, t_x, T] = \\frac{\\frac{a+b+x-1}{a-1}\\left[1 -
        \\left(\\frac{\\alpha+T}{\\alpha+T+t}\\right)^{r+x}
        {}_2F_1\\!\\left(r+x, b+x; a+b+x-1; \\frac{t}{\\alpha+T+t}\\right)\\right]}
        {1 + \\delta_{x>0}\\frac{a}{b+x-1}\\left(\\frac{\\alpha+T}{\\alpha+t_x}\\right)^{r+x}}.

    The code departs from the printed form in two harmless ways: the
    hypergeometric term is evaluated after Euler's transformation,
    ``(1-z)^(a-1) 2F1(a+b-1-r, a-1; a+b+x-1; z)``, which equals the printed
    ``(1-z)^(r+x) 2F1(r+x, b+x; a+b+x-1; z)`` but keeps its parameters small for
    customers with many orders; and the denominator is applied as the chance
    of still being active (eq. 11), a logistic function of log-odds. At a = 1
    the formula is 0/0; the code then averages a = 1 +- 1e-5.

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). "Counting your
    customers" the easy way. Marketing Science 24(2), 275-284.

    Examples
    --------
    The worked example with the CDNOW estimates (in weeks): a customer with two
    repeat orders, the last at week 30.43, seen for 38.86 weeks, over 39 weeks:

    >>> round(float(expected_orders_ahead((0.243, 4.414, 0.793, 2.426), 2, 30.43, 38.86, 39)), 3)
    1.226
    """
    params = _check_params(params)
    horizon = _check_horizon(horizon)
    x, t_x, age = (np.asarray(v, dtype=np.float64) for v in (repeat_orders, days_to_last_order, days_known))
    active = special.expit(-_log_stop_odds(params, x, t_x, age))
    return _orders_while_active(params, x, age, horizon) * active


def expected_orders_for_draws(param_draws, repeat_orders, days_to_last_order, days_known, horizon) -> np.ndarray:
    """:func:`expected_orders_ahead` for many parameter sets at once.

    Parameters
    ----------
    param_draws : array_like, shape (D, 4)
        Rows of ``(r, alpha, a, b)``, e.g. from :meth:`FrequencyFit.draw_parameters`.
    repeat_orders, days_to_last_order, days_known : array_like, shape (N,)
        x, t_x and T per customer (days).
    horizon : float
        Days ahead of T.

    Returns
    -------
    numpy.ndarray
        Shape (D, N): row d is ``expected_orders_ahead(param_draws[d], ...)``.
    """
    draws = np.asarray(param_draws, dtype=np.float64)
    if draws.ndim != 2 or draws.shape[1] != 4 or not np.all(np.isfinite(draws)) or np.any(draws <= 0):
        raise OrderDataError("parameter draws must be rows of four positive numbers (r, alpha, a, b)")
    horizon = _check_horizon(horizon)
    x, t_x, age = (np.asarray(v, dtype=np.float64)[None, :] for v in (repeat_orders, days_to_last_order, days_known))
    params = tuple(draws[:, [k]] for k in range(4))
    active = special.expit(-_log_stop_odds(params, x, t_x, age))
    return _orders_while_active(params, x, age, horizon) * active


def simulate_orders_ahead(param_draws, repeat_orders, days_to_last_order, days_known, horizon, *,
                          seed=0) -> np.ndarray:
    """Draw how many orders each customer places in the next ``horizon`` days.

    Parameters
    ----------
    param_draws : array_like, shape (D, 4)
        Rows of ``(r, alpha, a, b)``; row d is used for draw d (e.g. from
        :meth:`FrequencyFit.draw_parameters`, or the point estimate repeated).
    repeat_orders, days_to_last_order, days_known : array_like, shape (N,)
        x, t_x and T per customer (days).
    horizon : float
        Days ahead of T (>= 0).
    seed : int or numpy.random.Generator
        Seed for ``numpy.random.default_rng``.

    Returns
    -------
    numpy.ndarray of int64, shape (D, N)
        One simulated order count per draw and customer. Its average over
        draws is the expected count of :func:`expected_orders_ahead`.

    Notes
    -----
    Each draw follows the model's own story from the customer's posterior
    (Bayes' rule on the BG/NBD assumptions, Fader, Hardie and Lee 2005):

    1. still active at T with the chance of eq. 11; a customer who has
       stopped orders nothing more;
    2. if active, the ordering rate lambda ~ Gamma(r + x, rate alpha + T)
       and the stop chance p ~ Beta(a, b + x) (the prior updated by x repeat
       orders and the silence since the last one);
    3. orders then arrive after exponential gaps with rate lambda, and after
       each one the customer stops for good with chance p.

    Step 3 is drawn exactly without a loop over orders: the count of arrivals
    in the horizon is Poisson(lambda h) and the number of orders up to and
    including the one after which the customer stops is Geometric(p), so the
    orders placed are min(Poisson(lambda h), Geometric(p)). The tests check
    this against a literal event-by-event simulation.
    """
    draws = np.asarray(param_draws, dtype=np.float64)
    if draws.ndim != 2 or draws.shape[1] != 4 or not np.all(np.isfinite(draws)) or np.any(draws <= 0):
        raise OrderDataError("parameter draws must be rows of four positive numbers (r, alpha, a, b)")
    horizon = _check_horizon(horizon)
    rng = np.random.default_rng(seed)
    x, t_x, age = (np.asarray(v, dtype=np.float64)[None, :] for v in (repeat_orders, days_to_last_order, days_known))
    _check_arrays(x, t_x, age)
    r, alpha, a, b = (draws[:, [k]] for k in range(4))
    shape = (draws.shape[0], x.shape[1])
    active = rng.random(shape) < special.expit(-_log_stop_odds((r, alpha, a, b), x, t_x, age))
    rate = rng.gamma(np.broadcast_to(r + x, shape), 1.0) / (alpha + age)
    stop = rng.beta(np.broadcast_to(a, shape), np.broadcast_to(b + x, shape))
    # Keep both draws inside what numpy's samplers accept (a rate of 1e12 orders
    # in the horizon, or a stop chance of 1e-300, already means "no limit").
    arrivals = rng.poisson(np.minimum(rate * horizon, _MAX_SIMULATED_ARRIVALS))
    stop_count = rng.geometric(np.clip(stop, 1e-300, 1.0))
    return np.where(active, np.minimum(arrivals, stop_count), 0).astype(np.int64)


# --------------------------------------------------------------------------- #
# Fitting
# --------------------------------------------------------------------------- #
@dataclass(frozen=True)
class FrequencyFit:
    """Fitted BG/NBD order-frequency parameters (time in days).

    Attributes
    ----------
    r, alpha : float
        Shape and rate (per day) of the Gamma spread of ordering rates; the
        average active customer orders r/alpha times a day.
    a, b : float
        Beta spread of the chance of stopping after each repeat order; the
        average chance is a/(a+b).
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
        return expected_orders_ahead(self.params, x, t_x, age, horizon)

    def chance_active(self, history: pd.DataFrame) -> np.ndarray:
        """Chance each customer of ``history`` is still active."""
        x, t_x, age = _history_arrays(history)
        return chance_still_active(self.params, x, t_x, age)

    def new_customer_orders(self, days) -> np.ndarray:
        """Expected repeat orders of a brand-new customer within ``days``."""
        return expected_new_customer_orders(self.params, days)

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
    definite (a Cholesky factorisation succeeds). Quasi-Newton optimisers can
    end with a warning such as "ABNORMAL" from their line search at a point
    that passes both tests; such a fit is sound, and its covariance is the
    inverse Hessian. A parameter whose log standard error exceeds
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


def _negative_mean_ll(log_params, x, t_x, age):
    params = np.exp(log_params)
    value = -frequency_log_likelihood(params, x, t_x, age).sum() / len(x)
    grad = -frequency_log_likelihood_gradient(params, x, t_x, age) * params / len(x)
    if not np.isfinite(value):
        return 1e300, np.zeros(4)
    return value, grad


def _hessian_of_negative_ll(log_params, x, t_x, age, step=1e-5):
    """Central differences of the analytic gradient (summed, log scale), symmetrised."""
    hessian = np.empty((4, 4))
    for j in range(4):
        shift = np.zeros(4)
        shift[j] = step
        up = _negative_mean_ll(log_params + shift, x, t_x, age)[1]
        down = _negative_mean_ll(log_params - shift, x, t_x, age)[1]
        hessian[:, j] = (up - down) / (2 * step)
    hessian = 0.5 * (hessian + hessian.T)
    return hessian * len(x)


def fit_order_frequency(history: pd.DataFrame, *, start=None) -> FrequencyFit:
    """Fit the BG/NBD order-frequency model by maximum likelihood.

    Parameters
    ----------
    history : pandas.DataFrame
        Output of :func:`repeat_history` (``repeat_orders``,
        ``days_to_last_order``, ``days_known``).
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
    over the log-parameters with L-BFGS-B and the analytic gradient, so every
    parameter stays positive. Whether the fit reached the optimum is judged
    at the point it returns (:func:`judge_optimum`), not by the optimiser's
    own message. The covariance of the log-parameters is the
    inverse of the Hessian of the negative log-likelihood, taken by central
    differences of the analytic gradient; the parameter standard errors follow
    by the delta method. Every customer counts once; repeat orders on the same
    day count as separate orders.

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). "Counting your
    customers" the easy way: an alternative to the Pareto/NBD model.
    Marketing Science 24(2), 275-284.
    """
    x, t_x, age = _history_arrays(history)
    if len(x) == 0:
        raise OrderDataError("there are no customers to fit order frequency on")
    if not np.any(x > 0):
        raise OrderDataError(
            "no customer has ordered more than once, so how often customers come back cannot be estimated",
            fix="Use a longer stretch of orders (or a later cut-off date)",
        )
    notes = []
    repeat_customers = int(np.count_nonzero(x > 0))
    if repeat_customers < MIN_REPEAT_CUSTOMERS:
        notes.append(f"Only {repeat_customers} customers ordered more than once; at least "
                     f"{MIN_REPEAT_CUSTOMERS} are needed to say how often customers come back.")
    elif len(x) < 30:
        notes.append(f"Only {len(x)} customers: the order-frequency fit is rough.")
    if start is None:
        start = (1.0, max(age.sum(), 1.0) / max(x.sum(), 1.0), 1.0, 3.0)
    start = _check_params(start)
    result = optimize.minimize(
        _negative_mean_ll,
        np.log(start),
        args=(x, t_x, age),
        jac=True,
        method="L-BFGS-B",
        bounds=[(-_LOG_BOUND, _LOG_BOUND)] * 4,
        options={"maxiter": 5000, "ftol": 1e-15, "gtol": 1e-10},
    )
    log_params = result.x
    hessian = _hessian_of_negative_ll(log_params, x, t_x, age)
    mean_value, gradient = _negative_mean_ll(log_params, x, t_x, age)
    verdict = judge_optimum(log_params, gradient, hessian, bound=_LOG_BOUND,
                            names=("r", "alpha", "a", "b"), scale=mean_value)
    converged = verdict.reached
    notes.extend(verdict.notes)
    covariance = verdict.covariance
    params = np.exp(log_params)
    log_likelihood = float(frequency_log_likelihood(params, x, t_x, age).sum())
    return FrequencyFit(
        r=float(params[0]),
        alpha=float(params[1]),
        a=float(params[2]),
        b=float(params[3]),
        log_likelihood=log_likelihood,
        covariance=covariance,
        customers=int(len(x)),
        converged=converged,
        notes=tuple(notes),
        repeat_customers=repeat_customers,
    )


def frequency_forecast(history: pd.DataFrame, *, horizon, fit: FrequencyFit | None = None) -> pd.DataFrame:
    """Expected orders in the horizon and chance of being active, per customer.

    Parameters
    ----------
    history : pandas.DataFrame
        Output of :func:`repeat_history`.
    horizon : float
        Days ahead of each customer's "as of" date.
    fit : FrequencyFit, optional
        A fitted model; fitted on ``history`` when not given.

    Returns
    -------
    pandas.DataFrame
        ``history``'s columns plus ``expected_orders`` and ``chance_active``,
        same index; ``attrs["fit"]`` holds :meth:`FrequencyFit.as_dict`.
    """
    horizon = _check_horizon(horizon)
    if fit is None:
        fit = fit_order_frequency(history)
    table = history[HISTORY_COLUMNS].copy()
    table["expected_orders"] = fit.expected_orders(history, horizon)
    table["chance_active"] = fit.chance_active(history)
    table.attrs["fit"] = fit.as_dict()
    return table


# --------------------------------------------------------------------------- #
# Seasons
# --------------------------------------------------------------------------- #
# A seasonal index needs every calendar month seen at least once.
MIN_SEASON_DAYS = 365
SEASON_COLUMNS = ["month", "repeat_orders", "model_orders", "index"]
# Average Gregorian month lengths in days (February 28.2425), for weighting months.
_MONTH_DAYS = np.array([31.0, 28.2425, 31.0, 30.0, 31.0, 30.0, 31.0, 31.0, 30.0, 31.0, 30.0, 31.0])
# Customer-by-edge cells evaluated at once when summing the model's expected orders.
_SEASON_CELLS = 1_000_000
# Most rounds of the fixed-point search for the index (it settles in a handful).
_SEASON_ROUNDS = 50


def _month_edges(start: pd.Timestamp, end: pd.Timestamp) -> pd.DatetimeIndex:
    """``start``, every first-of-month strictly between, and ``end``."""
    inside = pd.date_range(start.normalize().replace(day=1), end, freq="MS")
    inside = inside[(inside > start) & (inside < end)]
    return pd.DatetimeIndex([start, *inside, end])


def month_of_year_index(orders: pd.DataFrame, fit: FrequencyFit, *, as_of=None) -> pd.DataFrame:
    """How much busier each calendar month is for repeat orders than the model says.

    Parameters
    ----------
    orders : pandas.DataFrame
        Cleaned orders with ``customer`` and ``order_date``, all on or before
        ``as_of``.
    fit : FrequencyFit
        The order-frequency model fitted on these orders (calendar days).
    as_of : date-like, optional
        End of the history; default the last order date. At least
        ``MIN_SEASON_DAYS`` days must lie between the first order and it.

    Returns
    -------
    pandas.DataFrame
        Twelve rows, columns ``SEASON_COLUMNS``: ``month`` (1 = January),
        ``repeat_orders`` (repeat orders placed in that month of the year, all
        years together), ``model_orders`` (what the fitted model without
        seasons expects for the same customers in the same days) and
        ``index`` (the month's order rate relative to the year's average; the
        day-weighted average of the twelve is 1).

    Raises
    ------
    OrderDataError
        If the history is shorter than a full year, or orders fall after ``as_of``.

    Notes
    -----
    The model's expected repeat orders in calendar month k are
    ``sum_i E[X(c(e_{k+1}) - c(f_i))] - E[X(c(e_k) - c(f_i))]`` over customers
    i with first order f_i, where E[X(t)] is the new-customer count of eq. 7
    (Fader, Hardie and Lee 2005), e_k the month's edges (clipped at f_i) and
    c the seasonal clock (:func:`seasonal_days` from the first order). A
    growing list of customers and customers dropping away are thus both in
    the expectation; what is left in actual / expected is the time of year.
    Months of the year are pooled over years (ratios of sums).

    The index is the fixed point of ``index_m <- index_m x actual_m /
    expected_m(index)`` (rescaled to average 1 each round), starting from no
    seasons: the index under which the fitted model, run on the seasonal
    clock, places as many repeat orders in each month of the year as the
    shop saw. A single round (plain model in the denominator) confuses a
    busy month with the faster dropping away that more orders bring; the
    fixed point does not, and settles within a few rounds.

    Then, with ``l_m`` the log index and ``v_m = 1 / orders_m`` its Poisson
    sampling variance, each month is shrunk toward the year's average as in
    empirical Bayes: ``l_m* = c + tau2 / (tau2 + v_m) (l_m - c)``, c the mean
    of the l_m and ``tau2 = max(0, var(l_m) - mean(v_m))`` the spread between
    months beyond what chance explains (method of moments). A shop without
    seasons therefore gets an index close to 1 in every month rather than its
    noise. Finally the index is scaled so its day-weighted average is 1: it
    moves orders between months but leaves the model's yearly level alone.
    The fit itself stays in calendar days.
    """
    missing = [c for c in ("customer", "order_date") if c not in orders.columns]
    if missing:
        raise OrderDataError("the orders table lacks columns", value=", ".join(missing),
                             fix="Read the file with forecasting.read_orders")
    if len(orders) == 0:
        raise OrderDataError("there are no orders to measure seasons on")
    dates = pd.to_datetime(orders["order_date"])
    first_day, last_day = dates.min(), dates.max()
    as_of_ts = last_day if as_of is None else pd.Timestamp(as_of)
    if pd.isna(as_of_ts) or as_of_ts < last_day:
        raise OrderDataError("the 'as of' date must be a date on or after the last order", column="as_of",
                             value=as_of)
    days = (as_of_ts - first_day) / pd.Timedelta(days=1)
    if days < MIN_SEASON_DAYS:
        raise OrderDataError(
            f"a month-of-year pattern needs at least a full year of orders; these cover {days:.0f} days",
            column="--seasons", value="month", fix="Use --seasons none, or a longer order history")

    # Repeat orders: every order of a customer except one earliest one.
    table = pd.DataFrame({"customer": orders["customer"].to_numpy(), "order_date": dates.to_numpy()})
    table = table.sort_values(["customer", "order_date"], kind="stable")
    repeats = table.loc[table["customer"].duplicated(), "order_date"]
    first_orders = table.loc[~table["customer"].duplicated(), "order_date"]

    edges = _month_edges(first_day, as_of_ts)
    months = edges[:-1].month.to_numpy()
    positions = np.searchsorted(edges.to_numpy(), repeats.to_numpy(), side="right") - 1
    positions = np.clip(positions, 0, len(edges) - 2)  # an order exactly at as_of joins the last month
    actual_by_month = np.bincount(positions, minlength=len(edges) - 1).astype(np.float64)

    actual = np.bincount(months - 1, weights=actual_by_month, minlength=12)
    edge_values = edges.to_numpy()
    lengths = np.diff(edge_values) / np.timedelta64(1, "D")
    first_values = first_orders.to_numpy()
    first_month = np.clip(np.searchsorted(edge_values, first_values, side="right") - 1, 0, len(edges) - 2)
    into_month = (first_values - edge_values[first_month]) / np.timedelta64(1, "D")

    def model_orders_by_month(index):
        # The seasonal clock (integral of the index) at each month edge and at each first order;
        # a customer's expected repeat orders up to an edge is E[X(clock(edge) - clock(first))].
        clock_edges = np.concatenate([[0.0], np.cumsum(index[months - 1] * lengths)])
        clock_first = clock_edges[first_month] + index[months[first_month] - 1] * into_month
        cumulative = np.zeros(len(edges))
        rows = max(1, _SEASON_CELLS // len(edges))
        for start in range(0, len(clock_first), rows):
            block = np.maximum(clock_edges[None, :] - clock_first[start:start + rows, None], 0.0)
            cumulative += _orders_while_active(fit.params, np.zeros_like(block), np.zeros_like(block),
                                               block).sum(axis=0)
        return np.bincount(months - 1, weights=np.maximum(np.diff(cumulative), 0.0), minlength=12)

    plain_model = model_orders_by_month(np.ones(12))
    if np.any(plain_model <= 0):
        raise OrderDataError("the order-frequency model expects no repeat orders in some month",
                             fix="Use --seasons none")
    index = np.ones(12)
    model = plain_model
    rounds = 0
    for rounds in range(1, _SEASON_ROUNDS + 1):
        updated = index * np.maximum(actual, 0.5) / model
        updated = updated / (updated @ _MONTH_DAYS / _MONTH_DAYS.sum())
        change = float(np.max(np.abs(updated - index)))
        index = updated
        if change < 1e-6:
            break
        model = model_orders_by_month(index)
    log_ratio = np.log(index)
    noise = 1.0 / np.maximum(actual, 0.5)
    centre = log_ratio.mean()
    between = max(0.0, float(np.sum((log_ratio - centre) ** 2) / 11.0 - noise.mean()))
    shrunk = centre + between / (between + noise) * (log_ratio - centre)
    index = np.exp(shrunk)
    index = index / (index @ _MONTH_DAYS / _MONTH_DAYS.sum())
    result = pd.DataFrame({"month": np.arange(1, 13), "repeat_orders": actual, "model_orders": plain_model,
                           "index": index}, columns=SEASON_COLUMNS)
    result.attrs = {"as_of": as_of_ts.isoformat(), "days_of_history": float(days), "rounds": rounds}
    return result


def seasonal_days(start, days, index) -> float:
    """Length of a period in "average days": each calendar day weighted by its month's index.

    Parameters
    ----------
    start : date-like
        Start of the period.
    days : float
        Its length in calendar days (>= 0).
    index : array_like of 12 floats
        Month-of-year index, January first (e.g. ``month_of_year_index(...)["index"]``).

    Returns
    -------
    float
        ``integral from start to start + days of index[month(t)] dt``, in days.
        With every month at 1 it is ``days``.

    Notes
    -----
    An active customer's ordering rate in a month is lambda x index; a Poisson
    process with that rate counts the same orders as one with rate lambda run
    on this seasonal clock, so the model's expected orders and simulations
    for a calendar window of ``days`` are those for ``seasonal_days(...)``.
    """
    weights = np.asarray(index, dtype=np.float64)
    if weights.shape != (12,) or not np.all(np.isfinite(weights)) or np.any(weights < 0):
        raise OrderDataError("a month-of-year index must be twelve numbers of at least 0", value=index)
    days = _check_horizon(days)
    start_ts = pd.Timestamp(start)
    if days == 0:
        return 0.0
    edges = _month_edges(start_ts, start_ts + pd.Timedelta(days=days))
    lengths = np.diff(edges.to_numpy()) / np.timedelta64(1, "D")
    return float(np.sum(weights[edges[:-1].month.to_numpy() - 1] * lengths))
