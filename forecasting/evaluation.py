"""Evaluation: how much better than plain averages each method forecasts, and whether it is honest.

In: the cleaned orders table (one row per order, see ``forecasting.reading``).
Out: an :class:`Evaluation` with, for every method x spread model,

* leave-one-out: every order of every customer with at least two orders is held out in turn,
  everything is refitted on the remaining orders (spread, the spread between customers, the
  amount of shrinkage, the centre, the return to money) by the fit's exact twin
  (:func:`forecasting.forecasts.forecast_left_out`), and the customer's forecast is compared
  with the order that was held out;
* next-order backtest: fit on the orders before a cut-off date and score the forecast against
  each customer's first order after it;
* for each: the error cut against plain customer averages per held-out order and with each
  customer counted once, a bootstrap interval over customers, the money bias (the sum of the
  forecasts against the sum of the orders they forecast), the share of held-out orders inside
  the next-order range, the share of true means the expected-value range would hold as implied
  by the squared errors (:func:`implied_coverage`), and whether all of these are within the
  tolerances of :data:`forecasting.options.AUTO_TOLERANCE`;
* the gain by number of past orders and by segment;
* the automatic choice (:mod:`forecasting.selection`), with its gain measured on customers it
  was not chosen on.

The leave-one-out is fast: nothing is refitted N times (:mod:`forecasting.holdout` updates the
shop-wide sums in O(1) or O(K) per held-out order). Methods whose registry entry says
``exact_left_out=False`` keep one thing from the fit on all orders (gamma-gamma its three
parameters, the cross-validated methods their multiplier); their rows say so (``exact``).
A customer's segment is the one from all their orders.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from statistics import NormalDist

import numpy as np
import pandas as pd

from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError
from forecasting.forecasts import ShopFits, forecast_left_out, shop_fits
from forecasting.holdout import held_out_orders, thread_pool
from forecasting.options import AUTO_TOLERANCE, CHECK_CUSTOMERS, METHODS, OWN_SPREAD, SPREAD_MODELS, caution_of

#: Methods whose leave-one-out refits everything exactly, and the spread models (all exact).
EXACT_METHODS = tuple(name for name, m in METHODS.items() if m.exact_left_out)
EXACT_VARIANCES = tuple(SPREAD_MODELS)
#: The spread reported for gamma-gamma, which has its own.
GAMMA_MODEL = OWN_SPREAD
#: Methods the automatic choice may pick (the registry's ``in_auto``).
AUTO_METHODS = tuple(name for name, m in METHODS.items() if m.in_auto)
AUTO_VARIANCES = tuple(name for name, v in SPREAD_MODELS.items() if v.in_auto)

# Bins of "orders known before the forecast" used in the breakdown tables.
PAST_ORDER_BINS = ((1, 1, "1"), (2, 2, "2"), (3, 3, "3"), (4, 5, "4-5"), (6, 10, "6-10"), (11, np.inf, "11+"))
# The bands whose calibration is checked one by one.
CALIBRATION_BANDS = ((1, 1, "1"), (2, 3, "2-3"), (4, np.inf, "4+"))

RESULT_COLUMNS = ["method", "variance", "sse", "error_reduction_pct", "ci_low", "ci_high", "coverage",
                  "error_reduction_per_customer_pct", "money_bias_pct", "money_bias_se", "coverage_se",
                  "expected_coverage", "expected_coverage_se", "calibrated", "calibration_note", "exact",
                  "in_auto", "caution"]


# ---------------------------------------------------------------------------
# Scores of one evaluation: per scored order, then per customer
# ---------------------------------------------------------------------------


@dataclass
class Scored:
    """Forecasts of the held-out (or backtest) orders for every pair, and their baseline."""

    kind: str
    pairs: list
    customer: np.ndarray  # customer position of every scored order
    past_orders: np.ndarray
    segment: np.ndarray | None
    value: np.ndarray  # the scored orders
    plain: np.ndarray  # plain customer averages (the baseline)
    forecasts: list  # per pair: expected, next_low, next_high, check_centre, check_estimate_var, check_order_var
    level: float = 0.90
    next_level: float = 0.80


@dataclass
class CustomerScores:
    """Sums per scored customer of one evaluation: everything the summaries need.

    A customer's scored orders share their number of past orders (n - 1 in leave-one-out, the
    orders before the cut-off in the backtest) and their segment, so every breakdown and every
    standard error (customers independent) comes from these sums. A cluster computes them where
    the orders are and the tables are the same.
    """

    kind: str
    pairs: list
    customer: np.ndarray  # position of each scored customer (T_s)
    past_orders: np.ndarray
    segment: np.ndarray | None
    count: np.ndarray  # scored orders per customer
    value: np.ndarray  # their sum
    plain_sq: np.ndarray  # squared errors of plain averages, summed
    sq: list  # per pair: squared errors, summed
    diff: list  # per pair: sum of (forecast - order)
    inside: list  # per pair: orders inside the next-order range
    excess: list  # per pair: sum of (log order - centre)^2 - order spread
    claimed: list  # per pair: sum of the forecast's own error variance
    level: float = 0.90
    next_level: float = 0.80
    cache: dict = field(default_factory=dict, repr=False)  # bootstrap draws, computed once

    def subset(self, keep):
        """The same sums for some customers only."""
        pick = lambda values: [v[keep] for v in values]  # noqa: E731
        return CustomerScores(self.kind, self.pairs, self.customer[keep], self.past_orders[keep],
                              None if self.segment is None else self.segment[keep], self.count[keep],
                              self.value[keep], self.plain_sq[keep], pick(self.sq), pick(self.diff),
                              pick(self.inside), pick(self.excess), pick(self.claimed), self.level, self.next_level)


def _scored_customers(positions):
    """(customers scored, in the order of the statistics table; each scored order's place among them)."""
    first, codes = np.unique(np.asarray(positions, dtype=np.int64), return_inverse=True)
    return first, codes.reshape(-1)


def _pair_sums(codes, T, x, log_x, f):
    """Per customer: squared errors, differences, orders inside the next-order range, the log-scale
    excess and the claimed variance of one pair's forecasts (:class:`CustomerScores`)."""
    def total(values):
        return np.bincount(codes, weights=values, minlength=T)

    # A model with no finite spread for some customers (gamma-gamma with too few orders) has no
    # log-scale description there: those orders are left out of the implied coverage.
    with np.errstate(invalid="ignore"):
        expected = np.asarray(f.expected, dtype=np.float64)
        error = expected - x
        bounds = getattr(f, "next_log", None)
        if bounds is not None:  # the range is symmetric on the log scale: no return to money needed
            inside = np.abs(log_x - bounds[0]) <= bounds[1]
        else:
            inside = (x >= np.asarray(f.next_low)) & (x <= np.asarray(f.next_high))
        spread = (log_x - np.asarray(f.check_centre)) ** 2 - np.asarray(f.check_order_var)
        own = np.asarray(f.check_estimate_var, dtype=np.float64) + np.zeros_like(x)
        described = np.isfinite(spread) & np.isfinite(own)
        return (total(error * error), total(error), total(inside.astype(np.float64)),
                total(np.where(described, spread, 0.0)), total(np.where(described, own, 0.0)))


def _log_values(x):
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.log(x)


def customer_scores(scored: Scored) -> CustomerScores:
    """Per-customer sums of a :class:`Scored` evaluation (customers in the order of the statistics)."""
    first, codes = _scored_customers(scored.customer)
    T = len(first)
    at = np.zeros(T, dtype=np.int64)
    at[codes] = np.arange(len(codes))  # one scored order of each customer (any: they share past and segment)
    x = scored.value
    log_x = _log_values(x)
    sums = [_pair_sums(codes, T, x, log_x, f) for f in scored.forecasts]
    count = np.bincount(codes, minlength=T).astype(np.float64)
    value = np.bincount(codes, weights=x, minlength=T)
    plain_sq = np.bincount(codes, weights=(scored.plain - x) ** 2, minlength=T)
    return CustomerScores(scored.kind, list(scored.pairs), first, scored.past_orders[at],
                          None if scored.segment is None else scored.segment[at], count, value, plain_sq,
                          *[[part[i] for part in sums] for i in range(5)], scored.level, scored.next_level)


def left_out_scores(fits: ShopFits, pairs, *, level=0.90, next_level=0.80, limit=CHECK_CUSTOMERS) -> CustomerScores:
    """Leave-one-out :class:`CustomerScores` of every pair, each pair's computed once per dataset.

    The held-out bookkeeping (:meth:`forecasting.forecasts.ShopFits.held`) and each pair's sums
    are kept with the shared fits, so the automatic choice, the evaluation and the forecasts of
    one shop never compute a pair twice. The orders held out are those of at most ``limit``
    repeat customers: of the whole shop, or of the sample shop the check runs on
    (:meth:`forecasting.forecasts.ShopFits.checked`), each forecast refitted on all the other
    orders of that shop.
    """
    fits = fits.checked(limit)
    held = fits.held()

    def base():
        first, codes = _scored_customers(held.customer)
        T = len(first)
        at = np.zeros(T, dtype=np.int64)
        at[codes] = np.arange(len(codes))
        x = held.value
        segment = fits.stats["segment"].to_numpy()[first] if "segment" in fits.stats.columns else None
        return {"first": first, "codes": codes, "T": T, "log_x": _log_values(x),
                "past": held.past_orders[at], "segment": segment,
                "count": np.bincount(codes, minlength=T).astype(np.float64),
                "value": np.bincount(codes, weights=x, minlength=T),
                "plain_sq": np.bincount(codes, weights=(held.money.mean_after - x) ** 2, minlength=T)}

    common = held.cached("score base", base)

    def pair(method, variance):
        forecast = forecast_left_out(held, method, variance, level=level, next_level=next_level, fits=fits)
        return _pair_sums(common["codes"], common["T"], held.value, common["log_x"], forecast)

    sums = [held.cached(("pair scores", method, variance, float(level), float(next_level)),
                        lambda m=method, v=variance: pair(m, v)) for method, variance in pairs]
    return CustomerScores("leave-one-out", list(pairs), common["first"], common["past"], common["segment"],
                          common["count"], common["value"], common["plain_sq"],
                          *[[part[i] for part in sums] for i in range(5)], level, next_level)


def combine_scores(parts) -> CustomerScores:
    """Per-customer sums computed in parts (on a cluster, each part holds whole customers), joined
    and put in the order of the statistics table."""
    parts = [part for part in parts if part is not None]
    first = parts[0]
    order = np.argsort(np.concatenate([p.customer for p in parts]), kind="stable")
    join = lambda name: np.concatenate([getattr(p, name) for p in parts])[order]  # noqa: E731
    listed = lambda name: [np.concatenate([getattr(p, name)[i] for p in parts])[order]  # noqa: E731
                           for i in range(len(first.pairs))]
    segment = None if first.segment is None else join("segment")
    return CustomerScores(first.kind, first.pairs, join("customer"), join("past_orders"), segment, join("count"),
                          join("value"), join("plain_sq"), listed("sq"), listed("diff"), listed("inside"),
                          listed("excess"), listed("claimed"), first.level, first.next_level)


def _reduction_pct(sse_plain, sse_method):
    """100 (SSE_plain - SSE_method) / SSE_plain; positive = better than plain averages."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return 100.0 * (np.float64(sse_plain) - sse_method) / np.float64(sse_plain)


def _ratio_and_se(numerator, denominator):
    """sum a / sum b over customers and its standard error (customers independent; delta method)."""
    a, b = np.sum(numerator), np.sum(denominator)
    if not b > 0:
        return float("nan"), float("nan")
    ratio = a / b
    return float(ratio), float(np.sqrt(np.sum((numerator - ratio * denominator) ** 2)) / b)


def _grouped_ratios(numerator, denominator, groups, size):
    """:func:`_ratio_and_se` within each group (codes 0..size-1) and over all customers, from two
    passes of ``numpy.bincount``: ((ratio, se) per group, (ratio, se) overall)."""
    a = np.bincount(groups, weights=numerator, minlength=size)
    b = np.bincount(groups, weights=denominator, minlength=size)
    total_a, total_b = float(a.sum()), float(b.sum())
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(b > 0, a / b, np.nan)
        overall = total_a / total_b if total_b > 0 else np.nan
        residual = np.bincount(groups, weights=(numerator - np.nan_to_num(ratio)[groups] * denominator) ** 2,
                               minlength=size)
        se = np.where(b > 0, np.sqrt(residual) / b, np.nan)
        overall_se = (float(np.sqrt(np.sum((numerator - overall * denominator) ** 2)) / total_b)
                      if total_b > 0 else np.nan)
    return list(zip(ratio, se)), (overall, overall_se)


def implied_coverage(excess, claimed, level):
    """The share of true means an expected-value range would hold, implied by the errors.

    Parameters
    ----------
    excess : array
        Per customer: sum over scored orders x of (log x - c)^2 - w, c the forecast's centre
        on the log scale and w the spread of one order it claims.
    claimed : array
        Per customer: sum of the variance of the forecast's own error it claims.
    level : float
        The expected-value range's level.

    Returns
    -------
    coverage, standard_error : float

    Notes
    -----
    A held-out order differs from the forecast by the forecast's error plus the order's own
    spread, so r = sum excess / sum claimed estimates how many times larger the forecast's
    squared error is than its range assumes. With normal errors a range of half-width
    z sqrt(v) then holds 2 Phi(z / sqrt(r)) - 1 of the true means. True means are never seen in
    a shop's own data, so this is implied by the errors, not counted; the calibration suite
    (tests/test_calibration.py) counts it on shops with known truth. The standard error is the
    delta method's, customers independent.
    """
    ratio, se = _ratio_and_se(np.asarray(excess, dtype=np.float64), np.asarray(claimed, dtype=np.float64))
    return _coverage_from_ratio(ratio, se, level)


def _coverage_from_ratio(ratio, se, level):
    """2 Phi(z / sqrt(r)) - 1 and its delta-method standard error (see :func:`implied_coverage`)."""
    z = NormalDist().inv_cdf(0.5 + level / 2.0)
    if not np.isfinite(ratio):
        return float("nan"), float("nan")
    if ratio <= 0:
        return 1.0, float("nan")
    standard = NormalDist()
    coverage = 2.0 * standard.cdf(z / np.sqrt(ratio)) - 1.0
    slope = standard.pdf(z / np.sqrt(ratio)) * z * ratio ** -1.5
    return float(coverage), float(slope * se)


def judge_calibration(measures, *, level, next_level, tolerance=AUTO_TOLERANCE):
    """Whether money bias and coverage are within tolerance, and what missed, in words.

    Parameters
    ----------
    measures : dict
        ``"all"`` and, per band of past orders, the calibration measures (money bias, the
        next-order range's coverage, the expected-value range's implied coverage, their
        standard errors and the number of orders).

    Returns
    -------
    ok : bool
    note : str
    """
    misses = []
    overall = measures["all"]
    bias, bias_se = overall["money_bias_pct"], overall["money_bias_se"]
    if np.isfinite(bias) and abs(bias) > tolerance.money_pct + tolerance.noise_se * np.nan_to_num(bias_se):
        misses.append(f"forecasts add up to {bias:+.1f}% of the orders they forecast")
    for band, values in measures.items():
        if band != "all" and values["orders"] < tolerance.min_orders_per_band:
            continue
        where = "" if band == "all" else f" for customers with {band} past orders"
        for name, target, words in (("coverage", next_level, "next-order range held"),
                                    ("expected_coverage", level, "expected-value range would hold")):
            value, se = values[name], values[name + "_se"]
            if not np.isfinite(value):
                continue
            allowed = tolerance.coverage_points / 100.0 + tolerance.noise_se * np.nan_to_num(se)
            if abs(value - target) > allowed:
                misses.append(f"the {target:.0%} {words} {value:.0%}{where}")
    return not misses, "; ".join(misses)


def _band_of(past):
    labels = np.empty(len(past), dtype=object)
    for low, high, label in CALIBRATION_BANDS:
        labels[(past >= low) & (past <= high)] = label
    return labels


def _band_codes(past):
    """The calibration band of every scored customer as 0, 1, 2 (:data:`CALIBRATION_BANDS`)."""
    codes = np.zeros(len(past), dtype=np.int64)
    for index, (low, high, _) in enumerate(CALIBRATION_BANDS):
        codes[(past >= low) & (past <= high)] = index
    return codes


def calibration_measures(scores: CustomerScores, i, bands=None):
    """Calibration of pair i over all scored customers and in each band of past orders.

    Money bias, next-order coverage and implied expected coverage with their standard errors
    (as :func:`_ratio_and_se` and :func:`implied_coverage`), for all customers and for each
    band of :data:`CALIBRATION_BANDS` that has customers, each from one pass of
    ``numpy.bincount`` over the bands. ``bands`` is :func:`_band_codes` of the scores' past
    orders, when already made.
    """
    bands = _band_codes(scores.past_orders) if bands is None else bands
    size = len(CALIBRATION_BANDS)
    count = np.bincount(bands, weights=scores.count, minlength=size)
    bias, bias_all = _grouped_ratios(scores.diff[i], scores.value, bands, size)
    coverage, coverage_all = _grouped_ratios(scores.inside[i], scores.count, bands, size)
    implied, implied_all = _grouped_ratios(scores.excess[i], scores.claimed[i], bands, size)

    def measures(bias_pair, coverage_pair, implied_pair, orders):
        expected, expected_se = _coverage_from_ratio(implied_pair[0], implied_pair[1], scores.level)
        return {"money_bias_pct": 100.0 * float(bias_pair[0]), "money_bias_se": 100.0 * float(bias_pair[1]),
                "coverage": float(coverage_pair[0]), "coverage_se": float(coverage_pair[1]),
                "expected_coverage": expected, "expected_coverage_se": expected_se, "orders": int(orders)}

    out = {"all": measures(bias_all, coverage_all, implied_all, count.sum())}
    present = np.bincount(bands, minlength=size) > 0
    for index, (_, _, label) in enumerate(CALIBRATION_BANDS):
        if present[index]:
            out[label] = measures(bias[index], coverage[index], implied[index], count[index])
    return out


# ---------------------------------------------------------------------------
# Bootstrap, breakdowns
# ---------------------------------------------------------------------------


#: Resamples whose counts are drawn and applied at once (bounds memory; no effect on the draws).
BOOTSTRAP_BLOCK = 32


def bootstrap_sums(per_customer, *, resamples, seed):
    """Column sums of ``per_customer`` (customers x columns) in every bootstrap resample of customers.

    Parameters
    ----------
    per_customer : numpy.ndarray
        One row per customer (T rows), one column per quantity to add up.
    resamples : int
        R, the number of resamples.
    seed : int

    Returns
    -------
    numpy.ndarray
        R x columns: row r is sum_t c_rt per_customer[t], with c_r the counts of resample r.

    Notes
    -----
    Resample r draws T customers with replacement: the r-th run of T draws of
    ``numpy.random.default_rng(seed).integers(0, T)`` (64-bit integers, in order), so the
    resamples are a documented function of the seed, the number of customers and their order
    (the order of the statistics table), whatever the block size. The draws are turned into a
    weight matrix of multinomial counts (``numpy.bincount`` of a block of resamples at once,
    much faster than ``Generator.multinomial`` for many customers) and applied to every column
    in one matrix product, so every method's resampled error comes from the same customers
    (paired comparisons).
    """
    table = np.asarray(per_customer, dtype=np.float64)
    T = table.shape[0]
    rng = np.random.default_rng(seed)
    block = int(max(1, min(resamples, BOOTSTRAP_BLOCK, (1 << 22) // max(T, 1))))
    out = np.empty((resamples, table.shape[1]))

    def apply(picks, start):
        # Counts of each resample's draws: the weight matrix, applied to every column at once.
        weights = np.empty((picks.shape[0], T))
        for row in range(picks.shape[0]):
            weights[row] = np.bincount(picks[row], minlength=T)
        out[start:start + picks.shape[0]] = weights @ table

    # The draws come from one generator in order (this thread); the counting and the matrix
    # product of a block run in a worker thread meanwhile (they release the interpreter lock).
    pool = thread_pool() if resamples > block else None
    pending = None
    done = 0
    while done < resamples:
        size = min(block, resamples - done)
        picks = rng.integers(0, T, size=(size, T))
        if pool is None:
            apply(picks, done)
        else:
            if pending is not None:
                pending.result()
            pending = pool.submit(apply, picks, done)
        done += size
    if pending is not None:
        pending.result()
    return out


def _bootstrap_reductions(per_customer_plain, per_customer_methods, *, resamples, seed):
    """Error reduction of every method in every bootstrap resample of customers (resamples x methods),
    from :func:`bootstrap_sums` of the plain averages' and every method's squared errors."""
    sums = bootstrap_sums(np.column_stack([per_customer_plain, per_customer_methods]), resamples=resamples,
                          seed=seed)
    return _reduction_pct(sums[:, :1], sums[:, 1:])


def _scores_reductions(scores, *, resamples, seed):
    """:func:`_bootstrap_reductions` of the scores' pairs, computed once per scores (the intervals of
    the results table and the paired margins share them)."""
    key = ("bootstrap", int(resamples), int(seed))
    if key not in scores.cache:
        scores.cache[key] = _bootstrap_reductions(scores.plain_sq, _methods_matrix(scores), resamples=resamples,
                                                  seed=seed)
    return scores.cache[key]


def _percentile_interval(draws, level=0.95):
    tail = (1.0 - level) / 2.0 * 100.0
    with warnings.catch_warnings():
        # Every resample undefined (plain averages were exact): the interval is NaN.
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanpercentile(draws, tail, axis=0), np.nanpercentile(draws, 100.0 - tail, axis=0)


def _bootstrap_intervals(per_customer_plain, per_customer_methods, *, resamples, seed, level=0.95, draws=None):
    """Percentile interval of every error reduction, resampling customers."""
    n_methods = per_customer_methods.shape[1]
    if resamples <= 0 or len(per_customer_plain) < 2:
        nan = np.full(n_methods, np.nan)
        return nan, nan
    if draws is None:
        draws = _bootstrap_reductions(per_customer_plain, per_customer_methods, resamples=resamples, seed=seed)
    return _percentile_interval(draws, level)


def _methods_matrix(scores):
    return np.column_stack(scores.sq) if scores.sq else np.zeros((len(scores.plain_sq), 0))


def _paired_margins(scores: CustomerScores, chosen_pair, *, resamples, seed, level=0.95):
    """How far the chosen pair beats each other pair, with a paired bootstrap interval.

    The margin is in points of error reduction against plain averages (chosen minus other).
    Both come from the same resampled customers, so the interval is that of the difference
    itself, much narrower than the two separate intervals suggest.
    """
    columns = ["method", "variance", "margin_pct", "margin_low", "margin_high"]
    if chosen_pair not in scores.pairs:
        return pd.DataFrame(columns=columns)
    sse_plain = float(scores.plain_sq.sum())
    point = np.array([_reduction_pct(sse_plain, float(sq.sum())) for sq in scores.sq])
    best = scores.pairs.index(chosen_pair)
    # Plain averages that are exact (every order alike) leave every reduction undefined: NaN margins.
    with np.errstate(invalid="ignore"):
        if resamples > 0 and len(scores.plain_sq) >= 2:
            draws = _scores_reductions(scores, resamples=resamples, seed=seed)
            low, high = _percentile_interval(draws[:, [best]] - draws, level)
        else:
            low = high = np.full(len(point), np.nan)
        rows = [{"method": m, "variance": v, "margin_pct": float(point[best] - point[i]),
                 "margin_low": float(low[i]), "margin_high": float(high[i])}
                for i, (m, v) in enumerate(scores.pairs) if i != best]
    return pd.DataFrame(rows, columns=columns)


def _past_order_labels(past):
    labels = np.empty(len(past), dtype=object)
    for low, high, label in PAST_ORDER_BINS:
        labels[(past >= low) & (past <= high)] = label
    return labels


def _breakdown(scores: CustomerScores, group_name, groups, order=None):
    """SSE, error reduction, money bias and next-order coverage within each group of customers."""
    rows = []
    keys = order if order is not None else sorted(pd.unique(groups))
    for key in keys:
        mask = groups == key
        count = int(scores.count[mask].sum())
        if count == 0:
            continue
        sse_plain = float(scores.plain_sq[mask].sum())
        value = float(scores.value[mask].sum())
        for i, (method, variance) in enumerate(scores.pairs):
            sse = float(scores.sq[i][mask].sum())
            rows.append({
                "evaluation": scores.kind, "method": method, "variance": variance, group_name: key,
                "held_out": count, "sse": sse, "sse_plain": sse_plain,
                "error_reduction_pct": _reduction_pct(sse_plain, sse),
                "money_bias_pct": 100.0 * float(scores.diff[i][mask].sum()) / value if value > 0 else np.nan,
                "coverage": float(scores.inside[i][mask].sum()) / count,
            })
    return rows


def _breakdowns(scores: CustomerScores):
    past = _past_order_labels(scores.past_orders)
    by_past = _breakdown(scores, "past_orders", past, order=[label for _, _, label in PAST_ORDER_BINS])
    by_segment = []
    if scores.segment is not None:
        by_segment = _breakdown(scores, "segment", scores.segment.astype(str))
    return by_past, by_segment


def summarise(scores, *, resamples=0, seed=0, tolerance=AUTO_TOLERANCE, keep=None):
    """Results table (one row per method x spread model) with calibration and bootstrap intervals.

    ``scores`` is a :class:`CustomerScores` (or a :class:`Scored`, summed per customer first);
    ``keep`` restricts it to some customers.
    """
    if isinstance(scores, Scored):
        scores = customer_scores(scores)
    if keep is not None:
        scores = scores.subset(keep)
    draws = None
    if resamples > 0 and len(scores.plain_sq) >= 2:
        draws = _scores_reductions(scores, resamples=resamples, seed=seed)
    ci_low, ci_high = _bootstrap_intervals(scores.plain_sq, _methods_matrix(scores), resamples=resamples,
                                           seed=seed, draws=draws)
    counts = np.maximum(scores.count, 1.0)
    mean_plain = float(np.sum(scores.plain_sq / counts))
    sse_plain = float(scores.plain_sq.sum())
    rows = []
    bands = _band_codes(scores.past_orders)
    for i, (method, variance) in enumerate(scores.pairs):
        sse = float(scores.sq[i].sum())
        scored_any = len(scores.count) > 0
        measures = calibration_measures(scores, i, bands)
        ok, note = judge_calibration(measures, level=scores.level, next_level=scores.next_level, tolerance=tolerance)
        overall = measures["all"]
        entry = METHODS[method]
        spread = SPREAD_MODELS.get(variance)
        rows.append({
            "method": method,
            "variance": variance,
            "sse": sse,
            "error_reduction_pct": _reduction_pct(sse_plain, sse) if scored_any else np.nan,
            "ci_low": float(ci_low[i]),
            "ci_high": float(ci_high[i]),
            "coverage": overall["coverage"],
            "error_reduction_per_customer_pct": (_reduction_pct(mean_plain, float(np.sum(scores.sq[i] / counts)))
                                                 if scored_any else np.nan),
            "money_bias_pct": overall["money_bias_pct"],
            "money_bias_se": overall["money_bias_se"],
            "coverage_se": overall["coverage_se"],
            "expected_coverage": overall["expected_coverage"],
            "expected_coverage_se": overall["expected_coverage_se"],
            "calibrated": bool(ok) and scored_any,
            "calibration_note": note,
            "exact": entry.exact_left_out,
            "in_auto": entry.in_auto and (spread is None or spread.in_auto),
            "caution": caution_of(method, variance),
        })
    return pd.DataFrame(rows, columns=RESULT_COLUMNS)


_summarise = summarise


# ---------------------------------------------------------------------------
# Which method x spread model pairs are evaluated
# ---------------------------------------------------------------------------


def _parse_names(value, allowed, option):
    """Accept None, a comma-separated string or a list; check every name."""
    if value is None:
        return None
    if isinstance(value, str):
        names = [part.strip() for part in value.split(",") if part.strip()]
    else:
        names = [str(part).strip() for part in value]
    if not names:
        raise OrderDataError(f"the list of {option} is empty", value=value, option=option,
                             fix=f"Give one or more of: {', '.join(allowed)}")
    for name in names:
        if name not in allowed:
            from forecasting.variance import RETIRED_SPREAD_MODELS

            if name in RETIRED_SPREAD_MODELS:
                raise OrderDataError(RETIRED_SPREAD_MODELS[name], value=name, option=option,
                                     fix=f"Choose from: {', '.join(allowed)}")
            raise OrderDataError(f"unknown name among the {option}", value=name, option=option,
                                 fix=f"Choose from: {', '.join(allowed)}")
    return list(dict.fromkeys(names))


def _combinations(methods, variances, *, stats=None, default_methods=None, default_variances=None):
    """(method, spread model) pairs to evaluate, in the product's order.

    gamma-gamma has its own spread and is evaluated once, as "gamma-model". By default every
    method is evaluated with every spread model; "mta-segments" only when the customers have
    segments.
    """
    chosen_methods = _parse_names(methods, tuple(METHODS), "methods")
    chosen_variances = _parse_names(variances, tuple(SPREAD_MODELS), "variances")
    has_segments = stats is not None and "segment" in stats.columns
    if chosen_methods is None:
        pool = default_methods if default_methods is not None else tuple(METHODS)
        chosen_methods = [m for m in pool if not METHODS[m].needs_segments or has_segments]
    if chosen_variances is None:
        chosen_variances = list(default_variances if default_variances is not None else SPREAD_MODELS)
    pairs = []
    for method in chosen_methods:
        entry = METHODS[method]
        if entry.needs_segments and not has_segments:
            raise OrderDataError("the 'mta-segments' method needs a segment for every customer", role="segment",
                                 fix="Name the column that holds each customer's segment, or leave mta-segments out")
        if entry.own_spread:
            pairs.append((method, OWN_SPREAD))
            continue
        pairs.extend((method, variance) for variance in chosen_variances)
    return pairs


# ---------------------------------------------------------------------------
# Leave-one-out and backtest
# ---------------------------------------------------------------------------


def _held_out_orders(orders, stats, **keywords):
    """The held-out bookkeeping (see :func:`forecasting.holdout.held_out_orders`)."""
    return held_out_orders(orders, stats, **keywords)


def _loo_predict(held, method, variance, *, level=0.90, next_level=0.80):
    """The leave-one-out forecasts of every held-out order (see
    :func:`forecasting.forecasts.forecast_left_out`)."""
    return forecast_left_out(held, method, variance, level=level, next_level=next_level)


def leave_one_out(orders, stats, pairs, *, level=0.90, next_level=0.80, held=None) -> Scored:
    """Forecast every held-out order with each pair, refitted without it (one forecast per held-out
    order and pair; :func:`left_out_scores` gives their per-customer sums without keeping them)."""
    held = held if held is not None else held_out_orders(orders, stats)
    forecasts = [forecast_left_out(held, method, variance, level=level, next_level=next_level)
                 for method, variance in pairs]
    segment = stats["segment"].to_numpy()[held.customer] if "segment" in stats.columns else None
    return Scored(kind="leave-one-out", pairs=list(pairs), customer=held.customer, past_orders=held.past_orders,
                  segment=segment, value=held.value, plain=held.money.mean_after, forecasts=forecasts, level=level,
                  next_level=next_level)


_leave_one_out = leave_one_out


def default_cutoff(order_dates):
    """The date that leaves the last 20% of orders on or after it.

    Parameters
    ----------
    order_dates : array-like of datetime64
        One date per order.

    Returns
    -------
    pandas.Timestamp
        Orders dated strictly before it are the past; orders on or after it are scored. With
        several orders on the cut-off date a little more than 20% of orders can fall after it.

    Examples
    --------
    >>> import pandas as pd
    >>> default_cutoff(pd.to_datetime([f"2025-01-{d:02d}" for d in range(1, 11)]))
    Timestamp('2025-01-09 00:00:00')
    """
    dates = np.sort(pd.to_datetime(pd.Series(order_dates)).to_numpy())
    if len(dates) == 0:
        raise OrderDataError("there are no orders to split by date")
    position = min(len(dates) - 1, int(np.floor(0.8 * len(dates))))
    return pd.Timestamp(dates[position])


class _BacktestForecast:
    """A forecast's columns at the scored customers, as the scores need them (for the backtest)."""

    def __init__(self, money, position, level, next_level):
        self.expected = money.expected[position]
        self.next_low = money.next_low[position]
        self.next_high = money.next_high[position]
        # The log-scale description of the next order from the ranges themselves.
        z_next = NormalDist().inv_cdf(0.5 + next_level / 2.0)
        z = NormalDist().inv_cdf(0.5 + level / 2.0)
        self.check_centre = (np.log(self.next_low) + np.log(self.next_high)) / 2.0
        next_var = ((np.log(self.next_high) - np.log(self.next_low)) / (2.0 * z_next)) ** 2
        low = money.expected_low[position]
        high = money.expected_high[position]
        with np.errstate(divide="ignore"):
            self.check_estimate_var = ((np.log(high) - np.log(low)) / (2.0 * z)) ** 2
        self.check_order_var = np.maximum(next_var - self.check_estimate_var, 0.0)


