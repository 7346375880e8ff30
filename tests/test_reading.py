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


# ---------------------------------------------------------------------------
# Real exports, read as a careful bookkeeper would (the corpus in tests/corpus/ holds a file of each)


def account_of(text: str, **options):
    result = read_text(text, **options)
    assert_accounted(result)
    return result, dict(zip(result.excluded["row"], result.excluded["reason_code"]))


class TestOrderTotals:
    def test_line_amounts_are_taken_over_an_order_total_repeated_on_every_line(self):
        # Adding the repeated order total once per line would count order W1 twice (80 instead of 40).
        text = ("Order,Date,Customer,Product,Line Total,Order Total\n"
                "W1,2025-03-01,C1,Fern,12.00,40.00\nW1,2025-03-01,C1,Pot,28.00,40.00\n"
                "W2,2025-03-02,C2,Trowel,15.50,15.50\n")
        result, reasons = account_of(text)
        assert result.mapping.value == "Line Total"
        assert result.orders["order_value"].sum() == pytest.approx(55.50)
        assert any("'Order Total' holds the order's total" in note for note in result.notes)

    def test_an_order_total_given_on_the_first_line_is_counted_once(self):
        text = ("Name,Email,Created at,Total,Lineitem name\n#1,fern@example.com,2025-05-01,54.00,Monstera\n"
                "#1,fern@example.com,2025-05-01,,Pot\n#2,ivy@example.com,2025-05-02,19.99,Fern\n")
        result, reasons = account_of(text)
        assert reasons == {}
        assert result.orders["order_value"].tolist() == [54.0, 19.99]
        assert result.noted[["row", "note_code"]].values.tolist() == [[3, "continuation_line"]]
        assert result.audit()["noted"] == {"continuation_line": 1}

    def test_an_order_with_lines_left_out_before_it_is_grouped_is_still_accounted(self):
        # The pairs of customer and order id are numbered over every row; the row without a customer
        # (no line of any order) names a pair that no line of an order has.
        text = ("order,customer,date,amount,status\n" + "A1,C1,2025-01-02,10,paid\n" * 7
                + "A1,C1,2025-01-02,,paid\nA1,,2025-01-02,10,paid\n")
        result, reasons = account_of(text)
        assert reasons == {3: "duplicate_row", 4: "duplicate_row", 5: "duplicate_row", 6: "duplicate_row",
                           7: "duplicate_row", 8: "duplicate_row", 10: "missing_customer"}
        assert result.orders["order_value"].tolist() == [10.0]


class TestStatuses:
    @pytest.mark.parametrize("status, reason", [
        ("pending", "unpaid_order"), ("failed", "unpaid_order"), ("draft", "unpaid_order"),
        ("checkout-draft", "unpaid_order"), ("on-hold", "unpaid_order"), ("wc-on-hold", "unpaid_order"),
        ("trash", "cancelled_order"), ("wc-cancelled", "cancelled_order"), ("Cancelled by customer", "cancelled_order"),
        ("Canceled - customer request", "cancelled_order"), ("wc-refunded", "refunded_order"),
        ("wc-failed", "unpaid_order"), ("TEST", "test_order"), ("Paid", None), ("wc-completed", None),
        ("Partially refunded", None)])
    def test_status_words_by_stem_whatever_the_case_or_prefix(self, status, reason):
        result, reasons = account_of(f"customer,order date,amount,status\nC1,2025-01-02,10,{status}\n"
                                     "C2,2025-01-03,20,paid\n")
        assert reasons.get(2) == reason

    def test_unpaid_orders_are_kept_when_asked(self):
        result, reasons = account_of("customer,order date,amount,status\nC1,2025-01-02,10,pending\n"
                                     "C2,2025-01-03,20,paid\n", keep_unpaid=True)
        assert reasons == {} and result.audit()["noted"] == {"unpaid_kept": 1}

    def test_every_status_not_recognised_is_listed_with_its_rows(self):
        result, reasons = account_of("customer,order date,amount,status\nC1,2025-01-02,10,Awaiting pickup\n"
                                     "C2,2025-01-03,20,Gift\nC1,2025-01-04,30,Awaiting pickup\nC2,2025-01-05,5,paid\n")
        audit = result.audit()
        assert audit["unrecognised_statuses"] == {"Awaiting pickup": 2, "Gift": 1}
        assert audit["noted"] == {"unrecognised_status": 3}
        assert any("'Awaiting pickup' (2 rows), 'Gift' (1 row)" in note for note in audit["notes"])

    @pytest.mark.parametrize("rows, reason", [
        ("A1,C1,2025-01-02,0,paid\n", "zero_amount"),
        ("A1,C1,2025-01-02,35.00,Refunded\n", "refunded_order"),
        ("A1,C1,2025-01-02,-35.00,refunded\n", "unmatched_refund"),
        ("A1,C1,2025-01-02,35.00,paid\nA1,C1,2025-01-09,-35.00,refunded\n", "refunded_in_full")])
    def test_reasons_say_what_happened(self, rows, reason):
        result, reasons = account_of("order,customer,date,amount,status\n" + rows + "A9,C9,2025-02-01,10,paid\n")
        assert set(reasons.values()) == {reason}


