"""The Gaussian, PCA and isolation-forest detectors against outside references.

References: scikit-learn's LedoitWolf / EmpiricalCovariance / ShrunkCovariance `mahalanobis`
(squared distances), its PCA (transform + inverse_transform) and its IsolationForest
(`-score_samples`); the conformal guarantee of Vovk, Gammerman & Shafer, *Algorithmic Learning in
a Random World* 2005 and Bates et al., Annals of Statistics 2023.
"""
import inspect
import io
import json
import math
import sys

import numpy as np
import pytest

from oddling.detectors import DETECTORS as REGISTRY, detector_class, make_detector
from oddling.detectors.base import N_FOLDS, distinct_groups, group_folds
from oddling.detectors.conformal import ConformalThreshold
from oddling.detectors.gaussian import GaussianDetector
from oddling.detectors.iforest import IsolationForestDetector
from oddling.detectors.pca import PCADetector
from oddling.errors import OddlingError


def anisotropic(rng, n, d):
    """Normal data whose variance decays over the axes, then rotated: a few directions dominate."""
    rotation, _ = np.linalg.qr(rng.standard_normal((d, d)))
    return (rng.standard_normal((n, d)) * np.geomspace(3.0, 0.05, d)) @ rotation + 1.5


def bank_round_trip(state, arrays):
    """As a bank stores them: the dict through JSON, the arrays through an .npz file."""
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    buffer.seek(0)
    with np.load(buffer) as loaded:
        return json.loads(json.dumps(state)), {key: loaded[key] for key in loaded.files}


def rel_close(actual, expected, rtol=1e-6):
    np.testing.assert_allclose(actual, expected, rtol=rtol, atol=0.0)


def fold_training_sets(x):
    """What each of a detector's fold models is fitted on: the references without one fold."""
    folds = group_folds(distinct_groups(None, len(x)))
    return [x[folds != k] for k in range(N_FOLDS)]


def check_folds_against(det, x, y, reference_scores):
    """Every fold model scores y as the outside reference fitted on that fold's training set does,
    and the detector's score is their mean."""
    expected = []
    for model, part in zip(det.models_, fold_training_sets(x)):
        reference = reference_scores(part)
        rel_close(model._score_model(y), reference)
        expected.append(reference)
    rel_close(det.anomaly_score(y).scores, np.mean(expected, axis=0))


def test_the_isolation_forest_scores_each_image_with_the_fold_model_its_content_picks():
    from oddling.detectors.base import fold_of_content

    rng = np.random.default_rng(12)
    x, y = anisotropic(rng, 80, 6), anisotropic(rng, 40, 6) * 1.2
    hashes = np.array([f"{i:064x}" for i in range(40)])
    det = make_detector("iforest").fit(x)
    chosen = fold_of_content(hashes, N_FOLDS)
    assert set(chosen.tolist()) == set(range(N_FOLDS))            # the models share the images
    expected = [det.models_[k]._score_model(y[i:i + 1])[0] for i, k in enumerate(chosen)]
    np.testing.assert_allclose(det.anomaly_score(y, hashes).scores, expected, rtol=1e-12)
    np.testing.assert_array_equal(det.score_samples(y, hashes), det.anomaly_score(y, hashes).scores)
    # without hashes: the mean of the fold models (what a caller with bare features gets)
    mean = np.mean([m._score_model(y) for m in det.models_], axis=0)
    np.testing.assert_allclose(det.anomaly_score(y).scores, mean, rtol=1e-12)


@pytest.mark.parametrize("name", ["gaussian", "pca"])
def test_gaussian_and_pca_score_the_mean_of_their_fold_models_with_or_without_hashes(name):
    rng = np.random.default_rng(12)
    x, y = anisotropic(rng, 80, 6), anisotropic(rng, 40, 6) * 1.2
    det = make_detector(name).fit(x)
    mean = np.mean([m._score_model(y) for m in det.models_], axis=0)
    np.testing.assert_allclose(det.anomaly_score(y, np.array([str(i) for i in range(40)])).scores, mean, rtol=1e-12)


