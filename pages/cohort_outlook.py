"""Cohort outlook: revenue ahead from each month's new customers."""

from __future__ import annotations

import streamlit as st

from dashboard import layout, state

layout.page_header(
    "Cohort outlook",
    "Revenue expected from the customers who first ordered in each month, checked against what they actually spent.",
)
if not layout.dataset_line():
    st.stop()
if state.optional_module("outlook") is None:
    layout.coming("The cohort outlook page")
    st.stop()
