"""``outlook``: projected revenue per cohort over a horizon, checked by a backtest.

``python -m forecasting outlook FILE --horizon DAYS [--by cohort|month|quarter|COLUMN]
[--cutoff DATE] [--seasons auto|month|none] [--json]``
"""

from __future__ import annotations

import math

from . import EXIT_OK, add_column_options, add_method_options, load_from_args, print_json
from ..errors import OrderDataError
from ..exports import write_csv
from ..outlook import COHORT_PERIODS, SEASONS, _check_draws, _check_horizon, _check_level, _parse_date, \
    backtest_outlook, project_revenue, require_projection

BY_COHORT = "cohort"


def add_arguments(parser) -> None:
    add_column_options(parser)
    parser.add_argument("--horizon", required=True, metavar="DAYS", help="how many days ahead to project")
    parser.add_argument("--by", default=BY_COHORT, metavar="cohort|month|quarter|COLUMN",
                        help="group customers by first-order cohort (default, see --period), month or quarter, "
                             "or by a column of the file such as the sales channel")
    parser.add_argument("--period", choices=COHORT_PERIODS, default="quarter",
                        help="cohort length for --by cohort (default quarter)")
    parser.add_argument("--cutoff", metavar="DATE",
                        help="backtest: fit on orders before this date and compare with what came after "
                             "(default: the horizon, or the last 20%% of the time span)")
    parser.add_argument("--no-backtest", action="store_true", help="skip the backtest")
    parser.add_argument("--seasons", choices=SEASONS, default="auto",
                        help="adjust the order rate by month of the year: auto (default: when a full year of "
                             "orders exists), month (always; needs a full year) or none")
    add_method_options(parser)
    parser.add_argument("--level", default="0.9", help="interval level (default 0.9)")
    parser.add_argument("--draws", default="400", help="simulation draws for the intervals (default 400)")
    parser.add_argument("--seed", default="0", help="seed of the draws (default 0)")
    parser.add_argument("--out", metavar="CSV", help="write the per-customer projection to this CSV")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def _whole_number(text, option):
    try:
        return int(text)
    except (TypeError, ValueError):
        raise OrderDataError(f"{option} must be a whole number", value=text) from None


def grouping_from_args(args) -> str:
    """The library's ``by`` for the command's --by/--period, pointing --segment at a named column."""
    if args.by == BY_COHORT:
        return args.period
    if args.by in COHORT_PERIODS or args.by == "segment":
        return args.by
    if args.segment is None:
        args.segment = args.by
    elif args.segment != args.by:
        raise OrderDataError("--by names a different column than --segment", column="--by", value=args.by,
                             fix=f"Use --by segment to group by '{args.segment}', or drop --segment")
    return "segment"


def _money(value) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return f"{value:,.0f}"


def _percent(value) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return f"{value:+.0f}%"


