"""Cohort outlook: revenue ahead from each group of customers, and the same outlook tried on the past."""

from __future__ import annotations

import math
from pathlib import Path

import streamlit as st

from dashboard import charts, layout, state, words
from forecasting import csv_text
from forecasting.exports import pseudonymise

HERE = "outlook"

layout.page_header(
    "Cohort outlook",
    "Revenue to expect from the customers you already have, grouped by when they first ordered (or by segment), "
    "and a check of the same outlook made at an earlier date against what really came in.",
)
if not layout.dataset_line():
    st.stop()
if state.optional_module("outlook") is None or state.optional_module("forecasts") is None:
    layout.coming("The cohort outlook page")
    st.stop()

dataset = state.current()
result = state.current_result()
symbol = state.money_symbol(dataset)
money_format = layout.money_format(symbol)
work = layout.Work(3)
work.step("Working out each customer's next order", state.forecasts, dataset, state.kept("method", "auto"),
          state.kept("variance", "auto"))
method, variance = state.method_in_use(dataset)

HORIZONS = [90, 180, 365]
groupings = {"quarter": "quarter of first order", "month": "month of first order"}
if "segment" in result.orders.columns:
    groupings["segment"] = "segment"

first, second = st.columns(2)
horizon = first.selectbox("Period ahead", HORIZONS, **state.remember("horizon", 180, HORIZONS),
                          format_func=lambda days: f"next {days} days",
                          help="How far ahead revenue is projected (from the last order date in the file).")
by = second.selectbox("Group customers by", list(groupings),
                      **state.remember("cohort_by", "quarter", list(groupings)), format_func=groupings.get)

ahead = work.step(f"Fitting how often customers come back and projecting the next {horizon} days",
                  state.outlook, dataset, method, variance, float(horizon), by)
past = work.step("Trying the same outlook on the past", state.outlook_backtest, dataset, method, variance,
                 float(horizon), by)
work.finish()

if not ahead.ok:
    layout.show_problem(ahead, HERE)
    st.stop()
projection = ahead.value
total = projection.total
frequency = projection.fit.as_dict()

st.subheader(f"The next {horizon} days")
if not math.isfinite(float(total["projected_revenue"])):
    st.warning("The order-frequency model could not be fitted well enough on this data to project revenue. "
               + (frequency.get("notes") or "") + " A longer order history with more customers helps.")
    st.stop()
cells = st.columns([1.1, 1.6, 0.8, 0.8])  # the range needs the room: its label is never cut short
cells[0].metric(f"Projected revenue, from {projection.as_of:%d %b %Y}",
                words.money(total["projected_revenue"], symbol))
cells[1].metric("What may actually come in",
                f"{words.money(total['revenue_range_low'], symbol)} to "
                f"{words.money(total['revenue_range_high'], symbol)}",
                help=f"{projection.level:.0%} range for the revenue that will actually come in: it includes the "
                     "luck of which customers order and how much, as well as what the data leave unknown.")
cells[2].metric("Orders expected", f"{total['expected_orders']:,.0f}")
cells[3].metric("Customers", f"{int(total['customers']):,}")
st.markdown(f"An active customer orders about **{frequency['orders_per_year_active']:.1f} times a year**, and after "
            f"each repeat order about **{frequency['chance_stop_after_order']:.0%}** stop for good (order-frequency "
            "model BG/NBD). Only customers you already have are counted: new customers are not included.")
notes = [f"The average outcome itself is known to within {words.money(total['projected_low'], symbol)} to "
         f"{words.money(total['projected_high'], symbol)} ({projection.level:.0%} range of the expected amount)."]
if projection.seasons == "month":
    notes.append(f"Adjusted for the time of year: from the months' repeat orders so far, the next {horizon} days "
                 f"count as {projection.seasonal_days:.0f} average days.")
else:
    notes.append("Not adjusted for the time of year (that needs a full year of orders).")
if frequency.get("notes"):
    notes.append(frequency["notes"])
st.caption(" ".join(notes))


