"""Conformal p-values and flag cutoffs from scores of known-normal images, under two guarantees.

`marginal` (the default): p(s) = (1 + #{c >= s}) / (n + 1). For a new normal image exchangeable
with the n calibration images, P(p <= a) <= a, so flagging p <= a holds the false-alarm rate at
a *on average over the draw of the calibration images* (Vovk, Gammerman & Shafer, *Algorithmic
Learning in a Random World*, 2005). One particular bank's rate can be above a: with n = 100 and
a = 0.1 it is above for about half of all banks.

`confident`: the cutoff is lowered in rank so that, over the draw of the calibration images,
this bank's false-alarm rate exceeds a with probability at most 1 - confidence
(training-conditional validity: Vovk, "Conditional validity of inductive conformal predictors",
ACML 2012). With j = #{c >= s}, flagging needs P(Binomial(n, a) <= j) <= 1 - confidence; the
matching p-value is the one-sided Clopper-Pearson upper bound Beta^-1(confidence; j + 1, n - j),
a calibration-conditional p-value in the sense of Bates, Candès, Lei, Romano & Sesia, "Testing
for outliers with conformal p-values", Annals of Statistics 2023 (their pointwise, fixed-a
form). Why: for continuous scores the rate of the cutoff at rank j + 1 is Beta(j + 1, n - j)
distributed (order statistics of uniforms), and P(Beta(j + 1, n - j) > a) = P(Binomial(n, a) <= j).

Under both, "flagged iff p-value <= target rate iff score > cutoff": the cutoff is the
calibration score at the largest rank the rule allows, so the two rules are one rule.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

_EPS = 1e-9   # guards floor(a * (n + 1)) against a*(n+1) landing a hair below an integer

MARGINAL = "marginal"
CONFIDENT = "confident"
GUARANTEES = (MARGINAL, CONFIDENT)
DEFAULT_CONFIDENCE = 0.9
# When no rate is asked for, a bank takes the first of these its calibration supports.
DEFAULT_RATES = (0.01, 0.02, 0.05, 0.1)


def check_rate(target_fpr: float) -> float:
    """The one check of a target false-alarm rate: a number in (0, 1), returned as a float (ValueError otherwise)."""
    if isinstance(target_fpr, bool) or not isinstance(target_fpr, (int, float)) or not 0.0 < target_fpr < 1.0:
        raise ValueError(f"target_fpr must be in (0, 1), got: {target_fpr}")
    return float(target_fpr)


def exceedance_counts(calibration_scores: np.ndarray, scores: np.ndarray) -> np.ndarray:
    """#{c >= s} for each score s (a tied calibration score counts against s), as float64."""
    cal = np.sort(np.asarray(calibration_scores, dtype=np.float64))
    s = np.asarray(scores, dtype=np.float64)
    return (len(cal) - np.searchsorted(cal, s, side="left")).astype(np.float64)


def conformal_p_values(calibration_scores: np.ndarray, scores: np.ndarray) -> np.ndarray:
    """(1 + #{c >= s}) / (n + 1) for each score s: the marginal conformal p-value.

    Small p = more anomalous than the calibration images. NaN scores get NaN.
    """
    n = len(np.asarray(calibration_scores))
    s = np.asarray(scores, dtype=np.float64)
    p = (1.0 + exceedance_counts(calibration_scores, s)) / (n + 1.0)
    return np.where(np.isnan(s), np.nan, p)


def confident_p_from_counts(counts: np.ndarray, n: int, confidence: float) -> np.ndarray:
    """Beta^-1(confidence; j + 1, n - j) for j = #{c >= s}; 1 where j = n (no calibration score below s)."""
    from scipy.stats import beta

    j = np.asarray(counts, dtype=np.float64)
    below = j < n
    p = np.ones_like(j)
    if below.any():
        p[below] = beta.ppf(confidence, j[below] + 1.0, n - j[below])
    return np.minimum(p, 1.0)


def max_allowed_exceedances(n: int, target_fpr: float) -> int:
    """Marginal: m such that p <= a  <=>  #{c >= s} <= m; -1 when nothing can be flagged."""
    return math.floor(check_rate(target_fpr) * (n + 1) + _EPS) - 1


