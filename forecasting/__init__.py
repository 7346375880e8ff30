"""Next-order value forecasts for each customer of a small shop.

The data's journey, one module a stage:

``reading`` (file -> cleaned orders + row account) -> ``customers`` (per-customer
statistics) -> ``variance`` (pooled spread of order values) -> ``shrinkage``
(each customer's average pulled toward similar customers) -> ``forecasts`` (one row
per customer with intervals) -> ``evaluation`` (leave-one-out and backtest proof),
``frequency`` and ``outlook`` (order rates, tiers, cohort revenue), ``exports``
(safe CSV/Excel). ``shop.Shop`` carries one shop through these stages, each computed
once: the command line and the dashboard use it. The package never imports streamlit.

The names below are loaded on first use, so that a command which needs only a
few stages does not wait for the libraries of the others (scipy.stats is slow to load).
"""

from __future__ import annotations

import importlib

# Public name -> the module that defines it.
_HOMES = {
    "ENGINES": "engines",
    "METHODS": "forecasts",
    "VARIANCE_MODELS": "variance",
    "ColumnMapping": "reading",
    "Evaluation": "evaluation",
    "OrderDataError": "errors",
    "ReadResult": "reading",
    "Shop": "shop",
    "assign_tiers": "outlook",
    "backtest_outlook": "outlook",
    "choose_method": "evaluation",
    "csv_text": "exports",
    "customer_statistics": "customers",
    "customer_statistics_from_file": "engines",
    "evaluate_methods": "evaluation",
    "fit_arrivals": "arrivals",
    "excel_bytes": "exports",
    "export_tiers": "outlook",
    "fit_order_frequency": "frequency",
    "fit_repeat_orders": "seasons",
    "forecast_customers": "forecasts",
    "frequency_forecast": "frequency",
    "project_revenue": "outlook",
    "read_orders": "reading",
    "repeat_history": "frequency",
    "rolling_backtest": "outlook",
    "tier_summary": "outlook",
    "write_csv": "exports",
}

__all__ = sorted(_HOMES)


def __getattr__(name: str):
    if name not in _HOMES:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{_HOMES[name]}", __name__), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__():
    return sorted(set(globals()) | set(_HOMES))
