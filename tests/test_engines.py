"""The three engines give the same per-customer statistics and row account on the same file.

References used here, named beside each check:
* the pandas engine (``forecasting.reading`` + ``forecasting.customers``), itself tested
  against RFC 4180 and hand-worked examples in tests/test_reading.py and tests/test_customers.py;
* Python's ``statistics`` module (exact rational arithmetic) and ``decimal`` module for sums
  and sums of squares that floating point could get wrong;
* Python's ``csv`` module (an RFC 4180 reader) as the slow twin of the blank-line scan;
* ``forecasting.evaluation.evaluate_methods`` and ``forecasting.forecasts.forecast_customers``
  for the leave-one-out and forecasts run on a cluster.
"""

from __future__ import annotations

import csv
import importlib.util
import io
import math
import os
import statistics
from decimal import Decimal
from fractions import Fraction

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from forecasting.customers import customer_statistics
from forecasting.engines import ENGINES, check_engine, customer_statistics_from_file, measure_statistics_run
from forecasting.engines.rules import check_memory_limit, check_threads
from forecasting.engines.sources import scan_records
from forecasting.errors import OrderDataError
from forecasting.reading import read_orders

HAVE_DASK = importlib.util.find_spec("dask") is not None and importlib.util.find_spec("distributed") is not None
needs_dask = pytest.mark.skipif(not HAVE_DASK, reason="the dask engine needs dask and distributed "
                                "(pip install -r requirements-scale.txt)")


# ---------------------------------------------------------------------------
# A messy export of a small houseplant shop


def write_shop_export(path, *, lines=1500, seed=0, order_ids=True, segments=True, blank_every=97,
                      line_ending="\n"):
    """Order lines of an online houseplant shop with every kind of row the reader has a rule for."""
    rng = np.random.default_rng(seed)
    products = ["Monstera deliciosa", "Pot, terracotta 12cm", "Pruning shears", 'Fern "Boston"',
                "Peat-free compost", "Watering can\n(2 litre)"]
    channels = ["web", "market stall", "wholesale", ""]
    statuses = ["paid", "paid", "paid", "shipped", "Cancelled", "test", "refunded", "Paid "]
    rows = []
    order = 1000
    while len(rows) < lines:
        customer = f"C{rng.integers(0, 300):04d}"
        order += 1
        day = f"2024-{rng.integers(1, 13):02d}-{rng.integers(1, 29):02d}"
        if rng.random() < 0.3:
            day += f" {rng.integers(0, 24):02d}:{rng.integers(0, 60):02d}"
        channel = channels[rng.integers(0, len(channels))]
        for _ in range(rng.integers(1, 4)):
            value = float(np.round(np.exp(rng.normal(3.2, 0.8)), 2))
            row = [customer, str(order) if rng.random() < 0.9 else "", day, f"{value:.2f}",
                   statuses[rng.integers(0, len(statuses))], channel, products[rng.integers(0, len(products))]]
            u = rng.random()
            if u < 0.02:
                row[0] = ""  # missing customer
            elif u < 0.03:
                row[3] = "12.5.0"  # unreadable amount
            elif u < 0.04:
                row[3] = ""  # missing amount
            elif u < 0.045:
                row[2] = ""  # missing date
            elif u < 0.05:
                row[2] = "2025-02-30"  # no such day: unreadable date
            elif u < 0.07:
                row[3] = "-" + row[3]  # refund line
            elif u < 0.075:
                row[3] = str(int(value))  # whole number
            elif u < 0.08:
                row[0] = " " + row[0] + " "  # padded customer id
            rows.append(row)
            if rng.random() < 0.03:
                rows.append(list(row))  # exact duplicate
    out = io.StringIO()
    writer = csv.writer(out, lineterminator=line_ending)
    writer.writerow(["customer_id", "order_number", "order_date", "line_total", "status", "channel", "product"])
    for i, row in enumerate(rows):
        if not order_ids:
            row[1] = ""
        if not segments:
            row[5] = ""
        writer.writerow(row)
        if blank_every and i % blank_every == 5:
            out.write(line_ending)  # a blank line
    with open(path, "w", newline="", encoding="utf-8") as handle:
        handle.write(out.getvalue())
    return path


def write_late_latin1(path):
    """UTF-8-looking orders whose last row is Windows-1252, past the part read to sniff the file."""
    lines = "".join(f"fern{i % 50},2025-03-01,{i % 90 + 1}.50\n" for i in range(12_000))
    path.write_bytes(("customer,order_date,order_value\n" + lines + "José,2025-03-02,4.00\n").encode("cp1252"))
    assert path.stat().st_size > 200_000
    return path


def pandas_engine(path, **options):
    result = read_orders(path, **options)
    return customer_statistics(result.orders), result.audit()


def assert_same_statistics(left: pd.DataFrame, right: pd.DataFrame):
    """Same customers, same columns and types, numbers within 1e-9 relative."""
    assert list(left.columns) == list(right.columns)
    assert left.index.equals(right.index)
    pd.testing.assert_frame_equal(left, right, check_exact=False, rtol=1e-9, atol=0.0)


def assert_same_account(left: dict, right: dict):
    keys = ["rows_read", "rows_used", "rows_excluded", "orders", "customers", "excluded", "noted",
            "unrecognised_statuses", "mapping", "notes"]
    assert {k: left[k] for k in keys} == {k: right[k] for k in keys}
    assert left["rows_read"] == left["rows_used"] + left["rows_excluded"]


DEMO_SHOP = os.path.join(os.path.dirname(__file__), os.pardir, "demo_data", "plant_shop_orders.csv")


def assert_demo_shop_read_as_the_pandas_reader(engine, **options):
    """demo_data/plant_shop_orders.csv (money written as $1,234.50, row 7868 with an unquoted comma):
    the same statistics, account and rows left out as the pandas reader."""
    stats, account = customer_statistics_from_file(DEMO_SHOP, engine=engine, list_rows=True, **options)
    expected_stats, expected_account = customer_statistics_from_file(DEMO_SHOP, list_rows=True)
    assert_same_statistics(stats, expected_stats)
    assert_same_account(account, expected_account)
    rows = account["excluded_rows"][["row", "reason_code"]].values.tolist()
    assert rows == expected_account["excluded_rows"][["row", "reason_code"]].values.tolist()
    assert [7868, "malformed_row"] in rows and [5713, "duplicate_row"] in rows


@pytest.fixture(scope="module")
def shop_export(tmp_path_factory):
    return write_shop_export(tmp_path_factory.mktemp("shop") / "houseplant_orders.csv")


