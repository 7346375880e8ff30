"""Write the demo shop's order export: Fernhollow Plants, two years of order lines.

Fernhollow Plants is an invented independent online shop selling houseplants,
pots and garden tools. Its online store opened on 1 November 2024; this script
writes what its shop platform would export for the two years to 31 October
2026: one row per product line of every order, in the shop's own column
wording, with the small untidiness that real exports carry (refund lines,
cancelled and test orders, money written as text, one duplicated row and one
broken row).

Run from the repository root::

    python demo_data/make_demo_shop.py                 # rewrites demo_data/plant_shop_orders.csv
    python demo_data/make_demo_shop.py --seed 7 --out /tmp/other.csv

The output depends only on the seed: all randomness comes from one
``numpy.random.default_rng(seed)`` drawn in a fixed order, so the same seed
gives the same bytes on every machine.

How the data are made
---------------------
1. Each customer arrives on a day drawn from the shop's seasonal calendar,
   has a spend level (lognormal), a chance of coming back after each order
   and a typical gap between orders. Orders follow from that: after each
   order the customer either comes back (a gamma-distributed wait, measured
   in "seasonal days", so busy months pack orders closer together) or never
   returns; orders past the end of the export are cut off.
2. Each order gets a budget around the customer's spend level; the budget is
   spread over 1-5 product lines, and each line picks a product whose price
   suits its share of the budget, with a quantity to match.
3. Order-level events are then drawn: refunds (an extra negative line),
   cancellations and a handful of test orders.
4. Lines are sorted by order date and order number, money is written as
   text, and one duplicate and one broken row are placed mid-file.

Every parameter below is written down with the reason for its value. They
are reasoned guesses at how a small plant shop looks, not measured figures,
and none was chosen to make a forecasting method do well or badly; spend and
return behaviour are only weakly linked and per-customer spread varies, so no
method's assumptions hold exactly.
"""

from __future__ import annotations

import argparse
import csv
import io
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
DEFAULT_OUT = HERE / "plant_shop_orders.csv"
DEFAULT_SEED = 20241101

HEADER = [
    "Order Number",
    "Order Date",
    "Customer",
    "Product",
    "Qty",
    "Line Total",
    "Currency",
    "Order Status",
    "Channel",
]

# --------------------------------------------------------------------------
# Parameters, each with the reasoning for its value
# --------------------------------------------------------------------------

# The online store opened on 1 November 2024; the export covers two full years.
FIRST_DAY = np.datetime64("2024-11-01")
END_DAY = np.datetime64("2026-11-01")  # exclusive

# About 2,000 customers: a plausible two-year customer list for a one-person
# or small-team independent shop.
N_CUSTOMERS = 2000

# Landscaping / trade buyers: 2.5% of customers. Small garden shops typically
# have a few dozen business accounts among thousands of private buyers.
TRADE_SHARE = 0.025

# Orders per calendar month relative to the yearly average (Jan..Dec).
# Houseplant and garden sales peak in spring (March-May, repotting and
# planting season), dip in the summer holidays, have a smaller autumn bump
# (bulb planting, bringing plants indoors), are quiet in January-February and
# have a gift bump in December.
MONTH_WEIGHT = np.array([0.60, 0.70, 1.35, 1.65, 1.45, 1.05, 0.85, 0.85, 1.05, 1.10, 0.80, 0.95])

# Orders by weekday relative to average (Mon..Sun): online shops see a little
# more weekend and Sunday-evening browsing; the effect is mild.
WEEKDAY_WEIGHT = np.array([1.00, 0.95, 0.95, 0.95, 0.95, 1.05, 1.15])

# Hour of day an order is placed (0..23): little overnight, a late-morning
# peak and a bigger evening peak, the usual shape for consumer web shops.
HOUR_WEIGHT = np.array(
    [0.3, 0.15, 0.1, 0.1, 0.1, 0.2, 0.5, 1.0, 1.5, 2.0, 2.4, 2.5,
     2.4, 2.2, 2.0, 2.0, 2.1, 2.3, 2.6, 3.0, 3.2, 2.8, 1.8, 0.8]
)
# Plant-market sales happen at stalls in the daytime.
MARKET_HOURS = np.arange(9, 17)

