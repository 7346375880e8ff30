"""The dask engine: per-customer statistics, forecasts and exact leave-one-out on a Dask cluster.

In: one or more CSV or Parquet files (a path, a glob pattern or a list) and a Dask
distributed scheduler (its address, a client, or none for a local cluster).
Out:

* :func:`customer_statistics_dask` -- the per-customer statistics table of
  :func:`forecasting.customers.customer_statistics` and the row account of
  :meth:`forecasting.reading.ReadResult.audit`;
* :func:`read_on_cluster` -- the same, keeping the cleaned orders on the cluster as a
  :class:`ShopOnCluster` for :func:`forecast_on_cluster` and :func:`leave_one_out_on_cluster`.

How the work is split (map-reduce):

1. the files are read as text partitions (``dask.dataframe.read_csv`` / ``read_parquet``);
2. the rows are shuffled by customer, so that every row of a customer -- and so every
   copy of a duplicated row and every line of an order -- lands in one partition;
3. each partition is cleaned with the pandas reader's own order building
   (:mod:`forecasting.reading`) and summarised with
   :func:`forecasting.customers.customer_statistics` (a reduce by customer);
4. what the reader decides on a whole column (several currencies, most values
   unreadable, values only the pandas reader understands) is decided on the sums of the
   partitions' counts (a small reduce).

Leave-one-out maps over the partitions of cleaned orders with the shop-wide sums
broadcast to every worker, and adds up squared errors (see
:func:`leave_one_out_on_cluster`).
"""

from __future__ import annotations

import logging
import re
import shutil
import tempfile
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .. import reading
from ..customers import STATISTICS_COLUMNS, customer_statistics
from ..errors import OrderDataError
from ..io import rules as shared
from ..reading import REASONS, ColumnMapping
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
_ISO_DATE = re.compile(rules.ISO_DATE)
_HAS_WORD = re.compile(r"[^\W_]")  # a letter or a digit


def _require_dask():
    try:
        import dask.dataframe  # noqa: F401
        import distributed  # noqa: F401
    except ImportError:
        raise OrderDataError("the dask engine needs the dask and distributed packages",
                             fix="Install them with pip install -r requirements-scale.txt, "
                                 "or use --engine pandas or --engine duckdb") from None


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
    # Worker logs stay quiet: a file the fast CSV reader refuses is read again carefully, and
    # every problem reaches the caller as an exception anyway.
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


def _number_lines(part: pd.DataFrame, columns, kind, partition_info=None) -> pd.DataFrame:
    """Cells as text ('' for empty) and a line key that orders rows as they are in the files."""
    number = partition_info["number"] if partition_info else 0
    cells = part[columns] if kind == "csv" else text_cells(part[columns])
    cells = cells.astype(object).fillna("").astype(object)
    cells.columns = list(columns)
    cells.index = pd.RangeIndex(len(cells))
    cells[_LINE_COLUMN] = (np.int64(number) << _LINE_SHIFT) + np.arange(len(cells), dtype=np.int64)
    return cells


def _partition_files(part: pd.DataFrame, kind, partition_info=None) -> pd.DataFrame:
    """One row per partition: its number, its file (CSV) and how many rows it has."""
    number = partition_info["number"] if partition_info else 0
    path = str(part[_PATH_COLUMN].iloc[0]) if kind == "csv" and len(part) else ""
    return pd.DataFrame({"number": [number], "file": [path], "rows": [len(part)]})


# ---------------------------------------------------------------------------
# One partition of complete customers: the reader's rules, orders, statistics


@dataclass
class _PartitionSummary:
    """What the client needs from a partition besides its orders and statistics."""

    rows: int
    counts: dict
    currencies: dict  # currency -> first line key where an alive row names it
    amounts: tuple  # (values, unreadable, None, first unreadable (line, text) or None)
    dates: tuple
    decimal: tuple  # first (line, text) of an amount only a decimal comma reads, and one only a point reads
    excluded: tuple = None  # (line keys, reason codes) of the rows left out, when asked for


