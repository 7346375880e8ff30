"""Revenue outlook: the money of the months ahead from the customers you have and the new ones, tried on the past."""

from __future__ import annotations

import math
from pathlib import Path

import streamlit as st

from dashboard import layout, outlook_charts, state, words
from forecasting import csv_text
from forecasting.options import DEFAULT_METHOD, DEFAULT_VARIANCE
from forecasting.exports import pseudonymise

HERE = "outlook"

layout.page_header(
    "Cohort outlook",
    "The revenue to expect in the months ahead: from the customers you already have (grouped by when they first "
    "ordered, or by segment) and from new customers still to come. Then the same outlook, made at earlier dates, "
    "against what really came in.",
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
work = layout.Work(4)
work.step("Working out each customer's next order", state.forecasts, dataset, state.kept("method", DEFAULT_METHOD),
          state.kept("variance", DEFAULT_VARIANCE))
# The forward outlook uses the forecasts the Forecasts page shows; the checks against the past make the same
# choice again at every cut-off, as the command line does.
method, variance = state.method_in_use(dataset)
chosen_method, chosen_variance = state.kept("method", DEFAULT_METHOD), state.kept("variance", DEFAULT_VARIANCE)

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

ahead = work.step(f"Fitting how often customers come back, how many new ones arrive, and projecting the next "
                  f"{horizon} days", state.outlook, dataset, method, variance, float(horizon), by)
past = work.step("Trying the same outlook on the past", state.outlook_backtest, dataset, chosen_method,
                 chosen_variance, float(horizon), by)
rolling = work.step("Trying it at several dates over the last year", state.outlook_rolling, dataset, chosen_method,
                    chosen_variance, float(horizon), by)
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


def money_range(low, high) -> str:
    return f"{words.money(low, symbol)} to {words.money(high, symbol)}"


has_new = "projected_revenue_new" in total
cells = st.columns(3)
cells[0].metric(f"All revenue, from {projection.as_of:%d %b %Y}", words.money(total["projected_revenue"], symbol),
                help="Customers you have and new customers together.")
cells[0].caption(f"What may actually come in: {money_range(total['revenue_range_low'], total['revenue_range_high'])}")
cells[1].metric(f"From the {int(total['customers']):,} customers you have",
                words.money(total["projected_revenue_existing"], symbol))
cells[1].caption("May come in: "
                 + money_range(total["revenue_range_existing_low"], total["revenue_range_existing_high"]))
if has_new:
    cells[2].metric(f"From about {total['new_customers_expected']:,.0f} new customers",
                    words.money(total["projected_revenue_new"], symbol),
                    help="Customers who have not ordered yet: their first order and any repeat orders before the "
                         "period ends.")
    cells[2].caption("May come in: " + money_range(total["revenue_range_new_low"], total["revenue_range_new_high"]))
st.caption(f"Ranges are {projection.level:.0%} ranges of what may actually come in: they include the luck of which "
           "customers order and how much, as well as what the data leave unknown. The average outcome itself is "
           f"known to within {money_range(total['projected_low'], total['projected_high'])}.")

stop_words = ("after each order, the first included," if frequency["model"] == "mbg-nbd"
              else "after each repeat order")
lines = [f"An active customer orders about **{frequency['orders_per_year_active']:.1f} times a year**, and "
         f"{stop_words} about **{frequency['chance_stop_after_order']:.0%}** stop for good."]
if projection.arrivals is not None:
    values = projection.new_customer_values
    lines.append(f"{projection.arrivals.words} A first order averages {words.money(values['first_mean'], symbol)}, "
                 f"a repeat order {words.money(values['repeat_mean'], symbol)}.")
lines.append(projection.repeat_model.season_words)
st.markdown(" ".join(lines))
with st.expander("How this is worked out"):
    st.markdown(
        f"- How often customers come back: the **{frequency['model_name']}** model. "
        + (frequency["model_choice"] or "")
        + f"\n- Time of year: {projection.repeat_model.season_words}"
        + "\n- Each customer's revenue is their expected number of orders times their expected next order "
          "(from the Forecasts page). New customers arrive at the rate the shop's own first orders show; each "
          "brings a first order and repeat orders by the same model.")
    if frequency.get("notes"):
        st.caption(frequency["notes"])

st.plotly_chart(outlook_charts.group_projection(
    projection.cohorts, symbol=symbol, grouped_by=groupings[by],
    title=f"Projected revenue by {groupings[by]} and from new customers "
          f"(whiskers: {projection.level:.0%} range of what may come in)"),
    key="cohort_chart", theme=None, config={"displaylogo": False})

st.subheader("Month by month")
schedule = projection.schedule
st.plotly_chart(outlook_charts.monthly_schedule(schedule, symbol=symbol,
                                                title="Projected revenue in each month of the period"),
                key="schedule_chart", theme=None, config={"displaylogo": False})
st.dataframe(schedule, hide_index=True, key="schedule_table", height=layout.table_height(len(schedule)),
             column_config={
                 "month": st.column_config.TextColumn("Month"),
                 "days": st.column_config.NumberColumn("Days", format="%.1f",
                                                       help="Days of the month inside the period."),
                 "expected_orders_existing": st.column_config.NumberColumn("Orders, customers you have",
                                                                           format="%.0f"),
                 "projected_revenue_existing": st.column_config.NumberColumn("Customers you have",
                                                                             format=money_format),
                 "new_customers": st.column_config.NumberColumn("New customers", format="%.0f"),
                 "expected_orders_new": st.column_config.NumberColumn("Orders, new customers", format="%.0f"),
                 "projected_revenue_new": st.column_config.NumberColumn("From new customers", format=money_format),
                 "projected_revenue": st.column_config.NumberColumn("All", format=money_format),
                 "cumulative_revenue": st.column_config.NumberColumn("So far", format=money_format),
             })
st.download_button("Download the month-by-month schedule (CSV)", data=csv_text(schedule),
                   file_name=f"{Path(dataset.name).stem}_outlook_{horizon}_days_by_month.csv", mime="text/csv",
                   key="download_schedule", on_click="ignore", icon=":material/download:")
st.caption("Month figures are the expected amounts; the ranges above are for the whole period.")

st.subheader("Tried on the past")
if not past.ok:
    st.info(f"The outlook could not be tried on the past: {past.worded(HERE)}")
else:
    check = past.value
    bt = check.total
    st.plotly_chart(outlook_charts.group_backtest(
        check.cohorts, symbol=symbol, grouped_by=groupings[by],
        title=f"Made on {check.cutoff:%d %b %Y}: projected (with the range of what may come in) against actual, "
              f"{check.window_days:.0f} days"),
        key="cohort_backtest_chart", theme=None, config={"displaylogo": False})
    sentences = [f"Made from the orders before {check.cutoff:%d %B %Y}, the outlook projected "
                 f"{words.money(bt['projected_revenue'], symbol)} of revenue for the next {check.window_days:.0f} "
                 f"days, new customers included; they actually spent {words.money(bt['actual_revenue'], symbol)}"]
    if bt.get("error_pct") is not None and math.isfinite(float(bt["error_pct"])):
        sentences[0] += f" ({float(bt['error_pct']):+.0f}%)."
    else:
        sentences[0] += "."
    sentences.append(f"Of that, the {bt['customers']:,} customers known then spent "
                     f"{words.money(bt['actual_revenue_existing'], symbol)} (projected "
                     f"{words.money(bt['projected_revenue_existing'], symbol)}) and new customers "
                     f"{words.money(bt['actual_revenue_new'], symbol)} (projected "
                     f"{words.money(bt['projected_revenue_new'], symbol)}).")
    if bt.get("run_rate_error_pct") is not None and math.isfinite(float(bt["run_rate_error_pct"])):
        sentences.append(f"Carrying the recent pace forward would have given "
                         f"{words.money(bt['run_rate_revenue'], symbol)} ({float(bt['run_rate_error_pct']):+.0f}%).")
    st.markdown(" ".join(sentences))
    st.caption(f"The actual amount fell inside the {check.outlook.level:.0%} range of what may come in (the "
               f"whiskers) for {bt['cohorts_inside_revenue_range']} of {len(check.cohorts)} groups. When it misses "
               "for most groups on the same side, the projection itself is off, not just unlucky.")

if rolling.ok:
    checked = rolling.value
    summary = checked.summary
    st.markdown(f"**At {summary['cutoffs']} dates over the last year** the outlook of all revenue missed by "
                f"**{summary['mean_abs_error_pct']:.1f}%** on average ({summary['within_10pct']} of "
                f"{summary['cutoffs']} within 10%); carrying the recent pace forward missed by "
                f"{summary['run_rate_mean_abs_error_pct']:.0f}%, and a simple grid of customers by how recently "
                f"and how often they ordered by {summary['cell_mean_abs_error_pct']:.0f}%.")
    if summary["warning"]:
        st.warning(summary["warning"])
    st.plotly_chart(outlook_charts.rolling_check(
        checked.table, symbol=symbol,
        title=f"The {horizon}-day outlook made at each date against all revenue that came in after it"),
        key="rolling_chart", theme=None, config={"displaylogo": False})
    with st.expander("Table of the checks"):
        st.dataframe(checked.table, hide_index=True, key="rolling_table",
                     column_order=["cutoff", "actual_revenue", "projected_revenue", "error_pct",
                                   "revenue_range_low", "revenue_range_high", "error_existing_pct", "error_new_pct",
                                   "run_rate_error_pct", "cell_error_pct", "seasons", "frequency_model"],
                     column_config={
                         "cutoff": st.column_config.DateColumn("Made on", format="D MMM YYYY"),
                         "actual_revenue": st.column_config.NumberColumn("Came in", format=money_format),
                         "projected_revenue": st.column_config.NumberColumn("Projected", format=money_format),
                         "error_pct": st.column_config.NumberColumn("Miss", format="%+.1f%%"),
                         "revenue_range_low": st.column_config.NumberColumn("May come in from", format=money_format),
                         "revenue_range_high": st.column_config.NumberColumn("to", format=money_format),
                         "error_existing_pct": st.column_config.NumberColumn("Miss, customers you had",
                                                                             format="%+.1f%%"),
                         "error_new_pct": st.column_config.NumberColumn("Miss, new customers", format="%+.1f%%"),
                         "run_rate_error_pct": st.column_config.NumberColumn("Run-rate guess miss", format="%+.0f%%"),
                         "cell_error_pct": st.column_config.NumberColumn("Grid miss", format="%+.0f%%"),
                         "seasons": st.column_config.TextColumn("Time of year"),
                         "frequency_model": st.column_config.TextColumn("Model"),
                     })
else:
    st.info(f"The outlook could not be tried at several dates: {rolling.worded(HERE)}")

with st.expander("Table and download"):
    st.dataframe(projection.cohorts, hide_index=True, key="cohort_table",
                 column_config={
                     "cohort": st.column_config.TextColumn("Group"),
                     "customers": st.column_config.NumberColumn("Customers", format="%.0f"),
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

    st.download_button("Download the projection for every customer you have (CSV)", data=customers_csv,
                       file_name=f"{Path(dataset.name).stem}_outlook_{horizon}_days.csv", mime="text/csv",
                       key="download_outlook", on_click="ignore", icon=":material/download:")
