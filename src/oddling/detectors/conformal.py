"""Conformal p-values and flag cutoffs from scores of known-normal images.

p(s) = (1 + #{calibration scores >= s}) / (n + 1): for a new normal image exchangeable with
the calibration images, P(p <= a) <= a, so flagging p <= a holds the false-alarm rate at a.
Vovk, Gammerman & Shafer, *Algorithmic Learning in a Random World*, 2005; Bates, Candès, Lei,
Romano & Sesia, "Testing for outliers with conformal p-values", Annals of Statistics 2023.
"""
from __future__ import annotations

import math

import numpy as np

_EPS = 1e-9   # guards floor(a * (n + 1)) against a*(n+1) landing a hair below an integer


def _check_rate(target_fpr: float) -> float:
    if not 0.0 < target_fpr < 1.0:
        raise ValueError(f"target_fpr must be in (0, 1), got: {target_fpr}")
    return float(target_fpr)


def conformal_p_values(calibration_scores: np.ndarray, scores: np.ndarray) -> np.ndarray:
    """(1 + #{c >= s}) / (n + 1) for each score s; a tied calibration score counts against s.

    Small p = more anomalous than the calibration images. NaN scores get NaN.
    """
    cal = np.sort(np.asarray(calibration_scores, dtype=np.float64))
    s = np.asarray(scores, dtype=np.float64)
    at_least = len(cal) - np.searchsorted(cal, s, side="left")   # #{c >= s}
    p = (1.0 + at_least) / (len(cal) + 1.0)
    return np.where(np.isnan(s), np.nan, p)


def max_allowed_exceedances(n: int, target_fpr: float) -> int:
    """m such that p <= a  <=>  #{c >= s} <= m."""
    return math.floor(_check_rate(target_fpr) * (n + 1) + _EPS) - 1


def cutoff_for_rate(calibration_scores: np.ndarray, target_fpr: float) -> float:
    """Score cutoff with "score > cutoff" <=> "p_value <= target_fpr".

    With c sorted descending, #{c >= s} <= m holds exactly when s > c_(m+1). inf when the
    calibration set is too small for anything to be flagged at this rate.
    """
    cal = np.sort(np.asarray(calibration_scores, dtype=np.float64))[::-1]
    m = max_allowed_exceedances(len(cal), target_fpr)
    if m < 0:
        return math.inf
    if m >= len(cal):
        return -math.inf
    return float(cal[m])


def min_calibration_size(target_fpr: float) -> int:
    """Smallest n with a*(n+1) >= 1, i.e. m >= 0: n = ceil(1/a) - 1, where only a score above
    every calibration score can be flagged."""
    return max(1, math.ceil(1.0 / _check_rate(target_fpr) - _EPS) - 1)


def flag(scores: np.ndarray, cutoff: float) -> np.ndarray:
    """scores > cutoff, as booleans; a NaN score is never flagged."""
    s = np.asarray(scores, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        return np.where(np.isnan(s), False, s > cutoff)


class ConformalThreshold:
    """Calibration scores of known-normal images -> p-values, a cutoff and flags, for every detector.

    One object so that the rule ("flagged iff p-value <= target_fpr iff score > cutoff") lives in
    one place. `cutoff` is inf when the calibration set is too small for anything to be flagged.
    """

    def __init__(self, calibration_scores: np.ndarray, target_fpr: float):
        self.calibration_scores = np.asarray(calibration_scores, dtype=np.float64)
        self.target_fpr = _check_rate(target_fpr)
        self.cutoff = cutoff_for_rate(self.calibration_scores, self.target_fpr)

    @property
    def n(self) -> int:
        return len(self.calibration_scores)

    @property
    def can_flag(self) -> bool:
        return math.isfinite(self.cutoff)

    def p_values(self, scores: np.ndarray) -> np.ndarray:
        return conformal_p_values(self.calibration_scores, scores)

    def flag(self, scores: np.ndarray) -> np.ndarray:
        return flag(scores, self.cutoff)


def smallest_supported_rate(n: int) -> float:
    """The lowest target rate at which n calibration scores can flag anything: a*(n+1) >= 1."""
    return 1.0 / (n + 1)
