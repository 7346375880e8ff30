"""Reading an export into cells: bytes in, the table's cells as text and the column roles out.

In: a CSV/TSV (UTF-8, UTF-8 with BOM, UTF-16, Windows-1252/Latin-1; comma, semicolon, tab or
pipe; an Excel ``sep=;`` first line), an Excel workbook (.xlsx) or a Parquet file.

Out: a :class:`RawTable`: every cell as text (``""`` for empty), the spreadsheet row number of
each record, the rows that could not be split into the header's fields (set aside with a
reason code), notes on what was decided (encoding, delimiter, where the header is), and for
Excel the cells that hold a formula whose value was not saved. :func:`guess_mapping` then says
which column plays which part (:class:`ColumnMapping`).

Row numbers are what a spreadsheet shows: the header is on row ``header_row`` (1 unless title
lines sit above it), the first record below it on the next row. The header is found below
title lines by :func:`find_header`, or given by the ``header_row`` option.

Every whole-file problem raises :class:`~forecasting.errors.OrderDataError` naming the file
and, where one helps, the column role or option that fixes it.
"""

from __future__ import annotations

import codecs
import collections
import csv
import io
import re
import zipfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv

from ..errors import OrderDataError
from . import rules
from .backends import cell_bytes

__all__ = [
    "ColumnMapping",
    "RawTable",
    "find_header",
    "guess_mapping",
    "load_raw",
    "mapping_notes",
    "read_cells",
    "source_bytes",
    "split_records",
    "text_encoding",
    "text_layout",
    "typed_cells_as_text",
]

# Text in the reader's tables uses pandas' own string type, backed by Arrow.
TEXT_TYPES = {pa.string(): pd.StringDtype("pyarrow", na_value=np.nan),
              pa.large_string(): pd.StringDtype("pyarrow", na_value=np.nan)}
# The cells Arrow's reader splits are kept in its own arrays while they are cleaned (pandas' string
# type would copy them into 64-bit offsets); tables shown to people use TEXT_TYPES.
CELL_TYPES = {pa.string(): pd.ArrowDtype(pa.string())}


def text_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A table of cells with Arrow-kept text columns (:data:`CELL_TYPES`) in pandas' own string type."""
    kept = [c for c, dtype in frame.dtypes.items() if isinstance(dtype, pd.ArrowDtype)]
    if not kept:
        return frame
    return frame.astype({c: TEXT_TYPES[pa.string()] for c in kept})


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
        return {role: getattr(self, role) for role in rules.ROLES}


@dataclass
class RawTable:
    """All cells as text, and where each record came from."""

    cells: pd.DataFrame
    row_numbers: np.ndarray
    set_aside: list[tuple[int, str, str]]  # records that did not split: (row, reason code, text)
    notes: list[str]
    header_row: int = 1
    # Excel: per column, the records whose cell holds a formula saved without its value.
    formulas: dict[str, np.ndarray] = field(default_factory=dict)
    sheets: list[str] = field(default_factory=list)
    sheet: str | None = None
    possibly_damaged: bool = True  # False when no byte of the file is a control character


# ---------------------------------------------------------------------------
# Bytes


def source_bytes(source, file_name: str) -> bytes:
    if isinstance(source, (bytes, bytearray, memoryview)):
        data = bytes(source)
    elif isinstance(source, (str, Path)):
        path = Path(source)
        if not path.exists():
            raise OrderDataError("the file does not exist", file=file_name, fix="Check the path and the file name")
        if path.stat().st_size > rules.MAX_FILE_BYTES:
            raise OrderDataError(f"the file is larger than {rules.MAX_FILE_BYTES // 1_000_000} MB",
                                 file=file_name, fix="Split it, or read it with the duckdb engine", option="engine")
        data = path.read_bytes()
    elif hasattr(source, "read"):
        data = source.read()
        if isinstance(data, str):
            data = data.encode("utf-8")
    else:
        raise TypeError(f"cannot read orders from {type(source).__name__}")
    if len(data) > rules.MAX_FILE_BYTES:
        raise OrderDataError(f"the file is larger than {rules.MAX_FILE_BYTES // 1_000_000} MB", file=file_name,
                             fix="Split it, or read it with the duckdb engine", option="engine")
    return data


def file_kind(data: bytes, file_name: str) -> str:
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
WINDOWS_NOTE = "The file is not UTF-8; read it as Windows-1252 (Western European)."
LATIN_NOTE = "The file is not UTF-8; read it as Latin-1."
UTF16_NOTE = "The file is UTF-16 text; read as such."
_DAMAGED = np.zeros(256, dtype=bool)
_DAMAGED[list(rules.DAMAGED_BYTES)] = True


def _decodes(blocks, encoding: str) -> bool:
    decoder = codecs.getincrementaldecoder(encoding)()
    try:
        for block in blocks:
            decoder.decode(block)
        decoder.decode(b"", final=True)
    except UnicodeDecodeError:
        return False
    return True


