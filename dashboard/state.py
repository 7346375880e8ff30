"""The loaded dataset, the user's choices and cached calls into the library.

Streamlit reruns the page script on every click, so everything slow is wrapped
in a small ``st.cache_data`` function keyed on a :class:`Dataset`: the sha256
digest of the file's bytes plus the reading options, never a big DataFrame.
Results (and the plain-language problem, when there is one) are cached
together, so a file with a problem is not re-read on every rerun either.
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import streamlit as st

from forecasting import OrderDataError, csv_text, customer_statistics, excel_bytes, read_orders
from forecasting.exports import pseudonymise
from forecasting.forecasts import forecasts_for_reading
from forecasting import reading

from .words import SYMBOLS, on_screen

ROOT = Path(__file__).resolve().parent.parent
DEMO_FILE = ROOT / "demo_data" / "plant_shop_orders.csv"
DEMO_SHOP = "Fernhollow Plants"

# Roles of the columns, as the reader names them, with the words shown on screen.
ROLE_LABELS = {
    "customer": "Customer",
    "date": "Order date",
    "value": "Order amount",
    "order_id": "Order number",
    "status": "Order status",
    "currency": "Currency",
    "segment": "Segment",
}
ROLE_HELP = {
    "customer": "The column that identifies who placed the order (an id or an e-mail address).",
    "date": "When the order was placed.",
    "value": "What the order (or order line) was worth. Lines with the same order number are added up.",
    "order_id": "Lines sharing an order number are added up into one order. Without it, each row is one order.",
    "status": "Used to leave out test and cancelled orders and to net refunds.",
    "currency": "Needed when the amounts are not all in one currency.",
    "segment": "An optional grouping, such as the sales channel; the accuracy check is broken down by it.",
}
REQUIRED = ("customer", "date", "value")


def optional_module(name: str):
    """The library module ``forecasting.<name>``, or None while it is not there yet."""
    try:
        return __import__(f"forecasting.{name}", fromlist=["_"])
    except ImportError:
        return None


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
    currency: str = ""
    date_order: str = ""
    decimal: str = ""

    @classmethod
    def from_bytes(cls, data: bytes, name: str, *, demo: bool = False) -> "Dataset":
        return cls(name=name, digest=hashlib.sha256(data).hexdigest(), data=bytes(data), demo=demo)

    @property
    def cache_key(self) -> tuple:
        return (self.digest, self.name, self.overrides, self.currency, self.date_order, self.decimal)

    def with_override(self, role: str, column: str) -> "Dataset":
        chosen = dict(self.overrides)
        chosen[role] = column
        return replace(self, overrides=tuple(sorted(chosen.items())))

    def with_options(self, **options: str) -> "Dataset":
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
        return options


HASH_FUNCS = {Dataset: lambda dataset: dataset.cache_key}


@dataclass
class Outcome:
    """A cached result, or the plain-language problem that stopped it."""

    value: Any = None
    problem: str | None = None
    note: str = ""

    @property
    def ok(self) -> bool:
        return self.problem is None


def _problem_text(problem: OrderDataError) -> str:
    """The message in screen words, without the file name (the page names the file already)."""
    text = str(problem)
    if problem.file is not None:
        for prefix in (f"file '{problem.file}', ", f"file '{problem.file}': "):
            if text.startswith(prefix):
                text = text[len(prefix):]
                text = text[:1].upper() + text[1:]
    return on_screen(text)


# ---------------------------------------------------------------------------
# Cached calls. Each takes a Dataset (hashed by digest + options) and plain options.


@st.cache_data(show_spinner=False, max_entries=12, hash_funcs=HASH_FUNCS)
def read_dataset(dataset: Dataset) -> Outcome:
    """Read and clean the file; the problem message when it cannot be used."""
    try:
        return Outcome(read_orders(dataset.data, file_name=dataset.name, **dataset.read_options()))
    except OrderDataError as problem:
        return Outcome(problem=_problem_text(problem))


@st.cache_data(show_spinner=False, max_entries=12, hash_funcs=HASH_FUNCS)
def file_columns(dataset: Dataset) -> list[str]:
    """The file's column headings, even when the file cannot be read as orders yet."""
    outcome = read_dataset(dataset)
    if outcome.ok:
        return list(outcome.value.columns)
    try:
        return list(reading.read_cells(dataset.data, file_name=dataset.name).columns)
    except OrderDataError:
        return []


@st.cache_data(show_spinner=False, max_entries=12, hash_funcs=HASH_FUNCS)
def statistics(dataset: Dataset):
    """Per-customer statistics of the cleaned orders."""
    return customer_statistics(read_dataset(dataset).value.orders)


