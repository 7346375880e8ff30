"""Reading and cleaning order exports: a file in, one row per order out, every row accounted for.

In: a CSV/TSV (any of UTF-8, UTF-8 with BOM, Windows-1252/Latin-1; comma, semicolon,
tab or pipe), an Excel workbook (.xlsx) or a Parquet file, with one row per order or
per order line.

Out: a :class:`ReadResult` holding

* ``orders``: one row per order with ``customer``, ``order_id``, ``order_date``,
  ``order_value`` (> 0), ``row`` (the spreadsheet row of the order's first line) and
  ``segment`` when a segment column is mapped;
* ``excluded``: every input row that was not used, with its ``row`` number, a
  ``reason_code`` and a plain-language ``reason``, plus the row's original cells;
* ``rows_read == rows_used + len(excluded)``, always.

Row numbers are what a spreadsheet shows: the header is row 1, the first order row 2.

How rows are cleaned, in order (the first rule that applies gives the reason):
blank rows, malformed rows (wrong number of fields), exact duplicates of an earlier
row, missing customer, test orders, cancelled orders, another currency than the one
chosen, missing or unreadable amount, missing or unreadable date. Rows sharing an
order id become one order (the sum of its lines); refund rows (a negative amount or a
refunded status) net against their order, and an order that nets to zero or less is
excluded. Whole-file problems (a required column that cannot be found, several
currencies, dates that could be read two ways) raise :class:`OrderDataError`.
"""

from __future__ import annotations

import codecs
import collections
import csv
import io
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pa_compute
import pyarrow.csv as pa_csv

from .errors import OrderDataError
from .io import rules
from .io.backends import ArrowOps

# ---------------------------------------------------------------------------
# Limits: a file past these is refused with a message, never half-read.
MAX_FILE_BYTES = rules.MAX_FILE_BYTES
MAX_COLUMNS = rules.MAX_COLUMNS
MAX_FIELD_CHARS = rules.MAX_FIELD_CHARS

# Reason codes and their plain-language reasons (implausible values first, then in the order the
# rules apply), from the one rule set every engine applies.
REASONS = rules.REASONS

ROLES = ("customer", "date", "value", "order_id", "status", "currency", "segment")
REQUIRED_ROLES = ("customer", "date", "value")
OPTION_FOR_ROLE = {
    "customer": "--customer",
    "date": "--date",
    "value": "--value",
    "order_id": "--order-id",
    "status": "--status",
    "currency": "--currency-column",
    "segment": "--segment",
}

# Header words for each role, best first. Headers are compared lower-case with
# everything but letters and digits removed ("Order Date" -> "orderdate").
_HEADER_NAMES = {
    "customer": ["customerid", "customer", "clientid", "client", "customernumber", "customerno",
                 "customeremail", "email", "buyer", "buyerid", "userid", "accountid", "memberid",
                 "shopper", "kunde", "kundennummer", "cliente"],
    "date": ["orderdate", "date", "createdat", "created", "orderedat", "purchasedate", "invoicedate",
             "orderdatetime", "timestamp", "datetime", "processedat", "paidat", "saledate", "transactiondate"],
    "value": ["ordervalue", "ordertotal", "total", "amount", "linetotal", "lineamount", "value",
              "totalprice", "grandtotal", "netsales", "sales", "revenue", "subtotal", "price",
              "totalamount", "orderamount", "gross", "net", "betrag", "importe"],
    "order_id": ["orderid", "ordernumber", "orderno", "order", "invoice", "invoiceid", "invoicenumber",
                 "invoiceno", "transactionid", "receipt", "receiptid", "name", "bestellnummer"],
    "status": ["orderstatus", "status", "financialstatus", "paymentstatus", "state", "orderstate"],
    "currency": ["currency", "currencycode", "ordercurrency"],
    "segment": ["segment", "channel", "saleschannel", "region", "source", "store", "market", "customertype"],
}

_TEST_STATUS = re.compile(r"^(test|testorder|testing|sandbox)$")
_CANCELLED_STATUS = re.compile(r"^(cancelled|canceled|cancel|void|voided|storniert|annule|annulee)$")
_REFUND_STATUS = re.compile(r"^(refund|refunded|return|returned|chargeback|erstattet|rembourse)$")



# Cells read as text use pandas' own string type, backed by Arrow.
_TEXT_TYPES = {pa.string(): pd.StringDtype("pyarrow", na_value=np.nan),
               pa.large_string(): pd.StringDtype("pyarrow", na_value=np.nan)}


@dataclass(frozen=True)
class ColumnMapping:
    """Which column of the file plays which part. ``None`` means not present."""

    customer: str | None = None
    date: str | None = None
    value: str | None = None
    order_id: str | None = None
    status: str | None = None
    currency: str | None = None
    segment: str | None = None

    def as_dict(self) -> dict[str, str | None]:
        return {role: getattr(self, role) for role in ROLES}


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

    @property
    def rows_used(self) -> int:
        return self.rows_read - len(self.excluded)

    def audit(self) -> dict[str, Any]:
        """The row account as plain numbers: what was read, used and left out, and why."""
        counts = self.excluded["reason_code"].value_counts()
        excluded = {code: int(counts[code]) for code in REASONS if code in counts.index}
        return {
            "file": self.file_name,
            "rows_read": int(self.rows_read),
            "rows_used": int(self.rows_used),
            "rows_excluded": int(len(self.excluded)),
            "orders": int(len(self.orders)),
            "customers": int(self.orders["customer"].nunique()),
            "excluded": excluded,
            "mapping": self.mapping.as_dict(),
            "notes": list(self.notes),
        }


