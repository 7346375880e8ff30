"""Order files for the scale engines: which files, what kind, which columns, where the blank lines are.

In: a path, a glob pattern (``orders/*.csv``) or a list of paths. Out: a :class:`OrderFiles`
with the files in sorted order, their kind (CSV text or Parquet), the delimiter and column
names (the same for every file, or an :class:`~forecasting.errors.OrderDataError`), the
column mapping guessed exactly as the pandas reader guesses it, and for CSV the position of
every blank line (the SQL reader skips blank lines; the pandas reader counts them as rows).

Row numbers are what a spreadsheet shows: the header is row 1 of each file.
"""

from __future__ import annotations

import array
import csv
import glob
import io
import mmap
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import OrderDataError
from ..io import rules
from ..io.read import (ColumnMapping, guess_mapping, looks_binary, mapping_notes, split_records, text_encoding,
                       text_layout, typed_cells_as_text, unique_headers)

_SNIFF_BYTES = 200_000
_SAMPLE_ROWS = 500
_SCAN_CHUNK = 1 << 26  # bytes per step of the blank-line scan


@dataclass
class OrderFiles:
    """The files one engine run reads, as one table."""

    paths: list[str]
    kind: str  # "csv" or "parquet"
    columns: list[str]
    mapping: ColumnMapping
    display_name: str
    delimiter: str = ","
    # For CSV: per file, the record numbers (header = 0) of blank lines, sorted, and the
    # number of non-blank data records the scan found (None when there was nothing to scan).
    blank_records: dict[str, np.ndarray] = field(default_factory=dict)
    scanned_records: dict[str, int | None] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    # Careful copies (see make_careful_copies): the files the engine reads instead of ``paths``,
    # the label and spreadsheet row of each of their records, and the rows set aside.
    read_paths: list[str] = field(default_factory=list)
    labels: dict[str, str] = field(default_factory=dict)
    row_numbers: dict[str, np.ndarray] = field(default_factory=dict)
    set_aside: list[tuple[str, int, str, str]] = field(default_factory=list)
    needs_copy: bool = False
    header_row: int | None = None  # the option (None: found below title lines)
    # From the scan of each file read (scan_blank_lines): a line break inside quotes (a cell with
    # line breaks, or an unclosed quote: the careful copy tells them apart), a control character.
    quoted_line_breaks: dict[str, bool] = field(default_factory=dict)
    damaged_bytes: dict[str, bool] = field(default_factory=dict)

    @property
    def possibly_damaged(self) -> bool:
        """Whether a cell may hold a control character (always so for Parquet, whose cells are not scanned)."""
        return self.kind != "csv" or any(self.damaged_bytes.get(p, True) for p in self.read_paths)

    @property
    def quoted_line_break(self) -> bool:
        return any(self.quoted_line_breaks.values())

    def __post_init__(self):
        if not self.read_paths:
            self.read_paths = list(self.paths)

    @property
    def copied(self) -> bool:
        return bool(self.row_numbers)

    @property
    def blank_lines(self) -> int:
        return int(sum(len(b) for b in self.blank_records.values()))

    def scan_blank_lines(self) -> None:
        """Fill ``blank_records``, ``scanned_records``, ``quoted_line_breaks`` and ``damaged_bytes``
        for CSV files (see :func:`scan_file`)."""
        if self.kind == "csv":
            for path in self.read_paths:
                found = scan_file(path)
                self.blank_records[path], self.scanned_records[path] = found.blank, found.records
                self.quoted_line_breaks[path] = found.quoted_line_break
                self.damaged_bytes[path] = found.damaged

    def file_label(self, path: str) -> str:
        if path in self.labels:
            return self.labels[path]
        return Path(path).name if len(self.paths) > 1 else self.display_name

    def spreadsheet_rows(self, path: str, positions: np.ndarray) -> np.ndarray:
        """Row numbers of many records of ``path`` at once (see :meth:`spreadsheet_row`)."""
        positions = np.asarray(positions, dtype=np.int64)
        if self.kind == "parquet":
            return positions + 2
        if path in self.row_numbers:
            return self.row_numbers[path][positions]
        blank = self.blank_records.get(path, np.zeros(0, dtype=np.int64))
        before = blank - 1 - np.arange(len(blank))
        return positions + 2 + np.searchsorted(before, positions, side="right")

    def blank_rows(self) -> list[tuple[str, int]]:
        """``(file label, row)`` of every blank line the SQL reader skipped."""
        return [(self.file_label(path), int(record) + 1) for path, records in self.blank_records.items()
                for record in records]

    def spreadsheet_row(self, path: str, position: int) -> int:
        """Row number of the ``position``-th (0-based) record the reader returned from ``path``."""
        if self.kind == "parquet":
            return int(position) + 2
        if path in self.row_numbers:
            return int(self.row_numbers[path][int(position)])
        blank = self.blank_records.get(path, np.zeros(0, dtype=np.int64))
        # Data records before blank record b: b - 1 - (blank records before it).
        before = blank - 1 - np.arange(len(blank))
        skipped = int(np.searchsorted(before, position, side="right"))
        return int(position) + 2 + skipped


