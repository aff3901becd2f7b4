"""The bank folder: round trip, atomic write, refusal of incompatible or foreign folders."""
import json

import numpy as np
import pytest

from oddling.bank.store import METADATA_FILE, Bank, check_compatible, load_bank, save_bank
from oddling.errors import OddlingError


def small_bank() -> Bank:
    rng = np.random.default_rng(0)
    emb = rng.standard_normal((6, 4)).astype(np.float32)
    emb /= np.linalg.norm(emb, axis=1, keepdims=True)
    return Bank(
        backbone={"id": "efficientnet-lite0", "weights_sha256": "ab" * 32,
                  "preprocessing": {"crop": 224}, "embedding_dim": 4},
        mode="global", k=2,
        references=[{"path": f"r{i}.png", "sha256": f"{i:064d}"} for i in range(6)],
        embeddings=emb, calibration_scores=np.linspace(0.1, 0.6, 6),
        calibration={"method": "leave-one-out", "n": 6, "target_fpr": 0.01, "cutoff": None},
        reference_root="/refs", tool_version="0.1.0", created="2026-01-01T00:00:00+00:00",
    )


def test_round_trip_keeps_every_field(tmp_path):
    bank = small_bank()
    save_bank(bank, tmp_path / "b")
    loaded = load_bank(tmp_path / "b")
    np.testing.assert_array_equal(loaded.embeddings, bank.embeddings)
    np.testing.assert_array_equal(loaded.calibration_scores, bank.calibration_scores)
    assert loaded.metadata() == bank.metadata()


def test_metadata_is_plain_json_with_format_version(tmp_path):
    save_bank(small_bank(), tmp_path / "b")
    meta = json.loads((tmp_path / "b" / METADATA_FILE).read_text())
    assert meta["format"] == "oddling-bank" and meta["format_version"] == 1
    assert meta["references"][0] == {"path": "r0.png", "sha256": "0" * 64}


def test_existing_bank_not_replaced_without_force(tmp_path):
    save_bank(small_bank(), tmp_path / "b")
    with pytest.raises(OddlingError, match="already exists"):
        save_bank(small_bank(), tmp_path / "b")
    save_bank(small_bank(), tmp_path / "b", force=True)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["b"]   # no temporary folders left behind


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
    np.save(tmp_path / "b" / "embeddings.npy", np.array([{"evil": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(OddlingError, match="damaged"):
        load_bank(tmp_path / "b")


def test_incompatible_backbone_message_names_the_difference():
    bank = small_bank()
    other = dict(bank.backbone, weights_sha256="cd" * 32)
    with pytest.raises(OddlingError, match="weights SHA-256"):
        check_compatible(bank, other)
    check_compatible(bank, dict(bank.backbone))   # identical: accepted
