"""Evaluation: how much better than plain averages each method forecasts.

In: the cleaned orders table (one row per order, see ``forecasting.reading``).
Out: an :class:`Evaluation` with, for every method x variance model,

* leave-one-out: every order of every customer with at least two orders is
  held out in turn, everything is refitted on the remaining orders (pooled
  variance, the amount of shrinkage, the centre) and the customer's expected
  order value is compared with the order that was held out;
* next-order backtest: fit on the orders before a cut-off date and score the
  forecast against each customer's first order after it;
* a bootstrap interval over customers for each error reduction, the gain by
  number of past orders and by segment, and the share of held-out orders that
  fell inside the 80% next-order range;
* the automatic choice of method (:func:`choose_method`).

The leave-one-out is exact and fast for the closed-form methods: nothing is
refitted N times.  Removing order x from customer t changes only that
customer's count, average and sum of squares,

    n' = n - 1,  m' = (n m - x) / (n - 1),  SS' = SS - (x - m)^2 n / (n - 1),

so every shop-wide sum (sum SS, sum (n - 1), sum m, sum m^2, sum n m^2, ...)
is updated in O(1) per held-out order.  Weighted centres
c = sum_s g_s m_s / sum_s g_s, whose weights depend on a customer only through
the order count n_s, are evaluated by grouping customers by order count, with
the held-out customer moved from group n to group n - 1 with the new average:
O(N K) work for N held-out orders and K distinct order counts, vectorised in
blocks of held-out orders so that memory stays bounded.  mta-minimax keeps the
two largest and two smallest averages with their owners (ties included), and
mta-segments groups customers by (segment, order count) and solves one small
segment system per held-out order.

Exact (to rounding, checked against a brute-force refit through
:func:`forecasting.forecasts.forecast_customers` in the tests):
``EXACT_METHODS`` and mta-segments with the ``EXACT_VARIANCES``.  The
iterative or order-statistic fits keep one thing from the full-data fit and
refit the rest exactly (the tests measure the gap):

* robust variance: the clip point c * scale0 (the clipped sums are updated
  exactly, O(log n) per order);
* proportional variance: the other customers' levels mu_s (one step from the
  full-data fixed point; the held-out customer's own level is solved);
* gamma-gamma: p, q and gamma;
* james-stein-cv and mta-cv: the cross-validated multiplier lambda.  Because
  that lambda was chosen with the held-out order in the data, these two are
  left out of the automatic choice (``AUTO_METHODS``).

A customer's segment is the one from all their orders (it is not re-derived
when the held-out order was their latest).
"""

from __future__ import annotations

import os
import warnings
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats as _scipy_stats

from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError

# Methods and variance models whose leave-one-out is exact (closed forms).
EXACT_METHODS = ("plain", "pooled", "james-stein", "mta", "mta-minimax", "empirical-bayes")
EXACT_VARIANCES = ("classic", "log")
# The variance name reported for gamma-gamma, which has its own spread.
GAMMA_MODEL = "gamma-model"
# Candidates of the automatic choice: the cross-validated variants are left
# out because their fast leave-one-out keeps the multiplier chosen with the
# held-out order in the data, which would flatter them in this comparison.
AUTO_METHODS = ("plain", "pooled", "james-stein", "mta", "mta-minimax", "mta-segments", "empirical-bayes",
                "gamma-gamma")

# Bins of "orders known before the forecast" used in the breakdown tables.
PAST_ORDER_BINS = ((1, 1, "1"), (2, 2, "2"), (3, 3, "3"), (4, 5, "4-5"), (6, 10, "6-10"), (11, np.inf, "11+"))

# Held-out orders x order-count groups evaluated at once (floats): bounds memory,
# and a block this size stays in the processor's cache, which is what makes it fast.
_CHUNK_CELLS = 1 << 18
_WORKERS = min(4, os.cpu_count() or 1)
# Power series for the grouped centres: used where |b - b0| <= radius (k_min + b0).
_SERIES_RADIUS = 1e-3
# Power series for centres over customers with distinct weights (proportional model).
_SERIES_STEP = 0.01
_SERIES_TERMS = 8

_RESULT_COLUMNS = ["method", "variance", "sse", "error_reduction_pct", "ci_low", "ci_high", "coverage"]


# ---------------------------------------------------------------------------
# Held-out orders and O(1) updates of the shop-wide sums
# ---------------------------------------------------------------------------


class _Scale:
    """Per-customer averages on one scale (money or log) and their update
    when one order is held out.

    Everything is stored relative to ``origin`` (the full-data unweighted mean
    of the averages) so that the O(1) updates of sums of squares do not lose
    digits to cancellation.
    """

    def __init__(self, counts, means, sum_sq, order_values, held_customer, held_values):
        n = counts.astype(np.float64)
        self.T = len(n)
        self.counts = n
        self.origin = float(means.mean()) if self.T else 0.0
        d = means - self.origin
        self.d = d
        self.sum_d = float(d.sum())
        self.sum_d2 = float(d @ d)
        self.sum_nd = float(n @ d)
        self.sum_nd2 = float(n @ (d * d))
        self.N = float(n.sum())
        self.dof = float((n - 1).sum())
        self.total_ss = float(sum_sq.sum())
        self.sum_inv_n = float((1.0 / n).sum()) if self.T else 0.0
        # All order values (for the one-order-per-customer fallback variance).
        ov = order_values - self.origin
        self.sum_ov = float(ov.sum())
        self.sum_ov2 = float(ov @ ov)

        t = held_customer
        self.t = t
        nh = n[t]
        self.n = nh
        mh = means[t]
        dh = d[t]
        self.d_before = dh
        v = held_values - self.origin
        self.v = v  # held-out value relative to origin
        self.value = held_values
        step = (mh - held_values) / (nh - 1.0)
        self.d_after = dh + step
        self.mean_after = self.origin + self.d_after
        # Squared deviation removed from the customer's sum of squares.
        ss_t = sum_sq[t]
        removed = (held_values - mh) ** 2 * nh / (nh - 1.0)
        self.ss_removed = np.minimum(removed, ss_t)
        self._groups = None
        self._precision = None
        self._cache = {}

    # Sums after removing the held-out order (arrays over held-out orders).
    def sum_d_after(self):
        return self.sum_d + (self.d_after - self.d_before)

    def unweighted_centre_after(self):
        """Unweighted mean of the customers' averages, relative to origin."""
        return self.sum_d_after() / self.T

    def order_weighted_centre_after(self):
        """Order-weighted mean (sum n m / sum n) relative to origin."""
        return (self.sum_nd - self.v) / (self.N - 1.0)

    def var_means_after(self):
        """var(m, ddof=1) over customers after the removal."""
        if "var_means" not in self._cache:
            self._cache["var_means"] = self._var_means_after()
        return self._cache["var_means"]

    def _var_means_after(self):
        if self.T < 2:
            return np.full(len(self.t), np.nan)
        s1 = self.sum_d_after()
        s2 = self.sum_d2 + self.d_after**2 - self.d_before**2
        return np.maximum((s2 - s1 * s1 / self.T) / (self.T - 1.0), 0.0)

    def sum_inv_n_after(self):
        return self.sum_inv_n - 1.0 / self.n + 1.0 / (self.n - 1.0)

    def classic_variance_after(self):
        """Pooled within-customer variance sum SS / sum (n - 1) after removal,
        with the same fallbacks as the full fit: when no customer has two
        orders left, the sample variance of all remaining orders; when only
        one order is left in the whole file, zero."""
        if "classic" not in self._cache:
            self._cache["classic"] = self._classic_variance_after()
        return self._cache["classic"]

    def _classic_variance_after(self):
        dof = self.dof - 1.0
        with np.errstate(invalid="ignore", divide="ignore"):
            pooled = (self.total_ss - self.ss_removed) / dof
        if dof > 0:
            return np.maximum(pooled, 0.0)
        remaining = self.N - 1.0
        if remaining < 2:
            return np.zeros(len(self.t))
        s1 = self.sum_ov - self.v
        s2 = self.sum_ov2 - self.v**2
        return np.maximum((s2 - s1 * s1 / remaining) / (remaining - 1.0), 0.0)


