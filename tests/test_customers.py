"""Per-customer statistics against a plain, obvious computation with pandas groupby and numpy."""

import numpy as np
import pandas as pd
import pytest

from forecasting import customer_statistics


def random_orders(seed=0, customers=50):
    rng = np.random.default_rng(seed)
    counts = rng.integers(1, 8, size=customers)
    names = np.repeat([f"C{i:03d}" for i in range(customers)], counts)
    order = rng.permutation(len(names))  # not pre-sorted
    return pd.DataFrame({
        "customer": names[order],
        "order_value": rng.lognormal(3.5, 1.0, size=len(names)),
        "order_date": pd.Timestamp("2025-01-01") + pd.to_timedelta(rng.integers(0, 600, len(names)), unit="D"),
        "segment": rng.choice(["web", "market"], size=len(names)),
    })


class TestCustomerStatistics:
    def test_matches_a_plain_groupby(self):
        orders = random_orders()
        stats = customer_statistics(orders)
        by = orders.groupby("customer")
        pd.testing.assert_series_equal(stats["orders"], by.size().rename("orders"), check_dtype=False)
        np.testing.assert_allclose(stats["mean"], by["order_value"].mean(), rtol=1e-12)
        np.testing.assert_allclose(stats["total"], by["order_value"].sum(), rtol=1e-12)
        naive_ss = by["order_value"].apply(lambda v: float(np.sum((v - v.mean()) ** 2)))
        np.testing.assert_allclose(stats["sum_sq_dev"], naive_ss, rtol=1e-10, atol=1e-9)
        logs = np.log(orders["order_value"]).groupby(orders["customer"])
        np.testing.assert_allclose(stats["log_mean"], logs.mean(), rtol=1e-12)
        np.testing.assert_allclose(stats["log_var"], logs.var(ddof=1), rtol=1e-10)
        assert (stats["first_order"] == by["order_date"].min()).all()
        assert (stats["last_order"] == by["order_date"].max()).all()

    def test_segment_is_the_latest_orders(self):
        orders = pd.DataFrame({"customer": ["a", "a"], "order_value": [1.0, 2.0], "segment": ["late", "early"],
                               "order_date": pd.to_datetime(["2025-03-01", "2025-01-01"])})
        assert customer_statistics(orders)["segment"].tolist() == ["late"]

    def test_large_values_keep_their_spread(self):
        # A one-pass sum of squares loses this spread entirely in float64; two passes keep it.
        orders = pd.DataFrame({"customer": ["a"] * 3, "order_value": [1e9, 1e9 + 1, 1e9 + 2],
                               "order_date": pd.to_datetime(["2025-01-01"] * 3)})
        assert customer_statistics(orders)["sum_sq_dev"].iloc[0] == pytest.approx(2.0)

    def test_orders_all_of_one_value_have_no_spread_exactly(self):
        # Three orders of 0.10: their float mean is 0.10000000000000002, so deviations from it are
        # not zero; the true spread is, on both scales.
        orders = pd.DataFrame({"customer": ["a"] * 3 + ["b"] * 2, "order_value": [0.1, 0.1, 0.1, 0.1, 0.2],
                               "order_date": pd.to_datetime(["2025-01-01"] * 5)})
        assert np.sum((np.full(3, 0.1) - np.full(3, 0.1).mean()) ** 2) > 0  # what a plain two-pass gives
        stats = customer_statistics(orders)
        assert stats.loc["a", "sum_sq_dev"] == 0.0
        assert stats.loc["a", "log_sum_sq_dev"] == 0.0
        assert stats.loc["b", "sum_sq_dev"] == pytest.approx(0.005)  # (0.2 - 0.1)^2 / 2

    def test_one_order_customers(self):
        stats = customer_statistics(random_orders().drop_duplicates("customer"))
        assert (stats["orders"] == 1).all()
        assert (stats["sum_sq_dev"] == 0).all()
        assert stats["log_var"].isna().all()

    def test_input_is_not_changed(self):
        orders = random_orders()
        before = orders.copy()
        customer_statistics(orders)
        pd.testing.assert_frame_equal(orders, before)
