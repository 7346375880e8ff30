"""Safe exports: tables out to CSV and Excel that cannot harm a spreadsheet user.

In: any DataFrame the product produces (forecasts, tiers, excluded rows).
Out: CSV text (RFC 4180 quoting, UTF-8) or Excel bytes, where every text cell that a
spreadsheet would run as a formula is neutralised.

A text cell starting with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return is
prefixed with a single quote, as the OWASP "CSV Injection" guidance advises. Number
columns stay numbers, so a negative amount is still ``-12.5``.

For sharing a list with an agency, :func:`pseudonymise` replaces customer ids by
salted pseudonyms (HMAC-SHA256 of the id under a secret salt): the same salt gives
the same pseudonym every time, so lists can be matched up later by whoever keeps the
salt, and nobody without it can recover or test-guess an id.
"""

from __future__ import annotations

import csv
import hashlib
import hmac
import io
import os
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


#: Decimals kept in files people read: money to the cent, shares (weights, chances) to three.
MONEY_DECIMALS = 2
SHARE_DECIMALS = 3


def rounded_for_reading(table: pd.DataFrame, *, money=(), shares=()) -> pd.DataFrame:
    """A copy of ``table`` with the ``money`` columns rounded to cents and the ``shares`` to three
    decimals, for the files people read and share (``70.49``, not ``70.48625530890325``).

    Estimates come with ranges many cents wide, so the last digits say nothing; they also make
    a file of millions of customers twice as long to write. Columns not named keep every digit,
    and the table itself is not changed.

    Examples
    --------
    >>> table = pd.DataFrame({"customer": ["fern"], "expected": [70.48625530890325], "weight": [0.55496]})
    >>> rounded_for_reading(table, money=["expected"], shares=["weight"])
      customer  expected  weight
    0     fern     70.49   0.555
    """
    out = table.copy(deep=False)  # columns are replaced, never written to
    for names, decimals in ((money, MONEY_DECIMALS), (shares, SHARE_DECIMALS)):
        for name in names:
            if name in out.columns:
                out[name] = np.round(out[name].to_numpy(dtype=np.float64), decimals)
    return out


def neutralise_cell(value):
    """Prefix a text value that a spreadsheet would treat as a formula.

    Examples
    --------
    >>> neutralise_cell("=HYPERLINK(1)"), neutralise_cell("C-001"), neutralise_cell(-3.5)
    ("'=HYPERLINK(1)", 'C-001', -3.5)
    """
    if isinstance(value, str) and value.startswith(FORMULA_STARTS):
        return "'" + value
    return value


