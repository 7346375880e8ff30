"""Charts of the revenue outlook: groups and new customers, the months ahead, the checks against the past.

Built on the dashboard's chart layout and colour-blind-safe palette (:mod:`dashboard.charts`); every
figure shows numbers the library computed, nothing recomputed here.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import plotly.graph_objects as go

from forecasting.outlook import NEW_CUSTOMERS

from .charts import INK, PALETTE, _layout


def _whiskers(table: pd.DataFrame, value: np.ndarray, low: str, high: str) -> dict:
    return {"type": "data", "array": np.nan_to_num(table[high].to_numpy(dtype=float) - value),
            "arrayminus": np.nan_to_num(value - table[low].to_numpy(dtype=float)),
            "color": INK, "thickness": 1.2, "width": 4}


def group_projection(cohorts: pd.DataFrame, *, symbol: str, title: str, grouped_by: str) -> go.Figure:
    """Projected revenue per group of existing customers and for new customers, whiskers on what may come in."""
    value = cohorts["projected_revenue"].to_numpy(dtype=float)
    new = (cohorts["cohort"] == NEW_CUSTOMERS).to_numpy()
    labels = np.where(new, "new customers", cohorts["cohort"].astype(str))
    customers = [f"about {c:,.0f} new customers" if is_new else f"{c:,.0f} customers"
                 for c, is_new in zip(cohorts["customers"].to_numpy(dtype=float), new)]
    fig = go.Figure(go.Bar(
        x=labels, y=value, marker_color=np.where(new, PALETTE["green"], PALETTE["blue"]),
        error_y=_whiskers(cohorts, value, "revenue_range_low", "revenue_range_high"),
        customdata=np.column_stack([customers, cohorts["revenue_range_low"], cohorts["revenue_range_high"]]),
        hovertemplate=(f"%{{x}}: {symbol}%{{y:,.0f}} from %{{customdata[0]}}<br>may come in: "
                       f"{symbol}%{{customdata[1]:,.0f}} to {symbol}%{{customdata[2]:,.0f}}<extra></extra>"),
        showlegend=False))
    fig.update_yaxes(title="Projected revenue", tickprefix=symbol, rangemode="tozero")
    fig.update_xaxes(title=f"{grouped_by[:1].upper() + grouped_by[1:]} (customers you have), then new customers",
                     type="category")
    return _layout(fig, title=title, height=380)


def monthly_schedule(schedule: pd.DataFrame, *, symbol: str, title: str) -> go.Figure:
    """Projected revenue month by month: customers you have and new customers stacked, the running total as a line."""
    months = schedule["month"].astype(str)
    fig = go.Figure()
    fig.add_trace(go.Bar(x=months, y=schedule["projected_revenue_existing"], name="customers you have",
                         marker_color=PALETTE["blue"],
                         hovertemplate=f"%{{x}}: {symbol}%{{y:,.0f}} from customers you have<extra></extra>"))
    fig.add_trace(go.Bar(x=months, y=schedule["projected_revenue_new"], name="new customers",
                         marker_color=PALETTE["green"],
                         hovertemplate=f"%{{x}}: {symbol}%{{y:,.0f}} from new customers<extra></extra>"))
    fig.add_trace(go.Scatter(x=months, y=schedule["cumulative_revenue"], name="running total", mode="lines+markers",
                             yaxis="y2", line={"color": INK, "width": 1.5},
                             hovertemplate=f"%{{x}}: {symbol}%{{y:,.0f}} so far<extra></extra>"))
    fig.update_layout(barmode="stack", bargap=0.3,
                      yaxis2={"overlaying": "y", "side": "right", "tickprefix": symbol, "rangemode": "tozero",
                              "showgrid": False, "title": "Running total"})
    fig.update_yaxes(title="Projected revenue in the month", tickprefix=symbol, rangemode="tozero", selector=0)
    fig.update_xaxes(title="Month", type="category")
    return _layout(fig, title=title, height=380)


def group_backtest(cohorts: pd.DataFrame, *, symbol: str, title: str, grouped_by: str) -> go.Figure:
    """Made at a cut-off: projected (with the range of what may come in), actual and the run-rate guess, per group."""
    new = (cohorts["cohort"] == NEW_CUSTOMERS).to_numpy()
    x = np.where(new, "new customers", cohorts["cohort"].astype(str))
    value = cohorts["projected_revenue"].to_numpy(dtype=float)
    fig = go.Figure()
    fig.add_trace(go.Bar(x=x, y=value, name="projected on that date", marker_color=PALETTE["blue"],
                         error_y=_whiskers(cohorts, value, "revenue_range_low", "revenue_range_high"),
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
    fig.update_xaxes(title=f"{grouped_by[:1].upper() + grouped_by[1:]}, then new customers", type="category")
    return _layout(fig, title=title, height=400)


def rolling_check(table: pd.DataFrame, *, symbol: str, title: str) -> go.Figure:
    """All revenue at each cut-off: what came in, the outlook with its range, the run-rate guess and the cell baseline."""
    x = pd.to_datetime(table["cutoff"]).dt.strftime("%d %b %Y")
    value = table["projected_revenue"].to_numpy(dtype=float)
    fig = go.Figure()
    fig.add_trace(go.Scatter(
        x=x, y=value, name="outlook (whiskers: what may come in)", mode="markers",
        marker={"size": 10, "color": PALETTE["blue"]},
        error_y=_whiskers(table, value, "revenue_range_low", "revenue_range_high"),
        customdata=table["error_pct"],
        hovertemplate=f"made %{{x}}: {symbol}%{{y:,.0f}} (%{{customdata:+.0f}}%)<extra></extra>"))
    fig.add_trace(go.Scatter(x=x, y=table["actual_revenue"], name="what actually came in", mode="lines+markers",
                             line={"color": PALETTE["vermilion"], "width": 2}, marker={"size": 7},
                             hovertemplate=f"after %{{x}}: {symbol}%{{y:,.0f}} came in<extra></extra>"))
    fig.add_trace(go.Scatter(x=x, y=table["run_rate_revenue"], name="run-rate guess", mode="markers",
                             marker={"symbol": "diamond", "size": 9, "color": PALETTE["orange"],
                                     "line": {"width": 1, "color": INK}},
                             customdata=table["run_rate_error_pct"],
                             hovertemplate=f"run rate %{{x}}: {symbol}%{{y:,.0f}} (%{{customdata:+.0f}}%)<extra></extra>"))
    fig.add_trace(go.Scatter(x=x, y=table["cell_revenue"], name="simple grid guess", mode="markers",
                             marker={"symbol": "square", "size": 8, "color": PALETTE["sky"],
                                     "line": {"width": 1, "color": INK}},
                             customdata=table["cell_error_pct"],
                             hovertemplate=f"grid %{{x}}: {symbol}%{{y:,.0f}} (%{{customdata:+.0f}}%)<extra></extra>"))
    fig.update_yaxes(title="All revenue in the window", tickprefix=symbol, rangemode="tozero")
    fig.update_xaxes(title="Date the outlook was made (from the orders before it)", type="category")
    return _layout(fig, title=title, height=420)
