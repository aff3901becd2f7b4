"""oddling: find the odd ones out in image collections.

Fit a bank of known-normal images, score new ones by their distance to it, evaluate the
detector on labelled data. Higher scores are always more anomalous.
"""
__version__ = "0.1.0"

from .api import OddlingWarning, RunOptions, ScoreResult, fit, score  # noqa: E402
from .bank import Bank, load_bank  # noqa: E402
from .errors import OddlingError  # noqa: E402

__all__ = ["__version__", "Bank", "OddlingError", "OddlingWarning", "RunOptions", "ScoreResult",
           "fit", "load_bank", "score"]
