"""Squared distance to the references' principal subspace (the PCA reconstruction residual).

Principal components: Jolliffe, *Principal Component Analysis*, Springer 2002. The residual
after projecting onto the leading components as a novelty score: Hoffmann, "Kernel PCA for
novelty detection", Pattern Recognition 40(3), 2007 (here with the linear kernel). Normal images
vary mostly along a few directions of the feature space; an anomaly leaves that subspace.
"""
from __future__ import annotations

import numbers

import numpy as np

from oddling.detectors.base import CrossConformalDetector
from oddling.errors import OddlingError

ORTHONORMAL_TOLERANCE = 1e-6   # for components read back from a bank


def components_for_variance(singular_values: np.ndarray, variance: float) -> int:
    """Fewest leading components whose explained variance share exceeds `variance`, as
    scikit-learn's PCA(n_components=float) counts them; 1.0 keeps every direction the
    references vary in (numerically non-zero singular values)."""
    if len(singular_values) == 0 or singular_values[0] <= 0.0:
        return 0   # identical references: the subspace is the mean alone
    explained = singular_values ** 2
    ratio = np.cumsum(explained) / explained.sum()
    rank = int(np.sum(singular_values > singular_values[0] * max(singular_values.shape) * np.finfo(float).eps))
    return min(int(np.searchsorted(ratio, variance, side="right")) + 1, max(rank, 1))


class PCADetector(CrossConformalDetector):
    """Squared Euclidean distance from a feature vector to the references' principal subspace.

    Parameters
    ----------
    variance : float in (0, 1], default 0.95
        Share of the references' variance the kept components explain: the fewest leading
        components whose cumulative share exceeds it (1.0 keeps every non-degenerate one).

    Attributes
    ----------
    mean_ : ndarray (d,), mean of the references.
    components_ : ndarray (k, d), orthonormal principal axes, largest variance first.
    n_components_ : int, k.
    calibration_scores_ : ndarray (n,), cross-conformal scores of the references.
    calibration_method_ : str

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> x = rng.standard_normal((60, 1)) * [[1.0, 1.0, 0.0]] + 0.01 * rng.standard_normal((60, 3))
    >>> det = PCADetector(variance=0.9).fit(x)
    >>> det.n_components_
    1
    >>> bool(det.anomaly_score(np.array([[0.0, 0.0, 1.0]])).scores[0] > det.calibration_scores_.max())
    True

    References
    ----------
    Hoffmann, "Kernel PCA for novelty detection", Pattern Recognition 40(3), 2007.
    Jolliffe, *Principal Component Analysis*, 2nd ed., Springer 2002.
    """

    name = "pca"
    title = "PCA reconstruction residual"
    citation = "Hoffmann 2007 (reconstruction residual as novelty score); Jolliffe 2002 (PCA)"

    def __init__(self, variance: float = 0.95):
        self.variance = variance

    def _check_variance(self) -> float:
        value = self.variance
        if isinstance(value, numbers.Real) and not isinstance(value, bool) and 0.0 < value <= 1.0:
            return float(value)
        raise OddlingError(f"variance must be in (0, 1], got: {value!r}")

    def _fit_model(self, features: np.ndarray) -> "PCADetector":
        variance = self._check_variance()
        if len(features) < 2:
            raise OddlingError(f"PCA needs at least 2 references, got {len(features)}")
        x = np.asarray(features, dtype=np.float64)
        self.mean_ = x.mean(axis=0)
        _, singular_values, vt = np.linalg.svd(x - self.mean_, full_matrices=False)
        self.n_components_ = components_for_variance(singular_values, variance)
        self.components_ = np.ascontiguousarray(vt[:self.n_components_])
        self.n_features_in_ = int(x.shape[1])
        return self

    def _score_model(self, features: np.ndarray) -> np.ndarray:
        centred = np.asarray(features, dtype=np.float64) - self.mean_
        # The residual itself, not ||x||^2 - ||projection||^2, which cancels badly when both are large.
        residual = centred - (centred @ self.components_.T) @ self.components_
        return np.einsum("ij,ij->i", residual, residual)

    def _model_state(self) -> tuple[dict, dict[str, np.ndarray]]:
        return {"n_components": self.n_components_}, {"mean": self.mean_, "components": self.components_}

    def _load_model(self, state: dict, arrays: dict[str, np.ndarray]) -> "PCADetector":
        self._check_variance()
        mean, components = arrays.get("mean"), arrays.get("components")
        if mean is None or components is None:
            raise OddlingError("a PCA detector's state needs 'mean' and 'components' arrays")
        mean = np.asarray(mean, dtype=np.float64)
        components = np.asarray(components, dtype=np.float64)
        if mean.ndim != 1 or len(mean) == 0 or components.ndim != 2 or components.shape[1] != len(mean) \
                or len(components) > len(mean):
            raise OddlingError(f"PCA state: mean must be (d,) and components (k <= d, d), got "
                               f"{mean.shape} and {components.shape}")
        if state.get("n_components") != len(components):
            raise OddlingError(f"PCA state: n_components {state.get('n_components')!r} does not match "
                               f"{len(components)} stored components")
        if not (np.isfinite(mean).all() and np.isfinite(components).all()):
            raise OddlingError("PCA state holds NaN or infinite values")
        # A projection needs orthonormal axes; anything else would make the residual meaningless.
        if not np.allclose(components @ components.T, np.eye(len(components)), rtol=0.0, atol=ORTHONORMAL_TOLERANCE):
            raise OddlingError("PCA state: components are not orthonormal")
        self.mean_, self.components_, self.n_components_ = mean, components, len(components)
        self.n_features_in_ = len(mean)
        return self

    def describe_score(self) -> str:
        return ("squared Euclidean distance from the features to the references' principal subspace "
                f"(the fewest components explaining more than {self.variance} of their variance); 0 = on it")