@dataclass
class _RawTable:
    """All cells as text, plus the spreadsheet row number of each record."""

    cells: pd.DataFrame
    row_numbers: np.ndarray
    set_aside: list[tuple[int, str, str]]  # rows that did not split: (row, reason code, text)
    notes: list[str]


# ---------------------------------------------------------------------------
# Loading raw cells


def _source_bytes(source, file_name: str) -> bytes:
    if isinstance(source, (bytes, bytearray, memoryview)):
        data = bytes(source)
    elif isinstance(source, (str, Path)):
        path = Path(source)
        if not path.exists():
            raise OrderDataError("the file does not exist", file=file_name,
                                 fix="Check the path and the file name")
        if path.stat().st_size > MAX_FILE_BYTES:
            raise OrderDataError(f"the file is larger than {MAX_FILE_BYTES // 1_000_000} MB",
                                 file=file_name, fix="Split it, or use the duckdb engine")
        data = path.read_bytes()
    elif hasattr(source, "read"):
        data = source.read()
        if isinstance(data, str):
            data = data.encode("utf-8")
    else:
        raise TypeError(f"cannot read orders from {type(source).__name__}")
    if len(data) > MAX_FILE_BYTES:
        raise OrderDataError(f"the file is larger than {MAX_FILE_BYTES // 1_000_000} MB", file=file_name)
    return data


def _file_kind(data: bytes, file_name: str) -> str:
    suffix = Path(file_name).suffix.lower()
    if data[:4] == b"PK\x03\x04":
        return "xlsx"
    if data[:4] == b"PAR1":
        return "parquet"
    if suffix in {".xlsx", ".xlsm"}:
        raise OrderDataError("the file is named like an Excel workbook but is not one", file=file_name,
                             fix="Export it again from the spreadsheet as .xlsx or as CSV")
    if suffix == ".parquet":
        raise OrderDataError("the file is named like a Parquet file but is not one", file=file_name)
    if suffix == ".xls":
        raise OrderDataError("old-style .xls workbooks are not supported", file=file_name,
                             fix="Save the sheet as .xlsx or CSV and upload that")
    return "text"


_BOM = b"\xef\xbb\xbf"
_WINDOWS_NOTE = "The file is not UTF-8; read it as Windows-1252 (Western European)."
_LATIN_NOTE = "The file is not UTF-8; read it as Latin-1."
_UTF16_NOTE = "The file is UTF-16 text; read as such."


def _decodes(blocks, encoding: str) -> bool:
    decoder = codecs.getincrementaldecoder(encoding)()
    try:
        for block in blocks:
            decoder.decode(block)
        decoder.decode(b"", final=True)
    except UnicodeDecodeError:
        return False
    return True


def text_encoding(blocks) -> tuple[str, str | None]:
    """The encoding the reader uses for a text file, and the note that says so.

    ``blocks()`` gives the file's bytes in blocks, from the start, each time it is called
    (the file is read in blocks, never whole, by the scale engines). UTF-16 when the file
    starts with its byte order mark; else UTF-8 (after an optional byte order mark) when the
    whole file is valid UTF-8; else Windows-1252, else Latin-1 (which reads any byte)."""
    first = next(iter(blocks()), b"")
    if first.startswith((b"\xff\xfe", b"\xfe\xff")):
        return "utf-16", _UTF16_NOTE
    encoding = "utf-8-sig" if first.startswith(_BOM) else "utf-8"
    if _decodes(blocks(), encoding):
        return encoding, None
    if _decodes(blocks(), "cp1252"):
        return "cp1252", _WINDOWS_NOTE
    return "latin-1", _LATIN_NOTE


def _decode(data: bytes, file_name: str, notes: list[str]) -> str:
    head = data[:65536]
    if b"\x00" in head and not head.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise OrderDataError("the file is not a text table (it contains binary data)", file=file_name,
                             fix="Upload a CSV, Excel (.xlsx) or Parquet export")
    encoding, note = text_encoding(lambda: iter([data]))
    try:
        text = data.decode(encoding)
    except UnicodeDecodeError:
        raise OrderDataError("the file says it is UTF-16 text but is not", file=file_name,
                             fix="Export it again as UTF-8 CSV") from None
    if note:
        notes.append(note)
    return text


def _swallows_records(lines: list[str], delimiter: str, width: int) -> bool:
    """Whether any of ``lines`` (inside one quoted cell) is a whole record on its own: it splits,
    with strict RFC 4180 quoting, into the header's number of fields."""
    for line in lines:
        try:
            fields = next(csv.reader([line.rstrip("\r\n")], delimiter=delimiter, strict=True), [])
        except csv.Error:
            continue
        if len(fields) == width:
            return True
    return False


