"""Two ways to run one cleaning rule: over Arrow arrays in this process, or as SQL in duckdb.

In: nothing (two small classes). Out: :class:`ArrowOps` and :class:`SqlOps`, which offer the
same operations (strip, lower, regular expressions, casts, integer arithmetic, choices).

Every rule in :mod:`forecasting.io.rules` is a Python function written once against these
operations. Handed an :class:`ArrowOps` and Arrow string arrays, it computes whole columns
(the pandas and dask engines); handed an :class:`SqlOps` and column names, it returns the SQL
text that computes the same thing (the duckdb engine). Both backends use the RE2 regular
expression engine (Arrow's compute functions and duckdb's ``regexp_*`` functions), so a pattern
means the same to both. Where the two could differ the operations say how they are made equal:

* conditions: a missing (null) condition counts as false, as in SQL's ``CASE WHEN``;
* casts: text is cast only after a pattern has said it is a number, so neither backend's own
  leniency (duckdb accepts ``1_000`` and surrounding spaces) is ever reached;
* integer division truncates toward zero in both.

Rules stay vectorised: no operation loops over rows in Python. :meth:`ArrowOps.branch` runs a
slow, careful part of a rule only on the rows a fast test did not settle; in SQL the same
branch is a ``CASE`` that duckdb evaluates lazily, row by row.
"""

from __future__ import annotations

from typing import Callable

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

__all__ = ["ArrowOps", "Sql", "SqlOps"]


# ---------------------------------------------------------------------------
# Arrow


