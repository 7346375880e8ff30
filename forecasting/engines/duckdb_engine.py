"""The duckdb engine: order files in, per-customer statistics out, computed in SQL out of core.

In: one or more CSV or Parquet files (a path, a glob pattern or a list), read by an embedded
duckdb database with a memory limit, a spill directory and a number of threads.
Out: the per-customer statistics table of :func:`forecasting.customers.customer_statistics`
(same columns, same index, same types) and the row account of
:meth:`forecasting.reading.ReadResult.audit` (rows read, used, left out by reason and noted).

The cleaning rules are the pandas reader's, written once in :mod:`forecasting.io.rules`: the
SQL here is built from them by :class:`forecasting.io.backends.SqlOps` (money such as
``$1,234.50``, dates such as ``14/03/2025``, statuses, currencies, e-mail ids, every reason
code). Every cell is read as text (``all_varchar``) and converted only after the rules
decided what it is. A file duckdb's CSV reader refuses, or would read otherwise than the
pandas reader (rows that do not split, an unclosed quote, cells with line breaks, text that
is not UTF-8, title lines above the header), is read through a careful copy
(:func:`forecasting.engines.sources.make_careful_copies`) that sets those rows aside with
their row numbers.

The work, in the order :func:`customer_statistics_duckdb` runs it (each step one SQL
statement over the whole file, so that it scales with the number of rows):

1. ``records``: the file read once, each record with its reason code (one byte, the index in
   :data:`forecasting.io.rules.CODES`), its readings (customer, amount, date, the currency it
   names...), a byte of flags (what it says about the column's decimal mark and date order,
   its notes) and a hash of all its cells; the cells themselves are not kept
   (:func:`_classify`);
2. copies of earlier rows: equal readings and an equal hash of every cell (:func:`_mark_copies`);
3. the whole-file decisions and refusals, from counts and first places (:func:`_evidence`);
   when the decimal mark or the date order differs from the first reading, step 1 runs
   again with it;
4. ``orders``: order lines summed, refunds netted, each order's verdict; the shop's usual
   range of order values, and the lines whose outcome their order decides (``affected``)
   (:func:`_build_orders`, :func:`_judge_orders`);
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
from ..io import clean
from ..io import rules as shared
from ..io.backends import Sql, SqlOps
from . import rules
from .sources import OrderFiles, make_careful_copies, open_order_files

__all__ = ["customer_statistics_duckdb"]

_CODE = shared.CODE
# Bits of the ``flags`` column: the rules' hints (bits 0-4), an amount or a date that is a
# placeholder (bits 5 and 6), and the row's notes (shifted by 8).
_AMOUNT_PLACEHOLDER = 32
_DATE_PLACEHOLDER = 64
_NOTES_SHIFT = 8


def _quote_identifier(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _literal(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


_WS_CLASS = "[" + rules.re2_class(shared.WHITESPACE) + "]"


def _is_blank(expression: str) -> str:
    """SQL for ``expression.strip() == ""``."""
    return (f"(CASE WHEN ascii({expression}) BETWEEN 33 AND 126 THEN false "
            f"ELSE regexp_full_match({expression}, {_literal(_WS_CLASS + '*')}) END)")


def _all(conditions: list[str]) -> str:
    """SQL for ``all(conditions)`` that stops at the first false one (CASE evaluates lazily)."""
    return "(CASE " + " ".join(f"WHEN NOT {c} THEN false" for c in conditions) + " ELSE true END)"


def _any(conditions: list[str]) -> str:
    return "(CASE " + " ".join(f"WHEN {c} THEN true" for c in conditions) + " ELSE false END)"


def _reached(rule: str) -> str:
    """SQL: no rule before ``rule`` left the row out (reason codes are numbered in rule order)."""
    return f"(reason = 0 OR reason >= {_CODE[rule]})"


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
    where = files.display_name
    for path in files.read_paths:
        if path in str(problem) or Path(path).name in str(problem):
            where = files.file_label(path)
    if files.kind == "csv" and not files.copied:
        raise _CarefulCopyNeeded() from None
    raise OrderDataError(f"the files could not be read ({type(problem).__name__}: {str(problem)[:200]})",
                         file=where, fix="Check that the file is a complete CSV or Parquet export") from None


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


def _classify(connection, files: OrderFiles, source: str, *, options: clean.ReadOptions, decimal: str,
              date_order: str, check_damage: bool) -> None:
    """Table ``records``: one row per record of ``source`` (a query, see :func:`_reader`) in file order,
    with its reason code (0 = used so far), its readings, ``flags`` and ``row_key``, a hash of all
    its cells; view ``classified`` adds ``line`` and what follows from the stored columns.

    The readings and the reason are the rules of :mod:`forecasting.io.rules` as SQL, the same
    functions the pandas reader runs over Arrow columns."""
    cells = [f"c{i}" for i in range(len(files.columns))]
    index = {name: i for i, name in enumerate(files.columns)}
    mapping = files.mapping

    def cell(role):
        column = getattr(mapping, role)
        return Sql(f"c{index[column]}") if column else None

    # length() counts characters; a cell has at least as many bytes (strlen) as characters, and a
    # record whose cells add up to fewer bytes than the limit has no cell over it (one sum, not one
    # test per cell, for almost every record).
    limit = shared.MAX_FIELD_CHARS
    short = _all([f"strlen({c}) <= {limit}" for c in cells])
    too_long = (f"(CASE WHEN {' + '.join(f'strlen({c})' for c in cells)} <= {limit} THEN false "
                f"ELSE NOT {short} AND NOT {_all([f'length({c}) <= {limit}' for c in cells])} END)")
    # The first character of the customer cell says the record is not blank, for almost every record.
    customer_cell = cell("customer").text
    blank = (f"(CASE WHEN ascii({customer_cell}) BETWEEN 33 AND 126 THEN false "
             f"ELSE {_all([_is_blank(c) for c in cells])} END)")
    damaged = (_any([f"regexp_matches({c}, {_literal(shared.DAMAGE_PATTERN)})" for c in cells])
               if check_damage else "false")
    ops = SqlOps(prefix="r_")
    customer = shared.read_customer(ops, cell("customer"))
    status = ops.let("status", shared.classify_status(ops, cell("status"))) if mapping.status else 0
    amount = shared.read_amount(ops, cell("value"), decimal=decimal)
    currency = shared.currency_of_cell(ops, cell("currency")) if mapping.currency else amount["currency"]
    when = shared.read_date(ops, cell("date"), date_order=date_order)
    dates = options.dates
    row = {"blank": Sql(blank), "too_long": Sql(too_long), "damaged": Sql(damaged), "customer": customer["customer"],
           "status": status, "currency": ops.let("row_currency", currency), "amount_kind": amount["kind"],
           "date_kind": when["kind"], "micros": when["micros"]}
    reason = shared.row_reason(ops, row, wanted_currency=options.wanted_currency, keep_unpaid=options.keep_unpaid,
                               keep_implausible=options.keep_implausible, dates=dates)
    notes = shared.row_notes(ops, row, keep_unpaid=options.keep_unpaid, keep_implausible=options.keep_implausible,
                             dates=dates)
    flags = ops.add(ops.add(ops.add(amount["hints"], when["hints"]),
                            ops.add(ops.if_else(ops.eq(amount["kind"], shared.KIND_PLACEHOLDER), _AMOUNT_PLACEHOLDER, 0),
                                    ops.if_else(ops.eq(when["kind"], shared.KIND_PLACEHOLDER), _DATE_PLACEHOLDER, 0))),
                    ops.mul(notes, 1 << _NOTES_SHIFT))
    stripped_customer = ops.strip(cell("customer"), shared.WHITESPACE)
    stored = {
        "row_key": f"hash({', '.join(cells)})",
        "customer": customer["customer"].text,
        # The customer cell as written, where it differs from the id (capitals or invisible characters
        # in an e-mail id): what tells merged ids apart.
        "written_form": ops.if_else(customer["changed"], Sql(f"hash({stripped_customer.text})"),
                                    ops.null("int")).text,
        "row_currency": ops.full_column(row["currency"]).text,
        "amount": ops.full_column(amount["amount"]).text,
        "order_date": f"make_timestamp({ops.full_column(when['micros']).text})",
        "flags": f"CAST({ops.full_column(flags).text} AS USMALLINT)",
        "reason": f"CAST({ops.full_column(reason).text} AS UTINYINT)",
    }
    if mapping.order_id:
        stored["order_text"] = ops.strip(cell("order_id"), shared.WHITESPACE).text
    if mapping.segment:
        stored["segment_text"] = ops.strip(cell("segment"), shared.WHITESPACE).text
    if mapping.status:
        stored["status"] = f"CAST({status.text} AS UTINYINT)"
        stored["status_text"] = (f"CASE WHEN {status.text} = {shared.STATUS_UNKNOWN} "
                                 f"THEN {ops.strip(cell('status'), shared.WHITESPACE).text} END")
    columns = ", ".join(list(_stored_place(files))
                        + [f"{text} AS {name}" for name, text in stored.items()])
    try:
        connection.execute(f"CREATE TABLE records AS SELECT {columns} FROM ({ops.query(f'SELECT * FROM ({source})')})")
    except Exception as problem:  # duckdb.Error and its subclasses: the file could not be read
        _raise_read_problem(problem, files)
    refund = f"(amount < 0{' OR status = ' + str(shared.STATUS_REFUND) if mapping.status else ''})"
    connection.execute(f"""
        CREATE VIEW classified AS
        SELECT rowid AS line, *, {_KEPT} AS kept, (reason = 0 AND {refund}) AS is_refund,
               CASE WHEN reason = 0 AND {refund} THEN -abs(amount) ELSE amount END AS signed
        FROM records""")


def _readings(files: OrderFiles) -> list[str]:
    """The columns of ``records`` read from a record's cells (all but its place and reason)."""
    mapping = files.mapping
    return (["row_key", "customer", "written_form"] + (["order_text"] if mapping.order_id else [])
            + (["segment_text"] if mapping.segment else []) + (["status", "status_text"] if mapping.status else [])
            + ["row_currency", "amount", "order_date", "flags"])


