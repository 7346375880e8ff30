"""The Gamma-Gamma spend model: each customer has a spending level; order values scatter around it.

Fitted by maximum likelihood on all customers' averages; the forecast is the posterior mean of
the customer's mean order value, and both ranges come from the model's own posterior
(:func:`gamma_gamma_ranges`).
"""

from __future__ import annotations

import numpy as np

from forecasting.estimators.base import Shrunk, as_arrays, combine, plain_result
from forecasting.newton import log_scale, minimise


def _gamma_gamma_objective(counts_n, counts, n, m, sum_n_log_nm, sum_log_m):
    """The negative mean log-likelihood of the customers' averages in log-parameters, with its
    gradient and Hessian on request, as :func:`forecasting.newton.minimise` wants it."""
    from scipy import special  # slow to import: only the gamma-gamma model needs it

    T = float(m.size)

    def objective(theta):
        p, q, gam = np.exp(theta)
        u = gam + n * m
        log_u = np.log(u)
        pn = p * counts_n
        ll = (np.sum(counts * (special.gammaln(pn + q) - special.gammaln(pn)))
              - T * special.gammaln(q) + T * q * np.log(gam)
              + p * sum_n_log_nm - sum_log_m
              - p * np.dot(n, log_u) - q * np.sum(log_u))
        if not np.isfinite(ll):
            return np.inf, None

        def derivatives():
            inv_u = 1.0 / u
            shape = p * n + q  # each customer's p n + q
            psi_sum, psi_n = special.digamma(pn + q), special.digamma(pn)
            tri_sum, tri_n = special.polygamma(1, pn + q), special.polygamma(1, pn)
            gradient = np.array([
                np.sum(counts * counts_n * (psi_sum - psi_n)) + sum_n_log_nm - np.dot(n, log_u),
                np.sum(counts * psi_sum) - T * special.digamma(q) + T * np.log(gam) - np.sum(log_u),
                T * q / gam - np.dot(shape, inv_u)])
            h_pq = np.sum(counts * counts_n * tri_sum)
            h_pg = -np.dot(n, inv_u)
            h_qg = T / gam - np.sum(inv_u)
            hessian = np.array([
                [np.sum(counts * counts_n ** 2 * (tri_sum - tri_n)), h_pq, h_pg],
                [h_pq, np.sum(counts * tri_sum) - T * special.polygamma(1, q), h_qg],
                [h_pg, h_qg, -T * q / gam ** 2 + np.dot(shape, inv_u ** 2)]])
            g_theta, h_theta = log_scale((p, q, gam), gradient, hessian)
            return -g_theta / T, -h_theta / T

        return -ll / T, derivatives

    return objective


#: Bound of the log-parameters of the fit (p, q and gamma between e^-15 and e^15).
_LOG_BOUND = 15.0


