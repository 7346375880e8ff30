"""Exports: formula injection is neutralised (OWASP CSV Injection guidance) and quoting follows RFC 4180."""

import csv
import io

import numpy as np
import pandas as pd
import pytest

from forecasting.exports import csv_text, excel_bytes, neutralise_cell, rounded_for_reading

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

    @pytest.mark.parametrize("special", [",", '"', "\r", "\n"])
    @pytest.mark.parametrize("dtype", ["str", object])
    def test_only_the_fields_that_need_quotes_get_them(self, special, dtype):
        # RFC 4180 section 2, rule 6: each of comma, double quote, CR and LF needs the quotes alone.
        table = pd.DataFrame({"customer": pd.Series(["fern", f"ivy{special}moss", "=pot", "\tTAB"], dtype=dtype)})
        inner = f"ivy{special}moss".replace('"', '""')
        assert csv_text(table) == f'customer\r\nfern\r\n"{inner}"\r\n\'=pot\r\n\'\tTAB\r\n'

    def test_text_held_in_several_arrow_chunks(self):
        # Text columns read through Arrow (the duckdb engine's customer ids) may be split into
        # chunks; row blocks of the writer then cross chunk edges.
        import pyarrow as pa

        names = [f"G-{i:06d}" for i in range(450_000)]
        names[3] = "=SUM(A1)"
        names[300_001] = "Smith, Jo"
        chunks = pa.chunked_array([pa.array(names[:250_000]), pa.array(names[250_000:])])
        table = pd.DataFrame({"customer": pd.array(chunks, dtype="str"), "orders": range(len(names))})
        rows = list(csv.reader(io.StringIO(csv_text(table), newline="")))
        assert [r[0] for r in rows[1:]] == [neutralise_cell(n) for n in names]
        assert [int(r[1]) for r in rows[1:]] == list(range(len(names)))

    def test_every_kind_of_column_reads_back_through_the_csv_module(self):
        # Reference: Python's csv module (its default dialect follows RFC 4180 quoting) and float(),
        # which must give back every number exactly; 450,000 rows are encoded in several row blocks.
        import numpy as np

        rng = np.random.default_rng(7)
        n = 450_000
        names = np.array(["fern", "=SUM(A1)", "Smith, Jo", 'say "hi"', "two\nlines", "-ivy", "@pot", "trowel"])
        table = pd.DataFrame({
            "customer": pd.Series(names[rng.integers(0, len(names), n)], dtype="str"),
            "mixed": pd.Series(rng.choice(np.array(["=x", -3, 2.5, None, "moss"], dtype=object), n), dtype=object),
            "tier": pd.Categorical(rng.choice(["top", "+growing", "occasional"], n)),
            "value": np.where(rng.random(n) < 0.05, np.nan, rng.lognormal(3, 2, n)),
            "orders": rng.integers(1, 40, n),
            "low_confidence": rng.random(n) < 0.3,
            "first_order": pd.to_datetime("2025-01-01") + pd.to_timedelta(rng.integers(0, 400, n), unit="D"),
        })
        rows = list(csv.reader(io.StringIO(csv_text(table), newline="")))
        assert rows[0] == list(table.columns) and len(rows) == n + 1
        body = list(zip(*rows[1:]))
        expected_customer = [("'" + c) if c.startswith(("=", "-", "@")) else c for c in table["customer"]]
        assert list(body[0]) == expected_customer
        expected_mixed = ["" if v is None else str(neutralise_cell(v)) for v in table["mixed"]]
        assert list(body[1]) == expected_mixed
        assert list(body[2]) == [("'" + t) if t.startswith("+") else t for t in table["tier"]]
        back = np.array([float(v) if v else np.nan for v in body[3]])
        assert np.array_equal(back, table["value"].to_numpy(), equal_nan=True)
        assert [int(v) for v in body[4]] == table["orders"].tolist()
        assert list(body[5]) == [str(b) for b in table["low_confidence"]]
        assert list(body[6]) == table["first_order"].dt.strftime("%Y-%m-%d").tolist()

    def test_columns_holding_one_value_are_written_as_every_other(self):
        # A column with one value in every row (the forecast's method and variance) is encoded once
        # and repeated: the cells must still be neutralised, quoted (RFC 4180 section 2, rule 6)
        # and read back through Python's csv module; a column of gaps stays empty; a table of such
        # columns only, and a value that changes in a later block of rows, are written as well.
        n = 450_000
        table = pd.DataFrame({
            "customer": pd.Series([f"G-{i}" for i in range(n)], dtype="str"),
            "method": pd.Series(["mta"] * n, dtype="str"),
            "formula": pd.Series(["=cmd"] * n, dtype="str"),
            "comma": pd.Series(["Smith, Jo"] * n, dtype="str"),
            "level": np.full(n, 0.9),
            "gap": np.full(n, np.nan),
            "late_change": np.r_[np.zeros(n - 1, dtype=np.int64), 7],
        })
        rows = list(csv.reader(io.StringIO(csv_text(table), newline="")))
        assert len(rows) == n + 1
        body = list(zip(*rows[1:]))
        assert set(body[1]) == {"mta"} and set(body[2]) == {"'=cmd"} and set(body[3]) == {"Smith, Jo"}
        assert set(body[4]) == {"0.9"} and set(body[5]) == {""}
        assert body[6][-1] == "7" and set(body[6][:-1]) == {"0"}
        assert csv_text(table.iloc[:2, 1:3]) == "method,formula\r\nmta,'=cmd\r\nmta,'=cmd\r\n"
        # Columns of pandas' nullable and Arrow number types are written cell by cell, gaps empty.
        typed = pd.DataFrame({"n": pd.array([2, 2, None], dtype="Int64"),
                              "x": pd.Series([1.5, 1.5, 1.5], dtype="float64[pyarrow]")})
        assert csv_text(typed) == "n,x\r\n2,1.5\r\n2,1.5\r\n,1.5\r\n"

    def test_times_of_day_are_kept_and_an_empty_table_is_its_header(self):
        table = pd.DataFrame({"at": pd.to_datetime(["2025-03-01 10:30", None]), "n": [1, 2]})
        assert csv_text(table) == "at,n\r\n2025-03-01 10:30:00,1\r\n,2\r\n"
        assert csv_text(table.iloc[:0]) == "at,n\r\n"


