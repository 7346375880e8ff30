"""Cleaning: a table of cells in, one row per order and the account of every row out.

In: a :class:`~forecasting.io.read.RawTable` (or any table of text cells, such as a
partition of the dask engine) and its :class:`~forecasting.io.read.ColumnMapping`.

Out: a :class:`ReadResult` holding

* ``orders``: one row per order with ``customer``, ``order_id``, ``order_date``,
  ``order_value`` (> 0, finite), ``row`` (the spreadsheet row of the order's first line) and
  ``segment`` when a segment column is mapped;
* ``excluded``: every row that was not used, with its ``row``, a ``reason_code`` and a
  plain-language ``reason`` (implausible values first), plus the row's cells;
* ``noted``: rows used with something to say (an e-mail id written another way, an Excel
  day number, a status the reader does not know, a further line of an order);
* ``rows_read == rows_used + len(excluded)``, always.

The rules are those of :mod:`forecasting.io.rules`, applied to whole columns
(:class:`~forecasting.io.backends.ArrowOps`). The work is in steps that the dask engine runs
on partitions holding every row of their customers (:func:`read_rows`,
:func:`build_orders`, :func:`finish_orders`), with the whole-file decisions between them
made on the sums of every partition's evidence; :func:`clean_orders` runs them all here.

1. :func:`read_rows`: each row's readings (customer id, status, currency, amount, date)
   and its reason (:func:`forecasting.io.rules.row_reason`), given the decimal mark and
   date order; each row's evidence about them;
2. the decisions: decimal mark and date order (read again when they differ from the first
   guess), several currencies, a column most of whose values cannot be read, whether the
   amount is each order's total;
3. :func:`build_orders`: lines grouped by customer and order id, refunds netted, each
   order's verdict (:func:`forecasting.io.rules.order_verdict`);
4. the shop's usual range of order values (:func:`forecasting.io.rules.usual_range`);
5. :func:`finish_orders`: orders outside the range, every line's final reason and notes,
   customers whose e-mail id was written several ways.
"""

from __future__ import annotations

import os
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import date
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import OrderDataError
from . import rules
from .backends import ArrowOps, may_be_blank, mix, short_text_keys
from .read import TEXT_TYPES, ColumnMapping, RawTable, text_frame

__all__ = ["Orders", "ReadOptions", "ReadResult", "Rows", "build_orders", "clean_orders", "finish_orders",
           "read_rows"]

_OPS = ArrowOps()
_CODE = rules.CODE


@dataclass(frozen=True)
class ReadOptions:
    """The reading options every engine takes, checked once.

    ``today`` is the day dates are judged against (default: today, UTC)."""

    currency: str | None = None
    date_order: str | None = None
    decimal: str | None = None
    keep_unpaid: bool = False
    keep_implausible: bool = False
    today: date | None = None

    def __post_init__(self):
        rules.check_decimal(self.decimal)
        rules.check_date_order(self.date_order)
        for name in ("keep_unpaid", "keep_implausible"):
            if not isinstance(getattr(self, name), bool):
                raise OrderDataError(f"{name.replace('_', ' ')} must be true or false (got {getattr(self, name)!r})",
                                     value=getattr(self, name), fix="Choose yes or no", option=name)

    @property
    def wanted_currency(self) -> str | None:
        return rules.wanted_currency(self.currency)

    @property
    def dates(self) -> tuple[int, int]:
        return rules.plausible_dates(self.today)


def arrow_text(values) -> pa.Array:
    """A column of text cells as one Arrow string array ('' for missing); an Arrow-backed column is
    not copied."""
    if isinstance(values, (pa.Array, pa.ChunkedArray)):
        array = values
    else:
        try:
            array = pa.array(values, type=pa.string(), from_pandas=True)
        except (pa.ArrowInvalid, pa.ArrowTypeError):
            array = pa.array(values.astype(str), type=pa.string())
    array = _one_chunk(array)
    if array.type != pa.string():
        array = array.cast(pa.string())
    return pc.fill_null(array, "") if array.null_count else array


def _one_chunk(array):
    if isinstance(array, pa.ChunkedArray):
        return array.chunk(0) if array.num_chunks == 1 else array.combine_chunks()
    return array


def _numpy(array, dtype, fill=None) -> np.ndarray:
    if fill is not None and array.null_count:
        array = pc.fill_null(array, fill)
    return _one_chunk(array).to_numpy(zero_copy_only=False).astype(dtype, copy=False)


def pandas_text(array) -> pd.Series:
    """An Arrow string array as a pandas Series of pandas' Arrow-backed text (comparisons give numpy
    booleans)."""
    return pd.Series(_one_chunk(array).to_pandas(types_mapper=TEXT_TYPES.get))


def encode_text(array) -> tuple[np.ndarray, pa.Array]:
    """``(codes, values)``: each text's number (int32) among the distinct ``values``, in the order
    they first appear (:meth:`~forecasting.io.backends.ArrowOps.distinct`)."""
    return _OPS.distinct(array)


def sorted_order(values: pa.Array) -> np.ndarray:
    """Positions that put Arrow text in order (by code point, as Python sorts text).

    Texts of at most eight bytes without a NUL byte (most customer numbers) are sorted as the
    64-bit numbers their bytes make (:func:`~forecasting.io.backends.short_text_keys`)."""
    keys = short_text_keys(values)
    if keys is None:
        return pc.sort_indices(values).to_numpy(zero_copy_only=False)
    return np.argsort(keys, kind="stable")


def text_categories(codes: np.ndarray, values: pa.Array, order: np.ndarray | None = None) -> pd.Categorical:
    """Codes into ``values`` (Arrow text) as a pandas Categorical: its categories are the values used,
    sorted (as text sorts in Python), so that codes are the groups a sorting factorize makes.
    ``order`` is :func:`sorted_order` of ``values`` when it is known already."""
    used = np.bincount(codes, minlength=len(values)) > 0 if len(codes) else np.zeros(len(values), dtype=bool)
    if order is None:
        order = sorted_order(values)
    picked = order[used[order]]
    rank = np.zeros(len(values), dtype=np.int32)
    rank[picked] = np.arange(len(picked), dtype=np.int32)
    categories = pd.Index(pandas_text(values.take(pa.array(picked))))
    return pd.Categorical.from_codes(rank[codes], dtype=_distinct_categories(categories), validate=False)


def _distinct_categories(categories: pd.Index) -> pd.CategoricalDtype:
    """The categorical type of values known to be distinct (pandas' own check hashes them all again)."""
    trusted = getattr(pd.CategoricalDtype, "_from_fastpath", None)
    return trusted(categories, False) if trusted is not None else pd.CategoricalDtype(categories)


