"""Measuring one engine run: wall time and peak memory, in a fresh process.

In: a file and the options of :func:`forecasting.engines.customer_statistics_from_file`.
Out: a dict with ``seconds``, ``peak_memory_mb`` (the child process's peak resident
memory, everything included: Python, pandas, duckdb's buffers), ``customers``,
``rows_read`` and ``orders``.

A fresh process is used because the peak resident memory of a process only ever grows:
measured in the caller it would include whatever the caller did before. This is for
``bench/``; tests never time anything.
"""

from __future__ import annotations

import multiprocessing
import time

__all__ = ["measure_statistics_run"]


def _peak_kb() -> float:
    """This process's peak resident memory in kilobytes.

    Linux's ``VmHWM`` (the high-water mark of this process's own memory) when there is one: the
    ``ru_maxrss`` of ``getrusage`` survives ``exec``, so a fresh process started by a big one would
    report the big one's peak."""
    import resource

    try:
        with open("/proc/self/status") as status:
            for line in status:
                if line.startswith("VmHWM:"):
                    return float(line.split()[1])
    except OSError:
        pass
    return float(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)  # kilobytes on Linux


def _child(queue, source, options):
    from . import customer_statistics_from_file

    try:
        start = time.perf_counter()
        stats, account = customer_statistics_from_file(source, **options)
        seconds = time.perf_counter() - start
        queue.put({"seconds": seconds, "peak_memory_mb": _peak_kb() / 1024.0, "customers": int(len(stats)),
                   "rows_read": int(account["rows_read"]), "orders": int(account["orders"])})
    except Exception as problem:  # reported to the caller, never swallowed
        queue.put({"error": f"{type(problem).__name__}: {problem}"})


def measure_statistics_run(source, *, engine="duckdb", timeout=3600.0, **options) -> dict:
    """Run :func:`~forecasting.engines.customer_statistics_from_file` in a fresh process and measure it.

    Parameters
    ----------
    source : str or path
        The order file (or, for the scale engines, a glob or list of files).
    engine : str, default "duckdb"
        As for :func:`~forecasting.engines.customer_statistics_from_file`.
    timeout : float
        Seconds to wait for the child before giving up.
    **options
        Passed on (``memory_limit=``, ``threads=``, column options...).

    Returns
    -------
    dict
        ``engine, seconds, peak_memory_mb, customers, rows_read, orders``.

    Raises
    ------
    RuntimeError
        When the run failed or did not finish in time (with the child's message).
    """
    context = multiprocessing.get_context("spawn")
    queue = context.Queue()
    child = context.Process(target=_child, args=(queue, source, dict(options, engine=engine)))
    child.start()
    try:
        result = queue.get(timeout=timeout)
    except Exception:
        child.terminate()
        raise RuntimeError(f"the {engine} run did not finish within {timeout:.0f} s") from None
    finally:
        child.join(timeout=60)
    if "error" in result:
        raise RuntimeError(f"the {engine} run failed: {result['error']}")
    return {"engine": engine, **result}