def resolve_paths(source) -> list[str]:
    """The files named by a path, a glob pattern or a list of them, sorted, each existing."""
    items = list(source) if isinstance(source, (list, tuple)) else [source]
    if not items:
        raise OrderDataError("no order file was given", fix="Name a file or a pattern such as orders/*.csv")
    paths: list[str] = []
    for item in items:
        if not isinstance(item, (str, os.PathLike)):
            raise OrderDataError(f"the scale engines read files by name, not {type(item).__name__}",
                                 fix="Save the upload to a file, or read it with the pandas engine", option="engine")
        text = os.fspath(item)
        if glob.has_magic(text):
            found = sorted(p for p in glob.glob(text) if os.path.isfile(p))
            if not found:
                raise OrderDataError("no file matches the pattern", file=text,
                                     fix="Check the folder and the pattern, e.g. orders/*.csv")
            paths.extend(found)
        elif os.path.isfile(text):
            paths.append(text)
        else:
            raise OrderDataError("the file does not exist", file=text, fix="Check the path and the file name")
    return list(dict.fromkeys(os.path.abspath(p) for p in paths))


def _file_kind(path: str) -> str:
    with open(path, "rb") as handle:
        head = handle.read(4)
    name = Path(path).name
    if head == b"PAR1":
        return "parquet"
    if head == b"PK\x03\x04" or path.lower().endswith((".xlsx", ".xlsm", ".xls")):
        raise OrderDataError("the scale engines read CSV and Parquet files, not Excel workbooks", file=name,
                             fix="Read Excel workbooks with the pandas engine, or export the sheet as CSV",
                             option="engine")
    if path.lower().endswith(".parquet"):
        raise OrderDataError("the file is named like a Parquet file but is not one", file=name)
    return "csv"


def _text_head(path: str) -> tuple[str, bool]:
    """The first bytes of a CSV file as text, and whether the fast readers need a careful copy of it
    (text that is not UTF-8, lines ending in a carriage return alone)."""
    with open(path, "rb") as handle:
        data = handle.read(_SNIFF_BYTES)
    name = Path(path).name
    if looks_binary(data):
        raise OrderDataError("the file is not a text table (it contains binary data)", file=name,
                             fix="Upload a CSV or Parquet export")
    encoding, _ = text_encoding(lambda: iter([data]))
    copy = encoding not in ("utf-8", "utf-8-sig") or (b"\r" in data and b"\n" not in data)
    if encoding == "utf-8-sig":
        data = data[3:]
    if encoding in ("utf-8", "utf-8-sig"):
        return data.decode("utf-8"), copy
    try:
        return data.decode("utf-8"), copy
    except UnicodeDecodeError as problem:
        if len(data) >= _SNIFF_BYTES - 3 and problem.start >= len(data) - 3:
            return data[: problem.start].decode("utf-8"), copy  # a character cut at the end of the sample
    # Not UTF-8: this is only the sample the columns are guessed from; the engines read a careful
    # copy in UTF-8 (make_careful_copies), in the encoding the pandas reader chooses for the whole file.
    return data.decode(encoding if encoding.startswith("utf-16") else "cp1252", errors="replace"), True


def text_cells(frame: pd.DataFrame) -> pd.DataFrame:
    """Typed columns as the text the pandas reader makes of them (its rule for Parquet files)."""
    return typed_cells_as_text(frame)


