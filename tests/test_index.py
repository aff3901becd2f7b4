"""Nearest-neighbour indexes and the kNN detector at scale, against outside references.

References: the NumPy brute force `knn_numpy` and SciPy's `cdist` (exact neighbours), recall@k
as in ANN-Benchmarks (Aumüller, Bernhardsson & Faithfull 2020), the conformal guarantee (Vovk,
Gammerman & Shafer 2005; Bates et al., Annals of Statistics 2023), and a refit on the union as
the reference for `add`. Indexes: IVF (Jégou, Douze & Schmid 2011), HNSW (Malkov & Yashunin
2018), both in faiss (Johnson, Douze & Jégou 2019).
"""
import io
import json
import math

import faiss
import numpy as np
import pytest
from scipy.spatial.distance import cdist

import oddling.detectors.knn as knn_module
import oddling.index.base as index_base
from oddling.bank.store import Bank, load_bank, save_bank
from oddling.detectors.conformal import ConformalThreshold
from oddling.detectors.knn import KNNDetector, leave_one_out_scores
from oddling.errors import OddlingError
from oddling.index import (ExactCosineIndex, HNSWCosineIndex, IVFCosineIndex, choose_index, knn_numpy,
                           recall_at_k)
from oddling.index.selection import exact_truth

N_BANK, DIM, N_CLUSTERS, K = 20_000, 64, 50, 5


