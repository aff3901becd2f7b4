"""Export runtimes (OpenVINO, ONNX Runtime) give the same embeddings as PyTorch on real images
(scikit-image's samples), and the fast JPEG decode gives the same network input as a plain
Pillow decode within stated tolerances.

Tolerances: fp32 runtimes against PyTorch, max abs difference <= 1e-4 and cosine >= 0.9999 on
unit vectors (what the first-batch verification enforces); fit and score through the default
runtime against the PyTorch runtime, every score and calibration score within 1e-5. Fast decode
(DCT-scaled, the runner's path) against the plain path (full Pillow decode, resize, crop,
normalise: the manifest's definition), on generated 1-MP JPEGs: mean abs difference of the
normalised input <= 0.01 (its range is about [-1, 1]) and embedding cosine >= 0.999; on the
samples enlarged 2x and 4x: mean abs difference <= 0.01 and cosine >= 0.998.
"""
import json

import numpy as np
import pytest
from PIL import Image

from oddling.backbones import RUNTIMES, load_backbone, resolve_runtime
from oddling.backbones.onnx_runtime import export_path
from oddling.errors import OddlingError

skimage_data = pytest.importorskip("skimage.data")
pytest.importorskip("onnxruntime")

SAMPLES = ("astronaut", "chelsea", "coffee", "rocket", "brick", "grass", "gravel", "camera")


@pytest.fixture(scope="module")
def real_batch(embedded_backbone):
    images = [Image.fromarray(getattr(skimage_data, name)()).convert("RGB") for name in SAMPLES]
    return np.stack([embedded_backbone.preprocessing.to_array(im) for im in images])


def test_onnx_embeddings_match_torch(tmp_path, real_batch):
    torch_net = load_backbone("efficientnet-lite0", tmp_path, runtime="torch")
    onnx_net = load_backbone("efficientnet-lite0", tmp_path, runtime="onnx")
    assert onnx_net.runtime == "onnx"
    a, b = torch_net.embed(real_batch), onnx_net.embed(real_batch)
    cosine = np.sum(a * b, axis=1)
    print(f"\n[runtime] ORT vs torch: min cosine {cosine.min():.7f}, max abs diff {np.abs(a - b).max():.2e}")
    assert cosine.min() >= 0.9999
    assert onnx_net.onnx.verified   # first batch was checked against PyTorch


def test_export_is_reused(tmp_path, real_batch):
    first = load_backbone("efficientnet-lite0", tmp_path, runtime="onnx")
    path = export_path(tmp_path, first.id, first.weights_sha256, 224)
    stamp = path.stat().st_mtime_ns
    second = load_backbone("efficientnet-lite0", tmp_path, runtime="onnx")
    assert path.stat().st_mtime_ns == stamp and second.onnx.path == path


def test_disagreeing_export_is_refused(tmp_path, real_batch):
    net = load_backbone("efficientnet-lite0", tmp_path, runtime="onnx")
    feats = net.torch_features(real_batch[:2])
    with pytest.raises(OddlingError, match="disagrees"):
        net.onnx.verify(feats, feats[::-1])
    assert not net.onnx.path.exists()


def test_unknown_runtime_refused(tmp_path):
    with pytest.raises(OddlingError, match="runtime must be one of"):
        load_backbone("efficientnet-lite0", tmp_path, runtime="gpu")


# --- OpenVINO -----------------------------------------------------------------------------------

from oddling.backbones import openvino_runtime  # noqa: E402

pytestmark_openvino = pytest.mark.skipif(not openvino_runtime.available(), reason="openvino is not installed")


@pytestmark_openvino
def test_auto_prefers_openvino_and_the_cli_offers_every_runtime():
    assert RUNTIMES == ("auto", "openvino", "onnx", "torch")
    assert resolve_runtime("auto") == "openvino"
    from click.testing import CliRunner

    from oddling.cli import main

    text = CliRunner().invoke(main, ["fit", "--help"]).output
    assert "[auto|openvino|onnx|torch]" in text and "--precision" in text


