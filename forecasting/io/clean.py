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

from dataclasses import dataclass, field
from datetime import date
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import OrderDataError
from . import rules
from .backends import ArrowOps
from .read import TEXT_TYPES, ColumnMapping, RawTable

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


def arrow_text(values: pd.Series) -> pa.Array:
    """A column of text cells as one Arrow string array ('' for missing)."""
    try:
        array = pa.array(values, type=pa.string(), from_pandas=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        array = pa.array(values.astype(str), type=pa.string())
    if isinstance(array, pa.ChunkedArray):
        array = array.combine_chunks()
    return pc.fill_null(array, "")


def _numpy(array, dtype, fill=None) -> np.ndarray:
    if fill is not None:
        array = pc.fill_null(array, fill)
    if isinstance(array, pa.ChunkedArray):
        array = array.combine_chunks()
    return array.to_numpy(zero_copy_only=False).astype(dtype, copy=False)


def pandas_text(array) -> pd.Series:
    """An Arrow string array as a pandas Series of pandas' Arrow-backed text (comparisons give numpy
    booleans)."""
    if isinstance(array, pa.ChunkedArray):
        array = array.combine_chunks()
    return pd.Series(array.to_pandas(types_mapper=TEXT_TYPES.get))


# ---------------------------------------------------------------------------
# 1. Rows


@dataclass
class Rows:
    """Each record's readings and reason (0 = used so far), in record order."""

    reason: np.ndarray  # int8 codes of rules.CODES
    notes: np.ndarray  # int16 bits of rules.NOTE_BITS
    hints: np.ndarray  # int16 bits rules.HINT_* (amount and date together)
    customer: pd.Series  # the customer id (rules.read_customer)
    written: pd.Series  # the customer cell as written, stripped
    status: np.ndarray  # int8 status class
    status_text: pd.Series | None
    currency: pd.Series  # the currency a row names ('' for none)
    amount: np.ndarray  # float64, NaN where not read
    amount_kind: np.ndarray
    micros: np.ndarray  # int64 microseconds since 1970 of the date as written
    date_kind: np.ndarray
    order_text: pd.Series | None
    segment_text: pd.Series | None

    def reached(self, rule: str) -> np.ndarray:
        """Rows that no rule before ``rule`` left out."""
        return (self.reason == 0) | (self.reason >= _CODE[rule])


def read_rows(cells: pd.DataFrame, mapping: ColumnMapping, options: ReadOptions, *, decimal: str,
              date_order: str, formulas: dict[str, np.ndarray] | None = None,
              possibly_damaged: bool = True) -> Rows:
    """The rules of :mod:`forecasting.io.rules` on every record (see the module docstring, step 1)."""
    n = len(cells)
    columns = {name: arrow_text(cells[name]) for name in cells.columns}
    blank = pa.array(np.ones(n, dtype=bool))
    too_long = pa.array(np.zeros(n, dtype=bool))
    damaged = pa.array(np.zeros(n, dtype=bool))
    for array in columns.values():
        blank = pc.and_(blank, pc.equal(pc.utf8_trim(array, characters=rules.WHITESPACE), ""))
        too_long = pc.or_(too_long, pc.greater(pc.utf8_length(array), rules.MAX_FIELD_CHARS))
        if possibly_damaged:
            damaged = pc.or_(damaged, pc.match_substring_regex(array, rules.DAMAGE_PATTERN))
    blank_np = _numpy(blank, bool)
    duplicate = cells.duplicated(keep="first").to_numpy() & ~blank_np if n else np.zeros(0, dtype=bool)

    def cell(role):
        column = getattr(mapping, role)
        return columns[column] if column else None

    customer = rules.read_customer(_OPS, cell("customer"))
    status = (rules.classify_status(_OPS, cell("status")) if mapping.status
              else pa.array(np.full(n, rules.STATUS_NONE, dtype=np.int64)))
    amount = rules.read_amount(_OPS, cell("value"), decimal=decimal)
    currency = rules.currency_of_cell(_OPS, cell("currency")) if mapping.currency else amount["currency"]
    when = rules.read_date(_OPS, cell("date"), date_order=date_order)
    row = {"blank": blank, "too_long": too_long, "damaged": damaged, "duplicate": pa.array(duplicate),
           "customer": customer["customer"], "status": status, "currency": currency,
           "amount_kind": amount["kind"], "date_kind": when["kind"], "micros": when["micros"]}
    if formulas:
        used = [formulas[c] for c in mapping.as_dict().values() if c in formulas]
        if used:
            row["formula"] = pa.array(np.logical_or.reduce(used))
    dates = options.dates
    reason = rules.row_reason(_OPS, row, wanted_currency=options.wanted_currency, keep_unpaid=options.keep_unpaid,
                              keep_implausible=options.keep_implausible, dates=dates)
    notes = rules.row_notes(_OPS, row, keep_unpaid=options.keep_unpaid, keep_implausible=options.keep_implausible,
                            dates=dates)

    def stripped(role):
        return pandas_text(pc.utf8_trim(cell(role), characters=rules.WHITESPACE)) if getattr(mapping, role) else None

    return Rows(
        reason=_numpy(_OPS.full_column(reason, n), np.int8),
        notes=_numpy(_OPS.full_column(notes, n), np.int16),
        hints=(_numpy(amount["hints"], np.int16) | _numpy(when["hints"], np.int16)),
        customer=pandas_text(customer["customer"]),
        written=pandas_text(pc.utf8_trim(cell("customer"), characters=rules.WHITESPACE)),
        status=_numpy(_OPS.full_column(status, n), np.int8),
        status_text=stripped("status"),
        currency=pandas_text(_OPS.full_column(currency, n)),
        amount=_numpy(amount["amount"], np.float64, fill=np.nan),
        amount_kind=_numpy(amount["kind"], np.int8),
        micros=_numpy(when["micros"], np.int64, fill=0),
        date_kind=_numpy(when["kind"], np.int8),
        order_text=stripped("order_id"),
        segment_text=stripped("segment"),
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
    currency_in_play = rows.reached("other_currency") & (rows.currency != "").to_numpy()
    if currency_in_play.any():
        where = cells[mapping.currency] if mapping.currency else value
        named = pd.DataFrame({"mark": rows.currency[currency_in_play].to_numpy(),
                              "at": np.flatnonzero(currency_in_play)}).groupby("mark", sort=True)["at"].min()
        evidence.currencies = {str(mark): (int(lines[at]), str(where.iloc[at]).strip()) for mark, at in named.items()}
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
    if rows.order_text is None:
        return 0, 0, 0
    refund = (rows.amount < 0) | (rows.status == rules.STATUS_REFUND)
    candidate = (((rows.reason == 0) | (rows.reason == _CODE["missing_amount"])) & ~refund
                 & (rows.order_text != "").to_numpy())
    if not candidate.any():
        return 0, 0, 0
    at = np.flatnonzero(candidate)
    frame = pd.DataFrame({"customer": rows.customer.take(at).to_numpy(), "order": rows.order_text.take(at).to_numpy(),
                          "amount": rows.amount[at], "blank": rows.reason[at] != 0})
    groups = frame.groupby(["customer", "order"], sort=False)
    lines = groups.size()
    several = lines >= 2
    distinct = groups["amount"].nunique()  # NaN (blank) is not counted
    blanks = groups["blank"].sum()
    fitting = several & (distinct <= 1) & (lines - blanks >= 1)
    return int(several.sum()), int(fitting.sum()), int((several & (blanks > 0) & fitting).sum())


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
    lines = (rows.order_text != "").to_numpy() & ~np.isin(rows.reason, [_CODE[c] for c in rules.NOT_A_LINE])
    at = np.flatnonzero(lines)
    if not len(at):
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int8)
    key = pd.MultiIndex.from_arrays([rows.customer.take(at).to_numpy(dtype=object),
                                     rows.order_text.take(at).to_numpy(dtype=object)])
    group, _ = pd.factorize(key)
    first = np.full(group.max() + 1, len(at), dtype=np.int64)
    np.minimum.at(first, group, np.arange(len(at)))
    first_reason = rows.reason[at][first][group]
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
    if order_total and rows.order_text is not None:
        inherited = inherited_reasons(rows)
        refund_status = rows.status == rules.STATUS_REFUND
        further = (rows.reason == _CODE["missing_amount"]) & ~refund_status & (rows.order_text != "").to_numpy()
        further[inherited[0]] = False
        eligible = eligible | further
    position = np.flatnonzero(eligible)
    amount = rows.amount[position]
    read = rows.reason[position] == 0
    is_refund = read & ((amount < 0) | (rows.status[position] == rules.STATUS_REFUND))
    signed = np.where(is_refund, -np.abs(amount), amount)
    customer_code, _ = pd.factorize(rows.customer.take(position))
    if rows.order_text is not None:
        order_text = rows.order_text.take(position)
        id_code, ids = pd.factorize(order_text)
        # A line without an order id is an order of its own.
        no_id = (order_text == "").to_numpy()
        id_code = np.where(no_id, len(ids) + np.arange(len(position)), id_code)
        order, _ = pd.factorize(customer_code.astype(np.int64) * (len(ids) + len(position) + 1) + id_code)
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
    # Lines are added in file order (bincount adds in array order), as every engine adds them.
    value = np.bincount(order, weights=np.where(counted, signed, 0.0), minlength=n_orders)
    purchases = np.bincount(order, weights=carrier, minlength=n_orders)
    negatives = np.bincount(order, weights=counted & (amount < 0), minlength=n_orders)
    refunds = np.bincount(order, weights=counted & is_refund, minlength=n_orders)
    verdict = _numpy(rules.order_verdict(_OPS, purchases=pa.array(purchases), negatives=pa.array(negatives),
                                         refunds=pa.array(refunds), value=pa.array(value)), np.int8)
    micros = rows.micros[position]
    order_micros = np.full(n_orders, np.iinfo(np.int64).max, dtype=np.int64)
    np.minimum.at(order_micros, order[purchase], micros[purchase])
    first = np.full(n_orders, len(position), dtype=np.int64)
    np.minimum.at(first, order, np.arange(len(position)))
    # An order of further lines only (no line with an amount) is no order: its lines keep their reason.
    real = np.bincount(order, weights=read, minlength=n_orders) > 0
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


def finish_orders(rows: Rows, orders: Orders, usual, *, keep_implausible: bool, lines: np.ndarray) -> Finished:
    """Orders outside the usual range, every record's final reason and notes, merged e-mail ids, and
    the table of kept orders (``lines``: each record's place, kept as the order's ``line``)."""
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
    reason = rows.reason.copy()
    reason[orders.inherited[0]] = orders.inherited[1]
    line_verdict = verdict[orders.order]
    real = line_verdict >= 0
    position = orders.position[real]
    reason[position] = line_verdict[real]
    used_lines = real & (line_verdict == 0)
    further = used_lines & ~orders.counted & ~orders.carrier
    notes[orders.position[further]] |= rules.NOTE_BITS["continuation_line"]
    notes[orders.position[used_lines & kept_anyway[orders.order]]] |= rules.NOTE_BITS["implausible_kept"]
    _note_merged_ids(rows, reason, notes)

    kept = np.flatnonzero(verdict == 0)
    first_line = orders.position[orders.first[kept]]
    order_ids = (rows.order_text.take(first_line).to_numpy() if rows.order_text is not None
                 else np.full(len(kept), "", dtype=object))
    table = pd.DataFrame({
        "customer": rows.customer.take(first_line).to_numpy(dtype=object),
        "order_id": order_ids,
        "order_date": orders.order_micros[kept].astype("datetime64[us]").astype("datetime64[ns]"),
        "order_value": orders.value[kept].astype(np.float64),
        "line": lines[first_line],
    })
    if rows.segment_text is not None:
        segment = rows.segment_text.take(orders.position).reset_index(drop=True)
        first_segment = segment.where(segment != "").groupby(orders.order, sort=True).first()
        table["segment"] = first_segment.reindex(kept).fillna("unknown").to_numpy(dtype=object)
    # Orders by date, then by place in the file: the order in which every engine adds them up.
    table = table.sort_values(["order_date", "line"], kind="stable").reset_index(drop=True)
    used = reason == 0
    unknown = used & (rows.status == rules.STATUS_UNKNOWN)
    first_seen = {}
    if unknown.any() and rows.status_text is not None:
        # In the order each status first appears, as every engine lists them.
        frame = pd.DataFrame({"status": rows.status_text[unknown].to_numpy(dtype=object), "line": lines[unknown]})
        grouped = frame.groupby("status", sort=False)["line"].agg(["size", "min"]).sort_values("min", kind="stable")
        first_seen = {str(k): (int(n), int(m)) for k, n, m in zip(grouped.index, grouped["size"], grouped["min"])}
    return Finished(reason=reason, notes=notes, orders=table,
                    unrecognised={k: n for k, (n, _) in first_seen.items()}, unrecognised_first=first_seen)


def _note_merged_ids(rows: Rows, reason: np.ndarray, notes: np.ndarray) -> None:
    """Rows used whose e-mail id is written otherwise than on the customer's first row used."""
    used = np.flatnonzero(reason == 0)
    if not len(used):
        return
    written = rows.written.take(used).reset_index(drop=True)
    changed = (written != rows.customer.take(used).reset_index(drop=True)).to_numpy()
    if not changed.any():
        return
    customer = rows.customer.take(used).reset_index(drop=True)
    frame = pd.DataFrame({"customer": customer.to_numpy(dtype=object), "written": written.to_numpy(dtype=object)})
    first = frame.groupby("customer", sort=False)["written"].transform("first")
    differs = (frame["written"] != first).to_numpy()
    notes[used[differs]] |= rules.NOTE_BITS["merged_customer_id"]


# ---------------------------------------------------------------------------
# The pandas engine: every step in this process


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
            "customers": int(self.orders["customer"].nunique()),
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
    done = finish_orders(rows, orders, usual, keep_implausible=options.keep_implausible, lines=lines)
    notes += rules.unrecognised_status_note(done.unrecognised)
    table = done.orders
    table.insert(4, "row", rows_at[table.pop("line").to_numpy()])
    table = table.sort_values(["order_date", "row"], kind="stable").reset_index(drop=True)
    for column in ("customer", "order_id") + (("segment",) if mapping.segment else ()):
        table[column] = table[column].astype(str)
    if rows.order_text is None:
        table["order_id"] = "row-" + table["row"].astype(str)
    excluded = excluded_table(cells, rows_at, done.reason, raw.set_aside)
    noted = noted_table(rows_at, done.notes, done.reason)
    result = ReadResult(orders=table, excluded=excluded, mapping=mapping, rows_read=len(cells) + len(raw.set_aside),
                        file_name=file_name, columns=list(cells.columns), notes=notes, noted=noted,
                        unrecognised_statuses=done.unrecognised)
    if table.empty:
        raise rules.no_usable_orders(result.audit()["excluded"], file_name=file_name)
    return result


def excluded_table(cells: pd.DataFrame, rows_at: np.ndarray, reason: np.ndarray,
                   set_aside: list[tuple[int, str, str]]) -> pd.DataFrame:
    """Every row left out: ``row``, ``reason_code``, ``reason``, its cells (and ``raw_text`` for rows
    that did not split); implausible values first, then in row order."""
    out = reason != 0
    table = cells[out].copy().reset_index(drop=True)
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
