"""The dashboard: load a shop's orders, forecast each customer's next order, check the accuracy.

Run with ``streamlit run app.py``. This file only sets up the pages; each page's
layout is in ``pages/`` and the calculations are in the ``forecasting`` package.
"""

from pathlib import Path

import streamlit as st

from dashboard import state

HERE = Path(__file__).parent

st.set_page_config(page_title="Next-order forecasts", page_icon="🪴", layout="wide")

state.start()

PAGES = [
    st.Page(HERE / "pages" / "load_orders.py", title="Load orders", icon=":material/upload_file:",
            url_path="load", default=True),
    st.Page(HERE / "pages" / "forecasts.py", title="Forecasts", icon=":material/query_stats:",
            url_path="forecasts"),
    st.Page(HERE / "pages" / "accuracy.py", title="Accuracy check", icon=":material/fact_check:",
            url_path="accuracy"),
    st.Page(HERE / "pages" / "value_tiers.py", title="Value tiers", icon=":material/stacked_bar_chart:",
            url_path="tiers"),
    st.Page(HERE / "pages" / "revenue_outlook.py", title="Revenue outlook", icon=":material/timeline:",
            url_path="outlook"),
]

st.navigation(PAGES, position="top").run()
