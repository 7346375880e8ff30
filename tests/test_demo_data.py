"""Checks on the demo shop's files: the generator, its CSV and the hand-made messy file.

The shop file is read here with plain pandas and the messy file with the
standard library, never with the product's own reader, so these tests say
whether the files are what ``demo_data/README.md`` claims, independently of
the code that will read them.
"""

from __future__ import annotations

import csv
import importlib.util
import io
import math
import re
import subprocess
import sys
from datetime import datetime
from decimal import Decimal
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

DEMO = Path(__file__).resolve().parents[1] / "demo_data"
GENERATOR = DEMO / "make_demo_shop.py"
SHOP_CSV = DEMO / "plant_shop_orders.csv"
MESSY_CSV = DEMO / "messy_orders.csv"
README = DEMO / "README.md"
SEED = 20241101  # the seed the committed file was written with (README)

SHOP_HEADER = "Order Number,Order Date,Customer,Product,Qty,Line Total,Currency,Order Status,Channel"
MESSY_HEADER = "Client ID;Date;Amount;State;Invoice"


def _load_generator():
    spec = importlib.util.spec_from_file_location("make_demo_shop", GENERATOR)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _run_generator(out, seed):
    done = subprocess.run(
        [sys.executable, str(GENERATOR), "--seed", str(seed), "--out", str(out)],
        capture_output=True, text=True, check=True, timeout=60,
    )
    return out.read_bytes(), done.stdout


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Two separate runs with the committed seed and one with another seed."""
    folder = tmp_path_factory.mktemp("demo_shop")
    return {
        "first": _run_generator(folder / "first.csv", SEED),
        "second": _run_generator(folder / "second.csv", SEED),
        "other_seed": _run_generator(folder / "other.csv", SEED + 1),
    }


@pytest.fixture(scope="module")
def readme():
    return README.read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def shop_text():
    return SHOP_CSV.read_bytes().decode("utf-8")


@pytest.fixture(scope="module")
def shop_rows(shop_text):
    """Every data row as the csv module splits it (RFC 4180 quoting), with its row number."""
    rows = list(csv.reader(io.StringIO(shop_text, newline="")))
    return [(number, row) for number, row in enumerate(rows[1:], start=2)]


def _money_to_float(text: pd.Series) -> pd.Series:
    """``$1,234.50`` / ``-$24.00`` / ``($24.00)`` / ``12.5`` to float, in plain pandas."""
    negative = text.str.startswith("-") | text.str.startswith("(")
    digits = text.str.replace(r"[-$,()]", "", regex=True)
    value = pd.to_numeric(digits, errors="raise")
    return value.where(~negative, -value)


@pytest.fixture(scope="module")
def shop_orders():
    """One row per real order (no test or cancelled orders), net of refunds, value > 0.

    Reading rules (plain pandas): skip the broken row, drop the exact
    duplicate, net refund lines into their order.
    """
    lines = pd.read_csv(SHOP_CSV, dtype=str, keep_default_na=False, on_bad_lines="skip")
    lines = lines.drop_duplicates()
    lines = lines[lines["Order Status"].isin(["paid", "refunded"])].copy()
    lines["value"] = _money_to_float(lines["Line Total"])
    orders = lines.groupby("Order Number", sort=False).agg(
        customer=("Customer", "first"),
        date=("Order Date", "first"),
        value=("value", "sum"),
    )
    orders["date"] = pd.to_datetime(orders["date"], format="%Y-%m-%d %H:%M")
    return orders[orders["value"] > 0.005]


class TestGenerator:
    def test_same_seed_gives_identical_bytes(self, runs):
        assert runs["first"][0] == runs["second"][0]
        # The printed summary too, apart from the file name on its first line.
        first, second = (runs[k][1].split(":", 1)[1] for k in ("first", "second"))
        assert first == second

    def test_another_seed_gives_another_file(self, runs):
        # Shows the seed is really used, so the identity above is not vacuous.
        assert runs["first"][0] != runs["other_seed"][0]

    def test_committed_file_is_what_the_generator_writes(self, runs):
        assert SHOP_CSV.read_bytes() == runs["first"][0]

    def test_default_seed_is_the_committed_one(self):
        assert _load_generator().DEFAULT_SEED == SEED

    def test_summary_matches_the_file(self, runs, shop_rows):
        summary = runs["first"][1]
        rows = int(re.search(r"(\d+) rows", summary).group(1))
        assert rows == len(shop_rows)
        customers = int(re.search(r"customers: (\d+)", summary).group(1))
        assert customers == len({row[2] for _, row in shop_rows if row[2] != "C-TEST"})
        for label in ("repeat share", "top 1% of orders hold", "duplicate at row", "broken row"):
            assert label in summary

    def test_bad_seed_is_refused_by_name(self):
        generator = _load_generator()
        with pytest.raises(ValueError, match=r"seed .*got -1"):
            generator.make_order_lines(seed=-1)
        with pytest.raises(ValueError, match=r"seed .*got 1\.5"):
            generator.make_order_lines(seed=1.5)

    def test_missing_output_folder_is_refused_by_name(self, tmp_path):
        generator = _load_generator()
        with pytest.raises(ValueError, match=r"out: folder does not exist"):
            generator.write_demo_shop(tmp_path / "no_such_folder" / "x.csv")


class TestShopFileFormat:
    def test_header_encoding_and_line_endings(self, shop_text):
        assert shop_text.split("\n", 1)[0] == SHOP_HEADER
        assert "\r" not in shop_text
        assert shop_text.endswith("\n")

    def test_size_under_three_megabytes(self):
        assert SHOP_CSV.stat().st_size < 3_000_000

    def test_exactly_one_row_with_an_extra_field_where_readme_says(self, shop_rows, readme, shop_text):
        wide = [number for number, row in shop_rows if len(row) != 9]
        stated = int(re.search(r"row (\d+) has 10 fields", readme).group(1))
        assert wide == [stated]
        row = dict(shop_rows)[stated]
        assert len(row) == 10
        # The extra field comes from an unquoted comma in the product name.
        raw = shop_text.split("\n")[stated - 1]
        assert '"' not in raw and f"{row[3]},{row[4]}" in raw

    def test_other_comma_names_are_quoted(self, shop_rows, shop_text):
        with_comma = [row[3] for _, row in shop_rows if len(row) == 9 and "," in row[3]]
        assert len(with_comma) > 100
        assert f'"{with_comma[0]}"' in shop_text

    def test_exactly_one_exact_duplicate_where_readme_says(self, shop_text, readme):
        lines = shop_text.split("\n")[1:-1]
        seen, repeats = {}, []
        for number, line in enumerate(lines, start=2):
            if line in seen:
                repeats.append((number, seen[line]))
            seen.setdefault(line, number)
        copy, original = map(int, re.search(r"row (\d+) is an exact copy of row (\d+)", readme).groups())
        assert repeats == [(copy, original)]
        # Mid-file, not at either end.
        assert 0.2 < copy / len(lines) < 0.8

    def test_field_formats(self, shop_rows):
        rows = [row for _, row in shop_rows if len(row) == 9]
        patterns = {
            0: r"FH-\d{6}",
            1: r"\d{4}-\d\d-\d\d \d\d:\d\d",
            2: r"C-\d{5}|C-TEST",
            4: r"-?\d+",
            5: r"-?\$\d{1,3}(,\d{3})*\.\d\d|\(\$\d{1,3}(,\d{3})*\.\d\d\)|\d+(\.\d{1,2})?",
            6: r"USD",
            7: r"paid|refunded|cancelled|test",
            8: r"web|instagram|market",
        }
        for column, pattern in patterns.items():
            bad = [row[column] for row in rows if not re.fullmatch(pattern, row[column])]
            assert bad == [], f"column {column}: {bad[:5]}"
        dates = [datetime.strptime(row[1], "%Y-%m-%d %H:%M") for row in rows]
        assert min(dates) >= datetime(2024, 11, 1) and max(dates) < datetime(2026, 11, 1)

    def test_money_written_with_thousands_separator_and_a_few_plain(self, shop_rows):
        totals = [row[5] for _, row in shop_rows if len(row) == 9]
        assert any(re.fullmatch(r"\$\d{1,3},\d{3}\.\d\d", t) for t in totals)
        plain = [t for t in totals if "$" not in t]
        assert 3 <= len(plain) <= 60
        # A big amount is never written without its separator.
        assert not any(re.fullmatch(r"-?\$\d{4,}\.\d\d", t) for t in totals)

    def test_sorted_by_date_then_order_number(self, shop_rows):
        keys = [(row[1], row[0]) for _, row in shop_rows]
        assert keys == sorted(keys)

    def test_lines_of_an_order_agree_on_date_customer_and_channel(self, shop_rows):
        seen = {}
        for _, row in shop_rows:
            if len(row) != 9:
                continue
            assert seen.setdefault(row[0], (row[1], row[2], row[8])) == (row[1], row[2], row[8])

    def test_catalogue_size_and_lines_per_order(self, shop_rows):
        rows = [row for _, row in shop_rows if len(row) == 9 and row[7] != "refunded"]
        assert 35 <= len({row[3] for row in rows}) <= 45
        per_order = pd.Series([row[0] for row in rows]).value_counts()
        # 1-5 product lines; 6 only for the order that also holds the duplicated line.
        assert per_order.min() == 1
        assert (per_order > 5).sum() <= 1 and per_order.max() <= 6


class TestShopFileEvents:
    @pytest.fixture(scope="class")
    @classmethod
    def lines(cls):
        frame = pd.read_csv(SHOP_CSV, dtype=str, keep_default_na=False, on_bad_lines="skip")
        frame["value"] = _money_to_float(frame["Line Total"])
        return frame

    def test_refund_lines_are_negative_and_about_two_percent_of_orders(self, lines):
        refunds = lines[lines["Order Status"] == "refunded"]
        assert (refunds["value"] < 0).all() and (lines.loc[lines["value"] < 0, "Order Status"] == "refunded").all()
        # Units sent back, or 0 for a part-price credit on a single item.
        assert (refunds["Qty"].astype(int) <= 0).all()
        assert (refunds["Qty"].astype(int) < 0).mean() > 0.5
        share = refunds["Order Number"].nunique() / lines["Order Number"].nunique()
        assert 0.01 <= share <= 0.03
        # Each refund belongs to an order that also has paid lines.
        paid_orders = set(lines.loc[lines["Order Status"] == "paid", "Order Number"])
        assert set(refunds["Order Number"]) <= paid_orders
        # Both negative styles appear.
        assert refunds["Line Total"].str.startswith("-$").any()
        assert refunds["Line Total"].str.startswith("($").any()

    def test_refunds_are_partial_or_full_with_a_couple_netting_to_zero(self, lines):
        refunded = set(lines.loc[lines["Order Status"] == "refunded", "Order Number"])
        net = lines[lines["Order Number"].isin(refunded)].groupby("Order Number")["value"].sum().round(2)
        assert 2 <= (net == 0).sum() <= 5
        assert (net > 0).sum() >= 0.9 * len(net)
        assert (net >= 0).all()

    def test_about_one_percent_cancelled_whole_orders(self, lines):
        status = lines.groupby("Order Number")["Order Status"].agg(set)
        cancelled = status[status.map(lambda s: "cancelled" in s)]
        assert (cancelled.map(len) == 1).all()  # every line of a cancelled order is cancelled
        assert 0.005 <= len(cancelled) / len(status) <= 0.02

    def test_three_to_five_test_orders_on_the_test_account(self, lines):
        tests = lines[lines["Order Status"] == "test"]
        assert 3 <= tests["Order Number"].nunique() <= 5
        assert set(tests["Customer"]) == {"C-TEST"}
        assert set(lines.loc[lines["Customer"] == "C-TEST", "Order Status"]) == {"test"}


class TestShopFileShape:
    """The shape claims of the README, computed with plain pandas."""

    def test_about_two_thousand_customers(self, shop_orders):
        assert 1900 <= shop_orders["customer"].nunique() <= 2100

    def test_repeat_share_between_forty_and_sixty_percent(self, shop_orders):
        counts = shop_orders["customer"].value_counts()
        assert 0.40 <= (counts >= 2).mean() <= 0.60

    def test_long_tail_of_regulars(self, shop_orders):
        counts = shop_orders["customer"].value_counts()
        assert (counts >= 10).sum() >= 20
        assert 15 <= counts.max() <= 40

    def test_spring_busier_than_winter(self, shop_orders):
        # Second year only, so the launch months (few customers yet) do not
        # flatter the comparison: Dec 2025-Feb 2026 against Mar-May 2026.
        month = shop_orders["date"].dt.to_period("M").value_counts()
        winter = month[[pd.Period(m, "M") for m in ("2025-12", "2026-01", "2026-02")]].mean()
        spring = month[[pd.Period(m, "M") for m in ("2026-03", "2026-04", "2026-05")]].mean()
        assert spring > 1.25 * winter

    def test_top_one_percent_of_orders_hold_an_outsized_share(self, shop_orders):
        values = np.sort(shop_orders["value"].to_numpy())[::-1]
        top = values[: math.ceil(0.01 * len(values))]
        # "Visibly outsized": at least ten times the 1% an even spread would give.
        assert top.sum() / values.sum() >= 0.10

    def test_typical_basket_and_trade_bulk_orders(self, shop_orders):
        assert 35 <= shop_orders["value"].median() <= 65
        # Bulk trade orders: hundreds to a few thousand dollars.
        assert (shop_orders["value"] >= 1000).sum() >= 20
        assert shop_orders["value"].max() <= 10_000

    def test_every_channel_is_used(self):
        lines = pd.read_csv(SHOP_CSV, dtype=str, keep_default_na=False, on_bad_lines="skip")
        share = lines.drop_duplicates("Order Number")["Channel"].value_counts(normalize=True)
        assert share["web"] > 0.5 and share["instagram"] > 0.05 and share["market"] > 0.05


# --------------------------------------------------------------------------
# The hand-made messy file
# --------------------------------------------------------------------------


def _messy_lines():
    text = MESSY_CSV.read_bytes().decode("cp1252")
    assert text.endswith("\r\n")
    return text[: -len("\r\n")].split("\r\n")


def _euro_amount(text):
    """``1.234,50 €`` to Decimal; None when it is not an amount."""
    if not re.fullmatch(r"-?\d{1,3}(\.\d{3})*,\d\d €", text):
        return None
    return Decimal(text[:-2].replace(".", "").replace(",", "."))


def _day_first_date(text):
    try:
        return datetime.strptime(text, "%d/%m/%Y")
    except ValueError:
        return None


def _readme_table(readme, heading_cell):
    """Rows (as lists of cells) of the README table whose first heading cell is ``heading_cell``."""
    lines = readme.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith(f"| {heading_cell} |"))
    rows = []
    for line in lines[start + 2:]:
        if not line.startswith("|"):
            break
        rows.append([cell.strip() for cell in line.strip("|").split("|")])
    return rows


@pytest.fixture(scope="module")
def messy_claims(readme):
    """Row number -> what the README says it should end as."""
    return {int(row[0]): row[2] for row in _readme_table(readme, "Row")}


def _clean(fields, earlier):
    return (
        len(fields) == 5
        and fields[0].strip() != ""
        and _day_first_date(fields[1]) is not None
        and (_euro_amount(fields[2]) or 0) > 0
        and fields[3] == "Paid"
        and ";".join(fields) not in earlier
    )


class TestMessyFile:
    def test_encoding_is_windows_1252_not_utf8(self):
        raw = MESSY_CSV.read_bytes()
        with pytest.raises(UnicodeDecodeError):
            raw.decode("utf-8")
        text = raw.decode("cp1252")
        assert "Pépinière Lefèvre" in text and "€" in text
        # Apart from the euro sign (0x80), the bytes read the same as ISO-8859-1.
        assert raw.replace(b"\x80", b"").decode("latin-1") == text.replace("€", "")

    def test_header_delimiter_and_line_endings(self):
        raw = MESSY_CSV.read_bytes()
        assert raw.count(b"\r\n") == raw.count(b"\n")
        lines = _messy_lines()
        assert lines[0] == MESSY_HEADER
        assert 35 <= len(lines) - 1 <= 45
        assert all(line == "" or ";" in line for line in lines)

    def test_day_first_is_settled_and_european_money_present(self):
        lines = _messy_lines()[1:]
        fields = [line.split(";") for line in lines if line]
        assert any(int(f[1][:2]) > 12 for f in fields if re.fullmatch(r"\d\d/\d\d/\d{4}", f[1]))
        assert any(re.fullmatch(r"\d{1,3}\.\d{3},\d\d €", f[2]) for f in fields)

    def test_readme_lists_each_messy_row_correctly(self, messy_claims):
        lines = _messy_lines()
        for row, claim in messy_claims.items():
            line = lines[row - 1]
            fields = line.split(";")
            if claim == "excluded: blank line":
                assert line == ""
            elif claim == "excluded: missing customer":
                assert len(fields) == 5 and fields[0].strip() == ""
            elif claim == "excluded: amount not a number":
                assert len(fields) == 5 and _euro_amount(fields[2]) is None
            elif claim == "excluded: date not a date":
                assert len(fields) == 5 and _day_first_date(fields[1]) is None
            elif claim == "excluded: cancelled":
                assert fields[3] == "Cancelled"
            elif claim == "excluded: too many fields":
                assert len(fields) > 5
            elif match := re.fullmatch(r"excluded: duplicate of row (\d+)", claim):
                original = int(match.group(1))
                assert original < row and lines[original - 1] == line
            elif match := re.fullmatch(r"used: netted into (INV-\d+) \(row (\d+)\)", claim):
                invoice, target = match.group(1), int(match.group(2))
                assert fields[3] == "Refunded" and fields[4] == invoice
                assert _euro_amount(fields[2]) < 0
                assert lines[target - 1].split(";")[4] == invoice
            else:
                pytest.fail(f"row {row}: README outcome not understood: {claim!r}")

    def test_readme_covers_every_kind_of_mess(self, messy_claims):
        kinds = {re.sub(r" (of row \d+|\(.*\)|INV-\d+.*)$", "", c) for c in messy_claims.values()}
        assert kinds == {
            "excluded: blank line", "excluded: missing customer", "excluded: amount not a number",
            "excluded: date not a date", "excluded: cancelled", "excluded: too many fields",
            "excluded: duplicate", "used: netted into",
        }

    def test_rows_not_listed_are_clean(self, messy_claims):
        lines = _messy_lines()
        earlier = set()
        for row, line in enumerate(lines[1:], start=2):
            if row not in messy_claims:
                assert _clean(line.split(";"), earlier), f"row {row} is messy but not listed: {line!r}"
            earlier.add(line)

    def test_cleaned_result_matches_readme(self, messy_claims, readme):
        # Plain rules: unlisted rows are orders; "netted" rows reduce their invoice.
        lines = _messy_lines()
        orders = {}
        for row, line in enumerate(lines[1:], start=2):
            fields = line.split(";")
            if row not in messy_claims:
                orders[fields[4]] = [fields[0], _euro_amount(fields[2])]
        for row, claim in messy_claims.items():
            if claim.startswith("used: netted into"):
                fields = lines[row - 1].split(";")
                orders[fields[4]][1] += _euro_amount(fields[2])
        per_customer = {}
        for customer, value in orders.values():
            count, total = per_customer.get(customer, (0, Decimal(0)))
            per_customer[customer] = (count + 1, total + value)

        stated = {row[0]: (int(row[1]), Decimal(row[2])) for row in _readme_table(readme, "Customer")}
        assert per_customer == stated
        headline = re.search(r"(\d+) orders from (\d+) customers, total ([\d.]+)", readme)
        assert int(headline.group(1)) == len(orders) == sum(c for c, _ in stated.values())
        assert int(headline.group(2)) == len(per_customer)
        assert Decimal(headline.group(3)) == sum(v for _, v in orders.values())
        # Most customers are repeat customers, so the file exercises the forecasts.
        assert sum(c >= 2 for c, _ in per_customer.values()) >= 6

    def test_accented_trade_client_is_among_the_used_orders(self, messy_claims):
        lines = _messy_lines()
        used = [row for row, line in enumerate(lines[1:], start=2)
                if row not in messy_claims and line.startswith("Pépinière Lefèvre;")]
        assert len(used) >= 2
