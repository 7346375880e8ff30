"""Shrinkage estimators: customers' averages in, better estimates of their true means out.

Input: arrays with one entry per customer t = 1..T -- the average order value
m_t, the variance s_t of that average (from :mod:`forecasting.variance`), and
where a method needs it the number of orders n_t, a segment label, or the
order-level values.

Output: a :class:`Shrunk` holding, per customer, the estimate, the weight g_t
it puts on the customer's own history (the rest goes to what other customers
did), the estimate's variance v_t, plus the shop-wide centre and any fitted
scalars.

Every method is O(T) in time and memory (gamma-gamma adds an iterative
maximum-likelihood fit whose cost per step is O(T)); no T x T matrix is ever
formed. The dense equivalents live in the tests, which the fast paths must
match.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from forecasting.errors import OrderDataError
from forecasting.variance import classic_pooled_variance

METHODS = (
    "plain",
    "pooled",
    "james-stein",
    "mta",
    "mta-minimax",
    "mta-segments",
    "empirical-bayes",
    "gamma-gamma",
    "james-stein-cv",
    "mta-cv",
)

#: Number of folds and seed of the cross-validated variants.
CV_FOLDS = 5
CV_SEED = 20251201
#: Multipliers of the closed-form MTA similarity tried by "mta-cv" (0 = plain averages).
MTA_CV_GRID = np.concatenate([[0.0], 2.0 ** np.linspace(-5.0, 5.0, 31)])
#: Multipliers of the James-Stein shrink amount tried by "james-stein-cv".
JS_CV_GRID = np.linspace(0.0, 3.0, 31)


@dataclass(frozen=True)
class Shrunk:
    """Result of a shrinkage estimator.

    Attributes
    ----------
    estimate : numpy.ndarray
        Estimated true mean of each customer.
    weight : numpy.ndarray
        Own-history weight g_t in [0, 1]: 1 means the customer's own average
        is used as it is, 0 means only other customers' information is used.
    centre : float
        The shop-wide value estimates are pulled toward.
    estimate_var : numpy.ndarray
        Variance v_t of each estimate.
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


def _arrays(means, mean_vars):
    m = np.asarray(means, dtype=np.float64)
    s = np.asarray(mean_vars, dtype=np.float64)
    if m.ndim != 1 or m.shape != s.shape:
        raise ValueError(f"means and mean_vars must be 1-D arrays of the same length (got {m.shape} and {s.shape})")
    if m.size == 0:
        raise OrderDataError("there are no customers to forecast", fix="Check that the file has order rows")
    return m, s


def _plain(m, s, notes=(), params=None) -> Shrunk:
    return Shrunk(m.copy(), np.ones_like(m), float(np.mean(m)), s.copy(), tuple(notes), dict(params or {}))


def _combine(m, g, centre):
    """g m + (1 - g) centre, written so that g = 1 returns m exactly."""
    return centre + g * (m - centre)


def plain_averages(means, mean_vars) -> Shrunk:
    """Each customer's own average: estimate m_t, g_t = 1, v_t = s_t."""
    m, s = _arrays(means, mean_vars)
    return _plain(m, s)


def pooled_average(means, mean_vars, *, orders) -> Shrunk:
    """One shop-wide average for everyone.

    centre = sum_t n_t m_t / sum_t n_t (the average over all orders); g_t = 0
    and v_t = g_t s_t = 0 (the centre is treated as known).
    """
    m, s = _arrays(means, mean_vars)
    n = np.asarray(orders, dtype=np.float64)
    centre = float(np.sum(n * m) / np.sum(n))
    zeros = np.zeros_like(m)
    return Shrunk(np.full_like(m, centre), zeros, centre, zeros.copy())


