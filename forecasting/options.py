"""One registry of the choices a user makes: forecasting methods, spread models, defaults.

The command line, the dashboard and the evaluator read from here the names, the words for
people, each method's fit and its exact leave-one-out twin, what it needs, whether the
automatic choice may use it, and the tolerances the automatic choice holds forecasts to. So
the same file with the same choices gives the same numbers in every front end, and a method is
described once.

Pure data and small helpers; no heavy imports (fits are named as ``"module:function"`` and
loaded on use by :func:`load`).
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass

__all__ = ["DEFAULT_METHOD", "DEFAULT_VARIANCE", "DEFAULT_SEASONS", "METHODS", "SPREAD_MODELS", "Method",
           "SpreadModel", "AutoTolerance", "AUTO_TOLERANCE", "METHOD_WORDS", "VARIANCE_WORDS", "METHOD_LABELS",
           "VARIANCE_LABELS", "OWN_SPREAD", "DEFAULT_CHOICE", "LOW_CONFIDENCE_WEIGHT", "method_names", "spread_names",
           "pairs_to_report", "low_confidence", "load", "CHECK_CUSTOMERS", "CHECK_SEED", "check_sample"]

#: Defaults of every front end (command line, dashboard and the library's own functions).
DEFAULT_METHOD = "auto"
DEFAULT_VARIANCE = "auto"
DEFAULT_SEASONS = "auto"

#: What "auto" means when the shop's own check cannot run (no order-level values, as on the scale
#: engines): the model-based choice.
DEFAULT_CHOICE = ("empirical-bayes", "log")

#: A forecast is of low confidence when less than this share of it comes from the customer's own
#: orders (it rests mostly on what similar customers spend). The one definition every front end shows.
LOW_CONFIDENCE_WEIGHT = 0.5

#: The spread reported for a method with its own model of spread (gamma-gamma).
OWN_SPREAD = "gamma-model"


@dataclass(frozen=True)
class Method:
    """A forecasting method.

    Attributes
    ----------
    name : str
        What the command line and the files call it.
    label : str
        A short name for boxes, tables and charts.
    words : str
        One line a shop owner can read.
    fit : str
        ``"module:function"``: the estimator, called ``fit(means, mean_vars, **keywords)``.
    keywords : tuple of str
        Which of ``orders`` (counts), ``segments``, ``codes``/``values`` (order-level),
        ``multiplier``, ``between`` the fit takes.
    left_out : str
        ``"module:function"``: its leave-one-out twin, ``left_out(side, s_factor, **context)``.
    exact_left_out : bool
        Whether the twin refits everything (else it keeps something from the full fit, named
        in ``left_out_keeps``).
    left_out_keeps : str
        What the twin keeps from the fit on all orders, in words.
    needs_orders : bool
        Needs order-level values (not only per-customer sums).
    needs_segments : bool
        Needs a segment for every customer.
    in_auto : bool
        Whether the automatic choice may pick it.
    caution : str
        Non-empty when the method is offered with a warning (shown beside it).
    own_spread : bool
        Has its own model of spread (the spread model choice does not apply).
    """

    name: str
    label: str
    words: str
    fit: str
    left_out: str
    keywords: tuple = ()
    exact_left_out: bool = True
    left_out_keeps: str = ""
    needs_orders: bool = False
    needs_segments: bool = False
    in_auto: bool = True
    caution: str = ""
    own_spread: bool = False


@dataclass(frozen=True)
class SpreadModel:
    """A model of how one order's value varies around its customer's mean."""

    name: str
    label: str
    words: str
    fit: str
    left_out: str
    in_auto: bool = True
    caution: str = ""


_EST = "forecasting.estimators."

METHODS = {
    "plain": Method(
        "plain", "own average only",
        "Each customer's own average, nothing borrowed from other customers: the baseline to beat.",
        _EST + "simple:plain_averages", _EST + "simple:plain_left_out"),
    "pooled": Method(
        "pooled", "shop-wide average",
        "Every customer gets the shop-wide average order, whatever they spent before.",
        _EST + "simple:pooled_average", _EST + "simple:pooled_left_out", keywords=("orders",)),
    "james-stein": Method(
        "james-stein", "James-Stein",
        "James-Stein: pulls every customer's average toward the shop-wide average by one shared share, set "
        "from how much averages differ.",
        _EST + "james_stein:james_stein", _EST + "james_stein:james_stein_left_out"),
    "mta": Method(
        "mta", "multi-task averaging (MTA)",
        "Multi-task averaging: customers with few or very uneven orders are pulled more toward similar "
        "customers; steady regulars keep their own average.",
        _EST + "mta:mta_constant", _EST + "mta:mta_left_out"),
    "mta-minimax": Method(
        "mta-minimax", "cautious MTA",
        "Multi-task averaging, cautious version: a smaller pull that is safe however much customers differ.",
        _EST + "mta:mta_minimax", _EST + "mta:mta_minimax_left_out"),
    "mta-segments": Method(
        "mta-segments", "MTA within segments",
        "Multi-task averaging within segments: customers are pulled toward customers of their own segment "
        "(needs a segment column).",
        _EST + "segments:mta_segments", _EST + "segments:mta_segments_left_out", keywords=("segments",),
        needs_segments=True),
    "empirical-bayes": Method(
        "empirical-bayes", "empirical Bayes",
        "Empirical Bayes: measures how much customers truly differ and weights each average by how far it "
        "can be trusted.",
        _EST + "empirical_bayes:empirical_bayes", _EST + "empirical_bayes:empirical_bayes_left_out",
        keywords=("between",)),
    "gamma-gamma": Method(
        "gamma-gamma", "Gamma-Gamma spend model",
        "Gamma-Gamma spend model: each customer has their own spending level and order values scatter around "
        "it; fitted to the whole shop.",
        _EST + "gamma_gamma:gamma_gamma_for_shop", _EST + "gamma_gamma:gamma_gamma_left_out",
        keywords=("orders",), exact_left_out=False,
        left_out_keeps="the model's three shop-wide numbers (p, q, gamma) from the fit on all orders",
        caution="Its ranges assume order values follow a gamma distribution; with occasional very large "
                "orders its range for the next order holds fewer orders than it says.",
        own_spread=True),
    "james-stein-cv": Method(
        "james-stein-cv", "James-Stein tuned on your orders",
        "James-Stein with the amount of pull tried out on your own orders (cross-validation).",
        _EST + "cross_validation:james_stein_cv", _EST + "cross_validation:james_stein_cv_left_out",
        keywords=("codes", "values", "multiplier"), exact_left_out=False,
        left_out_keeps="the amount of pull chosen on all orders, which flatters it a little",
        needs_orders=True, in_auto=False),
    "mta-cv": Method(
        "mta-cv", "MTA tuned on your orders",
        "Multi-task averaging with the amount of pull tried out on your own orders (cross-validation).",
        _EST + "cross_validation:mta_cv", _EST + "cross_validation:mta_cv_left_out",
        keywords=("codes", "values", "multiplier"), exact_left_out=False,
        left_out_keeps="the amount of pull chosen on all orders, which flatters it a little",
        needs_orders=True, in_auto=False),
}

SPREAD_MODELS = {
    "log": SpreadModel(
        "log", "log scale",
        "Log scale: measures spread in proportions, so a few orders many times the usual one do not swamp a "
        "customer's forecast; forecasts still add up to the money customers spend.",
        "forecasting.variance:log_spread", "forecasting.variance:log_spread_left_out"),
    "classic": SpreadModel(
        "classic", "classic",
        "Classic: one spread of order values in money for the whole shop, measured within each customer's orders.",
        "forecasting.variance:classic_spread", "forecasting.variance:classic_spread_left_out",
        caution="Its ranges assume every customer's orders vary by the same amount in money; where big spenders "
                "vary more, their ranges are too narrow and small spenders' too wide."),
    "proportional": SpreadModel(
        "proportional", "proportional",
        "Proportional: customers who spend more also vary more, in proportion; ranges grow with the level.",
        "forecasting.variance:proportional_spread", "forecasting.variance:proportional_spread_left_out",
        caution="Its ranges assume order values spread evenly around the customer's level; with occasional very "
                "large orders the range for the next order is too wide."),
}

# Older names and the "auto" entries, for the words and labels front ends show.
_AUTO_METHOD_WORDS = ("Tries every method on your own past orders (hiding one order at a time), keeps those whose "
                      "forecasts add up to the money and whose ranges hold what they say, and uses the one that "
                      "forecast best.")
_AUTO_SPREAD_WORDS = ("Picks the spread model for you: the one that forecast best on your own orders among those "
                      "whose forecasts add up and whose ranges hold what they say.")

METHOD_WORDS = {"auto": _AUTO_METHOD_WORDS, **{name: m.words for name, m in METHODS.items()}}
VARIANCE_WORDS = {"auto": _AUTO_SPREAD_WORDS, **{name: v.words for name, v in SPREAD_MODELS.items()}}
METHOD_LABELS = {"auto": "automatic (recommended)", **{name: m.label for name, m in METHODS.items()}}
VARIANCE_LABELS = {"auto": "automatic (recommended)", **{name: v.label for name, v in SPREAD_MODELS.items()},
                   OWN_SPREAD: "Gamma-Gamma"}


@dataclass(frozen=True)
class AutoTolerance:
    """What the automatic choice holds a method x spread model to in the shop's own check.

    Attributes
    ----------
    money_pct : float
        The sum of leave-one-out forecasts may differ from the sum of the held-out orders by
        this many percent, plus ``noise_se`` standard errors of that difference.
    coverage_points : float
        Each range's share of held-out orders (next order) or its implied share of true means
        (expected value) may miss its level by this many percentage points, plus ``noise_se``
        standard errors.
    noise_se : float
        How many standard errors of the shop's own noise are allowed on top.
    min_orders_per_band : int
        A band of past-order counts (1, 2-3, 4+) is checked on its own only with at least this
        many held-out orders.
    """

    money_pct: float = 2.0
    coverage_points: float = 5.0
    noise_se: float = 2.0
    min_orders_per_band: int = 200


AUTO_TOLERANCE = AutoTolerance()

#: The shop's own check (the leave-one-out of the evaluation and of the automatic choice, and the
#: backtest) runs on at most this many repeat customers. A shop with more is checked on a sample
#: shop of its own (:func:`check_sample`): that many repeat customers drawn at random, seeded by
#: CHECK_SEED so the same file gives the same draw, with the same share of its one-time customers,
#: every order of each. The check fits every method on the sample and holds out its orders, so its
#: time no longer grows with the shop; the forecasts themselves are fitted on every customer. With
#: 20,000 repeat customers a method's money bias and coverage are known to a fraction of the
#: tolerances above (standard errors of about 0.4 and 0.15 points on the 2,000,000-order bench
#: shop). On nine simulated shops of about 90,000 repeat customers whose true means are known
#: (``bench/check_size.py``, ``bench/check_size.md``) the sample's spread of one order was within
#: about 1% of the whole shop's and its spread between customers within about 2%, and the choice
#: was as good as with 50,000: the same as the whole shop's check on eight shops (seven with
#: 50,000), the others 3-5% off in true squared error. A check on 20,000 takes about 1 s there,
#: on 50,000 about 2.4 s, on the whole shop about 4 s. None checks the whole shop.
CHECK_CUSTOMERS = 20_000
CHECK_SEED = 20_260_101


def method_names(*, with_auto: bool = False) -> tuple:
    """The methods on offer, in the product's order."""
    return (("auto",) if with_auto else ()) + tuple(METHODS)