def fit_gamma_gamma(means, orders):
    """Maximum-likelihood p, q, gamma of the gamma-gamma spend model.

    Parameters
    ----------
    means, orders : array_like
        m_t and n_t of every customer (all customers, one-order ones included).

    Returns
    -------
    p, q, gamma : float
    converged : bool

    Notes
    -----
    Order values of a customer ~ Gamma(shape p, rate nu_t), nu_t ~ Gamma(shape
    q, rate gamma). The average of n_t orders is Gamma(p n_t, n_t nu_t), so the
    marginal density of m_t is
    Gamma(p n + q) / (Gamma(p n) Gamma(q)) gamma^q m^(p n - 1) n^(p n) / (gamma + n m)^(p n + q).
    Maximised over log p, log q, log gamma by Newton steps with the analytic
    gradient and Hessian (:func:`forecasting.newton.minimise`); values are divided
    by their mean first (gamma scales with the money unit, p and q do not), and
    the gammaln terms are summed once per distinct order count. The fit is
    judged converged where the steps settled, the slope is below 1e-5 and no
    parameter sits at its bound.
    """
    m = np.asarray(means, dtype=np.float64)
    n = np.asarray(orders, dtype=np.float64)
    unit = float(np.mean(m))
    x = m / unit
    tally = np.bincount(n.astype(np.int64))
    counts_n = np.nonzero(tally)[0].astype(np.float64)
    counts = tally[tally > 0].astype(np.float64)
    sum_n_log_nm = float(np.dot(n, np.log(n * x)))
    sum_log_m = float(np.sum(np.log(x)))
    # Start at p = 2, q = 3 and the gamma that makes the population mean
    # p gamma / (q - 1) equal the mean of the (rescaled) averages, 1.
    start = np.log([2.0, 3.0, 1.0])
    objective = _gamma_gamma_objective(counts_n, counts, n, x, sum_n_log_nm, sum_log_m)
    bound = np.full(3, _LOG_BOUND)
    found = minimise(objective, start, -bound, bound)
    p, q, gam = np.exp(found.point)
    at_bound = np.any(np.abs(found.point) >= _LOG_BOUND - 1e-6)
    # Where the likelihood keeps rising toward a bound (no spread within customers: p grows without
    # end) the steps run out on a nearly flat slope: that is no optimum, however small the slope.
    settled = bool(found.settled and np.all(np.isfinite(found.point))
                   and np.all(np.isfinite(found.gradient)) and np.max(np.abs(found.gradient)) < 1e-5)
    return float(p), float(q), float(gam * unit), settled and not at_bound


def gamma_gamma_spend(means, orders, *, mean_vars=None) -> Shrunk:
    """Gamma-gamma spend model: a customer's expected order value given their history.

    Parameters
    ----------
    means, orders : array_like
        m_t and n_t.
    mean_vars : array_like, optional
        s_t, used for v_t only where the model's own posterior variance is
        infinite (p n_t + q <= 2).

    Returns
    -------
    Shrunk
        ``params``: ``p``, ``q``, ``gamma``, ``population_mean``.

    Notes
    -----
    Fitted by :func:`fit_gamma_gamma` on every customer, one-order customers
    included (they carry information about the spread between customers).
    The posterior of nu_t is Gamma(p n + q, gamma + n m), so
    E[p / nu_t | history] = (gamma + n m) p / (p n + q - 1)
    = g_t m_t + (1 - g_t) gamma p / (q - 1) with g_t = p n / (p n + q - 1);
    the population mean gamma p / (q - 1) needs q > 1. If the fit gives q <= 1
    or does not converge, the plain averages are returned with a note.
    v_t is the posterior variance of p / nu_t,
    p^2 (gamma + n m)^2 / ((p n + q - 1)^2 (p n + q - 2)).

    References
    ----------
    Colombo, R. and Jiang, W. (1999). A stochastic RFM model. Journal of
    Interactive Marketing 13(3), 2-12.
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). RFM and CLV: using
    iso-value curves for customer base analysis. Journal of Marketing
    Research 42(4), 415-430.
    Fader, P. S. and Hardie, B. G. S. (2013). The Gamma-Gamma model of
    monetary value. http://www.brucehardie.com/notes/025/
    """
    m = np.asarray(means, dtype=np.float64)
    n = np.asarray(orders, dtype=np.float64)
    s = np.asarray(mean_vars, dtype=np.float64) if mean_vars is not None else np.zeros_like(m)
    m, s = as_arrays(m, s)
    if m.size < 2:
        return plain_result(m, s, ("The spend model needs at least two customers; the plain average is used.",))
    if np.all(m == m[0]):
        g = np.zeros_like(m)
        return Shrunk(m.copy(), g, float(m[0]), g * s,
                      ("All customers have the same average, so the spend model has nothing to fit.",))
    p, q, gam, converged = fit_gamma_gamma(m, n)
    params = {"p": p, "q": q, "gamma": gam}
    if not converged:
        return plain_result(m, s, ("The spend model's fit did not settle on finite values; plain averages are used.",),
                      params)
    if q <= 1:
        return plain_result(m, s, (f"The spend model found q = {q:.3g} <= 1, which means no finite shop-wide average "
                             "order value; plain averages are used.",), params)
    population_mean = gam * p / (q - 1.0)
    params["population_mean"] = population_mean
    shape = p * n + q
    g = p * n / (shape - 1.0)
    estimate = combine(m, g, population_mean)
    notes = []
    with np.errstate(divide="ignore", invalid="ignore"):
        posterior_var = estimate * estimate / (shape - 2.0)
    finite = shape > 2.0
    if not finite.all():
        notes.append("For some customers the spend model's uncertainty is unbounded; "
                     "their intervals use the chosen variance model instead.")
    v = np.where(finite, posterior_var, g * s)
    return Shrunk(estimate, g, population_mean, v, tuple(notes), params)