@st.cache_data(show_spinner=False, max_entries=48, hash_funcs=HASH_FUNCS)
def forecasts(dataset: Dataset, method: str = "auto", variance: str = "auto") -> Outcome:
    """One row per customer: the expected next order and its ranges.

    ``"auto"`` for both lets the library choose method and spread model together.
    An automatic method with a chosen spread model takes the method that forecast
    best with that model; a chosen method with the automatic spread model takes the
    model the tail report suggests.
    """
    module = optional_module("forecasts")
    orders = read_dataset(dataset).value.orders
    stats = statistics(dataset)
    note = ""
    try:
        if method == "auto" and variance == "auto":
            table = module.forecast_customers(stats, method="auto", orders=orders)
            choice = table.attrs["fit"].get("auto_choice", "")
            note = "Chosen automatically: " + (choice.split(": ", 1)[1] if ": " in choice else choice) + "."
        elif method == "auto":
            judge = optional_module("evaluation")
            try:
                chosen = judge.choose_method(orders, stats, variances=[variance])
                note = f"Method chosen automatically for this spread model: {chosen['reason']}."
            except OrderDataError:
                chosen = judge.choose_method(orders, stats, variances=["classic"])
                note = (f"The {variance} spread model has no quick accuracy check yet, so the method was "
                        f"chosen with the classic model: {chosen['reason']}.")
            table = module.forecast_customers(stats, method=chosen["method"], variance=variance, orders=orders)
        else:
            if variance == "auto":
                variance = tail(dataset).suggested_variance
                note = "Spread model chosen from the size of your big orders (see above)."
            table = module.forecast_customers(stats, method=method, variance=variance, orders=orders)
    except OrderDataError as problem:
        return Outcome(problem=_problem_text(problem))
    return Outcome(table, note=note)


@st.cache_data(show_spinner=False, max_entries=12, hash_funcs=HASH_FUNCS)
def forecast_files(dataset: Dataset, method: str, variance: str, salt: str = "") -> tuple[str, bytes]:
    """The forecasts as safe CSV text and Excel bytes, for the download buttons (money to the cent).

    With a ``salt``, customer ids are replaced by salted pseudonyms (for sharing with an agency).
    """
    table = forecasts_for_reading(forecasts(dataset, method, variance).value)
    if salt:
        table = pseudonymise(table, salt=salt)
    return csv_text(table), excel_bytes(table)


@st.cache_data(show_spinner=False, max_entries=12, hash_funcs=HASH_FUNCS)
def tail(dataset: Dataset):
    """How heavy the tail of big orders is (a TailReport)."""
    module = optional_module("variance")
    return module.tail_report(read_dataset(dataset).value.orders["order_value"].to_numpy())


@st.cache_data(show_spinner=False, max_entries=6, hash_funcs=HASH_FUNCS)
def evaluation(dataset: Dataset, bootstrap: int = 200) -> Outcome:
    """Leave-one-out and next-order backtest of every method against plain averages."""
    module = optional_module("evaluation")
    try:
        return Outcome(module.evaluate_methods(read_dataset(dataset).value.orders, bootstrap=bootstrap, seed=0))
    except OrderDataError as problem:
        return Outcome(problem=_problem_text(problem))


def method_in_use(dataset: Dataset) -> tuple[str, str]:
    """The method and spread model the Forecasts page uses now (after any automatic choice)."""
    outcome = forecasts(dataset, kept("method", "auto"), kept("variance", "auto"))
    if not outcome.ok:
        outcome = forecasts(dataset, "auto", "auto")
    if not outcome.ok:
        return "mta", "classic"
    table = outcome.value
    return str(table["method"].iloc[0]), str(table["variance"].iloc[0])


def _outlook_variance(variance: str) -> str:
    # Gamma-Gamma reports its own spread as "gamma-model"; the outlook calls want a model name.
    return "classic" if variance == "gamma-model" else variance


@st.cache_data(show_spinner=False, max_entries=24, hash_funcs=HASH_FUNCS)
def outlook(dataset: Dataset, method: str, variance: str, horizon: float, by: str) -> Outcome:
    """Projected revenue per customer and per group over ``horizon`` days, from the forecasts in use."""
    module = optional_module("outlook")
    table = forecasts(dataset, method, _outlook_variance(variance))
    try:
        return Outcome(module.project_revenue(read_dataset(dataset).value.orders, horizon=horizon, by=by,
                                              forecasts=table.value if table.ok else None, method=method,
                                              variance=_outlook_variance(variance)))
    except OrderDataError as problem:
        return Outcome(problem=_problem_text(problem))