def james_stein(means, mean_vars, *, amount_scale=1.0) -> Shrunk:
    """Positive-part James-Stein estimator for unequal variances (Bock's form).

    Parameters
    ----------
    means, mean_vars : array_like
        m_t and s_t.
    amount_scale : float, default 1.0
        Multiplier of the shrink amount 1 - factor (clipped to [0, 1]); used
        by the cross-validated variant.

    Returns
    -------
    Shrunk
        ``params``: ``factor`` and ``Q``.

    Notes
    -----
    xi = mean of the m_t (unweighted), Q = sum_t (m_t - xi)^2 / s_t,
    factor = max(0, 1 - (T - 3) / Q), estimate_t = xi + factor (m_t - xi),
    g_t = factor, v_t = factor s_t. T - 3 (not T - 2) because the centre xi is
    estimated. With T <= 3, Q = 0 or every s_t = 0 the averages are returned.

    References
    ----------
    James, W. and Stein, C. (1961). Estimation with quadratic loss. Proc.
    Fourth Berkeley Symposium 1, 361-379.
    Bock, M. E. (1975). Minimax estimators of the mean of a multivariate
    normal distribution. Annals of Statistics 3(1), 209-218.
    Efron, B. and Morris, C. (1975). Data analysis using Stein's estimator and
    its generalizations. JASA 70(350), 311-319.

    Examples
    --------
    >>> r = james_stein([10.0, 20.0, 30.0, 40.0, 90.0], [400.0] * 5)
    >>> round(r.params["factor"], 3)
    0.794
    """
    m, s = _arrays(means, mean_vars)
    T = m.size
    if T <= 3:
        return _plain(m, s, (f"James-Stein needs at least 4 customers (found {T}); plain averages are used.",))
    if not np.any(s > 0):
        return _plain(m, s, ("Every customer's average has zero spread, so there is nothing to shrink.",))
    xi = float(np.mean(m))
    d = m - xi
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(s > 0, d * d / s, np.where(d == 0, 0.0, np.inf))
    Q = float(np.sum(terms))
    if Q == 0:
        return _plain(m, s, ("All customers have the same average, so James-Stein leaves them as they are.",))
    factor = max(0.0, 1.0 - (T - 3) / Q)
    shrink_amount = min(1.0, max(0.0, amount_scale * (1.0 - factor)))
    factor_used = 1.0 - shrink_amount
    g = np.full_like(m, factor_used)
    return Shrunk(_combine(m, g, xi), g, xi, g * s, (),
                  {"factor": factor_used, "Q": Q, "closed_form_factor": factor})


def _mta_from_similarity(m, s, a, notes=(), params=None) -> Shrunk:
    """Constant-similarity MTA for a given a (0 <= a <= inf), closed form."""
    params = dict(params or {})
    params["a"] = float(a)
    if a == 0:
        return _plain(m, s, notes, params)
    with np.errstate(over="ignore", invalid="ignore"):
        a_s = np.where(s > 0, a * s, 0.0)
    g = 1.0 / (1.0 + a_s)
    total = float(np.sum(g))
    if np.isinf(a) or total == 0:
        exact = s == 0
        if exact.any():
            g = exact.astype(np.float64)
            centre = float(np.mean(m[exact]))
        else:
            # limit a -> inf: g_t ~ 1/(a s_t), so the centre is the precision-weighted mean
            g = np.zeros_like(m)
            w = 1.0 / s
            centre = float(np.sum(w * m) / np.sum(w))
    else:
        centre = float(np.sum(g * m) / total)
    return Shrunk(_combine(m, g, centre), g, centre, g * s, tuple(notes), params)


def mta_constant(means, mean_vars, *, similarity=None) -> Shrunk:
    """Multi-task averaging with one similarity shared by every pair of customers.

    Parameters
    ----------
    means, mean_vars : array_like
        m_t and s_t.
    similarity : float, optional
        The pairwise similarity a; by default a = 2 / mean over ordered pairs
        r != s of (m_r - m_s)^2 = 1 / var(m, ddof=1).

    Returns
    -------
    Shrunk
        ``params``: ``a``.

    Notes
    -----
    Solves (I + (1/T) S L) y = m, S = diag(s_t), L the graph Laplacian of
    A = a 1 1^T. Because (1/T) S L = a S (I - 1 1^T / T), Sherman-Morrison
    gives g_t = 1 / (1 + a s_t), c = sum g_t m_t / sum g_t and
    y_t = g_t m_t + (1 - g_t) c. a = 0 gives the plain averages; a = inf
    (every average equal) gives the centre. v_t = g_t s_t.

    References
    ----------
    Feldman, S., Gupta, M. R. and Frigyik, B. A. (2014). Revisiting Stein's
    paradox: multi-task averaging. Journal of Machine Learning Research 15,
    3621-3662.
    """
    m, s = _arrays(means, mean_vars)
    T = m.size
    if similarity is not None:
        if not similarity >= 0:
            raise ValueError(f"similarity must be >= 0 (got {similarity})")
        return _mta_from_similarity(m, s, float(similarity))
    if T == 1:
        return _plain(m, s, ("With one customer there is no one to average with; the plain average is used.",))
    var = float(np.var(m, ddof=1))
    a = 1.0 / var if var > 0 else np.inf
    return _mta_from_similarity(m, s, a)


