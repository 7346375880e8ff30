"""Every cleaning rule, limit and vocabulary, in one place that every engine applies.

In: nothing (constants and rule functions). Out: what the pandas reader
(:mod:`forecasting.io.clean`), the dask engine (the same code, per partition) and the duckdb
engine (the same rules turned into SQL) need to read an order export the same way:

* limits (file size, columns, cell length, what counts as an implausible amount or date);
* vocabularies (header words per column role, status words, currency codes and symbols,
  placeholders, tax words, month names);
* the reason codes of rows left out and the codes of rows noted, with their plain words;
* the rules themselves, each a function written once against the operations of
  :mod:`forecasting.io.backends` (whole Arrow columns, or duckdb SQL):
  :func:`read_customer`, :func:`classify_status`, :func:`read_amount`, :func:`read_date`,
  :func:`row_reason`, :func:`order_verdict` and :func:`outside_usual_range`;
* the whole-file decisions and their refusals (decimal mark, date order, currencies, a
  column whose values mostly cannot be read, no usable orders), so that every engine
  refuses a file with the same words.

A rule reads one cell at a time (vectorised over a column), except the few that need the
whole file: the decimal mark and the date order (settled by the values that can only be
read one way), several currencies, the "most values unreadable" refusal, and the amount
range of :func:`outside_usual_range` (the shop's own median order). Engines gather the
numbers those need and call the functions here to decide.

Row reasons are applied in the order of :data:`RULE_ORDER`: the first that applies gives
the reason. The account lists implausible values first (:data:`REASONS` is in that order).
"""

from __future__ import annotations

import math
import re
from datetime import date, datetime, timedelta, timezone

from ..errors import OrderDataError

# ---------------------------------------------------------------------------
# Limits

MAX_FILE_BYTES = 2_000_000_000
MAX_COLUMNS = 1_000
MAX_FIELD_CHARS = 100_000
# A column is the wrong one, not a column of bad rows, when more than this share of at least
# this many values cannot be read (a rule of thumb of ours).
UNREADABLE_MIN_VALUES = 5
UNREADABLE_SHARE = 0.5
# Rows searched for the header below title lines.
HEADER_SEARCH_ROWS = 30

# Dates: readable from 1900 to 2199; plausible from 1990-01-01 (before online order exports
# existed; our own choice) to the day after today (a time zone ahead).
FIRST_READABLE_YEAR = 1900
LAST_READABLE_YEAR = 2199
EARLIEST_PLAUSIBLE_DATE = date(1990, 1, 1)
FUTURE_DAYS_ALLOWED = 1

# Amounts. An order is implausible when its value is more than AMOUNT_RANGE_FACTOR times above
# or below the shop's median order, or more than AMOUNT_RANGE_SPREADS robust standard
# deviations away on the log scale, whichever is wider (a typo thousands of times the usual
# order; a shop's genuine bulk orders are tens of times its usual). The test needs at least
# AMOUNT_RANGE_MIN_ORDERS orders. An order above LARGEST_AMOUNT is no order any shop took
# and is always left out (it would break the statistics); one below half a cent is an order of
# nothing (what is left of 0.1 + 0.2 - 0.3 in floating point).
AMOUNT_RANGE_FACTOR = 1000.0
AMOUNT_RANGE_SPREADS = 8.0
AMOUNT_RANGE_MIN_ORDERS = 5
MAD_TO_SD = 1.4826  # a normal distribution's standard deviation per median absolute deviation
NOTHING_BELOW = 0.005
LARGEST_AMOUNT = 1e12

# Exactly the characters Python's str.strip() removes, written out (finding them among all
# code points costs 40 ms at every start); a test checks the list against str.isspace.
WHITESPACE = ("\t\n\x0b\x0c\r\x1c\x1d\x1e\x1f \x85\xa0\u1680\u2000\u2001\u2002\u2003\u2004\u2005"
              "\u2006\u2007\u2008\u2009\u200a\u2028\u2029\u202f\u205f\u3000")
# Characters that show as nothing: zero-width spaces and joiners, direction marks, the word
# joiner, the byte order mark, the soft hyphen. Removed from customer ids.
INVISIBLE = "\u00ad\u200b\u200c\u200d\u200e\u200f\u202a\u202b\u202c\u202d\u202e\u2060\u2061\u2062\u2063" \
            "\u2064\u2066\u2067\u2068\u2069\ufeff"
# Control characters no order export holds: a row with one is damaged (NUL bytes, mostly).
DAMAGE_PATTERN = "[\\x{0}-\\x{8}\\x{e}-\\x{1b}\\x{7f}]"
DAMAGED_BYTES = bytes(list(range(0, 9)) + list(range(14, 28)) + [127])

# ---------------------------------------------------------------------------
# Reason codes

# Rows left out, in the order the rules apply (the first that applies gives the reason).
RULE_ORDER = (
    "blank_row", "malformed_row", "unclosed_quote", "oversized_field", "damaged_row", "duplicate_row",
    "formula_without_value", "missing_customer", "test_order", "cancelled_order", "unpaid_order",
    "other_currency", "missing_amount", "bad_amount", "missing_date", "bad_date", "implausible_date",
    "unmatched_refund", "refunded_order", "refunded_in_full", "zero_amount", "implausible_amount",
)

_WORDS = {
    "implausible_amount": "the order's amount is far outside this shop's usual range (a likely typo)",
    "implausible_date": "the date is in the future or before 1990 (a likely typo)",
    "blank_row": "the row is empty",
    "malformed_row": "the row does not split into the header's columns (too many or too few fields)",
    "unclosed_quote": "a quote opened in this row is never closed; the rows after it were read on",
    "oversized_field": f"a cell is longer than {MAX_FIELD_CHARS:,} characters",
    "damaged_row": "the row holds a NUL or another control character (the file is damaged here)",
    "duplicate_row": "an exact copy of an earlier row",
    "formula_without_value": "a cell holds a spreadsheet formula whose value was not saved",
    "missing_customer": "no customer id",
    "test_order": "marked as a test order",
    "cancelled_order": "the order was cancelled or deleted",
    "unpaid_order": "the status says the order was not paid or not finished (pending, failed, draft, on hold)",
    "other_currency": "in another currency than the one chosen",
    "missing_amount": "no order amount (the cell is empty or holds a placeholder such as n/a)",
    "bad_amount": "the amount could not be read as money",
    "missing_date": "no order date (the cell is empty or holds a placeholder)",
    "bad_date": "the date could not be read as a date",
    "unmatched_refund": "a refund (a negative amount) with no purchase in the file to net against",
    "refunded_order": "the order's status says it was refunded, and no purchase line of it is left",
    "refunded_in_full": "refunds net the order to zero or less",
    "zero_amount": "the order's amount is zero (nothing was paid)",
}
# The account shows implausible values first, then the other reasons in rule order.
REASONS = {code: _WORDS[code] for code in ("implausible_amount", "implausible_date")
           + tuple(c for c in RULE_ORDER if not c.startswith("implausible"))}

