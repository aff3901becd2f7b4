"""Mean distance to the k nearest references: the default detector.

kNN distance as an outlier score: Ramaswamy, Rastogi & Shim, "Efficient algorithms for mining
outliers from large data sets", SIGMOD 2000 (k-th distance) and Angiulli & Pizzuti 2002 (sum
over the k nearest); on pretrained embeddings, Bergman, Cohen & Hoshen, "Deep nearest neighbor
anomaly detection", 2020. Distances are cosine (1 - cos) over L2-normalised vectors, exact,
with faiss.
"""
from __future__ import annotations

import numpy as np

from oddling.detectors.base import Detector, Scores, check_features, distinct_groups
from oddling.errors import OddlingError
from oddling.index.exact import ExactCosineIndex

LEAVE_ONE_OUT = ("leave-one-out: each reference scored against the others, every copy of the same file "
                 "excluded")


def mean_knn_distance(distances: np.ndarray) -> np.ndarray:
    """The anomaly score: mean distance to the k nearest bank vectors (higher = more anomalous)."""
    return distances.mean(axis=1, dtype=np.float64)


def leave_one_out_scores(vectors: np.ndarray, groups: np.ndarray, k: int) -> np.ndarray:
    """Score each bank vector against the others, ignoring every vector of its own group.

    `groups` gives one id per vector (the file's content hash): an exact duplicate would sit at
    distance 0 and make its copy look more normal than any new image can. Exact and cheap for
    kNN: one search of the bank against itself.
    """
    n = len(vectors)
    _, counts = np.unique(groups, return_counts=True)
    largest_group = int(counts.max())
    if n - largest_group < k:
        raise ValueError(f"leave-one-out needs at least k={k} other distinct images, got {n - largest_group}")
    search_k = min(n, k + largest_group)
    distances, indices = ExactCosineIndex(vectors).search(vectors, search_k)
    scores = np.empty(n, dtype=np.float64)
    for i in range(n):
        keep = groups[indices[i]] != groups[i]
        scores[i] = distances[i][keep][:k].mean(dtype=np.float64)
    return scores


class KNNDetector(Detector):
    """Mean cosine distance to the k nearest references.

    Parameters
    ----------
    k : int, default 5
        Neighbours averaged into each score.

    Attributes
    ----------
    references_ : ndarray (n, d) float32, the L2-normalised reference features.
    calibration_scores_ : ndarray (n,), leave-one-out scores of the references.
    calibration_method_ : str

    Examples
    --------
    >>> import numpy as np
    >>> x = np.eye(4, dtype=np.float32)
    >>> KNNDetector(k=1).fit(x, None).anomaly_score(x[:1]).scores
    array([0.])

    References
    ----------
    Bergman, Cohen & Hoshen, "Deep nearest neighbor anomaly detection", arXiv:2002.10445, 2020.
    """

    name = "knn"
    title = "k nearest neighbours"
    citation = "Bergman, Cohen & Hoshen 2020 (kNN on pretrained features); Angiulli & Pizzuti 2002"
    keeps_training_features = True
    has_neighbours = True
    evidence_title = "Nearest normal references (cosine distance)"

    def __init__(self, k: int = 5):
        self.k = k

    def get_params(self) -> dict:
        return {"k": self.k}

    def _check_k(self) -> int:
        if isinstance(self.k, bool) or not isinstance(self.k, (int, np.integer)) or self.k < 1:
            raise OddlingError(f"k must be an integer >= 1, got: {self.k!r}")
        return int(self.k)

    def fit(self, features: np.ndarray, groups: np.ndarray | None = None) -> "KNNDetector":
        k = self._check_k()
        features = check_features(features)
        groups = distinct_groups(groups, len(features))
        if len(set(groups.tolist())) < k + 1:
            raise OddlingError(f"k={k} needs at least k+1 = {k + 1} distinct references, "
                               f"got {len(set(groups.tolist()))}")
        self.references_ = np.ascontiguousarray(features, dtype=np.float32)
        self.calibration_scores_ = leave_one_out_scores(self.references_, groups, k)
        self.calibration_method_ = LEAVE_ONE_OUT
        return self

    def anomaly_score(self, features: np.ndarray) -> Scores:
        features = check_features(features)
        if len(features) == 0:
            return Scores(np.zeros(0), np.zeros((0, self.k), np.int64), np.zeros((0, self.k)))
        distances, rows = ExactCosineIndex(self.references_).search(features, self.k)
        return Scores(mean_knn_distance(distances), rows, distances.astype(np.float64))

    def state(self) -> tuple[dict, dict[str, np.ndarray]]:
        # The references are the bank's reference features, kept there once.
        return {"calibration_method": self.calibration_method_}, {}

    def load_state(self, state: dict, arrays: dict[str, np.ndarray]) -> "KNNDetector":
        k = self._check_k()
        references = arrays.get("references")
        if references is None or references.ndim != 2 or len(references) < k:
            raise OddlingError(f"a kNN detector with k={k} needs at least {k} reference vectors")
        self.references_ = np.ascontiguousarray(references, dtype=np.float32)
        self.calibration_method_ = str(state.get("calibration_method", LEAVE_ONE_OUT))
        return self

    def describe_score(self) -> str:
        return (f"mean cosine distance (1 - cos) to the {self.k} nearest reference"
                f"{'s' if self.k != 1 else ''}; 0 = identical, 2 = opposite")