class ArrowOps:
    """The operations over Arrow arrays (all of one length, or Python scalars)."""

    name = "arrow"

    # -- values
    @staticmethod
    def lit(value):
        return value

    @staticmethod
    def null(kind: str):
        return pa.scalar(None, type=_ARROW_TYPES[kind])

    # -- text
    @staticmethod
    def strip(x, characters: str):
        # A cell that starts and ends with a printable ASCII character other than a space is
        # unchanged by any strip: the column is returned as it is (no copy) when every cell is so.
        if isinstance(x, pa.Array) and x.type == pa.string() and _no_edges(x, characters):
            return x
        return pc.utf8_trim(x, characters=characters)

    @staticmethod
    def lower(x):
        return pc.utf8_lower(x)

    @staticmethod
    def upper(x):
        return pc.utf8_upper(x)

    @staticmethod
    def length(x):
        return pc.cast(pc.utf8_length(x), pa.int64())

    @staticmethod
    def is_ascii(x):
        return pc.string_is_ascii(x)

    @staticmethod
    def contains(x, literal: str):
        return pc.match_substring(x, literal)

    @staticmethod
    def search(x, pattern: str):
        return pc.match_substring_regex(x, pattern)

    @staticmethod
    def full_match(x, pattern: str):
        return pc.match_substring_regex(x, f"^(?:{pattern})$")

    @staticmethod
    def replace(x, pattern: str, replacement: str):
        return pc.replace_substring_regex(x, pattern, replacement)

    @staticmethod
    def extract(x, pattern: str, names: tuple[str, ...]) -> dict:
        """The named groups of the first match of ``pattern`` ('' where it does not match)."""
        found = pc.extract_regex(x, pattern)
        return {name: pc.fill_null(found.field(name), "") for name in names}

    @staticmethod
    def left(x, count: int):
        return pc.utf8_slice_codeunits(x, 0, count)

    # -- numbers
    @staticmethod
    def to_float(x, valid):
        """``x`` read as a float where ``valid`` (a pattern said it is a plain number), else null."""
        return _cast_where(x, valid, pa.float64())

    @staticmethod
    def to_int(x, valid):
        """``x`` read as a whole number where ``valid`` (digits only, at most 18), else null."""
        return _cast_where(x, valid, pa.int64())

    @staticmethod
    def is_finite(x):
        return pc.fill_null(pc.is_finite(x), False)

    @staticmethod
    def add(a, b):
        return pc.add(a, b)

    @staticmethod
    def sub(a, b):
        return pc.subtract(a, b)

    @staticmethod
    def mul(a, b):
        return pc.multiply(a, b)

    @staticmethod
    def div_int(a, b):
        return pc.divide(a, b)  # integer division of integers truncates toward zero

    @staticmethod
    def floor(x):
        return pc.floor(x)

    @staticmethod
    def float_to_int(x):
        return pc.cast(x, pa.int64(), safe=False)

    @staticmethod
    def neg(x):
        return pc.negate(x)

    @staticmethod
    def ln(x):
        return pc.ln(x)

    def iso_micros(self, text, valid):
        """Microseconds since 1970 (to the second) of ISO date texts where ``valid``, else null.

        Arrow's own cast reads the whole column at once; when one value is no real day
        (2025-02-30) it refuses them all, and the dates are then built from their digits."""
        valid = self.truth(valid)
        every = _all_true(valid)
        subset = text if every else pc.filter(text, valid)
        if len(subset) == 0:
            return pa.nulls(len(text), pa.int64())
        try:
            stamps = pc.floor_temporal(pc.cast(subset, pa.timestamp("us")), unit="second")
            micros = pc.cast(stamps, pa.int64())
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            from .rules import civil_micros

            def digits(start, stop):
                part = pc.utf8_slice_codeunits(subset, start, stop)
                return self.to_int(part, pc.match_substring_regex(part, "^[0-9]+$"))

            micros = civil_micros(self, digits(0, 4), digits(5, 7), digits(8, 10),
                                  pc.fill_null(digits(11, 13), 0), pc.fill_null(digits(14, 16), 0),
                                  pc.fill_null(digits(17, 19), 0))
        if isinstance(micros, pa.ChunkedArray):
            micros = micros.combine_chunks()
        if every:
            return micros
        return pc.replace_with_mask(pa.nulls(len(text), pa.int64()), valid, micros)

    # -- comparisons and logic (null compares as null; a null condition is false)
    @staticmethod
    def eq(a, b):
        return pc.equal(a, b)

    @staticmethod
    def ne(a, b):
        return pc.not_equal(a, b)

    @staticmethod
    def lt(a, b):
        return pc.less(a, b)

    @staticmethod
    def le(a, b):
        return pc.less_equal(a, b)

    @staticmethod
    def gt(a, b):
        return pc.greater(a, b)

    @staticmethod
    def ge(a, b):
        return pc.greater_equal(a, b)

    @staticmethod
    def and_(*conditions):
        result = conditions[0]
        for condition in conditions[1:]:
            result = pc.and_kleene(result, condition)
        return result

    @staticmethod
    def or_(*conditions):
        result = conditions[0]
        for condition in conditions[1:]:
            result = pc.or_kleene(result, condition)
        return result

    @staticmethod
    def not_(condition):
        return pc.invert(condition)

    @staticmethod
    def is_null(x):
        return pc.is_null(x)

    @staticmethod
    def fill_null(x, value):
        return pc.fill_null(x, value)

    @staticmethod
    def truth(condition):
        """The condition with null read as false."""
        return pc.fill_null(condition, False)

    def if_else(self, condition, then, otherwise):
        return pc.if_else(self.truth(condition), then, otherwise)

    def case(self, choices: list[tuple], default):
        """The value of the first condition that holds, else ``default``.

        One pass of Arrow's ``case_when`` (a null condition is false there too) where the values
        share a type; else a chain of ``if_else``."""
        arrays = [x for pair in choices for x in pair if isinstance(x, (pa.Array, pa.ChunkedArray))]
        if isinstance(default, (pa.Array, pa.ChunkedArray)):
            arrays.append(default)
        if choices and arrays:
            n = len(arrays[0])
            try:
                conditions = pa.StructArray.from_arrays(
                    [self.full_column(self.truth(c), n) if isinstance(c, (pa.Array, pa.ChunkedArray))
                     else self.full_column(bool(c.as_py() if isinstance(c, pa.Scalar) else c), n)
                     for c, _ in choices],
                    names=[f"c{i}" for i in range(len(choices))])
                values = [self.full_column(v, n) if isinstance(v, pa.ChunkedArray) else v
                          for v in [v for _, v in choices] + [default]]
                return pc.case_when(conditions, *values)
            except (pa.ArrowNotImplementedError, pa.ArrowInvalid, pa.ArrowTypeError):
                pass
        result = default
        for condition, value in reversed(choices):
            result = self.if_else(condition, value, result)
        return result

    @staticmethod
    def is_in(x, values: tuple):
        return pc.is_in(x, value_set=pa.array(values))

    @staticmethod
    def index_in(x, values: tuple):
        """Position of ``x`` in ``values`` (0-based), null when absent."""
        return pc.cast(pc.index_in(x, value_set=pa.array(values)), pa.int64())

    # -- structure
    @staticmethod
    def let(name: str, x):
        return x

    @staticmethod
    def distinct(x, *, many: bool = False) -> tuple[np.ndarray, pa.Array]:
        """``(codes, values)``: each text's number (int32) among the distinct ``values``, numbered in
        the order they first appear.

        Arrow's hash table of texts is quickest while the distinct values are few (prices, days,
        statuses: the table stays in the processor's cache). With ``many`` (customer ids: hundreds
        of thousands), texts of at most eight bytes without a NUL byte are hashed as the 64-bit
        numbers their bytes make (:func:`short_text_keys`), about twice as fast as hashing texts."""
        x = _one_chunk(x)
        keys = short_text_keys(x) if many and len(x) >= _HASHED_AS_NUMBERS_FROM else None
        if keys is None:
            encoded = _one_chunk(pc.dictionary_encode(x))
            return encoded.indices.to_numpy(zero_copy_only=False).astype(np.int32, copy=False), encoded.dictionary
        # The numbers are mixed first (a one-to-one mixing: an odd multiplier, then the high bits
        # folded into the low ones): a short text's number ends in zero bytes, which pandas' hash
        # of 64-bit numbers would put in few buckets.
        mix(keys)
        codes = pd.factorize(keys)[0].astype(np.int32, copy=False)
        # Codes number values in the order they first appear: a value's first row is where the
        # running highest code goes up.
        highest = np.maximum.accumulate(codes)
        first = np.flatnonzero(np.concatenate([[True], highest[1:] > highest[:-1]]))
        return codes, x.take(pa.array(first))

    def per_distinct(self, x, rule: Callable):
        """``rule(ops, x)`` computed once per distinct value of ``x`` (a few statuses, the days of a
        few years, the prices a shop charges: millions of rows).

        A column of mostly different values (judged on its first rows) is read as it is: numbering
        its values would cost more than it saves. Either way each cell gets the rule's value."""
        if _mostly_distinct(x):
            return rule(self, x)
        codes, values = self.distinct(x)
        out = rule(self, values)
        indices = pa.array(codes)
        if isinstance(out, dict):
            return {key: self._take(value, indices) for key, value in out.items()}
        return self._take(out, indices)

    @staticmethod
    def _take(values, indices):
        """An output per distinct value taken back to every row; one value for every row stays one."""
        if not isinstance(values, (pa.Array, pa.ChunkedArray)):
            return values
        return pc.take(values, indices)

    def branch(self, settled, fast: dict, careful: Callable) -> dict:
        """Each output from ``fast`` where ``settled`` holds, else from ``careful(ops, take)``.

        ``careful`` runs on the unsettled rows only: ``take(array)`` gives an input's values there."""
        unsettled = pc.invert(self.truth(settled))
        count = pc.sum(unsettled).as_py() or 0
        n = len(unsettled)
        full = {key: self.full_column(value, n) for key, value in fast.items()}
        if count == 0:
            return full
        slow = careful(self, lambda array: pc.filter(array, unsettled))
        out = {}
        for key, value in full.items():
            replacement = slow[key]
            if not isinstance(replacement, (pa.Array, pa.ChunkedArray)):
                replacement = pa.array([replacement] * count, type=value.type)
            elif replacement.type != value.type:
                replacement = pc.cast(replacement, value.type)
            if isinstance(replacement, pa.ChunkedArray):
                replacement = replacement.combine_chunks()
            out[key] = pc.replace_with_mask(value, unsettled, replacement)
        return out

    @staticmethod
    def full_column(value, n: int):
        """A value as an array of ``n`` (a scalar repeated, an array as it is)."""
        if isinstance(value, pa.ChunkedArray):
            return value.combine_chunks()
        if isinstance(value, pa.Array):
            return value
        scalar = value if isinstance(value, pa.Scalar) else pa.scalar(value)
        if scalar.type == pa.int8() or scalar.type == pa.int32():
            scalar = pa.scalar(scalar.as_py(), pa.int64())
        # The one value taken n times (built in C, not as a Python list).
        return pc.take(pa.array([scalar.as_py()], type=scalar.type), pa.array(np.zeros(n, dtype=np.int32)))


