"""The shop's seasonal clock, and the repeat-order model fitted on it.

Input: cleaned orders (``customer``, ``order_date``) up to an "as of" date.

Output:

* :func:`seasonal_days` -- the length of a calendar period on a seasonal clock
  defined by a month-of-year index (each day counts its month's weight).
* :func:`fit_repeat_orders` -- the order-frequency model (BG/NBD or MBG/NBD,
  :mod:`forecasting.frequency`) and, when the orders support one, a
  month-of-year index, estimated together by maximum likelihood; every
  customer's history, the fit and any window ahead are measured on the same
  clock. Returns a :class:`RepeatOrderModel`.

Why one clock. A customer who orders at rate lambda x index(month) places the
same orders as one who orders at rate lambda on a clock that runs index(month)
times faster in that month. Projecting a window on the seasonal clock while
the customer's past stays in calendar days would mix two clocks: after a busy
spring rates would look too high and silences too short, before spring a quiet
winter would look like customers leaving. Here the past, the fit and the
window use the same clock.

The month index is kept only when the orders support it: a likelihood-ratio
test of the model with the index against the same model without it
(11 degrees of freedom, 5% level) decides under ``seasons="auto"``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd
from scipy import special

from .customers import customer_statistics
from .errors import OrderDataError
from .frequency import (
    FREQUENCY_MODELS,
    HISTORY_COLUMNS,
    MODEL_NAMES,
    FrequencyFit,
    _check_model,
    _data_notes,
    _Histories,
    _Terms,
    check_repeat_history,
    fit_order_frequency,
    judge_optimum,
    pick_by_likelihood,
    repeat_history,
)
from .newton import log_scale, minimise

__all__ = [
    "SEASONS",
    "MIN_SEASON_DAYS",
    "SEASON_TEST_LEVEL",
    "MONTH_DAYS",
    "SEASON_COLUMNS",
    "seasonal_days",
    "clock_between",
    "month_edges",
    "p_value_words",
    "RepeatOrderModel",
    "fit_repeat_orders",
]

#: Seasonal adjustment: "auto" (the month index when a full year exists and the test keeps it), "month", "none".
SEASONS = ("auto", "month", "none")
#: A month-of-year index needs every calendar month seen at least once.
MIN_SEASON_DAYS = 365
#: Level of the likelihood-ratio test that keeps a month index under seasons="auto" (common practice: 5%).
SEASON_TEST_LEVEL = 0.05
#: Average Gregorian month lengths in days (February 28.2425), January first.
MONTH_DAYS = np.array([31.0, 28.2425, 31.0, 30.0, 31.0, 30.0, 31.0, 31.0, 30.0, 31.0, 30.0, 31.0])
#: Columns of RepeatOrderModel.season_table().
SEASON_COLUMNS = ["month", "repeat_orders", "index", "index_low", "index_high"]

#: Month names, January first.
MONTH_NAMES = ("January", "February", "March", "April", "May", "June", "July", "August", "September",
               "October", "November", "December")
# Bounds of the fit: log-parameters as in frequency.py; log month weights within e^-6..e^6.
_LOG_BOUND = 18.0
_INDEX_BOUND = 6.0
# Drawn log-parameters are kept within this bound (as in frequency.py).
_DRAW_BOUND = 40.0
_NS_PER_DAY = 86400e9


# --------------------------------------------------------------------------- #
# The calendar: where each moment falls, and how many days of each month lie before it
# --------------------------------------------------------------------------- #
class _Calendar:
    """Months from the earliest to the latest moment given, for fast clock arithmetic.

    For a moment t, ``F_m(t)`` = days of calendar month-of-year m between the
    first month's start and t. Any month-of-year index w turns it into the
    seasonal clock ``C(t) = sum_m w_m F_m(t)``, and the clock length of a
    period [s, e) is ``C(e) - C(s)``. Held as a table of F at each month's
    start, so each moment costs one look-up (no per-day loop).
    """

    def __init__(self, earliest, latest):
        first = np.datetime64(pd.Timestamp(earliest).to_datetime64(), "M")
        last = np.datetime64(pd.Timestamp(latest).to_datetime64(), "M")
        months = np.arange(first, last + 2)  # one month past the latest, for its end edge
        self.first = first
        self.starts = months.astype("datetime64[ns]")
        self.month_of_year = (months.astype(np.int64) % 12).astype(np.int64)[:-1]
        lengths = np.diff(self.starts).astype(np.float64) / _NS_PER_DAY
        steps = np.zeros((len(lengths), 12))
        steps[np.arange(len(lengths)), self.month_of_year] = lengths
        self.before = np.vstack([np.zeros(12), np.cumsum(steps, axis=0)])

    def locate(self, moments):
        """Month position, month of year and days into the month of each moment."""
        stamps = np.asarray(pd.to_datetime(np.atleast_1d(moments)).to_numpy(dtype="datetime64[ns]"))
        position = (stamps.astype("datetime64[M]") - self.first).astype(np.int64)
        if np.any(position < 0) or np.any(position >= len(self.month_of_year)):
            raise ValueError("a moment falls outside the calendar")  # a programming error, not the data's
        into = (stamps - self.starts[position]).astype(np.float64) / _NS_PER_DAY
        return position, self.month_of_year[position], into

    def clock(self, located, weights):
        """C(t) for located moments under month weights (12,)."""
        position, month, into = located
        # The clock at each month's start first (a few dozen numbers), then one look-up per moment.
        return (self.before @ weights)[position] + weights[month] * into

    def second_moment(self, located, other, scale):
        """sum_i scale_i F(s_i) F(t_i)' for located moments s (``located``) and t (``other``): 12 x 12.

        F(t) = before[p] + into e_m (p its month's position, m its month of year), so the sum
        needs, per pair of positions, the sums of scale, scale x into_s, scale x into_t and
        scale x into_s x into_t (bincounts), then a few small matrix products.
        """
        p_s, m_s, i_s = located
        p_t, m_t, i_t = other
        size = len(self.month_of_year)
        table = self.before[:size]
        months = np.zeros((size, 12))
        months[np.arange(size), self.month_of_year] = 1.0
        pair = p_s * size + p_t
        cells = size * size

        def summed(weights):
            return np.bincount(pair, weights=weights, minlength=cells).reshape(size, size)

        both = summed(scale)
        into_s = summed(scale * i_s)
        into_t = summed(scale * i_t)
        into_st = summed(scale * i_s * i_t)
        return (table.T @ both @ table + months.T @ into_s @ table + table.T @ into_t @ months
                + months.T @ into_st @ months)

    def exposure_sum(self, located, scale):
        """sum_i scale_i F(t_i): a 12-vector, without building the (n x 12) matrix."""
        position, month, into = located
        counts = np.bincount(position, weights=scale, minlength=len(self.before))
        return counts @ self.before + np.bincount(month, weights=scale * into, minlength=12)

    def exposure(self, located):
        """F(t_i) for each moment: an (n x 12) matrix (for small inputs and tests)."""
        position, month, into = located
        table = self.before[position].copy()
        table[np.arange(len(position)), month] += into
        return table


def _check_index(index):
    weights = np.asarray(index, dtype=np.float64)
    if weights.shape != (12,) or not np.all(np.isfinite(weights)) or np.any(weights < 0):
        raise OrderDataError("a month-of-year index must be twelve numbers of at least 0", value=index)
    return weights


def clock_between(starts, ends, index) -> np.ndarray:
    """Lengths of periods [start, end) on the seasonal clock of ``index``, in average days.

    Parameters
    ----------
    starts, ends : array_like of dates
        Period starts and ends (ends not before starts).
    index : array_like of 12 floats, or of shape (D, 12)
        Month-of-year weights, January first; or D sets of them (draws).

    Returns
    -------
    numpy.ndarray
        ``integral over [start, end) of index[month(t)] dt`` per period, shape
        (n,); or (D, n) for D sets of weights.
    """
    weights = np.asarray(index, dtype=np.float64)
    if weights.ndim == 2:
        if weights.shape[1] != 12 or not np.all(np.isfinite(weights)) or np.any(weights < 0):
            raise OrderDataError("month-of-year indexes must be rows of twelve numbers of at least 0")
    else:
        weights = _check_index(weights)
    starts = pd.to_datetime(np.atleast_1d(starts))
    ends = pd.to_datetime(np.atleast_1d(ends))
    calendar = _Calendar(min(starts.min(), ends.min()), max(starts.max(), ends.max()))
    if weights.ndim == 2:
        days = calendar.exposure(calendar.locate(ends)) - calendar.exposure(calendar.locate(starts))
        return weights @ days.T
    return calendar.clock(calendar.locate(ends), weights) - calendar.clock(calendar.locate(starts), weights)


def seasonal_days(start, days, index) -> float:
    """Length of a period in "average days": each calendar day weighted by its month's index.

    Parameters
    ----------
    start : date-like
        Start of the period.
    days : float
        Its length in calendar days (>= 0).
    index : array_like of 12 floats
        Month-of-year index, January first.

    Returns
    -------
    float
        ``integral from start to start + days of index[month(t)] dt``, in days.
        With every month at 1 it is ``days``.

    Notes
    -----
    An active customer's ordering rate in a month is lambda x index; a Poisson
    process with that rate counts the same orders as one with rate lambda run
    on this seasonal clock, so the model's expected orders and simulations
    for a calendar window of ``days`` are those for ``seasonal_days(...)``.
    """
    weights = _check_index(index)
    try:
        days = float(days)
    except (TypeError, ValueError):
        raise OrderDataError("the number of days must be a number", value=days, option="horizon") from None
    if not math.isfinite(days) or days < 0:
        raise OrderDataError("the number of days must be zero or more", value=days, option="horizon")
    if days == 0:
        return 0.0
    start_ts = pd.Timestamp(start)
    return float(clock_between([start_ts], [start_ts + pd.Timedelta(days=days)], weights)[0])


def p_value_words(p: float) -> str:
    """A test's p-value as people read it: "p < 0.001", "p = 0.004", "p = 0.27"."""
    return "p < 0.001" if p < 0.001 else f"p = {p:.3f}" if p < 0.01 else f"p = {p:.2f}"


def month_edges(start, end) -> pd.DatetimeIndex:
    """``start``, every first-of-month strictly between, and ``end``."""
    start, end = pd.Timestamp(start), pd.Timestamp(end)
    inside = pd.date_range(start.normalize().replace(day=1), end, freq="MS")
    inside = inside[(inside > start) & (inside < end)]
    return pd.DatetimeIndex([start, *inside, end])


# --------------------------------------------------------------------------- #
# The joint fit: order-frequency parameters and month index together
# --------------------------------------------------------------------------- #
def _weights(free):
    """Month weights from 11 free log-weights (December's is 0), scaled to a day-weighted average of 1."""
    logs = np.append(free, 0.0)
    raw = np.exp(logs - logs.max())
    return raw / (raw @ MONTH_DAYS / MONTH_DAYS.sum())


def _weights_jacobian(weights):
    """d weights / d free log-weights: (12 x 11)."""
    share = weights * MONTH_DAYS / MONTH_DAYS.sum()
    jacobian = np.diag(weights) - np.outer(weights, share)
    return jacobian[:, :11]


class _SeasonalLikelihood:
    """The log-likelihood of every repeat order's date under the model on a month-indexed clock.

    log L(theta, w) = sum_i log L_model(x_i, C(l_i) - C(f_i), C(T) - C(f_i)) + sum_m n_m log w_m,

    C the clock of weights w (:class:`_Calendar`), f_i, l_i the first and last
    orders, T the "as of" date, n_m the repeat orders placed in month-of-year
    m. The model's likelihood is the density of the repeat orders' times on
    its own clock; the last sum is the Jacobian that turns it into the
    density of their calendar dates (rate lambda w_m in month m). Without an
    index (every w_m = 1) it is the plain likelihood on calendar days.

    Derivatives. C is linear in w, so with D_i = F(T) - F(f_i) and
    E_i = F(l_i) - F(f_i) (F the days of each month before a moment) the
    slope in w is sum_i (dl_i/dT D_i + dl_i/dt_x E_i) + n / w and the
    curvature sum_i [l_TT D D' + l_Tt (D E' + E D') + l_tt E E'] - diag(n / w^2),
    with the per-customer second derivatives of
    :meth:`forecasting.frequency._Terms.time_curvature`; the free log-weights
    enter through w's softmax-like scaling (:func:`_weights`), whose first
    and second derivatives are written out in :meth:`objective`. The tests
    check the gradient against finite differences of the likelihood and the
    Hessian against finite differences of the gradient.
    """

    def __init__(self, x, first, last, as_of, repeat_by_month, model):
        self.x = np.asarray(x, dtype=np.float64)
        self.model = model
        self.n = len(self.x)
        self.repeat_by_month = np.asarray(repeat_by_month, dtype=np.float64)
        calendar = _Calendar(min(np.min(first), np.min(last)), as_of)
        self.calendar = calendar
        self.first = calendar.locate(first)
        self.last = calendar.locate(last)
        self.end = calendar.locate([as_of])
        self.end_exposure = calendar.exposure(self.end)[0]
        self.counted = _Histories(self.x, np.zeros(self.n), np.zeros(self.n))

    def histories(self, weights):
        start = self.calendar.clock(self.first, weights)
        to_last = np.maximum(self.calendar.clock(self.last, weights) - start, 0.0)
        known = np.maximum(self.calendar.clock(self.end, weights)[0] - start, to_last)
        return to_last, known

    def objective(self, point):
        """Mean negative log-likelihood per customer at (log params, free log-weights), and its derivatives.

        Returns ``(value, derivatives)`` as :func:`forecasting.newton.minimise` wants them:
        ``derivatives() -> (gradient, hessian)`` of the same mean, or None off the domain.
        """
        params = np.exp(point[:4])
        weights = _weights(point[4:])
        to_last, known = self.histories(weights)
        terms = _Terms(params, self.counted.at(to_last, known), self.model)
        log_weights = np.log(weights)
        value = -(float(terms.value.sum()) + float(self.repeat_by_month @ log_weights)) / self.n
        if not np.isfinite(value):
            return np.inf, None

        def derivatives():
            return self._derivatives(terms, params, weights)

        return value, derivatives

    def _derivatives(self, terms, params, weights):
        terms.prepare(2)
        cal = self.calendar
        end = self.end_exposure
        parts, d_known, d_last = terms.gradient_parts()
        grad_params, hess_params = log_scale(params, np.array([p.sum() for p in parts]), terms.hessian())
        # Slope in the weights w (12): sum_i (dl/dT D_i + dl/dt_x E_i) + n / w.
        grad_w = (d_known.sum() * end - cal.exposure_sum(self.first, d_known + d_last)
                  + cal.exposure_sum(self.last, d_last) + self.repeat_by_month / weights)
        d_tt, d_tl, d_ll, cross_t, cross_l = terms.time_curvature()
        # Parameters x weights: sum_i (l_pT D_i + l_pt E_i), then p d/dp for the log-parameters.
        cross = np.empty((4, 12))
        for j in range(4):
            c_t = cross_t[j] if np.ndim(cross_t[j]) else np.full(self.n, float(cross_t[j]))
            c_l = cross_l[j] if np.ndim(cross_l[j]) else np.full(self.n, float(cross_l[j]))
            cross[j] = (c_t.sum() * end - cal.exposure_sum(self.first, c_t + c_l)
                        + cal.exposure_sum(self.last, c_l))
        cross *= params[:, None]
        # Weights x weights (see the class docstring), gathered by which moments each term multiplies.
        first_first = cal.second_moment(self.first, self.first, d_tt + 2.0 * d_tl + d_ll)
        last_last = cal.second_moment(self.last, self.last, d_ll)
        first_last = cal.second_moment(self.first, self.last, d_tl + d_ll)
        towards = cal.exposure_sum(self.last, d_tl) - cal.exposure_sum(self.first, d_tl + d_tt)
        hess_w = (first_first + last_last - first_last - first_last.T + d_tt.sum() * np.outer(end, end)
                  + np.outer(end, towards) + np.outer(towards, end) - np.diag(self.repeat_by_month / weights ** 2))
        # From w to the eleven free log-weights: w_m = e^l_m / sum_j s_j e^l_j (s the months' shares of a year).
        jacobian = _weights_jacobian(weights)
        share = weights * MONTH_DAYS / MONTH_DAYS.sum()
        slope_w = grad_w * weights
        level = float(grad_w @ weights)
        second = (np.diag(slope_w - level * share) - np.outer(slope_w, share) - np.outer(share, slope_w)
                  + 2.0 * level * np.outer(share, share))[:11, :11]
        hess_free = jacobian.T @ hess_w @ jacobian + second
        gradient = np.concatenate([grad_params, grad_w @ jacobian])
        hessian = np.empty((15, 15))
        hessian[:4, :4] = hess_params
        hessian[:4, 4:] = cross @ jacobian
        hessian[4:, :4] = hessian[:4, 4:].T
        hessian[4:, 4:] = hess_free
        return -gradient / self.n, -hessian / self.n

    def value_and_gradient(self, point):
        """Mean negative log-likelihood per customer and its gradient in (log params, free log-weights)."""
        value, derivatives = self.objective(np.asarray(point, dtype=np.float64))
        if derivatives is None:
            return 1e300, np.zeros(len(point))
        return value, derivatives()[0]

    def hessian(self, point):
        """Hessian of the mean negative log-likelihood per customer (15 x 15)."""
        value, derivatives = self.objective(np.asarray(point, dtype=np.float64))
        if derivatives is None:
            return np.full((15, 15), np.nan)
        return derivatives()[1]

    def log_likelihood(self, point):
        return -self.objective(np.asarray(point, dtype=np.float64))[0] * self.n


def _fit_with_index(likelihood: _SeasonalLikelihood, flat: FrequencyFit, start=None):
    """Maximise the joint likelihood from the flat fit (or ``start``); returns (FrequencyFit, weights, covariance)."""
    if start is None:
        start = np.concatenate([np.log(flat.params), np.zeros(11)])
    bound = np.array([_LOG_BOUND] * 4 + [_INDEX_BOUND] * 11)
    descent = minimise(likelihood.objective, start, -bound, bound)
    point = descent.point
    hessian = descent.hessian * likelihood.n
    mean_value, gradient = descent.value, descent.gradient
    # Month weights live in a box of their own; judge_optimum sees them scaled to the parameters' box.
    scaled = point.copy()
    scaled[4:] *= _LOG_BOUND / _INDEX_BOUND
    scaled_gradient = gradient.copy()
    scaled_gradient[4:] *= _INDEX_BOUND / _LOG_BOUND
    names = ("r", "alpha", "a", "b") + tuple(f"the {name} weight" for name in MONTH_NAMES[:11])
    scale_matrix = np.ones(15)
    scale_matrix[4:] = _INDEX_BOUND / _LOG_BOUND
    verdict = judge_optimum(scaled, scaled_gradient, hessian * np.outer(scale_matrix, scale_matrix),
                            bound=_LOG_BOUND, names=names, scale=mean_value)
    # Back from the scaled weights: cov(p) = D cov(q) D with p = D q.
    covariance = verdict.covariance * np.outer(scale_matrix, scale_matrix)
    params = np.exp(point[:4])
    notes, repeat_customers = _data_notes(likelihood.x)
    fit = FrequencyFit(r=float(params[0]), alpha=float(params[1]), a=float(params[2]), b=float(params[3]),
                       log_likelihood=-mean_value * likelihood.n, covariance=covariance[:4, :4],
                       customers=likelihood.n, converged=verdict.reached, notes=tuple(notes) + verdict.notes,
                       repeat_customers=repeat_customers, model=likelihood.model)
    return fit, _weights(point[4:]), covariance, point


# --------------------------------------------------------------------------- #
# Public: the repeat-order model of a shop
# --------------------------------------------------------------------------- #
@dataclass(frozen=True)
class RepeatOrderModel:
    """How often the shop's customers order again, on the clock that suits its orders.

    Attributes
    ----------
    fit : FrequencyFit
        The chosen model's parameters, in days of the clock (average days when
        a month index is used). ``fit.choice`` says how the model was chosen.
    seasons : {"month", "none"}
        Whether a month-of-year index is used.
    index : numpy.ndarray
        The month-of-year index (twelve ones without one); day-weighted average 1.
    index_low, index_high : numpy.ndarray
        90% ranges of each month's weight (NaN when unknown or without an index).
    as_of : pandas.Timestamp
        The end of the history.
    history : pandas.DataFrame
        Each customer's repeat history (``HISTORY_COLUMNS``) on the model's clock,
        indexed like the customer table it came from.
    calendar_history : pandas.DataFrame
        The same histories in calendar days.
    season_test : dict
        The likelihood-ratio test of the month index: ``statistic``, ``df``,
        ``p_value``, ``level``, ``log_likelihood_without``,
        ``log_likelihood_with``; empty when it could not be run (less than a
        full year, or seasons="none").
    season_words : str
        One sentence saying whether the index is used and why.
    repeat_by_month : numpy.ndarray
        Repeat orders placed in each month of the year, all years together.
    covariance : numpy.ndarray or None
        With a month index, the (15 x 15) covariance of the log-parameters and
        the eleven free log-weights (December's is fixed before scaling), from
        the joint fit; None without one (``fit.covariance`` then says it all).
    optima : dict
        Every fit made on the way, ``{(model, with_index): point}`` (the
        log-parameters, then the free log-weights with an index): where the
        next fit on similar orders (a later cut-off) can start.
    """

    fit: FrequencyFit
    seasons: str
    index: np.ndarray = field(repr=False)
    index_low: np.ndarray = field(repr=False)
    index_high: np.ndarray = field(repr=False)
    as_of: pd.Timestamp
    history: pd.DataFrame = field(repr=False)
    calendar_history: pd.DataFrame = field(repr=False)
    season_test: dict = field(default_factory=dict, repr=False)
    season_words: str = ""
    repeat_by_month: np.ndarray = field(default=None, repr=False)
    covariance: np.ndarray | None = field(default=None, repr=False)
    optima: dict = field(default_factory=dict, repr=False)

    def draw(self, draws: int, *, seed=0) -> tuple:
        """Parameter sets and month indexes drawn together from the fit's normal approximation.

        Returns
        -------
        (numpy.ndarray, numpy.ndarray)
            (draws x 4) rows of (r, alpha, a, b) and (draws x 12) month indexes
            (all ones without a month index). Without a usable covariance
            every row is the point estimate.
        """
        rng = np.random.default_rng(seed)
        if self.seasons != "month":
            return self.fit.draw_parameters(draws, seed=rng), np.ones((draws, 12))
        point = np.concatenate([np.log(self.fit.params), self._free])
        if self.covariance is None or not np.all(np.isfinite(self.covariance)):
            return np.tile(np.asarray(self.fit.params), (draws, 1)), np.tile(self.index, (draws, 1))
        drawn = rng.multivariate_normal(point, self.covariance, size=draws, method="cholesky")
        params = np.exp(np.clip(drawn[:, :4], -_DRAW_BOUND, _DRAW_BOUND))
        free = np.clip(drawn[:, 4:], -_INDEX_BOUND, _INDEX_BOUND)
        return params, np.vstack([_weights(row) for row in free])

    @property
    def _free(self):
        logs = np.log(self.index)
        return logs[:11] - logs[11]

    def clock_days(self, starts, ends) -> np.ndarray:
        """Lengths of calendar periods [start, end) on the model's clock."""
        return clock_between(starts, ends, self.index)

    def horizon(self, days: float) -> float:
        """The next ``days`` calendar days from ``as_of`` on the model's clock."""
        if self.seasons != "month":
            return float(days)
        return seasonal_days(self.as_of, days, self.index)

    def season_table(self) -> pd.DataFrame | None:
        """Twelve rows (``SEASON_COLUMNS``) when a month index is used, else None."""
        if self.seasons != "month":
            return None
        return pd.DataFrame({"month": np.arange(1, 13), "repeat_orders": self.repeat_by_month,
                             "index": self.index, "index_low": self.index_low, "index_high": self.index_high},
                            columns=SEASON_COLUMNS)

    def as_dict(self) -> dict:
        """Plain numbers and strings, for JSON and the dashboard."""
        def plain(values):
            return [float(v) if np.isfinite(v) else None for v in values]

        return {
            "seasons": self.seasons,
            "season_words": self.season_words,
            "season_test": {k: (float(v) if isinstance(v, (float, np.floating)) else v)
                            for k, v in self.season_test.items()},
            "season_index": plain(self.index) if self.seasons == "month" else None,
            "season_index_low": plain(self.index_low) if self.seasons == "month" else None,
            "season_index_high": plain(self.index_high) if self.seasons == "month" else None,
        }


def check_seasons(seasons):
    """``seasons`` when it is one of :data:`SEASONS`; a problem naming the option otherwise."""
    if seasons not in SEASONS:
        raise OrderDataError("the seasonal adjustment can be auto, month or none", value=seasons,
                             option="seasons", fix="Choose auto, month or none")
    return seasons


def _repeat_orders_by_month(orders):
    """Repeat orders (all but each customer's one earliest) by month of the year."""
    table = pd.DataFrame({"customer": orders["customer"].to_numpy(),
                          "order_date": pd.to_datetime(orders["order_date"]).to_numpy()})
    table = table.sort_values(["customer", "order_date"], kind="stable")
    repeats = table.loc[table["customer"].duplicated(), "order_date"]
    return np.bincount(repeats.dt.month.to_numpy() - 1, minlength=12).astype(np.float64)


def _index_range(weights, covariance, level=0.90):
    """Delta-method ranges of the month weights from the covariance of the free log-weights."""
    if covariance is None or not np.all(np.isfinite(covariance)):
        nan = np.full(12, np.nan)
        return nan, nan
    jacobian = _weights_jacobian(weights)  # d w / d free
    cov_w = jacobian @ covariance[4:, 4:] @ jacobian.T
    # Ranges on the log scale keep them positive: sd(log w) = sd(w) / w.
    sd_log = np.sqrt(np.maximum(np.diag(cov_w), 0.0)) / weights
    z = float(special.ndtri(0.5 + level / 2))
    return weights * np.exp(-z * sd_log), weights * np.exp(z * sd_log)


def fit_repeat_orders(orders: pd.DataFrame, *, as_of=None, model: str = "auto", seasons: str = "auto",
                      stats: pd.DataFrame | None = None, repeat_by_month=None,
                      start: RepeatOrderModel | None = None) -> RepeatOrderModel:
    """Fit the order-frequency model, with a month-of-year clock when the orders support one.

    Parameters
    ----------
    orders : pandas.DataFrame
        Cleaned orders with ``customer`` and ``order_date``, none after ``as_of``.
    as_of : date-like, optional
        End of the history; default the last order date.
    model : {"auto", "bg-nbd", "mbg-nbd"}, default "auto"
        The order-frequency model; ``"auto"`` fits both and keeps the one with
        the higher likelihood (both have four parameters).
    seasons : {"auto", "month", "none"}, default "auto"
        ``"month"``: always use a month-of-year index (needs a full year of
        orders); ``"none"``: calendar days; ``"auto"``: the index when a full
        year exists and a likelihood-ratio test keeps it at the 5% level.
    stats : pandas.DataFrame, optional
        ``customer_statistics(orders)``, when already at hand.
    repeat_by_month : array_like of 12 floats, optional
        Repeat orders (all but each customer's earliest) placed in each month
        of the year, when already counted.
    start : RepeatOrderModel, optional
        A model fitted on similar orders (the previous cut-off of a rolling
        check): each fit starts from its optimum (``optima``) instead of the
        default start. The result is the same to rounding (Newton steps end
        where the slope vanishes), only found in fewer steps.

    Returns
    -------
    RepeatOrderModel

    Raises
    ------
    OrderDataError
        If no customer ordered twice, ``seasons="month"`` with less than a
        full year of orders, or an unknown option.

    Notes
    -----
    The month index is estimated jointly with the model's four parameters
    by maximising the likelihood of every repeat order's date
    (:class:`_SeasonalLikelihood`): each customer's first order, last order
    and the "as of" date are placed on the clock, the model's likelihood is
    taken on it, and the Jacobian ``sum_m n_m log w_m`` makes it a density of
    calendar dates, comparable with the fit without an index. Eleven weights
    are free (the twelfth follows from the scaling to a day-weighted average
    of 1, which leaves the model's yearly level to alpha). The test statistic
    ``2 (log L_with - log L_without)`` is compared with a chi-square
    distribution with 11 degrees of freedom (Wilks' theorem).

    With ``model="auto"`` and a month index possible, both models are fitted
    with and without it; the model is chosen by likelihood among the fits
    with the index, the index is then tested for that model, and if it is
    not kept the model is chosen again among the fits without it.

    The uncertainty of the index enters the covariance of the four
    parameters (the marginal block of the joint inverse Hessian) but the
    clock itself is taken as known in projections.
    """
    seasons = check_seasons(seasons)
    if model != "auto":
        model = _check_model(model)
    missing = [c for c in ("customer", "order_date") if c not in orders.columns]
    if missing:
        raise OrderDataError("the orders table lacks columns", value=", ".join(missing),
                             fix="Read the file with forecasting.read_orders")
    if len(orders) == 0:
        raise OrderDataError("there are no orders to work with")
    if stats is None:
        stats = customer_statistics(orders)
    history = repeat_history(stats, as_of=as_of)
    as_of_ts = pd.Timestamp(stats["last_order"].max()) if as_of is None else pd.Timestamp(as_of)
    x = history["repeat_orders"].to_numpy(dtype=np.float64)
    check_repeat_history(x)
    names = FREQUENCY_MODELS if model == "auto" else (model,)
    earlier = {} if start is None else dict(start.optima)
    optima = {}

    def flat_fit(name):
        point = earlier.get((name, False))
        fit = fit_order_frequency(history, model=name, start=None if point is None else np.exp(point))
        optima[(name, False)] = np.log(fit.params)
        return fit

    flat = {name: flat_fit(name) for name in names}

    first = pd.to_datetime(stats["first_order"]).to_numpy(dtype="datetime64[ns]")
    last = pd.to_datetime(stats["last_order"]).to_numpy(dtype="datetime64[ns]")
    span = (as_of_ts - pd.Timestamp(first.min())) / pd.Timedelta(days=1)
    repeat_by_month = (_repeat_orders_by_month(orders) if repeat_by_month is None
                       else np.asarray(repeat_by_month, dtype=np.float64))
    ones = np.ones(12)
    nan = np.full(12, np.nan)

    def calendar_model(words, test=None):
        chosen, choice = pick_by_likelihood(flat) if len(flat) > 1 else (names[0], "")
        fit = replace(flat[chosen], choice=choice)
        return RepeatOrderModel(fit=fit, seasons="none", index=ones, index_low=nan, index_high=nan,
                                as_of=as_of_ts, history=history, calendar_history=history,
                                season_test=test or {}, season_words=words,
                                repeat_by_month=repeat_by_month, optima=optima)

    if seasons == "none":
        return calendar_model("Not adjusted for the time of year (switched off).")
    if span < MIN_SEASON_DAYS:
        if seasons == "month":
            raise OrderDataError(
                f"a month-of-year adjustment needs at least a full year of orders before {as_of_ts:%Y-%m-%d}; "
                f"these cover {span:.0f} days", value=seasons, option="seasons",
                fix="Use the automatic seasonal setting or none, or a longer order history")
        return calendar_model(f"Not adjusted for the time of year: that needs a full year of orders "
                              f"(these cover {span:.0f} days).")

    seasonal = {}
    likelihood = _SeasonalLikelihood(x, first, last, as_of_ts, repeat_by_month, names[0])
    for name in names:
        likelihood.model = name
        seasonal[name] = _fit_with_index(likelihood, flat[name], start=earlier.get((name, True)))
        optima[(name, True)] = seasonal[name][3]
    chosen, choice = (pick_by_likelihood({n: f[0] for n, f in seasonal.items()}) if len(names) > 1
                      else (names[0], ""))
    fit, weights, covariance, _ = seasonal[chosen]
    statistic = max(0.0, 2.0 * (fit.log_likelihood - flat[chosen].log_likelihood))
    p_value = float(special.chdtrc(11, statistic))
    test = {"statistic": statistic, "df": 11, "p_value": p_value, "level": SEASON_TEST_LEVEL,
            "log_likelihood_without": flat[chosen].log_likelihood, "log_likelihood_with": fit.log_likelihood}
    kept = p_value < SEASON_TEST_LEVEL and fit.usable
    if seasons == "auto" and not kept:
        reason = (f"the month-to-month differences in repeat orders are within chance (likelihood-ratio test "
                  f"{p_value_words(p_value)})" if fit.usable else "the fit with a month index did not settle")
        return calendar_model(f"Not adjusted for the time of year: {reason}.", test)
    low, high = _index_range(weights, covariance)
    busiest = int(np.argmax(weights))
    quietest = int(np.argmin(weights))
    words = (f"Adjusted for the time of year: repeat orders follow a month-of-year pattern (likelihood-ratio "
             f"test {p_value_words(p_value)}{'' if kept else ', kept because it was asked for'}); "
             f"busiest {MONTH_NAMES[busiest]} ({weights[busiest]:.2f} x an average month), quietest "
             f"{MONTH_NAMES[quietest]} ({weights[quietest]:.2f} x).")
    to_last, known = likelihood.histories(weights)
    clock_history = pd.DataFrame({"repeat_orders": history["repeat_orders"].to_numpy(),
                                  "days_to_last_order": to_last, "days_known": known},
                                 index=history.index.copy(), columns=HISTORY_COLUMNS)
    return RepeatOrderModel(fit=replace(fit, choice=choice), seasons="month", index=weights, index_low=low,
                            index_high=high, as_of=as_of_ts, history=clock_history, calendar_history=history,
                            season_test=test, season_words=words, repeat_by_month=repeat_by_month,
                            covariance=covariance if np.all(np.isfinite(covariance)) else None, optima=optima)