def _utf16_without_mark(head: bytes) -> str | None:
    """'utf-16-le' or 'utf-16-be' when the head is plainly UTF-16 text without a byte order mark
    (every other byte a NUL), else None."""
    if len(head) < 4:
        return None
    even, odd = head[0::2], head[1::2]
    if odd.count(0) > 0.9 * len(odd) and even.count(0) < 0.1 * len(even):
        return "utf-16-le"
    if even.count(0) > 0.9 * len(even) and odd.count(0) < 0.1 * len(odd):
        return "utf-16-be"
    return None


def text_encoding(blocks) -> tuple[str, str | None]:
    """The encoding the reader uses for a text file, and the note that says so.

    ``blocks()`` gives the file's bytes in blocks, from the start, each time it is called (the
    scale engines read files in blocks, never whole). UTF-16 when the file starts with its byte
    order mark, or plainly is UTF-16 without one; else UTF-8 (after an optional byte order
    mark) when the whole file is valid UTF-8; else Windows-1252, else Latin-1 (which reads any
    byte)."""
    first = bytes(next(iter(blocks()), b"")[:65536])
    if first.startswith((b"\xff\xfe", b"\xfe\xff")):
        return "utf-16", UTF16_NOTE
    unmarked = _utf16_without_mark(first[:65536])
    if unmarked:
        return unmarked, UTF16_NOTE
    encoding = "utf-8-sig" if first.startswith(_BOM) else "utf-8"
    if _decodes(blocks(), encoding):
        return encoding, None
    if _decodes(blocks(), "cp1252"):
        return "cp1252", WINDOWS_NOTE
    return "latin-1", LATIN_NOTE


def looks_binary(head: bytes) -> bool:
    """Whether the start of a file is binary data rather than text with a damaged row or two:
    more than a tenth of its bytes are control characters, or more than 1% and at least 16
    of them (text exports hold none; a NUL byte or two is a damaged row, reported as such)."""
    if not head or _utf16_without_mark(head[:65536]) or head.startswith((b"\xff\xfe", b"\xfe\xff")):
        return False
    sample = np.frombuffer(head[:65536], dtype=np.uint8)
    damaged = int(_DAMAGED[sample].sum())
    return damaged > 0.1 * len(sample) or (damaged >= 16 and damaged > 0.01 * len(sample))


def _has_damaged_bytes(data: bytes) -> bool:
    # bytes.translate deletes every ordinary byte; what is left are control characters.
    return bool(data.translate(None, _ORDINARY_BYTES))


_ORDINARY_BYTES = bytes(b for b in range(256) if b not in rules.DAMAGED_BYTES)


# ---------------------------------------------------------------------------
# Records


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


def _ends_inside_quotes(text: str, delimiter: str) -> bool:
    """Whether a record's text ends inside a quoted cell (a quote opened and never closed before
    the end of the file)."""
    try:
        list(csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=True))
    except csv.Error as problem:
        return "unexpected end of data" in str(problem)
    return False


