"""Reading order exports: the one rule set every engine applies, and the two ways it runs.

* :mod:`forecasting.io.rules` -- every cleaning rule, limit, vocabulary and reason code;
* :mod:`forecasting.io.backends` -- the rules run over Arrow arrays (pandas and dask engines)
  or as duckdb SQL (duckdb engine).
"""