# A record that is not blank, not over-long, not damaged and not a copy of an earlier one.
_KEPT = (f"(reason NOT IN ({_CODE['blank_row']}, {_CODE['oversized_field']}, {_CODE['damaged_row']}, "
         f"{_CODE['duplicate_row']}))")


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
    # Rows whose readings are missing (NULL) are equal when both are missing.
    partition = ", ".join(_readings(files))
    connection.execute(f"""
        CREATE TABLE copies AS
        SELECT line FROM (
            SELECT rowid AS line, row_number() OVER (PARTITION BY {partition} ORDER BY rowid) AS copy_number
            FROM records WHERE {_KEPT} AND row_key IN (SELECT row_key FROM shared_keys))
        WHERE copy_number > 1""")
    connection.execute(f"UPDATE records SET reason = {_CODE['duplicate_row']} "
                       "WHERE rowid IN (SELECT line FROM copies)")


# ---------------------------------------------------------------------------
# Whole-file decisions


def _first_line(connection, where: str) -> int | None:
    found = connection.execute(f"SELECT min(line) FROM classified WHERE {where}").fetchone()[0]
    return None if found is None else int(found)


def _evidence(connection, files: OrderFiles) -> clean.Evidence:
    """What the rows say about the whole file, as :func:`forecasting.io.clean.gather_evidence` gathers
    it from pandas columns: first places as ``(line, None)`` (the value is read again only when a
    message or note needs it), and counts."""
    amounts, dates = _reached("missing_amount"), _reached("missing_date")

    def first(where):
        line = _first_line(connection, where)
        return None if line is None else (line, None)

    evidence = clean.Evidence(
        decimal_comma=first(f"{amounts} AND (flags & {shared.HINT_DECIMAL_COMMA}) <> 0"),
        decimal_point=first(f"{amounts} AND (flags & {shared.HINT_DECIMAL_POINT}) <> 0"),
        day_first=first(f"{dates} AND (flags & {shared.HINT_DAY_FIRST}) <> 0"),
        month_first=first(f"{dates} AND (flags & {shared.HINT_MONTH_FIRST}) <> 0"),
        slashed=first(f"{dates} AND (flags & {shared.HINT_SLASHED}) <> 0"),
    )
    evidence.currencies = {mark: (int(line), None) for mark, line in connection.execute(
        f"SELECT row_currency, min(line) FROM classified WHERE {_reached('other_currency')} AND row_currency <> '' "
        "GROUP BY row_currency").fetchall()}
    for name, in_play, missing, placeholder, bad in (
            ("amounts", amounts, "missing_amount", _AMOUNT_PLACEHOLDER, "bad_amount"),
            ("dates", dates, "missing_date", _DATE_PLACEHOLDER, "bad_date")):
        empty = f"(reason = {_CODE[missing]} AND (flags & {placeholder}) = 0)"
        unreadable = f"((reason = {_CODE[missing]} AND (flags & {placeholder}) <> 0) OR reason = {_CODE[bad]})"
        total, count, line = connection.execute(
            f"SELECT count(*), count(*) FILTER (WHERE {unreadable}), min(line) FILTER (WHERE {unreadable}) "
            f"FROM classified WHERE {in_play} AND NOT {empty}").fetchone()
        setattr(evidence, name, (int(total), int(count), None if line is None else (int(line), None)))
    if clean.needs_order_total_evidence(files.mapping):
        refund = f"(amount < 0{' OR status = ' + str(shared.STATUS_REFUND) if files.mapping.status else ''})"
        candidate = (f"(reason = 0 OR reason = {_CODE['missing_amount']}) AND NOT coalesce({refund}, false) "
                     "AND order_text <> ''")
        evidence.order_total = tuple(int(v or 0) for v in connection.execute(f"""
            SELECT count(*) FILTER (WHERE lines >= 2),
                   count(*) FILTER (WHERE lines >= 2 AND amounts <= 1 AND lines > blanks),
                   count(*) FILTER (WHERE lines >= 2 AND amounts <= 1 AND lines > blanks AND blanks > 0)
            FROM (SELECT count(*) AS lines, count(DISTINCT amount) AS amounts,
                         count(*) FILTER (WHERE reason <> 0) AS blanks
                  FROM classified WHERE {candidate} GROUP BY customer, order_text)""").fetchone())
    return evidence