@pytestmark_openvino
def test_openvino_embeddings_match_torch_in_explicit_fp32(tmp_path, real_batch):
    torch_net = load_backbone("efficientnet-lite0", tmp_path, runtime="torch")
    ov_net = load_backbone("efficientnet-lite0", tmp_path, runtime="openvino")
    assert ov_net.runtime == "openvino" and not ov_net.onnx.verified
    assert ov_net.onnx.actual_precision == "f32"   # set explicitly: AMX/bf16 CPUs would pick bf16
    a, b = torch_net.embed(real_batch), ov_net.embed(real_batch)
    cosine = np.sum(a * b, axis=1)
    print(f"\n[runtime] OpenVINO vs torch: min cosine {cosine.min():.7f}, max abs diff {np.abs(a - b).max():.2e}")
    assert cosine.min() >= 0.9999 and np.abs(a - b).max() <= 1e-4
    record = json.loads(ov_net.onnx.verified_file.read_text())
    assert ov_net.onnx.verified and record["precision"] == "f32" and record["n_images"] == len(real_batch)
    assert record["openvino"] == openvino_runtime.version()
    assert ov_net.onnx.verified_file.name.endswith(".openvino-f32.verified.json")


@pytestmark_openvino
def test_openvino_uses_the_same_export_file_as_onnx_runtime(tmp_path):
    ov_net = load_backbone("efficientnet-lite0", tmp_path, runtime="openvino")
    ort_net = load_backbone("efficientnet-lite0", tmp_path, runtime="onnx")
    assert ov_net.onnx.path == ort_net.onnx.path == export_path(tmp_path, ov_net.id, ov_net.weights_sha256, 224)
    assert ov_net.onnx.verified_file != ort_net.onnx.verified_file   # each runtime is verified on its own


@pytestmark_openvino
def test_disagreeing_openvino_model_is_refused_and_deleted(tmp_path, real_batch):
    net = load_backbone("efficientnet-lite0", tmp_path, runtime="openvino")
    net.embed(real_batch[:2])   # verified: the record exists
    assert net.onnx.verified_file.is_file()
    feats = net.torch_features(real_batch[:2])
    with pytest.raises(OddlingError, match="disagrees with PyTorch.*--runtime onnx"):
        net.onnx.verify(feats, feats[::-1])
    assert not net.onnx.path.exists() and not net.onnx.verified_file.exists()


@pytestmark_openvino
def test_a_verified_export_never_builds_the_pytorch_network(tmp_path, real_batch):
    load_backbone("efficientnet-lite0", tmp_path, runtime="openvino").embed(real_batch[:2])
    again = load_backbone("efficientnet-lite0", tmp_path, runtime="openvino")
    assert again.onnx.verified
    again.embed(real_batch)
    assert again._network is None


@pytestmark_openvino
def test_a_new_openvino_release_verifies_again(tmp_path, real_batch):
    net = load_backbone("efficientnet-lite0", tmp_path, runtime="openvino")
    net.embed(real_batch[:2])
    record = json.loads(net.onnx.verified_file.read_text())
    net.onnx.verified_file.write_text(json.dumps(record | {"openvino": "2000.0"}))
    assert not load_backbone("efficientnet-lite0", tmp_path, runtime="openvino").onnx.verified


def test_runtime_and_precision_are_in_the_embedding_cache_key():
    from oddling.embedding.cache import cache_key

    fp = {"id": "x", "weights_sha256": "a" * 64}
    keys = {cache_key(fp, runtime) for runtime in ("torch", "onnx", "openvino", "openvino-bf16")}
    assert len(keys) == 4


