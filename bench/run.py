"""Benchmark: how long each stage takes on large synthetic order files.

Run from the repository root::

    python bench/run.py                 # library stages, 100k and 1M orders
    python bench/run.py --sizes 100000  # just one size
    python bench/run.py --with-10m      # adds 10M orders (needs several GB of memory)
    python bench/run.py --commands --engines pandas,duckdb,dask --with-10m
                                        # whole commands as a user runs them, each engine

With ``--commands`` each command runs as its own process, exactly as a user types it
(``python -m forecasting forecast FILE --out X --method mta --engine E``), timed from
start to exit, and so does the baseline (``python -c "import pandas as pd;
pd.read_csv(F).groupby('customer')['order_value'].mean()"``), so both pay the
interpreter's start-up; the package's modules are compiled once beforehand, as after a
user's first run. The runs of one size are interleaved (baseline, then each
engine, repeated) and the fastest of the repeats is kept. Peak memory of a command is
the largest resident size summed over its process tree (sampled every 50 ms with
psutil: dask workers are separate processes) and, beside it, the high-water mark of
the command's own process (its ``VmHWM``). The duckdb engine is also measured on its
own (:func:`forecasting.engines.measure_statistics_run`, a fresh process), and ``check`` on
an order-line export of about 1.1 million lines (the demo shop's kind, from
``bench/big_shop.py``) against pandas reading the same file.

Every time is also shown as a ratio to a pandas baseline measured in the same
process on the same file (``pd.read_csv`` followed by a groupby mean per
customer), so results can be compared across machines.  Peak memory is the
process's resident high-water mark (``resource.getrusage``) after each stage.
The table is printed and written to ``bench/results.md``.

The synthetic file is a houseplant shop's orders: customer spending levels are
lognormal, order values lognormal around each customer's level, a few bulk
orders (ten to forty times the usual), dates over two years.  Files are
cached in ``bench/data/`` (not committed).

Targets (whole commands against the baseline command): ``forecast`` with no options
(the pandas engine and the automatic choice) on 2,000,000 and on 10,000,000 orders at
most 1.5x, with a peak under 3 GB at 10,000,000; the same with ``--method mta`` (the
reader and one method, no check) as well; ``evaluate`` (every method, backtest, 500
resamples) on 1,000,000 orders at most 5x; the duckdb engine on 10,000,000 orders
under 3 GB. In one process: exact leave-one-out of every closed-form method x
variance model on 1,000,000 orders at most 5x the baseline time.
"""

from __future__ import annotations

import argparse
import compileall
import datetime
import gc
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

from forecasting import evaluation  # noqa: E402
from forecasting.customers import customer_statistics  # noqa: E402
from forecasting.reading import read_orders  # noqa: E402

TARGET_RATIO = 5.0
FORECAST_TARGET_RATIO = 1.5
LOO_10M_TARGET_SECONDS = 60.0
DUCKDB_10M_TARGET_MB = 3 * 1024
BIG = 10_000_000


def make_orders(n_orders: int, seed: int = 0) -> pd.DataFrame:
    """Seeded synthetic orders: about 3.5 orders per customer on average."""
    rng = np.random.default_rng(seed)
    customers = max(1, int(n_orders / 3.5))
    # Order counts: geometric, so most customers order once or twice and a few many times.
    weights = rng.geometric(0.3, customers).astype(np.float64)
    who = rng.choice(customers, size=n_orders, p=weights / weights.sum())
    level = rng.lognormal(np.log(45.0), 0.6, customers)
    value = rng.lognormal(np.log(level[who]) - 0.125, 0.5)
    bulk = rng.random(n_orders) < 0.002
    value[bulk] *= rng.uniform(10.0, 40.0, bulk.sum())
    start = np.datetime64("2024-01-01")
    dates = start + rng.integers(0, 730, n_orders).astype("timedelta64[D]")
    return pd.DataFrame({
        "customer": np.char.add("C", who.astype(str)),
        "order_date": dates.astype(str),
        "order_value": np.round(value, 2).clip(0.01),
    })


