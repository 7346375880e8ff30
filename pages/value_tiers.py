"""Value tiers: customers grouped by what they are expected to bring in, with a list per tier to download."""

from __future__ import annotations

import math
import re
from functools import partial
from pathlib import Path

import streamlit as st

from dashboard import charts, layout, state, words
from forecasting import csv_text
from forecasting.exports import HEADINGS, pseudonymise
from forecasting.options import LOW_CONFIDENCE_WEIGHT

HERE = "tiers"

dataset, _ = layout.start_page(
    "Value tiers",
    "Customers ranked by what they are expected to bring in and split into tiers, so you can see who matters "
    "most, and download each tier as a list (for a thank-you note or an offer, say).",
)
symbol = state.money_symbol(dataset)
money_format = layout.money_format(symbol)
work = layout.Work(2)
work.step("Working out each customer's next order", state.forecasts, dataset, state.kept("method", "auto"),
          state.kept("variance", "auto"))
method, variance = state.method_in_use(dataset)

HORIZONS = [90, 180, 365]
SPLITS = {(0.1, 0.3): "top 10%, next 30%, the rest", (0.2, 0.3): "top 20%, next 30%, the rest",
          (0.05, 0.15, 0.3): "top 5%, next 15%, next 30%, the rest"}
RANKS = {"revenue": "projected revenue in the period ahead", "value": "expected next order"}

first, second, third = st.columns(3)
horizon = first.selectbox(words.CONTROL_LABELS["horizon"], HORIZONS, **state.remember("horizon", 180, HORIZONS),
                          format_func=lambda days: f"next {days} days",
                          help="How far ahead revenue is projected (from the last order date in the file).")
rank = second.selectbox(words.CONTROL_LABELS["rank"], list(RANKS), **state.remember("tier_rank", "revenue", list(RANKS)),
                        format_func=RANKS.get,
                        help="Projected revenue counts how often the customer is likely to order as well as "
                             "how much; the expected next order looks only at how much.")
split = third.selectbox(words.CONTROL_LABELS["shares"], list(SPLITS), **state.remember("tier_split", (0.1, 0.3), list(SPLITS)),
                        format_func=SPLITS.get)
st.caption("The expected next orders are the Forecasts page's (how they are made is set there).")

outcome = work.step("Fitting how often customers come back, projecting revenue and ranking customers",
                    state.tiers, dataset, method, variance, float(horizon), rank, split)
work.finish()
if not outcome.ok:
    layout.show_problem(outcome, HERE)
    st.stop()
if outcome.note:
    st.warning(outcome.note)
rank = outcome.value["rank"]
tiered = outcome.value["customers"]
if tiered.attrs.get("note"):
    st.info(tiered.attrs["note"])
summary = outcome.value["summary"]
lists = outcome.value["lists"]

figure_word = "projected revenue" if rank == "revenue" else "expected next order"
has_revenue = bool(summary["projected_revenue"].notna().any())
shown = summary.assign(customers_pct=100 * summary["share_of_customers"],
                       revenue_pct=100 * summary["share_of_projected_revenue"])
st.dataframe(
    shown, hide_index=True, key="tier_summary", height=layout.table_height(len(summary)),
    # Without projected revenue (the note above says why) its columns are left out rather than shown empty.
    column_order=["tier", "rule", "customers", "customers_pct", "lowest_figure", "highest_figure"]
    + (["projected_revenue", "revenue_pct"] if has_revenue else [])
    + ["average_own_history_weight", "mostly_shop_pattern"],
    column_config={
        "tier": st.column_config.TextColumn("Tier"),
        "rule": st.column_config.TextColumn("Who"),
        "customers": st.column_config.NumberColumn("Customers", format="localized"),
        "customers_pct": st.column_config.NumberColumn("Share", format="%.0f%%", help="Share of all customers."),
        "lowest_figure": st.column_config.NumberColumn("Lowest", format=money_format,
                                                   help=f"The lowest {figure_word} in the tier."),
        "highest_figure": st.column_config.NumberColumn("Highest", format=money_format,
                                                    help=f"The highest {figure_word} in the tier."),
        "projected_revenue": st.column_config.NumberColumn(
            "Projected", format=money_format, help=f"Revenue projected from the tier in the next {horizon} days."),
        "revenue_pct": st.column_config.NumberColumn("Share of revenue", format="%.0f%%"),
        "average_own_history_weight": st.column_config.ProgressColumn(
            f"{HEADINGS['own_history_weight']} (average)", format="percent", min_value=0.0, max_value=1.0,
            help="Average over the tier. Low means the tier's forecasts rest mostly on similar customers."),
        "mostly_shop_pattern": st.column_config.NumberColumn(
            f"{HEADINGS['low_confidence']} (customers)", format="%d",
            help=f"Customers whose forecast is of low confidence: less than {LOW_CONFIDENCE_WEIGHT:.0%} of it comes "
                 "from their own orders, the rest from similar customers (the Forecasts page's rule)."),
    },
)
left, right = st.columns([2, 3])
with left:
    top = summary.iloc[0]
    if math.isfinite(float(top["share_of_projected_revenue"])):
        st.markdown(f"The **{top['tier']}** ({top['rule']}, {int(top['customers']):,} customers) are expected to "
                    f"bring in **{float(top['share_of_projected_revenue']):.0%}** of the revenue projected for the "
                    f"next {horizon} days.")