def split_records(lines, *, delimiter: str, width: int, first_row: int):
    """Split text lines into records, careful about rows that do not fit; RFC 4180 quoting.

    Yields ``(row, fields, code, text)`` for each record after the header: ``fields`` (a list
    of ``width`` cells) and ``code`` None for a good record; else ``fields`` None and ``code``
    ``"blank_row"`` (nothing but spaces), ``"malformed_row"`` (another number of fields) or
    ``"unclosed_quote"``, with the record's ``text`` as written. ``row`` counts records from
    ``first_row`` (a record with a quoted line break is one row, as a spreadsheet shows it).

    A quote that is opened and never closed makes the csv module read on to the next quote or
    the end of the file, swallowing the rows between. A record that runs over several lines
    is taken for that when it does not have the header's fields, or when one of its later
    lines is a whole record on its own (splits, with strict quoting, into the header's
    fields): its first line is reported as ``unclosed_quote`` and the reading starts again
    on the line after it, so no row after it is lost. A cell with line breaks whose lines are
    not whole records (an address, a note) is read as one cell.
    """
    csv.field_size_limit(max(csv.field_size_limit(), rules.MAX_FILE_BYTES))
    pending: collections.deque[str] = collections.deque()
    source = iter(lines)
    consumed: list[str] = []

    def feed():
        while True:
            if pending:
                line = pending.popleft()
            else:
                line = next(source, None)
                if line is None:
                    return
            consumed.append(line)
            yield line

    reader = csv.reader(feed(), delimiter=delimiter)
    row = first_row
    while True:
        consumed.clear()
        record = next(reader, None)
        if record is None:
            return
        text = "".join(consumed).rstrip("\r\n")
        if len(consumed) > 1 and (len(record) != width or _swallows_records(consumed[1:], delimiter, width)):
            # A quote opened on this row ran on over later rows: report this row, read on after it.
            yield row, None, "unclosed_quote", consumed[0].rstrip("\r\n")
            pending.extendleft(reversed(consumed[1:]))
            reader = csv.reader(feed(), delimiter=delimiter)
        elif len(record) == width and width > 0:
            yield row, record, None, text
        elif all(not field.strip() for field in record):
            yield row, None, "blank_row", text
        else:
            yield row, None, "malformed_row", text
        row += 1


def _sniff_delimiter(text: str) -> str:
    """Pick the delimiter that splits the first lines into the same number (> 1) of fields."""
    sample_lines = [line for line in text[:200_000].splitlines()[:50] if line.strip()]
    if not sample_lines:
        return ","
    best, best_score = ",", (-1, 0)
    for delimiter in [",", ";", "\t", "|"]:
        try:
            widths = [len(r) for r in csv.reader(sample_lines, delimiter=delimiter)]
        except csv.Error:
            continue
        header_width = widths[0]
        if header_width < 2:
            continue
        agreeing = sum(w == header_width for w in widths)
        score = (agreeing, header_width)
        if score > best_score:
            best, best_score = delimiter, score
    return best


def _read_text(text: str, encoded: bytes, file_name: str, notes: list[str]) -> _RawTable:
    """Split CSV text into cells; ``encoded`` is the same text as UTF-8 bytes."""
    if not text.strip():
        raise OrderDataError("the file is empty", file=file_name, fix="Export the orders again")
    delimiter = _sniff_delimiter(text)
    if delimiter != ",":
        notes.append(f"Fields are separated by {'a tab' if delimiter == chr(9) else repr(delimiter)}.")
    header = next(csv.reader(io.StringIO(text[:1_000_000], newline=""), delimiter=delimiter), None)
    if not header:
        raise OrderDataError("the file has no header row", file=file_name)
    columns = _unique_headers(header)
    try:
        # Arrow's multi-threaded reader, every cell kept as text; a row that does not fit the header
        # raises, and the careful record-by-record reader below then reports it.
        table = pa_csv.read_csv(
            io.BytesIO(encoded),
            read_options=pa_csv.ReadOptions(column_names=columns, skip_rows=1, use_threads=True),
            parse_options=pa_csv.ParseOptions(delimiter=delimiter, quote_char='"', double_quote=True,
                                              escape_char=False, newlines_in_values=True,
                                              ignore_empty_lines=False),
            convert_options=pa_csv.ConvertOptions(column_types={c: pa.string() for c in columns},
                                                  strings_can_be_null=False, quoted_strings_can_be_null=False))
    except (pa.ArrowInvalid, csv.Error, ValueError):
        return _read_text_by_record(text, delimiter, file_name, notes)
    if '"' in text and _any_line_break(table):
        # A cell with a line break may be an unclosed quote that swallowed rows: the careful reader
        # tells them apart (see split_records).
        return _read_text_by_record(text, delimiter, file_name, notes)
    cells = table.to_pandas(types_mapper=_TEXT_TYPES.get)
    return _RawTable(cells, np.arange(2, len(cells) + 2), [], notes)


def _any_line_break(table: pa.Table) -> bool:
    return any(pa_compute.any(pa_compute.match_substring_regex(column, "[\r\n]")).as_py()
               for column in table.columns)


def _read_text_by_record(text: str, delimiter: str, file_name: str, notes: list[str]) -> _RawTable:
    """Slow, careful reading: each record is checked against the header width (:func:`split_records`)."""
    lines = io.StringIO(text, newline="")
    header = next(csv.reader(lines, delimiter=delimiter), None)
    if not header:
        raise OrderDataError("the file has no header row", file=file_name)
    width = len(header)
    good, numbers, set_aside = [], [], []
    for row, fields, code, raw_text in split_records(lines, delimiter=delimiter, width=width, first_row=2):
        if code is None:
            good.append(fields)
            numbers.append(row)
        elif code == "blank_row":
            good.append([""] * width)
            numbers.append(row)
        else:
            set_aside.append((row, code, raw_text))
    cells = pd.DataFrame(good, columns=_unique_headers(header), dtype=object)
    return _RawTable(cells, np.asarray(numbers, dtype=np.int64), set_aside, notes)


def _unique_headers(header: list[str]) -> list[str]:
    seen: dict[str, int] = {}
    names = []
    for name in header:
        name = str(name).strip() or "unnamed"
        if name in seen:
            seen[name] += 1
            name = f"{name}.{seen[name]}"
        else:
            seen[name] = 0
        names.append(name)
    return names