def ensure_file(n_orders: int, seed: int) -> Path:
    folder = HERE / "data"
    folder.mkdir(exist_ok=True)
    path = folder / f"orders_{n_orders}_{seed}.csv"
    if not path.exists():
        make_orders(n_orders, seed).to_csv(path, index=False)
    return path


def peak_mb() -> float:
    # ru_maxrss is in kilobytes on Linux.
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def timed(label, func, rows, size, baseline=None, repeat=1):
    """Run func ``repeat`` times and keep the fastest (the least disturbed by other work)."""
    seconds = np.inf
    for _ in range(repeat):
        gc.collect()
        start = time.perf_counter()
        out = func()
        seconds = min(seconds, time.perf_counter() - start)
    rows.append({"orders": size, "stage": label, "seconds": seconds, "peak_mb": peak_mb()})
    ratio = "" if baseline is None else f"  ({seconds / baseline:.2f}x baseline)"
    print(f"  {label:<58} {seconds:8.3f} s{ratio}", flush=True)
    return out, seconds


def bench_size(n_orders: int, seed: int, rows: list, *, every_pair_at_10m: bool = False) -> None:
    path = ensure_file(n_orders, seed)
    print(f"{n_orders:,} orders ({path.name})", flush=True)

    def baseline():
        frame = pd.read_csv(path)
        return frame.groupby("customer")["order_value"].mean()

    _, base = timed("baseline: pd.read_csv + groupby mean (best of 3)", baseline, rows, n_orders, repeat=3)
    rows[-1]["ratio"] = 1.0

    def record(label, func, repeat=1):
        out, seconds = timed(label, func, rows, n_orders, base, repeat)
        rows[-1]["ratio"] = seconds / base
        return out

    result = record("read_orders (read, clean, row account)", lambda: read_orders(path))
    orders = result.orders
    stats = record("customer_statistics", lambda: customer_statistics(orders))

    try:
        from forecasting.shrinkage import METHODS, shrink
        from forecasting.variance import pooled_variance
    except ImportError:  # the estimators are not in this checkout
        METHODS = ()
    if METHODS:
        fit = record("pooled variance (classic)", lambda: pooled_variance(stats, model="classic"))
        n = stats["orders"].to_numpy(np.float64)
        m = stats["mean"].to_numpy(np.float64)
        s = fit.mean_variance(n)
        for method in METHODS:
            if method == "mta-segments":
                continue  # the synthetic file has no segment column
            kwargs = {"orders": n}
            if method.endswith("-cv"):
                codes = stats.index.get_indexer(orders["customer"])
                kwargs.update(codes=codes, values=orders["order_value"].to_numpy(np.float64))
            record(f"estimator {method}", lambda method=method, kwargs=kwargs: shrink(m, s, method=method, **kwargs))

    pairs = evaluation._combinations(list(evaluation.EXACT_METHODS), list(evaluation.EXACT_VARIANCES), stats=stats) \
        if "segment" in stats.columns else evaluation._combinations(
            [m for m in evaluation.EXACT_METHODS if m != "mta-segments"], list(evaluation.EXACT_VARIANCES), stats=stats)
    record(f"exact leave-one-out, {len(pairs)} closed-form method x variance pairs (best of 3)",
           lambda: evaluation._leave_one_out(orders, stats, pairs), repeat=3)
    if METHODS and (n_orders < BIG or every_pair_at_10m):
        every = evaluation._combinations(None, None, stats=stats)
        record(f"fast leave-one-out, all {len(every)} pairs (gamma-gamma, -cv approximate)",
               lambda: evaluation._leave_one_out(orders, stats, every))
        record(f"evaluate_methods: {len(pairs)} closed-form pairs, backtest, 500 bootstrap resamples",
               lambda: evaluation.evaluate_methods(orders, methods=sorted({m for m, _ in pairs}),
                                                   variances=list(evaluation.EXACT_VARIANCES), bootstrap=500))
    bench_forecast_steps(path, record)
    del result, orders, stats
    gc.collect()


