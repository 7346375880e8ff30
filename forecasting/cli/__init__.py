"""The command line: ``python -m forecasting COMMAND FILE [options]``.

Each command lives in a module of its own in this package with two functions,
``add_arguments(parser)`` and ``run(args) -> int``. This module holds what they
share: the column options, loading a file from them, and turning a user-facing
:class:`~forecasting.errors.OrderDataError` into a message on stderr and exit code 2
(never a traceback).
"""

from __future__ import annotations

import argparse
import importlib
import json
import logging
import math
import os
import sys
import time

from ..errors import OrderDataError
from ..reading import DATE_ORDERS, ReadResult, read_orders

# command name -> (module, one-line help)
COMMANDS = {
    "check": ("check", "read an order export and show what was used and what was left out"),
    "forecast": ("forecast", "expected next-order value for every customer, written to a CSV"),
    "evaluate": ("evaluate", "how much each method beats plain customer averages on your own data"),
    "outlook": ("outlook", "projected revenue per cohort over a horizon, with a backtest"),
    "tiers": ("tiers", "value tiers of customers, written to a CSV list"),
}

EXIT_OK = 0
EXIT_DATA_ERROR = 2

# The flag that chooses the column of each role (OrderDataError.role).
ROLE_FLAGS = {
    "customer": "--customer",
    "date": "--date",
    "value": "--value",
    "order_id": "--order-id",
    "status": "--status",
    "currency": "--currency-column",
    "segment": "--segment",
}


def flag_for(role: str | None, option: str | None) -> str | None:
    """The command-line flag for the column role or library option an error concerns.

    Library options are keyword arguments; their flags are the same words with dashes
    (``date_order`` -> ``--date-order``).

    Examples
    --------
    >>> flag_for("order_id", None), flag_for(None, "date_order")
    ('--order-id', '--date-order')
    """
    if option is not None:
        return "--" + option.replace("_", "-")
    if role is not None:
        return ROLE_FLAGS[role]
    return None


def add_column_options(parser: argparse.ArgumentParser) -> None:
    """The options every command shares: the file and which column is which."""
    parser.add_argument("file", help="order export: CSV, TSV, Excel (.xlsx) or Parquet")
    columns = parser.add_argument_group("columns (guessed from the headers when not given)")
    columns.add_argument("--customer", metavar="COL", help="column with the customer id")
    columns.add_argument("--value", metavar="COL", help="column with the order or line amount")
    columns.add_argument("--date", metavar="COL", help="column with the order date")
    columns.add_argument("--order-id", metavar="COL", help="column with the order number (joins order lines)")
    columns.add_argument("--status", metavar="COL",
                         help="column with the order status (paid, cancelled, refunded, pending, test...)")
    columns.add_argument("--segment", metavar="COL", help="column with a customer group such as channel or region")
    columns.add_argument("--currency-column", metavar="COL", help="column with the currency code")
    reading = parser.add_argument_group("reading")
    reading.add_argument("--currency", metavar="CODE", help="keep only amounts in this currency, e.g. EUR")
    reading.add_argument("--date-order", choices=DATE_ORDERS, help="how to read dates like 03/04/2025")
    reading.add_argument("--decimal", choices=[".", ","], help="decimal separator of the amounts")
    reading.add_argument("--sheet", help="Excel sheet name (default: the first sheet)")
    reading.add_argument("--header-row", type=int, metavar="N",
                         help="the row that holds the column headings, for title lines above them "
                              "(default: found by itself)")
    reading.add_argument("--keep-unpaid", action="store_true",
                         help="keep orders whose status says unpaid or unfinished (pending, failed, draft, on hold)")
    reading.add_argument("--keep-implausible", action="store_true",
                         help="keep amounts far outside the shop's usual range and dates in the future or before 1990")


# From this size on, the pandas engine's run suggests the duckdb engine (bytes; a rule of thumb).
LARGE_FILE_BYTES = 200 * 1024 * 1024


def load_from_args(args: argparse.Namespace) -> ReadResult:
    """Read the file named on the command line with the column options given."""
    _suggest_duckdb_for_large_files(args.file)
    return read_orders(args.file, **column_options(args))


def _suggest_duckdb_for_large_files(path) -> None:
    try:
        size = os.path.getsize(path)
    except (OSError, TypeError, ValueError):
        return  # the reader reports a missing file with its own message
    if size >= LARGE_FILE_BYTES:
        print(f"note: {os.path.basename(path)} is {size / 1024 ** 2:,.0f} MB; for a plain CSV or Parquet export "
              "this size, --engine duckdb is several times faster and needs less memory", file=sys.stderr)


ENGINE_CHOICES = ("pandas", "duckdb", "dask")


def add_engine_options(parser: argparse.ArgumentParser) -> None:
    """Where the work runs: in memory (pandas), out of core (duckdb) or on a Dask cluster."""
    engine = parser.add_argument_group("engine (for files too big for memory)")
    engine.add_argument("--engine", choices=ENGINE_CHOICES, default="pandas",
                        help="pandas (default, any export), duckdb (out of core, plain numbers and ISO dates), "
                             "dask (a cluster; FILE may be a glob pattern)")
    engine.add_argument("--memory-limit", default="2GB", metavar="SIZE", help="duckdb memory limit (default 2GB)")
    engine.add_argument("--temp-directory", metavar="DIR", help="where duckdb may spill to disk")
    engine.add_argument("--threads", type=int, metavar="N", help="duckdb threads (default: all cores)")
    engine.add_argument("--scheduler", metavar="ADDRESS",
                        help="Dask scheduler address (default: a local cluster on this machine)")


