"""``check``: read an export and show the row account (what was used, what was left out and why)."""

from __future__ import annotations

from . import EXIT_OK, add_column_options, add_engine_options, column_options, load_from_args, print_json
from ..exports import write_csv
from ..reading import NOTES, REASONS


def add_arguments(parser) -> None:
    add_column_options(parser)
    add_engine_options(parser)
    parser.add_argument("--excluded-out", metavar="CSV", help="write the rows left out, with reasons, to this CSV")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def run(args) -> int:
    if args.engine == "pandas":
        result = load_from_args(args)
        audit = result.audit()
        if args.excluded_out:
            write_csv(result.excluded, args.excluded_out)
    else:
        from ..engines import customer_statistics_from_file

        _, audit = customer_statistics_from_file(
            args.file, engine=args.engine, memory_limit=args.memory_limit, temp_directory=args.temp_directory,
            threads=args.threads, scheduler=args.scheduler, list_rows=bool(args.excluded_out),
            **column_options(args))
        if args.excluded_out:
            write_csv(audit.pop("excluded_rows"), args.excluded_out)
    if args.json:
        print_json(audit)
        return EXIT_OK
    print(f"{audit['file']}: {audit['rows_read']} rows read, {audit['rows_used']} used, "
          f"{audit['rows_excluded']} left out")
    print(f"{audit['orders']} orders from {audit['customers']} customers")
    print("columns: " + ", ".join(f"{role}={col}" for role, col in audit["mapping"].items() if col))
    for code, count in audit["excluded"].items():
        print(f"  left out {count:>6}  {code:<22} {REASONS[code]}")
    for code, count in audit.get("noted", {}).items():
        print(f"  noted    {count:>6}  {code:<22} {NOTES[code]}")
    for note in audit["notes"]:
        print(f"note: {note}")
    return EXIT_OK
