"""What every estimator shares: its result, the spread between customers, the error of a forecast.

* :class:`Shrunk`: one estimator's result per customer (estimate, own-history weight g_t,
  centre, the estimate's variance).
* :func:`fit_between` and :func:`between_left_out`: the variance tau2 of true customer means
  by restricted maximum likelihood (REML), the precision-weighted centre and the uncertainty
  of both; every method's ranges use them, and empirical Bayes its weights.
* :func:`error_variance`: the squared error expected of a forecast that puts weight g on the
  customer's average and 1 - g on the centre, with Morris's allowance for estimated tau2 and
  centre when the forecast is the empirical-Bayes posterior mean.

The fits take one value per customer; the leave-one-out twins take the held-out bookkeeping of
:mod:`forecasting.holdout` and give one value per held-out order, through the same formulas.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from forecasting.errors import OrderDataError
from forecasting.holdout import rows_of  # noqa: F401  (the estimators' twins use it)


@dataclass(frozen=True)
class Shrunk:
    """Result of a shrinkage estimator.

    Attributes
    ----------
    estimate : numpy.ndarray
        Estimated true mean of each customer (on the scale the estimator was given).
    weight : numpy.ndarray
        Own-history weight g_t in [0, 1]: 1 means the customer's own average is used as it
        is, 0 means only other customers' information is used.
    centre : float
        The shop-wide value estimates are pulled toward.
    estimate_var : numpy.ndarray
        Variance of each estimate as the estimator sees it (g_t s_t for a shrunk mean with
        the centre treated as known; empirical Bayes adds Morris's allowance).
    notes : tuple of str
        Plain-words remarks (fallbacks taken and why).
    params : dict
        Fitted scalars (for example ``a``, ``factor``, ``tau2``).
    """

    estimate: np.ndarray
    weight: np.ndarray
    centre: float
    estimate_var: np.ndarray
    notes: tuple = ()
    params: dict = field(default_factory=dict)


def as_arrays(means, mean_vars):
    m = np.asarray(means, dtype=np.float64)
    s = np.asarray(mean_vars, dtype=np.float64)
    if m.ndim != 1 or m.shape != s.shape:
        raise ValueError(f"means and mean_vars must be 1-D arrays of the same length (got {m.shape} and {s.shape})")
    if m.size == 0:
        raise OrderDataError("there are no customers to forecast", fix="Check that the file has order rows")
    return m, s


def plain_result(m, s, notes=(), params=None) -> Shrunk:
    return Shrunk(m.copy(), np.ones_like(m), float(np.mean(m)), s.copy(), tuple(notes), dict(params or {}))


def combine(m, g, centre):
    """g m + (1 - g) centre, written so that g = 1 returns m exactly."""
    return centre + g * (m - centre)


ONE_CUSTOMER = "With one customer there is no one to average with; the plain average is used."


# ---------------------------------------------------------------------------
# The spread between customers: REML
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Between:
    """The spread of true customer means around the shop's centre (floats, or arrays with one
    value per held-out order).

    Attributes
    ----------
    tau2 : variance of true means (REML).
    centre : precision-weighted mean sum w m / sum w, w = 1 / (tau2 + s).
    centre_var : 1 / sum w, the centre's variance.
    tau2_var : the inverse of the restricted likelihood's information for tau2.
    notes : tuple of str
    """

    tau2: object
    centre: object
    centre_var: object
    tau2_var: object
    notes: tuple = ()


def _reml_parts(sums):
    """Score, its slope and the information of the restricted likelihood from weighted sums.

    ``sums[p][c]`` = sum_t w_t^p c_t for p = 1, 2, 3 and c in (1, d, d^2), w = 1/(tau2 + s),
    d the customers' averages relative to an origin. With delta = sum w d / sum w:

    U  = 1/2 [sum w^2 (d - delta)^2 - sum w + sum w^2 / sum w]                (the score)
    U' = 1/2 [-2 sum w^3 (d - delta)^2 + 2 (sum w^2 (d - delta))^2 / sum w + sum w^2
              - 2 sum w^3 / sum w + (sum w^2 / sum w)^2]
    I  = 1/2 [sum w^2 - 2 sum w^3 / sum w + (sum w^2 / sum w)^2] = tr(P^2) / 2
    """
    s1, s2, s3 = sums[1]["one"], sums[2]["one"], sums[3]["one"]
    delta = sums[1]["d"] / s1

    def around(p):
        return sums[p]["d2"] - 2.0 * delta * sums[p]["d"] + delta * delta * sums[p]["one"]

    a2, a3 = around(2), around(3)
    b2 = sums[2]["d"] - delta * s2
    ratio = s2 / s1
    score = 0.5 * (a2 - s1 + ratio)
    slope = 0.5 * (-2.0 * a3 + 2.0 * b2 * b2 / s1 + s2 - 2.0 * s3 / s1 + ratio * ratio)
    information = 0.5 * (s2 - 2.0 * s3 / s1 + ratio * ratio)
    return score, slope, information, delta, s1


def solve_reml(sums_at, start, upper, *, at_zero=None, bracket=True, tol=1e-13, max_iter=200):
    """Roots of the REML score for many problems at once (vectorised safeguarded Newton).

    Parameters
    ----------
    sums_at : callable
        ``sums_at(tau2, rows)`` -> weighted sums (see :func:`_reml_parts`) of the problems
        ``rows`` (an array of their positions, or None for all) at their values of tau2.
    start, upper : numpy.ndarray
        A first guess and a value where the score is already negative (enlarged if not).
    at_zero : numpy.ndarray of bool, optional
        Where the score is not positive at tau2 = 0 (computed when not given).
    bracket : bool, default True
        Find a negative score above every root before the first Newton step (a few problems
        whose sums are cheap, as in the fits on all orders). Without it, Newton steps start
        at ``start`` and a bracket is found on the way (many problems whose roots are near
        ``start``, as after holding out one order of a large shop); where a step cannot be
        taken the value is doubled (at least to ``upper``) until the score turns negative.

    Returns
    -------
    numpy.ndarray
        tau2 >= 0: 0 where the score is not positive at 0 (the likelihood falls from the
        start), else the first root above 0.

    Notes
    -----
    Newton steps inside the bracket [lo, hi] that holds the sign change, bisection where a
    step would leave it (Press et al., Numerical Recipes, rtsafe); stops when a step is below
    ``tol`` relative to the root, or a Newton step below sqrt(``tol``) (whose own error is then
    of the order of its square). Problems that have stopped are not evaluated again.
    """
    upper = np.array(upper, dtype=np.float64)
    zero = np.zeros_like(upper)
    if at_zero is None:
        at_zero = _reml_parts(sums_at(zero, None))[0] <= 0
    at_zero = np.asarray(at_zero, dtype=bool)
    lo = zero.copy()
    x = np.array(start, dtype=np.float64) + zero
    if bracket:
        hi = np.maximum(upper, x * 1.5)
        for _ in range(200):
            still = (_reml_parts(sums_at(hi, None))[0] > 0) & ~at_zero
            if not still.any():
                break
            lo = np.where(still, hi, lo)
            hi = np.where(still, hi * 4.0, hi)
        x = np.where((x <= lo) | (x >= hi), 0.5 * (lo + hi), x)
    else:
        hi = np.full_like(upper, np.inf)
        x = np.maximum(x, 0.0)
    active = np.flatnonzero(~at_zero)
    for _ in range(max_iter):
        if active.size == 0:
            break
        now, low, high = x[active], lo[active], hi[active]
        score, slope = _reml_parts(sums_at(now, active))[:2]
        positive = score > 0
        low = np.where(positive, now, low)
        high = np.where(positive, high, now)
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = now - score / slope
        # A Newton step on the bracket's edge is the root to rounding (the step is below an ulp).
        inside = (slope < 0) & (newton >= low) & (newton <= high)
        fallback = np.where(np.isfinite(high), 0.5 * (low + high), np.maximum(2.0 * now, upper[active]))
        step_to = np.where(inside, newton, fallback)
        # Newton converges quadratically: after a Newton step below sqrt(tol) of the root, the
        # error left is about the step squared (the score is a smooth rational function of tau2).
        size = np.abs(step_to - now)
        scale = np.maximum(np.abs(step_to), np.finfo(float).tiny)
        done = (size <= tol * scale) | (inside & (size <= np.sqrt(tol) * scale))
        x[active], lo[active], hi[active] = step_to, low, high
        active = active[~done]
    return np.where(at_zero, 0.0, x)


def _direct_sums(tau2, s, d):
    """The weighted sums over customers, for every tau2 in an array (full fits).

    Customers with the same s share their weights, so the sums run over the distinct values of
    s (the order counts, for s = sigma2 / n) with the customers' columns added up within each.
    """
    return _value_group_sums(_value_groups(s, d), tau2)


def _value_groups(s, d):
    """(distinct s, and per distinct s: the number of customers, sum d, sum d^2)."""
    values, where = np.unique(s, return_inverse=True)
    size = values.size
    return values, np.stack([np.bincount(where, minlength=size).astype(np.float64),
                             np.bincount(where, weights=d, minlength=size),
                             np.bincount(where, weights=d * d, minlength=size)], axis=1)


def _value_group_sums(groups, tau2):
    values, table = groups
    w = 1.0 / (np.asarray(tau2, dtype=np.float64)[:, None] + values[None, :])
    powers = {1: w, 2: w * w}
    powers[3] = powers[2] * w
    out = {}
    for p, wp in powers.items():
        one, d, d2 = (wp @ table).T
        out[p] = {"one": one, "d": d, "d2": d2}
    return out


def _between_from(tau2, sums_at, origin):
    # tau2 = 0 with no spread within customers (every order alike) has no finite weights; the
    # callers replace the centre there.
    with np.errstate(divide="ignore", invalid="ignore"):
        score, slope, information, delta, s1 = _reml_parts(sums_at(tau2, None))
        tau2_var = 1.0 / information
    return origin + delta, 1.0 / s1, tau2_var


def fit_between(means, mean_vars) -> Between:
    """Variance tau2 of true customer means by restricted maximum likelihood (REML).

    Parameters
    ----------
    means, mean_vars : array_like
        m_t and s_t.

    Returns
    -------
    Between

    Notes
    -----
    Model: m_t ~ N(mu, tau2 + s_t). The restricted likelihood (the likelihood of the
    contrasts free of mu; Patterson and Thompson 1971) is maximised by solving its score
    equation (:func:`_reml_parts`); tau2 = 0 when the likelihood falls from 0. REML is
    consistent for tau2 with unequal s_t, unlike the moment estimate var(m) - mean(s), which
    collapses to 0 on shops whose one-order customers have noisy averages. When some s_t are
    0 and others not, the moment estimate is used (the restricted likelihood is unbounded
    there); when all are 0, tau2 = var(m). The centre is sum w m / sum w, w = 1/(tau2 + s),
    with variance 1 / sum w; tau2's variance is the inverse of the information
    tr(P^2) / 2 (Harville 1977).

    References
    ----------
    Patterson, H. D. and Thompson, R. (1971). Recovery of inter-block information when block
    sizes are unequal. Biometrika 58(3), 545-554.
    Harville, D. A. (1977). Maximum likelihood approaches to variance component estimation
    and to related problems. JASA 72(358), 320-338.
    """
    m, s = as_arrays(means, mean_vars)
    if m.size == 1:
        return Between(0.0, float(m[0]), float(s[0]), float("inf"),
                       ("With one customer the spread between customers cannot be measured.",))
    origin = float(np.mean(m))
    d = m - origin
    var_m = float(np.var(m, ddof=1))
    notes = ()
    if np.all(s == 0):
        tau2 = var_m
    elif np.any(s == 0):
        tau2 = max(0.0, var_m - float(np.mean(s)))
        notes = ("Some customers' averages have no spread at all; the spread between customers was measured "
                 "by moments instead of restricted likelihood.",)
    else:
        groups = _value_groups(s, d)

        def sums_at(t, rows):
            return _value_group_sums(groups, t)

        upper = np.array([2.0 * var_m + float(np.max(s)) + np.finfo(float).tiny])
        start = np.array([max(0.0, var_m - float(np.mean(s)))])
        tau2 = float(solve_reml(sums_at, start, upper)[0])
    if np.any(s == 0) and tau2 == 0:
        exact = s == 0
        return Between(0.0, float(np.mean(m[exact])), 0.0, float("inf"), notes)
    groups = _value_groups(s, d)
    centre, centre_var, tau2_var = _between_from(np.array([tau2]), lambda t, rows: _value_group_sums(groups, t),
                                                 origin)
    return Between(tau2, float(centre[0]), float(centre_var[0]), float(tau2_var[0]), notes)


def _grouped_sums(side, tau2, s_factor, subset=None, *, series=True):
    """The weighted sums of :func:`_reml_parts` after each removal, all powers in one pass.

    w = 1 / (tau2 + f / k) = f^-1 (rho + 1 / k)^-1 with rho = tau2 / f is summed over the
    order-count groups by the power series of :meth:`forecasting.holdout.Side.power_sums_after`
    in rho; rows with f = 0 (no spread within customers), and every row without ``series``, go
    over the groups.
    """
    tau2 = np.asarray(tau2, dtype=np.float64)
    s_factor = np.asarray(s_factor, dtype=np.float64) + np.zeros_like(tau2)
    rows = tau2.size if subset is None else len(subset)
    positive = (s_factor > 0) & np.isfinite(tau2)
    if not series or not positive.any():
        return _grouped_sums_directly(side, tau2, s_factor, subset)
    every = np.arange(rows) if subset is None else np.asarray(subset)
    whole = bool(positive.all())  # the usual case: no row needs the groups
    f = s_factor if whole else s_factor[positive]
    rho = tau2 / f if whole else tau2[positive] / f
    parts = side.power_sums_after(lambda k: 1.0, lambda k: 1.0 / k, rho, (1, 2, 3), ("one", "d", "d2"),
                                  subset=subset if whole else every[positive])
    if whole:
        scales = {p: f ** -float(p) for p in (1, 2, 3)}
        return {p: {name: parts[slot, c] * scales[p] for c, name in enumerate(("one", "d", "d2"))}
                for slot, p in enumerate((1, 2, 3))}
    out = {p: {name: np.empty(rows) for name in ("one", "d", "d2")} for p in (1, 2, 3)}
    for slot, p in enumerate((1, 2, 3)):
        scale = f ** -float(p)
        for c, name in enumerate(("one", "d", "d2")):
            out[p][name][positive] = parts[slot, c] * scale
    rest = ~positive
    if rest.any():
        direct = _grouped_sums_directly(side, tau2[rest], s_factor[rest], every[rest])
        for p in (1, 2, 3):
            for name in ("one", "d", "d2"):
                out[p][name][rest] = direct[p][name]
    return out


def _grouped_sums_directly(side, tau2, s_factor, subset=None):
    def weights(k, rows):
        w = 1.0 / (rows_of(tau2, rows, k) + rows_of(s_factor, rows, k) / k)
        w2 = w * w
        return w, w2, w2 * w

    table = side.sums_after_many(weights, ["one", "d", "d2"], subset)
    return {p: dict(zip(("one", "d", "d2"), table[p - 1])) for p in (1, 2, 3)}


def between_left_out(side, s_factor, *, start=None) -> Between:
    """:func:`fit_between` after each held-out order, with s_t = s_factor / n_t.

    Parameters
    ----------
    side : forecasting.holdout.Side
    s_factor : numpy.ndarray
        One value per held-out order (sigma2, or cv2 M2, after the removal).
    start : float, optional
        A first guess of tau2 (the fit on all orders: each removal moves it little).

    Notes
    -----
    The weights w = 1 / (tau2 + s_factor / n) depend on a customer only through n, so every
    sum is taken over order-count groups, and the score equation of every held-out order is
    solved at once by :func:`solve_reml`: from the fit on all orders, Newton steps on the
    orders not yet settled, the sums over the groups as a power series in tau2 / s_factor
    (:meth:`forecasting.holdout.Side.power_sums_after`; exact to rounding). Whether the score
    is positive at 0 needs no iteration: there w = n / s_factor, so every sum is s_factor^-p
    times a sum over the groups that is the same for every held-out order.
    """
    H = side.H
    s_factor = np.asarray(s_factor, dtype=np.float64)
    if side.T == 1:
        return Between(np.zeros(H), side.mean_after, s_factor / side.n_after, np.full(H, np.inf))
    var_m = side.var_means_after()
    mean_s = s_factor * side.sum_inv_n_after() / side.T
    exact = s_factor == 0
    tau2 = np.where(exact, var_m, 0.0)
    free = np.flatnonzero(~exact)
    if free.size:
        factor = s_factor[free]
        upper = 2.0 * var_m[free] + factor / side.fewest_orders_after()[free] + np.finfo(float).tiny
        guess = np.maximum(0.0, var_m[free] - mean_s[free]) if start is None else np.full(free.size, float(start))
        at_zero = _reml_parts(_grouped_sums(side, np.zeros(free.size), factor, free))[0] <= 0

        def sums_at(t, rows):
            rows = np.arange(free.size) if rows is None else rows
            return _grouped_sums(side, t, factor[rows], free[rows])

        tau2[free] = solve_reml(sums_at, guess, upper, at_zero=at_zero, bracket=start is None)
    centre, centre_var, tau2_var = _between_from(tau2, lambda t, rows: _grouped_sums(side, t, s_factor),
                                                 side.origin)
    # s = 0 for everyone (no spread within customers): the centre is the unweighted mean.
    centre = np.where(exact, side.origin + side.unweighted_centre_after(), centre)
    return Between(tau2, centre, centre_var, tau2_var)


# ---------------------------------------------------------------------------
# The error of a forecast
# ---------------------------------------------------------------------------


def error_variance(weight, mean_var, between: Between, offset=0.0, *, posterior=False, customers=None):
    """Expected squared error of a forecast g m + (1 - g) c as a guess of the true mean.

    Parameters
    ----------
    weight : array_like
        Own-history weight g.
    mean_var : array_like
        s, the variance of the customer's average.
    between : Between
    offset : array_like
        m - c, the customer's average less the centre (used when ``posterior``).
    posterior : bool
        The forecast is the empirical-Bayes posterior mean with Morris's factor
        (g = 1 - ((T - 3) / (T - 1)) s / (tau2 + s)).
    customers : int
        T, the number of customers (needed when ``posterior``).

    Returns
    -------
    numpy.ndarray

    Notes
    -----
    Over customers with the same s: the forecast's error is g (m - mu) - (1 - g)(mu - c), so
    its variance is g^2 s + (1 - g)^2 (tau2 + var c): the spread of the customer's own orders
    where the forecast rests on them, the spread between customers and the centre's own
    uncertainty where it leans on the shop. For the posterior mean Morris (1983) gives, with
    B = 1 - g,

        v = s (1 - B) + B^2 var c + 2 B^2 (m - c)^2 / (T - 3),

    the posterior variance, the centre's uncertainty, and the uncertainty of the estimated
    shrinkage (his equal-variance formula applied customer by customer, as in his section on
    unequal variances; var c = 1 / sum w for the precision-weighted centre). A customer whose
    forecast rests wholly on the shop thus keeps a range as wide as the spread between
    customers, and no range has zero width while customers differ. On 2000 simulated shops of
    12 customers it holds 90% of true means where g s alone held 84% (tests/test_shrinkage.py).

    References
    ----------
    Morris, C. N. (1983). Parametric empirical Bayes inference: theory and applications.
    JASA 78(381), 47-55.
    """
    g = np.asarray(weight, dtype=np.float64)
    s = np.asarray(mean_var, dtype=np.float64)
    rest = 1.0 - g
    tau2 = np.asarray(between.tau2, dtype=np.float64)
    centre_var = np.asarray(between.centre_var, dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        if posterior:
            T = float(customers)
            spread_of_weight = 2.0 / (T - 3.0) if T > 3 else 0.0
            value = (s * g + np.where(rest == 0, 0.0, rest * rest * centre_var)
                     + spread_of_weight * rest * rest * np.asarray(offset, dtype=np.float64) ** 2)
        else:
            value = g * g * s + np.where(rest == 0, 0.0, rest * rest * (tau2 + centre_var))
    return np.maximum(value, 0.0)