_ARROW_TYPES = {"float": pa.float64(), "int": pa.int64(), "text": pa.string(), "bool": pa.bool_()}

# Below this many texts Arrow's hash table is as quick as making numbers of them.
_HASHED_AS_NUMBERS_FROM = 4096
# per_distinct judges a column by its first rows: when nine in ten of them differ, the rule is
# run on every row as it is.
_SAMPLE_ROWS = 8192


def _one_chunk(array):
    if isinstance(array, pa.ChunkedArray):
        return array.chunk(0) if array.num_chunks == 1 else array.combine_chunks()
    return array


def _mostly_distinct(x) -> bool:
    if len(x) < 4 * _SAMPLE_ROWS:
        return False
    sample = x.slice(0, _SAMPLE_ROWS)
    return len(pc.unique(sample)) > 0.9 * _SAMPLE_ROWS


# The bytes of a text of k bytes that count in its eight-byte number (big-endian, so the first
# byte is the highest).
_KEPT_BYTES = np.array([0] + [((1 << (8 * k)) - 1) << (8 * (8 - k)) for k in range(1, 9)], dtype=np.uint64)


# Odd 64-bit constants (the golden ratio's and splitmix64's) that mix numbers one-to-one (:func:`mix`).
_MIX = (np.uint64(0x9E3779B97F4A7C15), np.uint64(0xBF58476D1CE4E5B9), np.uint64(0x94D049BB133111EB))