class TestAmounts:
    @pytest.mark.parametrize("placeholder", ["abc", "TBD", "NaN", "nil", "n/a", "-", "N/A", "?"])
    def test_placeholders_are_missing_amounts_not_currencies(self, placeholder):
        # With amounts in dollars, a three-letter word is not a second currency.
        result, reasons = account_of(f"customer,order date,amount\nC1,2025-01-02,$10.00\nC2,2025-01-03,{placeholder}\n"
                                     "C3,2025-01-04,$12.00\n")
        assert reasons == {3: "missing_amount"}

    def test_money_with_tax_words_is_money(self):
        result, reasons = account_of("customer,order date,amount\nC1,2025-01-02,£12.00 inc VAT\nC2,2025-01-03,£8.00\n")
        assert result.orders["order_value"].tolist() == [12.0, 8.0]

    def test_thousands_commas_with_the_decimal_point_chosen(self):
        assert parse_money(pd.Series(["$1,204.50", "1,100", "12,5"]), decimal=".").tolist()[:2] == [1204.5, 1100.0]
        assert np.isnan(parse_money(pd.Series(["12,5"]), decimal=".").iloc[0])

    def test_refunds_written_with_the_minus_sign(self):
        assert parse_money(pd.Series(["\u221212.50", "\u201312.50", "12.50"])).tolist() == [-12.5, -12.5, 12.5]

    @pytest.mark.parametrize("symbol, code", [("C$", "CAD"), ("CA$", "CAD"), ("A$", "AUD"), ("US$", "USD"),
                                              ("$", "USD"), ("NZ$", "NZD"), ("€", "EUR"), ("£", "GBP")])
    def test_each_currency_symbol_is_its_own_currency(self, symbol, code):
        result, _ = account_of(f"customer,order date,amount\nC1,2025-01-02,{symbol}12.00\nC2,2025-01-03,12.00\n",
                               currency=code)
        assert len(result.orders) == 2

    @pytest.mark.parametrize("amount, chosen, code", [
        ("C$12.00", None, "CAD"), ("£12.00 inc VAT", None, "GBP"), ("\"12,00 €\"", None, "EUR"), ("USD 12", None, "USD"),
        ("12.00", None, ""), ("12.00", "eur", "EUR"), ("€12.00", "€", "EUR")])
    def test_the_result_names_its_currency(self, amount, chosen, code):
        # The currency of the rows used, as an ISO 4217 code, for the front ends to show amounts with.
        result, _ = account_of(f"customer,order date,amount\nC1,2025-01-02,{amount}\nC2,2025-01-03,8\n",
                               currency=chosen)
        assert result.currency == code

    def test_c_dollars_and_dollars_are_two_currencies(self):
        with pytest.raises(OrderDataError, match=r"several currencies \(CAD, USD\)") as raised:
            read_text("customer,order date,amount\nC1,2025-01-02,C$12.00\nC2,2025-01-03,$12.00\n")
        assert raised.value.option == "currency"