# Spend level of a private customer: the median of their typical order is
# lognormal around $42 with a log-spread of 0.35 between customers, so typical
# baskets sit between about $25 and $75 and the average order comes out near
# $50 (our guess at a typical online plant-shop basket, not a measured figure).
RETAIL_MEDIAN_BUDGET = 42.0
RETAIL_LEVEL_SPREAD = 0.35

# How much one customer's orders vary around their own level (log scale).
# Some people buy the same thing every time, others alternate between a
# single plant and a big repotting haul, so the spread itself differs by
# customer: uniform between 0.25 and 0.70.
RETAIL_ORDER_SPREAD = (0.25, 0.70)

# Trade customers: bulk orders of a few hundred to a few thousand dollars,
# median $850, log-spread 0.75 between orders (5%-95% range about $250-$2,900),
# and a log-spread of 0.3 between trade customers' levels.
TRADE_MEDIAN_BUDGET = 850.0
TRADE_LEVEL_SPREAD = 0.30
TRADE_ORDER_SPREAD = 0.75

# Chance a private customer comes back after an order: Beta(1.5, 1.0) across
# customers (mean 0.6). With the two-year cut-off this leaves roughly half of
# customers as one-time buyers, while the 10-15% with a chance above 0.9
# become the long tail of regulars with 10-30 orders.
RETAIL_RETURN_BETA = (1.5, 1.0)

# Typical gap between a private customer's orders, in seasonal days: lognormal
# with a median of 45 days and log-spread 0.6 (most regulars reorder every
# three weeks to three months; soil, feed and "one more plant"), never below
# four weeks: about monthly is as often as anyone restocks plants and soil.
RETAIL_GAP_MEDIAN_DAYS = 45.0
RETAIL_GAP_SPREAD = 0.6
RETAIL_GAP_FLOOR_DAYS = 28.0

# Bigger spenders come back a little less often (they buy in larger batches):
# a weak correlation of +0.2 between log spend level and log gap. Weak because
# we know of no strong evidence either way; it is not zero so that spend and
# frequency are not exactly independent.
SPEND_GAP_CORRELATION = 0.2

# Gaps between orders are gamma distributed with shape 1.5: more regular than
# memoryless (shape 1) since people reorder when something runs out, still
# widely spread.
GAP_SHAPE = 1.5

# Trade customers order rarely: a 0.75 chance of another order after each
# one, a median gap of 120 seasonal days (a few projects a year), log-spread
# 0.3 between trade customers (their work follows the same planting seasons).
TRADE_RETURN_CHANCE = 0.75
TRADE_GAP_MEDIAN_DAYS = 120.0
TRADE_GAP_SPREAD = 0.3

# Lines per order (1..5): most web baskets hold one or two products.
LINE_COUNT_WEIGHT = np.array([0.42, 0.28, 0.16, 0.09, 0.05])
# Trade orders are multi-product site orders: 2..5 lines. A bulk line buys
# many units, so its product's unit price is aimed at 1/25 of the line's
# budget (at least $4).
TRADE_UNITS_PER_LINE = 25.0
TRADE_LINE_COUNT_WEIGHT = np.array([0.0, 0.30, 0.30, 0.25, 0.15])

# How strictly a line's product price follows the line's budget (log scale).
# 0.8 lets a $15 budget still pick a $30 plant sometimes.
PRICE_FIT_SPREAD = 0.8

# Most units of one product a private buyer takes in one line (pots and
# compost come in sixes, plants rarely); trade orders can take hundreds.
RETAIL_MAX_QTY = 8
TRADE_MAX_QTY = 400

