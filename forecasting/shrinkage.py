"""Shrinkage estimators: customers' averages in, better estimates of their true means out.

Input: arrays with one entry per customer t = 1..T -- the average order value m_t (or average
log order value), the variance s_t of that average (from :mod:`forecasting.variance`), and
where a method needs it the number of orders n_t, a segment label, or the order-level values.

Output: a :class:`Shrunk` holding, per customer, the estimate, the weight g_t it puts on the
customer's own history (the rest goes to what other customers did), the estimate's variance,
plus the shop-wide centre and any fitted scalars.

The estimators themselves, each beside its leave-one-out twin, live in
:mod:`forecasting.estimators`; :func:`shrink` runs the one a method name means, as written in
the registry (:data:`forecasting.options.METHODS`).
"""

from __future__ import annotations

from forecasting.errors import OrderDataError
from forecasting.estimators.base import Between, Shrunk, error_variance, fit_between  # noqa: F401
from forecasting.estimators.cross_validation import (  # noqa: F401
    CV_FOLDS,
    CV_SEED,
    JS_CV_GRID,
    MTA_CV_GRID,
    james_stein_cv,
    mta_cv,
)
from forecasting.estimators.empirical_bayes import _tau2_moments, empirical_bayes  # noqa: F401
from forecasting.estimators.gamma_gamma import fit_gamma_gamma, gamma_gamma_ranges, gamma_gamma_spend  # noqa: F401
from forecasting.estimators.james_stein import bock_constant, james_stein  # noqa: F401
from forecasting.estimators.mta import mta_constant, mta_minimax  # noqa: F401
from forecasting.estimators.segments import mta_segments, segment_similarities  # noqa: F401
from forecasting.estimators.simple import plain_averages, pooled_average  # noqa: F401
from forecasting.options import METHODS as _REGISTRY
from forecasting.options import load

METHODS = tuple(_REGISTRY)


def check_method(method) -> str:
    """Return ``method`` if it is a known estimator, else raise OrderDataError."""
    if method not in _REGISTRY:
        raise OrderDataError("unknown forecasting method", value=method, option="method",
                             fix=f"Choose one of: {', '.join(METHODS + ('auto',))}")
    return method


def shrink(means, mean_vars, *, method, orders=None, segments=None, codes=None, values=None,
           multiplier=None, between=None) -> Shrunk:
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
        Order-level customer positions and values (the cross-validated methods).
    multiplier : float, optional
        A cross-validated lambda already chosen (the cross-validated methods).
    between : Between, optional
        The REML fit of the spread between customers ("empirical-bayes"; fitted when absent).

    Returns
    -------
    Shrunk
    """
    check_method(method)
    entry = _REGISTRY[method]
    given = {"orders": orders, "segments": segments, "codes": codes, "values": values, "multiplier": multiplier,
             "between": between}
    if "orders" in entry.keywords and orders is None:
        raise ValueError(f"the '{method}' method needs the number of orders per customer")
    return load(entry.fit)(means, mean_vars, **{key: given[key] for key in entry.keywords})
