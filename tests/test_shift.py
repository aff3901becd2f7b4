"""Batch shift tests: MMD_u^2 with a permutation p-value, and the flagged-share binomial test.

Reference: Gretton, Borgwardt, Rasch, Schölkopf & Smola, "A kernel two-sample test", JMLR
13:723-773, 2012 (MMD_u^2, eq. 3 / Lemma 6; median-distance bandwidth). The binomial test is
checked against scipy.stats.binomtest, the distances against scipy.spatial.distance.pdist.
"""
import math
import time

import numpy as np
import pytest
from scipy.spatial.distance import pdist
from scipy.stats import binomtest

from oddling.evaluation.shift import (
    flagged_share_test,
    median_bandwidth,
    mmd2_unbiased,
    mmd_permutation_test,
    shift_verdict,
)


def mmd2_unbiased_loop(x, y, s):
    """Gretton et al. 2012, eq. 3, one kernel evaluation at a time."""
    def k(a, b):
        return math.exp(-float(np.sum((a - b) ** 2)) / (2 * s * s))

    m, n = len(x), len(y)
    xx = sum(k(x[i], x[j]) for i in range(m) for j in range(m) if i != j) / (m * (m - 1))
    yy = sum(k(y[i], y[j]) for i in range(n) for j in range(n) if i != j) / (n * (n - 1))
    xy = sum(k(x[i], y[j]) for i in range(m) for j in range(n)) / (m * n)
    return xx + yy - 2 * xy


@pytest.mark.parametrize("m, n, s", [(7, 7, 1.0), (9, 13, 0.7), (15, 4, 2.5)])
def test_mmd2_matches_a_direct_double_loop(m, n, s):
    rng = np.random.default_rng(m * 100 + n)
    x = rng.normal(size=(m, 3))
    y = rng.normal(0.5, 1.2, size=(n, 3))
    assert mmd2_unbiased(x, y, s) == pytest.approx(mmd2_unbiased_loop(x, y, s), rel=1e-10, abs=1e-12)


def test_median_bandwidth_is_the_median_pooled_pdist():
    rng = np.random.default_rng(3)
    x, y = rng.normal(size=(12, 4)), rng.normal(1.0, size=(9, 4))   # 21 points: 210 pairs, even count
    assert median_bandwidth(x, y) == pytest.approx(np.median(pdist(np.vstack([x, y]))), rel=1e-10)


def test_permutation_test_reports_the_statistic_at_the_median_bandwidth():
    rng = np.random.default_rng(4)
    x, y = rng.normal(size=(20, 5)), rng.normal(size=(25, 5))
    result = mmd_permutation_test(x, y, n_permutations=50, seed=1)
    assert result["bandwidth"] == pytest.approx(median_bandwidth(x, y), rel=1e-10)
    assert result["mmd2"] == pytest.approx(mmd2_unbiased(x, y, result["bandwidth"]), rel=1e-9, abs=1e-12)
    assert (result["n_x"], result["n_y"], result["n_permutations"]) == (20, 25, 50)
    assert 1 / 51 <= result["p_value"] <= 1.0


def test_false_positive_rate_on_same_distribution_is_within_binomial_tolerance():
    # Under H0 the permutation p-value is valid: P(p <= 0.05) <= 0.05. Over N independent draws
    # the rejection count is binomial; accept within 3 standard errors (common practice).
    alpha, draws = 0.05, 200
    rng = np.random.default_rng(5)
    rejections = 0
    for i in range(draws):
        x, y = rng.normal(size=(20, 5)), rng.normal(size=(20, 5))
        rejections += mmd_permutation_test(x, y, n_permutations=99, seed=i)["p_value"] <= alpha
    rate, se = rejections / draws, math.sqrt(alpha * (1 - alpha) / draws)
    assert alpha - 3 * se <= rate <= alpha + 3 * se, f"rejection rate {rate:.3f} over {draws} draws"


def test_a_mean_shifted_sample_is_detected():
    rng = np.random.default_rng(6)
    x = rng.normal(size=(60, 8))
    y = rng.normal(size=(60, 8)) + 1.0
    assert mmd_permutation_test(x, y, n_permutations=500)["p_value"] < 0.01


def test_seed_makes_the_p_value_reproducible():
    rng = np.random.default_rng(7)
    x, y = rng.normal(size=(30, 3)), rng.normal(0.3, size=(30, 3))
    assert mmd_permutation_test(x, y, 100, seed=3) == mmd_permutation_test(x, y, 100, seed=3)


def test_runtime_on_1000_by_1000_vectors_of_dim_1280():
    rng = np.random.default_rng(8)
    x = rng.normal(size=(1200, 1280)).astype(np.float32)   # above MAX_SAMPLES: subsampled
    y = rng.normal(size=(1000, 1280)).astype(np.float32)
    start = time.perf_counter()
    result = mmd_permutation_test(x, y, n_permutations=500)
    print(f"\nmmd_permutation_test 1000 x 1000 x 1280, 500 permutations: {time.perf_counter() - start:.2f} s")
    assert (result["n_x"], result["n_y"]) == (1000, 1000)


def test_mismatched_feature_counts_are_rejected_with_the_shapes():
    with pytest.raises(ValueError, match="same number of features"):
        mmd_permutation_test(np.zeros((5, 3)), np.zeros((5, 4)))


@pytest.mark.parametrize("k, n, p", [(0, 50, 0.05), (3, 50, 0.05), (9, 50, 0.05), (40, 1000, 0.02)])
def test_flagged_share_test_equals_scipy_binomtest(k, n, p):
    result = flagged_share_test(k, n, p)
    assert result["binomial_p_value"] == binomtest(k, n, p, alternative="greater").pvalue
    assert result["flagged_share"] == k / n
    assert result["expected_share"] == p


def test_flagged_share_test_rejects_more_flags_than_images():
    with pytest.raises(ValueError, match="n_flagged"):
        flagged_share_test(11, 10, 0.05)


@pytest.mark.parametrize("mmd_p, binomial_p, shift", [
    (0.03, 0.03, False),    # each below alpha but not below alpha / 2 (Bonferroni)
    (0.02, 0.9, True),
    (0.9, 0.02, True),
    (0.5, math.nan, False),  # a missing test never signals a shift
])
def test_shift_verdict_is_bonferroni_over_the_two_tests(mmd_p, binomial_p, shift):
    assert shift_verdict(mmd_p, binomial_p, alpha=0.05) is shift