# From this many rows the reader runs independent steps side by side, in threads of its own
# (Arrow's and numpy's loops release the interpreter lock); below it a thread costs more than it
# saves. The rules that read one cell run over blocks of BLOCK_ROWS records, whose working arrays
# are small enough to be reused rather than taken afresh from the system.
SIDE_BY_SIDE_ROWS = 200_000
BLOCK_ROWS = 1 << 20
_POOL: ThreadPoolExecutor | None = None


def beside(rows: int, function, *args, **kwargs) -> Future:
    """``function(*args, **kwargs)`` in the reader's threads when ``rows`` is large, else now; its
    result (or its exception) comes from ``.result()``."""
    global _POOL
    workers = min(4, os.cpu_count() or 1)
    if rows >= SIDE_BY_SIDE_ROWS and workers > 1:
        if _POOL is None:
            _POOL = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="order-reader")
        return _POOL.submit(function, *args, **kwargs)
    done: Future = Future()
    try:
        done.set_result(function(*args, **kwargs))
    except Exception as problem:  # handed to whoever asks for the result, as a thread would
        done.set_exception(problem)
    return done


def _full(value, n: int, dtype) -> np.ndarray:
    """A rule's output (an Arrow array, or one value for every row) as a numpy array of ``n``."""
    if isinstance(value, (pa.Array, pa.ChunkedArray)):
        return _numpy(value, dtype)
    if isinstance(value, pa.Scalar):
        value = value.as_py()
    return np.full(n, value, dtype=dtype)


# ---------------------------------------------------------------------------
# 1. Rows


@dataclass
class Rows:
    """Each record's readings and reason (0 = used so far), in record order.

    Text is kept as Arrow arrays; the customer id also as ``customer_code`` into the distinct
    ids ``customer_ids`` (and the order id and segment likewise), so that grouping never hashes
    text again."""

    reason: np.ndarray  # int8 codes of rules.CODES
    notes: np.ndarray  # int16 bits of rules.NOTE_BITS
    hints: np.ndarray  # int16 bits rules.HINT_* (amount and date together)
    customer_code: np.ndarray  # int32: the customer id (rules.read_customer) as its place in customer_ids
    customer_ids: pa.Array
    customer_order: np.ndarray  # positions that sort customer_ids
    changed: np.ndarray  # bool: the customer cell, stripped, is not the id (an e-mail id written another way)
    customer_cell: pa.Array  # the customer cells as written
    status: np.ndarray  # int8 status class
    status_cell: pa.Array | None
    currency: pa.Array  # the currency a row names ('' for none)
    amount: np.ndarray  # float64, NaN where not read
    amount_kind: np.ndarray
    micros: np.ndarray  # int64 microseconds since 1970 of the date as written
    date_kind: np.ndarray
    order_code: np.ndarray | None  # int32 code of the order id, stripped, into order_ids
    order_ids: pa.Array | None
    has_order_id: np.ndarray | None  # bool: the order id is not empty
    segment_code: np.ndarray | None  # int32 code of the segment, stripped, into segments
    segments: pa.Array | None
    order_group: np.ndarray | None = None  # int64: the (customer, order id) pair's number (order_groups)
    order_group_count: int = 0

    def reached(self, rule: str) -> np.ndarray:
        """Rows that no rule before ``rule`` left out."""
        return (self.reason == 0) | (self.reason >= _CODE[rule])


def _blank_rows(columns: list, n: int) -> np.ndarray:
    """Records whose every cell is empty or spaces (the cells stop being read at the first column
    with no blank cell)."""
    if columns and not may_be_blank(columns[0]).any():
        return np.zeros(n, dtype=bool)
    blank = np.ones(n, dtype=bool)
    for array in columns:
        blank &= _numpy(pc.equal(pc.utf8_trim(array, characters=rules.WHITESPACE), ""), bool)
        if not blank.any():
            break
    return blank


def _too_long(columns: list, n: int) -> np.ndarray:
    """Records with a cell of more than :data:`forecasting.io.rules.MAX_FIELD_CHARS` characters (a
    cell has at least as many bytes as characters: only cells with that many bytes are counted)."""
    too_long = np.zeros(n, dtype=bool)
    for array in columns:
        if (pc.max(pc.binary_length(array)).as_py() or 0) > rules.MAX_FIELD_CHARS:
            too_long |= _numpy(pc.greater(pc.utf8_length(array), rules.MAX_FIELD_CHARS), bool)
    return too_long



def _mixed(parts: list[np.ndarray]) -> np.ndarray:
    """One 64-bit number per row from several columns of readings (equal readings give equal numbers;
    a column with one value throughout tells no rows apart and is left out)."""
    key = np.zeros(len(parts[0]), dtype=np.uint64)
    # One working array for every step (a fresh array per step is memory the system must hand over
    # again and again).
    scratch = np.empty_like(key)
    for k, part in enumerate(parts):
        if len(part) and part.dtype.itemsize == 1 and part.min() == part.max():
            continue
        if part.dtype.itemsize == 8:
            key ^= part.view(np.uint64)
        else:
            np.copyto(scratch, part, casting="unsafe")
            key ^= scratch
        mix(key, k, scratch)
    return key


def repeated_keys(keys: np.ndarray) -> np.ndarray:
    """The rows whose key occurs more than once, in row order (the keys sorted once; the repeated
    ones looked up by bisection)."""
    ordered = np.sort(keys)
    same = ordered[1:] == ordered[:-1]
    if not same.any():
        return np.zeros(0, dtype=np.int64)
    repeated = np.unique(ordered[1:][same])
    # Rows whose key's low 16 bits are those of a repeated key (a table of 65,536 flags), then the
    # key itself among the repeated ones.
    table = np.zeros(1 << 16, dtype=bool)
    table[(repeated & np.uint64(0xFFFF)).astype(np.intp)] = True
    maybe = np.flatnonzero(table[(keys & np.uint64(0xFFFF)).astype(np.intp)])
    return maybe[np.isin(keys[maybe], repeated)]


def _copies(cells: pd.DataFrame, blank: np.ndarray, keys: np.ndarray) -> np.ndarray:
    """Exact copies of an earlier record (every cell equal), blank records left aside.

    ``keys`` mixes each record's readings and the number of its customer cell: copies have equal
    keys, so only records whose key repeats (:func:`repeated_keys`) are
    compared cell by cell."""
    n = len(blank)
    out = np.zeros(n, dtype=bool)
    if n < 2:
        return out
    candidates = repeated_keys(keys)
    candidates = candidates[~blank[candidates]]
    if len(candidates) < 2:
        return out
    same = cells.take(candidates).duplicated(keep="first").to_numpy()
    out[candidates[same]] = True
    return out


