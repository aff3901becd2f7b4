"""Bounded memory for large banks: memory-mapped loading, float16 vectors, streamed scoring,
incremental `bank add`.

References: NumPy brute force (`oddling.index.knn_numpy`, a full distance matrix and a stable
sort) and scikit-learn's NearestNeighbors(metric="cosine", algorithm="brute") for the kNN
scores; a refit on the union (`KNNDetector.fit`) for `bank add`; NumPy's own np.memmap for
what a mapped array is. Features: scikit-learn's bundled digits (tests/conftest.py), as 16 x 16
grey thumbnails (`pixels:16`, no network).
"""
import json
import shutil

import numpy as np
import pytest

import oddling
import oddling.bank.store as store
import oddling.bank.vectors as vectors
import oddling.jobs.scoring as scoring
from oddling.bank.store import load_bank, save_bank
from oddling.detectors.knn import KNNDetector
from oddling.errors import OddlingError
from oddling.index import knn_numpy

PIXELS = "pixels:16"
K = 5
QUIET = oddling.RunOptions(progress=False)


@pytest.fixture(scope="module")
def banks(digits_folders, tmp_path_factory):
    """The digits bank stored float32 and float16, and the held-out images' float32 features."""
    root = tmp_path_factory.mktemp("memory")
    full = oddling.fit(digits_folders["reference"], root / "f32.bank", representation=PIXELS, k=K, options=QUIET)
    half = oddling.fit(digits_folders["reference"], root / "f16.bank", representation=PIXELS, k=K,
                       vector_dtype="float16", options=QUIET)
    queries = oddling.fit(digits_folders["incoming"], None, representation=PIXELS, k=K, options=QUIET).features
    return {"root": root, "full": full, "half": half, "queries": np.asarray(queries, dtype=np.float32)}


# --- memory-mapped loading -------------------------------------------------------------------------

def test_loaded_features_are_a_read_only_map_shared_with_the_exact_index(banks):
    bank = load_bank(banks["root"] / "f32.bank")
    assert isinstance(bank.features, np.memmap) and not bank.features.flags.writeable
    # no second copy: the detector and its exact index search the map itself
    assert np.shares_memory(bank.detector.references_, bank.features)
    assert np.shares_memory(bank.detector.index_.vectors, bank.features)
    in_memory = load_bank(banks["root"] / "f32.bank", memory_map=False)
    assert not isinstance(in_memory.features, np.memmap)
    np.testing.assert_array_equal(in_memory.features, bank.features)


@pytest.mark.parametrize("row, value, message", [(-1, np.nan, "NaN"), (-2, 3.0, "unit-length")])
def test_features_are_checked_block_by_block_to_the_last_row(banks, tmp_path, monkeypatch, row, value, message):
    monkeypatch.setattr(store, "CHECK_ROWS", 7)        # many blocks; the damage sits in the last
    folder = tmp_path / "b"
    shutil.copytree(banks["root"] / "f32.bank", folder)
    features = np.load(folder / "features.npy")
    features[row, 0] = value
    np.save(folder / "features.npy", features)
    with pytest.raises(OddlingError, match=message):
        load_bank(folder)


def test_a_bank_json_without_vector_dtype_loads_as_float32(banks, tmp_path):
    # banks written before vector_dtype existed (format 2 all the same)
    folder = tmp_path / "b"
    shutil.copytree(banks["root"] / "f32.bank", folder)
    meta = json.loads((folder / "bank.json").read_text())
    del meta["vector_dtype"]
    (folder / "bank.json").write_text(json.dumps(meta))
    bank = load_bank(folder)
    assert bank.vector_dtype == "float32" and bank.features.dtype == np.float32
    np.testing.assert_array_equal(bank.calibration_scores, banks["full"].calibration_scores)


def test_vector_dtype_that_disagrees_with_the_file_is_refused(banks, tmp_path):
    folder = tmp_path / "b"
    shutil.copytree(banks["root"] / "f16.bank", folder)
    meta = json.loads((folder / "bank.json").read_text())
    meta["vector_dtype"] = "float32"
    (folder / "bank.json").write_text(json.dumps(meta))
    with pytest.raises(OddlingError, match="vector_dtype"):
        load_bank(folder)


# --- float16 -----------------------------------------------------------------------------------

def test_float16_bank_stores_half_the_bytes_and_records_its_check(banks):
    full, half = (banks["root"] / name / "features.npy" for name in ("f32.bank", "f16.bank"))
    assert np.load(half, mmap_mode="r").dtype == np.float16
    assert half.stat().st_size < 0.55 * full.stat().st_size
    info = oddling.bank_info(banks["root"] / "f16.bank")
    assert info["vector_dtype"] == "float16"
    check = info["vector_check"]
    assert check["n_checked"] == banks["full"].size and 0 <= check["max_score_difference"] <= 1e-3
    assert oddling.bank_info(banks["root"] / "f32.bank")["vector_dtype"] == "float32"


