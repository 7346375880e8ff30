"""Shops simulated with known truth, for the outlook's tests (whole revenue, seasons, drop-out).

One function, :func:`simulate_shop`, tells the story of a shop day by day from
its settings, each a knob whose true value the tests know:

* New customers arrive as a Poisson process whose rate has a month-of-year
  pattern (``arrival_weights``) and grows or shrinks by ``growth`` a year.
* Every customer orders on their first day. While active, a customer orders
  at a Poisson rate lambda ~ Gamma(r, rate alpha) measured on the shop's
  seasonal clock: a calendar day of month m counts ``clock_weights[m]``
  clock days, so busy months pack orders closer together.
* After each repeat order a customer stops for good with chance p ~ Beta(a, b)
  (the BG/NBD story of Fader, Hardie and Lee 2005); with
  ``drop_after_first=True`` the same coin is also thrown right after the
  first order (the variant of Batislam, Denizel and Filiztekin 2007 and
  Hoppe and Wagner 2007).
* Optionally customers slow down: their rate is multiplied by
  ``exp(-slowdown x years since their first order)``.
* Order values: a lognormal level per customer times lognormal noise per order.

Nothing here uses the product's code, so the tests compare the product with
the story, not with itself.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

# Month weights of a plant shop's year (busy spring), as in tests/test_frequency.py.
SPRING_WEIGHTS = np.array([0.6, 0.7, 1.3, 1.6, 1.4, 1.0, 0.8, 0.8, 1.0, 1.1, 0.8, 0.9])
FLAT = np.ones(12)


def _daily_clock(start, days, weights):
    """Calendar days 0..days and the seasonal clock at each day edge (weights scaled to average 1 a year)."""
    grid = pd.date_range(start, periods=days + 1, freq="D")
    weights = np.asarray(weights, dtype=np.float64)
    month_days = np.array([31.0, 28.2425, 31.0, 30.0, 31.0, 30.0, 31.0, 31.0, 30.0, 31.0, 30.0, 31.0])
    weights = weights / (weights @ month_days / month_days.sum())
    per_day = weights[grid[:-1].month - 1]
    return grid, per_day, np.concatenate([[0.0], np.cumsum(per_day)])


def simulate_shop(*, params=(1.2, 120.0, 1.2, 2.8), arrivals_per_day=4.0, days=3 * 365, start="2023-01-01",
                  clock_weights=FLAT, arrival_weights=None, growth=0.0, drop_after_first=False, slowdown=0.0,
                  level_median=50.0, level_sd=0.5, order_sd=0.4, seed=0) -> pd.DataFrame:
    """Orders of a simulated shop: ``customer``, ``order_id``, ``order_date``, ``order_value``.

    Parameters
    ----------
    params : (r, alpha, a, b)
        The order-rate and stop-chance spreads; alpha in days of the seasonal clock.
    arrivals_per_day : float
        New customers a day on average over the first year (before the month pattern).
    days : int
        Length of the history in calendar days from ``start``.
    clock_weights : 12 floats
        How busy each calendar month is for repeat orders (scaled to average 1).
    arrival_weights : 12 floats, optional
        The same for new customers' arrivals; default ``clock_weights``.
    growth : float
        Yearly growth of the arrival rate (0.4 = 40% more new customers a year).
    drop_after_first : bool
        Whether a customer may stop right after the first order.
    slowdown : float
        Yearly decay rate of every customer's ordering rate (0 = the model's story).
    seed : int
        Seed of numpy's generator.
    """
    rng = np.random.default_rng(seed)
    r, alpha, a, b = params
    arrival_weights = clock_weights if arrival_weights is None else arrival_weights
    grid, arrival_per_day, _ = _daily_clock(start, days, arrival_weights)
    _, _, clock = _daily_clock(start, days, clock_weights)
    day_index = np.arange(days)
    expected = arrivals_per_day * arrival_per_day * np.exp(np.log1p(growth) * (day_index + 0.5) / 365.25)
    counts = rng.poisson(expected)
    first_day = np.repeat(day_index, counts) + rng.random(counts.sum())
    n = len(first_day)
    rate = rng.gamma(r, 1.0 / alpha, n)
    stop = rng.beta(a, b, n)
    level = np.exp(rng.normal(math.log(level_median), level_sd, n))
    tau = np.interp(first_day, np.arange(days + 1), clock)
    who, when = [np.arange(n)], [first_day]
    active = np.ones(n, dtype=bool)
    if drop_after_first:
        active &= rng.random(n) >= stop
    end_tau = clock[-1]
    while active.any():
        if slowdown > 0:
            # Thinning: propose at the starting rate, keep with the decayed share.
            tau = tau + rng.exponential(1.0 / rate)
            calendar = np.interp(np.minimum(tau, end_tau), clock, np.arange(days + 1))
            keep = rng.random(n) < np.exp(-slowdown * (calendar - first_day) / 365.25)
            active &= tau < end_tau
            placed = active & keep
        else:
            tau = tau + rng.exponential(1.0 / rate)
            active &= tau < end_tau
            placed = active
        who.append(np.flatnonzero(placed))
        when.append(np.interp(tau[placed], clock, np.arange(days + 1)))
        active &= ~placed | (rng.random(n) >= stop)
    who, when = np.concatenate(who), np.concatenate(when)
    order = np.lexsort((who, when))
    who, when = who[order], when[order]
    values = np.round(level[who] * np.exp(rng.normal(0.0, order_sd, len(who))), 2)
    return pd.DataFrame({
        "customer": [f"C-{i:06d}" for i in who],
        "order_id": [f"S-{k:07d}" for k in range(len(who))],
        "order_date": pd.Timestamp(start) + pd.to_timedelta(np.round(when * 1440), unit="min"),
        "order_value": np.maximum(values, 0.01),
    })


def window_revenue(orders: pd.DataFrame, cutoff, days) -> dict:
    """Revenue from the cut-off up to ``days`` later: all, from customers known before, from new ones."""
    cutoff = pd.Timestamp(cutoff)
    end = cutoff + pd.Timedelta(days=days)
    dates = orders["order_date"]
    known = set(orders.loc[dates < cutoff, "customer"])
    window = orders[(dates >= cutoff) & (dates < end)]
    existing = float(window.loc[window["customer"].isin(known), "order_value"].sum())
    total = float(window["order_value"].sum())
    return {"all": total, "existing": existing, "new": total - existing}