def _place(connection, files: OrderFiles, source: str):
    """``place((line, value), role)`` for the shared decisions: the spreadsheet row, and the cell
    read again from the file when the evidence has no value."""
    def place(found, role):
        line, value = found
        file, row, cell_value = _where(connection, files, source, line, role)
        return row, value if value is not None else cell_value, file

    return place


# ---------------------------------------------------------------------------
# Orders


def _order_keys(files: OrderFiles) -> tuple[str, str]:
    """The columns that group lines into orders (a line without an order id is an order of its own)
    and the join condition between a line ``l`` and its order ``o``."""
    if files.mapping.order_id:
        return ("customer, order_text, CASE WHEN order_text = '' THEN line END AS solo",
                "l.customer = o.customer AND l.order_text = o.order_text AND l.solo IS NOT DISTINCT FROM o.solo")
    return "line AS solo", "l.solo = o.solo"


def _build_orders(connection, files: OrderFiles, *, order_total: bool) -> None:
    """``order_lines`` and ``orders``: lines grouped into orders, each order's sums and verdict
    (:func:`forecasting.io.rules.order_verdict`), as :func:`forecasting.io.clean.build_orders`.

    With ``order_total`` the amount is each order's total: its first purchase line carries it,
    the other purchase lines (blank or repeating it) are further lines of the order."""
    mapping = files.mapping
    eligible = "reason = 0"
    codes = ", ".join(str(_CODE[c]) for c in shared.INHERITED_REASONS)
    not_lines = ", ".join(str(_CODE[c]) for c in shared.NOT_A_LINE)
    # The further lines of an order whose first line was left out share its reason (as
    # forecasting.io.clean.inherited_reasons finds them).
    if order_total:
        connection.execute(f"""
            CREATE TABLE inherited AS
            SELECT line, first_reason FROM (
                SELECT line, reason, first_value(reason) OVER (PARTITION BY customer, order_text ORDER BY line)
                       AS first_reason
                FROM classified WHERE order_text <> '' AND reason NOT IN ({not_lines}))
            WHERE reason = {_CODE['missing_amount']} AND first_reason IN ({codes})""")
    else:
        connection.execute("CREATE TABLE inherited (line BIGINT, first_reason UTINYINT)")
    if order_total:
        refund_status = f"coalesce(status = {shared.STATUS_REFUND}, false)" if mapping.status else "false"
        eligible = (f"(reason = 0 OR (reason = {_CODE['missing_amount']} AND order_text <> '' "
                    f"AND NOT {refund_status} AND line NOT IN (SELECT line FROM inherited)))")
    key, _ = _order_keys(files)
    group = "customer, order_text, solo" if mapping.order_id else "solo"
    segment_text = ", segment_text" if mapping.segment else ""
    carrier = "purchase"
    if order_total:
        carrier = (f"purchase AND line = min(line) FILTER (WHERE purchase) OVER (PARTITION BY {group})")
    kind = "TABLE" if order_total else "VIEW"
    connection.execute(f"""
        CREATE {kind} order_lines AS
        SELECT *, {carrier} AS carrier FROM (
            SELECT line, {key}, amount, signed, is_refund, reason, order_date{segment_text},
                   reason = 0 AND NOT is_refund AS purchase
            FROM classified WHERE {eligible})""")
    counted = "(carrier OR is_refund)"
    if mapping.order_id:
        segment = ("coalesce(first(segment_text ORDER BY line) FILTER (WHERE segment_text <> ''), 'unknown')"
                   if mapping.segment else "''")
        connection.execute(f"""
            CREATE TABLE orders AS
            SELECT {group}, min(line) AS first_line,
                   sum(CASE WHEN {counted} THEN signed ELSE 0.0 END ORDER BY line) AS order_value,
                   count(*) FILTER (WHERE carrier) AS purchases,
                   count(*) FILTER (WHERE {counted} AND amount < 0) AS negatives,
                   count(*) FILTER (WHERE {counted} AND is_refund) AS refunds,
                   count(*) FILTER (WHERE reason = 0) AS read_lines,
                   min(order_date) FILTER (WHERE purchase) AS order_date,
                   {segment} AS segment
            FROM order_lines GROUP BY {group}""")
    else:
        segment = "CASE WHEN segment_text = '' THEN 'unknown' ELSE segment_text END" if mapping.segment else "''"
        connection.execute(f"""
            CREATE VIEW orders AS
            SELECT customer, solo, line AS first_line, signed AS order_value,
                   CAST(carrier AS BIGINT) AS purchases, CAST(amount < 0 AS BIGINT) AS negatives,
                   CAST(is_refund AS BIGINT) AS refunds, 1 AS read_lines,
                   CASE WHEN purchase THEN order_date END AS order_date, {segment} AS segment
            FROM (SELECT o.*, c.customer FROM order_lines o JOIN classified c USING (line))""")


