"""The loaded dataset, the user's choices and cached calls into the library.

Streamlit reruns the page script on every click, so everything slow is wrapped in a
small cached function keyed on a :class:`Dataset` (the sha256 digest of the file's
bytes plus the reading options, never a big DataFrame) and the options of the call:
each page's work is done once per dataset and option set, whichever page or session
asks. Results (and the problem, when there is one) are cached together, so a file
with a problem is not re-read on every rerun either.

A problem is kept as the fields of the library's :class:`~forecasting.errors.OrderDataError`
(its column role and option included), so that each page can word it with the name of
its own control (``dashboard.layout.show_problem``).
"""

from __future__ import annotations

import functools
import hashlib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import pandas as pd
import streamlit as st

from forecasting import OrderDataError, csv_text, excel_bytes, read_orders
from forecasting import reading
from forecasting.io import rules
from forecasting.exports import HEADINGS, SHORTEST_SALT, pseudonymise
from forecasting.forecasts import MONEY_COLUMNS, forecasts_for_reading
from forecasting.outlook import assign_tiers, tier_lists, tier_summary
from forecasting.shop import Shop

from . import words

ROOT = Path(__file__).resolve().parent.parent
DEMO_FILE = ROOT / "demo_data" / "plant_shop_orders.csv"
DEMO_SHOP = "Fernhollow Plants"
ROLE_LABELS = words.ROLE_LABELS
ROLE_HELP = words.ROLE_HELP
REQUIRED = ("customer", "date", "value")


@dataclass(frozen=True)
class Dataset:
    """One order export and the options it is read with.

    Two datasets with the same bytes and options share every cached result.
    """

    name: str
    digest: str
    data: bytes = field(repr=False, compare=False)
    demo: bool = False
    overrides: tuple = ()  # ((role, column or ""), ...) chosen by the user
    # Reading options (the keyword arguments of forecasting.read_orders; empty or False: the reader decides).
    currency: str = ""
    date_order: str = ""
    decimal: str = ""
    sheet: str = ""
    header_row: int | None = None
    keep_unpaid: bool = False
    keep_implausible: bool = False

    @classmethod
    def from_bytes(cls, data: bytes, name: str, *, demo: bool = False) -> "Dataset":
        return cls(name=name, digest=hashlib.sha256(data).hexdigest(), data=bytes(data), demo=demo)

    @property
    def cache_key(self) -> tuple:
        return (self.digest, self.name, self.overrides, self.currency, self.date_order, self.decimal, self.sheet,
                self.header_row, self.keep_unpaid, self.keep_implausible)

    @property
    def megabytes(self) -> float:
        return len(self.data) / 2**20

    def with_override(self, role: str, column: str) -> "Dataset":
        chosen = dict(self.overrides)
        chosen[role] = column
        return replace(self, overrides=tuple(sorted(chosen.items())))

    def with_options(self, **options: Any) -> "Dataset":
        return replace(self, **options)

    def read_options(self) -> dict[str, Any]:
        options: dict[str, Any] = {}
        for role, column in self.overrides:
            options["currency_column" if role == "currency" else role] = column
        if self.currency:
            options["currency"] = self.currency
        if self.date_order:
            options["date_order"] = self.date_order
        if self.decimal:
            options["decimal"] = self.decimal
        if self.sheet:
            options["sheet"] = self.sheet
        if self.header_row is not None:
            options["header_row"] = int(self.header_row)
        if self.keep_unpaid:
            options["keep_unpaid"] = True
        if self.keep_implausible:
            options["keep_implausible"] = True
        return options

    @property
    def is_workbook(self) -> bool:
        """An Excel workbook (.xlsx is a zip archive), the one kind of file with sheets."""
        return self.data[:4] == b"PK\x03\x04"


HASH_FUNCS = {Dataset: lambda dataset: dataset.cache_key}

_PROBLEM_FIELDS = ("problem", "file", "row", "column", "value", "fix", "role", "option")


def problem_fields(problem: OrderDataError) -> dict:
    """The error's fields as a plain dict (an exception does not keep keyword arguments through pickling)."""
    return {name: getattr(problem, name) for name in _PROBLEM_FIELDS}


