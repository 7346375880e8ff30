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

import itertools
import math
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

#: Held-out orders x order-count groups evaluated at once (floats): bounds memory.
CHUNK_CELLS = 1 << 18
_WORKERS = min(4, os.cpu_count() or 1)


_POOL = None


def thread_pool():
    """The pool of worker threads kept for the process (None on one core)."""
    global _POOL
    if _WORKERS <= 1:
        return None
    if _POOL is None:
        _POOL = ThreadPoolExecutor(max_workers=_WORKERS)
    return _POOL


def rows_in_blocks(n_rows: int, width: int, run) -> None:
    """Call ``run(rows)`` with slices of about CHUNK_CELLS / width rows (in parallel threads of
    one pool kept for the process: numpy releases the interpreter lock inside its loops)."""
    chunk = max(1, CHUNK_CELLS // max(1, width))
    blocks = [slice(start, min(n_rows, start + chunk)) for start in range(0, n_rows, chunk)]
    pool = thread_pool() if len(blocks) > 1 else None
    if pool is not None:
        list(pool.map(run, blocks))
    else:
        for rows in blocks:
            run(rows)


def rows_of(values, rows, k):
    """``values[rows]`` shaped to broadcast against k: (rows, 1) for a 2-D k, (rows,) for 1-D."""
    part = np.asarray(values)[rows]
    return part[:, None] if np.ndim(k) == 2 else part


#: Held-out orders whose |delta| is at most this share of the smallest b(k) get the power series
#: of :meth:`Side.power_sums_after` (its terms then shrink at least fourfold each), in tiers of
#: that share, each with the number of terms its largest share needs.
SERIES_RADIUS = 0.25
SERIES_TIERS = (2.0 ** -24, 2.0 ** -12, 2.0 ** -6, SERIES_RADIUS)
#: Held-out orders handled at a time in the sums (temporaries of this many floats stay in cache).
ROW_BLOCK = 1 << 13


def _binomial_negative(power, terms):
    """binom(-p, j) for j = 0..terms: (-1)^j (p + j - 1)! / (j! (p - 1)!)."""
    out = np.empty(terms + 1)
    out[0] = 1.0
    for j in range(1, terms + 1):
        out[j] = -out[j - 1] * (power + j - 1) / j
    return out


def _series_terms(q, power):
    """The last power j of the series needed: binom(p + j, j + 1) q^(j + 1) below 2^-60 (at most 200)."""
    if q == 0:
        return 0
    bound, j = 1.0, 0
    while j < 200:
        bound *= q * (power + j) / (j + 1)  # binom(p + j, j + 1) q^(j + 1)
        if bound < 2.0 ** -60:
            return j
        j += 1
    return j


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

    def power_sums_after(self, scale, base, delta, powers, names, subset=None):
        """sum_s a(n_s) (b(n_s) + delta)^-p column_s over customers after each removal, for every
        power p in ``powers`` and every column in ``names``.

        Parameters
        ----------
        scale, base : callable
            a(k) and b(k) > 0 for an array of order counts k (the same for every held-out order).
        delta : numpy.ndarray
            One value per held-out order (or per order of ``subset``), with b(k) + delta > 0.
        powers : sequence of int
            The powers p >= 1, in increasing order.
        names : sequence of str
            Columns, as for :meth:`sums_after`.
        subset : array of int, optional
            Only these held-out orders.

        Returns
        -------
        numpy.ndarray
            Shape (len(powers), len(names), rows).

        Notes
        -----
        The same sums as :meth:`sums_after` with the weight a(k) (b(k) + delta)^-p, computed
        without going over the order-count groups for every held-out order: where |delta| is
        at most ``SERIES_RADIUS`` times the smallest b(k), the sum over the groups is the power
        series

            sum_k C_k a_k (b_k + delta)^-p = sum_j binom(-p, j) delta^j sum_k C_k a_k b_k^(-p-j),

        whose coefficients are sums over the K groups made once, taken to the term at which
        binom(p + j - 1, j) q^j, q = |delta| / min b, falls below 2^-60 of the first (each
        term of the tail is bounded so, relative to the first term's sum of magnitudes); the
        rest of the held-out orders, and any with q above the radius, go over the groups. The
        held-out customer's own weight before and after the removal is computed exactly. On a
        large shop one order moves the shop-wide numbers by about 1/N, so q is tiny and two or
        three terms do.
        """
        if list(powers) != sorted(powers) or min(powers) < 1:
            raise ValueError(f"powers must be 1 or more, in increasing order (got {powers})")
        pick = slice(None) if subset is None else np.asarray(subset)
        delta = np.asarray(delta, dtype=np.float64)
        n_old, n_new = self.n[pick], self.n_after[pick]
        rows = delta.size
        table = np.column_stack([self._group_sums[name] for name in names])  # K x columns
        ks = self.ks
        top = max(powers)
        out = np.empty((len(powers), len(names), rows))
        if rows == 0:
            return out
        # The series is centred at the median delta: b(k) + median, and each delta less it.
        middle = float(np.median(delta))
        a_k = np.asarray(scale(ks), dtype=np.float64) + np.zeros(ks.size)
        b_k = np.asarray(base(ks), dtype=np.float64) + middle
        own = delta
        delta = delta - middle
        smallest = float(b_k.min())
        ratio = np.abs(delta) / smallest
        inverse = 1.0 / b_k
        done = np.zeros(rows, dtype=bool)
        # Held-out orders in tiers of q (most move the shop-wide numbers by about 1/N and need two or
        # three terms; a few big orders need more), each tier with the terms its largest q needs.
        for bound in SERIES_TIERS:
            tier = ~done & (ratio <= bound)
            if not tier.any():
                continue
            done |= tier
            every = bool(tier.all())
            d_tier = delta if every else delta[tier]
            terms = _series_terms(float(ratio.max() if every else ratio[tier].max()), top)
            j = np.arange(terms + 1)
            blocks = []
            for power in powers:
                # coefficient of delta^j: binom(-p, j) sum_k C_k a_k b_k^(-p - j)
                weights = (a_k * inverse ** power)[None, :] * inverse[None, :] ** j[:, None]  # terms x K
                blocks.append(_binomial_negative(power, terms)[:, None] * (weights @ table))  # terms x columns
            coefficients = np.concatenate(blocks, axis=1).T  # (powers x columns) x terms
            # The powers of delta, one row each, and all sums in one matrix product, a block of
            # held-out orders at a time (small temporaries stay in the processor's cache).
            value = np.empty((len(powers), len(names), d_tier.size))
            flat = value.reshape(len(powers) * len(names), d_tier.size)
            raised = np.empty((terms + 1, min(ROW_BLOCK, d_tier.size)))
            for start in range(0, d_tier.size, ROW_BLOCK):
                part = d_tier[start:start + ROW_BLOCK]
                block = raised[:, :part.size]
                block[0] = 1.0
                for i in range(1, terms + 1):
                    np.multiply(block[i - 1], part, out=block[i])
                np.matmul(coefficients, block, out=flat[:, start:start + part.size])
            if every:
                out = value
            else:
                out[:, :, tier] = value
        if not done.all():
            far = ~done
            inverse_far = 1.0 / (b_k[None, :] + delta[far][:, None])
            for slot, power in enumerate(powers):
                weight = a_k[None, :] * inverse_far
                for _ in range(power - 1):
                    weight *= inverse_far
                out[slot][:, far] = (weight @ table).T
        columns = [self._columns[name] for name in names]
        for start in range(0, rows, ROW_BLOCK):
            block = slice(start, min(rows, start + ROW_BLOCK))
            chosen = block if subset is None else pick[block]
            old_n, new_n, shift = n_old[block], n_new[block], own[block]
            w_old = 1.0 / (np.asarray(base(old_n), dtype=np.float64) + shift)
            w_new = 1.0 / (np.asarray(base(new_n), dtype=np.float64) + shift)
            p_old = np.asarray(scale(old_n), dtype=np.float64) * w_old
            p_new = np.asarray(scale(new_n), dtype=np.float64) * w_new
            # The held-out customer's own columns before and after the removal, taken once per block.
            here = [(was[chosen], becomes[chosen]) for was, becomes in columns]
            last = 1
            for slot, power in enumerate(powers):
                for _ in range(power - last):
                    p_old = p_old * w_old
                    p_new = p_new * w_new
                last = power
                for c, (was, becomes) in enumerate(here):
                    out[slot, c, block] += p_new * becomes - p_old * was
        return out

    def exp_sums_after(self, weights, exponents, theta, names, subset=None):
        """sum_s w(n_s) exp(sum_m theta_m e_m(n_s)) column_s over customers after each removal, for
        every weight function w, with parameters theta that differ by held-out order.

        Parameters
        ----------
        weights : sequence of callable
            w(k) for an array of order counts k (one result block each).
        exponents : sequence of callable
            e_m(k), one per parameter theta_m.
        theta : sequence of numpy.ndarray
            theta_m, one value per held-out order (or per order of ``subset``).
        names : sequence of str
            Columns, as for :meth:`sums_after`.
        subset : array of int, optional

        Returns
        -------
        numpy.ndarray
            Shape (len(weights), len(names), rows).

        Notes
        -----
        With c_m the median of theta_m and u_k = sum_m (theta_m - c_m) e_m(k),
        exp(u_k) = sum_j u_k^j / j!, so the sum over the order-count groups is a sum over
        multi-indices i of prod_m (theta_m - c_m)^(i_m) / i_m! times
        sum_k C_k w_k exp(sum_m c_m e_m(k)) prod_m e_m(k)^(i_m), whose coefficients are made
        once. Held-out orders are taken in tiers of U = max_k |u_k|, each to the total degree J
        at which U^(J+1) / (J+1)! e^U falls below 2^-60 (relative to the sum of magnitudes at
        the centre); those with U above 1 go over the groups. The held-out customer's own
        weight before and after the removal is computed exactly.
        """
        pick = slice(None) if subset is None else np.asarray(subset)
        theta = [np.asarray(value, dtype=np.float64) for value in theta]
        rows = theta[0].size
        out = np.empty((len(weights), len(names), rows))
        if rows == 0:
            return out
        n_old, n_new = self.n[pick], self.n_after[pick]
        table = np.column_stack([self._group_sums[name] for name in names])  # K x columns
        ks = self.ks
        powers_k = [np.asarray(e(ks), dtype=np.float64) + np.zeros(ks.size) for e in exponents]
        centre = [float(np.median(value)) for value in theta]
        shift = [value - c for value, c in zip(theta, centre)]
        at_centre = np.exp(sum(c * e for c, e in zip(centre, powers_k)))
        weights_k = [np.asarray(w(ks), dtype=np.float64) * at_centre for w in weights]
        reach = sum(np.abs(value) * float(np.max(np.abs(e))) for value, e in zip(shift, powers_k))
        done = np.zeros(rows, dtype=bool)
        for bound in (2.0 ** -20, 2.0 ** -8, 1.0):
            tier = ~done & (reach <= bound)
            if not tier.any():
                continue
            done |= tier
            every = bool(tier.all())
            top = float(reach.max() if every else reach[tier].max())
            degree, term = 0, top
            while term * math.exp(top) >= 2.0 ** -60 and degree < 60:
                degree += 1
                term *= top / (degree + 1)
            indices = [index for index in itertools.product(range(degree + 1), repeat=len(shift))
                       if sum(index) <= degree]
            parts = [part if every else part[tier] for part in shift]
            size = parts[0].size
            coefficients = np.empty((len(indices), len(weights) * len(names)))
            for i, index in enumerate(indices):
                factor = np.ones(ks.size)
                scale = 1.0
                for m, power in enumerate(index):
                    factor = factor * powers_k[m] ** power
                    scale /= math.factorial(power)
                coefficients[i] = np.concatenate([(w * factor * scale) @ table for w in weights_k])
            coefficients = np.ascontiguousarray(coefficients.T)
            value = np.empty((len(weights), len(names), size))
            flat = value.reshape(len(weights) * len(names), size)
            monomials = np.empty((len(indices), min(ROW_BLOCK, size)))
            for start in range(0, size, ROW_BLOCK):
                # Powers of each shift, then one row of monomials per multi-index, a block at a time.
                block = [part[start:start + ROW_BLOCK] for part in parts]
                raised = []
                for part in block:
                    column = [np.ones_like(part)]
                    for _ in range(degree):
                        column.append(column[-1] * part)
                    raised.append(column)
                rows_here = monomials[:, :block[0].size]
                for i, index in enumerate(indices):
                    product = raised[0][index[0]]
                    for m in range(1, len(index)):
                        product = product * raised[m][index[m]]
                    rows_here[i] = product
                np.matmul(coefficients, rows_here, out=flat[:, start:start + block[0].size])
            if every:
                out = value
            else:
                out[:, :, tier] = value
        if not done.all():
            far = np.flatnonzero(~done)
            for slot, w in enumerate(weights):
                exponent = sum(t[far][:, None] * e[None, :] for t, e in zip(theta, powers_k))
                out[slot][:, far] = ((np.asarray(w(ks), dtype=np.float64)[None, :] * np.exp(exponent)) @ table).T
        before = np.stack([self._columns[name][0][pick] for name in names])
        after = np.stack([self._columns[name][1][pick] for name in names])
        own_old = np.exp(sum(t * np.asarray(e(n_old), dtype=np.float64) for t, e in zip(theta, exponents)))
        own_new = np.exp(sum(t * np.asarray(e(n_new), dtype=np.float64) for t, e in zip(theta, exponents)))
        for slot, w in enumerate(weights):
            out[slot] += (np.asarray(w(n_new), dtype=np.float64) * own_new) * after \
                - (np.asarray(w(n_old), dtype=np.float64) * own_old) * before
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