@pytest.fixture(scope="module")
def shop_parquet(shop_export):
    """The same export as a Parquet file with typed columns (dates, floats, empty cells)."""
    cells = pd.read_csv(shop_export, dtype=str, keep_default_na=False)
    frame = pd.DataFrame({
        "customer_id": cells["customer_id"].where(cells["customer_id"] != "", None),
        "order_number": cells["order_number"],
        "order_date": pd.to_datetime(cells["order_date"], errors="coerce", format="ISO8601"),
        "line_total": pd.to_numeric(cells["line_total"], errors="coerce"),
        "status": cells["status"],
        "channel": cells["channel"],
    })
    path = shop_export.parent / "houseplant_orders.parquet"
    frame.to_parquet(path, index=False)
    return path


# ---------------------------------------------------------------------------


class TestCheckEngine:
    def test_known_names(self):
        assert [check_engine(name) for name in ENGINES] == ["pandas", "duckdb", "dask"]

    def test_unknown_name_names_the_option_and_value(self):
        with pytest.raises(OrderDataError, match=r"unknown engine.*'spark'.*pandas, duckdb or dask"):
            check_engine("spark")


class TestCheckMemoryLimit:
    @pytest.mark.parametrize("text", ["2GB", "500MB", "1.5GiB", " 64 mb "])
    def test_accepts_amounts(self, text):
        assert check_memory_limit(text) == text.strip()

    @pytest.mark.parametrize("text", ["lots", "2", "-1GB", 2_000_000, None])
    def test_refuses_other_values_naming_the_option(self, text):
        with pytest.raises(OrderDataError, match="memory_limit must be an amount"):
            check_memory_limit(text)


def test_whitespace_is_what_python_strips():
    # The duckdb engine strips exactly what str.strip() strips; the list is written out in the rules.
    from forecasting.engines.rules import WHITESPACE

    assert WHITESPACE == "".join(chr(code) for code in range(0x110000) if chr(code).isspace())
    assert ("x" + WHITESPACE + "x").strip(WHITESPACE) == ("x" + WHITESPACE + "x").strip()


class TestCheckThreads:
    def test_none_and_whole_numbers(self):
        assert check_threads(None) is None
        assert check_threads(3) == 3

    @pytest.mark.parametrize("value", [0, -2, 1.5, "2", True])
    def test_refuses_the_rest(self, value):
        with pytest.raises(OrderDataError, match=r"threads must be a whole number.*got"):
            check_threads(value)


class TestCustomerStatisticsFromFile:
    def test_pandas_engine_is_the_default(self, shop_export):
        stats, account = customer_statistics_from_file(shop_export)
        expected_stats, expected_account = pandas_engine(shop_export)
        assert_same_statistics(stats, expected_stats)
        assert account == expected_account

    def test_hand_worked_example(self, tmp_path):
        # Worked by hand: fern orders 24 and 36 -> mean 30, squared deviations 36 + 36 = 72.
        path = tmp_path / "orders.csv"
        path.write_text("customer,order_date,order_value\nfern,2025-03-01,24.00\nfern,2025-04-02,36.00\n"
                        "ivy,2025-03-05,80.00\n")
        for engine in [e for e in ENGINES if e != "dask"]:
            stats, account = customer_statistics_from_file(path, engine=engine)
            assert stats.loc["fern", "mean"] == 30.0
            assert stats.loc["fern", "sum_sq_dev"] == pytest.approx(72.0, rel=1e-12)
            assert account["rows_used"] == 3

    def test_unknown_engine_is_refused_before_reading(self, tmp_path):
        with pytest.raises(OrderDataError, match="unknown engine") as raised:
            customer_statistics_from_file(tmp_path / "missing.csv", engine="spark")

    def test_pandas_engine_reads_one_file(self, tmp_path, shop_export):
        for name in ("a.csv", "b.csv"):
            (tmp_path / name).write_bytes(open(shop_export, "rb").read())
        with pytest.raises(OrderDataError, match=r"one file at a time \(2 were given\).*duckdb or dask engine"):
            customer_statistics_from_file(str(tmp_path / "*.csv"))


def refusals_of_both_engines(path, match):
    """The errors with which the pandas and the duckdb engines refuse ``path`` (both must match)."""
    problems = []
    for engine in ("pandas", "duckdb"):
        with pytest.raises(OrderDataError, match=match) as raised:
            customer_statistics_from_file(path, engine=engine)
        problems.append(raised.value)
    return problems