# Sales channel: each customer mostly uses one channel. Web shop 72%,
# Instagram shop 16%, plant markets (card reader, synced to the shop) 12%.
CHANNELS = ("web", "instagram", "market")
CHANNEL_WEIGHT = np.array([0.72, 0.16, 0.12])
# Chance an order uses the customer's usual channel rather than another one.
CHANNEL_LOYALTY = 0.85

# About 2% of paid orders get a refund line (damaged in transit, plant did not
# survive, wrong pot size). Most refunds cover one product; a few orders
# (about 3% of refunds, at least two) are refunded in full, netting to zero.
# The refund line carries the order's date: the export repeats the order's
# date on every line of the order.
REFUND_SHARE = 0.02
FULL_REFUND_SHARE = 0.03
MIN_FULL_REFUNDS = 2
# A partial refund returns some units of one product (negative Qty); when the
# order is a single item, the shop instead credits 40% of its price
# (Qty 0: a damaged leaf is compensated, the plant is not sent back).
PART_CREDIT_SHARE = 0.40

# About 1% of orders are cancelled before dispatch.
CANCEL_SHARE = 0.01

# A few checkout tests by the shop owner, on a made-up test account.
N_TEST_ORDERS = 4
TEST_CUSTOMER = "C-TEST"

# A few lines from the market card-reader sync arrive as plain numbers
# ("12.5") instead of money text: 1.5% of positive market lines, a couple
# of dozen rows in all.
PLAIN_MONEY_SHARE = 0.015

# Order numbers count up from FH-100001; about 3% of numbers are skipped
# (abandoned checkouts reserve a number and never complete).
FIRST_ORDER_NUMBER = 100001
SKIPPED_NUMBER_SHARE = 0.03

# Where the two broken rows sit, as a fraction of the way through the file.
DUPLICATE_AT = 0.45
MALFORMED_AT = 0.62

# Product catalogue: name, price (USD), popularity weight, suitable for
# trade bulk orders. Prices are typical of independent plant shops; weights
# say how often a product is picked when its price suits the budget.
CATALOGUE = [
    # Plants
    ("Monstera deliciosa 17cm pot", 34.00, 3.0, False),
    ("Pothos, golden 12cm pot", 14.50, 3.0, False),
    ("Snake plant Laurentii 14cm pot", 22.00, 2.5, True),
    ("Fiddle-leaf fig 21cm pot", 48.00, 1.5, False),
    ("ZZ plant 17cm pot", 29.00, 2.0, True),
    ("Calathea orbifolia 14cm pot", 26.50, 1.5, False),
    ("String of pearls, hanging 12cm", 18.00, 1.5, False),
    ("Peace lily 17cm pot", 24.00, 2.0, True),
    ("Rubber plant Tineke 17cm pot", 31.00, 1.5, False),
    ("Chinese money plant 12cm pot", 12.50, 2.5, False),
    ("Bird of paradise 24cm pot", 65.00, 1.0, False),
    ("Olive tree 1.2m", 120.00, 0.6, True),
    ("Fern, Boston 14cm pot", 16.00, 1.5, False),
    ("Aloe vera 12cm pot", 9.50, 2.0, False),
    ("Succulent trio 6cm pots", 15.00, 2.0, False),
    ("Kentia palm 1.5m", 145.00, 0.5, True),
    ("Spider plant 12cm pot", 8.50, 2.0, False),
    ("Cast iron plant 17cm pot", 27.00, 1.0, True),
    # Pots
    ("Terracotta pot 12cm", 4.50, 2.0, True),
    ("Terracotta pot 21cm", 11.00, 2.0, True),
    ("Terracotta pot 30cm", 19.50, 1.2, True),
    ("Glazed ceramic pot, sage 17cm", 23.00, 1.5, False),
    ("Self-watering pot 21cm", 18.50, 1.2, False),
    ("Hanging macrame planter", 16.00, 1.0, False),
    ("Fibreclay planter 50cm", 89.00, 0.6, True),
    ("Saucer 21cm", 3.50, 1.5, True),
    # Tools
    ("Hori-hori weeding knife", 32.00, 1.0, True),
    ("Pruning shears, bypass", 27.50, 1.0, True),
    ("Brass watering can 1.5L", 42.00, 0.8, False),
    ("Mister spray bottle 500ml", 9.00, 1.5, False),
    ("Hand trowel, ash handle", 15.50, 1.0, True),
    ("Kneeling pad", 12.00, 0.6, False),
    ("Moisture meter", 11.50, 1.0, False),
    ("Grow light bar 60cm", 54.00, 0.7, False),
    # Soil and care
    ("Peat-free compost 40L", 9.75, 2.5, True),
    ("Orchid bark mix 5L", 7.50, 1.2, False),
    ("Houseplant feed 250ml", 6.95, 2.5, False),
    ("Perlite 10L", 8.25, 1.2, True),
    ("Repotting kit", 24.00, 1.0, False),
    ("Slow-release feed 1kg", 13.50, 0.8, True),
]
FULL_REFUND_PRODUCT = "Whole order refund"