def _csv_sample(head: str, name: str, header_row: int | None):
    """The layout of a CSV file (from its head) and its first rows as cells, rows that do not fit left out."""
    layout = text_layout(head, name, header_row)
    lines = io.StringIO(head[layout.skip_chars:], newline="")
    rows = []
    for _, fields, code, _ in split_records(lines, delimiter=layout.delimiter, width=len(layout.header),
                                            first_row=layout.header_index + 2):
        if code is None:
            rows.append(fields)
        if len(rows) >= _SAMPLE_ROWS:
            break
    return layout, pd.DataFrame(rows, columns=unique_headers(layout.header), dtype=object)


def _parquet_sample(path: str) -> pd.DataFrame:
    import pyarrow.parquet as pq

    try:
        handle = pq.ParquetFile(path)
        batch = next(handle.iter_batches(batch_size=_SAMPLE_ROWS), None)
        frame = batch.to_pandas() if batch is not None else handle.schema_arrow.empty_table().to_pandas()
    except Exception as problem:  # pyarrow raises several types for broken files
        raise OrderDataError(f"the Parquet file could not be read ({type(problem).__name__})",
                             file=Path(path).name) from None
    return text_cells(frame)


def open_order_files(source, *, overrides: dict, file_name: str | None = None, scan: bool = True,
                     header_row: int | None = None) -> OrderFiles:
    """Check the files, guess the column mapping as the pandas reader would, find blank lines.

    Parameters
    ----------
    source : str, path or list of them
        A file, a glob pattern or a list; every file must have the same columns.
    overrides : dict
        Role -> column chosen by the user (as for :func:`forecasting.reading.guess_mapping`).
    file_name : str, optional
        The name shown in messages (default: the file's name, or the pattern).
    scan : bool, default True
        Scan CSV files now (:meth:`OrderFiles.scan_blank_lines`); with False the caller runs
        it (for example beside other work).
    header_row : int, optional
        The row of the column headings, as for :func:`forecasting.reading.read_orders`.
    """
    rules.check_header_row(header_row)
    paths = resolve_paths(source)
    kinds = {_file_kind(p) for p in paths}
    if len(kinds) > 1:
        raise OrderDataError("the files mix CSV and Parquet", file=str(source),
                             fix="Give files of one kind in one run")
    kind = kinds.pop()
    display = file_name or (Path(paths[0]).name if len(paths) == 1 else os.fspath(
        source if not isinstance(source, (list, tuple)) else Path(paths[0]).parent))
    for path in paths:
        if os.path.getsize(path) == 0:
            raise OrderDataError("the file is empty", file=Path(path).name, fix="Export the orders again")
    delimiter, notes, needs_copy = ",", [], False
    if kind == "csv":
        layouts, samples, headers = [], [], []
        for path in paths:
            head, copy = _text_head(path)
            layout, sample = _csv_sample(head, Path(path).name, header_row)
            # Title lines or a "sep=" line: the careful copy starts the table where the pandas reader does.
            needs_copy |= copy or layout.header_index > 0 or layout.separator_line
            layouts.append(layout)
            samples.append(sample)
            headers.append(list(sample.columns))
        delimiter = layouts[0].delimiter
        notes = list(layouts[0].notes)
        for path, layout in zip(paths[1:], layouts[1:]):
            if layout.delimiter != delimiter:
                raise OrderDataError("the files use different delimiters", file=Path(path).name,
                                     fix="Export every file the same way")
    else:
        if header_row not in (None, 1):
            raise OrderDataError("a Parquet file has its column names built in; there is no header row to choose",
                                 file=display, value=header_row, fix="Leave the header row out", option="header_row")
        samples = [_parquet_sample(paths[0])]
        import pyarrow.parquet as pq

        headers = [list(samples[0].columns)] + [[str(n) for n in pq.read_schema(p).names] for p in paths[1:]]
    for path, header in zip(paths[1:], headers[1:]):
        if header != headers[0]:
            raise OrderDataError("the files have different columns", file=Path(path).name,
                                 value=", ".join(header),
                                 fix=f"Every file needs the columns of {Path(paths[0]).name}: "
                                     + ", ".join(headers[0]))
    columns = headers[0]
    if len(columns) < 3:
        raise OrderDataError(f"the file has {len(columns)} column(s); at least customer, date and amount are needed",
                             file=display, fix="Check that the export has a header row and a known delimiter; if "
                                               "title lines sit above the headings, give the row of the headings",
                             option="header_row")
    mapping = guess_mapping(samples[0], overrides, file_name=display)
    files = OrderFiles(paths=paths, kind=kind, columns=columns, mapping=mapping, display_name=display,
                       delimiter=delimiter, notes=notes + mapping_notes(columns, mapping), needs_copy=needs_copy,
                       header_row=header_row)
    if kind == "csv" and scan and not files.needs_copy:
        files.scan_blank_lines()
    return files


