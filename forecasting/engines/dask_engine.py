"""The dask engine: per-customer statistics, forecasts and exact leave-one-out on a Dask cluster.

In: one or more CSV or Parquet files (a path, a glob pattern or a list) and a Dask
distributed scheduler (its address, a client, or none for a local cluster).
Out:

* :func:`customer_statistics_dask` -- the per-customer statistics table of
  :func:`forecasting.customers.customer_statistics` and the row account of
  :meth:`forecasting.reading.ReadResult.audit`;
* :func:`read_on_cluster` -- the same, keeping the cleaned orders on the cluster as a
  :class:`ShopOnCluster` for :func:`forecast_on_cluster` and :func:`leave_one_out_on_cluster`.

How the work is split (map-reduce), with the pandas reader's own steps
(:mod:`forecasting.io.clean`, the rules of :mod:`forecasting.io.rules`):

1. the files are read as text partitions (``dask.dataframe.read_csv`` / ``read_parquet``);
   a file the fast reader refuses or would read otherwise than the pandas reader is read
   through a careful copy (:func:`forecasting.engines.sources.make_careful_copies`);
2. the rows are shuffled by customer id (as the rules read it: an e-mail id in any capitals
   is one customer), so that every row of a customer -- and so every copy of a duplicated
   row and every line of an order -- lands in one partition;
3. each partition's rows are read and given their reasons (:func:`~forecasting.io.clean.read_rows`);
   what the reader decides on the whole file (decimal mark, date order, several currencies,
   most values unreadable, order totals) is decided on the partitions' evidence combined
   (:class:`~forecasting.io.clean.Evidence`), the rows read again when the decimal mark or
   the date order differs from the first reading;
4. each partition's orders are built (:func:`~forecasting.io.clean.build_orders`); the shop's
   usual range of order values is measured on all kept orders; each partition is finished
   (:func:`~forecasting.io.clean.finish_orders`) and summarised with
   :func:`forecasting.customers.customer_statistics` (a reduce by customer).

Leave-one-out maps over the partitions of cleaned orders with the shop-wide sums
broadcast to every worker, and adds up squared errors (see
:func:`leave_one_out_on_cluster`). Forecasts fit the shop-wide numbers once on the
per-customer table and map that rule over the partitions of per-customer statistics,
which stay on the workers (see :func:`forecast_on_cluster`).
"""

from __future__ import annotations

import logging
import shutil
import tempfile
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..customers import STATISTICS_COLUMNS, customer_statistics
from ..errors import OrderDataError
from ..io import clean
from ..io import rules as shared
from ..io.backends import ArrowOps
from ..io.read import ColumnMapping
from . import rules
from .sources import OrderFiles, make_careful_copies, open_order_files, text_cells

__all__ = [
    "ShopOnCluster",
    "cluster_client",
    "customer_statistics_dask",
    "forecast_on_cluster",
    "leave_one_out_on_cluster",
    "read_on_cluster",
]

_LINE_SHIFT = 40  # line key = partition number * 2**40 + position in the partition
_PATH_COLUMN = "__order_file"
_LINE_COLUMN = "__order_line"
_KEY_COLUMN = "__order_customer"


def _require_dask():
    try:
        import dask.dataframe  # noqa: F401
        import distributed  # noqa: F401
    except ImportError:
        raise OrderDataError("the dask engine needs the dask and distributed packages",
                             fix="Install them with pip install -r requirements-scale.txt, "
                                 "or read with the pandas or duckdb engine", option="engine") from None


