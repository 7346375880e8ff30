"""``evaluate``: how much each method beats plain customer averages on the user's own orders, and
whether its forecasts add up to the money and its ranges hold what they say."""

from __future__ import annotations

import math

from . import (EXIT_OK, Progress, column_options, add_column_options, add_engine_options, json_number,
               print_json, shop_from_args)
from ..errors import OrderDataError
from ..options import AUTO_TOLERANCE

_RESULT_FIELDS = ("method", "variance", "sse", "error_reduction_pct", "ci_low", "ci_high",
                  "error_reduction_per_customer_pct", "money_bias_pct", "money_bias_se", "coverage", "coverage_se",
                  "expected_coverage", "expected_coverage_se", "calibrated", "calibration_note", "exact", "in_auto",
                  "caution")
_TEXT_FIELDS = ("method", "variance", "calibration_note", "caution")
_FLAG_FIELDS = ("calibrated", "exact", "in_auto")


def add_arguments(parser) -> None:
    add_column_options(parser)
    add_engine_options(parser)
    parser.add_argument("--methods", metavar="A,B,...", help="methods to compare (default: all)")
    parser.add_argument("--variances", metavar="X,Y,...", help="spread models to compare (default: all)")
    parser.add_argument("--cutoff", metavar="YYYY-MM-DD",
                        help="backtest cut-off date (default: the date that leaves the last 20%% of orders after it)")
    parser.add_argument("--bootstrap", metavar="N", type=int, default=500,
                        help="resamples of customers for the 95%% intervals (default 500, 0 to skip)")
    parser.add_argument("--seed", type=int, default=0,
                        help="seed of the bootstrap and of the split of customers that checks the choice (default 0)")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of a table")


def _number(value):
    """A float for JSON, or None when it is not a number."""
    return None if value is None else json_number(float(value))


def _records(table):
    records = []
    for _, row in table.iterrows():
        record = {}
        for name in _RESULT_FIELDS:
            value = row.get(name)
            missing = value is None or (isinstance(value, float) and math.isnan(value))
            if name in _TEXT_FIELDS:
                record[name] = "" if missing else str(value)
            elif name in _FLAG_FIELDS:
                record[name] = None if missing else bool(value)
            else:
                record[name] = _number(value)
        records.append(record)
    return records


def _format_pct(value, width=6):
    return " " * (width - 1) + "-" if value is None or not math.isfinite(value) else f"{value:+{width}.1f}%"


def _share(value):
    return "-" if value is None or not math.isfinite(value) else f"{100 * value:.0f}%"


def _print_table(title, table, *, level=0.90, next_level=0.80):
    print(title)
    if len(table) == 0:
        print("  (nothing to show)")
        return
    print(f"  {'method':<16} {'spread':<13} {'error cut':>9} {'per cust.':>9}   {'95% interval':<19} "
          f"{'money':>7} {f'in {next_level:.0%}':>7} {f'{level:.0%} held':>8}  check")
    for _, row in table.iterrows():
        interval = f"{_format_pct(row['ci_low'])} to {_format_pct(row['ci_high'])}"
        mark = "" if row.get("exact", True) else " *"
        verdict = "ok" if row.get("calibrated") else "off"
        print(f"  {row['method'] + mark:<16} {row['variance']:<13} {_format_pct(row['error_reduction_pct']):>9}"
              f" {_format_pct(row.get('error_reduction_per_customer_pct')):>9}   {interval:<19}"
              f" {_format_pct(row.get('money_bias_pct'), 5):>7} {_share(row['coverage']):>7}"
              f" {_share(row.get('expected_coverage')):>8}  {verdict}")


def _explain():
    tolerance = AUTO_TOLERANCE
    print("error cut = how much smaller the squared forecast error is than with each customer's plain average, "
          "per held-out order and with each customer counted once")
    print("money = the sum of the forecasts against the sum of the orders they forecast; "
          "in 80% = share of those orders inside the next-order range; "
          "90% held = share of customers' true means the expected-value range would hold, implied by the errors")
    print(f"check ok = money within {tolerance.money_pct:g}% and both ranges within {tolerance.coverage_points:g} "
          f"points of their level (each plus {tolerance.noise_se:g} standard errors of the shop's own noise), "
          "overall and for customers with 1, 2-3 and 4+ past orders; only those can be chosen automatically")
    print("* keeps something from the fit on all orders in its leave-one-out, which flatters it a little")