def safe_table(table: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``table`` with text cells (and text column names) neutralised."""
    out = table.copy()
    for column in out.columns:
        series = out[column]
        if isinstance(series.dtype, pd.CategoricalDtype):
            series = series.astype(object)
        if pd.api.types.is_string_dtype(series) and not pd.api.types.is_object_dtype(series):
            # Whole-column string operations: no Python call per cell on big tables.
            risky = series.str.startswith(FORMULA_STARTS).fillna(False).to_numpy(dtype=bool)
            if risky.any():
                series = series.where(~risky, "'" + series)
            out[column] = series
        elif pd.api.types.is_object_dtype(series):
            out[column] = series.map(neutralise_cell)
    out.columns = [neutralise_cell(str(c)) for c in out.columns]
    return out


_NEEDS_QUOTES = ('"', ",", "\r", "\n")


def _any_of(text, tests):
    """Where any of ``tests`` (functions of the whole array) holds, or None when it holds nowhere.

    Plain substring kernels, one per character, are several times faster than one regular
    expression over the same characters."""
    found = None
    for test in tests:
        hits = test(text)
        if pc.any(hits).as_py():
            found = hits if found is None else pc.or_(found, hits)
    return None if found is None else pc.fill_null(found, False)


def _quoted(text):
    """RFC 4180 section 2 rules 6 and 7: a field with a comma, a quote or a line break is enclosed
    in double quotes, and a quote inside it is doubled; other fields are left bare."""
    needs = _any_of(text, [lambda t, c=c: pc.greater_equal(pc.find_substring(t, c), 0) for c in _NEEDS_QUOTES])
    if needs is None:
        return text
    enclosed = pc.binary_join_element_wise("\"", pc.replace_substring(text, "\"", "\"\""), "\"", "")
    return pc.if_else(needs, enclosed, text)


def _neutralised(text):
    """:func:`neutralise_cell` on a whole Arrow string array."""
    risky = _any_of(text, [lambda t, c=c: pc.starts_with(t, c) for c in FORMULA_STARTS])
    if risky is None:
        return text
    return pc.if_else(risky, pc.binary_join_element_wise("'", text, ""), text)


def _cells_as_text(series: pd.Series):
    """One column as an Arrow array of safe CSV fields (empty text for missing values)."""
    if pd.api.types.is_bool_dtype(series) and not series.isna().any():
        # A two-word dictionary decoded at once: no Python text per cell.
        words = pa.DictionaryArray.from_arrays(series.to_numpy(dtype=bool).view(np.int8), ["False", "True"])
        return words.cast(pa.string())
    if pd.api.types.is_datetime64_any_dtype(series):
        values = pd.Series(series)
        midnight = (values.dropna() == values.dropna().dt.normalize()).all()
        text = values.dt.strftime("%Y-%m-%d" if midnight else "%Y-%m-%d %H:%M:%S")
        return pa.array(text.fillna("").to_numpy(dtype=object), type=pa.string())
    if pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series):
        # The shortest text that reads back as exactly the same number.
        return pc.fill_null(pc.cast(pa.array(series.to_numpy(), from_pandas=True), pa.string()), "")
    if pd.api.types.is_string_dtype(series) and not pd.api.types.is_object_dtype(series):
        text = _neutralised(pc.fill_null(pa.array(series.array, type=pa.string()), ""))
    else:
        text = pa.array(["" if _is_missing(v) else str(neutralise_cell(v)) for v in series.to_numpy(dtype=object)],
                        type=pa.string())
    return _quoted(text)


def _is_missing(value) -> bool:
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):  # list-like cells are values, not gaps
        return False


def csv_bytes(table: pd.DataFrame) -> bytes:
    """The table as RFC 4180 CSV in UTF-8 (comma, double-quote quoting where needed, CRLF line ends).

    Numbers are written as the shortest text that reads back exactly (``12``, ``0.1``,
    ``1e+20``), true/false as ``True``/``False`` and dates as ``YYYY-MM-DD`` (with the time
    when a column has one). Every column is turned into text at once (Arrow compute), so a
    table of millions of customers is written in seconds.
    """
    return b"".join(_csv_pieces(table))


def _csv_pieces(table: pd.DataFrame):
    """The header, then the records in blocks of rows, as bytes-like pieces, in order."""
    header = io.StringIO()
    csv.writer(header, lineterminator="\r\n").writerow([neutralise_cell(str(c)) for c in table.columns])
    yield header.getvalue().encode("utf-8")
    if len(table) == 0 or len(table.columns) == 0:
        return
    # Arrow compute releases the GIL: blocks of rows are encoded side by side, and the caller
    # can write one block while the next are being encoded.
    edges = list(range(0, len(table), _ROWS_PER_BLOCK)) + [len(table)]
    blocks = [table.iloc[start:stop] for start, stop in zip(edges[:-1], edges[1:])]
    if len(blocks) == 1:
        yield _csv_body(blocks[0])
        return
    with ThreadPoolExecutor(max_workers=min(len(blocks), os.cpu_count() or 1)) as pool:
        yield from pool.map(_csv_body, blocks)


_ROWS_PER_BLOCK = 200_000


def _csv_body(block: pd.DataFrame) -> memoryview:
    """The records of ``block`` as CSV bytes, each ending in CRLF (a view of Arrow's buffer, not a
    copy: fresh memory for hundreds of megabytes of copies costs more than the encoding)."""
    # 64-bit offsets: the body of a big table may pass 2 GB.
    fields = []
    for i in range(len(block.columns)):
        column = block.iloc[:, i]
        if _holds_one_value(column):  # its text is made once and repeated by the join
            fields.append(pc.cast(_cells_as_text(column.iloc[:1]), pa.large_string())[0])
        else:
            fields.append(pc.cast(_contiguous(_cells_as_text(column)), pa.large_string()))
    if not any(isinstance(field, pa.Array) for field in fields):
        fields[0] = pa.repeat(fields[0], len(block))  # the join needs one column to give the rows
    comma, crlf, nothing = (pa.scalar(t, pa.large_string()) for t in (",", "\r\n", ""))
    fields[-1] = pc.binary_join_element_wise(fields[-1], crlf, nothing)
    rows = pc.binary_join_element_wise(*fields, comma) if len(fields) > 1 else fields[0]
    # The values of an Arrow string array sit end to end in one buffer: that buffer is the body.
    bounds = np.frombuffer(rows.buffers()[1], dtype=np.int64, count=len(rows) + 1, offset=rows.offset * 8)
    return memoryview(rows.buffers()[2])[int(bounds[0]):int(bounds[-1])]


def _holds_one_value(series: pd.Series) -> bool:
    """True when a column of numbers or Arrow text has two or more cells, all the same value (no gaps)."""
    if len(series) < 2 or pd.api.types.is_bool_dtype(series):
        return False
    if pd.api.types.is_numeric_dtype(series) and isinstance(series.dtype, np.dtype):
        values = series.to_numpy()
        return bool((values == values[0]).all())  # NaN equals nothing, so a gap is never "one value"
    if pd.api.types.is_string_dtype(series) and not pd.api.types.is_object_dtype(series):
        text = _contiguous(pa.array(series.array, type=pa.large_string()))
        if text.null_count or text[0] != text[-1]:  # most columns answer here, without a pass over every cell
            return False
        return bool(pc.all(pc.equal(text, text[0])).as_py())
    return False


def _contiguous(array):
    """One Arrow array (a column backed by Arrow data may come in several chunks)."""
    return array.combine_chunks() if isinstance(array, pa.ChunkedArray) else array


def csv_text(table: pd.DataFrame) -> str:
    """The table as RFC 4180 CSV text (see :func:`csv_bytes`)."""
    return csv_bytes(table).decode("utf-8")


def write_csv(table: pd.DataFrame, path) -> Path:
    """Write ``table`` as safe CSV to ``path`` and return the path."""
    path = Path(path)
    with open(path, "wb") as handle:
        for piece in _csv_pieces(table):
            handle.write(piece)
    return path


#: Headings people read, for the columns of the product's tables: Excel downloads use them (CSV files keep
#: the column names, which scripts rely on), and so do the dashboard's tables. One place for each column's words.
HEADINGS = {
    "customer": "Customer",
    "orders": "Orders so far",
    "average_order_value": "Own average order",
    "expected_next_order": "Expected next order",
    "own_history_weight": "Weight on own orders",
    "expected_low": "Usual order from",
    "expected_high": "Usual order to",
    "next_order_low": "Next order from",
    "next_order_high": "Next order to",
    "low_confidence": "Low confidence",
    "method": "Method",
    "variance": "Spread model",
    "tier": "Tier",
    "rank": "Rank",
    "tier_rule": "Who is in the tier",
    "cohort": "First ordered",
    "first_order": "First order",
    "last_order": "Last order",
    "days_known": "Days since first order",
    "chance_active": "Chance still shopping",
    "expected_orders": "Orders expected",
    "mostly_shop_pattern": "Mostly from similar customers",
    "projected_revenue": "Projected revenue",
    "projected_low": "Projected from",
    "projected_high": "Projected to",
    "revenue_range_low": "May come in from",
    "revenue_range_high": "May come in to",
    "row": "Row in file",
    "reason": "Why it was left out",
    "reason_code": "Reason code",
    "raw_text": "Row as written",
    "order_id": "Order number",
    "order_date": "Order date",
    "order_value": "Order amount",
    "segment": "Segment",
}

#: Excel number formats: money with two decimals and thousands separators, shares as percentages.
MONEY_FORMAT = "#,##0.00"
SHARE_FORMAT = "0.0%"
COUNT_FORMAT = "#,##0"
DATE_FORMAT = "yyyy-mm-dd"
_MOST_WIDTH = 40


def excel_bytes(table: pd.DataFrame, *, sheet_name: str = "forecasts", headings=None, money=(), shares=(),
                money_symbol: str = "") -> bytes:
    """The table as an .xlsx workbook; text cells are neutralised and stored as text.

    Parameters
    ----------
    table : pandas.DataFrame
        Any table of the product.
    sheet_name : str
        The worksheet's name.
    headings : mapping, optional
        Column name -> heading (for example :data:`HEADINGS`); names not in it are kept.
    money, shares : sequence of str
        Columns shown as money (two decimals, thousands separators, ``money_symbol`` in
        front) and as percentages. Other whole-number columns get thousands separators
        and date columns ``yyyy-mm-dd``.
    money_symbol : str
        The currency symbol shown in front of money cells (``"$"``, ``"€"``...).

    Notes
    -----
    The header row is frozen (it stays in view while scrolling) and carries a filter;
    the values are the table's own (a number format changes how a cell looks, not what
    it holds); missing and infinite numbers are left blank. Cells are written column by
    column with xlsxwriter (about three times faster than going through
    ``DataFrame.to_excel``), and the workbook is built in memory: nothing is written to disk.
    """
    import xlsxwriter

    buffer = io.BytesIO()
    shown = safe_table(table)
    names = [str(name) for name in table.columns]
    titles = [neutralise_cell(str(headings.get(name, name))) if headings else column
              for name, column in zip(table.columns, shown.columns)]
    # no temporary files: customer data stays off the disk
    book = xlsxwriter.Workbook(buffer, {"in_memory": True, "strings_to_formulas": False, "strings_to_urls": False,
                                        "strings_to_numbers": False})
    sheet = book.add_worksheet(sheet_name)
    symbol = money_symbol.replace('"', "")
    formats = {
        "money": book.add_format({"num_format": f'"{symbol}"{MONEY_FORMAT}' if symbol else MONEY_FORMAT}),
        "share": book.add_format({"num_format": SHARE_FORMAT}),
        "count": book.add_format({"num_format": COUNT_FORMAT}),
        "date": book.add_format({"num_format": DATE_FORMAT}),
    }
    heading_format = book.add_format({"bold": True, "bottom": 1, "text_wrap": True, "valign": "top"})
    for position, title in enumerate(titles):
        sheet.write_string(0, position, str(title), heading_format)
    for position, name in enumerate(table.columns):
        series = shown.iloc[:, position]
        if name in money:
            kind = "money"
        elif name in shares:
            kind = "share"
        elif pd.api.types.is_integer_dtype(series) and not pd.api.types.is_bool_dtype(series):
            kind = "count"
        elif pd.api.types.is_datetime64_any_dtype(series):
            kind = "date"
        else:
            kind = None
        _write_column(sheet, position, series, formats.get(kind))
        width = min(_MOST_WIDTH, max(10, len(str(titles[position])) + 2, 12 if kind == "date" else 0))
        sheet.set_column(position, position, width, formats.get(kind))
    sheet.freeze_panes(1, 0)
    if names:
        sheet.autofilter(0, 0, len(table), len(names) - 1)
    book.close()
    return buffer.getvalue()


def _write_column(sheet, position: int, series: pd.Series, cell_format) -> None:
    """One column's cells under the heading: numbers as numbers, dates as dates, the rest as text."""
    if pd.api.types.is_bool_dtype(series):
        write = sheet.write_boolean
        for row, value in enumerate(series.to_numpy(dtype=object).tolist(), start=1):
            if not _is_missing(value):
                write(row, position, bool(value))
        return
    if pd.api.types.is_numeric_dtype(series):
        values = series.to_numpy(dtype=np.float64, na_value=np.nan)
        whole = pd.api.types.is_integer_dtype(series)
        write = sheet.write_number
        kept = np.flatnonzero(np.isfinite(values))
        for row, value in zip((kept + 1).tolist(), (values[kept].astype(np.int64) if whole
                                                    else values[kept]).tolist()):
            write(row, position, value, cell_format)
        return
    if pd.api.types.is_datetime64_any_dtype(series):
        write = sheet.write_datetime
        if series.dt.tz is not None:  # Excel has no time zones: the local time as written
            series = series.dt.tz_localize(None)
        for row, value in enumerate(list(series.dt.to_pydatetime()), start=1):
            if not _is_missing(value):
                write(row, position, value, cell_format)
        return
    write = sheet.write_string
    for row, value in enumerate(series.to_numpy(dtype=object).tolist(), start=1):
        if not _is_missing(value):
            write(row, position, str(value))


