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
from .errors import OrderDataError
from .exports import csv_text, excel_bytes, write_csv
from .forecasts import METHODS, forecast_customers
from .reading import ColumnMapping, ReadResult, read_orders
from .variance import VARIANCE_MODELS

__all__ = [
    "METHODS",
    "VARIANCE_MODELS",
    "ColumnMapping",
    "OrderDataError",
    "ReadResult",
    "csv_text",
    "customer_statistics",
    "excel_bytes",
    "forecast_customers",
    "read_orders",
    "write_csv",
]