class TestCustomerStatisticsDuckdb:
    def test_the_demo_shop_as_the_pandas_reader(self):
        assert_demo_shop_read_as_the_pandas_reader("duckdb")

    @pytest.mark.parametrize("seed,order_ids,segments,line_ending", [
        (0, True, True, "\n"), (1, False, True, "\r\n"), (2, True, False, "\n")])
    def test_same_as_pandas_on_a_messy_export(self, tmp_path, seed, order_ids, segments, line_ending):
        path = write_shop_export(tmp_path / "orders.csv", seed=seed, order_ids=order_ids, segments=segments,
                                 line_ending=line_ending)
        stats, account = customer_statistics_from_file(path, engine="duckdb", memory_limit="500MB", threads=2)
        expected_stats, expected_account = pandas_engine(path)
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)
        # The export really has every kind of row (else the comparison proves little).
        assert {"blank_row", "duplicate_row", "missing_customer", "test_order", "cancelled_order",
                "missing_amount", "bad_amount", "missing_date", "bad_date"} <= set(account["excluded"])
        if order_ids:
            assert {"unmatched_refund", "refunded_in_full"} <= set(account["excluded"])

    def test_cents_that_only_appear_late_in_the_file_are_kept(self, tmp_path):
        # 60,000 whole numbers first, then amounts with cents: a type guess on the first
        # rows would read the column as whole numbers.
        rng = np.random.default_rng(5)
        whole = rng.integers(1, 200, 60_000).astype(str)
        cents = np.char.mod("%.2f", rng.integers(100, 20_000, 3_000) / 100.0)
        values = np.concatenate([whole, cents])
        customers = np.char.add("C", rng.integers(0, 500, len(values)).astype(str))
        frame = pd.DataFrame({"order_id": np.arange(len(values)), "customer": customers,
                              "order_date": "2025-05-01", "order_value": values})
        path = tmp_path / "late_cents.csv"
        frame.to_csv(path, index=False)
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        # Exact decimal sum per customer (Python's decimal module) against the engine's total.
        exact = {}
        for who, text in zip(customers, values):
            exact[who] = exact.get(who, Decimal(0)) + Decimal(text)
        totals = stats["total"]
        assert account["rows_used"] == len(values)
        assert all(abs(Decimal(float(totals[who])) - exact[who]) < Decimal("1e-6") for who in exact)
        assert sum(exact.values()) % 1 != 0  # the cents are there to be lost
        assert_same_statistics(stats, pandas_engine(path)[0])

    def test_spread_of_values_near_a_billion(self, tmp_path):
        # Wholesale orders of about 1e9 with a spread of a few units: sum(x^2) - n mean^2
        # cancels every digit; the two-pass sum of squares must match exact arithmetic.
        values = [1e9 + d for d in (0.25, 1.5, -2.0, 3.75, -0.5, 1.0)]
        lines = ["customer,order_date,order_value"] + [f"nursery-ltd,2025-01-{i + 1:02d},{v!r}"
                                                      for i, v in enumerate(values)]
        path = tmp_path / "big_orders.csv"
        path.write_text("\n".join(lines) + "\n")
        stats, _ = customer_statistics_from_file(path, engine="duckdb")
        # statistics.pvariance works in exact fractions (Python standard library).
        exact_ss = statistics.pvariance(values) * len(values)
        assert stats.loc["nursery-ltd", "sum_sq_dev"] == pytest.approx(exact_ss, rel=1e-9)
        naive = sum(v * v for v in values) - len(values) * statistics.fmean(values) ** 2
        assert naive != pytest.approx(exact_ss, rel=1e-3)  # the one-pass formula would fail here

    def test_one_pass_spreads_are_checked_against_exact_arithmetic(self, tmp_path):
        # duckdb's one-pass sums of squares are used only where their error bound is far below
        # 1e-9; the rest take the exact second pass. Customers from well-conditioned (spread of the
        # order of the mean) to ill-conditioned (1e9 +- 2, all orders equal) must all match exact
        # fractions (Python's fractions module) and the pandas engine.
        rng = np.random.default_rng(11)
        lines, exact = ["customer,order_date,order_value"], {}
        kinds = [(50.0, 30.0), (200.0, 1.0), (1e6, 5.0), (1e9, 2.0), (75.0, 0.0)]
        for c in range(150):
            centre, spread = kinds[c % len(kinds)]
            n = int(rng.integers(2, 60))
            values = [round(float(centre + spread * v), 2) if spread else centre for v in rng.standard_normal(n)]
            values = [v if v > 0 else 1.0 for v in values]
            name = f"grower-{c}"
            for i, v in enumerate(values):
                lines.append(f"{name},2025-{1 + i % 12:02d}-{1 + i % 28:02d},{v!r}")
            fractions = [Fraction(v) for v in values]
            mean = sum(fractions) / n
            exact[name] = float(sum((f - mean) ** 2 for f in fractions))
        path = tmp_path / "spreads.csv"
        path.write_text("\n".join(lines) + "\n")
        # A billion is far outside this shop's usual range: kept here, the arithmetic is the point.
        stats, _ = customer_statistics_from_file(path, engine="duckdb", threads=2, keep_implausible=True)
        for name, value in exact.items():
            got = stats.loc[name, "sum_sq_dev"]
            assert got == pytest.approx(value, rel=1e-9, abs=1e-18), name
        assert_same_statistics(stats, pandas_engine(path)[0])

    def test_spreads_without_a_second_pass_match_exact_arithmetic(self, tmp_path):
        # The cases the one pass answers alone: orders all of one value (no spread), two orders a
        # cent or a unit apart ((a - b)^2 / 2), and thousands of orders of a typical spread (kept
        # from the one pass). Checked against exact fractions of the stored numbers (Python's
        # fractions module), on the money and the log scale, and against the pandas engine.
        rng = np.random.default_rng(5)
        groups = {"same-price": [19.99] * 7, "same-tenth": [0.1] * 3, "cent-apart": [81.88, 81.89],
                  "unit-apart": [1e9, 1e9 + 1.0], "many-orders": [round(float(v), 2) for v in rng.lognormal(4, 0.8, 4000)]}
        lines = ["customer,order_date,order_value"]
        for name, values in groups.items():
            days = pd.date_range("2014-01-01", periods=len(values), freq="D").strftime("%Y-%m-%d")
            lines += [f"{name},{day},{v!r}" for day, v in zip(days, values)]  # no row is a copy of another
        path = tmp_path / "spreads.csv"
        path.write_text("\n".join(lines) + "\n")
        # A billion is far outside this shop's usual range: kept here, the arithmetic is the point.
        stats, _ = customer_statistics_from_file(path, engine="duckdb", threads=2, keep_implausible=True)

        def exact_ss(numbers):
            fractions = [Fraction(x) for x in numbers]
            mean = sum(fractions) / len(fractions)
            return float(sum((f - mean) ** 2 for f in fractions))

        for name, values in groups.items():
            assert stats.loc[name, "sum_sq_dev"] == pytest.approx(exact_ss(values), rel=1e-9, abs=0), name
            logs = [math.log(v) for v in values]
            assert stats.loc[name, "log_sum_sq_dev"] == pytest.approx(exact_ss(logs), rel=1e-9, abs=0), name
        assert stats.loc["same-price", "sum_sq_dev"] == 0.0 and stats.loc["same-tenth", "log_sum_sq_dev"] == 0.0
        assert_same_statistics(stats, pandas_engine(path, keep_implausible=True)[0])

    def test_formatted_money_as_the_pandas_reader(self, tmp_path):
        # Money text is read by the one amount rule (forecasting.io.rules.read_amount), as SQL here.
        path = tmp_path / "formatted.csv"
        path.write_text("customer,order_date,order_value\nfern,2025-03-01,24.00\n\n\n"
                        "ivy,2025-03-05,\"$1,234.50\"\nmoss,2025-03-06,($12.00)\nfern,2025-03-07,n/a\n")
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        expected_stats, expected_account = pandas_engine(path)
        assert stats.loc["ivy", "total"] == 1234.5
        assert account["excluded"] == {"blank_row": 2, "missing_amount": 1, "unmatched_refund": 1}
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)

    def test_decimal_comma_as_the_pandas_reader(self, tmp_path):
        # Only "3,5" settles the column: every amount is then read again with a decimal comma.
        path = tmp_path / "comma.csv"
        path.write_text("customer;order_date;order_value\nfern;2025-03-01;1.234\nivy;2025-03-02;3,5\n"
                        "moss;2025-03-03;12\n")
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        expected_stats, expected_account = pandas_engine(path)
        assert stats["total"].to_dict() == {"fern": 1234.0, "ivy": 3.5, "moss": 12.0}
        assert "Amounts in 'order_value' use a decimal comma (like 1.234,50)." in account["notes"]
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)
        path.write_text("customer;order_date;order_value\nfern;2025-03-01;3,5\nivy;2025-03-02;12.25\n")
        for problem in refusals_of_both_engines(path, "mix a decimal comma and a decimal point"):
            assert (problem.row, problem.option) == (3, "decimal")

    @pytest.mark.parametrize("date, read", [("14/03/2025", "2025-03-14"), ("March 14, 2025", "2025-03-14"),
                                            ("2025-02-30", None), ("2025-03-14T10:00:00+02:00", "2025-03-14 10:00"),
                                            ("45730", "2025-03-14")])
    def test_dates_as_the_pandas_reader(self, tmp_path, date, read):
        # Every date form of the one date rule, as SQL; a date with an offset stays the local date written.
        path = tmp_path / "dates.csv"
        path.write_text(f"customer,order_date,order_value\nfern,2025-03-01,24.00\nivy,\"{date}\",12.00\n")
        stats, account = customer_statistics_from_file(path, engine="duckdb", list_rows=True)
        expected_stats, expected_account = pandas_engine(path)
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)
        if read is None:
            assert account["excluded"] == {"bad_date": 1}
        else:
            assert stats.loc["ivy", "first_order"] == pd.Timestamp(read)

    def test_month_first_dates_are_read_again(self, tmp_path):
        # 04/25/2025 settles month-first: the engine reads every date again that way.
        path = tmp_path / "us_dates.csv"
        path.write_text("customer,order_date,order_value\nfern,03/04/2025,24.00\nivy,04/25/2025 1:05 PM,12.00\n")
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        expected_stats, expected_account = pandas_engine(path)
        assert stats.loc["fern", "first_order"] == pd.Timestamp("2025-03-04")
        assert stats.loc["ivy", "first_order"] == pd.Timestamp("2025-04-25 13:05")
        assert "Dates in 'order_date' read month-first because row 3 has '04/25/2025 1:05 PM'." in account["notes"]
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)

    def test_whole_file_problems_match_the_pandas_reader(self, tmp_path):
        path = tmp_path / "wrong_column.csv"
        path.write_text("customer,order_date,order_value\n" + "".join(
            f"c{i},2025-01-0{i % 9 + 1},{'unknown' if i % 3 else '12.5'}\n" for i in range(12)))
        for engine in ("pandas", "duckdb"):
            with pytest.raises(OrderDataError, match="most amounts in this column cannot be read") as raised:
                customer_statistics_from_file(path, engine=engine)
            assert raised.value.row == 3

    def test_currencies_as_the_pandas_reader(self, tmp_path):
        path = tmp_path / "currencies.csv"
        path.write_text("customer,order_date,order_value,currency\nfern,2025-03-01,24.00,EUR\n"
                        "ivy,2025-03-05,12.00,GBP\nfern,2025-03-09,30.00,eur \n")
        for problem in refusals_of_both_engines(path, r"several currencies \(EUR, GBP\)"):
            assert problem.row == 3
        stats, account = customer_statistics_from_file(path, engine="duckdb", currency="EUR")
        expected_stats, expected_account = pandas_engine(path, currency="EUR")
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)
        assert account["excluded"] == {"other_currency": 1}

    def test_currencies_named_in_the_amounts_as_the_pandas_reader(self, tmp_path):
        # No currency column: the amounts name them. The row without a customer is left out
        # before currencies are looked at, so its dollar sign does not count.
        path = tmp_path / "named.csv"
        path.write_text("customer,order_date,order_value\nfern,2025-03-01,24.00\n,2025-03-02,$5.00\n"
                        "ivy,2025-03-05,EUR 12.00\nmoss,2025-03-06,\nfern,2025-03-09,\u00a330.00\n")
        for problem in refusals_of_both_engines(path, r"several currencies \(EUR, GBP\)"):
            assert (problem.row, problem.column) == (6, "order_value")
        path.write_text("customer,order_date,order_value\nfern,2025-03-01,24.00\n,2025-03-02,$5.00\n"
                        "ivy,2025-03-05, EUR 12.00\n")
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        expected_stats, expected_account = pandas_engine(path)
        assert stats.loc["ivy", "total"] == 12.0
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)

    def test_only_exact_copies_are_duplicates(self, tmp_path):
        # Rows that read as the same customer, amount and date but differ in any cell (the amount's
        # text, spacing, another column) are different rows; only the cell-for-cell copy is left out.
        path = tmp_path / "near_copies.csv"
        path.write_text("customer,order_date,order_value,product\n"
                        "fern,2025-03-01,24.00,fern pot\nfern,2025-03-01,24.00,fern pot\n"
                        "fern,2025-03-01,24.0,fern pot\nfern,2025-03-01,24.00,ivy pot\n"
                        "fern ,2025-03-01,24.00,fern pot\nfern,2025-03-01, 24.00,fern pot\n"
                        "ivy,2025-03-02,12.00,trowel\n")
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        expected_stats, expected_account = pandas_engine(path)
        assert account["excluded"] == {"duplicate_row": 1}
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)

    def test_oversized_cells_as_the_pandas_reader(self, tmp_path):
        path = write_long_cells(tmp_path / "long_cells.csv")
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        assert_long_cells_read_as_the_pandas_reader(path, stats, account)

    def test_customer_cells_with_edges_that_are_not_plain(self, tmp_path):
        # The quick tests read the customer cell's first and last character; cells that start or
        # end with a letter outside ASCII, with Unicode spaces, or are only spaces, take the full
        # rules of the pandas reader (Python's str.strip).
        path = tmp_path / "edges.csv"
        path.write_text("customer,order_date,order_value\n"
                        "Ñuñez,2025-03-01,24.00\n\u00a0fern\u00a0,2025-03-02,20.00\n\u3000ivy,2025-03-03,8.00\n"
                        "fern,2025-03-04,6.00\nivy\u3000,2025-03-05,5.00\n   ,2025-03-06,3.00\n"
                        "\u00a0,\u00a0, \nmossé,2025-03-07,2.50\n", encoding="utf-8")
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        expected_stats, expected_account = pandas_engine(path)
        assert stats["orders"].to_dict() == {"fern": 2, "ivy": 2, "mossé": 1, "Ñuñez": 1}
        assert account["excluded"] == {"missing_customer": 1, "blank_row": 1}
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)

    def test_order_lines_that_net_to_exactly_nothing(self, tmp_path):
        # 0.1 + 0.2 - 0.3 is 5.55e-17 when added in file order, 0 in another order: both engines add
        # an order's lines in file order, and both read what is below half a cent as nothing.
        path = tmp_path / "netting.csv"
        path.write_text("customer,order_id,order_date,order_value\nfern,A1,2025-03-01,0.1\n"
                        "fern,A1,2025-03-01,0.2\nfern,A1,2025-03-02,-0.3\nivy,B1,2025-03-05,5\n"
                        "ivy,B2,2025-03-06,5\nivy,B2,2025-03-06,-5\n")
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        expected_stats, expected_account = pandas_engine(path)
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)
        assert account["excluded"] == {"refunded_in_full": 5}

    def test_parquet_file(self, shop_parquet):
        stats, account = customer_statistics_from_file(shop_parquet, engine="duckdb")
        expected_stats, expected_account = pandas_engine(shop_parquet)
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)

    @pytest.mark.parametrize("delimiter", [";", "\t", "|"])
    def test_other_delimiters(self, tmp_path, shop_export, delimiter):
        cells = pd.read_csv(shop_export, dtype=str, keep_default_na=False)
        path = tmp_path / "orders.txt"
        cells.to_csv(path, sep=delimiter, index=False)
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        expected_stats, expected_account = pandas_engine(path)
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)
        assert account["notes"] and "separated" in account["notes"][0]

    def test_parquet_whole_numbers_with_gaps(self, tmp_path):
        # A whole-number customer id with empty cells is read by pandas as decimals ("12.0").
        import pyarrow as pa
        import pyarrow.parquet as pq

        table = pa.table({"customer": pa.array([12, None, 7, 12], pa.int64()),
                          "order_date": pa.array(pd.to_datetime(["2025-01-01", "2025-01-02", None, "2025-01-04"])),
                          "order_value": pa.array([10.0, 5.0, 3.0, None]),
                          "first_time": pa.array([True, None, False, True])})
        path = tmp_path / "gaps.parquet"
        pq.write_table(table, path)
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        expected_stats, expected_account = pandas_engine(path)
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)
        assert list(stats.index) == ["12.0"]

    def test_several_files_are_one_table(self, tmp_path, shop_export):
        text = open(shop_export, encoding="utf-8", newline="").read()
        header, body = text.split("\n", 1)
        lines = body.split("\n")
        cut = len(lines) // 2
        # Cut between records (not inside a quoted field): find a line that starts a record.
        while lines[cut].count('"') % 2 or not lines[cut].startswith("C"):
            cut += 1
        (tmp_path / "orders_1.csv").write_text(header + "\n" + "\n".join(lines[:cut]) + "\n", newline="")
        (tmp_path / "orders_2.csv").write_text(header + "\n" + "\n".join(lines[cut:]), newline="")
        stats, account = customer_statistics_from_file(str(tmp_path / "orders_*.csv"), engine="duckdb")
        expected_stats, expected_account = pandas_engine(shop_export)
        assert_same_statistics(stats, expected_stats)
        # A header is not a row: the two files hold the same rows as the one export.
        assert_same_account(account, expected_account)

    def test_messages_name_the_file_and_its_own_row(self, tmp_path):
        # Several files: a row number counts within its own file (header = row 1).
        header = "customer,order_date,order_value\n"
        (tmp_path / "orders_1.csv").write_text(header + "fern,2025-03-01,24.00\nivy,2025-03-02,12.00\n")
        (tmp_path / "orders_2.csv").write_text(header + "moss,2025-03-03,5.00\nfern,2025-03-04,EUR 8.00\n"
                                               "ivy,2025-03-05,\"$1,234.50\"\n")
        with pytest.raises(OrderDataError, match=r"several currencies \(EUR, USD\)") as raised:
            customer_statistics_from_file(str(tmp_path / "orders_*.csv"), engine="duckdb")
        assert raised.value.row == 4 and "orders_2.csv" in str(raised.value.file)
        assert raised.value.value == "$1,234.50"  # read again from its file: the engine keeps no cells

    def test_messages_from_parquet_name_the_row_and_the_value(self, tmp_path):
        import pyarrow as pa
        import pyarrow.parquet as pq

        dates = ["2025-03-01"] * 40 + ["03/04/2025"] + ["2025-03-02"] * 9
        table = pa.table({"customer": [f"c{i % 7}" for i in range(50)], "order_date": dates,
                          "order_value": [12.5] * 50})
        path = tmp_path / "orders.parquet"
        pq.write_table(table, path, row_group_size=16)  # the odd date sits in the third row group
        with pytest.raises(OrderDataError, match="no value settles") as raised:
            customer_statistics_from_file(path, engine="duckdb")
        assert raised.value.row == 42 and raised.value.value == "03/04/2025"  # header = row 1
        assert raised.value.option == "date_order"

    def test_copies_across_files_and_wide_rows(self, tmp_path):
        # A copy in a later file of a row in an earlier one is left out; in a wide export a row
        # differing from another only in its last cell (a column no role reads) is kept.
        names = [f"note_{i}" for i in range(30)]
        header = "customer,order_date,order_value," + ",".join(names) + "\n"
        notes = ",".join(f"n{i}" for i in range(30))
        last_differs = ",".join(f"n{i}" for i in range(29)) + ",other"
        first = f"fern,2025-03-01,24.00,{notes}\nivy,2025-03-02,12.00,{notes}\n"
        second = f"moss,2025-03-03,5.00,{notes}\nfern,2025-03-01,24.00,{notes}\nivy,2025-03-02,12.00,{last_differs}\n"
        (tmp_path / "orders_1.csv").write_text(header + first)
        (tmp_path / "orders_2.csv").write_text(header + second)
        (tmp_path / "together.csv").write_text(header + first + second)
        stats, account = customer_statistics_from_file(str(tmp_path / "orders_*.csv"), engine="duckdb")
        expected_stats, expected_account = pandas_engine(tmp_path / "together.csv")
        assert account["excluded"] == {"duplicate_row": 1}
        assert stats.loc["ivy", "orders"] == 2 and stats.loc["fern", "orders"] == 1
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)

    def test_files_with_different_columns_are_refused(self, tmp_path):
        (tmp_path / "a.csv").write_text("customer,order_date,order_value\nfern,2025-03-01,24.00\n")
        (tmp_path / "b.csv").write_text("customer,order_date,order_value,status\nivy,2025-03-01,4.00,paid\n")
        with pytest.raises(OrderDataError, match="different columns"):
            customer_statistics_from_file(str(tmp_path / "*.csv"), engine="duckdb")

    def test_rows_that_do_not_split_are_reported_and_the_rest_used(self, tmp_path):
        # duckdb's reader refuses the file; a careful copy sets the rows aside with their numbers.
        path = write_ragged(tmp_path / "ragged.csv")
        stats, account = customer_statistics_from_file(path, engine="duckdb", list_rows=True)
        assert_ragged_read_as_the_pandas_reader(path, stats, account)

    def test_text_that_is_not_utf8_as_the_pandas_reader(self, tmp_path):
        path = tmp_path / "latin1.csv"
        path.write_bytes("customer,order_date,order_value\nJosé,2025-03-01,24.00\n".encode("cp1252"))
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        assert list(stats.index) == ["José"]
        assert_same_account(account, pandas_engine(path)[1])
        assert "The file is not UTF-8; read it as Windows-1252 (Western European)." in account["notes"]

    def test_text_that_stops_being_utf8_late_in_the_file(self, tmp_path):
        path = write_late_latin1(tmp_path / "late_latin1.csv")
        stats, account = customer_statistics_from_file(path, engine="duckdb")
        expected_stats, expected_account = pandas_engine(path)
        assert "José" in stats.index
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)

    def test_no_usable_orders(self, tmp_path):
        path = tmp_path / "cancelled.csv"
        path.write_text("customer,order_date,order_value,status\nfern,2025-03-01,24.00,cancelled\n")
        with pytest.raises(OrderDataError, match="no usable orders.*cancelled"):
            customer_statistics_from_file(path, engine="duckdb")

    def test_options_are_checked_before_reading(self, tmp_path):
        missing = tmp_path / "missing.csv"
        with pytest.raises(OrderDataError, match="memory_limit"):
            customer_statistics_from_file(missing, engine="duckdb", memory_limit="plenty")
        with pytest.raises(OrderDataError, match="threads"):
            customer_statistics_from_file(missing, engine="duckdb", threads=0)
        with pytest.raises(OrderDataError, match="temp_directory is not a folder"):
            customer_statistics_from_file(missing, engine="duckdb", temp_directory=tmp_path / "nowhere")
        with pytest.raises(OrderDataError, match="decimal mark must be") as raised:
            customer_statistics_from_file(missing, engine="duckdb", decimal=";")
        assert raised.value.option == "decimal"
        with pytest.raises(OrderDataError, match="not Excel sheets"):
            customer_statistics_from_file(missing, engine="duckdb", sheet="Orders")

    def test_working_files_are_removed(self, tmp_path, shop_export):
        spill = tmp_path / "spill"
        spill.mkdir()
        customer_statistics_from_file(shop_export, engine="duckdb", temp_directory=spill, memory_limit="100MB")
        assert list(spill.iterdir()) == []

    def test_input_file_is_not_changed(self, shop_export):
        before = open(shop_export, "rb").read()
        customer_statistics_from_file(shop_export, engine="duckdb")
        assert open(shop_export, "rb").read() == before


