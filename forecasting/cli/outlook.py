"""``outlook``: the revenue of the next days -- customers you have and new ones -- checked at many cut-offs.

``python -m forecasting outlook FILE --horizon DAYS [--by cohort|month|quarter|COLUMN]
[--cutoff DATE] [--cutoffs N] [--seasons auto|month|none] [--frequency-model auto|bg-nbd|mbg-nbd]
[--schedule-out CSV] [--out CSV] [--json]``
"""

from __future__ import annotations

import math

from . import EXIT_OK, add_column_options, add_method_options, load_from_args, print_json
from ..errors import OrderDataError
from ..exports import rounded_for_reading, write_csv
from ..options import DEFAULT_SEASONS
from ..outlook import (
    COHORT_PERIODS,
    DEFAULT_CUTOFFS,
    DEFAULT_DRAWS,
    FREQUENCY_CHOICES,
    NEW_CUSTOMERS,
    SEASONS,
    _check_draws,
    _check_horizon,
    _check_level,
    _parse_date,
    require_projection,
)
from ..shop import Shop

BY_COHORT = "cohort"


def add_arguments(parser) -> None:
    add_column_options(parser)
    parser.add_argument("--horizon", required=True, metavar="DAYS", help="how many days ahead to project")
    parser.add_argument("--by", default=BY_COHORT, metavar="cohort|month|quarter|COLUMN",
                        help="group existing customers by first-order cohort (default, see --period), month or "
                             "quarter, or by a column of the file such as the sales channel")
    parser.add_argument("--period", choices=COHORT_PERIODS, default="quarter",
                        help="cohort length for --by cohort (default quarter)")
    parser.add_argument("--cutoff", metavar="DATE",
                        help="backtest: fit on orders before this date and compare with what came after "
                             "(default: the horizon, or the last 20%% of the time span)")
    parser.add_argument("--cutoffs", default=str(DEFAULT_CUTOFFS), metavar="N",
                        help=f"check the outlook at N cut-offs spread over the last year (default {DEFAULT_CUTOFFS}; "
                             "0 skips this check)")
    parser.add_argument("--no-backtest", action="store_true", help="skip both checks against the past")
    parser.add_argument("--seasons", choices=SEASONS, default=DEFAULT_SEASONS,
                        help=f"month-of-year clock for repeat orders: auto (default {DEFAULT_SEASONS!r}: when a full "
                             "year of orders exists and a test finds the pattern), month (always; needs a full "
                             "year) or none")
    parser.add_argument("--frequency-model", choices=FREQUENCY_CHOICES, default="auto",
                        help="how often customers come back: auto (default: the model your orders support "
                             "better), bg-nbd, or mbg-nbd (customers may stop right after the first order)")
    add_method_options(parser)
    parser.add_argument("--level", default="0.9", help="range level (default 0.9)")
    parser.add_argument("--draws", default=str(DEFAULT_DRAWS),
                        help=f"simulation draws for the ranges (default {DEFAULT_DRAWS})")
    parser.add_argument("--seed", default="0", help="seed of the draws (default 0)")
    parser.add_argument("--out", metavar="CSV", help="write the per-customer projection to this CSV")
    parser.add_argument("--schedule-out", metavar="CSV", help="write the month-by-month schedule to this CSV")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def _whole_number(text, option, least=None):
    try:
        value = int(text)
    except (TypeError, ValueError):
        raise OrderDataError(f"the {option} must be a whole number", value=text, option=option) from None
    if least is not None and value < least:
        raise OrderDataError(f"the {option} must be at least {least}", value=text, option=option)
    return value