def _read_excel(data: bytes, file_name: str, sheet, notes: list[str]) -> _RawTable:
    try:
        cells = pd.read_excel(io.BytesIO(data), sheet_name=sheet if sheet is not None else 0, dtype=object,
                              keep_default_na=False)
    except Exception as problem:  # openpyxl raises many types for broken workbooks
        raise OrderDataError(f"the Excel workbook could not be opened ({type(problem).__name__})",
                             file=file_name, fix="Open it in a spreadsheet and save it again as .xlsx") from None
    cells = cells.map(_excel_cell_text).astype(object)
    cells.columns = _unique_headers([str(c) for c in cells.columns])
    return _RawTable(cells, np.arange(2, len(cells) + 2), [], notes)


def _excel_cell_text(cell) -> str:
    if cell is None or (isinstance(cell, float) and np.isnan(cell)):
        return ""
    if isinstance(cell, pd.Timestamp) or hasattr(cell, "isoformat"):
        return pd.Timestamp(cell).isoformat(sep=" ")
    if isinstance(cell, float) and cell.is_integer():
        return str(int(cell))
    return str(cell)


def _read_parquet(data: bytes, file_name: str, notes: list[str]) -> _RawTable:
    try:
        frame = pd.read_parquet(io.BytesIO(data))
    except Exception as problem:
        raise OrderDataError(f"the Parquet file could not be read ({type(problem).__name__})",
                             file=file_name) from None
    cells = typed_cells_as_text(frame)
    cells.columns = _unique_headers(list(cells.columns))
    return _RawTable(cells, np.arange(2, len(cells) + 2), [], notes)


def typed_cells_as_text(frame: pd.DataFrame) -> pd.DataFrame:
    """Typed columns (as Parquet holds them) turned into the text the cleaning rules read.

    Dates become ``YYYY-MM-DD HH:MM:SS``, missing cells the empty string.
    """
    cells = pd.DataFrame(index=frame.index)
    for name in frame.columns:
        column = frame[name]
        if pd.api.types.is_datetime64_any_dtype(column):
            text = column.dt.strftime("%Y-%m-%d %H:%M:%S")
        else:
            text = column.astype(str)
        cells[str(name)] = text.where(column.notna(), "").astype(object)
    return cells.reset_index(drop=True)


def _load_raw(data: bytes, file_name: str, sheet) -> _RawTable:
    notes: list[str] = []
    kind = _file_kind(data, file_name)
    if kind == "xlsx":
        raw = _read_excel(data, file_name, sheet, notes)
    elif kind == "parquet":
        raw = _read_parquet(data, file_name, notes)
    else:
        text = _decode(data, file_name, notes)
        # Arrow reads UTF-8 bytes: pass the file itself when it is UTF-8, else the decoded text re-encoded.
        plain_utf8 = not notes and not data.startswith(b"\xef\xbb\xbf")
        raw = _read_text(text, data if plain_utf8 else text.encode("utf-8"), file_name, notes)
    if raw.cells.shape[1] > MAX_COLUMNS:
        raise OrderDataError(f"the file has {raw.cells.shape[1]} columns, more than the {MAX_COLUMNS} supported",
                             file=file_name, fix="Export only the order columns")
    if raw.cells.shape[1] < 3:
        raise OrderDataError(
            f"the file has {raw.cells.shape[1]} column(s); at least customer, date and amount are needed",
            file=file_name, fix="Check that the export has a header row and a known delimiter")
    return raw


def read_cells(source, *, file_name: str | None = None, sheet: str | int | None = None) -> pd.DataFrame:
    """The file's cells as text, headings as column names, before any cleaning.

    For front ends that show the headings (to let the user map columns) even when
    the file cannot be read as orders yet. Raises :class:`OrderDataError` when the
    file is not a table at all.
    """
    if file_name is None:
        file_name = Path(source).name if isinstance(source, (str, Path)) else "uploaded file"
    return _load_raw(_source_bytes(source, file_name), file_name, sheet).cells


# ---------------------------------------------------------------------------
# Column mapping


def _normalise_header(name: str) -> str:
    return re.sub(r"[^0-9a-z]", "", str(name).lower())


def _resolve_override(name: str, columns: list[str], role: str, file_name: str) -> str:
    if name in columns:
        return name
    folded = {c.lower().strip(): c for c in columns}
    if name.lower().strip() in folded:
        return folded[name.lower().strip()]
    raise OrderDataError(f"there is no column named '{name}' for {OPTION_FOR_ROLE[role]}", file=file_name,
                         fix="The columns are: " + ", ".join(f"'{c}'" for c in columns))


def guess_mapping(cells: pd.DataFrame, overrides: dict[str, str | None] | None = None, *,
                  file_name: str = "orders") -> ColumnMapping:
    """Guess which column is customer, date, amount and so on, from headers then content.

    Parameters
    ----------
    cells : pandas.DataFrame
        The file's cells as text, headers as column names.
    overrides : dict, optional
        Role -> column chosen by the user; these win over every guess. The empty
        string means "this file has no such column".
    """
    overrides = {k: v for k, v in (overrides or {}).items() if v is not None}
    columns = list(cells.columns)
    chosen: dict[str, str | None] = {}
    taken: set[str] = set()
    for role, name in overrides.items():
        if role not in ROLES:
            raise ValueError(f"unknown column role {role!r}")
        chosen[role] = _resolve_override(name, columns, role, file_name) if name != "" else None
        if chosen[role]:
            taken.add(chosen[role])
    normalised = {c: _normalise_header(c) for c in columns}
    for role in ROLES:
        if role in chosen:
            continue
        chosen[role] = None
        for wanted in _HEADER_NAMES[role]:
            match = next((c for c in columns if c not in taken and normalised[c] == wanted), None)
            if match is not None:
                chosen[role] = match
                taken.add(match)
                break
    _guess_from_content(cells, chosen, taken)
    missing = [role for role in REQUIRED_ROLES if chosen[role] is None]
    if missing:
        role = missing[0]
        raise OrderDataError(
            f"cannot tell which column holds the {'customer id' if role == 'customer' else 'order ' + role}",
            file=file_name,
            fix=f"Name it with {OPTION_FOR_ROLE[role]} (the columns are: "
                + ", ".join(f"'{c}'" for c in columns) + ")")
    return ColumnMapping(**chosen)


