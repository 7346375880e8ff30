"""Whole commands on edge-case shops: no NaN or infinity reaches an output, and reruns are byte-identical."""

import json
import math
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[1]

SHOPS = {
    "one_order": "customer,date,amount\nC1,2025-03-01,42.50\n",
    "one_customer": "customer,date,amount\n" + "".join(f"C1,2025-0{m}-01,{10 + m}\n" for m in range(1, 8)),
    "all_equal": "customer,date,amount\n" + "".join(f"C{i % 5},2025-{1 + i % 9:02d}-1{i % 9},25\n" for i in range(40)),
    "cents_and_billions": "customer,date,amount\n" + "".join(
        f"C{i % 6},2025-{1 + i % 9:02d}-0{1 + i % 9},{0.01 if i % 3 else 1e9}\n" for i in range(36)),
    # An ordinary shop with a typo of 1e308, an order dated 2052 and a NUL byte in a customer id.
    "typos": "customer,date,amount\n" + "".join(
        f"C{i % 5},2025-{1 + i % 9:02d}-1{i % 9},{20 + i % 7}.50\n" for i in range(40))
        + "C1,2025-06-01,1e308\nC2,2052-01-01,30\nC\x003,2025-06-02,25\n",
}
# Shops whose extreme values are the point: read with implausible values kept.
KEEP_IMPLAUSIBLE = {"cents_and_billions"}


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "forecasting", *args], cwd=ROOT, capture_output=True, text=True,
                          timeout=300)


def assert_finite_json(value):
    if isinstance(value, float):
        assert math.isfinite(value)
    elif isinstance(value, dict):
        for item in value.values():
            assert_finite_json(item)
    elif isinstance(value, list):
        for item in value:
            assert_finite_json(item)


@pytest.fixture(params=sorted(SHOPS))
def shop(request, tmp_path):
    path = tmp_path / f"{request.param}.csv"
    path.write_text(SHOPS[request.param])
    return path


def reading_flags(shop):
    return ["--keep-implausible"] if shop.stem in KEEP_IMPLAUSIBLE else []


class TestEdgeShops:
    def test_forecast_outputs_are_finite_and_repeatable(self, shop, tmp_path):
        outputs = []
        for attempt in range(2):
            out = tmp_path / f"forecast{attempt}.csv"
            done = run_cli("forecast", str(shop), "--method", "auto", "--out", str(out), "--json",
                           *reading_flags(shop))
            assert done.returncode == 0, done.stderr
            assert "Traceback" not in done.stderr
            json.loads(done.stdout)  # strict JSON: NaN would not parse as a JSON number in allow_nan=False output
            outputs.append(out.read_bytes())
        assert outputs[0] == outputs[1]
        table = pd.read_csv(tmp_path / "forecast0.csv")
        numbers = table.select_dtypes("number")
        assert numbers.notna().all().all() and numbers.apply(lambda c: c.map(math.isfinite)).all().all()
        assert (table["expected_next_order"] > 0).all()
        assert "\x00" not in (tmp_path / "forecast0.csv").read_text()

    def test_evaluate_and_outlook_end_cleanly(self, shop):
        for command in (["evaluate", str(shop), "--json"], ["outlook", str(shop), "--horizon", "90", "--json"]):
            done = run_cli(*command, *reading_flags(shop))
            assert "Traceback" not in done.stderr
            if done.returncode == 0:
                first = json.loads(done.stdout)
                assert_finite_json(first)
                assert "2052" not in done.stdout  # a date typo is no period to project from
                again = run_cli(*command, *reading_flags(shop))
                assert again.stdout == done.stdout
            else:
                # Too little data for this question is a plain message with exit code 2.
                assert done.returncode == 2 and done.stderr.startswith("error:")