class TestLocalDates:
    @pytest.mark.parametrize("written, local", [
        ("2025-03-01T00:30:00+01:00", "2025-03-01 00:30"), ("2025-03-02 23:30:00 -0500", "2025-03-02 23:30"),
        ("2025-03-03T12:00:00Z", "2025-03-03 12:00"), ("Fri, 14 Mar 2025 10:00:00 GMT", "2025-03-14 10:00")])
    def test_dates_with_an_offset_stay_the_local_date_written(self, written, local):
        assert parse_dates(pd.Series([written])).iloc[0] == pd.Timestamp(local)

    def test_a_time_zone_aware_parquet_file_keeps_local_time_too(self, tmp_path):
        stamps = pd.Series(pd.to_datetime(["2025-02-28 23:30", "2025-03-01 12:00"]).tz_localize("UTC")
                           .tz_convert("Europe/Paris"))
        frame = pd.DataFrame({"customer": ["C1", "C2"], "order_date": stamps, "amount": [10.0, 20.0]})
        frame.to_parquet(tmp_path / "tz.parquet")
        csv_text = "customer,order_date,amount\nC1,2025-03-01T00:30:00+01:00,10\nC2,2025-03-01T13:00:00+01:00,20\n"
        from_parquet = read_orders(tmp_path / "tz.parquet").orders["order_date"].tolist()
        assert from_parquet == read_text(csv_text).orders["order_date"].tolist()
        assert from_parquet[0] == pd.Timestamp("2025-03-01 00:30")

    def test_excel_day_numbers_are_read_and_said_so(self):
        result, reasons = account_of("customer,order date,amount\nC1,45660,10\nC2,2025-01-05,20\n")
        assert result.orders.set_index("customer").loc["C1", "order_date"] == pd.Timestamp("2025-01-03")
        assert result.noted[["row", "note_code"]].values.tolist() == [[2, "excel_serial_date"]]


class TestImplausibleValues:
    ORDINARY = "".join(f"C{i % 4},2025-02-{i + 1:02d},{v}\n"
                       for i, v in enumerate(["24.00", "31.50", "18.25", "42.00", "27.80", "35.10", "22.40"]))

    def test_a_typo_thousands_of_times_the_usual_order_is_left_out_and_shown_first(self):
        result, reasons = account_of("customer,order date,amount\nC9,2025-02-01,\n" + self.ORDINARY
                                     + "C1,2025-02-20,124999\n")
        assert reasons == {2: "missing_amount", 10: "implausible_amount"}
        assert result.excluded["reason_code"].tolist() == ["implausible_amount", "missing_amount"]
        assert list(result.audit()["excluded"]) == ["implausible_amount", "missing_amount"]

    def test_the_typo_no_longer_moves_other_customers_forecasts(self):
        # The median forecast of the other customers is what it is without the typo row at all.
        from forecasting.customers import customer_statistics
        from forecasting.forecasts import forecast_customers

        with_typo = read_text("customer,order date,amount\n" + self.ORDINARY + "C1,2025-02-20,124999\n")
        without = read_text("customer,order date,amount\n" + self.ORDINARY)
        pd.testing.assert_frame_equal(forecast_customers(customer_statistics(with_typo.orders)),
                                      forecast_customers(customer_statistics(without.orders)))

    def test_kept_when_asked_and_noted(self):
        result, reasons = account_of("customer,order date,amount\n" + self.ORDINARY + "C1,2025-02-20,124999\n",
                                     keep_implausible=True)
        assert reasons == {} and result.audit()["noted"] == {"implausible_kept": 1}

    def test_the_demo_shops_bulk_orders_stay_in(self):
        result = read_orders(Path(__file__).resolve().parents[1] / "demo_data" / "plant_shop_orders.csv")
        values = result.orders["order_value"]
        assert "implausible_amount" not in set(result.excluded["reason_code"])
        # The trade customers' bulk orders: up to about a hundred times the median order, all kept.
        assert values.max() / values.median() > 50

    def test_dates_in_the_future_or_before_the_shop_could_exist(self):
        result, reasons = account_of("customer,order date,amount\nC1,2052-03-01,10\nC2,1970-01-01,20\n"
                                     "C3,2025-03-01,30\n")
        assert reasons == {2: "implausible_date", 3: "implausible_date"}
        assert result.orders["order_date"].max() == pd.Timestamp("2025-03-01")

    def test_no_nan_or_infinity_reaches_the_orders(self):
        result, reasons = account_of("customer,order date,amount\nC1,2025-03-01,1e308\nC1,2025-03-02,1e308\n"
                                     "C2,2025-03-03,inf\nC3,2025-03-04,12\n", keep_implausible=True)
        assert np.isfinite(result.orders["order_value"]).all()
        assert reasons == {2: "implausible_amount", 3: "implausible_amount", 4: "missing_amount"}


