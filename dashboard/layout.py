"""Pieces every page shows: the header with its caution, the dataset line, "coming" notes."""

from __future__ import annotations

import streamlit as st

from . import state

CAUTION = ("Forecasts are estimates with a stated range of uncertainty, not guarantees. "
           "Your order data stays on this computer: nothing is uploaded anywhere or sent to anyone.")


def page_header(title: str, intro: str) -> None:
    """Title, one line on what the page is for, and the caution."""
    st.title(title)
    st.markdown(intro)
    st.caption(CAUTION)


def dataset_line() -> bool:
    """Say which orders are in use; False (with a note) when there are none yet."""
    result = state.current_result()
    if result is None:
        st.warning("No orders are loaded yet. Open **Load orders** and upload your shop's order export.")
        return False
    dataset = state.current()
    audit = result.audit()
    where = f"the demo shop ({state.DEMO_SHOP})" if dataset.demo else f"**{dataset.name}**"
    st.markdown(f"Using {where}: {audit['orders']:,} orders from {audit['customers']:,} customers.")
    if st.session_state.get("pending") is not None:
        st.warning(f"Your file {st.session_state['pending'].name} could not be used yet; "
                   "the numbers here are still from the data loaded before. See **Load orders**.")
    return True


def coming(what: str) -> None:
    st.info(f"{what} is coming: this part of the forecasting library is still being finished.")


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
