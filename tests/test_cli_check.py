"""The ``check`` command: its JSON contract and exit codes, run as a user runs it."""

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "forecasting", *args], cwd=ROOT, capture_output=True, text=True,
                          timeout=120)


class TestCheckCommand:
    def test_json_accounts_for_every_row(self, tmp_path):
        path = tmp_path / "orders.csv"
        path.write_text("customer,date,amount,status\nC1,2025-01-02,10,paid\nC2,2025-01-03,5,cancelled\n"
                        "C1,2025-02-02,12,paid\n\n")
        done = run_cli("check", str(path), "--json")
        assert done.returncode == 0, done.stderr
        audit = json.loads(done.stdout)
        assert audit["rows_read"] == 4
        assert audit["rows_used"] == 2
        assert audit["orders"] == 2 and audit["customers"] == 1
        assert audit["excluded"] == {"blank_row": 1, "cancelled_order": 1}
        assert audit["rows_used"] + sum(audit["excluded"].values()) == audit["rows_read"]

    def test_a_data_error_exits_2_with_a_message_and_no_traceback(self, tmp_path):
        path = tmp_path / "bad.csv"
        path.write_text("x,y,z\n1,2,3\n")
        done = run_cli("check", str(path))
        assert done.returncode == 2
        assert "--customer" in done.stderr
        assert "Traceback" not in done.stderr

    def test_excluded_rows_can_be_written(self, tmp_path):
        path = tmp_path / "orders.csv"
        path.write_text("customer,date,amount\n=evil(),2025-01-02,12 oops\nC1,2025-01-02,10\n")
        out = tmp_path / "left_out.csv"
        done = run_cli("check", str(path), "--excluded-out", str(out))
        assert done.returncode == 0, done.stderr
        text = out.read_text()
        assert "'=evil()" in text and "bad_amount" in text


class TestReadingOptions:
    def test_header_row_keep_unpaid_and_keep_implausible_flags(self, tmp_path):
        path = tmp_path / "orders.csv"
        ordinary = "".join(f"C{i % 3},2025-02-{i + 1:02d},{20 + i},paid\n" for i in range(7))
        path.write_text("Fernhollow Plants\n1,2,3,4\ncustomer,date,amount,status\n" + ordinary
                        + "C1,2025-03-01,15,pending\nC2,2025-03-02,124999,paid\nC1,2052-01-01,12,paid\n")
        plain = json.loads(run_cli("check", str(path), "--json", "--header-row", "3").stdout)
        assert plain["excluded"] == {"implausible_amount": 1, "implausible_date": 1, "unpaid_order": 1}
        kept = json.loads(run_cli("check", str(path), "--json", "--header-row", "3", "--keep-unpaid",
                                  "--keep-implausible").stdout)
        assert kept["excluded"] == {} and kept["noted"] == {"implausible_kept": 2, "unpaid_kept": 1}
        assert kept["rows_read"] == 10

    def test_the_message_names_the_flag_that_fixes_it(self, tmp_path):
        path = tmp_path / "orders.csv"
        path.write_text("customer,date,amount\nC1,03/04/2025,10\nC2,05/06/2025,20\n")
        done = run_cli("check", str(path))
        assert done.returncode == 2
        assert "Set the date order (day-first or month-first) (--date-order)" in done.stderr
        path.write_text("customer,date,amount\nC1,2025-01-02,C$10\nC2,2025-01-03,$20\n")
        assert "(--currency)" in run_cli("check", str(path)).stderr

    def test_rows_noted_are_shown(self, tmp_path):
        path = tmp_path / "orders.csv"
        path.write_text("customer,date,amount,status\nC1,45660,10,Gift\nC2,2025-01-03,20,paid\n")
        done = run_cli("check", str(path))
        assert done.returncode == 0, done.stderr
        assert "noted" in done.stdout and "excel_serial_date" in done.stdout and "'Gift' (1 row)" in done.stdout


class TestPipes:
    def test_output_cut_short_by_the_reader_ends_quietly(self):
        # `... | head -1`: the reader closes the pipe early; no traceback may follow.
        command = [sys.executable, "-m", "forecasting", "check", "demo_data/plant_shop_orders.csv"]
        with subprocess.Popen(command, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE) as process:
            process.stdout.readline()
            process.stdout.close()
            stderr = process.stderr.read().decode()
            process.wait(timeout=120)
        assert "Traceback" not in stderr