class TestCustomerIds:
    def test_e_mail_ids_in_other_capitals_or_with_invisible_characters_are_one_customer(self):
        result, reasons = account_of("Email,Created at,Total\nFern@Example.com,2025-01-02,10\n"
                                     "fern@example.com,2025-01-03,20\nfern\u200b@example.com,2025-01-04,30\n")
        assert result.orders["customer"].unique().tolist() == ["fern@example.com"]
        assert result.noted[["row", "note_code"]].values.tolist() == [[3, "merged_customer_id"],
                                                                      [4, "merged_customer_id"]]

    def test_ids_that_are_not_e_mails_keep_their_capitals(self):
        result, _ = account_of("customer,order date,amount\nC-001,2025-01-02,10\nc-001,2025-01-03,20\n")
        assert sorted(result.orders["customer"]) == ["C-001", "c-001"]


class TestFileShapes:
    def test_title_lines_above_the_header(self):
        result, reasons = account_of("Fernhollow Plants - orders\nExported 2025-06-30\n\n"
                                     "Customer,Order Date,Order Total\nC1,2025-01-02,10\nC2,2025-01-03,20\n")
        assert result.orders["row"].tolist() == [5, 6]
        assert result.rows_read == 2

    def test_the_header_row_chosen(self):
        result, _ = account_of("Orders\n1,2,3\nCustomer,Order Date,Order Total\nC1,2025-01-02,10\n", header_row=3)
        assert result.orders["row"].tolist() == [4]

    @pytest.mark.parametrize("header_row, match", [(9, "no row 9"), (0, "a row number, 1 or more"),
                                                   ("3", "a row number")])
    def test_a_header_row_that_cannot_be_is_refused_naming_the_option(self, header_row, match):
        with pytest.raises(OrderDataError, match=match) as raised:
            read_text(HEADER + "C1,2025-01-02,10\n", header_row=header_row)
        assert raised.value.option == "header_row"

    def test_an_excel_separator_line(self):
        result, _ = account_of("sep=;\ncustomer;order date;amount\nC1;2025-01-02;10,50\n")
        assert result.orders["order_value"].tolist() == [10.5]
        assert result.orders["row"].tolist() == [2]

    def test_a_nul_byte_is_a_damaged_row_not_a_refused_file(self):
        data = HEADER.encode() + b"C1,2025-01-02,10\nC\x002,2025-01-03,20\nC3,2025-01-04,30\n"
        result = read_orders(data, file_name="orders.csv")
        assert dict(zip(result.excluded["row"], result.excluded["reason_code"])) == {3: "damaged_row"}
        assert not result.orders["customer"].str.contains("\x00").any()

    def test_orders_on_another_sheet_name_the_option_and_the_sheets(self, tmp_path):
        import openpyxl

        book = openpyxl.Workbook()
        book.active.title = "Summary"
        book.active.append(["Revenue", 120])
        orders = book.create_sheet("Orders")
        orders.append(["Customer", "Order Date", "Total"])
        orders.append(["C1", "2025-01-02", 10.5])
        book.save(tmp_path / "book.xlsx")
        with pytest.raises(OrderDataError, match=r"sheets 'Summary', 'Orders'") as raised:
            read_orders(tmp_path / "book.xlsx")
        assert raised.value.option == "sheet"
        with pytest.raises(OrderDataError, match=r"no sheet named 'Sales'.*'Summary', 'Orders'") as raised:
            read_orders(tmp_path / "book.xlsx", sheet="Sales")
        assert raised.value.option == "sheet"
        assert read_orders(tmp_path / "book.xlsx", sheet="orders").orders["order_value"].tolist() == [10.5]

    def test_formulas_saved_without_their_values(self, tmp_path):
        import openpyxl

        book = openpyxl.Workbook()
        book.active.append(["Customer", "Order Date", "Total"])
        book.active.append(["C1", "2025-01-02", "=2*5"])
        book.active.append(["C2", "2025-01-03", "=3*5"])
        book.save(tmp_path / "formulas.xlsx")
        with pytest.raises(OrderDataError, match="formula whose value was not saved.*save it again") as raised:
            read_orders(tmp_path / "formulas.xlsx")
        assert "--" not in str(raised.value)