@contextmanager
def cluster_client(scheduler=None, *, workers=None, processes=True):
    """A Dask client: to ``scheduler`` (an address or a client), or to a new local cluster.

    A client passed in is used as it is and left open; a client or a local cluster this
    function made is closed on leaving.

    Parameters
    ----------
    scheduler : str or distributed.Client, optional
        ``"tcp://host:8786"``, a client, or ``None`` for a local cluster on this machine.
    workers : int, optional
        Workers of the local cluster (default: one per core).
    processes : bool, default True
        Local cluster workers as processes (``False``: threads in this process).
    """
    _require_dask()
    from distributed import Client, LocalCluster

    if isinstance(scheduler, Client):
        yield scheduler
        return
    if scheduler is not None:
        if not isinstance(scheduler, str) or "://" not in scheduler:
            raise OrderDataError(f"scheduler must be an address such as 'tcp://10.0.0.5:8786' (got {scheduler!r})",
                                 fix="Give the address the Dask scheduler prints, or leave it out for a local cluster")
        try:
            client = Client(scheduler, timeout="20s")
        except OSError as problem:
            raise OrderDataError(f"the Dask scheduler could not be reached ({problem})", value=scheduler,
                                 fix="Check the address and that the scheduler is running") from None
        try:
            yield client
        finally:
            client.close()
        return
    import dask

    # Worker logs stay quiet: a file the fast CSV reader refuses is read again carefully, and
    # every problem reaches the caller as an exception anyway. Dask starts worker processes with
    # MALLOC_TRIM_THRESHOLD_=65536, which also turns off the C library's adaptive mmap threshold:
    # every large numpy temporary is then mapped afresh and its pages touched for the first time,
    # which made the leave-one-out on a worker 2.5 times slower than in this process on the same
    # partition. The workers of a local cluster keep the C library's defaults.
    with dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None}):
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=processes,
                               dashboard_address=None, silence_logs=logging.CRITICAL)
    client = Client(cluster)
    try:
        yield client
    finally:
        client.close()
        cluster.close()


# ---------------------------------------------------------------------------
# Reading text partitions


def _read_partitions(files: OrderFiles, blocksize):
    import dask.dataframe as dd

    if files.kind == "csv":
        raw = dd.read_csv(files.read_paths, sep=files.delimiter, dtype=str, keep_default_na=False,
                          skip_blank_lines=False, blocksize=blocksize, encoding="utf-8-sig",
                          include_path_column=_PATH_COLUMN, engine="c")
    else:
        raw = dd.read_parquet(files.paths)
    return raw


def _number_lines(part: pd.DataFrame, columns, kind, customer, partition_info=None) -> pd.DataFrame:
    """Cells as text ('' for empty), a line key that orders rows as they are in the files, and the
    customer id as the rules read it (the key the rows are shuffled on)."""
    number = partition_info["number"] if partition_info else 0
    cells = part[columns] if kind == "csv" else text_cells(part[columns])
    cells = cells.astype(object).fillna("").astype(object)
    cells.columns = list(columns)
    cells.index = pd.RangeIndex(len(cells))
    cells[_LINE_COLUMN] = (np.int64(number) << _LINE_SHIFT) + np.arange(len(cells), dtype=np.int64)
    read = shared.read_customer(ArrowOps(), clean.arrow_text(cells[customer]))["customer"]
    cells[_KEY_COLUMN] = clean.pandas_text(read).to_numpy(dtype=object)
    return cells


def _partition_files(part: pd.DataFrame, kind, partition_info=None) -> pd.DataFrame:
    """One row per partition: its number, its file (CSV) and how many rows it has."""
    number = partition_info["number"] if partition_info else 0
    path = str(part[_PATH_COLUMN].iloc[0]) if kind == "csv" and len(part) else ""
    return pd.DataFrame({"number": [number], "file": [path], "rows": [len(part)]})


# ---------------------------------------------------------------------------
# One partition of complete customers: the reader's steps


@dataclass
class _Part:
    """A partition's rows as the reader reads them, kept on the cluster between the steps."""

    rows: clean.Rows
    lines: np.ndarray
    orders: clean.Orders | None = None


def _read_part(part: pd.DataFrame, columns, mapping: ColumnMapping, options, decimal, date_order, damaged):
    """Step 3 on one partition: each row's readings and reason, and what they say about the file."""
    part = part.sort_values(_LINE_COLUMN, kind="stable").reset_index(drop=True)
    cells = part[list(columns)]
    lines = part[_LINE_COLUMN].to_numpy(dtype=np.int64)
    rows = clean.read_rows(cells, mapping, options, decimal=decimal, date_order=date_order,
                           possibly_damaged=damaged)
    return _Part(rows, lines), clean.gather_evidence(rows, cells, mapping, lines)


def _build_part(part: _Part, order_total: bool) -> _Part:
    """Step 4 on one partition: its orders and their verdicts."""
    return _Part(part.rows, part.lines, clean.build_orders(part.rows, order_total=order_total))


def _kept_log_values(part: _Part) -> np.ndarray:
    return clean.kept_log_values(part.orders)


