"""The cross-validated variants: the amount of pull tried out on the shop's own orders.

The amount (a multiplier lambda of the closed-form pull) is chosen by 5-fold cross-validation
over orders. Their leave-one-out twins keep lambda from the fit on all orders (choosing it
again without each order would mean a cross-validation per held-out order), which flatters
them a little in the shop's own check; the automatic choice leaves them out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from forecasting.errors import OrderDataError
from forecasting.estimators.base import ONE_CUSTOMER, Shrunk, as_arrays, plain_result
from forecasting.estimators.james_stein import james_stein, james_stein_left_out
from forecasting.estimators.mta import mta_constant, mta_left_out
from forecasting.variance import classic_pooled_variance

#: Number of folds and seed of the cross-validated variants.
CV_FOLDS = 5
CV_SEED = 20251201
#: Multipliers of the closed-form MTA similarity tried by "mta-cv" (0 = plain averages).
MTA_CV_GRID = np.concatenate([[0.0], 2.0 ** np.linspace(-5.0, 5.0, 31)])
#: Multipliers of the James-Stein shrink amount tried by "james-stein-cv".
JS_CV_GRID = np.linspace(0.0, 3.0, 31)


@dataclass(frozen=True)
class Fold:
    """One fold of the cross-validation: what its training orders give and what it scores.

    ``m`` and ``s`` are the training averages and their variances (the classic pooled spread of
    the training orders over n) of the customers with at least one training order; ``keep``
    marks those among them with held-out orders, whose held-out average is ``held_mean`` over
    ``held_count`` orders.
    """

    m: np.ndarray
    s: np.ndarray
    train_count: np.ndarray
    keep: np.ndarray
    held_mean: np.ndarray
    held_count: np.ndarray


def cv_folds(codes, values, T, *, folds=CV_FOLDS, seed=CV_SEED) -> list:
    """The folds of the cross-validation over orders, computed once for every multiplier and method.

    Orders are split at random (``seed``) into ``folds`` groups; each group in turn is held out.
    Every fold's sums come from one pass over the orders: the held-out sums per fold and
    customer, the training sums as the customer's total less them. Sums of squares are taken
    about each customer's average over all orders, so that nothing is lost to cancellation.
    """
    codes = np.asarray(codes, dtype=np.int64)
    x = np.asarray(values, dtype=np.float64)
    N = x.size
    fold_of = np.random.default_rng(seed).permutation(N) % folds
    total_n = np.bincount(codes, minlength=T).astype(np.float64)
    centre = np.bincount(codes, weights=x, minlength=T) / np.maximum(total_n, 1.0)
    dev = x - centre[codes]
    cell = fold_of * T + codes
    held_n = np.bincount(cell, minlength=folds * T).astype(np.float64).reshape(folds, T)
    held_dev = np.bincount(cell, weights=dev, minlength=folds * T).reshape(folds, T)
    held_dev2 = np.bincount(cell, weights=dev * dev, minlength=folds * T).reshape(folds, T)
    total_dev = held_dev.sum(axis=0)
    total_dev2 = held_dev2.sum(axis=0)
    out = []
    for fold in range(folds):
        n_tr = total_n - held_n[fold]
        present = n_tr > 0
        sum_tr = total_dev - held_dev[fold]
        shift = np.divide(sum_tr, n_tr, out=np.zeros(T), where=present)
        ss_tr = np.maximum(total_dev2 - held_dev2[fold] - n_tr * shift * shift, 0.0)
        m_tr = centre + shift
        sigma2, _ = classic_pooled_variance(n_tr[present], ss_tr[present], m_tr[present])
        n_ho = held_n[fold]
        scored = present & (n_ho > 0)
        mean_ho = centre + np.divide(held_dev[fold], n_ho, out=np.zeros(T), where=n_ho > 0)
        out.append(Fold(m_tr[present], sigma2 / n_tr[present], n_tr[present], scored[present], mean_ho[scored],
                        n_ho[scored]))
    return out


def _fold_errors(fold: Fold, grid, estimates):
    """sum over held-out orders of (x - estimate)^2, up to a term that does not depend on the
    estimate, for every multiplier: sum n_ho (held-out average - estimate)^2 (the estimates of
    every multiplier at once; the slow path of the errors below)."""
    est = estimates(fold, grid)  # multipliers x scored customers
    return ((fold.held_mean - est) ** 2 * fold.held_count).sum(axis=1)


def _mta_estimates(fold: Fold, grid):
    """Constant MTA on the fold's training averages for every multiplier, one fit each (the
    rare folds the sums over training counts do not cover: one customer, equal averages, or an
    average without spread)."""
    m, s = fold.m, fold.s
    if m.size <= 1:
        return np.broadcast_to(m[fold.keep], (len(grid), int(fold.keep.sum())))
    return np.stack([mta_constant(m, s, multiplier=lam).estimate[fold.keep] for lam in grid])


def _shrunk_errors(fold: Fold, keep_groups, size, pull, centre):
    """The errors of :func:`_fold_errors` for estimates c + g (m - c) with g = 1 - pull[:, group]
    the same for every scored customer of a group, from sums over the groups.

    With r = held-out average - m, y = m - o (o the mean of the training averages) and
    gamma = c - o, the error is sum w (r + h (y - gamma))^2 with h the pull, so per group only
    sum w, w r, w r^2, w y, w y^2 and w r y are needed.
    """
    w = fold.held_count
    m = fold.m[fold.keep]
    origin = float(np.mean(fold.m))
    r = fold.held_mean - m
    y = m - origin
    sums = [np.bincount(keep_groups, weights=values, minlength=size)
            for values in (w, w * r, w * r * r, w * y, w * y * y, w * r * y)]
    W, R, RR, Y, YY, RY = sums
    gamma = (np.asarray(centre, dtype=np.float64) - origin)[:, None]
    h = pull
    return (RR.sum() + 2.0 * (h * (RY - gamma * R)).sum(axis=1)
            + (h * h * (YY - 2.0 * gamma * Y + gamma * gamma * W)).sum(axis=1))


def _mta_errors(fold: Fold, grid):
    """:func:`_fold_errors` of constant MTA for every multiplier, from sums over training counts."""
    m, s = fold.m, fold.s
    grid = np.asarray(grid, dtype=np.float64)
    var = float(np.var(m, ddof=1)) if m.size > 1 else 0.0
    if m.size <= 1 or not (var > 0 and np.all(s > 0) and np.all(np.isfinite(s))):
        return _fold_errors(fold, grid, _mta_estimates)
    a = 1.0 / var
    counts, where = np.unique(fold.train_count, return_inverse=True)
    size = np.bincount(where, minlength=counts.size).astype(np.float64)
    total = np.bincount(where, weights=m, minlength=counts.size)
    s_of = np.bincount(where, weights=s, minlength=counts.size) / size
    g = 1.0 / (1.0 + (grid[:, None] * a) * s_of[None, :])  # multipliers x counts
    centre = (g @ total) / (g @ size)
    return _shrunk_errors(fold, where[fold.keep], counts.size, 1.0 - g, centre)


def _james_stein_errors(fold: Fold, grid):
    """:func:`_fold_errors` of James-Stein for every multiplier of the shrink amount."""
    m, s = fold.m, fold.s
    grid = np.asarray(grid, dtype=np.float64)
    fitted = james_stein(m, s)
    keep_groups = np.zeros(int(fold.keep.sum()), dtype=np.int64)
    if "closed_form_factor" not in fitted.params:  # plain averages whatever the multiplier
        return _shrunk_errors(fold, keep_groups, 1, np.zeros((grid.size, 1)), np.zeros(grid.size))
    amount = np.clip(grid * (1.0 - fitted.params["closed_form_factor"]), 0.0, 1.0)
    return _shrunk_errors(fold, keep_groups, 1, amount[:, None], np.full(grid.size, fitted.centre))


#: Each cross-validated method's grid and its estimates on a fold for every multiplier.
_CV_RUNS = {"mta-cv": (lambda: MTA_CV_GRID, _mta_errors),
            "james-stein-cv": (lambda: JS_CV_GRID, _james_stein_errors)}


def cross_validated_multiplier(name, codes, values, T, *, folds=None):
    """The multiplier lambda a cross-validated method chooses, and notes.

    Parameters
    ----------
    name : {"mta-cv", "james-stein-cv"}
    codes, values : array_like
        Customer position (0..T-1) and value of every order, on the estimator's scale.
    T : int
        Number of customers.
    folds : list of Fold, optional
        :func:`cv_folds` of the same orders, when already computed (both methods share them).

    Returns
    -------
    lam : float
    notes : tuple of str
    """
    if codes is None or values is None:
        raise OrderDataError(
            f"the '{name}' method needs the order-level table to cross-validate",
            fix="Give the order-level table, or choose a method that is not cross-validated", option="method",
        )
    if np.asarray(values).size < 2 * CV_FOLDS:
        return 1.0, (f"Too few orders to cross-validate ({np.asarray(values).size}); "
                     "the closed-form amount of shrinkage is used.",)
    grid_of, fold_errors = _CV_RUNS[name]
    grid = grid_of()
    if folds is None:
        folds = cv_folds(codes, values, T)
    errors = np.zeros(len(grid))
    for fold in folds:
        errors += fold_errors(fold, grid)
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
    m, s = as_arrays(means, mean_vars)
    if m.size == 1:
        return plain_result(m, s, (ONE_CUSTOMER,))

    lam, notes = _multiplier("mta-cv", codes, values, m.size, multiplier)
    return _tuned(mta_constant(m, s, multiplier=lam), lam, notes)


def james_stein_cv(means, mean_vars, *, codes=None, values=None, multiplier=None) -> Shrunk:
    """James-Stein with the shrink amount (1 - factor) multiplied by a cross-validated lambda.

    Notes
    -----
    lambda from ``JS_CV_GRID`` (0 to 3), chosen as in :func:`mta_cv`; the
    shrink amount lambda (1 - factor) is clipped to [0, 1]. ``params``:
    ``factor``, ``lambda``. ``multiplier`` as in :func:`mta_cv`.
    """
    m, s = as_arrays(means, mean_vars)

    lam, notes = _multiplier("james-stein-cv", codes, values, m.size, multiplier)
    return _tuned(james_stein(m, s, amount_scale=lam), lam, notes)


def _multiplier(method, codes, values, size, multiplier):
    """``(lambda, notes)``: the given multiplier, else the cross-validated one."""
    if multiplier is None:
        return cross_validated_multiplier(method, codes, values, size)
    return float(multiplier), ()


def _tuned(result: Shrunk, lam: float, notes) -> Shrunk:
    """``result`` with the multiplier in its parameters and the multiplier's notes first."""
    params = dict(result.params)
    params["lambda"] = lam
    return Shrunk(result.estimate, result.weight, result.centre, result.estimate_var, notes + result.notes, params)


def mta_cv_left_out(side, s_factor, *, fitted, **context):
    """Leave-one-out twin of :func:`mta_cv` with lambda kept from the fit on all orders."""
    return mta_left_out(side, s_factor, amount=float(fitted.get("lambda", 1.0)))


def james_stein_cv_left_out(side, s_factor, *, fitted, **context):
    """Leave-one-out twin of :func:`james_stein_cv` with lambda kept from the fit on all orders."""
    return james_stein_left_out(side, s_factor, amount=float(fitted.get("lambda", 1.0)))