def _guess_from_content(cells: pd.DataFrame, chosen: dict, taken: set) -> None:
    """Fill missing required roles by looking at a sample of values."""
    if all(chosen[r] is not None for r in REQUIRED_ROLES):
        return
    sample = cells.head(500)
    free = [c for c in cells.columns if c not in taken]
    if chosen["date"] is None:
        for column in free:
            text = sample[column].astype(str).str.strip()
            text = text[text != ""]
            if len(text) and pd.to_datetime(text, format="mixed", errors="coerce").notna().mean() > 0.9 \
                    and text.str.contains(r"[-/.]", regex=True).mean() > 0.9:
                chosen["date"] = column
                taken.add(column)
                free.remove(column)
                break
    if chosen["value"] is None:
        for column in free:
            text = sample[column].astype(str).str.strip()
            text = text[text != ""]
            if len(text) and text.str.contains(r"[.,]\d{2}\b|[$€£]", regex=True).mean() > 0.8:
                chosen["value"] = column
                taken.add(column)
                free.remove(column)
                break
    if chosen["customer"] is None:
        for column in free:
            text = sample[column].astype(str).str.strip()
            if len(text) and text.nunique() < len(text) and (text != "").mean() > 0.9:
                chosen["customer"] = column
                taken.add(column)
                break


# ---------------------------------------------------------------------------
# Money


def amount_readings(values: pd.Series, *, decimal: str = ".") -> dict[str, np.ndarray]:
    """The amount rule of :func:`forecasting.io.rules.read_amount` on a column of text cells.

    Returns numpy arrays: ``amount`` (NaN where not read), ``kind``, ``currency`` and ``hints``."""
    text = pa.array(values.astype(str), type=pa.string()) if len(values) else pa.array([], pa.string())
    read = rules.read_amount(ArrowOps(), text, decimal=decimal)
    return {"amount": read["amount"].to_numpy(zero_copy_only=False).astype(np.float64),
            "kind": read["kind"].to_numpy(zero_copy_only=False).astype(np.int8),
            "currency": read["currency"].to_numpy(zero_copy_only=False).astype(object),
            "hints": read["hints"].to_numpy(zero_copy_only=False).astype(np.int8)}


def _first_with(mask: np.ndarray, rows: np.ndarray, values: pd.Series):
    """``(row, value)`` of the first place ``mask`` holds, or None."""
    if not mask.any():
        return None
    at = int(np.flatnonzero(mask)[0])
    return int(rows[at]), str(values.iloc[at]).strip()


def settle_decimal(values: pd.Series, alive: np.ndarray, rows: np.ndarray, *, option: str | None,
                   file_name: str, column: str) -> tuple[dict, str]:
    """The amounts read with the column's decimal mark, and the mark.

    The mark is the option, else what the amounts still in play say
    (:func:`forecasting.io.rules.decide_decimal`). They are read with a decimal point first;
    when some can only be read with a decimal comma they are read again with one, and the
    values that then can only be read with a point show a column that mixes both."""
    used = option or "."
    readings = amount_readings(values, decimal=used)
    while True:
        hints = readings["hints"]
        comma = _first_with(alive & ((hints & rules.HINT_DECIMAL_COMMA) != 0), rows, values)
        point = _first_with(alive & ((hints & rules.HINT_DECIMAL_POINT) != 0), rows, values)
        chosen = rules.decide_decimal(option, comma, point, file_name=file_name, column=column)
        if chosen == used:
            return readings, chosen
        used = chosen
        readings = amount_readings(values, decimal=used)