@dataclass
class _Summary:
    """What the client needs of a finished partition besides its orders."""

    rows: int
    counts: dict  # reason code -> rows
    noted: dict  # note code -> rows
    unrecognised: dict  # status -> (rows, first line)
    excluded: tuple | None  # (line keys, reason codes), when rows are listed
    notes_listed: tuple | None  # (line keys, note bits), when rows are listed


def _finish_part(part: _Part, usual, keep_implausible: bool, list_rows: bool):
    """Step 4, the end, on one partition: final reasons and notes, the kept orders."""
    done = clean.finish_orders(part.rows, part.orders, usual, keep_implausible=keep_implausible, lines=part.lines)
    reason, notes = done.reason, done.notes
    codes, number = np.unique(reason[reason != 0], return_counts=True)
    used = reason == 0
    noted = {code: int(((notes & bit) != 0)[used].sum()) for code, bit in shared.NOTE_BITS.items()}
    out = reason != 0
    with_notes = used & (notes != 0)
    summary = _Summary(rows=len(reason), counts={shared.CODES[int(c)]: int(k) for c, k in zip(codes, number)},
                       noted=noted, unrecognised=done.unrecognised_first,
                       excluded=(part.lines[out], reason[out]) if list_rows else None,
                       notes_listed=(part.lines[with_notes], notes[with_notes]) if list_rows else None)
    keep = ["customer", "order_value", "order_date"] + (["segment"] if "segment" in done.orders else [])
    return done.orders[keep].reset_index(drop=True), summary


def _partition_statistics(orders: pd.DataFrame) -> pd.DataFrame:
    if len(orders) == 0:
        return None
    return customer_statistics(orders)


# ---------------------------------------------------------------------------
# The whole run


@dataclass
class ShopOnCluster:
    """Cleaned orders kept on the cluster, with their statistics and row account.

    Attributes
    ----------
    client : distributed.Client
        The client the order partitions live on.
    order_parts : list of distributed.Future
        One pandas DataFrame of cleaned orders per partition (``customer``,
        ``order_value``, ``order_date`` and ``segment`` when mapped); every order of a
        customer is in one partition.
    stats : pandas.DataFrame
        As :func:`forecasting.customers.customer_statistics` of all orders.
    account : dict
        As :meth:`forecasting.reading.ReadResult.audit`.
    statistics_parts : list of distributed.Future
        The per-customer statistics of each partition that has orders (one pandas DataFrame
        each, as :func:`forecasting.customers.customer_statistics`), kept where they were
        computed: the forecasts are made there (:func:`forecast_on_cluster`).
    statistics_sizes : list of int
        Customers in each of ``statistics_parts``.
    customer_order : numpy.ndarray
        ``stats`` is the concatenation of ``statistics_parts`` taken in this order (sorted by
        customer).
    """

    client: object
    order_parts: list
    stats: pd.DataFrame
    account: dict
    notes: list = field(default_factory=list)
    statistics_parts: list = field(default_factory=list)
    statistics_sizes: list = field(default_factory=list)
    customer_order: np.ndarray | None = None


def _rows_of_lines(client, raw, files: OrderFiles, lines: np.ndarray) -> tuple[list[str], np.ndarray]:
    """File labels and spreadsheet rows of line keys (see :func:`_number_lines`)."""
    kind = files.kind
    lines = np.asarray(lines, dtype=np.int64)
    if not len(lines):
        return [], np.zeros(0, dtype=np.int64)
    meta = pd.DataFrame({"number": pd.Series([], dtype=np.int64), "file": pd.Series([], dtype=object),
                         "rows": pd.Series([], dtype=np.int64)})
    table = client.compute(raw.map_partitions(_partition_files, kind, meta=meta)).result()
    table = table.sort_values("number").reset_index(drop=True)
    numbers, positions = lines >> _LINE_SHIFT, lines & ((1 << _LINE_SHIFT) - 1)
    if kind == "parquet":
        import pyarrow.parquet as pq

        sizes = np.array([pq.ParquetFile(p).metadata.num_rows for p in files.read_paths], dtype=np.int64)
        starts = np.concatenate([[0], np.cumsum(sizes)])
        before = pd.Series(np.concatenate([[0], np.cumsum(table["rows"].to_numpy())])[:-1],
                           index=table["number"].to_numpy())
        overall = before.reindex(numbers).to_numpy() + positions
        which = np.searchsorted(starts, overall, side="right") - 1
        return [files.file_label(files.read_paths[w]) for w in which], overall - starts[which] + 2
    # CSV: rows of earlier partitions of the same file come first.
    earlier = table.groupby("file")["rows"].cumsum() - table["rows"]
    offset = pd.Series(earlier.to_numpy(), index=table["number"].to_numpy())
    in_file = offset.reindex(numbers).to_numpy() + positions
    paths = table.set_index("number")["file"].reindex(numbers).to_numpy()
    rows = np.zeros(len(lines), dtype=np.int64)
    for path in pd.unique(paths):
        mask = paths == path
        # A careful copy knows each record's row; dask reads the blank lines of other files as rows.
        rows[mask] = (files.spreadsheet_rows(path, in_file[mask]) if path in files.row_numbers
                      else in_file[mask] + 2)
    return [files.file_label(path) for path in paths], rows


