"""``tiers``: value tiers of customers, written as CSV lists.

``python -m forecasting tiers FILE [--rank value|revenue] [--shares 0.1,0.3 | --thresholds 50,200]
[--horizon DAYS] [--seasons auto|month|none] --out tiers.csv [--json]``
"""

from __future__ import annotations

import math

from . import EXIT_OK, add_column_options, add_method_options, load_from_args, print_json
from ..options import DEFAULT_SEASONS
from ..outlook import RANK_BY, SEASONS, _check_horizon, _check_tier_options, _records, export_tiers, tier_summary
from ..shop import Shop

DEFAULT_HORIZON_DAYS = 365


def add_arguments(parser) -> None:
    add_column_options(parser)
    parser.add_argument("--rank", choices=RANK_BY, default="value",
                        help="rank by expected next-order value (default) or projected revenue in the horizon")
    rule = parser.add_mutually_exclusive_group()
    rule.add_argument("--shares", "--quantiles", dest="quantiles", metavar="SHARES",
                      help="shares of customers in the tiers, from the top, e.g. 0.1,0.3 = top 10%%, "
                           "next 30%%, the rest (default)")
    rule.add_argument("--thresholds", metavar="AMOUNTS",
                      help="money amounts instead of shares, e.g. 50,200 = 200 and above, 50 to under 200, "
                           "under 50")
    parser.add_argument("--horizon", default=str(DEFAULT_HORIZON_DAYS), metavar="DAYS",
                        help=f"days ahead for projected revenue (default {DEFAULT_HORIZON_DAYS})")
    parser.add_argument("--seasons", choices=SEASONS, default=DEFAULT_SEASONS,
                        help=f"month-of-year clock for repeat orders: auto (default {DEFAULT_SEASONS!r}: when a full "
                             "year of orders exists and a test finds the pattern), month or none")
    add_method_options(parser)
    parser.add_argument("--out", required=True, metavar="CSV",
                        help="CSV list of all customers; each tier also gets <name>-<tier>.csv beside it")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def run(args) -> int:
    horizon = _check_horizon(args.horizon)
    _check_tier_options(args.rank, args.quantiles, args.thresholds, None)
    shop = Shop.from_read(load_from_args(args))
    # Tiers rank the customers the shop has; customers still to come are not projected here.
    outlook, tiered = shop.tiers(horizon=horizon, rank=args.rank, shares=args.quantiles, thresholds=args.thresholds,
                                 method=args.method, variance=args.variance, seasons=args.seasons)
    summary = tier_summary(tiered)
    files = export_tiers(tiered, args.out)
    if args.json:
        print_json({
            "customers": int(len(tiered)),
            "rank": args.rank,
            "horizon_days": horizon,
            "seasons": outlook.seasons,
            "method": outlook.forecast_fit.get("method"),
            "variance": outlook.forecast_fit.get("variance"),
            "tiers": _records(summary),
            "note": tiered.attrs["note"],
            "tiers_written": str(files["all"]),
            "files": {name: str(path) for name, path in files.items() if name != "all"},
        })
        return EXIT_OK
    figure = "expected next order" if args.rank == "value" else f"projected revenue, next {horizon:g} days"
    print(f"{len(tiered)} customers ranked by {figure}:")
    if tiered.attrs["note"]:
        print(f"note: {tiered.attrs['note']}")
    print(f"  {'tier':<16} {'rule':<24} {'customers':>9} {'from':>10} {'to':>10} {'revenue share':>13} "
          f"{'own history':>11} {'mostly shop':>11}")
    for row in summary.itertuples(index=False):
        low = "-" if row.customers == 0 else f"{row.lowest_figure:,.2f}"
        high = "-" if row.customers == 0 else f"{row.highest_figure:,.2f}"
        confidence = "-" if row.customers == 0 else f"{row.average_own_history_weight:.2f}"
        share = (f"{100 * row.share_of_projected_revenue:.0f}%" if math.isfinite(row.share_of_projected_revenue)
                 else "-")
        print(f"  {row.tier:<16} {row.rule:<24} {row.customers:>9} {low:>10} {high:>10} "
              f"{share:>13} {confidence:>11} {row.mostly_shop_pattern:>11}")
    print("'own history' is the average weight a forecast puts on the customer's own orders; "
          "'mostly shop' counts forecasts resting mostly on the shop-wide pattern (weight below 0.5).")
    print("Each list gives every customer's last order date and the chance they still shop here "
          "(the order-frequency model's estimate).")
    print(f"lists written: {files['all']}" + "".join(f", {p}" for n, p in files.items() if n != "all"))
    return EXIT_OK
