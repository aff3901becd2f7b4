"""What every detector offers, and the calibration schemes they share.

A detector follows scikit-learn's estimator habits: the constructor only stores parameters;
`fit(features, groups)` learns state (trailing underscores), including `calibration_scores_`
(scores of known-normal references obtained so that they are exchangeable with a new normal
image's score) and `calibration_method_` (how). `anomaly_score(features)` returns `Scores`,
higher = more anomalous. State is saved as JSON-able parameters and state plus NumPy arrays,
never pickled. Nothing outside `oddling.detectors` branches on which detector it is: the text
the CLI, the README and the review page show comes from the detector itself.
"""
from __future__ import annotations

import hashlib
import inspect
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from oddling.errors import OddlingError

N_FOLDS = 5
SEED = 0


@dataclass
class Scores:
    """What `anomaly_score` returns for n images.

    neighbour_rows / neighbour_distances: (n, m) reference rows and distances nearest first,
    where the method has nearest references as evidence (else None). maps: (n, G, G) per-location
    scores where the method scores locations (else None).
    """

    scores: np.ndarray
    neighbour_rows: np.ndarray | None = None
    neighbour_distances: np.ndarray | None = None
    maps: np.ndarray | None = None


class Detector:
    """Base class. Subclasses set the class attributes and implement the methods below; their
    `__init__` only stores each parameter under its own name, which `get_params` reads back."""

    name: ClassVar[str]                 # id used in banks, the CLI and tune's leaderboard
    title: ClassVar[str]                # a few words for people, e.g. "k nearest neighbours"
    citation: ClassVar[str]
    feature_kind: ClassVar[str] = "vector"   # "vector": (n, d); "patches": (n, locations, c)

    # --- to implement -------------------------------------------------------------------------
    def fit(self, features: np.ndarray, groups: np.ndarray) -> "Detector":
        raise NotImplementedError

    def anomaly_score(self, features: np.ndarray, groups: np.ndarray | None = None) -> Scores:
        """Scores of new images, higher = more anomalous, with evidence where the method has it.
        `groups`: the images' content hashes, where known; detectors with fold models use them to
        pick each image's model (see `CrossConformalDetector`), the others ignore them."""
        raise NotImplementedError

    def state(self) -> tuple[dict, dict[str, np.ndarray]]:
        """Fitted state as (JSON-able dict, arrays). Calibration scores are saved by the bank."""
        raise NotImplementedError

    def load_state(self, state: dict, arrays: dict[str, np.ndarray]) -> "Detector":
        """Restore fitted state saved by `state()` (validated: a bad value raises OddlingError)."""
        raise NotImplementedError

    def describe_score(self) -> str:
        """One sentence for people: what the score measures."""
        raise NotImplementedError

    # --- shared ------------------------------------------------------------------------------
    # Whether the detector's fitted state is exactly its training features (kNN): the bank then
    # keeps those once, as the reference features, and hands them back on load.
    keeps_training_features: ClassVar[bool] = False
    # Whether `add(features, groups, reference_groups=...)` appends references and updates the
    # calibration without a refit (kNN); `bank add` refits the others.
    adds_incrementally: ClassVar[bool] = False
    # Whether `anomaly_score` can give nearest references as evidence, and how the page titles them.
    has_neighbours: ClassVar[bool] = False
    evidence_title: ClassVar[str] = ""

    def faiss_indexes(self) -> dict:
        """Fitted state kept as faiss indexes ({name: index with `write(path)`}), which the bank
        saves in faiss's own file format beside the arrays; none by default."""
        return {}

    @classmethod
    def param_names(cls) -> list[str]:
        """The constructor's parameters, in the order of its signature (scikit-learn's BaseEstimator
        reads them the same way); a constructor taking *args or **kwargs has none that can be named."""
        if cls.__init__ is object.__init__:
            return []
        names = []
        for parameter in list(inspect.signature(cls.__init__).parameters.values())[1:]:
            if parameter.kind in (parameter.VAR_POSITIONAL, parameter.VAR_KEYWORD):
                raise TypeError(f"{cls.__name__}.__init__ must name its parameters, not take *args or **kwargs")
            names.append(parameter.name)
        return names

    def get_params(self) -> dict:
        """Constructor parameters, JSON-able: `type(self)(**get_params())` is an unfitted copy."""
        return {name: getattr(self, name) for name in self.param_names()}

    def set_params(self, **params) -> "Detector":
        """Change constructor parameters (checked at the next `fit`, like the constructor's); returns
        self. A name the constructor does not take is an OddlingError naming the ones it does."""
        valid = self.param_names()
        for name in params:
            if name not in valid:
                raise OddlingError(f"the {self.name} detector has no parameter {name!r}; its parameters: "
                                   f"{', '.join(valid) or 'none'}")
        for name, value in params.items():
            setattr(self, name, value)
        return self

    def clone(self) -> "Detector":
        return type(self)(**self.get_params())

    def score_samples(self, features: np.ndarray, groups: np.ndarray | None = None) -> np.ndarray:
        """The scores alone, as an (n,) float64 array (scikit-learn's name; higher = more anomalous here)."""
        return np.asarray(self.anomaly_score(features, groups).scores, dtype=np.float64)

    def describe_calibration(self) -> str:
        return getattr(self, "calibration_method_", "not fitted")

    def summary(self) -> dict:
        return {"name": self.name, "title": self.title, "params": self.get_params(),
                "score": self.describe_score(), "calibration": self.describe_calibration()}

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"{type(self).__name__}({params})"


