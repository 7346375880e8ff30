"""Variance models: how much one order's value varies around its customer's average.

Input: the per-customer statistics table from
:func:`forecasting.customers.customer_statistics` (and, for the ``"robust"``
model, the cleaned order-level table).

Output: a :class:`VarianceFit` holding one shop-wide per-order variance and the
rule that turns it into s_t, the variance of customer t's average
(``VarianceFit.mean_variance``). Every shrinkage estimator needs s_t: it says
how far each customer's own average can be trusted.

Four models are offered (``VARIANCE_MODELS``):

``"classic"``
    pooled within-customer variance, sigma2 = sum_t SS_t / sum_t (n_t - 1).
``"robust"``
    the same pooled variance with every order's influence bounded
    (winsorised residuals), for shops where a few huge orders would
    otherwise dominate.
``"log"``
    the pooled variance of log order values; estimators then work on the log
    scale and forecasts are transformed back to money.
``"proportional"``
    spread grows with the level of spending: a shop-wide squared coefficient
    of variation cv2, with s_t = cv2 * mu_t^2 / n_t.

:func:`tail_report` describes how heavy the upper tail of order values is and
suggests a model in plain words.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pandas as pd

from forecasting.errors import OrderDataError

VARIANCE_MODELS = ("classic", "robust", "log", "proportional")

#: Clipping constant for the robust model, in units of the normal-consistent
#: median absolute deviation (Huber-type bound; Huber 1964, Wilcox 2012).
ROBUST_CLIP = 3.0


def check_variance_model(model) -> str:
    """Return ``model`` if it is a known variance model, else raise OrderDataError."""
    if model not in VARIANCE_MODELS:
        raise OrderDataError(
            "unknown variance model for --variance",
            value=model,
            fix=f"Choose one of: {', '.join(VARIANCE_MODELS)}",
        )
    return model


@dataclass(frozen=True)
class VarianceFit:
    """A fitted shop-wide variance model.

    Attributes
    ----------
    model : str
        One of ``VARIANCE_MODELS``.
    sigma2 : float
        The fitted per-order spread: a variance in money squared for
        ``"classic"`` and ``"robust"``, a variance of log order values for
        ``"log"``, a squared coefficient of variation for ``"proportional"``.
    notes : tuple of str
        Plain-words remarks (fallbacks taken and why).
    details : dict
        Further fitted scalars (for example the robust scale and clip point).
    """

    model: str
    sigma2: float
    notes: tuple = ()
    details: dict = field(default_factory=dict)

    @property
    def scale(self) -> str:
        """``"log"`` when estimators must work on log order values, else ``"money"``."""
        return "log" if self.model == "log" else "money"

    def mean_variance(self, orders, level=None) -> np.ndarray:
        """Variance s_t of each customer's average.

        Parameters
        ----------
        orders : array_like of int
            Number of orders n_t per customer.
        level : array_like of float, optional
            Current estimate of each customer's mean order value; required by
            the ``"proportional"`` model (s_t = cv2 * level_t^2 / n_t) and
            ignored by the others (s_t = sigma2 / n_t).

        Returns
        -------
        numpy.ndarray
        """
        n = np.asarray(orders, dtype=np.float64)
        if self.model == "proportional":
            if level is None:
                raise ValueError("the proportional variance model needs the current level of each customer")
            mu = np.asarray(level, dtype=np.float64)
            return self.sigma2 * mu * mu / n
        return self.sigma2 / n


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
    sigma2 = sum_t SS_t / sum_t (n_t - 1). When every customer has a single
    order there is no within-customer information; the sample variance
    (ddof=1) of all order values is used instead (for one-order customers the
    order values are the averages m_t), which also contains the spread
    between customers and so overstates sigma2. With a single order in the
    whole file sigma2 = 0.
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


def normal_clip_consistency(c: float) -> float:
    """kappa(c) = E[min(Z^2, c^2)] for a standard normal Z.

    Notes
    -----
    Closed form (2 Phi(c) - 1) - 2 c phi(c) + 2 c^2 (1 - Phi(c)): the first two
    terms are E[Z^2; |Z| < c], the last is c^2 P(|Z| > c). Dividing a clipped
    mean square by kappa(c) makes it consistent for the variance at the normal.
    """
    c = float(c)
    phi = math.exp(-c * c / 2.0) / math.sqrt(2.0 * math.pi)
    upper = 0.5 * math.erfc(c / math.sqrt(2.0))  # 1 - Phi(c)
    return float((1.0 - 2.0 * upper) - 2 * c * phi + 2 * c * c * upper)


def _customer_codes(stats: pd.DataFrame, orders: pd.DataFrame) -> np.ndarray:
    codes = stats.index.get_indexer(orders["customer"])
    if (codes < 0).any():
        missing = orders["customer"].to_numpy()[codes < 0][0]
        raise OrderDataError(
            "the orders table has a customer that is missing from the customer statistics",
            column="customer",
            value=missing,
            fix="Compute the statistics from the same orders table",
        )
    return codes


def _zero_centre(x, axis=None):
    """Centre for the median absolute deviation: residuals are deviations from 0."""
    return 0.0


def robust_pooled_variance(codes, values, orders, means, *, clip=ROBUST_CLIP):
    """Winsorised pooled within-customer variance.

    Parameters
    ----------
    codes : array_like of int
        Customer position (0..T-1) of every order.
    values : array_like of float
        Order values.
    orders, means : array_like
        n_t and m_t per customer, in the same positions as ``codes``.
    clip : float, default 3.0
        Residuals are clipped at ``clip`` robust standard deviations.

    Returns
    -------
    sigma2 : float or None
        None when the robust scale is zero (the caller falls back to classic).
    details : dict
        ``scale0``, ``clip_at``, ``kappa`` and ``clipped_orders``.

    Notes
    -----
    For customers with n_t >= 2 the residuals e = (x - m_t) sqrt(n_t/(n_t-1))
    each have variance sigma2. The robust scale is
    scale0 = 1.4826 median(|e|), the normal-consistent median absolute
    deviation about 0 (not about the median of e, which is 0 in expectation
    anyway); this is ``scipy.stats.median_abs_deviation(e, center=0,
    scale="normal")``. Each squared residual is clipped at (c scale0)^2
    (a Huber-type bound on any one order's influence) and

        sigma2 = sum_t ((n_t - 1)/n_t) sum_i min(e_ti^2, (c scale0)^2)
                 / sum_t (n_t - 1) / kappa(c).

    The weights (n_t - 1)/n_t undo the rescaling of the residuals, so without
    clipping the numerator is exactly sum_t SS_t and the estimator is the
    classic one; a plain sum of clipped e^2 over sum (n_t - 1) would overstate
    sigma2 by the factor sum n_t / sum (n_t - 1) (twice as large when every
    customer has two orders). kappa(c) (see
    :func:`normal_clip_consistency`) restores consistency at the normal.

    References
    ----------
    Huber, P. J. (1964). Robust estimation of a location parameter.
    Annals of Mathematical Statistics 35(1), 73-101.
    Wilcox, R. R. (2012). Introduction to Robust Estimation and Hypothesis
    Testing, 3rd ed. Academic Press.
    """
    codes = np.asarray(codes)
    x = np.asarray(values, dtype=np.float64)
    n = np.asarray(orders, dtype=np.float64)
    m = np.asarray(means, dtype=np.float64)
    n_order = n[codes]
    keep = n_order >= 2
    e = (x[keep] - m[codes[keep]]) * np.sqrt(n_order[keep] / (n_order[keep] - 1.0))
    weights = (n_order[keep] - 1.0) / n_order[keep]
    from scipy import stats  # only the robust variance needs it; importing it is slow

    scale0 = float(stats.median_abs_deviation(e, center=_zero_centre, scale="normal")) if e.size else 0.0
    details = {"scale0": scale0, "clip_at": float(clip * scale0), "kappa": normal_clip_consistency(clip)}
    if not scale0 > 0:
        details["clipped_orders"] = 0.0
        return None, details
    bound = (clip * scale0) ** 2
    e2 = e * e
    details["clipped_orders"] = float(np.count_nonzero(e2 > bound))
    dof = float(np.sum(weights))  # equals sum over customers of (n_t - 1)
    sigma2 = float(np.sum(weights * np.minimum(e2, bound)) / dof / details["kappa"])
    return sigma2, details


def pooled_variance(stats: pd.DataFrame, *, model: str = "classic", orders: pd.DataFrame | None = None) -> VarianceFit:
    """Fit a shop-wide variance model.

    Parameters
    ----------
    stats : pandas.DataFrame
        Per-customer statistics (``orders``, ``mean``, ``sum_sq_dev``,
        ``log_mean``, ``log_sum_sq_dev``).
    model : {"classic", "robust", "log", "proportional"}
        See the module docstring.
    orders : pandas.DataFrame, optional
        Cleaned order table (``customer``, ``order_value``); required for
        ``"robust"``.

    Returns
    -------
    VarianceFit

    Notes
    -----
    ``"log"``: sigma2_log = sum_t log_SS_t / sum_t (n_t - 1) with the same
    fallbacks as classic. Estimators are applied to (log_mean_t,
    s_t = sigma2_log / n_t), giving mu_t with variance v_t, and the money
    forecast is exp(mu_t + (sigma2_log + v_t) / 2): the mean of a lognormal
    whose log-scale variance is the order spread plus the estimate's own
    uncertainty. This is chosen over Duan's (1983) smearing estimator
    (the mean of exp(residuals)) because it is a closed form in pooled
    quantities, so leave-one-out stays exact and it needs no order-level
    residuals; the price is reliance on normal log residuals.

    ``"proportional"``: cv2 = sum_t (SS_t / m_t^2) / sum_t (n_t - 1); when every
    customer has one order, cv2 = var(values, ddof=1) / mean(values)^2.

    References
    ----------
    Duan, N. (1983). Smearing estimate: a nonparametric retransformation method.
    Journal of the American Statistical Association 78(383), 605-610.

    Examples
    --------
    >>> import pandas as pd
    >>> stats = pd.DataFrame({"orders": [2, 3], "mean": [20.0, 10.0],
    ...                       "sum_sq_dev": [200.0, 8.0]})
    >>> pooled_variance(stats).sigma2
    69.33333333333333
    """
    check_variance_model(model)
    # Columns go on as arrays: np.asarray on a Series would make pandas look numpy's attribute
    # probes up among the customer ids, which builds a hash table of them (see DEVELOPERS.md).
    def column(name):
        return stats[name].to_numpy(dtype=np.float64)

    n = column("orders")
    if model == "classic":
        sigma2, notes = classic_pooled_variance(n, column("sum_sq_dev"), column("mean"))
        return VarianceFit("classic", sigma2, notes)
    if model == "log":
        sigma2, notes = classic_pooled_variance(n, column("log_sum_sq_dev"), column("log_mean"))
        return VarianceFit("log", sigma2, notes)
    if model == "proportional":
        m = column("mean")
        ss = column("sum_sq_dev")
        dof = float(np.sum(n - 1.0))
        if dof > 0:
            return VarianceFit("proportional", float(np.sum(ss / (m * m)) / dof))
        if m.size >= 2:
            return VarianceFit(
                "proportional",
                float(np.var(m, ddof=1) / np.mean(m) ** 2),
                ("Every customer has exactly one order; the relative spread of all order values was used instead.",),
            )
        return VarianceFit("proportional", 0.0, ("There is only one order in the file, so its spread is taken as zero.",))
    # robust
    if orders is None:
        raise OrderDataError(
            "the 'robust' variance model needs the order-level table, not only per-customer statistics",
            fix="Pass orders= (the cleaned orders) or choose another --variance",
        )
    codes = _customer_codes(stats, orders)
    sigma2, details = robust_pooled_variance(
        codes, orders["order_value"].to_numpy(dtype=np.float64), n, column("mean")
    )
    if sigma2 is None:
        classic, notes = classic_pooled_variance(n, column("sum_sq_dev"), column("mean"))
        return VarianceFit(
            "robust",
            classic,
            ("More than half of repeat orders equal their customer's average, so the robust spread is zero; "
             "the classic pooled variance was used instead.",) + notes,
            details,
        )
    return VarianceFit("robust", sigma2, (), details)


def iterate_proportional(estimate: Callable, means, orders, cv2, *, tol=1e-10, max_iter=100):
    """Run an estimator to a fixed point under the proportional variance model.

    Parameters
    ----------
    estimate : callable
        ``estimate(s)`` returns an object with an ``estimate`` array, given the
        variances ``s`` of the customers' averages.
    means, orders : array_like
        m_t (the starting level) and n_t.
    cv2 : float
        Squared coefficient of variation per order.
    tol : float
        The fixed point is reached when every estimate differs from the level
        it was computed at by at most ``tol`` relative.
    max_iter : int
        Upper limit on estimator runs.

    Returns
    -------
    result : object
        The estimator's last result.
    s : numpy.ndarray
        The variances it was run with (s_t = cv2 mu_t^2 / n_t).
    iterations : int
    converged : bool

    Notes
    -----
    Seeks mu = F(mu), F(mu) = estimate(cv2 mu^2 / n). For a customer above the
    centre F is decreasing in their own mu (a higher level means a noisier
    average, so more shrinkage), and plain iteration can jump between two
    values forever. Each customer's step is therefore damped,
    mu <- mu + omega_t (F(mu) - mu) with omega_t = 1 / (1 - F'_t) (a secant
    estimate of the slope from the previous step, limited to [1e-3, 1]) when
    the slope is negative, and omega_t = 1 otherwise: a per-customer secant
    (Newton-type) step that leaves the fixed point unchanged.
    """
    mu = np.asarray(means, dtype=np.float64).copy()
    n = np.asarray(orders, dtype=np.float64)
    mu_before = f_before = None
    result = s = None
    for iteration in range(1, max_iter + 1):
        s = cv2 * mu * mu / n
        result = estimate(s)
        f = np.asarray(result.estimate, dtype=np.float64)
        step = f - mu
        change = np.max(np.abs(step) / np.maximum(np.abs(mu), np.finfo(float).tiny), initial=0.0)
        if change <= tol:
            return result, s, iteration, True
        omega = 1.0
        if mu_before is not None:
            moved = mu - mu_before
            with np.errstate(divide="ignore", invalid="ignore"):
                slope = np.where(moved != 0, (f - f_before) / moved, 0.0)
                omega = np.where(slope < 0, np.clip(1.0 / (1.0 - slope), 1e-3, 1.0), 1.0)
        mu_before, f_before = mu, f
        mu = mu + omega * step
    return result, s, max_iter, False


@dataclass(frozen=True)
class TailReport:
    """How heavy the upper tail of order values is.

    Attributes
    ----------
    top1_revenue_share : float
        Share of revenue from the largest 1% of orders (at least one order).
    log_skewness : float
        Sample skewness of log order values (``scipy.stats.skew``); near 0
        when order values are roughly lognormal.
    tail_index : float
        Hill estimate of the tail index alpha from the top ``tail_orders``
        orders (NaN with fewer than 20 orders). Smaller means heavier; below
        2 the variance of order values is not even finite.
    tail_orders : int
        k, the number of largest orders used by the Hill estimate (5%).
    suggested_variance : str
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


def tail_report(order_values) -> TailReport:
    """Describe the upper tail of order values and suggest a variance model.

    Parameters
    ----------
    order_values : array_like of float
        Positive order values.

    Returns
    -------
    TailReport

    Notes
    -----
    k = max(1, floor(5% of orders)) largest orders feed the Hill estimate; it
    is reported only with at least 20 orders. The thresholds in the
    suggestion (alpha below 2 very heavy, below 4 heavy, |log skewness| below
    0.5 roughly lognormal) are common practice, not a test.
    """
    x = np.asarray(order_values, dtype=np.float64)
    n = x.size
    if n == 0:
        return TailReport(float("nan"), float("nan"), float("nan"), 0, "classic", "There are no orders to describe.")
    top_count = max(1, int(math.ceil(0.01 * n)))
    top = np.partition(x, n - top_count)[n - top_count:]
    share = float(np.sum(top) / np.sum(x))
    logs = np.log(x)
    skew = _skewness(logs) if n >= 3 and np.ptp(logs) > 0 else 0.0
    k = max(1, int(0.05 * n))
    alpha = hill_tail_index(x, k) if n >= 20 else float("nan")

    share_words = f"The largest 1% of orders bring in {share:.0%} of revenue"
    if not np.isfinite(alpha):
        suggestion = "log" if abs(skew) < 0.5 and n >= 3 else "classic"
        summary = (f"{share_words}. There are too few orders to judge the tail reliably; "
                   f"the '{suggestion}' spread model is a reasonable start.")
    elif alpha < 4:
        heavy = "very heavy" if alpha < 2 else "heavy"
        suggestion = "log" if abs(skew) < 0.5 else "robust"
        reason = ("order values spread evenly on a log scale, so the 'log' spread model fits them"
                  if suggestion == "log" else
                  "a spread model that limits the pull of any single order ('robust' or 'log') is worth "
                  "comparing in the accuracy check")
        summary = (f"{share_words}: the tail of big orders is {heavy} (a few orders are many times the usual "
                   f"one); {reason}.")
    else:
        suggestion = "classic"
        summary = (f"{share_words}: big orders are not unusually large, so the 'classic' spread model is fine.")
    return TailReport(share, skew, alpha, k, suggestion, summary)
