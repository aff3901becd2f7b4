"""Detector metrics against outside references: scikit-learn's implementations, the worked example of
Hanley & McNeil (Radiology 1982), DeLong et al.'s definition (Biometrics 1988), Newcombe's score
interval (Statistics in Medicine 2006) solved independently with NumPy/SciPy, and CI coverage by
simulation. Label 1 = anomalous (positive), higher score = more anomalous.
"""
import json
import math

import numpy as np
import pytest
from sklearn import metrics as skm

from oddling.evaluation import metrics as m
from oddling.reporting.plots import plot_pr, plot_roc

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def continuous(seed=0, n=500):
    rng = np.random.default_rng(seed)
    y = (rng.random(n) < 0.3).astype(int)
    return y, rng.normal(size=n) + 1.2 * y


def tied_integers(seed=1, n=400):
    rng = np.random.default_rng(seed)
    y = (rng.random(n) < 0.4).astype(int)
    return y, (rng.integers(0, 4, n) + 2 * y).astype(float)   # 6 distinct values for 400 samples


def rare_positives(seed=2, n=2000):
    rng = np.random.default_rng(seed)
    y = np.zeros(n, dtype=int)
    y[rng.choice(n, n // 100, replace=False)] = 1              # exactly 1% anomalies
    return y, rng.normal(size=n) + 2.0 * y


DATASETS = {"continuous": continuous, "tied_integers": tied_integers, "rare_positives": rare_positives}


@pytest.fixture(params=list(DATASETS))
def data(request):
    return DATASETS[request.param]()


# --- curves and areas against scikit-learn -----------------------------------------------------

def test_roc_curve_equals_sklearn(data):
    y, s = data
    ours = m.roc_curve(y, s)
    theirs = skm.roc_curve(y, s, drop_intermediate=False)   # reference: scikit-learn
    assert ours[2][0] == np.inf and ours[0][0] == 0.0 and ours[1][0] == 0.0
    for a, b in zip(ours, theirs):
        assert a.shape == b.shape
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-9)


def test_auroc_equals_sklearn(data):
    y, s = data
    assert m.auroc(y, s) == pytest.approx(skm.roc_auc_score(y, s), abs=1e-9)   # reference: scikit-learn


def test_precision_recall_curve_equals_sklearn(data):
    y, s = data
    ours = m.precision_recall_curve(y, s)
    theirs = skm.precision_recall_curve(y, s)   # reference: scikit-learn
    for a, b in zip(ours, theirs):
        assert a.shape == b.shape
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-9)


def test_average_precision_equals_sklearn(data):
    y, s = data
    assert m.average_precision(y, s) == pytest.approx(skm.average_precision_score(y, s), abs=1e-9)  # scikit-learn


# --- the AUROC's uncertainty --------------------------------------------------------------------

def hanley_mcneil_ct_example():
    """Hanley & McNeil 1982, Table 1: 58 normal and 51 abnormal CT images rated 1 (definitely
    normal) to 5 (definitely abnormal)."""
    ratings = np.arange(1, 6, dtype=float)
    normal, abnormal = [33, 6, 6, 11, 2], [3, 2, 2, 11, 33]
    s = np.r_[np.repeat(ratings, normal), np.repeat(ratings, abnormal)]
    y = np.r_[np.zeros(58, dtype=int), np.ones(51, dtype=int)]
    return y, s


def test_hanley_mcneil_worked_example_auc():
    y, s = hanley_mcneil_ct_example()
    assert m.auroc(y, s) == pytest.approx(0.893, abs=0.0005)   # values from the paper's worked example, from memory


def test_hanley_mcneil_worked_example_se():
    y, s = hanley_mcneil_ct_example()
    se = m.hanley_mcneil_se(m.auroc(y, s), n_pos=51, n_neg=58)
    assert se == pytest.approx(0.032, abs=0.0005)   # values from the paper's worked example, from memory


def test_delong_se_close_to_hanley_mcneil_worked_example():
    y, s = hanley_mcneil_ct_example()
    # values from the paper's worked example, from memory; DeLong's SE is a different estimator,
    # so only close to the paper's 0.032
    assert math.sqrt(m.delong_variance(y, s)) == pytest.approx(0.032, abs=0.01)