# --------------------------------------------------------------------------
# Calendar
# --------------------------------------------------------------------------


def _calendar():
    """Return the export's days and their cumulative seasonal weight.

    The weight of a day is its month weight times its weekday weight, scaled
    so the average day weighs 1; ``cumulative[i]`` is the total weight of the
    days before day ``i``, so a "seasonal day" is one average day's worth of
    shop traffic.
    """
    days = np.arange(FIRST_DAY, END_DAY, dtype="datetime64[D]")
    months = days.astype("datetime64[M]").astype(np.int64) % 12
    weekdays = (days.astype(np.int64) + 3) % 7  # 1970-01-01 was a Thursday
    weight = MONTH_WEIGHT[months] * WEEKDAY_WEIGHT[weekdays]
    weight = weight / weight.mean()
    cumulative = np.concatenate([[0.0], np.cumsum(weight)])
    return days, cumulative


def _seasonal_to_day(seasonal, cumulative):
    """Map seasonal time to the index of the calendar day it falls on."""
    return np.searchsorted(cumulative, seasonal, side="right") - 1


# --------------------------------------------------------------------------
# Customers and their orders
# --------------------------------------------------------------------------


def _simulate_orders(rng, cumulative):
    """Draw every customer and the seasonal time of each of their orders.

    Returns
    -------
    customers : dict of numpy arrays, one entry per customer
    order_customer : numpy.ndarray of int, customer index of each order
    order_seasonal : numpy.ndarray of float, seasonal time of each order
    """
    horizon = cumulative[-1]
    is_trade = rng.random(N_CUSTOMERS) < TRADE_SHARE
    arrival = rng.uniform(0.0, horizon, N_CUSTOMERS)

    # Spend level and gap share one correlated normal pair.
    z_spend = rng.standard_normal(N_CUSTOMERS)
    z_other = rng.standard_normal(N_CUSTOMERS)
    z_gap = SPEND_GAP_CORRELATION * z_spend + np.sqrt(1 - SPEND_GAP_CORRELATION**2) * z_other

    level = np.where(
        is_trade,
        np.log(TRADE_MEDIAN_BUDGET) + TRADE_LEVEL_SPREAD * z_spend,
        np.log(RETAIL_MEDIAN_BUDGET) + RETAIL_LEVEL_SPREAD * z_spend,
    )
    order_spread = np.where(
        is_trade, TRADE_ORDER_SPREAD, rng.uniform(*RETAIL_ORDER_SPREAD, N_CUSTOMERS)
    )
    return_chance = np.where(
        is_trade, TRADE_RETURN_CHANCE, rng.beta(*RETAIL_RETURN_BETA, N_CUSTOMERS)
    )
    typical_gap = np.where(
        is_trade,
        TRADE_GAP_MEDIAN_DAYS * np.exp(TRADE_GAP_SPREAD * z_gap),
        np.maximum(RETAIL_GAP_MEDIAN_DAYS * np.exp(RETAIL_GAP_SPREAD * z_gap), RETAIL_GAP_FLOOR_DAYS),
    )
    usual_channel = rng.choice(len(CHANNELS), size=N_CUSTOMERS, p=CHANNEL_WEIGHT)

    order_customer = []
    order_seasonal = []
    for c in range(N_CUSTOMERS):
        t = arrival[c]
        while t < horizon:
            order_customer.append(c)
            order_seasonal.append(t)
            if rng.random() >= return_chance[c]:
                break
            # Gamma gap with mean typical_gap.
            t += rng.gamma(GAP_SHAPE, typical_gap[c] / GAP_SHAPE)

    customers = {
        "is_trade": is_trade,
        "level": level,
        "order_spread": order_spread,
        "usual_channel": usual_channel,
    }
    return customers, np.array(order_customer), np.array(order_seasonal)


