"""One registry of the choices a user makes: forecasting methods, spread models, defaults.

The command line, the dashboard and the evaluator read the names, the words for
people and the defaults from here, so that the same file with the same choices gives
the same numbers in every front end, and a method is described once.

Pure data and small helpers; no heavy imports.
"""

from __future__ import annotations

__all__ = ["DEFAULT_METHOD", "DEFAULT_VARIANCE", "DEFAULT_SEASONS", "METHOD_WORDS", "VARIANCE_WORDS",
           "METHOD_LABELS", "VARIANCE_LABELS"]

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