def delong_variance_direct(y, s):
    """DeLong et al. 1988 as written: psi(X, Y) = 1, 1/2, 0 for X >, =, < Y over all pairs;
    V10 and V01 are its row and column means; var = S10/m + S01/n."""
    x, z = s[y == 1], s[y == 0]
    psi = (x[:, None] > z[None, :]) + 0.5 * (x[:, None] == z[None, :])
    v10, v01 = psi.mean(axis=1), psi.mean(axis=0)
    s10 = sum((v - v10.mean()) ** 2 for v in v10) / (len(x) - 1)
    s01 = sum((v - v01.mean()) ** 2 for v in v01) / (len(z) - 1)
    return s10 / len(x) + s01 / len(z)


@pytest.mark.parametrize("seed", range(5))
def test_delong_variance_equals_direct_structural_components(seed):
    rng = np.random.default_rng(seed)
    y = np.r_[np.ones(7 + seed, dtype=int), np.zeros(11, dtype=int)]
    s = np.round(rng.normal(size=len(y)) + y, 1)   # one decimal: some ties
    assert m.delong_variance(y, s) == pytest.approx(delong_variance_direct(y, s), rel=1e-12)


def test_delong_ci_covers_the_true_auc_about_95_percent_of_the_time():
    # binormal: anomalies N(1, 1), normals N(0, 1), so the true AUC is Phi(1 / sqrt(2))
    from scipy.stats import norm

    true_auc = norm.cdf(1 / math.sqrt(2))
    rng = np.random.default_rng(12345)
    y = np.r_[np.ones(40, dtype=int), np.zeros(60, dtype=int)]
    hits = 0
    n_sets = 300
    for _ in range(n_sets):
        low, high = m.delong_ci(y, rng.normal(size=len(y)) + y)
        hits += low <= true_auc <= high
    assert 0.90 <= hits / n_sets <= 0.99   # common practice tolerance around the nominal 0.95


def test_delong_ci_is_clipped_to_the_unit_interval():
    y = np.r_[np.ones(3, dtype=int), np.zeros(3, dtype=int)]
    low, high = m.delong_ci(y, [4.0, 5.0, 6.0, 1.0, 2.0, 3.0])   # perfect separation
    assert high == 1.0 and low <= 1.0


def test_delong_ci_is_undefined_with_a_single_anomaly():
    low, high = m.delong_ci([1, 0, 0], [2.0, 1.0, 0.0])   # S10 needs two anomalies (DeLong et al. 1988)
    assert math.isnan(low) and math.isnan(high)


# --- Newcombe's score interval (what evaluation_summary reports) --------------------------------

def newcombe_limits_from_the_quartic(auc, m_pos, n_neg, level=0.95):
    """Newcombe 2006 method 5 solved another way: (A - t)^2 = z^2 V(t), multiplied out by
    (2 - t)(1 + t) m n, is a quartic in t; its real roots in [0, 1] are the limits. NumPy's
    companion-matrix roots and SciPy's normal quantile; nothing from oddling."""
    from numpy.polynomial import Polynomial as P
    from scipy.stats import norm

    z2 = norm.ppf(0.5 + level / 2) ** 2
    t = P([0.0, 1.0])
    n_star = (m_pos + n_neg) / 2
    lhs = (auc - t) ** 2 * (2 - t) * (1 + t) * m_pos * n_neg
    rhs = z2 * t * (1 - t) * ((2 - t) * (1 + t) + (n_star - 1) * ((1 - t) * (1 + t) + t * (2 - t)))
    roots = (lhs - rhs).roots()
    real = sorted(r.real for r in roots if abs(r.imag) < 1e-9 and -1e-9 <= r.real <= 1 + 1e-9)
    return min(real), max(real)


@pytest.mark.parametrize("auc, m_pos, n_neg", [
    (0.8932, 51, 58),   # Hanley & McNeil 1982's CT example
    (1.0, 8, 10), (0.0, 8, 10), (0.5, 3, 3), (0.97, 12, 40), (0.61, 200, 35), (0.75, 1, 1),
])
def test_newcombe_ci_equals_the_roots_of_its_quartic(auc, m_pos, n_neg):
    ours = m.newcombe_ci(auc, m_pos, n_neg)
    assert ours == pytest.approx(newcombe_limits_from_the_quartic(auc, m_pos, n_neg), abs=1e-8)  # NumPy/SciPy


