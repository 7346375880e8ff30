"""Spread models: how much one order's value varies around its customer's mean.

Input: the per-customer statistics table from
:func:`forecasting.customers.customer_statistics` (sums per customer only; no order-level
table is needed, so every engine can fit them).

Output: a :class:`VarianceFit` holding the shop-wide spread and the rule that turns it into
s_t, the variance of customer t's average (``VarianceFit.mean_variance``). Every shrinkage
estimator needs s_t: it says how far each customer's own average can be trusted.

Three models are offered (``SPREAD_MODELS``):

``"log"``
    order values vary in proportion on a log scale: sigma2 is the pooled variance of log
    order values; estimators work on each customer's average log value and forecasts return
    to money with Duan's (1983) smearing factor (:func:`smearing_factor`), so that they add up
    to the money customers spend whatever the shape of the order values.
``"classic"``
    one spread in money for every customer: sigma2 = sum_t SS_t / sum_t (n_t - 1).
``"proportional"``
    the spread grows with the customer's level: a shop-wide squared coefficient of variation
    cv2 (:func:`proportional_spread`); the pull uses the shop's average per-order variance
    (Buhlmann's credibility weight) and each customer's ranges grow with their level.

The ``"robust"`` model of earlier versions is retired (``RETIRED_SPREAD_MODELS`` says why).

Every fit has a leave-one-out twin (``*_left_out``) computing the same formula from the sums
after one order is held out (:mod:`forecasting.holdout`), for every held-out order at once.

:func:`tail_report` describes how heavy the upper tail of order values is.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from forecasting.errors import OrderDataError

SPREAD_MODELS = ("log", "classic", "proportional")
#: The name the rest of the product has always used for the same tuple.
VARIANCE_MODELS = SPREAD_MODELS
#: Spread models that are no longer offered, and why (shown to whoever asks for one).
RETIRED_SPREAD_MODELS = {
    "robust": ("the 'robust' spread model is retired: trimming big orders made the spread look many times smaller "
               "than it is, so forecasts leaned far too much on a customer's own few orders and their ranges "
               "were too narrow"),
}


def check_variance_model(model) -> str:
    """Return ``model`` if it is an offered spread model, else raise OrderDataError."""
    if model in RETIRED_SPREAD_MODELS:
        raise OrderDataError(RETIRED_SPREAD_MODELS[model], value=model, option="variance",
                             fix="Choose 'log' for shops with big orders, or another spread model: "
                                 + ", ".join(SPREAD_MODELS))
    if model not in SPREAD_MODELS:
        raise OrderDataError("unknown spread model", value=model, option="variance",
                             fix=f"Choose one of: {', '.join(SPREAD_MODELS)}")
    return model


@dataclass(frozen=True)
class VarianceFit:
    """A fitted spread model.

    The numbers are floats for a fit on one shop, or arrays with one entry per held-out order
    for the leave-one-out twins; every formula below works on both.

    Attributes
    ----------
    model : str
        One of ``SPREAD_MODELS``.
    sigma2 : float or numpy.ndarray
        The per-order spread: a variance in money squared (``"classic"``), a variance of log
        order values (``"log"``) or a squared coefficient of variation (``"proportional"``).
    notes : tuple of str
        Plain-words remarks (fallbacks taken and why).
    details : dict
        ``"log"``: ``smearing`` (S = E[exp(e)] for an order's log deviation e from its
        customer's log mean) and ``excess`` (log S - sigma2 / 2, zero for lognormal orders).
        ``"proportional"``: ``mean_square_level`` (M2, the mean over customers of their true
        mean squared).
    """

    model: str
    sigma2: float
    notes: tuple = ()
    details: dict = field(default_factory=dict)

    @property
    def scale(self) -> str:
        """``"log"`` when estimators work on log order values, else ``"money"``."""
        return "log" if self.model == "log" else "money"

    @property
    def scale_factor(self):
        """f with s_t = f / n_t: sigma2, or cv2 M2 (the shop's average per-order variance)."""
        if self.model == "proportional":
            return self.sigma2 * self.details["mean_square_level"]
        return self.sigma2

    def mean_variance(self, orders) -> np.ndarray:
        """Variance s_t = f / n_t of each customer's average (see ``scale_factor``).

        Parameters
        ----------
        orders : array_like of int
            Number of orders n_t per customer (or per held-out order, with its customer's
            count after the removal).
        """
        return self.scale_factor / np.asarray(orders, dtype=np.float64)

    def order_variance(self, level=None):
        """Spread of one order: sigma2 on its scale, or cv2 level^2 for ``"proportional"``."""
        if self.model == "proportional":
            return self.sigma2 * np.asarray(level, dtype=np.float64) ** 2
        return self.sigma2


def classic_pooled_variance(orders, sum_sq_dev, means) -> tuple[float, tuple]:
    """Pooled within-customer variance from per-customer summaries.

    Parameters
    ----------
    orders, sum_sq_dev, means : array_like
        n_t, SS_t and m_t per customer (on whichever scale is being pooled).

    Returns
    -------
    sigma2 : float
    notes : tuple of str

    Notes
    -----
    sigma2 = sum_t SS_t / sum_t (n_t - 1), unbiased for the average per-order variance.
    When every customer has a single order there is no within-customer information; the
    sample variance (ddof=1) of all order values is used instead (for one-order customers the
    order values are the averages m_t), which also contains the spread between customers and
    so overstates sigma2. With a single order in the whole file sigma2 = 0. The leave-one-out
    twin is :meth:`forecasting.holdout.Side.pooled_spread_after`.
    """
    n = np.asarray(orders, dtype=np.float64)
    ss = np.asarray(sum_sq_dev, dtype=np.float64)
    m = np.asarray(means, dtype=np.float64)
    dof = float(np.sum(n - 1.0))
    if dof > 0:
        return float(np.sum(ss) / dof), ()
    if m.size >= 2:
        return float(np.var(m, ddof=1)), (
            "Every customer has exactly one order, so the spread within customers cannot be measured; "
            "the spread of all order values was used instead (it also includes differences between customers).",
        )
    return 0.0, ("There is only one order in the file, so its spread is taken as zero.",)


# ---------------------------------------------------------------------------
# Log model: the return to money (smearing) and the spread of one order
# ---------------------------------------------------------------------------


def _smearing_curve(k, sigma2):
    """a_k and b_k with log E[r | n = k] = a_k + b_k log S (see :func:`smearing_factor`)."""
    k = np.asarray(k, dtype=np.float64)
    b = (1.0 - 1.0 / k) * (1.0 - 2.0 / k)
    a = -np.asarray(sigma2) / (2.0 * k) + (np.asarray(sigma2) / 2.0) * (1.0 - b)
    return a, b


def _solve_smearing(curve_sum, target, sigma2, informative, *, start=None, max_iter=100):
    """log S solving curve_sum(x) = target, vectorised (Newton inside a bracket, the curve rises in x).

    ``curve_sum(x, rows)`` returns (sum w exp(a + b x), sum w b exp(a + b x)) of the problems
    ``rows`` (positions, or None for all); rows that are not ``informative`` (no customer with
    three or more orders) get the lognormal value sigma2 / 2. With a ``start`` (the fit on all
    orders, for the leave-one-out) Newton steps begin there and the bracket is found on the
    way; problems that have stopped are not evaluated again.
    """
    sigma2 = np.asarray(sigma2, dtype=np.float64)
    lo = np.zeros_like(sigma2)
    value_at_zero, _ = curve_sum(lo, None)
    floor = value_at_zero >= target  # already at S = 1 (E[exp(e)] >= 1, Jensen)
    if start is None:
        hi = np.maximum(sigma2, 0.0) + 1.0
        for _ in range(200):
            value, _ = curve_sum(hi, None)
            short = (value < target) & informative & ~floor
            if not short.any():
                break
            lo = np.where(short, hi, lo)
            hi = np.where(short, 2.0 * hi, hi)
        x = np.clip(np.maximum(sigma2, 0.0) / 2.0, lo, hi)
    else:
        hi = np.full_like(sigma2, np.inf)
        x = np.full_like(sigma2, max(float(start), 0.0))
    active = np.flatnonzero(informative & ~floor)
    for _ in range(max_iter):
        if active.size == 0:
            break
        now, low, high = x[active], lo[active], hi[active]
        value, slope = curve_sum(now, active)
        gap = value - target[active]
        low = np.where(gap < 0, now, low)
        high = np.where(gap < 0, high, now)
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = now - gap / slope
        # A Newton step on the bracket's edge is the root to rounding (the step is below an ulp).
        inside = (slope > 0) & (newton >= low) & (newton <= high)
        step_to = np.where(inside, newton, np.where(np.isfinite(high), 0.5 * (low + high), 2.0 * now + 0.1))
        # After a Newton step below 1e-7 the error left is about its square (quadratic convergence).
        size = np.abs(step_to - now)
        scale = np.maximum(1.0, np.abs(step_to))
        done = (size <= 1e-14 * scale) | (inside & (size <= 1e-7 * scale))
        x[active], lo[active], hi[active] = step_to, low, high
        active = active[~done]
    return np.where(informative, np.where(floor, 0.0, x), np.maximum(sigma2, 0.0) / 2.0)


def smearing_factor(orders, means, log_means, sigma2_log):
    """Duan's smearing factor S = E[exp(e)] for the log deviation e of one order.

    Parameters
    ----------
    orders, means, log_means : array_like
        n_t, the average order value m_t and the average log order value l_t per customer.
    sigma2_log : float
        Pooled variance of log order values.

    Returns
    -------
    float

    Notes
    -----
    Duan's (1983) smearing estimate is the mean of exp(residual) over all orders. With the
    customer's own mean log value as the fitted value, customer t's residuals add up to
    sum_j exp(log x_tj - l_t) = n_t m_t / exp(l_t): r_t = m_t / exp(l_t), the ratio of the
    arithmetic to the geometric mean of their orders, known from per-customer sums alone.

    Departure from Duan: residuals about an average of only n orders are shrunk toward 0, and
    a rare big order in a short history most of all, so r_t is biased low. For independent
    deviations with cumulants kappa_2 = sigma2, kappa_3, ... the expansion of
    E[r | n] = E[exp((1 - 1/n) e_1)] E[exp(-e_2 / n)]^(n - 1) to third order is

        log E[r | n] = log S - sigma2 / (2 n) - (log S - sigma2 / 2)(3 / n - 2 / n^2),

    with log S - sigma2 / 2 = kappa_3 / 6 + ... carrying the skewness. S is the value that
    makes the customers' ratios, weighted by n_t - 1 (their residuals' degrees of freedom),
    add up to what this curve expects; it is exact for lognormal orders (S = exp(sigma2 / 2))
    and, on shops with 2% of orders 5-20 times larger, within about 1% of the truth (the
    calibration suite's shops). Customers with two orders carry no information on S under the
    curve (its slope is 0 at n = 2); with no customer of three or more orders S is the
    lognormal value exp(sigma2 / 2).

    References
    ----------
    Duan, N. (1983). Smearing estimate: a nonparametric retransformation method. Journal of
    the American Statistical Association 78(383), 605-610.

    Examples
    --------
    >>> import numpy as np
    >>> n = np.array([2, 3, 5, 9])
    >>> round(smearing_factor(n, [12.0, 10.0, 11.0, 9.0], np.log([11.0, 9.5, 10.0, 8.0]), 0.2), 4)
    1.1479
    """
    n = np.asarray(orders, dtype=np.float64)
    r = np.asarray(means, dtype=np.float64) / np.exp(np.asarray(log_means, dtype=np.float64))
    keep = n >= 2
    counts, size = np.unique(n[keep], return_counts=True)
    weight = size * (counts - 1.0)
    target = np.array([float(np.sum((n[keep] - 1.0) * r[keep]))])
    a, b = _smearing_curve(counts, sigma2_log)

    def curve_sum(x, rows):
        terms = weight * np.exp(a + b * x[:, None])
        return terms.sum(axis=1), (terms * b).sum(axis=1)

    informative = np.array([bool(np.any(counts >= 3))])
    return float(np.exp(_solve_smearing(curve_sum, target, np.array([sigma2_log]), informative)[0]))


def _chi2_median_ratio(dof):
    """median(chi2_k) / k: the scale that makes a median of sample variances consistent at the normal."""
    k = np.asarray(dof, dtype=np.float64)
    # The ratio depends on k alone: one evaluation per distinct number of degrees of freedom.
    values, where = np.unique(k, return_inverse=True)
    return (2.0 * gamma_median(values / 2.0) / values)[where].reshape(k.shape)


def gamma_median(shape):
    """The median of the Gamma(a, 1) distribution for each shape a >= 1/2 (chi2_k is 2 Gamma(k / 2, 1)).

    Newton steps on P(a, x) = 1/2 from the Wilson-Hilferty value a (1 - 1 / (9 a))^3, with P, the
    regularised lower incomplete gamma function, by its power series

        P(a, x) = x^a e^-x / Gamma(a) * sum_j x^j / (a (a + 1) ... (a + j))

    (Abramowitz and Stegun 1964, 6.5.29), whose terms fall at least as fast as x / (a + j) < 1
    below x = a, where the median is (Chen and Rubin 1986: a - 1/3 < median < a); no step goes
    below half of x, so x stays positive. Written here because ``scipy.special``, which has it,
    takes a tenth of a second to load, more than a forecast of a small shop; the tests hold it to
    ``scipy.special.gammaincinv(a, 0.5)``.

    References
    ----------
    Abramowitz, M. and Stegun, I. A. (1964). Handbook of Mathematical Functions, 6.5.29.
    Chen, J. and Rubin, H. (1986). Bounds for the difference between median and mean of gamma and
    Poisson distributions. Statistics and Probability Letters 4(6), 281-283.
    Wilson, E. B. and Hilferty, M. M. (1931). The distribution of chi-square. PNAS 17(12), 684-688.
    """
    a = np.asarray(shape, dtype=np.float64).reshape(-1)
    if a.size and not np.all(a >= 0.5):
        raise ValueError("gamma_median needs shapes of 1/2 or more")
    x = a * (1.0 - 1.0 / (9.0 * a)) ** 3
    log_gamma = np.array([math.lgamma(value) for value in a])
    active = np.arange(a.size)
    for _ in range(50):
        if active.size == 0:
            break
        shape_now, at = a[active], x[active]
        density = np.exp((shape_now - 1.0) * np.log(at) - at - log_gamma[active])  # x^(a-1) e^-x / Gamma(a)
        step = (density * at * _series_sum(shape_now, at) - 0.5) / density  # (P(a, x) - 1/2) / P'(a, x)
        x[active] = np.maximum(at - step, 0.5 * at)
        # Newton's error after a step below 1e-8 of x is about the step squared: below rounding.
        active = active[np.abs(step) > 1e-8 * at]
    return x.reshape(np.shape(shape))


def _series_sum(a, x):
    """sum_j x^j / (a (a + 1) ... (a + j)) for x below a + 1, each to rounding (terms added while
    they still count; an entry stops once its term is below 2^-56 of its sum)."""
    total = 1.0 / a
    term = total.copy()
    going = np.arange(a.size)
    j = 0.0
    while going.size:
        j += 1.0
        term[going] *= x[going] / (a[going] + j)
        total[going] += term[going]
        going = going[term[going] > total[going] * 2.0 ** -56]
    return total


def order_spread(orders, log_sum_sq_dev):
    """The spread of one order's log value that sets the next-order range: a median of spreads.

    Parameters
    ----------
    orders, log_sum_sq_dev : array_like
        n_t and the sum of squared deviations of log order values per customer.

    Returns
    -------
    float

    Notes
    -----
    For customers with n_t >= 2, q_t = (SS_t / (n_t - 1)) / (median(chi2_{n-1}) / (n - 1)),
    each customer's own variance of log order values scaled so that its median is sigma2 for
    normal log values; the result is the median of the q_t weighted by n_t - 1 (the lower
    weighted median). The central 80% of one customer's orders is set by their usual orders:
    the pooled variance, which the smearing needs, also carries the few orders many times the
    usual one and makes the range for the next order too wide (it held 84% instead of 80% on
    shops with 2% bulk orders). With no customer of two orders, the pooled fallback is used.
    A robust scale of this kind: Rousseeuw and Croux (1993) discuss medians of spreads.

    References
    ----------
    Rousseeuw, P. J. and Croux, C. (1993). Alternatives to the median absolute deviation.
    JASA 88(424), 1273-1283.
    """
    n = np.asarray(orders, dtype=np.float64)
    ss = np.asarray(log_sum_sq_dev, dtype=np.float64)
    keep = n >= 2
    if not keep.any():
        return None
    q = ss[keep] / (n[keep] - 1.0) / _chi2_median_ratio(n[keep] - 1.0)
    w = n[keep] - 1.0
    order = np.argsort(q, kind="stable")
    cumulative = np.cumsum(w[order])
    return float(q[order][np.searchsorted(cumulative, cumulative[-1] / 2.0)])


def log_spread(stats: pd.DataFrame) -> VarianceFit:
    """The log spread model: sigma2 of log order values, the smearing factor, its excess over the
    lognormal value and the spread of one order for the next-order range."""
    n = _column(stats, "orders")
    sigma2, notes = classic_pooled_variance(n, _column(stats, "log_sum_sq_dev"), _column(stats, "log_mean"))
    smearing = smearing_factor(n, _column(stats, "mean"), _column(stats, "log_mean"), sigma2)
    one_order = order_spread(n, _column(stats, "log_sum_sq_dev"))
    return VarianceFit("log", sigma2, notes, {"smearing": smearing, "excess": math.log(smearing) - sigma2 / 2.0,
                                              "order_spread": sigma2 if one_order is None else one_order})


def log_spread_left_out(held) -> VarianceFit:
    """:func:`log_spread` after each held-out order (arrays over held-out orders), exactly."""
    money, log = held.money, held.log
    sigma2 = log.pooled_spread_after()
    n = money.counts
    r = money.means / np.exp(log.means)
    r_before = r[money.t]
    r_after = money.mean_after / np.exp(log.mean_after)
    keep = n >= 2
    target = (float(np.sum((n[keep] - 1.0) * r[keep])) - (money.n - 1.0) * r_before
              + np.where(money.n_after >= 2, (money.n_after - 1.0) * r_after, 0.0))
    informative = (np.count_nonzero(n >= 3) - (money.n >= 3) + (money.n_after >= 3)) > 0

    start = held.cached("smearing on all orders", lambda: math.log(log_spread(held.stats).details["smearing"]))

    def slope_of(k):
        return (1.0 - 1.0 / k) * (1.0 - 2.0 / k)

    def curve_sum(x, rows):
        # exp(a_k + b_k x) with a_k = sigma2 (-1 / (2k) + (1 - b_k) / 2): a power series in sigma2
        # and x around their typical values (Side.exp_sums_after; exact to rounding).
        spread = sigma2 if rows is None else sigma2[rows]
        parts = log.exp_sums_after(
            (lambda k: np.where(k >= 2, k - 1.0, 0.0), lambda k: np.where(k >= 2, (k - 1.0) * slope_of(k), 0.0)),
            (lambda k: -1.0 / (2.0 * k) + (1.0 - slope_of(k)) / 2.0, slope_of), (spread, x), ["one"], subset=rows)
        return parts[0, 0], parts[1, 0]

    smearing = np.exp(_solve_smearing(curve_sum, target, sigma2, informative, start=start))
    one_order = held.cached("order_spread", lambda: _order_spread_left_out(held))
    return VarianceFit("log", sigma2, (), {"smearing": smearing, "excess": np.log(smearing) - sigma2 / 2.0,
                                           "order_spread": np.where(np.isnan(one_order), sigma2, one_order)})


def _order_spread_left_out(held):
    """:func:`order_spread` after each removal: a weighted median with one customer's value and
    weight changed, by a vectorised search over the sorted values (O(log T) per held-out order)."""
    log = held.log
    n, ss = log.counts, log.sum_sq
    keep = n >= 2
    q_all = np.full(n.size, np.nan)
    q_all[keep] = ss[keep] / (n[keep] - 1.0) / _chi2_median_ratio(n[keep] - 1.0)
    w_all = np.where(keep, n - 1.0, 0.0)
    order = np.argsort(np.where(keep, q_all, np.inf), kind="stable")[: int(keep.sum())]
    values = q_all[order]
    cumulative = np.cumsum(w_all[order])
    total = cumulative[-1] if cumulative.size else 0.0

    t = log.t
    q_old, w_old = q_all[t], w_all[t]
    n_new = log.n_after
    with np.errstate(invalid="ignore", divide="ignore"):
        q_new = np.where(n_new >= 2, log.ss_after / (n_new - 1.0) / _chi2_median_ratio(np.maximum(n_new - 1.0, 1.0)),
                         np.nan)
    w_new = np.where(n_new >= 2, n_new - 1.0, 0.0)
    half = (total - w_old + w_new) / 2.0

    def weight_up_to(index):
        """Weight at or below values[index] after the change (the changed customer's old value
        removed, the new one added)."""
        index = np.minimum(index, values.size - 1)
        v = values[index]
        return cumulative[index] - w_old * (q_old <= v) + w_new * (q_new <= v)

    lo = np.zeros(log.H, dtype=np.int64)
    hi = np.full(log.H, values.size - 1, dtype=np.int64)
    while True:
        active = lo < hi
        if not active.any():
            break
        mid = (lo + hi) // 2
        enough = weight_up_to(mid) >= half
        hi = np.where(active & enough, mid, hi)
        lo = np.where(active & ~enough, mid + 1, lo)
    if values.size:
        # No remaining sorted value reaches half the weight: the new value (above them all) is it.
        answer = np.where(weight_up_to(lo) >= half, values[np.minimum(lo, values.size - 1)], q_new)
    else:
        answer = np.full(log.H, np.nan)
    # The new value itself may be the median, when it lies below the sorted value found.
    below = np.searchsorted(values, q_new, side="right") - 1
    up_to_new = np.where(below >= 0, cumulative[np.maximum(below, 0)], 0.0) - w_old * (q_old <= q_new) + w_new
    answer = np.where((w_new > 0) & (q_new < answer) & (up_to_new >= half), q_new, answer)
    nobody = (half <= 0)
    return np.where(nobody, np.nan, answer)


# ---------------------------------------------------------------------------
# Proportional model
# ---------------------------------------------------------------------------


def _proportional_from_sums(ss_total, level_total, dof, fallback):
    with np.errstate(divide="ignore", invalid="ignore"):
        cv2 = np.where(level_total > 0, ss_total / level_total, np.nan)
    cv2 = np.where(np.isfinite(cv2), cv2, fallback)
    return np.where(dof > 0, np.maximum(cv2, 0.0), fallback)


def proportional_spread(stats: pd.DataFrame) -> VarianceFit:
    """The proportional spread model: order values of customer t have variance cv2 mu_t^2.

    Notes
    -----
    cv2 = sum_t SS_t / sum_t ((n_t - 1) m_t^2 - SS_t / n_t): a ratio of two sums whose
    expectations are cv2 sum_t (n_t - 1) mu_t^2 and sum_t (n_t - 1) mu_t^2 (because
    E[m_t^2] = mu_t^2 (1 + cv2 / n_t) and E[SS_t] = (n_t - 1) cv2 mu_t^2), so it is consistent
    as the number of customers grows. (Dividing each SS_t by the customer's own m_t^2 is biased
    low: a big order raises m_t with the spread.) When every customer has one order,
    cv2 = var(m) / mean(m)^2.

    The pull toward other customers uses the shop's average per-order variance cv2 M2, with
    M2 = mean_t m_t^2 / (1 + cv2 / n_t) an estimate of the mean of mu_t^2: in credibility
    theory the best linear estimate of a customer's mean weighs their average by the expected
    per-order variance, not by their own (Buhlmann 1967; Buhlmann and Gisler 2005, ch. 4), so
    forecasts keep adding up to the money customers spend. Each customer's ranges grow with
    their level (see :mod:`forecasting.forecasts`).

    References
    ----------
    Buhlmann, H. (1967). Experience rating and credibility. ASTIN Bulletin 4(3), 199-207.
    Buhlmann, H. and Gisler, A. (2005). A Course in Credibility Theory and its Applications.
    Springer.
    """
    n = _column(stats, "orders")
    m = _column(stats, "mean")
    ss = _column(stats, "sum_sq_dev")
    dof = float(np.sum(n - 1.0))
    notes = ()
    fallback = float(np.var(m, ddof=1) / np.mean(m) ** 2) if m.size >= 2 else 0.0
    if dof <= 0:
        notes = ("Every customer has exactly one order; the relative spread of all order values was used instead."
                 if m.size >= 2 else "There is only one order in the file, so its spread is taken as zero.",)
    cv2 = float(_proportional_from_sums(np.sum(ss), np.sum((n - 1.0) * m * m - ss / n), dof, fallback))
    mean_square = float(np.mean(m * m / (1.0 + cv2 / n)))
    return VarianceFit("proportional", cv2, notes, {"mean_square_level": mean_square})


def proportional_spread_left_out(held) -> VarianceFit:
    """:func:`proportional_spread` after each held-out order, exactly."""
    money = held.money
    n, m, ss = money.counts, money.means, money.sum_sq
    level_terms = (n - 1.0) * m * m - ss / n
    t = money.t
    level_after = (level_terms.sum() - level_terms[t]
                   + (money.n_after - 1.0) * money.mean_after ** 2 - money.ss_after / money.n_after)
    ss_after = money.total_ss - money.ss_removed
    dof = money.dof - 1.0
    if dof > 0:
        fallback = np.zeros(money.H)
    elif money.T >= 2:
        grand = money.origin + money.unweighted_centre_after()
        fallback = money.var_means_after() / grand ** 2
    else:
        fallback = np.zeros(money.H)
    cv2 = _proportional_from_sums(ss_after, level_after, np.full(money.H, dof), fallback)
    if "m2" not in money._group_sums:
        money.add_column("m2", m * m, m[t] ** 2, money.mean_after ** 2)
    # 1 / (1 + cv2 / k) = k / (k + cv2): a power series in cv2 around its typical value.
    ((square_sum,),) = money.power_sums_after(lambda k: k, lambda k: k, cv2 + np.zeros(money.H), (1,), ["m2"])
    return VarianceFit("proportional", cv2, (), {"mean_square_level": square_sum / money.T})


def classic_spread(stats: pd.DataFrame) -> VarianceFit:
    sigma2, notes = classic_pooled_variance(_column(stats, "orders"), _column(stats, "sum_sq_dev"),
                                            _column(stats, "mean"))
    return VarianceFit("classic", sigma2, notes)


def classic_spread_left_out(held) -> VarianceFit:
    return VarianceFit("classic", held.money.pooled_spread_after())


def _column(stats, name):
    # Columns go on as arrays: np.asarray on a Series would make pandas look numpy's attribute
    # probes up among the customer ids, which builds a hash table of them (see DEVELOPERS.md).
    return stats[name].to_numpy(dtype=np.float64)


#: Each spread model's fit and its leave-one-out twin.
_FITS = {"classic": (classic_spread, classic_spread_left_out),
         "log": (log_spread, log_spread_left_out),
         "proportional": (proportional_spread, proportional_spread_left_out)}


def pooled_variance(stats: pd.DataFrame, *, model: str = "log", orders=None) -> VarianceFit:
    """Fit a shop-wide spread model.

    Parameters
    ----------
    stats : pandas.DataFrame
        Per-customer statistics (``orders``, ``mean``, ``sum_sq_dev``, ``log_mean``,
        ``log_sum_sq_dev``).
    model : {"log", "classic", "proportional"}
        See the module docstring.
    orders : ignored
        Kept so that callers written for earlier versions keep working; no model needs
        order-level values.

    Returns
    -------
    VarianceFit

    Examples
    --------
    >>> import pandas as pd
    >>> stats = pd.DataFrame({"orders": [2, 3], "mean": [20.0, 10.0],
    ...                       "sum_sq_dev": [200.0, 8.0]})
    >>> pooled_variance(stats, model="classic").sigma2
    69.33333333333333
    """
    check_variance_model(model)
    return _FITS[model][0](stats)


def spread_left_out(held, model: str) -> VarianceFit:
    """The leave-one-out twin of :func:`pooled_variance`: the fit after each held-out order."""
    check_variance_model(model)
    return held.cached(("spread", model), lambda: _FITS[model][1](held))


# ---------------------------------------------------------------------------
# Tail report
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class TailReport:
    """How heavy the upper tail of order values is.

    Attributes
    ----------
    top1_revenue_share : float
        Share of revenue from the largest 1% of orders (at least one order).
    log_skewness : float
        Sample skewness of log order values (moment form); near 0 when order values are
        roughly lognormal.
    tail_index : float
        Hill estimate of the tail index alpha from the top ``tail_orders`` orders (NaN with
        fewer than 20 orders). Smaller means heavier; below 2 the variance of order values is
        not even finite.
    tail_orders : int
        k, the number of largest orders used by the Hill estimate (5%).
    suggested_variance : str
        The spread model to start from (``"log"`` or ``"classic"``); the accuracy check on
        the shop's own orders decides in the end.
    summary : str
        One or two sentences for a shop owner.
    """

    top1_revenue_share: float
    log_skewness: float
    tail_index: float
    tail_orders: int
    suggested_variance: str
    summary: str

    def as_dict(self) -> dict:
        """Plain dict of floats and strings."""
        return {
            "top1_revenue_share": self.top1_revenue_share,
            "log_skewness": self.log_skewness,
            "tail_index": self.tail_index,
            "tail_orders": self.tail_orders,
            "suggested_variance": self.suggested_variance,
            "summary": self.summary,
        }


def hill_tail_index(values, k: int) -> float:
    """Hill (1975) estimate of the tail index from the k largest values.

    alpha = k / sum_{i=1..k} (log x_(i) - log x_(k+1)), with x_(1) the largest.

    References
    ----------
    Hill, B. M. (1975). A simple general approach to inference about the tail
    of a distribution. Annals of Statistics 3(5), 1163-1174.
    """
    x = np.asarray(values, dtype=np.float64)
    if k < 1 or x.size <= k:
        return float("nan")
    top = np.partition(x, x.size - k - 1)[x.size - k - 1:]  # the k+1 largest, threshold first
    threshold = top[0]
    logs = np.log(top[1:]) - math.log(threshold)
    total = float(np.sum(logs))
    return float(k / total) if total > 0 else float("inf")


def _skewness(x: np.ndarray) -> float:
    """Sample skewness m3 / m2^(3/2) (the moment form, as scipy.stats.skew with bias=True)."""
    d = x - np.mean(x)
    return float(np.mean(d ** 3) / np.mean(d ** 2) ** 1.5)


def tail_report(order_values, *, checked=None) -> TailReport:
    """Describe the upper tail of order values and suggest a spread model to start from.

    Parameters
    ----------
    order_values : array_like of float
        Positive order values.
    checked : dict, optional
        From the accuracy check on the shop's own orders: spread model -> whether its
        forecasts passed the check (money bias and range coverage within tolerance). When
        given, only a spread model that passed is suggested.

    Returns
    -------
    TailReport

    Notes
    -----
    k = max(1, floor(5% of orders)) largest orders feed the Hill estimate; it is reported
    only with at least 20 orders. The thresholds in the wording (alpha below 2 very heavy,
    below 4 heavy) are common practice, not a test. Whatever the tail, the log spread model
    is the starting suggestion: its forecasts return to money by smearing, which holds for
    any shape of order values; the classic model only when big orders are not unusually
    large. The accuracy check has the last word.
    """
    x = np.asarray(order_values, dtype=np.float64)
    n = x.size
    if n == 0:
        return TailReport(float("nan"), float("nan"), float("nan"), 0, "log", "There are no orders to describe.")
    top_count = max(1, int(math.ceil(0.01 * n)))
    top = np.partition(x, n - top_count)[n - top_count:]
    share = float(np.sum(top) / np.sum(x))
    logs = np.log(x)
    skew = _skewness(logs) if n >= 3 and np.ptp(logs) > 0 else 0.0
    k = max(1, int(0.05 * n))
    alpha = hill_tail_index(x, k) if n >= 20 else float("nan")

    share_words = f"The largest 1% of orders bring in {share:.0%} of revenue"
    if not np.isfinite(alpha):
        suggestion = "log"
        summary = (f"{share_words}. There are too few orders to judge the tail reliably; "
                   "the 'log' spread model is a reasonable start.")
    elif alpha < 4:
        heavy = "very heavy" if alpha < 2 else "heavy"
        suggestion = "log"
        summary = (f"{share_words}: the tail of big orders is {heavy} (a few orders are many times the usual "
                   "one); the 'log' spread model keeps a few big orders from setting a customer's forecast and "
                   "still counts their money in the forecasts.")
    else:
        suggestion = "classic"
        summary = f"{share_words}: big orders are not unusually large, so the 'classic' spread model may do."
    if checked:
        passed = [model for model in SPREAD_MODELS if checked.get(model)]
        if suggestion not in passed:
            if passed:
                summary += (f" On your own orders the '{suggestion}' model missed its targets, so '{passed[0]}' "
                            "is suggested instead.")
                suggestion = passed[0]
            else:
                summary += " On your own orders no spread model met every target; see the accuracy check."
    return TailReport(share, skew, alpha, k, suggestion, summary)