def _blocks(path: str, size: int = 1 << 22):
    with open(path, "rb") as handle:
        while block := handle.read(size):
            yield block


def make_careful_copies(files: OrderFiles, directory: str) -> None:
    """Copy CSV files record by record into UTF-8 files that every engine's fast reader accepts.

    For files the fast readers refuse or would read otherwise than the pandas reader: rows that
    do not split into the header's fields, an unclosed quote, cells with line breaks, text that
    is not UTF-8, title lines above the header, a ``sep=`` line, lines ending in a carriage
    return alone. Each file is read as the pandas reader reads it (the same encoding and header
    row, :func:`forecasting.io.read.split_records` for the records), in a stream, so memory
    stays small. Good records are written with RFC 4180 quoting; blank rows and rows that do
    not split are set aside with their reason and row number, and the spreadsheet row of each
    copied record is kept (``files.row_numbers``)."""
    read_paths, notes = [], []
    files.set_aside.clear()
    for number, path in enumerate(files.paths):
        encoding, note = text_encoding(lambda: _blocks(path))
        if note and note not in notes:
            notes.append(note)
        label = files.file_label(path)
        copy = os.path.join(directory, f"careful_{number}.csv")
        rows = array.array("q")
        with open(path, encoding=encoding, newline="") as source:
            layout = text_layout(source.read(_SNIFF_BYTES), label, files.header_row)
        with open(path, encoding=encoding, newline="") as source, \
                open(copy, "w", encoding="utf-8", newline="") as target:
            source.read(layout.skip_chars)  # the separator line, title lines and the header
            writer = csv.writer(target, delimiter=layout.delimiter, lineterminator="\n")
            writer.writerow(layout.header)
            for row, fields, code, text in split_records(source, delimiter=layout.delimiter,
                                                         width=len(layout.header),
                                                         first_row=layout.header_index + 2):
                if code is None:
                    writer.writerow(fields)
                    rows.append(row)
                else:
                    files.set_aside.append((label, row, code, text))
        read_paths.append(copy)
        files.labels[copy] = label
        files.row_numbers[copy] = np.frombuffer(rows, dtype=np.int64).copy() if len(rows) else np.zeros(0, np.int64)
    files.read_paths = read_paths
    files.notes[:0] = notes
    files.blank_records, files.scanned_records = {}, {}
    files.scan_blank_lines()
    # Line breaks inside quotes in a copy are cells the careful reader has read already.
    files.quoted_line_breaks = {path: False for path in read_paths}


@dataclass
class FileScan:
    """What one pass over a CSV file's bytes finds (see :func:`scan_file`)."""

    blank: np.ndarray
    records: int | None
    quoted_line_break: bool
    damaged: bool


def scan_file(path: str, *, quote: bytes = b'"') -> FileScan:
    """One pass over the bytes of a CSV file: does it hold an empty line, a quote, a control
    character; then, when it holds an empty line or a quote, the blank records and whether a
    line break is inside quotes (see :func:`scan_records`)."""
    empty_line, quoted, damaged = False, False, False
    buffer = bytearray(2 + _FIND_CHUNK)  # two bytes of the previous block, then the block
    data = np.frombuffer(buffer, dtype=np.uint8)
    with open(path, "rb") as handle:
        while size := handle.readinto(memoryview(buffer)[2:]):
            block = data[:2 + size]
            if not empty_line:
                line_feed = block == 10
                empty_line = bool((line_feed[:-1] & line_feed[1:]).any()
                                  or (line_feed[:-2] & (block[1:-1] == 13) & line_feed[2:]).any())
            quoted = quoted or bool((block[2:] == quote[0]).any())
            damaged = damaged or bool(_DAMAGED_TABLE[block[2:]].any())
            buffer[:2] = buffer[size:size + 2]  # an empty line may straddle two blocks
    if not (empty_line or quoted):
        return FileScan(np.zeros(0, dtype=np.int64), None, False, damaged)
    blank, records, inside = _scan_records(path, quote=quote)
    return FileScan(blank, records if empty_line else None, inside, damaged)