def _cutoff_of(orders, cutoff):
    if cutoff is None:
        return default_cutoff(orders["order_date"])
    try:
        return pd.Timestamp(cutoff)
    except (TypeError, ValueError):
        raise OrderDataError("the cut-off is not a date", value=cutoff, option="cutoff",
                             fix="Give the cut-off as YYYY-MM-DD")


def backtest_split(fits: ShopFits, cutoff, *, whole: ShopFits | None = None):
    """The orders before a cut-off, their shared fits and each customer's first order after it.

    Without a ``cutoff``, :func:`default_cutoff` of the orders of ``whole`` (default: ``fits``;
    the whole shop when ``fits`` are its check's sample shop).

    Returns ``(cutoff, split)`` where ``split`` is None when there is nothing to backtest (no
    dates, or no orders on one side), else a dict with the shared fits of the orders before
    the cut-off (``fits``, :class:`forecasting.forecasts.ShopFits`), the scored customers'
    ``position`` in their statistics and their first order after it (``value``), or a
    ``note``. Kept with ``fits``: a second evaluation of the same shop and cut-off reuses it.
    """
    orders = fits.orders
    if "order_date" not in orders.columns or orders["order_date"].isna().all():
        return cutoff, {"note": "no order dates, so no backtest"}
    if cutoff is None:
        cutoff = _default_cutoff(fits if whole is None else whole)
    else:
        cutoff = _cutoff_of(orders, cutoff)

    def split():
        dates = orders["order_date"]
        before_mask = (dates < cutoff).to_numpy()
        before = orders.loc[before_mask]
        if len(before) == 0 or before_mask.all():
            return {"note": f"no orders on one side of the cut-off {cutoff.date()}, so no backtest"}
        stats_before = customer_statistics(before)
        # Positions among the customers before the cut-off, from the positions among all customers
        # (both tables are sorted by customer).
        codes = fits.codes()
        inside = np.bincount(codes[before_mask], minlength=fits.customers) > 0
        if int(inside.sum()) != len(stats_before):
            raise RuntimeError("the customers before the cut-off do not match the customer statistics")
        position_of = np.cumsum(inside) - 1
        # Each customer's first order on or after the cut-off (the earliest date; the first in the
        # file among orders of that date).
        after = np.flatnonzero(~before_mask)
        after = after[np.argsort(dates.to_numpy()[after], kind="stable")]
        customers, first = np.unique(codes[after], return_index=True)
        keep = inside[customers]
        if not keep.any():
            return {"note": "no customer ordered both before and after the cut-off, so no backtest"}
        values = orders["order_value"].to_numpy(np.float64)
        return {"fits": ShopFits(stats_before, before, codes=position_of[codes[before_mask]]),
                "position": position_of[customers[keep]], "value": values[after[first[keep]]]}

    return cutoff, fits.cached(("backtest split", cutoff), split)


