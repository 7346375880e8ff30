"""Minimising a smooth function of a few parameters inside a box by Newton steps with its exact Hessian.

Used by every maximum-likelihood fit of the product with a handful of parameters (the order-frequency
models of :mod:`forecasting.frequency`, the seasonal clock of :mod:`forecasting.seasons` and the
Gamma-Gamma spend model of :mod:`forecasting.estimators.gamma_gamma`), so none of them needs a
general-purpose optimiser (whose library takes a quarter of a second to load).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Descent", "minimise", "log_scale"]


def log_scale(params, gradient, hessian):
    """Gradient and Hessian in the log-parameters u = log p: g_u = p g_p, H_u = P H_p P + diag(p g_p)."""
    p = np.asarray(params, dtype=np.float64)
    g_u = p * gradient
    return g_u, hessian * np.outer(p, p) + np.diag(g_u)


@dataclass(frozen=True)
class Descent:
    """Where a minimisation ended: the point, the value, gradient and Hessian there, and how it went."""

    point: np.ndarray
    value: float
    gradient: np.ndarray
    hessian: np.ndarray
    steps: int
    message: str

    @property
    def settled(self) -> bool:
        """Whether the steps came to rest where Newton's own steps no longer move or lower the value
        (the ends a minimisation reaches at a point where the slope vanishes). Whether that point is
        an optimum of the model is still for the caller to judge."""
        return self.message in (_SETTLED_MESSAGE, _FULL_STEP_NO_LOWER)


_SETTLED_MESSAGE = "settled"
_FULL_STEP_NO_LOWER = "the full step close to the optimum did not lower the value"


# Largest move of any (log-)parameter in one step of the minimisation.
_MAX_MOVE = 2.0
# A full Newton step smaller than this in every coordinate ends the minimisation (the next would be
# below rounding: Newton steps shrink quadratically near the optimum).
_SETTLED = 1e-11
# A slope this small relative to the value (a mean over customers of terms of order one) is rounding
# noise in the sums: the minimisation ends there.
_ROUNDING_SLOPE = 1e-13


def minimise(objective, start, lower, upper, *, max_steps=200) -> Descent:
    """Minimise a smooth function inside a box by Newton steps with its exact Hessian.

    Parameters
    ----------
    objective : callable
        ``objective(point) -> (value, derivatives)`` with ``derivatives() -> (gradient,
        hessian)`` (worked out only for points the minimisation moves to); ``derivatives`` is
        None at a point outside the function's domain (a non-finite value).
    start : array of float
        Starting point (moved into the box).
    lower, upper : array of float
        The box.

    Returns
    -------
    Descent

    Notes
    -----
    Each step solves H d = -g on the coordinates not held at a bound (a
    coordinate at a bound whose slope points out of the box stays there),
    with the Hessian's eigenvalues replaced by their absolute values (at
    least a millionth of the largest) where it is not positive definite, so
    every step goes downhill; the step is capped at ``_MAX_MOVE`` per
    coordinate and halved until the value falls by a share of what the slope
    promises (Armijo's rule). Near the optimum, where the Hessian is positive
    definite and the step small, the full Newton step is taken and converges
    quadratically; the minimisation ends when such a step moves no
    coordinate by more than ``_SETTLED`` or the slope is down to rounding
    noise (``_ROUNDING_SLOPE``), so fits started from different points agree
    to rounding (:attr:`Descent.settled`). Whether the end point is an optimum is judged
    by the caller (:func:`forecasting.frequency.judge_optimum`), not by this function's message.
    Moré and Sorensen (1984), "Newton's method", in Studies in Numerical
    Analysis, MAA, describe the modified Newton step (from memory).
    """
    lower = np.asarray(lower, dtype=np.float64)
    upper = np.asarray(upper, dtype=np.float64)
    point = np.clip(np.asarray(start, dtype=np.float64), lower, upper)
    value, derivatives = objective(point)
    if derivatives is None:
        size = len(point)
        return Descent(point, float(value), np.full(size, np.nan), np.full((size, size), np.nan), 0,
                        "the starting point is outside the model's domain")
    gradient, hessian = derivatives()
    message = "the step limit was reached"
    steps = 0
    for steps in range(1, max_steps + 1):
        held = ((point <= lower) & (gradient > 0)) | ((point >= upper) & (gradient < 0))
        free = ~held
        if not np.any(free):
            message = "every parameter is held at a bound"
            break
        sub = hessian[np.ix_(free, free)]
        sub_gradient = gradient[free]
        if not (np.all(np.isfinite(sub)) and np.all(np.isfinite(sub_gradient))):
            message = "the slope or the curvature is not finite"
            break
        if np.max(np.abs(sub_gradient)) <= _ROUNDING_SLOPE * max(1.0, abs(value)):
            # The slope left is rounding noise: where the value is nearly flat in one direction, a
            # step on it would only wander.
            message = _SETTLED_MESSAGE
            break
        eigenvalues, vectors = np.linalg.eigh(0.5 * (sub + sub.T))
        largest = float(np.max(np.abs(eigenvalues))) if eigenvalues.size else 0.0
        floor = max(1e-6 * largest, 1e-300)
        newton = bool(np.all(eigenvalues > floor))
        direction = np.zeros_like(point)
        direction[free] = -vectors @ ((vectors.T @ sub_gradient) / np.maximum(np.abs(eigenvalues), floor))
        move = float(np.max(np.abs(direction)))
        if move > _MAX_MOVE:
            direction *= _MAX_MOVE / move
            newton = False
        slope = float(gradient @ direction)
        if newton and move < 1e-3:
            # Close to the optimum: the full Newton step (its value change is at the level of rounding).
            trial = np.clip(point + direction, lower, upper)
            t_value, t_derivatives = objective(trial)
            if t_derivatives is None or t_value > value + 1e-12 * max(1.0, abs(value)):
                message = _FULL_STEP_NO_LOWER
                break
            point, value = trial, t_value
            gradient, hessian = t_derivatives()
            if move < _SETTLED:
                message = _SETTLED_MESSAGE
                break
            continue
        scale = 1.0
        accepted = False
        for _ in range(60):
            trial = np.clip(point + scale * direction, lower, upper)
            t_value, t_derivatives = objective(trial)
            if t_derivatives is not None and t_value <= value + 1e-4 * scale * slope:
                accepted = True
                break
            scale *= 0.5
        if not accepted:
            message = "no step lowered the value"
            break
        point, value = trial, t_value
        gradient, hessian = t_derivatives()
    return Descent(point, float(value), gradient, hessian, steps, message)
