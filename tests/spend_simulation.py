"""Simulated shops whose customers' true mean order values are known.

The calibration suite (tests/test_calibration.py) checks forecasts against this truth: money totals,
the coverage of the ranges for a customer's true mean, and of the ranges for their next order.

A shop: ``customers`` customers, each with between ``min_orders`` and ``max_orders`` past orders
(uniform). Customer t's typical order value b_t is Gamma distributed (shape ``mean_shape``, mean
``mean_level``). Each order is b_t times a factor with mean 1: lognormal (log-scale spread ``log_sd``)
or Gamma (shape ``gamma_shape``); with probability ``bulk_share`` an order is a bulk order, a further
``bulk_low``-``bulk_high`` times larger (uniform). The true mean order value of customer t is then
mu_t = b_t (1 - bulk_share + bulk_share (bulk_low + bulk_high) / 2).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd


@dataclass(frozen=True)
class ShopSpec:
    customers: int = 5000
    min_orders: int = 1
    max_orders: int = 30
    # "uniform" over min..max; "geometric": mostly few orders (mean ``mean_orders``), cut at max_orders;
    # "banded": a quarter with one order, a quarter with 2-3, half with 4..max (every band well filled)
    order_counts: str = "uniform"
    mean_orders: float = 4.0
    segments: int = 0  # customers in this many segments whose typical spend differs (x 0.7 .. 1.4)
    mean_shape: float = 2.0
    mean_level: float = 50.0
    orders: str = "lognormal"  # or "gamma"
    log_sd: float = 0.6
    gamma_shape: float = 2.0
    bulk_share: float = 0.0
    bulk_low: float = 5.0
    bulk_high: float = 20.0

    @property
    def bulk_factor(self) -> float:
        """E[order / b_t]: the mean of the bulk multiplier."""
        return 1.0 - self.bulk_share + self.bulk_share * (self.bulk_low + self.bulk_high) / 2.0


    def describe(self) -> str:
        orders = (f"lognormal orders (log sd {self.log_sd})" if self.orders == "lognormal"
                  else f"Gamma orders (shape {self.gamma_shape})")
        counts = {"uniform": f"{self.min_orders}-{self.max_orders} orders each",
                  "geometric": f"mostly few orders (geometric, mean {self.mean_orders:g}, at most {self.max_orders})",
                  "banded": f"a quarter with 1 order, a quarter with 2-3, half with 4-{self.max_orders}"}[
            self.order_counts]
        if self.segments:
            counts += f", {self.segments} segments"
        bulk = (f", {self.bulk_share:.0%} bulk orders {self.bulk_low:g}-{self.bulk_high:g}x larger"
                if self.bulk_share else "")
        return (f"{self.customers:,} customers, {counts}, Gamma customer means (shape {self.mean_shape:g}), "
                f"{orders}{bulk}")


#: The kinds of shop the suite checks (the bulk one is the hardest).
LOGNORMAL = ShopSpec()
GAMMA = ShopSpec(orders="gamma")
BULK = ShopSpec(bulk_share=0.02)
FEW_ORDERS = ShopSpec(bulk_share=0.02, order_counts="geometric", mean_orders=4.0)
SHOPS = {"bulk": BULK, "lognormal": LOGNORMAL, "gamma": GAMMA, "few-orders": FEW_ORDERS}


@dataclass
class SimulatedShop:
    spec: ShopSpec
    orders: pd.DataFrame  # customer, order_value, order_date
    true_mean: pd.Series  # indexed by customer (sorted like customer_statistics)
    typical: np.ndarray  # b_t in the same order
    seed: int

    def fresh_orders(self, seed: int) -> pd.Series:
        """One new order per customer from the same process (indexed like ``true_mean``)."""
        rng = np.random.default_rng(seed)
        return pd.Series(_order_values(rng, self.spec, self.typical), index=self.true_mean.index)


def _order_values(rng, spec: ShopSpec, level: np.ndarray) -> np.ndarray:
    if spec.orders == "lognormal":
        factor = np.exp(rng.normal(-spec.log_sd ** 2 / 2.0, spec.log_sd, level.size))
    elif spec.orders == "gamma":
        factor = rng.gamma(spec.gamma_shape, 1.0 / spec.gamma_shape, level.size)
    else:
        raise ValueError(f"unknown order distribution {spec.orders!r}")
    bulk = rng.random(level.size) < spec.bulk_share
    factor[bulk] *= rng.uniform(spec.bulk_low, spec.bulk_high, int(bulk.sum()))
    return level * factor


def simulate_shop(spec: ShopSpec = BULK, seed: int = 0) -> SimulatedShop:
    """Orders of one simulated shop and its customers' true mean order values."""
    rng = np.random.default_rng(seed)
    T = spec.customers
    typical = rng.gamma(spec.mean_shape, spec.mean_level / spec.mean_shape, T)
    if spec.order_counts == "uniform":
        n = rng.integers(spec.min_orders, spec.max_orders + 1, T)
    elif spec.order_counts == "geometric":
        n = np.clip(rng.geometric(1.0 / spec.mean_orders, T), spec.min_orders, spec.max_orders)
    elif spec.order_counts == "banded":
        band = rng.choice(3, T, p=[0.25, 0.25, 0.5])
        n = np.where(band == 0, 1, np.where(band == 1, rng.integers(2, 4, T), rng.integers(4, spec.max_orders + 1, T)))
    else:
        raise ValueError(f"unknown order counts {spec.order_counts!r}")
    segment = None
    if spec.segments:
        segment = rng.integers(0, spec.segments, T)
        typical = typical * np.linspace(0.7, 1.4, spec.segments)[segment]
    names = np.array([f"S{t:05d}" for t in range(T)])
    who = np.repeat(np.arange(T), n)
    values = np.round(_order_values(rng, spec, typical[who]), 2)
    values = np.maximum(values, 0.01)
    days = rng.integers(0, 720, who.size)
    orders = pd.DataFrame({"customer": names[who], "order_value": values,
                           "order_date": pd.Timestamp("2024-01-01") + pd.to_timedelta(days, unit="D")})
    if segment is not None:
        orders["segment"] = np.array(["market stall", "web shop", "landscapers", "cafes", "schools"])[
            segment % 5][who]
    orders = orders.sample(frac=1.0, random_state=seed).reset_index(drop=True)  # not grouped by customer
    true_mean = pd.Series(typical * spec.bulk_factor, index=pd.Index(names, name="customer"))
    return SimulatedShop(spec, orders, true_mean, typical, seed)
