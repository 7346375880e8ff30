"""Plotly figures for the dashboard, in one colour-blind-safe palette and one layout.

Palette: the eight colours of Okabe and Ito (2008), "Color Universal Design",
re-ordered here so the first pair (blue, vermilion) differs most in both hue and
lightness. They stay distinguishable under the common forms of colour blindness.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import plotly.graph_objects as go

from .words import method_label, variance_label

# Okabe-Ito colours, in the order this product uses them.
PALETTE = {
    "blue": "#0072B2",
    "vermilion": "#D55E00",
    "green": "#009E73",
    "purple": "#CC79A7",
    "orange": "#E69F00",
    "sky": "#56B4E9",
    "yellow": "#F0E442",
    "black": "#000000",
}
SEQUENCE = list(PALETTE.values())
GRID = "#E6E6E6"
INK = "#2B2B2B"


def _layout(fig: go.Figure, *, title: str | None = None, height: int = 420) -> go.Figure:
    """The product's own chart layout: white ground, light grid, legend above the plot."""
    fig.update_layout(
        title={"text": title, "x": 0.0, "xanchor": "left", "font": {"size": 15}} if title else None,
        height=height,
        margin={"l": 60, "r": 20, "t": 60 if title else 30, "b": 55},
        paper_bgcolor="white",
        plot_bgcolor="white",
        font={"family": "Source Sans Pro, Helvetica, Arial, sans-serif", "size": 13, "color": INK},
        colorway=SEQUENCE,
        legend={"orientation": "h", "yanchor": "bottom", "y": 1.02, "xanchor": "right", "x": 1.0},
        hoverlabel={"bgcolor": "white"},
    )
    fig.update_xaxes(showgrid=True, gridcolor=GRID, zeroline=False, linecolor="#BBBBBB", ticks="outside",
                     automargin=True, title_standoff=10)
    fig.update_yaxes(showgrid=True, gridcolor=GRID, zeroline=False, linecolor="#BBBBBB", ticks="outside",
                     automargin=True, title_standoff=10)
    return fig


def money_ticks(low: float, high: float, symbol: str) -> tuple[list[float], list[str]]:
    """Ticks at 1, 2, 5, 10, 20, 50, ... between ``low`` and ``high``, labelled as money.

    Examples
    --------
    >>> money_ticks(3.0, 60.0, "$")
    ([5.0, 10.0, 20.0, 50.0], ['$5', '$10', '$20', '$50'])
    """
    values = []
    start = math.floor(math.log10(max(low, 1e-9)))
    for power in range(start, math.ceil(math.log10(max(high, low * 10))) + 1):
        for step in (1, 2, 5):
            value = step * 10.0 ** power
            if low <= value <= high:
                values.append(value)
    labels = [f"{symbol}{v:,.0f}" if v >= 1 else f"{symbol}{v:g}" for v in values]
    return values, labels


