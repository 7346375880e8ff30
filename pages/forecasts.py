"""Forecasts: every customer's expected next order, why it differs from their average, downloads."""

from __future__ import annotations

import math
from functools import partial
from pathlib import Path

import pandas as pd
import streamlit as st

from dashboard import charts, layout, state, words
from forecasting.exports import HEADINGS
from forecasting.forecasts import METHODS
from forecasting.options import LOW_CONFIDENCE_WEIGHT, low_confidence
from forecasting.variance import VARIANCE_MODELS

HERE = "forecasts"
PAGE_ROWS = 50

dataset, result = layout.start_page(
    "Forecasts",
    "What each customer will probably spend on their next order. A customer with only a few orders is "
    "pulled toward what similar customers spend, because a couple of orders say little on their own.",
)
symbol = state.money_symbol(dataset)
money_format = layout.money_format(symbol)
methods = ["auto", *METHODS]
variances = ["auto", *VARIANCE_MODELS]
# The boxes sit in the details section below; their remembered values decide what is computed here.
method = state.kept("method", "auto")
method = method if method in methods else "auto"
variance = state.kept("variance", "auto")
variance = variance if variance in variances else "auto"

work = layout.Work(2)
settled = work.step("Trying each way of forecasting on your past orders, hiding one order at a time",
                    state.choice, dataset, method, variance)
outcome = work.step(f"Working out the next order of each of {result.audit()['customers']:,} customers",
                    state.forecasts, dataset, method, variance) if settled.ok else settled
work.finish()
if not outcome.ok:
    layout.show_problem(outcome, HERE)
    table = None
else:
    table = outcome.value

