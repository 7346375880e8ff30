"""The cleaning rules as the scale engines apply them: one definition, used by SQL and by pandas.

In: nothing (constants and small helpers). Out: the patterns and option checks that
:mod:`forecasting.engines.duckdb_engine` turns into SQL and
:mod:`forecasting.engines.dask_engine` applies to partitions with pandas.

The pandas reader (:mod:`forecasting.reading`) understands formatted exports: money such
as ``$1,234.50`` or ``1.234,50 €`` and dates such as ``14/03/2025`` whose reading
(day-first or month-first) is settled by the whole column. A reading that depends on
the whole column does not split over partitions, so the scale engines accept the plain
subset and say so when a file needs more:

* amounts: plain numbers (``1234.5``, ``-12``, ``.5``, ``1e3``); a value with no digit
  at all (``n/a``) is an unreadable amount exactly as in the pandas reader; any other
  value with a digit (``$1,234.50``, ``12,50``, ``12-``, or ``1e400``, too large for a
  float) stops the run with an :class:`~forecasting.errors.OrderDataError` naming
  ``--engine pandas``;
* dates: ISO dates ``YYYY-MM-DD`` with an optional time ``HH:MM[:SS[.ffffff]]``;
  a value made of signs only (``-``, ``?``) is an unreadable date; anything else
  (``14/03/2025``, ``March 14``, ``today``, ``2025-02-30``, a time-zone offset)
  stops the run naming ``--engine pandas``.

Every other rule (blank, over-long and duplicate rows, missing customer, test and
cancelled orders, currencies, order lines summed by order id, refunds netted, orders
that net to zero or less, the "most values unreadable" refusal) is the pandas reader's
own, taken from :mod:`forecasting.reading` where it is written down.
"""

from __future__ import annotations

import re

from ..errors import OrderDataError
from ..io.rules import CURRENCY_SYMBOLS, MAX_FIELD_CHARS, REASONS
from ..reading import _CANCELLED_STATUS, _REFUND_STATUS, _TEST_STATUS

__all__ = [
    "CANCELLED_PATTERN",
    "CURRENCY_SYMBOLS",
    "MAX_FIELD_CHARS",
    "REASONS",
    "REFUND_PATTERN",
    "TEST_PATTERN",
    "WHITESPACE",
    "check_memory_limit",
    "check_plain_options",
    "check_threads",
]

# Exactly the characters Python's str.strip() removes (the pandas reader strips with it), written
# out: finding them among all 1.1 million code points costs 40 ms at every start. A test checks the
# list against str.isspace, so that a Python with a newer Unicode table cannot slip past.
WHITESPACE = ("\t\n\x0b\x0c\r\x1c\x1d\x1e\x1f \x85\xa0\u1680\u2000\u2001\u2002\u2003\u2004\u2005"
              "\u2006\u2007\u2008\u2009\u200a\u2028\u2029\u202f\u205f\u3000")

# Status words, lower-cased with everything but a-z removed first (as the pandas reader does).
TEST_PATTERN = _TEST_STATUS.pattern
CANCELLED_PATTERN = _CANCELLED_STATUS.pattern
REFUND_PATTERN = _REFUND_STATUS.pattern

# A plain number: what both pandas.to_numeric and a SQL cast to DOUBLE read the same way.
PLAIN_NUMBER = r"^[+-]?([0-9]+(\.[0-9]*)?|\.[0-9]+)([eE][+-]?[0-9]+)?$"
# An ISO date with an optional time of day (hours 00-23, at most microseconds).
ISO_DATE = (r"^[0-9]{4}-[0-9]{2}-[0-9]{2}"
            r"([ T]([01][0-9]|2[0-3]):[0-5][0-9](:[0-5][0-9](\.[0-9]{1,6})?)?)?$")
# Dates outside this range are unreadable (the pandas reader's rule).
FIRST_DATE = "1970-01-01"
LAST_DATE = "2100-01-01"
# "Most values unreadable" means the column is the wrong one (the pandas reader's rule).
UNREADABLE_MIN_VALUES = 5
UNREADABLE_SHARE = 0.5


def re2_class(characters: str) -> str:
    """The body of an RE2 (duckdb) character class matching exactly ``characters``."""
    return "".join(f"\\x{{{ord(c):x}}}" for c in characters)


def wordy_pattern_sql() -> str:
    """RE2 form of the reader's test "the amount has more than digits and separators"."""
    return "[^0-9.,()+\\-" + re2_class(WHITESPACE) + "]"


_MEMORY = re.compile(r"^\s*\d+(\.\d+)?\s*(B|KB|MB|GB|TB|KIB|MIB|GIB|TIB)\s*$", re.IGNORECASE)


def check_memory_limit(memory_limit) -> str:
    """A memory limit such as ``"2GB"`` or ``"500MB"``; anything else is refused.

    Examples
    --------
    >>> check_memory_limit("1.5GB")
    '1.5GB'
    """
    if not isinstance(memory_limit, str) or not _MEMORY.match(memory_limit):
        raise OrderDataError(f"memory_limit must be an amount such as '2GB' or '500MB' (got {memory_limit!r})",
                             fix="Use for example --memory-limit 2GB")
    return memory_limit.strip()


def check_threads(threads) -> int | None:
    """``None`` (all cores) or a whole number of threads, 1 or more."""
    if threads is None:
        return None
    if isinstance(threads, bool) or not isinstance(threads, int) or threads < 1:
        raise OrderDataError(f"threads must be a whole number, 1 or more (got {threads!r})",
                             fix="Use for example --threads 2, or leave it out to use every core")
    return int(threads)


def check_plain_options(engine: str, *, decimal=None, date_order=None, sheet=None) -> None:
    """Refuse reading options that only the pandas engine honours, before any work."""
    if date_order not in (None, "day-first", "month-first"):
        raise OrderDataError(f"the date order must be day-first or month-first (got {date_order!r})",
                             fix="Use --date-order day-first or --date-order month-first")
    if sheet is not None:
        raise OrderDataError(f"the {engine} engine reads CSV and Parquet files, not Excel sheets",
                             value=sheet, fix="Use --engine pandas for Excel workbooks")
