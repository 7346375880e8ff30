"""Revenue outlook: the money of the months ahead from the customers you have and the new ones, tried on the past."""

from __future__ import annotations

import math
from pathlib import Path

import streamlit as st

from dashboard import layout, outlook_charts, state, words
from forecasting import OrderDataError, csv_text
from forecasting.exports import pseudonymise
from forecasting.frequency import MODEL_NAMES
from forecasting.options import DEFAULT_METHOD, DEFAULT_VARIANCE
from forecasting.outlook import rolling_cutoffs

HERE = "outlook"

dataset, result = layout.start_page(
    "Revenue outlook",
    "The revenue to expect in the months ahead: from the customers you already have (grouped by when they first "
    "ordered, or by segment) and from new customers still to come. Then, when you ask, the same outlook made at "
    "earlier dates against what really came in.",
)
symbol = state.money_symbol(dataset)
money_format = layout.money_format(symbol)
work = layout.Work(2)
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
horizon = first.selectbox(words.CONTROL_LABELS["horizon"], HORIZONS, **state.remember("horizon", 180, HORIZONS),
                          format_func=lambda days: f"next {days} days",
                          help="How far ahead revenue is projected (from the last order date in the file).")
by = second.selectbox(words.CONTROL_LABELS["by"], list(groupings),
                      **state.remember("cohort_by", "quarter", list(groupings)), format_func=groupings.get)

ahead = work.step(f"Working out how often customers come back and how many new ones arrive, and projecting the "
                  f"next {horizon} days", state.outlook, dataset, method, variance, float(horizon), by)
work.finish()

if not ahead.ok:
    layout.show_problem(ahead, HERE)
    st.stop()
projection = ahead.value
total = projection.total
frequency = projection.fit.as_dict()

st.subheader(f"The next {horizon} days")
if not math.isfinite(float(total["projected_revenue"])):
    st.warning("How often customers come back could not be worked out well enough from these orders to project "
               "revenue: a longer order history with more customers who ordered twice or more helps. The details "
               "are under How this is worked out below.")


def money_range(low, high) -> str:
    return f"{words.money(low, symbol)} to {words.money(high, symbol)}"


def how_it_is_worked_out() -> None:
    """The models, the tests that chose them and their fitted numbers, each with a line on what it is."""
    with st.expander("How this is worked out: the models and their fitted numbers"):
        name = frequency.get("model_name", "")
        other = next((n for n in MODEL_NAMES.values() if n != name), "")
        st.markdown(
            f"- **How often customers come back**: the {name} model: {words.OUTLOOK_WORDS.get(name, '')}. "
            f"The other model on offer is {other}: {words.OUTLOOK_WORDS.get(other, '')}. Both are fitted by "
            f"maximum likelihood (the *likelihood* is {words.OUTLOOK_WORDS['likelihood']}). "
            + (frequency.get("model_choice") or "")
            + f"\n- **Time of year** (the *month index* is {words.OUTLOOK_WORDS['month index']}). "
            + projection.repeat_model.season_words
            + ("\n- **New customers**: a Poisson regression of the first orders per day, with a month-of-year "
               "pattern and a yearly trend, each kept only when a likelihood-ratio test finds it at the 5% level. "
               + projection.arrivals.words if projection.arrivals is not None else "")
            + "\n- Each customer's revenue is their expected number of orders times their expected next order "
              "(from the Forecasts page). New customers bring a first order worth the shop's average first order "
              "and repeat orders by the same model. The ranges come from simulating who orders, how often, for how "
              "much, and how many new customers arrive.")
        if frequency.get("notes"):
            st.caption(frequency["notes"])
        fitted = [key for key in ("r", "alpha_days", "a", "b") if key in frequency]
        if fitted:
            st.dataframe(
                {"Fitted number": fitted, "Value": [f"{float(frequency[k]):,.4g}" for k in fitted],
                 "What it is": [words.OUTLOOK_WORDS[k] for k in fitted]},
                hide_index=True, key="outlook_fit_numbers", height=layout.table_height(len(fitted)),
                column_config={"What it is": st.column_config.TextColumn(width="large")})


if not math.isfinite(float(total["projected_revenue"])):
    how_it_is_worked_out()
    st.stop()

has_new = "projected_revenue_new" in total
cells = st.columns(3)
cells[0].metric(f"All revenue, from {projection.as_of:%d %b %Y}", words.money(total["projected_revenue"], symbol),
                help="Customers you have and new customers together.")
cells[0].caption(f"May actually come in: {money_range(total['revenue_range_low'], total['revenue_range_high'])}")
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

lines = [words.return_sentence(frequency["orders_per_year_active"], frequency["chance_stop_after_order"],
                               frequency["model"])]
if projection.arrivals is not None and has_new:
    arrivals = projection.arrivals
    lines.append(words.new_customers_sentence(total["new_customers_expected"], horizon, terms=arrivals.terms,
                                              tests=arrivals.tests, growth_per_year=arrivals.growth_per_year,
                                              month_index=arrivals.month_index))
    values = projection.new_customer_values
    lines.append(f"A first order averages {words.money(values['first_mean'], symbol)}, a repeat order "
                 f"{words.money(values['repeat_mean'], symbol)}.")