def gamma_gamma_ranges(params, orders, means, *, level=0.90, next_level=0.80):
    """The model's own ranges: where the customer's mean order value and their next order lie.

    Parameters
    ----------
    params : dict
        ``p``, ``q``, ``gamma`` of :func:`fit_gamma_gamma`.
    orders, means : array_like
        n_t and m_t.
    level, next_level : float
        Coverage of the two ranges.

    Returns
    -------
    expected_low, expected_high, next_low, next_high : numpy.ndarray

    Notes
    -----
    The posterior of the customer's rate is nu ~ Gamma(a = p n + q, rate b = gamma + n m) and
    their mean order value is p / nu, so its quantiles are p b / G_a^-1(1 - u) with G_a^-1 the
    inverse regularised incomplete gamma function. A next order x given nu is Gamma(p, rate
    nu), so x / (x + b) ~ Beta(p, a) and its quantiles are b B / (1 - B),
    B = I^-1_{p,a}(u), the inverse regularised incomplete beta function (a compound
    gamma, or beta-prime, predictive distribution).
    """
    from scipy import special  # slow to import: only this model needs it

    p, q, gam = float(params["p"]), float(params["q"]), float(params["gamma"])
    n = np.asarray(orders, dtype=np.float64)
    m = np.asarray(means, dtype=np.float64)
    rate = gam + n * m
    # The quantiles depend on the customer through n alone: one evaluation per distinct count.
    counts, where = np.unique(n, return_inverse=True)
    where = where.reshape(n.shape)
    shapes = p * counts + q
    tail = (1.0 - level) / 2.0
    expected_low = p * rate / special.gammaincinv(shapes, 1.0 - tail)[where]
    expected_high = p * rate / special.gammaincinv(shapes, tail)[where]
    tail = (1.0 - next_level) / 2.0
    low = special.betaincinv(p, shapes, tail)[where]
    high = special.betaincinv(p, shapes, 1.0 - tail)[where]
    return expected_low, expected_high, rate * low / (1.0 - low), rate * high / (1.0 - high)


def gamma_gamma_left_out(side, s_factor, *, fitted, **context):
    """Leave-one-out twin of :func:`gamma_gamma_spend` keeping p, q and gamma from the fit on all
    orders (the one approximation: refitting them needs an optimisation per held-out order):
    E = (gamma + n' m') p / (p n' + q - 1) for the customer's remaining n' orders averaging m'."""
    if "population_mean" not in fitted:  # the full fit fell back to plain averages
        return side.d_after, np.ones(side.H)
    p, q = fitted["p"], fitted["q"]
    n_after = side.n_after
    g = p * n_after / (p * n_after + q - 1.0)
    centre = fitted["population_mean"] - side.origin
    return centre + g * (side.d_after - centre), g


def gamma_gamma_for_shop(means, mean_vars, *, orders) -> Shrunk:
    """:func:`gamma_gamma_spend` called as every estimator is, ``(means, mean_vars, **keywords)``."""
    return gamma_gamma_spend(means, orders, mean_vars=mean_vars)