with right:
    layout.chart(charts.tier_shares(summary, title="Share of customers and of projected revenue" if has_revenue
                                    else "Share of customers"),
                 key="tier_chart")

st.subheader("Customers in a tier")
names = list(summary["tier"])
segments = state.customer_segments(dataset)
if segments is None:
    tier = st.selectbox("Tier", names, **state.remember("tier_shown", names[0], names))
    segment = ""
else:
    left, right = st.columns(2)
    tier = left.selectbox("Tier", names, **state.remember("tier_shown", names[0], names))
    choices = [""] + sorted(set(segments))
    segment = right.selectbox("Segment", choices, **state.remember("tier_segment", "", choices),
                              format_func=lambda s: s if s else "every segment",
                              help="Only the customers of one segment (their latest order's), in the table and in "
                                   "the lists below. The tiers stay those of the whole shop.")
    tiered = tiered.assign(segment=tiered["customer"].astype(str).map(segments).fillna("").to_numpy())
members = tiered[tiered["tier"] == tier]
if segment:
    members = members[members["segment"] == segment]
    in_segment = int((tiered["segment"] == segment).sum())
    st.caption(f"{len(members):,} of the {in_segment:,} customers of segment {segment} are in the {tier}.")
members = members.assign(active_pct=100 * members["chance_active"])
SHOWN_MEMBERS = 1000  # a big shop's tier can hold tens of thousands: the list below has them all
st.dataframe(
    state.shown_ids(members.head(SHOWN_MEMBERS), dataset), hide_index=True, key="tier_members",
    height=layout.table_height(len(members), most=380),
    column_order=["rank", "customer", "segment", "orders", "last_order", "active_pct", "expected_next_order",
                  "expected_orders", "projected_revenue", "own_history_weight", "cohort"],
    column_config={
        "rank": st.column_config.NumberColumn("Rank", format="%d"),
        "customer": st.column_config.TextColumn("Customer"),
        "segment": st.column_config.TextColumn("Segment"),
        "orders": st.column_config.NumberColumn("Orders so far", format="%d"),
        "last_order": st.column_config.DatetimeColumn("Last order", format="D MMM YYYY"),
        "expected_next_order": st.column_config.NumberColumn("Expected next order", format=money_format),
        "expected_orders": st.column_config.NumberColumn(f"Orders expected, next {horizon} days", format="%.2f"),
        "active_pct": st.column_config.NumberColumn(
            "Still shopping here", format="%.0f%%",
            help="The chance this customer has not stopped for good, from how often and how recently they ordered."),
        "projected_revenue": st.column_config.NumberColumn(
            "Projected revenue", format=money_format,
            help="Orders expected in the period times the expected next order; the lists below give its range."),
        "own_history_weight": st.column_config.ProgressColumn(
            HEADINGS["own_history_weight"], format="percent", min_value=0.0, max_value=1.0),
        "cohort": st.column_config.TextColumn("First ordered"),
    },
)
if len(members) > SHOWN_MEMBERS:
    st.caption(f"The first {SHOWN_MEMBERS:,} of the {len(members):,} customers shown; the lists below have them "
               "all.")


def list_csv(table, salt: str | None) -> str:
    """A tier list as safe CSV text, with pseudonyms while they are on."""
    return csv_text(pseudonymise(table, salt=salt) if salt else table)


st.subheader("Download the tier lists")
layout.sharing_controls(HERE)
salt = state.pseudonym_salt()
stem = Path(dataset.name).stem
if segment:
    wanted = set(tiered.loc[tiered["segment"] == segment, "customer"].astype(str))
    lists = {name: table[table["customer"].astype(str).isin(wanted)] for name, table in lists.items()}
    stem = f"{stem}_{re.sub(r'[^a-z0-9]+', '-', segment.lower()).strip('-') or 'segment'}"
    st.caption(f"The lists hold the customers of segment {segment} only.")
buttons = st.columns(len(lists))
for column, (name, table) in zip(buttons, lists.items()):
    # Made when clicked (Streamlit runs the function then), not on every run of the page.
    text = partial(list_csv, table, salt)
    label = "All customers with their tier" if name == "all" else f"{name.capitalize()}"
    slug = "all" if name == "all" else "-".join(name.lower().split())
    column.download_button(f"{label} (CSV)", data=text, file_name=f"{stem}_tier_{slug}.csv", mime="text/csv",
                           key=f"download_tier_{slug}", on_click="ignore", icon=":material/download:")
st.caption("Projected revenue is the expected amount: a customer's likely number of orders in the period times "
           "their expected next order. The range is for that expected amount; what a single customer actually "
           "spends varies much more. Tier names say only where a customer stands on the ranked figure. Each list "
           "gives the customer's last order date and the chance they still shop here.")
