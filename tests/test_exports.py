"""Exports: formula injection is neutralised (OWASP CSV Injection guidance) and quoting follows RFC 4180."""

import csv
import io

import pandas as pd
import pytest

from forecasting.exports import csv_text, excel_bytes, neutralise_cell

HOSTILE = ["=1+1", "+SUM(A1)", "-2+3", "@cmd", "\tTAB", "\rCR", "=HYPERLINK(\"http://x\")", "C-001", "plain"]


class TestNeutraliseCell:
    @pytest.mark.parametrize("text", HOSTILE[:7])
    def test_formula_starts_get_a_quote(self, text):
        assert neutralise_cell(text) == "'" + text

    @pytest.mark.parametrize("value", ["C-001", "plain", 3.5, -12, None])
    def test_other_values_untouched(self, value):
        assert neutralise_cell(value) == value


class TestCsvText:
    def test_hostile_ids_are_neutralised_and_numbers_stay_numbers(self):
        table = pd.DataFrame({"customer": HOSTILE, "expected_next_order": [-1.5] * len(HOSTILE)})
        rows = list(csv.reader(io.StringIO(csv_text(table), newline="")))
        assert rows[0] == ["customer", "expected_next_order"]
        for original, (cell, number) in zip(HOSTILE, rows[1:]):
            assert not cell.startswith(("=", "+", "-", "@", "\t", "\r")) or cell == original
            assert number == "-1.5"
        assert rows[1][0] == "'=1+1"

    def test_rfc4180_quoting_and_crlf(self):
        # RFC 4180 section 2, rules 6 and 7: enclose fields with commas, quotes or line breaks in double
        # quotes and double any quote inside; records end with CRLF.
        table = pd.DataFrame({"customer": ['Smith, Jo', 'say "hi"', "two\nlines"], "orders": [1, 2, 3]})
        text = csv_text(table)
        assert text == 'customer,orders\r\n"Smith, Jo",1\r\n"say ""hi""",2\r\n"two\nlines",3\r\n'


class TestExcelBytes:
    def test_hostile_cells_are_stored_as_text(self):
        table = pd.DataFrame({"customer": HOSTILE, "value": range(len(HOSTILE))})
        back = pd.read_excel(io.BytesIO(excel_bytes(table)))
        assert back["customer"].iloc[0] == "'=1+1"
        assert back["value"].tolist() == list(range(len(HOSTILE)))