def grouping_from_args(args) -> str:
    """The library's ``by`` for the command's --by/--period, pointing --segment at a named column."""
    if args.by == BY_COHORT:
        return args.period
    if args.by in COHORT_PERIODS or args.by == "segment":
        return args.by
    if args.segment is None:
        args.segment = args.by
    elif args.segment != args.by:
        raise OrderDataError("the grouping names a different column than the segment column", value=args.by,
                             option="by", fix=f"Group by segment to use '{args.segment}', or name the same column")
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
    draws = _check_draws(_whole_number(args.draws, "draws"))
    seed = _whole_number(args.seed, "seed")
    cutoffs = _whole_number(args.cutoffs, "cutoffs", least=0)
    if cutoffs == 1:
        raise OrderDataError("a rolling check needs at least 2 cut-offs", value=args.cutoffs, option="cutoffs",
                             fix=f"Give {DEFAULT_CUTOFFS}, or 0 to skip it")
    if args.cutoff is not None:
        _parse_date(args.cutoff, "cutoff")
    by = grouping_from_args(args)
    shop = Shop.from_read(load_from_args(args))
    options = dict(by=by, method=args.method, variance=args.variance, level=level, seed=seed, seasons=args.seasons,
                   frequency_model=args.frequency_model)
    outlook = require_projection(shop.outlook(horizon=horizon, draws=draws, **options))
    backtest = rolling = None
    if not args.no_backtest:
        backtest = shop.outlook_backtest(horizon=horizon, cutoff=args.cutoff, draws=draws, **options)
        require_projection(backtest.outlook, what="the backtest")
        if cutoffs:
            rolling = shop.rolling_backtest(horizon=horizon, cutoffs=cutoffs, **options)
    if args.out:
        write_csv(outlook.customers, args.out)
    if args.schedule_out:
        write_csv(rounded_for_reading(outlook.schedule, money=("projected_revenue_existing", "projected_revenue_new",
                                                               "projected_revenue", "cumulative_revenue"),
                                      shares=("days", "expected_orders_existing", "new_customers",
                                              "expected_orders_new")), args.schedule_out)
    if args.json:
        payload = outlook.summary()
        payload["backtest"] = backtest.summary() if backtest is not None else None
        payload["rolling"] = rolling.as_dict() if rolling is not None else None
        print_json(payload)
        return EXIT_OK
    _print_outlook(outlook, horizon, level)
    if backtest is not None:
        _print_backtest(backtest, level)
    if rolling is not None:
        _print_rolling(rolling)
    if args.out:
        print(f"per-customer projection written to {args.out}")
    if args.schedule_out:
        print(f"month-by-month schedule written to {args.schedule_out}")
    return EXIT_OK


def _print_outlook(outlook, horizon, level) -> None:
    total = outlook.total
    has_new = "projected_revenue_new" in total
    print(f"Projected revenue over the next {horizon:g} days from {outlook.as_of:%Y-%m-%d} ({100 * level:g}% ranges):")
    print(f"  {'':<30} {'projected':>12} {'expected amount':^25} {'what may come in':^25}")
    rows = [("all customers (whole revenue)", "")]
    if has_new:
        rows += [(f"  customers you have ({total['customers']:,})", "_existing"),
                 (f"  new customers (about {total['new_customers_expected']:,.0f})", "_new")]
    for label, part in rows:
        middle = part[1:] + "_" if part else ""
        print(f"  {label:<30} {_money(total['projected_revenue' + part]):>12} "
              f"{_money(total[f'projected_{middle}low']):>12} {_money(total[f'projected_{middle}high']):>12} "
              f"{_money(total[f'revenue_range_{middle}low']):>12} {_money(total[f'revenue_range_{middle}high']):>12}")
    print("'expected amount' is where the average outcome lies; 'what may come in' also includes the luck of "
          "which customers order and how much.")
    print()
    print(f"By group ({outlook.by}):")
    print(f"  {'group':<18} {'customers':>9} {'orders':>8} {'projected':>12} {'may come in from':>17} {'to':>12} "
          f"{'share':>6}")
    for row in outlook.cohorts.itertuples(index=False):
        customers = f"~{row.customers:,.0f}" if row.cohort == NEW_CUSTOMERS else f"{row.customers:,.0f}"
        print(f"  {str(row.cohort):<18} {customers:>9} {row.expected_orders:>8.0f} {_money(row.projected_revenue):>12} "
              f"{_money(row.revenue_range_low):>17} {_money(row.revenue_range_high):>12} "
              f"{100 * row.share_of_projected_revenue:>5.0f}%")
    if outlook.schedule is not None:
        print()
        print("Month by month (projected revenue):")
        print(f"  {'month':<8} {'days':>5} {'customers you have':>19} {'new customers':>14} {'all':>12} "
              f"{'so far':>12}")
        for row in outlook.schedule.itertuples(index=False):
            print(f"  {row.month:<8} {row.days:>5.1f} {_money(row.projected_revenue_existing):>19} "
                  f"{_money(row.projected_revenue_new):>14} {_money(row.projected_revenue):>12} "
                  f"{_money(row.cumulative_revenue):>12}")
    print()
    fit = outlook.fit.as_dict()
    stop_words = (f"after each order (the first included) about {100 * fit['chance_stop_after_order']:.0f}% stop "
                  f"for good" if fit["model"] == "mbg-nbd" else
                  f"after each repeat order about {100 * fit['chance_stop_after_order']:.0f}% stop for good")
    print(f"Order frequency ({fit['model_name']}): an active customer orders about "
          f"{fit['orders_per_year_active']:.1f} times a year; {stop_words}.")
    if fit["model_choice"]:
        print(f"  {fit['model_choice']}")
    print(f"  {outlook.repeat_model.season_words}")
    if outlook.arrivals is not None:
        values = outlook.new_customer_values
        print(f"  {outlook.arrivals.words} A first order averages {values['first_mean']:,.2f}, a repeat order "
              f"{values['repeat_mean']:,.2f}.")
    if fit["notes"]:
        print(f"note: {fit['notes']}")