class TestScanRecords:
    @staticmethod
    def slow_twin(path):
        """Blank records and non-blank data records by Python's csv module (RFC 4180)."""
        with open(path, newline="", encoding="utf-8") as handle:
            records = list(csv.reader(handle))
        blank = [i for i, record in enumerate(records) if i > 0 and record == []]
        return blank, len(records) - 1 - len(blank)

    def test_quoted_line_breaks_are_not_blank_lines(self, tmp_path):
        path = tmp_path / "quoted.csv"
        path.write_bytes(b'a,b\n1,"x\n\ny"\n\n2,3\r\n\r\n"4",""""\n')
        blank, records = scan_records(str(path))
        assert (blank.tolist(), records) == self.slow_twin(path) == ([2, 4], 3)

    def test_no_blank_line_needs_no_scan(self, tmp_path):
        path = tmp_path / "plain.csv"
        path.write_text("a,b\n1,2\n3,4\n")
        blank, records = scan_records(str(path))
        assert blank.tolist() == [] and records is None

    @settings(max_examples=200, deadline=None)
    @given(text=st.lists(st.sampled_from(["a", ",", "\n", "\r", "\r\n"]), max_size=14).map("".join),
           chunk=st.integers(1, 5))
    def test_the_empty_line_check_sees_across_block_edges(self, tmp_path_factory, text, chunk):
        # The quick check reads the file in blocks; an empty line (LF LF or LF CR LF) split over two
        # blocks must still be found. Reference: Python's own substring search on the whole text.
        from forecasting.engines import sources

        path = tmp_path_factory.mktemp("edges") / "rows.csv"
        path.write_bytes(text.encode("ascii"))
        with pytest.MonkeyPatch.context() as patch:
            patch.setattr(sources, "_FIND_CHUNK", chunk)
            assert sources._has_empty_line(str(path)) == ("\n\n" in text or "\n\r\n" in text)

    # Field text: letters, delimiters, quotes and line breaks (\n or \r\n; a lone \r is not a line break here).
    _field = st.lists(st.sampled_from(["a", "b", ",", '"', "\n", "\r\n", " "]), max_size=4).map("".join)

    @settings(max_examples=60, deadline=None)
    @given(rows=st.lists(st.one_of(st.just([]), st.lists(_field, min_size=2, max_size=2)), max_size=12),
           ending=st.sampled_from(["\n", "\r\n"]))
    def test_matches_the_csv_module(self, tmp_path_factory, rows, ending):
        path = tmp_path_factory.mktemp("scan") / "rows.csv"
        out = io.StringIO()
        writer = csv.writer(out, lineterminator=ending)
        writer.writerow(["a", "b"])
        for row in rows:
            writer.writerow(row)
        path.write_bytes(out.getvalue().encode("utf-8"))
        blank, records = scan_records(str(path))
        twin_blank, twin_records = self.slow_twin(path)
        assert blank.tolist() == twin_blank
        if records is not None:
            assert records == twin_records