# --------------------------------------------------------------------------
# Lines of one order
# --------------------------------------------------------------------------

_NAMES = [item[0] for item in CATALOGUE]
_PRICES = np.array([item[1] for item in CATALOGUE])
_POPULARITY = np.array([item[2] for item in CATALOGUE])
_TRADE_OK = np.array([item[3] for item in CATALOGUE])


def _order_lines(rng, budget, *, trade):
    """Choose the products and quantities for one order of about ``budget`` dollars.

    Returns a list of (product index, quantity) with distinct products.
    """
    weights = LINE_COUNT_WEIGHT if not trade else TRADE_LINE_COUNT_WEIGHT
    n_lines = 1 + rng.choice(len(weights), p=weights)
    shares = rng.dirichlet(np.full(n_lines, 2.0))
    allowed = _TRADE_OK if trade else np.ones(len(CATALOGUE), dtype=bool)
    max_qty = TRADE_MAX_QTY if trade else RETAIL_MAX_QTY
    taken = np.zeros(len(CATALOGUE), dtype=bool)
    lines = []
    for share in shares:
        line_budget = budget * share
        if trade:
            target_price = max(line_budget / TRADE_UNITS_PER_LINE, 4.0)
        else:
            target_price = line_budget
        fit = np.exp(-0.5 * ((np.log(_PRICES) - np.log(target_price)) / PRICE_FIT_SPREAD) ** 2)
        p = _POPULARITY * fit * (allowed & ~taken)
        if p.sum() <= 0:
            break
        product = rng.choice(len(CATALOGUE), p=p / p.sum())
        taken[product] = True
        qty = int(np.clip(np.rint(line_budget / _PRICES[product]), 1, max_qty))
        lines.append((int(product), qty))
    return lines


# --------------------------------------------------------------------------
# Money text
# --------------------------------------------------------------------------


def _money(amount, *, negative_style="minus"):
    """Write cents as the shop writes money: ``$1,234.50``, ``-$24.00`` or ``($24.00)``."""
    text = f"${abs(amount) / 100:,.2f}"
    if amount >= 0:
        return text
    return f"({text})" if negative_style == "brackets" else f"-{text}"


def _plain_money(amount):
    """Write cents as a bare number the way the card-reader sync does: ``12.5``."""
    return f"{amount / 100:.2f}".rstrip("0").rstrip(".")


# --------------------------------------------------------------------------
# The whole export
# --------------------------------------------------------------------------