def test_newcombe_variance_at_the_estimate_is_close_to_hanley_mcneil_worked_example():
    # values from the paper's worked example, from memory: SE 0.032 at A = 0.893 for 51 vs 58;
    # Newcombe's variance averages the class sizes, so only close to it
    assert math.sqrt(m.newcombe_variance(0.8932, 51, 58)) == pytest.approx(0.032, abs=0.001)


def test_newcombe_ci_at_perfect_separation_of_10_vs_8_does_not_collapse():
    y = np.r_[np.ones(8, dtype=int), np.zeros(10, dtype=int)]
    s = np.r_[np.arange(8) + 100.0, np.arange(10.0)]
    summary = m.evaluation_summary(y, s, cutoff=50.0)
    low, high = summary["auroc_ci95"]
    assert summary["auroc"] == 1.0 and high == 1.0
    # NumPy/SciPy: the quartic's root, 0.7776; DeLong's Wald interval was the point 1.000-1.000
    assert low == pytest.approx(newcombe_limits_from_the_quartic(1.0, 8, 10)[0], abs=1e-6)
    assert low < 0.8
    assert m.delong_ci(y, s) == (1.0, 1.0)
    assert summary["small_sample"] is True and summary["small_sample_min"] == 20   # common practice
    assert summary["auroc_ci_method"].startswith("Newcombe (2006)")


def test_newcombe_ci_is_symmetric_in_the_classes():
    # swapping which class is "positive" turns A into 1 - A (Newcombe 2006: a reason for N*)
    low, high = m.newcombe_ci(0.83, 9, 30)
    assert m.newcombe_ci(0.17, 30, 9) == pytest.approx((1 - high, 1 - low), abs=1e-9)


def test_newcombe_ci_exists_with_a_single_anomaly():
    low, high = m.newcombe_ci(1.0, 1, 2)
    assert 0.0 < low < 0.5 and high == 1.0   # DeLong's S10 is undefined here (see above)


@pytest.mark.parametrize("m_pos, n_neg, shift", [(8, 10, 1.0), (8, 10, 2.5), (40, 60, 3.0)])
def test_newcombe_ci_covers_the_true_auc_at_small_n_and_high_auc(m_pos, n_neg, shift):
    # binormal: anomalies N(shift, 1), normals N(0, 1), true AUC Phi(shift / sqrt 2) (0.76, 0.96, 0.98);
    # at shift 2.5 with 8 vs 10 about 30% of the sets are perfectly separated
    from scipy.stats import norm

    true_auc = norm.cdf(shift / math.sqrt(2))
    rng = np.random.default_rng(2024)
    y = np.r_[np.ones(m_pos, dtype=int), np.zeros(n_neg, dtype=int)]
    n_sets = 400
    hits = sum(low <= true_auc <= high for low, high in (
        m.newcombe_ci(m.auroc(y, rng.normal(size=len(y)) + shift * y), m_pos, n_neg) for _ in range(n_sets)))
    assert 0.92 <= hits / n_sets <= 0.995   # common practice tolerance around the nominal 0.95


def test_newcombe_ci_rejects_bad_inputs():
    with pytest.raises(ValueError, match="auc must be in"):
        m.newcombe_ci(1.2, 5, 5)
    with pytest.raises(ValueError, match="n_pos and n_neg must be >= 1"):
        m.newcombe_ci(0.5, 0, 5)
    with pytest.raises(ValueError, match="level must be in"):
        m.newcombe_ci(0.5, 5, 5, level=1.0)


