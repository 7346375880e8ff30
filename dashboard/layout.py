"""Pieces every page shows: the header with its caution, the dataset line, problems, progress, sharing."""

from __future__ import annotations

import streamlit as st

from forecasting.exports import SHORTEST_SALT

from . import state

CAUTION = ("Forecasts are estimates with a stated range of uncertainty, not guarantees. "
           "Your order data stays on this computer: nothing is uploaded anywhere or sent to anyone.")
SESSION_NOTE = ("Your file is held for this browser tab only, while it stays open: refreshing the page or "
                "opening a new tab starts over with the demo shop, and nothing of it is saved.")


def page_header(title: str, intro: str) -> None:
    """Title, one line on what the page is for, and the caution."""
    st.title(title)
    st.markdown(intro)
    st.caption(CAUTION)


def start_page(title: str, intro: str):
    """A page that works on the loaded orders: its header and which orders are in use.

    Returns ``(dataset, result)`` (the :class:`state.Dataset` and its reading); stops the page,
    with a note, when no orders are loaded yet.
    """
    page_header(title, intro)
    result = dataset_line()
    if result is None:
        st.stop()
    return state.current(), result


def dataset_line():
    """Say which orders are in use and return their reading; None (with a note) when there are none yet."""
    result = state.current_result()
    if result is None:
        st.warning("No orders are loaded yet. Open **Load orders** and upload your shop's order export.")
        return None
    dataset = state.current()
    audit = result.audit()
    where = f"the demo shop ({state.DEMO_SHOP})" if dataset.demo else f"**{dataset.name}**"
    st.markdown(f"Using {where}: {audit['orders']:,} orders from {audit['customers']:,} customers.")
    if not dataset.demo:
        st.caption(SESSION_NOTE)
    if state.pseudonym_salt() is not None:
        st.info("Pseudonyms are on: every customer id on these pages and in every download is a code made from "
                "the id and your secret phrase.", icon=":material/lock:")
    if st.session_state.get("pending") is not None:
        st.warning(f"Your file {st.session_state['pending'].name} could not be used yet; "
                   "the numbers here are still from the data loaded before. See **Load orders**.")
    return result


def show_problem(outcome: state.Outcome, here: str, *, prefix: str = "") -> None:
    """The library's problem, worded with the name of the control (on this page or another) that fixes it."""
    st.error(f"{prefix}{outcome.worded(here)}")


class Work:
    """The slow steps of a page, named and shown while they run (never hidden in a collapsed box).

    Each step is a cached call; a step whose answer is cached already is not shown. While a
    step runs, the steps done so far are listed above it with a tick, and the running one
    says which step of how many it is and how long it has been going. When all are done the
    list disappears.

    Examples
    --------
    ``work = Work(2); orders = work.step("Reading the file", state.read_dataset, dataset); work.finish()``
    """

    def __init__(self, steps: int):
        self.steps = steps
        self.done: list[str] = []
        self.area = st.empty()
        self.shown = False

    def step(self, label: str, function, *args, **kwargs):
        if function.is_done(*args, **kwargs):  # a state.cached function
            self.done.append(label)
            return function(*args, **kwargs)
        self.shown = True
        with self.area.container():
            for finished in self.done:
                st.markdown(f":material/check: {finished}")
            with st.spinner(f"Step {len(self.done) + 1} of {self.steps}: {label} ...", show_time=True):
                value = function(*args, **kwargs)
        self.done.append(label)
        return value

    def finish(self) -> None:
        if self.shown:
            self.area.empty()


#: Up to this many rows an Excel download is made with the page (about a second or two); bigger workbooks are
#: made when asked for, as a named step (writing .xlsx runs at roughly 100,000 cells a second).
EXCEL_AT_ONCE = 20_000
XLSX = "application/vnd.openxmlformats-officedocument.spreadsheetml.sheet"


def excel_download(label: str, *, key: str, rows: int, file_name: str, make, args: tuple, column=None) -> None:
    """An Excel download button; for a big table the workbook is made on request, with named progress.

    ``make`` is a cached function of ``args`` returning the workbook's bytes.
    """
    place = column if column is not None else st
    if rows > EXCEL_AT_ONCE and not make.is_done(*args):
        if not place.button(f"{label}: prepare the file", key=f"{key}_prepare", icon=":material/table_view:",
                            help=f"Writing {rows:,} rows to an Excel workbook takes a while; the download "
                                 "button appears when it is ready."):
            return
        with place:
            work = Work(1)
            work.step(f"Writing {rows:,} rows to an Excel workbook", make, *args)
            work.finish()
    place.download_button(label, data=make(*args), file_name=file_name, key=key, on_click="ignore", mime=XLSX,
                          icon=":material/download:")


# Streamlit's named formats put in thousands separators; printf-style formats cannot.
_NAMED_MONEY = {"$": "dollar", "€": "euro", "¥": "yen"}


def money_format(symbol: str) -> str:
    """A column_config number format showing money with the shop's symbol."""
    if symbol in _NAMED_MONEY:
        return _NAMED_MONEY[symbol]
    return f"{symbol}%.2f" if symbol else "%.2f"


def table_height(rows: int, *, most: int = 420) -> int:
    """Pixels for a table that shows ``rows`` rows without a scroll bar, up to ``most``."""
    return int(min(most, 35 * (rows + 1) + 3))


# ---------------------------------------------------------------------------
# Sharing: pseudonyms instead of customer ids, for the whole browser tab


def _turn_on(page: str) -> None:
    phrase = st.session_state.get(f"pseudonym_phrase_{page}", "") or ""
    if len(phrase) < SHORTEST_SALT:
        st.session_state[f"pseudonym_refused_{page}"] = True
        return
    st.session_state[f"pseudonym_refused_{page}"] = False
    state.use_pseudonyms(phrase)


def _turn_off() -> None:
    state.use_pseudonyms(None)


def sharing_controls(page: str) -> None:
    """Turn pseudonyms on or off; the setting holds on every page of this browser tab.

    While pseudonyms are on, every table and every download shows pseudonyms instead of
    customer ids, so nothing on the page (the tables' own download and copy included)
    can hand out a real id.
    """
    if state.pseudonym_salt() is not None:
        st.button("Show real customer ids again", key=f"pseudonyms_off_{page}", on_click=_turn_off,
                  icon=":material/lock_open:")
        return
    with st.form(key=f"pseudonym_form_{page}", border=False):
        st.markdown("**Sharing with someone else?** Turn on pseudonyms: each customer id becomes a code made "
                    "from it and a secret phrase of yours, on every page and in every download. The same phrase "
                    "gives the same codes next time, so you can match answers back; without it nobody can.")
        st.text_input(f"Secret phrase (at least {SHORTEST_SALT} characters; keep it to match codes later)",
                      type="password", key=f"pseudonym_phrase_{page}")
        st.form_submit_button("Turn pseudonyms on", on_click=_turn_on, args=(page,), icon=":material/lock:",
                              key=f"pseudonyms_on_{page}")
    if st.session_state.get(f"pseudonym_refused_{page}"):
        st.warning(f"The secret phrase needs at least {SHORTEST_SALT} characters; pseudonyms are still off.")


def chart(spec: dict, *, key: str) -> None:
    """A chart of :mod:`dashboard.charts` on the page, as wide as its column, in the product's own
    colours (Streamlit's theme would repaint them)."""
    st.vega_lite_chart(spec, key=key, theme=None, width="stretch")