def read_on_cluster(source, *, client, customer=None, date=None, value=None, order_id=None, status=None,
                    currency_column=None, segment=None, currency=None, date_order=None, decimal=None,
                    sheet=None, header_row=None, keep_unpaid=False, keep_implausible=False, file_name=None,
                    blocksize="64MB", partitions=None, list_rows=False) -> ShopOnCluster:
    """Read and clean order files on a Dask cluster; keep the cleaned orders there.

    Parameters
    ----------
    source : str, path or list of them
        CSV or Parquet files (a path, a glob pattern or a list), all with the same columns.
    client : distributed.Client
        The cluster to work on (see :func:`cluster_client`).
    customer, date, value, order_id, status, currency_column, segment : optional
        As for :func:`forecasting.reading.read_orders`.
    currency, date_order, decimal, header_row, keep_unpaid, keep_implausible, file_name : optional
        As for :func:`forecasting.reading.read_orders`.
    sheet : optional
        Refused: the dask engine reads CSV and Parquet files.
    blocksize : str or None, default "64MB"
        Bytes of a CSV file per partition; ``None`` reads each file as one partition
        (needed when quoted fields contain line breaks).
    partitions : int, optional
        Partitions after the shuffle by customer (default: as many as were read, and at least
        one per worker thread).
    list_rows : bool, default False
        Also list every row left out and every row noted, in ``account["excluded_rows"]``
        and ``account["noted_rows"]`` (as :func:`forecasting.engines.customer_statistics_from_file`).

    Returns
    -------
    ShopOnCluster

    Notes
    -----
    Careful copies are written to a temporary folder of this machine, which the workers of
    a local cluster read; it is removed once the orders are computed.
    """
    _require_dask()
    rules.check_plain_options("dask", sheet=sheet)
    options = clean.ReadOptions(currency=currency, date_order=date_order, decimal=decimal, keep_unpaid=keep_unpaid,
                                keep_implausible=keep_implausible)
    if partitions is not None and (isinstance(partitions, bool) or not isinstance(partitions, int)
                                   or partitions < 1):
        raise OrderDataError(f"partitions must be a whole number, 1 or more (got {partitions!r})", value=partitions,
                             fix="Give a whole number of partitions, or leave it out", option="partitions")
    overrides = {"customer": customer, "date": date, "value": value, "order_id": order_id,
                 "status": status, "currency": currency_column, "segment": segment}
    files = open_order_files(source, overrides=overrides, file_name=file_name, header_row=header_row)
    directory = tempfile.mkdtemp(prefix="order-engine-")
    try:
        if files.kind == "csv" and (files.needs_copy or files.quoted_line_break):
            make_careful_copies(files, directory)
        return _read_and_clean(client, files, directory, options, blocksize=blocksize, partitions=partitions,
                               list_rows=list_rows)
    finally:
        shutil.rmtree(directory, ignore_errors=True)


def _worker_threads(client) -> int:
    return max(1, int(sum(client.nthreads().values())))