def unit(x):
    x = np.asarray(x, dtype=np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def clustered(seed, n, centers, spread=0.35):
    """Draws from a mixture of Gaussian clusters around `centers`, as unit vectors."""
    rng = np.random.default_rng(seed)
    labels = rng.integers(0, len(centers), n)
    return unit(centers[labels] + spread * rng.standard_normal((n, centers.shape[1])))


@pytest.fixture(scope="module")
def centers():
    return np.random.default_rng(0).standard_normal((N_CLUSTERS, DIM))


@pytest.fixture(scope="module")
def bank(centers):
    return clustered(1, N_BANK, centers)


@pytest.fixture(scope="module")
def fresh(centers):
    return clustered(2, 2000, centers)   # new normal queries from the same clusters


@pytest.fixture(scope="module")
def fitted(bank):
    """One kNN detector per approximate index over the clustered bank (module-scoped: built once)."""
    return {kind: KNNDetector(k=K, index=kind).fit(bank) for kind in ("ivf", "hnsw")}


def brute_force_rows(bank, queries, k, chunk=500):
    """Exact k nearest rows (as a set per query) from SciPy's cdist, a few hundred queries at a time."""
    return np.vstack([np.argpartition(cdist(queries[i:i + chunk], bank, "cosine"), k, axis=1)[:, :k]
                      for i in range(0, len(queries), chunk)])


def saved_state(detector):
    """state() plus the index as banks written before index files kept it: a uint8 array."""
    state, arrays = detector.state()
    return state, arrays | {"index": detector.index_.to_array()}


def bank_round_trip(state, arrays):
    """As a bank stores them: the dict through JSON, the arrays through an .npz file."""
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    buffer.seek(0)
    with np.load(buffer, allow_pickle=False) as loaded:
        return json.loads(json.dumps(state)), {key: loaded[key] for key in loaded.files}


# --- recall ------------------------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["ivf", "hnsw"])
def test_recall_at_the_chosen_parameters_reaches_the_target_in_the_state(kind, fitted, bank, fresh):
    det = fitted[kind]
    info = det.state()[0]["index"]
    assert info["kind"] == kind and info["k"] == K and info["target_recall"] == 0.95
    assert info["recall_lower_bound"] >= info["target_recall"]
    # Fresh queries, not the ones the parameters were tuned on; recall as the share of the
    # exact k nearest (SciPy brute force) that the index returned (row sets: no ties here).
    found = det.anomaly_score(fresh).neighbour_rows
    truth = brute_force_rows(bank, fresh, K)
    recall = np.mean([len(set(f) & set(t)) / K for f, t in zip(found.tolist(), truth.tolist())])
    print(f"\n[{kind}] {info}: recall@{K} on 2000 fresh queries {recall:.4f}")
    assert recall >= info["target_recall"]


def test_recall_by_distance_counts_ties_as_found():
    exact = np.array([[0.1, 0.2, 0.3]])
    assert recall_at_k(np.array([[0.1, 0.2, 0.3]]), exact)[0] == 1.0      # another copy at the same distance
    assert recall_at_k(np.array([[0.1, 0.2, 0.31]]), exact)[0] == pytest.approx(2 / 3)


def test_exact_truth_leaves_out_the_held_rows_and_equals_cdist(bank):
    queries, held = bank[:30], np.arange(30)
    truth = exact_truth(bank[:3000], queries, K, exclude=held)
    reference = np.sort(cdist(queries, bank[30:3000], "cosine"), axis=1)[:, :K]   # SciPy reference
    np.testing.assert_allclose(truth, reference, atol=1e-5)


def test_auto_is_exact_below_the_measured_size(bank):
    assert choose_index(bank, K).kind == "exact"
    assert KNNDetector().fit(bank[:500]).state()[0]["index"] == {"kind": "exact"}


# --- the exact path ----------------------------------------------------------------------------

def test_exact_index_equals_the_numpy_reference(bank, fresh):
    dist, rows = ExactCosineIndex(bank).search(fresh[:300], K)
    ref_dist, ref_rows = knn_numpy(bank, fresh[:300], K)
    np.testing.assert_allclose(dist, ref_dist, atol=1e-5)
    np.testing.assert_array_equal(rows, ref_rows)


def test_exact_index_gives_faiss_index_flat_ip_results_bit_for_bit(bank, fresh):
    # The exact index runs faiss.knn on the vectors in place; IndexFlatIP (what oddling used
    # before) runs the same brute force on its own copy.
    flat = faiss.IndexFlatIP(DIM)
    flat.add(bank)
    sims, rows = flat.search(fresh, K)
    dist, ours = ExactCosineIndex(bank).search(fresh, K)
    np.testing.assert_array_equal(ours, rows)
    np.testing.assert_array_equal(dist, np.clip(1.0 - sims, 0.0, 2.0))


def test_default_detector_scores_are_mean_numpy_distances_and_loo_is_unchanged(bank, fresh):
    refs = bank[:3000]
    det = KNNDetector(k=K).fit(refs)
    np.testing.assert_allclose(det.anomaly_score(fresh).scores, knn_numpy(refs, fresh, K)[0].mean(axis=1), atol=1e-6)
    np.testing.assert_array_equal(det.calibration_scores_, leave_one_out_scores(refs, np.arange(3000).astype(str), K))
    assert det.calibration_method_ == knn_module.LEAVE_ONE_OUT and det.calibration_rows_ is None


# --- save / load ---------------------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["exact", "ivf", "hnsw"])
def test_index_round_trip_gives_identical_search_results(kind, fitted, bank, fresh):
    index = ExactCosineIndex(bank) if kind == "exact" else fitted[kind].index_
    restored = type(index).from_array(index.to_array(), index.describe())
    assert restored.describe() == index.describe()
    for got, expected in zip(restored.search(fresh, K), index.search(fresh, K)):
        np.testing.assert_array_equal(got, expected)


def bank_of(detector, features):
    n = len(features)
    return Bank(
        representation={"kind": "embedding", "id": "synthetic", "preprocessing": {}, "dim": features.shape[1]},
        detector=detector, references=[{"path": f"r{i}.png", "sha256": f"{i:064x}"} for i in range(n)],
        features=features, calibration_scores=detector.calibration_scores_,
        calibration={"method": detector.describe_calibration(), "n": len(detector.calibration_scores_),
                     "target_fpr": 0.01, "cutoff": ConformalThreshold(detector.calibration_scores_, 0.01).cutoff},
        reference_root="/refs", tool_version="0", created="2026-01-01T00:00:00+00:00",
        health_stats=np.zeros((n, 7)))


@pytest.mark.parametrize("kind", ["ivf", "hnsw"])
def test_approximate_index_is_saved_in_the_bank_and_restored(kind, fitted, bank, fresh, tmp_path):
    det = fitted[kind]
    save_bank(bank_of(det, bank), tmp_path / "b")
    saved = tmp_path / "b" / "detector.index.faiss"
    # written by faiss's own writer: the bytes faiss.write_index gives (serialize_index is the same writer)
    assert saved.read_bytes() == faiss.serialize_index(det.index_._index).tobytes()
    assert not list((tmp_path / "b").glob("detector.*.npy"))
    before = det.anomaly_score(fresh)
    for memory_map in (True, False):
        loaded = load_bank(tmp_path / "b", memory_map=memory_map).detector
        assert loaded.index_.kind == kind and loaded.index_.describe() == det.index_.describe()
        assert (loaded.index_.mapped_from == saved) is memory_map    # faiss 1.15 maps both kinds
        after = loaded.anomaly_score(fresh)
        np.testing.assert_array_equal(after.scores, before.scores)
        np.testing.assert_array_equal(after.neighbour_rows, before.neighbour_rows)
        assert "HNSW" in loaded.describe_score() or "IVF" in loaded.describe_score()


def write_as_before_index_files(bank, folder):
    """A format-2 bank as oddling wrote it before index files: the index a uint8 array in
    detector.index.npy (faiss.serialize_index), bank.json without vector_dtype."""
    save_bank(bank, folder)
    index = folder / "detector.index.faiss"
    np.save(folder / "detector.index.npy", faiss.serialize_index(faiss.read_index(str(index))))
    index.unlink()
    meta = json.loads((folder / "bank.json").read_text())
    del meta["vector_dtype"]
    (folder / "bank.json").write_text(json.dumps(meta, indent=2))


@pytest.mark.parametrize("kind", ["ivf", "hnsw"])
def test_bank_with_the_index_as_an_array_still_loads(kind, fitted, bank, fresh, tmp_path):
    det = fitted[kind]
    write_as_before_index_files(bank_of(det, bank), tmp_path / "old")
    loaded = load_bank(tmp_path / "old")
    assert loaded.vector_dtype == "float32" and loaded.detector.index_.mapped_from is None
    before, after = det.anomaly_score(fresh), loaded.detector.anomaly_score(fresh)
    np.testing.assert_array_equal(after.scores, before.scores)
    np.testing.assert_array_equal(after.neighbour_rows, before.neighbour_rows)
    # saved again, it gets an index file
    save_bank(loaded, tmp_path / "new")
    assert (tmp_path / "new" / "detector.index.faiss").is_file()
    np.testing.assert_array_equal(load_bank(tmp_path / "new").detector.anomaly_score(fresh).scores, before.scores)


@pytest.mark.parametrize("kind", ["ivf", "hnsw"])
def test_adding_to_a_mapped_index_reads_it_into_memory_and_leaves_the_file(kind, fitted, bank, fresh, tmp_path):
    # faiss refuses (IVF) or aborts the process (a mapped flat storage) on adding to a mapped index
    det = fitted[kind]
    save_bank(bank_of(det, bank), tmp_path / "b")
    saved = (tmp_path / "b" / "detector.index.faiss").read_bytes()
    mapped = load_bank(tmp_path / "b").detector.index_
    in_memory = load_bank(tmp_path / "b", memory_map=False).detector.index_
    mapped.add(fresh[:100])
    in_memory.add(fresh[:100])
    assert mapped.mapped_from is None and mapped.size == len(bank) + 100
    for got, expected in zip(mapped.search(fresh, K), in_memory.search(fresh, K)):
        np.testing.assert_array_equal(got, expected)
    assert (tmp_path / "b" / "detector.index.faiss").read_bytes() == saved


def test_float16_vectors_are_searched_in_blocks_like_numpy(bank, fresh, monkeypatch):
    import oddling.index.exact as exact_module

    monkeypatch.setattr(exact_module, "REFERENCE_BLOCK", 777)    # many blocks, a short last one
    half = bank[:5000].astype(np.float16)
    dist, rows = ExactCosineIndex(half).search(fresh, K)
    ref_dist, ref_rows = knn_numpy(half.astype(np.float32), fresh, K)
    np.testing.assert_allclose(dist, ref_dist, atol=1e-6)
    np.testing.assert_array_equal(rows, ref_rows)


def test_exact_bank_stores_no_index_array(bank, tmp_path):
    det = KNNDetector(k=K).fit(bank[:400])
    save_bank(bank_of(det, bank[:400]), tmp_path / "b")
    assert not list((tmp_path / "b").glob("detector.*.npy"))


@pytest.mark.parametrize("corrupt, message", [
    (lambda s, a: a.update(index=a["index"][: len(a["index"]) // 2]), "damaged"),
    (lambda s, a: a.update(index=np.zeros(10, np.float32)), "uint8"),
    (lambda s, a: a.pop("index"), "missing"),
    (lambda s, a: a.update(references=a["references"][:-1]), "holds"),
    (lambda s, a: s["index"].update(kind="annoy"), "unknown index kind"),
])
def test_damaged_index_state_is_refused(corrupt, message, fitted, bank):
    state, arrays = bank_round_trip(*saved_state(fitted["hnsw"]))
    arrays["references"] = bank
    corrupt(state, arrays)
    with pytest.raises(OddlingError, match=message):
        KNNDetector(k=K).load_state(state, arrays)


def test_index_parameter_must_match_the_saved_index(fitted, bank):
    state, arrays = bank_round_trip(*fitted["ivf"].state())
    with pytest.raises(OddlingError, match="saved index is 'ivf'"):
        KNNDetector(k=K, index="hnsw").load_state(state, arrays | {"references": bank})


def test_unknown_index_kind_and_too_small_approximate_banks_are_refused(bank):
    with pytest.raises(OddlingError, match="index must be one of"):
        KNNDetector(index="fast").fit(bank[:50])
    with pytest.raises(OddlingError, match="needs at least 500 references"):
        KNNDetector(index="hnsw").fit(bank[:100])


# --- chunked search ------------------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["exact", "ivf", "hnsw"])
def test_search_in_many_chunks_equals_one_call(kind, fitted, bank, fresh, monkeypatch):
    index = ExactCosineIndex(bank) if kind == "exact" else fitted[kind].index_
    whole = index.search(fresh[:500], K)
    monkeypatch.setattr(index_base, "QUERY_CHUNK", 37)
    for got, expected in zip(index.search(fresh[:500], K), whole):
        np.testing.assert_array_equal(got, expected)


def test_ivf_search_widens_where_the_probed_cells_hold_fewer_than_k(bank):
    # 64 cells of ~30 vectors and k=100: one probed cell cannot hold k, so every query is
    # searched again wider; the answer is still k real neighbours, nearest first.
    index = IVFCosineIndex.build(bank[:2000], np.arange(2000), nlist=64)
    index.set_search(1)
    dist, rows = index.search(bank[2000:2100], 100)
    assert (rows >= 0).all() and (np.diff(dist, axis=1) >= 0).all()
    assert all(len(set(r)) == 100 for r in rows.tolist())


def test_hnsw_rows_are_bank_rows_whatever_the_insertion_order(bank):
    order = np.random.default_rng(3).permutation(1000)
    index = HNSWCosineIndex.build(bank[:1000], order)
    index.set_search(200)
    _, rows = index.search(bank[:20], 1)
    np.testing.assert_array_equal(rows[:, 0], np.arange(20))    # each vector finds itself at its row


# --- calibration on a sample ---------------------------------------------------------------------

def test_calibration_above_the_sample_size_scores_a_seeded_sample_leave_one_out():
    rng = np.random.default_rng(4)
    refs = unit(rng.standard_normal((knn_module.CALIBRATION_SAMPLE + 500, 8)))
    refs[7] = refs[3]                                            # one file twice
    groups = np.arange(len(refs)).astype(str)
    groups[7] = groups[3]
    det = KNNDetector(k=K).fit(refs, groups)
    rows = det.calibration_rows_
    assert len(rows) == len(det.calibration_scores_) == knn_module.CALIBRATION_SAMPLE
    assert (np.diff(rows) > 0).all() and "sample of 20000 of the 20500" in det.calibration_method_
    np.testing.assert_array_equal(rows, KNNDetector(k=K).fit(refs, groups).calibration_rows_)   # seeded
    check = rows[:40]
    dist = cdist(refs[check], refs, "cosine")                     # SciPy reference, own group left out
    for i, row in enumerate(check):
        dist[i, groups == groups[row]] = np.inf
    np.testing.assert_allclose(det.calibration_scores_[:40], np.sort(dist, axis=1)[:, :K].mean(axis=1), atol=1e-6)


@pytest.mark.parametrize("kind", ["exact", "ivf", "hnsw"])
def test_false_alarm_rate_with_calibration_on_a_sample(kind, monkeypatch):
    # Guarantee: E[false-alarm rate] <= rate for a new image exchangeable with the references
    # (Vovk et al. 2005). Here leave-one-out covers a seeded sample of 300 of 1000 references
    # (CALIBRATION_SAMPLE lowered so the test stays small; the code path is the one above
    # 20,000). References and fresh draws: directions of N(0, I) in 8 dimensions. Spread of the
    # mean over seeds as in tests/test_calibrate.py: binomial a(1-a)/N of the fresh draws plus the
    # slack of one calibration set, Beta(k, n+1-k), variance ~ a(1-a)/(n+2) (Bates et al. 2023,
    # Sec. 3); 3 standard errors.
    monkeypatch.setattr(knn_module, "CALIBRATION_SAMPLE", 300)
    rate, n_ref, n_cal, n_fresh, d, seeds = 0.1, 1000, 300, 2000, 8, range(20)
    shares = []
    for seed in seeds:
        rng = np.random.default_rng(700 + seed)
        det = KNNDetector(k=K, index=kind).fit(unit(rng.standard_normal((n_ref, d))))
        assert len(det.calibration_scores_) == n_cal
        threshold = ConformalThreshold(det.calibration_scores_, rate)
        shares.append(threshold.flag(det.anomaly_score(unit(rng.standard_normal((n_fresh, d)))).scores).mean())
    se = math.sqrt((rate * (1 - rate) / n_fresh + rate * (1 - rate) / (n_cal + 2)) / len(seeds))
    print(f"\n[knn {kind}, sample calibration] target {rate}: observed {np.mean(shares):.4f} (+3 se = {3 * se:.4f})")
    assert np.mean(shares) <= rate + 3 * se
    assert np.mean(shares) >= rate - 1 / (n_cal + 1) - 3 * se    # and not needlessly strict


# --- add -----------------------------------------------------------------------------------------

def with_copies(rng, n, d, start=0):
    """n unit vectors with their content hashes; the last row is a copy of the first."""
    x = unit(rng.standard_normal((n, d)))
    x[-1] = x[0]
    groups = np.array([f"h{start + i}" for i in range(n)])
    groups[-1] = groups[0]
    return x, groups


def test_add_gives_the_scores_of_a_refit_on_the_union():
    rng = np.random.default_rng(5)
    old, old_groups = with_copies(rng, 400, 16)
    new, new_groups = with_copies(rng, 60, 16, start=400)
    new[5], new_groups[5] = old[9], old_groups[9]               # a new copy of a file already in the bank
    queries = unit(rng.standard_normal((100, 16)))
    det = KNNDetector(k=K).fit(old, old_groups)
    summary = det.add(new, new_groups)
    refit = KNNDetector(k=K).fit(np.vstack([old, new]), np.concatenate([old_groups, new_groups]))
    assert summary["added"] == 60 and summary["n_references"] == 460 and summary["calibration"] == "recomputed"
    np.testing.assert_allclose(det.calibration_scores_, refit.calibration_scores_, rtol=0, atol=1e-9)
    got, expected = det.anomaly_score(queries), refit.anomaly_score(queries)
    np.testing.assert_allclose(got.scores, expected.scores, rtol=0, atol=1e-9)
    np.testing.assert_array_equal(got.neighbour_rows, expected.neighbour_rows)
    assert det.calibration_method_ == refit.calibration_method_


def test_add_past_the_sample_size_draws_the_sample_a_refit_draws(monkeypatch):
    monkeypatch.setattr(knn_module, "CALIBRATION_SAMPLE", 300)
    rng = np.random.default_rng(6)
    old, old_groups = with_copies(rng, 280, 16)
    new, new_groups = with_copies(rng, 70, 16, start=280)
    det = KNNDetector(k=K).fit(old, old_groups)
    assert det.add(new, new_groups)["calibration"] == "resampled"
    refit = KNNDetector(k=K).fit(np.vstack([old, new]), np.concatenate([old_groups, new_groups]))
    np.testing.assert_array_equal(det.calibration_rows_, refit.calibration_rows_)
    np.testing.assert_allclose(det.calibration_scores_, refit.calibration_scores_, rtol=0, atol=1e-9)


def loo_reference(refs, groups, rows, k):
    """Leave-one-out scores of `rows` against all others, own group out: SciPy's cdist."""
    dist = cdist(refs[rows], refs, "cosine")
    dist[groups[rows][:, None] == groups[None, :]] = np.inf
    return np.sort(dist, axis=1)[:, :k].mean(axis=1)


@pytest.mark.parametrize("kind", ["exact", "hnsw"])
def test_add_to_a_sampled_calibration_updates_it_incrementally(kind, monkeypatch, tmp_path):
    monkeypatch.setattr(knn_module, "CALIBRATION_SAMPLE", 300)
    rng = np.random.default_rng(7)
    old, old_groups = with_copies(rng, 1000, 8)
    new, new_groups = with_copies(rng, 400, 8, start=1000)
    new[3], new_groups[3] = old[11], old_groups[11]
    det = KNNDetector(k=K, index=kind).fit(old, old_groups)
    # through a bank: the sample's rows and neighbour distances are detector arrays
    save_bank(bank_of(det, old), tmp_path / "b")
    loaded = load_bank(tmp_path / "b").detector
    np.testing.assert_array_equal(loaded.calibration_scores_, det.calibration_scores_)
    with pytest.raises(OddlingError, match="reference_groups"):
        loaded.add(new, new_groups)
    summary = loaded.add(new, new_groups, reference_groups=old_groups)
    assert summary["calibration"] == "incremental" and summary["n_references"] == 1400
    rows = loaded.calibration_rows_
    assert len(rows) == 300 and (np.diff(rows) > 0).all() and summary["calibration_joined"] == (rows >= 1000).sum()
    # reservoir sampling: each of the 1400 is in the sample with probability 300/1400; 400 new -> ~86
    assert 50 <= summary["calibration_joined"] <= 125 and summary["calibration_changed"] > 0
    refs, groups = np.vstack([old, new]), np.concatenate([old_groups, new_groups])
    expected = loo_reference(refs, groups, rows, K)
    if kind == "exact":
        np.testing.assert_allclose(loaded.calibration_scores_, expected, atol=1e-6)
    else:   # approximate neighbours are never nearer than the exact ones, and rarely farther
        assert (loaded.calibration_scores_ >= expected - 1e-6).all()
        assert np.mean(np.abs(loaded.calibration_scores_ - expected) < 1e-6) > 0.9
    # the index grew: each new reference is its own nearest neighbour
    np.testing.assert_array_equal(loaded.anomaly_score(new[10:20]).neighbour_rows[:, 0], np.arange(1010, 1020))


def test_add_refuses_features_of_another_size():
    rng = np.random.default_rng(8)
    det = KNNDetector(k=2).fit(unit(rng.standard_normal((20, 4))))
    with pytest.raises(OddlingError, match="dimensions"):
        det.add(unit(rng.standard_normal((3, 5))))
    with pytest.raises(OddlingError, match="fitted"):
        KNNDetector().add(unit(rng.standard_normal((3, 4))))


def test_fit_command_passes_index_to_the_knn_detector_only():
    from click.testing import CliRunner

    from oddling.cli.analysis import _detector_params, fit

    assert _detector_params("knn", None, None, (), "hnsw") == {"index": "hnsw"}
    with pytest.raises(OddlingError, match="--index applies to the knn detector"):
        _detector_params("patch-knn", None, None, (), "ivf")
    assert "--index [auto|exact|ivf|hnsw]" in CliRunner().invoke(fit, ["--help"]).output


@pytest.mark.parametrize("kind", ["ivf", "hnsw"])
def test_same_bank_and_seed_give_the_same_index(kind, bank):
    # oddling's determinism promise: the saved index is byte-identical across fits
    first, second = (saved_state(KNNDetector(k=K, index=kind).fit(bank[:3000])) for _ in range(2))
    assert first[0] == second[0]
    np.testing.assert_array_equal(first[1]["index"], second[1]["index"])