def check_features(features: np.ndarray, kind: str = "vector", name: str = "features") -> np.ndarray:
    """Validate once at the boundary: finite float array of the right rank."""
    array = np.asarray(features)
    rank = 2 if kind == "vector" else 3
    if array.ndim != rank:
        raise OddlingError(f"{name} must be a {rank}-D array, got shape {array.shape}")
    if not np.issubdtype(array.dtype, np.floating):
        raise OddlingError(f"{name} must hold floats, got dtype {array.dtype}")
    if not np.isfinite(array).all():
        raise OddlingError(f"{name} hold NaN or infinite values")
    return array


def distinct_groups(groups: np.ndarray | None, n: int) -> np.ndarray:
    """One id per row: the file content hash, so copies of one file stay together."""
    if groups is None:
        return np.arange(n).astype(str)
    groups = np.asarray(groups)
    if len(groups) != n:
        raise OddlingError(f"groups has {len(groups)} entries for {n} feature rows")
    return groups


def group_folds(groups: np.ndarray, n_folds: int = N_FOLDS, seed: int = SEED) -> np.ndarray:
    """Fold number per row; all rows of a group in the same fold, groups dealt out at random (seeded)."""
    distinct = np.array(sorted(set(groups.tolist())))
    if len(distinct) < n_folds:
        raise OddlingError(f"cross-conformal calibration needs at least {n_folds} distinct references, "
                           f"got {len(distinct)}")
    order = np.random.default_rng(seed).permutation(len(distinct))
    fold_of_group = dict(zip(distinct[order].tolist(), (np.arange(len(distinct)) % n_folds).tolist()))
    return np.array([fold_of_group[g] for g in groups.tolist()], dtype=np.int64)


def cross_conformal_scores(detector: "CrossConformalDetector", features: np.ndarray, groups: np.ndarray,
                           n_folds: int = N_FOLDS, seed: int = SEED) -> tuple[np.ndarray, list]:
    """K-fold cross-conformal calibration (Vovk, "Cross-conformal predictors", Annals of Mathematics
    and Artificial Intelligence 2015): each reference is scored by a copy of the detector fitted
    without its fold, as a new image is scored by a detector that never saw it.

    Returns (calibration scores, the K fold models). The fold models are kept and score new images
    (`CrossConformalDetector.anomaly_score`), so a new image and a reference are scored by models
    fitted on as many references. A single model refitted on all references scores new normal
    images lower than its folds scored the references (it has seen more): PCA flagged a tenth of
    its rate that way (benchmarks/CALIBRATION_RESULTS.md).
    """
    from oddling.detectors.threads import blas_threads_for

    folds = group_folds(groups, n_folds, seed)
    scores = np.empty(len(features), dtype=np.float64)
    models = []
    with blas_threads_for(features.shape, (features.shape[1], features.shape[1])):
        for fold in range(n_folds):
            held = folds == fold
            model = detector.clone()._fit_model(features[~held])
            scores[held] = model._score_model(features[held])
            models.append(model)
    return scores, models


def fold_of_content(groups, n_folds: int) -> np.ndarray:
    """The fold model that scores each new image: from its content hash (the first 8 bytes of a
    SHA-256 of the text, as an integer, mod K), so a file always meets the same model, on any machine,
    and the models share the new images evenly."""
    return np.array([int.from_bytes(hashlib.sha256(str(g).encode("utf-8", "surrogatepass")).digest()[:8], "big")
                     % n_folds for g in np.asarray(groups).tolist()], dtype=np.int64)


CROSS_CONFORMAL = (f"{N_FOLDS}-fold cross-conformal: each reference scored by the detector fitted without its "
                   "fold (copies of a file kept in one fold); a new image's score is the mean of the "
                   f"{N_FOLDS} fold models' scores")
CROSS_CONFORMAL_PICKED = (f"{N_FOLDS}-fold cross-conformal: each reference scored by the detector fitted without its "
                          "fold (copies of a file kept in one fold); a new image is scored by one of the "
                          f"{N_FOLDS} fold models, picked by its content")
# What banks written before the fold models were kept say: one model refitted on all references.
REFIT_CROSS_CONFORMAL = (f"{N_FOLDS}-fold cross-conformal: each reference scored by the detector fitted without its "
                         "fold (copies of a file kept in one fold)")
FOLD_PREFIX = "fold"