def confident_allowed_exceedances(n: int, target_fpr: float, confidence: float) -> int:
    """Confident: the largest j with confident p-value(j) <= a, found by bisection on the same
    p-value function (it increases with j), so the cutoff and the p-values can never disagree; -1
    when even j = 0 is too many."""
    rate = check_rate(target_fpr)
    low, high = -1, n - 1          # p(low) <= rate is assumed (low = -1: nothing), p(high + 1) > rate
    while low < high:
        mid = (low + high + 1) // 2
        if confident_p_from_counts(np.array([mid]), n, confidence)[0] <= rate:
            low = mid
        else:
            high = mid - 1
    return low


@dataclass(frozen=True)
class Guarantee:
    """What a bank's cutoff promises about its false-alarm rate (see the module docstring).

    kind "marginal": the rate holds on average over reference sets; "confident": it holds for
    this bank with probability `confidence` over the draw of its calibration images.
    """

    kind: str = MARGINAL
    confidence: float | None = None

    def __post_init__(self):
        if self.kind not in GUARANTEES:
            raise ValueError(f"guarantee must be one of {', '.join(GUARANTEES)}, got: {self.kind!r}")
        if self.kind == CONFIDENT:
            value = DEFAULT_CONFIDENCE if self.confidence is None else self.confidence
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0.0 < value < 1.0:
                raise ValueError(f"confidence must be in (0, 1), got: {value!r}")
            object.__setattr__(self, "confidence", float(value))
        else:
            object.__setattr__(self, "confidence", None)

    def allowed_exceedances(self, n: int, target_fpr: float) -> int:
        if self.kind == MARGINAL:
            return max_allowed_exceedances(n, target_fpr)
        return confident_allowed_exceedances(n, target_fpr, self.confidence)

    def p_from_counts(self, counts: np.ndarray, n: int) -> np.ndarray:
        if self.kind == MARGINAL:
            return (1.0 + np.asarray(counts, dtype=np.float64)) / (n + 1.0)
        return confident_p_from_counts(counts, n, self.confidence)

    def min_calibration_size(self, target_fpr: float) -> int:
        """Smallest n at which anything can be flagged at this rate."""
        rate = check_rate(target_fpr)
        if self.kind == MARGINAL:
            return max(1, math.ceil(1.0 / rate - _EPS) - 1)
        # j = 0 is allowed when (1 - a)^n <= 1 - confidence; check around the closed form.
        n = max(1, math.ceil(math.log(1.0 - self.confidence) / math.log1p(-rate) - 1e-6))
        while n > 1 and self.allowed_exceedances(n - 1, rate) >= 0:
            n -= 1
        while self.allowed_exceedances(n, rate) < 0:
            n += 1
        return n

    def smallest_supported_rate(self, n: int) -> float:
        """The lowest target rate at which n calibration scores can flag anything."""
        if n < 1:
            return 1.0
        if self.kind == MARGINAL:
            return 1.0 / (n + 1)
        return float(confident_p_from_counts(np.array([0.0]), n, self.confidence)[0])

    def describe(self, target_fpr: float) -> str:
        """The promise in words, e.g. "false-alarm rate at most 1% with 90% confidence for this bank"."""
        rate = percent(target_fpr)
        if self.kind == MARGINAL:
            return f"false-alarm rate {rate} on average over reference sets (marginal)"
        return f"false-alarm rate at most {rate} with {percent(self.confidence)} confidence for this bank"

    def to_dict(self) -> dict:
        return {"guarantee": self.kind} | ({"confidence": self.confidence} if self.kind == CONFIDENT else {})

    @classmethod
    def from_dict(cls, record: dict) -> "Guarantee":
        """From a bank's calibration record; banks written before guarantees existed are marginal."""
        return cls(record.get("guarantee", MARGINAL), record.get("confidence"))


def percent(rate: float) -> str:
    """0.01 -> "1%", 0.025 -> "2.5%", 0.9 -> "90%"."""
    return f"{100 * rate:.4g}%"