def mta_minimax(means, mean_vars) -> Shrunk:
    """Minimax multi-task averaging: constant MTA with a = 2 / (max m - min m)^2.

    Notes
    -----
    The similarity that is minimax over all true means within the observed
    range (Feldman, Gupta and Frigyik 2014); less shrinkage than
    :func:`mta_constant` when a few customers are far out.
    """
    m, s = _arrays(means, mean_vars)
    if m.size == 1:
        return _plain(m, s, ("With one customer there is no one to average with; the plain average is used.",))
    spread = float(np.max(m) - np.min(m))
    a = 2.0 / (spread * spread) if spread > 0 else np.inf
    return _mta_from_similarity(m, s, a)


def segment_similarities(means, codes, n_segments):
    """Closed-form within- and between-segment similarities, O(T).

    Returns ``(a_within, a_between, within_pairs, between_pairs)`` with
    a = 2 / (mean over the ordered pairs of (m_r - m_s)^2); NaN when there are
    no such pairs, inf when all those pairs agree exactly.

    Notes
    -----
    Pair sums without pair loops: within segment g the ordered pairs sum to
    2 n_g SS_g; between segments g != h they sum to
    n_h SS_g + n_g SS_h + n_g n_h (mean_g - mean_h)^2, which summed over
    g != h is 2 sum_g SS_g (T - n_g) + 2 T sum_g n_g (mean_g - mean)^2.
    Every term is a sum of squares, so nothing cancels.
    """
    m = np.asarray(means, dtype=np.float64)
    T = m.size
    size = np.bincount(codes, minlength=n_segments).astype(np.float64)
    seg_mean = np.bincount(codes, weights=m, minlength=n_segments) / np.maximum(size, 1.0)
    dev = m - seg_mean[codes]
    seg_ss = np.bincount(codes, weights=dev * dev, minlength=n_segments)
    grand = float(np.mean(m))
    within_sum = float(np.sum(2.0 * size * seg_ss))
    within_pairs = float(np.sum(size * (size - 1.0)))
    between_sum = float(2.0 * np.sum(seg_ss * (T - size)) + 2.0 * T * np.sum(size * (seg_mean - grand) ** 2))
    between_pairs = float(T * (T - 1.0) - within_pairs)

    def _similarity(total, pairs):
        if pairs == 0:
            return float("nan")
        return 2.0 * pairs / total if total > 0 else float("inf")

    return _similarity(within_sum, within_pairs), _similarity(between_sum, between_pairs), within_pairs, between_pairs