def _print_backtest(backtest, level) -> None:
    bt = backtest.total
    print()
    print(f"Backtest: made from the orders before {backtest.cutoff:%Y-%m-%d}, compared with all revenue of the next "
          f"{backtest.window_days:g} days:")
    print(f"  {'':<30} {'projected':>12} {'actual':>12} {'error':>7}")
    print(f"  {'all revenue':<30} {_money(bt['projected_revenue']):>12} {_money(bt['actual_revenue']):>12} "
          f"{_percent(bt['error_pct']):>7}")
    print(f"  {'  customers known then':<30} {_money(bt['projected_revenue_existing']):>12} "
          f"{_money(bt['actual_revenue_existing']):>12} {_percent(bt['error_existing_pct']):>7}")
    print(f"  {'  new customers':<30} {_money(bt['projected_revenue_new']):>12} {_money(bt['actual_revenue_new']):>12} "
          f"{_percent(bt['error_new_pct']):>7}")
    print(f"  {'run-rate guess':<30} {_money(bt['run_rate_revenue']):>12} {'':>12} {_percent(bt['run_rate_error_pct']):>7}")
    print(f"  {'group':<18} {'projected':>12} {'could be from':>14} {'to':>12} {'actual':>12} {'error':>7}")
    for row in backtest.cohorts.itertuples(index=False):
        print(f"  {str(row.cohort):<18} {_money(row.projected_revenue):>12} {_money(row.revenue_range_low):>14} "
              f"{_money(row.revenue_range_high):>12} {_money(row.actual_revenue):>12} {_percent(row.error_pct):>7}")
    print(f"  actual revenue fell inside the {100 * level:g}% range of what may come in for "
          f"{bt['cohorts_inside_revenue_range']} of {len(backtest.cohorts)} groups, and "
          f"{'inside' if bt['actual_inside_revenue_range'] else 'outside'} it in total.")


def _print_rolling(rolling) -> None:
    summary = rolling.summary
    print()
    print(f"Checked at {summary['cutoffs']} cut-offs from {summary['first_cutoff']} to {summary['last_cutoff']} "
          f"({summary['window_days']:g} days each, all revenue):")
    print(f"  {'cut-off':<11} {'actual':>12} {'projected':>12} {'error':>7} {'run rate':>9} {'cells':>7} "
          f"{'in range':>9}")
    for row in rolling.table.itertuples(index=False):
        print(f"  {row.cutoff:%Y-%m-%d}  {_money(row.actual_revenue):>12} {_money(row.projected_revenue):>12} "
              f"{_percent(row.error_pct):>7} {_percent(row.run_rate_error_pct):>9} {_percent(row.cell_error_pct):>7} "
              f"{'yes' if row.inside_revenue_range else 'no':>9}")
    print(f"  mean absolute error: outlook {summary['mean_abs_error_pct']:.1f}% "
          f"({summary['within_10pct']} of {summary['cutoffs']} within 10%), run-rate guess "
          f"{summary['run_rate_mean_abs_error_pct']:.1f}%, recency/frequency cells "
          f"{summary['cell_mean_abs_error_pct']:.1f}%.")
    if summary["warning"]:
        print(f"warning: {summary['warning']}")
