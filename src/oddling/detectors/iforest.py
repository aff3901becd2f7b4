"""Isolation forest: anomalies are isolated by fewer random axis-aligned splits.

Liu, Ting & Zhou, "Isolation forest", ICDM 2008. scikit-learn grows the trees; the score is
2^(-E[h(x)] / c(psi)), scikit-learn's `-score_samples`, higher = more anomalous.

The state saved is the trees themselves, flattened into arrays, and scoring walks those arrays
in NumPy. Refitting from stored features on load was the alternative, but it keeps the scores
only as long as scikit-learn grows the same trees from the same seed, which no release promises;
the arrays score the same under any version (and without scikit-learn at all once fitted).
"""
from __future__ import annotations

import numbers

import numpy as np

from oddling.detectors.base import CrossConformalDetector
from oddling.errors import OddlingError

QUERY_CHUNK = 4096   # rows walked at once: bounds the (rows x trees) node and depth buffers
TREE_ARRAYS = ("roots", "left", "right", "feature", "threshold", "n_node_samples")


def average_path_length(n: np.ndarray) -> np.ndarray:
    """c(n): mean depth of an unsuccessful search in a binary search tree of n keys (Liu et al.
    2008, Eq. 1), the expected depth still to go in a leaf holding n training samples."""
    n = np.asarray(n, dtype=np.float64)
    safe = np.maximum(n, 3.0)
    c = 2.0 * (np.log(safe - 1.0) + np.euler_gamma) - 2.0 * (safe - 1.0) / safe
    return np.where(n <= 1, 0.0, np.where(n == 2, 1.0, c))


def flatten_trees(forest) -> dict[str, np.ndarray]:
    """One set of node arrays for all trees: child ids made global, leaves with left = right = -1."""
    arrays = {key: [] for key in TREE_ARRAYS}
    offset = 0
    for estimator in forest.estimators_:
        tree = estimator.tree_
        leaf = tree.children_left < 0
        arrays["roots"].append([offset])
        arrays["left"].append(np.where(leaf, -1, tree.children_left + offset))
        arrays["right"].append(np.where(leaf, -1, tree.children_right + offset))
        # With max_features=1.0 scikit-learn fits each tree on X's columns as they are (it only
        # indexes columns when subsampling them), so the tree's feature ids are X's.
        arrays["feature"].append(np.where(leaf, 0, tree.feature))
        arrays["threshold"].append(np.where(leaf, 0.0, tree.threshold))
        arrays["n_node_samples"].append(tree.n_node_samples)
        offset += tree.node_count
    dtypes = {"threshold": np.float64}
    return {key: np.concatenate(parts).astype(dtypes.get(key, np.int64)) for key, parts in arrays.items()}


def forest_scores(trees: dict[str, np.ndarray], max_samples: int, features: np.ndarray) -> np.ndarray:
    """2^(-mean path length / c(max_samples)) for each row, walking all trees at once."""
    # scikit-learn compares float32 inputs against the thresholds; so must we, to agree with it.
    x = np.asarray(features, dtype=np.float32)
    left, right, feature, threshold = trees["left"], trees["right"], trees["feature"], trees["threshold"]
    node = np.broadcast_to(trees["roots"], (len(x), len(trees["roots"]))).copy()
    depth = np.zeros(node.shape, dtype=np.float64)
    rows = np.arange(len(x))[:, None]
    while True:
        inner = left[node] >= 0
        if not inner.any():
            break
        go_left = x[rows, feature[node]] <= threshold[node]
        node = np.where(inner, np.where(go_left, left[node], right[node]), node)
        depth += inner
    path = depth + average_path_length(trees["n_node_samples"][node])
    denominator = average_path_length(max_samples)
    if denominator == 0.0:
        return np.ones(len(x))   # one training sample: nothing to isolate from, as scikit-learn
    return 2.0 ** (-path.mean(axis=1) / denominator)


def check_trees(arrays: dict[str, np.ndarray], n_features: int) -> dict[str, np.ndarray]:
    """Validate stored trees so that scoring reads in bounds and every walk ends at a leaf."""
    missing = [key for key in TREE_ARRAYS if arrays.get(key) is None]
    if missing:
        raise OddlingError(f"isolation forest state lacks arrays: {', '.join(missing)}")
    trees = {key: np.asarray(arrays[key]) for key in TREE_ARRAYS}
    if any(a.ndim != 1 for a in trees.values()):
        raise OddlingError("isolation forest state: tree arrays must be 1-D")
    n_nodes = len(trees["left"])
    if any(len(trees[key]) != n_nodes for key in TREE_ARRAYS[1:]) or len(trees["roots"]) == 0:
        raise OddlingError("isolation forest state: tree arrays differ in length or hold no tree")
    if not all(np.issubdtype(trees[key].dtype, np.integer) for key in TREE_ARRAYS if key != "threshold"):
        raise OddlingError("isolation forest state: node ids, features and counts must be integers")
    if not np.isfinite(trees["threshold"]).all():
        raise OddlingError("isolation forest state holds NaN or infinite thresholds")
    trees = {key: a.astype(np.float64 if key == "threshold" else np.int64) for key, a in trees.items()}
    roots, left, right = trees["roots"], trees["left"], trees["right"]
    ids = np.arange(n_nodes)
    leaf = left < 0
    # Children after their parent (scikit-learn's depth-first numbering): every walk terminates.
    if (roots < 0).any() or (roots >= n_nodes).any() or (left[leaf] != -1).any() or (right[leaf] != -1).any() \
            or (left[~leaf] <= ids[~leaf]).any() or (right[~leaf] <= ids[~leaf]).any() \
            or (left >= n_nodes).any() or (right >= n_nodes).any():
        raise OddlingError("isolation forest state: tree structure is invalid")
    if (trees["feature"] < 0).any() or (trees["feature"] >= n_features).any() or (trees["n_node_samples"] < 1).any():
        raise OddlingError(f"isolation forest state: features must be in [0, {n_features}) and node counts >= 1")
    return trees