class TestMessagesNameNoFlag:
    """Refusals name the option or column role (OrderDataError.role/option); the text never names a
    command-line flag: front ends add their own name for the control (OrderDataError.worded)."""

    @staticmethod
    def flagged_strings(path: Path):
        """``(function, text)`` of every string constant in a module (not docstrings) with ``--word``."""
        import ast
        import re

        tree = ast.parse(path.read_text(encoding="utf-8"))
        docstrings = set()
        for node in ast.walk(tree):
            if isinstance(node, (ast.Module, ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)) and node.body:
                first = node.body[0]
                if isinstance(first, ast.Expr) and isinstance(first.value, ast.Constant):
                    docstrings.add(id(first.value))
        found = []

        def visit(node, function):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                function = node.name
            if isinstance(node, ast.Constant) and isinstance(node.value, str) and id(node) not in docstrings \
                    and re.search(r"--[a-z]", node.value):
                found.append((function, node.value))
            for child in ast.iter_child_nodes(node):
                visit(child, function)

        visit(tree, None)
        return found

    def test_no_library_message_names_a_command_line_flag(self):
        root = Path(__file__).resolve().parents[1] / "forecasting"
        for path in sorted(root.rglob("*.py")):
            relative = path.relative_to(root).as_posix()
            if relative.startswith("cli/"):
                continue
            found = self.flagged_strings(path)
            assert not found, f"{relative}: {found}"


# ---------------------------------------------------------------------------
# Fast paths and their slow twins


def rule_on(rule, values, **options):
    """A rule of forecasting.io.rules over a list of texts, as Python lists (the Arrow backend)."""
    import pyarrow as pa

    from forecasting.io.backends import ArrowOps

    out = rule(ArrowOps(), pa.array(values, type=pa.string()), **options)
    return {k: v.to_pylist() if hasattr(v, "to_pylist") else [v] * len(values) for k, v in out.items()}


