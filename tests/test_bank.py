"""The bank folder: round trip, atomic write, refusal of incompatible or foreign folders."""
import json

import numpy as np
import pytest

from oddling.data.health import STATS

from oddling.bank.store import METADATA_FILE, Bank, check_compatible, load_bank, save_bank
from oddling.detectors.knn import KNNDetector
from oddling.errors import OddlingError


REPRESENTATION = {"kind": "embedding", "id": "efficientnet-lite0", "backbone": "efficientnet-lite0",
                  "preprocessing": {"crop": 224}, "dim": 4,
                  "backbone_fingerprint": {"id": "efficientnet-lite0", "weights_sha256": "ab" * 32,
                                           "preprocessing": {"crop": 224}, "embedding_dim": 4}}


def small_bank() -> Bank:
    rng = np.random.default_rng(0)
    emb = rng.standard_normal((6, 4)).astype(np.float32)
    emb /= np.linalg.norm(emb, axis=1, keepdims=True)
    detector = KNNDetector(k=2).fit(emb, np.array([f"{i:064d}" for i in range(6)]))
    return Bank(
        representation=REPRESENTATION, detector=detector,
        references=[{"path": f"r{i}.png", "sha256": f"{i:064d}"} for i in range(6)],
        features=emb, calibration_scores=detector.calibration_scores_,
        calibration={"method": "leave-one-out", "n": 6, "target_fpr": 0.01, "cutoff": None},
        reference_root="/refs", tool_version="0.1.0", created="2026-01-01T00:00:00+00:00",
        health_stats=np.zeros((6, len(STATS))),
    )


def test_round_trip_keeps_every_field(tmp_path):
    bank = small_bank()
    save_bank(bank, tmp_path / "b")
    loaded = load_bank(tmp_path / "b")
    np.testing.assert_array_equal(loaded.features, bank.features)
    np.testing.assert_array_equal(loaded.calibration_scores, bank.calibration_scores)
    assert loaded.metadata() == bank.metadata()


def test_metadata_is_plain_json_with_format_version(tmp_path):
    save_bank(small_bank(), tmp_path / "b")
    meta = json.loads((tmp_path / "b" / METADATA_FILE).read_text())
    assert meta["format"] == "oddling-bank" and meta["format_version"] == 2
    assert meta["references"][0] == {"path": "r0.png", "sha256": "0" * 64}


def test_existing_bank_not_replaced_without_force(tmp_path):
    save_bank(small_bank(), tmp_path / "b")
    with pytest.raises(OddlingError, match="already exists"):
        save_bank(small_bank(), tmp_path / "b")
    save_bank(small_bank(), tmp_path / "b", force=True)
    # no temporary folders or lock file left behind; the replaced bank is kept for `bank undo`
    assert sorted(p.name for p in tmp_path.iterdir()) == [".b.previous", "b"]


def test_force_never_replaces_a_folder_that_is_not_a_bank(tmp_path):
    (tmp_path / "photos").mkdir()
    (tmp_path / "photos" / "holiday.jpg").write_bytes(b"x")
    with pytest.raises(OddlingError, match="not an oddling bank"):
        save_bank(small_bank(), tmp_path / "photos", force=True)


def test_crash_while_writing_leaves_no_bank(tmp_path, monkeypatch):
    import oddling.bank.store as bank_module

    def boom(*args, **kwargs):
        raise RuntimeError("disk full")

    monkeypatch.setattr(bank_module.json, "dump", boom)
    with pytest.raises(RuntimeError):
        save_bank(small_bank(), tmp_path / "b")
    assert list(tmp_path.iterdir()) == []


def test_other_format_version_refused(tmp_path):
    save_bank(small_bank(), tmp_path / "b")
    meta_path = tmp_path / "b" / METADATA_FILE
    meta = json.loads(meta_path.read_text())
    meta["format_version"] = 99
    meta_path.write_text(json.dumps(meta))
    with pytest.raises(OddlingError, match="format version 99"):
        load_bank(tmp_path / "b")