def _judge_orders(connection, files: OrderFiles, *, keep_implausible: bool, order_total: bool) -> None:
    """``judged``: each order's verdict, then orders outside the shop's usual range
    (:func:`forecasting.io.rules.usual_range`, measured on the kept orders as
    :func:`forecasting.io.clean.usual_range_of` measures it); ``kept_orders``; and ``affected``,
    the lines whose outcome or notes their order decides."""
    ops = SqlOps()
    verdict = shared.order_verdict(ops, purchases=Sql("purchases"), negatives=Sql("negatives"),
                                   refunds=Sql("refunds"), value=Sql("order_value")).text
    kind = "TABLE" if files.mapping.order_id else "VIEW"
    connection.execute(f"CREATE {kind} verdicts AS SELECT *, CASE WHEN read_lines > 0 THEN {verdict} END AS verdict "
                       "FROM orders")
    count, centre = connection.execute(
        "SELECT count(*), median(ln(order_value)) FROM verdicts WHERE verdict = 0").fetchone()
    usual = None
    if count:
        spread = connection.execute(f"SELECT median(abs(ln(order_value) - {float(centre)!r})) FROM verdicts "
                                    "WHERE verdict = 0").fetchone()[0]
        usual = shared.usual_range(float(centre), float(spread), int(count))
    outside = shared.outside_usual_range(ops, Sql("ln(order_value)"), usual)
    outside = outside.text if isinstance(outside, Sql) else "false"
    if keep_implausible:
        final, kept_anyway = "verdict", f"(verdict = 0 AND {outside})"
    else:
        final = f"CASE WHEN verdict = 0 AND {outside} THEN {_CODE['implausible_amount']} ELSE verdict END"
        kept_anyway = "false"
    connection.execute(f"CREATE {kind} judged AS SELECT *, {final} AS final, {kept_anyway} AS kept_anyway "
                       "FROM verdicts")
    connection.execute("""
        CREATE VIEW kept_orders AS
        SELECT customer, first_line, order_value, ln(order_value) AS log_value, order_date, segment
        FROM judged WHERE final = 0""")
    # Lines whose order changes their outcome (left out with it) or adds a note (a further line of
    # an order total, an implausible amount kept): few, unless every order has further lines.
    continuation = shared.NOTE_BITS["continuation_line"]
    implausible = shared.NOTE_BITS["implausible_kept"]
    notes = (f"(CASE WHEN o.final = 0 AND NOT (l.carrier OR l.is_refund) THEN {continuation} ELSE 0 END "
             f"+ CASE WHEN o.final = 0 AND o.kept_anyway THEN {implausible} ELSE 0 END)")
    interesting = "final <> 0 OR kept_anyway" + (" OR verdict = 0" if order_total else "")
    _, same = _order_keys(files)
    key, _ = _order_keys(files)
    connection.execute(f"""
        CREATE TABLE affected AS
        SELECT l.line, l.reason AS own, o.final, {notes} AS order_notes
        FROM (SELECT * FROM judged WHERE verdict IS NOT NULL AND ({interesting})) o
        JOIN order_lines l ON {same}
        WHERE o.final <> 0 OR {notes} <> 0 OR l.reason <> 0
        UNION ALL
        SELECT line, {_CODE['missing_amount']} AS own, first_reason AS final, 0 AS order_notes FROM inherited""")


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


