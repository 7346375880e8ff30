"""Plain-language text for the dashboard: money, messages and one-sentence explanations.

Pure functions (no streamlit), so the wording can be tested on its own.
"""

from __future__ import annotations

import math
import re

# What the library's messages call a command-line option, and what the same
# control is called on screen. Longer phrases first so they win over their parts.
_OPTION_WORDS = [
    ("--date-order day-first or --date-order month-first",
     "'Dates are written' under Reading options"),
    ("--decimal . or --decimal ,", "'Decimal mark' under Reading options"),
    ("--currency-column", "the 'Currency' column box"),
    ("--order-id", "the 'Order number' column box"),
    ("--customer", "the 'Customer' column box"),
    ("--segment", "the 'Segment' column box"),
    ("--status", "the 'Order status' column box"),
    ("--value", "the 'Order amount' column box"),
    ("--date-order", "'Dates are written' under Reading options"),
    ("--decimal", "'Decimal mark' under Reading options"),
    ("--variance", "the spread model box"),
    ("--method", "the method box"),
    ("--engine", "the engine"),
]
_CURRENCY_EXAMPLE = re.compile(r"with --currency \(for example --currency ([A-Z]{3})\)")

SYMBOLS = {"USD": "$", "EUR": "€", "GBP": "£", "JPY": "¥", "INR": "₹", "CAD": "CA$", "AUD": "A$",
           "CHF": "CHF ", "SEK": "kr ", "NOK": "kr ", "DKK": "kr "}


def on_screen(message: str) -> str:
    """Reword a library message so it names the controls on screen, not command-line options.

    Examples
    --------
    >>> on_screen("Name it with --customer (the columns are: 'a')")
    "Name it with the 'Customer' column box (the columns are: 'a')"
    """
    text = _CURRENCY_EXAMPLE.sub(r"in 'Keep only this currency' under Reading options (for example \1)", message)
    text = text.replace("--currency", "'Keep only this currency' under Reading options")
    for option, words in _OPTION_WORDS:
        text = text.replace(option, words)
    return text


def money(amount: float, symbol: str = "$") -> str:
    """Money for a sentence: whole units from 100 up, cents below.

    Examples
    --------
    >>> money(310.0), money(52.456), money(1234567.8, "€")
    ('$310', '$52.46', '€1,234,568')
    """
    if amount is None or not math.isfinite(amount):
        return "unknown"
    sign = "-" if amount < 0 else ""
    amount = abs(amount)
    if amount >= 100:
        return f"{sign}{symbol}{amount:,.0f}"
    return f"{sign}{symbol}{amount:,.2f}"


def orders_word(count: int) -> str:
    """'1 order', '3 orders'."""
    return f"{count} order" if count == 1 else f"{count} orders"


def forecast_sentence(*, orders: int, average: float, forecast: float, own_weight: float,
                      centre: float | None, symbol: str = "$", log_scale: bool = False) -> str:
    """Why one customer's forecast differs from their own average, in one sentence.

    Parameters
    ----------
    orders, average : int, float
        The customer's number of orders and plain average order value.
    forecast : float
        The expected next order.
    own_weight : float
        The share (0 to 1) of the forecast that comes from the customer's own history.
    centre : float or None
        What similar customers spend (the value the average is pulled toward);
        None when it is not known.
    log_scale : bool
        True when the weighing was done on log order values (the "log" spread
        model): then the pull is on proportions, and the sentence says so
        instead of suggesting the money amounts add up.

    Examples
    --------
    >>> forecast_sentence(orders=2, average=310, forecast=120, own_weight=0.3, centre=52.0)
    'With 2 orders averaging $310, the forecast leans 70% on what similar customers spend ($52.00), so it is $120.'
    >>> forecast_sentence(orders=1, average=40, forecast=40, own_weight=1.0, centre=52.0)
    "With 1 order averaging $40.00, the forecast rests on this customer's own history alone, so it is $40.00."
    """
    start = f"With {orders_word(orders)} averaging {money(average, symbol)}"
    lean = 1.0 - own_weight
    similar = f" ({money(centre, symbol)})" if centre is not None and math.isfinite(centre) else ""
    if own_weight >= 0.995:
        body = f"{start}, the forecast rests on this customer's own history alone"
    elif own_weight <= 0.005:
        body = f"{start}, the forecast rests entirely on what similar customers spend{similar}"
    else:
        body = f"{start}, the forecast leans {lean:.0%} on what similar customers spend{similar}"
    if not log_scale or own_weight >= 0.995 or own_weight <= 0.005:
        return f"{body}, so it is {money(forecast, symbol)}."
    direction = "down" if forecast < average else "up"
    return (f"{body}. The log spread model pulls in proportions rather than in money, so the lean moves "
            f"the forecast {direction} further than the money amounts suggest: it is {money(forecast, symbol)}.")


