"""Plain-language text for the dashboard: money, the controls' names, verdicts and one-sentence explanations.

Pure functions (no streamlit), so the wording can be tested on its own. The library's
messages say what is wrong and carry the column role or option that fixes it; the
dashboard names its own control for it here (:func:`control_name`).
"""

from __future__ import annotations

import math

from forecasting.options import METHOD_LABELS, METHOD_WORDS, VARIANCE_LABELS, VARIANCE_WORDS  # noqa: F401
from forecasting.seasons import MONTH_NAMES

# How amounts are shown for each currency (which mark in a file means which currency is the reader's rule:
# forecasting.io.rules.CURRENCY_SYMBOLS).
SYMBOLS = {"USD": "$", "EUR": "€", "GBP": "£", "JPY": "¥", "INR": "₹", "CAD": "CA$", "AUD": "A$",
           "CHF": "CHF ", "SEK": "kr ", "NOK": "kr ", "DKK": "kr "}

# ---------------------------------------------------------------------------
# The controls on the pages, by the column role or library option a message concerns

PAGE_TITLES = {"load": "Load orders", "forecasts": "Forecasts", "accuracy": "Accuracy check",
               "tiers": "Value tiers", "outlook": "Revenue outlook"}

# The words shown for each column role (the column boxes on Load orders).
ROLE_LABELS = {
    "customer": "Customer",
    "date": "Order date",
    "value": "Order amount",
    "order_id": "Order number",
    "status": "Order status",
    "currency": "Currency",
    "segment": "Segment",
}
ROLE_HELP = {
    "customer": "The column that identifies who placed the order (an id or an e-mail address).",
    "date": "When the order was placed.",
    "value": "What the order (or order line) was worth. Lines with the same order number are added up.",
    "order_id": "Lines sharing an order number are added up into one order. Without it, each row is one order.",
    "status": "Used to leave out test, cancelled and unpaid orders and to net refunds.",
    "currency": "Needed when the amounts are not all in one currency.",
    "segment": "An optional grouping, such as the sales channel; the accuracy check is broken down by it, and the "
               "tier lists can be narrowed to one.",
}

# The label of the control for each library option (the pages draw their widgets with these words).
READING_OPTIONS = "Reading options"
CONTROL_LABELS = {
    "currency": "Keep only this currency",
    "date_order": "Dates are written",
    "decimal": "Decimal mark",
    "sheet": "Sheet",
    "header_row": "Header is on row",
    "keep_unpaid": "Keep unpaid and unfinished orders",
    "keep_implausible": "Keep implausible amounts and dates",
    "method": "Method",
    "variance": "Spread model",
    "horizon": "Period ahead",
    "by": "Group customers by",
    "rank": "Rank customers by",
    "shares": "Tiers",
}
# One line under each reading option's control.
CONTROL_HELP = {
    "header_row": "The spreadsheet row that holds the column headings, when title lines sit above them. "
                  "Left empty, it is found by itself.",
    "keep_unpaid": "Orders whose status says pending, failed, draft or on hold are left out, as never paid; "
                   "tick to count them as orders.",
    "keep_implausible": "An amount a thousand times the shop's usual order or more, or a date in the future or "
                        "before 1990, is taken for a typo and left out; tick to use them as they are.",
    "sheet": "The sheet of the workbook that holds the orders (the first, unless you choose another).",
}

