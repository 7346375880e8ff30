"""Empirical Bayes: how much customers truly differ, measured, and each average weighted by its reliability."""

from __future__ import annotations

import numpy as np

from forecasting.estimators.base import Between, Shrunk, as_arrays, combine, fit_between, plain_result


def _tau2_moments(m, s) -> float:
    return max(0.0, float(np.var(m, ddof=1) - np.mean(s)))


def morris_factor(customers):
    """(T - 3) / (T - 1): Morris's (1983) allowance in the shrinkage for an estimated tau2 (0 for T <= 3)."""
    T = float(customers)
    return max(0.0, (T - 3.0) / (T - 1.0)) if T > 1 else 0.0


def empirical_bayes(means, mean_vars, *, tau2=None, centre=None, tau2_method="reml", between=None,
                    morris=True) -> Shrunk:
    """Normal-normal empirical Bayes.

    Parameters
    ----------
    means, mean_vars : array_like
        m_t and s_t.
    tau2 : float, optional
        Variance of true customer means; by default estimated.
    centre : float, optional
        Shop-wide mean; by default the precision-weighted mean sum w_t m_t / sum w_t,
        w_t = 1 / (tau2 + s_t).
    tau2_method : {"reml", "moments"}
        ``"reml"`` (default): restricted maximum likelihood
        (:func:`forecasting.estimators.base.fit_between`), consistent when the s_t differ.
        ``"moments"``: tau2 = max(0, var(m, ddof=1) - mean(s_t)), unbiased before truncation
        only when the s_t are equal; it collapses to 0 on shops whose one-order customers have
        noisy averages, and every customer then gets the shop average.
    between : Between, optional
        A REML fit already made on the same m_t and s_t (the forecasts fit it once for the
        ranges of every method).
    morris : bool, default True
        When tau2 is estimated, shrink by B_t = ((T - 3) / (T - 1)) s_t / (s_t + tau2) instead
        of s_t / (s_t + tau2) (Morris 1983): the plain posterior mean, with tau2 treated as
        known, shrinks too much when it is estimated from few customers. Ignored when ``tau2``
        is given; with thousands of customers the two differ by a fraction of a percent.

    Returns
    -------
    Shrunk
        ``params``: ``tau2``, ``centre_se`` (sqrt(1 / sum w_t)), ``tau2_se``, ``morris_factor``.

    Notes
    -----
    m_t ~ N(theta_t, s_t), theta_t ~ N(centre, tau2). The posterior mean is
    g_t m_t + (1 - g_t) centre with g_t = 1 - B_t, and the posterior variance with tau2 and the
    centre known is g_t s_t (``estimate_var``). The forecasts' ranges add Morris's allowance
    for both being estimated (:func:`forecasting.estimators.base.error_variance`). With three
    customers or fewer Morris's factor is 0 and the averages are kept.

    References
    ----------
    Efron, B. and Morris, C. (1973). Stein's estimation rule and its competitors -- an
    empirical Bayes approach. JASA 68(341), 117-130.
    Morris, C. N. (1983). Parametric empirical Bayes inference: theory and applications.
    JASA 78(381), 47-55.
    Rubin, D. B. (1981). Estimation in parallel randomized experiments. Journal of
    Educational Statistics 6(4), 377-401.
    """
    m, s = as_arrays(means, mean_vars)
    if tau2_method not in ("moments", "reml"):
        raise ValueError(f"tau2_method must be 'moments' or 'reml' (got {tau2_method!r})")
    T = m.size
    notes = []
    tau2_se = float("nan")
    factor = morris_factor(T) if (tau2 is None and morris) else 1.0
    if tau2 is None:
        if T == 1:
            return plain_result(m, s, ("With one customer the spread of true means cannot be estimated; "
                                       "the plain average is used.",))
        if tau2_method == "moments":
            tau2 = _tau2_moments(m, s)
        else:
            between = between if between is not None else fit_between(m, s)
            tau2 = float(between.tau2)
            tau2_se = float(np.sqrt(between.tau2_var))
            notes.extend(between.notes)
        if tau2 == 0:
            notes.append("Customers' averages differ no more than their noise explains, "
                         "so every customer gets the shop-wide average.")
    tau2 = float(tau2)
    if np.isinf(tau2):
        return plain_result(m, s, notes, {"tau2": tau2, "centre_se": float("nan"), "tau2_se": tau2_se})
    total = tau2 + s
    exact = total == 0
    with np.errstate(divide="ignore", invalid="ignore"):
        g = np.where(s == 0, 1.0, 1.0 - factor * s / total)
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
        centre_se = float("nan") if between is None else float(np.sqrt(between.centre_var))
    return Shrunk(combine(m, g, centre), g, centre, g * s, tuple(notes),
                  {"tau2": tau2, "centre_se": centre_se, "tau2_se": tau2_se, "morris_factor": factor})


def empirical_bayes_left_out(side, s_factor, *, between: Between, **context):
    """Leave-one-out twin of :func:`empirical_bayes` with REML: tau2 and the centre from
    :func:`forecasting.estimators.base.between_left_out`, then the same posterior mean (with
    Morris's factor; T does not change when one order is held out)."""
    s = s_factor / side.n_after
    tau2 = np.asarray(between.tau2, dtype=np.float64)
    factor = morris_factor(side.T)
    with np.errstate(divide="ignore", invalid="ignore"):
        g = np.where(s == 0, 1.0, 1.0 - factor * s / (tau2 + s))
    centre = np.asarray(between.centre, dtype=np.float64) - side.origin
    g = np.where(np.isinf(tau2), 1.0, g)
    return centre + g * (side.d_after - centre), g
