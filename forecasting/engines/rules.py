"""The scale engines' own options: memory limit, threads, what they read.

In: option values. Out: the checked values, or an :class:`~forecasting.errors.OrderDataError`
naming the option, before any work.

The cleaning rules are not here: every engine applies the one rule set of
:mod:`forecasting.io.rules` (the duckdb engine as SQL built from it, the dask engine over
Arrow arrays on each partition, as the pandas reader does). The names below that come from
it are the same objects, kept for callers of this module.
"""

from __future__ import annotations

import re

from ..errors import OrderDataError
from ..io.rules import MAX_FIELD_CHARS, REASONS, WHITESPACE

__all__ = [
    "MAX_FIELD_CHARS",
    "REASONS",
    "WHITESPACE",
    "check_memory_limit",
    "check_plain_options",
    "check_threads",
    "re2_class",
]


def re2_class(characters: str) -> str:
    """The body of an RE2 (duckdb) character class matching exactly ``characters``."""
    return "".join(f"\\x{{{ord(c):x}}}" for c in characters)


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
                             value=memory_limit, fix="Give an amount of memory such as 2GB", option="memory_limit")
    return memory_limit.strip()


def check_threads(threads) -> int | None:
    """``None`` (all cores) or a whole number of threads, 1 or more."""
    if threads is None:
        return None
    if isinstance(threads, bool) or not isinstance(threads, int) or threads < 1:
        raise OrderDataError(f"threads must be a whole number, 1 or more (got {threads!r})", value=threads,
                             fix="Give a whole number such as 2, or leave it out to use every core", option="threads")
    return int(threads)


def check_plain_options(engine: str, *, sheet=None) -> None:
    """Refuse reading options the scale engines cannot honour (an Excel sheet), before any work."""
    if sheet is not None:
        raise OrderDataError(f"the {engine} engine reads CSV and Parquet files, not Excel sheets",
                             value=sheet, fix="Read Excel workbooks with the pandas engine", option="engine")
