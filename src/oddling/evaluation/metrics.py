"""How well scores separate normal (label 0) from anomalous (label 1) samples: ROC and PR curves,
AUROC with a confidence interval (Newcombe's score interval on distinct contents, `auroc_ci`, the
one interval evaluate and tune report; DeLong's variance too), rates and F-beta at a cutoff.
Pure NumPy/SciPy: importing this module does not load the embedding code.

Higher scores are more anomalous; a sample is predicted anomalous when its score is above the
cutoff ("score > cutoff"), the same rule the bank uses to flag images. The curves equal
scikit-learn's (`roc_curve(drop_intermediate=False)`, `precision_recall_curve`), which the tests
check; scikit-learn is not imported here.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq
from scipy.stats import norm, rankdata

from oddling.numbers import json_number

CI_METHOD = ("Newcombe (2006) method 5: score interval with the Hanley-McNeil variance for a balanced "
             "design, on distinct contents: copies of one file (same SHA-256) with the same label count once, at "
             "their mean score (auroc_distinct is the AUROC counted so; auroc counts every file)")
_EDGE = 1e-12           # newcombe_ci: how far inside [0, 1] an AUROC of 0 or 1 is bracketed
SMALL_SAMPLE_MIN = 20   # fewer normal or anomalous samples than this: the interval is wide, say so
_TPR_AT_FPR_RATES = (0.01, 0.05)


# --- input checks (once, at the public boundary) -----------------------------------------------

def _check(labels, scores, *, both_classes: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """labels as int8 in {0, 1} and scores as finite float64, both 1-D and of one length."""
    y = np.asarray(labels)
    s = np.asarray(scores, dtype=np.float64)
    if y.ndim != 1 or s.ndim != 1:
        raise ValueError(f"labels and scores must be 1-D, got shapes: {y.shape} and {s.shape}")
    if len(y) != len(s):
        raise ValueError(f"labels and scores must have the same length, got: {len(y)} and {len(s)}")
    bad = ~np.isin(y, (0, 1))
    if bad.any():
        raise ValueError(f"labels must be 0 (normal) or 1 (anomalous), got: {np.unique(y[bad])[:5].tolist()}")
    finite = np.isfinite(s)
    if not finite.all():
        i = int(np.flatnonzero(~finite)[0])
        raise ValueError(f"scores must be finite, got: {s[i]} at index {i}")
    y = y.astype(np.int8)
    if both_classes:
        n_pos = int(y.sum())
        if n_pos == 0 or n_pos == len(y):
            raise ValueError("labels need both normal (0) and anomalous (1) samples, got: "
                             f"{len(y) - n_pos} normal and {n_pos} anomalous")
    return y, s


def _check_beta(beta: float) -> float:
    if not (isinstance(beta, (int, float, np.number)) and math.isfinite(beta) and beta > 0):
        raise ValueError(f"beta must be a finite number > 0, got: {beta!r}")
    return float(beta)


def _check_unit(name: str, value: float) -> float:
    if not 0.0 <= value <= 1.0:
        raise ValueError(f"{name} must be in [0, 1], got: {value}")
    return float(value)


# --- curves -------------------------------------------------------------------------------------

def _counts(y: np.ndarray, s: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(tps, fps, thresholds) for "score >= t" at each distinct score t, descending; ties grouped."""
    order = np.argsort(-s, kind="stable")
    s, y = s[order], y[order]
    last_of_each = np.r_[np.flatnonzero(np.diff(s)), len(s) - 1]
    tps = np.cumsum(y, dtype=np.float64)[last_of_each]
    fps = 1.0 + last_of_each - tps
    return tps, fps, s[last_of_each]


def _roc(y, s):
    tps, fps, thresholds = _counts(y, s)
    tps, fps = np.r_[0.0, tps], np.r_[0.0, fps]   # the (0, 0) point: nothing flagged
    return fps / fps[-1], tps / tps[-1], np.r_[np.inf, thresholds]


