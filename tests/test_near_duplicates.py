"""Near duplicates in a reference set, on outside pictures: scikit-image's sample images (with
resized and JPEG-re-encoded copies and crops), the demo's ceramic tiles, and the DCT hash checked
against its definition (SciPy's DCT-II convention) and against ImageHash where it is installed."""
import io
import itertools
import math

import numpy as np
import pytest
from PIL import Image

from oddling.bank.store import Bank
from oddling.errors import OddlingError
from oddling.evaluation import reference_audit as ra

skimage_data = pytest.importorskip("skimage.data")

IMAGES = ("astronaut", "coffee", "chelsea", "camera", "rocket", "coins", "horse", "moon", "brick", "gravel")
COPIED = IMAGES[:5]
COPIES = ("half.png", "q70.jpg", "small.jpg")   # half size; same size JPEG q70; 80% size JPEG q60


def _rgb(array) -> Image.Image:
    a = np.asarray(array)
    if a.dtype == bool:                      # skimage.data.horse is a binary silhouette
        a = a.astype(np.uint8) * 255
    return Image.fromarray(a if a.ndim == 3 else np.stack([a] * 3, axis=-1)).convert("RGB")


@pytest.fixture(scope="module")
def samples(tmp_path_factory):
    """scikit-image's samples: each picture whole and two distinct quarter crops (top left, bottom
    right), plus three copies of five of them. Returns (folder, names, copy groups)."""
    root = tmp_path_factory.mktemp("samples")
    groups = []
    for name in IMAGES:
        image = _rgb(getattr(skimage_data, name)())
        w, h = image.size
        image.save(root / f"{name}.png")
        image.crop((0, 0, w // 2, h // 2)).save(root / f"{name}_tl.png")
        image.crop((w // 2, h // 2, w, h)).save(root / f"{name}_br.png")
        if name in COPIED:
            image.resize((w // 2, h // 2), Image.Resampling.LANCZOS).save(root / f"{name}_half.png")
            buffer = io.BytesIO()
            image.save(buffer, "JPEG", quality=70)
            (root / f"{name}_q70.jpg").write_bytes(buffer.getvalue())
            image.resize((int(w * 0.8), int(h * 0.8))).save(root / f"{name}_small.jpg", quality=60)
            groups.append({f"{name}.png"} | {f"{name}_{c}" for c in COPIES})
    names = sorted(p.name for p in root.iterdir())
    return root, names, groups


@pytest.fixture(scope="module")
def embedded_samples(samples, embedded_backbone):
    from oddling.embedding.runner import embed_files

    root, names, groups = samples
    embedded = embed_files(root, [root / n for n in names], embedded_backbone, progress=False)
    assert [r.path for r in embedded.ok_records] == names
    hashes = [ra.file_hash(root / n) for n in names]
    return embedded, hashes


def copy_pairs(names, groups) -> set[tuple[int, int]]:
    index = {n: i for i, n in enumerate(names)}
    return {tuple(sorted((index[a], index[b]))) for g in groups for a, b in itertools.combinations(sorted(g), 2)}


def found_pairs(result) -> set[tuple[int, int]]:
    return {(p.i, p.j) for p in result.pairs}


# --- the hash ----------------------------------------------------------------------------------

def dct_hash_by_definition(image: Image.Image) -> np.ndarray:
    """Krawetz's DCT hash ("Looks like it", 2011, from memory) at 64 px / 16 x 16, with the DCT-II
    written out as SciPy documents it for norm=None: y[k] = 2 sum_n x[n] cos(pi k (2n + 1) / (2N))."""
    x = np.asarray(image.convert("L").resize((64, 64), Image.Resampling.LANCZOS), dtype=np.float64)
    n = np.arange(64)
    basis = 2.0 * np.cos(np.pi * np.outer(n, 2 * n + 1) / (2 * 64))   # basis[k, n]
    low = (basis @ x @ basis.T)[:16, :16]
    return (low > np.median(low)).ravel()


@pytest.mark.parametrize("name", ["astronaut", "camera", "coins"])
def test_perceptual_hash_follows_its_definition(name):
    image = _rgb(getattr(skimage_data, name)())
    np.testing.assert_array_equal(ra.perceptual_hash(image), dct_hash_by_definition(image))   # SciPy's DCT-II


@pytest.mark.parametrize("name", ["astronaut", "chelsea", "moon"])
def test_perceptual_hash_equals_imagehash_phash(name):
    imagehash = pytest.importorskip("imagehash")
    image = _rgb(getattr(skimage_data, name)())
    # reference: ImageHash's phash (Buchner), the widely used implementation of the same hash
    np.testing.assert_array_equal(ra.perceptual_hash(image), imagehash.phash(image, hash_size=16).hash.ravel())


def test_copies_differ_in_few_bits_and_distinct_pictures_in_many(samples, embedded_samples):
    _, names, groups = samples
    _, hashes = embedded_samples
    copies = copy_pairs(names, groups)
    bits = {(i, j): int(np.sum(hashes[i] != hashes[j])) for i, j in itertools.combinations(range(len(names)), 2)}
    assert max(bits[p] for p in copies) <= ra.MAX_HASH_BITS              # scikit-image's samples
    assert min(b for p, b in bits.items() if p not in copies) > 2 * ra.MAX_HASH_BITS


def test_file_hash_is_none_for_a_missing_or_changed_file(samples, tmp_path):
    root, _, _ = samples
    assert ra.file_hash(tmp_path / "gone.png") is None
    from oddling.data.intake import sha256_file

    path = root / "coins.png"
    assert ra.file_hash(path, sha256_file(path)) is not None
    assert ra.file_hash(path, "0" * 64) is None


# --- the rule on scikit-image's samples ---------------------------------------------------------

def test_samples_pair_exactly_the_copies(samples, embedded_samples):
    _, names, groups = samples
    embedded, hashes = embedded_samples
    result = ra.near_duplicate_pairs(embedded.embeddings, hashes, [r.sha256 for r in embedded.records])
    # scikit-image's samples: each original with its resized and re-encoded copies, and the copies
    # with each other; no crop with its picture, no crop with another crop
    assert found_pairs(result) == copy_pairs(names, groups)
    assert result.hash_cutoff == ra.MAX_HASH_BITS   # the relative cap does not bind: photos differ a lot
    assert result.distance_cutoff == pytest.approx(ra.NEAR_DUPLICATE_FACTOR * result.median_nn_distance)


def test_embeddings_alone_find_only_copies(samples, embedded_samples):
    _, names, groups = samples
    embedded, _ = embedded_samples
    result = ra.near_duplicate_pairs(embedded.embeddings)
    found = found_pairs(result)
    assert found and found <= copy_pairs(names, groups)   # scikit-image's samples
    assert all(p.by_embedding and not p.by_hash and p.hash_bits is None for p in result.pairs)


def test_the_hash_alone_finds_every_copy(samples, embedded_samples):
    _, names, groups = samples
    embedded, hashes = embedded_samples
    result = ra.near_duplicate_pairs(embedded.embeddings, hashes, factor=0.0)
    assert found_pairs(result) == copy_pairs(names, groups)   # scikit-image's samples
    assert all(p.by_hash and not p.by_embedding for p in result.pairs)


def test_the_default_factor_keeps_a_margin_below_the_closest_distinct_pair(samples, embedded_samples):
    _, names, groups = samples
    embedded, _ = embedded_samples
    copies = copy_pairs(names, groups)
    result = ra.near_duplicate_pairs(embedded.embeddings)
    v = embedded.embeddings.astype(np.float64)
    ratio, closest = min(((1.0 - v[i] @ v[j]) / result.median_nn_distance, (i, j))
                         for i, j in itertools.combinations(range(len(names)), 2) if (i, j) not in copies)
    # scikit-image's samples: the closest distinct pictures (two crops) sit more than twice the
    # default factor away; a factor past them pairs them, so the parameter does what it says
    assert ratio > 2 * ra.NEAR_DUPLICATE_FACTOR
    assert closest in found_pairs(ra.near_duplicate_pairs(embedded.embeddings, factor=ratio * 1.01))


def _bank(root, names, embedded) -> Bank:
    from oddling.detectors.knn import KNNDetector

    return Bank(representation={"kind": "embedding", "id": "efficientnet-lite0"},
                detector=KNNDetector(k=1).load_state({}, {"references": embedded.embeddings}),
                references=[{"path": r.path, "sha256": r.sha256} for r in embedded.ok_records],
                features=embedded.embeddings, calibration_scores=np.zeros(len(names)), calibration={},
                reference_root=str(root), tool_version="test", created="test")


def test_findings_name_the_later_path_of_each_pair(samples, embedded_samples):
    root, names, groups = samples
    embedded, _ = embedded_samples
    findings = ra.near_duplicate_findings(_bank(root, names, embedded))
    assert len(findings) == len(copy_pairs(names, groups))
    for f in findings:
        assert f.kind == "near_duplicate"
        other = f.detail.split("near duplicate of ", 1)[1].split(":", 1)[0]
        assert other < f.path and any({other, f.path} <= g for g in groups)
        assert f"of {ra.HASH_BITS} bits" in f.detail


def test_findings_fall_back_to_embeddings_when_files_are_gone(samples, embedded_samples, tmp_path):
    _, names, groups = samples
    embedded, _ = embedded_samples
    bank = _bank(tmp_path / "moved", names, embedded)          # no file where the bank says
    findings = ra.near_duplicate_findings(bank)
    index = {n: i for i, n in enumerate(names)}
    pairs = {tuple(sorted((index[f.path], index[f.detail.split("of ", 1)[1].split(":", 1)[0]]))) for f in findings}
    assert pairs and pairs <= copy_pairs(names, groups)
    assert all("cosine distance" in f.detail and "hash" not in f.detail for f in findings)


# --- the flood: similar normal images -----------------------------------------------------------

def test_demo_tiles_pair_only_their_copies(tmp_path, embedded_backbone):
    from oddling.demo.scene import SceneCounts, generate_scene
    from oddling.embedding.runner import embed_files

    generate_scene(tmp_path / "scene", seed=3, counts=SceneCounts(reference=40, incoming_normal=0,
                   incoming_anomalous=0, test_normal=0, test_per_kind=0))
    root = tmp_path / "scene" / "reference"
    tiles = sorted(root.glob("*.jpg"))
    Image.open(tiles[0]).save(root / "copy_q60.jpg", quality=60)
    Image.open(tiles[1]).resize((160, 160), Image.Resampling.LANCZOS).save(root / "copy_half.png")
    paths = sorted(root.iterdir())
    embedded = embed_files(root, paths, embedded_backbone, progress=False)
    result = ra.near_duplicate_pairs(embedded.embeddings, [ra.file_hash(p) for p in paths],
                                     [r.sha256 for r in embedded.records])
    names = [p.name for p in paths]
    # demo scene: 40 clean tiles that all look alike, and two copies; only the copies are paired
    assert {(names[p.i], names[p.j]) for p in result.pairs} == {("copy_half.png", tiles[1].name),
                                                                ("copy_q60.jpg", tiles[0].name)}


# --- the rule itself, on made-up vectors and hashes ---------------------------------------------

def _unit(rng, n, d=32):
    v = rng.normal(size=(n, d))
    return v / np.linalg.norm(v, axis=1, keepdims=True)


def test_exact_duplicates_are_left_to_the_duplicate_check():
    rng = np.random.default_rng(0)
    v = _unit(rng, 12)
    v[5] = v[4]
    groups = [f"sha{i}" for i in range(12)]
    assert (4, 5) in found_pairs(ra.near_duplicate_pairs(v, groups=groups))
    groups[5] = groups[4]                                   # same content: not a near duplicate
    result = ra.near_duplicate_pairs(v, groups=groups)
    assert (4, 5) not in found_pairs(result) and result.median_nn_distance > 0.1


def test_the_embedding_rule_is_relative_to_the_median_neighbour_distance():
    rng = np.random.default_rng(1)
    v = _unit(rng, 30)
    close = v[0] + rng.normal(size=v.shape[1]) * 0.05
    v[1] = close / np.linalg.norm(close)
    d = 1.0 - float(v[0] @ v[1])
    result = ra.near_duplicate_pairs(v)
    assert d < 0.1 * result.median_nn_distance and found_pairs(result) == {(0, 1)}
    ratio = d / result.median_nn_distance
    assert found_pairs(ra.near_duplicate_pairs(v, factor=ratio * 0.99)) == set()
    assert found_pairs(ra.near_duplicate_pairs(v, factor=ratio * 1.01)) == {(0, 1)}
    # the same vectors scaled into a tighter cluster: every distance shrinks, the pairs stay
    tight = v * 0.1 + rng.normal(size=v.shape[1])
    tight /= np.linalg.norm(tight, axis=1, keepdims=True)
    assert found_pairs(ra.near_duplicate_pairs(tight)) == {(0, 1)}


def test_a_crowded_bank_gets_a_stricter_hash_cutoff():
    rng = np.random.default_rng(2)
    base = rng.random(ra.HASH_BITS) < 0.5
    hashes = []
    for _ in range(30):                                     # all within ~20 bits of one another
        h = base.copy()
        h[rng.choice(ra.HASH_BITS, 10, replace=False)] ^= True
        hashes.append(h)
    near = hashes[0].copy()
    near[rng.choice(ra.HASH_BITS, 11, replace=False)] ^= True
    hashes.append(near)                                     # 11 bits from hashes[0]: <= 12, yet typical here
    v = _unit(rng, len(hashes))
    result = ra.near_duplicate_pairs(v, hashes, factor=0.0)
    assert result.hash_cutoff == pytest.approx(ra.HASH_NEIGHBOUR_FACTOR * result.median_nn_hash_bits)
    assert result.hash_cutoff < 11 and (0, 30) not in found_pairs(result)


def test_too_few_vectors_give_no_pairs():
    assert ra.near_duplicate_pairs(np.ones((1, 4)) / 2).pairs == []
    assert ra.near_duplicate_pairs(np.zeros((0, 4))).median_nn_distance is None


@pytest.mark.parametrize("kwargs, message", [
    ({"factor": -0.1}, "factor must be a number in"),
    ({"factor": 1.0}, "factor must be a number in"),
    ({"factor": math.nan}, "factor must be a number in"),
    ({"max_hash_bits": -1}, "max_hash_bits must be a whole number"),
    ({"max_hash_bits": 2.5}, "max_hash_bits must be a whole number"),
    ({"hash_factor": -1.0}, "hash_factor must be a number"),
])
def test_bad_rule_parameters_are_user_errors(kwargs, message):
    with pytest.raises(OddlingError, match=message):
        ra.near_duplicate_pairs(np.eye(3), **kwargs)


def test_hashes_must_match_the_vectors():
    with pytest.raises(ValueError, match="one entry per vector"):
        ra.near_duplicate_pairs(np.eye(3), [None, None])
    with pytest.raises(ValueError, match=f"must have {ra.HASH_BITS} bits"):
        ra.near_duplicate_pairs(np.eye(3), [np.zeros(64, bool), None, None])