@dataclass
class _Ids:
    """The columns read as whole columns (their values numbered): customer ids, order ids, segments."""

    customer_code: np.ndarray
    customer_ids: pa.Array
    customer_order: np.ndarray
    changed: np.ndarray
    no_customer: np.ndarray
    cell_code: np.ndarray  # int32: the customer cell as written, numbered (equal cells, equal numbers)
    order_code: np.ndarray | None = None
    order_ids: pa.Array | None = None
    segment_code: np.ndarray | None = None
    segments: pa.Array | None = None


def _per_row(flags: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """A flag per distinct value as a flag per row (no row looked up when no value is flagged)."""
    if not flags.any():
        return np.zeros(len(codes), dtype=bool)
    return flags[codes]


def _stripped_codes(cells: pa.Array) -> tuple[np.ndarray, pa.Array]:
    """Cells stripped and numbered (cells that read the same share a number): each distinct cell
    stripped once."""
    raw_codes, raw = _OPS.distinct(cells)
    read = _OPS.strip(raw, rules.WHITESPACE)
    if read is raw:
        return raw_codes, raw  # no cell had spaces to strip
    merged, values = _OPS.distinct(read)
    return merged[raw_codes], values


def _read_ids(customer: pa.Array, order: pa.Array | None, segment: pa.Array | None) -> _Ids:
    """:func:`forecasting.io.rules.read_customer` once per distinct customer cell (a few hundred
    thousand, not millions), the ids numbered and their sorting order; order ids and segments
    stripped and numbered likewise."""
    cell_code, cells = _OPS.distinct(customer, many=True)
    found = rules.read_customer(_OPS, cells)
    read = found["customer"]
    if read is cells:
        code, ids = cell_code, cells  # every cell is its id as written
    else:
        merged, ids = _OPS.distinct(read, many=True)
        code = merged[cell_code]
    ids_found = _Ids(customer_code=code, customer_ids=ids, customer_order=sorted_order(ids),
                     changed=_per_row(_full(found["changed"], len(cells), bool), cell_code),
                     no_customer=_per_row(_numpy(pc.equal(ids, ""), bool), code), cell_code=cell_code)
    if order is not None:
        ids_found.order_code, ids_found.order_ids = _stripped_codes(order)
    if segment is not None:
        ids_found.segment_code, ids_found.segments = _stripped_codes(segment)
    return ids_found


@dataclass
class _Readings:
    """What a block of records says, cell by cell (the rules that read one cell)."""

    blank: np.ndarray
    too_long: np.ndarray
    damaged: np.ndarray
    status: np.ndarray
    amount: np.ndarray
    amount_kind: np.ndarray
    currency: pa.Array
    micros: np.ndarray
    date_kind: np.ndarray
    hints: np.ndarray

    @staticmethod
    def join(parts: list["_Readings"]) -> "_Readings":
        if len(parts) == 1:
            return parts[0]
        fields = {}
        for name in _Readings.__dataclass_fields__:
            values = [getattr(p, name) for p in parts]
            fields[name] = (pa.concat_arrays(values) if isinstance(values[0], pa.Array)
                            else np.concatenate(values))
        return _Readings(**fields)


def _read_block(columns: dict, mapping: ColumnMapping, *, decimal: str, date_order: str,
                possibly_damaged: bool) -> _Readings:
    """The rules on the cells of one block of records (``columns``: Arrow text, column -> array)."""
    n = len(next(iter(columns.values())))

    def cell(role):
        column = getattr(mapping, role)
        return columns[column] if column else None

    # The customer's column first: it is the one that tells most records from blank ones.
    blank = _blank_rows([cell("customer")] + [a for name, a in columns.items() if name != mapping.customer], n)
    too_long = _too_long(list(columns.values()), n)
    damaged = np.zeros(n, dtype=bool)
    if possibly_damaged:
        for array in columns.values():
            damaged |= _numpy(pc.match_substring_regex(array, rules.DAMAGE_PATTERN), bool)
    status = (_full(rules.classify_status(_OPS, cell("status")), n, np.int8) if mapping.status
              else np.full(n, rules.STATUS_NONE, dtype=np.int8))
    amount = rules.read_amount(_OPS, cell("value"), decimal=decimal)
    currency = rules.currency_of_cell(_OPS, cell("currency")) if mapping.currency else amount["currency"]
    when = rules.read_date(_OPS, cell("date"), date_order=date_order)
    amounts = _numpy(amount["amount"], np.float64, fill=np.nan)
    amount_kind = _full(amount["kind"], n, np.int8)
    micros = _numpy(when["micros"], np.int64, fill=0)
    date_kind = _full(when["kind"], n, np.int8)
    return _Readings(blank=blank, too_long=too_long, damaged=damaged, status=status, amount=amounts,
                     amount_kind=amount_kind, currency=_OPS.full_column(currency, n), micros=micros,
                     date_kind=date_kind,
                     hints=_full(amount["hints"], n, np.int16) | _full(when["hints"], n, np.int16))


def _blocks(n: int) -> list[tuple[int, int]]:
    """Blocks of records read side by side (each small enough for its working arrays to be reused)."""
    if n < SIDE_BY_SIDE_ROWS:
        return [(0, n)]
    size = min(BLOCK_ROWS, -(-n // 2))
    return [(start, min(n, start + size)) for start in range(0, n, size)]


def read_rows(cells: pd.DataFrame, mapping: ColumnMapping, options: ReadOptions, *, decimal: str,
              date_order: str, formulas: dict[str, np.ndarray] | None = None,
              possibly_damaged: bool = True) -> Rows:
    """The rules of :mod:`forecasting.io.rules` on every record (see the module docstring, step 1).

    The rules that read one cell run over blocks of records side by side (amounts and dates once
    per distinct cell of a block); the customer ids (and order ids and segments) are read once per
    distinct cell, beside them; then the reason of each record and its notes over the whole
    table, with the copies of earlier records found beside them."""
    n = len(cells)
    columns = {name: arrow_text(cells[name]) for name in cells.columns}

    def cell(role):
        column = getattr(mapping, role)
        return columns[column] if column else None

    ids_job = beside(n, _read_ids, cell("customer"), cell("order_id"), cell("segment"))
    jobs = [beside(n, _read_block, {name: array.slice(start, stop - start) for name, array in columns.items()},
                   mapping, decimal=decimal, date_order=date_order, possibly_damaged=possibly_damaged)
            for start, stop in _blocks(n)]
    read = _Readings.join([job.result() for job in jobs])
    ids = ids_job.result()
    # Copies have equal readings and the same customer cell; they are found while the reasons are given.
    copies_job = beside(n, _copies, cells, read.blank, _mixed([ids.cell_code, read.amount, read.micros,
                                                               read.amount_kind, read.date_kind, read.status]))
    row = {"blank": pa.array(read.blank), "too_long": pa.array(read.too_long), "damaged": pa.array(read.damaged),
           "no_customer": pa.array(ids.no_customer), "customer": None, "status": pa.array(read.status),
           "currency": read.currency, "amount_kind": pa.array(read.amount_kind),
           "date_kind": pa.array(read.date_kind), "micros": pa.array(read.micros)}
    if formulas:
        used = [formulas[c] for c in mapping.as_dict().values() if c in formulas]
        if used:
            row["formula"] = pa.array(np.logical_or.reduce(used))
    dates = options.dates
    reason = _full(rules.row_reason(_OPS, row, wanted_currency=options.wanted_currency,
                                    keep_unpaid=options.keep_unpaid, keep_implausible=options.keep_implausible,
                                    dates=dates), n, np.int8)
    notes = _full(rules.row_notes(_OPS, row, keep_unpaid=options.keep_unpaid,
                                  keep_implausible=options.keep_implausible, dates=dates), n, np.int16)
    # Copies of an earlier record overrule every reason after a damaged row (as in rules.row_reason).
    duplicate = copies_job.result()
    reason[duplicate & ((reason == 0) | (reason > _CODE["duplicate_row"]))] = _CODE["duplicate_row"]
    has_order_id = group = None
    count = 0
    if ids.order_ids is not None:
        has_order_id = _numpy(pc.not_equal(ids.order_ids, ""), bool)[ids.order_code] if n else np.zeros(0, bool)
        # The pairs of customer and order id numbered once, for every step that groups lines into orders.
        group, count = order_groups(ids.customer_code, ids.order_code)
    return Rows(
        reason=reason,
        notes=notes,
        hints=read.hints,
        customer_code=ids.customer_code,
        customer_ids=ids.customer_ids,
        customer_order=ids.customer_order,
        changed=ids.changed,
        customer_cell=cell("customer"),
        status=read.status,
        status_cell=cell("status"),
        currency=read.currency,
        amount=read.amount,
        amount_kind=read.amount_kind,
        micros=read.micros,
        date_kind=read.date_kind,
        order_code=ids.order_code,
        order_ids=ids.order_ids,
        has_order_id=has_order_id,
        order_group=group,
        order_group_count=count,
        segment_code=ids.segment_code,
        segments=ids.segments,
    )


# ---------------------------------------------------------------------------
# 2. Whole-file evidence (each engine gathers the same numbers; rules decide)


def first_of(mask: np.ndarray, lines: np.ndarray, values) -> tuple[int, str] | None:
    """``(line, value)`` of the first place ``mask`` holds, or None; ``values`` are the cells."""
    if not mask.any():
        return None
    at = int(np.flatnonzero(mask)[0])
    value = values.iloc[at] if isinstance(values, pd.Series) else values[at]
    return int(lines[at]), str(value).strip()


@dataclass
class Evidence:
    """What a table of rows says about the whole file; ``(line, value)`` pairs are first places."""

    decimal_comma: tuple | None = None
    decimal_point: tuple | None = None
    day_first: tuple | None = None
    month_first: tuple | None = None
    slashed: tuple | None = None
    currencies: dict = field(default_factory=dict)  # currency -> (line, value) of its first row
    amounts: tuple = (0, 0, None)  # (values read, unreadable, first unreadable)
    dates: tuple = (0, 0, None)
    order_total: tuple = (0, 0, 0)  # orders of several lines, of them fitting, with blank lines

    @staticmethod
    def combine(parts: list["Evidence"]) -> "Evidence":
        """The evidence of several tables of rows (partitions), first places by line."""
        def first(name):
            found = [getattr(p, name) for p in parts if getattr(p, name) is not None]
            return min(found) if found else None

        def counts(name):
            got = [getattr(p, name) for p in parts]
            firsts = [g[2] for g in got if g[2] is not None]
            return sum(g[0] for g in got), sum(g[1] for g in got), (min(firsts) if firsts else None)

        currencies: dict = {}
        for part in parts:
            for mark, place in part.currencies.items():
                currencies[mark] = min(place, currencies.get(mark, place))
        return Evidence(first("decimal_comma"), first("decimal_point"), first("day_first"), first("month_first"),
                        first("slashed"), currencies, counts("amounts"), counts("dates"),
                        tuple(int(sum(p.order_total[k] for p in parts)) for k in range(3)))


def gather_evidence(rows: Rows, cells: pd.DataFrame, mapping: ColumnMapping, lines: np.ndarray) -> Evidence:
    """The evidence of :class:`Evidence` from one table of rows (``lines``: each record's place)."""
    amounts_in_play = rows.reached("missing_amount")
    dates_in_play = rows.reached("missing_date")
    value, when = cells[mapping.value], cells[mapping.date]
    hints = rows.hints
    evidence = Evidence(
        decimal_comma=first_of(amounts_in_play & ((hints & rules.HINT_DECIMAL_COMMA) != 0), lines, value),
        decimal_point=first_of(amounts_in_play & ((hints & rules.HINT_DECIMAL_POINT) != 0), lines, value),
        day_first=first_of(dates_in_play & ((hints & rules.HINT_DAY_FIRST) != 0), lines, when),
        month_first=first_of(dates_in_play & ((hints & rules.HINT_MONTH_FIRST) != 0), lines, when),
        slashed=first_of(dates_in_play & ((hints & rules.HINT_SLASHED) != 0), lines, when),
    )
    currency_in_play = rows.reached("other_currency") & _numpy(pc.not_equal(rows.currency, ""), bool)
    if currency_in_play.any():
        where = cells[mapping.currency] if mapping.currency else value
        at = np.flatnonzero(currency_in_play)
        code, marks = encode_text(rows.currency.take(pa.array(at)))
        first = np.full(len(marks), len(at), dtype=np.int64)
        np.minimum.at(first, code, np.arange(len(at)))
        evidence.currencies = {str(mark): (int(lines[at[k]]), str(where.iloc[at[k]]).strip())
                               for mark, k in sorted(zip(marks.to_pylist(), first.tolist()))}
    for name, in_play, kind, cells_of in (("amounts", amounts_in_play, rows.amount_kind, value),
                                          ("dates", dates_in_play, rows.date_kind, when)):
        present = in_play & (kind != rules.KIND_EMPTY)
        unreadable = present & ((kind == rules.KIND_PLACEHOLDER) | (kind == rules.KIND_BAD))
        setattr(evidence, name, (int(present.sum()), int(unreadable.sum()), first_of(unreadable, lines, cells_of)))
    if needs_order_total_evidence(mapping):
        evidence.order_total = order_total_evidence(rows)
    return evidence


def order_total_evidence(rows: Rows) -> tuple[int, int, int]:
    """``(orders of several lines, of them with one amount between their lines, with blank lines)``,
    over lines that could belong to an order whose total is given once (see
    :func:`forecasting.io.rules.decide_order_total`)."""
    if rows.order_code is None:
        return 0, 0, 0
    refund = (rows.amount < 0) | (rows.status == rules.STATUS_REFUND)
    candidate = ((rows.reason == 0) | (rows.reason == _CODE["missing_amount"])) & ~refund & rows.has_order_id
    if not candidate.any():
        return 0, 0, 0
    at = np.flatnonzero(candidate)
    group, groups = rows.order_group[at], rows.order_group_count
    amount = rows.amount[at]
    blank = rows.reason[at] != 0
    lines = np.bincount(group, minlength=groups)
    blanks = np.bincount(group, weights=blank, minlength=groups)
    # One amount between the lines (blank ones aside): the lowest and highest amount read are equal.
    read = ~np.isnan(amount)
    low = np.full(groups, np.inf)
    high = np.full(groups, -np.inf)
    np.minimum.at(low, group[read], amount[read])
    np.maximum.at(high, group[read], amount[read])
    one_amount = (low == high) | (np.bincount(group[read], minlength=groups) == 0)
    several = lines >= 2
    fitting = several & one_amount & (lines - blanks >= 1)
    return int(several.sum()), int(fitting.sum()), int((several & (blanks > 0) & fitting).sum())


def order_groups(customer_code: np.ndarray, order_code: np.ndarray) -> tuple[np.ndarray, int]:
    """``(group, count)``: one number per (customer, order id) pair, in the order pairs first appear."""
    key = customer_code.astype(np.int64) * (int(order_code.max(initial=0)) + 1) + order_code
    group, uniques = pd.factorize(key)
    return group, len(uniques)


def _placed(place, found, role):
    """``(row, value)`` of a first place, or None (``place`` may also give the file: see :func:`_file_of`)."""
    return None if found is None else tuple(place(found, role))[:2]


def _file_of(place, found, role, file_name: str) -> str:
    """The file a first place is in: its own label when ``place`` gives one (several files), else ``file_name``."""
    placed = tuple(place(found, role))
    return placed[2] if len(placed) > 2 else file_name


def decide_decimal(evidence: Evidence, options: ReadOptions, mapping: ColumnMapping, *, file_name: str,
                   place) -> str:
    """The amounts' decimal mark (:func:`forecasting.io.rules.decide_decimal`).

    ``place((line, value), role)`` gives ``(spreadsheet row, value)`` of a first place (an engine
    that keeps no cells reads the value again)."""
    comma, point = evidence.decimal_comma, evidence.decimal_point
    if options.decimal is None and comma is not None and point is not None:
        file_name = _file_of(place, max(comma, point), "value", file_name)
    return rules.decide_decimal(options.decimal, _placed(place, comma, "value"), _placed(place, point, "value"),
                                file_name=file_name, column=mapping.value)


def decide_dates(evidence: Evidence, options: ReadOptions, mapping: ColumnMapping, *, file_name: str,
                 place) -> tuple[str | None, list[str]]:
    """The date order and the note that says why (:func:`forecasting.io.rules.decide_date_order`)."""
    if options.date_order is not None or evidence.slashed is None:
        return options.date_order, []
    first = evidence.day_first or evidence.slashed
    file_name = _file_of(place, first, "date", file_name)
    return rules.decide_date_order(options.date_order, _placed(place, evidence.day_first, "date"),
                                   _placed(place, evidence.month_first, "date"),
                                   _placed(place, evidence.slashed, "date"), file_name=file_name,
                                   column=mapping.date)


def check_columns(evidence: Evidence, options: ReadOptions, mapping: ColumnMapping, *, file_name: str,
                  place) -> None:
    """The refusals about whole columns: several currencies, values that mostly cannot be read."""
    if not options.wanted_currency and len(evidence.currencies) > 1:
        seen = sorted(evidence.currencies)
        role = "currency" if mapping.currency else "value"
        found = evidence.currencies[seen[1]]
        raise rules.several_currencies(seen, _placed(place, found, role),
                                       file_name=_file_of(place, found, role, file_name),
                                       column=mapping.currency or mapping.value)
    for role, counts in (("value", evidence.amounts), ("date", evidence.dates)):
        total, bad, first = counts
        if first is None:
            continue
        if total >= rules.UNREADABLE_MIN_VALUES and bad / total > rules.UNREADABLE_SHARE:
            raise rules.mostly_unreadable(total, bad, _placed(place, first, role),
                                          file_name=_file_of(place, first, role, file_name),
                                          column=getattr(mapping, role), role=role)


def currency_of(evidence: Evidence, options: ReadOptions) -> str:
    """The currency of the rows used, as an ISO code: the one chosen, else the one the rows name
    (:func:`check_columns` has refused a file whose rows name several); "" when none does."""
    if options.wanted_currency:
        return options.wanted_currency
    return next(iter(evidence.currencies)) if len(evidence.currencies) == 1 else ""


def decide_order_total(evidence: Evidence, mapping: ColumnMapping) -> bool:
    multi, fitting, blanks = evidence.order_total
    return rules.decide_order_total(value_header=mapping.value, has_order_ids=mapping.order_id is not None,
                                    orders_with_lines=multi, fitting=fitting, with_blank_lines=blanks)


def needs_order_total_evidence(mapping: ColumnMapping) -> bool:
    """Whether the amount column could hold each order's total (else its evidence is not gathered)."""
    return mapping.order_id is not None and rules.normalise_header(mapping.value) not in rules.LINE_AMOUNT_HEADERS


# ---------------------------------------------------------------------------
# 3. Orders


@dataclass
class Orders:
    """Lines grouped into orders, with each order's sums and verdict."""

    position: np.ndarray  # the records that belong to an order (indices into the rows)
    order: np.ndarray  # their order number (0 .. n_orders-1)
    counted: np.ndarray  # the line's amount is part of the order's value
    carrier: np.ndarray  # a purchase line whose amount counts (not a further line of an order total)
    value: np.ndarray  # per order
    verdict: np.ndarray  # per order, int8 code (0 = kept)
    order_micros: np.ndarray  # per order
    first: np.ndarray  # per order: index (into position) of its first line
    inherited: tuple = (np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int8))  # (records, reason codes)


def inherited_reasons(rows: Rows) -> tuple[np.ndarray, np.ndarray]:
    """With order totals: the further lines (no amount) of an order whose first line was left out,
    and that line's reason (:data:`forecasting.io.rules.INHERITED_REASONS`)."""
    lines = rows.has_order_id & ~np.isin(rows.reason, [_CODE[c] for c in rules.NOT_A_LINE])
    at = np.flatnonzero(lines)
    if not len(at):
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int8)
    group, groups = rows.order_group[at], rows.order_group_count
    first = np.full(groups, len(at), dtype=np.int64)
    np.minimum.at(first, group, np.arange(len(at)))
    # Pairs without a line here keep len(at) as their first: only the pairs of these lines are looked up.
    first_reason = rows.reason[at][first[group]]
    take = (rows.reason[at] == _CODE["missing_amount"]) & np.isin(first_reason,
                                                                   [_CODE[c] for c in rules.INHERITED_REASONS])
    return at[take], first_reason[take].astype(np.int8)


def build_orders(rows: Rows, *, order_total: bool) -> Orders:
    """Lines grouped by customer and order id (a line without an id is an order of its own), refunds
    netted, and each order's verdict (:func:`forecasting.io.rules.order_verdict`).

    With ``order_total`` the amount column holds each order's total: its first purchase line
    with an amount counts, the order's other purchase lines (blank or repeating it) are further
    lines of it."""
    eligible = rows.reason == 0
    inherited = Orders.__dataclass_fields__["inherited"].default
    if order_total and rows.order_code is not None:
        inherited = inherited_reasons(rows)
        refund_status = rows.status == rules.STATUS_REFUND
        further = (rows.reason == _CODE["missing_amount"]) & ~refund_status & rows.has_order_id
        further[inherited[0]] = False
        eligible = eligible | further
    position = np.flatnonzero(eligible)
    amount = rows.amount[position]
    read = rows.reason[position] == 0
    is_refund = read & ((amount < 0) | (rows.status[position] == rules.STATUS_REFUND))
    signed = np.where(is_refund, -np.abs(amount), amount)
    if rows.order_code is not None:
        has_id = rows.has_order_id[position]
        group, groups = rows.order_group[position], rows.order_group_count
        # A line without an order id is an order of its own.
        key = np.where(has_id, group, groups + np.arange(len(position)))
        order, _ = pd.factorize(key)
        order = order.astype(np.int64, copy=False)
    else:
        order = np.arange(len(position))
    n_orders = int(order.max()) + 1 if len(order) else 0
    purchase = read & ~is_refund
    if order_total:
        # The first purchase line of each order (in file order) carries its total.
        first_purchase = np.full(n_orders, len(position), dtype=np.int64)
        np.minimum.at(first_purchase, order[purchase], np.flatnonzero(purchase))
        carrier = purchase & (np.arange(len(position)) == first_purchase[order])
    else:
        carrier = purchase
    counted = carrier | is_refund
    micros = rows.micros[position]
    if rows.order_code is None:
        # One line per order: its sums are its own.
        value = np.where(counted, signed, 0.0)
        purchases = carrier.view(np.uint8)
        negatives = (counted & (amount < 0)).view(np.uint8)
        refunds = (counted & is_refund).view(np.uint8)
        order_micros = np.where(purchase, micros, np.iinfo(np.int64).max)
        first = np.arange(len(position), dtype=np.int64)
        real = read
    else:
        # Lines are added in file order (bincount adds in array order), as every engine adds them.
        value = np.bincount(order, weights=np.where(counted, signed, 0.0), minlength=n_orders)
        purchases = np.bincount(order, weights=carrier, minlength=n_orders)
        negatives = np.bincount(order, weights=counted & (amount < 0), minlength=n_orders)
        refunds = np.bincount(order, weights=counted & is_refund, minlength=n_orders)
        order_micros = np.full(n_orders, np.iinfo(np.int64).max, dtype=np.int64)
        np.minimum.at(order_micros, order[purchase], micros[purchase])
        first = np.full(n_orders, len(position), dtype=np.int64)
        np.minimum.at(first, order, np.arange(len(position)))
        real = np.bincount(order, weights=read, minlength=n_orders) > 0
    verdict = _numpy(rules.order_verdict(_OPS, purchases=pa.array(purchases), negatives=pa.array(negatives),
                                         refunds=pa.array(refunds), value=pa.array(value)), np.int8)
    # An order of further lines only (no line with an amount) is no order: its lines keep their reason.
    verdict = np.where(real, verdict, -1).astype(np.int8)
    return Orders(position=position, order=order, counted=counted, carrier=carrier, value=value, verdict=verdict,
                  order_micros=order_micros, first=first, inherited=inherited)


def kept_log_values(orders: Orders) -> np.ndarray:
    """Log order values of the orders kept so far (what the shop's usual range is measured on)."""
    return np.log(orders.value[orders.verdict == 0])


def usual_range_of(log_values: np.ndarray) -> tuple[float, float] | None:
    """:func:`forecasting.io.rules.usual_range` of the kept orders' log values (median and median
    absolute deviation, as numpy computes them and duckdb's ``median`` does)."""
    if len(log_values) == 0:
        return None
    centre = float(np.median(log_values))
    spread = float(np.median(np.abs(log_values - centre)))
    return rules.usual_range(centre, spread, len(log_values))


@dataclass
class Finished:
    reason: np.ndarray  # final reason code per record
    notes: np.ndarray  # final note bits per record
    orders: pd.DataFrame  # kept orders: customer, order_id, order_date, order_value, line, [segment]
    unrecognised: dict  # status as written -> rows used with it, in the order they first appear
    unrecognised_first: dict = field(default_factory=dict)  # status -> (rows, first line)


def date_order(micros: np.ndarray) -> np.ndarray:
    """Positions that put ``micros`` in order, equal ones in their order (a stable sort).

    Dates are sorted as whole days, or seconds, in passes of 16 bits (numpy's radix sort of
    small integers): one pass for dates without a time over 179 years, two with times over
    136 years."""
    n = len(micros)
    if n < 2 or bool((micros[1:] >= micros[:-1]).all()):
        return np.arange(n)
    low, high = int(micros.min()), int(micros.max())
    day, second = 86_400_000_000, 1_000_000
    if (high - low) // day < 1 << 16:
        # Two working arrays in all (a fresh array is memory the system must hand over again).
        shifted = np.subtract(micros, low)
        rest = np.remainder(shifted, day)
        if not rest.any():
            np.floor_divide(shifted, day, out=shifted)
            return np.argsort(shifted.astype(np.uint16), kind="stable")
    if (high - low) // second < 1 << 32:
        seconds, rest = np.divmod(micros - low, second)
        if not rest.any():
            seconds = seconds.astype(np.uint32)
            first = np.argsort((seconds & 0xFFFF).astype(np.uint16), kind="stable")
            return first[np.argsort((seconds[first] >> 16).astype(np.uint16), kind="stable")]
    return np.argsort(micros, kind="stable")


def finish_orders(rows: Rows, orders: Orders, usual, *, keep_implausible: bool, lines: np.ndarray,
                  named_by_line: bool = False) -> Finished:
    """Orders outside the usual range, every record's final reason and notes, merged e-mail ids, and
    the table of kept orders (``lines``: each record's place, kept as the order's ``line``). With
    ``named_by_line`` (``lines`` are spreadsheet rows), an order without an order id is named by
    its row (``row-17``); else its id is empty.

    The table is compact: ``customer`` (and ``segment``) as pandas Categoricals of the values used
    (sorted), the order id as Arrow-backed text, dates and amounts as numpy arrays."""
    outside = np.zeros(len(orders.value), dtype=bool)
    if usual is not None and len(orders.value):
        log_value = np.log(np.where(orders.value > 0, orders.value, 1.0))
        outside = (orders.verdict == 0) & _numpy(rules.outside_usual_range(_OPS, pa.array(log_value), usual), bool)
    verdict = orders.verdict.copy()
    notes = rows.notes.copy()
    if keep_implausible:
        kept_anyway = outside
    else:
        verdict[outside] = _CODE["implausible_amount"]
        kept_anyway = np.zeros_like(outside)
    # Without order ids each line is an order of its own (order k is line k); when every record is
    # a line, line k is record k. Those look-ups are left out.
    own_orders = rows.order_code is None
    every_record = len(orders.position) == len(rows.reason)

    def records(at):
        return at if every_record else orders.position[at]

    reason = rows.reason.copy()
    reason[orders.inherited[0]] = orders.inherited[1]
    line_verdict = verdict if own_orders else verdict[orders.order]
    real = line_verdict >= 0
    if every_record and real.all():
        reason = line_verdict.astype(reason.dtype)
    else:
        reason[orders.position[real]] = line_verdict[real]
    used_lines = real & (line_verdict == 0)
    further = used_lines & ~orders.counted & ~orders.carrier
    if further.any():
        notes[records(np.flatnonzero(further))] |= rules.NOTE_BITS["continuation_line"]
    if kept_anyway.any():
        kept_lines = used_lines & (kept_anyway if own_orders else kept_anyway[orders.order])
        notes[records(np.flatnonzero(kept_lines))] |= rules.NOTE_BITS["implausible_kept"]
    _note_merged_ids(rows, reason, notes)

    kept = np.flatnonzero(verdict == 0)
    # Orders by date, then by place in the file (an order's number follows its first line): the order
    # in which every engine adds them up.
    kept = kept[date_order(orders.order_micros[kept])]
    first_line = records(kept if own_orders else orders.first[kept])
    line = lines[first_line]
    # The customers' categories and the orders' names are made beside the other columns.
    customers = beside(len(kept), text_categories, rows.customer_code[first_line], rows.customer_ids,
                       rows.customer_order)
    names = [beside(len(kept), row_labels, half) for half in np.array_split(line, 2)] \
        if rows.order_code is None and named_by_line else []
    columns = {
        # Microseconds to nanoseconds: the readable years (1900-2199) fit.
        "order_date": (orders.order_micros[kept] * 1000).view("datetime64[ns]"),
        "order_value": orders.value[kept].astype(np.float64, copy=False),
        "line": line,
    }
    if rows.order_code is not None:
        # pandas keeps text with 64-bit offsets: the distinct ids are widened once, not every order's.
        order_ids = rows.order_ids.cast(pa.large_string()).take(pa.array(rows.order_code[first_line]))
    elif names:
        # The halves stay two pieces of one column (joining them would copy every name).
        order_ids = pa.chunked_array([job.result() for job in names], type=pa.large_string())
    else:
        order_ids = _empty_texts(len(kept))
    order_ids = (pd.Series(order_ids.to_pandas(types_mapper=TEXT_TYPES.get)) if isinstance(order_ids, pa.ChunkedArray)
                 else pandas_text(order_ids))
    table = pd.DataFrame({"customer": customers.result(), "order_id": order_ids.array, **columns}, copy=False)
    if rows.segment_code is not None:
        table["segment"] = _order_segments(rows, orders, kept)
    first_seen = {}
    unknown = None
    if rows.status_cell is not None:
        unknown = (reason == 0) & (rows.status == rules.STATUS_UNKNOWN)
    if unknown is not None and unknown.any():
        # In the order each status first appears, as every engine lists them.
        at = np.flatnonzero(unknown)
        code, statuses = encode_text(pc.utf8_trim(rows.status_cell.take(pa.array(at)), characters=rules.WHITESPACE))
        count = np.bincount(code, minlength=len(statuses))
        # Codes number the statuses in the order they first appear.
        first = np.full(len(statuses), len(at), dtype=np.int64)
        np.minimum.at(first, code, np.arange(len(at)))
        first_seen = {str(k): (int(c), int(lines[at[f]])) for k, c, f in zip(statuses.to_pylist(), count, first)}
    return Finished(reason=reason, notes=notes, orders=table,
                    unrecognised={k: n for k, (n, _) in first_seen.items()}, unrecognised_first=first_seen)


def _order_segments(rows: Rows, orders: Orders, kept: np.ndarray) -> pd.Categorical:
    """Each kept order's segment: the first its lines name (in file order), else 'unknown'."""
    segment = rows.segment_code[orders.position]
    named = _numpy(pc.not_equal(rows.segments, ""), bool)[segment] if len(segment) else np.zeros(0, dtype=bool)
    first = np.full(int(orders.order.max(initial=-1)) + 1, len(segment), dtype=np.int64)
    np.minimum.at(first, orders.order[named], np.flatnonzero(named))
    chosen = first[kept]
    found = chosen < len(segment)
    values = rows.segments
    unknown = pc.index(values, "unknown").as_py()
    if unknown < 0:
        values, unknown = pa.concat_arrays([values, pa.array(["unknown"], type=pa.string())]), len(values)
    codes = np.where(found, segment[np.minimum(chosen, max(len(segment) - 1, 0))], unknown)
    return text_categories(codes.astype(np.int32), values)


def row_labels(rows: np.ndarray) -> pa.Array:
    """``row-17`` for row 17 (Arrow text, 64-bit offsets): the id of an order that is one row."""
    return pc.utf8_replace_slice(pc.cast(pa.array(rows), pa.large_string()), 0, 0, "row-")


def _empty_texts(n: int) -> pa.Array:
    """``n`` empty texts (Arrow, 64-bit offsets), built without a Python object per text."""
    return pa.LargeStringArray.from_buffers(n, pa.py_buffer(np.zeros(n + 1, dtype=np.int64)), pa.py_buffer(b""))


def _note_merged_ids(rows: Rows, reason: np.ndarray, notes: np.ndarray) -> None:
    """Rows used whose e-mail id is written otherwise than on the customer's first row used."""
    if not rows.changed.any():
        return
    used = np.flatnonzero(reason == 0)
    if not len(used) or not rows.changed[used].any():
        return
    # Only the customers with an id written another way somewhere among the rows used.
    customer = rows.customer_code[used]
    touched = np.zeros(len(rows.customer_ids), dtype=bool)
    touched[customer[rows.changed[used]]] = True
    at = used[touched[customer]]
    written, _ = encode_text(pc.utf8_trim(rows.customer_cell.take(pa.array(at)), characters=rules.WHITESPACE))
    customer = rows.customer_code[at]
    first = np.full(len(rows.customer_ids), len(at), dtype=np.int64)
    np.minimum.at(first, customer, np.arange(len(at)))
    differs = written != written[first[customer]]
    notes[at[differs]] |= rules.NOTE_BITS["merged_customer_id"]


# ---------------------------------------------------------------------------
# The pandas engine: every step in this process


def _customers(customer: pd.Series) -> int:
    """How many customers a column names (a categorical's codes counted, not its text hashed)."""
    if isinstance(customer.dtype, pd.CategoricalDtype):
        codes = customer.cat.codes.to_numpy()
        return int(np.count_nonzero(np.bincount(codes[codes >= 0], minlength=1)))
    return int(customer.nunique())


@dataclass
class ReadResult:
    """A cleaned order table and the account of every input row."""

    orders: pd.DataFrame
    excluded: pd.DataFrame
    mapping: ColumnMapping
    rows_read: int
    file_name: str
    columns: list[str]
    notes: list[str] = field(default_factory=list)
    noted: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(
        {"row": pd.Series([], dtype=np.int64), "note_code": [], "note": []}))
    unrecognised_statuses: dict = field(default_factory=dict)
    currency: str = ""  # the ISO code of the rows used ("" when no row names one)

    @property
    def rows_used(self) -> int:
        return self.rows_read - len(self.excluded)

    def audit(self) -> dict[str, Any]:
        """The row account as plain numbers: what was read, used and left out, and why.

        ``excluded`` counts rows by reason code (implausible values first), ``noted`` rows used
        with a note, ``unrecognised_statuses`` the rows used with each status the reader does
        not know."""
        counts = self.excluded["reason_code"].value_counts()
        noted = self.noted["note_code"].value_counts()
        return {
            "file": self.file_name,
            "rows_read": int(self.rows_read),
            "rows_used": int(self.rows_used),
            "rows_excluded": int(len(self.excluded)),
            "orders": int(len(self.orders)),
            "customers": _customers(self.orders["customer"]),
            "excluded": rules.account_counts(counts.to_dict(), rules.REASONS),
            "noted": rules.account_counts(noted.to_dict(), rules.NOTES),
            "unrecognised_statuses": dict(self.unrecognised_statuses),
            "mapping": self.mapping.as_dict(),
            "notes": list(self.notes),
        }