# ---------------------------------------------------------------------------
# The account


def _used(where: str = "true") -> str:
    """SQL: the records whose final outcome is to be used (their order decided in ``affected``)."""
    return (f"SELECT c.*, coalesce(a.order_notes, 0) AS order_notes FROM classified c LEFT JOIN affected a "
            f"USING (line) WHERE coalesce(a.final, c.reason) = 0 AND {where}")


def _merged_lines(connection) -> list[int]:
    """Used rows whose e-mail id is written otherwise than on the customer's first used row
    (:func:`forecasting.io.clean.finish_orders` notes the same rows)."""
    if not connection.execute("SELECT count(*) FROM records WHERE written_form IS NOT NULL").fetchone()[0]:
        return []
    return [int(line) for (line,) in connection.execute(f"""
        SELECT line FROM (
            SELECT line, form, first_value(form) OVER (PARTITION BY customer ORDER BY line) AS first_form
            FROM (SELECT line, customer, coalesce(written_form, 0) AS form FROM ({_used(
                "c.customer IN (SELECT DISTINCT customer FROM records WHERE written_form IS NOT NULL)")})))
        WHERE form <> first_form ORDER BY line""").fetchall()]


def _noted_lines(connection) -> pd.DataFrame:
    """``line, bits``: every used record with a note (its own or its order's), merged ids included."""
    own = connection.execute(f"SELECT line, (flags >> {_NOTES_SHIFT}) | order_notes AS bits "
                             f"FROM ({_used('c.flags >= 256')})").fetchdf()
    orders = connection.execute(f"""
        SELECT a.line, a.order_notes AS bits FROM affected a JOIN records r ON r.rowid = a.line
        WHERE a.final = 0 AND a.order_notes > 0 AND r.flags < 256""").fetchdf()
    merged = pd.DataFrame({"line": _merged_lines(connection)})
    merged["bits"] = shared.NOTE_BITS["merged_customer_id"]
    table = pd.concat([own, orders, merged], ignore_index=True)
    if table.empty:
        return pd.DataFrame({"line": pd.Series([], dtype=np.int64), "bits": pd.Series([], dtype=np.int64)})
    return table.astype(np.int64).groupby("line", as_index=False)["bits"].agg(np.bitwise_or.reduce)


