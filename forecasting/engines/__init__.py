"""Engines: the same per-customer statistics from a file, in memory, out of core or on a cluster.

In: an order export (a file; for the scale engines also a glob pattern or a list of files).
Out: ``(stats, account)``: the per-customer statistics table of
:func:`forecasting.customers.customer_statistics` and the row account of
:meth:`forecasting.reading.ReadResult.audit`.

* ``"pandas"`` (default): :func:`forecasting.reading.read_orders` then
  :func:`forecasting.customers.customer_statistics`; every format the reader knows.
* ``"duckdb"``: an embedded database computes the statistics in SQL within a memory
  limit, spilling to disk (:mod:`forecasting.engines.duckdb_engine`).
* ``"dask"``: a Dask cluster computes them over partitions of the files
  (:mod:`forecasting.engines.dask_engine`), which also runs forecasts and the exact
  leave-one-out on the cluster.

The estimators need only per-customer sums and a few shop-wide numbers, so the work is
map-reduce: per-customer statistics (reduce by customer), shop-wide sums (reduce),
forecasts (map over customers) and leave-one-out (map over orders plus small sums).
Every engine applies the one rule set of :mod:`forecasting.io.rules`; the three engines give
the same table and the same row account, row by row, on the same file.
"""

from __future__ import annotations

import os

from ..customers import customer_statistics
from ..errors import OrderDataError
from ..reading import read_orders
from .measure import measure_statistics_run

__all__ = ["ENGINES", "check_engine", "customer_statistics_from_file", "measure_statistics_run"]

ENGINES = ("pandas", "duckdb", "dask")


def check_engine(engine) -> str:
    """The engine name, or an :class:`~forecasting.errors.OrderDataError` naming ``--engine``.

    Examples
    --------
    >>> check_engine("duckdb")
    'duckdb'
    """
    if engine not in ENGINES:
        raise OrderDataError(f"unknown engine (got {engine!r})", value=engine,
                             fix="Choose pandas, duckdb or dask", option="engine")
    return engine


def _one_file(source) -> str | os.PathLike:
    from .sources import resolve_paths

    if isinstance(source, (list, tuple)) or (isinstance(source, (str, os.PathLike))
                                             and any(c in os.fspath(source) for c in "*?[")):
        paths = resolve_paths(source)
        if len(paths) != 1:
            raise OrderDataError(f"the pandas engine reads one file at a time ({len(paths)} were given)",
                                 fix="Read several files with the duckdb or dask engine", option="engine")
        return paths[0]
    return source


def customer_statistics_from_file(source, *, engine="pandas", customer=None, date=None, value=None,
                                  order_id=None, status=None, currency_column=None, segment=None,
                                  currency=None, date_order=None, decimal=None, sheet=None, header_row=None,
                                  keep_unpaid=False, keep_implausible=False, file_name=None,
                                  memory_limit="2GB", temp_directory=None, threads=None, scheduler=None,
                                  list_rows=False):
    """Per-customer statistics and the row account of an order export, with the chosen engine.

    Parameters
    ----------
    source : str, path, bytes or file-like; for duckdb and dask also a glob or a list
        The export. The pandas engine reads one file of any supported kind; the
        scale engines read CSV and Parquet files, several files as one table.
    engine : {"pandas", "duckdb", "dask"}, default "pandas"
        Where the work is done (see the module docstring).
    customer, date, value, order_id, status, currency_column, segment : str, optional
        The column playing each part (guessed from the headers when not given), as for
        :func:`forecasting.reading.read_orders`.
    currency, date_order, decimal, sheet, header_row, keep_unpaid, keep_implausible : optional
        As for :func:`forecasting.reading.read_orders`; every engine applies them the same way
        (the scale engines refuse ``sheet``: they read CSV and Parquet files).
    file_name : str, optional
        The name shown in messages.
    memory_limit : str, default "2GB"
        duckdb only: its memory limit; beyond it work spills to ``temp_directory``.
    temp_directory : str, optional
        duckdb only: the folder for the working database and spill files.
    threads : int, optional
        duckdb only: its number of threads (default: every core).
    scheduler : str or distributed.Client, optional
        dask only: the scheduler's address (``"tcp://host:8786"``) or a client;
        a local cluster is started (and stopped) when not given.
    list_rows : bool, default False
        Also list every row left out and every row noted, the same from every engine:
        ``account["excluded_rows"]`` (``file``, ``row``, ``reason_code``, ``reason``) and
        ``account["noted_rows"]`` (``file``, ``row``, ``note_code``, ``note``).

    Returns
    -------
    stats : pandas.DataFrame
        Indexed by customer, columns of :func:`forecasting.customers.customer_statistics`.
    account : dict
        ``file, rows_read, rows_used, rows_excluded, orders, customers, excluded`` (rows by
        reason code), ``noted`` (rows by note code), ``unrecognised_statuses``, ``mapping`` and
        ``notes``, as :meth:`forecasting.reading.ReadResult.audit`.

    Raises
    ------
    OrderDataError
        For a bad option (named, with the value) before any work, and for every problem
        the reader reports.

    Examples
    --------
    >>> import tempfile, os
    >>> path = os.path.join(tempfile.mkdtemp(), "orders.csv")
    >>> _ = open(path, "w").write("customer,order_date,order_value\\n"
    ...                           "fern,2025-03-01,24.00\\nfern,2025-04-02,36.00\\nivy,2025-03-05,80.00\\n")
    >>> stats, account = customer_statistics_from_file(path)
    >>> stats["mean"].tolist(), account["rows_used"]
    ([30.0, 80.0], 3)
    """
    check_engine(engine)
    columns = {"customer": customer, "date": date, "value": value, "order_id": order_id, "status": status,
               "currency_column": currency_column, "segment": segment, "currency": currency,
               "date_order": date_order, "decimal": decimal, "sheet": sheet, "header_row": header_row,
               "keep_unpaid": keep_unpaid, "keep_implausible": keep_implausible, "file_name": file_name}
    if engine == "pandas":
        result = read_orders(_one_file(source), **columns)
        account = result.audit()
        if list_rows:
            account["excluded_rows"] = (result.excluded[["row", "reason_code", "reason"]]
                                        .assign(file=result.file_name)[["file", "row", "reason_code", "reason"]])
            account["noted_rows"] = result.noted.assign(file=result.file_name)[["file", "row", "note_code", "note"]]
        return customer_statistics(result.orders), account
    if engine == "duckdb":
        from .duckdb_engine import customer_statistics_duckdb

        return customer_statistics_duckdb(source, memory_limit=memory_limit, temp_directory=temp_directory,
                                          threads=threads, list_rows=list_rows, **columns)
    from .dask_engine import customer_statistics_dask

    return customer_statistics_dask(source, scheduler=scheduler, list_rows=list_rows, **columns)
