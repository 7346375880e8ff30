"""Forecasts: every customer's expected next order, why it differs from their average, downloads."""

from __future__ import annotations

import math
from pathlib import Path

import streamlit as st

from dashboard import charts, layout, state, words

layout.page_header(
    "Forecasts",
    "What each customer will probably spend on their next order. A customer with only a few orders is "
    "pulled toward what similar customers spend, because a couple of orders say little on their own.",
)

forecasting_module = state.optional_module("forecasts")
variance_module = state.optional_module("variance")
if not layout.dataset_line():
    st.stop()
if forecasting_module is None or variance_module is None:
    layout.coming("The forecasts page")
    st.stop()

dataset = state.current()
result = state.current_result()
symbol = state.money_symbol(dataset)
money_format = layout.money_format(symbol)

# ---------------------------------------------------------------------------
# How to forecast

methods = ["auto", *forecasting_module.METHODS]
variances = ["auto", *variance_module.VARIANCE_MODELS]
left, right = st.columns(2)
with left:
    method = st.selectbox("Method", methods, **state.remember("method", "auto", methods),
                          format_func=words.method_label,
                          help="How each customer's average is combined with what other customers spend.")
    st.caption(words.METHOD_WORDS.get(method, ""))
with right:
    variance = st.selectbox("Spread model", variances, **state.remember("variance", "auto", variances),
                            format_func=words.variance_label,
                            help="How much one order's value varies around the customer's usual spend. "
                                 "It decides how far a customer's own average can be trusted.")
    st.caption(words.VARIANCE_WORDS.get(variance, ""))
    st.info(state.tail(dataset).summary, icon=":material/bar_chart:")

with st.spinner("Working out the forecasts ..."):
    outcome = state.forecasts(dataset, method, variance)
if not outcome.ok:
    st.error(outcome.problem)
    st.stop()
table = outcome.value
fit = table.attrs.get("fit", {})
used = (f"In use: {words.method_label(fit.get('method', ''))} with the "
        f"{words.variance_label(fit.get('variance', ''))} spread model.")
st.caption(f"{used} {words.name_words(outcome.note)}" if outcome.note else used)
if fit.get("notes"):
    st.caption(fit["notes"])

level = fit.get("level", 0.9)
next_level = fit.get("next_level", 0.8)
numbers = st.columns(4)
numbers[0].metric("Customers", f"{len(table):,}")
numbers[1].metric("Expected next order, typical customer",
                  words.money(float(table["expected_next_order"].median()), symbol),
                  help="The median over customers.")
numbers[2].metric("Low confidence", f"{int(table['low_confidence'].sum()):,}",
                  help="Customers with a single order, or whose forecast rests more on similar customers "
                       "than on their own history.")
numbers[3].metric("Pulled toward", words.money(float(fit.get("centre", math.nan)), symbol),
                  help="What a customer with no history of their own would be expected to spend.")

# ---------------------------------------------------------------------------
# The table

st.subheader("Every customer")
search = st.text_input("Find a customer", key="search", placeholder="type part of a customer id",
                       help="Shows only customers whose id contains this text (upper or lower case alike).")
shown = table
if search.strip():
    shown = table[table["customer"].astype(str).str.contains(search.strip(), case=False, regex=False)]
    st.caption(f"{len(shown):,} of {len(table):,} customers match '{search.strip()}'.")
st.dataframe(
    shown,
    key="forecast_table",
    hide_index=True,
    height=380,
    column_order=["customer", "orders", "average_order_value", "expected_next_order", "next_order_low",
                  "next_order_high", "own_history_weight", "low_confidence"],
    column_config={
        "customer": st.column_config.TextColumn("Customer", pinned=True),
        "orders": st.column_config.NumberColumn("Orders", format="%d"),
        "average_order_value": st.column_config.NumberColumn(
            "Own average", format=money_format, help="The plain average of this customer's orders."),
        "expected_next_order": st.column_config.NumberColumn(
            "Expected next order", format=money_format, help="The forecast: the expected value of the next order."),
        "next_order_low": st.column_config.NumberColumn(
            "Next order from", format=money_format,
            help=f"About {next_level:.0%} of next orders should fall between 'from' and 'to'."),
        "next_order_high": st.column_config.NumberColumn("Next order to", format=money_format),
        "own_history_weight": st.column_config.ProgressColumn(
            "Weight on own history", format="percent", min_value=0.0, max_value=1.0,
            help="How much of the forecast comes from the customer's own orders; the rest comes from "
                 "similar customers."),
        "low_confidence": st.column_config.CheckboxColumn(
            "Low confidence", help="A single order, or a forecast that rests mostly on similar customers."),
    },
)

