"""Held-out orders: what holding out one order changes, for every order at once.

In: the per-customer statistics and the orders' customers and values.
Out: a :class:`HeldOut` with, for every order of every customer with at least two orders
(``H`` held-out orders), that customer's count, average and sum of squares without it, and
the shop-wide sums every estimator is built from, updated in O(1) per held-out order.

Removing order x from customer t changes only that customer's statistics,

    n' = n - 1,  m' = (n m - x) / (n - 1),  SS' = SS - (x - m)^2 n / (n - 1),

so a shop-wide sum over customers, sum_s f(n_s, m_s), becomes
sum_s f(n_s, m_s) - f(n_t, m_t) + f(n_t - 1, m_t'). When f also depends on shop-wide
numbers that change with the held-out order (a weight 1 / (tau2 + sigma2 / n)), customers
are grouped by their number of orders: the sum runs over the K distinct counts, O(K) per
held-out order (:meth:`Side.sums_after`). Every estimator's leave-one-out twin
(:mod:`forecasting.estimators`, :mod:`forecasting.variance`) is written over these sums,
and its full-data fit over the same formulas with sums over all customers.

Sums are kept relative to an origin (the unweighted mean of the customers' averages), so
that updating sums of squares does not lose digits to cancellation.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

#: Held-out orders x order-count groups evaluated at once (floats): bounds memory.
CHUNK_CELLS = 1 << 18
_WORKERS = min(4, os.cpu_count() or 1)


_POOL = None


def rows_in_blocks(n_rows: int, width: int, run) -> None:
    """Call ``run(rows)`` with slices of about CHUNK_CELLS / width rows (in parallel threads of
    one pool kept for the process: numpy releases the interpreter lock inside its loops)."""
    global _POOL
    chunk = max(1, CHUNK_CELLS // max(1, width))
    blocks = [slice(start, min(n_rows, start + chunk)) for start in range(0, n_rows, chunk)]
    if len(blocks) > 1 and _WORKERS > 1:
        if _POOL is None:
            _POOL = ThreadPoolExecutor(max_workers=_WORKERS)
        list(_POOL.map(run, blocks))
    else:
        for rows in blocks:
            run(rows)


def rows_of(values, rows, k):
    """``values[rows]`` shaped to broadcast against k: (rows, 1) for a 2-D k, (rows,) for 1-D."""
    part = np.asarray(values)[rows]
    return part[:, None] if np.ndim(k) == 2 else part


class Side:
    """The customers' averages on one scale (money or log) and their change per held-out order.

    Parameters
    ----------
    counts, means, sum_sq : numpy.ndarray
        n_t, the average and the sum of squared deviations of every customer (T).
    held_customer : numpy.ndarray of int
        Position of each held-out order's customer (H).
    held_values : numpy.ndarray
        The held-out orders' values on this scale (H).
    order_sums : (float, float)
        Sum and sum of squares, relative to ``origin``, of all order values on this scale
        (for the fallback spread when no customer keeps two orders).
    origin : float, optional
        Default: the mean of ``means``.
    """

    def __init__(self, counts, means, sum_sq, held_customer, held_values, order_sums, *, origin=None):
        n = np.asarray(counts, dtype=np.float64)
        means = np.asarray(means, dtype=np.float64)
        self.T = n.size
        self.counts = n
        self.means = means
        self.origin = float(means.mean()) if origin is None and self.T else float(origin or 0.0)
        d = means - self.origin
        self.d = d
        self.sum_sq = np.asarray(sum_sq, dtype=np.float64)
        self.N = float(n.sum())
        self.dof = float((n - 1.0).sum())
        self.total_ss = float(self.sum_sq.sum())
        self.sum_d = float(d.sum())
        self.sum_d2 = float(d @ d)
        self.sum_inv_n = float((1.0 / n).sum()) if self.T else 0.0
        self.order_sum, self.order_sum2 = (float(order_sums[0]), float(order_sums[1]))

        t = np.asarray(held_customer, dtype=np.int64)
        self.t = t
        self.H = t.size
        self.n = n[t]
        self.n_after = self.n - 1.0
        self.value = np.asarray(held_values, dtype=np.float64)
        self.d_before = d[t]
        step = (means[t] - self.value) / self.n_after
        self.d_after = self.d_before + step
        self.mean_after = self.origin + self.d_after
        removed = (self.value - means[t]) ** 2 * self.n / self.n_after
        self.ss_after = np.maximum(self.sum_sq[t] - removed, 0.0)
        self.ss_removed = self.sum_sq[t] - self.ss_after

        # Customers grouped by order count: the K distinct counts and per-group sums of columns.
        self.ks, self.group_of = np.unique(n, return_inverse=True)
        self._columns = {}
        self._group_sums = {}
        self.add_column("one", np.ones(self.T), np.ones(self.H), np.ones(self.H))
        self.add_column("d", d, self.d_before, self.d_after)
        self.add_column("d2", d * d, self.d_before ** 2, self.d_after ** 2)
        self._cache = {}

    # -- columns summed by group ------------------------------------------------------------

    def add_column(self, name, per_customer, before, after):
        """A per-customer column to sum by order-count group, with its value for each held-out
        order's customer before and after the removal."""
        self._columns[name] = (np.asarray(before, dtype=np.float64), np.asarray(after, dtype=np.float64))
        self._group_sums[name] = np.bincount(self.group_of, weights=per_customer, minlength=self.ks.size)

    def sums_after(self, weight, names, subset=None):
        """sum_s weight(n_s) column_s over customers, after each removal, for several columns.

        Parameters
        ----------
        weight : callable
            ``weight(k, rows)`` gives the weight of a customer with k orders for the held-out
            orders ``rows`` (a slice of the held-out orders, or of ``subset``); k has shape
            (rows, K) for the groups and (rows,) for the held-out customer before and after the
            removal.
        names : sequence of str
            Columns (``"one"``, ``"d"``, ``"d2"`` or added with :meth:`add_column`).
        subset : array of int, optional
            Only these held-out orders (``rows`` then counts within the subset).

        Returns
        -------
        numpy.ndarray
            Shape (len(names), H), or (len(names), len(subset)).
        """
        return self.sums_after_many(lambda k, rows: (weight(k, rows),), names, subset)[0]

    def sums_after_many(self, weights, names, subset=None):
        """:meth:`sums_after` for several weights computed together: ``weights(k, rows)`` returns a
        tuple of arrays; the result has shape (len(weights), len(names), H)."""
        pick = slice(None) if subset is None else np.asarray(subset)
        n_old, n_new = self.n[pick], self.n_after[pick]
        before = np.stack([self._columns[name][0][pick] for name in names])
        after = np.stack([self._columns[name][1][pick] for name in names])
        H = n_old.size
        table = np.column_stack([self._group_sums[name] for name in names])  # K x columns
        out = None

        def run(rows):
            nonlocal out
            count = rows.stop - rows.start
            k = np.broadcast_to(self.ks, (count, self.ks.size))
            groups = weights(k, rows)
            olds = weights(n_old[rows], rows)
            news = weights(n_new[rows], rows)
            if out is None:
                out = np.empty((len(groups), len(names), H))
            for j, (w, w_old, w_new) in enumerate(zip(groups, olds, news)):
                block = np.broadcast_to(w, k.shape) @ table  # rows x columns
                out[j, :, rows] = (block.T - w_old * before[:, rows] + w_new * after[:, rows])

        if H == 0:
            return np.empty((len(weights(np.ones((0, self.ks.size)), slice(0, 0))), len(names), 0))
        first = slice(0, min(H, max(1, CHUNK_CELLS // max(1, self.ks.size))))
        run(first)  # sizes the output
        rest = H - first.stop
        if rest > 0:
            offset = first.stop
            rows_in_blocks(rest, self.ks.size, lambda rows: run(slice(rows.start + offset, rows.stop + offset)))
        return out

    # -- closed-form sums after the removal ---------------------------------------------------

    def unweighted_centre_after(self):
        """Unweighted mean of the customers' averages, relative to origin."""
        return (self.sum_d + self.d_after - self.d_before) / self.T

    def order_weighted_centre_after(self):
        """sum n m / sum n after the removal, relative to origin."""
        total = self.counts @ self.d - self.n * self.d_before + self.n_after * self.d_after
        return total / (self.N - 1.0)

    def var_means_after(self):
        """var(m, ddof=1) over customers after the removal (NaN with one customer)."""
        if "var_means" not in self._cache:
            if self.T < 2:
                self._cache["var_means"] = np.full(self.H, np.nan)
            else:
                s1 = self.sum_d + self.d_after - self.d_before
                s2 = self.sum_d2 + self.d_after ** 2 - self.d_before ** 2
                self._cache["var_means"] = np.maximum((s2 - s1 * s1 / self.T) / (self.T - 1.0), 0.0)
        return self._cache["var_means"]

    def count_weighted_after(self):
        """(sum n, sum n d, sum n d^2) over customers after each removal."""
        n, d = self.counts, self.d
        qn = self.N - 1.0
        qd = float(n @ d) - self.n * self.d_before + self.n_after * self.d_after
        qd2 = float(n @ (d * d)) - self.n * self.d_before ** 2 + self.n_after * self.d_after ** 2
        return np.full(self.H, qn), qd, qd2

    def sum_inv_n_after(self):
        return self.sum_inv_n - 1.0 / self.n + 1.0 / self.n_after

    def fewest_orders_after(self):
        """The smallest order count among customers after each removal."""
        counts = self.counts
        low = float(counts.min())
        owners = np.flatnonzero(counts == low)
        second = float(np.min(counts[counts > low])) if np.any(counts > low) else low
        others = np.where((owners.size == 1) & (self.t == owners[0]), second, low)
        return np.minimum(others, self.n_after)

    def pooled_spread_after(self):
        """sum SS / sum (n - 1) after the removal, with the fallbacks of
        :func:`forecasting.variance.classic_pooled_variance`: the sample variance of all
        remaining orders when no customer keeps two orders; zero with a single order left."""
        if "pooled" in self._cache:
            return self._cache["pooled"]
        dof = self.dof - 1.0
        if dof > 0:
            result = np.maximum((self.total_ss - self.ss_removed) / dof, 0.0)
        else:
            remaining = self.N - 1.0
            if remaining < 2:
                result = np.zeros(self.H)
            else:
                v = self.value - self.origin
                s1 = self.order_sum - v
                s2 = self.order_sum2 - v * v
                result = np.maximum((s2 - s1 * s1 / remaining) / (remaining - 1.0), 0.0)
        self._cache["pooled"] = result
        return result


@dataclass
class HeldOut:
    """Every order of every customer with at least two orders, each held out in turn."""

    stats: pd.DataFrame
    customer: np.ndarray  # position in stats of each held-out order's customer
    value: np.ndarray  # the held-out order's value (money)
    money: Side
    log: Side
    segment_codes: np.ndarray | None = None  # segment number of every customer, when segments are given
    orders: pd.DataFrame | None = None  # the orders held out (for fits that need order-level values)
    codes: np.ndarray | None = None  # position in stats of every order's customer (all of ``orders``)
    cache: dict = field(default_factory=dict)

    @property
    def past_orders(self):
        return self.money.n_after

    def side(self, scale: str) -> Side:
        return self.log if scale == "log" else self.money

    def cached(self, key, compute):
        if key not in self.cache:
            self.cache[key] = compute()
        return self.cache[key]


def order_value_sums(values, origins) -> np.ndarray:
    """Sums of (x - origin) and (x - origin)^2 of order values, money and log (for the fallback
    spread; a cluster adds them up over its partitions)."""
    x = np.asarray(values, dtype=np.float64)
    money = x - origins[0]
    log = np.log(x) - origins[1]
    return np.array([money.sum(), money @ money, log.sum(), log @ log])


def origins_of(stats: pd.DataFrame) -> tuple[float, float]:
    """The origins the sums are kept relative to: the unweighted means of the averages."""
    return (float(stats["mean"].to_numpy(np.float64).mean()), float(stats["log_mean"].to_numpy(np.float64).mean()))


def customer_positions(orders: pd.DataFrame, stats: pd.DataFrame) -> np.ndarray:
    """Position in ``stats`` of every order's customer."""
    codes, names = pd.factorize(orders["customer"], sort=True)
    if len(names) == len(stats) and np.array_equal(np.asarray(names, dtype=object),
                                                   stats.index.to_numpy(dtype=object)):
        return codes  # the usual case: stats = customer_statistics(orders), sorted the same way
    codes = stats.index.get_indexer(orders["customer"])
    if np.any(codes < 0):
        raise ValueError("every order's customer must be in the statistics table")
    return codes


def held_out_orders(orders: pd.DataFrame, stats: pd.DataFrame, *, order_sums=None, codes=None) -> HeldOut:
    """Hold out, one at a time, every order of every customer with at least two orders.

    Parameters
    ----------
    orders : pandas.DataFrame
        ``customer`` and ``order_value`` of the orders to hold out (all of a shop's orders, or
        one partition of them on a cluster).
    stats : pandas.DataFrame
        Per-customer statistics of the whole shop.
    order_sums : array of 4 floats, optional
        :func:`order_value_sums` over all the shop's orders (default: over ``orders``).
    codes : array of int, optional
        :func:`customer_positions` of ``orders``, when already known.
    """
    codes = customer_positions(orders, stats) if codes is None else np.asarray(codes, dtype=np.int64)
    counts = stats["orders"].to_numpy(np.float64)
    values = orders["order_value"].to_numpy(dtype=np.float64)
    keep = counts[codes] >= 2
    t = codes[keep]
    x = values[keep]
    origins = origins_of(stats) if len(stats) else (0.0, 0.0)
    sums = order_value_sums(values, origins) if order_sums is None else np.asarray(order_sums, dtype=np.float64)
    money = Side(counts, stats["mean"].to_numpy(np.float64), stats["sum_sq_dev"].to_numpy(np.float64), t, x,
                 sums[:2], origin=origins[0])
    log = Side(counts, stats["log_mean"].to_numpy(np.float64), stats["log_sum_sq_dev"].to_numpy(np.float64), t,
               np.log(x), sums[2:], origin=origins[1])
    segments = None
    if "segment" in stats.columns:
        labels = pd.factorize(stats["segment"].astype("string").fillna(""), sort=True)[0]
        segments = np.unique(labels, return_inverse=True)[1].astype(np.int64)
    return HeldOut(stats=stats, customer=t, value=x, money=money, log=log, segment_codes=segments, orders=orders,
                   codes=codes)
