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

import hashlib
import hmac
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
    # Floats are written as the shortest text that reads back exactly (faster than a format string).
    return safe_table(table).to_csv(index=False, lineterminator="\r\n")


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
                                                   "strings_to_urls": False,
                                                   # no temporary files: customer data stays off the disk
                                                   "in_memory": True}}) as writer:
        safe_table(table).to_excel(writer, index=False, sheet_name=sheet_name)
    return buffer.getvalue()


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
    if not isinstance(salt, str) or len(salt) < 8:
        raise ValueError(f"the pseudonym salt must be a text of at least 8 characters (got {len(str(salt))})")
    key = salt.encode("utf-8")

    def pseudonym(value) -> str:
        digest = hmac.new(key, str(value).encode("utf-8"), hashlib.sha256).hexdigest()
        return "cust-" + digest[:16]

    out = table.copy()
    codes, uniques = pd.factorize(out[column])
    names = [pseudonym(v) for v in uniques]
    out[column] = pd.Series(names, dtype=object).take(codes).to_numpy()
    return out