@dataclass
class Outcome:
    """A cached result, or the library's problem (as :func:`problem_fields`) that stopped it."""

    value: Any = None
    error: dict | None = None
    note: str = ""

    @property
    def ok(self) -> bool:
        return self.error is None

    def worded(self, here: str | None = None, *, keep_file: bool = False) -> str:
        """The problem in screen words, naming the control on this page that fixes it (no file name
        unless ``keep_file``: the page names the file already)."""
        return worded(self.error, here=here, keep_file=keep_file)


def worded(error: dict | None, *, here: str | None = None, keep_file: bool = False) -> str:
    if error is None:
        return ""
    fields = dict(error)
    if not keep_file:
        fields["file"] = None
    problem = OrderDataError(fields.pop("problem"), **fields)
    text = problem.worded(lambda role, option: words.control_name(role, option, here=here))
    return text[:1].upper() + text[1:]


# ---------------------------------------------------------------------------
# Cached calls. Each takes a Dataset (hashed by digest + options) and plain options.

# Calls whose answer is in the cache already (process-wide, as the caches are): a page shows
# named progress only for the steps that will take time.
_DONE: set = set()


def _call_key(function, args, kwargs) -> tuple:
    def plain(value):
        return value.cache_key if isinstance(value, Dataset) else value
    return (function.__qualname__, tuple(plain(a) for a in args), tuple(sorted(
        (k, plain(v)) for k, v in kwargs.items())))


def cached(*, max_entries: int = 12):
    """``st.cache_data`` keyed on datasets by digest and options, which also remembers what is done."""
    def wrap(function):
        inner = st.cache_data(show_spinner=False, max_entries=max_entries, hash_funcs=HASH_FUNCS)(function)

        @functools.wraps(function)
        def call(*args, **kwargs):
            value = inner(*args, **kwargs)
            _DONE.add(_call_key(function, args, kwargs))
            return value

        call.is_done = lambda *args, **kwargs: _call_key(function, args, kwargs) in _DONE
        return call
    return wrap


@cached()
def read_dataset(dataset: Dataset) -> Outcome:
    """Read and clean the file; the problem when it cannot be used."""
    try:
        return Outcome(read_orders(dataset.data, file_name=dataset.name, **dataset.read_options()))
    except OrderDataError as problem:
        return Outcome(error=problem_fields(problem))


@cached()
def file_cells(dataset: Dataset) -> pd.DataFrame | None:
    """The file's cells as text (the reader's first step), or None when it is not a table.

    Read only when the file cannot be read as orders, to show its headings in the column boxes.
    """
    try:
        return reading.read_cells(dataset.data, file_name=dataset.name, sheet=dataset.sheet or None,
                                  header_row=dataset.header_row)
    except OrderDataError:
        return None


@cached()
def workbook_sheets(dataset: Dataset) -> list[str]:
    """The sheet names of an Excel workbook, in order ([] for other files).

    Read from the workbook's table of contents (openpyxl's read-only mode opens no sheet).
    """
    if not dataset.is_workbook:
        return []
    import io

    import openpyxl

    try:
        book = openpyxl.load_workbook(io.BytesIO(dataset.data), read_only=True)
    except Exception:  # noqa: BLE001 - not a workbook openpyxl can open: the reader says why
        return []
    try:
        return list(book.sheetnames)
    finally:
        book.close()


@cached()
def file_columns(dataset: Dataset) -> list[str]:
    """The file's column headings, even when the file cannot be read as orders yet."""
    outcome = read_dataset(dataset)
    if outcome.ok:
        return list(outcome.value.columns)
    cells = file_cells(dataset)
    return [] if cells is None else list(cells.columns)


@cached()
def guessed_mapping(dataset: Dataset) -> dict[str, str]:
    """Which column plays which part: as read, or as far as it can be guessed when reading fails."""
    outcome = read_dataset(dataset)
    if outcome.ok:
        return {role: column or "" for role, column in outcome.value.mapping.as_dict().items()}
    chosen = dict(dataset.overrides)
    cells = file_cells(dataset)
    if cells is not None:
        try:
            guess = reading.guess_mapping(cells, chosen, file_name=dataset.name)
            return {role: column or "" for role, column in guess.as_dict().items()}
        except OrderDataError:
            pass
    return {role: chosen.get(role, "") for role in ROLE_LABELS}