def with_actual_range(table):
    """The chart's whiskers show the range for what may actually come in."""
    return table.assign(projected_low=table["revenue_range_low"], projected_high=table["revenue_range_high"])


st.plotly_chart(charts.cohort_projection(with_actual_range(projection.cohorts), symbol=symbol,
                                         title=f"Projected revenue by {groupings[by]} "
                                               f"(whiskers: {projection.level:.0%} range of what may come in)",
                                         grouped_by=groupings[by]),
                key="cohort_chart", theme=None, config={"displaylogo": False})

st.subheader("Tried on the past")
if not past.ok:
    st.info(f"The outlook could not be tried on the past: {past.worded(HERE)}")
else:
    check = past.value
    bt = check.total
    st.plotly_chart(charts.cohort_backtest(with_actual_range(check.cohorts), symbol=symbol,
                                           title=f"Made on {check.cutoff:%d %b %Y}: projected (with the range of "
                                                 f"what may come in) against actual, {check.window_days:.0f} days",
                                           grouped_by=groupings[by]),
                    key="cohort_backtest_chart", theme=None, config={"displaylogo": False})
    sentences = [f"Made from the orders before {check.cutoff:%d %B %Y}, the outlook projected "
                 f"{words.money(bt['projected_revenue'], symbol)} from the {bt['customers']:,} customers of the "
                 f"time for the next {check.window_days:.0f} days; they actually spent "
                 f"{words.money(bt['actual_revenue'], symbol)}"]
    if bt.get("error_pct") is not None and math.isfinite(float(bt["error_pct"])):
        sentences[0] += f" ({float(bt['error_pct']):+.0f}%)."
    else:
        sentences[0] += "."
    if bt.get("run_rate_error_pct") is not None and math.isfinite(float(bt["run_rate_error_pct"])):
        sentences.append(f"Carrying each customer's past pace forward would have given "
                         f"{words.money(bt['run_rate_revenue'], symbol)} ({float(bt['run_rate_error_pct']):+.0f}%).")
    if bt.get("new_customer_revenue"):
        sentences.append(f"New customers who first ordered in that window spent another "
                         f"{words.money(bt['new_customer_revenue'], symbol)}, which no outlook of existing "
                         "customers includes.")
    st.markdown(" ".join(sentences))
    st.caption(f"The actual amount fell inside the {check.outlook.level:.0%} range of what may come in (the "
               f"whiskers) for {bt['cohorts_inside_revenue_range']} of {len(check.cohorts)} groups, and inside the "
               f"narrower range of the expected amount for {bt['cohorts_inside_interval']}. When the actual amount "
               "misses the wider range for most groups on the same side, the projection itself is off, not "
               "just unlucky.")

with st.expander("Table and download"):
    st.dataframe(projection.cohorts, hide_index=True, key="cohort_table",
                 column_config={
                     "cohort": st.column_config.TextColumn("Group"),
                     "customers": st.column_config.NumberColumn("Customers", format="%d"),
                     "expected_orders": st.column_config.NumberColumn("Orders expected", format="%.0f"),
                     "projected_revenue": st.column_config.NumberColumn("Projected", format=money_format),
                     "projected_low": st.column_config.NumberColumn("Expected amount from", format=money_format),
                     "projected_high": st.column_config.NumberColumn("Expected amount to", format=money_format),
                     "revenue_range_low": st.column_config.NumberColumn("May come in from", format=money_format),
                     "revenue_range_high": st.column_config.NumberColumn("May come in to", format=money_format),
                     "share_of_projected_revenue": st.column_config.NumberColumn("Share", format="percent"),
                 })
    layout.sharing_controls(HERE)
    salt = state.pseudonym_salt()

    def customers_csv(table=projection.customers, salt=salt) -> str:
        # Made when clicked (Streamlit runs it then), not on every run of the page.
        return csv_text(pseudonymise(table, salt=salt) if salt else table)

    st.download_button("Download the projection for every customer (CSV)", data=customers_csv,
                       file_name=f"{Path(dataset.name).stem}_outlook_{horizon}_days.csv", mime="text/csv",
                       key="download_outlook", on_click="ignore", icon=":material/download:")