def _read_rows_on_cluster(client, files: OrderFiles, options, blocksize, partitions, decimal, date_order):
    """Steps 1-3: ``(raw, row parts, evidence parts)``, or Nones when the fast CSV reader refused a file
    that has no careful copy yet."""
    from dask import delayed

    columns = list(files.columns)
    futures = []
    try:
        raw = _read_partitions(files, blocksize)  # reads the head of the first file already
        meta = pd.DataFrame({**{c: pd.Series([], dtype=object) for c in columns},
                             _LINE_COLUMN: pd.Series([], dtype=np.int64), _KEY_COLUMN: pd.Series([], dtype=object)})
        numbered = raw.map_partitions(_number_lines, columns, files.kind, files.mapping.customer, meta=meta)
        # At least one partition per worker thread, so that every later step (statistics, forecasts,
        # leave-one-out) has work for every worker.
        shuffled = numbered.shuffle(on=_KEY_COLUMN,
                                    npartitions=partitions or max(raw.npartitions, _worker_threads(client)))
        damaged = files.possibly_damaged
        read = [delayed(_read_part, nout=2)(part, columns, files.mapping, options, decimal, date_order, damaged)
                for part in shuffled.to_delayed()]
        futures = client.compute([r[0] for r in read] + [r[1] for r in read])
        half = len(read)
        parts, evidence = futures[:half], client.gather(futures[half:])
    except (UnicodeDecodeError, pd.errors.ParserError) as problem:
        if futures:
            client.cancel(futures)
        if files.kind == "csv" and not files.copied:
            return None, None, None
        raise OrderDataError(f"some rows do not split into the header's fields ({str(problem).strip()[:200]})",
                             file=files.display_name,
                             fix="If quoted cells hold line breaks, read each file as one partition (blocksize None)",
                             option="blocksize") from None
    return raw, parts, evidence


def _read_and_clean(client, files: OrderFiles, directory: str, options, *, blocksize, partitions,
                    list_rows) -> ShopOnCluster:
    decimal = options.decimal or "."
    date_order = options.date_order or "day-first"
    while True:
        raw, parts, evidence_parts = _read_rows_on_cluster(client, files, options, blocksize, partitions, decimal,
                                                           date_order)
        if parts is None:  # the fast reader refused a file: read careful copies
            make_careful_copies(files, directory)
            continue
        evidence = clean.Evidence.combine(evidence_parts)

        def place(found, role, raw=raw):
            labels, rows = _rows_of_lines(client, raw, files, np.array([found[0]]))
            return int(rows[0]), found[1], labels[0]

        name = files.display_name
        chosen = clean.decide_decimal(evidence, options, files.mapping, file_name=name, place=place)
        order, date_notes = (None, [])
        if chosen == decimal:
            order, date_notes = clean.decide_dates(evidence, options, files.mapping, file_name=name, place=place)
        if chosen != decimal or (order is not None and order != date_order):
            # Some values can only be read another way: read them all so.
            client.cancel(parts)
            decimal, date_order = chosen, (order if chosen == decimal and order is not None else date_order)
            continue
        break
    clean.check_columns(evidence, options, files.mapping, file_name=name, place=place)
    order_total = clean.decide_order_total(evidence, files.mapping)
    built = client.map(_build_part, parts, order_total=order_total, pure=False)
    log_values = client.gather(client.map(_kept_log_values, built, pure=False))
    usual = clean.usual_range_of(np.concatenate(log_values + [np.zeros(0)]))
    finished = client.map(_finish_part, built, usual=usual, keep_implausible=options.keep_implausible,
                          list_rows=list_rows, pure=False)
    order_parts = client.map(lambda done: done[0], finished, pure=False)
    summaries = client.gather(client.map(lambda done: done[1], finished, pure=False))
    from distributed import wait

    wait(order_parts)
    del parts, built, finished  # released once nothing refers to them; the orders stay
    counts: dict[str, int] = {}
    noted: dict[str, int] = {}
    unrecognised: dict[str, list] = {}
    for summary in summaries:
        for code, number in summary.counts.items():
            counts[code] = counts.get(code, 0) + number
        for code, number in summary.noted.items():
            noted[code] = noted.get(code, 0) + number
        for status, (number, line) in summary.unrecognised.items():
            got = unrecognised.setdefault(status, [0, line])
            got[0] += number
            got[1] = min(got[1], line)
    for _, _, code, _ in files.set_aside:
        counts[code] = counts.get(code, 0) + 1
    statuses = {status: got[0] for status, got in sorted(unrecognised.items(), key=lambda item: item[1][1])}
    stats_parts = client.map(_partition_statistics, order_parts)
    # Partitions without orders have no statistics; the others stay on the cluster for the forecasts.
    kept = [(future, piece) for future, piece in zip(stats_parts, client.gather(stats_parts)) if piece is not None]
    del stats_parts
    pieces = [piece for _, piece in kept]
    excluded = shared.account_counts(counts, shared.REASONS)
    rows_read = int(sum(s.rows for s in summaries)) + len(files.set_aside)
    if not pieces:
        raise shared.no_usable_orders(excluded, file_name=files.display_name)
    joined = pd.concat(pieces)
    order = pd.Series(np.arange(len(joined), dtype=np.int64), index=joined.index).sort_index(kind="stable")
    order = order.to_numpy()
    stats = joined.take(order)[STATISTICS_COLUMNS + (["segment"] if files.mapping.segment else [])]
    rows_excluded = sum(excluded.values())
    notes = (list(files.notes) + shared.decimal_note(decimal, options.decimal, files.mapping.value) + date_notes
             + (shared.order_total_note(files.mapping.value) if order_total else [])
             + shared.unrecognised_status_note(statuses))
    account = {
        "file": files.display_name,
        "rows_read": rows_read,
        "rows_used": rows_read - rows_excluded,
        "rows_excluded": rows_excluded,
        "orders": int(stats["orders"].sum()),
        "customers": int(len(stats)),
        "excluded": excluded,
        "noted": shared.account_counts(noted, shared.NOTES),
        "unrecognised_statuses": statuses,
        "mapping": files.mapping.as_dict(),
        "notes": notes,
    }
    if list_rows:
        account["excluded_rows"], account["noted_rows"] = _listed_rows(client, raw, files, summaries)
    return ShopOnCluster(client=client, order_parts=order_parts, stats=stats, account=account,
                         statistics_parts=[future for future, _ in kept],
                         statistics_sizes=[len(piece) for piece in pieces], customer_order=order)