class IsolationForestDetector(CrossConformalDetector):
    """Isolation forest score: short average isolation paths = anomalous.

    Parameters
    ----------
    n_estimators : int >= 1, default 100
        Number of isolation trees.
    max_samples : "auto", int >= 1 or float in (0, 1], default "auto"
        References drawn (without replacement) to grow each tree: "auto" = min(256, n); an int
        larger than n is cut to n.
    random_state : int >= 0, default 0
        Seed for the trees, so that fitting the same references gives the same forest.

    Attributes
    ----------
    trees_ : dict of ndarray, every tree's nodes ("roots", "left", "right", "feature",
        "threshold", "n_node_samples").
    max_samples_ : int, references per tree (psi).
    calibration_scores_ : ndarray (n,), cross-conformal scores of the references.
    calibration_method_ : str

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(0).standard_normal((100, 4))
    >>> det = IsolationForestDetector(n_estimators=50).fit(x)
    >>> bool(det.anomaly_score(np.full((1, 4), 8.0)).scores[0] > det.calibration_scores_.max())
    True

    References
    ----------
    Liu, Ting & Zhou, "Isolation forest", IEEE International Conference on Data Mining (ICDM) 2008.
    """

    name = "iforest"
    title = "isolation forest"
    citation = "Liu, Ting & Zhou 2008"
    picks_fold_model = True   # random trees: the mean of five forests varies less than the one that scored a reference

    def __init__(self, n_estimators: int = 100, max_samples: str | int | float = "auto", random_state: int = 0):
        self.n_estimators = n_estimators
        self.max_samples = max_samples
        self.random_state = random_state

    def _check_params(self) -> None:
        def is_int(value) -> bool:
            return isinstance(value, numbers.Integral) and not isinstance(value, bool)

        if not is_int(self.n_estimators) or self.n_estimators < 1:
            raise OddlingError(f"n_estimators must be an integer >= 1, got: {self.n_estimators!r}")
        m = self.max_samples
        if not (m == "auto" or (is_int(m) and m >= 1)
                or (isinstance(m, numbers.Real) and not is_int(m) and not isinstance(m, bool) and 0.0 < m <= 1.0)):
            raise OddlingError(f"max_samples must be 'auto', an integer >= 1 or a number in (0, 1], got: {m!r}")
        if not is_int(self.random_state) or not 0 <= self.random_state < 2 ** 32:
            raise OddlingError(f"random_state must be an integer in [0, 2**32), got: {self.random_state!r}")

    def _fit_model(self, features: np.ndarray) -> "IsolationForestDetector":
        from sklearn.ensemble import IsolationForest

        self._check_params()
        max_samples = self.max_samples
        if isinstance(max_samples, numbers.Integral):
            max_samples = min(int(max_samples), len(features))   # scikit-learn would warn, then do the same
        elif not isinstance(max_samples, str) and int(max_samples * len(features)) < 1:
            raise OddlingError(f"max_samples={max_samples} leaves no reference per tree "
                               f"with {len(features)} references")
        forest = IsolationForest(n_estimators=int(self.n_estimators), max_samples=max_samples,
                                 random_state=int(self.random_state)).fit(features)
        self.trees_ = flatten_trees(forest)
        self.max_samples_ = int(forest.max_samples_)
        self.n_features_in_ = int(features.shape[1])
        return self

    def _score_model(self, features: np.ndarray) -> np.ndarray:
        parts = [forest_scores(self.trees_, self.max_samples_, features[start:start + QUERY_CHUNK])
                 for start in range(0, len(features), QUERY_CHUNK)]
        return np.concatenate(parts) if parts else np.zeros(0)

    def _model_state(self) -> tuple[dict, dict[str, np.ndarray]]:
        return {"max_samples": self.max_samples_, "n_features": self.n_features_in_}, dict(self.trees_)

    def _load_model(self, state: dict, arrays: dict[str, np.ndarray]) -> "IsolationForestDetector":
        self._check_params()
        max_samples, n_features = state.get("max_samples"), state.get("n_features")
        for key, value in (("max_samples", max_samples), ("n_features", n_features)):
            if not isinstance(value, numbers.Integral) or isinstance(value, bool) or value < 1:
                raise OddlingError(f"isolation forest state: {key} must be an integer >= 1, got: {value!r}")
        self.trees_ = check_trees(arrays, int(n_features))
        self.max_samples_, self.n_features_in_ = int(max_samples), int(n_features)
        return self

    def describe_score(self) -> str:
        return ("isolation forest score 2^(-mean path length / c(max_samples)), in (0, 1]: about 0.5 or "
                "below for typical images, near 1 for points a few random splits isolate")
