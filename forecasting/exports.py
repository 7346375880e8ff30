"""Safe exports: tables out to CSV and Excel that cannot harm a spreadsheet user.

In: any DataFrame the product produces (forecasts, tiers, excluded rows).
Out: CSV text (RFC 4180 quoting, UTF-8) or Excel bytes, where every text cell that a
spreadsheet would run as a formula is neutralised.

A text cell starting with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return is
prefixed with a single quote, as the OWASP "CSV Injection" guidance advises. Number
columns stay numbers, so a negative amount is still ``-12.5``.
"""

from __future__ import annotations

import io
from pathlib import Path

import pandas as pd

FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


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
        if pd.api.types.is_object_dtype(series) or pd.api.types.is_string_dtype(series):
            out[column] = series.map(neutralise_cell)
    out.columns = [neutralise_cell(str(c)) for c in out.columns]
    return out


def csv_text(table: pd.DataFrame) -> str:
    """The table as RFC 4180 CSV text (comma, double-quote quoting, CRLF line ends)."""
    return safe_table(table).to_csv(index=False, lineterminator="\r\n", float_format="%.10g")


def write_csv(table: pd.DataFrame, path) -> Path:
    """Write ``table`` as safe CSV to ``path`` and return the path."""
    path = Path(path)
    path.write_text(csv_text(table), encoding="utf-8", newline="")
    return path


def excel_bytes(table: pd.DataFrame, *, sheet_name: str = "forecasts") -> bytes:
    """The table as an .xlsx workbook; text cells are neutralised and stored as text."""
    buffer = io.BytesIO()
    with pd.ExcelWriter(buffer, engine="xlsxwriter",
                        engine_kwargs={"options": {"strings_to_formulas": False,
                                                   "strings_to_urls": False}}) as writer:
        safe_table(table).to_excel(writer, index=False, sheet_name=sheet_name)
    return buffer.getvalue()