# Rows used, with something to say about them.
NOTES = {
    "implausible_kept": "an implausible amount or date, kept as asked",
    "unpaid_kept": "the status says unpaid or unfinished, kept as asked",
    "merged_customer_id": "the customer's e-mail id is written another way on an earlier row (capitals or "
                          "invisible characters); read as the same customer",
    "excel_serial_date": "the date was an Excel day number (such as 45660), read as that day",
    "unrecognised_status": "the status is not a word the reader knows; the row was used as a paid order",
    "continuation_line": "a further line of an order whose total is counted on its first line",
}

# Small integer codes (0 = used) for engines that keep one byte per row.
CODES = ("",) + RULE_ORDER
CODE = {name: i for i, name in enumerate(CODES)}

# Note bits (one byte per row): the first four are a row's own, the last two its order's.
NOTE_BITS = {"excel_serial_date": 1, "unrecognised_status": 2, "unpaid_kept": 4, "implausible_kept": 8,
             "continuation_line": 16, "merged_customer_id": 32}

# Status classes.
STATUS_NONE, STATUS_PAID, STATUS_UNKNOWN, STATUS_REFUND, STATUS_TEST, STATUS_CANCELLED, STATUS_UNPAID = range(7)

# Amount and date kinds.
KIND_OK, KIND_EMPTY, KIND_PLACEHOLDER, KIND_BAD, KIND_SERIAL = range(5)

# Evidence a value gives about the whole column (bits of one byte per row).
HINT_DECIMAL_COMMA = 1  # an amount readable only with a decimal comma (12,50 or 1.234,50)
HINT_DECIMAL_POINT = 2  # an amount readable only with a decimal point (12.50 or 1,234.50)
HINT_DAY_FIRST = 4  # a date like 25/04/2025
HINT_MONTH_FIRST = 8  # a date like 04/25/2025
HINT_SLASHED = 16  # a date like 03/04/2025, whose reading depends on the date order

# ---------------------------------------------------------------------------
# Vocabularies

ROLES = ("customer", "date", "value", "order_id", "status", "currency", "segment")
REQUIRED_ROLES = ("customer", "date", "value")

# Header words for each role, best first. Headers are compared lower-case with everything but
# letters and digits removed ("Order Date" -> "orderdate").
HEADER_NAMES = {
    "customer": ["customerid", "customer", "clientid", "client", "customernumber", "customerno",
                 "customeremail", "email", "buyer", "buyerid", "userid", "accountid", "memberid",
                 "shopper", "kunde", "kundennummer", "cliente", "billingemail", "emailbilling", "emailaddress",
                 "customeremailaddress", "billingemailaddress", "buyeremail", "buyeruserid", "customeruser",
                 "fromemailaddress", "clientemail"],
    "date": ["orderdate", "date", "createdat", "created", "orderedat", "purchasedate", "invoicedate",
             "orderdatetime", "timestamp", "datetime", "processedat", "paidat", "saledate", "transactiondate",
             "datecreated", "dateordered", "dateofpurchase", "orderplacedat", "datum", "fecha"],
    "value": ["ordervalue", "ordertotal", "total", "amount", "linetotal", "lineamount", "value",
              "totalprice", "grandtotal", "netsales", "sales", "revenue", "subtotal", "price",
              "totalamount", "orderamount", "ordertotalamount", "gross", "net", "betrag", "importe", "montant"],
    "order_id": ["orderid", "ordernumber", "orderno", "order", "invoice", "invoiceid", "invoicenumber",
                 "invoiceno", "transactionid", "receipt", "receiptid", "name", "bestellnummer"],
    "status": ["orderstatus", "status", "financialstatus", "paymentstatus", "state", "orderstate"],
    "currency": ["currency", "currencycode", "ordercurrency"],
    "segment": ["segment", "channel", "saleschannel", "region", "source", "store", "market", "customertype"],
}
# Amount headers that belong to one line of an order, and ones that hold the whole order's
# total (repeated on each of its lines, or written on its first line only).
LINE_AMOUNT_HEADERS = ("linetotal", "lineamount", "linesubtotal", "linevalue", "lineitemtotal", "itemtotal",
                       "linenet", "linegross", "linetotalinctax", "lineitemamount")
ORDER_TOTAL_HEADERS = ("ordertotal", "total", "grandtotal", "ordervalue", "orderamount", "totalamount",
                       "ordertotalamount", "ordergrandtotal")
# Orders with several lines needed before a repeated amount is taken for an order total
# when the header does not say so.
ORDER_TOTAL_MIN_ORDERS = 5

# Status words, matched at the start of a word of the status lower-cased with every
# character but a-z turned into a space ("wc-on-hold" -> " wc on hold "): platform prefixes
# (wc-), capitals and phrases ("Cancelled by customer") do not matter. The first class that
# matches wins, in this order.
STATUS_PATTERNS = (
    (STATUS_TEST, r"\b(?:test|testing|sandbox|dummy)"),
    (STATUS_CANCELLED, r"\b(?:cancel|void|trash|deleted|reject|annul|storn|cancelad|anulad)"),
    (STATUS_UNPAID, r"\b(?:pending|fail|draft|hold|unpaid|not paid|nonpaid|awaiting pay|payment due|abandon|"
                    r"expire|declin|incomplete|unfinished|quote|pendiente|ausstehend|en attente|impaye)"),
    (STATUS_PAID, r"\bpartial\w* refund|\brefunded partial"),  # a partial refund: the order stands
    (STATUS_REFUND, r"\b(?:refund|return|chargeback|charged back|reembols|erstatt|rembours|rueckerstatt)"),
    (STATUS_PAID, r"\b(?:paid|complete|process|ship|deliver|fulfil|closed|success|settled|captured|authori|"
                  r"invoiced|confirmed|approved|accepted|done|open|active|sent|dispatch|collected|picked up|"
                  r"bezahlt|abgeschlossen|versendet|pagado|completad|paye|termine)"),
)