class TestRoundedForReading:
    def test_money_to_the_cent_shares_to_three_decimals_the_rest_untouched(self):
        table = pd.DataFrame({"customer": ["fern", "ivy", "moss"], "expected": [70.48625530890325, 0.285, np.nan],
                              "weight": [0.5549598407592873, 1.0, 0.0004], "orders": [3, 1, 2],
                              "spread": [1.23456789, 2.0, 3.0]})
        before = table.copy()
        out = rounded_for_reading(table, money=["expected"], shares=["weight"])
        # 0.285 is stored as 0.28499999999999998 (IEEE 754 double), so it rounds down.
        assert out["expected"].tolist()[:2] == [70.49, 0.28] and np.isnan(out["expected"].iloc[2])
        assert out["weight"].tolist() == [0.555, 1.0, 0.0]
        pd.testing.assert_frame_equal(out[["customer", "orders", "spread"]], before[["customer", "orders", "spread"]])
        pd.testing.assert_frame_equal(table, before)  # the table itself is not changed

    def test_rounded_numbers_are_written_with_at_most_those_decimals(self):
        rng = np.random.default_rng(3)
        table = pd.DataFrame({"expected": rng.lognormal(3, 2, 2000), "weight": rng.uniform(0, 1, 2000)})
        rows = list(csv.reader(io.StringIO(csv_text(rounded_for_reading(table, money=["expected"],
                                                                        shares=["weight"])))))[1:]
        assert max(len(r[0].partition(".")[2]) for r in rows) == 2
        assert max(len(r[1].partition(".")[2]) for r in rows) == 3

    def test_columns_not_in_the_table_are_skipped(self):
        table = pd.DataFrame({"expected": [1.234]})
        assert rounded_for_reading(table, money=["expected", "projected"])["expected"].tolist() == [1.23]


class TestExcelBytes:
    def test_hostile_cells_are_stored_as_text(self):
        table = pd.DataFrame({"customer": HOSTILE, "value": range(len(HOSTILE))})
        back = pd.read_excel(io.BytesIO(excel_bytes(table)))
        assert back["customer"].iloc[0] == "'=1+1"
        assert back["value"].tolist() == list(range(len(HOSTILE)))


class TestPseudonymise:
    def test_stable_under_one_salt_different_under_another(self):
        from forecasting.exports import pseudonymise

        table = pd.DataFrame({"customer": ["C-001", "C-002", "C-001"], "orders": [3, 1, 3]})
        first = pseudonymise(table, salt="salt-number-one")
        again = pseudonymise(table, salt="salt-number-one")
        other = pseudonymise(table, salt="salt-number-two")
        assert first.equals(again)
        assert first["customer"].iloc[0] == first["customer"].iloc[2] != first["customer"].iloc[1]
        assert set(first["customer"]).isdisjoint(other["customer"])
        assert not set(first["customer"]) & set(table["customer"])
        assert table["customer"].tolist() == ["C-001", "C-002", "C-001"]  # input untouched

    def test_matches_a_plain_hmac(self):
        # Reference: Python's hmac module, RFC 2104 with SHA-256.
        import hashlib
        import hmac

        from forecasting.exports import pseudonymise

        expected = "cust-" + hmac.new(b"a-long-salt", b"C-001", hashlib.sha256).hexdigest()[:16]
        assert pseudonymise(pd.DataFrame({"customer": ["C-001"]}), salt="a-long-salt")["customer"][0] == expected

    def test_short_salt_refused(self):
        from forecasting.exports import pseudonymise

        with pytest.raises(ValueError, match=r"at least 8 characters \(got 3\)"):
            pseudonymise(pd.DataFrame({"customer": ["x"]}), salt="abc")