def pull_toward_centre(table: pd.DataFrame, *, symbol: str = "$", highlight: str | None = None) -> go.Figure:
    """Each customer's plain average against their forecast.

    Points on the diagonal kept their own average; points off it were pulled
    toward what similar customers spend. Marker area grows with the number of
    orders, so the customers pulled furthest are the small dots.
    """
    data = table[table["average_order_value"] > 0]
    orders = data["orders"].to_numpy(dtype=float)
    size = 5 + 16 * np.sqrt(orders / max(orders.max(), 1.0))
    confident = ~data["low_confidence"].to_numpy(dtype=bool)
    fig = go.Figure()
    low = float(min(data["average_order_value"].min(), data["expected_next_order"].min()))
    high = float(max(data["average_order_value"].max(), data["expected_next_order"].max()))
    fig.add_trace(go.Scatter(x=[low, high], y=[low, high], mode="lines", name="forecast = own average",
                             line={"color": "#888888", "dash": "dash", "width": 1}, hoverinfo="skip"))
    for mask, name, colour in ((confident, "forecast", PALETTE["blue"]),
                               (~confident, "few orders: low confidence", PALETTE["vermilion"])):
        if not mask.any():
            continue
        part = data[mask]
        fig.add_trace(go.Scatter(
            x=part["average_order_value"], y=part["expected_next_order"], mode="markers", name=name,
            marker={"size": size[mask], "color": colour, "opacity": 0.55, "line": {"width": 0.5, "color": "white"}},
            customdata=np.stack([part["customer"].astype(str), part["orders"]], axis=1),
            hovertemplate=(f"%{{customdata[0]}}<br>%{{customdata[1]}} orders<br>average {symbol}%{{x:,.2f}}"
                           f"<br>forecast {symbol}%{{y:,.2f}}<extra></extra>"),
        ))
    if highlight is not None and (data["customer"] == highlight).any():
        row = data[data["customer"] == highlight].iloc[0]
        fig.add_trace(go.Scatter(
            x=[row["average_order_value"]], y=[row["expected_next_order"]], mode="markers", name=str(highlight),
            marker={"size": 16, "color": "rgba(0,0,0,0)", "line": {"width": 2.5, "color": PALETTE["black"]}},
            hoverinfo="skip"))
    ticks, labels = money_ticks(low, high, symbol)
    fig.update_xaxes(type="log", title="Customer's own average order (log scale)", tickvals=ticks, ticktext=labels)
    fig.update_yaxes(type="log", title="Expected next order (log scale)", tickvals=ticks, ticktext=labels)
    return _layout(fig, height=460)


def method_comparison(results: pd.DataFrame, *, title: str, highlight: str | None = None) -> go.Figure:
    """Error reduction against own averages, one bar per row of ``results``, with 95% intervals.

    Horizontal bars, so the methods' names can be read without turning the head; the
    method in use (``highlight``) is drawn in the second colour.
    """
    value = results["error_reduction_pct"].to_numpy(dtype=float)
    upper = results["ci_high"].to_numpy(dtype=float) - value
    lower = value - results["ci_low"].to_numpy(dtype=float)
    names = results["method"].map(method_label)
    colours = [PALETTE["vermilion"] if m == highlight else PALETTE["blue"] for m in results["method"]]
    spread = results["variance"].map(variance_label)
    fig = go.Figure(go.Bar(
        y=names, x=value, orientation="h", marker_color=colours, customdata=np.stack([spread], axis=1),
        error_x={"type": "data", "array": np.nan_to_num(upper), "arrayminus": np.nan_to_num(lower),
                 "color": INK, "thickness": 1.2, "width": 3},
        hovertemplate="%{y} (%{customdata[0]} spread): %{x:.1f}%<extra></extra>",
    ))
    fig.add_vline(x=0, line={"color": INK, "width": 1})
    fig.update_layout(showlegend=False, bargap=0.35)
    fig.update_xaxes(title="Smaller error than own averages (%)", ticksuffix="%")
    fig.update_yaxes(categoryorder="array", categoryarray=list(reversed(list(names))), showgrid=False)
    return _layout(fig, title=title, height=int(130 + 34 * len(results)))


def gain_by_past_orders(table: pd.DataFrame, *, title: str) -> go.Figure:
    """Error reduction by how many orders were known before the forecast, one bar per evaluation."""
    fig = go.Figure()
    names = {"leave-one-out": "hiding one order", "backtest": "next order"}
    for i, (kind, part) in enumerate(table.groupby("evaluation", sort=False)):
        kind = names.get(kind, kind)
        fig.add_trace(go.Bar(
            x=part["past_orders"].astype(str), y=part["error_reduction_pct"], name=kind,
            marker_color=(PALETTE["green"], PALETTE["purple"])[i % 2], customdata=part["held_out"].to_numpy(),
            hovertemplate="%{x} past orders: %{y:.1f}% (%{customdata:,} orders scored)<extra>" + kind + "</extra>"))
    fig.add_hline(y=0, line={"color": INK, "width": 1})
    fig.update_layout(barmode="group")
    fig.update_yaxes(title="Smaller error than own averages (%)", ticksuffix="%")
    fig.update_xaxes(title="Orders known before the forecast", type="category")
    return _layout(fig, title=title, height=380)