# ISO 4217 currency codes in use (written from the standard's list as we know it; a test checks
# it against the codes of the C library's locale data where that is installed), and common
# other names for a few of them.
CURRENCY_CODES = tuple((
    "AED AFN ALL AMD ANG AOA ARS AUD AWG AZN BAM BBD BDT BGN BHD BIF BMD BND BOB BRL BSD BTN BWP BYN BZD "
    "CAD CDF CHF CLP CNY COP CRC CUC CUP CVE CZK DJF DKK DOP DZD EGP ERN ETB EUR FJD FKP GBP GEL GHS GIP "
    "GMD GNF GTQ GYD HKD HNL HRK HTG HUF IDR ILS INR IQD IRR ISK JMD JOD JPY KES KGS KHR KMF KPW KRW KWD "
    "KYD KZT LAK LBP LKR LRD LSL LYD MAD MDL MGA MKD MMK MNT MOP MRU MUR MVR MWK MXN MYR MZN NAD NGN NIO "
    "NOK NPR NZD OMR PAB PEN PGK PHP PKR PLN PYG QAR RON RSD RUB RWF SAR SBD SCR SDG SEK SGD SHP SLE SLL "
    "SOS SRD SSP STN SVC SYP SZL THB TJS TMT TND TOP TRY TTD TWD TZS UAH UGX USD UYU UZS VES VND VUV WST "
    "XAF XCD XOF XPF YER ZAR ZMW ZWG ZWL").split())
CURRENCY_ALIASES = {"RMB": "CNY", "NTD": "TWD"}
# Currency symbols, longest first: "C$" and "A$" are not dollars of the United States.
# "$" alone is read as USD and "kr" as SEK (both are used by several countries: a file that
# mixes them needs a currency column or the currency option).
CURRENCY_SYMBOLS = {
    "US$": "USD", "CA$": "CAD", "C$": "CAD", "AU$": "AUD", "A$": "AUD", "NZ$": "NZD", "HK$": "HKD",
    "S$": "SGD", "R$": "BRL", "MX$": "MXN", "NT$": "TWD", "$": "USD", "€": "EUR", "£": "GBP", "¥": "JPY",
    "₹": "INR", "₩": "KRW", "₽": "RUB", "₺": "TRY", "₪": "ILS", "₫": "VND", "₱": "PHP", "฿": "THB",
    "zł": "PLN", "Kč": "CZK", "kr": "SEK",
}
# Words next to an amount that say nothing about its value ("£12.00 inc VAT").
TAX_WORDS = ("inc", "incl", "including", "inclusive", "excl", "excluding", "exclusive", "ex", "plus", "vat",
             "tax", "taxes", "gst", "hst", "pst", "mwst", "ust", "tva", "iva", "btw", "moms")
# Signs that make an amount negative: hyphen-minus, minus sign (U+2212), figure dash, en
# dash, small and full-width hyphen-minus.
MINUS_SIGNS = "-\u2212\u2012\u2013\ufe63\uff0d"
MONTHS = ("jan", "feb", "mar", "apr", "may", "jun", "jul", "aug", "sep", "oct", "nov", "dec")
DATE_ORDERS = ("day-first", "month-first")
DECIMAL_MARKS = (".", ",")

# ---------------------------------------------------------------------------
# Patterns (RE2: the same for Arrow and duckdb)


def _char_class(characters: str) -> str:
    return "[" + "".join(f"\\x{{{ord(c):x}}}" for c in characters) + "]"


_WS = _char_class(WHITESPACE)
_MINUS = _char_class(MINUS_SIGNS)
_GROUP_SPACES = "\\x{20}\\x{a0}\\x{202f}\\x{2009}'\\x{2019}"  # space, no-break spaces, thin space, apostrophes
_CODES_ALTERNATION = "|".join(CURRENCY_CODES + tuple(CURRENCY_ALIASES))
_SYMBOLS_ALTERNATION = "|".join(re.escape(s) for s in CURRENCY_SYMBOLS)
_TAX_ALTERNATION = "|".join(sorted(TAX_WORDS, key=len, reverse=True))

# A plain number: what a cast reads the same way in every engine.
PLAIN_NUMBER = r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?"
PLAIN_WHOLE_NUMBER = r"[+-]?[0-9]+"
# An ISO date with an optional time of day (hours 00-23, at most nanoseconds).
ISO_DATE = (r"[0-9]{4}-[0-9]{2}-[0-9]{2}"
            r"(?:[ T](?:[01][0-9]|2[0-3]):[0-5][0-9](?::[0-5][0-9](?:\.[0-9]{1,9})?)?)?")

_NEGATIVE = rf"^\(.*\)$|^[^0-9]*{_MINUS}|{_MINUS}$"
_CODE_IN_AMOUNT = rf"(?:^|[^A-Z])(?P<code>{_CODES_ALTERNATION})(?:[^A-Z]|$)"
_SYMBOL_IN_AMOUNT = rf"(?P<symbol>{_SYMBOLS_ALTERNATION})"
_POINT_AMOUNT = (rf"[0-9]{{1,3}}(?:[,{_GROUP_SPACES}][0-9]{{3}})+(?:\.[0-9]*)?|[0-9]+(?:\.[0-9]*)?|\.[0-9]+"
                 r"|[0-9]{1,2}(?:,[0-9]{2})+,[0-9]{3}(?:\.[0-9]*)?")  # the last: 1,23,456.00 (Indian grouping)
_COMMA_AMOUNT = rf"[0-9]{{1,3}}(?:[.{_GROUP_SPACES}][0-9]{{3}})+(?:,[0-9]*)?|[0-9]+(?:,[0-9]*)?|,[0-9]+"
_COMMA_EVIDENCE = r"[0-9]{1,3}(?:\.[0-9]{3})+,[0-9]+|[0-9]+,[0-9]{1,2}|[0-9]+,[0-9]{4,}"
_POINT_EVIDENCE = r"[0-9]{1,3}(?:,[0-9]{3})+\.[0-9]+|[0-9]+\.[0-9]{1,2}|[0-9]+\.[0-9]{4,}"

_TIME = (r"(?:[T\x{20},]+(?P<hh>[0-9]{1,2}):(?P<mi>[0-9]{2})(?::(?P<ss>[0-9]{2})(?:[.,][0-9]+)?)?"
         r"\x{20}*(?P<ap>[AaPp]?)\.?(?:[Mm]\.?)?)?")
_WEEKDAY = r"(?i)^(?:mon|tue|wed|thu|fri|sat|sun)[a-z]*\.?,?\x{20}+"
# A time-zone offset or name after a time: the date is kept as written (local time).
_OFFSET = r"(?i)^(.*[0-9]:[0-9]{2}(?::[0-9]{2}(?:[.,][0-9]+)?)?(?:\x{20}*[ap]\.?m\.?)?)\x{20}*(?:z|utc|gmt|[+-][0-9]{2}(?::?[0-9]{2})?)$"
_YMD = rf"^(?P<y>[0-9]{{4}})[-/.](?P<m>[0-9]{{1,2}})[-/.](?P<d>[0-9]{{1,2}}){_TIME}$"
_NUMERIC = rf"^(?P<a>[0-9]{{1,2}})[-/.](?P<b>[0-9]{{1,2}})[-/.](?P<y>[0-9]{{4}}|[0-9]{{2}}){_TIME}$"
_DAY_NAME = (rf"^(?P<d>[0-9]{{1,2}})(?:st|nd|rd|th)?[\x{{20}}\-]*(?P<mon>[A-Za-z]{{3,9}})\.?,?[\x{{20}}\-]*"
             rf"(?P<y>[0-9]{{4}}|[0-9]{{2}}){_TIME}$")