def roc_curve(labels, scores) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(fpr, tpr, thresholds), one point per distinct score plus the leading (0, 0, inf).

    Point i is the rule "score >= thresholds[i]"; thresholds decrease. Equals
    ``sklearn.metrics.roc_curve(labels, scores, drop_intermediate=False)``.
    """
    return _roc(*_check(labels, scores))


def _auroc(y, s) -> float:
    fpr, tpr, _ = _roc(y, s)
    # trapezoids written out: np.trapz is gone in NumPy 2 and np.trapezoid absent before it
    return float(np.sum(np.diff(fpr) * (tpr[1:] + tpr[:-1])) / 2.0)


def auroc(labels, scores) -> float:
    """Area under the ROC curve (trapezoids, so a tied pair counts one half)."""
    return _auroc(*_check(labels, scores))


def _pr(y, s):
    tps, fps, thresholds = _counts(y, s)
    precision = tps / (tps + fps)   # every threshold flags at least one sample: no 0/0
    recall = tps / tps[-1]
    # scikit-learn's order: thresholds increasing, then a final (precision 1, recall 0) point
    return np.r_[precision[::-1], 1.0], np.r_[recall[::-1], 0.0], thresholds[::-1]


def precision_recall_curve(labels, scores) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(precision, recall, thresholds): point i is "score >= thresholds[i]", thresholds increasing.

    precision and recall have one more element than thresholds, the (1, 0) end point with no
    threshold. Equals ``sklearn.metrics.precision_recall_curve`` (scikit-learn >= 1.1: the
    curve runs to the lowest score and is not cut at full recall).
    """
    return _pr(*_check(labels, scores))


def _average_precision(y, s) -> float:
    precision, recall, _ = _pr(y, s)
    return float(max(0.0, -np.sum(np.diff(recall) * precision[:-1])))


def average_precision(labels, scores) -> float:
    """Sum over thresholds of (recall step) x precision, no interpolation.

    Equals ``sklearn.metrics.average_precision_score``.
    """
    return _average_precision(*_check(labels, scores))


# --- uncertainty of the AUROC -------------------------------------------------------------------

def _delong_variance(y, s) -> float:
    pos, neg = s[y == 1], s[y == 0]
    m, n = len(pos), len(neg)
    if m < 2 or n < 2:
        return math.nan   # the sample variances of the structural components need two of each
    # Sun & Xu: midranks within the pooled sample, minus those within each class, give each
    # sample's count of beaten samples of the other class (ties count one half).
    pooled = rankdata(np.r_[pos, neg])
    v10 = (pooled[:m] - rankdata(pos)) / n          # per anomaly: share of normals scored lower
    v01 = 1.0 - (pooled[m:] - rankdata(neg)) / m    # per normal: share of anomalies scored higher
    return float(np.var(v10, ddof=1) / m + np.var(v01, ddof=1) / n)


def delong_variance(labels, scores) -> float:
    """Variance of the AUROC estimate from its structural components.

    S10/m + S01/n, with S10 the sample variance over the m anomalies of the share of normals
    each outscores, S01 likewise over the n normals. NaN when a class has fewer than two samples.

    References
    ----------
    DeLong, DeLong & Clarke-Pearson, "Comparing the areas under two or more correlated receiver
    operating characteristic curves: a nonparametric approach", Biometrics 44:837-845, 1988.
    Sun & Xu, "Fast implementation of DeLong's algorithm for comparing the areas under correlated
    receiver operating characteristic curves", IEEE Signal Processing Letters 21(11):1389-1393, 2014.
    """
    return _delong_variance(*_check(labels, scores))


def _delong_ci(y, s, level: float) -> tuple[float, float]:
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must be in (0, 1), got: {level}")
    auc, var = _auroc(y, s), _delong_variance(y, s)
    if math.isnan(var):
        return math.nan, math.nan   # max/min below would silently turn NaN into 0 and 1
    half = norm.ppf(0.5 + level / 2.0) * math.sqrt(var)
    return float(max(0.0, auc - half)), float(min(1.0, auc + half))


def delong_ci(labels, scores, level: float = 0.95) -> tuple[float, float]:
    """(low, high): AUROC -/+ z * DeLong standard error, clipped to [0, 1]; NaN as delong_variance.

    A Wald interval: it shrinks to a point when the classes are perfectly separated (the variance is
    then 0, so "1.000-1.000" from 10 vs 8 images) and covers too rarely at high AUROC and small n.
    evaluate and tune report auroc_ci (Newcombe's score interval on distinct contents) instead; this
    stays for comparison and large samples, and tune's tie band uses DeLong's standard error.
    """
    y, s = _check(labels, scores)
    return _delong_ci(y, s, level)


