"""Conformal p-values and the cutoff that holds a stated false-alarm rate.

Reference: Vovk, Gammerman & Shafer, Algorithmic Learning in a Random World (2005) and Bates et
al., Annals of Statistics 2023: p(s) = (1 + #{c >= s}) / (n + 1), and P(p <= a) <= a for a new
exchangeable normal score.
"""
import math

import numpy as np
import pytest

from oddling.detectors.conformal import conformal_p_values, cutoff_for_rate, flag, min_calibration_size


def p_value_loop(cal, s):
    """The definition, written out one score at a time."""
    return (1 + sum(c >= s for c in cal)) / (len(cal) + 1)


def test_p_values_match_the_definition_on_a_hand_example():
    cal = np.array([0.1, 0.2, 0.2, 0.5])
    # s = 0.2: two calibration scores equal it and one exceeds it -> (1 + 3) / 5
    np.testing.assert_allclose(conformal_p_values(cal, [0.0, 0.2, 0.3, 0.9]), [1.0, 0.8, 0.4, 0.2])


def test_p_values_match_a_direct_loop_with_ties():
    rng = np.random.default_rng(0)
    cal = rng.integers(0, 10, 200).astype(float)
    s = rng.integers(-1, 12, 300).astype(float)
    np.testing.assert_allclose(conformal_p_values(cal, s), [p_value_loop(cal, v) for v in s])


@pytest.mark.parametrize("rate", [0.01, 0.05, 0.1, 0.2, 0.37])
def test_cutoff_rule_equals_p_value_rule(rate):
    rng = np.random.default_rng(1)
    for n in (5, 19, 99, 250):
        cal = rng.integers(0, 20, n).astype(float)     # integer scores: many ties
        s = rng.integers(-2, 25, 500).astype(float)
        by_cutoff = flag(s, cutoff_for_rate(cal, rate))
        by_p = conformal_p_values(cal, s) <= rate + 1e-12
        np.testing.assert_array_equal(by_cutoff, by_p)


@pytest.mark.parametrize("rate", [0.01, 0.05])
def test_false_alarm_rate_on_fresh_normal_draws(rate):
    # Guarantee: E[false-alarm rate] <= rate (Vovk et al. 2005). Two sources of spread around
    # that mean, each averaged over the seeds: the binomial error of N fresh draws,
    # a(1-a)/N, and the finite-sample slack of one calibration set, whose conditional rate
    # is Beta(k, n+1-k), k = floor(a(n+1)), variance ~ a(1-a)/(n+2) (Bates et al. 2023, Sec. 3).
    n_cal, n_fresh, seeds = 999, 20_000, range(5)
    shares = []
    for seed in seeds:
        rng = np.random.default_rng(100 + seed)
        cutoff = cutoff_for_rate(rng.standard_normal(n_cal), rate)
        shares.append(flag(rng.standard_normal(n_fresh), cutoff).mean())
    binomial_var = rate * (1 - rate) / n_fresh
    calibration_var = rate * (1 - rate) / (n_cal + 2)
    se = math.sqrt((binomial_var + calibration_var) / len(seeds))
    print(f"\n[calibration] target {rate}: observed false-alarm rate {np.mean(shares):.4f} (+3 se = {3 * se:.4f})")
    assert np.mean(shares) <= rate + 3 * se
    assert np.mean(shares) >= rate - 1 / (n_cal + 1) - 3 * se   # and the cutoff is not needlessly strict


@pytest.mark.parametrize("rate", [0.001, 0.01, 0.05, 0.1, 0.2, 0.25, 1 / 3, 0.5, 0.7, 0.99])
def test_min_calibration_size_is_where_a_finite_cutoff_appears(rate):
    n = min_calibration_size(rate)
    assert math.isfinite(cutoff_for_rate(np.arange(n, dtype=float), rate))
    assert cutoff_for_rate(np.arange(n - 1, dtype=float), rate) == math.inf


def test_too_few_calibration_scores_flag_nothing():
    cal = np.arange(50, dtype=float)          # 50 < 99 needed for a rate of 0.01
    assert min_calibration_size(0.01) == 99
    assert cutoff_for_rate(cal, 0.01) == math.inf
    assert not flag([1e9], cutoff_for_rate(cal, 0.01)).any()
    assert cutoff_for_rate(np.arange(99, dtype=float), 0.01) == 98.0   # n = 99: only above the max


def test_rate_outside_open_unit_interval_is_refused():
    with pytest.raises(ValueError, match="target_fpr must be in"):
        cutoff_for_rate([0.1, 0.2], 1.5)


def test_nan_scores_get_nan_p_and_no_flag():
    assert math.isnan(conformal_p_values([0.1, 0.2], [np.nan])[0])
    assert not flag([np.nan], 0.0)[0]