def clean_orders(raw: RawTable, mapping: ColumnMapping, *, file_name: str,
                 options: ReadOptions | None = None) -> ReadResult:
    """Apply the cleaning rules to raw cells (see the module docstring for the steps)."""
    options = options or ReadOptions()
    cells, rows_at, notes = raw.cells, raw.row_numbers, list(raw.notes)
    lines = np.arange(len(cells))

    def place(found, role):
        return int(rows_at[found[0]]), found[1]

    decimal = options.decimal or "."
    date_order = options.date_order or "day-first"
    while True:
        rows = read_rows(cells, mapping, options, decimal=decimal, date_order=date_order, formulas=raw.formulas,
                         possibly_damaged=raw.possibly_damaged)
        evidence = gather_evidence(rows, cells, mapping, lines)
        chosen = decide_decimal(evidence, options, mapping, file_name=file_name, place=place)
        if chosen != decimal:
            decimal = chosen  # some amounts can only be read with a decimal comma: read them all so
            continue
        order, date_notes = decide_dates(evidence, options, mapping, file_name=file_name, place=place)
        if order is not None and order != date_order:
            date_order = order
            continue
        break
    check_columns(evidence, options, mapping, file_name=file_name, place=place)
    notes += rules.decimal_note(decimal, options.decimal, mapping.value) + date_notes
    order_total = decide_order_total(evidence, mapping)
    if order_total:
        notes += rules.order_total_note(mapping.value)
    orders = build_orders(rows, order_total=order_total)
    usual = usual_range_of(kept_log_values(orders))
    # The orders' lines as spreadsheet rows (the column after the amount).
    done = finish_orders(rows, orders, usual, keep_implausible=options.keep_implausible, lines=rows_at,
                         named_by_line=True)
    notes += rules.unrecognised_status_note(done.unrecognised)
    table = done.orders.rename(columns={"line": "row"})
    excluded = excluded_table(cells, rows_at, done.reason, raw.set_aside)
    noted = noted_table(rows_at, done.notes, done.reason)
    result = ReadResult(orders=table, excluded=excluded, mapping=mapping, rows_read=len(cells) + len(raw.set_aside),
                        file_name=file_name, columns=list(cells.columns), notes=notes, noted=noted,
                        unrecognised_statuses=done.unrecognised, currency=currency_of(evidence, options))
    if table.empty:
        raise rules.no_usable_orders(result.audit()["excluded"], file_name=file_name)
    return result