def _segment_solve(m, s, codes, n_segments, a_within, a_between):
    """Solve (I + (1/T) S L) y = m for block similarities by Woodbury; O(T G + G^3).

    Returns the estimates y and the diagonal of W = (I + (1/T) S L)^-1.
    """
    T = m.size
    G = n_segments
    size = np.bincount(codes, minlength=G).astype(np.float64)
    B = np.full((G, G), a_between)
    np.fill_diagonal(B, a_within)
    # D = diag(A 1) with A = U B U^T: row sums a_w n_g + a_b (T - n_g)
    degree = (a_within * size + a_between * (T - size))[codes]
    delta = 1.0 + s * degree / T
    inv_delta = 1.0 / delta
    # K = I_G - U^T Delta^-1 P B with U^T Delta^-1 P = diag(h), h_g = sum_{t in g} s_t / (T Delta_t).
    h = np.bincount(codes, weights=s * inv_delta / T, minlength=G)
    K = -h[:, None] * B
    # Diagonal 1 - h_g a_w written as a mean of positive terms, so it stays accurate when a_w is huge.
    between_part = 1.0 + s * a_between * (T - size[codes]) / T
    K[np.diag_indices(G)] = np.bincount(codes, weights=between_part * inv_delta, minlength=G) / np.maximum(size, 1.0)
    rhs = np.bincount(codes, weights=m * inv_delta, minlength=G)  # U^T Delta^-1 m
    w = np.linalg.solve(K, rhs)  # the segments' sums of estimates
    Bw = B @ w
    y = inv_delta * (m + s * Bw[codes] / T)
    # diag(W)_t = 1/Delta_t + (s_t / T) (B K^-1)_{g(t) g(t)} / Delta_t^2
    BKinv = np.linalg.solve(K.T, B.T).T
    diag = inv_delta + (s / T) * np.diag(BKinv)[codes] * inv_delta * inv_delta
    return y, np.clip(diag, 0.0, 1.0)


def mta_segments(means, mean_vars, *, segments, a_within=None, a_between=None) -> Shrunk:
    """Multi-task averaging with block similarity: customers in the same segment are more alike.

    Parameters
    ----------
    means, mean_vars : array_like
        m_t and s_t.
    segments : array_like
        Segment label of each customer.
    a_within, a_between : float, optional
        Similarities within and between segments; by default the closed
        forms of :func:`segment_similarities`, with a_between clipped to at
        most a_within.

    Returns
    -------
    Shrunk
        ``params``: ``a_within``, ``a_between``, ``segments``.

    Notes
    -----
    A = U B U^T with U the T x G segment indicator, B_gg = a_w, B_gh = a_b.
    With D = diag(A 1), Delta = I + (1/T) S D and P = (1/T) S U,
    I + (1/T) S L = Delta - P B U^T and Woodbury gives
    y = Delta^-1 m + Delta^-1 P B w, (I_G - U^T Delta^-1 P B) w = U^T Delta^-1 m,
    where w turns out to be each segment's sum of estimates. The own-history
    weight is the diagonal of W = (I + (1/T) S L)^-1,
    W_tt = 1/Delta_t + (s_t/T) (B K^-1)_gg / Delta_t^2, O(T + G^3). (For
    constant similarity, :func:`mta_constant` reports 1/(1 + a s_t), which is
    1/Delta_t; the diagonal of W adds the customer's small share in the centre.)
    The centre reported is sum_t (y_t - g_t m_t) / sum_t (1 - g_t), the
    average point customers are pulled toward. v_t = g_t s_t.
    An infinite similarity (all averages in the segment equal) is replaced by
    one with a s_t = 1e12 for the noisiest customer: the same estimates to
    about 12 digits.

    References
    ----------
    Feldman, S., Gupta, M. R. and Frigyik, B. A. (2014). Revisiting Stein's
    paradox: multi-task averaging. JMLR 15, 3621-3662.
    """
    m, s = _arrays(means, mean_vars)
    if segments is None:
        raise OrderDataError(
            "the 'mta-segments' method needs a segment for every customer",
            fix="Name the segment column with --segment, or choose another --method",
        )
    labels = np.asarray(segments)
    if labels.shape != m.shape:
        raise ValueError(f"segments must have one label per customer (got {labels.shape} for {m.shape[0]} customers)")
    if not np.issubdtype(labels.dtype, np.integer):
        labels = labels.astype(str)
    names, codes = np.unique(labels, return_inverse=True)
    G = names.size
    T = m.size
    notes = []
    if T == 1:
        return _plain(m, s, ("With one customer there is no one to average with; the plain average is used.",))
    auto_w, auto_b, within_pairs, between_pairs = segment_similarities(m, codes, G)
    a_w = auto_w if a_within is None else float(a_within)
    a_b = auto_b if a_between is None else float(a_between)
    if np.isnan(a_b):  # one segment: no between pairs, the value does not matter
        a_b = 0.0
        notes.append("All customers are in one segment, so this is ordinary multi-task averaging.")
    if np.isnan(a_w):  # every segment has one customer
        a_w = a_b
        notes.append("Every segment has a single customer; customers are compared across segments only.")
    if a_b > a_w:
        a_b = a_w
        notes.append("Customers in different segments looked more alike than customers in the same segment; "
                     "the between-segment similarity was lowered to the within-segment one.")
    params = {"a_within": float(a_w), "a_between": float(a_b), "segments": float(G)}
    if np.all(m == m[0]):
        g = np.zeros_like(m)
        return Shrunk(m.copy(), g, float(m[0]), g * s, tuple(notes), params)
    s_max = float(np.max(s))
    if s_max == 0:
        return _plain(m, s, tuple(notes) + ("Every customer's average has zero spread, so there is nothing to shrink.",),
                      params)
    cap = 1e12 / s_max
    y, g = _segment_solve(m, s, codes, G, min(a_w, cap), min(a_b, cap))
    free = float(np.sum(1.0 - g))
    centre = float(np.sum(y - g * m) / free) if free > 0 else float(np.mean(m))
    return Shrunk(y, g, centre, g * s, tuple(notes), params)