_DAMAGED_TABLE = np.zeros(256, dtype=bool)
_DAMAGED_TABLE[list(rules.DAMAGED_BYTES)] = True


def _has_empty_line(path: str) -> bool:
    """Whether the file holds an empty line (LF LF or LF CR LF), quoted or not.

    Read in blocks into one reused buffer and compared as bytes with numpy: most files
    have no empty line, and this is several times faster than mapping the file and
    searching it as text."""
    buffer = bytearray(2 + _FIND_CHUNK)  # two bytes of the previous block, then the block
    data = np.frombuffer(buffer, dtype=np.uint8)
    with open(path, "rb") as handle:
        while size := handle.readinto(memoryview(buffer)[2:]):
            block = data[:2 + size]
            line_feed = block == 10
            if (line_feed[:-1] & line_feed[1:]).any():
                return True
            if (line_feed[:-2] & (block[1:-1] == 13) & line_feed[2:]).any():
                return True
            buffer[:2] = buffer[size:size + 2]  # an empty line may straddle two blocks
    return False


_FIND_CHUNK = 1 << 22  # bytes per read of _has_empty_line (small enough to stay in cache)


def scan_records(path: str, *, quote: bytes = b'"') -> tuple[np.ndarray, int | None]:
    """Record numbers (header = 0) of the empty lines of a CSV file, outside quoted fields,
    and the number of non-blank data records (``None`` when the file has no empty line).

    A record ends at a line break that is not inside quotes: with RFC 4180 quoting
    (a quote inside a quoted field is doubled) a line break is inside a quoted field
    exactly when an odd number of quote characters precede it. The file is scanned in
    blocks, so memory stays bounded whatever its size.

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.NamedTemporaryFile("wb", suffix=".csv", delete=False) as f:
    ...     _ = f.write(b'a,b\\n1,"x\\n\\ny"\\n\\n2,3\\n\\n')
    >>> blank, records = scan_records(f.name)
    >>> blank.tolist(), records
    ([2, 4], 2)
    >>> os.remove(f.name)
    """
    size = os.path.getsize(path)
    none = np.zeros(0, dtype=np.int64)
    if size == 0:
        return none, None
    if not _has_empty_line(path):
        return none, None
    blank, records, _ = _scan_records(path, quote=quote)
    return blank, records


def _scan_records(path: str, *, quote: bytes = b'"') -> tuple[np.ndarray, int, bool]:
    """The blank records and the number of data records of :func:`scan_records`, and whether a
    line break of the file is inside quotes."""
    size = os.path.getsize(path)
    none = np.zeros(0, dtype=np.int64)
    inside = False
    with open(path, "rb") as handle, mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ) as data:
        last_byte = data[size - 1]
        q = quote[0]
        found: list[np.ndarray] = []
        quotes_before = 0  # quote characters before the block
        records_before = 0  # record ends before the block
        previous_end = -1  # absolute position of the last record end (line break) seen
        start = 0
        while start < size:
            stop = min(size, start + _SCAN_CHUNK)
            block = np.frombuffer(data, dtype=np.uint8, count=stop - start, offset=start)
            quote_at = np.flatnonzero(block == q)
            newline_at = np.flatnonzero(block == 10)
            parity = (quotes_before + np.searchsorted(quote_at, newline_at)) % 2
            inside = inside or bool(parity.any())
            ends = newline_at[parity == 0] + start  # absolute positions of record ends
            if len(ends):
                starts = np.concatenate([[previous_end + 1], ends[:-1] + 1])
                length = ends - starts
                carriage = np.zeros(len(ends), dtype=bool)
                has_one = length == 1
                if has_one.any():
                    carriage[has_one] = np.frombuffer(data, dtype=np.uint8)[ends[has_one] - 1] == 13
                empty = (length == 0) | carriage
                record = records_before + np.arange(len(ends))
                # The header (record 0) is never a blank order row.
                found.append(record[empty & (record > 0)])
                records_before += len(ends)
                previous_end = int(ends[-1])
            quotes_before += len(quote_at)
            start = stop
            del block
    blank = np.concatenate(found).astype(np.int64) if found else none
    # Records: one per line break outside quotes, plus a last line without a break.
    records = records_before + (1 if last_byte != 10 and previous_end < size - 1 else 0)
    return blank, records - 1 - len(blank), inside
