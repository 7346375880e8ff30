"""Reading and cleaning order exports: a file in, one row per order out, every row accounted for.

In: a CSV/TSV (UTF-8, UTF-8 with BOM, UTF-16, Windows-1252/Latin-1; comma, semicolon, tab or
pipe), an Excel workbook (.xlsx) or a Parquet file, with one row per order or per order line.

Out: a :class:`ReadResult` holding the orders (one row per order), every row left out with
its reason (``excluded``), the rows used with a note (``noted``), and the account
``rows_read == rows_used + len(excluded)``.

This module is the library's door to :mod:`forecasting.io`: :mod:`forecasting.io.read` turns
bytes into cells (encoding, delimiter, the header below title lines, rows that do not split,
Excel sheets), :mod:`forecasting.io.clean` turns cells into orders, and
:mod:`forecasting.io.rules` holds every rule, limit, vocabulary and reason code, the same for
every engine. Row numbers are what a spreadsheet shows.

How rows are cleaned, in order (the first rule that applies gives the reason; see
:data:`forecasting.io.rules.RULE_ORDER`): blank rows, rows that do not split into the
header's fields, an unclosed quote, an over-long cell, a damaged row (a NUL byte), an exact
copy of an earlier row, a formula saved without its value, no customer, test orders,
cancelled or deleted orders, unpaid or unfinished orders (pending, failed, draft, on hold;
kept with ``keep_unpaid``), another currency than the one chosen, no amount (empty or a
placeholder such as ``n/a``), an amount that is not money, no date, a date that is not a
date, a date in the future or before 1990. Lines sharing a customer and an order id become
one order (the sum of its lines, or the order's total once when the amount column holds
it); refunds (a negative amount or a refund status) net against their order. An order with
nothing left to buy, one that nets to zero or less, and one whose amount is far outside the
shop's usual range are left out with their own reasons (implausible ones are kept with
``keep_implausible``). Whole-file problems (a required column that cannot be found, several
currencies, dates that could be read two ways) raise :class:`OrderDataError`, naming the
column role or option that fixes them.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa

from .errors import OrderDataError
from .io import rules
from .io.backends import ArrowOps
from .io.clean import ReadOptions, ReadResult, clean_orders
from .io.read import (
    ColumnMapping,
    RawTable,
    guess_mapping,
    load_raw,
    mapping_notes,
    read_cells,
    source_bytes,
    typed_cells_as_text,
)

__all__ = [
    "DATE_ORDERS",
    "NOTES",
    "REASONS",
    "ColumnMapping",
    "ReadOptions",
    "ReadResult",
    "RawTable",
    "clean_orders",
    "guess_mapping",
    "parse_dates",
    "parse_money",
    "read_cells",
    "read_orders",
    "typed_cells_as_text",
]

MAX_FILE_BYTES = rules.MAX_FILE_BYTES
MAX_COLUMNS = rules.MAX_COLUMNS
MAX_FIELD_CHARS = rules.MAX_FIELD_CHARS
REASONS = rules.REASONS
NOTES = rules.NOTES
ROLES = rules.ROLES
REQUIRED_ROLES = rules.REQUIRED_ROLES
DATE_ORDERS = rules.DATE_ORDERS


def read_orders(source, *, file_name: str | None = None, customer: str | None = None,
                date: str | None = None, value: str | None = None, order_id: str | None = None,
                status: str | None = None, currency_column: str | None = None,
                segment: str | None = None, currency: str | None = None,
                date_order: str | None = None, decimal: str | None = None,
                sheet: str | int | None = None, header_row: int | None = None,
                keep_unpaid: bool = False, keep_implausible: bool = False) -> ReadResult:
    """Read an order export and clean it, accounting for every row.

    Parameters
    ----------
    source : str, pathlib.Path, bytes or file-like
        The export. CSV/TSV text, .xlsx or .parquet (told apart by content).
    file_name : str, optional
        The name shown in messages; defaults to the path's name.
    customer, date, value, order_id, status, currency_column, segment : str, optional
        The column playing each part, overriding the guess. ``""`` means "none".
    currency : str, optional
        Keep only amounts in this currency (an ISO code such as ``"EUR"``, or a symbol such as
        ``"C$"``); needed when one file mixes currencies.
    date_order : {"day-first", "month-first"}, optional
        How to read dates like 03/04/2025 when the values do not settle it.
    decimal : {".", ","}, optional
        The decimal mark of the amounts, when the guess is wrong.
    sheet : str or int, optional
        The Excel sheet to read (a name, or its number from 0; default: the first).
    header_row : int, optional
        The spreadsheet row (from 1) that holds the column headings, for title lines above
        them; found by itself when not given.
    keep_unpaid : bool, default False
        Keep orders whose status says they were not paid or not finished (pending, failed,
        draft, on hold...); they are left out by default.
    keep_implausible : bool, default False
        Keep amounts far outside the shop's usual range and dates in the future or before
        1990; they are left out by default.

    Returns
    -------
    ReadResult

    Raises
    ------
    OrderDataError
        When the file as a whole cannot be used; the message says where and how to fix it.

    Examples
    --------
    >>> result = read_orders(b"customer,order date,amount\\nfern,2025-03-01,$24.00\\nivy,2025-03-05,n/a\\n",
    ...                      file_name="orders.csv")
    >>> result.orders["order_value"].tolist(), result.audit()["excluded"]
    ([24.0], {'missing_amount': 1})
    """
    if file_name is None:
        file_name = Path(source).name if isinstance(source, (str, Path)) else "uploaded file"
    options = ReadOptions(currency=currency, date_order=date_order, decimal=decimal, keep_unpaid=keep_unpaid,
                          keep_implausible=keep_implausible)
    raw = load_raw(source_bytes(source, file_name), file_name, sheet, header_row)
    overrides = {"customer": customer, "date": date, "value": value, "order_id": order_id,
                 "status": status, "currency": currency_column, "segment": segment}
    try:
        mapping = guess_mapping(raw.cells, overrides, file_name=file_name)
    except OrderDataError as problem:
        if sheet is None and len(raw.sheets) > 1 and problem.role is not None:
            listed = ", ".join(f"'{s}'" for s in raw.sheets)
            raise OrderDataError(f"the first sheet ('{raw.sheet}') does not look like a table of orders "
                                 f"({problem.problem})", file=file_name,
                                 fix=f"Choose the sheet that holds the orders; the workbook has the sheets {listed}",
                                 option="sheet") from None
        raise
    raw.notes.extend(mapping_notes(list(raw.cells.columns), mapping))
    return clean_orders(raw, mapping, file_name=file_name, options=options)


def parse_money(values: pd.Series, *, decimal: str | None = None, column: str = "amount",
                file_name: str = "orders", row_numbers: np.ndarray | None = None,
                notes: list[str] | None = None) -> pd.Series:
    """Read money text as floats with the reader's amount rule; what is not money becomes NaN.

    Handles ``1234.5``, ``$1,234.50``, ``1.234,50 €``, ``USD 12``, ``(12.00)`` and ``-12``/``12-``
    as negatives (see :func:`forecasting.io.rules.read_amount`). Whether the column uses a
    decimal comma is decided once for the whole column from the values that can only be
    read one way; ``decimal`` (``"."`` or ``","``) overrides that.

    Examples
    --------
    >>> parse_money(pd.Series(["$1,234.50", "(12.00)", "USD 12", "7"])).tolist()
    [1234.5, -12.0, 12.0, 7.0]
    >>> parse_money(pd.Series(["1.234,50 €", "3,5"])).tolist()
    [1234.5, 3.5]
    """
    rules.check_decimal(decimal)
    if pd.api.types.is_numeric_dtype(values):
        numbers = values.astype(np.float64)
        return numbers.where(np.isfinite(numbers))
    rows = row_numbers if row_numbers is not None else np.arange(2, len(values) + 2)
    text = pa.array(values.astype(str).tolist(), type=pa.string())
    used = decimal or "."
    while True:
        read = rules.read_amount(ArrowOps(), text, decimal=used)
        hints = read["hints"].to_numpy(zero_copy_only=False)
        found = []
        for bit in (rules.HINT_DECIMAL_COMMA, rules.HINT_DECIMAL_POINT):
            at = np.flatnonzero((hints & bit) != 0)
            found.append((int(rows[at[0]]), str(values.iloc[at[0]]).strip()) if len(at) else None)
        chosen = rules.decide_decimal(decimal, *found, file_name=file_name, column=column)
        if chosen == used:
            break
        used = chosen
    if notes is not None:
        notes.extend(rules.decimal_note(used, decimal, column))
    amounts = read["amount"].to_numpy(zero_copy_only=False).astype(np.float64)
    return pd.Series(amounts, index=values.index)


def parse_dates(values: pd.Series, *, date_order: str | None = None, column: str = "date",
                file_name: str = "orders", row_numbers: np.ndarray | None = None,
                notes: list[str] | None = None) -> pd.Series:
    """Read order dates with the reader's date rule, as the local date written; NaT where not a date.

    ISO dates (``2025-03-14``, with or without a time) are read directly. For
    ``14/03/2025``-style dates the column is read day-first or month-first as the values
    settle it (a first number above 12 means day-first, a second number above 12 means
    month-first). When no value settles it, ``date_order`` must say. See
    :func:`forecasting.io.rules.read_date` for every form read.

    Examples
    --------
    >>> parse_dates(pd.Series(["03/04/2025", "25/04/2025"])).dt.strftime("%d %b").tolist()
    ['03 Apr', '25 Apr']
    """
    rules.check_date_order(date_order)
    if pd.api.types.is_datetime64_any_dtype(values):
        if getattr(values.dt, "tz", None) is not None:
            values = values.dt.tz_localize(None)
        return values.astype("datetime64[ns]")
    rows = row_numbers if row_numbers is not None else np.arange(2, len(values) + 2)
    text = pa.array(values.astype(str).tolist(), type=pa.string())
    used = date_order or "day-first"
    while True:
        read = rules.read_date(ArrowOps(), text, date_order=used)
        hints = read["hints"].to_numpy(zero_copy_only=False)
        found = []
        for bit in (rules.HINT_DAY_FIRST, rules.HINT_MONTH_FIRST, rules.HINT_SLASHED):
            at = np.flatnonzero((hints & bit) != 0)
            found.append((int(rows[at[0]]), str(values.iloc[at[0]]).strip()) if len(at) else None)
        chosen, said = rules.decide_date_order(date_order, *found, file_name=file_name, column=column)
        if chosen is None or chosen == used:
            break
        used = chosen
    if notes is not None:
        notes.extend(said)
    micros = read["micros"]
    stamps = pd.Series(micros.to_numpy(zero_copy_only=False), index=values.index)
    return pd.to_datetime(stamps, unit="us").astype("datetime64[ns]")