#: The shortest secret phrase (salt) pseudonyms are made with.
SHORTEST_SALT = 8


def pseudonymise(table: pd.DataFrame, *, salt: str, column: str = "customer") -> pd.DataFrame:
    """A copy of ``table`` with ``column`` replaced by salted pseudonyms.

    Parameters
    ----------
    table : pandas.DataFrame
        Any export table.
    salt : str
        A secret of at least 8 characters; keep it to match pseudonyms later.
    column : str
        The column holding customer ids.

    Examples
    --------
    >>> table = pd.DataFrame({"customer": ["C-001", "C-002", "C-001"]})
    >>> out = pseudonymise(table, salt="fern-2026-secret")
    >>> bool(out["customer"].str.startswith("cust-").all()), out["customer"].nunique()
    (True, 2)
    """
    if not isinstance(salt, str) or len(salt) < SHORTEST_SALT:
        raise ValueError(f"the pseudonym salt must be a text of at least {SHORTEST_SALT} characters "
                         f"(got {len(str(salt))})")
    key = salt.encode("utf-8")

    def pseudonym(value) -> str:
        digest = hmac.new(key, str(value).encode("utf-8"), hashlib.sha256).hexdigest()
        return "cust-" + digest[:16]

    out = table.copy()
    codes, uniques = pd.factorize(out[column])
    names = [pseudonym(v) for v in uniques]
    out[column] = pd.Series(names, dtype=object).take(codes).to_numpy()
    return out
