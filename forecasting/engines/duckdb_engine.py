"""The duckdb engine: order files in, per-customer statistics out, computed in SQL out of core.

In: one or more CSV or Parquet files (a path, a glob pattern or a list), read by an embedded
duckdb database with a memory limit, a spill directory and a number of threads.
Out: the per-customer statistics table of :func:`forecasting.customers.customer_statistics`
(same columns, same index, same types) and the row account of
:meth:`forecasting.reading.ReadResult.audit` (rows read, used and excluded by reason code).

Every cell is read as text (``all_varchar``) and converted with ``TRY_CAST`` after the
rules below decided what it is: nothing is left to type guessing on a sample of the file,
which would lose the cents of amounts that only appear late in a file.

The cleaning rules are the pandas reader's, for plain exports (see
:mod:`forecasting.engines.rules` for what "plain" means and what stops a run).

The work, in the order :func:`customer_statistics_duckdb` runs it (each step one SQL
statement over the whole file, so that it scales with the number of rows):

1. ``records``: the file read once, each record with its reason code (a one-byte ENUM), its
   readings (customer, amount, date, the currency it names) and a hash of all its cells; the
   cells themselves are not kept (they would double the table), and what follows from the
   readings (kept or not, refund or not) is derived in the view ``classified``, since every
   stored column costs time on millions of rows (:func:`_classify`);
2. copies of earlier rows: equal readings and an equal hash of every cell (:func:`_mark_copies`);
3. the whole-column checks, on counts (:func:`_check_whole_columns`);
4. ``orders``: order lines summed, refunds netted (:func:`_build_orders`);
5. ``sums``: one pass per customer, and an exact second pass for the customers
   whose one-pass spread could be off (:func:`_sum_by_customer`, :func:`_statistics`).
"""

from __future__ import annotations

import os
import tempfile
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd

from ..customers import STATISTICS_COLUMNS
from ..errors import OrderDataError
from ..io import rules as shared
from ..io.backends import Sql, SqlOps
from ..reading import REASONS
from . import rules
from .sources import OrderFiles, make_careful_copies, open_order_files

__all__ = ["customer_statistics_duckdb"]


