"""The two guarantees a bank's cutoff can give, checked by simulation and against SciPy.

marginal: P(false alarm) <= a on average over calibration sets (Vovk, Gammerman & Shafer 2005).
confident: P(this bank's false-alarm rate > a) <= 1 - confidence over the draw of its calibration
set (Vovk 2012, training-conditional validity; Bates et al., Annals of Statistics 2023). For
calibration scores drawn from N(0, 1) a bank's exact false-alarm rate is the normal tail above its
cutoff (SciPy's `norm.sf`), so each simulated bank's rate is known without sampling fresh images.
"""
import math

import numpy as np
import pytest
from scipy.stats import binom, binomtest, norm

from oddling.detectors.conformal import (CONFIDENT, MARGINAL, ConformalThreshold, Guarantee, conformal_p_values,
                                         default_rate)

N_BANKS = 1000


def share_of_banks_above(n, rate, guarantee, seed=0):
    rng = np.random.default_rng(seed)
    above = 0
    for _ in range(N_BANKS):
        cutoff = ConformalThreshold(rng.standard_normal(n), rate, guarantee).cutoff
        above += norm.sf(cutoff) > rate      # this bank's exact false-alarm rate (SciPy)
    return above / N_BANKS


def binomial_upper(p, n=N_BANKS, level=0.99):
    """Upper end of the binomial interval for a share of n banks (SciPy's binom quantile)."""
    return binom.ppf(1 - (1 - level) / 2, n, p) / n


@pytest.mark.parametrize("n, rate", [(100, 0.1), (300, 0.05), (500, 0.01)])
def test_confident_banks_exceed_their_rate_at_most_one_time_in_ten(n, rate):
    share = share_of_banks_above(n, rate, Guarantee(CONFIDENT, 0.9))
    print(f"\n[confident] n={n} a={rate}: {share:.3f} of {N_BANKS} banks above the rate (<= 0.1 promised)")
    assert share <= binomial_upper(0.1)


@pytest.mark.parametrize("n, rate", [(100, 0.1), (300, 0.05)])
def test_marginal_banks_exceed_their_rate_about_half_the_time(n, rate):
    # The marginal promise is about the average over banks: a bank's own rate is a Beta variable
    # around a, above it a little under half the time (its median lies just below the mean).
    share = share_of_banks_above(n, rate, Guarantee(MARGINAL))
    print(f"\n[marginal] n={n} a={rate}: {share:.3f} of {N_BANKS} banks above the rate")
    assert 0.35 <= share <= 0.6


def test_confident_p_value_is_the_clopper_pearson_upper_bound():
    # Reference: SciPy's exact (Clopper-Pearson) binomial interval; its two-sided 80% interval's
    # upper end is the one-sided 90% upper bound.
    n, confidence = 60, 0.9
    cal = np.arange(n, dtype=float)
    threshold = ConformalThreshold(cal, 0.1, Guarantee(CONFIDENT, confidence))
    for j in (0, 1, 5, 30, 59):
        score = cal[::-1][j] + 0.5 if j else cal.max() + 1.0     # exactly j calibration scores above it
        expected = binomtest(j, n).proportion_ci(confidence_level=2 * confidence - 1, method="exact").high
        assert threshold.p_values([score])[0] == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize("kind", [MARGINAL, CONFIDENT])
@pytest.mark.parametrize("rate", [0.01, 0.05, 0.1, 0.3])
def test_cutoff_rule_equals_p_value_rule_under_both_guarantees(kind, rate):
    rng = np.random.default_rng(1)
    for n in (20, 99, 250, 600):
        cal = rng.integers(0, 30, n).astype(float)       # integer scores: many ties
        s = rng.integers(-2, 35, 400).astype(float)
        threshold = ConformalThreshold(cal, rate, Guarantee(kind))
        np.testing.assert_array_equal(threshold.flag(s), threshold.p_values(s) <= rate)


def test_marginal_p_values_are_unchanged():
    cal = np.array([0.1, 0.2, 0.2, 0.5])
    s = np.array([0.0, 0.2, 0.3, 0.9])
    np.testing.assert_array_equal(ConformalThreshold(cal, 0.2).p_values(s), conformal_p_values(cal, s))


def test_calibration_sizes_each_guarantee_needs():
    # marginal: a(n+1) >= 1; confident: (1 - a)^n <= 1 - confidence, n >= log(0.1)/log(0.99) = 229.1
    assert Guarantee(MARGINAL).min_calibration_size(0.01) == 99
    assert Guarantee(CONFIDENT, 0.9).min_calibration_size(0.01) == math.ceil(math.log(0.1) / math.log(0.99)) == 230
    for n in (229, 230):
        can = ConformalThreshold(np.arange(n, dtype=float), 0.01, Guarantee(CONFIDENT, 0.9)).can_flag
        assert can == (n >= 230)


def test_default_rate_is_the_first_one_the_calibration_supports():
    assert default_rate(120) == 0.01
    assert default_rate(80) == 0.02          # 0.01 needs 99, 0.02 needs 49
    assert default_rate(30) == 0.05          # 0.05 needs 19
    assert default_rate(10) == 0.1           # 0.1 needs 9
    assert default_rate(5) is None
    assert default_rate(100, Guarantee(CONFIDENT)) == 0.05   # 0.01 needs 230, 0.02 needs 114


def test_promises_are_said_in_words():
    assert ConformalThreshold(np.arange(200.0), 0.01).describe() == \
        "false-alarm rate 1% on average over reference sets (marginal)"
    assert ConformalThreshold(np.arange(300.0), 0.01, Guarantee(CONFIDENT, 0.9)).describe() == \
        "false-alarm rate at most 1% with 90% confidence for this bank"


@pytest.mark.parametrize("bad", [0.0, 1.0, 1.5, True, "high"])
def test_a_bad_confidence_is_refused(bad):
    with pytest.raises(ValueError, match="confidence must be in"):
        Guarantee(CONFIDENT, bad)