def make_order_lines(*, seed=DEFAULT_SEED):
    """Build the demo shop's export in memory.

    Parameters
    ----------
    seed : int, keyword-only
        Seed for ``numpy.random.default_rng``; the same seed gives the same rows.

    Returns
    -------
    dict
        ``rows``: list of data rows, each a list of 9 strings (header excluded);
        ``duplicate_row`` and ``malformed_row``: spreadsheet row numbers (header
        is row 1) of the exact copy and of the broken row; ``orders``: a list
        of dicts, one per order, with its number, customer, status, net value
        in cents and whether it is a test order (used for the summary).
    """
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ValueError(f"seed must be a non-negative whole number (got {seed!r})")
    rng = np.random.default_rng(seed)
    days, cumulative = _calendar()
    customers, order_customer, order_seasonal = _simulate_orders(rng, cumulative)
    n_orders = len(order_customer)

    # Placement in time: the day from the seasonal calendar, then a time of day.
    day_index = _seasonal_to_day(order_seasonal, cumulative)
    channel = np.where(
        rng.random(n_orders) < CHANNEL_LOYALTY,
        customers["usual_channel"][order_customer],
        rng.choice(len(CHANNELS), size=n_orders, p=CHANNEL_WEIGHT),
    )
    hour = rng.choice(24, size=n_orders, p=HOUR_WEIGHT / HOUR_WEIGHT.sum())
    market_hour = rng.choice(MARKET_HOURS, size=n_orders)
    hour = np.where(channel == CHANNELS.index("market"), market_hour, hour)
    minute = rng.integers(0, 60, size=n_orders)
    stamp = (
        days[day_index].astype("datetime64[m]")
        + hour.astype("timedelta64[h]")
        + minute.astype("timedelta64[m]")
    )

    # Budgets and lines.
    is_trade = customers["is_trade"][order_customer]
    budget = np.exp(
        customers["level"][order_customer]
        + customers["order_spread"][order_customer] * rng.standard_normal(n_orders)
    )
    order_lines = [
        _order_lines(rng, budget[i], trade=bool(is_trade[i])) for i in range(n_orders)
    ]

    # Test orders: the owner trying the checkout with a cheap item.
    # The first is on launch morning; the others on random days in working hours.
    test_day = np.sort(rng.integers(1, len(days), N_TEST_ORDERS))
    test_day[0] = 0
    test_stamp = (
        days[test_day].astype("datetime64[m]")
        + rng.integers(8, 18, N_TEST_ORDERS).astype("timedelta64[h]")
        + rng.integers(0, 60, N_TEST_ORDERS).astype("timedelta64[m]")
    )
    cheap = int(np.argmin(_PRICES))

    # Customer numbers are given in order of first purchase.
    first_seen = np.full(N_CUSTOMERS, np.iinfo(np.int64).max)
    np.minimum.at(first_seen, order_customer, stamp.astype(np.int64))
    present = np.flatnonzero(first_seen < np.iinfo(np.int64).max)
    ranking = present[np.argsort(first_seen[present], kind="stable")]
    customer_label = {int(c): f"C-{k + 1:05d}" for k, c in enumerate(ranking)}

    # All orders (real and test) in time order; order numbers follow that order.
    all_stamp = np.concatenate([stamp, test_stamp])
    is_test = np.concatenate([np.zeros(n_orders, bool), np.ones(N_TEST_ORDERS, bool)])
    by_time = np.argsort(all_stamp, kind="stable")
    steps = 1 + (rng.random(len(by_time)) < SKIPPED_NUMBER_SHARE)
    numbers = FIRST_ORDER_NUMBER + np.cumsum(steps) - steps[0]

    # Order-level events, drawn on real orders only.
    status = np.array(["paid"] * n_orders, dtype=object)
    cancelled = rng.random(n_orders) < CANCEL_SHARE
    status[cancelled] = "cancelled"
    refund_draw = rng.random(n_orders)
    refunded = (~cancelled) & (refund_draw < REFUND_SHARE)
    full_draw = rng.random(n_orders)
    full = refunded & (full_draw < FULL_REFUND_SHARE)
    if full.sum() < MIN_FULL_REFUNDS:
        # Promote the refunded orders with the smallest draws to full refunds.
        candidates = np.flatnonzero(refunded & ~full)
        promote = candidates[np.argsort(full_draw[candidates], kind="stable")]
        full[promote[: MIN_FULL_REFUNDS - int(full.sum())]] = True
    negative_style = np.where(rng.random(n_orders) < 0.5, "minus", "brackets")
    refund_line_pick = rng.random(n_orders)
    refund_unit_pick = rng.random(n_orders)

    # Rows are built with the Line Total as cents; money text is written last.
    rows = []
    orders = []
    for position in by_time:
        number = f"FH-{numbers[len(orders)]}"
        when = str(all_stamp[position]).replace("T", " ")
        if position >= n_orders:
            cents = int(round(_PRICES[cheap] * 100))
            rows.append([number, when, TEST_CUSTOMER, _NAMES[cheap], "1", cents,
                         "USD", "test", "web"])
            orders.append({"number": number, "customer": TEST_CUSTOMER, "status": "test",
                           "net_cents": cents, "test": True})
            continue
        i = position
        who = customer_label[int(order_customer[i])]
        via = CHANNELS[int(channel[i])]
        lines = order_lines[i]
        net = 0
        for product, qty in lines:
            cents = int(round(_PRICES[product] * 100)) * qty
            net += cents
            rows.append([number, when, who, _NAMES[product], str(qty), cents,
                         "USD", str(status[i]), via])
        if refunded[i]:
            if full[i]:
                back = net
                product_name = FULL_REFUND_PRODUCT
                back_qty = -sum(qty for _, qty in lines)
            else:
                # A partial refund always leaves the order worth something.
                k = int(refund_line_pick[i] * len(lines))
                product, qty = lines[k]
                price = int(round(_PRICES[product] * 100))
                most = qty if len(lines) > 1 else qty - 1
                if most >= 1:
                    units = 1 + int(refund_unit_pick[i] * most)  # 1..most units back
                    back = price * units
                    back_qty = -units
                else:
                    # A single item: a part-price credit, nothing sent back.
                    back = int(round(price * PART_CREDIT_SHARE))
                    back_qty = 0
                product_name = _NAMES[product]
            rows.append([number, when, who, product_name, str(back_qty), -back,
                         "USD", "refunded", via])
            net -= back
        orders.append({"number": number, "customer": who, "status": str(status[i]),
                       "net_cents": net, "test": False, "trade": bool(is_trade[i]),
                       "refunded": bool(refunded[i]), "full_refund": bool(full[i])})

    # Money text: negative lines in the order's refund style, a few positive
    # market lines as bare numbers, the rest as ``$1,234.50``.
    plain = rng.random(len(rows)) < PLAIN_MONEY_SHARE
    refund_style = {orders[k]["number"]: str(negative_style[p]) for k, p in enumerate(by_time)
                    if p < n_orders}
    for r, row in enumerate(rows):
        cents = row[5]
        if cents < 0:
            row[5] = _money(cents, negative_style=refund_style[row[0]])
        elif plain[r] and row[8] == "market":
            row[5] = _plain_money(cents)
        else:
            row[5] = _money(cents)

    # The broken row: a paid line whose product name has a comma, nearest to
    # MALFORMED_AT; written later without quotes so the comma splits the field.
    def nearest(target, accept):
        order = np.argsort(np.abs(np.arange(len(rows)) - target * len(rows)), kind="stable")
        return next(int(r) for r in order if accept(rows[r]))

    malformed_index = nearest(MALFORMED_AT, lambda row: "," in row[3] and row[7] == "paid")
    # The exact copy: an ordinary paid line near DUPLICATE_AT, repeated right after it.
    duplicate_index = nearest(
        DUPLICATE_AT,
        lambda row: "," not in row[3] and row[7] == "paid" and row[5].startswith("$"),
    )
    malformed_id = id(rows[malformed_index])
    rows.insert(duplicate_index + 1, list(rows[duplicate_index]))
    malformed_index = next(r for r, row in enumerate(rows) if id(row) == malformed_id)

    return {
        "rows": rows,
        # Data row r sits on spreadsheet row r + 2 (the header is row 1).
        "duplicate_row": duplicate_index + 3,
        "malformed_row": malformed_index + 2,
        "orders": orders,
    }


