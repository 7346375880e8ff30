"""Accuracy check: would the forecasts have beaten each customer's own average on this shop's orders?"""

from __future__ import annotations

import math

import pandas as pd
import streamlit as st

from dashboard import charts, layout, state, words

HERE = "accuracy"
TESTS = {"leave-one-out": "hiding one order", "backtest": "next order"}

dataset, result = layout.start_page(
    "Accuracy check",
    "Before trusting a forecast, test it on orders whose value we already know. Two tests, both against the "
    "simplest forecast there is, each customer's own average.",
)
method, variance = state.kept("method", "auto"), state.kept("variance", "auto")
work = layout.Work(2 if (method, variance) != ("auto", "auto") else 1)
outcome = work.step(f"Testing the forecasts on {result.audit()['orders']:,} past orders: hiding one order at a "
                    "time, and forecasting each customer's next order from the orders before a cut-off date",
                    state.evaluation, dataset)
settled = None
if outcome.ok and (method, variance) != ("auto", "auto"):
    settled = work.step("Settling the method chosen on the Forecasts page", state.choice, dataset, method, variance)
work.finish()
if not outcome.ok:
    layout.show_problem(outcome, HERE)
    st.stop()
found = outcome.value

# The method in use on the Forecasts page (automatic unless the user picked one there).
if settled is not None and settled.ok:
    pair = (settled.value.method, "gamma-model" if settled.value.method == "gamma-gamma" else settled.value.variance)
else:
    pair = (found.chosen["method"], found.chosen["variance"])


def row_for(results: pd.DataFrame, method: str, variance: str):
    match = results[(results["method"] == method) & (results["variance"] == variance)]
    return match.iloc[0] if len(match) else None


checked_note = ""
if row_for(found.leave_one_out, *pair) is None:
    checked_note = ("The way of forecasting picked on the Forecasts page has no quick check yet; the results are "
                    "for the automatic choice (both are named under Compare the ways of forecasting below).")
    pair = (found.chosen["method"], found.chosen["variance"])

# ---------------------------------------------------------------------------
# The verdict: its colour and words follow the interval

backtest_row = row_for(found.backtest, *pair) if len(found.backtest) else None
loo_row = row_for(found.leave_one_out, *pair)
judged = backtest_row if backtest_row is not None else loo_row
if judged is not None:
    tone, sentence = words.verdict(float(judged["error_reduction_pct"]), low=float(judged["ci_low"]),
                                   high=float(judged["ci_high"]))
else:
    tone, sentence = words.verdict(math.nan)
show = {words.GOOD: (st.success, ":material/verified:"), words.UNSETTLED: (st.warning, ":material/help:"),
        words.WORSE: (st.error, ":material/trending_down:"), words.UNKNOWN: (st.info, ":material/info:")}
box, icon = show[tone]
box(f"**{sentence}**", icon=icon)
details = []
if loo_row is not None and math.isfinite(float(loo_row["error_reduction_pct"])):
    details.append(f"Hiding one past order at a time ({found.held_out:,} orders), the forecasts' error was "
                   f"{float(loo_row['error_reduction_pct']):.1f}% smaller than the own average's.")
if backtest_row is not None and found.cutoff is not None:
    details.append(f"The next-order test forecast from the orders before {found.cutoff:%d %B %Y} and compared with "
                   f"each customer's first order after it ({found.backtest_scored:,} customers); "
                   f"{float(backtest_row['coverage']):.0%} of those orders fell inside the forecast's 80% range "
                   "(about 80% is what a well-judged range gives).")
st.markdown(" ".join(details))
if checked_note:
    st.caption(checked_note)

# ---------------------------------------------------------------------------
# Where the gain comes from

st.subheader("Where the gain comes from")
by_past = found.by_past_orders
if len(by_past):
    mine = by_past[(by_past["method"] == pair[0]) & (by_past["variance"] == pair[1])]
    layout.chart(charts.gain_by_past_orders(mine, title="Smaller error than the own average, by orders known"),
                 key="past_orders_chart")
    loo_part = mine[mine["evaluation"] == "leave-one-out"].dropna(subset=["error_reduction_pct"])
    if len(loo_part):
        best = loo_part.sort_values("error_reduction_pct", ascending=False).iloc[0]
        earlier = "1 earlier order" if best["past_orders"] == "1" else f"{best['past_orders']} earlier orders"
        st.caption(f"Hiding one order at a time, the gain is largest for customers with {earlier} "
                   f"({float(best['error_reduction_pct']):.0f}% smaller error, {int(best['held_out']):,} orders). "
                   "A customer with few orders has an own average that rests on little, which is where borrowing "
                   "from similar customers can help; with many orders the forecast and the own average nearly "
                   "agree. The next-order test scores far fewer orders, so its bars jump around more.")
