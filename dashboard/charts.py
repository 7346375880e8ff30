"""Vega-Lite charts for the dashboard, in one colour-blind-safe palette and one layout.

Every function returns a Vega-Lite specification: a plain dict, its data inline as
``{"values": [...]}`` records, drawn by the Vega-Lite that Streamlit carries
(``st.vega_lite_chart``). Money is formatted here, in Python, into the tooltips' text, so a
tooltip reads as the rest of the page does; axes format their ticks with the same symbol.

Palette: the eight colours of Okabe and Ito (2008), "Color Universal Design",
re-ordered here so the first pair (blue, vermilion) differs most in both hue and
lightness. They stay distinguishable under the common forms of colour blindness.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd

from forecasting.options import low_confidence

from .words import method_label, money, variance_label

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
FONT = "Source Sans Pro, Helvetica, Arial, sans-serif"
#: The grey of the dashed line where the forecast equals the customer's own average.
DIAGONAL = "#888888"


def _layout(spec: dict, *, title: str | None = None, height: int = 420, renderer: str = "svg") -> dict:
    """The product's own chart layout: white ground, light grid, legend above the plot.

    ``renderer`` is "svg" for charts of a few hundred marks (each mark stays a shape the page
    can read) and "canvas" for the density grid, whose thousands of cells would be as many
    SVG elements.
    """
    laid = {"width": "container", "height": height, "background": "white"}
    if title:
        laid["title"] = {"text": title, "anchor": "start", "fontSize": 15, "fontWeight": 600, "color": INK,
                         "offset": 12}
    laid.update(spec)
    laid["config"] = {
        "font": FONT,
        "view": {"stroke": None},
        "axis": {"grid": True, "gridColor": GRID, "domainColor": "#BBBBBB", "tickColor": "#BBBBBB",
                 "labelColor": INK, "titleColor": INK, "labelFontSize": 12, "titleFontSize": 13,
                 "titleFontWeight": "normal", "titlePadding": 10, "labelLimit": 220},
        "legend": {"orient": "top", "direction": "horizontal", "labelFontSize": 13, "labelColor": INK,
                   "labelLimit": 320, "symbolStrokeWidth": 1.5, "columnPadding": 16},
        "range": {"category": SEQUENCE},
    }
    laid["usermeta"] = {"embedOptions": {"renderer": renderer}}
    return laid


def _records(frame: pd.DataFrame) -> list[dict]:
    """Rows as JSON records: numpy numbers as Python numbers, a missing or infinite number as null."""
    rows = []
    for row in frame.to_dict("records"):
        clean = {}
        for key, value in row.items():
            if isinstance(value, np.generic):
                value = value.item()
            if isinstance(value, float) and not math.isfinite(value):
                value = None
            clean[key] = value
        rows.append(clean)
    return rows


def _cash(amount: float, symbol: str, places: int = 0) -> str:
    """Money for a tooltip, at a fixed number of decimals: '$1,234', '€52.46', '-£3'."""
    return money(amount, symbol, places)


def _money_labels(symbol: str) -> str:
    """A Vega expression labelling an axis's ticks as whole money: '$1,200'."""
    return f"{json.dumps(symbol, ensure_ascii=False)} + format(datum.value, ',.0f')"


PERCENT_LABELS = "format(datum.value, '~g') + '%'"


def _series(names: list[str], colours: list[str], *, title: str | None = None) -> dict:
    """One colour scale (and legend) that every layer of a chart shares: these names in these colours."""
    return {"scale": {"domain": list(names), "range": list(colours)}, "legend": {"title": title}}


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


def _tick_labels(values: list[float], labels: list[str]) -> str:
    """A Vega expression that names each of ``values`` by its label (an axis given those values)."""
    expression = json.dumps("")
    for value, label in zip(reversed(values), reversed(labels)):
        expression = f"datum.value == {value!r} ? {json.dumps(label, ensure_ascii=False)} : {expression}"
    return expression