@pytest.fixture(scope="module")
def cluster():
    if not HAVE_DASK:
        pytest.skip("the dask engine needs dask and distributed (pip install -r requirements-scale.txt)")
    from forecasting.engines.dask_engine import cluster_client

    with cluster_client(workers=2, processes=False) as client:
        yield client


def write_long_cells(path):
    """A cell over the limit (counted in characters) leaves its row out as oversized_field; a row
    whose cells only add up to more than the limit, and a cell of more bytes than the limit but
    fewer characters (two-byte letters), are kept."""
    limit = 100_000  # the pandas reader's MAX_FIELD_CHARS
    path.write_text("customer,order_date,order_value,note,extra\n"
                    f"fern,2025-03-01,24.00,{'x' * (limit + 1)},\n"
                    f"fern,2025-03-02,20.00,{'y' * 60_000},{'z' * 60_000}\n"
                    f"moss,2025-03-05,12.00,{'é' * 60_000},\n"
                    "ivy,2025-03-05,12.00,ok,\n", encoding="utf-8")
    return path


def write_ragged(path):
    """A row with an extra field (an unquoted comma), one with a field too few, and an unclosed quote."""
    path.write_text("customer,order_date,order_value,product\n"
                    "fern,2025-03-01,24.00,fern pot\n"
                    "ivy,2025-03-05,12.00,Fern, Boston 14cm pot\n"
                    "moss,2025-03-06,7.50\n"
                    "fern,2025-03-07,\"9.00,trowel\n"
                    "ivy,2025-03-08,6.00,saucer\n"
                    "moss,2025-03-09,5.00,\"twine, 50m\"\n", encoding="utf-8")
    return path


