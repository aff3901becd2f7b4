"""The demo tile scene: deterministic, laid out as promised, labels hidden, defects really drawn."""
import csv
import hashlib
import re

import numpy as np
import pytest
from PIL import Image

from oddling.demo.scene import ANOMALY_KINDS, TRUTH_FILE, SceneCounts, generate_scene, render_tile

SMALL = SceneCounts(reference=3, incoming_normal=3, incoming_anomalous=7, test_normal=2, test_per_kind=1)
SIZE = 96


def file_hashes(root):
    return {p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def scene(tmp_path_factory):
    root = tmp_path_factory.mktemp("scene") / "tiles"
    return root, generate_scene(root, seed=3, counts=SMALL, size=SIZE)


def test_same_seed_gives_byte_identical_files(scene, tmp_path):
    root, _ = scene
    generate_scene(tmp_path / "again", seed=3, counts=SMALL, size=SIZE)
    assert file_hashes(tmp_path / "again") == file_hashes(root)


def test_different_seed_gives_different_images(scene, tmp_path):
    root, _ = scene
    generate_scene(tmp_path / "other", seed=4, counts=SMALL, size=SIZE)
    first, other = file_hashes(root), file_hashes(tmp_path / "other")
    assert first.keys() == other.keys()
    images = [name for name in first if name.endswith(".jpg")]
    assert all(first[name] != other[name] for name in images)


def test_layout_and_counts_match_the_summary(scene):
    root, summary = scene
    expected_test = {"normal": 2, **{kind: 1 for kind in ANOMALY_KINDS}}
    assert summary == {"root": str(root), "reference": 3, "incoming": 10, "incoming_anomalous": 7,
                       "test": expected_test}
    assert sorted(p.name for p in root.iterdir()) == ["incoming", TRUTH_FILE, "reference", "test"]
    assert len(list((root / "reference").glob("*.jpg"))) == 3
    assert len(list((root / "incoming").glob("*.jpg"))) == 10
    assert {p.name: len(list(p.glob("*.jpg"))) for p in (root / "test").iterdir()} == expected_test


def test_truth_csv_lists_every_incoming_file_with_its_label(scene):
    root, _ = scene
    with open(root / TRUTH_FILE, newline="") as f:
        rows = list(csv.DictReader(f))
    assert list(rows[0]) == ["path", "label", "kind"]
    assert sorted(r["path"] for r in rows) == sorted(p.name for p in (root / "incoming").iterdir())
    kinds = [r["kind"] for r in rows]
    # 7 anomalies over 6 kinds: every kind appears, the first one twice.
    assert sorted(kinds) == sorted(["normal"] * 3 + list(ANOMALY_KINDS) + [ANOMALY_KINDS[0]])
    assert all((r["label"] == "normal") == (r["kind"] == "normal") for r in rows)
    assert {r["label"] for r in rows} == {"normal", "anomalous"}


def test_incoming_names_do_not_reveal_the_label(scene):
    root, _ = scene
    names = sorted(p.name for p in (root / "incoming").iterdir())
    assert all(re.fullmatch(r"frame_\d{5}\.jpg", name) for name in names)
    words = [*ANOMALY_KINDS, "normal", "anomal", "crack", "chip", "drip", "object", "blank", "overexposed"]
    assert not [name for name in names if any(word in name.lower() for word in words)]
    with open(root / TRUTH_FILE, newline="") as f:
        labels = [r["label"] for r in sorted(csv.DictReader(f), key=lambda r: r["path"])]
    # Shuffled: the anomalies are not simply the last (or first) frames.
    assert labels != sorted(labels) and labels != sorted(labels, reverse=True)


def test_every_image_is_rgb_of_the_requested_size(scene):
    root, _ = scene
    for path in root.rglob("*.jpg"):
        with Image.open(path) as image:
            assert (image.format, image.mode, image.size) == ("JPEG", "RGB", (SIZE, SIZE)), path


def test_refuses_a_non_empty_root(tmp_path):
    (tmp_path / "notes.txt").write_text("keep me")
    with pytest.raises(FileExistsError, match="not an empty folder"):
        generate_scene(tmp_path, counts=SMALL, size=SIZE)
    assert [p.name for p in tmp_path.iterdir()] == ["notes.txt"]


def test_accepts_an_existing_empty_root(tmp_path):
    summary = generate_scene(tmp_path, counts=SceneCounts(1, 1, 0, 0, 0), size=SIZE)
    assert summary["incoming"] == 1


def test_rejects_bad_counts_and_kinds():
    with pytest.raises(ValueError, match="counts.reference must be a non-negative integer, got: -1"):
        generate_scene("unused", counts=SceneCounts(reference=-1))
    with pytest.raises(ValueError, match="got: 'scratch'"):
        render_tile(np.random.default_rng(0), kind="scratch")


def changed_fraction(kind, seed=5, size=320, threshold=30):
    """Share of pixels where the defect tile differs clearly from the same-rng normal tile."""
    normal = np.asarray(render_tile(np.random.default_rng(seed), size), dtype=np.int16)
    defect = np.asarray(render_tile(np.random.default_rng(seed), size, kind), dtype=np.int16)
    return float(np.mean(np.abs(defect - normal).max(axis=2) > threshold))


@pytest.mark.parametrize("kind", ["hairline_crack", "chipped_corner", "glaze_drip", "foreign_object"])
def test_local_defects_change_a_small_part_of_the_tile(kind):
    # Visible (some hundred pixels), not enormous (a few percent of a 320 x 320 frame at most).
    assert 0.001 < changed_fraction(kind) < 0.05


def test_rendering_is_deterministic_for_an_rng_state():
    a = np.asarray(render_tile(np.random.default_rng(9), 64, "glaze_drip"))
    b = np.asarray(render_tile(np.random.default_rng(9), 64, "glaze_drip"))
    np.testing.assert_array_equal(a, b)


def test_blank_and_overexposed_frames_are_dark_and_washed_out():
    normal = np.asarray(render_tile(np.random.default_rng(2), 128), dtype=np.float32)
    blank = np.asarray(render_tile(np.random.default_rng(2), 128, "blank_frame"), dtype=np.float32)
    bright = np.asarray(render_tile(np.random.default_rng(2), 128, "overexposed_frame"), dtype=np.float32)
    assert blank.mean() < 25 and blank.std() < 8
    assert bright.mean() > 220 and bright.mean() > normal.mean() + 60