def _whiskers(position: dict, low: str, high: str, *, along: str = "y", width: int = 8,
              scale_axis: dict | None = None) -> list[dict]:
    """An interval drawn as a thin line from ``low`` to ``high`` with short caps at both ends.

    ``position`` is the encoding of the category the whisker belongs to; ``along`` the axis of the value;
    ``scale_axis`` the value axis's ``scale`` and ``axis``, repeated here so the layers share one axis.
    Rows whose ends are missing draw nothing.
    """
    shared = dict(scale_axis or {})
    present = {"filter": f"isValid(datum.{low}) && isValid(datum.{high})"}
    line = {"mark": {"type": "rule", "strokeWidth": 1.2, "color": INK},
            "encoding": {**position, along: {"field": low, "type": "quantitative", **shared},
                         f"{along}2": {"field": high}}}
    caps = [{"mark": {"type": "tick", "thickness": 1.2, "size": width, "color": INK,
                      "orient": "horizontal" if along == "y" else "vertical"},
             "encoding": {**position, along: {"field": end, "type": "quantitative", **shared}}}
            for end in (low, high)]
    return [{"transform": [present], **layer} for layer in (line, *caps)]


def _zero_line(along: str, scale_axis: dict | None = None) -> dict:
    """The line at zero on a chart of gains and losses."""
    return {"data": {"values": [{"zero": 0}]}, "mark": {"type": "rule", "color": INK, "strokeWidth": 1},
            "encoding": {along: {"field": "zero", "type": "quantitative", **(scale_axis or {})}}}


def _share_colours(layers: list[dict], colours: dict) -> None:
    """Give every colour encoding of the layers (nested ones too) the chart's one colour scale and legend."""
    for layer in layers:
        _share_colours(layer.get("layer", []), colours)
        colour = layer.get("encoding", {}).get("color")
        if colour is not None and colour.get("scale", "") is not None:
            colour |= colours


#: Up to this many customers the chart draws one dot each (SVG); above it, how many customers fall in
#: each cell of a grid (a fixed number of cells whatever the shop's size), so the page stays light. A browser
#: spends about a third of a millisecond of its main thread per SVG dot (59,493 dots froze one for 21 s), so
#: 1,000 dots stay well under the one-second budget for a single task.
DOTS_AT_MOST = 1000
#: Cells of the density grid along each axis.
GRID_CELLS = 60
#: Names in the pull chart's legend.
DIAGONAL_NAME = "forecast = own average"
DOT_NAMES = ("forecast", "mostly from similar customers")