def newcombe_variance(theta: float, n_pos: int, n_neg: int) -> float:
    """Hanley & McNeil's exponential-model variance of an AUROC of `theta`, both class sizes
    replaced by their mean: theta(1-theta)/(mn) * (1 + (N*-1)((1-theta)/(2-theta) + theta/(1+theta))),
    N* = (m+n)/2. Symmetric in the classes, so AUC and 1-AUC get mirror-image intervals."""
    n_star = (n_pos + n_neg) / 2.0
    shape = (1.0 - theta) / (2.0 - theta) + theta / (1.0 + theta)
    return theta * (1.0 - theta) * (1.0 + (n_star - 1.0) * shape) / (n_pos * n_neg)


def newcombe_ci(auc: float, n_pos: int, n_neg: int, level: float = 0.95) -> tuple[float, float]:
    """(low, high): every theta in [0, 1] with (auc - theta)^2 <= z^2 newcombe_variance(theta).

    A score-type interval, as Wilson's for a proportion: the variance is taken at the candidate
    theta, not at the estimate, so the interval stays inside [0, 1] without clipping and does not
    shrink to a point at auc = 1 (10 anomalies vs 8 normals, all separated: about 0.78-1). It needs
    only the AUROC and the class sizes, so it exists whenever both classes do.

    References
    ----------
    Newcombe, "Confidence intervals for an effect size measure based on the Mann-Whitney statistic.
    Part 2: Asymptotic methods and evaluation", Statistics in Medicine 25:559-573, 2006 (method 5,
    the one the paper recommends).
    Hanley & McNeil, Radiology 143:29-36, 1982 (the variance it builds on).
    """
    a = _check_unit("auc", auc)
    if n_pos < 1 or n_neg < 1:
        raise ValueError(f"n_pos and n_neg must be >= 1, got: {n_pos} and {n_neg}")
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must be in (0, 1), got: {level}")
    z2 = norm.ppf(0.5 + level / 2.0) ** 2
    gap = lambda theta: (a - theta) ** 2 - z2 * newcombe_variance(theta, n_pos, n_neg)  # noqa: E731
    # gap < 0 at theta = a, or just inside [0, 1] when a is 0 or 1 (the variance vanishes there
    # linearly, (a - theta)^2 quadratically); gap = (a - theta)^2 > 0 at the far end: a root between
    inside = min(max(a, _EDGE), 1.0 - _EDGE)
    low = 0.0 if a == 0.0 else brentq(gap, 0.0, inside, xtol=1e-12)
    high = 1.0 if a == 1.0 else brentq(gap, inside, 1.0, xtol=1e-12)
    return float(low), float(high)


def hanley_mcneil_se(auc: float, n_pos: int, n_neg: int) -> float:
    """Standard error of an AUROC from its value and the class sizes alone.

    Q1 = A/(2-A), Q2 = 2A^2/(1+A) (exponential approximation);
    SE^2 = (A(1-A) + (n_pos-1)(Q1-A^2) + (n_neg-1)(Q2-A^2)) / (n_pos n_neg).

    References
    ----------
    Hanley & McNeil, "The meaning and use of the area under a receiver operating characteristic
    (ROC) curve", Radiology 143:29-36, 1982.
    """
    a = _check_unit("auc", auc)
    if n_pos < 1 or n_neg < 1:
        raise ValueError(f"n_pos and n_neg must be >= 1, got: {n_pos} and {n_neg}")
    q1, q2 = a / (2.0 - a), 2.0 * a * a / (1.0 + a)
    var = (a * (1.0 - a) + (n_pos - 1) * (q1 - a * a) + (n_neg - 1) * (q2 - a * a)) / (n_pos * n_neg)
    return math.sqrt(max(var, 0.0))


# --- copies: statistics that count contents, not files --------------------------------------------

def _content_codes(y: np.ndarray, groups) -> np.ndarray:
    """One integer per (content, label), numbered in order of first appearance; a missing group
    (None: a file that could not be hashed) is a content of its own."""
    if groups is None:
        return np.arange(len(y))
    groups = list(groups)
    if len(groups) != len(y):
        raise ValueError(f"groups must have one entry per sample, got: {len(groups)} for {len(y)} samples")
    seen: dict = {}
    codes = np.empty(len(y), dtype=np.int64)
    for i, (label, group) in enumerate(zip(y.tolist(), groups)):
        key = (label, group) if group is not None else (label, None, i)
        codes[i] = seen.setdefault(key, len(seen))
    return codes