@pytestmark_openvino
def test_fit_and_score_through_the_default_runtime_equal_the_torch_runtime(tmp_path):
    """Outputs equal within 1e-5: the default runtime changes speed, not answers."""
    import oddling

    refs, incoming = tmp_path / "refs", tmp_path / "incoming"
    refs.mkdir()
    incoming.mkdir()
    names = ("astronaut", "chelsea", "coffee", "rocket", "brick", "grass", "gravel", "camera", "coins", "moon",
             "immunohistochemistry", "logo")
    for i, name in enumerate(names):
        image = Image.fromarray(getattr(skimage_data, name)()).convert("RGB")
        image.save(refs / f"{name}.jpg", quality=92)
        image.transpose(Image.Transpose.FLIP_LEFT_RIGHT).save(incoming / f"{name}-flipped.png")
    results = {}
    for runtime in ("torch", "auto"):
        options = oddling.RunOptions(runtime=runtime, use_cache=False, progress=False, cache_dir=tmp_path / "cache")
        bank = oddling.fit(refs, None, k=3, target_fpr=0.2, options=options)
        result = oddling.score(incoming, bank, options=options)
        results[runtime] = (bank, {r.path: r for r in result.rows})
    (torch_bank, torch_rows), (auto_bank, auto_rows) = results["torch"], results["auto"]
    assert auto_bank.representation == torch_bank.representation   # same fingerprint: banks interchange
    np.testing.assert_allclose(auto_bank.calibration_scores, torch_bank.calibration_scores, rtol=0, atol=1e-5)
    np.testing.assert_allclose(auto_bank.features, torch_bank.features, rtol=0, atol=1e-5)
    assert set(auto_rows) == set(torch_rows)
    for path, row in torch_rows.items():
        assert auto_rows[path].score == pytest.approx(row.score, abs=1e-5)
        assert auto_rows[path].nearest == row.nearest and auto_rows[path].health == row.health


# --- reduced precision ----------------------------------------------------------------------------

def test_precision_is_folded_into_the_runtime_the_jobs_pass_on():
    import oddling

    assert oddling.RunOptions(precision="bf16").runtime == "auto:bf16"
    assert oddling.RunOptions(runtime="openvino:bf16").precision == "bf16"
    assert oddling.RunOptions().runtime == "auto" and oddling.RunOptions().precision == "fp32"
    with pytest.raises(OddlingError, match="only available with the OpenVINO runtime"):
        resolve_runtime("onnx", "bf16")
    with pytest.raises(OddlingError, match="precision must be one of"):
        resolve_runtime("auto", "int4")


def _needs_bf16():
    from oddling.backbones.openvino_runtime import cpu_supports_bf16

    if not cpu_supports_bf16():
        pytest.skip("this CPU has no bf16 units")


@pytest.fixture(scope="module")
def generated_batch(tmp_path_factory, embedded_backbone):
    from oddling.embedding.throughput import make_test_jpegs

    paths = make_test_jpegs(tmp_path_factory.mktemp("gen"), 16)
    return np.stack([embedded_backbone.preprocessing.to_array(Image.open(p).convert("RGB")) for p in paths])


@pytestmark_openvino
def test_bf16_is_checked_against_fp32_on_the_first_batch_and_recorded(tmp_path, generated_batch):
    _needs_bf16()
    net = load_backbone("efficientnet-lite0", tmp_path, runtime="openvino:bf16")
    assert net.runtime == "openvino-bf16" and net.fingerprint()["precision"] == "bf16"
    assert not net.onnx.verified   # checked on every run's first batch
    vectors = net.embed(generated_batch)
    check = net.onnx.check
    print(f"\n[runtime] bf16 vs fp32 on generated JPEGs: min cosine {check['min_cosine']:.5f}, "
          f"kNN ranking Spearman {check['spearman_knn_ranking']:.4f}")
    assert check["min_cosine"] >= 0.999 and check["spearman_knn_ranking"] >= 0.99
    assert vectors.shape == (len(generated_batch), 1280)
    from oddling.backbones.representation import Representation, RepresentationSpec

    rep = Representation(RepresentationSpec("embedding", backbone=net.id), net.preprocessing, 1280, net)
    recorded = rep.fingerprint()
    assert recorded["backbone_fingerprint"]["precision"] == "bf16"
    assert recorded["precision_check"]["min_cosine"] == check["min_cosine"]