def render_csv(export):
    """Turn :func:`make_order_lines` output into the file's text (RFC 4180, ``\\n`` endings)."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n", quoting=csv.QUOTE_MINIMAL)
    writer.writerow(HEADER)
    broken = export["malformed_row"] - 2
    for r, row in enumerate(export["rows"]):
        if r == broken:
            # Deliberately unquoted: the comma in the product name adds a field.
            buffer.write(",".join(row) + "\n")
        else:
            writer.writerow(row)
    return buffer.getvalue()


def summarise(export):
    """Return the headline numbers of an export as a dict.

    Orders counted here exclude test and cancelled orders; an order's value is
    its paid lines less its refund lines, and orders refunded in full (net 0)
    are left out of the revenue figures.
    """
    kept = [o for o in export["orders"] if not o["test"] and o["status"] == "paid"]
    values = np.array([o["net_cents"] for o in kept if o["net_cents"] > 0], dtype=float) / 100
    counts = {}
    for o in kept:
        counts[o["customer"]] = counts.get(o["customer"], 0) + 1
    per_customer = np.array(list(counts.values()))
    top = np.sort(values)[::-1][: max(1, int(np.ceil(0.01 * len(values))))]
    return {
        "rows": len(export["rows"]),
        "orders": len(export["orders"]),
        "customers": len({o["customer"] for o in export["orders"] if not o["test"]}),
        "repeat_share": float(np.mean(per_customer >= 2)),
        "most_orders": int(per_customer.max()),
        "customers_10_plus": int(np.sum(per_customer >= 10)),
        "refunded_orders": sum(o.get("refunded", False) for o in export["orders"]),
        "full_refunds": sum(o.get("full_refund", False) for o in export["orders"]),
        "cancelled_orders": sum(o["status"] == "cancelled" for o in export["orders"]),
        "test_orders": sum(o["test"] for o in export["orders"]),
        "revenue": float(values.sum()),
        "mean_order": float(values.mean()),
        "top_1pct_revenue_share": float(top.sum() / values.sum()),
        "duplicate_row": export["duplicate_row"],
        "malformed_row": export["malformed_row"],
    }


def write_demo_shop(path=DEFAULT_OUT, *, seed=DEFAULT_SEED):
    """Write the demo shop's order export to ``path`` and return its summary.

    Parameters
    ----------
    path : str or pathlib.Path
        Where to write the CSV (UTF-8, ``\\n`` line endings).
    seed : int, keyword-only
        Seed for the random generator.

    Returns
    -------
    dict
        The numbers from :func:`summarise`.
    """
    path = Path(path)
    if not path.parent.is_dir():
        raise ValueError(f"out: folder does not exist (got {str(path.parent)!r})")
    export = make_order_lines(seed=seed)
    path.write_bytes(render_csv(export).encode("utf-8"))
    return summarise(export)


def main(argv=None):
    """Command line: write the CSV and print a short summary."""
    parser = argparse.ArgumentParser(description="Write the Fernhollow Plants demo order export.")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED,
                        help=f"random seed (default {DEFAULT_SEED})")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT,
                        help="where to write the CSV (default: plant_shop_orders.csv beside this script)")
    args = parser.parse_args(argv)
    if args.seed < 0:
        parser.error(f"--seed must be zero or more (got {args.seed})")
    try:
        s = write_demo_shop(args.out, seed=args.seed)
    except ValueError as problem:
        parser.error(str(problem))
    print(f"wrote {args.out.name}: {s['rows']} rows, {s['orders']} orders "
          f"({s['cancelled_orders']} cancelled, {s['test_orders']} test, "
          f"{s['refunded_orders']} with refunds of which {s['full_refunds']} in full)")
    print(f"customers: {s['customers']}, repeat share {s['repeat_share']:.1%}, "
          f"most orders by one customer {s['most_orders']}, {s['customers_10_plus']} with 10 or more")
    print(f"revenue ${s['revenue']:,.2f}, mean order ${s['mean_order']:,.2f}, "
          f"top 1% of orders hold {s['top_1pct_revenue_share']:.1%} of revenue")
    print(f"exact duplicate at row {s['duplicate_row']}, broken row (extra field) at row {s['malformed_row']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
