"""``forecast``: expected next-order value for every customer, written to a CSV.

``python -m forecasting forecast FILE [column options] [--method NAME] [--variance NAME]
[--segment COL] --out forecast.csv [--json]``
"""

from __future__ import annotations

from . import (EXIT_OK, Progress, column_options, add_column_options, add_engine_options, add_method_options,
               json_number, print_json, shop_from_args)
from ..errors import OrderDataError
from ..exports import SHORTEST_SALT, pseudonymise, write_csv
from ..forecasts import forecasts_for_reading


def add_arguments(parser) -> None:
    add_column_options(parser)
    add_engine_options(parser)
    choice = parser.add_argument_group("forecast")
    add_method_options(choice)
    choice.add_argument("--level", type=float, default=0.90, metavar="P",
                        help="coverage of the range for a customer's average order (default 0.90)")
    choice.add_argument("--next-level", type=float, default=0.80, metavar="P",
                        help="coverage of the range for the next single order (default 0.80)")
    parser.add_argument("--out", required=True, metavar="CSV", help="where to write the forecasts")
    parser.add_argument("--pseudonym-salt", metavar="SECRET",
                        help="replace customer ids in the file by salted pseudonyms (for sharing; keep the secret "
                             "to match them back later)")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def _forecast_on_cluster(args):
    """The dask engine: read, clean and (for auto) evaluate where the orders are."""
    from ..engines.dask_engine import cluster_client, forecast_on_cluster, read_on_cluster

    with cluster_client(args.scheduler) as client:
        shop = read_on_cluster(args.file, client=client, **column_options(args))
        table = forecast_on_cluster(shop, method=args.method, variance=args.variance, level=args.level,
                                    next_level=args.next_level)
        return table, shop.account


def run(args) -> int:
    progress = Progress(3)
    progress.step(f"reading {args.file}")
    if args.engine == "dask":
        table, account = _forecast_on_cluster(args)
    else:
        shop = shop_from_args(args)
        progress.step(f"forecasting {len(shop.statistics):,} customers")
        table = shop.forecasts(args.method, args.variance, level=args.level, next_level=args.next_level)
        account = shop.account
    progress.step(f"writing {args.out}")
    loaded_notes = account.get("notes", [])
    if args.pseudonym_salt is not None:
        if len(args.pseudonym_salt) < SHORTEST_SALT:
            raise OrderDataError(f"--pseudonym-salt must be at least {SHORTEST_SALT} characters",
                                 value=f"{len(args.pseudonym_salt)} characters",
                                 fix="Choose a longer secret phrase and keep it")
        table = pseudonymise(table, salt=args.pseudonym_salt)
    written = write_csv(forecasts_for_reading(table), args.out)
    progress.finish()
    fit = {key: json_number(value) for key, value in table.attrs["fit"].items()}
    method, variance = fit["method"], fit["variance"]
    if args.json:
        print_json({"customers": int(len(table)), "method": method, "variance": variance, "fit": fit,
                    "forecasts_written": str(written)})
        return EXIT_OK
    few = int(table["low_confidence"].sum())
    print(f"{len(table)} customers from {account['orders']} orders in {account['file']}")
    print(f"method: {method}, variance: {variance}")
    if "auto_choice" in fit:
        print(f"chosen automatically: {fit['auto_choice']}")
    print(f"typical own-history weight: {table['own_history_weight'].median():.2f}; "
          f"{few} customers marked low confidence (their forecast rests mostly on similar customers)")
    print(f"shop-wide centre: {fit['centre']:.2f}")
    if fit.get("caution"):
        print(f"caution: {fit['caution']}")
    if fit.get("tail_summary"):
        print(fit["tail_summary"])
    for note in loaded_notes:
        print(f"note: {note}")
    if fit.get("notes"):
        print(f"note: {fit['notes']}")
    print(f"forecasts written to {written}")
    return EXIT_OK