def bench_forecast_steps(path: Path, record) -> None:
    """The steps of ``forecast --engine duckdb`` one by one, to show where its time goes."""
    try:
        import duckdb  # noqa: F401
    except ImportError:
        return
    from forecasting.engines import customer_statistics_from_file
    from forecasting.exports import write_csv
    from forecasting.forecasts import forecast_customers, forecasts_for_reading

    stats, _ = record("forecast step 1: duckdb engine (read, clean, row account, statistics)",
                      lambda: customer_statistics_from_file(path, engine="duckdb"))
    table = record(f"forecast step 2: forecast_customers, mta, {len(stats):,} customers",
                   lambda: forecast_customers(stats, method="mta"))
    with tempfile.TemporaryDirectory(prefix="bench-forecasts-") as folder:
        record(f"forecast step 3: write_csv of {len(table):,} forecasts, rounded for reading as the command does",
               lambda: write_csv(forecasts_for_reading(table), Path(folder) / "forecasts.csv"))


# ---------------------------------------------------------------------------
# Whole commands, each in its own process


def _high_water_mb(pid: int) -> float:
    """A live process's own resident high-water mark (``VmHWM``), in MB; 0 when gone."""
    try:
        with open(f"/proc/{pid}/status") as status:
            for line in status:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0  # kilobytes
    except OSError:
        pass
    return 0.0


def run_command(argv, *, cwd) -> dict:
    """Run ``argv`` as a child process; wall seconds and peak memory (MB).

    ``tree_mb`` is the largest resident size summed over the child and its
    descendants (sampled every 50 ms); ``process_mb`` is the child's own
    high-water mark (``VmHWM`` of its address space, read while it runs).
    ``ru_maxrss`` of a child is not used: on Linux it starts from the parent's
    resident size at the fork, so a benchmark that has grown would inflate it.
    """
    import psutil

    start = time.perf_counter()
    child = subprocess.Popen(argv, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=_as_a_user_runs_it())
    watched = psutil.Process(child.pid)
    tree_peak = 0
    own_peak = 0.0
    while True:
        pid, status, _ = os.wait4(child.pid, os.WNOHANG)
        if pid:
            break
        own_peak = max(own_peak, _high_water_mb(child.pid))
        try:
            total = watched.memory_info().rss
            for descendant in watched.children(recursive=True):
                try:
                    total += descendant.memory_info().rss
                except psutil.Error:
                    pass
            tree_peak = max(tree_peak, total)
        except psutil.Error:
            pass
        time.sleep(0.05)
    seconds = time.perf_counter() - start
    child.returncode = os.waitstatus_to_exitcode(status)
    errors = child.stderr.read().decode("utf-8", "replace")
    child.stderr.close()
    if child.returncode != 0:
        raise RuntimeError(f"{' '.join(map(str, argv))} exited with {child.returncode}: {errors[-2000:]}")
    return {"seconds": seconds, "tree_mb": max(tree_peak / 2**20, own_peak), "process_mb": own_peak}


def fastest_runs(runs: dict, times: dict, *, cwd) -> dict:
    """Each command of ``runs`` (key -> (label, argv)) run ``times[key]`` times, interleaved; per key,
    the fastest run's seconds and the largest peak memory of all its runs (memory does not shrink
    with load)."""
    best: dict = {}
    for attempt in range(max(times.values())):
        for key, (label, argv) in runs.items():
            if attempt >= times[key]:
                continue
            measured = run_command(argv, cwd=cwd)
            print(f"  [{attempt + 1}/{times[key]}] {label:<70} {measured['seconds']:8.2f} s "
                  f"{measured['tree_mb']:7.0f} MB", flush=True)
            if key not in best or measured["seconds"] < best[key]["seconds"]:
                peak = max(measured["tree_mb"], best.get(key, {}).get("tree_mb", 0.0))
                own = max(measured["process_mb"], best.get(key, {}).get("process_mb", 0.0))
                best[key] = dict(measured, tree_mb=peak, process_mb=own)
            else:
                best[key]["tree_mb"] = max(best[key]["tree_mb"], measured["tree_mb"])
                best[key]["process_mb"] = max(best[key]["process_mb"], measured["process_mb"])
    return best