_NAME_DAY = rf"^(?P<mon>[A-Za-z]{{3,9}})\.?\x{{20}}+(?P<d>[0-9]{{1,2}})(?:st|nd|rd|th)?,?\x{{20}}+(?P<y>[0-9]{{4}}){_TIME}$"
_MONTH_WORD = (r"jan(?:uary)?|feb(?:ruary)?|mar(?:ch)?|apr(?:il)?|may|june?|july?|aug(?:ust)?"
               r"|sep(?:t(?:ember)?)?|oct(?:ober)?|nov(?:ember)?|dec(?:ember)?")
_SERIAL = r"[0-9]{5}(?:\.[0-9]+)?"
_COMPACT = r"^(?P<y>(?:19|20|21)[0-9]{2})(?P<m>[01][0-9])(?P<d>[0-3][0-9])$"  # 20250314
_TIME_NAMES = ("hh", "mi", "ss", "ap")
_EXCEL_EPOCH_DAYS = 25569  # Excel's day number of 1970-01-01 (day 1 = 1900-01-01, with its 1900-02-29)
_MICROS = 1_000_000
_FIRST_READABLE_MICROS = (date(FIRST_READABLE_YEAR, 1, 1) - date(1970, 1, 1)).days * 86_400 * _MICROS
_END_READABLE_MICROS = (date(LAST_READABLE_YEAR + 1, 1, 1) - date(1970, 1, 1)).days * 86_400 * _MICROS

# ---------------------------------------------------------------------------
# Rules on cells


def read_customer(ops, cell) -> dict:
    """The customer id of a cell: stripped, invisible characters removed, e-mail ids in lower case.

    Returns ``customer`` (text, '' when missing) and ``changed`` (the id as written differs).
    E-mail addresses are compared without regard to capitals (common practice: mail systems
    treat them so), and a zero-width space inside an id does not make another customer.
    """
    stripped = ops.let("customer_text", ops.strip(cell, WHITESPACE))
    # Plain ASCII without '@' is the id as it stands (almost every row, tested cheaply).
    settled = ops.and_(ops.is_ascii(stripped), ops.not_(ops.contains(stripped, "@")))

    def careful(ops, take):
        text = take(stripped)
        visible = ops.strip(ops.replace(text, _char_class(INVISIBLE), ""), WHITESPACE)
        customer = ops.if_else(ops.contains(visible, "@"), ops.lower(visible), visible)
        return {"customer": customer, "changed": ops.ne(customer, text)}

    return ops.branch(settled, {"customer": stripped, "changed": False}, careful)


def status_words(ops, cell):
    """A status as words: lower case, every character but a-z a space, a space at each end."""
    return ops.replace(ops.replace(ops.lower(cell), "[^a-z]+", " "), "^ *(.*?) *$", " \\1 ")


def classify_status(ops, cell):
    """The status class of a status cell (``STATUS_*``); '' is ``STATUS_NONE``."""

    def rule(ops, values):
        words = ops.let("status_words", status_words(ops, values))
        empty = ops.eq(ops.strip(values, WHITESPACE), "")
        return ops.case([(empty, STATUS_NONE)] + [(ops.search(words, pattern), kind)
                                                  for kind, pattern in STATUS_PATTERNS], STATUS_UNKNOWN)

    return ops.per_distinct(cell, rule)


def currency_of_cell(ops, cell):
    """The ISO code a currency column's cell names: a code (any case), a symbol, or the cell as written.

    Each distinct cell is read once (an export names one currency or a few, on every row)."""
    return ops.per_distinct(cell, _currency_of_text)


def _currency_of_text(ops, cell):
    text = ops.upper(ops.strip(cell, WHITESPACE))
    alias = _pick(ops, ops.index_in(text, tuple(CURRENCY_ALIASES)), tuple(CURRENCY_ALIASES.values()))
    symbol = _pick(ops, ops.index_in(ops.strip(cell, WHITESPACE), tuple(CURRENCY_SYMBOLS)),
                   tuple(CURRENCY_SYMBOLS.values()))
    return ops.case([(ops.ne(alias, ""), alias), (ops.ne(symbol, ""), symbol)], text)


def _pick(ops, index, values: tuple):
    """``values[index]``, or '' where the index is null."""
    return ops.case([(ops.eq(index, i), v) for i, v in enumerate(values)], "")


def read_amount(ops, cell, *, decimal: str = ".") -> dict:
    """An amount cell read as money.

    Returns ``amount`` (float, null unless ``kind`` is ``KIND_OK``), ``kind`` (``KIND_OK``,
    ``KIND_EMPTY``, ``KIND_PLACEHOLDER`` for text without a digit such as ``n/a``, ``TBD`` or
    ``NaN``, ``KIND_BAD``), ``currency`` (the ISO code the amount names, '' for none) and
    ``hints`` (what the value says about the column's decimal mark).

    Reads ``1234.5``, ``$1,234.50``, ``1.234,50 €``, ``USD 12``, ``C$12``, ``£12.00 inc VAT``,
    ``1'234.50``, ``1 234,50``, ``1,23,456.00``; negatives as ``(12.00)``, ``-12``, ``12-``,
    ``-$12``, ``$-12`` or with the minus sign U+2212. ``decimal`` is the column's decimal mark
    (see :func:`decide_decimal`): with ``"."`` a comma groups thousands, with ``","`` a point
    does. A grouping that is not in threes (``12,5`` read with a decimal point) is not money.

    Each distinct cell is read once (a shop charges the same prices again and again).
    """
    return ops.per_distinct(cell, lambda ops, values: _read_amount(ops, values, decimal=decimal))