def run(args) -> int:
    horizon = _check_horizon(args.horizon)
    level = _check_level(args.level)
    draws = _check_draws(_whole_number(args.draws, "--draws"))
    seed = _whole_number(args.seed, "--seed")
    if args.cutoff is not None:
        _parse_date(args.cutoff, "--cutoff")
    by = grouping_from_args(args)
    orders = load_from_args(args).orders
    outlook = require_projection(project_revenue(orders, horizon=horizon, by=by, method=args.method,
                                                 variance=args.variance, level=level, draws=draws, seed=seed,
                                                 seasons=args.seasons))
    backtest = None
    if not args.no_backtest:
        backtest = backtest_outlook(orders, horizon=horizon, cutoff=args.cutoff, by=by, method=args.method,
                                    variance=args.variance, level=level, draws=draws, seed=seed,
                                    seasons=args.seasons)
        require_projection(backtest.outlook, what="the backtest")
    if args.out:
        write_csv(outlook.customers, args.out)
    if args.json:
        payload = outlook.summary()
        payload["backtest"] = backtest.summary() if backtest is not None else None
        print_json(payload)
        return EXIT_OK

    total = outlook.total
    print(f"Projected revenue over the next {horizon:g} days from {outlook.as_of:%Y-%m-%d}, "
          f"{total['customers']} customers ({100 * level:g}% ranges):")
    print(f"  {'':<14} {'':>9} {'':>8} {'':>12} {'expected amount':^25} {'what may come in':^25}")
    print(f"  {'group':<14} {'customers':>9} {'orders':>8} {'projected':>12} {'low':>12} {'high':>12} "
          f"{'low':>12} {'high':>12} {'share':>6}")
    for row in outlook.cohorts.itertuples(index=False):
        print(f"  {str(row.cohort):<14} {row.customers:>9} {row.expected_orders:>8.0f} "
              f"{_money(row.projected_revenue):>12} {_money(row.projected_low):>12} "
              f"{_money(row.projected_high):>12} {_money(row.revenue_range_low):>12} "
              f"{_money(row.revenue_range_high):>12} {100 * row.share_of_projected_revenue:>5.0f}%")
    print(f"  {'all':<14} {total['customers']:>9} {total['expected_orders']:>8.0f} "
          f"{_money(total['projected_revenue']):>12} {_money(total['projected_low']):>12} "
          f"{_money(total['projected_high']):>12} {_money(total['revenue_range_low']):>12} "
          f"{_money(total['revenue_range_high']):>12}")
    print("'expected amount' is where the average outcome lies; 'what may come in' also includes the luck of "
          "which customers order and how much.")
    if outlook.seasons == "month":
        print(f"Seasons: the next {horizon:g} days count as {outlook.seasonal_days:.0f} average days "
              "(month-of-year pattern of repeat orders).")
    fit = outlook.fit.as_dict()
    print(f"An active customer orders about {fit['orders_per_year_active']:.1f} times a year; after each repeat "
          f"order about {100 * fit['chance_stop_after_order']:.0f}% stop for good (BG/NBD fit).")
    if fit["notes"]:
        print(f"note: {fit['notes']}")
    if backtest is not None:
        bt = backtest.total
        print()
        print(f"Backtest: fitted on orders before {backtest.cutoff:%Y-%m-%d}, compared with the next "
              f"{backtest.window_days:g} days ({bt['customers']} customers known by then):")
        print(f"  {'group':<14} {'projected':>12} {'could be from':>14} {'to':>12} {'actual':>12} {'error':>7} "
              f"{'run rate':>12} {'error':>7}")
        for row in backtest.cohorts.itertuples(index=False):
            print(f"  {str(row.cohort):<14} {_money(row.projected_revenue):>12} {_money(row.revenue_range_low):>14} "
                  f"{_money(row.revenue_range_high):>12} {_money(row.actual_revenue):>12} "
                  f"{_percent(row.error_pct):>7} {_money(row.run_rate_revenue):>12} "
                  f"{_percent(row.run_rate_error_pct):>7}")
        print(f"  {'all':<14} {_money(bt['projected_revenue']):>12} {_money(bt['revenue_range_low']):>14} "
              f"{_money(bt['revenue_range_high']):>12} {_money(bt['actual_revenue']):>12} "
              f"{_percent(bt['error_pct']):>7} {_money(bt['run_rate_revenue']):>12} "
              f"{_percent(bt['run_rate_error_pct']):>7}")
        print(f"  actual revenue fell inside the {100 * level:g}% range of what may come in for "
              f"{bt['cohorts_inside_revenue_range']} of {len(backtest.cohorts)} groups "
              f"(inside the range of the expected amount: {bt['cohorts_inside_interval']}).")
        print(f"  summed cohort misses: outlook {_money(bt['cohort_abs_error'])}, "
              f"run rate {_money(bt['run_rate_cohort_abs_error'])}; "
              f"new customers in the window brought {_money(bt['new_customer_revenue'])} (not projected).")
    if args.out:
        print(f"per-customer projection written to {args.out}")
    return EXIT_OK