def add_method_options(parser) -> None:
    """``--method`` and ``--variance``, shared by every command that forecasts next-order values.

    Names, words and defaults come from the registry (:mod:`forecasting.options`), as in the dashboard.
    """
    from ..options import DEFAULT_METHOD, DEFAULT_VARIANCE, method_names, spread_names

    parser.add_argument("--method", default=DEFAULT_METHOD, metavar="NAME",
                        help=f"how next-order values are forecast: {', '.join(method_names(with_auto=True))} "
                             f"(default: {DEFAULT_METHOD}, chosen on your own orders)")
    parser.add_argument("--variance", default=DEFAULT_VARIANCE, metavar="NAME",
                        help=f"how order values spread: {', '.join(spread_names(with_auto=True))} "
                             f"(default: {DEFAULT_VARIANCE})")


def json_number(value):
    """A number for JSON output, or None where it is not finite (JSON has no NaN); other values unchanged."""
    if isinstance(value, (int, float)) and not isinstance(value, bool) and not math.isfinite(value):
        return None
    return value


def column_options(args: argparse.Namespace) -> dict:
    return dict(customer=args.customer, value=args.value, date=args.date, order_id=args.order_id,
                status=args.status, segment=args.segment, currency_column=args.currency_column,
                currency=args.currency, date_order=args.date_order, decimal=args.decimal, sheet=args.sheet,
                header_row=args.header_row, keep_unpaid=args.keep_unpaid, keep_implausible=args.keep_implausible)


def shop_from_args(args: argparse.Namespace):
    """The shop of the file named on the command line (:class:`forecasting.shop.Shop`): its orders
    and row account with the pandas engine, its per-customer statistics and row account with a
    scale engine (which never holds every order in this process)."""
    from ..shop import Shop

    if args.engine == "pandas":
        return Shop.from_read(load_from_args(args))
    stats, account, _ = load_statistics_from_args(args)
    return Shop(statistics=stats, account=account)


def load_statistics_from_args(args: argparse.Namespace):
    """Per-customer statistics, the row account and (pandas engine only) the cleaned orders.

    Returns ``(stats, account, orders)``; ``orders`` is None for the scale engines,
    which never hold every order in this process.
    """
    from ..customers import customer_statistics

    if args.engine == "pandas":
        result = load_from_args(args)
        return customer_statistics(result.orders), result.audit(), result.orders
    from ..engines import customer_statistics_from_file

    stats, account = customer_statistics_from_file(
        args.file, engine=args.engine, memory_limit=args.memory_limit, temp_directory=args.temp_directory,
        threads=args.threads, scheduler=args.scheduler, **column_options(args))
    return stats, account, None


class Progress:
    """Step-by-step progress on stderr for long commands, shown only to a person at a terminal.

    Scripts that read stdout (``--json``) or capture stderr see nothing of it.
    """

    def __init__(self, steps: int, *, stream=None):
        self.steps = steps
        self.done = 0
        self.stream = stream if stream is not None else sys.stderr
        self.enabled = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.started = time.perf_counter()

    def step(self, what: str) -> None:
        self.done += 1
        if self.enabled:
            elapsed = time.perf_counter() - self.started
            bar = "#" * self.done + "." * max(0, self.steps - self.done)
            print(f"\r[{bar}] {self.done}/{self.steps} {what} ({elapsed:.0f} s)\033[K", end="",
                  file=self.stream, flush=True)

    def finish(self) -> None:
        if self.enabled:
            print(f"\r\033[Kdone in {time.perf_counter() - self.started:.1f} s", file=self.stream, flush=True)


def print_json(payload) -> None:
    """Print one JSON object (the machine-readable output of every command)."""
    print(json.dumps(payload, indent=2, default=str, allow_nan=False))


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The parser of every command, or of ``only`` that one (its module alone is imported)."""
    parser = argparse.ArgumentParser(
        prog="python -m forecasting",
        description="Forecast what each customer will spend on their next order. "
                    "Everything runs on this machine; nothing is sent anywhere.")
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for name, (module_name, summary) in COMMANDS.items():
        if only is not None and name != only:
            continue
        try:
            module = importlib.import_module(f"{__name__}.{module_name}")
        except ModuleNotFoundError as missing:
            if missing.name != f"{__name__}.{module_name}":
                raise
            continue
        sub = commands.add_parser(name, help=summary, description=summary)
        module.add_arguments(sub)
        sub.set_defaults(run=module.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    # A command's run imports what that command needs, not what the others do.
    parser = build_parser(only=argv[0] if argv and argv[0] in COMMANDS else None)
    args = parser.parse_args(argv)
    if getattr(args, "engine", None) == "dask":
        # The cluster's routine log lines (shuffles starting and ending) are not news to a user.
        logging.getLogger("distributed").setLevel(logging.ERROR)
    try:
        return args.run(args)
    except OrderDataError as problem:
        print(f"error: {problem.worded(flag_for)}", file=sys.stderr)
        return EXIT_DATA_ERROR
    except KeyboardInterrupt:
        print("stopped", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader of our output (e.g. `| head`) went away: stop quietly, as other shell tools do.
        # Point stdout at devnull so the interpreter's final flush does not complain (Python docs, signal).
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 141