def split_records(lines, *, delimiter: str, width: int, first_row: int):
    """Split text lines into records, careful about rows that do not fit; RFC 4180 quoting.

    Yields ``(row, fields, code, text)`` for each record: ``fields`` (a list of ``width``
    cells) and ``code`` None for a good record; else ``fields`` None and ``code``
    ``"blank_row"`` (nothing but spaces), ``"malformed_row"`` (another number of fields) or
    ``"unclosed_quote"``, with the record's ``text`` as written. ``row`` counts records from
    ``first_row`` (a record with a quoted line break is one row, as a spreadsheet shows it).

    A quote that is opened and never closed makes the csv module read on to the next quote or
    the end of the file, swallowing the rows between. A record that runs over several lines
    is taken for that when it does not have the header's fields, or when one of its later
    lines is a whole record on its own (splits, with strict quoting, into the header's
    fields), or when it ends inside quotes (the file ends before the quote is closed): its
    first line is reported as ``unclosed_quote`` and the reading starts again on the line
    after it, so no row after it is lost. A cell with line breaks whose lines are
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
        if (len(consumed) > 1 and (len(record) != width or _swallows_records(consumed[1:], delimiter, width))) \
                or ('"' in text and _ends_inside_quotes("".join(consumed), delimiter)):
            # A quote opened on this row ran on over later rows: report this row, read on after it.
            yield row, None, "unclosed_quote", consumed[0].rstrip("\r\n")
            pending.extendleft(reversed(consumed[1:]))
            reader = csv.reader(feed(), delimiter=delimiter)
        elif len(record) == width and width > 0:
            yield row, record, None, text
        elif all(not cell.strip() for cell in record):
            yield row, None, "blank_row", text
        else:
            yield row, None, "malformed_row", text
        row += 1


_SEP_LINE = re.compile(r"^sep=(.)\r?\n", re.IGNORECASE)


def separator_line(text: str) -> str | None:
    """The delimiter an Excel ``sep=;`` first line names, or None."""
    found = _SEP_LINE.match(text[:16])
    return found.group(1) if found else None


def sniff_delimiter(text: str) -> str:
    """The delimiter that splits most of the first lines into one same number (> 1) of fields.

    Title lines above the header (one cell each) do not count against a delimiter."""
    lines = [line for line in text[:200_000].splitlines()[:60] if line.strip()]
    best, best_score = ",", (0, 0)
    for delimiter in [",", ";", "\t", "|"]:
        try:
            widths = [len(r) for r in csv.reader(lines, delimiter=delimiter)]
        except csv.Error:
            continue
        counts = collections.Counter(w for w in widths if w > 1)
        if not counts:
            continue
        width, agreeing = max(counts.items(), key=lambda item: (item[1], item[0]))
        if (agreeing, width) > best_score:
            best, best_score = delimiter, (agreeing, width)
    return best


def delimiter_note(delimiter: str) -> list[str]:
    if delimiter == ",":
        return []
    return [f"Fields are separated by {'a tab' if delimiter == chr(9) else repr(delimiter)}."]


_NUMBER_OR_DATE = re.compile(r"^[\s$€£¥+\-(]*[0-9][0-9.,:/\s\-)]*$")


def find_header(records: list[list[str]]) -> int:
    """The index of the header among a file's first records (0 when it is the first).

    A title above the table ("Fernhollow Plants - orders", "Exported 2025-03-01") fills one or
    two cells; the header is the first record with at least three cells filled (or as many as
    the table is wide), most of them words rather than numbers or dates, with a record below
    it that is filled too."""
    filled = [sum(bool(str(c).strip()) for c in r) for r in records]
    wide = collections.Counter(len(r) for r, f in zip(records, filled) if f >= 2)
    if not wide:
        return 0
    width = max(wide.items(), key=lambda item: (item[1], item[0]))[0]
    for i, record in enumerate(records):
        cells = [str(c).strip() for c in record if str(c).strip()]
        if len(cells) < min(3, width) or len(record) < width:
            continue
        if sum(bool(_NUMBER_OR_DATE.match(c)) for c in cells) > len(cells) / 2:
            continue
        if any(f >= 2 for f in filled[i + 1:]):
            return i
    return 0


def header_note(header_row: int, chosen: bool) -> list[str]:
    if header_row == 1:
        return []
    how = "as chosen" if chosen else "found below the title lines"
    above = "row 1" if header_row == 2 else f"rows 1-{header_row - 1}"
    return [f"The column headings are on row {header_row} ({how}); {above} above them were not read as orders."]


def unique_headers(header: list) -> list[str]:
    seen: dict[str, int] = {}
    names = []
    for name in header:
        name = str(name if name is not None else "").strip() or "unnamed"
        if name in seen:
            seen[name] += 1
            name = f"{name}.{seen[name]}"
        else:
            seen[name] = 0
        names.append(name)
    return names


def _head_records(text: str, delimiter: str, count: int) -> list[tuple[list[str], int]]:
    """The first ``count`` records of ``text`` and the number of characters up to the end of each."""
    csv.field_size_limit(max(csv.field_size_limit(), rules.MAX_FILE_BYTES))
    lines = io.StringIO(text, newline="")
    out, position = [], 0
    consumed: list[str] = []

    def feed():
        for line in lines:
            consumed.append(line)
            yield line

    reader = csv.reader(feed(), delimiter=delimiter)
    for _ in range(count):
        consumed.clear()
        record = next(reader, None)
        if record is None:
            break
        position += sum(len(line) for line in consumed)
        out.append((record, position))
    return out


def _check_header_row(header_row: int | None, available: int, file_name: str) -> None:
    if header_row is not None and header_row > available:
        raise OrderDataError(f"the file has no row {header_row} to take the column headings from "
                             f"(it has {available} row{'s' if available != 1 else ''})",
                             file=file_name, value=header_row, fix="Give the row that holds the column headings",
                             option="header_row")


@dataclass
class TextLayout:
    """Where the table starts in a CSV text: the delimiter, the header and what comes before it."""

    delimiter: str
    separator_line: bool  # an Excel "sep=;" first line, not a row
    header_index: int  # records before the header (title lines), after the separator line
    header: list[str]
    skip_chars: int  # characters of the text up to the end of the header
    notes: list[str]

    @property
    def header_row(self) -> int:
        return self.header_index + 1


def text_layout(text: str, file_name: str, header_row: int | None) -> TextLayout:
    """The layout of a CSV text (its start is enough): delimiter, ``sep=`` line, header row."""
    notes: list[str] = []
    named = separator_line(text)
    offset = 0
    if named is not None:
        offset = _SEP_LINE.match(text).end()
        text = text[offset:]
        delimiter = named
        notes.append(f"The first line 'sep={named}' names the delimiter; it is not a row of the table.")
    else:
        delimiter = sniff_delimiter(text)
    notes.extend(delimiter_note(delimiter))
    head = _head_records(text, delimiter, max(rules.HEADER_SEARCH_ROWS, header_row or 0))
    _check_header_row(header_row, len(head), file_name)
    at = header_row - 1 if header_row else find_header([r for r, _ in head])
    if not head or not head[at][0]:
        raise OrderDataError("the file has no header row", file=file_name,
                             fix="Give the row that holds the column headings", option="header_row")
    notes.extend(header_note(at + 1, header_row is not None))
    header, end = head[at]
    return TextLayout(delimiter, named is not None, at, header, offset + end, notes)


# Characters of a UTF-8 file decoded to find its layout (delimiter, title lines, header): the rest of the
# file goes to Arrow's reader as bytes, never decoded in Python.
_HEAD_BYTES = 1 << 20


def _utf8_head(data: bytes, start: int) -> tuple[str, bool]:
    """The start of a UTF-8 file as text (up to :data:`_HEAD_BYTES`; a character cut at the end is
    left out), and whether that is the whole file."""
    head = data[start:start + _HEAD_BYTES]
    whole = start + len(head) >= len(data)
    try:
        return head.decode("utf-8"), whole
    except UnicodeDecodeError as problem:
        if whole or problem.start < len(head) - 3:
            raise
        return head[:problem.start].decode("utf-8"), False


def _head_holds_layout(head: str, layout: "TextLayout", header_row: int | None) -> bool:
    """Whether the start of a file holds every record its layout was found from (each ends before the
    start does): then the layout of the whole file is the same."""
    needed = max(rules.HEADER_SEARCH_ROWS, header_row or 0) + 2
    records = _head_records(head, layout.delimiter, needed)
    return len(records) == needed and records[-1][1] < len(head)


def _text_blocks(data: bytes, size: int = 1 << 24):
    view = memoryview(data)
    for start in range(0, len(data), size):
        yield view[start:start + size]


def read_text(data: bytes, file_name: str, notes: list[str], header_row: int | None) -> RawTable:
    """Split CSV text into cells: Arrow's fast reader, rows that do not fit set aside, or the careful
    reader when a quote may have run on over several lines.

    A UTF-8 file goes to Arrow's multi-threaded reader as the bytes it is (only its start is
    decoded here, to find the delimiter and the header). A record with another number of fields
    than the header (or a blank line) is handed back by Arrow and set aside with its row number
    (blank lines stay as rows of empty cells, for the blank-row rule), unless the file has quotes
    and a cell or such a record holds a line break or a quote: a quote opened and never closed
    may then have run on over later rows, and the careful record-by-record reader
    (:func:`split_records`) reads the file."""
    if looks_binary(data[:65536]):
        raise OrderDataError("the file is not a text table (it contains binary data)", file=file_name,
                             fix="Upload a CSV, Excel (.xlsx) or Parquet export")
    if data.isascii() and not _utf16_without_mark(data[:65536]):
        encoding, note = "utf-8", None
    else:
        encoding, note = text_encoding(lambda: _text_blocks(data))
    if note:
        notes.append(note)
    start = len(_BOM) if encoding == "utf-8-sig" else 0
    text = None
    if encoding in ("utf-8", "utf-8-sig"):
        head, whole = _utf8_head(data, start)
        if not whole and not head.strip():
            head, whole = data[start:].decode("utf-8"), True
    else:
        try:
            text = data.decode(encoding)
        except UnicodeDecodeError:
            raise OrderDataError("the file says it is UTF-16 text but is not", file=file_name,
                                 fix="Export it again as UTF-8 CSV") from None
        head, whole = text, True
    if whole and not head.strip():
        raise OrderDataError("the file is empty", file=file_name, fix="Export the orders again")
    layout = text_layout(head, file_name, header_row)
    if not whole and not _head_holds_layout(head, layout, header_row):
        # The layout reads the first records: the start of the file must hold them all.
        head, whole = data[start:].decode("utf-8"), True
        layout = text_layout(head, file_name, header_row)
    notes.extend(layout.notes)
    delimiter, at = layout.delimiter, layout.header_index
    columns = unique_headers(layout.header)
    if text is None:
        # Arrow reads UTF-8 bytes: the file itself after the header, not the text encoded again.
        skipped = start + len(head[:layout.skip_chars].encode("utf-8"))
        body_bytes = data
        encoded = pa.py_buffer(data).slice(skipped)
        quoted = data.find(b'"', skipped) >= 0
    else:
        body_text = text[layout.skip_chars:]
        skipped, body_bytes = 0, body_text.encode("utf-8")
        encoded = pa.py_buffer(body_bytes)
        quoted = '"' in body_text
    possibly_damaged = _has_damaged_bytes(data)
    first_row = at + 2

    def careful() -> RawTable:
        body = text[layout.skip_chars:] if text is not None else bytes(encoded).decode("utf-8")
        return _read_records(body, delimiter, columns, first_row=first_row, notes=notes, header_row=at + 1,
                             possibly_damaged=possibly_damaged)

    rejected: list[str] = []
    try:
        table = _arrow_records(encoded, delimiter, columns, rejected, use_threads=True)
    except (pa.ArrowInvalid, csv.Error, ValueError):
        return careful()
    if quoted and (_any_line_break(table) or any(_runs_on(t) for t in rejected)):
        # A cell with a line break may be an unclosed quote that swallowed rows: the careful reader
        # tells them apart (see split_records).
        return careful()
    positions = np.arange(table.num_rows, dtype=np.int64)
    set_aside: list[tuple[int, str, str]] = []
    if rejected:
        numbered = rejected_lines(body_bytes, rejected, start=skipped)
        if numbered is None:
            # Arrow gives the line of each record it hands back when it reads on one thread.
            numbered = []
            _arrow_records(encoded, delimiter, columns, numbered, use_threads=False, numbered=True)
        if len(numbered) != len(rejected) or any(number is None for number, _ in numbered):
            return careful()
        # No record runs over several lines here: a file's line n (from 1 below the header) is record n.
        where = np.array([number - 1 for number, _ in numbered], dtype=np.int64)
        kept = np.ones(table.num_rows + len(numbered), dtype=bool)
        kept[where] = False
        positions = np.flatnonzero(kept)
        blank = [i for i, (_, t) in enumerate(numbered) if not t.replace(delimiter, "").strip()]
        blank_at = set(blank)
        set_aside = [(first_row + int(where[i]), "malformed_row", t) for i, (_, t) in enumerate(numbered)
                     if i not in blank_at]
        if blank:
            # A blank line is a row of empty cells, as the careful reader keeps it (the blank-row rule).
            empty = pa.table({c: pa.array(np.full(len(blank), "", dtype=object), type=pa.string())
                              for c in columns})
            positions = np.concatenate([positions, where[blank]])
            order = np.argsort(positions, kind="stable")
            table = pa.concat_tables([table, empty]).take(pa.array(order))
            positions = positions[order]
    cells = table.combine_chunks().to_pandas(types_mapper=CELL_TYPES.get)
    return RawTable(cells, first_row + positions, set_aside, notes, header_row=at + 1,
                    possibly_damaged=possibly_damaged)


#: Up to this many different texts handed back are looked for one at a time in the bytes (a fast
#: search of the file each); more are found among all the lines at once.
SEARCHED_ONE_AT_A_TIME = 16


def rejected_lines(data: bytes, rejected: list[str], *, start: int = 0) -> list[tuple[int, str]] | None:
    """``(line, text)`` of each record Arrow handed back (``rejected``: their texts), in file order,
    found among the lines of the UTF-8 text ``data[start:]`` (lines counted from 1); None when they
    cannot be told this way (a carriage return in the text, or not every text found once).

    Only for text in which no record runs over several lines: a line is then a record, and lines
    that read the same are all handed back, so the lines whose text is one of ``rejected`` are
    the records handed back (the file is not read a second time). A few different texts are
    looked for one at a time, each as a whole line; more, among all the lines at once."""
    if data.find(b"\r", start) >= 0:
        return None
    texts = sorted(set(rejected))
    if len(texts) > SEARCHED_ONE_AT_A_TIME:
        return _rejected_among_all_lines(pa.py_buffer(data).slice(start), rejected)
    found = sorted((at, line) for line in {text.removesuffix("\n") for text in texts}
                   for at in _whole_lines(data, line.encode("utf-8"), start))
    if len(found) != len(rejected):
        return None
    numbered, line, last = [], 1, start
    for at, text in found:
        line += data.count(b"\n", last, at)
        last = at
        numbered.append((line, text))
    return numbered


def _whole_lines(data: bytes, needle: bytes, start: int) -> list[int]:
    """Where the lines of ``data[start:]`` that read ``needle`` (without their line feed) begin; a
    text that ends with a line feed has no line after it."""
    size, width = len(data), len(needle)
    found = []
    if start < size and data.startswith(needle, start) and (start + width == size or data[start + width] == 10):
        found.append(start)
    framed = b"\n" + needle + b"\n"
    at = data.find(framed, start)
    while at >= 0:
        found.append(at + 1)
        at = data.find(framed, at + 1)
    tail = size - width
    if width and tail > start and data[tail - 1] == 10 and data.endswith(needle):
        found.append(tail)
    return found


def _rejected_among_all_lines(encoded, rejected: list[str]) -> list[tuple[int, str]] | None:
    """:func:`rejected_lines` for many different texts: every line of ``encoded`` (no carriage
    return in it) is matched against all of them at once."""
    data = np.frombuffer(encoded, dtype=np.uint8)
    block = 1 << 24
    ends = np.concatenate([np.flatnonzero(data[start:start + block] == 10) + start
                           for start in range(0, len(data), block)] + [np.zeros(0, dtype=np.int64)])
    # Line k runs from starts[k] up to the next start, its line feed included (the last line may
    # have none; a text that ends with a line feed has no line after it).
    starts = np.concatenate([[0], ends + 1]).astype(np.int64)
    if starts[-1] == len(data):
        starts = starts[:-1]
    offsets = np.concatenate([starts, [len(data)]]).astype(np.int64)
    lines = pa.LargeStringArray.from_buffers(len(starts), pa.py_buffer(offsets), encoded)
    texts = sorted(set(rejected))
    wanted = pa.array(texts + [t + "\n" for t in texts], type=pa.large_string())
    found = np.flatnonzero(pc.is_in(lines, value_set=wanted).to_numpy(zero_copy_only=False))
    if len(found) != len(rejected):
        return None
    return [(int(k) + 1, text.removesuffix("\n")) for k, text in zip(found, lines.take(pa.array(found)).to_pylist())]


def _runs_on(text: str) -> bool:
    """Whether a record Arrow handed back could be part of a quote that ran on over several lines."""
    return '"' in text or "\n" in text or "\r" in text


def _arrow_records(encoded, delimiter: str, columns: list[str], rejected: list, *, use_threads: bool,
                   numbered: bool = False) -> pa.Table:
    """Arrow's CSV reader over ``encoded`` (UTF-8 bytes after the header), every cell as text; records
    with another number of fields than ``columns`` are left out and listed in ``rejected`` (their
    text, or ``(line, text)`` with ``numbered``)."""
    def hand_back(row):
        rejected.append((row.number, row.text) if numbered else row.text)
        return "skip"

    return pa_csv.read_csv(
        pa.BufferReader(encoded),
        read_options=pa_csv.ReadOptions(column_names=columns, skip_rows=0, use_threads=use_threads,
                                        block_size=1 << 22),
        parse_options=pa_csv.ParseOptions(delimiter=delimiter, quote_char='"', double_quote=True,
                                          escape_char=False, newlines_in_values=True,
                                          ignore_empty_lines=False, invalid_row_handler=hand_back),
        convert_options=pa_csv.ConvertOptions(column_types={c: pa.string() for c in columns},
                                              strings_can_be_null=False, quoted_strings_can_be_null=False))


def _any_line_break(table: pa.Table) -> bool:
    """Whether a cell holds a line break: the bytes of the cells are looked at directly (a line break
    is one byte in UTF-8, and no other character holds that byte)."""
    for column in table.columns:
        for chunk in column.chunks:
            if chunk.type != pa.string():
                chunk = chunk.cast(pa.string())
            offsets, data = cell_bytes(chunk)
            cells = data[offsets[0]:offsets[-1]]
            if (cells == 10).any() or (cells == 13).any():
                return True
    return False


def _read_records(body: str, delimiter: str, columns: list[str], *, first_row: int, notes: list[str],
                  header_row: int, possibly_damaged: bool) -> RawTable:
    """Slow, careful reading: each record is checked against the header width (:func:`split_records`)."""
    width = len(columns)
    good, numbers, set_aside = [], [], []
    lines = io.StringIO(body, newline="")
    for row, fields, code, raw_text in split_records(lines, delimiter=delimiter, width=width, first_row=first_row):
        if code is None:
            good.append(fields)
            numbers.append(row)
        elif code == "blank_row":
            good.append([""] * width)
            numbers.append(row)
        else:
            set_aside.append((row, code, raw_text))
    cells = pd.DataFrame(good, columns=columns, dtype=object) if good else pd.DataFrame(
        {c: pd.Series([], dtype=object) for c in columns})
    return RawTable(cells, np.asarray(numbers, dtype=np.int64), set_aside, notes, header_row=header_row,
                    possibly_damaged=possibly_damaged)


# ---------------------------------------------------------------------------
# Excel and Parquet


def _excel_cell_text(cell) -> str:
    if cell is None:
        return ""
    if isinstance(cell, float):
        if not np.isfinite(cell):
            return ""
        return str(int(cell)) if cell.is_integer() else repr(cell)
    if isinstance(cell, bool):
        return str(cell)
    if hasattr(cell, "isoformat"):
        stamp = pd.Timestamp(cell)
        return stamp.strftime("%Y-%m-%d %H:%M:%S") if not pd.isna(stamp) else ""
    return str(cell)


def _sheet_problem(file_name: str, sheets: list[str], problem: str) -> OrderDataError:
    listed = ", ".join(f"'{s}'" for s in sheets)
    return OrderDataError(problem, file=file_name, fix=f"Choose the sheet that holds the orders; the workbook has "
                                                       f"the sheets {listed}", option="sheet")


def read_excel(data: bytes, file_name: str, sheet, notes: list[str], header_row: int | None) -> RawTable:
    import openpyxl

    try:
        book = openpyxl.load_workbook(io.BytesIO(data), read_only=True, data_only=True)
    except Exception as problem:  # openpyxl raises many types for broken workbooks
        raise OrderDataError(f"the Excel workbook could not be opened ({type(problem).__name__})",
                             file=file_name, fix="Open it in a spreadsheet and save it again as .xlsx") from None
    sheets = list(book.sheetnames)
    if sheet is None:
        name = sheets[0]
    elif isinstance(sheet, int) and not isinstance(sheet, bool):
        if not 0 <= sheet < len(sheets):
            raise _sheet_problem(file_name, sheets, f"the workbook has no sheet number {sheet}")
        name = sheets[sheet]
    elif str(sheet) in sheets:
        name = str(sheet)
    else:
        folded = {s.strip().lower(): s for s in sheets}
        if str(sheet).strip().lower() not in folded:
            raise _sheet_problem(file_name, sheets, f"the workbook has no sheet named '{sheet}'")
        name = folded[str(sheet).strip().lower()]
    grid = [list(row) for row in book[name].iter_rows(min_row=1, values_only=True)]
    book.close()
    width = max((len(r) for r in grid), default=0)
    # Trailing empty columns and rows are not part of the table.
    while width and all(len(r) < width or r[width - 1] in (None, "") for r in grid):
        width -= 1
    while grid and all(c in (None, "") for c in grid[-1]):
        grid.pop()
    text = [[_excel_cell_text(c) for c in (r + [None] * width)[:width]] for r in grid]
    if not text:
        raise _sheet_problem(file_name, sheets, f"the sheet '{name}' is empty") if len(sheets) > 1 else \
            OrderDataError("the workbook's sheet is empty", file=file_name, fix="Export the orders again")
    _check_header_row(header_row, len(text), file_name)
    at = header_row - 1 if header_row else find_header(text[:rules.HEADER_SEARCH_ROWS])
    notes.extend(header_note(at + 1, header_row is not None))
    if len(sheets) > 1:
        notes.append(f"Read the sheet '{name}' of {len(sheets)} (" + ", ".join(f"'{s}'" for s in sheets) + ").")
    columns = unique_headers(text[at])
    body = text[at + 1:]
    cells = pd.DataFrame(body, columns=columns, dtype=object) if body else pd.DataFrame(
        {c: pd.Series([], dtype=object) for c in columns})
    raw = RawTable(cells, np.arange(at + 2, at + 2 + len(body)), [], notes, header_row=at + 1, sheets=sheets,
                   sheet=name)
    _mark_formulas(raw, data, name, at, width)
    return raw


def _mark_formulas(raw: RawTable, data: bytes, sheet: str, at: int, width: int) -> None:
    """Cells that hold a formula whose value was not saved (a workbook written by a program that
    does not calculate): they read as empty; ``raw.formulas`` marks their rows."""
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            if not any(b"<f" in archive.read(n) for n in archive.namelist() if n.startswith("xl/worksheets/")):
                return
    except (zipfile.BadZipFile, KeyError, OSError):
        return
    import openpyxl

    book = openpyxl.load_workbook(io.BytesIO(data), read_only=True, data_only=False)
    formulas = [list(row) for row in book[sheet].iter_rows(min_row=at + 2, values_only=True)]
    book.close()
    for i, row in enumerate(formulas[:len(raw.cells)]):
        for j, cell in enumerate(row[:width]):
            if isinstance(cell, str) and cell.startswith("=") and raw.cells.iat[i, j] == "":
                column = raw.cells.columns[j]
                raw.formulas.setdefault(column, np.zeros(len(raw.cells), dtype=bool))[i] = True


def typed_cells_as_text(frame: pd.DataFrame) -> pd.DataFrame:
    """Typed columns (as Parquet holds them) turned into the text the cleaning rules read.

    Dates become ``YYYY-MM-DD HH:MM:SS`` in their own time zone (a time-zone-aware column keeps
    the local time, as dates with an offset in a CSV do), missing cells the empty string.
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