def assert_ragged_read_as_the_pandas_reader(path, stats, account):
    expected_stats, expected_account = pandas_engine(path)
    assert account["excluded"] == {"malformed_row": 2, "unclosed_quote": 1}
    assert account["excluded_rows"][["row", "reason_code"]].values.tolist() == [
        [3, "malformed_row"], [4, "malformed_row"], [5, "unclosed_quote"]]
    assert stats["orders"].to_dict() == {"fern": 1, "ivy": 1, "moss": 1}
    assert_same_statistics(stats, expected_stats)
    assert_same_account(account, expected_account)


def assert_long_cells_read_as_the_pandas_reader(path, stats, account):
    expected_stats, expected_account = pandas_engine(path)
    assert account["excluded"] == {"oversized_field": 1}
    assert stats["orders"].to_dict() == {"fern": 1, "ivy": 1, "moss": 1}
    assert_same_statistics(stats, expected_stats)
    assert_same_account(account, expected_account)


@needs_dask
class TestCustomerStatisticsDask:
    def test_the_demo_shop_as_the_pandas_reader(self, cluster):
        assert_demo_shop_read_as_the_pandas_reader("dask", scheduler=cluster)

    def test_oversized_cells_as_the_pandas_reader(self, cluster, tmp_path):
        path = write_long_cells(tmp_path / "long_cells.csv")
        stats, account = customer_statistics_from_file(path, engine="dask", scheduler=cluster)
        assert_long_cells_read_as_the_pandas_reader(path, stats, account)

    def test_same_as_pandas_over_several_partitions(self, cluster, shop_export):
        from forecasting.engines.dask_engine import customer_statistics_dask

        stats, account = customer_statistics_dask(shop_export, scheduler=cluster, blocksize=None)
        expected_stats, expected_account = pandas_engine(shop_export)
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)

    def test_small_blocks_of_a_file_without_quoted_line_breaks(self, cluster, tmp_path):
        path = write_shop_export(tmp_path / "orders.csv", seed=3, lines=800)
        text = open(path, encoding="utf-8").read().replace("Watering can\n(2 litre)", "Watering can (2 litre)")
        open(path, "w", encoding="utf-8").write(text)
        stats, account = customer_statistics_from_file(path, engine="dask", scheduler=cluster)
        from forecasting.engines.dask_engine import customer_statistics_dask

        small_stats, small_account = customer_statistics_dask(path, scheduler=cluster, blocksize="8KB")
        expected_stats, expected_account = pandas_engine(path)
        for got_stats, got_account in ((stats, account), (small_stats, small_account)):
            assert_same_statistics(got_stats, expected_stats)
            assert_same_account(got_account, expected_account)

    def test_formatted_money_as_the_pandas_reader(self, cluster, tmp_path):
        path = tmp_path / "formatted.csv"
        path.write_text("customer,order_date,order_value\nfern,2025-03-01,24.00\n\n\n"
                        "ivy,2025-03-05,\"$1,234.50\"\nmoss,2025-03-06,n/a\n")
        stats, account = customer_statistics_from_file(path, engine="dask", scheduler=cluster)
        expected_stats, expected_account = pandas_engine(path)
        assert stats.loc["ivy", "total"] == 1234.5 and "moss" not in stats.index
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)

    def test_row_numbers_in_messages_count_across_partitions(self, cluster, tmp_path):
        body = "".join(f"fern{i % 40},2025-03-01,€{i % 90 + 1}.50\n" + ("\n" if i % 97 == 3 else "")
                       for i in range(3000))
        path = tmp_path / "late_dollars.csv"
        path.write_text("customer,order_date,order_value\n" + body + "ivy,2025-03-05,\"$1,234.50\"\n")
        row = len(path.read_text().splitlines())  # the last line of the file
        from forecasting.engines.dask_engine import customer_statistics_dask

        with pytest.raises(OrderDataError, match="several currencies") as raised:
            customer_statistics_dask(path, scheduler=cluster, blocksize="8KB")
        assert (raised.value.row, raised.value.value) == (row, "$1,234.50")
        with pytest.raises(OrderDataError, match="several currencies") as raised:
            customer_statistics_from_file(path, engine="duckdb")
        assert (raised.value.row, raised.value.value) == (row, "$1,234.50")

    def test_rows_that_do_not_split_are_reported_and_the_rest_used(self, cluster, tmp_path):
        path = write_ragged(tmp_path / "ragged.csv")
        stats, account = customer_statistics_from_file(path, engine="dask", scheduler=cluster, list_rows=True)
        assert_ragged_read_as_the_pandas_reader(path, stats, account)

    def test_parquet_file(self, cluster, shop_parquet):
        stats, account = customer_statistics_from_file(shop_parquet, engine="dask", scheduler=cluster)
        expected_stats, expected_account = pandas_engine(shop_parquet)
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)

    def test_text_that_stops_being_utf8_late_in_the_file(self, cluster, tmp_path):
        path = write_late_latin1(tmp_path / "late_latin1.csv")
        stats, account = customer_statistics_from_file(path, engine="dask", scheduler=cluster)
        expected_stats, expected_account = pandas_engine(path)
        assert_same_statistics(stats, expected_stats)
        assert_same_account(account, expected_account)

    def test_bad_scheduler_address(self):
        with pytest.raises(OrderDataError, match="scheduler must be an address"):
            customer_statistics_from_file("orders.csv", engine="dask", scheduler="localhost")