def _account(connection, files: OrderFiles, notes: list[str]) -> dict:
    counts: dict[str, int] = {}

    def add(code: str, number: int) -> None:
        counts[code] = counts.get(code, 0) + int(number)

    for code, number in connection.execute(
            "SELECT reason, count(*) FROM classified WHERE reason <> 0 GROUP BY reason").fetchall():
        add(shared.CODES[code], number)
    for own, final, number in connection.execute("SELECT own, final, count(*) FROM affected GROUP BY ALL").fetchall():
        if own != 0:
            add(shared.CODES[own], -number)
        if final != 0:
            add(shared.CODES[final], number)
    add("blank_row", files.blank_lines)
    for _, _, code, _ in files.set_aside:
        add(code, 1)
    rows_read = (int(connection.execute("SELECT count(*) FROM records").fetchone()[0]) + files.blank_lines
                 + len(files.set_aside))
    excluded = shared.account_counts(counts, shared.REASONS)
    noted_lines = _noted_lines(connection)
    noted = {code: int(((noted_lines["bits"] & bit) != 0).sum()) for code, bit in shared.NOTE_BITS.items()}
    unrecognised = {}
    if files.mapping.status:
        unrecognised = {str(text): int(number) for text, number, _ in connection.execute(
            f"SELECT status_text, count(*), min(line) FROM ({_used('c.status_text IS NOT NULL')}) "
            "GROUP BY status_text ORDER BY 3").fetchall()}
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
        "noted": shared.account_counts(noted, shared.NOTES),
        "unrecognised_statuses": unrecognised,
        "mapping": files.mapping.as_dict(),
        "notes": notes + shared.unrecognised_status_note(unrecognised),
    }


def _placed_lines(connection, files: OrderFiles, lines: pd.DataFrame) -> pd.DataFrame:
    """``lines`` (a ``line`` column) with each record's ``file`` label and spreadsheet ``row``."""
    if lines.empty:
        return lines.assign(file=pd.Series([], dtype=object), row=pd.Series([], dtype=np.int64))
    with connection.cursor() as cursor:  # a fresh cursor: earlier results need not be fetched to the end
        cursor.register("wanted_lines", lines[["line"]])
        places = cursor.execute("SELECT n.line, n.file, n.file_position FROM numbered n "
                                "JOIN wanted_lines w USING (line)").fetchdf()
    table = lines.merge(places, on="line", how="left")
    rows = np.zeros(len(table), dtype=np.int64)
    for file, group in table.groupby("file", sort=False):
        rows[group.index.to_numpy()] = files.spreadsheet_rows(file, group["file_position"].to_numpy())
    table["row"] = rows
    table["file"] = [files.file_label(f) for f in table["file"]]
    return table