def _distinct(y, s, groups) -> tuple[np.ndarray, np.ndarray]:
    codes = _content_codes(y, groups)
    first = np.unique(codes, return_index=True)[1]   # codes are 0..k-1 in order of first appearance
    mean = np.bincount(codes, weights=s) / np.bincount(codes)
    return y[first], mean


def distinct_contents(labels, scores, groups) -> tuple[np.ndarray, np.ndarray]:
    """(labels, scores) with each content counted once per label: the copies of one file (same
    entry in `groups`, e.g. the SHA-256 of its bytes) with the same label become one sample, at
    their mean score (copies score alike with one bank; the mean absorbs the last bits a different
    batch can move). A content labelled both ways stays once in each class. None in `groups` is a
    content of its own. Order: first appearance."""
    return _distinct(*_check(labels, scores, both_classes=False), groups)


def content_counts(labels, groups) -> dict[str, int]:
    """How many distinct contents each class holds: {"n_distinct_normal", "n_distinct_anomalous",
    "n_duplicate_files" (files beyond the first of their content within their class),
    "n_contents_in_both_classes" (contents labelled normal in one copy and anomalous in another)}."""
    y = np.asarray(labels)
    y, _ = _check(y, np.zeros(len(y)), both_classes=False)
    groups = None if groups is None else list(groups)
    codes = _content_codes(y, groups)
    first = np.unique(codes, return_index=True)[1]
    distinct = y[first]
    n_normal, n_anomalous = int(np.sum(distinct == 0)), int(np.sum(distinct == 1))
    both = 0
    if groups is not None:
        by_label = [{g for g, label in zip(groups, y.tolist()) if g is not None and label == value} for value in (0, 1)]
        both = len(by_label[0] & by_label[1])
    return {"n_distinct_normal": n_normal, "n_distinct_anomalous": n_anomalous,
            "n_duplicate_files": len(y) - n_normal - n_anomalous, "n_contents_in_both_classes": both}


def _auroc_ci(y, s, groups, level: float) -> tuple[float, float]:
    dy, ds = _distinct(y, s, groups)
    return newcombe_ci(_auroc(dy, ds), int(np.sum(dy == 1)), int(np.sum(dy == 0)), level)


def auroc_ci(labels, scores, groups=None, level: float = 0.95) -> tuple[float, float]:
    """The AUROC interval oddling reports, in evaluate and tune alike (CI_METHOD says it in words).

    newcombe_ci of the AUROC of the distinct contents (distinct_contents), with their counts as
    the class sizes: 1,000 copies of one normal image and 1,000 of one anomalous image are 1 vs 1,
    not 1,000 vs 1,000, so the interval is as wide as two images allow. `groups=None`: every sample
    is a content of its own. Never zero-width at perfect separation (see newcombe_ci).
    """
    y, s = _check(labels, scores)
    return _auroc_ci(y, s, groups, level)


# --- operating points ---------------------------------------------------------------------------

def _tpr_at_fpr(y, s, max_fpr: float) -> float:
    fpr, tpr, _ = _roc(y, s)
    return float(tpr[fpr <= max_fpr].max())   # (0, 0) is always a candidate


def tpr_at_fpr(labels, scores, max_fpr: float) -> float:
    """Largest TPR among ROC points with FPR <= max_fpr (the detection rate at a false-alarm budget)."""
    max_fpr = _check_unit("max_fpr", max_fpr)
    return _tpr_at_fpr(*_check(labels, scores), max_fpr)


def _fpr_at_tpr(y, s, min_tpr: float) -> float:
    fpr, tpr, _ = _roc(y, s)
    return float(fpr[tpr >= min_tpr].min())   # (1, 1) is always a candidate


def fpr_at_tpr(labels, scores, min_tpr: float = 0.95) -> float:
    """Smallest FPR among ROC points with TPR >= min_tpr (the false-alarm cost of a detection rate)."""
    min_tpr = _check_unit("min_tpr", min_tpr)
    return _fpr_at_tpr(*_check(labels, scores), min_tpr)