def _default_cutoff(fits: ShopFits):
    return fits.cached("default cutoff", lambda: default_cutoff(fits.orders["order_date"]))


def _backtest(fits: ShopFits, pairs, cutoff, *, level=0.90, next_level=0.80, limit=CHECK_CUSTOMERS):
    """Fit on orders before the cut-off; score each customer's first order after it (on the shop
    the shop's own check runs on, :meth:`forecasting.forecasts.ShopFits.checked`)."""
    cutoff, split = backtest_split(fits.checked(limit), cutoff, whole=fits)
    if "note" in split:
        return None, cutoff, [split["note"]]
    before, position, x = split["fits"], split["position"], split["value"]
    stats_before = before.stats
    plain = before.column("mean")[position]
    notes, forecasts, kept = [], [], []
    for method, variance in pairs:
        try:
            parts = before.parts(method, "classic" if variance == OWN_SPREAD else variance, level=level,
                                 next_level=next_level)
        except OrderDataError as problem:
            notes.append(f"backtest of {method} with {variance} variance skipped: {problem}")
            continue
        forecasts.append(_BacktestForecast(parts.money, position, level, next_level))
        kept.append((method, variance))
    segment = stats_before["segment"].to_numpy()[position] if "segment" in stats_before.columns else None
    scored = Scored(kind="backtest", pairs=kept, customer=position, past_orders=before.column("orders")[position],
                    segment=segment, value=x, plain=plain, forecasts=forecasts, level=level, next_level=next_level)
    return scored, cutoff, notes