def empirical_bayes(means, mean_vars, *, tau2=None, centre=None, tau2_method="moments") -> Shrunk:
    """Normal-normal empirical Bayes.

    Parameters
    ----------
    means, mean_vars : array_like
        m_t and s_t.
    tau2 : float, optional
        Variance of true customer means; by default estimated.
    centre : float, optional
        Shop-wide mean; by default the precision-weighted mean
        sum w_t m_t / sum w_t, w_t = 1 / (tau2 + s_t).
    tau2_method : {"moments", "reml"}
        ``"moments"``: tau2 = max(0, var(m, ddof=1) - mean(s_t)), a closed form
        so that leave-one-out stays exact. ``"reml"``: maximises the
        restricted likelihood of the m_t given the s_t.

    Returns
    -------
    Shrunk
        ``params``: ``tau2``, ``centre_se`` (sqrt(1 / sum w_t)).

    Notes
    -----
    m_t ~ N(theta_t, s_t), theta_t ~ N(centre, tau2). The posterior mean is
    g_t m_t + (1 - g_t) centre with g_t = tau2 / (tau2 + s_t) and the posterior
    variance (centre treated as known) is g_t s_t. The moment estimator is
    unbiased for tau2 before truncation at 0 when the s_t are equal; with
    unequal s_t it is simple rather than efficient (REML is offered for that).

    References
    ----------
    Efron, B. and Morris, C. (1973). Stein's estimation rule and its
    competitors -- an empirical Bayes approach. JASA 68(341), 117-130.
    Rubin, D. B. (1981). Estimation in parallel randomized experiments.
    Journal of Educational Statistics 6(4), 377-401.
    """
    m, s = _arrays(means, mean_vars)
    if tau2_method not in ("moments", "reml"):
        raise ValueError(f"tau2_method must be 'moments' or 'reml' (got {tau2_method!r})")
    T = m.size
    notes = []
    if tau2 is None:
        if T == 1:
            return _plain(m, s, ("With one customer the spread of true means cannot be estimated; "
                                 "the plain average is used.",))
        tau2 = _tau2_moments(m, s) if tau2_method == "moments" else _tau2_reml(m, s)
        if tau2 == 0:
            notes.append("Customers' averages differ no more than their noise explains, "
                         "so every customer gets the shop-wide average.")
    tau2 = float(tau2)
    if np.isinf(tau2):
        return _plain(m, s, notes, {"tau2": tau2, "centre_se": float("nan")})
    total = tau2 + s
    exact = total == 0
    with np.errstate(divide="ignore", invalid="ignore"):
        g = np.where(s == 0, 1.0, tau2 / total)
        w = 1.0 / total
    if centre is None:
        if exact.any():
            centre = float(np.mean(m[exact]))
            centre_se = 0.0
        else:
            centre = float(np.sum(w * m) / np.sum(w))
            centre_se = float(np.sqrt(1.0 / np.sum(w)))
    else:
        centre = float(centre)
        centre_se = float("nan")
    return Shrunk(_combine(m, g, centre), g, centre, g * s, tuple(notes), {"tau2": tau2, "centre_se": centre_se})