@cached()
def currency_code(dataset: Dataset) -> str:
    """The currency of the amounts, as the data say ("" when nothing says).

    The one chosen under Reading options, else the one the reader found on the rows it used
    (:attr:`forecasting.reading.ReadResult.currency`; it refuses a file whose rows name several).
    A file whose amounts name no currency gives "": the page then shows amounts without a sign,
    and *Show amounts in* sets one.
    """
    if dataset.currency:
        return rules.wanted_currency(dataset.currency) or ""
    outcome = read_dataset(dataset)
    return outcome.value.currency if outcome.ok else ""


def money_symbol(dataset: Dataset) -> str:
    """The symbol to show amounts with: the currency the user set for display, else the data's."""
    shown = st.session_state.get("kept:shown_currency", "")
    return words.currency_symbol(shown or currency_code(dataset))


@st.cache_resource(show_spinner=False, max_entries=4, hash_funcs=HASH_FUNCS)
def shop_of(dataset: Dataset) -> Shop:
    """The library's :class:`~forecasting.shop.Shop` of a dataset that reads (one per dataset and options).

    Every page asks it for its stage, so the statistics, the shared fits and the automatic choice
    are made once per dataset however many pages and options use them (the command line does the
    same). Kept as a resource (not copied per call), since it keeps what it has computed.
    """
    return Shop.from_read(read_dataset(dataset).value)


def _asked(step):
    """The step's value as an :class:`Outcome`, or the library's problem."""
    try:
        return Outcome(step())
    except OrderDataError as problem:
        return Outcome(error=problem_fields(problem))


@cached()
def statistics(dataset: Dataset):
    """Per-customer statistics of the cleaned orders."""
    return shop_of(dataset).statistics


@cached(max_entries=48)
def choice(dataset: Dataset, method: str = "auto", variance: str = "auto") -> Outcome:
    """The method and spread model to use, "auto" settled by the library's rules (the command line's too;
    the accuracy check's own choice when it has run)."""
    return _asked(lambda: shop_of(dataset).choice(method, variance))


@cached(max_entries=48)
def forecasts(dataset: Dataset, method: str = "auto", variance: str = "auto") -> Outcome:
    """One row per customer: the expected next order and its ranges (how "auto" was settled: :func:`choice`)."""
    settled = choice(dataset, method, variance)
    if not settled.ok:
        return settled
    return _asked(lambda: shop_of(dataset).forecasts(method, variance))


def excel_of(table: pd.DataFrame, *, sheet_name: str, symbol: str, money=(), shares=()) -> bytes:
    """An Excel download: readable headings, money and percentage formats, frozen header row."""
    return excel_bytes(table, sheet_name=sheet_name, headings=HEADINGS, money=money, shares=shares,
                       money_symbol=symbol.strip())


def _forecasts_to_share(dataset: Dataset, method: str, variance: str, salt: str) -> pd.DataFrame:
    table = forecasts_for_reading(forecasts(dataset, method, variance).value)
    return pseudonymise(table, salt=salt) if salt else table


@cached()
def forecast_csv(dataset: Dataset, method: str, variance: str, salt: str = "") -> str:
    """The forecasts as safe CSV text with the column names scripts rely on, money to the cent.

    With a ``salt``, customer ids are replaced by salted pseudonyms (for sharing with an agency).
    """
    return csv_text(_forecasts_to_share(dataset, method, variance, salt))


@cached()
def forecast_excel(dataset: Dataset, method: str, variance: str, salt: str = "", symbol: str = "") -> bytes:
    """The forecasts as an Excel workbook with headings for people (see :func:`excel_of`)."""
    return excel_of(_forecasts_to_share(dataset, method, variance, salt), sheet_name="forecasts", symbol=symbol,
                    money=MONEY_COLUMNS, shares=["own_history_weight"])