def _listed_rows(connection, files: OrderFiles) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Every row left out and every row noted, with file, row number and code (as the pandas reader's
    ``excluded`` and ``noted`` tables)."""
    out = connection.execute("""
        SELECT c.line, coalesce(a.final, c.reason) AS outcome FROM classified c LEFT JOIN affected a USING (line)
        WHERE coalesce(a.final, c.reason) <> 0""").fetchdf()
    out = _placed_lines(connection, files, out)
    out["reason_code"] = np.asarray(shared.CODES, dtype=object)[out["outcome"].to_numpy(dtype=np.int64)]
    others = [(label, row, "blank_row") for label, row in files.blank_rows()]
    others += [(label, row, code) for label, row, code, _ in files.set_aside]
    excluded = pd.concat([out[["file", "row", "reason_code"]],
                          pd.DataFrame(others, columns=["file", "row", "reason_code"])], ignore_index=True)
    excluded["reason"] = excluded["reason_code"].map(shared.REASONS)
    noted = _placed_lines(connection, files, _noted_lines(connection))
    parts = [pd.DataFrame({"file": noted["file"][(noted["bits"] & bit) != 0],
                           "row": noted["row"][(noted["bits"] & bit) != 0], "note_code": code})
             for code, bit in shared.NOTE_BITS.items()]
    noted = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=["file", "row", "note_code"])
    noted["note"] = noted["note_code"].map(shared.NOTES)
    return sort_listed(excluded, "reason_code"), sort_listed(noted, "note_code")


def sort_listed(table: pd.DataFrame, code: str) -> pd.DataFrame:
    """Listed rows in the account's order: implausible values first, then by file and row."""
    later = ~table[code].isin(["implausible_amount", "implausible_date"])
    return (table.assign(_later=later.to_numpy()).sort_values(["_later", "file", "row"], kind="stable")
            .drop(columns="_later").reset_index(drop=True))