def _as_a_user_runs_it() -> dict:
    """The commands' environment: Python keeps the compiled modules, as on a user's machine (a shell
    that sets PYTHONDONTWRITEBYTECODE would otherwise have every command compile the package again,
    which the baseline's pandas, compiled when installed, never does)."""
    env = dict(os.environ)
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    return env


def load_text() -> str:
    one, five, fifteen = os.getloadavg()
    return f"{one:.1f} / {five:.1f} / {fifteen:.1f}"


def bench_commands(n_orders: int, seed: int, engines, rows: list, *, repeat: int, evaluate_up_to: int,
                   baseline_repeat: int | None = None, repeat_by_engine: dict | None = None) -> None:
    """Baseline, ``forecast`` with each engine and ``evaluate``, each as a user runs it.

    Every command runs ``repeat`` times (``repeat_by_engine`` may say otherwise for a
    forecast engine), the baseline ``baseline_repeat`` times (default: as often),
    interleaved; the fastest run of each is kept."""
    baseline_repeat = repeat if baseline_repeat is None else baseline_repeat
    path = ensure_file(n_orders, seed)
    root = HERE.parent
    python = sys.executable
    out = Path(tempfile.mkdtemp(prefix="bench-forecasts-"))
    compileall.compile_dir(root / "forecasting", quiet=1)  # as after the first run on a user's machine
    load_before = load_text()
    print(f"{n_orders:,} orders, whole commands (load average before: {load_before})", flush=True)
    runs = {"baseline": ("baseline: python -c \"pd.read_csv + groupby mean\"",
                         [python, "-c", "import sys, pandas as pd; "
                          "pd.read_csv(sys.argv[1]).groupby('customer')['order_value'].mean()", str(path)])}
    runs["default"] = ("forecast (no options: pandas engine, method chosen by the shop's own check)",
                       [python, "-m", "forecasting", "forecast", str(path), "--out", str(out / "default.csv")])
    for engine in engines:
        runs[engine] = (f"forecast --method mta --engine {engine}",
                        [python, "-m", "forecasting", "forecast", str(path), "--out", str(out / f"{engine}.csv"),
                         "--method", "mta", "--engine", engine])
    if n_orders <= evaluate_up_to:
        runs["evaluate"] = ("evaluate --engine pandas (all methods, backtest, 500 bootstrap resamples)",
                            [python, "-m", "forecasting", "evaluate", str(path), "--engine", "pandas"])
    times = {key: (baseline_repeat if key == "baseline" else (repeat_by_engine or {}).get(key, repeat))
             for key in runs}
    best = fastest_runs(runs, times, cwd=root)
    base = best["baseline"]["seconds"]
    load_after = load_text()
    for key, (label, _) in runs.items():
        rows.append({"orders": n_orders, "stage": label, "seconds": best[key]["seconds"],
                     "ratio": best[key]["seconds"] / base, "peak_mb": best[key]["tree_mb"],
                     "process_mb": best[key]["process_mb"], "repeat": times[key],
                     "load": f"{load_before} -> {load_after}"})
    if "duckdb" in engines:
        from forecasting.engines import measure_statistics_run

        measured = measure_statistics_run(str(path), engine="duckdb", memory_limit="2GB")
        label = "duckdb engine alone: customer_statistics_from_file, memory_limit 2GB (fresh process)"
        print(f"  {label:<74} {measured['seconds']:8.2f} s {measured['peak_memory_mb']:7.0f} MB", flush=True)
        rows.append({"orders": n_orders, "stage": label, "seconds": measured["seconds"],
                     "ratio": measured["seconds"] / base, "peak_mb": measured["peak_memory_mb"],
                     "process_mb": measured["peak_memory_mb"], "repeat": 1, "load": load_text()})
    for file in out.iterdir():
        file.unlink()
    out.rmdir()