def mix(key: np.ndarray, step: int = 0, scratch: np.ndarray | None = None) -> None:
    """Mix 64-bit numbers in place, one-to-one: an odd multiplier (the ``step``-th of three), then
    the high bits folded into the low ones (equal numbers stay equal, different ones differ).
    ``scratch``: a working array of the same size, when the caller has one."""
    key *= _MIX[step % 3]
    scratch = np.empty_like(key) if scratch is None else scratch
    np.right_shift(key, np.uint64(31), out=scratch)
    key ^= scratch


def cell_bytes(values: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """``(offsets, data)`` of an Arrow string array (32-bit offsets): cell k's bytes are
    ``data[offsets[k]:offsets[k + 1]]``; both are views of the array's own buffers (no copy)."""
    offsets = np.frombuffer(values.buffers()[1], dtype=np.int32, count=len(values) + 1, offset=values.offset * 4)
    data = values.buffers()[2]
    return offsets, (np.frombuffer(data, dtype=np.uint8) if data is not None else np.zeros(0, dtype=np.uint8))


def text_bytes(values: pa.Array):
    """``(starts, lengths, padded)``: where each text's bytes start in ``padded`` (the array's bytes
    followed by eight zero bytes), and how many they are."""
    offsets, data = cell_bytes(values)
    raw = data[offsets[0]:offsets[-1]]
    padded = np.concatenate([raw, np.zeros(8, dtype=np.uint8)])
    return (offsets[:-1] - offsets[0]).astype(np.int64), offsets[1:] - offsets[:-1], padded


def first_eight(starts: np.ndarray, lengths: np.ndarray, padded: np.ndarray) -> np.ndarray:
    """Each text's first eight bytes (fewer when it is shorter, then zero bytes) as a big-endian
    64-bit number."""
    # Every byte's eight-byte window read as one big-endian number (a view, no copy).
    windows = np.ndarray(shape=(len(padded) - 7,), dtype=">u8", buffer=padded, strides=(1,))
    return windows[starts].astype(np.uint64) & _KEPT_BYTES[np.minimum(lengths, 8)]


def short_text_keys(values) -> np.ndarray | None:
    """Each text as a 64-bit number with the same order (and equal only for equal texts), or None
    when some text is longer than eight bytes or holds a NUL byte, or is missing.

    UTF-8 sorts by code point byte by byte, and a shorter text sorts before any longer one it
    begins: padded with zero bytes, the texts sort as their numbers."""
    values = _one_chunk(values)
    if len(values) < 2 or values.type != pa.string() or values.null_count:
        return None
    starts, lengths, padded = text_bytes(values)
    if lengths.max() > 8 or (padded[:-8] == 0).any():
        return None
    return first_eight(starts, lengths, padded)


def _all_true(condition) -> bool:
    """Whether a condition (nulls already read as false) holds on every row."""
    if not isinstance(condition, (pa.Array, pa.ChunkedArray)):
        return bool(condition)
    return condition.null_count == 0 and (len(condition) == 0 or bool(pc.all(condition).as_py()))


def _cast_where(x, valid, to):
    """``x`` cast to ``to`` where ``valid``, null elsewhere; the other rows are never cast (a cast
    refuses a whole column for one value it cannot read)."""
    valid = pc.fill_null(valid, False)
    if _all_true(valid):
        return pc.cast(x, to)
    text = pc.if_else(valid, x, "0")
    return pc.if_else(valid, pc.cast(text, to), pa.scalar(None, to))


def _no_edges(x: pa.Array, characters: str) -> bool:
    """Whether no cell of ``x`` starts or ends with one of ``characters`` (looked up in the first and
    last byte of each cell: a printable ASCII character other than those is no part of any
    character that strip removes)."""
    if any(ord(c) in _PLAIN for c in characters):
        return False
    offsets, raw = cell_bytes(x)
    starts, ends = offsets[:-1], offsets[1:]
    filled = ends > starts
    if not filled.any():
        return True
    if raw.size == 0:
        return False
    first = raw[starts[filled]]
    last = raw[ends[filled] - 1]
    return bool(_PLAIN_BYTES[first].all() and _PLAIN_BYTES[last].all())


def may_be_blank(x) -> np.ndarray:
    """Cells that are empty or start with a byte other than a printable ASCII character (only those
    can be nothing but spaces); read from the first byte of each cell."""
    x = _one_chunk(x)
    if x.type != pa.string() or x.null_count:
        return np.ones(len(x), dtype=bool)
    starts, lengths, padded = text_bytes(x)
    return (lengths == 0) | ~_PLAIN_BYTES[padded[starts]]


# Printable ASCII characters other than the space.
_PLAIN = frozenset(range(33, 127))
_PLAIN_BYTES = np.zeros(256, dtype=bool)
_PLAIN_BYTES[33:127] = True


# ---------------------------------------------------------------------------
# SQL (duckdb)


class Sql:
    """An SQL expression and the layer of the query it can first be computed in."""

    __slots__ = ("text", "level")

    def __init__(self, text: str, level: int = 0):
        self.text = text
        self.level = level

    def __repr__(self) -> str:
        return f"Sql({self.text!r}, level={self.level})"


def _quote(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def sql_literal(value) -> str:
    """A Python value as an SQL literal."""
    if value is None:
        return "NULL"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return f"CAST({value} AS BIGINT)"
    if isinstance(value, float):
        return f"CAST({value!r} AS DOUBLE)"
    return "'" + str(value).replace("'", "''") + "'"


class _Layers:
    """Named intermediate values, each computed in the first layer where its inputs exist."""

    def __init__(self, prefix: str):
        self.prefix = prefix
        self.layers: list[list[tuple[str, str]]] = []
        self.names: set[str] = set()

    def add(self, level: int, name: str, text: str) -> str:
        unique, k = f"{self.prefix}{name}", 1
        while unique in self.names:
            k += 1
            unique = f"{self.prefix}{name}_{k}"
        self.names.add(unique)
        while len(self.layers) < level:
            self.layers.append([])
        self.layers[level - 1].append((unique, text))
        return unique

    def query(self, base: str) -> str:
        """``base`` (a query) wrapped in one ``SELECT *, ...`` per layer of named values."""
        sql = base
        for layer in self.layers:
            if layer:
                columns = ", ".join(f"{text} AS {_quote(name)}" for name, text in layer)
                sql = f"SELECT *, {columns} FROM ({sql})"
        return sql


def _sql(value) -> Sql:
    if isinstance(value, Sql):
        return value
    return Sql(sql_literal(value), 0)


def _level(*values) -> int:
    return max((v.level for v in values if isinstance(v, Sql)), default=0)


class SqlOps:
    """The operations as SQL text for duckdb; inputs are :class:`Sql` expressions (or Python scalars).

    Named values (:meth:`let`) become columns of nested ``SELECT`` layers (:meth:`query`), so
    a value used several times is computed once per row. Inside :meth:`branch`, named values
    of the careful part are computed only where the branch needs them (``CASE WHEN``)."""

    name = "sql"

    def __init__(self, prefix: str = "r_", *, _layers: _Layers | None = None, _guard: Sql | None = None):
        self._layers = _layers if _layers is not None else _Layers(prefix)
        self._guard = _guard

    def query(self, base: str) -> str:
        """The query that computes every named value over the rows of ``base``."""
        return self._layers.query(base)

    @staticmethod
    def column(name: str) -> Sql:
        return Sql(_quote(name), 0)

    # -- helpers
    @staticmethod
    def _call(template: str, *values) -> Sql:
        return Sql(template.format(*[_sql(v).text for v in values]), _level(*values))

    # -- values
    @staticmethod
    def lit(value):
        return value

    @staticmethod
    def null(kind: str):
        return Sql(f"CAST(NULL AS {_SQL_TYPES[kind]})", 0)

    # -- text
    def strip(self, x, characters: str):
        # trim() with a set of characters is slow: only cells that start or end with one take it.
        edge = sql_literal(f"^{_re2_class(characters)}|{_re2_class(characters)}$")
        x = _sql(x)
        return Sql(f"(CASE WHEN (ascii({x.text}) BETWEEN 33 AND 126 AND ascii({x.text}[-1]) BETWEEN 33 AND 126) "
                   f"THEN {x.text} WHEN regexp_matches({x.text}, {edge}) "
                   f"THEN trim({x.text}, {sql_literal(characters)}) ELSE {x.text} END)", x.level)

    def lower(self, x):
        return self._call("lower({})", x)

    def upper(self, x):
        return self._call("upper({})", x)

    def length(self, x):
        return self._call("CAST(length({}) AS BIGINT)", x)

    def is_ascii(self, x):
        return self._call("(strlen({0}) = length({0}))", x)

    def contains(self, x, literal: str):
        return self._call("contains({}, {})", x, literal)

    def search(self, x, pattern: str):
        return self._call("regexp_matches({}, {})", x, pattern)

    def full_match(self, x, pattern: str):
        return self._call("regexp_full_match({}, {})", x, pattern)

    def replace(self, x, pattern: str, replacement: str):
        return self._call("regexp_replace({}, {}, {}, 'g')", x, pattern, replacement)

    def extract(self, x, pattern: str, names: tuple[str, ...]) -> dict:
        found = self.let("groups", self._call(
            "regexp_extract({}, {}, [" + ", ".join(sql_literal(n) for n in names) + "])", x, pattern))
        return {name: Sql(f"coalesce({found.text}.{_quote(name)}, '')", found.level) for name in names}

    def left(self, x, count: int):
        return self._call("left({}, " + str(int(count)) + ")", x)

    # -- numbers
    def to_float(self, x, valid):
        return self._call("(CASE WHEN {1} THEN TRY_CAST({0} AS DOUBLE) END)", x, valid)

    def to_int(self, x, valid):
        return self._call("(CASE WHEN {1} THEN TRY_CAST({0} AS BIGINT) END)", x, valid)

    def is_finite(self, x):
        return self._call("coalesce(isfinite({}), false)", x)

    def add(self, a, b):
        return self._call("({} + {})", a, b)

    def sub(self, a, b):
        return self._call("({} - {})", a, b)

    def mul(self, a, b):
        return self._call("({} * {})", a, b)

    def div_int(self, a, b):
        return self._call("({} // {})", a, b)

    def floor(self, x):
        return self._call("floor({})", x)

    def float_to_int(self, x):
        return self._call("CAST({} AS BIGINT)", x)

    def neg(self, x):
        return self._call("(-{})", x)

    def ln(self, x):
        return self._call("ln({})", x)

    def iso_micros(self, text, valid):
        return self._call("(CASE WHEN {1} THEN epoch_us(date_trunc('second', TRY_CAST({0} AS TIMESTAMP))) END)",
                          text, valid)

    # -- comparisons and logic
    def eq(self, a, b):
        return self._call("({} = {})", a, b)

    def ne(self, a, b):
        return self._call("({} <> {})", a, b)

    def lt(self, a, b):
        return self._call("({} < {})", a, b)

    def le(self, a, b):
        return self._call("({} <= {})", a, b)

    def gt(self, a, b):
        return self._call("({} > {})", a, b)

    def ge(self, a, b):
        return self._call("({} >= {})", a, b)

    def and_(self, *conditions):
        return self._call("(" + " AND ".join("{}" for _ in conditions) + ")", *conditions)

    def or_(self, *conditions):
        return self._call("(" + " OR ".join("{}" for _ in conditions) + ")", *conditions)

    def not_(self, condition):
        return self._call("(NOT {})", condition)

    def is_null(self, x):
        return self._call("({} IS NULL)", x)

    def fill_null(self, x, value):
        return self._call("coalesce({}, {})", x, value)

    def truth(self, condition):
        return self._call("coalesce({}, false)", condition)

    def if_else(self, condition, then, otherwise):
        return self._call("(CASE WHEN {} THEN {} ELSE {} END)", condition, then, otherwise)

    def case(self, choices: list[tuple], default):
        values = [v for pair in choices for v in pair] + [default]
        template = "(CASE " + " ".join("WHEN {} THEN {}" for _ in choices) + " ELSE {} END)"
        return self._call(template, *values)

    def is_in(self, x, values: tuple):
        return self._call("({} IN (" + ", ".join(sql_literal(v) for v in values) + "))", x)

    def index_in(self, x, values: tuple):
        listed = "[" + ", ".join(sql_literal(v) for v in values) + "]"
        return self._call("CAST(list_position(" + listed + ", {}) - 1 AS BIGINT)", x)

    # -- structure
    def let(self, name: str, x):
        x = _sql(x)
        text = x.text
        level = x.level
        if self._guard is not None:
            text = f"(CASE WHEN {self._guard.text} THEN {text} END)"
            level = max(level, self._guard.level)
        unique = self._layers.add(level + 1, name, text)
        return Sql(_quote(unique), level + 1)

    def per_distinct(self, x, rule: Callable):
        return rule(self, x)

    def branch(self, settled, fast: dict, careful: Callable) -> dict:
        settled = self.let("settled", self.truth(settled))
        guard = self.not_(settled) if self._guard is None else self.and_(self._guard, self.not_(settled))
        inner = SqlOps(_layers=self._layers, _guard=guard)
        slow = careful(inner, lambda x: x)
        return {key: self.let(key, self.if_else(settled, value, slow[key])) for key, value in fast.items()}

    @staticmethod
    def full_column(value, n: int = 0):
        return _sql(value)


_SQL_TYPES = {"float": "DOUBLE", "int": "BIGINT", "text": "VARCHAR", "bool": "BOOLEAN"}


def _re2_class(characters: str) -> str:
    """An RE2 character class matching exactly ``characters`` (each written as \\x{...})."""
    return "[" + "".join(f"\\x{{{ord(c):x}}}" for c in characters) + "]"