# --- Gaussian --------------------------------------------------------------------------------

@pytest.mark.parametrize("n, d", [(120, 20), (40, 300)])   # n > d and n < d
def test_gaussian_equals_scikit_learn_ledoit_wolf(n, d):
    from sklearn.covariance import LedoitWolf

    rng = np.random.default_rng(0)
    x, y = anisotropic(rng, n, d), anisotropic(rng, 30, d) * 1.5
    det = GaussianDetector().fit(x)
    for model, part in zip(det.models_, fold_training_sets(x)):
        reference = LedoitWolf().fit(part)                  # scikit-learn's Ledoit & Wolf 2004
        assert model.shrinkage_ == pytest.approx(reference.shrinkage_, rel=1e-9)
        np.testing.assert_allclose(model.location_, reference.location_, rtol=1e-12, atol=1e-12)
    check_folds_against(det, x, y, lambda part: LedoitWolf().fit(part).mahalanobis(y))   # squared distances


def test_gaussian_without_shrinkage_equals_scikit_learn_empirical_covariance():
    from sklearn.covariance import EmpiricalCovariance

    rng = np.random.default_rng(1)
    x, y = anisotropic(rng, 200, 10), anisotropic(rng, 40, 10) * 2.0
    det = GaussianDetector(shrinkage="none").fit(x)
    check_folds_against(det, x, y, lambda part: EmpiricalCovariance().fit(part).mahalanobis(y))   # scikit-learn


def test_gaussian_fixed_shrinkage_equals_scikit_learn_shrunk_covariance():
    from sklearn.covariance import ShrunkCovariance

    rng = np.random.default_rng(2)
    x, y = anisotropic(rng, 60, 25), anisotropic(rng, 20, 25)
    det = GaussianDetector(shrinkage=0.3).fit(x)
    # scikit-learn's ShrunkCovariance: (1 - a) S + a trace(S)/d I, the same target as ours
    check_folds_against(det, x, y, lambda part: ShrunkCovariance(shrinkage=0.3).fit(part).mahalanobis(y))


def test_gaussian_without_shrinkage_when_n_below_d_scores_leaving_the_span_high():
    rng = np.random.default_rng(3)
    x = rng.standard_normal((30, 50))
    det = GaussianDetector(shrinkage="none").fit(x)
    model, part = det.models_[0], fold_training_sets(x)[0]   # one fold model and what it was fitted on
    inside = part.mean(axis=0) + 0.5 * (part[0] - part[1])          # in its references' affine span
    outside = inside + 0.5 * np.linalg.svd(part - part.mean(axis=0))[2][-1]   # plus a step off it
    inside_score, outside_score = model._score_model(np.stack([inside, outside]))
    assert np.isfinite(inside_score) and outside_score > 1e6 * inside_score


# --- PCA -------------------------------------------------------------------------------------

@pytest.mark.parametrize("variance", [0.5, 0.9, 0.95, 0.99])
def test_pca_residual_equals_scikit_learn_reconstruction_error(variance):
    from sklearn.decomposition import PCA

    rng = np.random.default_rng(4)
    x, y = anisotropic(rng, 150, 30), anisotropic(rng, 40, 30) + rng.standard_normal((40, 30))
    det = PCADetector(variance=variance).fit(x)

    def residual(reference):   # scikit-learn's reconstruction error
        return ((y - reference.inverse_transform(reference.transform(y))) ** 2).sum(axis=1)

    for model, part in zip(det.models_, fold_training_sets(x)):
        reference = PCA(n_components=variance, svd_solver="full").fit(part)
        assert reference.n_components_ == model.n_components_ < 30
    check_folds_against(det, x, y, lambda part: residual(PCA(n_components=variance, svd_solver="full").fit(part)))