class _Precision:
    """Precision weights q_s, with s_s = sigma2 / q_s, and their update.

    For the classic, log and robust models q_s = n_s (grouped by order count,
    exact); for the proportional model q_s = n_s / mu_s^2 with mu_s the
    full-data fixed point (one step from it, see :func:`_loo_predict`).  The
    held-out customer's weight goes from ``q_old`` to ``q_new``.
    """

    def __init__(self, scale, q=None):
        self.own_level = q is not None  # proportional: the own weight depends on the own level
        if q is None:
            self.grouped = True
            q = scale.counts
            self.q_old = scale.n
            self.q_new = scale.n - 1.0
        else:
            self.grouped = False
            self.q_old = q[scale.t]
            self.q_new = self.q_old * (scale.n - 1.0) / scale.n
        self.q = q
        d = scale.d
        self.sum_q = float(q.sum())
        self.sum_qd = float(q @ d)
        self.sum_qd2 = float(q @ (d * d))
        self.sum_inv_q = float((1.0 / q).sum())
        self._cache = {}

    @classmethod
    def of_counts(cls, scale):
        """q = n, built once per scale and shared by every method."""
        if scale._precision is None:
            scale._precision = cls(scale)
        return scale._precision

    def _cached(self, key, compute):
        if key not in self._cache:
            self._cache[key] = compute()
        return self._cache[key]

    def sum_q_after(self):
        return self._cached("q", lambda: self.sum_q - self.q_old + self.q_new)

    def sum_qd_after(self, scale):
        return self._cached("qd", lambda: self.sum_qd - self.q_old * scale.d_before + self.q_new * scale.d_after)

    def sum_qd2_after(self, scale):
        return self._cached(
            "qd2", lambda: self.sum_qd2 - self.q_old * scale.d_before**2 + self.q_new * scale.d_after**2)

    def sum_inv_q_after(self):
        return self._cached("inv_q", lambda: self.sum_inv_q - 1.0 / self.q_old + 1.0 / self.q_new)


def _order_count_groups(scale):
    """Distinct order counts k with the number of customers and the sum of
    (m - origin) in each group (computed once per scale)."""
    if scale._groups is None:
        ks, inverse = np.unique(scale.counts, return_inverse=True)
        group_size = np.bincount(inverse, minlength=len(ks)).astype(np.float64)
        group_sum = np.bincount(inverse, weights=scale.d, minlength=len(ks))
        scale._groups = ks, np.column_stack([group_sum, group_size])
    return scale._groups


