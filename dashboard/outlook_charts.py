"""Charts of the revenue outlook: groups and new customers, the months ahead, the checks against the past.

Vega-Lite specifications built on the dashboard's chart layout and colour-blind-safe palette
(:mod:`dashboard.charts`); every chart shows numbers the library computed, nothing recomputed here.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from forecasting.outlook import NEW_CUSTOMERS

from .charts import INK, PALETTE, _cash, _layout, _money_labels, _records, _series, _share_colours, _whiskers


def _group_names(cohorts: pd.DataFrame) -> np.ndarray:
    """Each group's name on the chart; the new customers' row is called so."""
    return np.where((cohorts["cohort"] == NEW_CUSTOMERS).to_numpy(), "new customers",
                    cohorts["cohort"].astype(str))


def _capital(words: str) -> str:
    return words[:1].upper() + words[1:]


def _money_axis(title: str, symbol: str, **more) -> dict:
    """A revenue axis from zero, its ticks as whole money; every layer on it repeats the same."""
    return {"scale": {"zero": True}, "axis": {"title": title, "labelExpr": _money_labels(symbol), **more}}


def _with_change(text: str, change: float) -> str:
    """'... (+12%)', or the text alone when the change is unknown."""
    return f"{text} ({change:+.0f}%)" if change is not None and math.isfinite(change) else text


def group_projection(cohorts: pd.DataFrame, *, symbol: str, title: str, grouped_by: str) -> dict:
    """Projected revenue per group of existing customers and for new customers, whiskers on what may come in."""
    new = (cohorts["cohort"] == NEW_CUSTOMERS).to_numpy()
    bars = pd.DataFrame({
        "group": _group_names(cohorts),
        "revenue": cohorts["projected_revenue"].to_numpy(dtype=float),
        "low": cohorts["revenue_range_low"].to_numpy(dtype=float),
        "high": cohorts["revenue_range_high"].to_numpy(dtype=float),
        "colour": np.where(new, PALETTE["green"], PALETTE["blue"])})
    bars["projected"] = [_cash(v, symbol) for v in bars["revenue"]]
    bars["customers"] = [f"about {c:,.0f} new customers" if is_new else f"{c:,.0f} customers"
                         for c, is_new in zip(cohorts["customers"].to_numpy(dtype=float), new)]
    bars["may_come_in"] = [f"{_cash(low, symbol)} to {_cash(high, symbol)}" for low, high in zip(bars["low"],
                                                                                               bars["high"])]
    category = {"x": {"field": "group", "type": "nominal", "sort": list(bars["group"]),
                      "axis": {"title": f"{_capital(grouped_by)} (customers you have), then new customers",
                               "labelAngle": 0, "grid": False}}}
    revenue = _money_axis("Projected revenue", symbol)
    layers = [{"mark": {"type": "bar", "width": {"band": 0.7}},
               "encoding": {**category,
                            "y": {"field": "revenue", "type": "quantitative", **revenue},
                            "color": {"field": "colour", "type": "nominal", "scale": None},
                            "tooltip": [{"field": "group", "title": "group"},
                                        {"field": "projected", "title": "projected"},
                                        {"field": "customers", "title": "from"},
                                        {"field": "may_come_in", "title": "may come in"}]}},
              *_whiskers(category, "low", "high", along="y", width=10, scale_axis=revenue)]
    return _layout({"data": {"values": _records(bars)}, "layer": layers}, title=title, height=380)


#: The parts of the month-by-month chart, in the order they stack, and the running total's line.
SCHEDULE_PARTS = (("projected_revenue_existing", "customers you have"), ("projected_revenue_new", "new customers"))
RUNNING_TOTAL = "running total"


def monthly_schedule(schedule: pd.DataFrame, *, symbol: str, title: str) -> dict:
    """Projected revenue month by month: customers you have and new customers stacked, the running total as a line.

    The bars and the line each have their own y scale (the line's on the right).
    """
    months = schedule["month"].astype(str).to_numpy()
    rows = []
    for order, (column, name) in enumerate(SCHEDULE_PARTS):
        for month, amount in zip(months, schedule[column].to_numpy(dtype=float)):
            rows.append({"month": month, "part": name, "stack": order, "revenue": amount,
                         "tip": f"{month}: {_cash(amount, symbol)} from {name}"})
    totals = pd.DataFrame({"month": months, "total": schedule["cumulative_revenue"].to_numpy(dtype=float)})
    totals["tip"] = [f"{month}: {_cash(amount, symbol)} so far" for month, amount in zip(months, totals["total"])]
    names = [name for _, name in SCHEDULE_PARTS] + [RUNNING_TOTAL]
    colours = _series(names, [PALETTE["blue"], PALETTE["green"], INK])
    month = {"field": "month", "type": "nominal", "sort": list(months),
             "axis": {"title": "Month", "labelAngle": 0, "grid": False}}
    return _layout({
        "layer": [
            {"data": {"values": _records(pd.DataFrame(rows))},
             "mark": {"type": "bar", "width": {"band": 0.7}},
             "encoding": {"x": month,
                          "y": {"field": "revenue", "type": "quantitative", "stack": "zero",
                                **_money_axis("Projected revenue in the month", symbol)},
                          "order": {"field": "stack", "type": "quantitative"},
                          "color": {"field": "part", "type": "nominal", **colours},
                          "tooltip": {"field": "tip"}}},
            {"data": {"values": _records(totals)},
             "mark": {"type": "line", "strokeWidth": 1.5, "point": {"filled": True, "size": 40, "color": INK}},
             "encoding": {"x": month,
                          "y": {"field": "total", "type": "quantitative",
                                **_money_axis("Running total", symbol, orient="right", grid=False)},
                          "color": {"datum": RUNNING_TOTAL, **colours},
                          "tooltip": {"field": "tip"}}}],
        "resolve": {"scale": {"y": "independent"}}}, title=title, height=380)


def _guess_marks(category: dict, field: str, name: str, shape: str, size: int, revenue: dict) -> dict:
    """Guesses to compare with, drawn as outlined shapes in the middle of each category."""
    return {"mark": {"type": "point", "shape": shape, "filled": True, "size": size, "stroke": INK,
                     "strokeWidth": 1, "opacity": 1},
            "transform": [{"filter": f"isValid(datum.{field})"}],
            "encoding": {**category, "y": {"field": field, "type": "quantitative", **revenue},
                         "color": {"datum": name}, "tooltip": {"field": f"{field}_tip"}}}


def group_backtest(cohorts: pd.DataFrame, *, symbol: str, title: str, grouped_by: str) -> dict:
    """Made at a cut-off: projected (with the range of what may come in), actual and the run-rate guess, per group."""
    projected, actual, guess = "projected on that date", "what actually came in", "run-rate guess"
    groups = _group_names(cohorts)
    table = pd.DataFrame({"group": groups, "projected": cohorts["projected_revenue"].to_numpy(dtype=float),
                          "low": cohorts["revenue_range_low"].to_numpy(dtype=float),
                          "high": cohorts["revenue_range_high"].to_numpy(dtype=float),
                          "actual": cohorts["actual_revenue"].to_numpy(dtype=float),
                          "run_rate": cohorts["run_rate_revenue"].to_numpy(dtype=float)})
    table["run_rate_tip"] = [f"{g}: run rate {_cash(v, symbol)}" for g, v in zip(groups, table["run_rate"])]
    bars = pd.concat([
        pd.DataFrame({"group": groups, "part": projected, "revenue": table["projected"],
                      "tip": [f"{g}: projected {_cash(v, symbol)}" for g, v in zip(groups, table["projected"])]}),
        pd.DataFrame({"group": groups, "part": actual, "revenue": table["actual"],
                      "tip": [f"{g}: actual {_cash(v, symbol)}" for g, v in zip(groups, table["actual"])]})])
    whiskers = table.assign(part=projected)
    colours = _series([projected, actual, guess], [PALETTE["blue"], PALETTE["vermilion"], PALETTE["orange"]])
    category = {"x": {"field": "group", "type": "nominal", "sort": list(groups),
                      "axis": {"title": f"{_capital(grouped_by)}, then new customers", "labelAngle": 0,
                               "grid": False}}}
    revenue = _money_axis("Revenue in the window", symbol)
    beside = {**category, "xOffset": {"field": "part", "type": "nominal", "scale": {"domain": [projected, actual]}}}
    layers = [
        {"data": {"values": _records(bars)},
         "mark": {"type": "bar"},
         "encoding": {**beside,
                      "y": {"field": "revenue", "type": "quantitative", **revenue},
                      "color": {"field": "part", "type": "nominal", **colours},
                      "tooltip": {"field": "tip"}}},
        {"data": {"values": _records(whiskers)},
         "layer": _whiskers(beside, "low", "high", along="y", width=8, scale_axis=revenue)},
        {"data": {"values": _records(table)},
         "layer": [_guess_marks(category, "run_rate", guess, "diamond", 110, revenue)]}]
    _share_colours(layers, colours)
    return _layout({"layer": layers}, title=title, height=400)


def rolling_check(table: pd.DataFrame, *, symbol: str, title: str) -> dict:
    """All revenue at each cut-off: what came in, the outlook with its range, the run-rate guess and the cell baseline."""
    outlook, actual = "outlook (whiskers: what may come in)", "what actually came in"
    guess, grid = "run-rate guess", "simple grid guess"
    dates = pd.to_datetime(table["cutoff"]).dt.strftime("%d %b %Y").to_numpy()
    points = pd.DataFrame({"made": dates, "outlook": table["projected_revenue"].to_numpy(dtype=float),
                           "low": table["revenue_range_low"].to_numpy(dtype=float),
                           "high": table["revenue_range_high"].to_numpy(dtype=float),
                           "actual": table["actual_revenue"].to_numpy(dtype=float),
                           "run_rate": table["run_rate_revenue"].to_numpy(dtype=float),
                           "cell": table["cell_revenue"].to_numpy(dtype=float)})
    points["outlook_tip"] = [_with_change(f"made {d}: {_cash(v, symbol)}", e)
                             for d, v, e in zip(dates, points["outlook"], table["error_pct"].to_numpy(dtype=float))]
    points["actual_tip"] = [f"after {d}: {_cash(v, symbol)} came in" for d, v in zip(dates, points["actual"])]
    points["run_rate_tip"] = [_with_change(f"run rate {d}: {_cash(v, symbol)}", e) for d, v, e in
                              zip(dates, points["run_rate"], table["run_rate_error_pct"].to_numpy(dtype=float))]
    points["cell_tip"] = [_with_change(f"grid {d}: {_cash(v, symbol)}", e) for d, v, e in
                          zip(dates, points["cell"], table["cell_error_pct"].to_numpy(dtype=float))]
    colours = _series([outlook, actual, guess, grid],
                      [PALETTE["blue"], PALETTE["vermilion"], PALETTE["orange"], PALETTE["sky"]])
    category = {"x": {"field": "made", "type": "nominal", "sort": list(dates),
                      "axis": {"title": "Date the outlook was made (from the orders before it)", "labelAngle": 0,
                               "grid": False}}}
    revenue = _money_axis("All revenue in the window", symbol)
    layers = [
        *_whiskers(category, "low", "high", along="y", width=8, scale_axis=revenue),
        {"mark": {"type": "line", "strokeWidth": 2, "point": {"filled": True, "size": 49}},
         "encoding": {**category, "y": {"field": "actual", "type": "quantitative", **revenue},
                      "color": {"datum": actual}, "tooltip": {"field": "actual_tip"}}},
        {"mark": {"type": "circle", "size": 100, "opacity": 1},
         "encoding": {**category,
                      "y": {"field": "outlook", "type": "quantitative", **revenue},
                      "color": {"datum": outlook}, "tooltip": {"field": "outlook_tip"}}},
        _guess_marks(category, "run_rate", guess, "diamond", 81, revenue),
        _guess_marks(category, "cell", grid, "square", 64, revenue),
    ]
    _share_colours(layers, colours)
    return _layout({"data": {"values": _records(points)}, "layer": layers}, title=title, height=420)