def cutoff_for_rate(calibration_scores: np.ndarray, target_fpr: float, guarantee: Guarantee | None = None) -> float:
    """Score cutoff with "score > cutoff" <=> "p_value <= target_fpr".

    With c sorted descending, #{c >= s} <= m holds exactly when s > c_(m+1). inf when the
    calibration set is too small for anything to be flagged at this rate.
    """
    cal = np.sort(np.asarray(calibration_scores, dtype=np.float64))[::-1]
    m = (guarantee or Guarantee()).allowed_exceedances(len(cal), target_fpr)
    if m < 0:
        return math.inf
    if m >= len(cal):
        return -math.inf
    return float(cal[m])


def min_calibration_size(target_fpr: float, guarantee: Guarantee | None = None) -> int:
    """Smallest n at which anything can be flagged (marginal: n = ceil(1/a) - 1, where only a score
    above every calibration score can be flagged)."""
    return (guarantee or Guarantee()).min_calibration_size(target_fpr)


def smallest_supported_rate(n: int, guarantee: Guarantee | None = None) -> float:
    """The lowest target rate at which n calibration scores can flag anything (marginal: 1/(n+1))."""
    return (guarantee or Guarantee()).smallest_supported_rate(n)


def supported_rate_text(n: int, guarantee: Guarantee | None = None) -> str:
    """What a calibration set of n scores can do, in words people can act on."""
    lowest = smallest_supported_rate(n, guarantee)
    return f"{n} calibration scores support target false-alarm rates >= {math.ceil(lowest * 1000) / 1000:g}"


def flag(scores: np.ndarray, cutoff: float) -> np.ndarray:
    """scores > cutoff, as booleans; a NaN score is never flagged."""
    s = np.asarray(scores, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        return np.where(np.isnan(s), False, s > cutoff)


class ConformalThreshold:
    """Calibration scores of known-normal images -> p-values, a cutoff and flags, for every detector.

    One object so that the rule ("flagged iff p-value <= target_fpr iff score > cutoff") lives in
    one place, under the bank's guarantee. `cutoff` is inf when the calibration set is too small
    for anything to be flagged.
    """

    def __init__(self, calibration_scores: np.ndarray, target_fpr: float, guarantee: Guarantee | None = None):
        self.calibration_scores = np.asarray(calibration_scores, dtype=np.float64)
        self.target_fpr = check_rate(target_fpr)
        self.guarantee = guarantee or Guarantee()
        self.cutoff = cutoff_for_rate(self.calibration_scores, self.target_fpr, self.guarantee)

    @property
    def n(self) -> int:
        return len(self.calibration_scores)

    @property
    def can_flag(self) -> bool:
        return math.isfinite(self.cutoff)

    @property
    def p_floor(self) -> float:
        """The smallest p-value this bank can give: a score above every calibration score."""
        return float(self.guarantee.p_from_counts(np.array([0.0]), self.n)[0])

    def p_values(self, scores: np.ndarray) -> np.ndarray:
        s = np.asarray(scores, dtype=np.float64)
        p = self.guarantee.p_from_counts(exceedance_counts(self.calibration_scores, s), self.n)
        return np.where(np.isnan(s), np.nan, p)

    def above_all(self, scores: np.ndarray) -> np.ndarray:
        """True where a score is above every calibration score: its p-value is the floor, and only
        the score itself still ranks such images."""
        s = np.asarray(scores, dtype=np.float64)
        top = self.calibration_scores.max() if self.n else -math.inf
        with np.errstate(invalid="ignore"):
            return np.where(np.isnan(s), False, s > top)

    def flag(self, scores: np.ndarray) -> np.ndarray:
        return flag(scores, self.cutoff)

    def describe(self) -> str:
        return self.guarantee.describe(self.target_fpr)

    def support_text(self) -> str:
        """Why nothing can be flagged, in numbers: "0.01 needs at least 99 calibration scores, this bank has 80"."""
        return (f"{self.target_fpr:g} needs at least {self.guarantee.min_calibration_size(self.target_fpr)} "
                f"calibration scores{' for the confident guarantee' if self.guarantee.kind == CONFIDENT else ''}, "
                f"this bank has {self.n}")


def default_rate(n: int, guarantee: Guarantee | None = None) -> float | None:
    """The first of DEFAULT_RATES that n calibration scores support, or None if none is."""
    guarantee = guarantee or Guarantee()
    for rate in DEFAULT_RATES:
        if guarantee.allowed_exceedances(n, rate) >= 0:
            return rate
    return None