class TestProgress:
    def test_shown_at_a_terminal_only(self):
        import io

        from forecasting.cli import Progress

        class Terminal(io.StringIO):
            def isatty(self):
                return True

        terminal, captured = Terminal(), io.StringIO()
        for stream in (terminal, captured):
            progress = Progress(2, stream=stream)
            progress.step("reading")
            progress.step("fitting")
            progress.finish()
        assert "2/2 fitting" in terminal.getvalue() and "done in" in terminal.getvalue()
        assert captured.getvalue() == ""


class TestLargeFileNote:
    def test_pandas_engine_suggests_duckdb_for_large_files_only(self, tmp_path, monkeypatch, capsys):
        import forecasting.cli as cli

        path = tmp_path / "orders.csv"
        path.write_text("customer,date,amount\nC1,2025-01-02,10\nC1,2025-02-02,12\n")
        assert cli.main(["check", str(path)]) == 0
        assert "--engine duckdb" not in capsys.readouterr().err
        monkeypatch.setattr(cli, "LARGE_FILE_BYTES", path.stat().st_size)
        assert cli.main(["check", str(path)]) == 0
        err = capsys.readouterr().err
        assert "note: orders.csv is 0 MB" in err and "--engine duckdb" in err


class TestStartUp:
    def test_the_forecast_path_does_not_load_scipy(self):
        # scipy.stats and scipy.optimize take about half a second each to import, scipy.special a
        # tenth; the forecast command (read, statistics, forecasts, CSV) needs none of them with its
        # default method (DEVELOPERS.md, rules we keep).
        code = ("import sys; import forecasting.cli.forecast, forecasting.cli.check, forecasting.engines, "
                "forecasting.engines.duckdb_engine, forecasting.exports, forecasting.forecasts; "
                "print(sorted(m for m in sys.modules if m.split('.')[0] == 'scipy'))")
        done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=120)
        assert done.returncode == 0, done.stderr
        assert done.stdout.strip() == "[]"

    @pytest.mark.parametrize("options", [["--method", "mta"], ["--method", "james-stein", "--variance", "log"]])
    def test_a_named_method_loads_no_scipy(self, tmp_path, options):
        # With a method named (its spread model chosen by the shop's own check, or named too) the whole
        # command reads, checks, fits and writes without scipy: the spread of one order takes the
        # median of a gamma distribution from forecasting.variance.gamma_median.
        code = ("import sys, runpy; sys.argv = ['forecasting', 'forecast', 'demo_data/plant_shop_orders.csv', "
                f"'--out', {str(tmp_path / 'out.csv')!r}] + {options!r}\n"
                "try:\n    runpy.run_module('forecasting', run_name='__main__')\nexcept SystemExit:\n    pass\n"
                "print(sorted(m for m in sys.modules if m.split('.')[0] == 'scipy'), file=sys.stderr)")
        done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=300)
        assert (tmp_path / "out.csv").exists(), done.stderr
        assert done.stderr.strip().splitlines()[-1] == "[]"

    def test_the_automatic_choice_loads_neither_scipy_optimize_nor_scipy_stats(self, tmp_path):
        # The whole forecast command on the demo shop, the method chosen by the shop's own check
        # (Gamma-Gamma among the candidates): its fits take Newton steps of forecasting.newton.
        code = ("import sys, runpy; sys.argv = ['forecasting', 'forecast', 'demo_data/plant_shop_orders.csv', "
                f"'--out', {str(tmp_path / 'out.csv')!r}]\n"
                "try:\n    runpy.run_module('forecasting', run_name='__main__')\nexcept SystemExit:\n    pass\n"
                "print(sorted({'.'.join(m.split('.')[:2]) for m in sys.modules if m.split('.')[0] == 'scipy'}), "
                "file=sys.stderr)")
        done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=300)
        assert (tmp_path / "out.csv").exists(), done.stderr
        loaded = done.stderr.strip().splitlines()[-1]
        assert "scipy.special" in loaded  # the candidates' fits do use it
        assert "scipy.optimize" not in loaded and "scipy.stats" not in loaded