def test_importing_metrics_does_not_load_torch():
    # metrics' own imports (numpy, scipy, oddling.numbers); the package __init__ is skipped here
    # because it imports the whole API, see the next test
    import subprocess
    import sys
    from pathlib import Path

    import oddling

    package = str(Path(oddling.__file__).parent)
    code = ("import sys, types; pkg = types.ModuleType('oddling'); pkg.__path__ = [%r]; "
            "sys.modules['oddling'] = pkg; import oddling.evaluation.metrics; "
            "print('torch' in sys.modules)" % package)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_importing_metrics_through_the_package_does_not_load_torch():
    import subprocess
    import sys

    out = subprocess.run([sys.executable, "-c", "import sys, oddling.evaluation.metrics; "
                          "print('torch' in sys.modules)"], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_json_number_is_still_importable_from_results():
    from oddling.numbers import json_number
    from oddling.reporting.results import json_number as re_exported

    assert re_exported is json_number and json_number(float("nan")) is None and json_number(0.1234567) == 0.123457


# --- operating points ---------------------------------------------------------------------------

@pytest.mark.parametrize("max_fpr", [0.0, 0.01, 0.05, 0.2, 1.0])
def test_tpr_at_fpr_equals_a_scan_of_sklearn_roc(data, max_fpr):
    y, s = data
    fpr, tpr, _ = skm.roc_curve(y, s, drop_intermediate=False)   # reference: scikit-learn
    expected = max(t for f, t in zip(fpr, tpr) if f <= max_fpr)
    assert m.tpr_at_fpr(y, s, max_fpr) == pytest.approx(expected, abs=1e-12)


@pytest.mark.parametrize("min_tpr", [0.0, 0.5, 0.9, 0.95, 1.0])
def test_fpr_at_tpr_equals_a_scan_of_sklearn_roc(data, min_tpr):
    y, s = data
    fpr, tpr, _ = skm.roc_curve(y, s, drop_intermediate=False)   # reference: scikit-learn
    expected = min(f for f, t in zip(fpr, tpr) if t >= min_tpr)
    assert m.fpr_at_tpr(y, s, min_tpr) == pytest.approx(expected, abs=1e-12)


@pytest.mark.parametrize("cutoff", [-np.inf, 0.5, 2.0, 3.0, np.inf])
def test_confusion_at_equals_sklearn_confusion_matrix(data, cutoff):
    y, s = data
    c = m.confusion_at(y, s, cutoff)
    tn, fp, fn, tp = skm.confusion_matrix(y, s > cutoff, labels=[0, 1]).ravel()   # reference: scikit-learn
    assert (c.tp, c.fp, c.tn, c.fn) == (tp, fp, tn, fn)


@pytest.mark.parametrize("beta", [0.5, 1.0, 2.0])
@pytest.mark.parametrize("cutoff", [-np.inf, 1.0, 3.0, np.inf])
def test_confusion_rates_and_f_beta_equal_sklearn(beta, cutoff):
    y, s = tied_integers()
    c = m.confusion_at(y, s, cutoff)
    pred = s > cutoff
    # reference: scikit-learn, zero_division=0 as documented for Confusion
    assert c.f_beta(beta) == pytest.approx(skm.fbeta_score(y, pred, beta=beta, zero_division=0), abs=1e-12)
    assert c.precision == pytest.approx(skm.precision_score(y, pred, zero_division=0), abs=1e-12)
    assert c.recall == pytest.approx(skm.recall_score(y, pred, zero_division=0), abs=1e-12)


def test_rates_of_an_empty_prediction_are_zero_not_nan():
    c = m.Confusion(tp=0, fp=0, tn=5, fn=0)
    assert (c.precision, c.recall, c.fpr, c.f_beta(1.0)) == (0.0, 0.0, 0.0, 0.0)


@pytest.mark.parametrize("beta", [0.5, 1.0, 2.0])
@pytest.mark.parametrize("make", [continuous, tied_integers])
def test_best_f_beta_is_the_max_of_sklearn_fbeta_over_all_cutoffs(make, beta):
    y, s = make(n=150)
    best = m.best_f_beta(y, s, beta=beta)
    cutoffs = np.r_[-np.inf, np.unique(s)]
    # reference: scikit-learn's fbeta_score of each rule "score > t"
    expected = max(skm.fbeta_score(y, s > t, beta=beta, zero_division=0) for t in cutoffs)
    assert best["f_beta"] == pytest.approx(expected, abs=1e-12)
    pred = s > best["cutoff"]
    assert best["precision"] == pytest.approx(skm.precision_score(y, pred, zero_division=0), abs=1e-12)
    assert best["recall"] == pytest.approx(skm.recall_score(y, pred, zero_division=0), abs=1e-12)


def test_best_f_beta_breaks_ties_toward_the_higher_cutoff():
    # F1 is 2/3 both when flagging everything (cutoff -inf) and only the top score (cutoff 3)
    best = m.best_f_beta([1, 0, 0, 1], [1.0, 2.0, 3.0, 4.0])
    assert best["cutoff"] == 3.0 and best["f_beta"] == pytest.approx(2 / 3)


@pytest.mark.parametrize("beta", [0.0, -1.0, math.inf, math.nan])
def test_beta_must_be_positive(beta):
    with pytest.raises(ValueError, match="beta must be"):
        m.best_f_beta([0, 1], [0.0, 1.0], beta=beta)


# --- input checks and the JSON report -----------------------------------------------------------

@pytest.mark.parametrize("labels, scores, message", [
    ([0, 1, 1], [0.1, 0.2], "same length, got: 3 and 2"),
    ([0, 2, 1], [0.1, 0.2, 0.3], r"labels must be 0 \(normal\) or 1 \(anomalous\), got: \[2\]"),
    ([0, 1, 1], [0.1, np.nan, 0.3], "scores must be finite, got: nan at index 1"),
    ([0, 0, 0], [0.1, 0.2, 0.3], "both normal .* got: 3 normal and 0 anomalous"),
])
def test_bad_inputs_fail_with_the_parameter_and_value(labels, scores, message):
    with pytest.raises(ValueError, match=message):
        m.auroc(labels, scores)


def test_evaluation_summary_needs_both_classes():
    with pytest.raises(ValueError, match="0 normal and 3 anomalous"):
        m.evaluation_summary([1, 1, 1], [0.1, 0.2, 0.3], cutoff=0.0)


def test_evaluation_summary_is_plain_json_consistent_with_the_functions():
    y, s = tied_integers()
    kinds = np.where(np.arange(len(y)) % 2 == 0, "scratch", "dent")
    summary = m.evaluation_summary(y, s, cutoff=np.inf, kinds=list(kinds), beta=2.0)
    assert json.loads(json.dumps(summary, allow_nan=False)) == summary   # strict JSON, no NaN/inf
    assert summary["auroc"] == round(skm.roc_auc_score(y, s), 6)        # reference: scikit-learn
    assert summary["at_cutoff"]["cutoff"] is None and summary["at_cutoff"]["tp"] == 0
    assert summary["n_normal"] + summary["n_anomalous"] == len(y)
    assert set(summary["tpr_at_fpr"]) == {"0.01", "0.05"}
    low, high = summary["auroc_ci95"]
    assert low < summary["auroc"] < high
    assert summary["small_sample"] is False   # 400 samples, 40% anomalous
    for kind in ("scratch", "dent"):
        keep = (y == 0) | (kinds == kind)
        assert summary["per_kind_auroc"][kind] == round(skm.roc_auc_score(y[keep], s[keep]), 6)  # scikit-learn
    assert summary["best_f_beta"]["beta"] == 2.0


# --- plots --------------------------------------------------------------------------------------

def test_plot_roc_writes_a_png(tmp_path):
    y, s = continuous()
    fpr, tpr, _ = m.roc_curve(y, s)
    out = plot_roc(fpr, tpr, m.auroc(y, s), tmp_path / "roc.png")
    assert out.read_bytes()[:8] == PNG_SIGNATURE


def test_plot_pr_writes_a_png(tmp_path):
    y, s = continuous()
    precision, recall, _ = m.precision_recall_curve(y, s)
    out = plot_pr(precision, recall, m.average_precision(y, s), float(y.mean()), tmp_path / "pr.png")
    assert out.read_bytes()[:8] == PNG_SIGNATURE


# --- copies: each content counted once in the interval ------------------------------------------

def copies_case():
    """30 copies of one normal (score 0.1) and 30 of one anomaly (0.9), plus 4 distinct of each."""
    rng = np.random.default_rng(7)
    y = np.r_[np.zeros(34, dtype=int), np.ones(34, dtype=int)]
    s = np.r_[np.full(30, 0.1), rng.normal(0.2, 0.2, 4), np.full(30, 0.9), rng.normal(0.6, 0.2, 4)]
    groups = ["n"] * 30 + ["n1", "n2", "n3", "n4"] + ["a"] * 30 + ["a1", "a2", "a3", "a4"]
    return y, s, groups


def test_auroc_ci_counts_each_content_once():
    y, s, groups = copies_case()
    once = np.r_[0, 30, 31, 32, 33, 34, 64, 65, 66, 67]   # the first copy of each content
    # reference: scikit-learn's AUROC of one copy each, and Newcombe's limits solved as a quartic
    auc_once = skm.roc_auc_score(y[once], s[once])
    expected = newcombe_limits_from_the_quartic(auc_once, 5, 5)
    assert m.auroc_ci(y, s, groups) == pytest.approx(expected, abs=1e-8)
    # without groups every file counts: 34 vs 34 gives a narrower interval
    low_files, _ = m.auroc_ci(y, s)
    assert low_files > expected[0]


def test_two_contents_in_many_copies_give_the_interval_of_two_images():
    # 1,000 copies of one normal and 1,000 of one anomaly once gave "[0.998, 1.0]": that is 1 vs 1
    y = np.r_[np.zeros(1000, dtype=int), np.ones(1000, dtype=int)]
    s = np.r_[np.zeros(1000), np.ones(1000)]
    groups = ["normal"] * 1000 + ["anomaly"] * 1000
    low, high = m.auroc_ci(y, s, groups)
    assert (low, high) == pytest.approx(newcombe_limits_from_the_quartic(1.0, 1, 1), abs=1e-8)  # NumPy/SciPy
    assert low < 0.3 and high == 1.0
    assert m.auroc_ci(y, s)[0] > 0.99   # what counting files claimed


def test_distinct_contents_average_the_scores_of_copies_and_keep_contradictions():
    y = np.array([0, 0, 1, 1, 0, 1])
    s = np.array([0.1, 0.3, 0.8, 0.8, 0.5, 0.2])
    groups = ["a", "a", "b", "b", None, "a"]     # "a" is also labelled anomalous once; None: unhashed
    dy, ds = m.distinct_contents(y, s, groups)
    assert dy.tolist() == [0, 1, 0, 1] and ds == pytest.approx([0.2, 0.8, 0.5, 0.2])
    assert m.content_counts(y, groups) == {"n_distinct_normal": 2, "n_distinct_anomalous": 2,
                                           "n_duplicate_files": 2, "n_contents_in_both_classes": 1}


def test_evaluation_summary_counts_contents_and_bases_the_interval_on_them():
    y, s, groups = copies_case()
    summary = m.evaluation_summary(y, s, cutoff=0.5, groups=groups)
    assert (summary["n_normal"], summary["n_anomalous"]) == (34, 34)
    assert (summary["n_distinct_normal"], summary["n_distinct_anomalous"], summary["n_duplicate_files"]) == (5, 5, 58)
    assert summary["auroc"] == round(skm.roc_auc_score(y, s), 6)   # reference: scikit-learn, every file counts
    assert summary["auroc_ci95"] == [round(v, 6) for v in m.auroc_ci(y, s, groups)]
    assert summary["small_sample"] is True   # 5 distinct contents per class, not 34
    assert "distinct contents" in summary["auroc_ci_method"]


def test_precision_with_nothing_flagged_is_null_with_a_note():
    y, s = tied_integers()
    summary = m.evaluation_summary(y, s, cutoff=np.inf)
    c = summary["at_cutoff"]
    assert c["precision"] is None and c["note"] == m.NOTHING_FLAGGED
    assert (c["tp"], c["fp"], c["recall"], c["fpr"]) == (0, 0, 0.0, 0.0)
    flagged = m.evaluation_summary(y, s, cutoff=3.0)["at_cutoff"]
    # reference: scikit-learn's precision where something is flagged
    assert flagged["precision"] == round(skm.precision_score(y, s > 3.0), 6) and flagged["note"] is None
