"""oddling: find the odd ones out in image collections.

Fit a bank of known-normal images, score new ones by their distance to it, evaluate the
detector on labelled data. Higher scores are always more anomalous.

The public names are imported on first use (PEP 562 module `__getattr__`): `import oddling`
costs almost nothing, and `oddling.score` loads only what scoring needs (never torch when the
bank's network has a verified export).
"""
__version__ = "0.1.0"

from oddling.errors import OddlingError, OddlingWarning  # noqa: E402  (light: no third-party imports)

_LAZY = {
    "EvaluationResult": "oddling.jobs.evaluation", "evaluate": "oddling.jobs.evaluation",
    "RunOptions": "oddling.embedding.options",
    "ScoreResult": "oddling.jobs.scoring", "score": "oddling.jobs.scoring",
    "audit": "oddling.jobs.maintenance", "bank_add": "oddling.jobs.maintenance",
    "bank_info": "oddling.jobs.maintenance", "bank_remove": "oddling.jobs.maintenance",
    "drift": "oddling.jobs.monitoring", "drift_history": "oddling.jobs.monitoring",
    "fit": "oddling.jobs.fitting",
    "tune": "oddling.jobs.tuning", "TuneResult": "oddling.jobs.tuning",
    "bank_undo": "oddling.jobs.maintenance", "serve_app": "oddling.api", "Watcher": "oddling.api",
    "Bank": "oddling.bank.store", "load_bank": "oddling.bank.store",
}

__all__ = ["__version__", "Bank", "EvaluationResult", "OddlingError", "OddlingWarning", "RunOptions", "ScoreResult",
           "audit", "bank_add", "bank_info", "bank_remove", "bank_undo", "drift", "drift_history", "evaluate", "fit",
           "load_bank", "score", "tune", "TuneResult", "serve_app", "Watcher"]


def __getattr__(name: str):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'oddling' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module), name)
    globals()[name] = value   # later lookups skip this function
    return value


def __dir__():
    return sorted(set(globals()) | set(_LAZY))