def tier_shares(summary: pd.DataFrame, *, title: str) -> go.Figure:
    """Each tier's share of customers next to its share of the money."""
    fig = go.Figure()
    fig.add_trace(go.Bar(x=summary["tier"], y=100 * summary["share_of_customers"], name="share of customers",
                         marker_color=PALETTE["sky"], hovertemplate="%{x}: %{y:.0f}% of customers<extra></extra>"))
    if summary["share_of_projected_revenue"].notna().any():
        fig.add_trace(go.Bar(x=summary["tier"], y=100 * summary["share_of_projected_revenue"],
                             name="share of projected revenue", marker_color=PALETTE["blue"],
                             hovertemplate="%{x}: %{y:.0f}% of projected revenue<extra></extra>"))
    fig.update_layout(barmode="group", bargap=0.3)
    fig.update_yaxes(title="Share (%)", ticksuffix="%", rangemode="tozero")
    fig.update_xaxes(title=None, type="category")
    return _layout(fig, title=title, height=340)


def cohort_projection(cohorts: pd.DataFrame, *, symbol: str, title: str, grouped_by: str) -> go.Figure:
    """Projected revenue per group of customers, with the interval of the expected amount."""
    value = cohorts["projected_revenue"].to_numpy(dtype=float)
    fig = go.Figure(go.Bar(
        x=cohorts["cohort"].astype(str), y=value, name="projected", marker_color=PALETTE["blue"],
        error_y={"type": "data", "array": np.nan_to_num(cohorts["projected_high"].to_numpy(dtype=float) - value),
                 "arrayminus": np.nan_to_num(value - cohorts["projected_low"].to_numpy(dtype=float)),
                 "color": INK, "thickness": 1.2, "width": 4},
        customdata=cohorts["customers"].to_numpy(),
        hovertemplate=f"%{{x}}: {symbol}%{{y:,.0f}} from %{{customdata:,}} customers<extra></extra>"))
    fig.update_yaxes(title="Projected revenue", tickprefix=symbol, rangemode="tozero")
    fig.update_xaxes(title=grouped_by[:1].upper() + grouped_by[1:], type="category")
    return _layout(fig, title=title, height=380)


def cohort_backtest(cohorts: pd.DataFrame, *, symbol: str, title: str, grouped_by: str) -> go.Figure:
    """What the outlook made at the cut-off projected, what came in, and a run-rate guess, per group."""
    x = cohorts["cohort"].astype(str)
    value = cohorts["projected_revenue"].to_numpy(dtype=float)
    fig = go.Figure()
    fig.add_trace(go.Bar(
        x=x, y=value, name="projected at the cut-off", marker_color=PALETTE["blue"],
        error_y={"type": "data", "array": np.nan_to_num(cohorts["projected_high"].to_numpy(dtype=float) - value),
                 "arrayminus": np.nan_to_num(value - cohorts["projected_low"].to_numpy(dtype=float)),
                 "color": INK, "thickness": 1.2, "width": 4},
        hovertemplate=f"%{{x}}: projected {symbol}%{{y:,.0f}}<extra></extra>"))
    fig.add_trace(go.Bar(x=x, y=cohorts["actual_revenue"], name="what actually came in",
                         marker_color=PALETTE["vermilion"],
                         hovertemplate=f"%{{x}}: actual {symbol}%{{y:,.0f}}<extra></extra>"))
    fig.add_trace(go.Scatter(x=x, y=cohorts["run_rate_revenue"], name="run-rate guess", mode="markers",
                             marker={"symbol": "diamond", "size": 10, "color": PALETTE["orange"],
                                     "line": {"width": 1, "color": INK}},
                             hovertemplate=f"%{{x}}: run rate {symbol}%{{y:,.0f}}<extra></extra>"))
    fig.update_layout(barmode="group", bargap=0.25)
    fig.update_yaxes(title="Revenue in the window", tickprefix=symbol, rangemode="tozero")
    fig.update_xaxes(title=grouped_by[:1].upper() + grouped_by[1:], type="category")
    return _layout(fig, title=title, height=400)
