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

from forecasting.options import low_confidence

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


#: Up to this many customers the chart draws one dot each (SVG); above it, how many customers fall in
#: each cell of a grid (a fixed number of cells whatever the shop's size), so the page stays light. A browser
#: spends about a third of a millisecond of its main thread per SVG dot (59,493 dots froze one for 21 s), so
#: 1,000 dots stay well under the one-second budget for a single task.
DOTS_AT_MOST = 1000
#: Cells of the density grid along each axis.
GRID_CELLS = 60


def pull_toward_centre(table: pd.DataFrame, *, symbol: str = "$", highlight: str | None = None,
                       label: str | None = None, shown_ids: pd.Series | None = None) -> go.Figure:
    """Each customer's plain average against their forecast, on money scales that grow by factors.

    Points on the diagonal kept their own average; points off it were pulled toward what
    similar customers spend. Up to :data:`DOTS_AT_MOST` customers, each is a dot whose area
    grows with the number of orders, coloured where the forecast rests mostly on similar
    customers (:func:`forecasting.options.low_confidence`). Above that, the chart shows how
    many customers fall in each of ``GRID_CELLS`` x ``GRID_CELLS`` cells: the browser then
    draws the same few thousand shapes for 2,000 customers or 2 million.

    Parameters
    ----------
    table : pandas.DataFrame
        The library's forecast table.
    highlight : str, optional
        The customer id to ring (the one explained beside the chart).
    label : str, optional
        What to call the ringed customer in the legend (default: ``highlight``).
    shown_ids : pandas.Series, optional
        The ids to show in the dots' hover text, aligned with ``table`` (pseudonyms while
        they are on); default the table's own.
    """
    keep = ((table["average_order_value"] > 0) & (table["expected_next_order"] > 0)).to_numpy()
    data = table[keep]
    x = np.log10(data["average_order_value"].to_numpy(dtype=float))
    y = np.log10(data["expected_next_order"].to_numpy(dtype=float))
    fig = go.Figure()
    if len(data) == 0:
        return _layout(fig, height=460)
    low, high = float(min(x.min(), y.min())), float(max(x.max(), y.max()))
    pad = 0.02 * max(high - low, 0.1)
    low, high = low - pad, high + pad
    fig.add_trace(go.Scatter(x=[low, high], y=[low, high], mode="lines", name="forecast = own average",
                             line={"color": "#888888", "dash": "dash", "width": 1}, hoverinfo="skip"))
    if len(data) <= DOTS_AT_MOST:
        ids = (shown_ids[keep] if shown_ids is not None else data["customer"]).astype(str).to_numpy()
        orders = data["orders"].to_numpy(dtype=float)
        size = 5 + 16 * np.sqrt(orders / max(orders.max(), 1.0))
        leaning = low_confidence(data["own_history_weight"].to_numpy(dtype=float))
        for mask, name, colour in ((~leaning, "forecast", PALETTE["blue"]),
                                   (leaning, "mostly from similar customers", PALETTE["vermilion"])):
            if not mask.any():
                continue
            fig.add_trace(go.Scatter(
                x=x[mask], y=y[mask], mode="markers", name=name,
                marker={"size": size[mask], "color": colour, "opacity": 0.55,
                        "line": {"width": 0.5, "color": "white"}},
                customdata=np.stack([ids[mask], orders[mask].astype(int),
                                     data["average_order_value"].to_numpy()[mask],
                                     data["expected_next_order"].to_numpy()[mask]], axis=1),
                hovertemplate=(f"%{{customdata[0]}}<br>%{{customdata[1]}} orders<br>average {symbol}"
                               f"%{{customdata[2]:,.2f}}<br>forecast {symbol}%{{customdata[3]:,.2f}}<extra></extra>"),
            ))
    else:
        edges = np.linspace(low, high, GRID_CELLS + 1)
        counts, _, _ = np.histogram2d(x, y, bins=[edges, edges])
        centres = (edges[:-1] + edges[1:]) / 2
        shade = np.where(counts > 0, np.log10(np.maximum(counts, 1)), np.nan).T  # rows are y
        ticks = [t for t in (1, 10, 100, 1000, 10_000, 100_000) if t <= max(counts.max(), 1)]
        fig.add_trace(go.Heatmap(
            x=centres, y=centres, z=shade, customdata=counts.T, name="customers",
            colorscale=[[0.0, "#DCEBF5"], [0.5, PALETTE["sky"]], [1.0, PALETTE["blue"]]],
            zmin=0, zmax=max(float(np.nanmax(shade)), 1.0), hoverongaps=False,
            colorbar={"title": {"text": "customers"}, "tickvals": np.log10(ticks).tolist(),
                      "ticktext": [f"{t:,}" for t in ticks], "thickness": 12},
            hovertemplate="%{customdata:,.0f} customers here<extra></extra>"))
    if highlight is not None:
        row = data[data["customer"].astype(str) == str(highlight)]
        if len(row):
            fig.add_trace(go.Scatter(
                x=np.log10(row["average_order_value"].to_numpy(dtype=float)[:1]),
                y=np.log10(row["expected_next_order"].to_numpy(dtype=float)[:1]),
                mode="markers", name=str(label or highlight),
                marker={"size": 16, "color": "rgba(0,0,0,0)", "line": {"width": 2.5, "color": PALETTE["black"]}},
                hoverinfo="skip"))
    values, labels = money_ticks(10 ** low, 10 ** high, symbol)
    ticks = np.log10(values).tolist()
    fig.update_xaxes(title="Customer's own average order", tickvals=ticks, ticktext=labels, range=[low, high])
    fig.update_yaxes(title="Expected next order", tickvals=ticks, ticktext=labels, range=[low, high])
    return _layout(fig, height=460)