def test_float16_scores_are_within_1e3_of_float32_brute_force(banks):
    half = load_bank(banks["root"] / "f16.bank")
    queries, refs = banks["queries"], np.asarray(banks["full"].features, dtype=np.float32)
    scored = scoring.score_features(half, queries)[0]
    numpy_scores = knn_numpy(refs, queries, K)[0].mean(axis=1)
    np.testing.assert_allclose(scored.scores, numpy_scores, atol=1e-3)
    from sklearn.neighbors import NearestNeighbors

    distances, _ = NearestNeighbors(n_neighbors=K, metric="cosine", algorithm="brute").fit(refs).kneighbors(queries)
    np.testing.assert_allclose(scored.scores, distances.mean(axis=1), atol=1e-3)
    # the calibration too (leave-one-out of every reference, from the vectors each bank stores)
    np.testing.assert_allclose(half.calibration_scores, banks["full"].calibration_scores, atol=1e-3)


def test_float16_is_refused_when_it_moves_scores_too_far_and_nothing_is_written(digits_folders, tmp_path,
                                                                                monkeypatch):
    monkeypatch.setattr(vectors, "TOLERANCE", 1e-9)
    with pytest.raises(OddlingError, match="float16 storage changes the kNN scores"):
        oddling.fit(digits_folders["reference"], tmp_path / "b", representation=PIXELS, vector_dtype="float16",
                    options=QUIET)
    assert not (tmp_path / "b").exists()


def test_float16_only_for_the_knn_detector(digits_folders, tmp_path):
    with pytest.raises(OddlingError, match="applies to the knn detector"):
        oddling.fit(digits_folders["reference"], tmp_path / "b", representation=PIXELS, detector="gaussian",
                    vector_dtype="float16", options=QUIET)


# --- streamed scoring ----------------------------------------------------------------------------

def test_scores_in_chunks_equal_scores_at_once_with_a_progress_bar(banks, monkeypatch, capsys):
    bank = load_bank(banks["root"] / "f32.bank")
    queries = banks["queries"]
    at_once = scoring.score_features(bank, queries)
    monkeypatch.setattr(scoring, "SCORE_CHUNK", 7)
    chunked = scoring.score_features(bank, queries, progress=True)
    assert "scoring against the bank" in capsys.readouterr().err
    for got, expected in zip(chunked[:3], at_once[:3]):
        got = got.scores if hasattr(got, "scores") else got
        expected = expected.scores if hasattr(expected, "scores") else expected
        np.testing.assert_array_equal(got, expected)
    np.testing.assert_array_equal(chunked[0].neighbour_rows, at_once[0].neighbour_rows)
    ref_distances, ref_rows = knn_numpy(np.asarray(bank.features), queries, K)
    np.testing.assert_allclose(chunked[0].scores, ref_distances.mean(axis=1), atol=1e-6)
    scoring.score_features(bank, queries, progress=False)
    assert "scoring against the bank" not in capsys.readouterr().err


# --- incremental bank add ------------------------------------------------------------------------

@pytest.mark.parametrize("name", ["f32.bank", "f16.bank"])
def test_bank_add_is_incremental_and_equals_a_refit_on_the_union(banks, digits_folders, tmp_path, name):
    path = tmp_path / name
    shutil.copytree(banks["root"] / name, path)
    original = load_bank(path, memory_map=False)
    extra = tmp_path / "extra"
    extra.mkdir()
    for p in sorted(digits_folders["incoming"].glob("*.png"))[:6]:
        shutil.copy(p, extra / f"new_{p.name}")
    result = oddling.bank_add(path, extra, options=QUIET)
    assert result["added"] == 6 and result["calibration"] == "recomputed"
    grown = load_bank(path)
    assert grown.vector_dtype == original.vector_dtype and grown.size == original.size + 6
    union = np.asarray(grown.features, dtype=np.float32)
    np.testing.assert_array_equal(union[:original.size], np.asarray(original.features, dtype=np.float32))
    refit = KNNDetector(k=K).fit(union, np.array([r["sha256"] for r in grown.references]))
    np.testing.assert_allclose(grown.calibration_scores, refit.calibration_scores_, atol=1e-6)
    assert grown.calibration["cutoff"] == pytest.approx(
        oddling.detectors.conformal.ConformalThreshold(refit.calibration_scores_, grown.target_fpr).cutoff, abs=1e-6)
    assert grown.calibration["method"] == refit.describe_calibration()
    undone = oddling.bank_undo(path)
    assert undone["n_references"] == original.size
    back = load_bank(path)
    np.testing.assert_array_equal(back.calibration_scores, original.calibration_scores)
    np.testing.assert_array_equal(back.features, original.features)


def test_other_detectors_are_refitted_by_bank_add(digits_folders, tmp_path):
    path = tmp_path / "g.bank"
    oddling.fit(digits_folders["reference"], path, representation=PIXELS, detector="gaussian", options=QUIET)
    extra = tmp_path / "extra"
    extra.mkdir()
    for p in sorted(digits_folders["incoming"].glob("*.png"))[:3]:
        shutil.copy(p, extra / f"new_{p.name}")
    assert oddling.bank_add(path, extra, options=QUIET)["calibration"] == "refitted"


def test_saving_a_loaded_bank_again_copies_its_mapped_arrays(banks, tmp_path):
    bank = load_bank(banks["root"] / "f16.bank")
    save_bank(bank, tmp_path / "copy")
    again = load_bank(tmp_path / "copy")
    assert again.features.dtype == np.float16
    np.testing.assert_array_equal(again.features, bank.features)
    np.testing.assert_array_equal(again.calibration_scores, bank.calibration_scores)