# Library option -> (pages with the control, where on the page the control is).
_UNDER_READING = f"under {READING_OPTIONS}"
OPTION_CONTROLS = {
    "currency": (("load",), f"'{CONTROL_LABELS['currency']}' {_UNDER_READING}"),
    "date_order": (("load",), f"'{CONTROL_LABELS['date_order']}' {_UNDER_READING}"),
    "decimal": (("load",), f"'{CONTROL_LABELS['decimal']}' {_UNDER_READING}"),
    "sheet": (("load",), f"the '{CONTROL_LABELS['sheet']}' box {_UNDER_READING}"),
    "header_row": (("load",), f"'{CONTROL_LABELS['header_row']}' {_UNDER_READING}"),
    "keep_unpaid": (("load",), f"the '{CONTROL_LABELS['keep_unpaid']}' check box {_UNDER_READING}"),
    "keep_implausible": (("load",), f"the '{CONTROL_LABELS['keep_implausible']}' check box {_UNDER_READING}"),
    "method": (("forecasts",), f"the '{CONTROL_LABELS['method']}' box under How the forecasts are made"),
    "variance": (("forecasts",), f"the '{CONTROL_LABELS['variance']}' box under How the forecasts are made"),
    "horizon": (("tiers", "outlook"), f"the '{CONTROL_LABELS['horizon']}' box"),
    "by": (("outlook",), f"the '{CONTROL_LABELS['by']}' box"),
    "rank": (("tiers",), f"the '{CONTROL_LABELS['rank']}' box"),
    "shares": (("tiers",), f"the '{CONTROL_LABELS['shares']}' box"),
}


def control_name(role: str | None, option: str | None, *, here: str | None = None) -> str | None:
    """What the dashboard calls the control that fixes a problem, for ``OrderDataError.worded``.

    ``here`` is the page the message is shown on (a key of ``PAGE_TITLES``); a control on
    another page is named with its page. An option without a control on the dashboard
    gives None, and the message then names none.

    Examples
    --------
    >>> control_name("value", None, here="load")
    "the 'Order amount' box under Which column is which"
    >>> control_name("segment", "method", here="forecasts")
    "the 'Method' box under How the forecasts are made, or the 'Segment' box on the Load orders page"
    >>> control_name(None, "decimal", here="forecasts")
    "'Decimal mark' under Reading options on the Load orders page"
    >>> control_name(None, "horizon", here="outlook")
    "the 'Period ahead' box"
    >>> control_name(None, "engine") is None
    True
    """
    names = []
    if option in OPTION_CONTROLS:
        pages, where = OPTION_CONTROLS[option]
        names.append(where if here in pages else f"{where} on the {PAGE_TITLES[pages[0]]} page")
    if role in ROLE_LABELS:
        where = f"the '{ROLE_LABELS[role]}' box"
        names.append(f"{where} under Which column is which" if here == "load"
                     else f"{where} on the {PAGE_TITLES['load']} page")
    return ", or ".join(names) if names else None


# ---------------------------------------------------------------------------
# Money and counts


def money(amount: float, symbol: str = "$", places: int | None = None) -> str:
    """Money for a sentence: whole units from 100 up, cents below (or always ``places`` decimals,
    as a chart's tooltips show them).

    Examples
    --------
    >>> money(310.0), money(52.456), money(1234567.8, "€"), money(-3.5, "£"), money(52.46, "$", 0)
    ('$310', '$52.46', '€1,234,568', '-£3.50', '$52')
    """
    if amount is None or not math.isfinite(amount):
        return "unknown"
    sign = "-" if amount < 0 else ""
    amount = abs(amount)
    if places is None:
        places = 0 if amount >= 100 else 2
    return f"{sign}{symbol}{amount:,.{places}f}"


def money_range(low: float, high: float, symbol: str = "$") -> str:
    """'between $40 and $60', or 'about $52' when the two ends meet (a range no wider than a cent).

    Examples
    --------
    >>> money_range(40, 60.5), money_range(75.96, 75.96), money_range(0.0, 30.0)
    ('between $40.00 and $60.50', 'about $75.96', 'up to $30.00')
    """
    if math.isfinite(low) and math.isfinite(high) and abs(high - low) < 0.005:
        return f"about {money(high, symbol)}"
    if low <= 0:
        return f"up to {money(high, symbol)}"
    return f"between {money(low, symbol)} and {money(high, symbol)}"


def orders_word(count: int) -> str:
    """'1 order', '3 orders'."""
    return f"{count:,} order" if count == 1 else f"{count:,} orders"


def currency_symbol(code: str) -> str:
    """The symbol to show amounts with for an ISO currency code ('USD' -> '$'; unknown codes as 'XYZ ').

    Examples
    --------
    >>> currency_symbol("gbp"), currency_symbol("PLN"), currency_symbol("")
    ('£', 'PLN ', '')
    """
    code = (code or "").strip().upper()
    return SYMBOLS.get(code, f"{code} " if code else "")