def verdict_sentence(reduction_pct: float, *, low: float | None = None, high: float | None = None) -> str:
    """The accuracy verdict in one sentence, with how sure it is.

    ``low`` and ``high`` bound the likely error reduction (a 95% interval); when
    they straddle zero the sentence says the gain is not settled.

    Examples
    --------
    >>> verdict_sentence(12.34, low=8.0, high=16.5)
    "On your data, forecasts cut the next-order error by 12% compared with each customer's own average (likely between 8% and 16%)."
    >>> verdict_sentence(14.0, low=-39.0, high=79.0)
    "On your data, forecasts cut the next-order error by 14% compared with each customer's own average, but with this few orders to test on that is not settled: anywhere from 39% worse to 79% better is plausible."
    >>> verdict_sentence(-3.0)
    "On your data, forecasts did not beat each customer's own average: the next-order error was 3% larger."
    """
    if reduction_pct is None or not math.isfinite(reduction_pct):
        return "There were not enough repeat orders to measure accuracy on your data."
    known = low is not None and high is not None and math.isfinite(low) and math.isfinite(high)
    if reduction_pct > 0:
        start = (f"On your data, forecasts cut the next-order error by {reduction_pct:.0f}% compared with "
                 "each customer's own average")
        if known and low < 0:
            return (f"{start}, but with this few orders to test on that is not settled: anywhere from "
                    f"{abs(low):.0f}% worse to {high:.0f}% better is plausible.")
        return f"{start} (likely between {low:.0f}% and {high:.0f}%)." if known else f"{start}."
    return ("On your data, forecasts did not beat each customer's own average: the next-order error was "
            f"{abs(reduction_pct):.0f}% larger.")


from forecasting.options import METHOD_LABELS, METHOD_WORDS, VARIANCE_LABELS, VARIANCE_WORDS  # noqa: E402


def method_label(name: str) -> str:
    return METHOD_LABELS.get(name, name)


def variance_label(name: str) -> str:
    return VARIANCE_LABELS.get(name, name)


# A method's name in the library's sentences is always followed by "with <model> variance".
_METHOD_NAME = re.compile(r"(?<![\w-])(" + "|".join(sorted((re.escape(m) for m in METHOD_LABELS if m != "auto"),
                                                             key=len, reverse=True)) + r")(?=\s+with\b)")
_VARIANCE_PHRASE = re.compile(r"(?<![\w-])(classic|robust|log|proportional|gamma-model) variance\b")


def name_words(text: str) -> str:
    """Put the on-screen names of methods and spread models into a library sentence.

    Examples
    --------
    >>> name_words("mta with log variance had the smallest leave-one-out error, 8.3% below plain averages, "
    ...            "ahead of mta-minimax with classic variance")
    'multi-task averaging (MTA) with the log scale spread model had the smallest error when hiding one order at a time, 8.3% below own averages, ahead of cautious MTA with the classic spread model'
    """
    text = _METHOD_NAME.sub(lambda m: method_label(m.group(1)), text)
    text = _VARIANCE_PHRASE.sub(lambda m: f"the {variance_label(m.group(1))} spread model", text)
    text = text.replace("smallest leave-one-out error", "smallest error when hiding one order at a time")
    text = text.replace("in leave-one-out", "when hiding one order at a time")
    return text.replace("plain averages", "own averages")
