"""oddling: find the odd ones out in image collections.

Fit a bank of known-normal images, score new ones by their distance to it, evaluate the
detector on labelled data. Higher scores are always more anomalous.
"""
__version__ = "0.1.0"

from .api import (  # noqa: E402
    EvaluationResult, OddlingWarning, RunOptions, ScoreResult, audit, bank_add, bank_info, bank_remove, bank_undo,
    drift, drift_history, evaluate, fit, score, tune, TuneResult,
)
from oddling.bank.store import Bank, load_bank  # noqa: E402
from oddling.errors import OddlingError  # noqa: E402

__all__ = ["__version__", "Bank", "EvaluationResult", "OddlingError", "OddlingWarning", "RunOptions", "ScoreResult",
           "audit", "bank_add", "bank_info", "bank_remove", "bank_undo", "drift", "drift_history", "evaluate", "fit",
           "load_bank", "score", "tune", "TuneResult"]
from .api import Watcher, serve_app  # noqa: E402
__all__ += ["serve_app", "Watcher"]