by_segment = found.by_segment
if len(by_segment):
    mine = by_segment[(by_segment["method"] == pair[0]) & (by_segment["variance"] == pair[1])]
    st.markdown("**By segment**")
    mine = mine.assign(evaluation=mine["evaluation"].map(TESTS))
    st.dataframe(
        mine, hide_index=True, key="segment_table",
        column_order=["evaluation", "segment", "held_out", "error_reduction_pct"],
        column_config={"evaluation": st.column_config.TextColumn("Test"),
                       "segment": st.column_config.TextColumn("Segment"),
                       "held_out": st.column_config.NumberColumn("Orders tested", format="localized"),
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
        "'error smaller by 10%' means that sum is 10% below the own average's. The range after it is where the "
        "gain probably lies (95%, from re-drawing the customers many times): the verdict above is green only "
        "when the whole of it is a gain."
    )

# ---------------------------------------------------------------------------
# Details: every method

with st.expander("Compare the ways of forecasting against the own averages (for the statistically minded)"):
    st.caption("For the statistically minded. The forecasts use the automatic choice unless another method is "
               "picked under How the forecasts are made on the Forecasts page.")
    st.markdown(f"Checked above: {words.pair_words(*pair)}.")
    chosen = found.chosen
    st.caption(words.choice_sentence("accuracy check", chosen, chosen["method"], chosen["variance"]))
    for note in found.notes:
        st.caption(note)
    spreads = [v for v in dict.fromkeys(found.leave_one_out["variance"]) if v != "gamma-model"]
    shown_spread = st.selectbox("Spread model in the charts and the table", spreads,
                                format_func=words.variance_label,
                                **state.remember("accuracy_spread", pair[1] if pair[1] in spreads else spreads[0],
                                                 spreads))

    def for_chart(results: pd.DataFrame) -> pd.DataFrame:
        """One row per method: the chosen spread model (Gamma-Gamma has its own), without the baseline."""
        keep = (results["variance"] == shown_spread) | (results["variance"] == "gamma-model")
        keep &= ~((results["method"] == "plain") & (results["variance"] == "classic"))
        return results[keep]

    loo_part, backtest_part = for_chart(found.leave_one_out), for_chart(found.backtest)
    scale = charts.shared_range(loo_part, backtest_part)
    st.caption("Bars to the right of the zero line beat the own average; the method in use is in orange-red. The "
               "thin lines show the range the gain probably lies in. Both charts share one scale.")
    left, right = st.columns(2)
    with left:
        layout.chart(charts.method_comparison(loo_part, title="Hiding one past order at a time",
                                              highlight=pair[0], x_range=scale),
                     key="loo_chart")
    with right:
        if len(found.backtest):
            layout.chart(charts.method_comparison(backtest_part, title="Next order after the cut-off date",
                                                  highlight=pair[0], x_range=scale),
                         key="backtest_chart")
        else:
            st.info("There is no next-order test: it needs customers who ordered both before and after a date.")

    short = loo_part[["method", "variance", "error_reduction_pct", "ci_low", "ci_high"]].merge(
        backtest_part[["method", "variance", "error_reduction_pct", "ci_low", "ci_high", "coverage"]],
        on=["method", "variance"], how="left", suffixes=("_loo", "_next"))
    short = short.assign(method_name=short["method"].map(words.method_label),
                         coverage_pct=100 * short["coverage"].astype(float))
    st.dataframe(
        short.sort_values("error_reduction_pct_loo", ascending=False), hide_index=True, key="accuracy_short",
        height=layout.table_height(len(short)),
        column_order=["method_name", "error_reduction_pct_loo", "ci_low_loo", "ci_high_loo",
                      "error_reduction_pct_next", "ci_low_next", "ci_high_next", "coverage_pct"],
        column_config={
            "method_name": st.column_config.TextColumn("Method"),
            "error_reduction_pct_loo": st.column_config.NumberColumn("Hiding one order: error smaller by",
                                                                     format="%.1f%%"),
            "ci_low_loo": st.column_config.NumberColumn("probably from", format="%.1f%%"),
            "ci_high_loo": st.column_config.NumberColumn("to", format="%.1f%%"),
            "error_reduction_pct_next": st.column_config.NumberColumn("Next order: error smaller by", format="%.1f%%"),
            "ci_low_next": st.column_config.NumberColumn("probably from", format="%.1f%%"),
            "ci_high_next": st.column_config.NumberColumn("to", format="%.1f%%"),
            "coverage_pct": st.column_config.NumberColumn(
                "Inside the 80% range", format="%.0f%%",
                help="Share of the next orders tested that fell inside the forecast's 80% next-order range."),
        },
    )
    results = pd.concat([found.leave_one_out.assign(test=TESTS["leave-one-out"]),
                         found.backtest.assign(test=TESTS["backtest"])], ignore_index=True)
    if st.toggle(f"Show all {len(results)} results: every method with every spread model, both tests",
                 key="accuracy_all"):
        results = results.assign(method_name=results["method"].map(words.method_label),
                                 variance_name=results["variance"].map(
                                     lambda v: "its own" if v == "gamma-model" else words.variance_label(v)),
                                 coverage_pct=100 * results["coverage"].astype(float))
        st.dataframe(
            results, hide_index=True, key="accuracy_table", height=layout.table_height(len(results), most=600),
            column_order=["test", "method_name", "variance_name", "error_reduction_pct", "ci_low", "ci_high",
                          "coverage_pct"],
            column_config={
                "test": st.column_config.TextColumn("Test"),
                "method_name": st.column_config.TextColumn("Method"),
                "variance_name": st.column_config.TextColumn("Spread model"),
                "error_reduction_pct": st.column_config.NumberColumn("Error smaller by", format="%.1f%%"),
                "ci_low": st.column_config.NumberColumn("Probably from", format="%.1f%%"),
                "ci_high": st.column_config.NumberColumn("Probably to", format="%.1f%%"),
                "coverage_pct": st.column_config.NumberColumn("Inside the 80% range", format="%.0f%%"),
            },
        )