def parse_money(values: pd.Series, *, decimal: str | None = None, column: str = "amount",
                file_name: str = "orders", row_numbers: np.ndarray | None = None,
                notes: list[str] | None = None) -> pd.Series:
    """Read money text as floats; unreadable values become NaN.

    Handles ``1234.5``, ``$1,234.50``, ``1.234,50 €``, ``USD 12``, ``(12.00)`` and
    ``-12``/``12-`` as negatives (see :func:`forecasting.io.rules.read_amount`). Whether the
    column uses a decimal comma is decided once for the whole column from the values that
    can only be read one way; ``decimal`` (``"."`` or ``","``) overrides that.

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
    readings, chosen = settle_decimal(values, np.ones(len(values), dtype=bool), rows, option=decimal,
                                      file_name=file_name, column=column)
    if notes is not None:
        notes.extend(rules.decimal_note(chosen, decimal, column))
    return pd.Series(readings["amount"], index=values.index)


# ---------------------------------------------------------------------------
# Dates

_SLASHED = re.compile(r"^\s*(\d{1,2})[/.\-](\d{1,2})[/.\-](\d{4}|\d{2})(?:[ T,]+(.*))?$")
DATE_ORDERS = ("day-first", "month-first")


def parse_dates(values: pd.Series, *, date_order: str | None = None, column: str = "date",
                file_name: str = "orders", row_numbers: np.ndarray | None = None,
                notes: list[str] | None = None) -> pd.Series:
    """Read order dates; unreadable values become NaT.

    ISO dates (``2025-03-14``, with or without a time) are read directly. For
    ``14/03/2025``-style dates the column is read day-first or month-first as the
    values settle it (a first number above 12 means day-first, a second number above
    12 means month-first). When no value settles it, ``date_order`` must say.

    Examples
    --------
    >>> parse_dates(pd.Series(["03/04/2025", "25/04/2025"])).dt.strftime("%d %b").tolist()
    ['03 Apr', '25 Apr']
    """
    if date_order not in (None, *DATE_ORDERS):
        raise OrderDataError(f"the date order must be one of {', '.join(DATE_ORDERS)} (got '{date_order}')",
                             fix="Use --date-order day-first or --date-order month-first")
    if pd.api.types.is_datetime64_any_dtype(values):
        return _drop_timezone(values)
    text = values.astype(str).str.strip()
    present = text != ""
    fast = _arrow_cast(text, pa.timestamp("ns"))
    if fast is not None:
        dates = fast
    else:
        dates = _drop_timezone(pd.to_datetime(text.where(present), format="ISO8601", errors="coerce", utc=True))
    unread = dates.isna() & present
    if unread.any():
        dates = dates.copy()
        rest = text[unread]
        parts = rest.str.extract(_SLASHED)
        slashed = parts[0].notna()
        if slashed.any():
            first = parts.loc[slashed, 0].astype(int)
            second = parts.loc[slashed, 1].astype(int)
            day_first_proof = first > 12
            month_first_proof = second > 12
            order = date_order

            def row_of(mask: pd.Series):
                """Spreadsheet row of the first value where ``mask`` holds."""
                label = mask[mask].index[0]
                return int(row_numbers[text.index.get_loc(label)]) if row_numbers is not None else None

            def value_of(mask: pd.Series) -> str:
                return rest[mask[mask].index[0]]

            if order is None:
                if day_first_proof.any() and month_first_proof.any():
                    raise OrderDataError(
                        "the dates mix day-first and month-first writing "
                        f"(row {row_of(month_first_proof)} has '{value_of(month_first_proof)}')",
                        file=file_name, row=row_of(day_first_proof), column=column,
                        value=value_of(day_first_proof),
                        fix="Set the order with --date-order day-first or --date-order month-first")
                if day_first_proof.any():
                    order, proof = "day-first", day_first_proof
                elif month_first_proof.any():
                    order, proof = "month-first", month_first_proof
                else:
                    raise OrderDataError(
                        "the dates can be read day-first or month-first and no value settles which",
                        file=file_name, row=row_of(slashed), column=column, value=value_of(slashed),
                        fix="Set the order with --date-order day-first or --date-order month-first")
                if notes is not None:
                    notes.append(f"Dates in '{column}' read {order} because row {row_of(proof)} has "
                                 f"'{value_of(proof)}'.")
            day, month = (first, second) if order == "day-first" else (second, first)
            year = parts.loc[slashed, 2].astype(int)
            year = year.where(year >= 100, year + 2000)
            clock = parts.loc[slashed, 3].fillna("")
            built = pd.to_datetime(
                pd.DataFrame({"year": year, "month": month, "day": day}), errors="coerce")
            with_time = clock != ""
            if with_time.any():
                clock_text = clock[with_time].str.extract(r"^(\d{1,2}:\d{2}(?::\d{2})?)", expand=False)
                clock_text = clock_text.where(clock_text.str.count(":") == 2, clock_text + ":00")
                times = pd.to_timedelta(clock_text, errors="coerce")
                built.loc[with_time] = built.loc[with_time] + times.fillna(pd.Timedelta(0))
            dates.loc[built.index] = built
        others = unread & dates.isna()
        if others.any():
            # Written-out dates such as "14 Mar 2025" or "March 14, 2025".
            dayfirst = date_order == "day-first"
            loose = pd.to_datetime(text[others], format="mixed", dayfirst=dayfirst, errors="coerce", utc=True)
            dates.loc[others] = _drop_timezone(loose)
    in_range = (dates >= pd.Timestamp("1970-01-01")) & (dates <= pd.Timestamp("2100-01-01"))
    return dates.where(in_range)


def _arrow_cast(text: pd.Series, arrow_type) -> pd.Series | None:
    """Arrow's fast conversion of a whole text column, or None when any value needs the careful path."""
    try:
        converted = pa_compute.cast(pa.array(text, type=pa.string()), arrow_type)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError):
        return None
    out = pd.Series(converted.to_numpy(zero_copy_only=False), index=text.index)
    if arrow_type == pa.float64():
        return out.where(np.isfinite(out))
    return out.astype("datetime64[ns]")


def _drop_timezone(dates: pd.Series) -> pd.Series:
    if getattr(dates.dt, "tz", None) is not None:
        dates = dates.dt.tz_convert(None)
    return dates.astype("datetime64[ns]")


# ---------------------------------------------------------------------------
# Cleaning


def _status_text(cells: pd.DataFrame, mapping: ColumnMapping) -> pd.Series:
    if mapping.status is None:
        return pd.Series("", index=cells.index, dtype=object)
    return cells[mapping.status].astype(str).str.lower().str.replace(r"[^a-z]", "", regex=True)


