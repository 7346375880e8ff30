"""Value tiers: customers grouped by what they are expected to bring in."""

from __future__ import annotations

import streamlit as st

from dashboard import layout, state

layout.page_header(
    "Value tiers",
    "Customers grouped by what they are expected to spend in the months ahead, so you can see who matters most.",
)
if not layout.dataset_line():
    st.stop()
if state.optional_module("outlook") is None:
    layout.coming("The value tiers page")
    st.stop()
