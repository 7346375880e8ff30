"""Reading order exports: formats, money, dates, order lines, refunds and the row account."""

from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from forecasting import OrderDataError, read_orders
from forecasting.reading import REASONS, parse_dates, parse_money

HEADER = "customer,order date,amount\n"


def read_text(text: str, **options):
    return read_orders(text.encode("utf-8"), file_name="orders.csv", **options)


def assert_accounted(result) -> None:
    """Every row read is either used or excluded with a known reason."""
    assert result.rows_used + len(result.excluded) == result.rows_read
    assert set(result.excluded["reason_code"]) <= set(REASONS)
    assert result.excluded["row"].is_unique


class TestFormats:
    def test_utf8_with_bom(self):
        data = ("\ufeff" + HEADER + "C1,2025-01-02,10\nC2,2025-01-03,20\n").encode("utf-8")
        result = read_orders(data, file_name="bom.csv")
        assert result.mapping.customer == "customer"
        assert result.orders["order_value"].tolist() == [10.0, 20.0]

    def test_latin1_and_semicolons(self):
        text = "Kunde;Datum;Betrag\nPépinière;2025-01-02;10,50\nC2;2025-01-03;20,00\n"
        result = read_orders(text.encode("latin-1"), file_name="latin.csv", customer="Kunde", date="Datum",
                             value="Betrag")
        assert "Pépinière" in set(result.orders["customer"])
        assert sorted(result.orders["order_value"]) == [10.5, 20.0]
        assert any("UTF-8" in note for note in result.notes)

    def test_tab_separated(self):
        text = "customer\torder date\tamount\nC1\t2025-01-02\t10\nC2\t2025-01-03\t20\n"
        result = read_text(text)
        assert len(result.orders) == 2

    def test_excel_and_parquet_give_the_same_orders_as_csv(self, tmp_path):
        frame = pd.DataFrame({"Customer": ["C1", "C2", "C1"], "Order Date": ["2025-01-02", "2025-02-03",
                                                                               "2025-03-04"],
                              "Total": [10.5, 20.0, 30.25]})
        from_csv = read_orders(frame.to_csv(index=False).encode(), file_name="o.csv").orders
        frame.to_excel(tmp_path / "o.xlsx", index=False)
        frame.assign(**{"Order Date": pd.to_datetime(frame["Order Date"])}).to_parquet(tmp_path / "o.parquet")
        for name in ["o.xlsx", "o.parquet"]:
            other = read_orders(tmp_path / name).orders
            pd.testing.assert_frame_equal(other[["customer", "order_date", "order_value"]],
                                          from_csv[["customer", "order_date", "order_value"]])

    def test_a_binary_file_named_csv_is_refused(self):
        with pytest.raises(OrderDataError, match=r"file 'photo.csv'.*not a text table"):
            read_orders(b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR", file_name="photo.csv")

    def test_an_xlsx_name_without_a_workbook_is_refused(self):
        with pytest.raises(OrderDataError, match=r"named like an Excel workbook"):
            read_orders(b"a,b,c\n", file_name="orders.xlsx")

    def test_empty_file(self):
        with pytest.raises(OrderDataError, match="the file is empty"):
            read_orders(b"", file_name="empty.csv")


class TestRfc4180Quoting:
    """RFC 4180 section 2: fields with commas, double quotes or line breaks are enclosed in double quotes,
    and a double quote inside is escaped by doubling it."""

    def test_commas_quotes_and_newlines_inside_fields(self):
        text = ('customer,order date,amount,product\r\n'
                '"Smith, Jo",2025-01-02,"1,234.50","Pot ""large"", terracotta"\r\n'
                '"Line\r\nbreak",2025-01-03,10,"two\nlines"\r\n'
                'C3,2025-01-04,5,plain\r\n')
        result = read_text(text)
        assert result.orders["customer"].tolist() == ["Smith, Jo", "Line\r\nbreak", "C3"]
        assert result.orders["order_value"].tolist() == [1234.5, 10.0, 5.0]
        # Row numbers count records, as a spreadsheet shows them, not physical lines.
        assert result.orders["row"].tolist() == [2, 3, 4]
        assert_accounted(result)

    def test_a_row_with_an_extra_field_is_reported_with_its_row_number(self):
        text = HEADER + "C1,2025-01-02,10\nC2,2025-01-03,20,oops\nC3,2025-01-04,30\n"
        result = read_text(text)
        bad = result.excluded[result.excluded["reason_code"] == "malformed_row"]
        assert bad["row"].tolist() == [3]
        assert result.orders["customer"].tolist() == ["C1", "C3"]
        assert_accounted(result)

    def test_an_unclosed_quote_is_reported_with_its_row_and_the_rest_is_read(self):
        # The quote on row 3 is never closed: the csv module would read every later row into one cell.
        text = HEADER + 'C1,2025-01-02,10\n"C2,2025-01-03,20\nC3,2025-01-04,30\nC4,2025-01-05,40\n'
        result = read_text(text)
        assert result.excluded[["row", "reason_code"]].values.tolist() == [[3, "unclosed_quote"]]
        assert result.orders["customer"].tolist() == ["C1", "C3", "C4"]
        assert_accounted(result)

    def test_an_unclosed_quote_closed_by_a_later_quoted_cell(self):
        # The stray quote pairs with the opening quote of row 5's product: rows 4 and 5 are whole rows
        # of their own inside what would be one cell, so row 3 is the unclosed quote.
        text = ("customer,order date,amount,product\nC1,2025-01-02,10,pot\nC2,2025-01-03,\"20,trowel\n"
                "C3,2025-01-04,30,saucer\nC4,2025-01-05,40,\"twine, 50m\"\n")
        result = read_text(text)
        assert result.excluded[["row", "reason_code"]].values.tolist() == [[3, "unclosed_quote"]]
        assert result.orders["customer"].tolist() == ["C1", "C3", "C4"]
        assert_accounted(result)


class TestMoney:
    @pytest.mark.parametrize("text, expected", [
        ("1234.5", 1234.5), ("$1,234.50", 1234.5), ("USD 12", 12.0), ("(12.00)", -12.0), ("-$24.00", -24.0),
        ("$-24.00", -24.0), ("24.00-", -24.0), ("€ 7", 7.0), ("12", 12.0), ("0.99", 0.99),
    ])
    def test_point_decimal_forms(self, text, expected):
        assert parse_money(pd.Series([text, "1.50"])).iloc[0] == pytest.approx(expected)

    @pytest.mark.parametrize("text, expected", [("1.234,50 €", 1234.5), ("12,5", 12.5), ("-3,25", -3.25),
                                                ("1.000", 1000.0)])
    def test_decimal_comma_is_detected_for_the_whole_column(self, text, expected):
        assert parse_money(pd.Series([text, "2,75"])).iloc[0] == pytest.approx(expected)

    def test_thousands_comma_when_nothing_says_otherwise(self):
        assert parse_money(pd.Series(["1,234", "2,000"])).tolist() == [1234.0, 2000.0]

    def test_override_decimal_comma(self):
        assert parse_money(pd.Series(["1,234"]), decimal=",").tolist() == [1.234]

    def test_a_column_mixing_decimal_comma_and_point_is_an_error_naming_the_option(self):
        with pytest.raises(OrderDataError, match=r"row 3, column 'amount'.*decimal comma and a decimal point"
                                                 r".*decimal mark") as raised:
            read_text(HEADER + "C1,2025-01-02,\"12,50\"\nC2,2025-01-03,13.75\n")
        assert raised.value.option == "decimal"

    def test_unreadable_values_become_missing_and_non_finite_too(self):
        parsed = parse_money(pd.Series(["n/a", "inf", "nan", "1e308", "abc", "5"]))
        assert parsed.isna().tolist() == [True, True, True, False, True, False]

    def test_several_currencies_need_a_choice(self):
        text = HEADER + "C1,2025-01-02,$10\nC2,2025-01-03,€20\nC3,2025-01-04,$30\n"
        with pytest.raises(OrderDataError, match=r"several currencies \(EUR, USD\).*for example EUR") as raised:
            read_text(text)
        assert raised.value.option == "currency"
        result = read_text(text, currency="USD")
        assert result.orders["order_value"].tolist() == [10.0, 30.0]
        assert result.excluded["reason_code"].tolist() == ["other_currency"]

    def test_currency_column_decides_the_currency(self):
        text = "customer,date,amount,currency\nC1,2025-01-02,10,EUR\nC2,2025-01-03,20,GBP\n"
        with pytest.raises(OrderDataError, match="several currencies"):
            read_text(text)
        assert read_text(text, currency="GBP").orders["customer"].tolist() == ["C2"]

    def test_a_wrong_value_column_is_an_error_not_a_pile_of_exclusions(self):
        text = HEADER + "".join(f"C{i},2025-01-0{i},widget\n" for i in range(1, 8))
        with pytest.raises(OrderDataError, match=r"row 2, column 'amount': most amounts.*found 'widget'") as raised:
            read_text(text)
        assert raised.value.role == "value"


class TestDates:
    def test_iso_with_and_without_time(self):
        dates = parse_dates(pd.Series(["2025-03-14 10:22", "2025-03-15", "2025-03-16T08:00:00Z"]))
        assert dates.dt.day.tolist() == [14, 15, 16]

    def test_day_first_settled_by_a_value_and_said_so(self):
        notes = []
        dates = parse_dates(pd.Series(["03/04/2025", "25/04/2025"]), notes=notes, row_numbers=np.array([2, 3]))
        assert dates.dt.month.tolist() == [4, 4]
        assert notes == ["Dates in 'date' read day-first because row 3 has '25/04/2025'."]

    def test_month_first_settled_by_a_value(self):
        dates = parse_dates(pd.Series(["03/04/2025", "04/25/2025 13:05"]))
        assert dates.dt.month.tolist() == [3, 4]
        assert dates.iloc[1] == pd.Timestamp("2025-04-25 13:05")

    def test_unsettled_dates_ask_for_the_option(self):
        with pytest.raises(OrderDataError, match=r"row 2, column 'order date'.*no value settles"
                                                 r".*day-first or month-first") as raised:
            read_text(HEADER + "C1,03/04/2025,10\nC2,05/06/2025,20\n")
        assert raised.value.option == "date_order"

    def test_the_option_settles_them(self):
        result = read_text(HEADER + "C1,03/04/2025,10\nC2,05/06/2025,20\n", date_order="month-first")
        assert result.orders["order_date"].dt.month.tolist() == [3, 5]

    def test_contradicting_dates_are_an_error(self):
        with pytest.raises(OrderDataError, match="mix day-first and month-first"):
            parse_dates(pd.Series(["25/04/2025", "04/25/2025"]))

    def test_written_out_dates_and_two_digit_years(self):
        dates = parse_dates(pd.Series(["14 Mar 2025", "March 15, 2025", "16.03.25"]), date_order="day-first")
        assert dates.dt.strftime("%Y-%m-%d").tolist() == ["2025-03-14", "2025-03-15", "2025-03-16"]


class TestOrderLinesAndRefunds:
    LINES = ("order,customer,date,amount,status\n"
             "A1,C1,2025-01-02,10.00,paid\n"
             "A1,C1,2025-01-02,15.00,paid\n"
             "A1,C1,2025-01-09,-5.00,refunded\n"
             "A2,C2,2025-01-03,20.00,paid\n"
             "A2,C2,2025-01-05,20.00,refunded\n"
             "A3,C2,2025-01-04,8.00,Cancelled\n"
             "A4,C-TEST,2025-01-04,8.00,test\n"
             "A5,C3,2025-01-06,0,paid\n"
             "A9,C3,2025-01-07,-4,refunded\n")

    def test_lines_become_orders_and_refunds_net(self):
        result = read_text(self.LINES)
        assert result.orders[["order_id", "order_value"]].values.tolist() == [["A1", 20.0]]
        # The refund's later date does not move the order date.
        assert result.orders["order_date"].iloc[0] == pd.Timestamp("2025-01-02")
        reasons = dict(zip(result.excluded["row"], result.excluded["reason_code"]))
        # A2 is bought and refunded in full; A5 is an order of nothing (a zero amount, not a refund);
        # A9 is a refund whose purchase is not in the file.
        assert reasons == {5: "refunded_in_full", 6: "refunded_in_full", 7: "cancelled_order", 8: "test_order",
                           9: "zero_amount", 10: "unmatched_refund"}
        assert result.rows_used == 3
        assert_accounted(result)

    def test_without_order_ids_each_row_is_an_order(self):
        result = read_text(HEADER + "C1,2025-01-02,10\nC1,2025-01-02,12\n")
        assert len(result.orders) == 2

    def test_exact_duplicates_are_excluded_but_near_duplicates_kept(self):
        result = read_text(HEADER + "C1,2025-01-02,10\nC1,2025-01-02,10\nC1,2025-01-02,10.5\n")
        assert result.excluded["reason_code"].tolist() == ["duplicate_row"]
        assert result.excluded["row"].tolist() == [3]
        assert len(result.orders) == 2

    def test_missing_and_bad_cells_are_reported_row_by_row(self):
        text = HEADER + "C1,2025-01-02,10\n,2025-01-02,11\nC2,,12\nC3,2025-01-02,\nC4,2025-13-45,13\n" \
                        "C5,2025-01-02,n/a\n\nC6,2025-01-03,14\n"
        result = read_text(text)
        reasons = dict(zip(result.excluded["row"], result.excluded["reason_code"]))
        # "n/a" is a placeholder: no amount, not a bad one.
        assert reasons == {3: "missing_customer", 4: "missing_date", 5: "missing_amount", 6: "bad_date",
                           7: "missing_amount", 8: "blank_row"}
        assert result.orders["customer"].tolist() == ["C1", "C6"]
        assert_accounted(result)


class TestColumnMapping:
    def test_headers_in_other_words(self):
        text = "Client ID;Date;Amount;State;Invoice\nC1;2025-01-02;10,00;paid;I1\nC2;2025-01-03;5,50;paid;I2\n"
        mapping = read_text(text).mapping
        assert (mapping.customer, mapping.date, mapping.value, mapping.status, mapping.order_id) == \
            ("Client ID", "Date", "Amount", "State", "Invoice")

    def test_every_guess_can_be_overridden(self):
        text = "who,when,total,net\nC1,2025-01-02,10,8\nC2,2025-01-03,20,16\n"
        result = read_text(text, customer="who", date="when", value="net")
        assert result.orders["order_value"].tolist() == [8.0, 16.0]

    def test_an_unknown_override_names_the_columns(self):
        with pytest.raises(OrderDataError, match=r"no column named 'price' for the value.*'customer', 'order date'") \
                as raised:
            read_text(HEADER + "C1,2025-01-02,10\n", value="price")
        assert raised.value.role == "value"

    def test_an_unguessable_column_names_the_option(self):
        with pytest.raises(OrderDataError, match=r"which column holds the customer id") as raised:
            read_text("x,y,z\n1,2,3\n")
        assert raised.value.role == "customer"

    def test_content_guess_when_headers_say_nothing(self):
        text = "c1,c2,c3\n" + "".join(f"K{i % 3},2025-01-{i + 1:02d},{i + 1}.50\n" for i in range(9))
        mapping = read_text(text).mapping
        assert (mapping.customer, mapping.date, mapping.value) == ("c1", "c2", "c3")


# Generated messy files: the row account must balance whatever the file holds.
_cells = st.sampled_from(["C1", "C2", "c3", "", " ", "=cmd()", "Pépinière", "a,b", 'q"uote', "line\nbreak"])
_amounts = st.sampled_from(["10", "$1,234.50", "(5.00)", "-3", "0", "", "n/a", "1e308", "inf", "7.5", "12,5"])
_dates = st.sampled_from(["2025-01-02", "2025-13-45", "", "yesterday", "2024-12-31 23:59", "1850-01-01"])
_status = st.sampled_from(["paid", "refunded", "cancelled", "test", "", "PAID"])
_order = st.sampled_from(["A1", "A2", "A3", ""])


@st.composite
def messy_files(draw):
    rows = draw(st.lists(st.tuples(_order, _cells, _dates, _amounts, _status), min_size=1, max_size=30))
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(["order", "customer", "date", "amount", "status"])
    for record in rows:
        writer.writerow(record)
    text = buffer.getvalue()
    extra = draw(st.sampled_from(["", "\n", "A9,C1,2025-01-02,1,paid,extra\n", "A1,C1,2025-01-02,1,paid\n"]))
    return text + extra


class TestRowAccount:
    @settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(messy_files())
    def test_rows_used_plus_excluded_equals_rows_read(self, text):
        try:
            result = read_text(text)
        except OrderDataError as problem:
            # A whole-file problem is allowed, but it must say where.
            assert "file 'orders.csv'" in str(problem)
            return
        assert_accounted(result)
        physical_records = sum(1 for _ in csv.reader(io.StringIO(text))) - 1
        assert result.rows_read == physical_records
        assert (result.orders["order_value"] > 0).all()
        assert np.isfinite(result.orders["order_value"]).all()


class TestShippedFiles:
    """The demo files' expected outcomes are written down in demo_data/README.md; the reader must match them."""

    DEMO = Path(__file__).resolve().parents[1] / "demo_data"

    def test_messy_file_rows_end_as_documented(self):
        result = read_orders(self.DEMO / "messy_orders.csv")
        reasons = dict(zip(result.excluded["row"], result.excluded["reason_code"]))
        assert reasons == {10: "missing_customer", 13: "missing_amount", 15: "blank_row", 18: "duplicate_row",
                           20: "cancelled_order", 22: "bad_date", 28: "malformed_row"}
        assert len(result.orders) == 32 and result.orders["customer"].nunique() == 9
        assert result.orders["order_value"].sum() == pytest.approx(6109.64)
        netted = result.orders.set_index("order_id").loc["INV-0114"]
        assert netted["order_value"] == pytest.approx(42.75)
        assert netted["order_date"] == pd.Timestamp("2025-04-30")
        totals = result.orders.groupby("customer")["order_value"].sum()
        assert totals["Pépinière Lefèvre"] == pytest.approx(4699.50)
        assert_accounted(result)

    def test_demo_shop_file_accounts_for_every_row(self):
        result = read_orders(self.DEMO / "plant_shop_orders.csv")
        assert_accounted(result)
        reasons = dict(zip(result.excluded["row"], result.excluded["reason_code"]))
        assert reasons[5713] == "duplicate_row"
        assert reasons[7868] == "malformed_row"
        assert result.excluded["reason_code"].value_counts()["test_order"] == 4
        assert 1900 <= result.orders["customer"].nunique() <= 2100