def spread_names(*, with_auto: bool = False) -> tuple:
    """The spread models on offer, in the product's order (log first: the one every method holds to)."""
    return (("auto",) if with_auto else ()) + tuple(SPREAD_MODELS)


def pairs_to_report(*, segments: bool = False) -> list:
    """Every method x spread model the evaluator reports (a method with its own spread once)."""
    pairs = []
    for name, method in METHODS.items():
        if method.needs_segments and not segments:
            continue
        if method.own_spread:
            pairs.append((name, OWN_SPREAD))
        else:
            pairs.extend((name, spread) for spread in SPREAD_MODELS)
    return pairs


def caution_of(method: str, spread: str) -> str:
    """The warning a method x spread model is offered with ("" when none)."""
    parts = []
    if method in METHODS and METHODS[method].caution:
        parts.append(METHODS[method].caution)
    if spread in SPREAD_MODELS and SPREAD_MODELS[spread].caution and not (method in METHODS
                                                                            and METHODS[method].own_spread):
        parts.append(SPREAD_MODELS[spread].caution)
    return " ".join(parts)


def load(reference: str):
    """The function a registry entry names as ``"module:function"``."""
    module, name = reference.split(":")
    return getattr(importlib.import_module(module), name)


def low_confidence(own_history_weight):
    """True where a forecast rests mostly on similar customers (own-history weight below one half).

    Examples
    --------
    >>> low_confidence([0.2, 0.5, 0.93]).tolist()
    [True, False, False]
    """
    import numpy as np

    return np.asarray(own_history_weight, dtype=np.float64) < LOW_CONFIDENCE_WEIGHT