def _first_at(mask: np.ndarray, lines: np.ndarray, text: pd.Series):
    if not mask.any():
        return None
    at = int(np.flatnonzero(mask)[0])
    return int(lines[at]), str(text.iloc[at])


def _clean_partition(part: pd.DataFrame, columns, mapping: ColumnMapping, currency, decimal, list_rows=False):
    """The pandas reader's rules on one partition that holds every row of its customers."""
    part = part.sort_values(_LINE_COLUMN, kind="stable").reset_index(drop=True)
    cells = part[list(columns)]
    lines = part[_LINE_COLUMN].to_numpy(dtype=np.int64)
    n = len(cells)
    reason = np.full(n, "", dtype=object)

    def exclude(mask, code):
        mask = np.asarray(mask, dtype=bool) & (reason == "")
        reason[mask] = code

    text = {role: cells[col].astype(str).str.strip() if col else None for role, col in mapping.as_dict().items()}
    blank = np.ones(n, dtype=bool)
    too_long = np.zeros(n, dtype=bool)
    for col in columns:
        column = cells[col].astype(str)
        too_long |= column.str.len().to_numpy() > rules.MAX_FIELD_CHARS
        blank &= (column.str.strip() == "").to_numpy()
    exclude(blank, "blank_row")
    exclude(too_long, "oversized_field")
    exclude(cells.duplicated(keep="first").to_numpy() & ~blank, "duplicate_row")
    exclude(text["customer"].to_numpy() == "", "missing_customer")
    status = reading._status_text(cells, mapping)
    if mapping.status:
        exclude(status.str.fullmatch(rules.TEST_PATTERN).to_numpy(), "test_order")
        exclude(status.str.fullmatch(rules.CANCELLED_PATTERN).to_numpy(), "cancelled_order")

    amount_text = text["value"]
    readings = reading.amount_readings(amount_text, decimal=decimal)
    if mapping.currency:
        row_currency = text["currency"].str.upper()
    else:
        row_currency = pd.Series(readings["currency"], index=cells.index, dtype=object)
    alive = reason == ""
    named = alive & (row_currency != "").to_numpy()
    currencies = {}
    for mark, line, written in zip(row_currency[named], lines[named],
                                   (text["currency"] if mapping.currency else amount_text)[named]):
        currencies.setdefault(str(mark), (int(line), str(written)))
    if currency:
        wanted = shared.wanted_currency(currency)
        exclude((row_currency != "").to_numpy() & (row_currency != wanted).to_numpy(), "other_currency")

    alive = reason == ""
    hints = readings["hints"]
    decimal_check = (_first_at(alive & ((hints & shared.HINT_DECIMAL_COMMA) != 0), lines, amount_text),
                     _first_at(alive & ((hints & shared.HINT_DECIMAL_POINT) != 0), lines, amount_text))
    kind = readings["kind"]
    present = alive & (kind != shared.KIND_EMPTY)
    unreadable = present & ((kind == shared.KIND_PLACEHOLDER) | (kind == shared.KIND_BAD))
    amount_check = (int(present.sum()), int(unreadable.sum()), None, _first_at(unreadable, lines, amount_text))
    exclude((kind == shared.KIND_EMPTY) | (kind == shared.KIND_PLACEHOLDER), "missing_amount")
    exclude(kind == shared.KIND_BAD, "bad_amount")
    amounts = pd.Series(readings["amount"], index=cells.index)

    date_text = text["date"]
    exclude(date_text.to_numpy() == "", "missing_date")
    alive = reason == ""
    iso = alive & date_text.str.fullmatch(_ISO_DATE).to_numpy()
    dates = pd.Series(pd.NaT, index=cells.index, dtype="datetime64[ns]")
    other = alive & ~iso & date_text.str.contains(_HAS_WORD).to_numpy()
    if iso.any():
        parsed = pd.to_datetime(date_text[iso], format="ISO8601", errors="coerce", utc=True)
        parsed = parsed.dt.tz_convert(None).astype("datetime64[ns]")
        other[np.flatnonzero(iso)[parsed.isna().to_numpy()]] = True  # ISO-looking but not a date
        in_range = (parsed >= pd.Timestamp(rules.FIRST_DATE)) & (parsed <= pd.Timestamp(rules.LAST_DATE))
        dates[iso] = parsed.where(in_range)
    unreadable = alive & ~other & dates.isna().to_numpy()
    date_check = (int(alive.sum()), int(unreadable.sum()), _first_at(other, lines, date_text),
                  _first_at(unreadable, lines, date_text))
    exclude(other, "other_date")
    exclude(unreadable, "bad_date")

    open_rows = reason == ""
    if open_rows.any():
        orders, reason = reading._build_orders(cells, mapping, text, status, amounts, dates, lines, reason,
                                               open_rows)
    else:
        orders = pd.DataFrame({"customer": pd.Series([], dtype=str), "order_value": pd.Series([], dtype=float),
                               "order_date": pd.Series([], dtype="datetime64[ns]")})
        if mapping.segment:
            orders["segment"] = pd.Series([], dtype=str)
    codes, number = np.unique(reason[reason != ""], return_counts=True)
    summary = _PartitionSummary(rows=n, counts={str(c): int(k) for c, k in zip(codes, number)}, currencies=currencies,
                                amounts=amount_check, dates=date_check, decimal=decimal_check,
                                excluded=(lines[reason != ""], reason[reason != ""]) if list_rows else None)
    keep = ["customer", "order_value", "order_date"] + (["segment"] if mapping.segment else [])
    orders = orders[keep].reset_index(drop=True)
    return orders, summary


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
    """

    client: object
    order_parts: list
    stats: pd.DataFrame
    account: dict
    notes: list = field(default_factory=list)


def _rows_of_lines(client, raw, files: OrderFiles, lines: np.ndarray) -> tuple[list[str], np.ndarray]:
    """File labels and spreadsheet rows of line keys (see :func:`_number_lines`)."""
    kind = files.kind
    lines = np.asarray(lines, dtype=np.int64)
    meta = pd.DataFrame({"number": pd.Series([], dtype=np.int64), "file": pd.Series([], dtype=object),
                         "rows": pd.Series([], dtype=np.int64)})
    table = client.compute(raw.map_partitions(_partition_files, kind, meta=meta)).result()
    table = table.sort_values("number").reset_index(drop=True)
    numbers, positions = lines >> _LINE_SHIFT, lines & ((1 << _LINE_SHIFT) - 1)
    where = table.set_index("number")
    labels, rows = [], np.zeros(len(lines), dtype=np.int64)
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
    path_of = where["file"]
    in_file = offset.reindex(numbers).to_numpy() + positions
    paths = path_of.reindex(numbers).to_numpy()
    for path in pd.unique(paths):
        mask = paths == path
        # A careful copy knows each record's row; dask reads the blank lines of other files as rows.
        rows[mask] = (files.spreadsheet_rows(path, in_file[mask]) if path in files.row_numbers
                      else in_file[mask] + 2)
    labels = [files.file_label(path) for path in paths]
    return labels, rows


def _line_rows(client, raw, files: OrderFiles, wanted: list[int]) -> dict[int, tuple[str, int]]:
    """Line key -> (file label, spreadsheet row), for the few lines a message names."""
    labels, rows = _rows_of_lines(client, raw, files, np.asarray(wanted, dtype=np.int64))
    return {line: (label, int(row)) for line, label, row in zip(wanted, labels, rows)}


def _settle_decimal(client, raw, files: OrderFiles, summaries, option):
    """The amounts' decimal mark from the partitions' first telling values (the pandas reader's rule)."""
    found = []
    for k in (0, 1):
        firsts = [s.decimal[k] for s in summaries if s.decimal[k] is not None]
        if firsts:
            line, value = min(firsts)
            found.append((_line_rows(client, raw, files, [line])[line][1], value))
        else:
            found.append(None)
    return shared.decide_decimal(option, found[0], found[1], file_name=files.display_name,
                                 column=files.mapping.value)


def _check_whole_columns(client, raw, files: OrderFiles, summaries, currency):
    """The reader's whole-column rules, on the sums of the partitions' counts."""
    mapping = files.mapping

    def where(line):
        return _line_rows(client, raw, files, [line])[line]

    if not currency:
        first_seen = {}
        for summary in summaries:
            for mark, (line, written) in summary.currencies.items():
                first_seen[mark] = min((line, written), first_seen.get(mark, (line, written)))
        seen = sorted(first_seen)
        if len(seen) > 1:
            line, written = first_seen[seen[1]]
            file, row = where(line)
            raise shared.several_currencies(seen, (row, written.strip()), file_name=file,
                                            column=mapping.currency or mapping.value)
    for name, column, role, rule_text in (
            ("amounts", mapping.value, "value", None),
            ("dates", mapping.date, "date", "ISO dates such as 2025-03-14 or 2025-03-14 10:30")):
        checks = [getattr(s, name) for s in summaries]
        needs_pandas = [c[2] for c in checks if c[2] is not None]
        if needs_pandas:
            line, value = min(needs_pandas)
            file, row = where(line)
            raise OrderDataError(f"the dask engine reads {rule_text}; this value needs the pandas reader",
                                 file=file, row=row, column=column, value=value,
                                 fix="Use --engine pandas for formatted exports")
        total = sum(c[0] for c in checks)
        bad = sum(c[1] for c in checks)
        firsts = [c[3] for c in checks if c[3] is not None]
        if firsts:
            line, value = min(firsts)
            file, row = where(line)
            problem = shared.mostly_unreadable(total, bad, (row, value.strip()), file_name=file, column=column,
                                               role=role)
            if problem is not None:
                raise problem


def _clean_on_cluster(client, files: OrderFiles, blocksize, partitions, currency, decimal, list_rows):
    """The files read as text partitions, shuffled by customer and cleaned by the reader's rules.

    Returns ``(raw, order_parts, summaries)``, or ``(raw, None, None)`` when the fast CSV reader
    refused a file that has no careful copy yet."""
    from dask import delayed

    columns = list(files.columns)
    futures = []
    try:
        raw = _read_partitions(files, blocksize)  # reads the head of the first file already
        meta = pd.DataFrame({**{c: pd.Series([], dtype=object) for c in columns},
                             _LINE_COLUMN: pd.Series([], dtype=np.int64)})
        numbered = raw.map_partitions(_number_lines, columns, files.kind, meta=meta)
        customer_column = files.mapping.customer
        keyed = numbered.assign(**{_KEY_COLUMN: numbered[customer_column].str.strip()})
        shuffled = keyed.shuffle(on=_KEY_COLUMN, npartitions=partitions or raw.npartitions)
        cleaned = [delayed(_clean_partition, nout=2)(part, columns, files.mapping, currency, decimal, list_rows)
                   for part in shuffled.to_delayed()]
        futures = client.compute([c[0] for c in cleaned] + [c[1] for c in cleaned])
        half = len(cleaned)
        order_parts, summary_parts = futures[:half], futures[half:]
        summaries = client.gather(summary_parts)
    except (UnicodeDecodeError, pd.errors.ParserError) as problem:
        if futures:
            client.cancel(futures)
        if files.kind == "csv" and not files.copied:
            return None, None, None
        raise OrderDataError(f"some rows do not split into the header's fields ({str(problem).strip()[:200]})",
                             file=files.display_name,
                             fix="If quoted cells hold line breaks, read with blocksize=None") from None
    return raw, order_parts, summaries


def read_on_cluster(source, *, client, customer=None, date=None, value=None, order_id=None, status=None,
                    currency_column=None, segment=None, currency=None, date_order=None, decimal=None,
                    sheet=None, file_name=None, blocksize="64MB", partitions=None,
                    list_rows=False) -> ShopOnCluster:
    """Read and clean order files on a Dask cluster; keep the cleaned orders there.

    Parameters
    ----------
    source : str, path or list of them
        CSV or Parquet files (a path, a glob pattern or a list), all with the same columns.
    client : distributed.Client
        The cluster to work on (see :func:`cluster_client`).
    customer, date, value, order_id, status, currency_column, segment, currency : optional
        As for :func:`forecasting.reading.read_orders`.
    date_order, decimal, sheet, file_name : optional
        As for :func:`forecasting.engines.customer_statistics_from_file`.
    blocksize : str or None, default "64MB"
        Bytes of a CSV file per partition; ``None`` reads each file as one partition
        (needed when quoted fields contain line breaks).
    partitions : int, optional
        Partitions after the shuffle by customer (default: as many as were read).
    list_rows : bool, default False
        Also list every row left out in ``account["excluded_rows"]`` (``file``, ``row``,
        ``reason_code``, ``reason``).

    Returns
    -------
    ShopOnCluster
    """
    _require_dask()
    rules.check_plain_options("dask", decimal=decimal, date_order=date_order, sheet=sheet)
    if partitions is not None and (isinstance(partitions, bool) or not isinstance(partitions, int)
                                   or partitions < 1):
        raise OrderDataError(f"partitions must be a whole number, 1 or more (got {partitions!r})")
    overrides = {"customer": customer, "date": date, "value": value, "order_id": order_id,
                 "status": status, "currency": currency_column, "segment": segment}
    files = open_order_files(source, overrides=overrides, file_name=file_name)
    shared.check_decimal(decimal)
    # Careful copies (rows that do not split, text that is not UTF-8) go to a folder of this
    # machine, which a local cluster's workers read; it is removed once the orders are computed.
    directory = tempfile.mkdtemp(prefix="order-engine-")
    try:
        return _read_and_clean(client, files, directory, blocksize=blocksize, partitions=partitions,
                               currency=currency, decimal=decimal, list_rows=list_rows)
    finally:
        shutil.rmtree(directory, ignore_errors=True)


def _read_and_clean(client, files: OrderFiles, directory: str, *, blocksize, partitions, currency, decimal,
                    list_rows) -> ShopOnCluster:
    if files.kind == "csv" and files.needs_copy:
        make_careful_copies(files, directory)
    decimal_used = decimal or "."
    while True:
        raw, order_parts, summaries = _clean_on_cluster(client, files, blocksize, partitions, currency,
                                                        decimal_used, list_rows)
        if summaries is None:  # the fast reader refused a file: read careful copies
            make_careful_copies(files, directory)
            continue
        chosen = _settle_decimal(client, raw, files, summaries, decimal)
        if chosen == decimal_used:
            break
        client.cancel(order_parts)
        decimal_used = chosen
    from distributed import wait

    wait(order_parts)
    _check_whole_columns(client, raw, files, summaries, currency)
    counts: dict[str, int] = {}
    for summary in summaries:
        for code, number in summary.counts.items():
            counts[code] = counts.get(code, 0) + number
    for _, _, code, _ in files.set_aside:
        counts[code] = counts.get(code, 0) + 1
    stats_parts = client.map(_partition_statistics, order_parts)
    pieces = [p for p in client.gather(stats_parts) if p is not None]
    excluded = {code: counts[code] for code in REASONS if counts.get(code, 0) > 0}
    rows_read = int(sum(s.rows for s in summaries)) + len(files.set_aside)
    if not pieces:
        raise shared.no_usable_orders(excluded, file_name=files.display_name)
    stats = pd.concat(pieces).sort_index(kind="stable")
    stats = stats[STATISTICS_COLUMNS + (["segment"] if files.mapping.segment else [])]
    rows_excluded = sum(excluded.values())
    account = {
        "file": files.display_name,
        "rows_read": rows_read,
        "rows_used": rows_read - rows_excluded,
        "rows_excluded": rows_excluded,
        "orders": int(stats["orders"].sum()),
        "customers": int(len(stats)),
        "excluded": excluded,
        "mapping": files.mapping.as_dict(),
        "notes": list(files.notes) + shared.decimal_note(decimal_used, decimal, files.mapping.value),
    }
    if list_rows:
        account["excluded_rows"] = _excluded_rows(client, raw, files, summaries)
    return ShopOnCluster(client=client, order_parts=order_parts, stats=stats, account=account)


def _excluded_rows(client, raw, files: OrderFiles, summaries) -> pd.DataFrame:
    """Every row left out, with its file, row number and reason (as the pandas reader's ``excluded``)."""
    lines = np.concatenate([s.excluded[0] for s in summaries] + [np.zeros(0, np.int64)]).astype(np.int64)
    codes = np.concatenate([s.excluded[1] for s in summaries] + [np.zeros(0, object)]).astype(object)
    labels, rows = _rows_of_lines(client, raw, files, lines) if len(lines) else ([], np.zeros(0, np.int64))
    table = pd.DataFrame({"file": labels, "row": rows, "reason_code": codes})
    aside = [(label, row, code) for label, row, code, _ in files.set_aside]
    if aside:
        table = pd.concat([table, pd.DataFrame(aside, columns=["file", "row", "reason_code"])], ignore_index=True)
    table["reason"] = table["reason_code"].map(REASONS)
    return table.sort_values(["file", "row"], kind="stable").reset_index(drop=True)



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

    Notes
    -----
    Plain numbers and ISO dates only, as for the duckdb engine (see
    :mod:`forecasting.engines.rules`): a formatted value stops the run with an
    :class:`~forecasting.errors.OrderDataError` naming ``--engine pandas``.
    """
    _require_dask()
    rules.check_plain_options("dask", decimal=columns.get("decimal"), date_order=columns.get("date_order"),
                              sheet=columns.get("sheet"))
    with cluster_client(scheduler) as client:
        shop = read_on_cluster(source, client=client, blocksize=blocksize, partitions=partitions, **columns)
        client.cancel(shop.order_parts)
    return shop.stats, shop.account


# ---------------------------------------------------------------------------
# Forecasts and leave-one-out on the cluster


def _order_value_sums(orders: pd.DataFrame, origins) -> np.ndarray:
    """Sums of (x - origin) and (x - origin)^2 of the order values, money and log."""
    x = orders["order_value"].to_numpy(dtype=np.float64)
    money = x - origins[0]
    log = np.log(x) - origins[1]
    return np.array([money.sum(), money @ money, log.sum(), log @ log])


def _leave_one_out_partition(orders: pd.DataFrame, stats: pd.DataFrame, order_sums, pairs, next_level):
    """Squared errors and range hits of one partition's held-out orders, shop-wide sums given."""
    from .. import evaluation

    empty = {"held_out": 0, "plain": 0.0, "sse": [0.0] * len(pairs), "inside": [0] * len(pairs)}
    if len(orders) == 0:
        return empty
    held = evaluation._held_out_orders(orders, stats)
    # The fallback variance (no customer with two orders left) needs every order's value.
    held.money.sum_ov, held.money.sum_ov2 = float(order_sums[0]), float(order_sums[1])
    held.log.sum_ov, held.log.sum_ov2 = float(order_sums[2]), float(order_sums[3])
    x = held.value
    if len(x) == 0:
        return empty
    result = {"held_out": int(len(x)), "plain": float(((held.money.mean_after - x) ** 2).sum()),
              "sse": [], "inside": []}
    for method, variance in pairs:
        prediction = evaluation._loo_predict(held, method, variance, next_level=next_level)
        result["sse"].append(float(((prediction.expected - x) ** 2).sum()))
        low, high = prediction.low, prediction.high
        result["inside"].append(int(((x >= low) & (x <= high)).sum()))
    return result


def _cluster_pairs(methods, variances):
    """The method x variance pairs to evaluate on the cluster: the exact closed forms only."""
    from .. import evaluation

    exact_methods, exact_variances = evaluation.EXACT_METHODS, evaluation.EXACT_VARIANCES
    pairs = evaluation._combinations(list(exact_methods) if methods is None else methods,
                                     list(exact_variances) if variances is None else variances)
    for method, variance in pairs:
        if method not in exact_methods or variance not in exact_variances:
            raise OrderDataError(
                f"on a cluster the leave-one-out covers the exact closed-form methods only "
                f"(got {method} with {variance} variance)", value=f"{method}/{variance}",
                fix=f"Choose methods from {', '.join(exact_methods)} and variances from "
                    f"{', '.join(exact_variances)}, or use --engine pandas")
    return pairs


def _leave_one_out_table(shop: ShopOnCluster, pairs, next_level):
    from .. import evaluation

    client = shop.client
    stats = shop.stats
    origins = (float(stats["mean"].to_numpy(np.float64).mean()),
               float(stats["log_mean"].to_numpy(np.float64).mean()))
    order_sums = np.sum(client.gather(client.map(_order_value_sums, shop.order_parts, origins=origins,
                                                 pure=False)), axis=0)
    stats_future = client.scatter(stats, broadcast=True, hash=False)
    parts = client.gather(client.map(_leave_one_out_partition, shop.order_parts, stats=stats_future,
                                     order_sums=order_sums, pairs=pairs, next_level=next_level, pure=False))
    held_out = sum(p["held_out"] for p in parts)
    sse_plain = float(sum(p["plain"] for p in parts))
    rows = []
    for i, (method, variance) in enumerate(pairs):
        sse = float(sum(p["sse"][i] for p in parts))
        inside = sum(p["inside"][i] for p in parts)
        rows.append({
            "method": method,
            "variance": variance,
            "sse": sse,
            "error_reduction_pct": float(evaluation._reduction_pct(sse_plain, sse)) if held_out else np.nan,
            "ci_low": np.nan,
            "ci_high": np.nan,
            "coverage": inside / held_out if held_out else np.nan,
        })
    table = pd.DataFrame(rows, columns=["method", "variance", "sse", "error_reduction_pct", "ci_low", "ci_high",
                                        "coverage"])
    table.attrs["held_out"] = int(held_out)
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
    and every shop-wide number through O(1) updates of shop-wide sums (see
    :mod:`forecasting.evaluation`). The per-customer table and the sums over all
    order values are broadcast to every worker; each worker runs the evaluation
    module's own exact formulas on its partition of orders and returns sums of
    squared errors and counts of orders inside the next-order range; the client adds
    them up. Methods whose fast leave-one-out needs other partitions' orders (robust
    and proportional variance, gamma-gamma, the cross-validated methods) are refused
    with a message naming ``--engine pandas``.
    """
    if not 0 < next_level < 1:
        raise OrderDataError("next_level must be between 0 and 1", value=next_level)
    return _leave_one_out_table(shop, _cluster_pairs(methods, variances), next_level)


def forecast_on_cluster(shop: ShopOnCluster, *, method="mta", variance="classic", level=0.90, next_level=0.80):
    """Forecasts for every customer, computed on the cluster from the per-customer statistics.

    Parameters
    ----------
    shop : ShopOnCluster
        From :func:`read_on_cluster`.
    method, variance, level, next_level
        As for :func:`forecasting.forecasts.forecast_customers`. ``method="auto"``
        applies the evaluation module's rule (:func:`forecasting.evaluation.choose_method`)
        to :func:`leave_one_out_on_cluster`, that is among the exact closed-form methods.

    Returns
    -------
    pandas.DataFrame
        As :func:`forecasting.forecasts.forecast_customers` (one row per customer).

    Notes
    -----
    The per-customer table is one row per customer, small next to the orders, and
    every estimator needs shop-wide numbers fitted on all of it, so the forecast runs
    as one task on a worker with the whole table. Methods and variance models that
    need order-level values (``robust``, the ``-cv`` methods) are refused by
    :func:`~forecasting.forecasts.forecast_customers` with its own message.
    """
    from .. import evaluation
    from ..forecasts import forecast_customers

    reason = None
    if method == "auto":
        pairs = _cluster_pairs(None, None)
        if ("plain", "classic") not in pairs:
            pairs = [("plain", "classic")] + pairs
        chosen = evaluation._choose(_leave_one_out_table(shop, pairs, 0.80))
        method, variance, reason = chosen["method"], chosen["variance"], chosen["reason"]
    client = shop.client
    stats_future = client.scatter(shop.stats, hash=False)
    table = client.submit(forecast_customers, stats_future, method=method, variance=variance, level=level,
                          next_level=next_level, pure=False).result()
    if reason is not None:
        table.attrs.setdefault("fit", {})["auto_choice"] = (
            f"{method} with {variance} variance, among the exact closed-form methods: {reason}")
    return table
