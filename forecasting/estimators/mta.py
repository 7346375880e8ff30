"""Multi-task averaging: each customer's average pulled toward the others by a pairwise similarity."""

from __future__ import annotations

import numpy as np

from forecasting.estimators.base import ONE_CUSTOMER, Shrunk, as_arrays, combine, plain_result


def _from_similarity(m, s, a, notes=(), params=None) -> Shrunk:
    """Constant-similarity MTA for a given a (0 <= a <= inf), closed form."""
    params = dict(params or {})
    params["a"] = float(a)
    if a == 0:
        return plain_result(m, s, notes, params)
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
    return Shrunk(combine(m, g, centre), g, centre, g * s, tuple(notes), params)


def mta_constant(means, mean_vars, *, similarity=None, multiplier=1.0) -> Shrunk:
    """Multi-task averaging with one similarity shared by every pair of customers.

    Parameters
    ----------
    means, mean_vars : array_like
        m_t and s_t.
    similarity : float, optional
        The pairwise similarity a; by default a = 2 / mean over ordered pairs r != s of
        (m_r - m_s)^2 = 1 / var(m, ddof=1), times ``multiplier``.

    Returns
    -------
    Shrunk
        ``params``: ``a``.

    Notes
    -----
    Solves (I + (1/T) S L) y = m, S = diag(s_t), L the graph Laplacian of A = a 1 1^T.
    Because (1/T) S L = a S (I - 1 1^T / T), Sherman-Morrison gives g_t = 1 / (1 + a s_t),
    c = sum g_t m_t / sum g_t and y_t = g_t m_t + (1 - g_t) c. a = 0 gives the plain averages;
    a = inf (every average equal) gives the centre.

    References
    ----------
    Feldman, S., Gupta, M. R. and Frigyik, B. A. (2014). Revisiting Stein's paradox:
    multi-task averaging. Journal of Machine Learning Research 15, 3621-3662.
    """
    m, s = as_arrays(means, mean_vars)
    if similarity is not None:
        if not similarity >= 0:
            raise ValueError(f"similarity must be >= 0 (got {similarity})")
        return _from_similarity(m, s, float(similarity))
    if m.size == 1:
        return plain_result(m, s, (ONE_CUSTOMER,))
    var = float(np.var(m, ddof=1))
    a = 1.0 / var if var > 0 else np.inf
    return _from_similarity(m, s, multiplier * a if multiplier > 0 else 0.0)


def mta_minimax(means, mean_vars) -> Shrunk:
    """Minimax multi-task averaging: constant MTA with a = 2 / (max m - min m)^2.

    Notes
    -----
    The similarity that is minimax over all true means within the observed range (Feldman,
    Gupta and Frigyik 2014); less shrinkage than :func:`mta_constant` when a few customers
    are far out.
    """
    m, s = as_arrays(means, mean_vars)
    if m.size == 1:
        return plain_result(m, s, (ONE_CUSTOMER,))
    spread = float(np.max(m) - np.min(m))
    a = 2.0 / (spread * spread) if spread > 0 else np.inf
    return _from_similarity(m, s, a)


# ---------------------------------------------------------------------------
# Leave-one-out twins: s_t = s_factor / n_t, so g_t = n_t / (n_t + b) with b = a s_factor
# ---------------------------------------------------------------------------


def _pull(similarity, s_factor):
    """b = a s_factor so that g = 1 / (1 + a s_factor / n) = n / (n + b); a = inf -> b = inf."""
    with np.errstate(invalid="ignore"):
        b = similarity * s_factor
    # a = inf and s_factor = 0: every average is equal; the estimate is that value.
    return np.where(np.isnan(b), 0.0, b)


def weighted_left_out(side, b):
    """Shrink toward the centre sum g d / sum g with g = n / (n + b), after each removal.

    b = 0 gives the plain averages, b = inf the order-weighted mean (the limit of g
    proportional to n), as in :func:`_from_similarity`.
    """
    finite = np.isfinite(b)
    fb = np.where(finite, b, 0.0) + np.zeros(side.H)
    # g = k / (k + b): the sums over the order-count groups as a power series in b around its
    # typical value (Side.power_sums_after; exact to rounding).
    (num, den), = side.power_sums_after(lambda k: k, lambda k: k, fb, (1,), ["d", "one"])
    qn, qd, _ = side.count_weighted_after()
    with np.errstate(invalid="ignore", divide="ignore"):
        centre = np.where(finite, num / den, qd / qn)
        g = np.where(finite, side.n_after / (side.n_after + fb), 0.0)
    return centre + g * (side.d_after - centre), g


def mta_left_out(side, s_factor, *, amount=1.0, **context):
    """Leave-one-out twin of :func:`mta_constant`: a = amount / var(m) after the removal."""
    if amount == 0 or side.T == 1:
        return side.d_after, np.ones(side.H)
    with np.errstate(divide="ignore"):
        a = amount / side.var_means_after()
    return weighted_left_out(side, _pull(a, s_factor))


def extremes(values):
    """Largest and smallest value, the owner of each, and the extreme among all the others
    (equal to the extreme itself when it is tied)."""
    if len(values) < 2:
        v = float(values[0]) if len(values) else np.nan
        return v, 0, -np.inf, v, 0, np.inf
    top_owner = int(np.argmax(values))
    bottom_owner = int(np.argmin(values))
    return (float(values[top_owner]), top_owner, float(np.delete(values, top_owner).max()),
            float(values[bottom_owner]), bottom_owner, float(np.delete(values, bottom_owner).min()))


def mta_minimax_left_out(side, s_factor, **context):
    """Leave-one-out twin of :func:`mta_minimax`: the range of the averages after the removal
    from the two largest and two smallest averages and their owners."""
    if side.T == 1:
        return side.d_after, np.ones(side.H)
    top, top_owner, top_second, bottom, bottom_owner, bottom_second = extremes(side.d)
    t = side.t
    high = np.maximum(np.where(t == top_owner, top_second, top), side.d_after)
    low = np.minimum(np.where(t == bottom_owner, bottom_second, bottom), side.d_after)
    spread = high - low
    with np.errstate(divide="ignore"):
        a = 2.0 / (spread * spread)
    return weighted_left_out(side, _pull(a, s_factor))