repeat = projection.repeat_model
lines.append(words.season_sentence(repeat.seasons, repeat.index, test=repeat.season_test))
st.markdown(" ".join(lines))
how_it_is_worked_out()

layout.chart(outlook_charts.group_projection(
    projection.cohorts, symbol=symbol, grouped_by=groupings[by],
    title=f"Projected revenue by {groupings[by]} and from new customers "
          f"(whiskers: {projection.level:.0%} range of what may come in)"),
    key="cohort_chart")

st.subheader("Month by month")
schedule = projection.schedule
layout.chart(outlook_charts.monthly_schedule(schedule, symbol=symbol,
                                             title="Projected revenue in each month of the period"),
             key="schedule_chart")
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

# ---------------------------------------------------------------------------
# Tried on the past: the outlook made again at ten earlier dates, when asked (it is ten outlooks' work)

st.subheader("Tried on the past")
try:
    cutoffs = rolling_cutoffs(result.orders, horizon=horizon)
except OrderDataError as problem:
    cutoffs = []
    reason = state.Outcome(error=state.problem_fields(problem)).worded(HERE)
    st.info(f"The outlook cannot be tried on the past here. {reason}")
check_args = (dataset, chosen_method, chosen_variance, float(horizon), by)
rolling = None
if cutoffs:
    asked = state.outlook_rolling.is_done(*check_args)
    if not asked:
        offer = st.empty()  # the offer goes once the check is made
        with offer.container():
            st.markdown(f"How far off would this outlook have been? It can be made again from the orders before each "
                        f"of {len(cutoffs)} dates between {cutoffs[0]:%d %b %Y} and {cutoffs[-1]:%d %b %Y}, each "
                        f"time for the {horizon} days after it, and compared with the revenue that really came in. "
                        f"That is {len(cutoffs)} outlooks' work, so it is made when you ask.")
            asked = st.button("Check it at ten earlier dates", key="rolling_check", icon=":material/history:")
        if asked:
            offer.empty()
    if asked:
        work = layout.Work(1)
        rolling = work.step(f"Making the outlook again at {len(cutoffs)} earlier dates and comparing each with what "
                            "came in after it", state.outlook_rolling, *check_args)
        work.finish()

if rolling is not None and not rolling.ok:
    st.info(f"The outlook could not be tried on the past: {rolling.worded(HERE)}")
elif rolling is not None:
    checked = rolling.value
    summary = checked.summary
    st.markdown(f"**At {summary['cutoffs']} dates over the last year** the outlook of all revenue missed by "
                f"**{summary['mean_abs_error_pct']:.1f}%** on average ({summary['within_10pct']} of "
                f"{summary['cutoffs']} within 10%); carrying the recent pace forward missed by "
                f"{summary['run_rate_mean_abs_error_pct']:.0f}%, and a simple grid of customers by how recently "
                f"and how often they ordered by {summary['cell_mean_abs_error_pct']:.0f}%.")
    if summary["warning"]:
        st.warning(summary["warning"])
    layout.chart(outlook_charts.rolling_check(
        checked.table, symbol=symbol,
        title=f"The {horizon}-day outlook made at each date against all revenue that came in after it"),
        key="rolling_chart")

    latest = checked.backtests[-1]
    bt = latest.total
    sentences = [f"Made from the orders before {latest.cutoff:%d %B %Y}, the latest of those dates, the outlook "
                 f"projected {words.money(bt['projected_revenue'], symbol)} for the next "
                 f"{latest.window_days:.0f} days, new customers included; they actually spent "
                 f"{words.money(bt['actual_revenue'], symbol)}"]
    if bt.get("error_pct") is not None and math.isfinite(float(bt["error_pct"])):
        sentences[0] += f" ({float(bt['error_pct']):+.0f}%)."
    else:
        sentences[0] += "."
    sentences.append(f"Of that, the {bt['customers']:,} customers known then spent "
                     f"{words.money(bt['actual_revenue_existing'], symbol)} (projected "
                     f"{words.money(bt['projected_revenue_existing'], symbol)}) and new customers "
                     f"{words.money(bt['actual_revenue_new'], symbol)} (projected "
                     f"{words.money(bt['projected_revenue_new'], symbol)}).")
    st.markdown(" ".join(sentences))
    layout.chart(outlook_charts.group_backtest(
        latest.cohorts, symbol=symbol, grouped_by=groupings[by],
        title=f"Made on {latest.cutoff:%d %b %Y}: projected (with the range of what may come in) against actual, "
              f"by group"),
        key="cohort_backtest_chart")
    st.caption(f"The actual amount fell inside the {latest.outlook.level:.0%} range of what may come in (the "
               f"whiskers) for {bt['cohorts_inside_revenue_range']} of {len(latest.cohorts)} groups. When it misses "
               "for most groups on the same side, the projection itself is off, not just unlucky.")

    with st.expander("Table of the checks"):
        shown = checked.table.assign(
            frequency_model=checked.table["frequency_model"].map(lambda m: MODEL_NAMES.get(m, m)),
            seasons=checked.table["seasons"].map(lambda s: words.SEASON_LABELS.get(s, s)))
        st.dataframe(shown, hide_index=True, key="rolling_table",
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
                         "frequency_model": st.column_config.TextColumn("How often customers come back"),
                     })

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
