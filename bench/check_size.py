"""How many repeat customers the shop's own check needs: simulated shops whose true means are known.

A shop with more repeat customers than ``forecasting.options.CHECK_CUSTOMERS`` is checked on a
sample shop of its own. This study checks simulated shops of about 90,000 repeat customers (the
test suite's kinds of shop, from ``tests/spend_simulation.py``, at 120,000 customers) three ways:
whole, and on samples of 50,000 and of 20,000 repeat customers. For each it records

- how long the check took (the evaluation without bootstrap resamples, in this process);
- the method and spread model it chose, and the true mean squared error of that choice's
  forecasts, fitted on every customer, against the customers' true mean order values;
- the sample's spread of one order (log model) and spread between customers, as a share of the
  whole shop's.

Run from the repository root (about three minutes on two cores)::

    python bench/check_size.py            # writes bench/check_size.md
"""

from __future__ import annotations

import dataclasses
import datetime
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE.parent / "tests"))

from forecasting.shop import Shop  # noqa: E402
from spend_simulation import FEW_ORDERS, GAMMA, LOGNORMAL, simulate_shop  # noqa: E402

CUSTOMERS = 120_000
SIZES = (None, 50_000, 20_000)
SEEDS = (1, 2, 3)
KINDS = {
    "2% bulk orders, mostly few orders": dataclasses.replace(FEW_ORDERS, customers=CUSTOMERS),
    "gamma orders, mostly few orders": dataclasses.replace(GAMMA, customers=CUSTOMERS, order_counts="geometric"),
    "lognormal orders, mostly few orders": dataclasses.replace(LOGNORMAL, customers=CUSTOMERS,
                                                               order_counts="geometric"),
}


def check_one(orders, true_mean, limit):
    """The check on ``limit`` repeat customers (None: the whole shop) and what it chose."""
    shop = Shop(orders)
    shop.statistics
    started = time.perf_counter()
    found = shop.evaluation(check_customers=limit, bootstrap=0)
    seconds = time.perf_counter() - started
    method, variance = found.chosen["method"], found.chosen["variance"]
    table = shop.forecasts(method, variance)
    customers = table["customer"].to_numpy() if "customer" in table.columns else table.index.to_numpy()
    error = float(np.mean((table["expected_next_order"].to_numpy() - true_mean.reindex(customers).to_numpy()) ** 2))
    fits = shop.fits.checked(limit)
    return {"seconds": seconds, "chose": f"{method} / {variance}", "true_mse": error,
            "spread": float(fits.spread("log").sigma2), "between": float(fits.between("log").tau2)}


def main() -> int:
    started = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M")
    lines = ["# How many repeat customers the shop's own check needs", "",
             f"Run {started} (UTC) by `python bench/check_size.py`: simulated shops of {CUSTOMERS:,} customers "
             "(tests/spend_simulation.py), each checked whole and on samples of 50,000 and 20,000 repeat "
             "customers. True MSE: mean squared error of the chosen pair's forecasts (fitted on every customer) "
             "against the customers' true mean order values. Spread and between: the sample's log spread of one "
             "order and spread between customers, over the whole shop's.", "",
             "| shop | seed | repeat customers | checked on | seconds | chose | true MSE | vs whole | spread | "
             "between |", "| --- | ---: | ---: | --- | ---: | --- | ---: | ---: | ---: | ---: |"]
    for kind, spec in KINDS.items():
        for seed in SEEDS:
            sim = simulate_shop(spec, seed)
            repeat = int((sim.orders.groupby("customer").size() >= 2).sum())
            whole = None
            for limit in SIZES:
                found = check_one(sim.orders, sim.true_mean, limit)
                whole = whole or found
                row = (f"| {kind} | {seed} | {repeat:,} | {'whole shop' if limit is None else f'{limit:,}'} | "
                       f"{found['seconds']:.1f} | {found['chose']} | {found['true_mse']:,.1f} | "
                       f"{found['true_mse'] / whole['true_mse']:.3f} | {found['spread'] / whole['spread']:.4f} | "
                       f"{found['between'] / whole['between']:.4f} |")
                print(row, flush=True)
                lines.append(row)
    out = HERE / "check_size.md"
    out.write_text("\n".join(lines) + "\n")
    print(f"wrote {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
