"""The estimators: customers' averages in, better estimates of their true means out.

Each module holds an estimator's fit on one shop beside its exact leave-one-out twin, which
gives the same fit with one order held out, for every held-out order at once, from the sums of
:mod:`forecasting.holdout`:

=====================  ===============================================================
``simple``             plain averages, one shop-wide average
``james_stein``        James-Stein with Bock's constant for unequal variances
``mta``                multi-task averaging (constant and minimax similarity)
``segments``           multi-task averaging within segments
``empirical_bayes``    normal-normal empirical Bayes with REML
``gamma_gamma``        the Gamma-Gamma spend model
``cross_validation``   the amount of pull chosen by cross-validation
``base``               the shared result type, the spread between customers (REML),
                       the error of a forecast (with Morris's allowance)
=====================  ===============================================================

Every method is O(T) in time and memory (gamma-gamma adds an iterative maximum-likelihood fit
whose cost per step is O(T)); no T x T matrix is ever formed. The dense equivalents live in the
tests, which the fast paths must match. Which estimator a method name means, and what it needs,
is written in :data:`forecasting.options.METHODS`.
"""
