"""``evaluate``: how much each method beats plain customer averages on the user's own orders."""

from __future__ import annotations

import math

from . import (EXIT_OK, Progress, column_options, add_column_options, add_engine_options, json_number,
               load_from_args, print_json)
from ..errors import OrderDataError
from ..evaluation import AUTO_METHODS, evaluate_methods

_RESULT_FIELDS = ("method", "variance", "sse", "error_reduction_pct", "ci_low", "ci_high")


def add_arguments(parser) -> None:
    add_column_options(parser)
    add_engine_options(parser)
    parser.add_argument("--methods", metavar="A,B,...", help="methods to compare (default: all)")
    parser.add_argument("--variances", metavar="X,Y,...", help="variance models to compare (default: all)")
    parser.add_argument("--cutoff", metavar="YYYY-MM-DD",
                        help="backtest cut-off date (default: the date that leaves the last 20%% of orders after it)")
    parser.add_argument("--bootstrap", metavar="N", type=int, default=500,
                        help="resamples of customers for the 95%% intervals (default 500, 0 to skip)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the bootstrap (default 0)")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of a table")


def _number(value):
    """A float for JSON, or None when it is not a number."""
    return None if value is None else json_number(float(value))


def _records(table):
    return [
        {name: (str(row[name]) if name in ("method", "variance") else _number(row[name])) for name in _RESULT_FIELDS}
        for _, row in table.iterrows()
    ]


def _format_pct(value):
    return "    -" if value is None or not math.isfinite(value) else f"{value:+6.1f}%"


def _print_table(title, table):
    print(title)
    if len(table) == 0:
        print("  (nothing to show)")
        return
    print(f"  {'method':<16} {'variance':<13} {'error cut':>9}   {'95% interval':<19} {'in 80% range':>12}")
    for _, row in table.iterrows():
        interval = f"{_format_pct(row['ci_low'])} to {_format_pct(row['ci_high'])}"
        coverage = row["coverage"]
        shown = "-" if not math.isfinite(coverage) else f"{100 * coverage:.0f}%"
        print(f"  {row['method']:<16} {row['variance']:<13} {_format_pct(row['error_reduction_pct']):>9}"
              f"   {interval:<19} {shown:>12}")


def run(args) -> int:
    if args.bootstrap < 0:
        raise OrderDataError("--bootstrap must be 0 or more", value=args.bootstrap)
    if args.engine != "pandas":
        return _run_on_cluster(args)
    progress = Progress(2)
    progress.step(f"reading {args.file}")
    result = load_from_args(args)
    progress.step(f"holding out {len(result.orders):,} orders one at a time, backtest, bootstrap")
    found = evaluate_methods(result.orders, methods=args.methods, variances=args.variances,
                             cutoff=args.cutoff, bootstrap=args.bootstrap, seed=args.seed)
    progress.finish()
    if args.json:
        print_json({
            "orders": found.orders,
            "customers": found.customers,
            "held_out": found.held_out,
            "results": _records(found.leave_one_out),
            "backtest": _records(found.backtest),
            "chosen": {"method": found.chosen["method"], "variance": found.chosen["variance"]},
        })
        return EXIT_OK
    print(f"{found.orders} orders from {found.customers} customers; "
          f"{found.held_out} orders held out one at a time")
    print("error cut = how much smaller the squared forecast error is than with each customer's plain average")
    _print_table("Leave-one-out (every order of a repeat customer held out in turn):", found.leave_one_out)
    if found.cutoff is not None:
        _print_table(f"Next-order backtest (fitted before {found.cutoff.date()}, "
                     f"{found.backtest_scored} customers scored on their next order):", found.backtest)
    print(f"Chosen: {found.chosen['reason']}.")
    if len(found.margins):
        print("How far the choice is ahead (points of error cut, paired 95% interval over customers):")
        eligible = found.margins[found.margins["method"].isin(AUTO_METHODS)]
        for row in eligible.sort_values("margin_pct").head(5).itertuples():
            print(f"  vs {row.method:<16} {row.variance:<13} {row.margin_pct:+6.1f}  "
                  f"({row.margin_low:+.1f} to {row.margin_high:+.1f})")
    for note in found.notes:
        print(f"note: {note}")
    return EXIT_OK


def _run_on_cluster(args) -> int:
    """Exact leave-one-out of the closed-form methods where the orders are (no bootstrap, no backtest)."""
    if args.engine != "dask":
        raise OrderDataError("evaluate needs every order: it runs with --engine pandas or --engine dask",
                             value=args.engine, fix="Use --engine pandas, or --engine dask for a cluster")
    from ..engines.dask_engine import cluster_client, leave_one_out_on_cluster, read_on_cluster
    from ..evaluation import best_of

    with cluster_client(args.scheduler) as client:
        shop = read_on_cluster(args.file, client=client, **column_options(args))
        table = leave_one_out_on_cluster(shop, methods=args.methods, variances=args.variances)
    chosen = best_of(table)
    if args.json:
        print_json({"orders": shop.account["orders"], "customers": shop.account["customers"],
                    "held_out": int(table.attrs.get("held_out", 0)), "results": _records(table),
                    "backtest": [], "chosen": {"method": chosen["method"], "variance": chosen["variance"]}})
        return EXIT_OK
    print(f"{shop.account['orders']} orders from {shop.account['customers']} customers (on the cluster; "
          "no bootstrap intervals or backtest there)")
    _print_table("Leave-one-out (every order of a repeat customer held out in turn):", table)
    print(f"Chosen: {chosen['reason']}.")
    return EXIT_OK
