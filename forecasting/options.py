"""One registry of the choices a user makes: forecasting methods, spread models, defaults.

The command line, the dashboard and the evaluator read the names, the words for
people and the defaults from here, so that the same file with the same choices gives
the same numbers in every front end, and a method is described once.

Pure data and small helpers; no heavy imports (the statistics modules are imported inside
:func:`resolve_choice`, which settles ``"auto"`` for every front end).
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["DEFAULT_METHOD", "DEFAULT_VARIANCE", "DEFAULT_SEASONS", "METHOD_WORDS", "VARIANCE_WORDS",
           "METHOD_LABELS", "VARIANCE_LABELS", "LOW_CONFIDENCE_WEIGHT", "Choice", "low_confidence",
           "resolve_choice"]

#: Defaults of every front end (command line and dashboard alike).
DEFAULT_METHOD = "auto"
DEFAULT_VARIANCE = "auto"
DEFAULT_SEASONS = "auto"

# What each method and spread model does, in a line a shop owner can read.
METHOD_WORDS = {
    "auto": "Tries every method on your own past orders (hiding one order at a time) and uses the one "
            "that forecast best.",
    "plain": "Each customer's own average, nothing borrowed from other customers: the baseline to beat.",
    "pooled": "Every customer gets the shop-wide average order, whatever they spent before.",
    "james-stein": "James-Stein: pulls every customer's average toward the shop-wide average by one shared "
                   "share, set from how much averages differ.",
    "mta": "Multi-task averaging: customers with few or very uneven orders are pulled more toward similar "
           "customers; steady regulars keep their own average.",
    "mta-minimax": "Multi-task averaging, cautious version: a smaller pull that is safe however much "
                   "customers differ.",
    "mta-segments": "Multi-task averaging within segments: customers are pulled toward customers of their own "
                    "segment (needs a segment column).",
    "empirical-bayes": "Empirical Bayes: measures how much customers truly differ and weights each average by "
                       "how far it can be trusted.",
    "gamma-gamma": "Gamma-Gamma spend model: each customer has their own spending level and order values "
                   "scatter around it; fitted to the whole shop.",
    "james-stein-cv": "James-Stein with the amount of pull tried out on your own orders (cross-validation).",
    "mta-cv": "Multi-task averaging with the amount of pull tried out on your own orders (cross-validation).",
}
VARIANCE_WORDS = {
    "auto": "Picks the spread model for you: with the automatic method, the one that forecast best on your "
            "orders; otherwise the one the size of your big orders suggests (see below).",
    "classic": "Classic: one spread of order values for the whole shop, measured within each customer's orders.",
    "robust": "Robust: like classic, but a few huge orders cannot dominate the spread.",
    "log": "Log scale: measures spread in proportions, for shops where some orders are many times the "
           "typical one.",
    "proportional": "Proportional: customers who spend more also vary more, in proportion.",
}

# Short names for the method and spread-model boxes, tables and charts.
METHOD_LABELS = {
    "auto": "automatic (recommended)",
    "plain": "own average only",
    "pooled": "shop-wide average",
    "james-stein": "James-Stein",
    "mta": "multi-task averaging (MTA)",
    "mta-minimax": "cautious MTA",
    "mta-segments": "MTA within segments",
    "empirical-bayes": "empirical Bayes",
    "gamma-gamma": "Gamma-Gamma spend model",
    "james-stein-cv": "James-Stein tuned on your orders",
    "mta-cv": "MTA tuned on your orders",
}
VARIANCE_LABELS = {
    "auto": "automatic (recommended)",
    "classic": "classic",
    "robust": "robust",
    "log": "log scale",
    "proportional": "proportional",
    "gamma-model": "Gamma-Gamma",
}

#: A forecast is of low confidence when less than this share of it comes from the customer's own
#: orders (it rests mostly on what similar customers spend). The one definition every front end shows.
LOW_CONFIDENCE_WEIGHT = 0.5


def low_confidence(own_history_weight):
    """True where a forecast rests mostly on similar customers (own-history weight below one half).

    Examples
    --------
    >>> low_confidence([0.2, 0.5, 0.93]).tolist()
    [True, False, False]
    """
    import numpy as np

    return np.asarray(own_history_weight, dtype=np.float64) < LOW_CONFIDENCE_WEIGHT


@dataclass(frozen=True)
class Choice:
    """The method and spread model to forecast with, and how they were settled.

    Attributes
    ----------
    method, variance : str
        What to hand :func:`forecasting.forecasts.forecast_customers` (never ``"auto"``).
    chosen_by : str
        ``"user"`` (both given), ``"accuracy check"`` (the method, or both, chosen by the
        leave-one-out check on the shop's own orders), ``"tail report"`` (the spread model
        suggested by the size of the big orders) or ``"default"`` (the automatic choice
        without order-level data: the library's standing choice).
    check : dict or None
        The accuracy check's answer (:func:`forecasting.evaluation.choose_method`) when it chose.
    suggestion : str
        The tail report's suggestion when it chose the spread model, else ``""``.
    """

    method: str
    variance: str
    chosen_by: str
    check: dict | None = None
    suggestion: str = ""

    @property
    def reason(self) -> str:
        """One line for a log or a terminal."""
        if self.chosen_by == "accuracy check" and self.check is not None:
            return str(self.check.get("reason", ""))
        if self.chosen_by == "tail report":
            return f"{self.variance} variance, as the size of the big orders suggests"
        if self.chosen_by == "default":
            return "the automatic choice needs the order-level table; multi-task averaging is used"
        return "as chosen"


def resolve_choice(stats, orders=None, *, method: str = DEFAULT_METHOD, variance: str = DEFAULT_VARIANCE,
                   checked: dict | None = None) -> Choice:
    """Settle ``"auto"`` in a method / spread-model choice, the same way in every front end.

    Parameters
    ----------
    stats : pandas.DataFrame
        Per-customer statistics (:func:`forecasting.customers.customer_statistics`).
    orders : pandas.DataFrame, optional
        The cleaned orders; needed whenever something is left to the accuracy check.
    method, variance : str
        A method and a spread model, either of them (or both) ``"auto"``.
    checked : dict, optional
        The automatic choice when it is at hand already (``Evaluation.chosen`` of
        :func:`forecasting.evaluation.evaluate_methods` on the same orders, which makes the
        same choice as :func:`~forecasting.evaluation.choose_method`); used when both are
        ``"auto"``, to spare a second pass of leave-one-out.

    Returns
    -------
    Choice

    Notes
    -----
    The rules:

    * ``method="auto"`` without order-level data (a scale engine): the library's standing choice,
      multi-task averaging with the classic model (``forecasting.forecasts.DEFAULT_CHOICE``);
    * both ``"auto"``: the pair with the smallest leave-one-out error among the automatic
      candidates (:func:`forecasting.evaluation.choose_method`), as ``forecast_customers(method="auto")``;
    * ``method="auto"`` with a spread model: the method with the smallest leave-one-out error
      with that spread model (Gamma-Gamma, which has its own spread, stays a candidate);
      multi-task averaging within segments is left out where its leave-one-out does not cover
      the spread model (``proportional``) or the customers have no segment;
    * a method with ``variance="auto"``: the spread model the tail report suggests
      (:func:`forecasting.variance.tail_report`; ``classic`` without order-level data);
      Gamma-Gamma ignores the spread model;
    * both given: as given.
    """
    if method != "auto" and variance != "auto":
        return Choice(method, variance, "user")
    if method == "auto":
        if orders is None:  # a scale engine that keeps no orders: the library's standing choice
            from forecasting.forecasts import DEFAULT_CHOICE

            return Choice(*DEFAULT_CHOICE, "default")
        from forecasting.evaluation import AUTO_METHODS, choose_method

        if variance == "auto":
            check = checked if checked is not None else choose_method(orders, stats)
        else:
            from forecasting.variance import check_variance_model

            check_variance_model(variance)
            has_segments = "segment" in stats.columns
            candidates = [m for m in AUTO_METHODS
                          if m != "mta-segments" or (has_segments and variance != "proportional")]
            check = choose_method(orders, stats, methods=candidates, variances=[variance])
        chosen_variance = check["variance"]
        if chosen_variance == "gamma-model":  # Gamma-Gamma's own spread: any model name is ignored
            chosen_variance = variance if variance != "auto" else "classic"
        return Choice(check["method"], chosen_variance, "accuracy check", check=check)
    if method == "gamma-gamma" or orders is None:
        return Choice(method, "classic", "user" if method == "gamma-gamma" else "tail report",
                      suggestion="" if method == "gamma-gamma" else "classic")
    from forecasting.variance import tail_report

    suggestion = tail_report(orders["order_value"].to_numpy(dtype="float64")).suggested_variance
    return Choice(method, suggestion, "tail report", suggestion=suggestion)