def test_arrays_never_unpickled(tmp_path):
    save_bank(small_bank(), tmp_path / "b")
    np.save(tmp_path / "b" / "features.npy", np.array([{"evil": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(OddlingError, match="damaged"):
        load_bank(tmp_path / "b")


def test_incompatible_backbone_message_names_the_difference():
    bank = small_bank()
    other = dict(bank.representation, backbone_fingerprint=dict(bank.backbone, weights_sha256="cd" * 32))
    with pytest.raises(OddlingError, match="weights SHA-256"):
        check_compatible(bank, other)
    check_compatible(bank, dict(bank.representation))   # identical: accepted


def write_v1_bank(folder, emb, k=2):
    """A bank as the first release wrote it (format version 1, mode global), written by hand."""
    folder.mkdir()
    n, dim = emb.shape
    np.save(folder / "embeddings.npy", emb)
    np.save(folder / "calibration_scores.npy", np.linspace(0.1, 0.6, n))
    np.save(folder / "health_stats.npy", np.zeros((n, len(STATS))))
    meta = {"format": "oddling-bank", "format_version": 1, "tool_version": "0.1.0",
            "created": "2026-01-01T00:00:00+00:00",
            "backbone": {"id": "efficientnet-lite0", "weights_sha256": "ab" * 32, "preprocessing": {"crop": 224},
                         "embedding_dim": dim},
            "mode": "global", "k": k, "calibration": {"method": "leave-one-out", "n": n, "target_fpr": 0.01,
                                                       "cutoff": None},
            "health_fences": {}, "reference_root": "/refs", "n_references": n,
            "references": [{"path": f"r{i}.png", "sha256": f"{i:064d}"} for i in range(n)], "skipped": []}
    (folder / METADATA_FILE).write_text(json.dumps(meta))


def test_version_1_bank_loads_as_a_knn_detector(tmp_path):
    bank = small_bank()
    write_v1_bank(tmp_path / "old", bank.features)
    old = load_bank(tmp_path / "old")
    assert old.format_version == 1 and old.detector.name == "knn" and old.detector.k == 2
    assert old.representation["id"] == "efficientnet-lite0"
    np.testing.assert_array_equal(old.detector.anomaly_score(bank.features).scores,
                                  bank.detector.anomaly_score(bank.features).scores)
    check_compatible(old, bank.representation)   # same backbone: a new run may score against it


@pytest.mark.parametrize("change, field", [
    (lambda m: m.pop("references"), "references"),
    (lambda m: m.update(n_references=7), "n_references"),
    (lambda m: m["calibration"].update(cutoff="high"), "cutoff"),
    (lambda m: m["calibration"].update(target_fpr=5), "target_fpr"),
    (lambda m: m["detector"]["params"].update(k="five"), "k must be"),
    (lambda m: m["detector"].update(name="magic"), "unknown detector"),
    (lambda m: m["representation"].pop("dim"), "dim"),
])
def test_tampered_metadata_names_the_field(tmp_path, change, field):
    save_bank(small_bank(), tmp_path / "b")
    meta_path = tmp_path / "b" / METADATA_FILE
    meta = json.loads(meta_path.read_text())
    change(meta)
    meta_path.write_text(json.dumps(meta))
    with pytest.raises(OddlingError, match=field):
        load_bank(tmp_path / "b")


def test_tampered_features_refused(tmp_path):
    bank = small_bank()
    save_bank(bank, tmp_path / "b")
    np.save(tmp_path / "b" / "features.npy", bank.features * 1000)
    with pytest.raises(OddlingError, match="unit-length"):
        load_bank(tmp_path / "b")
    np.save(tmp_path / "b" / "features.npy", np.full_like(bank.features, np.nan))
    with pytest.raises(OddlingError, match="NaN"):
        load_bank(tmp_path / "b")


# Found by tests/hostile_campaign.py: each was accepted (or raised a traceback later, in bank add
# or audit) before load_bank checked it.
@pytest.mark.parametrize("tamper, message", [
    (lambda b: np.save(b / "calibration_scores.npy", np.zeros(0)), "calibration.n"),
    (lambda b: np.save(b / "health_stats.npy", np.zeros((6, 3))), "health_stats.npy"),
    (lambda b: np.save(b / "health_stats.npy", np.full((6, len(STATS)), np.nan)), "NaN"),
    (lambda b: np.save(b / "detector.extra.npy", np.zeros(3)), "detector.extra.npy"),
    (lambda b: (b / METADATA_FILE).write_text("[" * 100_000 + "]" * 100_000), "nested too deeply"),
], ids=["calibration emptied", "health rows of 3", "health NaN", "stray detector array", "deep JSON"])
def test_tampered_arrays_found_by_the_campaign_are_refused(tmp_path, tamper, message):
    save_bank(small_bank(), tmp_path / "b")
    tamper(tmp_path / "b")
    with pytest.raises(OddlingError, match=message):
        load_bank(tmp_path / "b")


def test_an_empty_calibration_set_does_not_match_a_finite_cutoff(tmp_path):
    bank = small_bank()
    save_bank(bank, tmp_path / "b")
    meta_path = tmp_path / "b" / METADATA_FILE
    meta = json.loads(meta_path.read_text())
    meta["calibration"].update(cutoff=0.5, target_fpr=0.5)
    meta["calibration"].pop("n")
    meta_path.write_text(json.dumps(meta))
    np.save(tmp_path / "b" / "calibration_scores.npy", np.zeros(0))   # its cutoff is inf: nothing can be flagged
    with pytest.raises(OddlingError, match="cutoff"):                  # inf - 0.5 <= 1e-9 * inf passed before
        load_bank(tmp_path / "b")
