"""Next-order value forecasts for each customer of a small shop.

The data's journey, one module a stage:

``reading`` (file -> cleaned orders + row account) -> ``customers`` (per-customer
statistics) -> ``variance`` (pooled spread of order values) -> ``shrinkage``
(each customer's average pulled toward similar customers) -> ``forecasts`` (one row
per customer with intervals) -> ``evaluation`` (leave-one-out and backtest proof),
``frequency`` and ``outlook`` (order rates, tiers, cohort revenue), ``exports``
(safe CSV/Excel). The package never imports streamlit.
"""

from .customers import customer_statistics
from .engines import ENGINES, customer_statistics_from_file
from .errors import OrderDataError
from .evaluation import Evaluation, choose_method, evaluate_methods
from .exports import csv_text, excel_bytes, write_csv
from .forecasts import METHODS, forecast_customers
from .frequency import fit_order_frequency, frequency_forecast, repeat_history
from .outlook import assign_tiers, backtest_outlook, export_tiers, project_revenue, tier_summary
from .reading import ColumnMapping, ReadResult, read_orders
from .variance import VARIANCE_MODELS

__all__ = [
    "ENGINES",
    "METHODS",
    "VARIANCE_MODELS",
    "ColumnMapping",
    "Evaluation",
    "OrderDataError",
    "ReadResult",
    "assign_tiers",
    "backtest_outlook",
    "choose_method",
    "csv_text",
    "customer_statistics",
    "customer_statistics_from_file",
    "evaluate_methods",
    "excel_bytes",
    "export_tiers",
    "fit_order_frequency",
    "forecast_customers",
    "frequency_forecast",
    "project_revenue",
    "read_orders",
    "repeat_history",
    "tier_summary",
    "write_csv",
]