def _tau2_moments(m, s) -> float:
    return max(0.0, float(np.var(m, ddof=1) - np.mean(s)))


def _tau2_reml(m, s) -> float:
    """Restricted-likelihood tau2 for m_t ~ N(mu, tau2 + s_t)."""

    def negative(tau2):
        w = 1.0 / (tau2 + s)
        mu = np.sum(w * m) / np.sum(w)
        return 0.5 * (np.sum(np.log(tau2 + s)) + np.log(np.sum(w)) + np.sum(w * (m - mu) ** 2))

    upper = max(float(np.var(m, ddof=1)) * 4.0, float(np.max(s)), np.finfo(float).tiny)
    if np.min(s) == 0:
        return _tau2_moments(m, s)
    from scipy import optimize  # slow to import: only these fits need it

    found = optimize.minimize_scalar(negative, bounds=(0.0, upper), method="bounded",
                                     options={"xatol": upper * 1e-10})
    best = float(found.x)
    return 0.0 if negative(0.0) <= negative(best) else best


def _gamma_gamma_negloglik(theta, counts_n, counts, n, m, sum_n_log_nm, sum_log_m):
    """Negative log-likelihood of the customers' averages and its gradient in log-parameters."""
    from scipy import special  # slow to import: only the gamma-gamma fit needs it
    p, q, gam = np.exp(theta)
    T = float(m.size)
    u = gam + n * m
    log_u = np.log(u)
    inv_u = 1.0 / u
    pn = p * counts_n
    ll = (np.sum(counts * (special.gammaln(pn + q) - special.gammaln(pn)))
          - T * special.gammaln(q) + T * q * np.log(gam)
          + p * sum_n_log_nm - sum_log_m
          - p * np.dot(n, log_u) - q * np.sum(log_u))
    d_p = (np.sum(counts * counts_n * (special.digamma(pn + q) - special.digamma(pn)))
           + sum_n_log_nm - np.dot(n, log_u))
    d_q = np.sum(counts * special.digamma(pn + q)) - T * special.digamma(q) + T * np.log(gam) - np.sum(log_u)
    d_g = T * q / gam - p * np.dot(n, inv_u) - q * np.sum(inv_u)
    grad = np.array([d_p * p, d_q * q, d_g * gam])
    return -ll / T, -grad / T


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
    Maximised over log p, log q, log gamma with L-BFGS-B and the analytic
    gradient; values are divided by their mean first (gamma scales with the
    money unit, p and q do not), and the gammaln terms are summed once per
    distinct order count.
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
    args = (counts_n, counts, n, x, sum_n_log_nm, sum_log_m)
    from scipy import optimize

    found = optimize.minimize(_gamma_gamma_negloglik, start, args=args, jac=True, method="L-BFGS-B",
                              bounds=[(-15.0, 15.0)] * 3, options={"maxiter": 500, "ftol": 1e-14, "gtol": 1e-9})
    p, q, gam = np.exp(found.x)
    at_bound = np.any(np.abs(found.x) >= 15.0 - 1e-6)
    # Judge convergence by the gradient itself: L-BFGS-B may stop on a line search that
    # cannot improve the last digits, which is not a failure.
    _, gradient = _gamma_gamma_negloglik(found.x, *args)
    settled = bool(np.all(np.isfinite(found.x)) and np.max(np.abs(gradient)) < 1e-5)
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
    m, s = _arrays(m, s)
    if m.size < 2:
        return _plain(m, s, ("The spend model needs at least two customers; the plain average is used.",))
    if np.all(m == m[0]):
        g = np.zeros_like(m)
        return Shrunk(m.copy(), g, float(m[0]), g * s,
                      ("All customers have the same average, so the spend model has nothing to fit.",))
    p, q, gam, converged = fit_gamma_gamma(m, n)
    params = {"p": p, "q": q, "gamma": gam}
    if not converged:
        return _plain(m, s, ("The spend model's fit did not settle on finite values; plain averages are used.",),
                      params)
    if q <= 1:
        return _plain(m, s, (f"The spend model found q = {q:.3g} <= 1, which means no finite shop-wide average "
                             "order value; plain averages are used.",), params)
    population_mean = gam * p / (q - 1.0)
    params["population_mean"] = population_mean
    shape = p * n + q
    g = p * n / (shape - 1.0)
    estimate = _combine(m, g, population_mean)
    notes = []
    with np.errstate(divide="ignore", invalid="ignore"):
        posterior_var = estimate * estimate / (shape - 2.0)
    finite = shape > 2.0
    if not finite.all():
        notes.append("For some customers the spend model's uncertainty is unbounded; "
                     "their intervals use the chosen variance model instead.")
    v = np.where(finite, posterior_var, g * s)
    return Shrunk(estimate, g, population_mean, v, tuple(notes), params)