@pytestmark_openvino
def test_bf16_that_changes_the_embeddings_is_refused(tmp_path, generated_batch):
    _needs_bf16()
    net = load_backbone("efficientnet-lite0", tmp_path, runtime="openvino:bf16")
    fp32 = net.onnx.reference.features(generated_batch[:8])
    noisy = fp32 + np.random.default_rng(0).normal(0, 0.3 * np.abs(fp32).mean(), fp32.shape).astype(np.float32)
    with pytest.raises(OddlingError, match="does not hold on these images.*--precision fp32"):
        net.onnx.verify_reduced(fp32, noisy)
    # The ranking alone can refuse it: near-identical images whose order changes although every
    # cosine stays above 0.9997.
    rng = np.random.default_rng(0)
    alike = rng.standard_normal(256) + 0.05 * rng.standard_normal((8, 256))
    shuffled = alike + 0.02 * rng.standard_normal((8, 256))
    with pytest.raises(OddlingError, match=r"min cosine to fp32 0\.999[7-9].*Spearman 0\.[0-8]"):
        net.onnx.verify_reduced(alike, shuffled)
    assert not net.onnx.verified


def test_ranking_agreement_is_one_for_the_same_vectors_and_none_for_tiny_batches():
    from oddling.backbones.openvino_runtime import ranking_agreement

    x = np.random.default_rng(0).standard_normal((10, 32))
    assert ranking_agreement(x, x) == pytest.approx(1.0)
    assert ranking_agreement(x[:2], x[:2]) is None


# --- decode ---------------------------------------------------------------------------------------

def _plain_input(prep, path):
    """The manifest's definition as a user writes it: full Pillow decode, resize, crop, normalise."""
    return prep.to_array(Image.open(path).convert("RGB"))


@pytest.fixture(scope="module")
def decode_files(tmp_path_factory):
    from oddling.embedding.throughput import make_test_jpegs

    folder = tmp_path_factory.mktemp("decode")
    generated = make_test_jpegs(folder / "generated", 12)
    enlarged = []
    for name in ("astronaut", "chelsea", "coffee", "rocket", "camera", "brick"):
        image = Image.fromarray(getattr(skimage_data, name)()).convert("RGB")
        for scale in (2, 4):
            path = folder / f"{name}-x{scale}.jpg"
            image.resize((image.width * scale, image.height * scale), Image.Resampling.BICUBIC).save(path, quality=90)
            enlarged.append(path)
    return generated, enlarged


@pytestmark_openvino
def test_fast_decode_gives_the_manifests_input_within_tolerance(tmp_path, decode_files):
    from oddling.embedding.runner import _prepare

    net = load_backbone("efficientnet-lite0", tmp_path, runtime="openvino")
    prep = net.preprocessing
    for label, paths, min_cosine in (("generated", decode_files[0], 0.999), ("enlarged samples", decode_files[1], 0.998)):
        plain = np.stack([_plain_input(prep, p) for p in paths])
        fast = np.stack([_prepare(p, prep)[1] for p in paths])
        mad = np.abs(plain - fast).mean(axis=(1, 2, 3))
        cosine = np.sum(net.embed(plain) * net.embed(fast), axis=1)
        print(f"\n[decode] {label}: mean abs diff max {mad.max():.4f}, "
              f"embedding cosine min {cosine.min():.5f}")
        assert mad.max() <= 0.01 and cosine.min() >= min_cosine, label


# --- intermediate stages (local mode, pooled stages) on the export runtimes --------------------------

PATCH_STAGES = ("stage2", "stage3")
EXPORT_RUNTIMES = ["onnx", pytest.param("openvino", marks=pytestmark_openvino)]


