"""The public entry points, gathered from the jobs that implement them. Everything the CLI does goes through these.

>>> import oddling
>>> bank = oddling.fit("good_parts/", "parts.bank")            # doctest: +SKIP
>>> result = oddling.score("todays_batch/", bank)              # doctest: +SKIP
>>> result.write_csv("scores.csv")                             # doctest: +SKIP
"""
from __future__ import annotations

from oddling.bank.store import load_bank
from oddling.embedding.options import RunOptions
from oddling.errors import OddlingWarning
from oddling.jobs.evaluation import EvaluationResult, evaluate
from oddling.jobs.fitting import fit
from oddling.jobs.maintenance import audit, bank_add, bank_info, bank_remove, bank_undo
from oddling.jobs.monitoring import drift, drift_history
from oddling.jobs.scoring import ScoreResult, score
from oddling.jobs.service import serve_app
from oddling.jobs.tuning import TuneResult, tune
from oddling.jobs.watching import Watcher
from oddling.reporting.results import count_ok

__all__ = ["fit", "score", "evaluate", "drift", "drift_history", "audit", "bank_add", "bank_remove", "bank_undo", "bank_info", "tune", "TuneResult",
           "RunOptions", "ScoreResult", "EvaluationResult", "OddlingWarning", "load_bank", "count_ok"]
__all__ += ["serve_app", "Watcher"]