if table is not None:
    fit = table.attrs.get("fit", {})
    level = fit.get("level", 0.9)
    next_level = fit.get("next_level", 0.8)
    weight = table["own_history_weight"].to_numpy(dtype=float)
    leaning = low_confidence(weight)
    numbers = st.columns(4)
    numbers[0].metric("Customers", f"{len(table):,}")
    numbers[1].metric("Expected next order, typical customer",
                      words.money(float(table["expected_next_order"].median()), symbol),
                      help="The median over customers: half expect more, half less.")
    numbers[2].metric("Customers with one order so far", f"{int((table['orders'] == 1).sum()):,}")
    numbers[3].metric("Low confidence", f"{int(leaning.sum()):,}",
                      help=f"Forecasts of which less than {LOW_CONFIDENCE_WEIGHT:.0%} comes from the customer's own "
                           "orders: they rest mostly on what similar customers spend. The same rule marks the "
                           "'Low confidence' column below and follows its 'Weight on own orders'.")

    # -----------------------------------------------------------------------
    # The table: a page of customers at a time, found on the server

    st.subheader("Every customer")
    left, middle, right = st.columns([3, 2, 1])
    search = left.text_input("Find a customer", key="search", placeholder="type part of a customer id",
                             on_change=lambda: st.session_state.update(forecast_page=1),
                             help="Shows only customers whose id contains this text (upper or lower case "
                                  "alike); while pseudonyms are on, their code works too.").strip()
    orders_by = {"expected_next_order": "expected next order, highest first", "orders": "orders so far, most first",
                 "customer": "customer id"}
    sort = middle.selectbox("Sort by", list(orders_by), format_func=orders_by.get,
                            **state.remember("forecast_sort", "expected_next_order", list(orders_by)))
    shown_all = state.shown_ids(table, dataset)
    matches = table
    if search:
        found = table["customer"].astype(str).str.contains(search, case=False, regex=False).to_numpy(dtype=bool)
        if state.pseudonym_salt() is not None:
            found = found | shown_all["customer"].astype(str).str.contains(search, case=False,
                                                                           regex=False).to_numpy(dtype=bool)
        matches = table[found]
    matches = matches.sort_values(sort, ascending=sort == "customer", kind="stable")
    pages = max(1, math.ceil(len(matches) / PAGE_ROWS))
    if not 1 <= int(st.session_state.get("forecast_page", 1) or 1) <= pages:
        st.session_state["forecast_page"] = 1
    page = int(right.number_input(f"Page (of {pages:,})", min_value=1, max_value=pages, step=1,
                                  key="forecast_page"))
    window = matches.iloc[(page - 1) * PAGE_ROWS: page * PAGE_ROWS]
    if search:
        st.caption(f"{len(matches):,} of {len(table):,} customers match '{search}'.")
    else:
        st.caption(f"Customers {(page - 1) * PAGE_ROWS + 1:,} to {(page - 1) * PAGE_ROWS + len(window):,} of "
                   f"{len(table):,}. Find a customer or turn the pages; the downloads below hold everyone.")
    shown = state.shown_ids(window, dataset).assign(low_confidence=low_confidence(window["own_history_weight"]))
    st.dataframe(
        shown,
        key="forecast_table",
        hide_index=True,
        height=layout.table_height(len(shown), most=380),
        column_order=["customer", "orders", "average_order_value", "expected_next_order", "next_order_low",
                      "next_order_high", "own_history_weight", "low_confidence"],
        column_config={
            "customer": st.column_config.TextColumn(HEADINGS["customer"], pinned=True),
            "orders": st.column_config.NumberColumn(HEADINGS["orders"], format="%d"),
            "average_order_value": st.column_config.NumberColumn(
                HEADINGS["average_order_value"], format=money_format,
                help="The plain average of this customer's orders."),
            "expected_next_order": st.column_config.NumberColumn(
                HEADINGS["expected_next_order"], format=money_format,
                help="The forecast: what the next order is expected to be worth."),
            "next_order_low": st.column_config.NumberColumn(
                HEADINGS["next_order_low"], format=money_format,
                help=f"About {next_level:.0%} of next orders should fall between 'from' and 'to'."),
            "next_order_high": st.column_config.NumberColumn(HEADINGS["next_order_high"], format=money_format),
            "own_history_weight": st.column_config.ProgressColumn(
                HEADINGS["own_history_weight"], format="percent", min_value=0.0, max_value=1.0,
                help="How much of the forecast comes from the customer's own orders; the rest comes from "
                     "similar customers."),
            "low_confidence": st.column_config.CheckboxColumn(
                HEADINGS["low_confidence"],
                help=f"Less than {LOW_CONFIDENCE_WEIGHT:.0%} of the forecast comes from the customer's own orders."),
        },
    )

    # -----------------------------------------------------------------------
    # One customer, explained

    st.subheader("Why a forecast differs from the customer's own average")
    pulled = table.assign(pull=(table["expected_next_order"] - table["average_order_value"]).abs())
    repeat = pulled[pulled["orders"] == 2] if (pulled["orders"] == 2).any() else pulled[pulled["orders"] >= 2]
    example = str((repeat if len(repeat) else pulled).sort_values("pull", ascending=False).iloc[0]["customer"])
    options = [str(c) for c in window["customer"]]
    if not search and example not in options:
        options = [example] + options
    remembered = state.kept("customer")
    if remembered is not None and remembered not in options and (table["customer"].astype(str) == remembered).any() \
            and not search:
        options = [remembered] + options
    if not options:
        st.info("No customer matches the search: change it to pick someone.")
        picked = None
    else:
        labels = dict(zip(options, state.shown_ids(pd.DataFrame({"customer": options}), dataset)["customer"]))
        picked = st.selectbox("Customer", options, format_func=labels.get,
                              **state.remember("customer", example if example in options else options[0], options),
                              help="The customers of the table's page above (find or page to others).")
    if picked is not None:
        row = table[table["customer"].astype(str) == picked].iloc[0]
        name = labels[picked]
        own_weight = float(row["own_history_weight"])
        on_log = fit.get("variance") == "log"
        centre = None if fit.get("method") == "plain" else float(fit.get("centre", math.nan))
        if centre is not None and not on_log and 0.005 < own_weight < 0.98:
            # On the money scale forecast = w * own average + (1 - w) * value pulled toward, so the value this
            # customer is pulled toward (their segment's, for segment methods) is read back from their own row.
            centre = (float(row["expected_next_order"]) - own_weight * float(row["average_order_value"])) \
                / (1 - own_weight)
        sentence = words.forecast_sentence(orders=int(row["orders"]), average=float(row["average_order_value"]),
                                           forecast=float(row["expected_next_order"]), own_weight=own_weight,
                                           centre=centre, symbol=symbol, log_scale=on_log)
        usual_low, usual_high = float(row["expected_low"]), float(row["expected_high"])
        if abs(usual_high - usual_low) < 0.005:
            usual = (f"what they usually spend per order is put at {words.money(usual_high, symbol)}, with no "
                     "range: this way of forecasting does not measure how sure that figure is")
        else:
            usual = (f"what they usually spend per order is probably {words.money_range(usual_low, usual_high, symbol)}"
                     f" ({level:.0%} range)")
        st.markdown(f"**{name}.** {sentence} Their next order will probably be "
                    f"{words.money_range(float(row['next_order_low']), float(row['next_order_high']), symbol)} "
                    f"({next_level:.0%} range); {usual}.")

        chart_col, orders_col = st.columns([3, 2])
        with chart_col:
            small = len(table) <= charts.DOTS_AT_MOST
            chart = charts.pull_toward_centre(table, symbol=symbol, highlight=picked, label=name,
                                               shown_ids=shown_all["customer"] if small else None)
            layout.chart(chart, key="pull_chart")
            if small:
                st.caption("Each dot is a customer; bigger dots have more orders. Dots on the dashed line kept their "
                           "own average; dots off it were pulled toward what similar customers spend. Orange-red "
                           "dots are of low confidence. The ringed dot is the customer picked above.")
            else:
                st.caption(f"Where the {len(table):,} customers fall: the darker a cell, the more customers in it. "
                           "On the dashed line the forecast equals the customer's own average; off it, the "
                           "forecast was pulled toward what similar customers spend. The ring is the customer "
                           "picked above.")
        with orders_col:
            own = result.orders[result.orders["customer"].astype(str) == picked]
            st.markdown(f"**{name}'s orders** ({words.orders_word(len(own))})")
            st.dataframe(
                own[["order_date", "order_id", "order_value"]], hide_index=True, key="customer_orders",
                height=layout.table_height(len(own), most=330),
                column_config={"order_date": st.column_config.DatetimeColumn(HEADINGS["order_date"],
                                                                             format="YYYY-MM-DD"),
                               "order_id": st.column_config.TextColumn(HEADINGS["order_id"]),
                               "order_value": st.column_config.NumberColumn(HEADINGS["order_value"],
                                                                            format=money_format)},
            )

    # -----------------------------------------------------------------------
    # Downloads

    st.subheader("Download the forecasts")
    layout.sharing_controls(HERE)
    salt = state.pseudonym_salt() or ""
    stem = Path(dataset.name).stem
    first, second = st.columns(2)
    # Made when clicked (Streamlit runs the function then), not on every run of the page.
    first.download_button("Download all forecasts (CSV)", data=partial(state.forecast_csv, dataset, method, variance,
                                                                      salt),
                          file_name=f"{stem}_forecasts.csv", mime="text/csv", key="download_forecasts_csv",
                          on_click="ignore", icon=":material/download:")
    layout.excel_download("Download all forecasts (Excel)", key="download_forecasts_xlsx", rows=len(table),
                          file_name=f"{stem}_forecasts.xlsx", make=state.forecast_excel,
                          args=(dataset, method, variance, salt, symbol), column=second)
    st.caption("The CSV keeps the column names scripts rely on; the Excel file has headings for people, money "
               "and percentage formats and a header row that stays in view. Text cells that a spreadsheet could "
               "run as a formula are made safe in both.")