# ---------------------------------------------------------------------------
# Public entry point
# ---------------------------------------------------------------------------


@dataclass
class Evaluation:
    """Everything :func:`evaluate_methods` found.

    Attributes
    ----------
    leave_one_out, backtest : pandas.DataFrame
        One row per method x spread model, columns ``RESULT_COLUMNS``: ``sse``,
        ``error_reduction_pct`` (per held-out order) with its bootstrap interval
        (``ci_low``, ``ci_high``), ``error_reduction_per_customer_pct`` (each customer
        counted once), ``money_bias_pct`` (sum of forecasts against sum of the orders they
        forecast) with its standard error, ``coverage`` (share inside the next-order range),
        ``expected_coverage`` (share of true means the expected-value range would hold,
        implied by the errors), ``calibrated`` and ``calibration_note`` (within the automatic
        choice's tolerances, and what missed), ``exact`` (the leave-one-out refits everything),
        ``in_auto`` and ``caution``. ``backtest`` is empty when there are no dates or no
        customer on both sides of the cut-off.
    by_past_orders, by_segment : pandas.DataFrame
        The same comparison within groups of scored orders (column ``evaluation`` says which).
    margins : pandas.DataFrame
        Leave-one-out: how many points of error reduction the chosen pair gains over each other
        pair, with a paired bootstrap 95% interval from the same resampled customers.
    chosen : dict
        The automatic choice (see :func:`forecasting.selection.choose_method`), with
        ``honest_gain_pct``: its error cut on customers it was not chosen on.
    orders, customers, held_out : int
        Orders and customers in the data; orders held out in leave-one-out.
    customers_checked : int
        Customers whose orders were held out (all repeat customers, or
        :data:`forecasting.options.CHECK_CUSTOMERS` of them drawn at random).
    """

    leave_one_out: pd.DataFrame
    backtest: pd.DataFrame
    by_past_orders: pd.DataFrame
    by_segment: pd.DataFrame
    chosen: dict
    orders: int
    customers: int
    held_out: int
    backtest_scored: int = 0
    cutoff: pd.Timestamp | None = None
    notes: list = field(default_factory=list)
    margins: pd.DataFrame = field(default_factory=pd.DataFrame)
    customers_checked: int = 0