def pull_toward_centre(table: pd.DataFrame, *, symbol: str = "$", highlight: str | None = None,
                       label: str | None = None, shown_ids: pd.Series | None = None) -> dict:
    """Each customer's plain average against their forecast, on money scales that grow by factors.

    Points on the diagonal kept their own average; points off it were pulled toward what
    similar customers spend. Up to :data:`DOTS_AT_MOST` customers, each is a dot whose area
    grows with the number of orders, coloured where the forecast rests mostly on similar
    customers (:func:`forecasting.options.low_confidence`). Above that, the chart shows how
    many customers fall in each of ``GRID_CELLS`` x ``GRID_CELLS`` cells (counted here, in
    numpy; the chart carries one record per non-empty cell, never one per customer), drawn
    on a canvas: the browser then draws the same few thousand cells for 2,000 customers or
    2 million.

    Both axes are Vega-Lite log scales over the same money range; their ticks are
    :func:`money_ticks` (1, 2, 5, 10, ... labelled with the currency symbol).

    Parameters
    ----------
    table : pandas.DataFrame
        The library's forecast table.
    highlight : str, optional
        The customer id to ring (the one explained beside the chart).
    label : str, optional
        What to call the ringed customer in the legend (default: ``highlight``).
    shown_ids : pandas.Series, optional
        The ids to show in the dots' tooltips, aligned with ``table`` (pseudonyms while
        they are on); default the table's own.
    """
    keep = ((table["average_order_value"] > 0) & (table["expected_next_order"] > 0)).to_numpy()
    data = table[keep]
    average = data["average_order_value"].to_numpy(dtype=float)
    forecast = data["expected_next_order"].to_numpy(dtype=float)
    if len(data) == 0:
        return _layout({"data": {"values": []}, "mark": "point"}, height=460)
    x, y = np.log10(average), np.log10(forecast)
    low, high = float(min(x.min(), y.min())), float(max(x.max(), y.max()))
    pad = 0.02 * max(high - low, 0.1)
    low, high = low - pad, high + pad
    values, labels = money_ticks(10 ** low, 10 ** high, symbol)

    def money_axis(title: str) -> dict:
        return {"title": title, "values": values, "labelExpr": _tick_labels(values, labels)}

    scale = {"type": "log", "domain": [10 ** low, 10 ** high], "nice": False}
    position = {"x": {"field": "average", "type": "quantitative", "scale": scale,
                      "axis": money_axis("Customer's own average order")},
                "y": {"field": "forecast", "type": "quantitative", "scale": scale,
                      "axis": money_axis("Expected next order")}}
    names, colours = [DIAGONAL_NAME], [DIAGONAL]
    layers = [{"data": {"values": [{"average": 10 ** low, "forecast": 10 ** low},
                                   {"average": 10 ** high, "forecast": 10 ** high}]},
               "mark": {"type": "line", "strokeDash": [5, 4], "strokeWidth": 1, "clip": True},
               "encoding": {**position, "color": {"datum": DIAGONAL_NAME}}}]
    small = len(data) <= DOTS_AT_MOST
    if small:
        ids = (shown_ids[keep] if shown_ids is not None else data["customer"]).astype(str).to_numpy()
        orders = data["orders"].to_numpy(dtype=float)
        diameter = 5 + 16 * np.sqrt(orders / max(orders.max(), 1.0))
        group = np.where(low_confidence(data["own_history_weight"].to_numpy(dtype=float)),
                         DOT_NAMES[1], DOT_NAMES[0])
        dots = pd.DataFrame({"customer": ids, "orders": orders.astype(int), "average": average,
                             "forecast": forecast, "group": group, "area": diameter ** 2,
                             "average_text": [_cash(v, symbol, 2) for v in average],
                             "forecast_text": [_cash(v, symbol, 2) for v in forecast]})
        present = [name for name in DOT_NAMES if (group == name).any()]
        names += present
        colours += [PALETTE["blue"] if name == DOT_NAMES[0] else PALETTE["vermilion"] for name in present]
        layers.append({
            "data": {"values": _records(dots)},
            "mark": {"type": "circle", "opacity": 0.55, "stroke": "white", "strokeWidth": 0.5},
            "encoding": {**position, "color": {"field": "group", "type": "nominal"},
                         "size": {"field": "area", "type": "quantitative", "scale": None},
                         "tooltip": [{"field": "customer", "title": "customer"},
                                     {"field": "orders", "type": "quantitative", "title": "orders", "format": ","},
                                     {"field": "average_text", "title": "average"},
                                     {"field": "forecast_text", "title": "forecast"}]}})
    else:
        edges = np.linspace(low, high, GRID_CELLS + 1)
        counts, _, _ = np.histogram2d(x, y, bins=[edges, edges])
        column, row = np.nonzero(counts)  # x index, y index of every cell with a customer in it
        money = 10 ** edges
        cells = pd.DataFrame({"average": money[column], "average_end": money[column + 1],
                              "forecast": money[row], "forecast_end": money[row + 1],
                              "customers": counts[column, row].astype(int)})
        cells["tip"] = [f"{c:,} customers here" for c in cells["customers"]]
        ticks = [t for t in (1, 10, 100, 1000, 10_000, 100_000) if t <= max(counts.max(), 1)]
        layers.insert(0, {
            "data": {"values": _records(cells)},
            "mark": {"type": "rect"},
            "encoding": {**position,
                         "x2": {"field": "average_end"}, "y2": {"field": "forecast_end"},
                         "fill": {"field": "customers", "type": "quantitative",
                                  "scale": {"type": "log", "domain": [1, max(float(counts.max()), 10.0)],
                                            "range": ["#DCEBF5", PALETTE["sky"], PALETTE["blue"]]},
                                  "legend": {"title": "customers", "values": ticks, "format": ",",
                                             "orient": "right", "direction": "vertical", "gradientLength": 160}},
                         "tooltip": {"field": "tip"}}})
    ring_name = None
    if highlight is not None:
        row = data[data["customer"].astype(str) == str(highlight)]
        if len(row):
            name = ring_name = str(label or highlight)
            names.append(name)
            colours.append(PALETTE["black"])
            layers.append({
                "data": {"values": [{"average": float(row["average_order_value"].iloc[0]),
                                     "forecast": float(row["expected_next_order"].iloc[0])}]},
                "mark": {"type": "point", "filled": False, "size": 256, "strokeWidth": 2.5},
                "encoding": {**position, "color": {"datum": name}}})
    legend = _series(names, colours)
    # Each legend entry looks as drawn: the diagonal a dashed stroke, the ringed customer a ring, the dots discs.
    is_diagonal = f"datum.label === {json.dumps(DIAGONAL_NAME, ensure_ascii=False)}"
    is_ring = "false" if ring_name is None else f"datum.label === {json.dumps(ring_name, ensure_ascii=False)}"
    legend["legend"]["encode"] = {"symbols": {"update": {
        "shape": {"signal": f"{is_diagonal} ? 'stroke' : 'circle'"},
        "strokeDash": {"signal": f"{is_diagonal} ? [4, 3] : [1, 0]"},
        "fillOpacity": {"signal": f"{is_ring} ? 0 : 1"},
        "strokeWidth": {"signal": f"{is_ring} ? 2 : 1.5"}}}}
    _share_colours(layers, legend)
    return _layout({"layer": layers}, height=460, renderer="svg" if small else "canvas")


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
                      x_range: list[float] | None = None) -> dict:
    """Error reduction against own averages, one bar per row of ``results``, with 95% intervals.

    Horizontal bars, so the methods' names can be read without turning the head; the
    method in use (``highlight``) is drawn in the second colour. Charts that are compared
    take the same ``x_range`` (:func:`shared_range`).
    """
    spread = results["variance"].map(lambda v: "its own spread" if v == "gamma-model"
                                     else f"{variance_label(v)} spread model")
    bars = pd.DataFrame({
        "method": results["method"].map(method_label).to_numpy(),
        "reduction": results["error_reduction_pct"].to_numpy(dtype=float),
        "low": results["ci_low"].to_numpy(dtype=float), "high": results["ci_high"].to_numpy(dtype=float),
        "colour": [PALETTE["vermilion"] if m == highlight else PALETTE["blue"] for m in results["method"]]})
    bars["tip"] = [f"{name} ({words}): {value:.1f}%"
                   for name, words, value in zip(bars["method"], spread, bars["reduction"])]
    scale = {"zero": True} if x_range is None else {"domain": list(x_range), "nice": False, "zero": False}
    category = {"y": {"field": "method", "type": "nominal", "sort": list(bars["method"]), "title": None,
                      "axis": {"grid": False, "labelFontSize": 13}}}
    scale_axis = {"scale": scale, "axis": {"title": "Smaller error than own averages (%)",
                                           "labelExpr": PERCENT_LABELS}}
    layers = [{"mark": {"type": "bar", "height": {"band": 0.65}},
               "encoding": {**category, "x": {"field": "reduction", "type": "quantitative", **scale_axis},
                            "color": {"field": "colour", "type": "nominal", "scale": None},
                            "tooltip": {"field": "tip"}}},
              *_whiskers(category, "low", "high", along="x", width=7, scale_axis=scale_axis),
              _zero_line("x", scale_axis)]
    return _layout({"data": {"values": _records(bars)}, "layer": layers},
                   title=title, height=int(130 + 34 * len(results)))


