"""Write the corpus of messy order exports, each with what a careful bookkeeper expects of every row.

Run from the repository root (the output depends on nothing but this script)::

    python tests/corpus/make_corpus.py            # rewrites tests/corpus/exports/ and expected/

Every export is small (a houseplant shop's orders, a few to a few dozen rows) and is written
the way a shop platform or a spreadsheet writes one: order lines with an order total
repeated, platform statuses (``wc-on-hold``), placeholders in the amount, an unclosed quote,
title lines above the header, an Excel ``sep=;`` line, UTF-16 text, a NUL byte, a typo
thousands of times the usual order, a date in 2052, e-mail ids in other capitals...

Beside each export, ``expected/<name>.json`` says, row by row as a spreadsheet numbers them,
what should become of it: ``"used"`` or the reason code of the row account (see
``forecasting/io/rules.py``), the notes on rows used, and the orders, customers and revenue
that follow; or, for a file that cannot be used as it is, the refusal and the column role or
option that fixes it. The expectations are written here by hand, case by case, from the
rows' meaning; the revenue is the plain sum of the amounts the rows are declared to
contribute. ``tests/corpus/test_corpus.py`` reads every export with every engine and checks
each row.
"""

from __future__ import annotations

import csv
import io
import json
import sys
from decimal import Decimal
from pathlib import Path

HERE = Path(__file__).resolve().parent
EXPORTS = HERE / "exports"
EXPECTED = HERE / "expected"
EVERY_ENGINE = ["pandas", "duckdb", "dask"]


class Case:
    """One export: its rows as written, and what each should become."""

    def __init__(self, name: str, header: list[str] | None, *, options: dict | None = None, delimiter: str = ",",
                 kind: str = "csv", encoding: str = "utf-8", line_end: str = "\n", about: str = ""):
        self.name = name
        self.header = header
        self.options = options or {}
        self.delimiter = delimiter
        self.kind = kind
        self.encoding = encoding
        self.line_end = line_end
        self.about = about
        self.lines: list[str] = []  # the file's records, as written (without the line end)
        self.records: list[list] = []  # for Excel and Parquet: the rows' cells
        self.rows: dict[int, str] = {}
        self.noted: dict[int, list[str]] = {}
        self.orders: dict[tuple, Decimal] = {}
        self.customers: set = set()
        self.refusal: dict | None = None
        self.notes: list[str] = []
        self.statuses: dict[str, int] | None = None
        self.before: list[str] = []  # lines above the header (a separator line, a title)
        self.header_row = 1
        self.engines = list(EVERY_ENGINE) if kind != "xlsx" else ["pandas"]
        if header is not None:
            self.lines.append(self._join(header))

    def _join(self, cells) -> str:
        # RFC 4180 quoting: cells with the delimiter, a quote or a line break are quoted.
        out = io.StringIO()
        csv.writer(out, delimiter=self.delimiter, lineterminator="\r\n").writerow(cells)
        return out.getvalue()[:-2]

    @property
    def next_row(self) -> int:
        """The spreadsheet row of the next record: the header's row, then one row per record."""
        written = len(self.lines) - 1 if self.kind == "csv" else len(self.records)
        return self.header_row + 1 + written

    @property
    def customer_at(self) -> int:
        """Where the customer is among the cells (the first header that names one)."""
        names = ("customer", "customer_id", "client", "email", "kunde", "customerid")
        return next(i for i, h in enumerate(self.header) if h.lstrip("\ufeff").lower().replace(" ", "_") in names)

    def title(self, *lines: str) -> "Case":
        """Lines above the header (a report title): not rows of the table."""
        self.before.extend(lines)
        self.header_row += len(lines)
        return self

    def add(self, cells=None, outcome: str = "used", *, raw: str | None = None, order=None, value=None,
            customer=None, notes=()) -> int:
        """A row: ``cells`` (or ``raw`` text as written), what becomes of it, and when used, the
        order it belongs to (``order``: a key, default its own row), the amount it adds to
        that order's value and its customer (default: the first cell)."""
        row = self.next_row
        if self.kind == "csv":
            self.lines.append(raw if raw is not None else self._join(cells))
        else:
            self.records.append(list(cells))
        self.rows[row] = outcome
        if notes:
            self.noted[row] = list(notes)
        if outcome == "used" and value is not None:
            key = order if order is not None else ("row", row)
            self.orders[key] = self.orders.get(key, Decimal(0)) + Decimal(str(value))
            self.customers.add(customer if customer is not None else str(cells[self.customer_at]).strip())
        return row

    def leave_out(self, key) -> None:
        """An order that the rows of another line leave out as a whole (its lines say so themselves)."""
        self.orders.pop(key, None)

    def refuse(self, match: str, *, row: int | None = None, option: str | None = None,
               role: str | None = None) -> "Case":
        self.refusal = {"match": match, "row": row, "option": option, "role": role}
        return self

    def expect_note(self, text: str) -> "Case":
        self.notes.append(text)
        return self

    def write(self, exports: Path = EXPORTS, expected_folder: Path = EXPECTED) -> dict:
        path = exports / f"{self.name}.{self.kind}"
        if self.kind == "csv":
            text = self.line_end.join(self.before + self.lines) + self.line_end
            data = text.encode(self.encoding)
            if self.encoding == "utf-16":
                data = text.encode("utf-16")  # with its byte order mark
            path.write_bytes(data)
        elif self.kind == "xlsx":
            _write_workbook(path, self)
        else:
            _write_parquet(path, self)
        expected = {
            "file": path.name,
            "about": self.about,
            "options": self.options,
            "engines": self.engines,
            "refusal": self.refusal,
            "rows": {str(r): o for r, o in sorted(self.rows.items())},
            "noted": {str(r): n for r, n in sorted(self.noted.items())},
            "orders": len(self.orders),
            "customers": len(self.customers),
            "revenue": str(sum(self.orders.values(), Decimal(0))),
            "notes": self.notes,
            "unrecognised_statuses": self.statuses,
        }
        (expected_folder / f"{self.name}.json").write_text(json.dumps(expected, indent=1, ensure_ascii=False) + "\n",
                                                    encoding="utf-8")
        return expected


