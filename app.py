"""The dashboard (placeholder until the full pages land): shows the demo shop's row account."""

from pathlib import Path

import streamlit as st

from forecasting import OrderDataError, read_orders

DEMO_FILE = Path(__file__).parent / "demo_data" / "plant_shop_orders.csv"

st.set_page_config(page_title="Next-order forecasts", layout="wide")
st.title("Next-order forecasts")
st.caption("Forecasts are estimates with stated uncertainty, not guarantees. Your data stays on this computer.")
try:
    result = read_orders(DEMO_FILE)
    st.info("The demo shop's orders are loaded.")
    st.json(result.audit())
except OrderDataError as problem:
    st.error(str(problem))
