"""Squared Mahalanobis distance to one Gaussian fitted to the references.

A single multivariate Gaussian over pretrained features as the model of normal images: Rippel,
Mertens & Merhof, "Modeling the distribution of normal data in pre-trained deep features for
anomaly detection", ICPR 2020. With about a hundred references and a thousand dimensions the
sample covariance is singular, so it is shrunk towards a scaled identity with the Ledoit-Wolf
intensity: Ledoit & Wolf, "A well-conditioned estimator for large-dimensional covariance
matrices", Journal of Multivariate Analysis 2004.
"""
from __future__ import annotations

import numbers

import numpy as np

from oddling.detectors.base import CrossConformalDetector
from oddling.errors import OddlingError

# Eigenvalues below this share of the largest are numerical zeros: directions in which no
# reference varies. They are raised to the floor rather than dropped (as a pseudo-inverse would),
# so that leaving the references' span counts as very unusual instead of being ignored.
EIGENVALUE_FLOOR = 1e-10


def ledoit_wolf_shrinkage(centred: np.ndarray) -> float:
    """Ledoit & Wolf (2004) intensity for shrinking S = X'X/n towards mu*I, mu = trace(S)/d.

    delta^2 = ||S - mu I||^2 / d and beta^2 = sum_k ||x_k x_k' - S||^2 / (n^2 d), which expands to
    (sum_k ||x_k||^4 / n - ||S||^2) / (n d); the intensity is min(beta^2, delta^2) / delta^2.
    """
    n, d = centred.shape
    # ||S||_F^2 through whichever Gram matrix is smaller: X'X (d, d) or XX' (n, n) share it.
    gram = centred.T @ centred if d <= n else centred @ centred.T
    s_norm2 = float(np.sum(gram * gram)) / n ** 2
    mu = float(np.sum(centred * centred)) / (n * d)
    row_norm4 = float(np.sum(np.sum(centred * centred, axis=1) ** 2))
    beta2 = (row_norm4 / n - s_norm2) / (n * d)
    delta2 = (s_norm2 - d * mu * mu) / d     # ||S - mu I||^2 = ||S||^2 - 2 mu trace(S) + d mu^2
    beta2 = min(beta2, delta2)
    return 0.0 if beta2 <= 0.0 else beta2 / delta2


def stable_precision(covariance: np.ndarray) -> np.ndarray:
    """Inverse of a symmetric positive semi-definite matrix via eigh, zero eigenvalues floored."""
    values, vectors = np.linalg.eigh(covariance)
    largest = float(values[-1])
    if not largest > 0.0:
        raise OddlingError("the references do not vary in any dimension: a Gaussian cannot be fitted")
    values = np.maximum(values, EIGENVALUE_FLOOR * largest)
    precision = (vectors / values) @ vectors.T
    return (precision + precision.T) / 2.0