#: The order-line export ``check`` is timed on: the demo shop's generator with this many customers
#: (about 1.1 million lines, 89 MB; see bench/big_shop.py).
LINE_EXPORT_CUSTOMERS = 102_000


def bench_line_export(rows: list, *, repeat: int) -> None:
    """``check`` on an order-line export with everything a real one holds (money as text, statuses,
    refunds, a broken row), against pandas reading the same file (skipping the broken row, which
    it cannot read otherwise), interleaved, fastest of ``repeat`` kept."""
    import big_shop

    path = HERE / "data" / f"plant_shop_lines_{LINE_EXPORT_CUSTOMERS}.csv"
    if not path.exists():
        big_shop.write_big_shop(path, customers=LINE_EXPORT_CUSTOMERS)
    with open(path, "rb") as handle:
        lines = sum(block.count(b"\n") for block in iter(lambda: handle.read(1 << 24), b"")) - 1
    size_mb = path.stat().st_size / 1e6
    python = sys.executable
    runs = {"baseline": ("baseline: python -c \"pd.read_csv(F, on_bad_lines='skip')\"",
                         [python, "-c", "import sys, pandas as pd; pd.read_csv(sys.argv[1], on_bad_lines='skip')",
                          str(path)]),
            "check": ("check (read, clean, row account)", [python, "-m", "forecasting", "check", str(path)])}
    load_before = load_text()
    print(f"order-line export, {lines:,} lines, {size_mb:.0f} MB (load average before: {load_before})", flush=True)
    best = fastest_runs(runs, dict.fromkeys(runs, repeat), cwd=HERE.parent)
    load_after = load_text()
    for key, (label, _) in runs.items():
        rows.append({"lines": lines, "size_mb": size_mb, "stage": label, "seconds": best[key]["seconds"],
                     "ratio": best[key]["seconds"] / best["baseline"]["seconds"], "peak_mb": best[key]["tree_mb"],
                     "memory_ratio": best[key]["tree_mb"] / best["baseline"]["tree_mb"], "repeat": repeat,
                     "load": f"{load_before} -> {load_after}"})


def growth_rows(rows):
    """Time per stage at each size over the time at the size ten times smaller."""
    by_stage: dict = {}
    for row in rows:
        by_stage.setdefault(row["stage"], {})[row["orders"]] = row["seconds"]
    found = []
    for stage, times in by_stage.items():
        sizes = sorted(times)
        steps = [(small, large) for small, large in zip(sizes, sizes[1:]) if large == 10 * small]
        if steps:
            found.append((stage, [(small, large, times[large] / times[small]) for small, large in steps]))
    return found