def test_pca_components_are_scikit_learn_principal_axes():
    from sklearn.decomposition import PCA

    rng = np.random.default_rng(5)
    x = anisotropic(rng, 100, 12)
    det = PCADetector(variance=0.9).fit(x)
    for model, part in zip(det.models_, fold_training_sets(x)):
        reference = PCA(n_components=0.9, svd_solver="full").fit(part)
        # the same subspace: the projectors agree (component signs are arbitrary)
        np.testing.assert_allclose(model.components_.T @ model.components_,
                                   reference.components_.T @ reference.components_, atol=1e-8)


# --- isolation forest ------------------------------------------------------------------------

@pytest.mark.parametrize("params", [{}, {"n_estimators": 30, "max_samples": 64, "random_state": 7},
                                    {"n_estimators": 20, "max_samples": 0.5, "random_state": 3}])
def test_isolation_forest_equals_scikit_learn_score_samples(params):
    from sklearn.ensemble import IsolationForest

    rng = np.random.default_rng(6)
    x = rng.standard_normal((300, 6)).astype(np.float32)
    y = np.vstack([rng.standard_normal((60, 6)), 4.0 + rng.standard_normal((10, 6))])
    det = IsolationForestDetector(**params).fit(x)
    full = {"n_estimators": 100, "max_samples": "auto", "random_state": 0, **params}
    if isinstance(full["max_samples"], int):
        full["max_samples"] = min(full["max_samples"], int(0.8 * len(x)))
    # scikit-learn, Liu et al. 2008
    check_folds_against(det, x, y, lambda part: -IsolationForest(**full).fit(part).score_samples(y))


def test_isolation_forest_state_is_plain_arrays_and_scores_without_scikit_learn(monkeypatch):
    rng = np.random.default_rng(7)
    x, y = rng.standard_normal((120, 5)), rng.standard_normal((50, 5)) * 2
    det = IsolationForestDetector(n_estimators=25).fit(x)
    expected = det.anomaly_score(y).scores
    state, arrays = bank_round_trip(*det.state())
    assert all(a.dtype.kind in "if" for a in arrays.values())    # no pickled objects
    monkeypatch.setitem(sys.modules, "sklearn.ensemble", None)   # any import of it now fails
    restored = IsolationForestDetector(n_estimators=25).load_state(state, arrays)
    np.testing.assert_array_equal(restored.anomaly_score(y).scores, expected)


# --- shared: conformal guarantee, state, validation, detection --------------------------------

DETECTORS = {
    "gaussian": lambda: GaussianDetector(),
    # variance=0.5: on isotropic N(0, I) in 8 dimensions 0.95 would keep all 8 axes and every
    # residual would be 0 (nothing to rank); half the variance keeps 4 and leaves a chi-square-4 residual.
    "pca": lambda: PCADetector(variance=0.5),
    "iforest": lambda: IsolationForestDetector(n_estimators=50),   # fewer trees: runtime only
}


@pytest.mark.parametrize("name", DETECTORS)
def test_false_alarm_rate_on_fresh_normal_draws(name):
    # Guarantee: E[false-alarm rate] <= rate for a new image exchangeable with the references
    # (Vovk et al. 2005). Cross-conformal calibration makes it hold approximately (Vovk 2015),
    # so the check is that the observed rate is not above the target beyond sampling error.
    # Spread of the mean over seeds, as tests/test_calibrate.py: the binomial error of the fresh
    # draws, a(1-a)/N, plus the slack of one calibration set, Beta(k, n+1-k) with
    # k = floor(a(n+1)), variance ~ a(1-a)/(n+2) (Bates et al. 2023, Sec. 3); 3 standard errors.
    rate, n_ref, n_fresh, d, seeds = 0.1, 200, 2000, 8, range(20)
    shares = []
    for seed in seeds:
        rng = np.random.default_rng(500 + seed)
        det = DETECTORS[name]().fit(rng.standard_normal((n_ref, d)))
        threshold = ConformalThreshold(det.calibration_scores_, rate)
        shares.append(threshold.flag(det.anomaly_score(rng.standard_normal((n_fresh, d))).scores).mean())
    se = math.sqrt((rate * (1 - rate) / n_fresh + rate * (1 - rate) / (n_ref + 2)) / len(seeds))
    print(f"\n[{name}] target {rate}: observed false-alarm rate {np.mean(shares):.4f} (+3 se = {3 * se:.4f})")
    assert np.mean(shares) <= rate + 3 * se
    assert np.mean(shares) > 0.0   # and the cutoff flags something at all