def read_parquet(data: bytes, file_name: str, notes: list[str]) -> RawTable:
    try:
        frame = pd.read_parquet(io.BytesIO(data))
    except Exception as problem:
        raise OrderDataError(f"the Parquet file could not be read ({type(problem).__name__})",
                             file=file_name) from None
    cells = typed_cells_as_text(frame)
    cells.columns = unique_headers(list(cells.columns))
    return RawTable(cells, np.arange(2, len(cells) + 2), [], notes)


def load_raw(data: bytes, file_name: str, sheet=None, header_row: int | None = None) -> RawTable:
    """The cells of an export (any supported kind), with the checks every kind shares."""
    rules.check_header_row(header_row)
    notes: list[str] = []
    kind = file_kind(data, file_name)
    if kind != "xlsx" and sheet is not None:
        raise OrderDataError("only Excel workbooks have sheets", file=file_name, value=sheet,
                             fix="Leave the sheet out for CSV and Parquet files", option="sheet")
    if kind == "xlsx":
        raw = read_excel(data, file_name, sheet, notes, header_row)
    elif kind == "parquet":
        if header_row not in (None, 1):
            raise OrderDataError("a Parquet file has its column names built in; there is no header row to choose",
                                 file=file_name, value=header_row, fix="Leave the header row out",
                                 option="header_row")
        raw = read_parquet(data, file_name, notes)
    else:
        raw = read_text(data, file_name, notes, header_row)
    width = raw.cells.shape[1]
    if width > rules.MAX_COLUMNS:
        raise OrderDataError(f"the file has {width} columns, more than the {rules.MAX_COLUMNS} supported",
                             file=file_name, fix="Export only the order columns")
    if width < 3:
        problem = f"the file has {width} column(s); at least customer, date and amount are needed"
        if len(raw.sheets) > 1:
            raise _sheet_problem(file_name, raw.sheets, f"the sheet '{raw.sheet}' has {width} column(s); "
                                                        "at least customer, date and amount are needed")
        raise OrderDataError(problem, file=file_name,
                             fix="Check that the export has a header row and a known delimiter; if title lines "
                                 "sit above the headings, give the row of the headings", option="header_row")
    return raw