@pytest.fixture(scope="module")
def local_batch(real_batch):
    """The samples as local mode sees them: shorter side straight to 224 (no crop margin)."""
    from oddling.backbones.patch_grid import local_preprocessing

    prep = local_preprocessing(load_backbone("efficientnet-lite0").preprocessing)
    images = [Image.fromarray(getattr(skimage_data, name)()).convert("RGB") for name in SAMPLES]
    return np.stack([prep.to_array(im) for im in images])


@pytest.mark.parametrize("runtime", EXPORT_RUNTIMES)
def test_stage_export_gives_pytorchs_stage_outputs_and_records_the_check(tmp_path, local_batch, runtime):
    torch_net = load_backbone("efficientnet-lite0", tmp_path, runtime="torch")
    net = load_backbone("efficientnet-lite0", tmp_path, runtime=runtime, stages=PATCH_STAGES)
    assert net.runtime == runtime and net.onnx.stages == PATCH_STAGES and not net.onnx.verified
    # Its own file, keyed like the embedding's plus the stage names.
    assert net.onnx.path == export_path(tmp_path, net.id, net.weights_sha256, 224, PATCH_STAGES)
    assert "224px-stage2+stage3-opset" in net.onnx.path.name
    assert net.onnx.path != export_path(tmp_path, net.id, net.weights_sha256, 224)
    maps, expected = net.intermediates(local_batch, PATCH_STAGES), torch_net.torch_intermediates(local_batch, PATCH_STAGES)
    assert [m.shape for m in maps] == [(len(SAMPLES), 24, 56, 56), (len(SAMPLES), 40, 28, 28)]
    for m, e in zip(maps, expected):
        # fp32: within 1e-5 of the features' scale (values up to ~60 here)
        assert np.abs(m - e).max() <= 1e-5 * np.abs(e).max()
    record = json.loads(net.onnx.verified_file.read_text())
    assert net.onnx.verified and record["n_images"] == len(SAMPLES)
    assert record["max_abs_diff"] <= 1e-4 and record["min_cosine"] >= 0.9999
    if runtime == "openvino":
        assert net.onnx.actual_precision == "f32" and record["precision"] == "f32"


@pytest.mark.parametrize("runtime", EXPORT_RUNTIMES)
def test_disagreeing_stage_export_is_refused_and_deleted(tmp_path, local_batch, runtime):
    net = load_backbone("efficientnet-lite0", tmp_path, runtime=runtime, stages=PATCH_STAGES)
    maps = net.intermediates(local_batch[:2], PATCH_STAGES)
    assert net.onnx.verified_file.is_file()
    with pytest.raises(OddlingError, match="disagrees with PyTorch.*--runtime torch"):
        net.onnx.verify(maps, [m[::-1] for m in maps])   # the two images swapped
    assert not net.onnx.path.exists() and not net.onnx.verified_file.exists()
    with pytest.raises(OddlingError, match="disagrees"):
        net.onnx.verify(maps, [1.01 * m for m in maps])   # same directions, 1% larger: the scale counts too


def test_a_verified_stage_export_never_builds_the_pytorch_network(tmp_path, local_batch):
    load_backbone("efficientnet-lite0", tmp_path, runtime="onnx", stages=PATCH_STAGES).intermediates(
        local_batch[:2], PATCH_STAGES)
    again = load_backbone("efficientnet-lite0", tmp_path, runtime="onnx", stages=PATCH_STAGES)
    assert again.onnx.verified
    again.intermediates(local_batch, PATCH_STAGES)
    assert again._network is None
    with pytest.raises(ValueError, match="loaded for its stages"):
        again.embed(local_batch[:1])   # the export holds stages, not the embedding


def test_unknown_stage_is_refused_before_any_export(tmp_path):
    with pytest.raises(OddlingError, match="has no stage 'stage9'; its stages: stage1"):
        load_backbone("efficientnet-lite0", tmp_path, runtime="onnx", stages=("stage2", "stage9"))
    assert not (tmp_path / "onnx").exists()