def _read_amount(ops, cell, *, decimal: str) -> dict:
    text = ops.let("amount_text", ops.strip(cell, WHITESPACE))
    plain = ops.full_match(text, PLAIN_NUMBER if decimal == "." else PLAIN_WHOLE_NUMBER)
    number = ops.let("plain_amount", ops.to_float(text, plain))
    finite = ops.is_finite(number)
    empty = ops.eq(text, "")
    fast = {"amount": ops.if_else(finite, number, ops.null("float")),
            "kind": ops.case([(empty, KIND_EMPTY), (finite, KIND_OK)], KIND_BAD),
            "currency": "", "hints": 0}

    def careful(ops, take):
        t = take(text)
        has_digit = ops.search(t, "[0-9]")
        negative = ops.search(t, _NEGATIVE)
        code = ops.extract(ops.upper(t), _CODE_IN_AMOUNT, ("code",))["code"]
        code = ops.if_else(ops.is_in(code, tuple(CURRENCY_ALIASES)),
                           _pick(ops, ops.index_in(code, tuple(CURRENCY_ALIASES)), tuple(CURRENCY_ALIASES.values())),
                           code)
        symbol = ops.extract(t, _SYMBOL_IN_AMOUNT, ("symbol",))["symbol"]
        symbol_code = _pick(ops, ops.index_in(symbol, tuple(CURRENCY_SYMBOLS)), tuple(CURRENCY_SYMBOLS.values()))
        currency = ops.case([(ops.not_(has_digit), ""), (ops.ne(code, ""), code)], symbol_code)
        core = ops.replace(t, rf"[()+]|{_MINUS}", "")
        core = ops.replace(core, rf"(?i)(^|[^a-z])(?:{_CODES_ALTERNATION})([^a-z]|$)", "\\1\\2")
        core = ops.replace(core, _SYMBOLS_ALTERNATION, "")
        core = ops.replace(core, rf"(?i)(^|[^a-z])(?:(?:{_TAX_ALTERNATION})\.?(?:{_WS}+|$))+", "\\1")
        core = ops.let("amount_core", ops.strip(core, WHITESPACE))
        if decimal == ".":
            valid = ops.full_match(core, _POINT_AMOUNT)
            digits = ops.replace(core, "[^0-9.]", "")
        else:
            valid = ops.full_match(core, _COMMA_AMOUNT)
            digits = ops.replace(ops.replace(core, "[^0-9,]", ""), ",", ".")
        value = ops.let("careful_amount", ops.to_float(digits, valid))
        good = ops.and_(has_digit, ops.is_finite(value))
        signed = ops.if_else(negative, ops.neg(value), value)
        evidence = ops.replace(core, f"[{_GROUP_SPACES}]", "")
        hints = ops.add(ops.if_else(ops.full_match(evidence, _COMMA_EVIDENCE), HINT_DECIMAL_COMMA, 0),
                        ops.if_else(ops.full_match(evidence, _POINT_EVIDENCE), HINT_DECIMAL_POINT, 0))
        return {"amount": ops.if_else(good, signed, ops.null("float")),
                "kind": ops.case([(ops.not_(has_digit), KIND_PLACEHOLDER), (good, KIND_OK)], KIND_BAD),
                "currency": currency,
                "hints": ops.if_else(has_digit, hints, 0)}

    return ops.branch(ops.or_(empty, ops.and_(plain, finite)), fast, careful)


def _mod(ops, a, b):
    return ops.sub(a, ops.mul(ops.div_int(a, b), b))


def civil_micros(ops, year, month, day, hour, minute, second):
    """Microseconds since 1970-01-01 of a calendar date and time, null where it is no such day.

    Days from the civil calendar by H. Hinnant's algorithm ("chrono-compatible low-level date
    algorithms", ``days_from_civil``), in integer arithmetic that both backends do exactly.
    """
    leap = ops.or_(ops.and_(ops.eq(_mod(ops, year, 4), 0), ops.ne(_mod(ops, year, 100), 0)),
                   ops.eq(_mod(ops, year, 400), 0))
    month_days = ops.case([(ops.is_in(month, (4, 6, 9, 11)), 30),
                           (ops.eq(month, 2), ops.if_else(leap, 29, 28))], 31)
    valid = ops.and_(ops.ge(year, FIRST_READABLE_YEAR), ops.le(year, LAST_READABLE_YEAR),
                     ops.ge(month, 1), ops.le(month, 12), ops.ge(day, 1), ops.le(day, month_days),
                     ops.ge(hour, 0), ops.le(hour, 23), ops.ge(minute, 0), ops.le(minute, 59),
                     ops.ge(second, 0), ops.le(second, 59))
    y = ops.sub(year, ops.if_else(ops.le(month, 2), 1, 0))
    era = ops.div_int(y, 400)  # years from 1899 on: never negative
    year_of_era = ops.sub(y, ops.mul(era, 400))
    shifted_month = ops.if_else(ops.gt(month, 2), ops.sub(month, 3), ops.add(month, 9))
    day_of_year = ops.add(ops.div_int(ops.add(ops.mul(153, shifted_month), 2), 5), ops.sub(day, 1))
    day_of_era = ops.add(ops.add(ops.mul(year_of_era, 365), ops.div_int(year_of_era, 4)),
                         ops.sub(day_of_year, ops.div_int(year_of_era, 100)))
    days = ops.sub(ops.add(ops.mul(era, 146097), day_of_era), 719468)
    seconds = ops.add(ops.mul(ops.add(ops.mul(ops.add(ops.mul(days, 24), hour), 60), minute), 60), second)
    return ops.if_else(valid, ops.mul(seconds, _MICROS), ops.null("int"))


def _number(ops, text):
    return ops.to_int(text, ops.full_match(text, "[0-9]{1,4}"))


def read_date(ops, cell, *, date_order: str = "day-first") -> dict:
    """A date cell read as a local date and time, to the second.

    Returns ``micros`` (microseconds since 1970-01-01 of the date as written, null unless
    ``kind`` is ``KIND_OK`` or ``KIND_SERIAL``), ``kind`` (``KIND_EMPTY``, ``KIND_PLACEHOLDER``
    for text without a digit, ``KIND_BAD``, ``KIND_SERIAL`` for an Excel day number such as
    ``45660``) and ``hints`` (what the value says about the column's date order).

    Reads ISO dates (``2025-03-14``, ``2025-03-14 10:22``, ``2025-03-14T10:22:05.5``),
    ``2025/03/14``, ``20250314``, ``14/03/2025``, ``03.14.25`` (day or month first as ``date_order`` says, see
    :func:`decide_date_order`), ``14 Mar 2025``, ``14-Mar-25``, ``March 14, 2025``, ``Fri, 14 Mar
    2025``, times with AM/PM, and Excel day numbers. A time-zone offset or name after a time
    (``+01:00``, ``-0500``, ``Z``, ``UTC``) is dropped: the date stays the local date written,
    as the shop saw it. Two-digit years are 2000-2099. Years outside 1900-2199 are not read.

    Each distinct cell is read once (a few years of orders fall on a few hundred days).
    """
    return ops.per_distinct(cell, lambda ops, values: _read_date(ops, values, date_order=date_order))


