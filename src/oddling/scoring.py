"""Score embeddings against a bank: mean distance to the k nearest references (local mode: the
largest nearest-patch distance), conformal p-value against the bank's calibration scores, flag
at the cutoff."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from oddling.bank.store import Bank
from oddling.detectors.conformal import conformal_p_values, cutoff_for_rate, flag
from oddling.index.exact import ExactCosineIndex, mean_knn_distance


@dataclass
class VectorScores:
    scores: np.ndarray            # (n,) float64, higher = more anomalous
    p_values: np.ndarray          # (n,) float64
    flagged: np.ndarray           # (n,) bool
    neighbour_rows: np.ndarray    # (n, k) rows of bank.references, nearest first
    neighbour_distances: np.ndarray  # (n, k)
    cutoff: float
    maps: np.ndarray | None = None   # local mode: (n, G, G) nearest-patch distance per location


def bank_cutoff(bank: Bank, target_fpr: float | None = None) -> tuple[float, float]:
    """(target_fpr, cutoff): the bank's own, or recomputed for a one-off rate."""
    if target_fpr is None or target_fpr == bank.calibration["target_fpr"]:
        cutoff = bank.calibration["cutoff"]
        return bank.calibration["target_fpr"], (np.inf if cutoff is None else float(cutoff))
    return target_fpr, cutoff_for_rate(bank.calibration_scores, target_fpr)


def score_vectors(bank: Bank, vectors: np.ndarray, target_fpr: float | None = None) -> VectorScores:
    _, cutoff = bank_cutoff(bank, target_fpr)
    if len(vectors) == 0:
        empty = np.zeros(0)
        return VectorScores(empty, empty, np.zeros(0, bool), np.zeros((0, bank.k), np.int64),
                            np.zeros((0, bank.k)), cutoff)
    if bank.mode == "local":
        return _score_patches(bank, vectors, cutoff)
    distances, rows = ExactCosineIndex(bank.embeddings).search(vectors, bank.k)
    scores = mean_knn_distance(distances)
    return VectorScores(
        scores=scores,
        p_values=conformal_p_values(bank.calibration_scores, scores),
        flagged=flag(scores, cutoff),
        neighbour_rows=rows,
        neighbour_distances=distances.astype(np.float64),
        cutoff=cutoff,
    )


def _score_patches(bank: Bank, features: np.ndarray, cutoff: float) -> VectorScores:
    """Local mode: score = largest nearest-patch distance; the one "neighbour" is the reference
    whose patch is nearest to the worst location."""
    from oddling.detectors.patch import PatchIndex, score_patches

    ps = score_patches(PatchIndex(bank.embeddings), bank.patch_sources, features)
    return VectorScores(
        scores=ps.scores,
        p_values=conformal_p_values(bank.calibration_scores, ps.scores),
        flagged=flag(ps.scores, cutoff),
        neighbour_rows=ps.worst_source[:, None],
        neighbour_distances=ps.scores[:, None],
        cutoff=cutoff,
        maps=ps.maps,
    )