# ---------------------------------------------------------------------------
# Methods and spread models (details sections only)


def method_label(name: str) -> str:
    return METHOD_LABELS.get(name, name)


def variance_label(name: str) -> str:
    return VARIANCE_LABELS.get(name, name)


def pair_words(method: str, variance: str) -> str:
    """A method with its spread model; Gamma-Gamma has a spread of its own and is named alone.

    Examples
    --------
    >>> pair_words("mta", "log")
    'multi-task averaging (MTA) with the log scale spread model'
    >>> pair_words("gamma-gamma", "gamma-model")
    'the Gamma-Gamma spend model (it has its own spread)'
    """
    if method == "gamma-gamma" or variance == "gamma-model":
        return "the Gamma-Gamma spend model (it has its own spread)"
    return f"{method_label(method)} with the {variance_label(variance)} spread model"


def choice_sentence(chosen_by: str, check: dict | None, method: str, variance: str) -> str:
    """How the method and spread model in use were settled, from the library's answer (not its wording).

    Examples
    --------
    >>> check = {"method": "mta", "variance": "log", "error_reduction_pct": 8.34, "margin_pct": 0.61,
    ...          "fell_back_to_plain": False,
    ...          "runner_up": {"method": "empirical-bayes", "variance": "log", "error_reduction_pct": 7.7}}
    >>> choice_sentence("accuracy check", check, "mta", "log")
    'Chosen by the accuracy check: multi-task averaging (MTA) with the log scale spread model had the smallest error when one order at a time was hidden, 8.3% below the own averages, 0.6 points ahead of empirical Bayes with the log scale spread model.'
    >>> choice_sentence("default", None, "empirical-bayes", "log")
    'The standing choice: empirical Bayes with the log scale spread model.'
    """
    if chosen_by == "accuracy check" and check is not None:
        if check.get("fell_back_to_plain"):
            return ("Chosen by the accuracy check: no method beat the customers' own averages when one order at "
                    "a time was hidden, so own averages are used.")
        runner = check.get("runner_up") or {}
        ahead = ""
        if runner and math.isfinite(float(check.get("margin_pct", math.nan))):
            ahead = (f", {float(check['margin_pct']):.1f} points ahead of "
                     f"{pair_words(runner['method'], runner['variance'])}")
        return (f"Chosen by the accuracy check: {pair_words(check['method'], check['variance'])} had the smallest "
                f"error when one order at a time was hidden, {float(check['error_reduction_pct']):.1f}% below the "
                f"own averages{ahead}.")
    if chosen_by == "default":
        return f"The standing choice: {pair_words(method, variance)}."
    return f"As chosen: {pair_words(method, variance)}."


def tail_sentence(top1_share: float, tail_index: float) -> str:
    """How big the big orders are, as facts (no model advice: the choice is said elsewhere).

    Examples
    --------
    >>> tail_sentence(0.21, 1.3)
    'The largest 1% of orders bring in 21% of revenue: a few orders are many times the usual one.'
    >>> tail_sentence(0.04, 6.0)
    'The largest 1% of orders bring in 4% of revenue: big orders are not unusually large.'
    """
    start = f"The largest 1% of orders bring in {top1_share:.0%} of revenue"
    if not math.isfinite(tail_index):
        return f"{start}."
    if tail_index < 4:
        return f"{start}: a few orders are many times the usual one."
    return f"{start}: big orders are not unusually large."