#: What the two evaluations are called on the charts.
EVALUATION_NAMES = {"leave-one-out": "hiding one order", "backtest": "next order"}


def gain_by_past_orders(table: pd.DataFrame, *, title: str) -> dict:
    """Error reduction by how many orders were known before the forecast, one bar per evaluation."""
    kinds = [EVALUATION_NAMES.get(kind, kind) for kind in table["evaluation"].drop_duplicates()]
    bars = pd.DataFrame({"past_orders": table["past_orders"].astype(str).to_numpy(),
                         "kind": table["evaluation"].map(lambda k: EVALUATION_NAMES.get(k, k)).to_numpy(),
                         "reduction": table["error_reduction_pct"].to_numpy(dtype=float),
                         "held_out": table["held_out"].to_numpy()})
    bars["tip"] = [f"{past} past orders: {value:.1f}% ({int(held):,} orders scored), {kind}"
                   for past, value, held, kind in zip(bars["past_orders"], bars["reduction"], bars["held_out"],
                                                      bars["kind"])]
    colours = [(PALETTE["green"], PALETTE["purple"])[i % 2] for i in range(len(kinds))]
    scale_axis = {"axis": {"title": "Smaller error than own averages (%)", "labelExpr": PERCENT_LABELS}}
    layers = [{"mark": {"type": "bar", "width": {"band": 0.8}},
               "encoding": {"x": {"field": "past_orders", "type": "nominal",
                                  "sort": list(pd.unique(bars["past_orders"])),
                                  "axis": {"title": "Orders known before the forecast", "labelAngle": 0,
                                           "grid": False}},
                            "xOffset": {"field": "kind", "type": "nominal", "sort": kinds},
                            "y": {"field": "reduction", "type": "quantitative", **scale_axis},
                            "color": {"field": "kind", "type": "nominal", **_series(kinds, colours)},
                            "tooltip": {"field": "tip"}}},
              _zero_line("y", scale_axis)]
    return _layout({"data": {"values": _records(bars)}, "layer": layers}, title=title, height=380)


