"""New customers: how many first orders the shop can expect per day ahead.

Input: each customer's first order date (``first_order`` of
:func:`forecasting.customers.customer_statistics`) and an "as of" date.

Output: :func:`fit_arrivals` -- a Poisson regression of the number of first
orders on each day of the history, with a month-of-year pattern and a
log-linear trend each kept only when a likelihood-ratio test finds it
(5% level), returned as an :class:`ArrivalFit` that gives the expected new
customers on each day ahead, draws of its coefficients, and plain words.

The model: on day d the shop gains new customers at rate
``exp(b0 + b1 t_d + g_month(d))`` (t_d in years from the "as of" date, so b0
is the log of today's rate in December's terms), a Poisson count scaled by
the day's length inside the history. Counts of first orders are often more
variable than Poisson (a campaign, a mention in the press): the spread is
measured by the Pearson dispersion ``phi = X^2 / (days - coefficients)`` and,
when above 1, widens the coefficients' covariance and the tests as in
quasi-Poisson regression (McCullagh and Nelder 1989, section 6.2 -- from
memory) and the simulated counts (negative binomial with variance phi x mean).

References
----------
McCullagh, P. and Nelder, J. A. (1989). Generalized Linear Models, 2nd ed.
Chapman and Hall.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd
from scipy import special

from .errors import OrderDataError
from .seasons import MONTH_NAMES, MONTH_DAYS, p_value_words

__all__ = ["ARRIVAL_TEST_LEVEL", "ArrivalFit", "fit_arrivals", "daily_steps"]

#: Level of the likelihood-ratio tests that keep a trend or a month pattern (common practice: 5%).
ARRIVAL_TEST_LEVEL = 0.05
# Shortest histories on which a trend, a month pattern and both at once are tried (days).
_TREND_DAYS = 180
_MONTH_DAYS_NEEDED = 365
_BOTH_DAYS = 548
_NS_PER_DAY = 86400e9
_YEAR = 365.25


def daily_steps(start, end):
    """Cut [start, end) at every midnight: the pieces' starts, lengths in days, midpoints and months.

    Returns
    -------
    (numpy.ndarray of datetime64[ns], numpy.ndarray, numpy.ndarray of datetime64[ns], numpy.ndarray)
        Piece starts, lengths (days, at most 1), midpoints, calendar months (1-12).
    """
    start, end = pd.Timestamp(start), pd.Timestamp(end)
    if end <= start:
        empty = np.array([], dtype="datetime64[ns]")
        return empty, np.array([]), empty, np.array([], dtype=np.int64)
    inside = pd.date_range(start.normalize() + pd.Timedelta(days=1), end, freq="D")
    inside = inside[inside < end]
    edges = pd.DatetimeIndex([start, *inside, end]).to_numpy(dtype="datetime64[ns]")
    lengths = np.diff(edges).astype(np.float64) / _NS_PER_DAY
    middles = edges[:-1] + (np.diff(edges) // 2)
    months = pd.DatetimeIndex(edges[:-1]).month.to_numpy()
    return edges[:-1], lengths, middles, months


def _design(years, months, terms):
    """Columns: intercept, [trend in years], [11 month effects, December the reference]."""
    columns = [np.ones(len(years))]
    if "trend" in terms:
        columns.append(years)
    if "month" in terms:
        for month in range(1, 12):
            columns.append((months == month).astype(np.float64))
    return np.column_stack(columns)


def _poisson_fit(design, counts, exposure):
    """Maximum likelihood of a Poisson regression with log link and log(exposure) offset (Newton steps).

    Returns (coefficients, inverse Fisher information, log-likelihood, Pearson dispersion).
    """
    offset = np.log(exposure)
    coefficients = np.zeros(design.shape[1])
    coefficients[0] = math.log(max(counts.sum(), 0.5) / exposure.sum())
    information = None
    for _ in range(100):
        mean = np.exp(design @ coefficients + offset)
        information = design.T @ (design * mean[:, None])
        step = np.linalg.solve(information, design.T @ (counts - mean))
        coefficients = coefficients + step
        if np.max(np.abs(step)) < 1e-10:
            break
    mean = np.exp(design @ coefficients + offset)
    information = design.T @ (design * mean[:, None])
    log_likelihood = float(np.sum(special.xlogy(counts, mean) - mean - special.gammaln(counts + 1)))
    freedom = max(len(counts) - design.shape[1], 1)
    dispersion = float(np.sum((counts - mean) ** 2 / mean) / freedom)
    return coefficients, np.linalg.inv(information), log_likelihood, dispersion


@dataclass(frozen=True)
class ArrivalFit:
    """Expected new customers per day, from the shop's own first orders.

    Attributes
    ----------
    coefficients : numpy.ndarray
        Intercept, then the trend per year (when kept), then eleven month
        effects with December the reference (when kept).
    covariance : numpy.ndarray
        Their covariance (inverse Fisher information times the dispersion when above 1).
    terms : tuple of str
        The terms kept: ``"trend"``, ``"month"``.
    dispersion : float
        Pearson dispersion of the daily counts (1 for Poisson counts).
    as_of : pandas.Timestamp
        End of the history; the trend's zero.
    days_observed : float
        Length of the history the model saw.
    new_customers : int
        First orders in the history.
    tests : dict
        Per term tried: ``statistic``, ``df``, ``p_value``, ``kept``.
    words : str
        One or two plain sentences on what was found.
    """

    coefficients: np.ndarray = field(repr=False)
    covariance: np.ndarray = field(repr=False)
    terms: tuple
    dispersion: float
    as_of: pd.Timestamp
    days_observed: float
    new_customers: int
    tests: dict = field(default_factory=dict, repr=False)
    words: str = ""

    @property
    def growth_per_year(self) -> float:
        """Yearly growth of new-customer arrivals (0 without a trend): exp(b1) - 1."""
        return math.expm1(self.coefficients[1]) if "trend" in self.terms else 0.0

    @property
    def month_index(self) -> np.ndarray:
        """The month pattern of arrivals scaled to a day-weighted average of 1 (ones without one)."""
        if "month" not in self.terms:
            return np.ones(12)
        start = 2 if "trend" in self.terms else 1
        raw = np.exp(np.append(self.coefficients[start:start + 11], 0.0))
        return raw / (raw @ MONTH_DAYS / MONTH_DAYS.sum())

    def _rates(self, coefficients, middles, months):
        years = (pd.DatetimeIndex(middles) - self.as_of) / pd.Timedelta(days=_YEAR)
        return np.exp(_design(np.asarray(years, dtype=np.float64), months, self.terms) @ coefficients.T)

    def expected(self, start, end) -> tuple:
        """Expected new customers on each piece of [start, end) cut at midnights.

        Returns
        -------
        (numpy.ndarray, numpy.ndarray, numpy.ndarray)
            Piece midpoints (datetime64[ns]), lengths in days, expected new customers.
        """
        _, lengths, middles, months = daily_steps(start, end)
        if len(lengths) == 0:
            return middles, lengths, lengths
        return middles, lengths, self._rates(self.coefficients, middles, months) * lengths

    def expected_draws(self, start, end, draws: int, rng) -> np.ndarray:
        """(draws x pieces) expected new customers, the coefficients drawn from their normal approximation."""
        _, lengths, middles, months = daily_steps(start, end)
        if np.all(np.isfinite(self.covariance)):
            drawn = rng.multivariate_normal(self.coefficients, self.covariance, size=draws, method="cholesky")
        else:
            drawn = np.tile(self.coefficients, (draws, 1))
        return (self._rates(drawn, middles, months) * lengths[:, None]).T

    def simulate_counts(self, expected, rng) -> np.ndarray:
        """New customers on each piece: Poisson, or negative binomial with variance dispersion x mean."""
        expected = np.asarray(expected, dtype=np.float64)
        if self.dispersion <= 1.0:
            return rng.poisson(expected)
        size = np.maximum(expected, 1e-12) / (self.dispersion - 1.0)
        return rng.negative_binomial(size, 1.0 / self.dispersion)

    def as_dict(self) -> dict:
        """Plain numbers and strings, for JSON."""
        return {
            "terms": list(self.terms),
            "growth_per_year": self.growth_per_year,
            "month_index": [float(v) for v in self.month_index] if "month" in self.terms else None,
            "dispersion": self.dispersion,
            "days_observed": self.days_observed,
            "new_customers_observed": self.new_customers,
            "tests": {name: {k: (bool(v) if isinstance(v, (bool, np.bool_)) else float(v)) for k, v in test.items()}
                      for name, test in self.tests.items()},
            "words": self.words,
        }


def fit_arrivals(first_orders, *, as_of, start=None) -> ArrivalFit:
    """Fit how many new customers arrive per day, with a month pattern and a trend when the history shows them.

    Parameters
    ----------
    first_orders : array_like of dates
        Each customer's first order (none after ``as_of``).
    as_of : date-like
        End of the history.
    start : date-like, optional
        Start of the history; default the midnight before the earliest first order.

    Returns
    -------
    ArrivalFit

    Raises
    ------
    OrderDataError
        Without any first order, or with first orders after ``as_of``.

    Notes
    -----
    Terms are added forward: a log-linear trend (tried from 180 days of
    history) and eleven month-of-year effects (from 365 days); the one with
    the smaller p-value enters first if its likelihood-ratio test passes at
    ``ARRIVAL_TEST_LEVEL``, then the other is tried beside it (both together
    from 548 days, so a year and a half separates a trend from a season). The
    statistic is twice the log-likelihood gain divided by the larger model's
    dispersion when above 1, against chi-square with 1 or 11 degrees of
    freedom.

    A history whose first rows are old customers seen for the first time
    (an export that starts years after the shop opened) shows a falling
    trend of "new" customers that is not real; the trend test cannot tell.
    """
    dates = pd.to_datetime(pd.Series(np.asarray(first_orders)))
    if len(dates) == 0 or dates.isna().all():
        raise OrderDataError("there are no first orders to count new customers from")
    as_of_ts = pd.Timestamp(as_of)
    if dates.max() > as_of_ts:
        raise OrderDataError("a first order falls after the 'as of' date", value=str(dates.max()), option="as_of")
    start_ts = dates.min().normalize() if start is None else pd.Timestamp(start)
    end = as_of_ts if as_of_ts > start_ts else start_ts + pd.Timedelta(days=1)
    piece_starts, lengths, middles, months = daily_steps(start_ts, end)
    keep = lengths > 1e-9
    piece_starts, lengths, middles, months = piece_starts[keep], lengths[keep], middles[keep], months[keep]
    position = np.clip(np.searchsorted(piece_starts, dates.to_numpy(dtype="datetime64[ns]"), side="right") - 1,
                       0, len(lengths) - 1)
    counts = np.bincount(position, minlength=len(lengths)).astype(np.float64)
    years = np.asarray((pd.DatetimeIndex(middles) - as_of_ts) / pd.Timedelta(days=_YEAR), dtype=np.float64)
    span = float(lengths.sum())

    fits = {}

    def fit(terms):
        key = tuple(sorted(terms))
        if key not in fits:
            fits[key] = _poisson_fit(_design(years, months, key), counts, lengths)
        return fits[key]

    def test(smaller, larger, df):
        big = fit(larger)
        statistic = max(0.0, 2.0 * (big[2] - fit(smaller)[2])) / max(1.0, big[3])
        return {"statistic": statistic, "df": float(df), "p_value": float(special.chdtrc(df, statistic))}

    allowed = [name for name, need in (("trend", _TREND_DAYS), ("month", _MONTH_DAYS_NEEDED)) if span >= need]
    degrees = {"trend": 1, "month": 11}
    tests = {}
    terms = ()
    if allowed:
        tried = {name: test((), (name,), degrees[name]) for name in allowed}
        first = min(allowed, key=lambda name: tried[name]["p_value"])
        for name in allowed:
            tests[name] = dict(tried[name], kept=False)
        if tried[first]["p_value"] < ARRIVAL_TEST_LEVEL:
            terms = (first,)
            tests[first]["kept"] = True
            other = [name for name in allowed if name != first]
            if other and span >= _BOTH_DAYS:
                second = test((first,), (first, other[0]), degrees[other[0]])
                tests[other[0]] = dict(second, kept=second["p_value"] < ARRIVAL_TEST_LEVEL)
                if tests[other[0]]["kept"]:
                    terms = tuple(name for name in ("trend", "month") if name in (first, other[0]))
    coefficients, covariance, _, dispersion = fit(terms)
    if dispersion > 1.0:
        covariance = covariance * dispersion
    result = ArrivalFit(coefficients=coefficients, covariance=covariance, terms=terms, dispersion=dispersion,
                        as_of=as_of_ts, days_observed=span, new_customers=int(counts.sum()), tests=tests)
    return _with_words(result)


def _with_words(fit: ArrivalFit) -> ArrivalFit:
    per_month = float(np.exp(fit.coefficients[0])) * _YEAR / 12
    if "month" in fit.terms:
        per_month = per_month * float(np.exp(np.append(fit.coefficients[-11:], 0.0)) @ MONTH_DAYS
                                      / MONTH_DAYS.sum())
    parts = [f"New customers: about {per_month:,.0f} a month at the current rate"]
    if "trend" in fit.terms:
        parts.append(f"{'growing' if fit.growth_per_year >= 0 else 'shrinking'} by "
                     f"{abs(100 * fit.growth_per_year):.0f}% a year ({p_value_words(fit.tests['trend']['p_value'])})")
    elif "trend" in fit.tests:
        parts.append(f"no clear growth or decline ({p_value_words(fit.tests['trend']['p_value'])})")
    if "month" in fit.terms:
        index = fit.month_index
        parts.append(f"a month-of-year pattern ({p_value_words(fit.tests['month']['p_value'])}; most in "
                     f"{MONTH_NAMES[int(np.argmax(index))]}, fewest in {MONTH_NAMES[int(np.argmin(index))]})")
    elif "month" in fit.tests:
        parts.append(f"no clear month-of-year pattern ({p_value_words(fit.tests['month']['p_value'])})")
    else:
        parts.append("a month-of-year pattern needs a full year of orders")
    return replace(fit, words="; ".join(parts) + ".")