@st.cache_data(show_spinner=False, max_entries=24, hash_funcs=HASH_FUNCS)
def outlook_backtest(dataset: Dataset, method: str, variance: str, horizon: float, by: str) -> Outcome:
    """The outlook made at an earlier date, against the revenue that came in after it."""
    module = optional_module("outlook")
    try:
        return Outcome(module.backtest_outlook(read_dataset(dataset).value.orders, horizon=horizon, by=by,
                                               method=method, variance=_outlook_variance(variance)))
    except OrderDataError as problem:
        return Outcome(problem=_problem_text(problem))


@st.cache_data(show_spinner=False, max_entries=12, hash_funcs=HASH_FUNCS)
def outlook_rolling(dataset: Dataset, method: str, variance: str, horizon: float, by: str) -> Outcome:
    """The outlook made at several cut-offs over the last year, against all revenue that came in after each."""
    module = optional_module("outlook")
    try:
        return Outcome(module.rolling_backtest(read_dataset(dataset).value.orders, horizon=horizon, by=by,
                                               method=method, variance=_outlook_variance(variance)))
    except OrderDataError as problem:
        return Outcome(problem=_problem_text(problem))


@st.cache_data(show_spinner=False, max_entries=24, hash_funcs=HASH_FUNCS)
def tiers(dataset: Dataset, method: str, variance: str, horizon: float, rank: str, shares: tuple) -> Outcome:
    """Customers in value tiers, the tier summary and the tier lists as CSV text.

    The lists come from the library's own tier lists (formula-safe, rounded) as text in
    memory, so the downloads match the command line's files and nothing touches the disk.
    """
    module = optional_module("outlook")
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
        tiered = module.assign_tiers(customers, rank=rank, shares=shares)
        summary = module.tier_summary(tiered)
        files = module.tier_csv_texts(tiered)
    except OrderDataError as problem:
        return Outcome(problem=_problem_text(problem))
    return Outcome({"customers": tiered, "summary": summary, "files": files, "rank": rank}, note=note)


# ---------------------------------------------------------------------------
# Session state: the dataset in use, a file still waiting for a fix, remembered widgets.


def demo_dataset() -> Dataset | None:
    if not DEMO_FILE.exists():
        return None
    return Dataset.from_bytes(DEMO_FILE.read_bytes(), DEMO_FILE.name, demo=True)


def start() -> None:
    """On first open, load the demo shop's orders."""
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
    kept = f"kept:{key}"
    state = st.session_state
    if kept not in state or (options is not None and state[kept] not in options):
        state[kept] = default
    state[key] = state[kept]
    return {"key": key, "on_change": _keep, "args": (key,)}


def _keep(key: str) -> None:
    st.session_state[f"kept:{key}"] = st.session_state[key]


def kept(key: str, default=None):
    """The remembered value of a widget, drawn or not."""
    return st.session_state.get(f"kept:{key}", default)


# ---------------------------------------------------------------------------
# Money symbol for display


_CODE_RE = re.compile(r"\b(" + "|".join(SYMBOLS) + r")\b")


@st.cache_data(show_spinner=False, max_entries=12, hash_funcs=HASH_FUNCS)
def money_symbol(dataset: Dataset) -> str:
    """The money symbol to show amounts with: the chosen currency, else the file's most common mark."""
    if dataset.currency:
        code = dataset.currency.strip().upper()
        return SYMBOLS.get(code, f"{code} ")
    raw = dataset.data[:500_000]
    try:
        head = raw.decode("utf-8")
    except UnicodeDecodeError:
        # Not UTF-8 (or cut mid-character): Windows-1252 is what the reader tries next.
        head = raw.decode("cp1252", errors="replace")
    counts = {code: 0 for code in SYMBOLS}
    for code in _CODE_RE.findall(head):
        counts[code] += 1
    for mark, code in (("€", "EUR"), ("£", "GBP"), ("¥", "JPY"), ("₹", "INR")):
        counts[code] += head.count(mark)
    counts["USD"] += head.count("$")
    best = max(counts, key=counts.get)
    return SYMBOLS[best] if counts[best] > 0 else ""


@st.cache_data(show_spinner=False, max_entries=12, hash_funcs=HASH_FUNCS)
def guessed_mapping(dataset: Dataset) -> dict[str, str]:
    """Which column plays which part: as read, or as far as it can be guessed when reading fails."""
    outcome = read_dataset(dataset)
    if outcome.ok:
        return {role: column or "" for role, column in outcome.value.mapping.as_dict().items()}
    chosen = dict(dataset.overrides)
    try:
        cells = reading.read_cells(dataset.data, file_name=dataset.name)
        guess = reading.guess_mapping(cells, chosen, file_name=dataset.name)
        return {role: column or "" for role, column in guess.as_dict().items()}
    except OrderDataError:
        return {role: chosen.get(role, "") for role in ROLE_LABELS}