@cached()
def tail(dataset: Dataset):
    """How heavy the tail of big orders is (a TailReport)."""
    return shop_of(dataset).tail()


@cached(max_entries=6)
def evaluation(dataset: Dataset, bootstrap: int = 200) -> Outcome:
    """Leave-one-out and next-order backtest of every method against plain averages."""
    return _asked(lambda: shop_of(dataset).evaluation(bootstrap=bootstrap, seed=0))


def method_in_use(dataset: Dataset) -> tuple[str, str]:
    """The method and spread model the Forecasts page uses now (after any automatic choice)."""
    outcome = forecasts(dataset, kept("method", "auto"), kept("variance", "auto"))
    if not outcome.ok:
        outcome = forecasts(dataset, "auto", "auto")
    if not outcome.ok:
        return "mta", "classic"
    table = outcome.value
    return str(table["method"].iloc[0]), str(table["variance"].iloc[0])


@cached(max_entries=24)
def outlook(dataset: Dataset, method: str, variance: str, horizon: float, by: str) -> Outcome:
    """Projected revenue per customer and per group over ``horizon`` days, from the forecasts in use."""
    return _asked(lambda: shop_of(dataset).outlook(horizon=horizon, by=by, method=method, variance=variance))


@cached(max_entries=12)
def outlook_rolling(dataset: Dataset, method: str, variance: str, horizon: float, by: str) -> Outcome:
    """The outlook made at several cut-offs over the last year, against all revenue that came in after each.

    Made when asked for (the Revenue outlook page's button): it is the outlook's work ten times over.
    """
    return _asked(lambda: shop_of(dataset).rolling_backtest(horizon=horizon, by=by, method=method,
                                                            variance=variance))


@cached(max_entries=24)
def tiers(dataset: Dataset, method: str, variance: str, horizon: float, rank: str, shares: tuple) -> Outcome:
    """Customers in value tiers, the tier summary and the library's tier lists (rounded, in memory).

    The lists are the library's own (formula-safe when written, rounded), so the downloads match
    the command line's files; nothing touches the disk.
    """
    projection = outlook(dataset, method, variance, horizon, "quarter")
    if not projection.ok:
        return projection
    note = ""
    customers = projection.value.customers
    if rank == "revenue" and not customers["projected_revenue"].notna().all():
        rank = "value"
        note = ("Revenue could not be projected for every customer on this data (the order-frequency model "
                "did not fit), so customers are ranked by their expected next order instead.")
    try:
        tiered = assign_tiers(customers, rank=rank, shares=shares)
        summary = tier_summary(tiered)
        lists = tier_lists(tiered)
    except OrderDataError as problem:
        return Outcome(error=problem_fields(problem))
    return Outcome({"customers": tiered, "summary": summary, "lists": lists, "rank": rank}, note=note)


def customer_segments(dataset: Dataset) -> pd.Series | None:
    """Each customer's segment (their latest order's, as the per-customer statistics carry it), or None
    when the export has no segment column."""
    stats = statistics(dataset)
    if "segment" not in stats.columns:
        return None
    return stats["segment"].astype(str)


# ---------------------------------------------------------------------------
# Customer ids on screen and in downloads: real, or pseudonyms while they are on


def pseudonym_salt() -> str | None:
    """The secret phrase while pseudonyms are on (for this browser tab), else None."""
    salt = st.session_state.get("pseudonym_salt_in_use")
    return salt if isinstance(salt, str) and len(salt) >= SHORTEST_SALT else None


def use_pseudonyms(salt: str | None) -> None:
    st.session_state["pseudonym_salt_in_use"] = salt


@cached(max_entries=6)
def pseudonym_of(dataset: Dataset, salt: str) -> pd.Series:
    """Every customer's pseudonym, indexed by the customer id (the library's HMAC, computed once)."""
    ids = pd.DataFrame({"customer": statistics(dataset).index.astype(str)})
    return pd.Series(pseudonymise(ids, salt=salt)["customer"].to_numpy(), index=ids["customer"].to_numpy())