def _write_workbook(path: Path, case: Case) -> None:
    import openpyxl

    book = openpyxl.Workbook()
    sheets = getattr(case, "sheets", None) or {"Orders": None}
    first = True
    for name, content in sheets.items():
        sheet = book.active if first else book.create_sheet(name)
        sheet.title = name
        first = False
        rows = content if content is not None else ([[t] for t in case.before] + [case.header] + case.records)
        for row in rows:
            sheet.append(row)
    book.save(path)


def _write_parquet(path: Path, case: Case) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    columns = list(zip(*case.records)) if case.records else [[] for _ in case.header]
    types = getattr(case, "types", {})
    arrays = [pa.array(list(values), type=types.get(name)) for name, values in zip(case.header, columns)]
    pq.write_table(pa.table(arrays, names=case.header), path)


# ---------------------------------------------------------------------------
# The cases


def cases() -> list[Case]:
    out: list[Case] = []

    def case(*args, **kwargs) -> Case:
        made = Case(*args, **kwargs)
        out.append(made)
        return made

    # -- revenue: order lines and order totals ---------------------------------------------
    c = case("line_and_order_total", ["Order", "Date", "Customer", "Product", "Line Total", "Order Total"],
             about="order lines with both the line amount and the order total repeated on every line: "
                   "the line amounts are added, the order total is not")
    c.add(["W1", "2025-03-01", "C1", "Fern 12cm", "12.00", "40.00"], order="W1", value="12.00")
    c.add(["W1", "2025-03-01", "C1", "Pot", "28.00", "40.00"], order="W1", value="28.00")
    c.add(["W2", "2025-03-02", "C2", "Trowel", "15.50", "15.50"], order="W2", value="15.50")
    c.add(["W3", "2025-03-05", "C1", "Compost", "9.75", "31.25"], order="W3", value="9.75")
    c.add(["W3", "2025-03-05", "C1", "Monstera", "21.50", "31.25"], order="W3", value="21.50")
    c.expect_note("Amounts are taken from 'Line Total' (each line's amount); 'Order Total' holds the order's "
                  "total on each of its lines and is not added up.")

    c = case("order_total_repeated", ["Order Number", "Order Date", "Customer", "Item", "Order Total"],
             about="only the order's total, repeated on each of its lines: counted once per order")
    c.add(["A1", "2025-04-01", "fern", "Pot", "40.00"], order="A1", value="40.00")
    c.add(["A1", "2025-04-01", "fern", "Saucer", "40.00"], order="A1", notes=["continuation_line"])
    c.add(["A1", "2025-04-01", "fern", "Soil", "40.00"], order="A1", notes=["continuation_line"])
    c.add(["A2", "2025-04-03", "ivy", "Shears", "22.50"], order="A2", value="22.50")
    c.add(["A3", "2025-04-04", "ivy", "Twine", "18.00"], order="A3", value="18.00")
    c.add(["A3", "2025-04-04", "ivy", "Stakes", "18.00"], order="A3", notes=["continuation_line"])
    c.expect_note("'Order Total' holds each order's total (on its first line, or repeated on every line): it is "
                  "counted once per order, and the order's other lines are noted as further lines of it.")

    c = case("order_total_on_first_line", ["Name", "Email", "Financial Status", "Created at", "Total",
                                           "Lineitem name"],
             about="a platform export: the order total on the order's first line, the others blank")
    c.add(["#1001", "fern@example.com", "paid", "2025-05-01 10:00:00 +0100", "54.00", "Monstera"], order="#1001",
          value="54.00")
    c.add(["#1001", "fern@example.com", "paid", "2025-05-01 10:00:00 +0100", "", "Pot"], order="#1001",
          notes=["continuation_line"])
    c.add(["#1002", "ivy@example.com", "paid", "2025-05-02 11:30:00 +0100", "19.99", "Fern"], order="#1002",
          value="19.99")
    c.add(["#1003", "moss@example.com", "paid", "2025-05-03 09:15:00 +0100", "75.00", "Olive tree"],
          order="#1003", value="75.00")
    c.add(["#1003", "moss@example.com", "paid", "2025-05-03 09:15:00 +0100", "", "Stand"], order="#1003",
          notes=["continuation_line"])
    c.add(["#1003", "moss@example.com", "paid", "2025-05-03 09:15:00 +0100", "", "Feed"], order="#1003",
          notes=["continuation_line"])
    c.add(["#1004", "fern@example.com", "pending", "2025-05-04 12:00:00 +0100", "12.00", "Seeds"], "unpaid_order")
    # The further lines of an order left out share its reason (the status is on the first line only).
    c.add(["#1004", "fern@example.com", "", "2025-05-04 12:00:00 +0100", "", "Pot"], "unpaid_order")
    c.add(["#1005", "ivy@example.com", "voided", "2025-05-05 12:00:00 +0100", "30.00", "Fern"], "cancelled_order")
    c.add(["#1005", "ivy@example.com", "", "2025-05-05 12:00:00 +0100", "", "Saucer"], "cancelled_order")
    c.expect_note("'Total' holds each order's total (on its first line, or repeated on every line): it is "
                  "counted once per order, and the order's other lines are noted as further lines of it.")

    c = case("amount_repeated_on_lines", ["Invoice", "Client", "Date", "Amount"],
             about="a header that says nothing, but five orders repeat one amount on every line")
    for k, (client, amount) in enumerate([("C1", "30.00"), ("C2", "45.50"), ("C3", "12.00"), ("C1", "60.00"),
                                           ("C2", "8.25")]):
        invoice = f"I{k + 1}"
        c.add([invoice, client, f"2025-06-0{k + 1}", amount], order=invoice, value=amount, customer=client)
        c.add([invoice, client, f"2025-06-0{k + 1}", amount], order=invoice, customer=client,
              notes=["continuation_line"], raw=f"{invoice},{client},2025-06-0{k + 1}, {amount}")
    c.expect_note("'Amount' holds each order's total (on its first line, or repeated on every line): it is "
                  "counted once per order, and the order's other lines are noted as further lines of it.")

    c = case("line_amounts_equal_by_chance", ["Order Number", "Customer", "Order Date", "Line Total"],
             about="two lines of one price in an order: line amounts, both added")
    c.add(["B1", "fern", "2025-06-01", "6.50"], order="B1", value="6.50")
    c.add(["B1", "fern", "2025-06-01", "6.50 "], order="B1", value="6.50")
    c.add(["B2", "ivy", "2025-06-02", "14.00"], order="B2", value="14.00")
    c.add(["B2", "ivy", "2025-06-02", "3.00"], order="B2", value="3.00")

    # -- statuses ---------------------------------------------------------------------------
    c = case("platform_statuses", ["order_id", "customer_id", "date_created", "total", "status"],
             about="a shop platform's statuses with their prefix: only paid orders are orders")
    c.add(["101", "C1", "2025-02-01", "30.00", "wc-completed"], value="30.00")
    c.add(["102", "C2", "2025-02-02", "25.00", "wc-processing"], value="25.00")
    c.add(["103", "C3", "2025-02-03", "40.00", "wc-pending"], "unpaid_order")
    c.add(["104", "C1", "2025-02-04", "22.00", "wc-failed"], "unpaid_order")
    c.add(["105", "C2", "2025-02-05", "18.00", "wc-on-hold"], "unpaid_order")
    c.add(["106", "C3", "2025-02-06", "60.00", "wc-cancelled"], "cancelled_order")
    c.add(["107", "C1", "2025-02-07", "35.00", "wc-refunded"], "refunded_order")
    c.add(["108", "C2", "2025-02-08", "12.00", "checkout-draft"], "unpaid_order")
    c.add(["109", "C3", "2025-02-09", "9.00", "trash"], "cancelled_order")
    c.add(["110", "C1", "2025-02-10", "14.00", "draft"], "unpaid_order")
    c.add(["111", "C3", "2025-02-11", "16.00", "Completed"], value="16.00")

    c = case("platform_statuses_kept", ["order_id", "customer_id", "date_created", "total", "status"],
             options={"keep_unpaid": True},
             about="the same statuses with unpaid and unfinished orders kept, as asked")
    c.add(["201", "C1", "2025-02-01", "30.00", "wc-completed"], value="30.00")
    c.add(["202", "C2", "2025-02-03", "40.00", "wc-pending"], value="40.00", notes=["unpaid_kept"])
    c.add(["203", "C1", "2025-02-04", "22.00", "wc-failed"], value="22.00", notes=["unpaid_kept"])
    c.add(["204", "C2", "2025-02-05", "18.00", "On hold"], value="18.00", notes=["unpaid_kept"])
    c.add(["205", "C3", "2025-02-06", "60.00", "wc-cancelled"], "cancelled_order")

    c = case("status_phrases", ["Order", "Customer", "Date", "Amount", "Status"],
             about="statuses written as phrases")
    c.add(["S1", "fern", "2025-03-01", "20.00", "Cancelled by customer"], "cancelled_order")
    c.add(["S2", "fern", "2025-03-02", "21.00", "Canceled - customer request"], "cancelled_order")
    c.add(["S3", "ivy", "2025-03-03", "22.00", "Payment failed"], "unpaid_order")
    c.add(["S4", "ivy", "2025-03-04", "23.00", "Awaiting payment"], "unpaid_order")
    c.add(["S5", "moss", "2025-03-05", "24.00", "Partially refunded"], value="24.00")
    c.add(["S6", "moss", "2025-03-06", "25.00", "Shipped"], value="25.00")
    c.add(["S7", "fern", "2025-03-07", "26.00", "Delivered to customer"], value="26.00")
    c.add(["S8", "ivy", "2025-03-08", "27.00", "TEST ORDER"], "test_order")
    c.add(["S9", "ivy", "2025-03-09", "28.00", "Voided"], "cancelled_order")

    c = case("unknown_statuses", ["Order", "Customer", "Date", "Amount", "Status"],
             about="statuses the reader does not know: used as paid, each listed with its rows")
    c.add(["U1", "fern", "2025-03-01", "20.00", "paid"], value="20.00")
    c.add(["U2", "fern", "2025-03-02", "21.00", "Awaiting pickup"], value="21.00", notes=["unrecognised_status"])
    c.add(["U3", "ivy", "2025-03-03", "22.00", "Gift"], value="22.00", notes=["unrecognised_status"])
    c.add(["U4", "ivy", "2025-03-04", "23.00", "Awaiting pickup"], value="23.00", notes=["unrecognised_status"])
    c.add(["U5", "moss", "2025-03-05", "24.00", ""], value="24.00")
    c.statuses = {"Awaiting pickup": 2, "Gift": 1}

    c = case("refunds", ["Order", "Customer", "Date", "Amount", "Status"],
             about="refunds: a part refunded, a whole order refunded, a refund without its order, "
                   "an order refunded to nothing, a free sample")
    c.add(["R1", "fern", "2025-04-01", "50.00", "paid"], order="R1", value="50.00")
    c.add(["R1", "fern", "2025-04-09", "-20.00", "refunded"], order="R1", value="-20.00")
    c.add(["R2", "ivy", "2025-04-02", "35.00", "Refunded"], "refunded_order")
    c.add(["R3", "ivy", "2025-04-03", "-12.00", "refunded"], "unmatched_refund")
    c.add(["R4", "moss", "2025-04-04", "18.00", "paid"], "refunded_in_full")
    c.add(["R4", "moss", "2025-04-05", "-18.00", "refunded"], "refunded_in_full")
    c.add(["R5", "moss", "2025-04-06", "0.00", "paid"], "zero_amount")
    c.add(["R6", "fern", "2025-04-07", "40.00", "paid"], order="R6", value="40.00")
    c.add(["R6", "fern", "2025-04-08", "\u221215.00", "paid"], order="R6", value="-15.00")

    # -- rows that do not split ----------------------------------------------------------------
    c = case("unclosed_quote", ["customer", "order date", "amount", "product"],
             about="one quote never closed: that row is reported, every later row is read")
    c.add(["fern", "2025-01-02", "10.00", "pot"], value="10.00")
    c.add(outcome="unclosed_quote", raw='ivy,2025-01-03,20.00,"trowel')
    c.add(["moss", "2025-01-04", "30.00", "saucer"], value="30.00")
    c.add(["fern", "2025-01-05", "40.00", "twine"], value="40.00")
    c.add(["ivy", "2025-01-06", "50.00", "shears"], value="50.00")

    c = case("unclosed_quote_closed_later", ["customer", "order date", "amount", "product"],
             about="a stray quote paired with a later quoted cell: the rows between are rows of their own")
    c.add(["fern", "2025-01-02", "10.00", "pot"], value="10.00")
    c.add(outcome="unclosed_quote", raw='ivy,2025-01-03,"20.00,trowel')
    c.add(["moss", "2025-01-04", "30.00", "saucer"], value="30.00")
    c.add(["fern", "2025-01-05", "40.00", "twine, 50m"], value="40.00")
    c.add(["ivy", "2025-01-06", "50.00", "shears"], value="50.00")

    c = case("unclosed_quote_at_the_end", ["customer", "order date", "amount", "product"],
             about="a quote opened on the last row")
    c.add(["fern", "2025-01-02", "10.00", "pot"], value="10.00")
    c.add(["ivy", "2025-01-03", "20.00", "saucer"], value="20.00")
    c.add(outcome="unclosed_quote", raw='moss,2025-01-04,30.00,"twine')

    c = case("fields_too_many_and_too_few", ["Order Number", "Customer", "Order Date", "Product", "Line Total"],
             about="an unquoted comma in a product name, and a row cut short")
    c.add(["F1", "fern", "2025-02-01", "Fern, Boston", "16.00"], order="F1", value="16.00")
    c.add(outcome="malformed_row", raw="F2,ivy,2025-02-02,Fern, Boston 14cm pot,16.00")
    c.add(outcome="malformed_row", raw="F3,moss,2025-02-03,Pot")
    c.add(["F4", "moss", "2025-02-04", "Pot", "9.00"], order="F4", value="9.00")

    c = case("line_breaks_in_cells", ["customer", "order date", "amount", "delivery address"],
             about="addresses over several lines in quoted cells: one row each")
    c.add(["fern", "2025-01-02", "10.00", "12 High St\nLeeds\nLS1 1AA"], value="10.00")
    c.add(["ivy", "2025-01-03", "20.00", "3 Mill Lane\nYork"], value="20.00")
    c.add(["moss", "2025-01-04", "30.00", "1 Station Rd"], value="30.00")

    c = case("blank_rows", ["customer", "order date", "amount"], about="empty lines and lines of spaces")
    c.add(["fern", "2025-01-02", "10.00"], value="10.00")
    c.add(outcome="blank_row", raw="")
    c.add(outcome="blank_row", raw="   ")
    c.add(outcome="blank_row", raw=",,")
    c.add(["ivy", "2025-01-03", "20.00"], value="20.00")

    c = case("nul_byte_in_a_row", ["customer", "order date", "amount"],
             about="a NUL byte inside a row: that row is damaged, the rest is read")
    c.add(["fern", "2025-01-02", "10.00"], value="10.00")
    c.add(outcome="damaged_row", raw="iv\x00y,2025-01-03,20.00")
    c.add(["moss", "2025-01-04", "30.00"], value="30.00")
    for k in range(5):
        c.add([f"C{k}", f"2025-01-1{k}", "5.00"], value="5.00")

    c = case("control_character", ["customer", "order date", "amount"],
             about="a bell character in a cell: a damaged row")
    c.add(["fern", "2025-01-02", "10.00"], value="10.00")
    c.add(outcome="damaged_row", raw="ivy,2025-01-03,2\x070.00")
    c.add(["moss", "2025-01-04", "30.00"], value="30.00")

    # -- amounts ----------------------------------------------------------------------------------
    c = case("amount_placeholders", ["customer", "order date", "amount"],
             about="words and signs in the amount cell: no amount, not a currency")
    c.add(["fern", "2025-01-02", "$10.00"], value="10.00")
    for word in ["abc", "TBD", "NaN", "nil", "n/a", "-", "\u2014"]:
        c.add(["ivy", "2025-01-03", word], "missing_amount")
    c.add(["moss", "2025-01-04", "$12.50"], value="12.50")
    c.add(["fern", "2025-01-05", "$8.00"], value="8.00")
    c.add(["fern", "2025-01-06", "$9.00"], value="9.00")
    c.add(["fern", "2025-01-07", "$11.00"], value="11.00")
    c.add(["moss", "2025-01-08", "$7.00"], value="7.00")
    c.add(["moss", "2025-01-09", "$6.00"], value="6.00")
    c.add(["moss", "2025-01-10", "$5.00"], value="5.00")
    c.add(["ivy", "2025-01-11", "$4.00"], value="4.00")
    c.add(["ivy", "2025-01-12", "$3.00"], value="3.00")

    c = case("amount_with_tax_words", ["customer", "order date", "amount"],
             about="pounds with words around them")
    c.add(["fern", "2025-01-02", "£12.00 inc VAT"], value="12.00")
    c.add(["ivy", "2025-01-03", "£8.50 incl. VAT"], value="8.50")
    c.add(["moss", "2025-01-04", "£20.00 ex VAT"], value="20.00")
    c.add(["moss", "2025-01-05", "GBP 7.25"], value="7.25")
    c.add(["fern", "2025-01-06", "12 apples"], "bad_amount")

    c = case("decimal_point_chosen", ["customer", "order date", "amount"], options={"decimal": "."},
             about="the decimal mark given: money with thousands commas still reads")
    c.add(["fern", "2025-01-02", "$1,204.50"], value="1204.50")
    c.add(["ivy", "2025-01-03", "$980.00"], value="980.00")
    c.add(["moss", "2025-01-04", "1,100"], value="1100")
    c.add(["moss", "2025-01-05", "12,5"], "bad_amount")

    c = case("decimal_comma", ["Kunde", "Datum", "Betrag"], delimiter=";",
             about="a European export: decimal comma, points for thousands, day-first dates")
    c.add(["K1", "03.02.2025", "1.234,50 €"], value="1234.50", customer="K1")
    c.add(["K2", "14.02.2025", "45,00 €"], value="45.00")
    c.add(["K1", "28.02.2025", "-12,50 €"], value="-12.50")
    c.add(["K3", "01.03.2025", "1.000"], value="1000")
    c.expect_note("Fields are separated by ';'.")
    c.expect_note("Amounts in 'Betrag' use a decimal comma (like 1.234,50).")
    c.expect_note("Dates in 'Datum' read day-first because row 3 has '14.02.2025'.")
    # K1's refund on its own row is a refund with no order id: an order of its own, a refund with nothing to net.
    c.rows[4] = "unmatched_refund"
    c.orders.pop(("row", 4))

    c = case("decimal_comma_and_point", ["customer", "order date", "amount"],
             about="a column mixing both decimal marks: refused, naming the option")
    c.add(["fern", "2025-01-02", "12,50"])
    c.add(["ivy", "2025-01-03", "13.75"])
    c.refuse("mix a decimal comma and a decimal point", row=3, option="decimal")

    c = case("unicode_minus_refund", ["order", "customer", "date", "amount"],
             about="a refund written with the minus sign U+2212 nets against its order")
    c.add(["A1", "fern", "2025-01-02", "40.00"], order="A1", value="40.00")
    c.add(["A1", "fern", "2025-01-09", "\u221210.00"], order="A1", value="-10.00")
    c.add(["A2", "ivy", "2025-01-03", "25.00"], order="A2", value="25.00")

    c = case("dollars_of_other_countries", ["customer", "order date", "amount"],
             about="C$ and A$ are not US dollars: a file mixing them needs a currency")
    c.add(["fern", "2025-01-02", "C$12.00"])
    c.add(["ivy", "2025-01-03", "$10.00"])
    c.add(["moss", "2025-01-04", "A$8.00"])
    c.refuse("several currencies \\(AUD, CAD, USD\\)", row=2, option="currency")

    c = case("canadian_dollars_chosen", ["customer", "order date", "amount"], options={"currency": "CAD"},
             about="the currency chosen: other dollars are left out")
    c.add(["fern", "2025-01-02", "C$12.00"], value="12.00")
    c.add(["ivy", "2025-01-03", "$10.00"], "other_currency")
    c.add(["moss", "2025-01-04", "A$8.00"], "other_currency")
    c.add(["moss", "2025-01-05", "CA$ 30.00"], value="30.00")
    c.add(["fern", "2025-01-06", "14.00"], value="14.00")

    c = case("currency_column_spellings", ["customer", "order date", "amount", "currency"],
             about="one currency written 'EUR', 'eur ' and '€'")
    c.add(["fern", "2025-01-02", "12.00", "EUR"], value="12.00")
    c.add(["ivy", "2025-01-03", "10.00", "eur "], value="10.00")
    c.add(["moss", "2025-01-04", "8.00", "€"], value="8.00")

    c = case("grouping_marks", ["customer", "order date", "amount"],
             about="thousands grouped by a space, a no-break space and an apostrophe")
    c.add(["fern", "2025-01-02", "1 234.50"], value="1234.50")
    c.add(["ivy", "2025-01-03", "1\u00a0200.00"], value="1200.00")
    c.add(["moss", "2025-01-04", "1'150.25"], value="1150.25")
    c.add(["moss", "2025-01-05", "980.00"], value="980.00")

    c = case("enormous_amount", ["customer", "order date", "amount"],
             about="1e308 among ordinary orders: left out, never an infinite forecast")
    for k, amount in enumerate(["24.00", "31.50", "18.25", "42.00", "27.80"]):
        c.add([f"C{k % 3}", f"2025-01-0{k + 1}", amount], value=amount)
    c.add(["C1", "2025-01-08", "1e308"], "implausible_amount")

    c = case("typo_thousands_of_times", ["customer", "order date", "amount"],
             about="one typo of 124,999 among ordinary orders: left out and shown first")
    for k, amount in enumerate(["24.00", "31.50", "18.25", "42.00", "27.80", "35.10", "22.40"]):
        c.add([f"C{k % 3}", f"2025-02-0{k + 1}", amount], value=amount)
    c.add(["C2", "2025-02-09", "124,999"], "implausible_amount")
    c.add(["C0", "2025-02-10", "0.01"], "implausible_amount")

    c = case("typo_kept_as_asked", ["customer", "order date", "amount"], options={"keep_implausible": True},
             about="the same typo, kept as asked")
    for k, amount in enumerate(["24.00", "31.50", "18.25", "42.00", "27.80", "35.10", "22.40"]):
        c.add([f"C{k % 3}", f"2025-02-0{k + 1}", amount], value=amount)
    c.add(["C2", "2025-02-09", "124,999"], value="124999", notes=["implausible_kept"])

    c = case("bulk_orders_stay", ["customer", "order date", "amount"],
             about="a trade customer's bulk orders, 5 to 20 times the usual: genuine, kept")
    for k, amount in enumerate(["24.00", "31.50", "18.25", "42.00", "27.80", "35.10", "22.40", "29.90"]):
        c.add([f"C{k % 4}", f"2025-03-0{k + 1}", amount], value=amount)
    c.add(["TRADE", "2025-03-10", "$580.00"], value="580.00")
    c.add(["TRADE", "2025-03-20", "$145.00"], value="145.00")

    c = case("number_too_large_for_a_float", ["customer", "order date", "amount"],
             about="1e400 is no number a computer holds: not money")
    c.add(["fern", "2025-01-02", "10.00"], value="10.00")
    c.add(["ivy", "2025-01-03", "1e400"], "bad_amount")

    # -- dates -----------------------------------------------------------------------------------
    c = case("dates_with_offsets", ["customer", "order date", "amount"],
             about="dates with a UTC offset stay the local date written")
    c.add(["fern", "2025-03-01T00:30:00+01:00", "10.00"], value="10.00")
    c.add(["ivy", "2025-03-02 23:30:00 -0500", "20.00"], value="20.00")
    c.add(["moss", "2025-03-03T12:00:00Z", "30.00"], value="30.00")

    c = case("date_in_2052", ["customer", "order date", "amount"],
             about="a date in the future and dates before the shop could exist: left out, shown first")
    c.add(["fern", "2025-03-01", "10.00"], value="10.00")
    c.add(["ivy", "2052-03-02", "20.00"], "implausible_date")
    c.add(["moss", "1900-01-01", "30.00"], "implausible_date")
    c.add(["moss", "1970-01-01", "30.00"], "implausible_date")
    c.add(["fern", "2025-03-05", "12.00"], value="12.00")

    c = case("date_in_2052_kept", ["customer", "order date", "amount"], options={"keep_implausible": True},
             about="the same dates, kept as asked")
    c.add(["fern", "2025-03-01", "10.00"], value="10.00")
    c.add(["ivy", "2052-03-02", "20.00"], value="20.00", notes=["implausible_kept"])

    c = case("excel_day_numbers", ["customer", "order date", "amount"],
             about="dates saved as Excel day numbers: read as days, and said so")
    c.add(["fern", "45660", "10.00"], value="10.00", notes=["excel_serial_date"])
    c.add(["ivy", "45661.5", "20.00"], value="20.00", notes=["excel_serial_date"])
    c.add(["moss", "2025-01-05", "30.00"], value="30.00")

    c = case("month_first_dates", ["customer", "order date", "amount"],
             about="US dates, settled by 04/25/2025")
    c.add(["fern", "03/04/2025", "10.00"], value="10.00")
    c.add(["ivy", "04/25/2025", "20.00"], value="20.00")
    c.add(["moss", "3/14/2025 2:30 PM", "30.00"], value="30.00")
    c.expect_note("Dates in 'order date' read month-first because row 3 has '04/25/2025'.")

    c = case("dates_that_settle_nothing", ["customer", "order date", "amount"],
             about="every date could be day-first or month-first: refused, naming the option")
    c.add(["fern", "03/04/2025", "10.00"])
    c.add(["ivy", "05/06/2025", "20.00"])
    c.refuse("no value settles", row=2, option="date_order")

    c = case("dates_settled_by_the_option", ["customer", "order date", "amount"],
             options={"date_order": "day-first"}, about="the same dates, day-first as chosen")
    c.add(["fern", "03/04/2025", "10.00"], value="10.00")
    c.add(["ivy", "05/06/2025", "20.00"], value="20.00")

    c = case("dates_both_ways", ["customer", "order date", "amount"],
             about="25/04/2025 and 04/25/2025 in one column: refused")
    c.add(["fern", "25/04/2025", "10.00"])
    c.add(["ivy", "04/25/2025", "20.00"])
    c.refuse("mix day-first and month-first", row=2, option="date_order")

    c = case("compact_dates", ["customer", "order date", "amount"], about="dates written as 20250314")
    c.add(["fern", "20250314", "10.00"], value="10.00")
    c.add(["ivy", "20251301", "20.00"], "bad_date")

    c = case("written_out_dates", ["customer", "order date", "amount"], about="dates in words")
    c.add(["fern", "14 Mar 2025", "10.00"], value="10.00")
    c.add(["ivy", "March 15, 2025", "20.00"], value="20.00")
    c.add(["moss", "Fri, 14 Mar 2025 10:00:00 GMT", "30.00"], value="30.00")
    c.add(["moss", "16-Mar-25", "40.00"], value="40.00")
    c.add(["fern", "2025/03/17", "50.00"], value="50.00")

    c = case("dates_that_are_no_days", ["customer", "order date", "amount"],
             about="no such day, and placeholders in the date")
    c.add(["fern", "2025-02-30", "10.00"], "bad_date")
    c.add(["ivy", "31/02/2025", "20.00"], "bad_date")
    c.add(["moss", "2025-13-45", "30.00"], "bad_date")
    c.add(["fern", "pending", "40.00"], "missing_date")
    c.add(["ivy", "-", "50.00"], "missing_date")
    c.add(["moss", "", "60.00"], "missing_date")
    c.add(["fern", "2025-03-01", "70.00"], value="70.00")
    c.add(["ivy", "2025-03-02", "80.00"], value="80.00")
    c.add(["moss", "2025-03-03", "90.00"], value="90.00")
    c.add(["fern", "2025-03-04", "15.00"], value="15.00")
    c.add(["ivy", "2025-03-05", "25.00"], value="25.00")
    c.add(["moss", "2025-03-06", "35.00"], value="35.00")
    c.add(["fern", "2025-03-07", "45.00"], value="45.00")

    # -- customers --------------------------------------------------------------------------------
    c = case("email_ids_written_otherwise", ["Email", "Created at", "Total"],
             about="one customer's e-mail in other capitals and with a zero-width space: one customer")
    c.add(["Fern@Example.com", "2025-01-02", "10.00"], value="10.00", customer="fern@example.com")
    c.add(["fern@example.com", "2025-01-03", "20.00"], value="20.00", customer="fern@example.com",
          notes=["merged_customer_id"])
    c.add(["fern\u200b@example.com", "2025-01-04", "30.00"], value="30.00", customer="fern@example.com",
          notes=["merged_customer_id"])
    c.add(["ivy@example.com", "2025-01-05", "40.00"], value="40.00", customer="ivy@example.com")

    c = case("ids_with_spaces", ["customer", "order date", "amount"],
             about="ids with spaces and no-break spaces around them, and rows without a customer")
    c.add(["C-001", "2025-01-02", "10.00"], value="10.00")
    c.add(["\u00a0C-001 ", "2025-01-03", "20.00"], value="20.00", customer="C-001")
    c.add(["", "2025-01-04", "30.00"], "missing_customer")
    c.add(["\u200b", "2025-01-05", "40.00"], "missing_customer")

    c = case("exact_copies", ["order", "customer", "date", "amount", "status"],
             about="copies of earlier rows, a copy of a cancelled row among them")
    c.add(["A1", "fern", "2025-01-02", "10.00", "paid"], order="A1", value="10.00")
    c.add(["A1", "fern", "2025-01-02", "10.00", "paid"], "duplicate_row")
    c.add(["A2", "ivy", "2025-01-03", "20.00", "cancelled"], "cancelled_order")
    c.add(["A2", "ivy", "2025-01-03", "20.00", "cancelled"], "duplicate_row")
    c.add(["A3", "ivy", "2025-01-04", "20.00", "paid"], order="A3", value="20.00")

    # -- the shape of the file ----------------------------------------------------------------------
    c = case("title_lines", ["Customer", "Order Date", "Order Total"],
             about="a report title and an export date above the header")
    c.title("Fernhollow Plants - orders", "Exported 2025-06-30", "")
    c.add(["fern", "2025-01-02", "10.00"], value="10.00")
    c.add(["ivy", "2025-01-03", "20.00"], value="20.00")
    c.expect_note("The column headings are on row 4 (found below the title lines); rows 1-3 above them were not "
                  "read as orders.")

    c = case("title_line_with_delimiters", ["Customer", "Order Date", "Order Total", "Channel"],
             about="a title padded with delimiters, as a spreadsheet saves one")
    c.title("Fernhollow Plants - orders,,,")
    c.add(["fern", "2025-01-02", "10.00", "web"], value="10.00")
    c.add(["ivy", "2025-01-03", "20.00", "market"], value="20.00")
    c.expect_note("The column headings are on row 2 (found below the title lines); row 1 above them were not "
                  "read as orders.")

    c = case("header_row_chosen", ["Customer", "Order Date", "Order Total"], options={"header_row": 3},
             about="the header row given")
    c.title("Orders 2025", "1,2,3")
    c.add(["fern", "2025-01-02", "10.00"], value="10.00")
    c.add(["ivy", "2025-01-03", "20.00"], value="20.00")
    c.expect_note("The column headings are on row 3 (as chosen); rows 1-2 above them were not read as orders.")

    c = case("separator_line", ["Kunde", "Datum", "Betrag"], delimiter=";",
             about="an Excel 'sep=;' first line")
    c.before.append("sep=;")
    c.add(["K1", "2025-01-02", "10,50"], value="10.50")
    c.add(["K2", "2025-01-03", "20,00"], value="20.00")
    c.expect_note("The first line 'sep=;' names the delimiter; it is not a row of the table.")

    c = case("utf16_text", ["customer", "order date", "amount"], encoding="utf-16", delimiter="\t",
             about="UTF-16 text with tabs, as a spreadsheet's 'Unicode text'")
    c.add(["José", "2025-01-02", "10.00"], value="10.00")
    c.add(["Zoë", "2025-01-03", "20.00"], value="20.00")
    c.expect_note("The file is UTF-16 text; read as such.")

    c = case("windows_1252", ["Client", "Date", "Montant"], encoding="cp1252", delimiter=";",
             about="a Western European code page, with the euro sign")
    c.add(["Pépinière", "2025-01-02", "10,50 €"], value="10.50")
    c.add(["Hélène", "2025-01-03", "20,00 €"], value="20.00")
    c.expect_note("The file is not UTF-8; read it as Windows-1252 (Western European).")

    c = case("old_mac_line_ends", ["customer", "order date", "amount"], line_end="\r",
             about="lines ending in a carriage return alone")
    c.add(["fern", "2025-01-02", "10.00"], value="10.00")
    c.add(["ivy", "2025-01-03", "20.00"], value="20.00")

    c = case("windows_line_ends_and_quotes", ["customer", "order date", "amount", "product"], line_end="\r\n",
             about="CRLF line ends, quotes doubled inside quoted cells")
    c.add(["fern", "2025-01-02", "10.00", 'Pot "large", terracotta'], value="10.00")
    c.add(["ivy", "2025-01-03", "20.00", "Fern"], value="20.00")

    c = case("wrong_amount_column", ["customer", "order date", "amount"], options={"value": "product"},
             about="the amount column chosen wrongly: refused, naming the column role")
    c.header = ["customer", "order date", "amount", "product"]
    c.lines[0] = c._join(c.header)
    for k in range(6):
        c.add([f"C{k}", f"2025-01-0{k + 1}", "10.00", "widget"])
    c.refuse("most amounts in this column cannot be read", row=2, role="value")

    c = case("no_usable_orders", ["order", "customer", "date", "amount", "status"],
             about="every order unpaid: refused, naming the option that keeps them")
    c.add(["1", "fern", "2025-01-02", "10.00", "pending"])
    c.add(["2", "ivy", "2025-01-03", "20.00", "on-hold"])
    c.refuse("no usable orders", option="keep_unpaid")

    c = case("pipe_delimited_with_channels", ["customer", "order date", "amount", "channel"], delimiter="|",
             about="pipes between fields, a sales channel per order")
    c.add(["fern", "2025-01-02", "10.00", "web"], value="10.00")
    c.add(["ivy", "2025-01-03", "20.00", "market stall"], value="20.00")
    c.add(["moss", "2025-01-04", "30.00", ""], value="30.00")
    c.expect_note("Fields are separated by '|'.")

    c = case("byte_order_mark", ["\ufeffcustomer", "order date", "amount", "status"],
             about="UTF-8 with a byte order mark before the header")
    c.add(["fern", "2025-01-02", "10.00", "paid"], value="10.00")
    c.add(["ivy", "2025-01-03", "20.00", "test"], "test_order")

    c = case("several_currencies_in_a_column", ["customer", "order date", "amount", "currency"],
             about="euros and pounds in one file: refused, naming the option")
    c.add(["fern", "2025-01-02", "10.00", "EUR"])
    c.add(["ivy", "2025-01-03", "20.00", "GBP"])
    c.add(["moss", "2025-01-04", "30.00", "eur"])
    c.refuse("several currencies \\(EUR, GBP\\)", row=3, option="currency")

    c = case("pounds_and_euros_chosen", ["customer", "order date", "amount"], options={"currency": "€"},
             about="the currency chosen by its symbol")
    c.add(["fern", "2025-01-02", "€10.00"], value="10.00")
    c.add(["ivy", "2025-01-03", "£20.00"], "other_currency")
    c.add(["moss", "2025-01-04", "30.00 EUR"], value="30.00")

    c = case("utf16_without_byte_order_mark", ["customer", "order date", "amount"], encoding="utf-16-le",
             delimiter="\t", about="UTF-16 text without its byte order mark")
    c.add(["José", "2025-01-02", "10.00"], value="10.00")
    c.add(["Zoë", "2025-01-03", "20.00"], value="20.00")
    c.expect_note("The file is UTF-16 text; read as such.")

    c = case("mixed_line_ends", ["customer", "order date", "amount"], line_end="\r\n",
             about="CRLF and LF line ends in one file")
    c.add(["fern", "2025-01-02", "10.00"], value="10.00")
    # Two records written as one line of the file with a bare LF between them (the others end in CRLF).
    c.add(["ivy", "2025-01-03", "20.00"], raw="ivy,2025-01-03,20.00\nmoss,2025-01-04,30.00", value="20.00")
    c.rows[c.next_row] = "used"
    c.orders[("row", c.next_row)] = Decimal("30.00")
    c.customers.add("moss")

    # -- Parquet (every engine) -------------------------------------------------------------------
    import pyarrow as pa

    c = case("parquet_local_time", ["customer", "order_date", "amount"], kind="parquet",
             about="a time-zone-aware Parquet column keeps the local time, as dates with an offset do")
    c.types = {"order_date": pa.timestamp("us", tz="Europe/Paris")}
    from datetime import datetime, timezone

    c.add(["fern", datetime(2025, 2, 28, 23, 30, tzinfo=timezone.utc), 10.0], value="10.00")
    c.add(["ivy", datetime(2025, 3, 1, 12, 0, tzinfo=timezone.utc), 20.0], value="20.00")

    c = case("parquet_statuses_and_placeholders", ["customer", "order_date", "amount", "status"], kind="parquet",
             about="a Parquet file of text cells: the same rules")
    c.add(["fern", "2025-03-01", "$10.00", "paid"], value="10.00")
    c.add(["ivy", "2025-03-02", "n/a", "paid"], "missing_amount")
    c.add(["moss", "2025-03-03", "$30.00", "wc-pending"], "unpaid_order")
    c.add(["moss", "2025-03-04", "$40.00", "shipped"], value="40.00")

    # -- Excel (the pandas engine; the scale engines read CSV and Parquet) --------------------------
    c = case("excel_title_rows", ["Customer", "Order Date", "Total"], kind="xlsx",
             about="a workbook with a title above the table")
    c.title("Fernhollow Plants - orders", "")
    c.add(["fern", "2025-01-02", 10.5], value="10.50")
    c.add(["ivy", "2025-01-03", 20], value="20.00")
    c.expect_note("The column headings are on row 3 (found below the title lines); rows 1-2 above them were not "
                  "read as orders.")

    c = case("excel_orders_on_another_sheet", ["Customer", "Order Date", "Total"], kind="xlsx",
             about="the orders on the second sheet: refused, naming the sheets")
    c.sheets = {"Summary": [["Revenue", 123.0], ["Orders", 2]],
                "Orders": [["Customer", "Order Date", "Total"], ["fern", "2025-01-02", 10.5]]}
    c.refuse("'Summary', 'Orders'", option="sheet")

    c = case("excel_orders_sheet_chosen", ["Customer", "Order Date", "Total"], kind="xlsx",
             options={"sheet": "Orders"}, about="the same workbook, the sheet chosen")
    c.sheets = {"Summary": [["Revenue", 123.0], ["Orders", 2]], "Orders": None}
    c.add(["fern", "2025-01-02", 10.5], value="10.50")
    c.add(["ivy", "2025-01-03", 20], value="20.00")
    c.expect_note("Read the sheet 'Orders' of 2 ('Summary', 'Orders').")

    c = case("excel_day_numbers_general", ["Customer", "Order Date", "Total"], kind="xlsx",
             about="dates in a General-formatted column: Excel day numbers")
    c.add(["fern", 45660, 10.5], value="10.50", notes=["excel_serial_date"])
    c.add(["ivy", datetime(2025, 1, 4), 20], value="20.00")

    c = case("excel_formulas_without_values", ["Customer", "Order Date", "Total"], kind="xlsx",
             about="amounts that are formulas saved without their values")
    c.add(["fern", "2025-01-02", 10.5], value="10.50")
    c.add(["ivy", "2025-01-03", "=B3*2"], "formula_without_value")
    c.add(["moss", "2025-01-04", "=10+5"], "formula_without_value")
    return out


def main(argv=None) -> int:
    import argparse

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=HERE, help="folder for exports/ and expected/ (default: here)")
    args = parser.parse_args(argv)
    exports, expected = args.out / "exports", args.out / "expected"
    exports.mkdir(parents=True, exist_ok=True)
    expected.mkdir(parents=True, exist_ok=True)
    for stale in list(exports.iterdir()) + list(expected.iterdir()):
        stale.unlink()
    made = [c.write(exports, expected) for c in cases()]
    every = sum(1 for m in made if set(m["engines"]) == set(EVERY_ENGINE))
    print(f"{len(made)} exports ({every} read by every engine), "
          f"{sum(len(m['rows']) for m in made)} rows with an expected outcome")
    return 0


if __name__ == "__main__":
    sys.exit(main())