class GaussianDetector(CrossConformalDetector):
    """Squared Mahalanobis distance to the references' mean under a shrunk covariance.

    Parameters
    ----------
    shrinkage : "ledoit-wolf", "none" or float in [0, 1], default "ledoit-wolf"
        How far the sample covariance S is pulled towards mu*I (mu = mean variance):
        (1 - a) S + a mu I. "ledoit-wolf" picks a from the data (Ledoit & Wolf 2004); "none" is
        a = 0, the empirical covariance, whose numerically zero eigenvalues (n <= d) are raised to
        1e-10 of the largest so that off-span directions score high rather than being ignored.

    Attributes
    ----------
    location_ : ndarray (d,), mean of the references.
    precision_ : ndarray (d, d), inverse of the shrunk covariance.
    shrinkage_ : float, the intensity a used.
    (each of the fold models `models_` holds these three; a new image's score is the mean of theirs)
    calibration_scores_ : ndarray (n,), cross-conformal scores of the references.
    calibration_method_ : str

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(0).standard_normal((50, 3))
    >>> det = GaussianDetector().fit(x)
    >>> bool(det.anomaly_score(np.full((1, 3), 10.0)).scores[0] > det.calibration_scores_.max())
    True

    References
    ----------
    Rippel, Mertens & Merhof, "Modeling the distribution of normal data in pre-trained deep
    features for anomaly detection", ICPR 2020.
    Ledoit & Wolf, "A well-conditioned estimator for large-dimensional covariance matrices",
    Journal of Multivariate Analysis 88(2), 2004.
    """

    name = "gaussian"
    title = "Gaussian (Mahalanobis distance)"
    citation = "Rippel, Mertens & Merhof 2020 (Gaussian on pretrained features); Ledoit & Wolf 2004"

    def __init__(self, shrinkage: str | float = "ledoit-wolf"):
        self.shrinkage = shrinkage

    def _check_shrinkage(self) -> str | float:
        value = self.shrinkage
        if value in ("ledoit-wolf", "none"):
            return value
        if isinstance(value, numbers.Real) and not isinstance(value, bool) and 0.0 <= value <= 1.0:
            return float(value)
        raise OddlingError(f"shrinkage must be 'ledoit-wolf', 'none' or a number in [0, 1], got: {value!r}")

    def _fit_model(self, features: np.ndarray) -> "GaussianDetector":
        shrinkage = self._check_shrinkage()
        if len(features) < 2:
            raise OddlingError(f"a Gaussian needs at least 2 references, got {len(features)}")
        x = np.asarray(features, dtype=np.float64)
        location = x.mean(axis=0)
        centred = x - location
        if shrinkage == "ledoit-wolf":
            amount = ledoit_wolf_shrinkage(centred)
        else:
            amount = 0.0 if shrinkage == "none" else shrinkage
        empirical = (centred.T @ centred) / len(x)   # maximum likelihood (/ n), as Ledoit & Wolf
        mu = float(np.trace(empirical)) / x.shape[1]
        covariance = (1.0 - amount) * empirical
        covariance[np.diag_indices_from(covariance)] += amount * mu
        self.location_ = location
        self.precision_ = stable_precision(covariance)
        self.shrinkage_ = float(amount)
        self.n_features_in_ = int(x.shape[1])
        return self

    def _score_model(self, features: np.ndarray) -> np.ndarray:
        diff = np.asarray(features, dtype=np.float64) - self.location_
        return np.einsum("ij,ij->i", diff @ self.precision_, diff)   # the product through BLAS, not einsum's loops

    def _model_state(self) -> tuple[dict, dict[str, np.ndarray]]:
        return {"shrinkage": self.shrinkage_}, {"location": self.location_, "precision": self.precision_}

    def _load_model(self, state: dict, arrays: dict[str, np.ndarray]) -> "GaussianDetector":
        self._check_shrinkage()
        location, precision = arrays.get("location"), arrays.get("precision")
        if location is None or precision is None:
            raise OddlingError("a Gaussian detector's state needs 'location' and 'precision' arrays")
        location = np.asarray(location, dtype=np.float64)
        precision = np.asarray(precision, dtype=np.float64)
        if location.ndim != 1 or len(location) == 0 or precision.shape != (len(location), len(location)):
            raise OddlingError(f"Gaussian state: location must be (d,) and precision (d, d), got "
                               f"{location.shape} and {precision.shape}")
        if not (np.isfinite(location).all() and np.isfinite(precision).all()):
            raise OddlingError("Gaussian state holds NaN or infinite values")
        if not np.allclose(precision, precision.T, rtol=1e-10, atol=0.0):
            raise OddlingError("Gaussian state: precision is not symmetric")
        try:
            np.linalg.cholesky(precision)   # negative distances would rank images meaninglessly
        except np.linalg.LinAlgError as exc:
            raise OddlingError("Gaussian state: precision is not positive definite") from exc
        self.location_, self.precision_ = location, precision
        self.shrinkage_ = float(state.get("shrinkage", float("nan")))
        self.n_features_in_ = len(location)
        return self

    def describe_score(self) -> str:
        return ("squared Mahalanobis distance to the references' mean under their shrunk covariance "
                "(squared distance in units of the references' spread); 0 = at the mean")