def _rows_in_blocks(n_rows, width, run):
    """Call run(start, stop) over row blocks of about _CHUNK_CELLS cells."""
    chunk = max(1, _CHUNK_CELLS // max(1, width))
    starts = range(0, n_rows, chunk)
    if len(starts) > 1 and _WORKERS > 1:
        # numpy releases the interpreter lock inside these loops, so blocks run in parallel.
        with ThreadPoolExecutor(max_workers=_WORKERS) as pool:
            list(pool.map(lambda start: run(start, min(n_rows, start + chunk)), starts))
    else:
        for start in starts:
            run(start, min(n_rows, start + chunk))


def _weight_sums(q, columns, b):
    """sum_s (q_s / (q_s + b)) columns_s for every b: O(len(b) len(q)), in blocks."""
    sums = np.empty((len(b), columns.shape[1]))

    def run(start, stop):
        weight = np.add(q[None, :], b[start:stop, None])
        np.divide(q[None, :], weight, out=weight)  # g = q / (q + b)
        np.matmul(weight, columns, out=sums[start:stop])

    _rows_in_blocks(len(b), len(q), run)
    return sums


def _grouped_weight_sums(ks, groups, b):
    """sum_k (k / (k + b)) [D_k, G_k] over the K order-count groups, for every b.

    Most held-out orders move b only a little from its typical value b0 (one
    order out of many), so for those the sum is taken from its power series
    in (b0 - b), k / (k + b) = sum_j k (b0 - b)^j / (k + b0)^(j + 1), with as
    many terms J as make the dropped tail r^J / (1 - r) < 1e-17 of the sum
    (r = |b - b0| / (k_min + b0) <= _SERIES_RADIUS): the same numbers to
    rounding at O(J) instead of O(K) per order.  The others are summed
    directly, O(K) each.
    """
    sums = np.empty((len(b), 2))
    near = np.zeros(len(b), dtype=bool)
    if len(b) and _SERIES_RADIUS > 0:
        b0 = float(np.median(b[:: max(1, len(b) // 1024)]))  # a typical value; any b0 is exact
        ratio = np.abs(b - b0) / (ks[0] + b0)
        near = ratio <= _SERIES_RADIUS
    if near.any():
        worst = float(ratio[near].max())
        terms = 1 if worst == 0 else int(np.clip(np.ceil(np.log(1e-17) / np.log(worst)), 1, 40))
        inverse = 1.0 / (ks + b0)
        power = ks * inverse
        coefficients = []
        for _ in range(terms):
            coefficients.append(power @ groups)  # sum_k k / (k + b0)^(j + 1) [D_k, G_k]
            power = power * inverse
        delta = b0 - b[near]
        num = np.full(len(delta), coefficients[-1][0])
        den = np.full(len(delta), coefficients[-1][1])
        for coefficient in coefficients[-2::-1]:  # Horner
            num *= delta
            num += coefficient[0]
            den *= delta
            den += coefficient[1]
        sums[near, 0] = num
        sums[near, 1] = den
    if not near.all():
        sums[~near] = _weight_sums(ks, groups, b[~near])
    return sums


def _weight_sums_series(q, columns, b):
    """The sums of :func:`_weight_sums` for many customers with distinct q.

    Each b is expanded about the nearest point p of a geometric grid
    (|b - p| <= p * _SERIES_STEP / 2):

        q / (q + b) = sum_j q (p - b)^j / (q + p)^(j + 1),

    a geometric series with ratio at most |b - p| / p <= 0.005, so
    _SERIES_TERMS = 8 terms leave a tail below 1e-18 of the sum: exact to
    rounding, at O(terms x customers) per grid point used plus O(terms) per
    held-out order.  b = 0 (every g = 1) is summed directly.
    """
    sums = np.empty((len(b), columns.shape[1]))
    zero = b == 0
    sums[zero] = columns.sum(axis=0)
    step = np.log1p(_SERIES_STEP)
    rest = np.flatnonzero(~zero)
    point_of = np.rint(np.log(b[rest]) / step).astype(np.int64)
    for point in np.unique(point_of):
        rows = rest[point_of == point]
        p = float(np.exp(point * step))
        inverse = 1.0 / (q + p)
        power = q * inverse
        coefficients = []
        for _ in range(_SERIES_TERMS):
            coefficients.append(power @ columns)
            power = power * inverse
        ratio = (p - b[rows])[:, None]
        total = np.tile(coefficients[-1], (len(rows), 1))
        for coefficient in coefficients[-2::-1]:  # Horner
            total *= ratio
            total += coefficient
        sums[rows] = total
    return sums


def _centre_sums_without(scale, precision, b):
    """Numerator and denominator of the centre c = sum g_s m_s / sum g_s with
    g_s = q_s / (q_s + b), over every customer except the held-out one
    (relative to origin), for one b per held-out order.

    With q = n, customers are grouped by order count k, so the sums run over
    the K distinct counts: O(N K).  Otherwise an exact-to-rounding power
    series over customers (:func:`_weight_sums_series`).
    """
    if precision.grouped:
        ks, groups = _order_count_groups(scale)
        sums = _grouped_weight_sums(ks, groups, b)
    else:
        columns = np.column_stack([scale.d, np.ones(scale.T)])
        sums = _weight_sums_series(precision.q, columns, b)
    g_old = precision.q_old / (precision.q_old + b)
    return sums[:, 0] - g_old * scale.d_before, sums[:, 1] - g_old


def _weighted_centre_after(scale, precision, b):
    """Centre after the removal, the held-out customer moved from weight
    q_old to q_new with the new average.  b = 0 gives the unweighted mean,
    b = inf the q-weighted mean (the limit of g_s proportional to q_s; for
    q = n the order-weighted mean)."""
    finite = np.isfinite(b)
    finite_b = np.where(finite, b, 0.0)
    num, den = _centre_sums_without(scale, precision, finite_b)
    g_new = precision.q_new / (precision.q_new + finite_b)
    with np.errstate(invalid="ignore", divide="ignore"):
        centre = (num + g_new * scale.d_after) / (den + g_new)
        limit = precision.sum_qd_after(scale) / precision.sum_q_after()
    return np.where(finite, centre, limit)


def _own_level_fixed_point(scale, precision, b):
    """Proportional model: the held-out customer's own level mu solves
    mu = F(mu), the estimate when s = cv2 mu^2 / n'; the other customers keep
    their full-data levels.  F(mu) lies between the customer's new average
    and the centre of the others, so bisection on that interval finds the
    root (60 halvings: to rounding)."""
    finite = np.isfinite(b)
    finite_b = np.where(finite, b, 0.0)
    num, den = _centre_sums_without(scale, precision, finite_b)
    with np.errstate(invalid="ignore", divide="ignore"):
        others = num / den
    n_after = scale.n - 1.0
    d_new = scale.d_after

    def estimate_at(level):
        q_new = n_after / (level * level)
        g = q_new / (q_new + finite_b)
        centre = (num + g * d_new) / (den + g)
        return centre + g * (d_new - centre), g

    lo = scale.origin + np.minimum(d_new, others)
    hi = scale.origin + np.maximum(d_new, others)
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        above = mid - (scale.origin + estimate_at(mid)[0]) > 0
        hi = np.where(above, mid, hi)
        lo = np.where(above, lo, mid)
    estimate, g = estimate_at(0.5 * (lo + hi))
    limit = precision.sum_qd_after(scale) / precision.sum_q_after()
    estimate, g = np.where(finite, estimate, limit), np.where(finite, g, 0.0)
    alone = ~(den > 0)  # nobody else to average with (a single customer)
    return np.where(alone, d_new, estimate), np.where(alone, 1.0, g)


# ---------------------------------------------------------------------------
# Methods after the removal: estimate (relative to origin) and own weight g
# ---------------------------------------------------------------------------


def _own_weight(q_after, b):
    """g = q / (q + b) = 1 / (1 + b / q) with the limit b = inf -> 0."""
    with np.errstate(invalid="ignore"):
        g = q_after / (q_after + b)
    return np.where(np.isinf(b), 0.0, g)


def _loo_plain(scale, precision, sigma2, amount=1.0):
    return scale.d_after, np.ones(len(scale.t))


def _loo_pooled(scale, precision, sigma2, amount=1.0):
    return scale.order_weighted_centre_after(), np.zeros(len(scale.t))


def _loo_james_stein(scale, precision, sigma2, amount=1.0):
    """Positive-part James-Stein (Bock's form) towards the unweighted mean:
    Q sigma2 = sum q_s (m_s - xi)^2 = sum q d^2 - 2 delta sum q d + delta^2 sum q
    with d = m - origin and delta = xi - origin.  ``amount`` multiplies the
    shrink amount 1 - factor (clipped to [0, 1]), as the cross-validated
    variant does."""
    H = len(scale.t)
    if scale.T <= 3:
        return scale.d_after, np.ones(H)
    delta = scale.unweighted_centre_after()
    spread = (precision.sum_qd2_after(scale) - 2.0 * delta * precision.sum_qd_after(scale)
              + delta * delta * precision.sum_q_after())
    spread = np.maximum(spread, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        q = spread / sigma2
        factor = np.maximum(0.0, 1.0 - (scale.T - 3.0) / q)
    factor = 1.0 - np.clip(amount * (1.0 - factor), 0.0, 1.0)
    usable = (sigma2 > 0) & (spread > 0) & np.isfinite(q)
    factor = np.where(usable, factor, 1.0)
    estimate = delta + factor * (scale.d_after - delta)
    return estimate, factor


def _loo_weighted(scale, precision, b):
    """Shrink towards the weighted centre with own weight q/(q+b)."""
    if precision.own_level:
        return _own_level_fixed_point(scale, precision, b)
    centre = _weighted_centre_after(scale, precision, b)
    g = _own_weight(precision.q_new, b)
    estimate = g * scale.d_after + (1.0 - g) * centre
    return estimate, g


def _mta_b(similarity, sigma2):
    """b = a sigma2 so that g = 1/(1 + a sigma2/q) = q/(q + b); a = inf -> b = inf."""
    with np.errstate(invalid="ignore"):
        b = similarity * sigma2
    # a = inf and sigma2 = 0: every average is equal; the estimate is that value.
    return np.where(np.isnan(b), 0.0, b)


def _loo_mta(scale, precision, sigma2, amount=1.0):
    """Constant MTA, a = 1/var(m); ``amount`` multiplies a (cross-validated variant)."""
    var_m = scale.var_means_after()
    with np.errstate(divide="ignore"):
        a = 1.0 / var_m
    if amount == 0:
        return _loo_plain(scale, precision, sigma2)
    return _loo_weighted(scale, precision, _mta_b(amount * a, sigma2))


def _loo_mta_minimax(scale, precision, sigma2, amount=1.0):
    if scale.T == 1:  # no one to average with
        return _loo_plain(scale, precision, sigma2)
    top, top_owner, top_second, bottom, bottom_owner, bottom_second = _extremes(scale.d)
    t = scale.t
    high_others = np.where(t == top_owner, top_second, top)
    low_others = np.where(t == bottom_owner, bottom_second, bottom)
    high = np.maximum(high_others, scale.d_after)
    low = np.minimum(low_others, scale.d_after)
    spread = high - low
    with np.errstate(divide="ignore"):
        a = 2.0 / (spread * spread)
    return _loo_weighted(scale, precision, _mta_b(a, sigma2))


def _extremes(values):
    """Largest and smallest value, the owner of each, and the extreme among
    all the others (equal to the extreme itself when it is tied)."""
    if len(values) < 2:
        v = float(values[0]) if len(values) else np.nan
        return v, 0, -np.inf, v, 0, np.inf
    top_owner = int(np.argmax(values))
    bottom_owner = int(np.argmin(values))
    rest_top = np.delete(values, top_owner)
    rest_bottom = np.delete(values, bottom_owner)
    return (
        float(values[top_owner]),
        top_owner,
        float(rest_top.max()),
        float(values[bottom_owner]),
        bottom_owner,
        float(rest_bottom.min()),
    )


def _loo_empirical_bayes(scale, precision, sigma2, amount=1.0):
    """Normal-normal with the moment tau2 = max(0, var(m) - mean(s)):
    w_s = 1/(tau2 + sigma2/q_s) is proportional to q_s/(q_s + sigma2/tau2)."""
    var_m = scale.var_means_after()
    mean_s = sigma2 * precision.sum_inv_q_after() / scale.T
    tau2 = np.maximum(0.0, var_m - mean_s)
    with np.errstate(divide="ignore", invalid="ignore"):
        b = sigma2 / tau2
    # tau2 = 0 -> b = inf (complete pooling); sigma2 = 0 -> b = 0 (own averages).
    b = np.where(np.isnan(b), 0.0, b)
    return _loo_weighted(scale, precision, b)


def _segment_codes(stats):
    """Segment number of every customer, as the forecasts form them."""
    labels = pd.factorize(stats["segment"].astype("string").fillna(""), sort=True)[0]
    return np.unique(labels, return_inverse=True)[1].astype(np.int64)


def _loo_mta_segments(scale, sigma2, segment):
    """Block-similarity MTA after each removal, exactly.

    The similarities a_w (within segments) and a_b (between) come from sums
    per segment of the averages and their squares, updated in O(G) per
    held-out order.  The Woodbury solve of
    :func:`forecasting.shrinkage.mta_segments` needs, per segment, sums over
    its customers of functions of n_s only (s_s = sigma2 / n_s), so customers
    are grouped by (segment, order count); the held-out customer moves from
    cell (g, n) to (g, n - 1).  Then one G x G solve per held-out order
    (batched).  Cost O(N (G K' + G^3)), K' the number of (segment, count)
    cells.
    """
    H = len(scale.t)
    T = scale.T
    t = scale.t
    own = segment[t]
    G = int(segment.max()) + 1
    if T == 1:
        return scale.d_after, np.ones(H)
    size = np.bincount(segment, minlength=G).astype(np.float64)
    s1 = np.bincount(segment, weights=scale.d, minlength=G)
    s2 = np.bincount(segment, weights=scale.d * scale.d, minlength=G)
    change = scale.d_after - scale.d_before
    s1_own = s1[own] + change
    s2_own = s2[own] + scale.d_after**2 - scale.d_before**2
    with np.errstate(invalid="ignore", divide="ignore"):
        ss = np.maximum(s2 - s1 * s1 / size, 0.0)  # spread of the averages within each segment
        ss_own = np.maximum(s2_own - s1_own * s1_own / size[own], 0.0)
        square_means = s1 * s1 / size
        square_own = s1_own * s1_own / size[own]
    ss = np.where(size > 0, ss, 0.0)
    square_means = np.where(size > 0, square_means, 0.0)
    within_pairs = float(np.sum(size * (size - 1.0)))
    between_pairs = float(T * (T - 1.0) - within_pairs)
    within_sum = float(np.sum(2.0 * size * ss)) + 2.0 * size[own] * (ss_own - ss[own])
    grand = scale.sum_d_after() / T
    spread_of_means = float(np.sum(square_means)) + square_own - square_means[own] - T * grand * grand
    between_sum = (2.0 * (float(np.sum(ss * (T - size))) + (ss_own - ss[own]) * (T - size[own]))
                   + 2.0 * T * np.maximum(spread_of_means, 0.0))

    def similarity(total, pairs):
        if pairs == 0:
            return np.full(H, np.nan)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(total > 0, 2.0 * pairs / total, np.inf)

    a_w = similarity(within_sum, within_pairs)
    a_b = similarity(between_sum, between_pairs)
    a_b = np.where(np.isnan(a_b), 0.0, a_b)
    a_w = np.where(np.isnan(a_w), a_b, a_w)
    a_b = np.minimum(a_b, a_w)
    n_min = np.minimum(float(scale.counts.min()), scale.n - 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        cap = n_min * 1e12 / sigma2  # a s_max = 1e12 at most
    a_w = np.minimum(a_w, cap)
    a_b = np.minimum(a_b, cap)

    # Cells (segment, order count) with their number of customers and sum of d.
    base = int(scale.counts.max()) + 1
    cell_key, cell_of = np.unique(segment * base + scale.counts.astype(np.int64), return_inverse=True)
    cell_seg = cell_key // base
    cell_n = (cell_key % base).astype(np.float64)
    cell_count = np.bincount(cell_of, minlength=len(cell_key)).astype(np.float64)
    cell_sum = np.bincount(cell_of, weights=scale.d, minlength=len(cell_key))
    to_segment = np.zeros((len(cell_key), G))
    to_segment[np.arange(len(cell_key)), cell_seg] = 1.0

    estimate = np.empty(H)
    weight = np.empty(H)
    rows_per_block = max(1, _CHUNK_CELLS // max(1, len(cell_key)))
    for start in range(0, H, rows_per_block):
        rows = slice(start, min(H, start + rows_per_block))
        r = np.arange(rows.start, rows.stop)
        sg2, aw, ab = sigma2[rows], a_w[rows], a_b[rows]
        degree_of = lambda seg, aw=aw, ab=ab: aw[:, None] * size[seg] + ab[:, None] * (T - size[seg])  # noqa: E731
        s_cell = sg2[:, None] / cell_n[None, :]
        delta = 1.0 + s_cell * degree_of(cell_seg) / T
        h = (cell_count * s_cell / (T * delta)) @ to_segment
        between = 1.0 + s_cell * ab[:, None] * (T - size[cell_seg]) / T
        diag_sum = (cell_count * between / delta) @ to_segment
        rhs = (cell_sum / delta) @ to_segment
        # Move the held-out customer from cell (g, n) with d to (g, n - 1) with d'.
        g_own = own[rows]
        n_old, n_new = scale.n[rows], scale.n[rows] - 1.0
        deg_own = aw * size[g_own] + ab * (T - size[g_own])
        for n_cell, d_cell, sign in ((n_old, scale.d_before[rows], -1.0), (n_new, scale.d_after[rows], 1.0)):
            s_t = sg2 / n_cell
            delta_t = 1.0 + s_t * deg_own / T
            idx = (np.arange(len(r)), g_own)  # one cell per row, so plain fancy-index adds are safe
            h[idx] += sign * s_t / (T * delta_t)
            diag_sum[idx] += sign * (1.0 + s_t * ab * (T - size[g_own]) / T) / delta_t
            rhs[idx] += sign * d_cell / delta_t
        B = np.repeat(ab[:, None, None], G, axis=1).repeat(G, axis=2)
        B[:, np.arange(G), np.arange(G)] = aw[:, None]
        K = -h[:, :, None] * B
        K[:, np.arange(G), np.arange(G)] = diag_sum / np.maximum(size, 1.0)[None, :]
        w = np.linalg.solve(K, rhs[:, :, None])[:, :, 0]
        Bw = np.einsum("rgh,rh->rg", B, w)
        s_t = sg2 / n_new
        delta_t = 1.0 + s_t * deg_own / T
        y = (scale.d_after[rows] + s_t * Bw[np.arange(len(r)), g_own] / T) / delta_t
        unit = np.zeros((len(r), G, 1))
        unit[np.arange(len(r)), g_own, 0] = 1.0
        column = np.linalg.solve(K, unit)[:, :, 0]  # K^-1 e_g
        bk = np.einsum("rh,rh->r", B[np.arange(len(r)), g_own, :], column)  # (B K^-1)_gg
        estimate[rows] = y
        weight[rows] = np.clip(1.0 / delta_t + (s_t / T) * bk / (delta_t * delta_t), 0.0, 1.0)

    # Degenerate cases handled as the full fit does.
    all_equal = scale.var_means_after() == 0
    plain = ~(sigma2 > 0)
    estimate = np.where(all_equal | plain, scale.d_after, estimate)
    weight = np.where(all_equal, 0.0, np.where(plain, 1.0, weight))
    return estimate, weight


_LOO_METHODS = {
    "plain": _loo_plain,
    "pooled": _loo_pooled,
    "james-stein": _loo_james_stein,
    "mta": _loo_mta,
    "mta-minimax": _loo_mta_minimax,
    "empirical-bayes": _loo_empirical_bayes,
    "james-stein-cv": _loo_james_stein,
    "mta-cv": _loo_mta,
}
# Methods whose fast leave-one-out keeps something from the full-data fit
# (documented in _loo_predict) rather than refitting it exactly.
APPROXIMATE_METHODS = ("gamma-gamma", "james-stein-cv", "mta-cv")
APPROXIMATE_VARIANCES = ("robust", "proportional")


# ---------------------------------------------------------------------------
# Leave-one-out predictions for one method x variance
# ---------------------------------------------------------------------------


@dataclass
class _HeldOut:
    """Every order of every customer with at least two orders."""

    orders: pd.DataFrame
    stats: pd.DataFrame
    codes: np.ndarray  # position in stats of every order's customer
    customer: np.ndarray  # position of the held-out order's customer in stats
    value: np.ndarray
    money: _Scale
    log: _Scale
    _cache: dict = field(default_factory=dict)

    @property
    def past_orders(self):
        return self.money.n - 1.0

    def full_fit(self, method, variance):
        """The forecasts on all orders (for what the fast path keeps fixed)."""
        key = (method, variance)
        if key not in self._cache:
            from forecasting.forecasts import forecast_customers

            self._cache[key] = forecast_customers(self.stats, method=method,
                                                  variance="classic" if variance == GAMMA_MODEL else variance,
                                                  orders=self.orders)
        return self._cache[key]

    def robust_variance_after(self):
        """Robust pooled variance after each removal, keeping the full-data
        clip point c * scale0 (the one approximation) and recomputing the
        held-out customer's clipped sum exactly around the new average."""
        if "robust" not in self._cache:
            self._cache["robust"] = _robust_variance_after(self)
        return self._cache["robust"]

    def proportional_variance_after(self):
        """cv2 = sum SS/m^2 / sum (n - 1) after each removal (exact, O(1) each)."""
        if "proportional" not in self._cache:
            self._cache["proportional"] = _proportional_variance_after(self)
        return self._cache["proportional"]


def _customer_codes(orders, stats):
    """Position in ``stats`` of every order's customer."""
    codes, names = pd.factorize(orders["customer"], sort=True)
    if len(names) == len(stats) and np.array_equal(np.asarray(names, dtype=object),
                                                   stats.index.to_numpy(dtype=object)):
        return codes  # the usual case: stats = customer_statistics(orders), sorted the same way
    return stats.index.get_indexer(orders["customer"])


def _held_out_orders(orders, stats):
    codes = _customer_codes(orders, stats)
    if np.any(codes < 0):
        raise ValueError("every order's customer must be in the statistics table")
    counts = stats["orders"].to_numpy()
    values = orders["order_value"].to_numpy(dtype=np.float64)
    keep = counts[codes] >= 2
    t = codes[keep]
    x = values[keep]
    money = _Scale(
        counts, stats["mean"].to_numpy(np.float64), stats["sum_sq_dev"].to_numpy(np.float64), values, t, x
    )
    log = _Scale(
        counts,
        stats["log_mean"].to_numpy(np.float64),
        stats["log_sum_sq_dev"].to_numpy(np.float64),
        np.log(values),
        t,
        np.log(x),
    )
    return _HeldOut(orders=orders, stats=stats, codes=codes, customer=t, value=x, money=money, log=log)


def _robust_variance_after(held):
    """Winsorised pooled variance with one order removed, clip point fixed.

    With C = c scale0 from the full data, customer t contributes
    R_t = sum_i min((x_i - m_t)^2, C^2 (n_t - 1)/n_t) and
    sigma2 = sum_t R_t / sum_t (n_t - 1) / kappa(c) (the formula of
    :func:`forecasting.variance.robust_pooled_variance`).  Removing order i
    changes only R_t: its other orders are compared with the new average m'
    and the new bound h^2 = C^2 (n - 2)/(n - 1).  Each customer's orders are
    sorted once; a vectorised bisection finds the orders within m' +- h and
    prefix sums give their squared deviations, so each removal costs
    O(log n_t).
    """
    from forecasting.variance import pooled_variance

    fit = pooled_variance(held.stats, model="robust", orders=held.orders)
    money = held.money
    scale0 = fit.details.get("scale0", 0.0)
    if not scale0 > 0 or money.dof - 1.0 <= 0:
        return money.classic_variance_after()  # the same fallback the full fit takes
    clip_at = float(fit.details["clip_at"])
    kappa = float(fit.details["kappa"])
    stats = held.stats
    n = stats["orders"].to_numpy(np.float64)
    means = stats["mean"].to_numpy(np.float64)
    values = held.orders["order_value"].to_numpy(np.float64)
    codes = held.codes
    dev = values - means[codes]  # deviation from the customer's full-data average
    bound = clip_at * clip_at * (n - 1.0) / n
    per_customer = np.bincount(codes, weights=np.minimum(dev * dev, bound[codes]), minlength=len(n))
    total = float(per_customer[n >= 2].sum())

    order = np.lexsort((dev, codes))
    sorted_dev = dev[order]
    start = np.concatenate([[0], np.cumsum(np.bincount(codes, minlength=len(n)))])
    prefix1 = np.concatenate([[0.0], np.cumsum(sorted_dev)])
    prefix2 = np.concatenate([[0.0], np.cumsum(sorted_dev * sorted_dev)])

    t = held.customer
    nh = money.n
    lo_index, hi_index = start[t], start[t + 1]
    shift = (means[t] - held.value) / (nh - 1.0)  # m' - m
    n_after = nh - 1.0
    with np.errstate(invalid="ignore", divide="ignore"):
        h2 = np.where(n_after >= 2, clip_at * clip_at * (n_after - 1.0) / n_after, 0.0)
    h = np.sqrt(h2)
    first_in = _segment_search(sorted_dev, lo_index, hi_index, shift - h, strict=False)
    first_out = _segment_search(sorted_dev, lo_index, hi_index, shift + h, strict=True)
    inside = first_out - first_in
    s1 = prefix1[first_out] - prefix1[first_in]
    s2 = prefix2[first_out] - prefix2[first_in]
    inside_sq = np.maximum(s2 - 2.0 * shift * s1 + shift * shift * inside, 0.0)
    all_orders = inside_sq + (nh - inside) * h2
    own = (held.value - means[t]) - shift
    new_sum = np.where(n_after >= 2, all_orders - np.minimum(own * own, h2), 0.0)
    new_total = total - per_customer[t] + np.maximum(new_sum, 0.0)
    return np.maximum(new_total / (money.dof - 1.0) / kappa, 0.0)


def _segment_search(sorted_values, lo, hi, target, *, strict):
    """First index in [lo, hi) of each segment whose value is >= target
    (> target when ``strict``), by vectorised bisection."""
    lo = lo.astype(np.int64).copy()
    hi = hi.astype(np.int64).copy()
    while True:
        active = lo < hi
        if not active.any():
            return lo
        mid = (lo + hi) // 2
        value = sorted_values[np.minimum(mid, len(sorted_values) - 1)]
        below = (value <= target) if strict else (value < target)
        go_right = active & below
        go_left = active & ~below
        lo = np.where(go_right, mid + 1, lo)
        hi = np.where(go_left, mid, hi)


def _proportional_variance_after(held):
    money = held.money
    stats = held.stats
    n = stats["orders"].to_numpy(np.float64)
    means = stats["mean"].to_numpy(np.float64)
    ss = stats["sum_sq_dev"].to_numpy(np.float64)
    relative = ss / (means * means)
    dof = money.dof - 1.0
    if dof > 0:
        t = money.t
        ss_after = np.maximum(ss[t] - money.ss_removed, 0.0)
        total = float(relative.sum()) - relative[t] + ss_after / money.mean_after**2
        return np.maximum(total / dof, 0.0)
    # Every customer is left with one order: var of the averages / their mean^2.
    if money.T < 2:
        return np.zeros(len(money.t))
    grand = money.origin + money.unweighted_centre_after()
    return money.var_means_after() / grand**2


def _loo_gamma_gamma(held):
    """Gamma-gamma with p, q, gamma kept from the full-data fit (the one
    approximation): E = (gamma + n' m') p / (p n' + q - 1) for the customer's
    remaining n' orders with average m'."""
    fit = held.full_fit("gamma-gamma", GAMMA_MODEL).attrs["fit"]
    money = held.money
    n_after = money.n - 1.0
    mean_after = money.mean_after
    if "population_mean" not in fit:  # the full fit fell back to plain averages
        return mean_after, np.ones(len(mean_after))
    p, q = fit["p"], fit["q"]
    g = p * n_after / (p * n_after + q - 1.0)
    population = fit["population_mean"]
    return population + g * (mean_after - population), g


@dataclass
class _Predictions:
    """Leave-one-out forecasts of the held-out orders for one method x variance.

    The next-order range is kept on the log scale: ``log_median`` and
    ``half_width`` = z sqrt(sigma2_log + g sigma2_log / n).
    """

    expected: np.ndarray
    log_median: np.ndarray
    half_width: np.ndarray
    weight: np.ndarray

    @property
    def low(self):
        return np.exp(self.log_median - self.half_width)

    @property
    def high(self):
        return np.exp(self.log_median + self.half_width)

    def inside(self, log_value):
        """Whether each held-out order fell inside its next-order range."""
        return np.abs(log_value - self.log_median) <= self.half_width


def _loo_predict(held, method, variance, *, next_level=0.80):
    """Leave-one-out expected order value and next-order range for every held-out order.

    The range is the one the forecasts give: lognormal with the shop's pooled
    log-scale spread sigma2_log, median = expected exp(-sigma2_log / 2),
    range = median exp(+- z sqrt(sigma2_log + g sigma2_log / n)), all refitted
    without the held-out order.

    Exact for ``EXACT_METHODS`` and mta-segments x ``EXACT_VARIANCES``.  The
    rest keep one thing from the full-data fit and refit everything else
    exactly:

    * ``robust``: the clip point c * scale0 (the clipped sums are updated);
    * ``proportional``: one step from the full-data fixed point: the levels
      mu_s in s_s = cv2 mu_s^2 / n_s are the full-data forecasts, while cv2,
      the shrinkage amount and the centre are refitted (the centre's sums
      over customers use an exact-to-rounding power series);
    * ``gamma-gamma``: p, q and gamma;
    * ``james-stein-cv`` and ``mta-cv``: the cross-validated multiplier lambda.
    """
    known = _has_fast_path(method)
    if not known or variance not in EXACT_VARIANCES + APPROXIMATE_VARIANCES + (GAMMA_MODEL,):
        raise ValueError(f"no fast leave-one-out for method {method!r} with variance {variance!r}")
    sigma2_log = held.log.classic_variance_after()
    n_after = held.money.n - 1.0
    on_log = variance == "log" and method != "gamma-gamma"
    if method == "gamma-gamma":
        expected, g = _loo_gamma_gamma(held)
    else:
        scale = held.log if on_log else held.money
        if variance == "classic":
            sigma2 = held.money.classic_variance_after()
        elif variance == "log":
            sigma2 = sigma2_log
        elif variance == "robust":
            sigma2 = held.robust_variance_after()
        else:
            sigma2 = held.proportional_variance_after()
        if method == "mta-segments":
            if variance == "proportional":
                raise ValueError("no fast leave-one-out for mta-segments with proportional variance")
            estimate, g = _loo_mta_segments(scale, sigma2, _segment_codes(held.stats))
            return _finish(held, scale, estimate, g, on_log, sigma2_log, n_after, next_level)
        if variance == "proportional" and method not in ("plain", "pooled"):
            level = held.full_fit(method, variance)["expected_next_order"].to_numpy(np.float64)
            precision = _Precision(scale, scale.counts / (level * level))
        else:
            precision = _Precision.of_counts(scale)
        amount = 1.0
        if method.endswith("-cv"):
            # No lambda when the full fit fell back to plain averages (one customer).
            amount = float(held.full_fit(method, variance).attrs["fit"].get("lambda", 1.0))
        estimate, g = _LOO_METHODS[method](scale, precision, sigma2, amount)
        return _finish(held, scale, estimate, g, on_log, sigma2_log, n_after, next_level)
    return _finish(held, None, expected, g, False, sigma2_log, n_after, next_level)


def _finish(held, scale, estimate, g, on_log, sigma2_log, n_after, next_level):
    """Money forecast and next-order range from an estimate on its scale
    (relative to the scale's origin; ``scale=None``: already money)."""
    if on_log:
        log_expected = scale.origin + estimate + (sigma2_log + g * sigma2_log / n_after) / 2.0
        expected = np.exp(log_expected)
    else:
        expected = estimate if scale is None else scale.origin + estimate
        with np.errstate(divide="ignore", invalid="ignore"):
            log_expected = np.log(expected)
    z = _scipy_stats.norm.ppf(0.5 + next_level / 2.0)
    half_width = z * np.sqrt(sigma2_log * (1.0 + g / n_after))
    return _Predictions(expected=expected, log_median=log_expected - sigma2_log / 2.0, half_width=half_width,
                        weight=g)


# ---------------------------------------------------------------------------
# Which method x variance pairs are evaluated
# ---------------------------------------------------------------------------


def _known_names():
    """The method and variance names the forecasts accept (one list in the product)."""
    try:
        from forecasting.forecasts import METHODS
    except ImportError:  # pragma: no cover - only while the forecasts module is missing
        METHODS = EXACT_METHODS
    try:
        from forecasting.variance import VARIANCE_MODELS
    except ImportError:  # pragma: no cover
        VARIANCE_MODELS = EXACT_VARIANCES
    return tuple(METHODS), tuple(VARIANCE_MODELS)


def _parse_names(value, allowed, option):
    """Accept None, a comma-separated string or a list; check every name."""
    if value is None:
        return None
    if isinstance(value, str):
        names = [part.strip() for part in value.split(",") if part.strip()]
    else:
        names = [str(part).strip() for part in value]
    if not names:
        raise OrderDataError(f"{option} is empty", value=value, fix=f"Give one or more of: {', '.join(allowed)}")
    for name in names:
        if name not in allowed:
            raise OrderDataError(
                f"unknown name for {option}", value=name, fix=f"Choose from: {', '.join(allowed)}"
            )
    return list(dict.fromkeys(names))


def _combinations(methods, variances, *, stats=None, default_methods=None):
    """(method, variance) pairs to evaluate, in the product's order.

    gamma-gamma has its own spread and is evaluated once, as "gamma-model".
    By default every method with a fast leave-one-out is evaluated with every
    variance model; "mta-segments" only when the customers have segments.
    """
    known_methods, known_variances = _known_names()
    chosen_methods = _parse_names(methods, known_methods, "--methods")
    chosen_variances = _parse_names(variances, known_variances, "--variances")
    has_segments = stats is not None and "segment" in stats.columns
    if chosen_methods is None:
        pool = default_methods if default_methods is not None else known_methods
        chosen_methods = [m for m in pool if _has_fast_path(m) and (m != "mta-segments" or has_segments)]
    if chosen_variances is None:
        chosen_variances = list(known_variances)
    pairs = []
    for method in chosen_methods:
        if not _has_fast_path(method):
            raise OrderDataError(
                f"method '{method}' has no leave-one-out evaluation",
                value=method,
                fix=f"Evaluate one of: {', '.join(m for m in known_methods if _has_fast_path(m))}",
            )
        if method == "mta-segments" and not has_segments:
            raise OrderDataError(
                "the 'mta-segments' method needs a segment for every customer",
                fix="Name the segment column with --segment, or leave mta-segments out of --methods",
            )
        if method == "gamma-gamma":
            pairs.append((method, GAMMA_MODEL))
            continue
        for variance in chosen_variances:
            if method == "mta-segments" and variance == "proportional":
                if variances is not None and len(chosen_variances) == 1:
                    raise OrderDataError(
                        "the leave-one-out of mta-segments covers the classic, robust and log variance models",
                        value=variance, fix="Choose another --variances for mta-segments")
                continue  # its levels differ customer by customer; no exact grouping
            pairs.append((method, variance))
    return pairs


def _has_fast_path(method):
    return method in _LOO_METHODS or method in ("gamma-gamma", "mta-segments")


# ---------------------------------------------------------------------------
# Scoring helpers: sums per customer, bootstrap, breakdowns
# ---------------------------------------------------------------------------


def _reduction_pct(sse_plain, sse_method):
    """100 (SSE_plain - SSE_method) / SSE_plain; positive = better than plain averages."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return 100.0 * (np.float64(sse_plain) - sse_method) / np.float64(sse_plain)


def _bootstrap_reductions(per_customer_plain, per_customer_methods, *, resamples, seed):
    """Error reduction of every method in every bootstrap resample of customers (resamples x methods).

    ``per_customer_methods`` is customers x methods of summed squared errors.
    Each resample draws T customers with replacement; their counts (a
    multinomial count vector, made by counting T uniform draws with
    ``numpy.bincount``, much faster than ``Generator.multinomial`` for many
    customers) turn the resampled SSE into counts @ per-customer SSE.  Counts
    are drawn for a few resamples at a time to bound memory. The same seed gives
    the same resamples, so comparisons between methods are paired.
    """
    T = len(per_customer_plain)
    rng = np.random.default_rng(seed)
    block = int(max(1, min(resamples, (1 << 20) // T)))
    table = np.column_stack([per_customer_plain, per_customer_methods])
    draws = []
    done = 0
    while done < resamples:
        size = min(block, resamples - done)
        picks = rng.integers(0, T, size=(size, T))
        picks += (np.arange(size, dtype=picks.dtype) * T)[:, None]  # resample r counts in bins r T .. r T + T - 1
        counts = np.bincount(picks.ravel(), minlength=size * T).reshape(size, T)
        draws.append(counts @ table)
        done += size
    sums = np.vstack(draws)
    return _reduction_pct(sums[:, :1], sums[:, 1:])


def _percentile_interval(draws, level=0.95):
    tail = (1.0 - level) / 2.0 * 100.0
    with warnings.catch_warnings():
        # Every resample undefined (plain averages were exact): the interval is NaN.
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanpercentile(draws, tail, axis=0), np.nanpercentile(draws, 100.0 - tail, axis=0)


def _bootstrap_intervals(per_customer_plain, per_customer_methods, *, resamples, seed, level=0.95):
    """Percentile interval of every error reduction, resampling customers."""
    n_methods = per_customer_methods.shape[1]
    if resamples <= 0 or len(per_customer_plain) < 2:
        nan = np.full(n_methods, np.nan)
        return nan, nan
    reductions = _bootstrap_reductions(per_customer_plain, per_customer_methods, resamples=resamples, seed=seed)
    return _percentile_interval(reductions, level)


def _per_customer_sse(scored):
    codes, _ = pd.factorize(scored.customer)
    n_customers = int(codes.max()) + 1 if len(codes) else 0
    per_plain = np.bincount(codes, weights=scored.plain_sq, minlength=n_customers)
    per_methods = np.column_stack(
        [np.bincount(codes, weights=sq, minlength=n_customers) for sq in scored.method_sq]
    ) if scored.method_sq else np.zeros((n_customers, 0))
    return per_plain, per_methods


def _paired_margins(scored, chosen_pair, *, resamples, seed, level=0.95):
    """How far the chosen pair beats each other pair, with a paired bootstrap interval.

    The margin is in points of error reduction against plain averages (chosen minus
    other). Both come from the same resampled customers, so the interval is that of
    the difference itself, much narrower than the two separate intervals suggest.
    """
    columns = ["method", "variance", "margin_pct", "margin_low", "margin_high"]
    if chosen_pair not in scored.pairs:
        return pd.DataFrame(columns=columns)
    per_plain, per_methods = _per_customer_sse(scored)
    sse_plain = float(scored.plain_sq.sum())
    point = np.array([_reduction_pct(sse_plain, float(sq.sum())) for sq in scored.method_sq])
    best = scored.pairs.index(chosen_pair)
    if resamples > 0 and len(per_plain) >= 2:
        draws = _bootstrap_reductions(per_plain, per_methods, resamples=resamples, seed=seed)
        low, high = _percentile_interval(draws[:, [best]] - draws, level)
    else:
        low = high = np.full(len(point), np.nan)
    rows = [{"method": m, "variance": v, "margin_pct": float(point[best] - point[i]),
             "margin_low": float(low[i]), "margin_high": float(high[i])}
            for i, (m, v) in enumerate(scored.pairs) if i != best]
    return pd.DataFrame(rows, columns=columns)


def _past_order_labels(past):
    labels = np.empty(len(past), dtype=object)
    for low, high, label in PAST_ORDER_BINS:
        labels[(past >= low) & (past <= high)] = label
    return labels


def _breakdown(kind, group_name, groups, plain_sq, method_sq, pairs, order=None):
    """SSE and error reduction within each group of scored orders."""
    rows = []
    keys = order if order is not None else sorted(pd.unique(groups))
    for key in keys:
        mask = groups == key
        count = int(mask.sum())
        if count == 0:
            continue
        sse_plain = float(plain_sq[mask].sum())
        for (method, variance), sq in zip(pairs, method_sq):
            sse = float(sq[mask].sum())
            rows.append(
                {
                    "evaluation": kind,
                    "method": method,
                    "variance": variance,
                    group_name: key,
                    "held_out": count,
                    "sse": sse,
                    "sse_plain": sse_plain,
                    "error_reduction_pct": _reduction_pct(sse_plain, sse),
                }
            )
    return rows


@dataclass
class _Scored:
    """Squared errors of one evaluation (leave-one-out or backtest)."""

    kind: str
    pairs: list
    customer: np.ndarray  # customer position of every scored order
    past_orders: np.ndarray
    segment: np.ndarray | None
    plain_sq: np.ndarray
    method_sq: list
    inside: list  # per pair: scored order inside the next-order range


def _summarise(scored, *, resamples, seed):
    """Results table (one row per method x variance) with bootstrap intervals."""
    per_plain, per_methods = _per_customer_sse(scored)
    ci_low, ci_high = _bootstrap_intervals(per_plain, per_methods, resamples=resamples, seed=seed)
    sse_plain = float(scored.plain_sq.sum())
    rows = []
    for i, ((method, variance), sq, inside) in enumerate(zip(scored.pairs, scored.method_sq, scored.inside)):
        sse = float(sq.sum())
        rows.append(
            {
                "method": method,
                "variance": variance,
                "sse": sse,
                "error_reduction_pct": _reduction_pct(sse_plain, sse) if len(sq) else np.nan,
                "ci_low": float(ci_low[i]),
                "ci_high": float(ci_high[i]),
                "coverage": float(np.mean(inside)) if len(inside) else np.nan,
            }
        )
    return pd.DataFrame(rows, columns=_RESULT_COLUMNS)


def _breakdowns(scored):
    past = _past_order_labels(scored.past_orders)
    by_past = _breakdown(
        scored.kind, "past_orders", past, scored.plain_sq, scored.method_sq, scored.pairs,
        order=[label for _, _, label in PAST_ORDER_BINS],
    )
    by_segment = []
    if scored.segment is not None:
        by_segment = _breakdown(
            scored.kind, "segment", scored.segment.astype(str), scored.plain_sq, scored.method_sq, scored.pairs
        )
    return by_past, by_segment


# ---------------------------------------------------------------------------
# Leave-one-out and backtest
# ---------------------------------------------------------------------------


def _leave_one_out(orders, stats, pairs, *, next_level=0.80):
    held = _held_out_orders(orders, stats)
    x = held.value
    plain = held.money.mean_after
    method_sq, inside = [], []
    for method, variance in pairs:
        prediction = _loo_predict(held, method, variance, next_level=next_level)
        method_sq.append((prediction.expected - x) ** 2)
        inside.append(prediction.inside(held.log.value))
    segment = stats["segment"].to_numpy()[held.customer] if "segment" in stats.columns else None
    return _Scored(
        kind="leave-one-out",
        pairs=pairs,
        customer=held.customer,
        past_orders=held.past_orders,
        segment=segment,
        plain_sq=(plain - x) ** 2,
        method_sq=method_sq,
        inside=inside,
    )


def default_cutoff(order_dates):
    """The date that leaves the last 20% of orders on or after it.

    Parameters
    ----------
    order_dates : array-like of datetime64
        One date per order.

    Returns
    -------
    pandas.Timestamp
        Orders dated strictly before it are the past; orders on or after it are
        scored.  With several orders on the cut-off date a little more than 20%
        of orders can fall after it.

    Examples
    --------
    >>> import pandas as pd
    >>> default_cutoff(pd.to_datetime([f"2025-01-{d:02d}" for d in range(1, 11)]))
    Timestamp('2025-01-09 00:00:00')
    """
    dates = np.sort(pd.to_datetime(pd.Series(order_dates)).to_numpy())
    if len(dates) == 0:
        raise OrderDataError("there are no orders to split by date")
    position = min(len(dates) - 1, int(np.floor(0.8 * len(dates))))
    return pd.Timestamp(dates[position])


def _forecast(stats, method, variance, orders, next_level):
    from forecasting.forecasts import forecast_customers

    if variance == GAMMA_MODEL:
        variance = "classic"  # ignored by gamma-gamma, which has its own spread
    return forecast_customers(stats, method=method, variance=variance, orders=orders, next_level=next_level)


def _backtest(orders, pairs, cutoff, *, next_level=0.80):
    """Fit on orders before the cut-off; score each customer's first order after it."""
    notes = []
    if "order_date" not in orders.columns or orders["order_date"].isna().all():
        return None, cutoff, ["no order dates, so no backtest"]
    if cutoff is None:
        cutoff = default_cutoff(orders["order_date"])
    else:
        try:
            cutoff = pd.Timestamp(cutoff)
        except (TypeError, ValueError):
            raise OrderDataError("the cut-off is not a date", value=cutoff, fix="Give --cutoff as YYYY-MM-DD")
    before_mask = (orders["order_date"] < cutoff).to_numpy()
    before = orders.loc[before_mask]
    after = orders.loc[~before_mask]
    if len(before) == 0 or len(after) == 0:
        return None, cutoff, [f"no orders on one side of the cut-off {cutoff.date()}, so no backtest"]
    stats_before = customer_statistics(before)
    first_after = after.sort_values("order_date", kind="stable").groupby("customer", sort=False).first()
    customers = stats_before.index.intersection(first_after.index)
    if len(customers) == 0:
        return None, cutoff, ["no customer ordered both before and after the cut-off, so no backtest"]
    position = stats_before.index.get_indexer(customers)
    x = first_after.loc[customers, "order_value"].to_numpy(np.float64)
    plain = stats_before["mean"].to_numpy()[position]
    method_sq, inside, kept = [], [], []
    for method, variance in pairs:
        try:
            forecast = _forecast(stats_before, method, variance, before, next_level)
        except OrderDataError as problem:
            notes.append(f"backtest of {method} with {variance} variance skipped: {problem}")
            continue
        expected = forecast["expected_next_order"].to_numpy(np.float64)[position]
        low = forecast["next_order_low"].to_numpy(np.float64)[position]
        high = forecast["next_order_high"].to_numpy(np.float64)[position]
        method_sq.append((expected - x) ** 2)
        inside.append((x >= low) & (x <= high))
        kept.append((method, variance))
    segment = stats_before["segment"].to_numpy()[position] if "segment" in stats_before.columns else None
    scored = _Scored(
        kind="backtest",
        pairs=kept,
        customer=position,
        past_orders=stats_before["orders"].to_numpy(np.float64)[position],
        segment=segment,
        plain_sq=(plain - x) ** 2,
        method_sq=method_sq,
        inside=inside,
    )
    return scored, cutoff, notes


# ---------------------------------------------------------------------------
# Automatic choice
# ---------------------------------------------------------------------------


def best_of(results, allowed=None) -> dict:
    """The automatic choice from a table of leave-one-out results (public door to the rule).

    Lowest SSE among ``results`` (rows of method, variance, sse, error_reduction_pct),
    never one that loses to plain averages. Used by front ends that computed the table
    elsewhere, such as a cluster.
    """
    return _choose(results, allowed)


def _choose(results, allowed=None):
    """Lowest leave-one-out SSE among the methods, never one that loses to plain averages.

    ``error_reduction_pct`` in ``results`` is against plain averages, so plain
    averages themselves (plain with classic variance) need no row.
    """
    plain = (results["method"] == "plain") & (results["variance"] == "classic")
    candidates = results[~plain].dropna(subset=["sse"])
    if allowed is not None:
        candidates = candidates[candidates["method"].isin(allowed)]
    candidates = candidates.sort_values("sse", kind="stable")
    if len(candidates) == 0:
        return {
            "method": "plain",
            "variance": "classic",
            "runner_up": None,
            "margin_pct": float("nan"),
            "error_reduction_pct": 0.0,
            "fell_back_to_plain": True,
            "reason": "nothing to compare: no customer has two orders, so plain averages are used",
        }
    best = candidates.iloc[0]
    runner = candidates.iloc[1] if len(candidates) > 1 else None
    best_gain = float(best["error_reduction_pct"])
    if not best_gain > 0:
        return {
            "method": "plain",
            "variance": "classic",
            "runner_up": {"method": str(best["method"]), "variance": str(best["variance"]),
                          "error_reduction_pct": best_gain},
            "margin_pct": -best_gain,
            "error_reduction_pct": 0.0,
            "fell_back_to_plain": True,
            "reason": (
                f"no method beat plain customer averages in leave-one-out (best: {best['method']} with "
                f"{best['variance']} variance, {best_gain:+.1f}%), so plain averages are used"
            ),
        }
    runner_gain = float(runner["error_reduction_pct"]) if runner is not None else 0.0
    runner_up = (
        {"method": str(runner["method"]), "variance": str(runner["variance"]), "error_reduction_pct": runner_gain}
        if runner is not None
        else {"method": "plain", "variance": "classic", "error_reduction_pct": 0.0}
    )
    return {
        "method": str(best["method"]),
        "variance": str(best["variance"]),
        "runner_up": runner_up,
        "margin_pct": best_gain - runner_gain,
        "error_reduction_pct": best_gain,
        "fell_back_to_plain": False,
        "reason": (
            f"{best['method']} with {best['variance']} variance had the smallest leave-one-out error, "
            f"{best_gain:.1f}% below plain averages, {best_gain - runner_gain:.1f} points ahead of "
            f"{runner_up['method']} with {runner_up['variance']} variance"
        ),
    }


def choose_method(orders, stats=None, *, methods=None, variances=None):
    """Pick the method and variance model with the lowest leave-one-out error.

    Parameters
    ----------
    orders : pandas.DataFrame
        Cleaned orders (``customer``, ``order_value``, ...).
    stats : pandas.DataFrame, optional
        ``customer_statistics(orders)`` if already computed.
    methods, variances : list of str or comma-separated str, optional
        Candidates (default: every pair with a fast leave-one-out).

    Returns
    -------
    dict
        ``method``, ``variance``, ``runner_up`` (dict with ``method``,
        ``variance``, ``error_reduction_pct``), ``margin_pct`` (how many
        percentage points of the plain-average error the choice is ahead of
        the runner-up), ``error_reduction_pct``, ``fell_back_to_plain`` and a
        plain-words ``reason``.

    Notes
    -----
    A method that does not beat plain customer averages is never chosen:
    then the choice is ``plain`` with ``classic`` variance and the reason says so.
    """
    if orders is None:
        raise OrderDataError(
            "the automatic choice of method needs the order-level data",
            fix="Pass orders=... or choose a method with --method",
        )
    if stats is None:
        stats = customer_statistics(orders)
    pairs = _combinations(methods, variances, stats=stats, default_methods=AUTO_METHODS)
    scored = _leave_one_out(orders, stats, pairs)
    results = _summarise(scored, resamples=0, seed=0)
    return _choose(results)


# ---------------------------------------------------------------------------
# Public entry point
# ---------------------------------------------------------------------------


@dataclass
class Evaluation:
    """Everything :func:`evaluate_methods` found.

    Attributes
    ----------
    leave_one_out, backtest : pandas.DataFrame
        One row per method x variance: ``method, variance, sse,
        error_reduction_pct, ci_low, ci_high, coverage`` (``backtest`` is empty
        when there are no dates or no customer on both sides of the cut-off).
    by_past_orders, by_segment : pandas.DataFrame
        The same comparison within groups of scored orders (column
        ``evaluation`` says which evaluation).
    margins : pandas.DataFrame
        Leave-one-out: how many points of error reduction the chosen pair gains
        over each other pair (``margin_pct``), with a paired bootstrap 95%
        interval (``margin_low``, ``margin_high``) from the same resampled customers.
    chosen : dict
        The automatic choice (see :func:`choose_method`).
    orders, customers, held_out : int
        Orders and customers in the data; orders held out in leave-one-out.
    """

    leave_one_out: pd.DataFrame
    backtest: pd.DataFrame
    by_past_orders: pd.DataFrame
    by_segment: pd.DataFrame
    chosen: dict
    orders: int
    customers: int
    held_out: int
    backtest_scored: int = 0
    cutoff: pd.Timestamp | None = None
    notes: list = field(default_factory=list)
    margins: pd.DataFrame = field(default_factory=pd.DataFrame)


def evaluate_methods(orders, *, methods=None, variances=None, cutoff=None, bootstrap=500, seed=0,
                     next_level=0.80):
    """Compare every method x variance model with plain customer averages.

    Parameters
    ----------
    orders : pandas.DataFrame
        Cleaned orders: ``customer``, ``order_value`` and (for the backtest)
        ``order_date``; ``segment`` when present.  Not changed.
    methods, variances : list of str or comma-separated str, optional
        What to evaluate (default: every pair with a fast leave-one-out).
    cutoff : date-like, optional
        Backtest cut-off (default :func:`default_cutoff`).
    bootstrap : int
        Resamples of customers for the 95% intervals (0 to skip).
    seed : int
        Seed of the bootstrap.
    next_level : float
        Level of the next-order range whose coverage is reported.

    Returns
    -------
    Evaluation

    Notes
    -----
    Leave-one-out holds out every order of every customer with at least two
    orders, refits everything on the rest (pooled variance, the amount of
    shrinkage, the centre) and predicts that customer's expected order value;
    the plain baseline is the mean of the customer's remaining orders.
    ``error_reduction_pct = 100 (SSE_plain - SSE_method) / SSE_plain``.
    The fast computation is exact (see the module docstring).

    The bootstrap resamples customers, not orders, because one customer's
    orders are not independent of each other; intervals are percentile
    intervals (Efron and Tibshirani 1993, ch. 13).

    References
    ----------
    Efron, B. and Tibshirani, R. (1993). *An Introduction to the Bootstrap*.
    Chapman & Hall.

    Examples
    --------
    >>> import pandas as pd
    >>> orders = pd.DataFrame({
    ...     "customer": ["a", "a", "a", "b", "b", "c", "c", "c", "d", "d"],
    ...     "order_value": [20.0, 30.0, 25.0, 80.0, 60.0, 40.0, 45.0, 35.0, 10.0, 30.0],
    ...     "order_date": pd.date_range("2025-01-01", periods=10, freq="7D")})
    >>> result = evaluate_methods(orders, methods="plain,mta", variances="classic", bootstrap=0)
    >>> result.held_out
    10
    >>> result.leave_one_out[["method", "variance"]].values.tolist()
    [['plain', 'classic'], ['mta', 'classic']]
    """
    if not isinstance(bootstrap, (int, np.integer)) or bootstrap < 0:
        raise OrderDataError("bootstrap must be a whole number of resamples, 0 or more", value=bootstrap,
                             fix="Use e.g. --bootstrap 500")
    if not 0 < next_level < 1:
        raise OrderDataError("next_level must be between 0 and 1", value=next_level)
    stats = customer_statistics(orders)
    pairs = _combinations(methods, variances, stats=stats)
    notes = []
    scored = _leave_one_out(orders, stats, pairs, next_level=next_level)
    if len(scored.plain_sq) == 0:
        notes.append("no customer has two or more orders, so there is nothing to hold out")
    loo = _summarise(scored, resamples=bootstrap, seed=seed)
    by_past, by_segment = _breakdowns(scored)

    backtest_scored, cutoff_used, backtest_notes = _backtest(orders, pairs, cutoff, next_level=next_level)
    notes.extend(backtest_notes)
    if backtest_scored is not None:
        backtest = _summarise(backtest_scored, resamples=bootstrap, seed=seed)
        more_past, more_segment = _breakdowns(backtest_scored)
        by_past += more_past
        by_segment += more_segment
        n_backtest = len(backtest_scored.plain_sq)
    else:
        backtest = pd.DataFrame(columns=_RESULT_COLUMNS)
        n_backtest = 0

    # The same choice as choose_method: by default among AUTO_METHODS.
    chosen = _choose(loo, allowed=AUTO_METHODS if methods is None else None)
    return Evaluation(
        leave_one_out=loo,
        backtest=backtest,
        by_past_orders=pd.DataFrame(by_past),
        by_segment=pd.DataFrame(by_segment),
        chosen=chosen,
        orders=int(len(orders)),
        customers=int(len(stats)),
        held_out=int(len(scored.plain_sq)),
        backtest_scored=n_backtest,
        cutoff=cutoff_used,
        notes=notes,
        margins=_paired_margins(scored, (chosen["method"], chosen["variance"]), resamples=bootstrap, seed=seed),
    )
