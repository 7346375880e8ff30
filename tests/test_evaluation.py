"""Tests of the evaluator: the fast leave-one-out against brute-force refits, the calibration
measures against plain computations, the backtest, the bootstrap, the automatic choice and its
split-half check, and the command line."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from statistics import NormalDist

import numpy as np
import pandas as pd
import pytest

from forecasting import evaluation, selection
from forecasting.customers import customer_statistics
from forecasting.errors import OrderDataError
from forecasting.evaluation import EXACT_METHODS, EXACT_VARIANCES, default_cutoff, evaluate_methods
from forecasting.forecasts import forecast_customers
from forecasting.options import AUTO_TOLERANCE, METHODS
from forecasting.selection import choose_method

REPO = Path(__file__).resolve().parent.parent


# ---------------------------------------------------------------------------
# Data
# ---------------------------------------------------------------------------


def _orders(rows, start="2025-01-01"):
    frame = pd.DataFrame(rows, columns=["customer", "order_value"])
    frame["order_date"] = pd.Timestamp(start) + pd.to_timedelta(np.arange(len(frame)) * 3, "D")
    return frame


def small_shop(seed=1, customers=12):
    """A dozen plant-shop customers plus hand-made edge cases: customers with one order, ties at
    the highest and the lowest average (mta-minimax), a customer whose two orders are equal."""
    rng = np.random.default_rng(seed)
    rows = []
    for c in range(customers):
        k = int(rng.integers(1, 6))
        level = rng.lognormal(3.0, 0.5)
        rows += [(f"fern-{c:02d}", float(rng.lognormal(np.log(level), 0.6))) for _ in range(k)]
    rows += [
        ("top-a", 500.0), ("top-a", 500.0),  # average 500, unchanged when one is held out
        ("top-b", 400.0), ("top-b", 600.0),  # also 500: a tie at the maximum
        ("low-a", 1.0), ("low-a", 1.0),
        ("low-b", 0.5), ("low-b", 1.5),  # a tie at the minimum
        ("single", 42.0),
    ]
    order = rng.permutation(len(rows))  # customers' orders not next to each other
    return _orders([rows[i] for i in order])


def simulated_shop(customers=400, seed=0, sigma_level=0.6, sigma_order=0.7, mean_orders=3.0, segments=False):
    """Orders simulated from the lognormal model: customer level ~ lognormal, each order ~
    lognormal around it; a geometric number of orders."""
    rng = np.random.default_rng(seed)
    n = rng.geometric(1.0 / mean_orders, customers)
    level = rng.lognormal(3.5, sigma_level, customers)
    who = np.repeat(np.arange(customers), n)
    values = rng.lognormal(np.log(level[who]), sigma_order)
    frame = pd.DataFrame(
        {
            "customer": [f"c{c:05d}" for c in who],
            "order_value": values,
            "order_date": pd.Timestamp("2024-01-01") + pd.to_timedelta(rng.integers(0, 730, len(who)), "D"),
        }
    )
    if segments:
        frame["segment"] = np.where(who % 3 == 0, "wholesale", "retail")
    return frame


# ---------------------------------------------------------------------------
# Brute force: refit everything with one order removed
# ---------------------------------------------------------------------------


def brute_force_leave_one_out(orders, method, variance, level=0.90, next_level=0.80):
    """Forecast and both ranges for every held-out order, by removing it and running the real
    forecasts on the remaining orders."""
    stats = customer_statistics(orders)
    counts = stats["orders"].reindex(orders["customer"]).to_numpy()
    rows = []
    for i in np.flatnonzero(counts >= 2):
        rest = orders.drop(orders.index[i])
        table = forecast_customers(customer_statistics(rest), method=method,
                                   variance="classic" if variance == evaluation.GAMMA_MODEL else variance,
                                   orders=rest, level=level, next_level=next_level).set_index("customer")
        row = table.loc[orders["customer"].iloc[i]]
        rows.append([row["expected_next_order"], row["expected_low"], row["expected_high"], row["next_order_low"],
                     row["next_order_high"]])
    return np.array(rows).T


def fast_leave_one_out(orders, method, variance):
    held = evaluation._held_out_orders(orders, customer_statistics(orders))
    return evaluation._loo_predict(held, method, variance)


def assert_same(fast, slow, rtol=1e-9):
    for name, column in zip(("expected", "expected_low", "expected_high", "next_low", "next_high"), slow):
        np.testing.assert_allclose(getattr(fast, name), column, rtol=rtol, err_msg=name)


PLAIN_METHODS = [m for m in EXACT_METHODS if not METHODS[m].needs_segments]


class TestExactLeaveOneOut:
    @pytest.mark.parametrize("method", PLAIN_METHODS)
    @pytest.mark.parametrize("variance", EXACT_VARIANCES)
    def test_matches_brute_force_refit(self, method, variance):
        orders = small_shop()
        assert_same(fast_leave_one_out(orders, method, variance), brute_force_leave_one_out(orders, method, variance))

    @pytest.mark.parametrize("method", PLAIN_METHODS)
    def test_three_customers_and_the_one_order_fallback(self, method):
        # Only one customer has two orders: holding one out leaves every customer with one
        # order, so the spread falls back to the sample variance of all remaining orders. Three
        # customers also switch James-Stein and Morris's factor off (T <= 3).
        orders = _orders([("a", 10.0), ("a", 30.0), ("b", 12.0), ("c", 50.0)])
        for variance in EXACT_VARIANCES:
            assert_same(fast_leave_one_out(orders, method, variance),
                        brute_force_leave_one_out(orders, method, variance))

    @pytest.mark.parametrize("method", PLAIN_METHODS)
    def test_one_customer_and_two(self, method):
        for rows in ([("a", 10.0), ("a", 20.0), ("a", 30.0)],
                     [("a", 10.0), ("a", 20.0), ("b", 30.0), ("b", 50.0), ("b", 45.0)]):
            orders = _orders(rows)
            for variance in EXACT_VARIANCES:
                assert_same(fast_leave_one_out(orders, method, variance),
                            brute_force_leave_one_out(orders, method, variance))

    @pytest.mark.parametrize("method", ["mta", "empirical-bayes", "james-stein"])
    def test_larger_random_shop(self, method):
        orders = simulated_shop(customers=30, seed=3).iloc[::-1].reset_index(drop=True)
        for variance in EXACT_VARIANCES:
            assert_same(fast_leave_one_out(orders, method, variance),
                        brute_force_leave_one_out(orders, method, variance))

    @pytest.mark.parametrize("variance", EXACT_VARIANCES)
    def test_mta_segments_matches_brute_force_refit(self, variance):
        # Three segments fixed per customer (a customer's segment is the one of their latest
        # order; here it never changes when one is held out).
        orders = small_shop(seed=2)
        names = sorted(orders["customer"].unique())
        segment_of = {name: ("wholesale", "retail", "gifts")[i % 3] for i, name in enumerate(names)}
        orders["segment"] = orders["customer"].map(segment_of)
        assert_same(fast_leave_one_out(orders, "mta-segments", variance),
                    brute_force_leave_one_out(orders, "mta-segments", variance))

    def test_mta_segments_with_one_segment_is_mta(self):
        # On the money scale the estimates are the same; on the log scale the return to money
        # also uses the own-history weight, which for segments includes the customer's own share
        # in the centre (the diagonal of the solution matrix), a 1/T difference.
        orders = small_shop(seed=4).assign(segment="online")
        np.testing.assert_allclose(fast_leave_one_out(orders, "mta-segments", "classic").expected,
                                   fast_leave_one_out(orders, "mta", "classic").expected, rtol=1e-9)

    def test_small_blocks_give_the_same_answer(self, monkeypatch):
        from forecasting import holdout

        orders = small_shop(seed=5)
        whole = fast_leave_one_out(orders, "empirical-bayes", "log").expected
        monkeypatch.setattr(holdout, "CHUNK_CELLS", 7)
        np.testing.assert_allclose(fast_leave_one_out(orders, "empirical-bayes", "log").expected, whole,
                                   rtol=1e-13)

    def test_plain_average_of_remaining_orders(self):
        orders = _orders([("a", 10.0), ("a", 20.0), ("a", 60.0), ("b", 5.0)])
        held = evaluation._held_out_orders(orders, customer_statistics(orders))
        np.testing.assert_allclose(np.sort(held.money.mean_after), [15.0, 35.0, 40.0])

    def test_does_not_change_the_orders(self):
        orders = small_shop()
        before = orders.copy()
        evaluate_methods(orders, methods="mta", variances="log", bootstrap=10)
        pd.testing.assert_frame_equal(orders, before)


class TestApproximateLeaveOneOut:
    """Fits that keep something from the fit on all orders (the registry's left_out_keeps):
    these tests measure how far that moves the answer from a brute-force refit, on a small shop
    where one order weighs most (on large shops the gap shrinks)."""

    @pytest.fixture(scope="class")
    @classmethod
    def shop(cls):
        orders = simulated_shop(customers=60, seed=4)
        held = evaluation._held_out_orders(orders, customer_statistics(orders))
        return orders, held

    # Bounds: about three times what seeds 3-5 showed (our choice of margin).
    @pytest.mark.parametrize(
        "method, variance, median_rel, points",
        [
            ("gamma-gamma", evaluation.GAMMA_MODEL, 1e-2, 5.0),  # p, q, gamma kept
            ("mta-cv", "log", 0.3, 8.0),  # lambda kept: a refit can jump on the grid
        ],
    )
    def test_size_of_the_approximation(self, shop, method, variance, median_rel, points):
        orders, held = shop
        x = held.value
        fast = fast_leave_one_out(orders, method, variance).expected
        brute = brute_force_leave_one_out(orders, method, variance)[0]
        plain = np.sum((held.money.mean_after - x) ** 2)
        gap = abs(100 * (np.sum((brute - x) ** 2) - np.sum((fast - x) ** 2)) / plain)
        assert np.median(np.abs(fast - brute) / brute) < median_rel
        assert gap < points

    def test_rows_say_which_are_not_exact(self, shop):
        orders, _ = shop
        table = evaluate_methods(orders, bootstrap=0).leave_one_out
        inexact = set(table.loc[~table["exact"], "method"])
        assert inexact == {m for m, entry in METHODS.items() if not entry.exact_left_out}

    def test_every_pair_runs_and_gives_finite_errors(self, shop):
        orders, _ = shop
        table = evaluate_methods(orders, bootstrap=0).leave_one_out
        assert len(table) == 8 * 3 + 1  # gamma-gamma once, with its own spread; no segments here
        assert np.isfinite(table["sse"]).all()
        assert (table["variance"] == evaluation.GAMMA_MODEL).sum() == 1


# ---------------------------------------------------------------------------
# Calibration measures
# ---------------------------------------------------------------------------


class TestCalibrationMeasures:
    def test_money_bias_coverage_and_customer_counted_once_written_out(self):
        orders = simulated_shop(customers=300, seed=2)
        found = evaluate_methods(orders, methods="empirical-bayes", variances="log", bootstrap=0)
        row = found.leave_one_out.iloc[0]
        held = evaluation._held_out_orders(orders, customer_statistics(orders))
        fast = evaluation._loo_predict(held, "empirical-bayes", "log")
        x = held.value
        assert row["money_bias_pct"] == pytest.approx(100 * (fast.expected.sum() / x.sum() - 1), rel=1e-10)
        assert row["coverage"] == pytest.approx(np.mean((x >= fast.next_low) & (x <= fast.next_high)), rel=1e-12)
        frame = pd.DataFrame({"c": held.customer, "m": (fast.expected - x) ** 2,
                              "p": (held.money.mean_after - x) ** 2}).groupby("c").mean()
        assert row["error_reduction_per_customer_pct"] == pytest.approx(
            100 * (1 - frame["m"].sum() / frame["p"].sum()), rel=1e-10)

    def test_standard_error_of_the_money_bias_equals_a_bootstrap(self):
        # Slow twin: the delta-method standard error of sum(f - x) / sum(x) over customers
        # against 3000 bootstrap resamples of customers (Monte Carlo error about 3%).
        orders = simulated_shop(customers=400, seed=6)
        found = evaluate_methods(orders, methods="mta", variances="log", bootstrap=0)
        held = evaluation._held_out_orders(orders, customer_statistics(orders))
        fast = evaluation._loo_predict(held, "mta", "log")
        frame = pd.DataFrame({"c": held.customer, "d": fast.expected - held.value, "x": held.value})
        per = frame.groupby("c").sum()
        rng = np.random.default_rng(1)
        draws = []
        for _ in range(3000):
            pick = rng.integers(0, len(per), len(per))
            draws.append(100 * per["d"].to_numpy()[pick].sum() / per["x"].to_numpy()[pick].sum())
        assert found.leave_one_out["money_bias_se"].iloc[0] == pytest.approx(np.std(draws), rel=0.08)

    def test_implied_coverage_written_out(self):
        # r = sum((log x - c)^2 - w) / sum(v); coverage 2 Phi(z / sqrt(r)) - 1
        excess = np.array([0.3, 0.1, 0.25])
        claimed = np.array([0.2, 0.1, 0.1])
        r = excess.sum() / claimed.sum()
        expected = 2 * NormalDist().cdf(NormalDist().inv_cdf(0.95) / np.sqrt(r)) - 1
        coverage, _ = evaluation.implied_coverage(excess, claimed, 0.90)
        assert coverage == pytest.approx(expected, rel=1e-12)

    def test_implied_coverage_recovers_a_known_coverage(self):
        # Known truth: normal errors with variance v, a range that assumes v / 1.5: it holds
        # 2 Phi(1.645 / sqrt(1.5)) - 1 = 82% of true means; the implied figure sees that from
        # (error + order spread) alone.
        rng = np.random.default_rng(3)
        T, k = 4000, 3
        v, w = 0.04, 0.3
        error = rng.normal(0, np.sqrt(v), T)
        spread = rng.normal(0, np.sqrt(w), (T, k))
        excess = ((error[:, None] + spread) ** 2 - w).sum(axis=1)
        coverage, se = evaluation.implied_coverage(excess, np.full(T, k * v / 1.5), 0.90)
        truth = 2 * NormalDist().cdf(NormalDist().inv_cdf(0.95) / np.sqrt(1.5)) - 1
        assert coverage == pytest.approx(truth, abs=3 * se + 0.005)

    def test_judge_names_what_missed(self):
        measures = {"all": {"money_bias_pct": -8.0, "money_bias_se": 0.5, "coverage": 0.62, "coverage_se": 0.01,
                            "expected_coverage": 0.9, "expected_coverage_se": 0.01, "orders": 5000},
                    "1": {"money_bias_pct": 0.0, "money_bias_se": 0.5, "coverage": 0.8, "coverage_se": 0.01,
                          "expected_coverage": 0.6, "expected_coverage_se": 0.01, "orders": 100}}
        ok, note = evaluation.judge_calibration(measures, level=0.9, next_level=0.8)
        assert not ok
        assert "-8.0%" in note and "held 62%" in note
        assert "1 past orders" not in note  # too few orders in that band to judge on its own

    def test_uncalibrated_pairs_are_marked(self):
        # Gamma-shaped shop with big orders: the classic model's ranges miss their level
        from spend_simulation import BULK, simulate_shop

        orders = simulate_shop(BULK, 1).orders
        table = evaluate_methods(orders, methods="empirical-bayes", bootstrap=0).leave_one_out.set_index("variance")
        assert table.loc["log", "calibrated"]
        assert not table.loc["classic", "calibrated"] and table.loc["classic", "calibration_note"]


# ---------------------------------------------------------------------------
# Bootstrap, cut-off, backtest, breakdowns
# ---------------------------------------------------------------------------


class TestBootstrapIntervals:
    def test_seeded_and_contains_the_point_estimate(self):
        orders = simulated_shop(customers=300, seed=2)
        first = evaluate_methods(orders, methods="mta,empirical-bayes", variances="classic,log", bootstrap=200,
                                 seed=7).leave_one_out
        again = evaluate_methods(orders, methods="mta,empirical-bayes", variances="classic,log", bootstrap=200,
                                 seed=7).leave_one_out
        pd.testing.assert_frame_equal(first, again)
        assert (first["ci_low"] <= first["error_reduction_pct"]).all()
        assert (first["error_reduction_pct"] <= first["ci_high"]).all()
        assert (first["ci_high"] - first["ci_low"] > 0).all()

    def test_agrees_with_a_loop_over_resampled_customers(self):
        # The obvious bootstrap: draw customers with replacement, add up their squared errors.
        # Monte Carlo tolerance: 1 percentage point on the interval ends with 2000 resamples
        # each (rule of thumb from repeats).
        rng = np.random.default_rng(11)
        T = 150
        plain = rng.gamma(2.0, 10.0, T)
        method = plain * rng.uniform(0.6, 1.1, T)
        low, high = evaluation._bootstrap_intervals(plain, method[:, None], resamples=2000, seed=3)
        draws = []
        for _ in range(2000):
            pick = rng.integers(0, T, T)
            draws.append(100 * (plain[pick].sum() - method[pick].sum()) / plain[pick].sum())
        assert abs(low[0] - np.percentile(draws, 2.5)) < 1.0
        assert abs(high[0] - np.percentile(draws, 97.5)) < 1.0

    def test_zero_resamples_give_no_interval(self):
        table = evaluate_methods(small_shop(), methods="mta", variances="log", bootstrap=0).leave_one_out
        assert table["ci_low"].isna().all() and table["ci_high"].isna().all()

    def test_bad_bootstrap_option(self):
        with pytest.raises(OrderDataError, match="bootstrap") as raised:
            evaluate_methods(small_shop(), bootstrap=-1)
        assert raised.value.option == "bootstrap"


class TestDefaultCutoff:
    def test_leaves_about_a_fifth_after(self):
        orders = simulated_shop(customers=500, seed=4)
        cutoff = default_cutoff(orders["order_date"])
        share_after = float((orders["order_date"] >= cutoff).mean())
        # Ties on the cut-off day can add a few orders: 730 possible days.
        assert 0.195 <= share_after <= 0.21

    def test_ten_days(self):
        dates = pd.to_datetime([f"2025-03-{d:02d}" for d in (7, 1, 3, 2, 9, 10, 5, 4, 8, 6)])
        assert default_cutoff(dates) == pd.Timestamp("2025-03-09")


class TestBacktest:
    def test_scores_the_first_order_after_the_cutoff(self):
        orders = _orders(
            [("a", 10.0), ("a", 20.0), ("b", 50.0), ("c", 30.0), ("c", 34.0), ("d", 8.0),
             ("a", 40.0), ("a", 99.0), ("b", 70.0), ("d", 12.0), ("e", 5.0)]
        )
        cutoff = orders["order_date"].iloc[6]
        found = evaluate_methods(orders, methods="plain,mta", variances="classic", cutoff=cutoff, bootstrap=0)
        # Scored: a (first after = 40 vs mean 15), b (70 vs 50), d (12 vs 8); c has nothing
        # after, e nothing before.
        assert found.backtest_scored == 3
        plain_sse = (40 - 15) ** 2 + (70 - 50) ** 2 + (12 - 8) ** 2
        rows = found.backtest.set_index("method")
        assert rows.loc["plain", "sse"] == pytest.approx(plain_sse, rel=1e-12)
        before = orders[orders["order_date"] < cutoff]
        forecast = forecast_customers(customer_statistics(before), method="mta", variance="classic",
                                      orders=before).set_index("customer")["expected_next_order"]
        mta_sse = (forecast["a"] - 40) ** 2 + (forecast["b"] - 70) ** 2 + (forecast["d"] - 12) ** 2
        assert rows.loc["mta", "sse"] == pytest.approx(mta_sse, rel=1e-12)
        assert rows.loc["mta", "error_reduction_pct"] == pytest.approx(100 * (plain_sse - mta_sse) / plain_sse)
        bias = (forecast["a"] + forecast["b"] + forecast["d"]) / (40 + 70 + 12) - 1
        assert rows.loc["mta", "money_bias_pct"] == pytest.approx(100 * bias, rel=1e-10)

    def test_a_cutoff_with_nothing_after_is_reported(self):
        orders = small_shop()
        found = evaluate_methods(orders, methods="mta", variances="log", cutoff="2099-01-01", bootstrap=0)
        assert len(found.backtest) == 0
        assert any("cut-off" in note for note in found.notes)

    def test_bad_cutoff(self):
        with pytest.raises(OrderDataError, match="cut-off"):
            evaluate_methods(small_shop(), cutoff="next tuesday", bootstrap=0)


class TestBreakdowns:
    def test_past_orders_and_segments_add_up(self):
        orders = simulated_shop(customers=200, seed=9, segments=True)
        found = evaluate_methods(orders, methods="mta", variances="log", bootstrap=0)
        loo = found.by_past_orders[found.by_past_orders["evaluation"] == "leave-one-out"]
        assert loo["held_out"].sum() == found.held_out
        assert loo["sse"].sum() == pytest.approx(found.leave_one_out.set_index("method").loc["mta", "sse"])
        assert set(loo["past_orders"]) <= {"1", "2", "3", "4-5", "6-10", "11+"}
        seg = found.by_segment[found.by_segment["evaluation"] == "leave-one-out"]
        assert set(seg["segment"]) == {"wholesale", "retail"}
        assert seg["held_out"].sum() == found.held_out
        weighted = (loo["coverage"] * loo["held_out"]).sum() / loo["held_out"].sum()
        assert weighted == pytest.approx(found.leave_one_out["coverage"].iloc[0], rel=1e-12)

    def test_past_order_bins(self):
        labels = evaluation._past_order_labels(np.array([1, 2, 3, 4, 5, 6, 10, 11, 250]))
        assert labels.tolist() == ["1", "2", "3", "4-5", "4-5", "6-10", "6-10", "11+", "11+"]


# ---------------------------------------------------------------------------
# Automatic choice
# ---------------------------------------------------------------------------


def _table(rows):
    return pd.DataFrame(rows, columns=["method", "variance", "sse", "error_reduction_pct", "calibrated",
                                       "calibration_note", "in_auto"])


class TestChoiceRule:
    def test_never_picks_a_pair_that_missed_a_target(self):
        table = _table([("plain", "classic", 100.0, 0.0, False, "x", True),
                        ("mta", "log", 60.0, 40.0, False, "forecasts add up to -8.0%", True),
                        ("empirical-bayes", "log", 70.0, 30.0, True, "", True)])
        chosen = selection.best_of(table)
        assert (chosen["method"], chosen["variance"]) == ("empirical-bayes", "log")
        assert chosen["excluded"][0]["method"] == "mta" and "-8.0%" in chosen["reason"]

    def test_never_picks_a_pair_not_allowed_in_auto(self):
        table = _table([("mta-cv", "log", 50.0, 50.0, True, "", False), ("mta", "log", 60.0, 40.0, True, "", True)])
        assert selection.best_of(table)["method"] == "mta"

    def test_falls_back_when_nothing_beats_plain_averages(self):
        table = _table([("plain", "log", 101.0, -1.0, True, "", True), ("mta", "log", 102.0, -2.0, True, "", True)])
        chosen = selection.best_of(table)
        assert (chosen["method"], chosen["variance"]) == ("plain", "log") and chosen["fell_back_to_plain"]

    def test_falls_back_when_nothing_is_calibrated(self):
        table = _table([("mta", "log", 60.0, 40.0, False, "the 80% next-order range held 60%", True)])
        chosen = selection.best_of(table)
        assert chosen["fell_back_to_plain"] and "calibration target" in chosen["reason"]


class TestChooseMethod:
    @pytest.mark.parametrize("seed", [0, 1, 2])
    def test_never_loses_to_plain_averages_and_matches_the_evaluation(self, seed):
        orders = simulated_shop(customers=150, seed=seed, sigma_level=1.5, sigma_order=0.3)
        chosen = choose_method(orders)
        found = evaluate_methods(orders, bootstrap=0)
        table = found.leave_one_out.set_index(["method", "variance"])
        plain = table.loc[("plain", "classic"), "sse"]
        assert table.loc[(chosen["method"], chosen["variance"]), "sse"] <= plain or chosen["fell_back_to_plain"]
        assert (chosen["method"], chosen["variance"]) == (found.chosen["method"], found.chosen["variance"])
        allowed = table[table["in_auto"] & table["calibrated"]].drop(index=("plain", "classic"), errors="ignore")
        assert table.loc[(chosen["method"], chosen["variance"]), "sse"] <= allowed["sse"].min() or \
            chosen["fell_back_to_plain"]

    def test_falls_back_to_plain_when_nothing_helps(self):
        # Every customer always spends the same amount: the customer's own average is already
        # perfect, so no method can beat it.
        rows = [(f"pot-{c}", 10.0 * (c + 1)) for c in range(8) for _ in range(3)]
        chosen = choose_method(_orders(rows))
        assert chosen["method"] == "plain" and chosen["fell_back_to_plain"]
        assert "own average" in chosen["reason"]

    def test_reports_runner_up_margin_and_the_split_half_gain(self):
        orders = simulated_shop(customers=300, seed=5)
        chosen = choose_method(orders, methods=["mta", "james-stein"], variances=["log"])
        assert {chosen["method"], chosen["runner_up"]["method"]} == {"mta", "james-stein"}
        assert chosen["margin_pct"] == pytest.approx(
            chosen["error_reduction_pct"] - chosen["runner_up"]["error_reduction_pct"])
        assert chosen["margin_pct"] >= 0
        assert np.isfinite(chosen["honest_gain_pct"]) and len(chosen["honest_choices"]) == 2

    def test_split_half_gain_matches_a_loop(self):
        # Slow twin: split customers with the same generator, choose on one half by a plain loop
        # over the pairs (calibrated, allowed, smallest error, else plain averages on the log
        # scale), score on the other half.
        orders = simulated_shop(customers=300, seed=8)
        stats = customer_statistics(orders)
        pairs = [("plain", "log"), ("mta", "log"), ("empirical-bayes", "log"), ("pooled", "log")]
        scores = evaluation.customer_scores(evaluation.leave_one_out(orders, stats, pairs))
        gain, choices = selection.split_half_gain(scores, seed=4)
        T = len(scores.count)
        first = np.zeros(T, dtype=bool)
        first[np.random.default_rng(4).permutation(T)[: T // 2]] = True
        gains = []
        for fit_on in (first, ~first):
            table = evaluation.summarise(scores, keep=fit_on)
            ok = table[table["calibrated"]].sort_values("sse")
            pair = ("plain", "log")
            if len(ok) and ok["error_reduction_pct"].iloc[0] > 0:
                pair = (ok["method"].iloc[0], ok["variance"].iloc[0])
            i = pairs.index(pair)
            test = ~fit_on
            gains.append(100 * (1 - scores.sq[i][test].sum() / scores.plain_sq[test].sum()))
        assert gain == pytest.approx(np.mean(gains), rel=1e-12)
        assert len(choices) == 2

    def test_needs_orders(self):
        with pytest.raises(OrderDataError, match="order-level"):
            choose_method(None)

    def test_unknown_names(self):
        with pytest.raises(OrderDataError, match="magic") as raised:
            choose_method(small_shop(), methods="magic")
        assert raised.value.option == "methods"
        with pytest.raises(OrderDataError, match="wobbly") as raised:
            evaluate_methods(small_shop(), variances="wobbly")
        assert raised.value.option == "variances"
        with pytest.raises(OrderDataError, match="retired"):
            evaluate_methods(small_shop(), variances="robust")


class TestCoverage:
    def test_ranges_hold_their_level_on_the_log_scale(self):
        # Data simulated from the lognormal model; about 3000 held-out orders: binomial sd about
        # 0.007. The tolerances are the automatic choice's (AUTO_TOLERANCE).
        orders = simulated_shop(customers=1000, seed=8, sigma_level=0.5, sigma_order=0.6)
        table = evaluate_methods(orders, methods="plain,mta,empirical-bayes,james-stein", variances="log",
                                 bootstrap=0).leave_one_out
        assert np.all(np.abs(table["coverage"] - 0.80) < 0.03), table
        assert np.all(np.abs(table["expected_coverage"] - 0.90) < AUTO_TOLERANCE.coverage_points / 100), table
        assert np.all(np.abs(table["money_bias_pct"]) < 3.0), table


# ---------------------------------------------------------------------------
# The command line
# ---------------------------------------------------------------------------


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "forecasting", *args], cwd=REPO, capture_output=True, text=True,
                          timeout=300)


class TestEvaluateCommand:
    def test_json_contract(self, tmp_path):
        orders = simulated_shop(customers=120, seed=6)
        path = tmp_path / "orders.csv"
        orders.assign(order_date=orders["order_date"].dt.strftime("%Y-%m-%d")).to_csv(path, index=False)
        done = run_cli("evaluate", str(path), "--methods", "plain,mta,james-stein", "--variances", "classic,log",
                       "--bootstrap", "50", "--json")
        assert done.returncode == 0, done.stderr
        payload = json.loads(done.stdout)
        assert set(payload) == {"orders", "customers", "held_out", "results", "backtest", "chosen"}
        assert payload["orders"] == len(orders)
        assert payload["customers"] == orders["customer"].nunique()
        fields = {"method", "variance", "sse", "error_reduction_pct", "ci_low", "ci_high",
                  "error_reduction_per_customer_pct", "money_bias_pct", "money_bias_se", "coverage", "coverage_se",
                  "expected_coverage", "expected_coverage_se", "calibrated", "calibration_note", "exact", "in_auto",
                  "caution"}
        assert len(payload["results"]) == 6
        assert all(set(row) == fields for row in payload["results"] + payload["backtest"])
        assert set(payload["chosen"]) == {"method", "variance", "error_reduction_pct", "honest_gain_pct", "reason"}
        assert payload["chosen"]["method"] in {"plain", "mta", "james-stein"}

    def test_table_and_bad_option(self, tmp_path):
        orders = simulated_shop(customers=60, seed=6)
        path = tmp_path / "orders.csv"
        orders.to_csv(path, index=False)
        done = run_cli("evaluate", str(path), "--methods", "mta,gamma-gamma", "--variances", "classic,log",
                       "--bootstrap", "20")
        assert done.returncode == 0, done.stderr
        assert "Leave-one-out" in done.stdout and "Chosen:" in done.stdout
        assert "gamma-model" in done.stdout and "money" in done.stdout and "per cust." in done.stdout
        bad = run_cli("evaluate", str(path), "--methods", "crystal-ball")
        assert bad.returncode == 2
        assert "--methods" in bad.stderr and "Traceback" not in bad.stderr


# ---------------------------------------------------------------------------
# Edge cases
# ---------------------------------------------------------------------------


class TestEdgeCases:
    def test_no_repeat_customers(self):
        found = evaluate_methods(_orders([("a", 10.0), ("b", 20.0), ("c", 30.0), ("d", 5.0)]), bootstrap=10)
        assert found.held_out == 0
        assert found.chosen["method"] == "plain" and found.chosen["fell_back_to_plain"]
        assert any("nothing to hold out" in note for note in found.notes)

    def test_one_order_in_the_file(self):
        found = evaluate_methods(_orders([("a", 10.0)]), bootstrap=10)
        assert found.held_out == 0 and found.orders == 1 and len(found.backtest) == 0

    def test_identical_orders_everywhere(self):
        rows = [("a", 10.0), ("a", 10.0), ("b", 10.0), ("b", 10.0), ("c", 10.0)]
        found = evaluate_methods(_orders(rows), bootstrap=10)
        # Zero up to the rounding of exp(log(10)) on the log scale.
        assert (found.leave_one_out["sse"] < 1e-20).all()
        assert found.chosen["method"] == "plain"

    def test_cents_and_billions(self):
        rows = [("a", 1e-6), ("a", 2e-6), ("b", 1e9), ("b", 2e9), ("c", 5.0), ("c", 7.0), ("d", 3.0)]
        table = evaluate_methods(_orders(rows), bootstrap=10).leave_one_out
        assert np.isfinite(table["sse"]).all()
        assert np.isfinite(table["error_reduction_pct"]).all()


class TestPairedMargins:
    """The chosen pair's margin over the others, with a paired bootstrap over customers."""

    def test_margin_is_the_difference_of_reductions_and_its_interval_is_paired(self):
        from forecasting import read_orders

        orders = read_orders(REPO / "demo_data" / "messy_orders.csv").orders
        found = evaluate_methods(orders, methods="mta,james-stein,pooled", variances="classic,log",
                                 bootstrap=300, seed=3)
        table = found.leave_one_out.set_index(["method", "variance"])["error_reduction_pct"]
        best = (found.chosen["method"], found.chosen["variance"])
        assert len(found.margins) == len(table) - 1
        for row in found.margins.itertuples():
            assert row.margin_pct == pytest.approx(table[best] - table[(row.method, row.variance)], abs=1e-9)
            if np.isfinite(row.margin_low):
                assert row.margin_low <= row.margin_pct + 1e-9 <= row.margin_high + 2e-9

    def test_paired_interval_matches_a_plain_loop_over_resamples(self):
        # Slow twin: resample customers one resample at a time with the same generator and recompute.
        from forecasting.evaluation import _bootstrap_reductions

        rng = np.random.default_rng(5)
        plain = rng.gamma(2.0, 10.0, size=40)
        methods = np.column_stack([plain * rng.uniform(0.6, 1.1, 40), plain * rng.uniform(0.7, 1.2, 40)])
        fast = _bootstrap_reductions(plain, methods, resamples=50, seed=9)
        generator = np.random.default_rng(9)
        slow = []
        for _ in range(50):
            picks = generator.integers(0, 40, size=(1, 40))[0]
            base = plain[picks].sum()
            slow.append([100 * (base - methods[picks, j].sum()) / base for j in range(2)])
        np.testing.assert_allclose(fast, np.array(slow), rtol=1e-12)


# ---------------------------------------------------------------------------
# Fast paths against their slow twins
# ---------------------------------------------------------------------------


def random_side(seed=0, customers=400, largest=25, spread=1.0):
    """A Side of a made-up shop: order counts 1..largest, averages, sums of squares, held-out values."""
    from forecasting.holdout import Side

    rng = np.random.default_rng(seed)
    n = np.minimum(rng.geometric(0.25, customers), largest).astype(np.float64)
    means = rng.normal(3.5, spread, customers)
    sum_sq = rng.gamma(2.0, 0.3, customers) * (n - 1.0)
    t = np.repeat(np.arange(customers), n.astype(np.int64))
    t = t[n[t] >= 2]
    values = means[t] + rng.normal(0.0, 0.5, t.size)
    return Side(n, means, sum_sq, t, values, (0.0, 1.0))


class TestGroupSeries:
    """Side.power_sums_after and Side.exp_sums_after (power series over the order-count groups)
    against Side.sums_after_many, which goes over every group for every held-out order."""

    @pytest.mark.parametrize("size", [1e-9, 1e-5, 1e-2, 0.2, 3.0])  # every tier, and beyond the series' reach
    def test_power_sums_equal_the_direct_sums(self, size):
        side = random_side(seed=1)
        rng = np.random.default_rng(2)
        delta = 0.7 + size * rng.standard_normal(side.H)
        delta = np.maximum(delta, 0.0)
        fast = side.power_sums_after(lambda k: 1.0, lambda k: 1.0 / k, delta, (1, 2, 3), ["one", "d", "d2"])

        def weights(k, rows):
            w = 1.0 / (1.0 / k + (delta[rows][:, None] if np.ndim(k) == 2 else delta[rows]))
            return w, w * w, w * w * w

        slow = side.sums_after_many(weights, ["one", "d", "d2"])
        np.testing.assert_allclose(fast, slow, rtol=1e-12, atol=1e-12 * np.abs(slow).max())

    def test_power_sums_with_a_scale_and_a_subset(self):
        # k / (k + b), the weight of multi-task averaging and of the proportional model's level
        side = random_side(seed=3)
        rng = np.random.default_rng(4)
        subset = rng.choice(side.H, side.H // 3, replace=False)
        b = 2.0 + 1e-4 * rng.standard_normal(subset.size)
        b[:5] = [0.0, 40.0, 1e-3, 7.0, 2.5]  # a few far from the rest
        (fast_d, fast_one), = side.power_sums_after(lambda k: k, lambda k: k, b, (1,), ["d", "one"], subset=subset)
        slow_d, slow_one = side.sums_after(lambda k, rows: k / (k + (b[rows][:, None] if np.ndim(k) == 2
                                                                     else b[rows])), ["d", "one"], subset=subset)
        np.testing.assert_allclose(fast_d, slow_d, rtol=1e-12, atol=1e-12 * np.abs(slow_d).max())
        np.testing.assert_allclose(fast_one, slow_one, rtol=1e-13)

    def test_the_series_needs_few_terms_when_one_order_moves_little(self):
        from forecasting.holdout import _series_terms

        assert _series_terms(0.0, 3) == 0
        assert _series_terms(1e-6, 3) <= 4
        assert _series_terms(0.25, 3) < 60
        q, j = 0.01, _series_terms(0.01, 2)
        from math import comb
        assert comb(2 + j, j + 1) * q ** (j + 1) < 2.0 ** -60 <= comb(1 + j, j) * q ** j

    @pytest.mark.parametrize("size", [1e-8, 1e-3, 0.3, 5.0])
    def test_exp_sums_equal_the_direct_sums(self, size):
        # The smearing curve: sum (k - 1) exp(sigma2 a_k + x b_k) and its slope in x.
        side = random_side(seed=5)
        rng = np.random.default_rng(6)
        sigma2 = 0.36 + size * 0.1 * rng.standard_normal(side.H)
        x = 0.2 + size * rng.standard_normal(side.H)

        def slope(k):
            return (1.0 - 1.0 / k) * (1.0 - 2.0 / k)

        def curve(k):
            return -1.0 / (2.0 * k) + (1.0 - slope(k)) / 2.0

        fast = side.exp_sums_after((lambda k: np.where(k >= 2, k - 1.0, 0.0),
                                    lambda k: np.where(k >= 2, (k - 1.0) * slope(k), 0.0)),
                                   (curve, slope), (sigma2, x), ["one", "d"])

        def weights(k, rows):
            s2 = sigma2[rows][:, None] if np.ndim(k) == 2 else sigma2[rows]
            xx = x[rows][:, None] if np.ndim(k) == 2 else x[rows]
            value = np.where(k >= 2, (k - 1.0) * np.exp(s2 * curve(k) + xx * slope(k)), 0.0)
            return value, value * slope(k)

        slow = side.sums_after_many(weights, ["one", "d"])
        np.testing.assert_allclose(fast, slow, rtol=1e-12, atol=1e-12 * np.abs(slow).max())

    def test_blocks_of_rows_give_the_same_sums(self, monkeypatch):
        from forecasting import holdout

        side = random_side(seed=7)
        delta = 0.5 + 1e-6 * np.arange(side.H)
        whole = side.power_sums_after(lambda k: 1.0, lambda k: 1.0 / k, delta, (1, 2, 3), ["one", "d"])
        monkeypatch.setattr(holdout, "ROW_BLOCK", 37)
        np.testing.assert_array_equal(
            side.power_sums_after(lambda k: 1.0, lambda k: 1.0 / k, delta, (1, 2, 3), ["one", "d"]), whole)


class TestBootstrapByWeights:
    def test_a_documented_function_of_the_seed(self, monkeypatch):
        # Resample r counts the r-th run of T draws of default_rng(seed).integers(0, T): the same
        # sums whatever the block size (to the last bits of the matrix product's order of adding)
        # and whether a worker thread applies them (exactly).
        rng = np.random.default_rng(1)
        table = rng.gamma(2.0, 3.0, (53, 4))
        whole = evaluation.bootstrap_sums(table, resamples=40, seed=8)
        generator = np.random.default_rng(8)
        slow = np.array([np.bincount(generator.integers(0, 53, 53), minlength=53) @ table for _ in range(40)])
        np.testing.assert_allclose(whole, slow, rtol=1e-13)
        for block in (1, 7, 64):
            monkeypatch.setattr(evaluation, "BOOTSTRAP_BLOCK", block)
            np.testing.assert_allclose(evaluation.bootstrap_sums(table, resamples=40, seed=8), whole, rtol=1e-14)
        monkeypatch.setattr(evaluation, "BOOTSTRAP_BLOCK", 32)
        monkeypatch.setattr(evaluation, "thread_pool", lambda: None)
        np.testing.assert_array_equal(evaluation.bootstrap_sums(table, resamples=40, seed=8), whole)

    def test_intervals_and_margins_share_the_draws(self, monkeypatch):
        calls = []
        original = evaluation.bootstrap_sums
        monkeypatch.setattr(evaluation, "bootstrap_sums", lambda *a, **k: calls.append(1) or original(*a, **k))
        evaluate_methods(simulated_shop(customers=120, seed=3), methods="mta,plain", variances="log",
                         bootstrap=30, cutoff="2099-01-01")
        assert len(calls) == 1  # leave-one-out intervals and margins; no backtest past 2099


class TestCalibrationByBands:
    def test_equals_the_measures_customer_group_by_group(self):
        # Slow twin: ratios and delta-method errors over the customers of each band, by masks.
        orders = simulated_shop(customers=300, seed=12)
        stats = customer_statistics(orders)
        scores = evaluation.customer_scores(evaluation.leave_one_out(orders, stats, [("mta", "log"), ("pooled",
                                                                                                      "classic")]))
        for i in range(2):
            measures = evaluation.calibration_measures(scores, i)
            bands = evaluation._band_of(scores.past_orders)
            for label in ["all"] + [b[2] for b in evaluation.CALIBRATION_BANDS]:
                keep = np.ones(len(bands), bool) if label == "all" else bands == label
                if not keep.any():
                    assert label not in measures
                    continue
                bias, bias_se = evaluation._ratio_and_se(scores.diff[i][keep], scores.value[keep])
                cover, cover_se = evaluation._ratio_and_se(scores.inside[i][keep], scores.count[keep])
                implied, implied_se = evaluation.implied_coverage(scores.excess[i][keep], scores.claimed[i][keep],
                                                                  0.90)
                got = measures[label]
                assert got["money_bias_pct"] == pytest.approx(100 * bias, rel=1e-10)
                assert got["money_bias_se"] == pytest.approx(100 * bias_se, rel=1e-9)
                assert got["coverage"] == pytest.approx(cover, rel=1e-12)
                assert got["coverage_se"] == pytest.approx(cover_se, rel=1e-9)
                assert got["expected_coverage"] == pytest.approx(implied, rel=1e-10)
                assert got["orders"] == int(scores.count[keep].sum())


class TestCrossValidationBySums:
    @pytest.mark.parametrize("seed", [0, 1])
    def test_errors_of_every_multiplier_equal_one_fit_each(self, seed):
        from forecasting.estimators import cross_validation as cv
        from forecasting.estimators.james_stein import james_stein

        rng = np.random.default_rng(seed)
        T = 150
        n = rng.integers(1, 8, T)
        codes = np.repeat(np.arange(T), n)
        values = rng.lognormal(3.5, 0.4, T)[codes] * rng.lognormal(0.0, 0.5, codes.size)
        for fold in cv.cv_folds(codes, values, T):
            fast = cv._mta_errors(fold, cv.MTA_CV_GRID)
            slow = cv._fold_errors(fold, cv.MTA_CV_GRID, cv._mta_estimates)
            np.testing.assert_allclose(fast, slow, rtol=1e-10)
            slow_js = cv._fold_errors(fold, cv.JS_CV_GRID, lambda f, grid: np.stack(
                [james_stein(f.m, f.s, amount_scale=lam).estimate[f.keep] for lam in grid]))
            np.testing.assert_allclose(cv._james_stein_errors(fold, cv.JS_CV_GRID), slow_js, rtol=1e-10)

    def test_folds_equal_the_orders_split_by_hand(self):
        from forecasting.estimators import cross_validation as cv
        from forecasting.variance import classic_pooled_variance

        rng = np.random.default_rng(3)
        T = 30
        n = rng.integers(1, 6, T)
        codes = rng.permutation(np.repeat(np.arange(T), n))
        values = rng.gamma(3.0, 10.0, codes.size)
        fold_of = np.random.default_rng(cv.CV_SEED).permutation(codes.size) % cv.CV_FOLDS
        for number, fold in enumerate(cv.cv_folds(codes, values, T)):
            train = fold_of != number
            present = np.bincount(codes[train], minlength=T) > 0
            m = np.array([values[train & (codes == t)].mean() for t in np.flatnonzero(present)])
            ss = np.array([((values[train & (codes == t)] - values[train & (codes == t)].mean()) ** 2).sum()
                           for t in np.flatnonzero(present)])
            counts = np.bincount(codes[train], minlength=T)[present]
            sigma2, _ = classic_pooled_variance(counts, ss, m)
            np.testing.assert_allclose(fold.m, m, rtol=1e-12)
            np.testing.assert_allclose(fold.s, sigma2 / counts, rtol=1e-10)


class TestBacktestSplit:
    def test_first_order_after_the_cut_off_by_hand(self):
        orders = simulated_shop(customers=200, seed=13)
        orders.loc[orders.index[:40], "order_date"] = pd.Timestamp("2025-06-01")  # ties on one date
        fits = evaluation.ShopFits(customer_statistics(orders), orders)
        cutoff, split = evaluation.backtest_split(fits, "2025-05-01")
        before = orders[orders["order_date"] < cutoff]
        after = orders[orders["order_date"] >= cutoff]
        first = after.sort_values("order_date", kind="stable").groupby("customer").first()
        stats_before = customer_statistics(before)
        customers = stats_before.index.intersection(first.index)
        assert list(stats_before.index[split["position"]]) == list(customers)
        np.testing.assert_array_equal(split["value"], first.loc[customers, "order_value"].to_numpy())
        pd.testing.assert_frame_equal(split["fits"].stats, stats_before)
        np.testing.assert_array_equal(split["fits"].codes(), stats_before.index.get_indexer(before["customer"]))


class TestEveryApproximatePair:
    """Each pair whose leave-one-out keeps something from the fit on all orders, against the
    brute-force refit, with the bound the registry's words promise ("a little")."""

    @pytest.mark.parametrize("method, variance", [(m, v) for m, entry in METHODS.items() if not entry.exact_left_out
                                                  for v in ((evaluation.GAMMA_MODEL,) if entry.own_spread
                                                            else EXACT_VARIANCES)])
    def test_close_to_the_refit(self, method, variance):
        orders = simulated_shop(customers=50, seed=14)
        held = evaluation._held_out_orders(orders, customer_statistics(orders))
        fast = fast_leave_one_out(orders, method, variance).expected
        brute = brute_force_leave_one_out(orders, method, variance)[0]
        plain = np.sum((held.money.mean_after - held.value) ** 2)
        gap = abs(100 * (np.sum((brute - held.value) ** 2) - np.sum((fast - held.value) ** 2)) / plain)
        assert gap < 10.0  # points of error cut (our bound, about three times the largest seen)
        assert np.median(np.abs(fast - brute) / brute) < 0.3
