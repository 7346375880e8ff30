"""Accuracy check: would the forecasts have beaten each customer's own average on this shop's orders?"""

from __future__ import annotations

import math

import pandas as pd
import streamlit as st

from dashboard import charts, layout, state, words

layout.page_header(
    "Accuracy check",
    "Before trusting a forecast, test it on orders whose value we already know. Two tests, both against the "
    "simplest forecast there is, each customer's own average.",
)

if not layout.dataset_line():
    st.stop()
judge = state.optional_module("evaluation")
if judge is None or state.optional_module("forecasts") is None:
    layout.coming("The accuracy check")
    st.stop()

dataset = state.current()
with st.spinner("Testing every method on your past orders ..."):
    outcome = state.evaluation(dataset)
if not outcome.ok:
    st.error(outcome.problem)
    st.stop()
found = outcome.value

# The method in use on the Forecasts page (automatic unless the user picked one there).
in_use = state.forecasts(dataset, state.kept("method", "auto"), state.kept("variance", "auto"))
if in_use.ok:
    pair = (str(in_use.value["method"].iloc[0]), str(in_use.value["variance"].iloc[0]))
else:
    pair = (found.chosen["method"], found.chosen["variance"])


def described(method: str, variance: str) -> str:
    return f"{words.method_label(method)} with the {words.variance_label(variance)} spread model"


def row_for(results: pd.DataFrame, method: str, variance: str):
    match = results[(results["method"] == method) & (results["variance"] == variance)]
    return match.iloc[0] if len(match) else None


checked = row_for(found.leave_one_out, *pair) is not None
if not checked:
    st.caption(f"The method in use ({described(*pair)}) has no quick accuracy check yet; the results below are "
               f"for the automatic choice, {described(found.chosen['method'], found.chosen['variance'])}.")
    pair = (found.chosen["method"], found.chosen["variance"])

# ---------------------------------------------------------------------------
# The verdict

backtest_row = row_for(found.backtest, *pair) if len(found.backtest) else None
loo_row = row_for(found.leave_one_out, *pair)
if backtest_row is not None:
    verdict = words.verdict_sentence(float(backtest_row["error_reduction_pct"]),
                                     low=float(backtest_row["ci_low"]), high=float(backtest_row["ci_high"]))
else:
    verdict = words.verdict_sentence(float(loo_row["error_reduction_pct"]) if loo_row is not None else math.nan,
                                     low=float(loo_row["ci_low"]) if loo_row is not None else None,
                                     high=float(loo_row["ci_high"]) if loo_row is not None else None)
st.success(f"**{verdict}**", icon=":material/verified:")
details = [f"Method checked: {described(*pair)}."]
if loo_row is not None and math.isfinite(float(loo_row["error_reduction_pct"])):
    details.append(f"Hiding one past order at a time ({found.held_out:,} orders), its error was "
                   f"{float(loo_row['error_reduction_pct']):.1f}% smaller than the own average's.")
if backtest_row is not None and found.cutoff is not None:
    details.append(f"The next-order test forecast from the orders before {found.cutoff:%d %B %Y} and compared with "
                   f"each customer's first order after it ({found.backtest_scored:,} customers); "
                   f"{float(backtest_row['coverage']):.0%} of those orders fell inside the forecast's 80% range "
                   "(about 80% is what a well-judged range gives).")
st.markdown(" ".join(details))
st.caption(f"Automatic choice: {words.name_words(found.chosen['reason'])}.")
for note in found.notes:
    st.caption(note)

# ---------------------------------------------------------------------------
# Every method

st.subheader("Every method against the customers' own averages")
spreads = [v for v in dict.fromkeys(found.leave_one_out["variance"]) if v != "gamma-model"]
shown_spread = st.selectbox("Spread model in the charts", spreads, format_func=words.variance_label,
                            **state.remember("accuracy_spread", pair[1] if pair[1] in spreads else spreads[0],
                                             spreads),
                            help="The table below has every method with every spread model.")


def for_chart(results: pd.DataFrame) -> pd.DataFrame:
    """One row per method: the chosen spread model (Gamma-Gamma has its own), without the baseline."""
    keep = (results["variance"] == shown_spread) | (results["variance"] == "gamma-model")
    keep &= ~((results["method"] == "plain") & (results["variance"] == "classic"))
    return results[keep]


st.caption("Bars to the right of the zero line beat the own average; the method in use is in orange-red. The "
           "thin lines show the range the gain probably lies in (95%, from re-drawing the customers many times).")