def _cross_validate(codes, values, T, grid, run, *, folds=CV_FOLDS, seed=CV_SEED):
    """Held-out squared error of ``run(m, s, lam)`` for every multiplier in ``grid``.

    Orders are split at random into ``folds`` groups; each group in turn is
    held out, averages and the classic pooled variance are computed from the
    other orders, and the estimates of customers who kept at least one
    training order are scored against their held-out orders.
    """
    codes = np.asarray(codes, dtype=np.int64)
    x = np.asarray(values, dtype=np.float64)
    N = x.size
    errors = np.zeros(len(grid))
    fold_of = np.random.default_rng(seed).permutation(N) % folds
    for fold in range(folds):
        train = fold_of != fold
        n_tr = np.bincount(codes[train], minlength=T).astype(np.float64)
        present = n_tr > 0
        sums = np.bincount(codes[train], weights=x[train], minlength=T)
        m_tr = np.divide(sums, n_tr, out=np.zeros(T), where=present)
        dev = x[train] - m_tr[codes[train]]
        ss_tr = np.bincount(codes[train], weights=dev * dev, minlength=T)
        sigma2, _ = classic_pooled_variance(n_tr[present], ss_tr[present], m_tr[present])
        s_tr = sigma2 / n_tr[present]
        held = ~train
        n_ho = np.bincount(codes[held], minlength=T).astype(np.float64)
        sum_ho = np.bincount(codes[held], weights=x[held], minlength=T)
        scored = present & (n_ho > 0)
        mean_ho = np.divide(sum_ho, n_ho, out=np.zeros(T), where=n_ho > 0)
        keep = scored[present]
        for i, lam in enumerate(grid):
            est = run(m_tr[present], s_tr, lam)[keep]
            # sum over held-out orders of (x - est)^2, up to a term that does not depend on est
            errors[i] += float(np.sum(n_ho[scored] * (mean_ho[scored] - est) ** 2))
    return errors


def _cv_choice(codes, values, T, grid, run, name):
    if codes is None or values is None:
        raise OrderDataError(
            f"the '{name}' method needs the order-level table to cross-validate",
            fix="Pass the cleaned orders, or choose a method without -cv",
        )
    if np.asarray(values).size < 2 * CV_FOLDS:
        return 1.0, (f"Too few orders to cross-validate ({np.asarray(values).size}); "
                     "the closed-form amount of shrinkage is used.",)
    errors = _cross_validate(codes, values, T, grid, run)
    return float(grid[int(np.argmin(errors))]), ()