def write_markdown(rows, command_rows, path: Path, *, started: str, line_rows=()) -> None:
    one, five, fifteen = os.getloadavg()
    lines = [
        "# Benchmark results",
        "",
        f"Machine: {platform.machine()}, {os.cpu_count()} cores, "
        f"{_memory_gb():.0f} GB memory, Python {platform.python_version()}, pandas {pd.__version__}, "
        f"numpy {np.__version__}{_engine_versions()}. Run {started} (UTC) by `python bench/run.py "
        f"{' '.join(sys.argv[1:])}`. Load average (1 / 5 / 15 min) at the end: "
        f"{one:.1f} / {five:.1f} / {fifteen:.1f} on {os.cpu_count()} cores; other jobs shared the machine, "
        "so times are best-of-N where N > 1.",
        "",
    ]
    if command_rows:
        lines += [
            "## Whole commands, as a user runs them",
            "",
            "Each row is one process started from the shell, timed from start to exit (interpreter start-up "
            "included; the package's modules compiled beforehand, as after a user's first run). Ratio = time / the baseline command's time on the same file "
            "(`python -c \"import pandas as pd; pd.read_csv(F).groupby('customer')['order_value'].mean()\"`), "
            "runs interleaved, fastest of N kept. Peak memory: the largest resident size summed over the "
            "command's process tree (dask workers included), and the command's own process. "
            f"Targets: `forecast` with no options and with `--method mta` (pandas engine) on 2,000,000 and "
            f"10,000,000 orders <= {FORECAST_TARGET_RATIO:g}x the baseline, peak under 3 GB at 10,000,000; "
            f"`evaluate` on 1,000,000 orders <= {TARGET_RATIO:g}x; the duckdb engine on 10,000,000 orders under "
            f"{DUCKDB_10M_TARGET_MB / 1024:g} GB.",
            "",
            "| orders | command | best of | seconds | ratio to baseline | peak memory, tree (MB) | "
            "peak memory, own process (MB) | load average during |",
            "| ---: | --- | ---: | ---: | ---: | ---: | ---: | --- |",
        ]
        for row in command_rows:
            lines.append(f"| {row['orders']:,} | {row['stage']} | {row['repeat']} | {row['seconds']:.2f} | "
                         f"{row['ratio']:.2f} | {row['peak_mb']:.0f} | {row['process_mb']:.0f} | {row['load']} |")
        lines += [""] + _growth_table(command_rows) + [""]
    if line_rows:
        lines += [
            "## An order-line export, checked",
            "",
            "`python -m forecasting check F` on an order-line export of the demo shop's kind "
            f"(bench/big_shop.py with {LINE_EXPORT_CUSTOMERS:,} customers: money written as text, statuses, "
            "refunds, cancelled and test orders, a duplicate and a broken row), against pandas reading the "
            "same file. Each run is its own process, runs interleaved, fastest of N kept; peak memory is "
            "the largest of the runs.",
            "",
            "| lines | MB | command | best of | seconds | ratio to pandas | peak memory (MB) | memory ratio | "
            "load average during |",
            "| ---: | ---: | --- | ---: | ---: | ---: | ---: | ---: | --- |",
        ]
        for row in line_rows:
            lines.append(f"| {row['lines']:,} | {row['size_mb']:.0f} | {row['stage']} | {row['repeat']} | "
                         f"{row['seconds']:.2f} | {row['ratio']:.2f} | {row['peak_mb']:.0f} | "
                         f"{row['memory_ratio']:.2f} | {row['load']} |")
        lines.append("")
    if rows:
        lines += [
            "## Library stages, in one process",
            "",
            "Ratio = time / baseline time (pd.read_csv + groupby mean on the same file, same process). "
            f"Targets: exact leave-one-out of every closed-form method x variance on 1,000,000 orders "
            f"<= {TARGET_RATIO:g}x baseline, and on 10,000,000 orders <= {LOO_10M_TARGET_SECONDS:g} s within "
            "24 GB. Peak memory is the process high-water mark after the stage. At 10,000,000 orders the "
            "all-pairs fast leave-one-out and evaluate_methods rows are left out unless "
            "`--every-pair-at-10m` is given.",
            "",
            "| orders | stage | seconds | ratio to baseline | peak memory (MB) |",
            "| ---: | --- | ---: | ---: | ---: |",
        ]
        for row in rows:
            lines.append(f"| {row['orders']:,} | {row['stage']} | {row['seconds']:.3f} | {row['ratio']:.2f} | "
                         f"{row['peak_mb']:.0f} |")
        lines += [""] + _growth_table(rows)
    path.write_text("\n".join(lines) + "\n")


def _growth_table(rows):
    found = growth_rows(rows)
    if not found:
        return []
    lines = ["Growth with the number of orders (time at 10x the orders / time at the smaller size; "
             "10.0 is linear; fixed costs such as start-up push small sizes below 10):", "",
             "| stage | step | time ratio |", "| --- | --- | ---: |"]
    for stage, steps in found:
        for small, large, ratio in steps:
            lines.append(f"| {stage} | {small:,} -> {large:,} | {ratio:.1f} |")
    return lines


def _memory_gb() -> float:
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    except (ValueError, OSError):
        return float("nan")


