"""James-Stein: every customer's average pulled toward the mean of the averages by one shared share."""

from __future__ import annotations

import numpy as np

from forecasting.estimators.base import Shrunk, as_arrays, combine, plain_result


def bock_constant(trace_over_largest):
    """The shrinkage constant tr(Sigma) / lambda_max - 3 for unequal variances (0 when not positive).

    Bock (1975) shows (1 - c / X'Sigma^-1 X) X is minimax for 0 < c <= 2 (tr(Sigma) /
    lambda_max - 2); the middle of that range, tr(Sigma) / lambda_max - 2, plays the part of the
    equal-variance p - 2, and one more is taken off because the centre is estimated (as T - 3
    in Efron and Morris 1975). With equal variances it is T - 3.
    """
    return np.maximum(np.asarray(trace_over_largest, dtype=np.float64) - 3.0, 0.0)


def _factor(spread, constant, amount_scale):
    """1 - constant / Q, positive part, with the shrink amount multiplied by ``amount_scale``."""
    with np.errstate(divide="ignore", invalid="ignore"):
        factor = np.maximum(0.0, 1.0 - constant / spread)
    amount = np.clip(amount_scale * (1.0 - factor), 0.0, 1.0)
    return 1.0 - amount, factor


def james_stein(means, mean_vars, *, amount_scale=1.0) -> Shrunk:
    """Positive-part James-Stein estimator with Bock's constant for unequal variances.

    Parameters
    ----------
    means, mean_vars : array_like
        m_t and s_t.
    amount_scale : float, default 1.0
        Multiplier of the shrink amount 1 - factor (clipped to [0, 1]); used by the
        cross-validated variant.

    Returns
    -------
    Shrunk
        ``params``: ``factor``, ``Q``, ``constant``, ``closed_form_factor``.

    Notes
    -----
    xi = mean of the m_t (unweighted), Q = sum_t (m_t - xi)^2 / s_t,
    factor = max(0, 1 - c / Q) with c = :func:`bock_constant` (sum_t s_t / max_t s_t),
    estimate_t = xi + factor (m_t - xi), g_t = factor, variance factor s_t. With equal
    variances c = T - 3 (Efron and Morris 1975); when a few customers' averages are much
    noisier than the rest (one-order customers beside regulars), c is far smaller and the
    estimator shrinks less, as minimaxity requires. With c = 0 (three customers or fewer, or
    very unequal variances), Q = 0 or every s_t = 0 the averages are returned.

    References
    ----------
    James, W. and Stein, C. (1961). Estimation with quadratic loss. Proc. Fourth Berkeley
    Symposium 1, 361-379.
    Bock, M. E. (1975). Minimax estimators of the mean of a multivariate normal distribution.
    Annals of Statistics 3(1), 209-218.
    Efron, B. and Morris, C. (1975). Data analysis using Stein's estimator and its
    generalizations. JASA 70(350), 311-319.

    Examples
    --------
    >>> r = james_stein([10.0, 20.0, 30.0, 40.0, 90.0], [400.0] * 5)
    >>> round(r.params["factor"], 3)
    0.794
    """
    m, s = as_arrays(means, mean_vars)
    T = m.size
    if T <= 3:
        return plain_result(m, s, (f"James-Stein needs at least 4 customers (found {T}); plain averages are used.",))
    if not np.any(s > 0):
        return plain_result(m, s, ("Every customer's average has zero spread, so there is nothing to shrink.",))
    xi = float(np.mean(m))
    d = m - xi
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(s > 0, d * d / s, np.where(d == 0, 0.0, np.inf))
    Q = float(np.sum(terms))
    if Q == 0:
        return plain_result(m, s, ("All customers have the same average, so James-Stein leaves them as they are.",))
    constant = float(bock_constant(np.sum(s) / np.max(s)))
    notes = ()
    if constant == 0:
        notes = ("Customers' averages are too unequally reliable for James-Stein to shrink safely "
                 "(Bock's condition); plain averages are used.",)
    used, factor = _factor(Q, constant, amount_scale)
    used, factor = float(used), float(factor)
    g = np.full_like(m, used)
    return Shrunk(combine(m, g, xi), g, xi, g * s, notes,
                  {"factor": used, "Q": Q, "constant": constant, "closed_form_factor": factor})


def james_stein_left_out(side, s_factor, *, amount=1.0, **context):
    """Leave-one-out twin of :func:`james_stein` with s_t = s_factor / n_t.

    Q s_factor = sum n (m - xi)^2 = sum n d^2 - 2 delta sum n d + delta^2 sum n with
    d = m - origin and delta = xi - origin, and tr(Sigma) / lambda_max = min(n) sum 1/n:
    O(1) per held-out order.
    """
    delta = side.unweighted_centre_after()
    qn, qd, qd2 = side.count_weighted_after()
    spread = np.maximum(qd2 - 2.0 * delta * qd + delta * delta * qn, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        Q = spread / s_factor
    constant = bock_constant(side.fewest_orders_after() * side.sum_inv_n_after())
    used, _ = _factor(Q, constant, amount)
    usable = (side.T > 3) & (s_factor > 0) & (spread > 0) & np.isfinite(Q)
    used = np.where(usable, used, 1.0)
    return delta + used * (side.d_after - delta), used