def mta_cv(means, mean_vars, *, codes=None, values=None, multiplier=None) -> Shrunk:
    """Constant MTA with the similarity a multiplied by a cross-validated lambda.

    Parameters
    ----------
    means, mean_vars : array_like
        m_t and s_t.
    codes, values : array_like
        Customer position (0..T-1) and value of every order, on the same scale
        as ``means``.

    Notes
    -----
    lambda is chosen from ``MTA_CV_GRID`` (0, and 2^-5 .. 2^5) by 5-fold
    cross-validation over orders (seeded), minimising squared error on
    held-out orders; within each fold a and s_t are recomputed from the
    training orders with the classic pooled variance. The final fit uses the
    given s_t and lambda times the closed-form a. ``params``: ``a``,
    ``lambda``. Passing ``multiplier`` skips the cross-validation and uses
    that lambda (for refits with new s_t).
    """
    m, s = _arrays(means, mean_vars)
    if m.size == 1:
        return _plain(m, s, ("With one customer there is no one to average with; the plain average is used.",))

    def run(m_tr, s_tr, lam):
        base = mta_constant(m_tr, s_tr) if m_tr.size > 1 else None
        if base is None:
            return m_tr
        return _mta_from_similarity(m_tr, s_tr, lam * base.params["a"] if lam > 0 else 0.0).estimate

    if multiplier is None:
        lam, notes = _cv_choice(codes, values, m.size, MTA_CV_GRID, run, "mta-cv")
    else:
        lam, notes = float(multiplier), ()
    base = mta_constant(m, s)
    a = base.params["a"]
    result = _mta_from_similarity(m, s, lam * a if lam > 0 else 0.0, notes, {"lambda": lam})
    return result


def james_stein_cv(means, mean_vars, *, codes=None, values=None, multiplier=None) -> Shrunk:
    """James-Stein with the shrink amount (1 - factor) multiplied by a cross-validated lambda.

    Notes
    -----
    lambda from ``JS_CV_GRID`` (0 to 3), chosen as in :func:`mta_cv`; the
    shrink amount lambda (1 - factor) is clipped to [0, 1]. ``params``:
    ``factor``, ``lambda``. ``multiplier`` as in :func:`mta_cv`.
    """
    m, s = _arrays(means, mean_vars)

    def run(m_tr, s_tr, lam):
        return james_stein(m_tr, s_tr, amount_scale=lam).estimate

    if multiplier is None:
        lam, notes = _cv_choice(codes, values, m.size, JS_CV_GRID, run, "james-stein-cv")
    else:
        lam, notes = float(multiplier), ()
    result = james_stein(m, s, amount_scale=lam)
    params = dict(result.params)
    params["lambda"] = lam
    return Shrunk(result.estimate, result.weight, result.centre, result.estimate_var, notes + result.notes, params)


def check_method(method) -> str:
    """Return ``method`` if it is a known estimator, else raise OrderDataError."""
    if method not in METHODS:
        raise OrderDataError(
            "unknown forecasting method for --method",
            value=method,
            fix=f"Choose one of: {', '.join(METHODS + ('auto',))}",
        )
    return method


def shrink(means, mean_vars, *, method, orders=None, segments=None, codes=None, values=None,
           multiplier=None) -> Shrunk:
    """Run the estimator named ``method`` (one of ``METHODS``).

    Parameters
    ----------
    means, mean_vars : array_like
        m_t and s_t.
    method : str
    orders : array_like of int, optional
        n_t (needed by "pooled" and "gamma-gamma").
    segments : array_like, optional
        Segment label per customer ("mta-segments").
    codes, values : array_like, optional
        Order-level customer positions and values ("-cv" methods).
    multiplier : float, optional
        A cross-validated lambda already chosen ("-cv" methods).

    Returns
    -------
    Shrunk
    """
    check_method(method)
    if method in ("pooled", "gamma-gamma") and orders is None:
        raise ValueError(f"the '{method}' method needs the number of orders per customer")
    if method == "plain":
        return plain_averages(means, mean_vars)
    if method == "pooled":
        return pooled_average(means, mean_vars, orders=orders)
    if method == "james-stein":
        return james_stein(means, mean_vars)
    if method == "mta":
        return mta_constant(means, mean_vars)
    if method == "mta-minimax":
        return mta_minimax(means, mean_vars)
    if method == "mta-segments":
        return mta_segments(means, mean_vars, segments=segments)
    if method == "empirical-bayes":
        return empirical_bayes(means, mean_vars)
    if method == "gamma-gamma":
        return gamma_gamma_spend(means, orders, mean_vars=mean_vars)
    if method == "james-stein-cv":
        return james_stein_cv(means, mean_vars, codes=codes, values=values, multiplier=multiplier)
    return mta_cv(means, mean_vars, codes=codes, values=values, multiplier=multiplier)