def tier_shares(summary: pd.DataFrame, *, title: str) -> dict:
    """Each tier's share of customers next to its share of the money."""
    parts = [("share_of_customers", "share of customers", PALETTE["sky"], "of customers")]
    if summary["share_of_projected_revenue"].notna().any():
        parts.append(("share_of_projected_revenue", "share of projected revenue", PALETTE["blue"],
                      "of projected revenue"))
    rows = []
    for column, name, _, words in parts:
        for tier, share in zip(summary["tier"].astype(str), 100 * summary[column].to_numpy(dtype=float)):
            rows.append({"tier": tier, "share": share, "part": name,
                         "tip": f"{tier}: {share:.0f}% {words}" if math.isfinite(share) else f"{tier}: unknown"})
    names = [name for _, name, _, _ in parts]
    return _layout({
        "data": {"values": _records(pd.DataFrame(rows))},
        "mark": {"type": "bar", "width": {"band": 0.7}},
        "encoding": {"x": {"field": "tier", "type": "nominal", "sort": list(summary["tier"].astype(str)),
                           "axis": {"title": None, "labelAngle": 0, "grid": False, "labelFontSize": 13}},
                     "xOffset": {"field": "part", "type": "nominal", "sort": names},
                     "y": {"field": "share", "type": "quantitative", "scale": {"zero": True},
                           "axis": {"title": "Share (%)", "labelExpr": PERCENT_LABELS}},
                     "color": {"field": "part", "type": "nominal", **_series(names, [c for _, _, c, _ in parts])},
                     "tooltip": {"field": "tip"}}}, title=title, height=340)