# ---------------------------------------------------------------------------
# Details: how the forecasts are made

with st.expander("How the forecasts are made (for the statistically minded): the method and its fitted numbers",
                 expanded=table is None):
    st.caption("For the statistically minded. The automatic choices are what the accuracy check found best on "
               "your own orders; change them only to compare.")
    left, right = st.columns(2)
    with left:
        chosen_method = st.selectbox(words.CONTROL_LABELS["method"], methods,
                                     **state.remember("method", "auto", methods),
                                     format_func=words.method_label,
                                     help="How each customer's average is combined with what other customers spend.")
        st.caption(words.METHOD_WORDS.get(chosen_method, ""))
    with right:
        chosen_variance = st.selectbox(words.CONTROL_LABELS["variance"], variances,
                                       **state.remember("variance", "auto", variances),
                                       format_func=words.variance_label,
                                       help="How much one order's value varies around the customer's usual spend. "
                                            "It decides how far a customer's own average can be trusted.")
        st.caption(words.VARIANCE_WORDS.get(chosen_variance, ""))
    report = state.tail(dataset)
    st.markdown(words.tail_sentence(report.top1_revenue_share, report.tail_index))
    if table is not None and settled.ok:
        picked_choice = settled.value
        fit = table.attrs.get("fit", {})
        st.markdown(f"In use: {words.pair_words(fit.get('method', ''), fit.get('variance', ''))}. "
                    + words.choice_sentence(picked_choice.chosen_by, picked_choice.check, picked_choice.method,
                                            fit.get("variance", "")))
        if fit.get("notes"):
            st.caption(fit["notes"])
        numbers = {key: value for key, value in fit.items()
                   if isinstance(value, (int, float)) and not key.startswith(("tail_", "variance_"))
                   and key not in ("customers", "level", "next_level")}
        if fit.get("method") == "plain":
            numbers.pop("centre", None)  # own averages pull toward nothing
        st.dataframe(
            pd.DataFrame({"number": list(numbers),
                          "value": [("yes" if v else "no") if isinstance(v, bool) else f"{float(v):,.6g}"
                                    for v in numbers.values()],
                          "what it is": [words.FIT_WORDS.get(k, "") for k in numbers]}),
            hide_index=True, key="fit_numbers", height=layout.table_height(len(numbers)),
            column_config={"number": st.column_config.TextColumn("Fitted number"),
                           "value": st.column_config.TextColumn("Value"),
                           "what it is": st.column_config.TextColumn("What it is", width="large")})
