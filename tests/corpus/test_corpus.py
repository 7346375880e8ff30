"""The corpus of messy exports, read by every engine: each row ends as a careful bookkeeper expects.

The exports and their expectations are written by ``tests/corpus/make_corpus.py`` (see its
docstring); the expectations were written by hand, row by row, from what each row means. Each
engine's row account (every row left out with its reason and row number, every row noted) must
equal the expectation, and so each engine's account equals the others' row by row; the orders,
customers and revenue must follow. A file that cannot be used as it is must be refused by
every engine with the same words, naming the column role or option that fixes it, never a
command-line flag.
"""

from __future__ import annotations

import importlib.util
import json
import re
import subprocess
import sys
from decimal import Decimal
from pathlib import Path

import numpy as np
import pytest

from forecasting.engines import customer_statistics_from_file
from forecasting.errors import OrderDataError

HERE = Path(__file__).resolve().parent
EXPORTS = HERE / "exports"
EXPECTED = sorted((HERE / "expected").glob("*.json"))
FLAG = re.compile(r"--[a-z]")

HAVE_DASK = importlib.util.find_spec("dask") is not None and importlib.util.find_spec("distributed") is not None


def expectation(path: Path) -> dict:
    return json.loads(path.read_text(encoding="utf-8"))


def read(engine: str, expected: dict, **engine_options):
    return customer_statistics_from_file(EXPORTS / expected["file"], engine=engine, list_rows=True,
                                         **expected["options"], **engine_options)


def check(engine: str, expected: dict, **engine_options) -> dict | None:
    """Read one export with one engine and compare every row with the expectation."""
    refusal = expected["refusal"]
    if refusal:
        with pytest.raises(OrderDataError, match=refusal["match"]) as raised:
            read(engine, expected, **engine_options)
        problem = raised.value
        assert not FLAG.search(str(problem)), str(problem)
        if refusal["row"] is not None:
            assert problem.row == refusal["row"]
        assert (problem.option, problem.role) == (refusal["option"], refusal["role"])
        return None
    stats, account = read(engine, expected, **engine_options)
    left_out = {int(r): c for r, c in account["excluded_rows"][["row", "reason_code"]].itertuples(index=False)}
    assert len(left_out) == len(account["excluded_rows"]), "a row is left out twice"
    assert left_out == {int(r): o for r, o in expected["rows"].items() if o != "used"}
    assert account["rows_read"] == len(expected["rows"])
    assert account["rows_used"] + account["rows_excluded"] == account["rows_read"]
    noted: dict[int, list[str]] = {}
    for row, code in account["noted_rows"][["row", "note_code"]].itertuples(index=False):
        noted.setdefault(int(row), []).append(code)
    assert {r: sorted(c) for r, c in noted.items()} == {int(r): sorted(c) for r, c in expected["noted"].items()}
    assert (account["orders"], account["customers"]) == (expected["orders"], expected["customers"])
    assert Decimal(repr(float(stats["total"].sum()))).quantize(Decimal("0.01")) == Decimal(expected["revenue"])
    assert np.isfinite(stats.select_dtypes("number").to_numpy(dtype=float, na_value=0.0)).all()
    for note in expected["notes"]:
        assert note in account["notes"]
    if expected["unrecognised_statuses"] is not None:
        assert account["unrecognised_statuses"] == expected["unrecognised_statuses"]
    for text in account["notes"] + list(account["excluded_rows"]["reason"]):
        assert not FLAG.search(text), text
    return account


def test_the_corpus_is_what_the_generator_writes(tmp_path):
    # The committed exports and expectations are the generator's output, byte for byte (a workbook
    # carries the time it was written: its sheets' cells are compared instead).
    done = subprocess.run([sys.executable, str(HERE / "make_corpus.py"), "--out", str(tmp_path)],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    for folder in ("exports", "expected"):
        committed = {p.name: p for p in (HERE / folder).iterdir()}
        written = {p.name: p for p in (tmp_path / folder).iterdir()}
        assert committed.keys() == written.keys()
        for name, path in written.items():
            if name.endswith(".xlsx"):
                assert _workbook_cells(path) == _workbook_cells(committed[name]), name
            else:
                assert path.read_bytes() == committed[name].read_bytes(), name


def _workbook_cells(path: Path) -> dict:
    import openpyxl

    book = openpyxl.load_workbook(path)
    return {sheet.title: [list(row) for row in sheet.iter_rows(values_only=True)] for sheet in book.worksheets}


def test_the_corpus_is_big_enough():
    every = [e for e in map(expectation, EXPECTED) if set(e["engines"]) == {"pandas", "duckdb", "dask"}]
    assert len(every) >= 60
    assert sum(len(e["rows"]) for e in every) >= 250


@pytest.mark.parametrize("path", EXPECTED, ids=[p.stem for p in EXPECTED])
def test_pandas_engine(path):
    check("pandas", expectation(path))


@pytest.mark.parametrize("path", EXPECTED, ids=[p.stem for p in EXPECTED])
def test_duckdb_engine(path):
    expected = expectation(path)
    if "duckdb" not in expected["engines"]:
        with pytest.raises(OrderDataError, match="not Excel") as raised:
            read("duckdb", expected)
        assert raised.value.option == "engine"
        return
    account = check("duckdb", expected)
    if account is not None:
        _, by_pandas = read("pandas", expected)
        for key in ("rows_read", "rows_used", "excluded", "noted", "orders", "customers", "unrecognised_statuses",
                    "mapping", "notes"):
            assert account[key] == by_pandas[key], key


@pytest.fixture(scope="module")
def cluster():
    if not HAVE_DASK:
        pytest.skip("the dask engine needs requirements-scale.txt")
    from forecasting.engines.dask_engine import cluster_client

    with cluster_client(workers=2, processes=False) as client:
        yield client


@pytest.mark.parametrize("path", [p for p in EXPECTED if "dask" in expectation(p)["engines"]],
                         ids=[p.stem for p in EXPECTED if "dask" in expectation(p)["engines"]])
def test_dask_engine(path, cluster):
    expected = expectation(path)
    account = check("dask", expected, scheduler=cluster)
    if account is not None:
        _, by_pandas = read("pandas", expected)
        for key in ("rows_read", "rows_used", "excluded", "noted", "orders", "customers", "unrecognised_statuses",
                    "mapping", "notes"):
            assert account[key] == by_pandas[key], key