def _read_date(ops, cell, *, date_order: str) -> dict:
    text = ops.let("date_text", ops.strip(cell, WHITESPACE))
    empty = ops.eq(text, "")
    iso = ops.full_match(text, ISO_DATE)
    fast_micros = ops.let("iso_micros", ops.iso_micros(text, iso))
    readable = ops.and_(ops.ge(fast_micros, _FIRST_READABLE_MICROS), ops.lt(fast_micros, _END_READABLE_MICROS))
    fast = {"micros": fast_micros, "kind": ops.if_else(empty, KIND_EMPTY, KIND_OK), "hints": 0}

    def careful(ops, take):
        t = ops.replace(ops.replace(take(text), _WEEKDAY, ""), _OFFSET, "\\1")
        t = ops.let("date_core", t)
        ymd = ops.extract(t, _YMD, ("y", "m", "d") + _TIME_NAMES)
        numeric = ops.extract(t, _NUMERIC, ("a", "b", "y") + _TIME_NAMES)
        day_name = ops.extract(t, _DAY_NAME, ("d", "mon", "y") + _TIME_NAMES)
        name_day = ops.extract(t, _NAME_DAY, ("mon", "d", "y") + _TIME_NAMES)
        compact = ops.extract(t, _COMPACT, ("y", "m", "d"))
        form = ops.let("date_form", ops.case([(ops.ne(ymd["y"], ""), 1), (ops.ne(numeric["y"], ""), 2),
                                              (ops.ne(day_name["y"], ""), 3), (ops.ne(name_day["y"], ""), 4),
                                              (ops.full_match(t, _SERIAL), 5), (ops.ne(compact["y"], ""), 6)], 0))
        forms = ((1, ymd), (2, numeric), (3, day_name), (4, name_day), (6, compact))

        def part(name):
            return ops.case([(ops.eq(form, k), groups[name]) for k, groups in forms if name in groups], "")

        year = _number(ops, part("y"))
        year = ops.let("year", ops.if_else(ops.lt(year, 100), ops.add(year, 2000), year))
        first, second = _number(ops, numeric["a"]), _number(ops, numeric["b"])
        month_word = ops.lower(part("mon"))
        month_of_word = ops.if_else(ops.full_match(month_word, _MONTH_WORD),
                                    ops.add(ops.index_in(ops.left(month_word, 3), MONTHS), 1), ops.null("int"))
        day_first = date_order != "month-first"
        month = ops.case([(ops.eq(form, 1), _number(ops, ymd["m"])), (ops.eq(form, 6), _number(ops, compact["m"])),
                          (ops.eq(form, 2), second if day_first else first)], month_of_word)
        day = ops.case([(ops.eq(form, 2), first if day_first else second)], _number(ops, part("d")))
        hour_text, minute_text, second_text = part("hh"), part("mi"), part("ss")
        hour = ops.fill_null(_number(ops, hour_text), 0)
        half = ops.lower(part("ap"))
        twelve = ops.and_(ops.ne(half, ""), ops.or_(ops.lt(hour, 1), ops.gt(hour, 12)))
        hour = ops.case([(twelve, 99), (ops.eq(half, "a"), _mod(ops, hour, 12)),
                         (ops.eq(half, "p"), ops.add(_mod(ops, hour, 12), 12))], hour)
        minute = ops.fill_null(_number(ops, minute_text), 0)
        second_ = ops.fill_null(_number(ops, second_text), 0)
        written = civil_micros(ops, year, month, day, hour, minute, second_)
        serial = ops.to_float(t, ops.eq(form, 5))
        whole_days = ops.floor(serial)
        serial_seconds = ops.add(ops.mul(ops.sub(ops.float_to_int(whole_days), _EXCEL_EPOCH_DAYS), 86400),
                                 ops.float_to_int(ops.floor(ops.add(ops.mul(ops.sub(serial, whole_days), 86400.0),
                                                                    0.5))))
        micros = ops.let("careful_micros", ops.case([(ops.eq(form, 5), ops.mul(serial_seconds, _MICROS)),
                                                     (ops.eq(form, 0), ops.null("int"))], written))
        has_digit = ops.search(t, "[0-9]")
        kind = ops.case([(ops.not_(has_digit), KIND_PLACEHOLDER), (ops.is_null(micros), KIND_BAD),
                         (ops.eq(form, 5), KIND_SERIAL)], KIND_OK)
        slashed = ops.eq(form, 2)
        hints = ops.add(ops.add(ops.if_else(slashed, HINT_SLASHED, 0),
                                ops.if_else(ops.and_(slashed, ops.gt(first, 12)), HINT_DAY_FIRST, 0)),
                        ops.if_else(ops.and_(slashed, ops.gt(second, 12)), HINT_MONTH_FIRST, 0))
        return {"micros": micros, "kind": kind, "hints": hints}

    return ops.branch(ops.or_(empty, ops.and_(iso, readable)), fast, careful)


def plausible_dates(today: date | None = None) -> tuple[int, int]:
    """``(first, last)``: microseconds since 1970 of the earliest plausible date and of the first
    moment that is too far in the future (the start of the day after tomorrow)."""
    today = today or datetime.now(timezone.utc).date()
    epoch = date(1970, 1, 1)
    first = (EARLIEST_PLAUSIBLE_DATE - epoch).days * 86_400 * _MICROS
    last = (today + timedelta(days=FUTURE_DAYS_ALLOWED + 1) - epoch).days * 86_400 * _MICROS
    return first, last