def run(args) -> int:
    if args.bootstrap < 0:
        raise OrderDataError("the number of bootstrap resamples must be 0 or more", value=args.bootstrap,
                             option="bootstrap")
    if args.engine != "pandas":
        return _run_on_cluster(args)
    progress = Progress(2)
    progress.step(f"reading {args.file}")
    shop = shop_from_args(args)
    progress.step(f"holding out {len(shop.orders):,} orders one at a time, backtest, bootstrap")
    found = shop.evaluation(methods=args.methods, variances=args.variances, cutoff=args.cutoff,
                            bootstrap=args.bootstrap, seed=args.seed)
    progress.finish()
    chosen = found.chosen
    if args.json:
        print_json({
            "orders": found.orders,
            "customers": found.customers,
            "held_out": found.held_out,
            "results": _records(found.leave_one_out),
            "backtest": _records(found.backtest),
            "chosen": {"method": chosen["method"], "variance": chosen["variance"],
                       "error_reduction_pct": _number(chosen.get("error_reduction_pct")),
                       "honest_gain_pct": _number(chosen.get("honest_gain_pct")),
                       "reason": chosen["reason"]},
        })
        return EXIT_OK
    print(f"{found.orders} orders from {found.customers} customers; "
          f"{found.held_out} orders held out one at a time")
    _explain()
    _print_table("Leave-one-out (every order of a repeat customer held out in turn):", found.leave_one_out)
    if found.cutoff is not None:
        _print_table(f"Next-order backtest (fitted before {found.cutoff.date()}, "
                     f"{found.backtest_scored} customers scored on their next order):", found.backtest)
    print(f"Chosen: {chosen['reason']}.")
    if len(found.margins):
        print("How far the choice is ahead (points of error cut, paired 95% interval over customers):")
        eligible = found.margins.merge(found.leave_one_out[["method", "variance", "in_auto", "calibrated"]],
                                       on=["method", "variance"])
        eligible = eligible[eligible["in_auto"] & eligible["calibrated"]]
        for row in eligible.sort_values("margin_pct").head(5).itertuples():
            print(f"  vs {row.method:<16} {row.variance:<13} {row.margin_pct:+6.1f}  "
                  f"({row.margin_low:+.1f} to {row.margin_high:+.1f})")
    for note in found.notes:
        print(f"note: {note}")
    return EXIT_OK


def _run_on_cluster(args) -> int:
    """Exact leave-one-out of the closed-form methods where the orders are (no bootstrap, no backtest)."""
    if args.engine != "dask":
        raise OrderDataError("the accuracy check needs every order: it runs with the pandas engine, or on a Dask "
                             "cluster", value=args.engine, option="engine",
                             fix="Use the pandas engine, or the dask engine for a cluster")
    from ..engines.dask_engine import cluster_client, leave_one_out_on_cluster, read_on_cluster
    from ..selection import best_of

    with cluster_client(args.scheduler) as client:
        shop = read_on_cluster(args.file, client=client, **column_options(args))
        table = leave_one_out_on_cluster(shop, methods=args.methods, variances=args.variances)
    chosen = best_of(table)
    if args.json:
        print_json({"orders": shop.account["orders"], "customers": shop.account["customers"],
                    "held_out": int(table.attrs.get("held_out", 0)), "results": _records(table),
                    "backtest": [], "chosen": {"method": chosen["method"], "variance": chosen["variance"],
                                               "error_reduction_pct": _number(chosen.get("error_reduction_pct")),
                                               "honest_gain_pct": None, "reason": chosen["reason"]}})
        return EXIT_OK
    print(f"{shop.account['orders']} orders from {shop.account['customers']} customers (on the cluster; "
          "no bootstrap intervals, backtest or split-half check there)")
    _explain()
    _print_table("Leave-one-out (every order of a repeat customer held out in turn):", table)
    print(f"Chosen: {chosen['reason']}.")
    return EXIT_OK