def read_cells(source, *, file_name: str | None = None, sheet: str | int | None = None,
               header_row: int | None = None) -> pd.DataFrame:
    """The file's cells as text, headings as column names, before any cleaning.

    For front ends that show the headings (to let the user map columns) even when the file
    cannot be read as orders yet. Raises :class:`OrderDataError` when the file is not a table.
    """
    if file_name is None:
        file_name = Path(source).name if isinstance(source, (str, Path)) else "uploaded file"
    return text_frame(load_raw(source_bytes(source, file_name), file_name, sheet, header_row).cells)


# ---------------------------------------------------------------------------
# Column mapping


def normalise_header(name: str) -> str:
    return re.sub(r"[^0-9a-z]", "", str(name).lower())


def _resolve_override(name: str, columns: list[str], role: str, file_name: str) -> str:
    if name in columns:
        return name
    folded = {c.lower().strip(): c for c in columns}
    if name.lower().strip() in folded:
        return folded[name.lower().strip()]
    raise OrderDataError(f"there is no column named '{name}' for the {role.replace('_', ' ')}", file=file_name,
                         fix="The columns are: " + ", ".join(f"'{c}'" for c in columns), role=role)


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

    Notes
    -----
    In an export of order lines (an order-number column) with both a line amount
    (``Line Total``) and the order's total repeated on its lines (``Order Total``), the line
    amount is taken: adding up a repeated total once per line would multiply revenue.
    """
    overrides = {k: v for k, v in (overrides or {}).items() if v is not None}
    columns = list(cells.columns)
    chosen: dict[str, str | None] = {}
    taken: set[str] = set()
    for role, name in overrides.items():
        if role not in rules.ROLES:
            raise ValueError(f"unknown column role {role!r}")
        chosen[role] = _resolve_override(name, columns, role, file_name) if name != "" else None
        if chosen[role]:
            taken.add(chosen[role])
    normalised = {c: normalise_header(c) for c in columns}

    def by_header(role, words):
        for wanted in words:
            match = next((c for c in columns if c not in taken and normalised[c] == wanted), None)
            if match is not None:
                return match
        return None

    has_orders = chosen.get("order_id") is not None or (
        "order_id" not in chosen and by_header("order_id", rules.HEADER_NAMES["order_id"]) is not None)
    for role in rules.ROLES:
        if role in chosen:
            continue
        match = None
        if role == "value" and has_orders:
            match = by_header(role, rules.LINE_AMOUNT_HEADERS)
        if match is None:
            match = by_header(role, rules.HEADER_NAMES[role])
        chosen[role] = match
        if match is not None:
            taken.add(match)
    _guess_from_content(cells, chosen, taken)
    missing = [role for role in rules.REQUIRED_ROLES if chosen[role] is None]
    if missing:
        role = missing[0]
        raise OrderDataError(
            f"cannot tell which column holds the {'customer id' if role == 'customer' else 'order ' + role}",
            file=file_name,
            fix="Choose the column (the columns are: " + ", ".join(f"'{c}'" for c in columns) + ")", role=role)
    return ColumnMapping(**chosen)


def mapping_notes(columns: list[str], mapping: ColumnMapping) -> list[str]:
    """What the reader says about its choice of amount column, when the file offers two kinds."""
    if mapping.value is None or mapping.order_id is None:
        return []
    if normalise_header(mapping.value) not in rules.LINE_AMOUNT_HEADERS:
        return []
    totals = [c for c in columns if c != mapping.value and normalise_header(c) in rules.ORDER_TOTAL_HEADERS]
    if not totals:
        return []
    return [f"Amounts are taken from '{mapping.value}' (each line's amount); '{totals[0]}' holds the order's "
            "total on each of its lines and is not added up."]


def _guess_from_content(cells: pd.DataFrame, chosen: dict, taken: set) -> None:
    """Fill missing required roles by looking at a sample of values."""
    if all(chosen[r] is not None for r in rules.REQUIRED_ROLES):
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