def test_the_false_alarm_check_catches_in_sample_calibration():
    # Negative control for the test above: calibrating on scores of the references by the model
    # fitted on them (too low: the model has seen them) breaks the same tolerance.
    rate, n_ref, n_fresh, d, seeds = 0.1, 200, 2000, 8, range(20)
    shares = []
    for seed in seeds:
        rng = np.random.default_rng(500 + seed)
        x = rng.standard_normal((n_ref, d))
        det = PCADetector(variance=0.5).fit(x)
        threshold = ConformalThreshold(det.anomaly_score(x).scores, rate)
        shares.append(threshold.flag(det.anomaly_score(rng.standard_normal((n_fresh, d))).scores).mean())
    se = math.sqrt((rate * (1 - rate) / n_fresh + rate * (1 - rate) / (n_ref + 2)) / len(seeds))
    assert np.mean(shares) > rate + 3 * se


@pytest.mark.parametrize("name", DETECTORS)
def test_state_round_trip_gives_identical_scores(name):
    rng = np.random.default_rng(8)
    x, y = anisotropic(rng, 80, 16), anisotropic(rng, 25, 16) * 1.3
    det = DETECTORS[name]().fit(x)
    state, arrays = bank_round_trip(*det.state())
    restored = detector_class(name)(**det.get_params()).load_state(state, arrays)
    np.testing.assert_array_equal(restored.anomaly_score(y).scores, det.anomaly_score(y).scores)
    assert restored.describe_calibration() == det.describe_calibration()


def _nan_in(key):
    def corrupt(state, arrays):
        arrays[key] = arrays[key].astype(np.float64)
        arrays[key].flat[0] = np.nan
    return corrupt


def _drop_column(key):
    def corrupt(state, arrays):
        arrays[key] = arrays[key][..., :-1]
    return corrupt


def _set(key, value, in_state=False):
    """An array, or with in_state a key of the state (the first fold model's where it has one)."""
    def corrupt(state, arrays):
        if in_state:
            (state["folds"][0] if key in state["folds"][0] else state)[key] = value
        else:
            arrays[key] = value(arrays) if callable(value) else value
    return corrupt


def _point_child_back(state, arrays):
    inner = np.flatnonzero(arrays["fold0.left"] >= 0)
    arrays["fold0.left"] = arrays["fold0.left"].copy()
    arrays["fold0.left"][inner[1]] = inner[0]   # a cycle: the walk would never reach a leaf


BAD_STATES = [
    ("gaussian", _nan_in("fold0.location"), "NaN"),
    ("gaussian", _nan_in("fold2.precision"), "NaN"),
    ("gaussian", _drop_column("fold0.precision"), r"precision \(d, d\)"),
    ("gaussian", _set("fold4.precision", lambda a: -a["fold4.precision"]), "positive definite"),
    ("gaussian", _set("fold0.location", None), "needs 'location'"),
    ("pca", _nan_in("fold0.mean"), "NaN"),
    ("pca", _drop_column("fold1.components"), "components"),
    ("pca", _set("fold0.components", lambda a: 2.0 * a["fold0.components"]), "orthonormal"),
    ("pca", _set("n_components", 99, in_state=True), "n_components"),
    ("pca", _set("n_features", 15, in_state=True), "feature size"),
    ("iforest", _nan_in("fold0.threshold"), "NaN"),
    ("iforest", _set("fold3.left", lambda a: a["fold3.left"][:-1]), "length"),
    ("iforest", _set("fold0.feature", lambda a: a["fold0.feature"] + 16), "features must be"),
    ("iforest", _point_child_back, "structure"),
    ("iforest", _set("fold0.roots", None), "lacks arrays"),
    ("iforest", _set("max_samples", "many", in_state=True), "max_samples"),
]