def _quote_identifier(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _literal(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


_WS_CLASS = "[" + rules.re2_class(rules.WHITESPACE) + "]"


def _plain_edges(expression: str) -> str:
    """SQL that is true when the first and the last character are printable ASCII (not whitespace).

    A quick test that spares the exact whitespace rules for almost every cell."""
    return (f"(ascii({expression}) BETWEEN 33 AND 126 AND ascii({expression}[-1]) BETWEEN 33 AND 126)")


def _strip(expression: str) -> str:
    """SQL for Python's ``str.strip()`` of ``expression``.

    ``trim`` with a set of characters is slow, so it only runs on the few values
    that start or end with whitespace."""
    edge = _literal(f"^{_WS_CLASS}|{_WS_CLASS}$")
    return (f"(CASE WHEN {_plain_edges(expression)} THEN {expression} "
            f"WHEN regexp_matches({expression}, {edge}) "
            f"THEN trim({expression}, {_literal(rules.WHITESPACE)}) ELSE {expression} END)")


def _is_blank(expression: str) -> str:
    """SQL for ``expression.strip() == ""``."""
    return (f"(CASE WHEN ascii({expression}) BETWEEN 33 AND 126 THEN false "
            f"ELSE regexp_full_match({expression}, {_literal(_WS_CLASS + '*')}) END)")


def _all(conditions: list[str]) -> str:
    """SQL for ``all(conditions)`` that stops at the first false one (CASE evaluates lazily)."""
    return "(CASE " + " ".join(f"WHEN NOT {c} THEN false" for c in conditions) + " ELSE true END)"


def _status_word(expression: str) -> str:
    return f"regexp_replace(lower({expression}), '[^a-z]', '', 'g')"


_WHOLE_NUMBER_TYPES = {"TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT",
                       "UINTEGER", "UBIGINT"}


def _connect(directory: str, *, memory_limit: str, threads: int | None):
    import duckdb

    # An in-memory database: duckdb spills what does not fit in memory_limit to temp_directory.
    connection = duckdb.connect(":memory:")
    connection.execute(f"SET memory_limit = {_literal(memory_limit)}")
    connection.execute(f"SET temp_directory = {_literal(os.path.join(directory, 'spill'))}")
    connection.execute("SET preserve_insertion_order = true")
    connection.execute("SET TimeZone = 'UTC'")
    connection.execute("SET enable_progress_bar = false")  # the command line shows its own progress
    if threads is not None:
        connection.execute(f"SET threads = {int(threads)}")
    return connection


def _stored_place(files: OrderFiles) -> list[str]:
    """The columns of ``records`` that say where a record came from. With one file its name is
    not stored on every row (10 million copies of a path cost half a gigabyte), and a CSV
    record's place in its file follows from its row number in ``records`` (:func:`_number_positions`)."""
    return (["file"] if len(files.paths) > 1 else []) + ([] if files.kind == "csv" else ["file_position"])


def _reader(connection, files: OrderFiles) -> str:
    """A query giving one row per record, every cell as text ('' for empty), in file order:
    the columns of :func:`_stored_place`, then ``c0, c1, ...``."""
    paths = "[" + ", ".join(_literal(p) for p in files.read_paths) + "]"
    name = "true" if len(files.paths) > 1 else "false"
    if files.kind == "csv":
        names = "[" + ", ".join(_literal(n) for n in files.columns) + "]"
        reader = (f"read_csv({paths}, all_varchar = true, header = true, names = {names}, "
                  f"delim = {_literal(files.delimiter)}, quote = '\"', escape = '\"', comment = '', skip = 0, "
                  f"strict_mode = true, allow_quoted_nulls = false, encoding = 'utf-8', filename = {name})")
        cells = [f"coalesce({_quote_identifier(n)}, '') AS c{i}" for i, n in enumerate(files.columns)]
        position = None  # not stored: see _stored_place
    else:
        reader = f"read_parquet({paths}, filename = {name}, file_row_number = true)"
        try:
            types = {row[0]: str(row[1]).upper()
                     for row in connection.execute(f"DESCRIBE SELECT * FROM {reader}").fetchall()}
        except Exception as problem:  # duckdb.Error and its subclasses
            _raise_read_problem(problem, files)
        # The pandas reader sees a whole-number column with empty cells as decimals (12 -> "12.0").
        whole = [n for n in files.columns if types[n] in _WHOLE_NUMBER_TYPES]
        with_gaps = set()
        if whole:
            gaps = connection.execute("SELECT " + ", ".join(f"bool_or({_quote_identifier(n)} IS NULL)" for n in whole)
                                      + f" FROM {reader}").fetchone()
            with_gaps = {n for n, gap in zip(whole, gaps) if gap}
        cells = []
        for i, name in enumerate(files.columns):
            column = _quote_identifier(name)
            kind = types[name]
            # Typed cells as the text the pandas reader makes of them (see sources.text_cells).
            if kind.startswith("TIMESTAMP"):
                text = f"strftime({column}, '%Y-%m-%d %H:%M:%S')"
            elif kind in ("DOUBLE", "FLOAT", "REAL"):
                text = f"CASE WHEN isnan({column}) THEN NULL ELSE CAST({column} AS VARCHAR) END"
            elif name in with_gaps:
                text = f"CAST(CAST({column} AS DOUBLE) AS VARCHAR)"
            elif kind == "BOOLEAN":
                text = f"CASE WHEN {column} IS NULL THEN NULL WHEN {column} THEN 'True' ELSE 'False' END"
            else:
                text = f"CAST({column} AS VARCHAR)"
            cells.append(f"coalesce({text}, '') AS c{i}")
        position = "file_row_number"
    place = {"file": "filename AS file", "file_position": f"{position} AS file_position"}
    return f"SELECT {', '.join([place[c] for c in _stored_place(files)] + cells)} FROM {reader}"


class _CarefulCopyNeeded(Exception):
    """duckdb's CSV reader refused a file: read a careful copy (see sources.make_careful_copies)."""


def _raise_read_problem(problem: Exception, files: OrderFiles):
    import duckdb

    if isinstance(problem, (duckdb.ParserException, duckdb.BinderException, duckdb.CatalogException)):
        raise problem  # a fault of this module's SQL, not of the file
    text = str(problem)
    where = files.display_name
    for path in files.read_paths:
        if path in text or Path(path).name in text:
            where = files.file_label(path)
    if files.kind == "csv" and not files.copied:
        raise _CarefulCopyNeeded() from None
    if "utf-8" in text.lower() or "unicode" in text.lower():
        raise OrderDataError("the file is not UTF-8 text", file=where,
                             fix="Use --engine pandas (it reads Windows-1252 and Latin-1), "
                                 "or save the export as UTF-8 CSV") from None
    if files.kind == "csv":
        line = ""
        if "Line:" in text:
            line = " near line " + text.split("Line:", 1)[1].split()[0]
        raise OrderDataError(f"some rows do not split into the header's fields{line}", file=where,
                             fix="Use --engine pandas, which lists each such row with its number") from None
    raise OrderDataError(f"the Parquet files could not be read ({type(problem).__name__})", file=where) from None


def _number_positions(connection, files: OrderFiles) -> None:
    """View ``numbered``: ``line`` orders all records (file order, then record order);
    ``file_position`` is the record's 0-based place among the records read from its file."""
    if files.kind == "csv" and len(files.paths) > 1:
        connection.execute("CREATE TABLE file_start AS SELECT file, min(rowid) AS start FROM records GROUP BY file")
        connection.execute(f"CREATE VIEW numbered AS SELECT r.rowid AS line, r.file, r.rowid - s.start "
                           f"AS file_position FROM records r JOIN file_start s USING (file)")
    else:
        file = "file" if len(files.paths) > 1 else f"{_literal(files.read_paths[0])} AS file"
        position = "rowid" if files.kind == "csv" else "file_position"
        connection.execute(f"CREATE VIEW numbered AS SELECT rowid AS line, {file}, {position} AS file_position "
                           f"FROM records")


def _row_of(files: OrderFiles, file: str, position) -> int | None:
    if position is None or (isinstance(position, float) and np.isnan(position)):
        return None
    return files.spreadsheet_row(file, int(position))


def _where(connection, files: OrderFiles, source: str, line: int, role: str):
    """``(file label, spreadsheet row, the role's cell as the reader strips it)`` of one record.

    ``records`` keeps no cells: the cell is read again from ``source`` (the query of :func:`_reader`,
    whose rows come in the order ``records`` numbers them). Only messages need it."""
    file, position = connection.execute("SELECT file, file_position FROM numbered WHERE line = ?", [line]).fetchone()
    cell = f"c{files.columns.index(getattr(files.mapping, role))}"
    value = connection.execute(f"SELECT {cell} FROM ({source}) LIMIT 1 OFFSET ?", [line]).fetchone()[0]
    return files.file_label(file), _row_of(files, file, position), \
        value.strip() if isinstance(value, str) else value


def _classify(connection, files: OrderFiles, source: str, *, currency: str | None, decimal: str) -> None:
    """Table ``records``: one row per record of ``source`` (a query, see :func:`_reader`) in file order,
    with its reason code ('' = used), its readings and ``row_key``, a hash of all its cells; view
    ``classified`` adds ``line``.

    ``kept`` (in the view) is false for blank, over-long and (after :func:`_mark_copies`) duplicate
    rows. ``row_currency`` is the currency the row names: its currency cell, or without a currency
    column the code or symbol in an amount that is not a plain number ('' for every plain amount)."""
    cells = [f"c{i}" for i in range(len(files.columns))]
    # length() counts characters; a cell has at least as many bytes (strlen) as characters, and
    # a record whose cells add up to fewer bytes than the limit has no cell over it (one sum, not
    # one test per cell, for almost every record).
    limit = rules.MAX_FIELD_CHARS
    short = _all([f"strlen({c}) <= {limit}" for c in cells])
    too_long = (f"(CASE WHEN {' + '.join(f'strlen({c})' for c in cells)} <= {limit} THEN false "
                f"ELSE NOT {short} AND NOT {_all([f'length({c}) <= {limit}' for c in cells])} END)")
    index = {name: i for i, name in enumerate(files.columns)}
    mapping = files.mapping

    def cell(role):
        column = getattr(mapping, role)
        return f"c{index[column]}" if column else None

    # The first character of the customer cell answers two questions for almost every record: the
    # record is not blank, and (with the last one) the cell has no whitespace to strip.
    customer_cell = cell("customer")
    starts_plain = f"ascii({customer_cell}) BETWEEN 33 AND 126"
    blank = f"(CASE WHEN customer_starts_plain THEN false ELSE {_all([_is_blank(c) for c in cells])} END)"
    customer = (f"(CASE WHEN customer_starts_plain AND ascii({customer_cell}[-1]) BETWEEN 33 AND 126 "
                f"THEN {customer_cell} ELSE {_strip(customer_cell)} END)")
    # A cell that is a plain number (or an ISO date) as it stands has no whitespace to strip:
    # the pattern test doubles as the edge test for almost every cell.
    iso_pattern = _literal(rules.ISO_DATE)
    iso_cell = f"regexp_full_match({cell('date')}, {iso_pattern})"
    date = f"CASE WHEN iso_cell THEN {cell('date')} ELSE {_strip(cell('date'))} END"
    # The amount rule of forecasting.io.rules, as SQL (columns a_amount, a_kind, a_currency, a_hints).
    ops = SqlOps(prefix="a_")
    read = shared.read_amount(ops, Sql(cell("value")), decimal=decimal)
    amount_columns = ", ".join(f"{ops.full_column(read[k]).text} AS amount_{k}" for k in ("amount", "kind",
                                                                                          "currency", "hints"))
    status = _status_word(cell("status")) if mapping.status else "''"
    order_text = _strip(cell("order_id")) if mapping.order_id else "''"
    segment = _strip(cell("segment")) if mapping.segment else "''"
    currency_text = _strip(cell("currency")) if mapping.currency else "''"
    row_currency = "upper(currency_text)" if mapping.currency else "amount_currency"
    code = _reason_code
    early = [f"WHEN customer = '' THEN {code('missing_customer')}"]
    if mapping.status:
        early.append(f"WHEN regexp_full_match(status_word, {_literal(rules.TEST_PATTERN)}) THEN {code('test_order')}")
        early.append(f"WHEN regexp_full_match(status_word, {_literal(rules.CANCELLED_PATTERN)}) "
                     f"THEN {code('cancelled_order')}")
    if currency:
        wanted = shared.wanted_currency(currency)
        early.append(f"WHEN row_currency <> '' AND row_currency <> {_literal(wanted)} THEN {code('other_currency')}")
    refund = "false"
    if mapping.status:
        refund = f"regexp_full_match(status_word, {_literal(rules.REFUND_PATTERN)})"
    # Every stored column costs time on ten million rows: what follows from the others is derived
    # in the view ``classified`` instead (see _derived_columns).
    computed = {"row_key": f"hash({', '.join(cells)})", "is_refund": "(amount < 0 OR refund_status)",
                "signed": "CASE WHEN amount < 0 OR refund_status THEN -abs(amount) ELSE amount END"}
    stored = _stored_place(files) + [f"{computed[name]} AS {name}" if name in computed else name
                                     for name in _readings(mapping)] + ["amount_hints AS hints"]
    connection.execute(f"CREATE TYPE reason_code AS ENUM ({', '.join(_literal(c) for c in _REASON_CODES)})")
    # Innermost first: the cells as the reader strips them, then their readings, then the reasons.
    sql = f"""
        CREATE TABLE records AS
        SELECT {', '.join(stored)},
               CASE WHEN blank THEN {code('blank_row')}
                    WHEN too_long THEN {code('oversized_field')}
                    WHEN early_reason <> '' THEN early_reason
                    WHEN amount_kind = {shared.KIND_EMPTY} THEN {code('missing_amount')}
                    WHEN amount_kind = {shared.KIND_PLACEHOLDER} THEN {code('placeholder_amount')}
                    WHEN amount_kind = {shared.KIND_BAD} THEN {code('bad_amount')}
                    WHEN date_kind = 'missing' THEN {code('missing_date')}
                    WHEN date_kind = 'other' THEN {code('other_date')}
                    WHEN date_kind = 'unreadable' THEN {code('bad_date')}
                    ELSE {code('')} END AS reason
        FROM (
            SELECT *,
                   CASE {' '.join(early)} ELSE {code('')} END AS early_reason,
                   CASE WHEN date_text = '' THEN 'missing'
                        WHEN iso_date
                             THEN CASE WHEN order_date IS NULL THEN 'other'
                                       WHEN order_date < TIMESTAMP '{rules.FIRST_DATE}'
                                         OR order_date > TIMESTAMP '{rules.LAST_DATE}' THEN 'unreadable'
                                       ELSE 'iso' END
                        WHEN regexp_matches(date_text, '[\\pL\\pN]') THEN 'other'
                        ELSE 'unreadable' END AS date_kind
            FROM (
                SELECT *, {row_currency} AS row_currency
                FROM (
                    SELECT *,
                           CASE WHEN iso_cell THEN true WHEN date_text = {cell('date')} THEN false
                                ELSE regexp_full_match(date_text, {iso_pattern}) END AS iso_date,
                           amount_amount AS amount,
                           TRY_CAST(date_text AS TIMESTAMP) AS order_date
                    FROM (
                        SELECT *, NOT blank AND NOT too_long AS kept,
                               {customer} AS customer, {date} AS date_text,
                               {order_text} AS order_text, {segment} AS segment_text, {refund} AS refund_status,
                               status_word, {currency_text} AS currency_text
                        FROM (SELECT *, ({blank}) AS blank, ({too_long}) AS too_long,
                                     {status} AS status_word, {iso_cell} AS iso_cell
                              FROM (SELECT *, {starts_plain} AS customer_starts_plain, {amount_columns}
                                    FROM ({ops.query(f"SELECT * FROM ({source})")})))))))"""
    try:
        connection.execute(sql)
    except Exception as problem:  # duckdb.Error and its subclasses: the file could not be read
        _raise_read_problem(problem, files)
    derived = _derived_columns(files)
    connection.execute(f"CREATE VIEW classified AS SELECT rowid AS line, *, {', '.join(derived)} FROM records")


def _readings(mapping) -> list[str]:
    """The columns of ``records`` that are read from a record's cells (all but its place and reason)."""
    return (["row_key", "customer"] + (["order_text"] if mapping.order_id else [])
            + (["segment_text"] if mapping.segment else []) + ["row_currency", "order_date"]
            + (["is_refund"] if mapping.status else []) + ["signed"])


# Every reason a record can get: '' (used), the row account's codes and the two that stop a run
# (formatted amounts or dates, which need the pandas reader). Stored as a duckdb ENUM (one byte).
_REASON_CODES = ("",) + tuple(REASONS) + ("placeholder_amount", "other_date")


def _reason_code(name: str) -> str:
    return f"{_literal(name)}::reason_code"


# A record that is not blank, not over-long and not a copy of an earlier one.
_KEPT = "reason NOT IN ('blank_row', 'oversized_field', 'duplicate_row')"


def _derived_columns(files: OrderFiles) -> list[str]:
    """The columns of ``classified`` computed from ``records`` when a query asks for them.

    * ``kept``: not blank, not over-long, not a copy (those are the reasons that say so);
    * ``is_refund``: without a status column, a negative amount (stored otherwise)."""
    derived = [f"{_KEPT} AS kept"]
    if not files.mapping.status:
        derived.append("signed < 0 AS is_refund")
    return derived


def _mark_copies(connection, files: OrderFiles) -> None:
    """Copies of an earlier kept row get reason ``duplicate_row`` (the earliest copy is kept).

    Two rows are copies when every reading stored for them is equal (customer, amount, date and
    the others of :func:`_classify`) and so is ``row_key``, the 64-bit hash of all their cells: the
    readings are compared exactly, and what they do not show (how an amount or a date is written,
    the columns no role reads) through the hash. Two different rows of one customer with the same
    amount and date pass only if their hashes collide, a chance of about 1 in 2^64 (5e-20) for
    each such pair. The cells themselves are not kept: comparing them would double ``records``."""
    # Both passes over every row read the table itself: the view's extra columns cost time per row.
    connection.execute(f"CREATE TABLE shared_keys AS SELECT row_key FROM records WHERE {_KEPT} "
                       "GROUP BY row_key HAVING count(*) > 1")
    if not connection.execute("SELECT count(*) FROM shared_keys").fetchone()[0]:
        return
    connection.execute(f"""
        CREATE TABLE copies AS
        SELECT line FROM (
            SELECT rowid AS line, row_number() OVER (PARTITION BY {', '.join(_readings(files.mapping))} ORDER BY rowid) AS copy_number
            FROM records WHERE {_KEPT} AND row_key IN (SELECT row_key FROM shared_keys))
        WHERE copy_number > 1""")
    connection.execute("UPDATE records SET reason = 'duplicate_row' "
                       "WHERE rowid IN (SELECT line FROM copies)")


# Reasons decided before the amount and the date are looked at.
_EARLY = "('missing_customer', 'test_order', 'cancelled_order', 'other_currency')"


def _first_line(connection, where: str) -> int | None:
    found = connection.execute(f"SELECT min(line) FROM classified WHERE kept AND {where}").fetchone()[0]
    return None if found is None else int(found)


def _first_value(connection, files: OrderFiles, source: str, where: str, role: str):
    """``(row, value)`` of the first kept record where ``where`` holds, or None (for the shared decisions)."""
    line = _first_line(connection, where)
    if line is None:
        return None
    _, row, value = _where(connection, files, source, line, role)
    return row, value


def _settle_decimal(connection, files: OrderFiles, source: str, *, option: str | None) -> str:
    """The amounts' decimal mark from the hints of the records still in play (the pandas reader's rule,
    :func:`forecasting.io.rules.decide_decimal`)."""
    in_play = f"reason NOT IN {_EARLY}"
    comma = _first_value(connection, files, source, f"{in_play} AND (hints & {shared.HINT_DECIMAL_COMMA}) <> 0", "value")
    point = _first_value(connection, files, source, f"{in_play} AND (hints & {shared.HINT_DECIMAL_POINT}) <> 0", "value")
    return shared.decide_decimal(option, comma, point, file_name=files.file_label(files.read_paths[0]),
                                 column=files.mapping.value)


def _check_whole_columns(connection, files: OrderFiles, source: str, *, currency: str | None) -> None:
    """The rules that look at a whole column, as the pandas reader applies them (``source``: see :func:`_where`)."""
    mapping = files.mapping
    if not currency:
        seen = [r[0] for r in connection.execute(
            f"SELECT DISTINCT row_currency FROM classified "
            f"WHERE kept AND reason NOT IN {_EARLY} AND row_currency <> '' ORDER BY row_currency").fetchall()]
        if len(seen) > 1:
            role = "currency" if mapping.currency else "value"
            line = _first_line(connection, f"reason NOT IN {_EARLY} AND row_currency = {_literal(seen[1])}")
            file, row, value = _where(connection, files, source, line, role)
            raise shared.several_currencies(seen, (row, value), file_name=file,
                                            column=mapping.currency or mapping.value)
    for kind, role, reading_rule, unreadable, values in (
        (None, "value", None, "reason IN ('bad_amount', 'placeholder_amount')",
         f"reason NOT IN {_EARLY} AND reason <> 'missing_amount'"),
        ("other_date", "date", "ISO dates such as 2025-03-14 or 2025-03-14 10:30",
         "reason = 'bad_date'",
         "reason IN ('', 'other_date', 'bad_date')"),
    ):
        column = getattr(mapping, role)
        line = _first_line(connection, f"reason = '{kind}'") if kind else None
        if line is not None:
            file, row, value = _where(connection, files, source, line, role)
            raise OrderDataError(
                f"the duckdb engine reads {reading_rule}; this value needs the pandas reader",
                file=file, row=row, column=column, value=value, fix="Use --engine pandas for formatted exports")
        total, bad = connection.execute(
            f"SELECT count(*), count(*) FILTER (WHERE {unreadable}) FROM classified WHERE kept AND {values}"
        ).fetchone()
        if total >= rules.UNREADABLE_MIN_VALUES and bad / total > rules.UNREADABLE_SHARE:
            file, row, value = _where(connection, files, source, _first_line(connection, unreadable), role)
            raise shared.mostly_unreadable(total, bad, (row, value), file_name=file, column=column, role=role)


def _build_orders(connection, files: OrderFiles) -> None:
    """``orders``: lines summed by order id, refunds netted (a view when every line is an order)."""
    connection.execute("""
        CREATE VIEW order_lines AS SELECT * FROM classified WHERE reason = ''""")
    if files.mapping.order_id:
        # Lines sharing a customer and an order id are one order; a line without an id is its own.
        segment = ("coalesce(first(segment_text ORDER BY line) FILTER (WHERE segment_text <> ''), 'unknown')"
                   if files.mapping.segment else "''")
        connection.execute(f"""
            CREATE TABLE orders AS
            SELECT customer, min(line) AS first_line, count(*) AS lines,
                   sum(signed ORDER BY line) AS order_value,
                   count(*) FILTER (WHERE NOT is_refund) AS purchases,
                   min(order_date) FILTER (WHERE NOT is_refund) AS order_date,
                   {segment} AS segment
            FROM order_lines
            GROUP BY customer, order_text, CASE WHEN order_text = '' THEN line END""")
    else:
        segment = "CASE WHEN segment_text = '' THEN 'unknown' ELSE segment_text END" if files.mapping.segment else "''"
        connection.execute(f"""
            CREATE VIEW orders AS
            SELECT customer, line AS first_line, 1 AS lines, signed AS order_value,
                   CASE WHEN is_refund THEN 0 ELSE 1 END AS purchases,
                   CASE WHEN is_refund THEN NULL ELSE order_date END AS order_date,
                   {segment} AS segment
            FROM order_lines""")
    connection.execute("""
        CREATE VIEW kept_orders AS
        SELECT customer, first_line, order_value, ln(order_value) AS log_value, order_date, segment
        FROM orders WHERE purchases > 0 AND order_value > 0""")


# When duckdb's one-pass sums of squares are as good as two passes (see _sum_by_customer).
_EPSILON = float(np.finfo(np.float64).eps)
_ONE_PASS_TOLERANCE = 1e-10


def _sum_by_customer(connection, with_segment: bool) -> None:
    """Table ``sums``: one pass per customer (its ``rowid`` numbers the customers).

    The sums of squared deviations come from duckdb's ``var_pop``, an updating (Welford)
    algorithm whose relative error is at most about n * kappa * eps, kappa being the
    condition number sqrt(1 + mean^2 / variance) (Chan, Golub and LeVeque 1983). Where ten
    times (1 + |mean| / sd) * n * eps exceeds 1e-10 (ten times below the 1e-9 to which the
    engines must agree), or the sum comes out as zero although the orders differ,
    ``exact_needed`` marks the customer for the exact second pass of :func:`_statistics`.
    Two cases need no second pass: orders all of one value have no spread, exactly, and two
    orders a and b have (a - b)^2 / 2, and (ln a - ln b)^2 / 2 on the log scale (the difference
    of two close numbers is exact, so this is as good as two passes; two orders a cent apart
    are the commonest ill-conditioned case).
    Typical order values (spread of the order of the mean) never need the second pass, even
    with thousands of orders; three or more wholesale orders of about 1e9 that differ by a
    few units do.
    """
    segment = (", arg_max(segment, {'day': order_date, 'line': first_line}) AS segment" if with_segment else "")

    def needs_exact(sum_sq: str, mean: str) -> str:
        return (f"({sum_sq} <= 0 OR 10 * orders * {_EPSILON!r} * (1 + abs({mean}) / sqrt({sum_sq} / orders)) "
                f"> {_ONE_PASS_TOLERANCE!r})")

    def spread(sum_sq: str, low: str, high: str) -> str:
        return (f"CASE WHEN lowest = highest THEN 0.0 WHEN orders = 2 THEN ({high} - {low}) * ({high} - {low}) / 2 "
                f"ELSE {sum_sq} END")

    connection.execute(f"""
        CREATE TABLE sums AS
        SELECT * EXCLUDE (lowest, highest),
               orders > 2 AND lowest < highest
               AND ({needs_exact('sum_sq_dev', 'mean')} OR {needs_exact('log_sum_sq_dev', 'log_mean')}) AS exact_needed
        FROM (SELECT * REPLACE ({spread('sum_sq_dev', 'lowest', 'highest')} AS sum_sq_dev,
                                {spread('log_sum_sq_dev', 'ln(lowest)', 'ln(highest)')} AS log_sum_sq_dev),
                     total / orders AS mean, log_total / orders AS log_mean
              FROM (SELECT customer, count(*) AS orders, sum(order_value) AS total, sum(log_value) AS log_total,
                           var_pop(order_value) * count(*) AS sum_sq_dev,
                           var_pop(log_value) * count(*) AS log_sum_sq_dev,
                           min(order_value) AS lowest, max(order_value) AS highest,
                           min(order_date) AS first_order, max(order_date) AS last_order{segment}
                    FROM kept_orders GROUP BY customer))""")


def _statistics(connection, with_segment: bool) -> pd.DataFrame:
    """The exact second pass where :func:`_sum_by_customer` asks for it (squared deviations from
    each customer's own mean, exact for values of any size), then the table in the layout of
    :func:`forecasting.customers.customer_statistics`."""
    # Dates in nanoseconds, the unit of the pandas engine's table, so that they arrive without a conversion.
    columns = ("rowid AS id, customer, orders, total, mean, sum_sq_dev, log_mean, log_sum_sq_dev, "
               "CAST(first_order AS TIMESTAMP_NS) AS first_order, CAST(last_order AS TIMESTAMP_NS) AS last_order"
               + (", segment" if with_segment else ""))
    with connection.cursor() as cursor:  # a fresh cursor: earlier results need not be fetched to the end
        cursor.execute("SET arrow_large_buffer_size = true")  # text as pandas keeps it: no conversion
        table = cursor.sql(f"SELECT {columns} FROM sums ORDER BY customer").to_arrow_table()
    n = table.num_rows

    def numbers(name, dtype=np.float64):
        # One array per column, the table's own and writable (a single Arrow chunk comes as a read-only view).
        values = table.column(name).to_numpy().astype(dtype, copy=False)
        return values if values.flags.writeable else values.copy()

    sum_sq, log_sum_sq = numbers("sum_sq_dev"), numbers("log_sum_sq_dev")
    if connection.execute("SELECT count(*) FROM sums WHERE exact_needed").fetchone()[0]:
        exact = connection.execute("""
            SELECT s.id, sum((o.order_value - s.mean) * (o.order_value - s.mean)) AS sum_sq_dev,
                   sum((o.log_value - s.log_mean) * (o.log_value - s.log_mean)) AS log_sum_sq_dev
            FROM kept_orders o
            JOIN (SELECT rowid AS id, customer, mean, log_mean FROM sums WHERE exact_needed) s USING (customer)
            GROUP BY s.id""").fetchnumpy()
        # Customers in sorted order; place the second-pass sums by customer number.
        place = np.empty(n, dtype=np.int64)
        place[table.column("id").to_numpy()] = np.arange(n)
        at = place[exact["id"].astype(np.int64)]
        sum_sq[at] = exact["sum_sq_dev"]
        log_sum_sq[at] = exact["log_sum_sq_dev"]
    counts = numbers("orders", np.int64)
    with np.errstate(invalid="ignore", divide="ignore"):
        log_var = np.where(counts > 1, log_sum_sq / (counts - 1), np.nan)

    stats = pd.DataFrame(
        {
            "orders": counts,
            "total": numbers("total"),
            "mean": numbers("mean"),
            "sum_sq_dev": sum_sq,
            "log_mean": numbers("log_mean"),
            "log_sum_sq_dev": log_sum_sq,
            "log_var": log_var,
            "first_order": numbers("first_order", "datetime64[ns]"),
            "last_order": numbers("last_order", "datetime64[ns]"),
        },
        columns=STATISTICS_COLUMNS,
        index=pd.Index(table.column("customer").to_pandas(), name="customer"),
        copy=False,  # every array above is this table's own; gathering them into one block costs a copy
    )
    if with_segment:
        stats["segment"] = table.column("segment").to_pandas().to_numpy(dtype=object)
    return stats


def _account(connection, files: OrderFiles) -> dict:
    counts: dict[str, int] = {}
    for code, number in connection.execute(
            "SELECT reason, count(*) FROM classified WHERE reason <> '' GROUP BY reason").fetchall():
        code = "missing_amount" if code == "placeholder_amount" else code
        counts[code] = counts.get(code, 0) + int(number)
    counts["blank_row"] = counts.get("blank_row", 0) + files.blank_lines
    for _, _, code, _ in files.set_aside:
        counts[code] = counts.get(code, 0) + 1
    for code, number in connection.execute("""
            SELECT CASE WHEN purchases = 0 THEN 'unmatched_refund' ELSE 'refunded_in_full' END, sum(lines)
            FROM orders WHERE purchases = 0 OR order_value <= 0 GROUP BY 1""").fetchall():
        counts[code] = int(number)
    rows_read = (int(connection.execute("SELECT count(*) FROM classified").fetchone()[0]) + files.blank_lines
                 + len(files.set_aside))
    excluded = {code: int(counts[code]) for code in REASONS if counts.get(code, 0) > 0}
    orders, customers = connection.execute("SELECT coalesce(sum(orders), 0), count(*) FROM sums").fetchone()
    rows_excluded = sum(excluded.values())
    return {
        "file": files.display_name,
        "rows_read": rows_read,
        "rows_used": rows_read - rows_excluded,
        "rows_excluded": rows_excluded,
        "orders": int(orders),
        "customers": int(customers),
        "excluded": excluded,
        "mapping": files.mapping.as_dict(),
        "notes": list(files.notes),
    }


def _excluded_rows(connection, files: OrderFiles) -> pd.DataFrame:
    """Every row left out, with its file, row number and reason (as the pandas reader's ``excluded``)."""
    # The lines of each order, grouped as _build_orders groups them (a line without an order id alone).
    if files.mapping.order_id:
        key = "customer, order_text, CASE WHEN order_text = '' THEN line END AS solo"
        same = "l.customer = o.customer AND l.order_text = o.order_text AND l.solo IS NOT DISTINCT FROM o.solo"
    else:
        key, same = "line AS solo", "l.solo = o.solo"
    verdicts = connection.execute(f"""
        SELECT n.file, n.file_position, v.reason FROM (
            SELECT line, CAST(reason AS VARCHAR) AS reason FROM classified WHERE reason <> ''
            UNION ALL
            SELECT l.line, CASE WHEN o.purchases = 0 THEN 'unmatched_refund' ELSE 'refunded_in_full' END
            FROM (SELECT line, {key} FROM order_lines) l
            JOIN (SELECT {key}, count(*) FILTER (WHERE NOT is_refund) AS purchases,
                         sum(signed ORDER BY line) AS order_value
                  FROM order_lines GROUP BY ALL) o ON {same}
            WHERE o.purchases = 0 OR o.order_value <= 0) v
        JOIN numbered n USING (line)""").fetchdf()
    parts = []
    for file, group in verdicts.groupby("file", sort=False):
        parts.append(pd.DataFrame({"file": files.file_label(file),
                                   "row": files.spreadsheet_rows(file, group["file_position"].to_numpy()),
                                   "reason_code": group["reason"].astype(str).replace("placeholder_amount",
                                                                                     "missing_amount").to_numpy()}))
    others = [(label, row, "blank_row") for label, row in files.blank_rows()]
    others += [(label, row, code) for label, row, code, _ in files.set_aside]
    if others:
        parts.append(pd.DataFrame(others, columns=["file", "row", "reason_code"]))
    table = (pd.concat(parts, ignore_index=True) if parts
             else pd.DataFrame({"file": [], "row": pd.Series([], dtype=np.int64), "reason_code": []}))
    table["reason"] = table["reason_code"].map(REASONS)
    return table.sort_values(["file", "row"], kind="stable").reset_index(drop=True)


def customer_statistics_duckdb(source, *, customer=None, date=None, value=None, order_id=None, status=None,
                               currency_column=None, segment=None, currency=None, date_order=None,
                               decimal=None, sheet=None, file_name=None, memory_limit="2GB",
                               temp_directory=None, threads=None, list_rows=False):
    """Per-customer statistics of order files, computed by duckdb within a memory limit.

    Parameters
    ----------
    source : str, path or list of them
        A CSV or Parquet file, a glob pattern (``"orders/*.csv"``) or a list of files;
        every file must have the same columns. Several files are read as one table.
    customer, date, value, order_id, status, currency_column, segment : str, optional
        The column playing each part, as for :func:`forecasting.reading.read_orders`.
    currency : str, optional
        Keep only amounts in this currency.
    date_order, decimal, sheet : optional
        Accepted for the same call as the pandas engine; ``decimal=","`` and ``sheet``
        are refused with a message naming ``--engine pandas``.
    file_name : str, optional
        The name shown in messages.
    memory_limit : str, default "2GB"
        duckdb's ``memory_limit``; what does not fit is spilled to ``temp_directory``.
    temp_directory : str, optional
        Where the working database and the spill files go (default: the system's
        temporary folder); removed afterwards.
    threads : int, optional
        duckdb's ``threads`` (default: every core).
    list_rows : bool, default False
        Also list every row left out: ``account["excluded_rows"]``, a table of ``file``,
        ``row``, ``reason_code`` and ``reason``.

    Returns
    -------
    stats : pandas.DataFrame
        As :func:`forecasting.customers.customer_statistics`.
    account : dict
        As :meth:`forecasting.reading.ReadResult.audit`.

    Raises
    ------
    OrderDataError
        For the pandas reader's whole-file problems, and for formatted money or dates
        (``$1,234.50``, ``14/03/2025``): the message names ``--engine pandas``.

    Notes
    -----
    Plain numbers only: money text like ``$1,234.50`` or ``1.234,50`` is not parsed
    here (its reading depends on the whole column); it stops the run with an
    :class:`~forecasting.errors.OrderDataError` naming ``--engine pandas``. See
    :mod:`forecasting.engines.rules` for the exact subset.

    The sums of squares are never computed as sum(x^2) - n mean^2, which loses every
    digit of the spread of values near 1e9. duckdb's updating (Welford) sums are kept
    where ten times their error bound is below 1e-10 relative; the few other customers (a
    spread tiny next to the amounts) get two passes, first the mean, then the squared
    deviations from it joined back to the orders.

    A row is a copy of an earlier one when its readings (customer, amount, date and the
    other roles) are equal and so is a 64-bit hash of all its cells; the cells are not kept
    (see :func:`_mark_copies` for the chance of a false match, about 5e-20 per pair of rows
    of one customer with the same amount and date).

    Lines of one order are summed in file order, as the pandas reader sums them, so
    that an order which nets to exactly zero is treated the same by both.

    Blank lines are skipped by duckdb's CSV reader; they are counted (as
    ``blank_row``) by a scan of the file that follows RFC 4180 quoting.

    Examples
    --------
    >>> import tempfile, os
    >>> folder = tempfile.mkdtemp()
    >>> path = os.path.join(folder, "orders.csv")
    >>> _ = open(path, "w").write("customer,order_date,order_value\\n"
    ...                           "fern,2025-03-01,24.00\\nfern,2025-04-02,36.00\\nivy,2025-03-05,80.00\\n")
    >>> stats, account = customer_statistics_duckdb(path, memory_limit="500MB", threads=1)
    >>> stats[["orders", "mean", "sum_sq_dev"]]
              orders  mean  sum_sq_dev
    customer
    fern           2  30.0        72.0
    ivy            1  80.0         0.0
    >>> account["rows_read"], account["rows_used"]
    (3, 3)
    """
    memory_limit = rules.check_memory_limit(memory_limit)
    threads = rules.check_threads(threads)
    rules.check_plain_options("duckdb", decimal=decimal, date_order=date_order, sheet=sheet)
    shared.check_decimal(decimal)
    if temp_directory is not None and not os.path.isdir(temp_directory):
        raise OrderDataError(f"temp_directory is not a folder (got {os.fspath(temp_directory)!r})",
                             fix="Create the folder first, or leave the option out")
    try:
        import duckdb  # noqa: F401
    except ImportError:
        raise OrderDataError("the duckdb engine needs the duckdb package",
                             fix="Install it with pip install -r requirements-scale.txt, "
                                 "or use --engine pandas") from None
    overrides = {"customer": customer, "date": date, "value": value, "order_id": order_id,
                 "status": status, "currency": currency_column, "segment": segment}
    files = open_order_files(source, overrides=overrides, file_name=file_name, scan=False)
    with tempfile.TemporaryDirectory(prefix="order-engine-", dir=temp_directory) as directory, \
            ThreadPoolExecutor(max_workers=1) as helper:
        if files.kind == "csv" and files.needs_copy:
            make_careful_copies(files, directory)
        decimal_used = decimal or "."
        while True:
            connection = _connect(directory, memory_limit=memory_limit, threads=threads)
            try:
                # duckdb skips blank lines; they are found (to be counted) while duckdb reads the file.
                scanned = helper.submit(files.scan_blank_lines) if not files.blank_records else None
                source = _reader(connection, files)
                try:
                    _classify(connection, files, source, currency=currency, decimal=decimal_used)
                except _CarefulCopyNeeded:
                    if scanned is not None:
                        scanned.result()
                    connection.close()
                    make_careful_copies(files, directory)
                    continue
                if scanned is not None:
                    scanned.result()
                _number_positions(connection, files)
                _check_record_counts(connection, files)
                _mark_copies(connection, files)
                chosen = _settle_decimal(connection, files, source, option=decimal)
                if chosen != decimal_used:
                    # Some amounts can only be read with a decimal comma: read them all so.
                    decimal_used = chosen
                    connection.close()
                    continue
                _check_whole_columns(connection, files, source, currency=currency)
                _build_orders(connection, files)
                with_segment = files.mapping.segment is not None
                _sum_by_customer(connection, with_segment)
                account = _account(connection, files)
                account["notes"] = account["notes"] + shared.decimal_note(chosen, decimal, files.mapping.value)
                if account["orders"] == 0:
                    raise shared.no_usable_orders(account["excluded"], file_name=files.display_name)
                if list_rows:
                    account["excluded_rows"] = _excluded_rows(connection, files)
                stats = _statistics(connection, with_segment)
                break
            finally:
                connection.close()
    return stats, account


def _check_record_counts(connection, files: OrderFiles) -> None:
    """The blank-line scan and duckdb must agree on how many records each file has."""
    if files.kind != "csv":
        return
    counted = dict(connection.execute("SELECT file, count(*) FROM numbered GROUP BY file").fetchall())
    for path in files.read_paths:
        scanned = files.scanned_records.get(path)
        if scanned is not None and scanned != counted.get(path, 0):
            raise OrderDataError("the quoting of the file could not be followed to count its blank rows",
                                 file=files.file_label(path),
                                 fix="Use --engine pandas, or remove the blank lines")