def check_sample(orders_per_customer, limit):
    """The customers of the sample shop the shop's own check runs on (see :data:`CHECK_CUSTOMERS`).

    Parameters
    ----------
    orders_per_customer : numpy.ndarray
        Every customer's number of orders (in the order of the statistics).
    limit : int or None
        At most this many repeat customers (None: the whole shop).

    Returns
    -------
    numpy.ndarray of bool or None
        None when the shop has no more than ``limit`` repeat customers (it is checked whole);
        else ``limit`` repeat customers and ``round(limit * one-time / repeat)`` one-time
        customers, each set drawn without replacement by
        ``numpy.random.default_rng(CHECK_SEED).choice``, so the sample keeps the shop's mix.

    Examples
    --------
    >>> import numpy as np
    >>> orders = np.array([1, 2] * 10)
    >>> check_sample(orders, None) is None
    True
    >>> kept = check_sample(orders, 4)
    >>> int(kept[orders >= 2].sum()), int(kept[orders == 1].sum())
    (4, 4)
    """
    import numpy as np

    orders = np.asarray(orders_per_customer)
    repeat = orders >= 2
    n_repeat = int(repeat.sum())
    if limit is None or n_repeat <= int(limit):
        return None
    rng = np.random.default_rng(CHECK_SEED)
    kept = np.zeros(orders.size, dtype=bool)
    kept[rng.choice(np.flatnonzero(repeat), int(limit), replace=False)] = True
    one_time = np.flatnonzero(~repeat)
    share = int(round(int(limit) * one_time.size / n_repeat))
    kept[rng.choice(one_time, min(share, one_time.size), replace=False)] = True
    return kept