def shared_range(*tables: pd.DataFrame) -> list[float]:
    """One x-axis range (with zero in it) for method charts that are compared side by side."""
    values = [0.0]
    for table in tables:
        for column in ("error_reduction_pct", "ci_low", "ci_high"):
            if column in table.columns:
                values.extend(float(v) for v in table[column].to_numpy(dtype=float) if math.isfinite(v))
    low, high = min(values), max(values)
    pad = 0.06 * max(high - low, 1.0)
    return [low - pad, high + pad]


def method_comparison(results: pd.DataFrame, *, title: str, highlight: str | None = None,
                      x_range: list[float] | None = None) -> go.Figure:
    """Error reduction against own averages, one bar per row of ``results``, with 95% intervals.

    Horizontal bars, so the methods' names can be read without turning the head; the
    method in use (``highlight``) is drawn in the second colour. Charts that are compared
    take the same ``x_range`` (:func:`shared_range`).
    """
    value = results["error_reduction_pct"].to_numpy(dtype=float)
    upper = results["ci_high"].to_numpy(dtype=float) - value
    lower = value - results["ci_low"].to_numpy(dtype=float)
    names = results["method"].map(method_label)
    colours = [PALETTE["vermilion"] if m == highlight else PALETTE["blue"] for m in results["method"]]
    spread = results["variance"].map(lambda v: "its own spread" if v == "gamma-model"
                                     else f"{variance_label(v)} spread model")
    fig = go.Figure(go.Bar(
        y=names, x=value, orientation="h", marker_color=colours, customdata=np.stack([spread], axis=1),
        error_x={"type": "data", "array": np.nan_to_num(upper), "arrayminus": np.nan_to_num(lower),
                 "color": INK, "thickness": 1.2, "width": 3},
        hovertemplate="%{y} (%{customdata[0]}): %{x:.1f}%<extra></extra>",
    ))
    fig.add_vline(x=0, line={"color": INK, "width": 1})
    fig.update_layout(showlegend=False, bargap=0.35)
    fig.update_xaxes(title="Smaller error than own averages (%)", ticksuffix="%", range=x_range)
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
