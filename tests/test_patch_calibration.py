"""The patch detector's cross-conformal calibration, against brute-force nearest patches (SciPy's
`cdist`, the outside reference) on small random patch grids.

Fold model j is the coreset of every fold but j (`fit_fold_bank`); a reference of fold j is scored
by fold model j alone, a new image by every fold model, and its score is their mean (Vovk,
"Cross-conformal predictors", 2015, for the calibration scheme).
"""
import numpy as np
import pytest
from scipy.spatial.distance import cdist

from oddling.detectors.base import distinct_groups, group_folds
from oddling.detectors.patch import PatchKNNDetector
from oddling.errors import OddlingError

N, LOCATIONS, CHANNELS = 30, 16, 6


def grids(rng, n):
    return rng.standard_normal((n, LOCATIONS, CHANNELS)).astype(np.float32)


def fold_model(det, j):
    """The patches of fold model j: every fold's coreset but fold j's."""
    start, end = det.fold_starts_[j], det.fold_starts_[j + 1]
    return np.concatenate([det.patches_[:start], det.patches_[end:]])


def worst_location(queries, patches):
    return cdist(queries.astype(np.float64), patches.astype(np.float64)).min(axis=1).max()


def test_every_reference_is_calibrated_by_the_fold_model_that_never_saw_it():
    rng = np.random.default_rng(0)
    x = grids(rng, N)
    det = PatchKNNDetector(coreset=0.5).fit(x)
    folds = group_folds(distinct_groups(None, N), 5, 0)
    assert len(det.calibration_scores_) == N            # n references, n calibration scores
    for i in range(N):
        # SciPy's cdist: the largest nearest-patch distance of reference i to fold model f(i)
        expected = worst_location(x[i], fold_model(det, folds[i]))
        assert det.calibration_scores_[i] == pytest.approx(expected, rel=1e-5)
        assert not np.isin(det.sources_[det.fold_starts_[folds[i]]:det.fold_starts_[folds[i] + 1]],
                           np.flatnonzero(folds != folds[i])).any()


def test_a_new_image_scores_the_mean_of_the_fold_models_scores():
    rng = np.random.default_rng(1)
    x, y = grids(rng, N), grids(rng, 8) * 1.3
    det = PatchKNNDetector(coreset=0.5).fit(x)
    expected = [np.mean([worst_location(image, fold_model(det, j)) for j in range(5)]) for image in y]
    got = det.anomaly_score(y).scores
    # One search of the whole coreset gives every fold model's nearest patch, unless all of the
    # nearest FOLD_SEARCH come from one fold: then the score is a lower bound (never higher).
    assert np.all(got <= np.array(expected) * (1 + 1e-5))
    np.testing.assert_allclose(got, expected, rtol=2e-2)


def test_copies_of_one_file_stay_in_one_fold():
    rng = np.random.default_rng(2)
    x = grids(rng, N)
    x[1] = x[0]
    groups = np.array([f"h{i}" for i in range(N)])
    groups[1] = groups[0]
    det = PatchKNNDetector(coreset=1.0).fit(x, groups)
    # its copy is in the same fold, so fold model f(0) holds neither: the score is not 0
    assert det.calibration_scores_[0] > 0.5 and det.calibration_scores_[1] == det.calibration_scores_[0]


def test_too_few_distinct_references_for_the_folds_is_a_clear_error():
    x = grids(np.random.default_rng(3), 4)
    with pytest.raises(OddlingError, match="at least 5 distinct references"):
        PatchKNNDetector().fit(x)
    with pytest.raises(OddlingError, match="folds must be an integer >= 2"):
        PatchKNNDetector(folds=1).fit(x)


def test_content_hashes_do_not_change_a_patch_score_and_the_map_peaks_near_it():
    rng = np.random.default_rng(4)
    x, y = grids(rng, N), grids(rng, 10) * 1.3
    det = PatchKNNDetector(coreset=0.5).fit(x)
    got = det.anomaly_score(y, np.array([f"new{i}" for i in range(10)]))
    np.testing.assert_array_equal(got.scores, det.anomaly_score(y).scores)
    # the map is the fold models' mean distance per location: its peak is at most the mean of their peaks
    assert np.all(got.maps.reshape(10, -1).max(axis=1) <= got.scores + 1e-9)


def test_a_bank_written_with_split_calibration_scores_as_before():
    from oddling.detectors.patch import PatchIndex, score_patches

    rng = np.random.default_rng(5)
    patches, y = rng.standard_normal((40, CHANNELS)).astype(np.float32), grids(rng, 3)
    state = {"n_patches": 400, "coreset_size": 40, "patch_dim": CHANNELS, "grid": 4, "size_mb": 0.0,
             "calibration_method": "split conformal: a seeded share of the references held out"}
    arrays = {"patches": patches, "sources": np.arange(40) % 10, "calibration_rows": np.array([10, 11])}
    det = PatchKNNDetector().load_state(state, arrays)
    expected = score_patches(PatchIndex(patches), arrays["sources"], y).scores
    np.testing.assert_array_equal(det.anomaly_score(y, np.array(["a", "b", "c"])).scores, expected)
    assert det.state()[1].keys() == arrays.keys()


def test_the_coreset_is_capped_and_large_sets_are_greedy_on_a_seeded_pool(monkeypatch):
    import oddling.detectors.patch as patch

    rng = np.random.default_rng(6)
    points = rng.standard_normal((400, CHANNELS)).astype(np.float32)
    assert len(patch.coreset(points, 0.5, max_centers=10)) == 10
    monkeypatch.setattr(patch, "GREEDY_POOL", 100)
    kept = patch.coreset(points, 0.05, seed=3)                 # 20 centres from a pool of max(100, 160) = 160
    assert len(kept) == 20 and len(set(kept.tolist())) == 20
    np.testing.assert_array_equal(kept, patch.coreset(points, 0.05, seed=3))   # seeded
    det = PatchKNNDetector(coreset=1.0, max_patches=40).fit(grids(rng, N))
    assert len(det.patches_) <= 40 and det.n_patches_ == N * LOCATIONS


def test_above_the_calibration_sample_a_seeded_sample_is_scored(monkeypatch):
    import oddling.detectors.patch as patch

    monkeypatch.setattr(patch, "CALIBRATION_SAMPLE", 12)
    rng = np.random.default_rng(7)
    x = grids(rng, N)
    det = PatchKNNDetector(coreset=0.5).fit(x)
    rows = patch.calibration_rows(N, 0)
    assert len(det.calibration_scores_) == 12 and "a seeded sample of 12 of the 30 references" in det.calibration_method_
    folds = group_folds(distinct_groups(None, N), 5, 0)
    for score, i in zip(det.calibration_scores_, rows):     # still each by the fold model that never saw it
        assert score == pytest.approx(worst_location(x[i], fold_model(det, folds[i])), rel=1e-5)