@pytest.fixture(scope="module")
def shop_on_cluster(cluster, shop_export):
    from forecasting.engines.dask_engine import read_on_cluster

    shop = read_on_cluster(shop_export, client=cluster, blocksize=None)
    orders = read_orders(shop_export).orders
    return shop, orders


@needs_dask
class TestReadOnCluster:
    def test_orders_stay_on_the_cluster_one_customer_per_partition(self, shop_on_cluster):
        shop, orders = shop_on_cluster
        parts = shop.client.gather(shop.order_parts)
        seen = [set(part["customer"]) for part in parts]
        assert sum(len(s) for s in seen) == len(set().union(*seen)) == orders["customer"].nunique()
        assert sum(len(part) for part in parts) == len(orders)


@needs_dask
class TestLeaveOneOutOnCluster:
    def test_same_as_the_evaluation_module(self, shop_on_cluster):
        from forecasting.engines.dask_engine import leave_one_out_on_cluster
        from forecasting.evaluation import EXACT_METHODS, EXACT_VARIANCES, evaluate_methods

        shop, orders = shop_on_cluster
        table = leave_one_out_on_cluster(shop)
        expected = evaluate_methods(orders, methods=list(EXACT_METHODS), variances=list(EXACT_VARIANCES),
                                    bootstrap=0)
        pd.testing.assert_frame_equal(table, expected.leave_one_out, check_exact=False, rtol=1e-9)
        assert table.attrs["held_out"] == expected.held_out
        assert (table["sse"] > 0).all()

    def test_methods_needing_every_order_are_refused(self, shop_on_cluster):
        from forecasting.engines.dask_engine import leave_one_out_on_cluster

        with pytest.raises(OrderDataError, match=r"exact closed-form methods only.*pandas engine") as raised:
            leave_one_out_on_cluster(shop_on_cluster[0], methods="mta-cv", variances="log")
        assert raised.value.option == "engine"