def _listed_rows(client, raw, files: OrderFiles, summaries) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Every row left out and every row noted, with file, row number and code."""
    from .duckdb_engine import sort_listed

    lines = np.concatenate([s.excluded[0] for s in summaries] + [np.zeros(0, np.int64)]).astype(np.int64)
    codes = np.concatenate([s.excluded[1] for s in summaries] + [np.zeros(0, np.int64)]).astype(np.int64)
    labels, rows = _rows_of_lines(client, raw, files, lines)
    excluded = pd.DataFrame({"file": labels, "row": rows,
                             "reason_code": np.asarray(shared.CODES, dtype=object)[codes]})
    aside = [(label, row, code) for label, row, code, _ in files.set_aside]
    if aside:
        excluded = pd.concat([excluded, pd.DataFrame(aside, columns=["file", "row", "reason_code"])],
                             ignore_index=True)
    excluded["reason"] = excluded["reason_code"].map(shared.REASONS)
    lines = np.concatenate([s.notes_listed[0] for s in summaries] + [np.zeros(0, np.int64)]).astype(np.int64)
    bits = np.concatenate([s.notes_listed[1] for s in summaries] + [np.zeros(0, np.int64)]).astype(np.int64)
    labels, rows = _rows_of_lines(client, raw, files, lines)
    labels = np.asarray(labels, dtype=object)
    parts = [pd.DataFrame({"file": labels[(bits & bit) != 0], "row": rows[(bits & bit) != 0], "note_code": code})
             for code, bit in shared.NOTE_BITS.items()]
    noted = pd.concat(parts, ignore_index=True)
    noted["note"] = noted["note_code"].map(shared.NOTES)
    return sort_listed(excluded, "reason_code"), sort_listed(noted, "note_code")


def customer_statistics_dask(source, *, scheduler=None, blocksize="64MB", partitions=None, **columns):
    """Per-customer statistics of order files, computed on a Dask cluster.

    Parameters
    ----------
    source : str, path or list of them
        CSV or Parquet files (a path, a glob pattern or a list), all with the same columns.
    scheduler : str or distributed.Client, optional
        The scheduler's address or a client; a local cluster is started (and stopped)
        when not given.
    blocksize, partitions : optional
        As for :func:`read_on_cluster`.
    **columns
        The column and reading options of :func:`forecasting.engines.customer_statistics_from_file`.

    Returns
    -------
    stats : pandas.DataFrame
        As :func:`forecasting.customers.customer_statistics`.
    account : dict
        As :meth:`forecasting.reading.ReadResult.audit`.
    """
    _require_dask()
    rules.check_plain_options("dask", sheet=columns.get("sheet"))
    with cluster_client(scheduler) as client:
        shop = read_on_cluster(source, client=client, blocksize=blocksize, partitions=partitions, **columns)
        client.cancel(shop.order_parts + shop.statistics_parts)
    return shop.stats, shop.account


# ---------------------------------------------------------------------------
# Forecasts and leave-one-out on the cluster


def _order_value_sums(orders: pd.DataFrame, origins) -> np.ndarray:
    """Sums of (x - origin) and (x - origin)^2 of the order values, money and log."""
    from ..holdout import order_value_sums

    return order_value_sums(orders["order_value"].to_numpy(dtype=np.float64), origins)


def _leave_one_out_partition(orders: pd.DataFrame, stats: pd.DataFrame, order_sums, pairs, level, next_level):
    """Per-customer sums of one partition's held-out orders (each partition holds whole customers),
    with the shop-wide statistics given."""
    from .. import evaluation
    from ..holdout import held_out_orders

    if len(orders) == 0:
        return None
    held = held_out_orders(orders, stats, order_sums=order_sums)
    if len(held.value) == 0:
        return None
    return evaluation.customer_scores(evaluation.leave_one_out(orders, stats, pairs, level=level,
                                                               next_level=next_level, held=held))


def _cluster_pairs(methods, variances, stats=None):
    """The method x spread model pairs to evaluate on the cluster: those whose leave-one-out is exact
    and needs only the per-customer statistics."""
    from .. import evaluation

    exact_methods, exact_variances = evaluation.EXACT_METHODS, evaluation.EXACT_VARIANCES
    has_segments = stats is not None and "segment" in stats.columns
    default = [m for m in exact_methods if m != "mta-segments" or has_segments]
    pairs = evaluation._combinations(default if methods is None else methods,
                                     list(exact_variances) if variances is None else variances, stats=stats)
    for method, variance in pairs:
        if method not in exact_methods or variance not in exact_variances:
            raise OrderDataError(
                f"on a cluster the leave-one-out covers the exact closed-form methods only "
                f"(got {method} with {variance} variance)", value=f"{method}/{variance}", option="engine",
                fix=f"Choose methods from {', '.join(exact_methods)} and spread models from "
                    f"{', '.join(exact_variances)}, or run on one machine with the pandas engine")
    return pairs


def _leave_one_out_table(shop: ShopOnCluster, pairs, next_level, level=0.90):
    from .. import evaluation
    from ..holdout import origins_of

    client = shop.client
    stats = shop.stats
    origins = origins_of(stats)
    order_sums = np.sum(client.gather(client.map(_order_value_sums, shop.order_parts, origins=origins,
                                                 pure=False)), axis=0)
    stats_future = client.scatter(stats, broadcast=True, hash=False)
    parts = client.gather(client.map(_leave_one_out_partition, shop.order_parts, stats=stats_future,
                                     order_sums=order_sums, pairs=pairs, level=level, next_level=next_level,
                                     pure=False))
    parts = [part for part in parts if part is not None]
    if not parts:
        table = pd.DataFrame([{"method": m, "variance": v, "sse": 0.0} for m, v in pairs],
                             columns=evaluation.RESULT_COLUMNS)
        table.attrs["held_out"] = 0
        return table
    scores = evaluation.combine_scores(parts)
    table = evaluation.summarise(scores)
    table.attrs["held_out"] = int(scores.count.sum())
    return table


def leave_one_out_on_cluster(shop: ShopOnCluster, *, methods=None, variances=None, next_level=0.80):
    """Exact leave-one-out of the closed-form methods, computed where the orders are.

    Parameters
    ----------
    shop : ShopOnCluster
        From :func:`read_on_cluster`.
    methods, variances : list of str or comma-separated str, optional
        From :data:`forecasting.evaluation.EXACT_METHODS` and
        :data:`forecasting.evaluation.EXACT_VARIANCES` (default: all of them).
    next_level : float, default 0.80
        Level of the next-order range whose coverage is reported.

    Returns
    -------
    pandas.DataFrame
        One row per method x variance: ``method, variance, sse, error_reduction_pct,
        ci_low, ci_high, coverage`` as ``evaluate_methods(...).leave_one_out`` with
        ``bootstrap=0`` (the intervals are NaN: no bootstrap on the cluster);
        ``attrs["held_out"]`` is the number of held-out orders.

    Notes
    -----
    Holding out one order changes only its customer's count, mean and sum of squares,
    and every shop-wide number through O(1) or O(K) updates of shop-wide sums (see
    :mod:`forecasting.holdout`). The per-customer table and the sums over all order
    values are broadcast to every worker; each worker runs the evaluation module's own
    exact formulas on its partition of orders (each partition holds whole customers)
    and returns sums per customer; the client joins them and summarises them as the
    evaluation module does. Methods whose leave-one-out keeps something from the fit on
    all orders (gamma-gamma, the cross-validated methods) are refused, naming the
    pandas engine.
    """
    if not 0 < next_level < 1:
        raise OrderDataError("next_level must be between 0 and 1", value=next_level)
    return _leave_one_out_table(shop, _cluster_pairs(methods, variances, shop.stats), next_level)


def _forecast_partition(stats: pd.DataFrame, rule, level, next_level) -> pd.DataFrame:
    """The forecast rows of one partition's customers (:meth:`forecasting.forecasts.ForecastRule.forecasts`)."""
    return rule.forecasts(stats, level=level, next_level=next_level)