def _engine_versions() -> str:
    found = []
    for name in ("duckdb", "dask", "distributed"):
        try:
            found.append(f"{name} {__import__(name).__version__}")
        except ImportError:
            pass
    return (", " + ", ".join(found)) if found else ""


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sizes", default="100000,1000000", help="comma-separated order counts")
    parser.add_argument("--with-10m", action="store_true", help="also run 10,000,000 orders")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", default=str(HERE / "results.md"))
    parser.add_argument("--commands", action="store_true",
                        help="also time whole commands as separate processes (forecast per engine, evaluate)")
    parser.add_argument("--no-stages", action="store_true", help="skip the in-process library stages")
    parser.add_argument("--engines", default="pandas,duckdb,dask", help="engines for the forecast command")
    parser.add_argument("--repeat", type=int, default=3,
                        help="repeats of each command below 10M orders, fastest kept (at 10M the "
                             "commands run once, the baseline this many times)")
    parser.add_argument("--evaluate-up-to", type=int, default=1_000_000,
                        help="largest size at which the evaluate command is timed")
    parser.add_argument("--every-pair-at-10m", action="store_true",
                        help="at 10M also run the all-pairs fast leave-one-out and evaluate_methods")
    args = parser.parse_args(argv)
    sizes = [int(part) for part in args.sizes.split(",") if part.strip()]
    if args.with_10m:
        sizes.append(BIG)
    engines = [part.strip() for part in args.engines.split(",") if part.strip()]
    unknown = [e for e in engines if e not in ("pandas", "duckdb", "dask")]
    if unknown:
        parser.error(f"--engines: unknown engine {unknown[0]!r} (choose from pandas, duckdb, dask)")
    if args.repeat < 1:
        parser.error(f"--repeat must be 1 or more (got {args.repeat})")
    started = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M")
    rows: list = []
    command_rows: list = []
    line_rows: list = []
    if args.commands:
        bench_line_export(line_rows, repeat=args.repeat)
    for size in sizes:
        if args.commands:
            # At 10M orders the slow engines run once; the duckdb one, made for such files, as often as asked.
            bench_commands(size, args.seed, engines, command_rows, repeat=1 if size >= BIG else args.repeat,
                           baseline_repeat=args.repeat, evaluate_up_to=args.evaluate_up_to,
                           repeat_by_engine={"duckdb": args.repeat})
            write_markdown(rows, command_rows, Path(args.out), started=started, line_rows=line_rows)
        if not args.no_stages:
            bench_size(size, args.seed, rows, every_pair_at_10m=args.every_pair_at_10m)
        write_markdown(rows, command_rows, Path(args.out), started=started, line_rows=line_rows)  # partial results survive a stop
    loo = [r for r in rows if r["stage"].startswith("exact leave-one-out") and r["orders"] == 1_000_000]
    if loo:
        verdict = "meets" if loo[0]["ratio"] <= TARGET_RATIO else "misses"
        print(f"exact leave-one-out at 1M orders: {loo[0]['ratio']:.2f}x baseline ({verdict} the "
              f"{TARGET_RATIO:g}x target)")
    loo = [r for r in rows if r["stage"].startswith("exact leave-one-out") and r["orders"] == BIG]
    if loo:
        verdict = "meets" if loo[0]["seconds"] <= LOO_10M_TARGET_SECONDS else "misses"
        print(f"exact leave-one-out at 10M orders: {loo[0]['seconds']:.1f} s, peak {loo[0]['peak_mb']:.0f} MB "
              f"({verdict} the {LOO_10M_TARGET_SECONDS:g} s target)")
    for row in command_rows:
        if row["orders"] >= 2_000_000 and row["stage"].startswith("forecast"):
            verdict = "meets" if row["ratio"] <= FORECAST_TARGET_RATIO else "misses"
            print(f"{row['stage']} at {row['orders']:,} orders: {row['ratio']:.2f}x the baseline command ({verdict} the "
                  f"{FORECAST_TARGET_RATIO:g}x target)")
        if row["orders"] == BIG and row["stage"].startswith("duckdb engine alone"):
            verdict = "meets" if row["peak_mb"] < DUCKDB_10M_TARGET_MB else "misses"
            print(f"duckdb engine at 10M orders: peak {row['peak_mb']:.0f} MB ({verdict} the 3 GB target)")
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