# ---------------------------------------------------------------------------
# One customer, explained

st.subheader("Why a forecast differs from the customer's own average")
customers = table["customer"].astype(str).tolist()
pulled = table.assign(pull=(table["expected_next_order"] - table["average_order_value"]).abs())
repeat = pulled[pulled["orders"] == 2] if (pulled["orders"] == 2).any() else pulled[pulled["orders"] >= 2]
example = str((repeat if len(repeat) else pulled).sort_values("pull", ascending=False).iloc[0]["customer"])
picked = st.selectbox("Customer", customers, **state.remember("customer", example, customers),
                      help="Type to search the list.")
row = table[table["customer"].astype(str) == picked].iloc[0]
weight = float(row["own_history_weight"])
centre = float(fit.get("centre", math.nan))
if fit.get("variance") != "log" and weight < 0.98:
    # On the money scale forecast = w * own average + (1 - w) * pull-toward value, so the value
    # this customer is pulled toward can be read back from their own row.
    centre = (float(row["expected_next_order"]) - weight * float(row["average_order_value"])) / (1 - weight)
own = result.orders[result.orders["customer"].astype(str) == picked]
sentence = words.forecast_sentence(orders=int(row["orders"]), average=float(row["average_order_value"]),
                                   forecast=float(row["expected_next_order"]), own_weight=weight,
                                   centre=centre, symbol=symbol, log_scale=fit.get("variance") == "log")
usual_low, usual_high = float(row["expected_low"]), float(row["expected_high"])
usual = (f"between {words.money(usual_low, symbol)} and {words.money(usual_high, symbol)}" if usual_low > 0
         else f"up to {words.money(usual_high, symbol)}")
st.markdown(f"**{picked}.** {sentence} Their next order will probably be between "
            f"{words.money(float(row['next_order_low']), symbol)} and "
            f"{words.money(float(row['next_order_high']), symbol)} ({next_level:.0%} range); what they usually "
            f"spend per order is probably {usual} ({level:.0%} range).")

chart_col, orders_col = st.columns([3, 2])
with chart_col:
    st.plotly_chart(charts.pull_toward_centre(table, symbol=symbol, highlight=picked), key="pull_chart",
                    theme=None, config={"displaylogo": False})
    st.caption("Each dot is a customer; bigger dots have more orders. Dots on the dashed line kept their own "
               "average. Small dots far from the line are the customers with few orders, pulled toward what "
               "similar customers spend. The ringed dot is the customer picked above.")
with orders_col:
    st.markdown(f"**{picked}'s orders** ({words.orders_word(len(own))})")
    st.dataframe(
        own[["order_date", "order_id", "order_value"]], hide_index=True, key="customer_orders",
        height=layout.table_height(len(own), most=330),
        column_config={"order_date": st.column_config.DatetimeColumn("Date", format="YYYY-MM-DD"),
                       "order_id": st.column_config.TextColumn("Order number"),
                       "order_value": st.column_config.NumberColumn("Amount", format=money_format)},
    )

# ---------------------------------------------------------------------------
# Downloads

st.subheader("Download the forecasts")
stem = Path(dataset.name).stem
share = st.toggle("Replace customer ids by pseudonyms (for sharing with an agency)", key="pseudonyms_on",
                  help="Each id becomes a code made from it and a secret phrase of yours. The same phrase gives "
                       "the same codes next time, so you can match answers back; without it nobody can.")
salt = ""
if share:
    salt = st.text_input("Secret phrase (at least 8 characters; keep it to match codes later)", type="password",
                         key="pseudonym_salt")
    if len(salt) < 8:
        st.info("Type a secret phrase of at least 8 characters to get the files with pseudonyms.")
        salt = None
if salt is not None:
    csv_file, excel_file = state.forecast_files(dataset, method, variance, salt)
first, second = st.columns(2)
if salt is None:
    st.stop()
first.download_button("Download all forecasts (CSV)", data=csv_file, file_name=f"{stem}_forecasts.csv",
                      mime="text/csv", key="download_forecasts_csv", on_click="ignore", icon=":material/download:")
second.download_button("Download all forecasts (Excel)", data=excel_file,
                       file_name=f"{stem}_forecasts.xlsx", key="download_forecasts_xlsx", on_click="ignore",
                       mime="application/vnd.openxmlformats-officedocument.spreadsheetml.sheet",
                       icon=":material/download:")
st.caption("Text cells that a spreadsheet could run as a formula are made safe in both files.")