def evaluate_methods(orders, *, methods=None, variances=None, cutoff=None, bootstrap=500, seed=0, level=0.90,
                     next_level=0.80, fits=None, check_customers=CHECK_CUSTOMERS):
    """Compare every method x spread model with plain customer averages, and check their calibration.

    Parameters
    ----------
    orders : pandas.DataFrame
        Cleaned orders: ``customer``, ``order_value`` and (for the backtest) ``order_date``;
        ``segment`` when present. Not changed.
    methods, variances : list of str or comma-separated str, optional
        What to evaluate (default: every method with every spread model).
    cutoff : date-like, optional
        Backtest cut-off (default :func:`default_cutoff`).
    bootstrap : int
        Resamples of customers for the 95% intervals (0 to skip).
    seed : int
        Seed of the bootstrap and of the split of customers that checks the automatic choice.
    level, next_level : float
        Levels of the expected-value and next-order ranges whose coverage is reported.
    fits : forecasting.forecasts.ShopFits, optional
        The shared fits of these orders (``ShopFits(customer_statistics(orders), orders)``):
        whatever the forecasts or an earlier check computed with them (spread models, the
        held-out bookkeeping, each pair's leave-one-out, the backtest's fits) is reused, and
        what this evaluation computes is kept for the next (see :class:`forecasting.shop.Shop`).
    check_customers : int or None
        Score the orders of at most this many customers, in the leave-one-out and in the
        backtest: a shop with more repeat customers is checked on a sample shop of that many
        (:data:`forecasting.options.CHECK_CUSTOMERS`, :meth:`forecasting.forecasts.ShopFits.checked`);
        None checks the whole shop.

    Returns
    -------
    Evaluation

    Notes
    -----
    ``error_reduction_pct = 100 (SSE_plain - SSE_method) / SSE_plain`` over held-out orders,
    which weighs a customer by their number of orders; ``error_reduction_per_customer_pct``
    averages each customer's squared errors first, so each customer counts once. The bootstrap
    resamples customers, not orders, because one customer's orders are not independent of
    each other; intervals are percentile intervals (Efron and Tibshirani 1993, ch. 13).

    References
    ----------
    Efron, B. and Tibshirani, R. (1993). *An Introduction to the Bootstrap*. Chapman & Hall.

    Examples
    --------
    >>> import pandas as pd
    >>> orders = pd.DataFrame({
    ...     "customer": ["a", "a", "a", "b", "b", "c", "c", "c", "d", "d"],
    ...     "order_value": [20.0, 30.0, 25.0, 80.0, 60.0, 40.0, 45.0, 35.0, 10.0, 30.0],
    ...     "order_date": pd.date_range("2025-01-01", periods=10, freq="7D")})
    >>> result = evaluate_methods(orders, methods="plain,mta", variances="log", bootstrap=0)
    >>> result.held_out
    10
    >>> result.leave_one_out[["method", "variance"]].values.tolist()
    [['plain', 'log'], ['mta', 'log']]
    """
    from forecasting.selection import choose_from_scores

    if not isinstance(bootstrap, (int, np.integer)) or bootstrap < 0:
        raise OrderDataError("the number of bootstrap resamples must be a whole number, 0 or more", value=bootstrap,
                             option="bootstrap", fix="Use for example 500")
    for value, name in ((level, "level"), (next_level, "next_level")):
        if not 0 < value < 1:
            raise OrderDataError(f"{name} must be between 0 and 1", value=value, option=name)
    if fits is None:
        fits = ShopFits(customer_statistics(orders), orders)
    elif fits.orders is not orders:
        raise ValueError("the shared fits belong to another orders table")
    stats = fits.stats
    pairs = _combinations(methods, variances, stats=stats)
    notes = []
    scored = (left_out_scores(fits, pairs, level=level, next_level=next_level, limit=check_customers)
              if len(stats) else None)
    if scored is None or len(scored.count) == 0:
        notes.append("no customer has two or more orders, so there is nothing to hold out")
    repeat = int(np.count_nonzero(stats["orders"].to_numpy() >= 2)) if len(stats) else 0
    if scored is not None and len(scored.count) < repeat:
        notes.append(f"the check ran on {len(scored.count):,} of the {repeat:,} customers with two or more orders, "
                     "drawn at random with the same share of one-time customers, as a shop of its own (each "
                     "forecast refitted on all its other orders); a larger check would move the figures by less "
                     "than their stated uncertainty")
    if scored is None:
        scored = customer_scores(leave_one_out(orders, stats, pairs, level=level, next_level=next_level))
    loo = summarise(scored, resamples=bootstrap, seed=seed)
    by_past, by_segment = _breakdowns(scored)

    backtest_scored, cutoff_used, backtest_notes = _backtest(fits, pairs, cutoff, level=level, next_level=next_level,
                                                             limit=check_customers)
    notes.extend(backtest_notes)
    if backtest_scored is not None:
        backtest_scores = customer_scores(backtest_scored)
        backtest = summarise(backtest_scores, resamples=bootstrap, seed=seed)
        more_past, more_segment = _breakdowns(backtest_scores)
        by_past += more_past
        by_segment += more_segment
        n_backtest = len(backtest_scored.value)
    else:
        backtest = pd.DataFrame(columns=RESULT_COLUMNS)
        n_backtest = 0

    chosen = choose_from_scores(scored, loo, restricted=methods is not None or variances is not None, seed=seed)
    return Evaluation(
        leave_one_out=loo,
        backtest=backtest,
        by_past_orders=pd.DataFrame(by_past),
        by_segment=pd.DataFrame(by_segment),
        chosen=chosen,
        orders=int(len(orders)),
        customers=int(len(stats)),
        held_out=int(scored.count.sum()),
        backtest_scored=n_backtest,
        cutoff=cutoff_used,
        notes=notes,
        margins=_paired_margins(scored, (chosen["method"], chosen["variance"]), resamples=bootstrap, seed=seed),
        customers_checked=int(len(scored.count)),
    )


def choose_method(orders, stats=None, *, methods=None, variances=None, fits=None):
    """The automatic choice (see :func:`forecasting.selection.choose_method`)."""
    from forecasting.selection import choose_method as choose

    return choose(orders, stats, methods=methods, variances=variances, fits=fits)
