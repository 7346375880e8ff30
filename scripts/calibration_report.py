"""Calibration of the forecasts on simulated shops whose customers' true means are known.

    python scripts/calibration_report.py [--seeds 5] [--kinds bulk,lognormal,gamma,few-orders] [--pairs all]

For every method x spread model (and the automatic choice): the money total of the forecasts against the
customers' true total spend, the share of true means inside the 90% expected-value range and of fresh orders
inside the 80% next-order range in each band of order counts (1, 2-3, 4+), zero-width ranges, and the cut in
squared error against the true means compared with plain averages. The shops come from tests/spend_simulation.py
(the calibration suite's simulator). Prints one markdown table per kind of shop: mean over seeds, and in
brackets the worst seed.
"""

from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]

from spend_simulation import SHOPS, simulate_shop  # noqa: E402

from forecasting.customers import customer_statistics  # noqa: E402
from forecasting.forecasts import forecast_customers  # noqa: E402

BANDS = (("1", 1, 1), ("2-3", 2, 3), ("4+", 4, np.inf))


def measure(shop, method, variance):
    stats = customer_statistics(shop.orders)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = forecast_customers(stats, method=method, variance=variance, orders=shop.orders)
    truth = shop.true_mean.reindex(table["customer"]).to_numpy()
    fresh = shop.fresh_orders(shop.seed + 1000).reindex(table["customer"]).to_numpy()
    n = table["orders"].to_numpy()
    y = table["expected_next_order"].to_numpy()
    lo, hi = table["expected_low"].to_numpy(), table["expected_high"].to_numpy()
    nlo, nhi = table["next_order_low"].to_numpy(), table["next_order_high"].to_numpy()
    row = {"method": str(table["method"].iloc[0]), "spread": str(table["variance"].iloc[0]),
           "asked": f"{method}/{variance}", "money": 100 * (y.sum() / truth.sum() - 1)}
    for name, low, high in BANDS:
        band = (n >= low) & (n <= high)
        row[f"mean {name}"] = 100 * np.mean((truth[band] >= lo[band]) & (truth[band] <= hi[band]))
        row[f"next {name}"] = 100 * np.mean((fresh[band] >= nlo[band]) & (fresh[band] <= nhi[band]))
    row["zero-width"] = int(np.sum(hi <= lo))
    plain = stats["mean"].to_numpy()
    row["error cut"] = 100 * (1 - np.sum((y - truth) ** 2) / np.sum((plain - truth) ** 2))
    return row


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--kinds", default=",".join(SHOPS))
    parser.add_argument("--pairs", default="all", help="method/spread,... or all")
    parser.add_argument("--without-auto", action="store_true", help="leave out the automatic choice")
    args = parser.parse_args(argv)
    from forecasting.options import DEFAULT_METHOD, pairs_to_report

    pairs = pairs_to_report() if args.pairs == "all" else [tuple(p.split("/")) for p in args.pairs.split(",")]
    pairs = ([] if args.without_auto else [(DEFAULT_METHOD, "auto")]) + [p for p in pairs if p != ("auto", "auto")]
    for kind in args.kinds.split(","):
        rows = []
        for seed in range(args.seeds):
            shop = simulate_shop(SHOPS[kind], seed)
            for method, variance in pairs:
                row = measure(shop, method, variance)
                row["seed"] = seed
                rows.append(row)
        frame = pd.DataFrame(rows)
        print(f"\n### {kind}: {SHOPS[kind].describe()} ({args.seeds} shops)\n")
        print(markdown(summarise(frame)))


def markdown(table):
    lines = ["| " + " | ".join(table.columns) + " |", "|" + " --- |" * len(table.columns)]
    lines += ["| " + " | ".join(str(v) for v in row) + " |" for row in table.itertuples(index=False)]
    return "\n".join(lines)


def summarise(frame):
    out = []
    for asked, part in frame.groupby("asked", sort=False):
        chosen = part["method"] + "/" + part["spread"]
        row = {"pair": asked if chosen.nunique() == 1 and chosen.iloc[0] == asked
               else f"{asked} ({', '.join(sorted(set(chosen)))})"}
        worst = part["money"].iloc[int(np.argmax(np.abs(part["money"].to_numpy())))]
        row["money %"] = f"{part['money'].mean():+.1f} ({worst:+.1f})"
        for column in [c for c in part.columns if c.startswith(("mean ", "next "))]:
            values = part[column].to_numpy()
            far = values[int(np.argmax(np.abs(values - (90 if column.startswith("mean") else 80))))]
            row[column] = f"{values.mean():.0f} ({far:.0f})"
        row["zero-width"] = int(part["zero-width"].max())
        row["error cut %"] = f"{part['error cut'].mean():.0f}"
        out.append(row)
    return pd.DataFrame(out)


if __name__ == "__main__":
    main()