def _ratio(num, den):
    """num/den, 0.0 where den == 0 (works on scalars and arrays)."""
    num, den = np.asarray(num, dtype=np.float64), np.asarray(den, dtype=np.float64)
    return np.divide(num, den, out=np.zeros(np.broadcast(num, den).shape), where=den != 0)


def _f_beta(tp, fp, fn, beta: float):
    """(1+b^2)TP / ((1+b^2)TP + b^2 FN + FP): van Rijsbergen's F with alpha = 1/(1+b^2)."""
    b2 = beta * beta
    return _ratio((1.0 + b2) * np.asarray(tp), (1.0 + b2) * np.asarray(tp) + b2 * np.asarray(fn) + fp)


@dataclass(frozen=True)
class Confusion:
    """Counts of the rule "predicted anomalous iff score > cutoff", anomalous being positive.

    Rates whose denominator is zero (precision with nothing flagged, recall without anomalies,
    fpr without normals) are 0.0, as scikit-learn's ``zero_division=0``; evaluation_summary
    reports precision with nothing flagged as None instead (0 of 0 is not 0).
    """

    tp: int
    fp: int
    tn: int
    fn: int

    @property
    def n_flagged(self) -> int:
        return self.tp + self.fp

    @property
    def precision(self) -> float:
        return float(_ratio(self.tp, self.tp + self.fp))

    @property
    def recall(self) -> float:
        return float(_ratio(self.tp, self.tp + self.fn))

    @property
    def fpr(self) -> float:
        return float(_ratio(self.fp, self.fp + self.tn))

    def f_beta(self, beta: float = 1.0) -> float:
        """F-beta (van Rijsbergen, *Information Retrieval*, 2nd ed., 1979): recall weighted beta times
        as much as precision; 0.0 when nothing is flagged and there are no anomalies."""
        return float(_f_beta(self.tp, self.fp, self.fn, _check_beta(beta)))


def _confusion(y, s, cutoff: float) -> Confusion:
    flagged = s > cutoff
    tp = int(np.sum(flagged & (y == 1)))
    fp = int(np.sum(flagged & (y == 0)))
    return Confusion(tp=tp, fp=fp, tn=int(np.sum(y == 0)) - fp, fn=int(np.sum(y == 1)) - tp)


def _check_cutoff(cutoff: float) -> float:
    if cutoff is None or math.isnan(cutoff):
        raise ValueError(f"cutoff must be a number (inf flags nothing), got: {cutoff}")
    return float(cutoff)


def confusion_at(labels, scores, cutoff: float) -> Confusion:
    """Confusion counts when samples with score > cutoff are predicted anomalous."""
    y, s = _check(labels, scores, both_classes=False)
    return _confusion(y, s, _check_cutoff(cutoff))


def _best_f_beta(y, s, beta: float) -> dict:
    cutoffs = np.r_[-np.inf, np.unique(s)]   # -inf flags everything, the top score flags nothing
    pos, neg = np.sort(s[y == 1]), np.sort(s[y == 0])
    tp = len(pos) - np.searchsorted(pos, cutoffs, side="right")
    fp = len(neg) - np.searchsorted(neg, cutoffs, side="right")
    fn = len(pos) - tp
    f = _f_beta(tp, fp, fn, beta)
    # equal F (up to rounding of b^2) -> the highest cutoff, i.e. fewer flags for the same F
    i = int(np.flatnonzero(f >= f.max() * (1.0 - 1e-12))[-1])
    return {"beta": beta, "cutoff": float(cutoffs[i]), "f_beta": float(f[i]),
            "precision": float(_ratio(tp[i], tp[i] + fp[i])), "recall": float(_ratio(tp[i], len(pos)))}


def best_f_beta(labels, scores, beta: float = 1.0) -> dict:
    """The cutoff with the highest F-beta among the rules "score > t", t in the scores or -inf.

    Returns {"beta", "cutoff", "f_beta", "precision", "recall"}; cutoff -inf means "flag all".
    Ties go to the higher cutoff. Chosen on the evaluated data itself, so optimistic.
    """
    beta = _check_beta(beta)
    return _best_f_beta(*_check(labels, scores, both_classes=False), beta)


# --- the report ---------------------------------------------------------------------------------