def row_reason(ops, row: dict, *, wanted_currency: str | None, keep_unpaid: bool, keep_implausible: bool,
               dates: tuple[int, int]):
    """The reason code (:data:`CODE`, 0 = used so far) of each row, in the order of :data:`RULE_ORDER`.

    ``row`` holds ``blank``, ``too_long``, ``damaged`` (booleans), optionally ``duplicate`` and
    ``formula``, and ``customer`` (or ``no_customer``, whether the id is empty, for an engine that
    read the ids apart), ``status`` (class), ``currency``, the amount's ``amount_kind``, the
    date's ``date_kind`` and ``micros``. Reasons that need several rows (copies, order
    verdicts) are given elsewhere; ``duplicate`` is left out by engines that find copies later
    (they overrule every reason after ``damaged_row`` in the same way).
    """
    first, last = dates
    implausible_date = ops.or_(ops.lt(row["micros"], first), ops.ge(row["micros"], last))
    rules = [(row["blank"], "blank_row"), (row["too_long"], "oversized_field"), (row["damaged"], "damaged_row")]
    if "duplicate" in row:
        rules.append((row["duplicate"], "duplicate_row"))
    if "formula" in row:
        rules.append((row["formula"], "formula_without_value"))
    status = row["status"]
    no_customer = row["no_customer"] if row.get("no_customer") is not None else ops.eq(row["customer"], "")
    rules += [(no_customer, "missing_customer"),
              (ops.eq(status, STATUS_TEST), "test_order"),
              (ops.eq(status, STATUS_CANCELLED), "cancelled_order")]
    if not keep_unpaid:
        rules.append((ops.eq(status, STATUS_UNPAID), "unpaid_order"))
    if wanted_currency:
        rules.append((ops.and_(ops.ne(row["currency"], ""), ops.ne(row["currency"], wanted_currency)),
                      "other_currency"))
    rules += [(ops.is_in(row["amount_kind"], (KIND_EMPTY, KIND_PLACEHOLDER)), "missing_amount"),
              (ops.eq(row["amount_kind"], KIND_BAD), "bad_amount"),
              (ops.is_in(row["date_kind"], (KIND_EMPTY, KIND_PLACEHOLDER)), "missing_date"),
              (ops.eq(row["date_kind"], KIND_BAD), "bad_date")]
    if not keep_implausible:
        rules.append((implausible_date, "implausible_date"))
    return ops.case([(condition, CODE[code]) for condition, code in rules], 0)


def row_notes(ops, row: dict, *, keep_unpaid: bool, keep_implausible: bool, dates: tuple[int, int]):
    """The note bits (:data:`NOTE_BITS`) of each row, for the rows that end up used."""
    first, last = dates
    bits = ops.add(ops.if_else(ops.eq(row["date_kind"], KIND_SERIAL), NOTE_BITS["excel_serial_date"], 0),
                   ops.if_else(ops.eq(row["status"], STATUS_UNKNOWN), NOTE_BITS["unrecognised_status"], 0))
    if keep_unpaid:
        bits = ops.add(bits, ops.if_else(ops.eq(row["status"], STATUS_UNPAID), NOTE_BITS["unpaid_kept"], 0))
    if keep_implausible:
        outside = ops.or_(ops.lt(row["micros"], first), ops.ge(row["micros"], last))
        bits = ops.add(bits, ops.if_else(outside, NOTE_BITS["implausible_kept"], 0))
    return bits


def is_refund(ops, amount, status):
    """A refund line: a negative amount, or a refund status."""
    return ops.or_(ops.lt(amount, 0.0), ops.eq(status, STATUS_REFUND))


# ---------------------------------------------------------------------------
# Rules on orders


def order_verdict(ops, *, purchases, negatives, refunds, value):
    """The reason code of each order (0 = kept) from its lines.

    ``purchases``: lines that are not refunds; ``negatives``: lines with a negative amount;
    ``refunds``: refund lines (negative or with a refund status); ``value``: the order's total
    after refunds. An order with no purchase line is a whole order marked refunded when none
    of its lines is negative, else a refund with nothing to net against. A value above
    :data:`LARGEST_AMOUNT` (or not finite) is implausible whatever the options say; one below
    :data:`NOTHING_BELOW` is nothing: refunded in full when the order has refunds, else a
    zero amount.
    """
    absurd = ops.or_(ops.not_(ops.is_finite(value)), ops.gt(value, LARGEST_AMOUNT))
    return ops.case([
        (ops.and_(ops.eq(purchases, 0), ops.eq(negatives, 0)), CODE["refunded_order"]),
        (ops.eq(purchases, 0), CODE["unmatched_refund"]),
        (absurd, CODE["implausible_amount"]),
        (ops.ge(value, NOTHING_BELOW), 0),
        (ops.eq(refunds, 0), CODE["zero_amount"]),
    ], CODE["refunded_in_full"])


def usual_range(log_median: float | None, log_mad: float | None, orders: int) -> tuple[float, float] | None:
    """``(centre, half_width)`` on the log scale of the amounts a shop usually takes, or None
    when there are too few orders to tell (see :data:`AMOUNT_RANGE_FACTOR`)."""
    if orders < AMOUNT_RANGE_MIN_ORDERS or log_median is None or not math.isfinite(log_median):
        return None
    spread = AMOUNT_RANGE_SPREADS * MAD_TO_SD * (log_mad or 0.0)
    return float(log_median), max(math.log(AMOUNT_RANGE_FACTOR), spread)


def outside_usual_range(ops, log_value, usual: tuple[float, float] | None):
    """True where an order's log amount is outside the shop's usual range."""
    if usual is None:
        return False
    centre, half_width = usual
    return ops.or_(ops.gt(log_value, centre + half_width), ops.lt(log_value, centre - half_width))


# ---------------------------------------------------------------------------
# Whole-file decisions and their refusals (the same words from every engine)


def check_decimal(decimal) -> str | None:
    if decimal not in (None, *DECIMAL_MARKS):
        raise OrderDataError(f"the decimal mark must be '.' or ',' (got '{decimal}')", value=decimal,
                             fix="Choose '.' or ','", option="decimal")
    return decimal


def check_date_order(date_order) -> str | None:
    if date_order not in (None, *DATE_ORDERS):
        raise OrderDataError(f"the date order must be one of {', '.join(DATE_ORDERS)} (got '{date_order}')",
                             value=date_order, fix="Choose day-first or month-first", option="date_order")
    return date_order


def check_header_row(header_row) -> int | None:
    if header_row is None:
        return None
    if isinstance(header_row, bool) or not isinstance(header_row, int) or header_row < 1:
        raise OrderDataError(f"the header row must be a row number, 1 or more (got {header_row!r})",
                             value=header_row, fix="Give the spreadsheet row number of the column headings",
                             option="header_row")
    return int(header_row)


def wanted_currency(currency: str | None) -> str | None:
    """The ISO code a chosen currency means (a code in any case, a symbol such as '€' or 'C$')."""
    if not currency:
        return None
    text = str(currency).strip()
    if text in CURRENCY_SYMBOLS:
        return CURRENCY_SYMBOLS[text]
    text = text.upper()
    return CURRENCY_ALIASES.get(text, text)


def decide_decimal(option: str | None, comma, point, *, file_name: str, column: str) -> str:
    """The decimal mark of the amounts: the option, else what the values that can only be read one
    way say. ``comma`` and ``point`` are ``(row, value)`` of the first such value, or None."""
    if option is not None:
        return option
    if comma is not None and point is not None:
        row, value = max(comma, point, key=lambda found: found[0])
        raise OrderDataError("the amounts mix a decimal comma and a decimal point", file=file_name, row=row,
                             column=column, value=value, fix="Set the decimal mark ('.' or ',')", option="decimal")
    return "," if comma is not None else "."