def customer_statistics_duckdb(source, *, customer=None, date=None, value=None, order_id=None, status=None,
                               currency_column=None, segment=None, currency=None, date_order=None,
                               decimal=None, sheet=None, header_row=None, keep_unpaid=False,
                               keep_implausible=False, file_name=None, memory_limit="2GB",
                               temp_directory=None, threads=None, list_rows=False):
    """Per-customer statistics of order files, computed by duckdb within a memory limit.

    Parameters
    ----------
    source : str, path or list of them
        A CSV or Parquet file, a glob pattern (``"orders/*.csv"``) or a list of files;
        every file must have the same columns. Several files are read as one table.
    customer, date, value, order_id, status, currency_column, segment : str, optional
        The column playing each part, as for :func:`forecasting.reading.read_orders`.
    currency, date_order, decimal, header_row, keep_unpaid, keep_implausible : optional
        As for :func:`forecasting.reading.read_orders`.
    sheet : optional
        Refused: the duckdb engine reads CSV and Parquet files.
    file_name : str, optional
        The name shown in messages.
    memory_limit : str, default "2GB"
        duckdb's ``memory_limit``; what does not fit is spilled to ``temp_directory``.
    temp_directory : str, optional
        Where the working database, spill files and careful copies go (default: the system's
        temporary folder); removed afterwards.
    threads : int, optional
        duckdb's ``threads`` (default: every core).
    list_rows : bool, default False
        Also list every row left out and every row noted: ``account["excluded_rows"]``
        (``file``, ``row``, ``reason_code``, ``reason``) and ``account["noted_rows"]``
        (``file``, ``row``, ``note_code``, ``note``).

    Returns
    -------
    stats : pandas.DataFrame
        As :func:`forecasting.customers.customer_statistics`.
    account : dict
        As :meth:`forecasting.reading.ReadResult.audit`.

    Raises
    ------
    OrderDataError
        For the pandas reader's whole-file problems, with the same words.

    Notes
    -----
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

    Blank lines are skipped by duckdb's CSV reader; they are counted (as ``blank_row``) by a
    scan of the file that follows RFC 4180 quoting and also finds line breaks inside quotes
    and control characters (which send the file through the careful copy, or the rows
    through the damaged-row rule).

    Examples
    --------
    >>> import tempfile, os
    >>> folder = tempfile.mkdtemp()
    >>> path = os.path.join(folder, "orders.csv")
    >>> _ = open(path, "w").write("customer,order_date,order_value\\n"
    ...                           "fern,2025-03-01,$24.00\\nfern,2025-04-02,36.00\\nivy,2025-03-05,80.00\\n")
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
    rules.check_plain_options("duckdb", sheet=sheet)
    options = clean.ReadOptions(currency=currency, date_order=date_order, decimal=decimal, keep_unpaid=keep_unpaid,
                                keep_implausible=keep_implausible)
    if temp_directory is not None and not os.path.isdir(temp_directory):
        raise OrderDataError(f"temp_directory is not a folder (got {os.fspath(temp_directory)!r})",
                             fix="Create the folder first, or leave the option out", option="temp_directory")
    try:
        import duckdb  # noqa: F401
    except ImportError:
        raise OrderDataError("the duckdb engine needs the duckdb package",
                             fix="Install the product's requirements again (pip install -r requirements.txt, "
                                 "which lists duckdb), or read with the pandas engine", option="engine") from None
    overrides = {"customer": customer, "date": date, "value": value, "order_id": order_id,
                 "status": status, "currency": currency_column, "segment": segment}
    files = open_order_files(source, overrides=overrides, file_name=file_name, scan=False, header_row=header_row)
    with tempfile.TemporaryDirectory(prefix="order-engine-", dir=temp_directory) as directory, \
            ThreadPoolExecutor(max_workers=1) as helper:
        if files.kind == "csv" and files.needs_copy:
            make_careful_copies(files, directory)
        return _run(files, directory, helper, options, memory_limit=memory_limit, threads=threads,
                    list_rows=list_rows)


def _run(files: OrderFiles, directory: str, helper, options: clean.ReadOptions, *, memory_limit, threads,
         list_rows):
    """Steps 1-5 of the module docstring, again from step 1 when a first reading was not the right one."""
    decimal = options.decimal or "."
    date_order = options.date_order or "day-first"
    check_damage = files.kind != "csv" or any(files.damaged_bytes.values())
    while True:
        connection = _connect(directory, memory_limit=memory_limit, threads=threads)
        try:
            # The scan of each CSV file (blank lines, line breaks inside quotes, control characters)
            # runs while duckdb reads it.
            scanned = helper.submit(files.scan_blank_lines) if files.kind == "csv" and not files.damaged_bytes \
                else None
            source = _reader(connection, files)
            try:
                _classify(connection, files, source, options=options, decimal=decimal, date_order=date_order,
                          check_damage=check_damage)
            except _CarefulCopyNeeded:
                if scanned is not None:
                    scanned.result()
                make_careful_copies(files, directory)
                continue
            if scanned is not None:
                scanned.result()
            if files.kind == "csv" and files.quoted_line_break and not files.copied:
                make_careful_copies(files, directory)  # an unclosed quote reads as a cell with line breaks
                continue
            if not check_damage and any(files.damaged_bytes.values()):
                check_damage = True
                continue
            _number_positions(connection, files)
            _check_record_counts(connection, files)
            _mark_copies(connection, files)
            evidence = _evidence(connection, files)
            place = _place(connection, files, source)
            name = files.display_name
            chosen = clean.decide_decimal(evidence, options, files.mapping, file_name=name, place=place)
            if chosen != decimal:
                decimal = chosen  # some amounts can only be read with a decimal comma: read them all so
                continue
            order, date_notes = clean.decide_dates(evidence, options, files.mapping, file_name=name, place=place)
            if order is not None and order != date_order:
                date_order = order
                continue
            clean.check_columns(evidence, options, files.mapping, file_name=name, place=place)
            order_total = clean.decide_order_total(evidence, files.mapping)
            notes = (list(files.notes) + shared.decimal_note(decimal, options.decimal, files.mapping.value)
                     + date_notes + (shared.order_total_note(files.mapping.value) if order_total else []))
            _build_orders(connection, files, order_total=order_total)
            _judge_orders(connection, files, keep_implausible=options.keep_implausible, order_total=order_total)
            with_segment = files.mapping.segment is not None
            _sum_by_customer(connection, with_segment)
            account = _account(connection, files, notes)
            if account["orders"] == 0:
                raise shared.no_usable_orders(account["excluded"], file_name=files.display_name)
            if list_rows:
                account["excluded_rows"], account["noted_rows"] = _listed_rows(connection, files)
            stats = _statistics(connection, with_segment)
            return stats, account
        finally:
            connection.close()


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
                                 fix="Read it with the pandas engine, or remove the blank lines", option="engine")