@needs_dask
class TestForecastOnCluster:
    @pytest.mark.parametrize("method,variance", [("mta", "classic"), ("empirical-bayes", "log"),
                                                 ("gamma-gamma", "classic")])
    def test_same_as_forecast_customers(self, shop_on_cluster, method, variance):
        from forecasting.engines.dask_engine import forecast_on_cluster
        from forecasting.forecasts import forecast_customers

        shop, orders = shop_on_cluster
        table = forecast_on_cluster(shop, method=method, variance=variance)
        expected = forecast_customers(customer_statistics(orders), method=method, variance=variance)
        pd.testing.assert_frame_equal(table, expected, check_exact=False, rtol=1e-9)

    def test_automatic_choice_among_the_exact_methods(self, shop_on_cluster):
        from forecasting.engines.dask_engine import forecast_on_cluster
        from forecasting.evaluation import EXACT_METHODS, EXACT_VARIANCES, choose_method

        shop, orders = shop_on_cluster
        table = forecast_on_cluster(shop, method="auto")
        chosen = choose_method(orders, methods=list(EXACT_METHODS), variances=list(EXACT_VARIANCES))
        assert (table["method"].iloc[0], table["variance"].iloc[0]) == (chosen["method"], chosen["variance"])
        assert "among the exact closed-form methods" in table.attrs["fit"]["auto_choice"]


class TestMeasureStatisticsRun:
    def test_reports_what_the_run_found(self, shop_export):
        measured = measure_statistics_run(os.fspath(shop_export), engine="duckdb", memory_limit="200MB")
        _, account = pandas_engine(shop_export)
        assert measured["engine"] == "duckdb"
        assert measured["customers"] == account["customers"]
        assert measured["rows_read"] == account["rows_read"]
        assert measured["peak_memory_mb"] > 0 and measured["seconds"] > 0

    def test_the_peak_is_the_runs_own_not_the_callers(self, shop_export):
        # A fresh process started by a big one: Linux keeps the caller's ru_maxrss across exec, so
        # the run's peak is read from its own high-water mark (VmHWM in /proc/self/status).
        if not os.path.exists("/proc/self/status"):
            pytest.skip("VmHWM is a Linux figure")
        held = np.ones(100_000_000)  # 800 MB resident in this process
        measured = measure_statistics_run(os.fspath(shop_export), engine="duckdb", memory_limit="200MB")
        assert held.sum() == 100_000_000
        assert measured["peak_memory_mb"] < 700

    def test_a_failed_run_reports_its_message(self, tmp_path):
        # The child's own function, run here: a failure comes back as a message, not a hang.
        import queue

        from forecasting.engines.measure import _child

        answers = queue.Queue()
        _child(answers, os.fspath(tmp_path / "missing.csv"), {"engine": "duckdb"})
        assert "the file does not exist" in answers.get_nowait()["error"]


# ---------------------------------------------------------------------------
# One rule set, two backends: the SQL built from a rule computes what the rule computes over Arrow


def run_both_backends(rule, values, **options):
    """``rule`` (a function of forecasting.io.rules) over ``values``, with the Arrow backend and as
    duckdb SQL: both results as lists."""
    import duckdb
    import pyarrow as pa

    from forecasting.io.backends import ArrowOps, SqlOps

    def listed(out, n):
        out = out if isinstance(out, dict) else {"value": out}
        return {k: (v.to_pylist() if hasattr(v, "to_pylist") else [v] * n) for k, v in out.items()}

    by_arrow = listed(rule(ArrowOps(), pa.array(values, type=pa.string()), **options), len(values))
    ops = SqlOps()
    out = rule(ops, ops.column("cell"), **options)
    out = out if isinstance(out, dict) else {"value": out}
    connection = duckdb.connect()
    table = pa.table({"n": pa.array(range(len(values))), "cell": pa.array(values, type=pa.string())})
    connection.register("cells", table)
    columns = ", ".join(f"{ops.full_column(v).text} AS \"{k}\"" for k, v in out.items())
    rows = connection.execute(f"SELECT {columns} FROM ({ops.query('SELECT * FROM cells')}) ORDER BY n").fetchall()
    by_sql = {k: [r[i] for r in rows] for i, k in enumerate(out)}
    return by_arrow, by_sql


_PIECES = {
    "amount": ["$", "C$", "A$", "€", "£", "USD", "eur", "EUR ", "kr", " ", "-", "\u2212", "(", ")", "1", "12", "0",
               "1,234", ".", ",", "50", "999", "1e3", "inc VAT", "TBD", "n/a", "abc", "'", "\u00a0", "+", "7"],
    "date": ["2025", "-", "/", ".", "03", "3", "14", "25", "02", "30", "T", " ", "10:22", ":05", "Z", "+01:00",
             "-0500", "Mar", "March", "Fri, ", "PM", "am", "45660", ".5", "1970", "2052", "12", "13"],
    "customer": ["Fern", "fern", "@", "example.com", "\u200b", " ", "\u00a0", "C-001", "É", "\ufeff", "x"],
    "status": ["wc-", "paid", "Pending", "on-hold", "Cancelled", " by customer", "refund", "partially ", "test",
               "draft", "checkout-", "", " ", "Awaiting pickup", "trash", "shipped", "-"],
}


def _texts(kind):
    return st.lists(st.lists(st.sampled_from(_PIECES[kind]), max_size=6).map("".join), min_size=1, max_size=40)


class TestOneRuleSetTwoBackends:
    @settings(max_examples=60, deadline=None)
    @given(_texts("amount"), st.sampled_from([".", ","]))
    def test_amounts(self, values, decimal):
        from forecasting.io import rules

        by_arrow, by_sql = run_both_backends(rules.read_amount, values, decimal=decimal)
        assert by_arrow == by_sql

    @settings(max_examples=60, deadline=None)
    @given(_texts("date"), st.sampled_from(["day-first", "month-first"]))
    def test_dates(self, values, date_order):
        from forecasting.io import rules

        by_arrow, by_sql = run_both_backends(rules.read_date, values, date_order=date_order)
        assert by_arrow == by_sql

    @settings(max_examples=60, deadline=None)
    @given(_texts("customer"))
    def test_customer_ids(self, values):
        from forecasting.io import rules

        by_arrow, by_sql = run_both_backends(rules.read_customer, values)
        assert by_arrow == by_sql

    @settings(max_examples=60, deadline=None)
    @given(_texts("status"))
    def test_statuses_and_currency_cells(self, values):
        from forecasting.io import rules

        for rule in (rules.classify_status, rules.currency_of_cell):
            by_arrow, by_sql = run_both_backends(rule, values)
            assert by_arrow == by_sql