# ---------------------------------------------------------------------------
# One customer's forecast


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
        The share (0 to 1) of the forecast that comes from the customer's own orders.
    centre : float or None
        What similar customers spend (the value the average is pulled toward); None when
        the method pulls toward nothing.
    log_scale : bool
        True when the weighing was done on proportions (log order values): then the
        forecast need not lie between the own average and the centre.

    Notes
    -----
    The value pulled toward is named only when the forecast lies between the own average
    and it (to the cent), so the sentence never says a forecast was pulled toward a value
    it moved away from.

    Examples
    --------
    >>> forecast_sentence(orders=2, average=310, forecast=120, own_weight=0.3, centre=52.0)
    'With 2 orders averaging $310, the forecast leans 70% on what similar customers spend ($52.00), so it is $120.'
    >>> forecast_sentence(orders=1, average=40, forecast=40, own_weight=1.0, centre=52.0)
    "With 1 order averaging $40.00, the forecast rests on this customer's own orders alone: $40.00."
    >>> forecast_sentence(orders=3, average=40, forecast=38, own_weight=0.6, centre=52.0, log_scale=True)
    'With 3 orders averaging $40.00, the forecast leans 40% on what similar customers spend; the weighing is done on proportions rather than on money amounts, so it comes to $38.00.'
    >>> forecast_sentence(orders=2, average=1467, forecast=590, own_weight=0.82, centre=59.98, log_scale=True)
    'With 2 orders averaging $1,467, the forecast leans 18% on what similar customers spend ($59.98), so it is $590: the weighing is done on proportions rather than on money amounts, so one large order moves it less than its amount.'
    """
    start = f"With {orders_word(orders)} averaging {money(average, symbol)}"
    if own_weight >= 0.995 or centre is None or not math.isfinite(centre):
        return f"{start}, the forecast rests on this customer's own orders alone: {money(forecast, symbol)}."
    between = min(average, centre) - 0.005 <= forecast <= max(average, centre) + 0.005
    similar = f" ({money(centre, symbol)})" if between else ""
    if own_weight <= 0.005:
        body = f"{start}, the forecast rests entirely on what similar customers spend{similar}"
    else:
        body = f"{start}, the forecast leans {1.0 - own_weight:.0%} on what similar customers spend{similar}"
    if between and log_scale:
        return (f"{body}, so it is {money(forecast, symbol)}: the weighing is done on proportions rather than on "
                "money amounts, so one large order moves it less than its amount.")
    if between:
        return f"{body}, so it is {money(forecast, symbol)}."
    if log_scale:
        return (f"{body}; the weighing is done on proportions rather than on money amounts, so it comes to "
                f"{money(forecast, symbol)}.")
    return f"{body}: {money(forecast, symbol)}."


# ---------------------------------------------------------------------------
# The accuracy verdict

GOOD, UNSETTLED, WORSE, UNKNOWN = "good", "unsettled", "worse", "unknown"


def verdict(reduction_pct: float, *, low: float | None = None, high: float | None = None) -> tuple[str, str]:
    """The accuracy verdict: its tone and one sentence, both following the interval.

    ``low`` and ``high`` bound the likely error reduction (a 95% interval). The tone is
    ``"good"`` only when the whole interval is a gain, ``"worse"`` when the whole of it is
    a loss, ``"unsettled"`` when it straddles zero (or is not known), ``"unknown"`` when
    nothing could be measured.

    Examples
    --------
    >>> verdict(12.34, low=8.0, high=16.5)
    ('good', "On your data, the forecasts cut the error of the next order by 12% compared with each customer's own average (probably between 8% and 16%).")
    >>> verdict(14.0, low=-34.0, high=77.0)
    ('unsettled', "On your data, the forecasts cut the error by 14% compared with each customer's own average, but that is not settled: on these orders, anything from 34% worse to 77% better is plausible.")
    >>> verdict(-8.0, low=-12.0, high=-3.0)
    ('worse', "On your data, the forecasts did worse than each customer's own average: the error was 8% larger (probably between 3% and 12% larger).")
    """
    if reduction_pct is None or not math.isfinite(reduction_pct):
        return UNKNOWN, "There were not enough repeat orders to measure accuracy on your data."
    known = low is not None and high is not None and math.isfinite(low) and math.isfinite(high)
    if known and low > 0 and reduction_pct > 0:
        return GOOD, (f"On your data, the forecasts cut the error of the next order by {reduction_pct:.0f}% compared "
                      f"with each customer's own average (probably between {low:.0f}% and {high:.0f}%).")
    if known and high < 0 and reduction_pct < 0:
        return WORSE, ("On your data, the forecasts did worse than each customer's own average: the error was "
                       f"{abs(reduction_pct):.0f}% larger (probably between {abs(high):.0f}% and {abs(low):.0f}% "
                       "larger).")
    if known:
        plausible = f"on these orders, anything from {abs(low):.0f}% worse to {high:.0f}% better is plausible"
    else:
        plausible = "how sure that is was not measured"
    if reduction_pct > 0:
        return UNSETTLED, (f"On your data, the forecasts cut the error by {reduction_pct:.0f}% compared with each "
                           f"customer's own average, but that is not settled: {plausible}.")
    return UNSETTLED, (f"On your data, the forecasts did not beat each customer's own average (the error was "
                       f"{abs(reduction_pct):.0f}% larger), but that is not settled either: {plausible}.")


# One line on each number the fit reports (the details section's table); names not here are shown bare.
FIT_WORDS = {
    "sigma2": "How much one order's value varies around the customer's usual spend (on the model's scale).",
    "sigma2_log": "The same spread measured on a log scale; it sets the width of the next-order range.",
    "centre": "What a customer with no history of their own would be expected to spend.",
    "centre_log": "That value on the log scale, where the weighing is done.",
    "factor": "The share of each customer's difference from the centre that is kept (James-Stein).",
    "closed_form_factor": "That share as the formula gives it, before any tuning.",
    "Q": "The spread of the customers' averages around the centre, which sets the James-Stein share.",
    "a": "How alike the customers are taken to be (multi-task averaging): larger pulls harder.",
    "a_within": "How alike customers of the same segment are taken to be.",
    "a_between": "How alike the segments are taken to be.",
    "segments": "Number of segments.",
    "tau2": "How much the customers' true averages differ from each other (empirical Bayes).",
    "centre_se": "How precisely the centre is known (standard error).",
    "p": "Gamma-Gamma: how regular a customer's own orders are (larger means steadier).",
    "q": "Gamma-Gamma: how much customers' spending levels differ (smaller means more).",
    "gamma": "Gamma-Gamma: the scale of the customers' spending levels.",
    "population_mean": "Gamma-Gamma: the average spending level over all customers.",
    "lambda": "The amount of pull tried out on your own orders (cross-validation).",
    "iterations": "Refits needed for the proportional spread model to settle.",
    "converged": "Whether those refits settled.",
}


# ---------------------------------------------------------------------------
# The revenue outlook in a shop owner's words (model names only in the details section)

MONTHS = MONTH_NAMES

# One line on each model and number the details section names.
OUTLOOK_WORDS = {
    "BG/NBD": "each customer orders at a steady pace of their own while active, and may stop for good only "
              "right after a repeat order (a customer who ordered once counts as still active)",
    "MBG/NBD": "each customer orders at a steady pace of their own while active, and may stop for good right "
               "after any order, the first included (a customer who ordered once may already be gone)",
    "likelihood": "how probable a model makes the orders the shop actually had; the higher, the better the "
                  "model describes them",
    "month index": "how busy each month is against an average month (1.5 means half as busy again), used only "
                   "when a likelihood-ratio test finds the pattern beyond chance (p below 0.05)",
    "r": "How much the pace of ordering differs between customers (the shape of its gamma distribution; "
         "larger means more alike).",
    "alpha_days": "The scale of that pace in days: r / alpha_days is the average active customer's orders per day.",
    "a": "With b: how the chance of stopping for good after an order differs between customers (a beta "
         "distribution); a / (a + b) is its average.",
    "b": "See a.",
}


# The seasonal setting a check at a cut-off used (a details table's column).
SEASON_LABELS = {"month": "by month of year", "none": "even through the year"}


def return_sentence(orders_per_year: float, chance_stop: float, model: str) -> str:
    """How often customers come back and how many stop, in shop words (``model``: the frequency model's code).

    Examples
    --------
    >>> return_sentence(7.97, 0.414, "mbg-nbd")
    'An active customer orders about 8.0 times a year, and after each order, the first one included, about 41% of customers stop for good.'
    >>> return_sentence(3.0, 0.2, "bg-nbd")
    'An active customer orders about 3.0 times a year, and after each repeat order about 20% of customers stop for good.'
    """
    after = "after each order, the first one included," if model == "mbg-nbd" else "after each repeat order"
    return (f"An active customer orders about {orders_per_year:.1f} times a year, and {after} about "
            f"{chance_stop:.0%} of customers stop for good.")


def busiest_and_quietest(index) -> tuple[str, float, str, float]:
    """The busiest and the quietest month of a twelve-month index, with their values."""
    values = [float(v) for v in index]
    high = max(range(12), key=values.__getitem__)
    low = min(range(12), key=values.__getitem__)
    return MONTHS[high], values[high], MONTHS[low], values[low]


def new_customers_sentence(expected: float, horizon: int, *, terms=(), tests=None, growth_per_year: float = 0.0,
                           month_index=None) -> str:
    """How many new customers to expect, and whether their numbers grow or follow the time of year.

    ``terms`` and ``tests`` are the arrival fit's (which patterns were kept, which were tried).

    Examples
    --------
    >>> new_customers_sentence(485.5, 180, terms=("month",), tests={"trend": {}, "month": {}},
    ...                        month_index=[0.6, 0.7, 1.3, 1.8, 1.3, 1.0, 0.8, 0.8, 1.0, 1.1, 0.8, 0.9])
    'About 486 new customers are expected in the next 180 days, most of them in April and fewest in January; their numbers show no clear growth or decline.'
    >>> new_customers_sentence(40.0, 90, terms=("trend",), tests={"trend": {}, "month": {}}, growth_per_year=0.5)
    'About 40 new customers are expected in the next 90 days; their numbers are growing by about 50% a year.'
    """
    tests = tests or {}
    sentence = f"About {expected:,.0f} new customers are expected in the next {horizon} days"
    if "month" in terms and month_index is not None:
        busiest, _, quietest, _ = busiest_and_quietest(month_index)
        sentence += f", most of them in {busiest} and fewest in {quietest}"
    if "trend" in terms:
        change = "growing" if growth_per_year >= 0 else "shrinking"
        sentence += f"; their numbers are {change} by about {abs(100 * growth_per_year):.0f}% a year"
    elif "trend" in tests:
        sentence += "; their numbers show no clear growth or decline"
    return sentence + "."


def season_sentence(seasons: str, index=None, *, test=None) -> str:
    """Whether repeat orders follow the time of year, in shop words.

    ``seasons`` is the repeat-order model's (``"month"`` when a month index is used) and ``test``
    its likelihood-ratio test of the index (empty when none was tried: that needs a year of orders).

    Examples
    --------
    >>> season_sentence("month", [0.56, 0.67, 1.31, 1.68, 1.42, 1.06, 0.78, 0.81, 1.02, 1.03, 0.76, 0.88])
    'Repeat orders follow the time of year: busiest in April (1.7 times an average month), quietest in January (0.56 times).'
    >>> season_sentence("none", test={"p_value": 0.4, "level": 0.05})
    'Repeat orders are taken as even through the year: the differences between months are within chance.'
    >>> season_sentence("none", test={"p_value": 0.001, "level": 0.05})
    'Repeat orders are taken as even through the year: a pattern by month could not be pinned down on these orders.'
    >>> season_sentence("none")
    'Repeat orders are taken as even through the year: telling the seasons apart needs a full year of orders.'
    """
    start = "Repeat orders are taken as even through the year"
    if seasons == "month" and index is not None:
        busiest, high, quietest, low = busiest_and_quietest(index)
        return (f"Repeat orders follow the time of year: busiest in {busiest} ({high:.2g} times an average month), "
                f"quietest in {quietest} ({low:.2g} times).")
    if not test:
        return f"{start}: telling the seasons apart needs a full year of orders."
    if float(test.get("p_value", 1.0)) >= float(test.get("level", 0.05)):
        return f"{start}: the differences between months are within chance."
    return f"{start}: a pattern by month could not be pinned down on these orders."