def shown_ids(table: pd.DataFrame, dataset: Dataset, column: str = "customer") -> pd.DataFrame:
    """``table`` with its customer ids as the page shows them: pseudonyms while they are on."""
    salt = pseudonym_salt()
    if salt is None or column not in table.columns or len(table) == 0:
        return table
    known = pseudonym_of(dataset, salt)
    ids = table[column].astype(str)
    codes = ids.map(known)
    missing = codes.isna().to_numpy()
    if missing.any():  # an id the statistics do not hold (a raw cell of a row left out)
        codes[missing] = pseudonymise(pd.DataFrame({"customer": ids[missing].str.strip()}),
                                      salt=salt)["customer"].to_numpy()
    return table.assign(**{column: codes.to_numpy()})


def left_out_rows(dataset: Dataset) -> pd.DataFrame:
    """The rows left out, with their reasons, as the page shows and downloads them.

    A row that did not split into fields has its text in ``raw_text`` and no cells: its cells
    are empty rather than missing. While pseudonyms are on, only the columns read as orders are
    kept (the row's other cells and its text as written could hold an id), with the customer
    column as pseudonyms.
    """
    result = read_dataset(dataset).value
    table = result.excluded.fillna("")
    if pseudonym_salt() is None:
        return table
    roles = result.mapping.as_dict()
    read = [column for column in dict.fromkeys(c for c in roles.values() if c) if column in table.columns]
    table = table[["row", "reason_code", "reason", *read]]
    customer = roles.get("customer")
    if customer in table.columns:
        filled = (table[customer].astype(str).str.strip() != "").to_numpy()
        codes = table[customer].astype(str).to_numpy(dtype=object)
        if filled.any():
            codes[filled] = shown_ids(table.loc[filled, [customer]], dataset, column=customer)[customer].to_numpy()
        table = table.assign(**{customer: codes})
    return table


# ---------------------------------------------------------------------------
# Session state: the dataset in use, a file still waiting for a fix, remembered widgets.


def demo_dataset() -> Dataset | None:
    if not DEMO_FILE.exists():
        return None
    return Dataset.from_bytes(DEMO_FILE.read_bytes(), DEMO_FILE.name, demo=True)


def start() -> None:
    """On first open (a new browser tab, or a refresh), load the demo shop's orders."""
    state = st.session_state
    if "dataset" not in state:
        state["dataset"] = demo_dataset()
        state["pending"] = None
        state["upload_seen"] = None


def current() -> Dataset | None:
    """The last dataset that was read without a problem."""
    return st.session_state.get("dataset")


def current_result():
    """The ReadResult of the dataset in use, or None."""
    dataset = current()
    if dataset is None:
        return None
    outcome = read_dataset(dataset)
    return outcome.value if outcome.ok else None


def offer(dataset: Dataset) -> Outcome:
    """Try a dataset: in use when it reads, otherwise kept aside with its problem for fixing."""
    outcome = read_dataset(dataset)
    if outcome.ok:
        if current() is None or current().digest != dataset.digest:
            st.session_state["kept:shown_currency"] = ""  # another file: its own currency
        st.session_state["dataset"] = dataset
        st.session_state["pending"] = None
    else:
        st.session_state["pending"] = dataset
    return outcome


def being_edited() -> Dataset | None:
    """The dataset the column boxes change: a file waiting for a fix, else the one in use."""
    return st.session_state.get("pending") or current()


def remember(key: str, default, options=None):
    """Keep a widget's value while its page is not on screen.

    Streamlit forgets a widget's value when a rerun does not draw it (the user is
    on another page). The value is kept under another key and put back before the
    widget is drawn. A remembered value that is no longer among ``options`` (another
    file was loaded) goes back to ``default``. Returns the keyword arguments for the
    widget call.
    """
    kept_key = f"kept:{key}"
    state = st.session_state
    if kept_key not in state or (options is not None and state[kept_key] not in options):
        state[kept_key] = default
    state[key] = state[kept_key]
    return {"key": key, "on_change": _keep, "args": (key,)}


def _keep(key: str) -> None:
    st.session_state[f"kept:{key}"] = st.session_state[key]


def kept(key: str, default=None):
    """The remembered value of a widget, drawn or not."""
    return st.session_state.get(f"kept:{key}", default)
