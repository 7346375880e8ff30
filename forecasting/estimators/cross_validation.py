"""The cross-validated variants: the amount of pull tried out on the shop's own orders.

The amount (a multiplier lambda of the closed-form pull) is chosen by 5-fold cross-validation
over orders. Their leave-one-out twins keep lambda from the fit on all orders (choosing it
again without each order would mean a cross-validation per held-out order), which flatters
them a little in the shop's own check; the automatic choice leaves them out.
"""

from __future__ import annotations

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
            fix="Give the order-level table, or choose a method that is not cross-validated", option="method",
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
    m, s = as_arrays(means, mean_vars)
    if m.size == 1:
        return plain_result(m, s, (ONE_CUSTOMER,))

    def run(m_tr, s_tr, lam):
        if m_tr.size <= 1:
            return m_tr
        return mta_constant(m_tr, s_tr, multiplier=lam).estimate

    if multiplier is None:
        lam, notes = _cv_choice(codes, values, m.size, MTA_CV_GRID, run, "mta-cv")
    else:
        lam, notes = float(multiplier), ()
    result = mta_constant(m, s, multiplier=lam)
    params = dict(result.params)
    params["lambda"] = lam
    return Shrunk(result.estimate, result.weight, result.centre, result.estimate_var, notes + result.notes, params)


def james_stein_cv(means, mean_vars, *, codes=None, values=None, multiplier=None) -> Shrunk:
    """James-Stein with the shrink amount (1 - factor) multiplied by a cross-validated lambda.

    Notes
    -----
    lambda from ``JS_CV_GRID`` (0 to 3), chosen as in :func:`mta_cv`; the
    shrink amount lambda (1 - factor) is clipped to [0, 1]. ``params``:
    ``factor``, ``lambda``. ``multiplier`` as in :func:`mta_cv`.
    """
    m, s = as_arrays(means, mean_vars)

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


def mta_cv_left_out(side, s_factor, *, fitted, **context):
    """Leave-one-out twin of :func:`mta_cv` with lambda kept from the fit on all orders."""
    return mta_left_out(side, s_factor, amount=float(fitted.get("lambda", 1.0)))


def james_stein_cv_left_out(side, s_factor, *, fitted, **context):
    """Leave-one-out twin of :func:`james_stein_cv` with lambda kept from the fit on all orders."""
    return james_stein_left_out(side, s_factor, amount=float(fitted.get("lambda", 1.0)))
