"""The target false-alarm rate at the jobs' boundary: checked once (by the detectors' own rule), and the
warning when a bank's calibration is too small for the rate."""
from __future__ import annotations

import warnings

from oddling.detectors.conformal import check_rate, min_calibration_size, smallest_supported_rate, supported_rate_text
from oddling.errors import OddlingError, OddlingWarning


def check_target_rate(target_fpr: float) -> float:
    """conformal.check_rate as a user error: "target_fpr must be in (0, 1), got: ..."."""
    try:
        return check_rate(target_fpr)
    except ValueError as exc:
        raise OddlingError(str(exc)) from exc


def warn_if_few_calibration(threshold, stacklevel: int = 3) -> None:
    """OddlingWarning when a bank's calibration is too small for its rate: nothing can be flagged,
    or only images above nearly every calibration score."""
    n, target_fpr, guarantee = threshold.n, threshold.target_fpr, threshold.guarantee
    needed = min_calibration_size(target_fpr, guarantee)
    if n >= max(needed, round(1 / target_fpr)):
        return
    if n < needed:
        advice = (f"; at {target_fpr} no image can be flagged at all ({threshold.support_text()}): refit with "
                  f"--target-fpr {_suggest_rate(n, guarantee)} or with more references (about {needed} calibration "
                  "scores or more)")
    else:
        advice = f"; about {round(1 / target_fpr)} or more calibration scores make the rate mean much"
    warnings.warn(supported_rate_text(n, guarantee) + advice, OddlingWarning, stacklevel=stacklevel)


def _suggest_rate(n: int, guarantee=None) -> str:
    lowest = smallest_supported_rate(n, guarantee)
    for rate in (0.01, 0.02, 0.05, 0.1, 0.2, 0.5):
        if rate >= 2 * lowest:
            return f"{rate:g}"
    return "0.5"