left, right = st.columns(2)
with left:
    st.plotly_chart(charts.method_comparison(for_chart(found.leave_one_out), title="Hiding one past order at a time",
                                             highlight=pair[0]),
                    key="loo_chart", theme=None, config={"displaylogo": False})
with right:
    if len(found.backtest):
        st.plotly_chart(charts.method_comparison(for_chart(found.backtest), title="Next order after the cut-off date",
                                                 highlight=pair[0]),
                        key="backtest_chart", theme=None, config={"displaylogo": False})
    else:
        st.info("There is no next-order test: it needs customers who ordered both before and after a date.")

results = pd.concat([found.leave_one_out.assign(test="hiding one order"),
                     found.backtest.assign(test="next order")], ignore_index=True)
results = results.assign(method_name=results["method"].map(words.method_label),
                         variance_name=results["variance"].map(words.variance_label),
                         coverage_pct=100 * results["coverage"].astype(float))
st.dataframe(
    results, hide_index=True, key="accuracy_table", height=layout.table_height(len(results), most=900),
    column_order=["test", "method_name", "variance_name", "error_reduction_pct", "ci_low", "ci_high",
                  "coverage_pct"],
    column_config={
        "test": st.column_config.TextColumn("Test"),
        "method_name": st.column_config.TextColumn("Method"),
        "variance_name": st.column_config.TextColumn("Spread model"),
        "error_reduction_pct": st.column_config.NumberColumn("Error smaller by", format="%.1f%%"),
        "ci_low": st.column_config.NumberColumn("Probably from", format="%.1f%%"),
        "ci_high": st.column_config.NumberColumn("Probably to", format="%.1f%%"),
        "coverage_pct": st.column_config.NumberColumn(
            "Inside the 80% range", format="%.0f%%",
            help="Share of the tested orders that fell inside the forecast's 80% next-order range."),
    },
)

# ---------------------------------------------------------------------------
# Where the gain comes from

st.subheader("Where the gain comes from")
by_past = found.by_past_orders
if len(by_past):
    mine = by_past[(by_past["method"] == pair[0]) & (by_past["variance"] == pair[1])]
    st.plotly_chart(charts.gain_by_past_orders(mine, title=f"{described(*pair)}, by orders known"),
                    key="past_orders_chart", theme=None, config={"displaylogo": False})
    loo_part = mine[mine["evaluation"] == "leave-one-out"].dropna(subset=["error_reduction_pct"])
    if len(loo_part):
        best = loo_part.sort_values("error_reduction_pct", ascending=False).iloc[0]
        earlier = "1 earlier order" if best["past_orders"] == "1" else f"{best['past_orders']} earlier orders"
        st.caption(f"Hiding one order at a time, the gain is largest for customers with {earlier} "
                   f" ({float(best['error_reduction_pct']):.0f}% smaller error, "
                   f"{int(best['held_out']):,} orders). A customer with few orders has an own average that rests "
                   "on little, which is where borrowing from similar customers can help; with many orders the "
                   "forecast and the own average nearly agree. The next-order test scores far fewer orders, "
                   "so its bars jump around more.")
by_segment = found.by_segment
if len(by_segment):
    mine = by_segment[(by_segment["method"] == pair[0]) & (by_segment["variance"] == pair[1])]
    st.markdown("**By segment**")
    mine = mine.assign(evaluation=mine["evaluation"].map({"leave-one-out": "hiding one order",
                                                          "backtest": "next order"}))
    st.dataframe(
        mine, hide_index=True, key="segment_table",
        column_order=["evaluation", "segment", "held_out", "error_reduction_pct"],
        column_config={"evaluation": st.column_config.TextColumn("Test"),
                       "segment": st.column_config.TextColumn("Segment"),
                       "held_out": st.column_config.NumberColumn("Orders tested", format="%d"),
                       "error_reduction_pct": st.column_config.NumberColumn("Error smaller by", format="%.1f%%")},
    )

with st.expander("How the check works"):
    st.markdown(
        "- **Hiding one order at a time**: for every customer with two or more orders, each order in turn is "
        "hidden, everything is worked out again from the rest, and the forecast is compared with the hidden "
        "order. The own average of the remaining orders is scored the same way.\n"
        "- **Next order**: the forecasts are made from the orders before a cut-off date only, then compared with "
        "each customer's first order after it. This is the test closest to real use.\n"
        "- The error is the sum of squared differences between forecast and actual order value; "
        "'error smaller by 10%' means that sum is 10% below the own average's."
    )
