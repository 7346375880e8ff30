"""Known-truth calibration: forecasts on simulated shops whose customers' true means are known.

For the automatic choice and for every method x spread model the registry offers without a
caution (forecasting.options.caution_of), on three kinds of shop (tests/spend_simulation.py) --
lognormal orders, Gamma orders, and lognormal orders with 2% bulk orders 5-20 times larger --
each with 5,000 customers whose true means are Gamma distributed, in three segments:

* the forecasts add up to within 2% of the customers' true total spend;
* the 90% expected-value ranges hold 85-95% of the customers' true means, and the 80%
  next-order ranges 75-85% of their fresh orders (20 fresh orders per customer), in each band
  of order counts: 1, 2-3, 4 or more;
* no range has zero width.

A quarter of the customers have one order, a quarter two or three, half 4-30, so that each band
holds over a thousand customers (a band's share then moves by under a point from one shop to the
next). The seed is fixed; the bounds are the issue's targets, not fitted to these shops.
`python scripts/calibration_report.py` prints the same figures for more shops and kinds.
"""

from __future__ import annotations

import numpy as np
import pytest

from forecasting.customers import customer_statistics
from forecasting.forecasts import forecast_customers
from forecasting.options import OWN_SPREAD, caution_of, pairs_to_report
from spend_simulation import ShopSpec, simulate_shop

SHOPS = {
    "lognormal": ShopSpec(order_counts="banded", segments=3),
    "gamma": ShopSpec(orders="gamma", order_counts="banded", segments=3),
    "bulk": ShopSpec(bulk_share=0.02, order_counts="banded", segments=3),
}
BANDS = (("1", 1, 1), ("2-3", 2, 3), ("4+", 4, np.inf))
FRESH_DRAWS = 20

#: Every pair offered without a caution, and the automatic choice.
PAIRS = [("auto", "auto")] + [(m, v) for m, v in pairs_to_report(segments=True) if not caution_of(m, v)]


def test_the_suite_covers_the_plain_offers():
    # Every method has a pair without a caution except gamma-gamma (its ranges assume gamma orders)
    methods = {m for m, _ in PAIRS}
    assert methods >= {"plain", "pooled", "james-stein", "mta", "mta-minimax", "mta-segments", "empirical-bayes",
                       "james-stein-cv", "mta-cv", "auto"}
    assert all(v != OWN_SPREAD for _, v in PAIRS)


@pytest.fixture(scope="module")
def shops():
    built = {}
    for kind, spec in SHOPS.items():
        shop = simulate_shop(spec, seed=1)
        stats = customer_statistics(shop.orders)
        fresh = np.column_stack([shop.fresh_orders(100 + i).reindex(stats.index).to_numpy()
                                 for i in range(FRESH_DRAWS)])
        built[kind] = (shop, stats, fresh)
    return built


@pytest.fixture(scope="module")
def results(shops):
    found = {}
    for kind, (shop, stats, fresh) in shops.items():
        truth = shop.true_mean.reindex(stats.index).to_numpy()
        for method, variance in PAIRS:
            table = forecast_customers(stats, method=method, variance=variance, orders=shop.orders)
            found[(kind, method, variance)] = (table, truth, fresh)
    return found


def _measure(table, truth, fresh):
    n = table["orders"].to_numpy()
    y = table["expected_next_order"].to_numpy()
    low, high = table["expected_low"].to_numpy(), table["expected_high"].to_numpy()
    next_low, next_high = table["next_order_low"].to_numpy()[:, None], table["next_order_high"].to_numpy()[:, None]
    figures = {"money": 100 * (y.sum() / truth.sum() - 1),
               "zero_width": int(np.sum(high <= low) + np.sum(next_high <= next_low))}
    for name, lo, hi in BANDS:
        band = (n >= lo) & (n <= hi)
        figures[f"mean {name}"] = 100 * np.mean((truth[band] >= low[band]) & (truth[band] <= high[band]))
        inside = (fresh[band] >= next_low[band]) & (fresh[band] <= next_high[band])
        figures[f"next {name}"] = 100 * np.mean(inside)
    return figures


@pytest.mark.parametrize("kind", list(SHOPS))
@pytest.mark.parametrize("method, variance", PAIRS)
def test_forecasts_add_up_and_ranges_hold_what_they_say(results, kind, method, variance):
    table, truth, fresh = results[(kind, method, variance)]
    figures = _measure(table, truth, fresh)
    chosen = f"{table['method'].iloc[0]} with {table['variance'].iloc[0]}"
    assert abs(figures["money"]) <= 2.0, (chosen, figures)
    for name, _, _ in BANDS:
        assert 85.0 <= figures[f"mean {name}"] <= 95.0, (chosen, name, figures)
        assert 75.0 <= figures[f"next {name}"] <= 85.0, (chosen, name, figures)
    assert figures["zero_width"] == 0, (chosen, figures)


def test_the_automatic_choice_passed_the_shops_own_check(results):
    # It may pick a pair offered with a caution (the classic spread model, say) when that pair's
    # forecasts passed the shop's own check; the figures above hold it to the truth either way.
    for kind in SHOPS:
        table = results[(kind, "auto", "auto")][0]
        assert "whose forecasts add up and whose ranges hold what they say" in table.attrs["fit"]["auto_choice"]


def test_the_old_faults_would_fail_here(shops):
    # The suite can fail: the returns to money of earlier versions, applied to these shops, miss
    # by more than its bounds. exp(sigma2 / 2) for the whole shop's money (the lognormal factor
    # the log model used) and a zero-width range for the shop-wide average.
    shop, stats, _ = shops["bulk"]
    truth = shop.true_mean.reindex(stats.index).to_numpy()
    table = forecast_customers(stats, method="empirical-bayes", variance="log", orders=shop.orders)
    fit = table.attrs["fit"]
    lognormal_money = table["expected_next_order"].to_numpy() * np.exp(fit["sigma2"] / 2) / fit["smearing"]
    assert abs(100 * (lognormal_money.sum() / truth.sum() - 1)) > 5.0