def excluded_table(cells: pd.DataFrame, rows_at: np.ndarray, reason: np.ndarray,
                   set_aside: list[tuple[int, str, str]]) -> pd.DataFrame:
    """Every row left out: ``row``, ``reason_code``, ``reason``, its cells (and ``raw_text`` for rows
    that did not split); implausible values first, then in row order."""
    out = reason != 0
    table = text_frame(cells[out]).reset_index(drop=True)
    codes = np.asarray(rules.CODES, dtype=object)[reason[out].astype(np.int64)]
    table.insert(0, "reason", [rules.REASONS[c] for c in codes])
    table.insert(0, "reason_code", codes)
    table.insert(0, "row", rows_at[out])
    if set_aside:
        bad = pd.DataFrame({"row": [r for r, _, _ in set_aside], "reason_code": [c for _, c, _ in set_aside],
                            "reason": [rules.REASONS[c] for _, c, _ in set_aside],
                            "raw_text": [t for _, _, t in set_aside]})
        table = pd.concat([table, bad], ignore_index=True)
    first = ~table["reason_code"].isin(["implausible_amount", "implausible_date"])
    table = table.assign(_later=first.to_numpy()).sort_values(["_later", "row"], kind="stable")
    return table.drop(columns="_later").reset_index(drop=True)


def noted_table(rows_at: np.ndarray, notes: np.ndarray, reason: np.ndarray) -> pd.DataFrame:
    """Every note on a row used: ``row``, ``note_code``, ``note`` (a row may have several)."""
    parts = []
    for code, bit in rules.NOTE_BITS.items():
        at = np.flatnonzero(((notes & bit) != 0) & (reason == 0))
        if len(at):
            parts.append(pd.DataFrame({"row": rows_at[at], "note_code": code, "note": rules.NOTES[code]}))
    if not parts:
        return pd.DataFrame({"row": pd.Series([], dtype=np.int64), "note_code": pd.Series([], dtype=object),
                             "note": pd.Series([], dtype=object)})
    order = list(rules.NOTES)
    table = pd.concat(parts, ignore_index=True)
    table["_order"] = table["note_code"].map(order.index)
    return table.sort_values(["_order", "row"], kind="stable").drop(columns="_order").reset_index(drop=True)