@pytest.mark.parametrize("name, corrupt, message", BAD_STATES)
def test_bad_state_is_refused(name, corrupt, message):
    rng = np.random.default_rng(9)
    det = DETECTORS[name]().fit(anisotropic(rng, 60, 16))
    state, arrays = bank_round_trip(*det.state())
    corrupt(state, arrays)
    with pytest.raises(OddlingError, match=message):
        detector_class(name)(**det.get_params()).load_state(state, arrays)


BAD_PARAMS = [
    ("gaussian", {"shrinkage": 1.5}, "shrinkage must be .* got: 1.5"),
    ("gaussian", {"shrinkage": "oas"}, "shrinkage must be .* got: 'oas'"),
    ("gaussian", {"shrinkage": True}, "shrinkage must be"),
    ("pca", {"variance": 1.5}, r"variance must be in \(0, 1\], got: 1.5"),
    ("pca", {"variance": 0}, "variance must be"),
    ("pca", {"variance": "most"}, "variance must be"),
    ("iforest", {"n_estimators": 0}, "n_estimators must be .* got: 0"),
    ("iforest", {"n_estimators": 2.5}, "n_estimators must be"),
    ("iforest", {"max_samples": 0}, "max_samples must be"),
    ("iforest", {"max_samples": 1.5}, "max_samples must be"),
    ("iforest", {"max_samples": "all"}, "max_samples must be"),
    ("iforest", {"random_state": None}, "random_state must be"),
    ("iforest", {"random_state": -1}, "random_state must be"),
]


@pytest.mark.parametrize("name, params, message", BAD_PARAMS)
def test_bad_parameters_are_refused(name, params, message):
    x = np.random.default_rng(10).standard_normal((40, 4))
    with pytest.raises(OddlingError, match=message):
        make_detector(name, params).fit(x)


@pytest.mark.parametrize("name", DETECTORS)
def test_far_points_score_higher_than_normal_points(name):
    rng = np.random.default_rng(11)
    det = DETECTORS[name]().fit(rng.standard_normal((200, 8)))
    normal = det.anomaly_score(rng.standard_normal((500, 8))).scores
    # Every coordinate 5 standard deviations out (past all 200 references), with random signs;
    # and, except for the forest, 10 out along a single axis (normal draws' norms stay below ~5.5).
    far = 5.0 * rng.choice([-1.0, 1.0], size=(40, 8))
    if name != "iforest":
        # Axis-parallel splits cannot isolate a point extreme in one coordinate only: it follows
        # the data's outermost branch (Hariri, Kind & Brunner, "Extended isolation forest", 2019).
        far = np.vstack([far, 10.0 * np.eye(8), -10.0 * np.eye(8)])
    if name == "pca":   # the residual is blind along the kept axes: go off them (a fold model's), as far
        components = det.models_[0].components_
        off = far @ (np.eye(8) - components.T @ components)
        far = off * (np.linalg.norm(far, axis=1) / np.linalg.norm(off, axis=1))[:, None]
    assert det.anomaly_score(far).scores.min() > normal.max()


@pytest.mark.parametrize("name", DETECTORS)
def test_registry_and_params_make_an_unfitted_copy(name):
    det = DETECTORS[name]()
    assert detector_class(name) is type(det) and det.name == name
    copy = make_detector(name, det.get_params())
    assert copy.get_params() == det.get_params() and not hasattr(copy, "calibration_scores_")
    assert isinstance(det.describe_score(), str) and det.describe_score()


def test_gaussian_says_its_distance_is_squared():
    assert "squared Mahalanobis" in GaussianDetector().describe_score()


def test_identical_references_are_refused_by_the_gaussian_and_reduce_pca_to_the_mean():
    x = np.ones((20, 4))
    with pytest.raises(OddlingError, match="do not vary"):
        GaussianDetector().fit(x)
    det = PCADetector().fit(x)
    assert det.models_[0].n_components_ == 0   # no direction of variation: the residual is ||y - mean||^2
    np.testing.assert_allclose(det.anomaly_score(np.array([[1.0, 1.0, 1.0, 3.0]])).scores, [4.0])