@pytest.fixture(scope="module")
def patch_folders(tmp_path_factory):
    """Generated photo-like JPEGs: 24 references (the patch detector needs 20 distinct) and 8 to score."""
    from oddling.embedding.throughput import make_test_jpegs

    root = tmp_path_factory.mktemp("patchrt")
    refs = make_test_jpegs(root / "refs", 24, seed=1, size=(320, 240))
    incoming = make_test_jpegs(root / "incoming", 8, seed=2, size=(320, 240))
    return refs[0].parent, incoming[0].parent


def _fit_and_score(folders, runtime, cache, representation="efficientnet-lite0/patches:stage2+stage3",
                   detector="patch-knn"):
    import oddling

    options = oddling.RunOptions(runtime=runtime, use_cache=False, progress=False, cache_dir=cache)
    bank = oddling.fit(folders[0], None, detector=detector, representation=representation, target_fpr=0.2,
                       options=options)
    result = oddling.score(folders[1], bank, options=options)
    return bank, {r.path: r for r in result.rows}


@pytest.mark.filterwarnings("ignore::oddling.api.OddlingWarning")   # few calibration images, expected here
@pytest.mark.parametrize("runtime", EXPORT_RUNTIMES)
def test_patch_bank_and_scores_on_the_export_runtime_equal_the_torch_runtime(tmp_path, patch_folders, runtime):
    """The export runtime changes speed, not answers. Patch scores are distances in feature units
    (about 30 here, where one float32 step is 1.9e-6), so they are compared relatively: within
    1e-5 of each value; the bank keeps the same patches (same coreset rows) within 1e-5 of the
    features' scale."""
    torch_bank, torch_rows = _fit_and_score(patch_folders, "torch", tmp_path / "cache")
    fast_bank, fast_rows = _fit_and_score(patch_folders, runtime, tmp_path / "cache")
    assert fast_bank.representation == torch_bank.representation   # same fingerprint: banks interchange
    np.testing.assert_allclose(fast_bank.calibration_scores, torch_bank.calibration_scores, rtol=1e-5, atol=0)
    np.testing.assert_array_equal(fast_bank.detector.sources_, torch_bank.detector.sources_)
    scale = np.abs(torch_bank.detector.patches_).max()
    np.testing.assert_allclose(fast_bank.detector.patches_, torch_bank.detector.patches_, rtol=0, atol=1e-5 * scale)
    assert set(fast_rows) == set(torch_rows)
    worst = 0.0
    for path, row in torch_rows.items():
        assert fast_rows[path].score == pytest.approx(row.score, rel=1e-5, abs=0)
        assert fast_rows[path].nearest == row.nearest
        np.testing.assert_allclose(fast_rows[path].anomaly_grid, row.anomaly_grid, rtol=1e-5, atol=0)
        worst = max(worst, abs(fast_rows[path].score - row.score) / row.score)
    print(f"\n[runtime] patch scores {runtime} vs torch: largest relative difference {worst:.1e}")


@pytest.mark.filterwarnings("ignore::oddling.api.OddlingWarning")
def test_pooled_stages_on_the_default_runtime_equal_the_torch_runtime(tmp_path, patch_folders):
    """Pooled stages are unit vectors and their kNN scores cosine distances, so 1e-5 absolute, as
    for the embedding."""
    rep = "efficientnet-lite0/stages:stage3+stage5"
    torch_bank, torch_rows = _fit_and_score(patch_folders, "torch", tmp_path / "cache", rep, "knn")
    auto_bank, auto_rows = _fit_and_score(patch_folders, "auto", tmp_path / "cache", rep, "knn")
    np.testing.assert_allclose(auto_bank.features, torch_bank.features, rtol=0, atol=1e-5)
    np.testing.assert_allclose(auto_bank.calibration_scores, torch_bank.calibration_scores, rtol=0, atol=1e-5)
    for path, row in torch_rows.items():
        assert auto_rows[path].score == pytest.approx(row.score, abs=1e-5)