def decimal_note(decimal: str, option: str | None, column: str) -> list[str]:
    if decimal == "," and option is None:
        return [f"Amounts in '{column}' use a decimal comma (like 1.234,50)."]
    return []


def decide_date_order(option: str | None, day_first, month_first, slashed, *, file_name: str,
                      column: str) -> tuple[str | None, list[str]]:
    """The order of day and month in dates like 03/04/2025, and the note that says why.

    ``day_first``, ``month_first`` and ``slashed`` are ``(row, value)`` of the first date that
    proves day-first (25/04/2025), proves month-first (04/25/2025), or needs the order at all."""
    if option is not None or slashed is None:
        return option, []
    if day_first is not None and month_first is not None:
        raise OrderDataError(
            f"the dates mix day-first and month-first writing (row {month_first[0]} has '{month_first[1]}')",
            file=file_name, row=day_first[0], column=column, value=day_first[1],
            fix="Set the date order (day-first or month-first)", option="date_order")
    if day_first is None and month_first is None:
        raise OrderDataError("the dates can be read day-first or month-first and no value settles which",
                             file=file_name, row=slashed[0], column=column, value=slashed[1],
                             fix="Set the date order (day-first or month-first)", option="date_order")
    order, proof = ("day-first", day_first) if day_first is not None else ("month-first", month_first)
    return order, [f"Dates in '{column}' read {order} because row {proof[0]} has '{proof[1]}'."]


def several_currencies(seen: list[str], first_row, *, file_name: str, column: str):
    """The refusal of a file whose amounts are in several currencies (``seen`` sorted;
    ``first_row`` is ``(row, value)`` of the first row in the second of them)."""
    row, value = first_row
    return OrderDataError(f"the amounts are in several currencies ({', '.join(seen)})", file=file_name, row=row,
                          column=column, value=value,
                          fix=f"Choose one currency (for example {seen[0]}); the others are then left out",
                          option="currency")


def mostly_unreadable(total: int, unreadable: int, first, *, file_name: str, column: str, role: str):
    """The refusal of a column most of whose values cannot be read (it is the wrong column), or None."""
    if total >= UNREADABLE_MIN_VALUES and unreadable / total > UNREADABLE_SHARE:
        what = {"value": "amounts", "date": "dates"}[role]
        row, value = first
        return OrderDataError(f"most {what} in this column cannot be read", file=file_name, row=row, column=column,
                              value=value, fix="Pick the column that holds them, or check the format", role=role)
    return None


def normalise_header(name: str) -> str:
    """A header as compared with the header words: lower case, letters and digits only."""
    return re.sub(r"[^0-9a-z]", "", str(name).lower())


def decide_order_total(*, value_header: str, has_order_ids: bool, orders_with_lines: int, fitting: int,
                       with_blank_lines: int) -> bool:
    """Whether the amount column holds each order's total (given once per order) rather than
    each line's amount.

    Counted over orders of two lines or more: ``fitting`` are those whose lines carry one
    amount between them, repeated or written on one line with the others blank. The column is
    an order total when every such order fits, and the header says so (``Order Total``), or
    some orders leave their other lines blank, or at least :data:`ORDER_TOTAL_MIN_ORDERS`
    orders repeat it. A header that names a line amount (``Line Total``) is never one."""
    if not has_order_ids or orders_with_lines == 0 or fitting < orders_with_lines:
        return False
    header = normalise_header(value_header)
    if header in LINE_AMOUNT_HEADERS:
        return False
    return header in ORDER_TOTAL_HEADERS or with_blank_lines > 0 or orders_with_lines >= ORDER_TOTAL_MIN_ORDERS


# When the amount column holds each order's total, the order's further lines (no amount of their own)
# share the reason its first line was left out for: they are lines of the same cancelled, unpaid,
# test... order, not rows without an amount.
INHERITED_REASONS = ("test_order", "cancelled_order", "unpaid_order", "other_currency", "bad_amount",
                     "missing_date", "bad_date", "implausible_date")
# Rows that are no line of any order: they take part in no order's first line.
NOT_A_LINE = ("blank_row", "malformed_row", "unclosed_quote", "oversized_field", "damaged_row", "duplicate_row",
              "formula_without_value", "missing_customer")


def order_total_note(column: str) -> list[str]:
    return [f"'{column}' holds each order's total (on its first line, or repeated on every line): it is counted "
            "once per order, and the order's other lines are noted as further lines of it."]


# The column role or option that fixes a file where most rows were left out for a reason.
_FIX_FOR_REASON = {
    "missing_customer": ("customer", None), "missing_amount": ("value", None), "bad_amount": ("value", None),
    "missing_date": ("date", None), "bad_date": ("date", None), "other_currency": (None, "currency"),
    "unpaid_order": (None, "keep_unpaid"), "implausible_amount": (None, "keep_implausible"),
    "implausible_date": (None, "keep_implausible"), "cancelled_order": ("status", None),
    "test_order": ("status", None), "refunded_order": ("status", None), "unmatched_refund": ("value", None),
}


def no_usable_orders(excluded: dict[str, int], *, file_name: str) -> OrderDataError:
    """The refusal of a file in which no order is left, naming what most often left rows out."""
    top = max(excluded, key=lambda code: (excluded[code], -RULE_ORDER.index(code))) if excluded else None
    why = f"; most rows were left out because {REASONS[top].split(';')[0]}" if top else ""
    role, option = _FIX_FOR_REASON.get(top, (None, None))
    fix = "Check the column choices and the export"
    if top == "formula_without_value":
        fix = "Open the workbook in a spreadsheet and save it again, so that the formulas' values are stored"
    elif option == "keep_unpaid":
        fix = "Check the export, or choose to keep unpaid and unfinished orders"
    elif option == "keep_implausible":
        fix = "Check the export, or choose to keep implausible amounts and dates"
    return OrderDataError(f"no usable orders were found{why}", file=file_name, fix=fix, role=role, option=option)


def account_counts(counts: dict[str, int], kinds: dict[str, str]) -> dict[str, int]:
    """``counts`` (code -> rows) in the order of ``kinds``, without zeros."""
    return {code: int(counts[code]) for code in kinds if counts.get(code, 0) > 0}


def unrecognised_status_note(statuses: dict[str, int]) -> list[str]:
    """Notes naming every status word the reader does not know, with its rows."""
    if not statuses:
        return []
    listed = ", ".join(f"'{status}' ({rows} row{'s' if rows != 1 else ''})" for status, rows in statuses.items())
    return [f"Statuses the reader does not know, used as paid orders: {listed}. If one means unpaid, cancelled "
            "or refunded, change it in the export."]
