"""Forecasts on a cluster: the shop-wide rule fitted once, the customers forecast partition by partition.

The slow obvious twin of every cluster forecast is :func:`forecasting.forecasts.forecast_customers` on
one machine, from the pandas reader's orders; they must agree to 1e-9 (relative) for every closed-form
method and spread model the cluster accepts. The split itself
(:func:`forecasting.forecasts.forecast_rule`, :meth:`forecasting.forecasts.ForecastRule.forecasts`) is
checked without a cluster against the estimator run on every customer (:func:`forecasting.shrinkage.shrink`),
and the simulated shop against its customers' true mean order values (tests/spend_simulation.py).
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError
from forecasting.forecasts import ShopFits, forecast_customers, forecast_rule
from forecasting.options import METHODS, SPREAD_MODELS
from forecasting.reading import read_orders
from forecasting.shrinkage import shrink
from spend_simulation import ShopSpec, simulate_shop

DEMO_SHOP = Path(__file__).resolve().parent.parent / "demo_data" / "plant_shop_orders.csv"
HAVE_DASK = importlib.util.find_spec("dask") is not None and importlib.util.find_spec("distributed") is not None
needs_dask = pytest.mark.skipif(not HAVE_DASK, reason="the dask engine needs dask and distributed "
                                                      "(pip install -r requirements-scale.txt)")

#: The methods a cluster forecasts: every method that needs only the per-customer statistics.
CLUSTER_METHODS = [name for name, entry in METHODS.items() if not entry.needs_orders]
SPREADS = list(SPREAD_MODELS)
#: Several segments, mostly few orders per customer (many one-order customers), known true means.
SIMULATED = ShopSpec(customers=1500, order_counts="geometric", mean_orders=3.0, max_orders=25, segments=3,
                     bulk_share=0.02)


@pytest.fixture(scope="module")
def simulated(tmp_path_factory):
    shop = simulate_shop(SIMULATED, seed=11)
    path = tmp_path_factory.mktemp("simulated") / "houseplant_orders.csv"
    shop.orders.assign(order_date=shop.orders["order_date"].dt.strftime("%Y-%m-%d")).to_csv(path, index=False)
    return shop, path


def one_machine(path, method, variance, **columns):
    """The single-machine forecasts of a file: the pandas reader, then forecast_customers."""
    orders = read_orders(path, **columns).orders
    return forecast_customers(customer_statistics(orders), method=method, variance=variance)


def assert_same_forecasts(table, expected):
    pd.testing.assert_frame_equal(table, expected, check_exact=False, rtol=1e-9)
    fit, wanted = table.attrs["fit"], expected.attrs["fit"]
    assert fit.keys() == wanted.keys()
    for key, value in wanted.items():
        if isinstance(value, float):
            assert fit[key] == pytest.approx(value, rel=1e-9, nan_ok=True), key
        else:
            assert fit[key] == value, key


# ---------------------------------------------------------------------------
# The split, on one machine


class TestForecastRule:
    @pytest.mark.parametrize("variance", SPREADS)
    @pytest.mark.parametrize("method", CLUSTER_METHODS)
    def test_any_part_of_the_customers_gets_the_rows_of_the_whole_table(self, simulated, method, variance):
        shop, _ = simulated
        stats = customer_statistics(shop.orders)
        rule, fit = forecast_rule(stats, method=method, variance=variance)
        whole = forecast_customers(stats, method=method, variance=variance)
        positions = np.random.default_rng(5).permutation(len(stats))
        for part in np.array_split(positions, 4):
            rows = rule.for_customers(part).forecasts(stats.iloc[part], level=fit["level"],
                                                      next_level=fit["next_level"])
            expected = whole.iloc[part].reset_index(drop=True)
            pd.testing.assert_frame_equal(rows, expected, check_exact=True)

    @pytest.mark.parametrize("variance", SPREADS)
    @pytest.mark.parametrize("method", CLUSTER_METHODS)
    def test_the_rule_gives_back_the_estimator_run_on_every_customer(self, simulated, method, variance):
        # The slow twin: shrink() on all customers at once, as the estimator module defines it.
        shop, _ = simulated
        stats = customer_statistics(shop.orders)
        fits = ShopFits(stats)
        rule = fits.rule(method, variance)
        spread = fits.spread(rule.spread.model)
        working = fits.column("log_mean" if spread.scale == "log" else "mean")
        n = fits.column("orders")
        direct = shrink(working, spread.mean_variance(n), method=method, orders=n,
                        segments=fits.segments() if METHODS[method].needs_segments else None,
                        between=fits.between(spread.model))
        part = np.arange(0, len(stats), 3)
        estimate, weight = rule.for_customers(part).shrunk(n[part], working[part])
        np.testing.assert_array_equal(estimate, direct.estimate[part])
        np.testing.assert_array_equal(weight, direct.weight[part])

    def test_how_each_method_pulls(self, simulated):
        stats = customer_statistics(simulated[0].orders)
        fits = ShopFits(stats)
        pulls = {method: fits.rule(method, "log").pull for method in CLUSTER_METHODS}
        # Only MTA within segments couples customers beyond the shop-wide numbers.
        assert pulls == {**{method: "by orders" for method in CLUSTER_METHODS}, "plain": "own average",
                         "mta-segments": "by customer"}

    def test_a_rule_by_orders_refuses_a_count_it_was_not_fitted_on(self, simulated):
        stats = customer_statistics(simulated[0].orders)
        rule = ShopFits(stats).rule("mta", "log")
        unseen = stats["orders"].max() + 1
        with pytest.raises(ValueError, match="number of orders that no customer"):
            rule.shrunk(np.array([unseen]), np.array([3.0]))

    def test_a_rule_per_customer_refuses_other_customers(self, simulated):
        stats = customer_statistics(simulated[0].orders)
        rule = ShopFits(stats).rule("mta-segments", "log")
        with pytest.raises(ValueError, match="for_customers"):
            rule.shrunk(np.array([1.0]), np.array([3.0]))


# ---------------------------------------------------------------------------
# On a cluster of two worker processes


@pytest.fixture(scope="module")
def cluster():
    if not HAVE_DASK:
        pytest.skip("the dask engine needs dask and distributed")
    from forecasting.engines.dask_engine import cluster_client

    with cluster_client(workers=2, processes=True) as client:
        assert len(client.nthreads()) == 2 and set(client.nthreads().values()) == {1}
        yield client


@pytest.fixture(scope="module")
def demo_on_cluster(cluster):
    from forecasting.engines.dask_engine import read_on_cluster

    return read_on_cluster(DEMO_SHOP, client=cluster, blocksize=None, partitions=3)


@pytest.fixture(scope="module")
def simulated_on_cluster(cluster, simulated):
    from forecasting.engines.dask_engine import read_on_cluster

    return read_on_cluster(simulated[1], client=cluster, blocksize="16KB", partitions=5, segment="segment")


@needs_dask
class TestForecastOnCluster:
    @pytest.mark.parametrize("variance", SPREADS)
    @pytest.mark.parametrize("method", [m for m in CLUSTER_METHODS if not METHODS[m].needs_segments])
    def test_the_demo_shop_as_on_one_machine(self, demo_on_cluster, method, variance):
        from forecasting.engines.dask_engine import forecast_on_cluster

        assert len(demo_on_cluster.statistics_parts) == 3
        table = forecast_on_cluster(demo_on_cluster, method=method, variance=variance)
        assert_same_forecasts(table, one_machine(DEMO_SHOP, method, variance))

    @pytest.mark.parametrize("variance", SPREADS)
    @pytest.mark.parametrize("method", CLUSTER_METHODS)
    def test_a_simulated_shop_in_several_partitions_as_on_one_machine(self, simulated, simulated_on_cluster,
                                                                       method, variance):
        from forecasting.engines.dask_engine import forecast_on_cluster

        assert len(simulated_on_cluster.statistics_parts) == 5
        table = forecast_on_cluster(simulated_on_cluster, method=method, variance=variance, level=0.8,
                                    next_level=0.5)
        orders = read_orders(simulated[1], segment="segment").orders
        expected = forecast_customers(customer_statistics(orders), method=method, variance=variance, level=0.8,
                                      next_level=0.5)
        assert_same_forecasts(table, expected)

    def test_forecasts_are_near_the_true_means(self, simulated, simulated_on_cluster):
        # Truth we control: the simulated customers' true mean order values.
        from forecasting.engines.dask_engine import forecast_on_cluster

        shop, _ = simulated
        table = forecast_on_cluster(simulated_on_cluster, method="empirical-bayes", variance="log")
        truth = shop.true_mean.reindex(table["customer"]).to_numpy()
        shrunk_error = np.mean((table["expected_next_order"].to_numpy() - truth) ** 2)
        plain_error = np.mean((table["average_order_value"].to_numpy() - truth) ** 2)
        assert shrunk_error < 0.5 * plain_error  # 0.20 with this seed
        assert table["expected_next_order"].sum() == pytest.approx(truth.sum(), rel=0.05)
        inside = (table["expected_low"] <= truth) & (truth <= table["expected_high"])
        assert 0.82 <= inside.mean() <= 0.97  # the 90% range for the true mean (0.893 with this seed)

    def test_one_task_per_partition_of_customers(self, simulated_on_cluster):
        from distributed import get_task_stream

        from forecasting.engines.dask_engine import forecast_on_cluster

        with get_task_stream(simulated_on_cluster.client) as stream:
            forecast_on_cluster(simulated_on_cluster, method="mta", variance="log")
        keys = {task["key"] for task in stream.data if "_forecast_partition" in str(task["key"])}
        assert len(keys) == len(simulated_on_cluster.statistics_parts) == 5
        rows = sum(simulated_on_cluster.statistics_sizes)
        assert rows == len(simulated_on_cluster.stats)
        assert max(simulated_on_cluster.statistics_sizes) < rows

    def test_local_workers_keep_the_c_librarys_memory_defaults(self, cluster):
        # Dask's MALLOC_TRIM_THRESHOLD_ for workers would map every large numpy temporary afresh.
        import os

        if "MALLOC_TRIM_THRESHOLD_" in os.environ:
            pytest.skip("this process sets MALLOC_TRIM_THRESHOLD_ itself, and its workers inherit it")
        assert set(cluster.run(lambda: os.environ.get("MALLOC_TRIM_THRESHOLD_")).values()) == {None}

    def test_every_worker_thread_gets_a_partition_by_default(self, cluster):
        from forecasting.engines.dask_engine import read_on_cluster

        shop = read_on_cluster(DEMO_SHOP, client=cluster, blocksize=None)
        assert len(shop.statistics_parts) == 2

    def test_cross_validated_methods_are_refused(self, demo_on_cluster):
        from forecasting.engines.dask_engine import forecast_on_cluster

        for method in [m for m, entry in METHODS.items() if entry.needs_orders]:
            with pytest.raises(OrderDataError, match=f"the '{method}' method needs the order-level table") as raised:
                forecast_on_cluster(demo_on_cluster, method=method, variance="log")
            assert raised.value.option == "method"

    def test_automatic_choice_is_made_on_the_cluster(self, demo_on_cluster):
        from forecasting.engines.dask_engine import forecast_on_cluster, leave_one_out_on_cluster
        from forecasting.selection import best_of

        table = forecast_on_cluster(demo_on_cluster, method="auto")
        scores = leave_one_out_on_cluster(demo_on_cluster)
        chosen = best_of(scores, list(zip(scores["method"], scores["variance"])))
        assert (table["method"].iloc[0], table["variance"].iloc[0]) == (chosen["method"], chosen["variance"])
        assert "among the exact closed-form methods" in table.attrs["fit"]["auto_choice"]
        expected = one_machine(DEMO_SHOP, chosen["method"], chosen["variance"])
        pd.testing.assert_frame_equal(table, expected, check_exact=False, rtol=1e-9)