class CrossConformalDetector(Detector):
    """A detector whose model has no exact, cheap leave-one-out (Gaussian, PCA, isolation forest):
    K fold models, each fitted without one fold of the references and calibrated on it.

    A new image's score is the mean of the K models' scores, unless `picks_fold_model`: then it is
    the score of the one model its content hash picks (`fold_of_content`; without hashes, the mean
    again). The mean ranks best and is a little conservative where the fold models agree closely
    (Gaussian, PCA); where each model is noisy (the isolation forest's random trees) the mean of
    five varies much less than the one model that scored each reference, and flags a half to a
    fifth of the rate, so there one model scores each image.

    Subclasses implement, for one model on validated (n, d) arrays: `_fit_model(features) -> self`
    (sets the model's fitted attributes), `_score_model(features) -> (n,) float64`,
    `_model_state() -> (dict, arrays)` and `_load_model(state, arrays) -> self` (validated: a bad
    value raises OddlingError). Banks written before the fold models were kept hold one model
    refitted on all references; they load as a single model and score as before.
    """

    picks_fold_model: ClassVar[bool] = False

    def fit(self, features: np.ndarray, groups: np.ndarray | None = None) -> "CrossConformalDetector":
        features = check_features(features)
        groups = distinct_groups(groups, len(features))
        self.calibration_scores_, self.models_ = cross_conformal_scores(self, features, groups)
        self.calibration_method_ = CROSS_CONFORMAL_PICKED if self.picks_fold_model else CROSS_CONFORMAL
        self.n_features_in_ = int(features.shape[1])
        return self

    def anomaly_score(self, features: np.ndarray, groups: np.ndarray | None = None) -> Scores:
        check_fitted(self, "models_")
        features = check_features(features)
        if features.shape[1] != self.n_features_in_:
            raise OddlingError(f"features have {features.shape[1]} dimensions; the detector was fitted on "
                               f"{self.n_features_in_}")
        from oddling.detectors.threads import blas_threads_for

        scores = np.zeros(len(features), dtype=np.float64)
        with blas_threads_for(features.shape, (features.shape[1], features.shape[1])):
            if groups is None or not self.picks_fold_model or len(self.models_) == 1:
                for model in self.models_:
                    scores += np.asarray(model._score_model(features), dtype=np.float64)
                return Scores(scores / len(self.models_))
            chosen = fold_of_content(distinct_groups(groups, len(features)), len(self.models_))
            for k, model in enumerate(self.models_):
                rows = chosen == k
                if rows.any():
                    scores[rows] = model._score_model(features[rows])
        return Scores(scores)

    def state(self) -> tuple[dict, dict[str, np.ndarray]]:
        check_fitted(self, "models_")
        if len(self.models_) == 1 and getattr(self, "legacy_", False):
            state, arrays = self.models_[0]._model_state()
            return state | {"calibration_method": self.calibration_method_}, arrays
        folds, arrays = [], {}
        for k, model in enumerate(self.models_):
            state, model_arrays = model._model_state()
            folds.append(state)
            arrays.update({f"{FOLD_PREFIX}{k}.{name}": array for name, array in model_arrays.items()})
        return {"calibration_method": self.calibration_method_, "n_features": self.n_features_in_,
                "folds": folds}, arrays

    def load_state(self, state: dict, arrays: dict[str, np.ndarray]) -> "CrossConformalDetector":
        folds = state.get("folds")
        if folds is None:        # an older bank: one model refitted on all references
            model = self.clone()._load_model(state, arrays)
            self.models_, self.legacy_ = [model], True
            self.calibration_method_ = str(state.get("calibration_method", REFIT_CROSS_CONFORMAL))
            self.n_features_in_ = model.n_features_in_
            return self
        if not isinstance(folds, list) or not folds or not all(isinstance(s, dict) for s in folds):
            raise OddlingError(f"{self.name} state: folds must be a non-empty list of objects")
        models = []
        for k, fold_state in enumerate(folds):
            prefix = f"{FOLD_PREFIX}{k}."
            fold_arrays = {name[len(prefix):]: a for name, a in arrays.items() if name.startswith(prefix)}
            models.append(self.clone()._load_model(fold_state, fold_arrays))
        dims = {m.n_features_in_ for m in models}
        if len(dims) != 1 or dims != {state.get("n_features")}:
            raise OddlingError(f"{self.name} state: the fold models disagree on the feature size "
                               f"({sorted(dims)}, recorded {state.get('n_features')!r})")
        self.models_, self.legacy_ = models, False
        self.calibration_method_ = str(state.get("calibration_method", CROSS_CONFORMAL))
        self.n_features_in_ = int(state["n_features"])
        return self

    def _fit_model(self, features: np.ndarray) -> "CrossConformalDetector":
        raise NotImplementedError

    def _score_model(self, features: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def _model_state(self) -> tuple[dict, dict[str, np.ndarray]]:
        raise NotImplementedError

    def _load_model(self, state: dict, arrays: dict[str, np.ndarray]) -> "CrossConformalDetector":
        raise NotImplementedError


def check_fitted(detector: Detector, attribute: str) -> None:
    """A clear message instead of an AttributeError when a detector is used before `fit`."""
    if not hasattr(detector, attribute):
        raise OddlingError(f"this {detector.name} detector is not fitted yet: call fit(features) first")