class TestFastPathsAgainstTheirTwins:
    @settings(max_examples=200, deadline=None)
    @given(st.from_regex(r"\A[+-]?[0-9]{1,7}(\.[0-9]{0,4})?\Z"))
    def test_a_plain_number_reads_the_same_through_the_careful_money_path(self, text):
        # "$" sends the value through the careful path (currency marks, grouping, signs): the twin of
        # the plain-number cast; and both are Python's own float() of the text.
        from forecasting.io import rules

        fast = rule_on(rules.read_amount, [text])["amount"][0]
        careful = rule_on(rules.read_amount, ["$" + text.lstrip("+")])["amount"][0]
        assert fast == careful == float(text)

    @settings(max_examples=200, deadline=None)
    @given(st.datetimes(min_value=__import__("datetime").datetime(1900, 1, 1),
                        max_value=__import__("datetime").datetime(2199, 12, 31, 23, 59, 59)),
           st.sampled_from(["%Y-%m-%d", "%Y-%m-%d %H:%M", "%Y-%m-%dT%H:%M:%S", "%Y-%m-%d %H:%M:%S.%f"]))
    def test_an_iso_date_reads_the_same_through_the_careful_date_path(self, moment, form):
        # A weekday in front sends the date through the careful path (its own calendar arithmetic):
        # the twin of the ISO cast; Python's datetime is the reference for both.
        from datetime import datetime

        from forecasting.io import rules

        text = moment.strftime(form)
        reference = datetime.strptime(text, form).replace(microsecond=0)
        micros = int((reference - datetime(1970, 1, 1)).total_seconds()) * 1_000_000
        assert rule_on(rules.read_date, [text])["micros"][0] == micros
        assert rule_on(rules.read_date, ["Mon, " + text])["micros"][0] == micros

    @pytest.mark.parametrize("text", ["2025-02-29", "2023-02-29", "2024-02-30", "2025-04-31", "2025-00-10",
                                      "2025-13-01", "1899-12-31", "2200-01-01", "2025-01-01 24:00"])
    def test_days_that_do_not_exist_are_no_dates_on_either_path(self, text):
        from forecasting.io import rules

        assert rule_on(rules.read_date, [text])["kind"][0] == rules.KIND_BAD
        assert rule_on(rules.read_date, ["Mon, " + text])["kind"][0] == rules.KIND_BAD

    @settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(messy_files())
    def test_the_careful_csv_reader_splits_as_the_fast_one(self, text):
        # Arrow's reader, when it accepts a file, and the careful record-by-record reader give the same cells.
        from forecasting.io import read as reading

        notes: list[str] = []
        layout = reading.text_layout(text, "orders.csv", None)
        columns = reading.unique_headers(layout.header)
        body = text[layout.skip_chars:]
        try:
            import pyarrow as pa
            import pyarrow.csv as pa_csv

            table = pa_csv.read_csv(
                io.BytesIO(body.encode()), read_options=pa_csv.ReadOptions(column_names=columns),
                parse_options=pa_csv.ParseOptions(delimiter=layout.delimiter, newlines_in_values=True,
                                                  ignore_empty_lines=False),
                convert_options=pa_csv.ConvertOptions(column_types={c: pa.string() for c in columns},
                                                      strings_can_be_null=False))
        except Exception:
            return  # Arrow refuses it: only the careful reader reads it
        careful = reading._read_records(body, layout.delimiter, columns, first_row=2, notes=notes, header_row=1,
                                        possibly_damaged=False)
        if careful.set_aside:
            return  # rows Arrow took and the careful reader set aside are read carefully by every engine
        fast = table.to_pandas().fillna("")
        # A line of nothing but spaces is a blank row to the careful reader.
        assert fast.values.tolist() == careful.cells.values.tolist()


    @pytest.mark.parametrize("pool", [
        ["C1001", "C1002", "f@s.ex", "", " ivy ", "C\u00e91", "x", "12345678"],  # ids of eight bytes or fewer
        ["2025-03-14", "2025-03-14 10:22:05", "customer-number-0001", "\u00e9t\u00e9", ""],  # longer texts
    ])
    def test_numbering_texts_matches_arrows_hash_table(self, pool):
        # Short texts are numbered through 64-bit numbers made of their bytes; Arrow's dictionary
        # encoding (a hash table of the texts) is the twin: the same codes and the same values.
        import pyarrow as pa
        import pyarrow.compute as pc

        from forecasting.io.backends import ArrowOps

        rng = np.random.default_rng(7)
        values = [pool[i] for i in rng.integers(0, len(pool), 20_000)] + [f"C{i}" for i in range(3000)]
        array = pa.array(values, type=pa.string())
        reference = pc.dictionary_encode(array)
        for many in (True, False):
            codes, distinct = ArrowOps.distinct(array, many=many)
            assert distinct.to_pylist() == reference.dictionary.to_pylist()
            assert codes.tolist() == reference.indices.to_pylist()

    @pytest.mark.parametrize("repeats", [True, False])
    def test_rules_read_each_distinct_cell_as_they_read_every_cell(self, repeats):
        # The Arrow backend reads amounts, dates, currencies and statuses once per distinct cell (or
        # every cell, when most differ); its twin runs the same rules over every row.
        import pyarrow as pa

        from forecasting.io import rules
        from forecasting.io.backends import ArrowOps

        class EveryRow(ArrowOps):
            def per_distinct(self, x, rule):
                return rule(self, x)

        rng = np.random.default_rng(11)
        n = 40_000
        amounts = ["12.50", "$1,234.50", "(12.00)", "", "n/a", "12,5", "USD 12", "1e3", " 7 ", "-3", "\u20ac5"]
        dates = ["2025-03-14", "14/03/2025", "", "Mon, 14 Mar 2025", "45660", "2025-02-30", "tbd", "2025-03-14T10:22"]
        if repeats:
            amount_cells = [amounts[i] for i in rng.integers(0, len(amounts), n)]
            date_cells = [dates[i] for i in rng.integers(0, len(dates), n)]
        else:
            amount_cells = [f"{v:.2f}" for v in rng.uniform(0, 1e6, n)]
            date_cells = [f"2025-01-01 {h:02d}:{m:02d}:{s:02d}" for h, m, s in rng.integers(0, [24, 60, 60], (n, 3))]
        currencies = ["USD", "usd", " EUR ", "$", "€", "£", "", "C$", "dollars", "GBP"]
        statuses = ["paid", "Cancelled", "", "refunded", "pending payment", "test", "Shipped", "on hold"]
        if repeats:
            currency_cells = [currencies[i] for i in rng.integers(0, len(currencies), n)]
            status_cells = [statuses[i] for i in rng.integers(0, len(statuses), n)]
        else:
            currency_cells = [f"X{i:05d}" for i in range(n)]
            status_cells = [f"paid {i}" for i in range(n)]
        for rule, cells, options in ((rules.read_amount, amount_cells, {"decimal": "."}),
                                     (rules.read_amount, amount_cells, {"decimal": ","}),
                                     (rules.read_date, date_cells, {"date_order": "month-first"}),
                                     (rules.currency_of_cell, currency_cells, {}),
                                     (rules.classify_status, status_cells, {})):
            array = pa.array(cells, type=pa.string())
            once = rule(ArrowOps(), array, **options)
            every = rule(EveryRow(), array, **options)
            if not isinstance(every, dict):
                once, every = {"value": once}, {"value": every}
            for key in every:
                full = [ArrowOps.full_column(out[key], n).to_pylist() for out in (once, every)]
                assert full[0] == full[1], key

    @settings(max_examples=100, deadline=None)
    @given(st.lists(st.lists(st.text(alphabet="ab,\"\r\n\u00e9\u2028", max_size=4), min_size=2, max_size=2),
                    max_size=6), st.integers(0, 3))
    def test_line_breaks_in_cells_are_found_as_python_finds_them(self, rows, skip):
        # The reader looks at the cells' bytes for a line break; Python's own search of each cell is
        # the twin (the table is sliced so that its cells do not start at the first byte).
        import pyarrow as pa

        from forecasting.io.read import _any_line_break

        table = pa.table({"a": [r[0] for r in rows], "b": [r[1] for r in rows]}).slice(min(skip, len(rows)))
        expected = any("\n" in cell or "\r" in cell for column in table.columns for cell in column.to_pylist())
        assert _any_line_break(table) == expected

    @pytest.mark.parametrize("one_at_a_time", [16, 0], ids=["each text searched for", "all lines matched at once"])
    @settings(max_examples=150, deadline=None)
    @given(st.lists(st.sampled_from(["C1,2025-01-02,10", "C2,2025-01-03,12.5", "C1,2025-01-02", "", "  ",
                                     "a,b,c,d", "C1,2025-01-02,10,", "\u00e9,x", "C3,,", "1", "C1"]), max_size=12),
           st.booleans(), st.sampled_from(["", "customer,date,amount\n", "\ufeffcustomer,date,amount\n"]))
    def test_rows_handed_back_are_numbered_as_arrows_own_count_numbers_them(self, one_at_a_time, lines, final_break,
                                                                            header):
        # The records Arrow hands back are found among the text's lines (after the header, as the
        # reader passes the file's own bytes); Arrow's own numbering (its reader on one thread) is
        # the twin. Both ways of finding them are checked: a few texts are searched for one at a
        # time, many are matched against every line at once.
        from unittest import mock

        import pyarrow as pa

        from forecasting.io import read
        from forecasting.io.read import _arrow_records, rejected_lines

        body = "\n".join(["C0,2025-01-01,1"] + lines) + ("\n" if final_break else "")
        data = (header + body).encode()
        start = len(header.encode())
        encoded = pa.py_buffer(data).slice(start)
        columns = ["customer", "date", "amount"]
        rejected: list = []
        numbered: list = []
        _arrow_records(encoded, ",", columns, rejected, use_threads=True)
        _arrow_records(encoded, ",", columns, numbered, use_threads=False, numbered=True)
        with mock.patch.object(read, "SEARCHED_ONE_AT_A_TIME", one_at_a_time):
            found = rejected_lines(data, rejected, start=start)
        assert found == numbered

    @pytest.mark.parametrize("one_at_a_time", [16, 0])
    def test_a_carriage_return_leaves_the_numbering_to_arrow(self, one_at_a_time, monkeypatch):
        from forecasting.io import read

        monkeypatch.setattr(read, "SEARCHED_ONE_AT_A_TIME", one_at_a_time)
        assert read.rejected_lines(b"C1,2025-01-02,10\r\nbad\r\n", ["bad"]) is None

    def test_a_text_handed_back_inside_a_longer_line_is_not_that_record(self):
        # "C1" is part of every line but a whole line only once: only that line is the record.
        from forecasting.io.read import rejected_lines

        data = b"C1,2025-01-02,10\nC1\nC1,2025-01-03,11\n"
        assert rejected_lines(data, ["C1"]) == [(2, "C1")]

    @pytest.mark.parametrize("step", [86_400_000_000, 1_000_000, 1])
    def test_orders_sorted_by_date_as_a_stable_sort_sorts_them(self, step):
        # Whole days and whole seconds are sorted as small numbers (numpy's radix sort); numpy's
        # stable sort of the microseconds is the twin.
        from forecasting.io.clean import date_order

        rng = np.random.default_rng(5)
        micros = rng.integers(19_000, 19_800, 50_000) * step
        assert date_order(micros).tolist() == np.argsort(micros, kind="stable").tolist()
        assert date_order(np.sort(micros)).tolist() == list(range(len(micros)))

    def test_repeated_keys_are_found_as_a_count_finds_them(self):
        # Keys are sorted once and the repeated ones looked up; counting every key is the twin.
        import collections

        from forecasting.io.clean import repeated_keys

        rng = np.random.default_rng(3)
        for n, spread in ((0, 1), (1, 1), (7, 3), (5000, 20_000), (300_000, 10**18)):
            keys = rng.integers(0, spread, n).astype(np.uint64)
            if n > 10:
                keys[rng.integers(0, n, 5)] = keys[0]
            count = collections.Counter(keys.tolist())
            expected = [i for i, key in enumerate(keys.tolist()) if count[key] > 1]
            assert repeated_keys(keys).tolist() == expected


def test_currency_codes_cover_the_c_librarys_locales():
    # Outside reference: the currency codes of the GNU C library's locale definitions
    # (/usr/share/i18n/locales, int_curr_symbol), where installed. Codes withdrawn from
    # ISO 4217 that old locale files still carry are named.
    import re

    from forecasting.io.rules import CURRENCY_CODES

    folder = Path("/usr/share/i18n/locales")
    if not folder.is_dir():
        pytest.skip("the C library's locale definitions are not installed")
    codes = set()
    for path in folder.iterdir():
        text = path.read_text(encoding="latin-1", errors="replace")
        codes |= set(re.findall(r'^int_curr_symbol\s+"([A-Z]{3})', text, flags=re.MULTILINE))
    withdrawn = {"BYR", "TMM", "VEF", "XDR", "LTL", "LVL", "EEK", "MRO", "STD", "ZMK", "SKK", "CYP", "MTL"}
    assert len(codes) > 80
    assert codes - withdrawn <= set(CURRENCY_CODES)