def _per_kind_auroc(y, s, kinds: Sequence[str] | None) -> dict[str, float | None]:
    if kinds is None:
        return {}
    kinds = np.asarray(list(kinds), dtype=object)
    if len(kinds) != len(y):
        raise ValueError(f"kinds must have one entry per sample, got: {len(kinds)} for {len(y)} samples")
    normal = y == 0
    out = {}
    for kind in sorted({str(k) for k in kinds[y == 1]}):
        keep = normal | ((y == 1) & (kinds.astype(str) == kind))
        out[kind] = json_number(_auroc(y[keep], s[keep]))
    return out


NOTHING_FLAGGED = ("nothing is flagged at this cutoff: precision (anomalies among flagged images, 0 of 0) is "
                   "undefined, written null; recall is 0")


def evaluation_summary(labels, scores, cutoff: float, kinds: Sequence[str] | None = None,
                       beta: float = 1.0, groups: Sequence | None = None) -> dict:
    """Everything metrics.json reports, as plain JSON values (floats rounded to 6 decimals, None
    for NaN/inf).

    `cutoff` is the operating point under test ("score > cutoff" is flagged; inf flags nothing).
    `kinds` names each sample's anomaly kind (ignored for normals); per_kind_auroc compares the
    anomalies of one kind with all normals. Raises ValueError without normals or anomalies.

    `groups` names each sample's content (its file's SHA-256; None where unknown): the counts and
    the interval take each content once (auroc_ci, content_counts); the point estimates count
    every sample. auroc_ci95 is auroc_ci (always defined once both classes are present;
    auroc_ci_method names it). small_sample is true when either class has fewer than
    SMALL_SAMPLE_MIN (20) distinct contents, a common rule of thumb: the AUROC then moves a lot
    with a single image and the interval is wide. at_cutoff.precision is None when nothing is
    flagged (at_cutoff.note says so; None otherwise).
    """
    y, s = _check(labels, scores)
    cutoff, beta = _check_cutoff(cutoff), _check_beta(beta)
    auc = _auroc(y, s)
    n_normal, n_anomalous = int(np.sum(y == 0)), int(np.sum(y == 1))
    counts = content_counts(y, groups)
    dy, ds = _distinct(y, s, groups)
    low, high = _auroc_ci(y, s, groups, 0.95)
    c = _confusion(y, s, cutoff)
    best = _best_f_beta(y, s, beta)
    return {
        "auroc": json_number(auc),
        "auroc_distinct": json_number(_auroc(dy, ds)),
        "auroc_ci95": [json_number(low), json_number(high)],
        "auroc_ci_method": CI_METHOD,
        "small_sample": min(counts["n_distinct_normal"], counts["n_distinct_anomalous"]) < SMALL_SAMPLE_MIN,
        "small_sample_min": SMALL_SAMPLE_MIN,
        "average_precision": json_number(_average_precision(y, s)),
        "tpr_at_fpr": {str(r): json_number(_tpr_at_fpr(y, s, r)) for r in _TPR_AT_FPR_RATES},
        "fpr_at_tpr95": json_number(_fpr_at_tpr(y, s, 0.95)),
        "n_normal": n_normal,
        "n_anomalous": n_anomalous,
        **counts,
        "per_kind_auroc": _per_kind_auroc(y, s, kinds),
        "at_cutoff": {"cutoff": json_number(cutoff),
                      "precision": json_number(c.precision) if c.n_flagged else None,
                      "recall": json_number(c.recall), "fpr": json_number(c.fpr),
                      "tp": c.tp, "fp": c.fp, "tn": c.tn, "fn": c.fn,
                      "note": None if c.n_flagged else NOTHING_FLAGGED},
        "best_f_beta": {key: json_number(value) for key, value in best.items()},
    }


__all__ = ["CI_METHOD", "NOTHING_FLAGGED", "SMALL_SAMPLE_MIN", "Confusion", "auroc", "auroc_ci", "average_precision",
           "best_f_beta", "confusion_at", "content_counts", "delong_ci", "delong_variance", "distinct_contents",
           "evaluation_summary", "fpr_at_tpr", "hanley_mcneil_se", "newcombe_ci", "newcombe_variance",
           "precision_recall_curve", "roc_curve", "tpr_at_fpr"]
