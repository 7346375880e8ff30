"""The automatic choice of method and spread model: the only module that imports both the
evaluation and the forecasts.

The rule (:func:`best_of`): among the pairs the automatic choice may use
(:data:`forecasting.options.METHODS` and ``SPREAD_MODELS``, ``in_auto``), keep those whose
forecasts pass the shop's own check -- money bias and the coverage of both ranges within
:data:`forecasting.options.AUTO_TOLERANCE` -- and take the one with the smallest leave-one-out
squared error, provided it beats plain customer averages. Otherwise plain averages on the log
scale are used (returned to money by smearing; their ranges are the customer's own confidence
range), and the reason says why.

Choosing the best of many pairs on the same held-out orders flatters the winner. So the gain
reported beside the choice (``honest_gain_pct``) is a split-half check: customers are split at
random (seeded) into two halves; the rule picks a pair on one half's held-out orders and its
error cut is measured on the other half's; the two ways round are averaged.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError
from forecasting.options import CHECK_CUSTOMERS, DEFAULT_CHOICE, DEFAULT_METHOD, DEFAULT_VARIANCE, METHODS, OWN_SPREAD
from forecasting.evaluation import (
    AUTO_METHODS,
    AUTO_VARIANCES,
    _combinations,
    _reduction_pct,
    left_out_scores,
    summarise,
)
from forecasting.forecasts import ShopFits, shop_fits

#: What the choice falls back to, in order of preference (the first one evaluated is used).
FALLBACKS = (("plain", "log"), ("plain", "classic"), ("plain", "proportional"))


def _fallback(results, reason, best=None):
    pairs = list(zip(results["method"], results["variance"])) if len(results) else []
    method, variance = next((pair for pair in FALLBACKS if pair in pairs), FALLBACKS[0])
    runner = None
    if best is not None:
        runner = {"method": str(best["method"]), "variance": str(best["variance"]),
                  "error_reduction_pct": float(best["error_reduction_pct"])}
    return {"method": method, "variance": variance, "runner_up": runner,
            "margin_pct": float("nan") if best is None else -float(best["error_reduction_pct"]),
            "error_reduction_pct": 0.0, "fell_back_to_plain": True, "calibrated": False, "reason": reason,
            "excluded": []}


def best_of(results, allowed=None) -> dict:
    """The automatic choice from a table of leave-one-out results.

    Parameters
    ----------
    results : pandas.DataFrame
        Rows of ``method, variance, sse, error_reduction_pct`` and, when known, ``calibrated``,
        ``calibration_note`` and ``in_auto`` (as :func:`forecasting.evaluation.summarise`
        gives them).
    allowed : sequence of (method, variance), optional
        The pairs that may be chosen (default: those with ``in_auto``, or every row without
        that column).

    Returns
    -------
    dict
        ``method``, ``variance``, ``runner_up``, ``margin_pct`` (points of the plain-average
        error the choice is ahead of the runner-up), ``error_reduction_pct``,
        ``fell_back_to_plain``, ``calibrated``, ``excluded`` (pairs with a smaller error left
        out because they missed a calibration target, with what they missed) and ``reason``.
    """
    table = results.dropna(subset=["sse"])
    baseline = (table["method"] == "plain") & (table["variance"] == "classic")  # the plain averages themselves
    candidates = table[~baseline]
    if allowed is not None:
        wanted = set(map(tuple, allowed))
        candidates = candidates[[pair in wanted for pair in zip(candidates["method"], candidates["variance"])]]
    elif "in_auto" in candidates.columns:
        candidates = candidates[candidates["in_auto"].astype(bool)]
    candidates = candidates.sort_values("sse", kind="stable")
    if len(candidates) == 0:
        return _fallback(results, "nothing to compare: no customer has two orders, so each customer's own average "
                                  "is used")
    calibrated = candidates["calibrated"].astype(bool) if "calibrated" in candidates.columns else \
        pd.Series(True, index=candidates.index)
    passing = candidates[calibrated.to_numpy()]
    excluded = []
    if len(passing):
        ahead = candidates[(candidates["sse"] < passing["sse"].iloc[0]) & ~calibrated]
    else:
        ahead = candidates[~calibrated]
    for row in ahead.itertuples():
        excluded.append({"method": row.method, "variance": row.variance,
                         "missed": getattr(row, "calibration_note", "")})
    if len(passing) == 0:
        choice = _fallback(results, "no method's forecasts met every calibration target on your orders "
                                    f"(best: {candidates.iloc[0]['method']} with {candidates.iloc[0]['variance']} "
                                    f"variance: {candidates.iloc[0].get('calibration_note', '')}), so each "
                                    "customer's own average is used", candidates.iloc[0])
        choice["excluded"] = excluded
        return choice
    best = passing.iloc[0]
    best_gain = float(best["error_reduction_pct"])
    if not best_gain > 0:
        choice = _fallback(results, f"no method beat plain customer averages in leave-one-out (best: {best['method']} "
                                    f"with {best['variance']} variance, {best_gain:+.1f}%), so each customer's own "
                                    "average is used", best)
        choice["excluded"] = excluded
        return choice
    runner = passing.iloc[1] if len(passing) > 1 else None
    runner_gain = float(runner["error_reduction_pct"]) if runner is not None else 0.0
    runner_up = ({"method": str(runner["method"]), "variance": str(runner["variance"]),
                  "error_reduction_pct": runner_gain} if runner is not None
                 else {"method": "plain", "variance": "classic", "error_reduction_pct": 0.0})
    per_customer = best.get("error_reduction_per_customer_pct", np.nan)
    counted = (f" ({per_customer:.1f}% with each customer counted once)" if pd.notna(per_customer) else "")
    reason = (f"{best['method']} with {best['variance']} variance had the smallest leave-one-out error among the "
              f"methods whose forecasts add up and whose ranges hold what they say, {best_gain:.1f}% below plain "
              f"averages{counted}, {best_gain - runner_gain:.1f} points ahead of {runner_up['method']} with "
              f"{runner_up['variance']} variance")
    if excluded:
        reason += (f"; {len(excluded)} method(s) with a smaller error missed a calibration target and were left out "
                   f"({excluded[0]['method']} with {excluded[0]['variance']} variance: {excluded[0]['missed']})")
    return {"method": str(best["method"]), "variance": str(best["variance"]), "runner_up": runner_up,
            "margin_pct": best_gain - runner_gain, "error_reduction_pct": best_gain,
            "error_reduction_per_customer_pct": float(per_customer) if pd.notna(per_customer) else float("nan"),
            "fell_back_to_plain": False, "calibrated": True, "excluded": excluded, "reason": reason}


def split_half_gain(scores, *, allowed=None, seed=0):
    """The error cut of the rule's choice measured on customers it was not chosen on.

    Customers are split at random (``seed``) into two halves; :func:`best_of` chooses on one
    half's held-out orders (error and calibration measured there) and the chosen pair's error
    cut against plain averages is measured on the other half's; both ways round.

    Parameters
    ----------
    scores : forecasting.evaluation.CustomerScores

    Returns
    -------
    gain : float
        The mean of the two out-of-half error cuts (percent).
    choices : list of (method, variance)
        What each half chose.
    """
    T = len(scores.count)
    if T < 4:
        return float("nan"), []
    first = np.zeros(T, dtype=bool)
    first[np.random.default_rng(seed).permutation(T)[: T // 2]] = True
    gains, choices = [], []
    for fit_on in (first, ~first):
        choice = best_of(summarise(scores, keep=fit_on), allowed)
        pair = (choice["method"], choice["variance"])
        choices.append(pair)
        test = ~fit_on
        plain = float(scores.plain_sq[test].sum())
        if pair in scores.pairs:
            gains.append(float(_reduction_pct(plain, float(scores.sq[scores.pairs.index(pair)][test].sum()))))
        else:  # the fallback was not among the evaluated pairs: plain averages themselves
            gains.append(0.0)
    return float(np.mean(gains)), choices


def choose_from_scores(scored, results, *, restricted=False, seed=0) -> dict:
    """:func:`best_of` on evaluated scores, with the split-half check of its gain."""
    allowed = None
    if restricted:
        allowed = list(zip(results["method"], results["variance"]))
    elif "in_auto" not in results.columns:
        allowed = [(m, v) for m, v in zip(results["method"], results["variance"])
                   if m in AUTO_METHODS and (v in AUTO_VARIANCES or v == OWN_SPREAD)]
    chosen = best_of(results, allowed)
    chosen["spread_checked"] = {str(spread): bool(part["calibrated"].any())
                                for spread, part in results.groupby("variance", sort=False)}
    gain, choices = split_half_gain(scored, allowed=allowed, seed=seed)
    chosen["honest_gain_pct"] = gain
    chosen["honest_choices"] = choices
    if not chosen["fell_back_to_plain"] and np.isfinite(gain):
        chosen["reason"] += (f"; chosen on one half of the customers, it cut the error on the other half by "
                             f"{gain:.1f}% (averaged both ways), a figure not flattered by the choice itself")
    return chosen


def choose_method(orders, stats=None, *, methods=None, variances=None, seed=0, fits=None,
                  check_customers=CHECK_CUSTOMERS) -> dict:
    """Pick the method and spread model for a shop from its own orders.

    Parameters
    ----------
    orders : pandas.DataFrame
        Cleaned orders (``customer``, ``order_value``, ...).
    stats : pandas.DataFrame, optional
        ``customer_statistics(orders)`` if already computed.
    methods, variances : list of str or comma-separated str, optional
        Candidates (default: the registry's pairs allowed in the automatic choice).
    seed : int
        Seed of the split-half check.
    fits : forecasting.forecasts.ShopFits, optional
        The shared fits of these orders: each pair's leave-one-out is computed once with them.
    check_customers : int or None
        Score the orders of at most this many customers (as
        :func:`forecasting.evaluation.evaluate_methods`; None: all).

    Returns
    -------
    dict
        As :func:`best_of`, plus ``honest_gain_pct`` and ``honest_choices`` of
        :func:`split_half_gain` and ``spread_checked`` (spread model -> whether any of its pairs
        passed the check; the tail report suggests only those).

    Notes
    -----
    A method that does not beat plain customer averages, or whose forecasts miss a
    calibration target, is never chosen.
    """
    if orders is None:
        raise OrderDataError("the automatic choice of method needs the order-level data", option="method",
                             fix="Give the cleaned orders, or choose a method")
    fits = _fits_of(orders, stats, fits)
    key = ("choice", _names_key(methods), _names_key(variances), int(seed), check_customers)
    if key not in fits.cache:
        scores, results = _checked_pairs(fits, methods, variances, check_customers)
        fits.cache[key] = choose_from_scores(scores, results, restricted=methods is not None or variances is not None,
                                             seed=seed)
    return dict(fits.cache[key])


def _names_key(names):
    if names is None:
        return None
    return (names,) if isinstance(names, str) else tuple(names)


def _fits_of(orders, stats, fits) -> ShopFits:
    if fits is not None:
        if fits.orders is not None and fits.orders is not orders:
            raise ValueError("the shared fits belong to another orders table")
        return shop_fits(fits.stats, orders, fits)
    return ShopFits(customer_statistics(orders) if stats is None else stats, orders)


def _checked_pairs(fits, methods, variances, limit=CHECK_CUSTOMERS):
    """The shop's own check (leave-one-out scores and their summary) of the candidate pairs."""
    pairs = _combinations(methods, variances, stats=fits.stats, default_methods=AUTO_METHODS,
                          default_variances=AUTO_VARIANCES)
    scores = left_out_scores(fits, pairs, limit=limit)
    return scores, summarise(scores)


def spread_for_method(results, method: str) -> dict:
    """The spread model to use with a method the user named, from the shop's own check.

    Among the method's pairs in ``results`` (:func:`forecasting.evaluation.summarise`), the one
    with the smallest leave-one-out error whose forecasts met the calibration targets; when none
    did, the one with the smallest error, with the reason saying so. Unlike :func:`best_of`, it
    never replaces the method (the user chose it, even where it loses to plain averages).
    """
    rows = results[results["method"] == method].dropna(subset=["sse"]).sort_values("sse", kind="stable")
    if len(rows) == 0:
        raise OrderDataError(f"the shop's own check could not score the '{method}' method on these orders",
                             option="variance", fix="Choose a spread model yourself")
    calibrated = rows["calibrated"].astype(bool) if "calibrated" in rows.columns else pd.Series(True, index=rows.index)
    passing = rows[calibrated.to_numpy()]
    best = (passing if len(passing) else rows).iloc[0]
    gain = float(best["error_reduction_pct"])
    if len(passing):
        reason = (f"{best['variance']} variance gave {method} its smallest leave-one-out error among the spread "
                  f"models whose forecasts add up and whose ranges hold, {gain:+.1f}% against plain averages")
    else:
        reason = (f"no spread model met every calibration target with {method}; {best['variance']} variance gave "
                  f"its smallest leave-one-out error, {gain:+.1f}% against plain averages")
    return {"method": method, "variance": str(best["variance"]), "error_reduction_pct": gain,
            "calibrated": bool(len(passing)), "fell_back_to_plain": False, "runner_up": None,
            "margin_pct": float("nan"), "excluded": [], "reason": reason}


@dataclass(frozen=True)
class Choice:
    """The method and spread model to forecast with, and how they were settled.

    Attributes
    ----------
    method, variance : str
        What to hand :func:`forecasting.forecasts.forecast_customers` (never ``"auto"``).
    chosen_by : str
        ``"user"`` (both given, or a method with its own spread), ``"accuracy check"`` (what was
        left to ``"auto"`` chosen by the shop's own check, :func:`choose_method`) or
        ``"default"`` (``"auto"`` without order-level data: ``options.DEFAULT_CHOICE``).
    check : dict or None
        The shop's own check (:func:`choose_method`) when it chose.
    """

    method: str
    variance: str
    chosen_by: str
    check: dict | None = None

    @property
    def reason(self) -> str:
        """One line for a log or a terminal."""
        if self.check is not None:
            return str(self.check.get("reason", ""))
        if self.chosen_by == "default":
            return "the shop's own check needs the order-level table, so the model-based default is used"
        return "as chosen"


def resolve_choice(stats, orders=None, *, method: str = DEFAULT_METHOD, variance: str = DEFAULT_VARIANCE,
                   checked: dict | None = None, fits: ShopFits | None = None) -> Choice:
    """Settle ``"auto"`` in a method / spread-model choice: the one rule every front end uses.

    Parameters
    ----------
    stats : pandas.DataFrame
        Per-customer statistics (:func:`forecasting.customers.customer_statistics`).
    orders : pandas.DataFrame, optional
        The cleaned orders; the shop's own check needs them.
    method, variance : str
        A method and a spread model, either or both ``"auto"``.
    checked : dict, optional
        The shop's own check when it is at hand already for both ``"auto"``
        (``Evaluation.chosen`` of :func:`forecasting.evaluation.evaluate_methods` on the same
        orders makes the same choice as :func:`choose_method`), to spare a second pass.
    fits : forecasting.forecasts.ShopFits, optional
        The shared fits of ``stats`` and ``orders`` (the check's leave-one-out is kept with
        them, for the next choice or evaluation of the same shop).

    Returns
    -------
    Choice

    Notes
    -----
    Whatever is left to ``"auto"`` is chosen by the shop's own check: a named spread model
    leaves the method to :func:`choose_method` among the methods with it; a named method keeps
    the method and takes the spread model :func:`spread_for_method` finds for it. Without order-level data (the scale engines) ``"auto"`` means
    ``options.DEFAULT_CHOICE``. A method with its own model of spread (Gamma-Gamma) needs no
    spread model.
    """
    own_spread = method != "auto" and METHODS[method].own_spread
    if method != "auto" and (variance != "auto" or own_spread):
        return Choice(method, OWN_SPREAD if own_spread else variance, "user")
    if fits is not None and orders is not None:
        key = ("resolved choice", method, variance)
        if key not in fits.cache:
            fits.cache[key] = _resolve(stats, orders, method, variance, checked, fits)
        return fits.cache[key]
    return _resolve(stats, orders, method, variance, checked, fits)


def _resolve(stats, orders, method, variance, checked, fits) -> Choice:
    if orders is None:
        chosen_method = DEFAULT_CHOICE[0] if method == "auto" else method
        chosen_variance = DEFAULT_CHOICE[1] if variance == "auto" else variance
        if METHODS[chosen_method].own_spread:
            chosen_variance = OWN_SPREAD
        return Choice(chosen_method, chosen_variance, "default")
    if fits is None:
        fits = ShopFits(stats, orders)
    if checked is not None and method == "auto" and variance == "auto":
        check = checked
    elif method != "auto":  # only the spread model is left to the check; the method stays the user's
        check = spread_for_method(_checked_pairs(shop_fits(stats, orders, fits), [method], None)[1], method)
    else:
        check = choose_method(orders, stats, variances=None if variance == "auto" else [variance], fits=fits)
    return Choice(check["method"], check["variance"], "accuracy check", check=check)