def read_orders(source, *, file_name: str | None = None, customer: str | None = None,
                date: str | None = None, value: str | None = None, order_id: str | None = None,
                status: str | None = None, currency_column: str | None = None,
                segment: str | None = None, currency: str | None = None,
                date_order: str | None = None, decimal: str | None = None,
                sheet: str | int | None = None) -> ReadResult:
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
        Keep only amounts in this currency (ISO code such as ``"EUR"``); needed when
        one file mixes currencies.
    date_order : {"day-first", "month-first"}, optional
        How to read dates like 03/04/2025 when the values do not settle it.
    decimal : {".", ","}, optional
        The decimal separator of the amounts, when the guess is wrong.
    sheet : str or int, optional
        The Excel sheet to read (default: the first).

    Returns
    -------
    ReadResult

    Raises
    ------
    OrderDataError
        When the file as a whole cannot be used; the message says where and how to fix it.
    """
    if file_name is None:
        file_name = Path(source).name if isinstance(source, (str, Path)) else "uploaded file"
    data = _source_bytes(source, file_name)
    raw = _load_raw(data, file_name, sheet)
    overrides = {"customer": customer, "date": date, "value": value, "order_id": order_id,
                 "status": status, "currency": currency_column, "segment": segment}
    mapping = guess_mapping(raw.cells, overrides, file_name=file_name)
    return clean_orders(raw, mapping, file_name=file_name, currency=currency, date_order=date_order,
                        decimal=decimal)


def clean_orders(raw: _RawTable, mapping: ColumnMapping, *, file_name: str, currency: str | None = None,
                 date_order: str | None = None, decimal: str | None = None) -> ReadResult:
    """Apply the cleaning rules to raw cells; see the module docstring for the order of rules."""
    cells, rows, notes = raw.cells, raw.row_numbers, list(raw.notes)
    n = len(cells)
    reason = np.full(n, "", dtype=object)
    open_rows = np.ones(n, dtype=bool)  # reason == "", kept as booleans (comparing text is slow)

    def exclude(mask, code: str) -> None:
        mask = np.asarray(mask, dtype=bool) & open_rows
        reason[mask] = code
        open_rows[mask] = False

    text = {role: cells[col].astype(str).str.strip() if col else None for role, col in mapping.as_dict().items()}
    long_field = np.zeros(n, dtype=bool)
    blank = np.ones(n, dtype=bool)
    for col in cells.columns:
        column = cells[col].astype(str)
        long_field |= column.str.len().to_numpy() > MAX_FIELD_CHARS
        blank &= (column.str.strip() == "").to_numpy()
    exclude(blank, "blank_row")
    exclude(long_field, "oversized_field")
    exclude(cells.duplicated(keep="first").to_numpy() & ~blank, "duplicate_row")
    exclude(_is_empty(text["customer"]), "missing_customer")
    status = _status_text(cells, mapping)
    if mapping.status:
        exclude(status.str.fullmatch(_TEST_STATUS).to_numpy(), "test_order")
        exclude(status.str.fullmatch(_CANCELLED_STATUS).to_numpy(), "cancelled_order")

    amount_text = text["value"]
    # The currency an amount names does not depend on the decimal mark.
    readings = amount_readings(amount_text, decimal=decimal or ".")
    row_currency = text["currency"].str.upper() if mapping.currency else pd.Series(readings["currency"],
                                                                                   index=cells.index)
    alive = open_rows.copy()
    seen = sorted(set(row_currency[alive & (row_currency != "").to_numpy()]))
    if currency:
        wanted = rules.wanted_currency(currency)
        exclude((row_currency != "").to_numpy() & (row_currency != wanted).to_numpy(), "other_currency")
    elif len(seen) > 1:
        where = (alive & (row_currency == seen[1]).to_numpy())
        at = int(np.flatnonzero(where)[0])
        column = mapping.currency or mapping.value
        raise rules.several_currencies(seen, (int(rows[at]), cells[column].iloc[at]), file_name=file_name,
                                       column=column)

    alive = open_rows.copy()
    readings, chosen = settle_decimal(amount_text, alive, rows, option=decimal, file_name=file_name,
                                      column=mapping.value)
    notes.extend(rules.decimal_note(chosen, decimal, mapping.value))
    kind = readings["kind"]
    present = alive & (kind != rules.KIND_EMPTY)
    unreadable = present & ((kind == rules.KIND_PLACEHOLDER) | (kind == rules.KIND_BAD))
    problem = rules.mostly_unreadable(int(present.sum()), int(unreadable.sum()),
                                      _first_with(unreadable, rows, amount_text), file_name=file_name,
                                      column=mapping.value, role="value")
    if problem is not None:
        raise problem
    exclude((kind == rules.KIND_EMPTY) | (kind == rules.KIND_PLACEHOLDER), "missing_amount")
    exclude(kind == rules.KIND_BAD, "bad_amount")
    amounts = pd.Series(readings["amount"], index=cells.index)

    exclude(_is_empty(text["date"]), "missing_date")
    alive = open_rows.copy()
    dates = pd.Series(pd.NaT, index=cells.index, dtype="datetime64[ns]")
    if alive.any():
        dates[alive] = parse_dates(text["date"][alive], date_order=date_order, column=mapping.date,
                                   file_name=file_name, row_numbers=rows[alive], notes=notes)
        _refuse_if_mostly_unreadable(dates[alive].isna(), text["date"][alive], rows[alive], file_name,
                                     mapping.date, "dates", "--date")
    exclude(dates.isna().to_numpy(), "bad_date")

    orders, reason = _build_orders(cells, mapping, text, status, amounts, dates, rows, reason, open_rows)
    excluded = _excluded_table(cells, rows, reason, raw.set_aside)
    rows_read = n + len(raw.set_aside)
    result = ReadResult(orders=orders, excluded=excluded, mapping=mapping, rows_read=rows_read,
                        file_name=file_name, columns=list(cells.columns), notes=notes)
    if orders.empty:
        top = excluded["reason_code"].value_counts()
        why = f"; most rows were left out because {REASONS[top.index[0]]}" if len(top) else ""
        raise OrderDataError(f"no usable orders were found{why}", file=file_name,
                             fix="Check the column choices and the export")
    return result


def _refuse_if_mostly_unreadable(unreadable: pd.Series, text: pd.Series, rows: np.ndarray, file_name: str,
                                 column: str, what: str, option: str) -> None:
    """A column where most values are unreadable is the wrong column, not bad rows."""
    if len(unreadable) >= 5 and unreadable.mean() > 0.5:
        at = int(np.flatnonzero(unreadable.to_numpy())[0])
        raise OrderDataError(f"most {what} in this column cannot be read", file=file_name, row=int(rows[at]),
                             column=column, value=text.iloc[at],
                             fix=f"Pick the right column with {option}, or check the format")


def _is_empty(text: pd.Series) -> np.ndarray:
    """``text == ""`` as a boolean array, compared inside the string array (no Python strings)."""
    return (text == "").to_numpy(dtype=bool, na_value=False)


def _build_orders(cells, mapping, text, status, amounts, dates, rows, reason, open_rows):
    """Group surviving lines into orders, net refunds, and drop orders that net to nothing."""
    position = np.flatnonzero(open_rows)
    value = amounts.to_numpy()[position]
    is_refund = value < 0
    if mapping.status:
        is_refund |= status.str.fullmatch(_REFUND_STATUS).to_numpy()[position]
    signed = np.where(is_refund, -np.abs(value), value)
    # Text stays in pandas' string arrays (take, factorize): no per-cell Python objects.
    customer = text["customer"].take(position)
    customer_code, _ = pd.factorize(customer)
    if mapping.order_id:
        order_text = text["order_id"].take(position)
        id_code, ids = pd.factorize(order_text)
        # A line without an order id is an order of its own.
        no_id = (order_text == "").to_numpy()
        id_code = np.where(no_id, len(ids) + np.arange(len(position)), id_code)
        order_code, _ = pd.factorize(customer_code.astype(np.int64) * (len(ids) + len(position) + 1) + id_code)
    else:
        order_text = None
        order_code = np.arange(len(position))
    n_orders = int(order_code.max()) + 1 if len(order_code) else 0
    order_value = np.bincount(order_code, weights=signed, minlength=n_orders)
    purchases = np.bincount(order_code, weights=~is_refund, minlength=n_orders)
    by_order = pd.DataFrame({"date": pd.Series(dates.to_numpy()[position]).where(~is_refund).to_numpy(),
                             "line": np.arange(len(position))}).groupby(order_code, sort=True)
    first = by_order.agg(order_date=("date", "min"), line=("line", "min"))
    # 0: kept, 1: a refund without a purchase, 2: refunded in full or less (small codes, not text).
    verdict = np.where(purchases == 0, 1, np.where(order_value <= 0, 2, 0)).astype(np.int8)
    reason = reason.copy()
    line_verdict = verdict[order_code]
    for code, name in ((1, "unmatched_refund"), (2, "refunded_in_full")):
        reason[position[line_verdict == code]] = name

    kept = np.flatnonzero(verdict == 0)
    first_line = first["line"].to_numpy()[kept]
    order_rows = rows[position][first_line]
    if order_text is None:
        order_ids = pd.Series(order_rows).astype(str).radd("row-").to_numpy()
    else:
        order_ids = order_text.take(first_line).to_numpy()
    orders = pd.DataFrame({
        "customer": customer.take(first_line).to_numpy(),
        "order_id": order_ids,
        "order_date": first["order_date"].to_numpy()[kept].astype("datetime64[ns]"),
        "order_value": order_value[kept].astype(np.float64),
        "row": order_rows,
    })
    if mapping.segment:
        segment = text["segment"].take(position).reset_index(drop=True)
        first_segment = segment.where(segment != "").groupby(order_code, sort=True).first()
        orders["segment"] = first_segment.reindex(kept).fillna("unknown").to_numpy()
    for column in ("customer", "order_id") + (("segment",) if mapping.segment else ()):
        orders[column] = orders[column].astype(str)
    orders = orders.sort_values(["order_date", "row"], kind="stable").reset_index(drop=True)
    return orders, reason


def _excluded_table(cells: pd.DataFrame, rows: np.ndarray, reason: np.ndarray,
                    set_aside: list[tuple[int, str, str]]) -> pd.DataFrame:
    out = reason != ""
    table = cells[out].copy()
    table.insert(0, "reason", [REASONS[c] for c in reason[out]])
    table.insert(0, "reason_code", reason[out])
    table.insert(0, "row", rows[out])
    if set_aside:
        bad = pd.DataFrame({"row": [r for r, _, _ in set_aside], "reason_code": [c for _, c, _ in set_aside],
                            "reason": [REASONS[c] for _, c, _ in set_aside],
                            "raw_text": [t for _, _, t in set_aside]})
        table = pd.concat([table, bad], ignore_index=True)
    return table.sort_values("row", kind="stable").reset_index(drop=True)
