"""Detectors: features of the references -> a fitted scorer with its calibration scores.

`DETECTORS` maps each detector's name to its module and class, imported only when used (the
isolation forest pulls in scikit-learn, the patch detector torch).
"""
from __future__ import annotations

import importlib

from oddling.errors import OddlingError

DETECTORS = {
    "knn": ("oddling.detectors.knn", "KNNDetector"),
    "patch-knn": ("oddling.detectors.patch", "PatchKNNDetector"),
    "gaussian": ("oddling.detectors.gaussian", "GaussianDetector"),
    "pca": ("oddling.detectors.pca", "PCADetector"),
    "iforest": ("oddling.detectors.iforest", "IsolationForestDetector"),
}
DEFAULT_DETECTOR = "knn"


def detector_class(name: str):
    if name not in DETECTORS:
        raise OddlingError(f"unknown detector {name!r}; known: {', '.join(DETECTORS)}")
    module, cls = DETECTORS[name]
    return getattr(importlib.import_module(module), cls)


def make_detector(name: str, params: dict | None = None):
    """A new, unfitted detector; unknown parameters are refused by name."""
    cls = detector_class(name)
    try:
        return cls(**(params or {}))
    except TypeError as exc:
        raise OddlingError(f"detector {name!r} does not take these parameters: {params} ({exc})") from exc