@pytest.mark.parametrize("name", DETECTORS)
def test_a_state_written_before_fold_models_loads_as_one_refitted_model(name):
    # Banks of earlier releases keep one model refitted on all references and its own arrays at
    # the top level (no "folds"); they load and score as that model did.
    rng = np.random.default_rng(13)
    x, y = anisotropic(rng, 60, 8), anisotropic(rng, 20, 8)
    single = make_detector(name).clone()._fit_model(x)
    old_state, old_arrays = single._model_state()
    old_state = old_state | {"calibration_method": "5-fold cross-conformal: each reference scored by the detector "
                                                    "fitted without its fold (copies of a file kept in one fold)"}
    loaded = make_detector(name).load_state(*bank_round_trip(old_state, old_arrays))
    np.testing.assert_array_equal(loaded.anomaly_score(y, np.array([str(i) for i in range(20)])).scores,
                                  single._score_model(y))
    assert loaded.state()[0] == json.loads(json.dumps(old_state)) and set(loaded.state()[1]) == set(old_arrays)


# --- every detector as a scikit-learn style estimator ---------------------------------------------

# A valid value other than the default for one parameter of each detector.
OTHER_PARAMS = {"knn": {"k": 3}, "patch-knn": {"coreset": 0.2}, "gaussian": {"shrinkage": 0.1},
                "pca": {"variance": 0.8}, "iforest": {"n_estimators": 10}}


def some_features(name, n=5):
    """Features of the kind the detector takes: (n, d) vectors, or (n, locations, channels) patch grids."""
    rng = np.random.default_rng(14)
    return rng.standard_normal((n, 4, 3) if name == "patch-knn" else (n, 4)).astype(np.float32)


@pytest.mark.parametrize("name", REGISTRY)
def test_get_params_are_read_from_the_constructor_signature(name):
    # As scikit-learn's BaseEstimator.get_params: the __init__ parameters, each read back by its name.
    det = make_detector(name)
    signature = inspect.signature(type(det).__init__).parameters
    assert list(det.get_params()) == list(signature)[1:]
    assert det.get_params() == {key: p.default for key, p in list(signature.items())[1:]}
    assert "get_params" not in vars(type(det))          # no hand-written copy to fall out of step


@pytest.mark.parametrize("name", REGISTRY)
def test_set_params_changes_the_parameters_and_returns_the_detector(name):
    det = make_detector(name)
    defaults = det.get_params()
    assert det.set_params(**OTHER_PARAMS[name]) is det
    assert det.get_params() == defaults | OTHER_PARAMS[name] == det.clone().get_params()


@pytest.mark.parametrize("name", REGISTRY)
def test_set_params_refuses_a_name_the_constructor_does_not_take(name):
    det = make_detector(name)
    valid = ", ".join(det.get_params())
    with pytest.raises(OddlingError, match=f"no parameter 'n_neighbours'; its parameters: {valid}$"):
        det.set_params(n_neighbours=3)
    assert det.get_params() == make_detector(name).get_params()


def test_a_parameter_set_later_is_checked_at_fit_like_one_given_to_the_constructor():
    x = np.random.default_rng(10).standard_normal((40, 4))
    with pytest.raises(OddlingError, match="k must be an integer >= 1, got: 0"):
        make_detector("knn").set_params(k=0).fit(x)


@pytest.mark.parametrize("name", REGISTRY)
@pytest.mark.parametrize("use", ["anomaly_score", "score_samples", "state"])
def test_an_unfitted_detector_says_it_is_not_fitted(name, use):
    det = make_detector(name)
    call = {"anomaly_score": lambda: det.anomaly_score(some_features(name)),
            "score_samples": lambda: det.score_samples(some_features(name)),
            "state": det.state}[use]
    with pytest.raises(OddlingError, match=f"this {name} detector is not fitted yet: call fit"):
        call()
