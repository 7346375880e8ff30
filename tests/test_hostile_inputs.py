"""Hostile and broken files: every one ends in a clean result or the one user-facing error, quickly."""

from __future__ import annotations

import io
import time
import tracemalloc
import zipfile

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from forecasting import OrderDataError, read_orders

GOOD = b"customer,date,amount\nC1,2025-01-02,10\nC2,2025-01-03,20.5\nC1,2025-02-03,7\n"


def outcome(data: bytes, name: str = "upload.csv"):
    """Read and return the result, or the user-facing error; anything else fails the test."""
    try:
        return read_orders(data, file_name=name)
    except OrderDataError as problem:
        assert "upload" in str(problem) or name in str(problem)
        return problem


def assert_accounted(result) -> None:
    if isinstance(result, OrderDataError):
        return
    assert result.rows_used + len(result.excluded) == result.rows_read
    values = result.orders["order_value"]
    assert np.isfinite(values).all() and (values > 0).all()


class TestRandomBytes:
    @settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(st.binary(max_size=2000))
    def test_random_bytes(self, data):
        assert_accounted(outcome(data))

    @settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(st.lists(st.sampled_from(list("C1,;\t\n\r\"'-$€.0 2a=@+") + ["2025-01-02", "\x00"]), max_size=120))
    def test_random_text_made_of_csv_pieces(self, pieces):
        assert_accounted(outcome(("customer,date,amount\n" + "".join(pieces)).encode("utf-8")))

    @settings(max_examples=60, deadline=None)
    @given(st.integers(min_value=0, max_value=len(GOOD)))
    def test_truncated_files(self, cut):
        assert_accounted(outcome(GOOD[:cut]))

    @pytest.mark.parametrize("name", ["upload.xlsx", "upload.parquet"])
    @settings(max_examples=40, deadline=None)
    @given(data=st.binary(max_size=500))
    def test_broken_workbooks_and_parquet(self, name, data):
        assert_accounted(outcome(b"PK\x03\x04" + data if name.endswith("xlsx") else b"PAR1" + data, name))


class TestAwkwardFiles:
    def test_wrong_encoding_declared_by_bom_but_latin1_inside(self):
        assert_accounted(outcome(b"\xef\xbb\xbf" + "customer,date,amount\nPépinière,2025-01-02,3\n".encode("latin-1")))

    def test_zip_that_is_not_a_workbook(self):
        buffer = io.BytesIO()
        with zipfile.ZipFile(buffer, "w") as archive:
            archive.writestr("hello.txt", "hi")
        result = outcome(buffer.getvalue(), "upload.xlsx")
        assert isinstance(result, OrderDataError)

    def test_a_huge_field_is_reported_not_loaded_into_a_forecast(self):
        data = GOOD + b"C3,2025-01-04," + b"9" * 300_000 + b"\n"
        result = outcome(data)
        assert_accounted(result)
        assert "oversized_field" in set(result.excluded["reason_code"])

    def test_thousands_of_columns_are_refused_with_a_limit(self):
        header = ",".join(f"c{i}" for i in range(5000))
        result = outcome((header + "\n" + ",".join("1" for _ in range(5000)) + "\n").encode())
        assert isinstance(result, OrderDataError) and "columns" in str(result)

    def test_a_million_empty_lines_in_bounded_time_and_memory(self):
        data = GOOD + b"\n" * 1_000_000 + b"C9,2025-03-01,5\n"
        tracemalloc.start()
        started = time.perf_counter()
        result = outcome(data)
        elapsed = time.perf_counter() - started
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        assert_accounted(result)
        assert result.excluded["reason_code"].value_counts()["blank_row"] == 1_000_000
        # Generous bounds: this is a hang-and-blow-up guard, not a speed test.
        assert elapsed < 60
        assert peak < 1_500_000_000

    def test_formulas_and_html_in_cells_are_kept_as_plain_text(self):
        data = b'customer,date,amount\n=cmd|"/c calc"!A1,2025-01-02,10\n<script>x</script>,2025-01-03,5\n'
        result = outcome(data)
        assert set(result.orders["customer"]) == {'=cmd|"/c calc"!A1', "<script>x</script>"}

    @pytest.mark.parametrize("amount, reason", [("1e308", "implausible_amount"), ("NaN", "missing_amount"),
                                                ("inf", "missing_amount"), ("-inf", "missing_amount"),
                                                ("1e400", "bad_amount"), ("-0", "zero_amount"),
                                                ("0.0", "zero_amount"), ("1e-300", "zero_amount")])
    def test_extreme_numbers(self, amount, reason):
        # No order any shop took is above a trillion: such values are left out even when implausible
        # values are kept, so that no inf or NaN reaches a forecast; below half a cent is nothing.
        for keep in (False, True):
            result = read_orders(f"customer,date,amount\nC1,2025-01-02,{amount}\nC2,2025-01-02,5\n".encode(),
                                 file_name="upload.csv", keep_implausible=keep)
            assert_accounted(result)
            assert result.excluded[["row", "reason_code"]].values.tolist() == [[2, reason]]
            assert np.isfinite(result.orders["order_value"]).all()


class TestDeterminism:
    def test_same_bytes_same_result(self):
        first = read_orders(GOOD * 1, file_name="a.csv")
        second = read_orders(GOOD * 1, file_name="a.csv")
        pd.testing.assert_frame_equal(first.orders, second.orders)
        pd.testing.assert_frame_equal(first.excluded, second.excluded)
        assert first.audit() == second.audit()