def forecast_on_cluster(shop: ShopOnCluster, *, method="auto", variance="auto", level=0.90, next_level=0.80):
    """Forecasts for every customer: the shop-wide fit once, the customers' rows where they are.

    Parameters
    ----------
    shop : ShopOnCluster
        From :func:`read_on_cluster`.
    method, variance, level, next_level
        As for :func:`forecasting.forecasts.forecast_customers`. ``"auto"`` applies the
        automatic choice's rule (:func:`forecasting.selection.best_of`) to
        :func:`leave_one_out_on_cluster`, that is among the exact closed-form methods.

    Returns
    -------
    pandas.DataFrame
        As :func:`forecasting.forecasts.forecast_customers` of ``shop.stats`` (one row per
        customer, in the order of ``shop.stats``, and the same ``attrs["fit"]``).

    Notes
    -----
    Two steps, each written once in :mod:`forecasting.forecasts`:

    1. :func:`~forecasting.forecasts.forecast_rule` fits the shop-wide numbers on the
       per-customer table (one row per customer, already on the client): the spread model,
       the spread between customers (REML), the estimator's constants and centre, the
       effective spread of the log locations;
    2. that rule goes to the workers and each partition of customer statistics (computed and
       kept there by :func:`read_on_cluster`) becomes its forecast rows
       (:meth:`~forecasting.forecasts.ForecastRule.forecasts`), one task per partition; the
       rows come back and are put in customer order.

    Only MTA within segments, whose customers of a segment are solved together, sends each
    partition its customers' estimates and weights with the rule. Methods that need
    order-level values (the cross-validated ones) are refused by
    :func:`~forecasting.forecasts.forecast_rule` with its own message.
    """
    from ..forecasts import forecast_rule
    from ..options import METHODS
    from ..selection import best_of

    reason = None
    if method == "auto" or (variance == "auto" and not METHODS[method].own_spread):
        pairs = _cluster_pairs(None if method == "auto" else [method], None if variance == "auto" else [variance],
                               shop.stats)
        table = _leave_one_out_table(shop, pairs, 0.80)
        chosen = best_of(table, list(zip(table["method"], table["variance"])))
        method, variance, reason = chosen["method"], chosen["variance"], chosen["reason"]
    rule, fit = forecast_rule(shop.stats, method=method, variance=variance, level=level, next_level=next_level)
    client = shop.client
    order = shop.customer_order
    # Each partition's customers are rows start..end of the concatenation; rank says where each
    # of those rows is in shop.stats (what a rule that keeps values per customer needs).
    rank = np.empty(len(order), dtype=np.int64)
    rank[order] = np.arange(len(order), dtype=np.int64)
    ends = np.cumsum(shop.statistics_sizes)
    rules = client.scatter([rule.for_customers(rank[end - size:end]) for size, end in zip(shop.statistics_sizes, ends)],
                           hash=False)
    pieces = client.gather(client.map(_forecast_partition, shop.statistics_parts, rules, level=fit["level"],
                                      next_level=fit["next_level"], pure=False))
    table = pd.concat(pieces, ignore_index=True).take(order).reset_index(drop=True)
    table.attrs["fit"] = fit
    if reason is not None:
        fit["auto_choice"] = f"{method} with {variance} variance, among the exact closed-form methods: {reason}"
    return table
