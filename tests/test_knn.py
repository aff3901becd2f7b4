"""faiss search agrees with a direct distance computation (SciPy's cdist, cosine metric)."""
import numpy as np
import pytest
from scipy.spatial.distance import cdist

from oddling.detectors.knn import leave_one_out_scores, mean_knn_distance
from oddling.index.exact import ExactCosineIndex, knn_numpy


def unit(rng, n, d):
    x = rng.standard_normal((n, d)).astype(np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def test_faiss_distances_equal_scipy_cdist():
    rng = np.random.default_rng(0)
    bank, queries = unit(rng, 500, 64), unit(rng, 120, 64)
    k = 7
    dist, idx = ExactCosineIndex(bank).search(queries, k)
    reference = np.sort(cdist(queries, bank, metric="cosine"), axis=1)[:, :k]  # SciPy reference
    np.testing.assert_allclose(dist, reference, atol=1e-5)
    # and the returned indices point at vectors at those distances
    np.testing.assert_allclose(cdist(queries, bank, metric="cosine")[np.arange(120)[:, None], idx], reference, atol=1e-5)


def test_numpy_reference_equals_scipy():
    rng = np.random.default_rng(1)
    bank, queries = unit(rng, 80, 16), unit(rng, 30, 16)
    dist, _ = knn_numpy(bank, queries, 5)
    np.testing.assert_allclose(dist, np.sort(cdist(queries, bank, "cosine"), axis=1)[:, :5], atol=1e-6)  # float32 inputs


def test_faiss_equals_numpy_in_many_chunks(monkeypatch):
    import oddling.index.base as index_base

    monkeypatch.setattr(index_base, "QUERY_CHUNK", 16)   # force several faiss calls
    rng = np.random.default_rng(2)
    bank, queries = unit(rng, 300, 32), unit(rng, 100, 32)
    fd, _ = ExactCosineIndex(bank).search(queries, 5)
    nd, _ = knn_numpy(bank, queries, 5)
    np.testing.assert_allclose(fd, nd, atol=1e-5)


def test_score_is_mean_of_k_distances():
    d = np.array([[0.1, 0.2, 0.3], [0.0, 0.0, 0.9]])
    np.testing.assert_allclose(mean_knn_distance(d), [0.2, 0.3])


def test_k_larger_than_bank_is_refused():
    rng = np.random.default_rng(3)
    with pytest.raises(ValueError, match="k must be"):
        ExactCosineIndex(unit(rng, 4, 8)).search(unit(rng, 1, 8), 5)


def test_leave_one_out_excludes_self_and_exact_copies():
    rng = np.random.default_rng(4)
    bank = unit(rng, 40, 16)
    bank = np.vstack([bank, bank[:1]])           # row 40 is a copy of row 0
    groups = np.array([f"h{i}" for i in range(40)] + ["h0"])
    loo = leave_one_out_scores(bank, groups, k=3)
    others = np.delete(bank, [0, 40], axis=0)
    expected = np.sort(cdist(bank[:1], others, "cosine"), axis=1)[0, :3].mean()  # SciPy reference
    assert loo[0] == pytest.approx(expected, abs=1e-5)
    assert loo[40] == pytest.approx(expected, abs=1e-5)
    assert loo.min() > 0.05   # no copy was counted as a neighbour at distance 0
