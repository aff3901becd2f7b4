"""The torchvision backbones: the manifest says what torchvision's weight enums say, the wrapper
gives torchvision's own outputs, the stages have the manifest's shapes, and each backbone works
from a weight file through import, the PyTorch and ONNX runtimes and every representation.

The outside reference is the installed torchvision: its `*_Weights` enums (url, file name,
transforms) and its models' own forward passes. Weight files are random (seeded) state dicts
of `torchvision.models.<arch>(weights=None)` that the tests save; the manifest's `sha256_prefix`
(the real files' digests) is replaced by the test file's in a patched manifest. No network.
"""
import copy
import dataclasses

import numpy as np
import pytest
import torch

from oddling.backbones import load_backbone, manifest
from oddling.backbones.manifest import get_spec
from oddling.backbones.representation import load_representation
from oddling.backbones.torchvision_family import ARCHITECTURES, VIT_STAGE_BLOCKS, build, make_network
from oddling.backbones.weights import expected_cache_path, import_file, verify_weights
from oddling.data.intake import sha256_file
from oddling.errors import OddlingError

torchvision = pytest.importorskip("torchvision")

TORCHVISION_IDS = ("resnet18", "resnet50", "convnext-tiny", "efficientnet-b0", "regnety-800mf", "vit-b-16")
SMALL = ("resnet18", "efficientnet-b0", "regnety-800mf")   # cheap enough for the heavier end-to-end checks
ONNX_IDS = ("resnet18", "convnext-tiny", "efficientnet-b0", "vit-b-16")   # resnet50 is resnet18's code; RegNet's SE blocks are EfficientNet's pattern
TEST_PREFIXES: dict[str, str] = {}   # backbone id -> the random test file's SHA-256 prefix


@pytest.fixture(scope="module", autouse=True)
def manifest_with_test_prefixes():
    """The manifest as shipped, but each test file's digest prefix in place of the real file's."""
    shipped = manifest.load_manifest()

    def patched():
        return {sid: dataclasses.replace(s, weights=dict(s.weights, sha256_prefix=TEST_PREFIXES[sid]))
                if sid in TEST_PREFIXES else s for sid, s in shipped.items()}

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(manifest, "load_manifest", patched)
        yield


def random_weights(folder, backbone_id: str, seed: int = 0):
    """A seeded random torchvision model of the backbone's architecture, saved as its state dict."""
    torch.manual_seed(seed)
    model = getattr(torchvision.models, get_spec(backbone_id).architecture)(weights=None).eval()
    path = folder / f"{backbone_id}-random.pth"
    torch.save(model.state_dict(), path)
    return path, model


@pytest.fixture(scope="module")
def cache(tmp_path_factory):
    return tmp_path_factory.mktemp("tv-cache")


@pytest.fixture(scope="module")
def random_files(tmp_path_factory):
    """backbone id -> (path, model): one random weight file per architecture, made when first asked for."""
    made = {}

    def get(backbone_id):
        if backbone_id not in made:
            made[backbone_id] = random_weights(tmp_path_factory.mktemp("tv-weights"), backbone_id)
        return made[backbone_id]

    return get


@pytest.fixture(scope="module")
def imported(random_files, cache):
    """backbone id -> the torchvision model whose random weights were imported into `cache`."""
    done = set()

    def get(backbone_id):
        path, model = random_files(backbone_id)
        if backbone_id not in done:
            TEST_PREFIXES[backbone_id] = sha256_file(path)[:8]
            import_file(get_spec(backbone_id), path, cache)
            done.add(backbone_id)
        return model

    return get


def weight_enum(spec):
    enum_name, member = spec.weights["torchvision_weights"].split(".")
    return getattr(getattr(torchvision.models, enum_name), member)


@pytest.mark.parametrize("backbone_id", TORCHVISION_IDS)
def test_manifest_is_what_the_torchvision_weight_enum_says(backbone_id):
    spec = get_spec(backbone_id)
    weights = weight_enum(spec)
    assert spec.weights["url"] == weights.url
    assert spec.weights["filename"] == weights.url.rsplit("/", 1)[1]
    t = weights.transforms()
    prep = spec.preprocessing
    assert (prep.resize_shorter, prep.crop, spec.input_size) == (t.resize_size[0], t.crop_size[0], t.crop_size[0])
    assert prep.interpolation == t.interpolation.value
    np.testing.assert_allclose(prep.mean, np.array(t.mean) * 255, atol=1e-3)   # manifest: RGB 0..255 units
    np.testing.assert_allclose(prep.std, np.array(t.std) * 255, atol=1e-3)
    assert spec.weights["sha256"] is None and spec.weights["source"] == "cache_file"


def test_shipped_prefixes_are_the_file_names_hash():
    # torch.hub's convention: the file name ends in -<first hex digits of its SHA-256>.<ext>
    shipped = manifest.parse_manifest(manifest.manifest_path().read_text(encoding="utf-8"))
    for backbone_id in TORCHVISION_IDS:
        w = shipped[backbone_id].weights
        assert w["filename"].rsplit("-", 1)[1].split(".")[0] == w["sha256_prefix"]
        assert len(w["sha256_prefix"]) == 8


@pytest.mark.parametrize("backbone_id", TORCHVISION_IDS)
def test_manifest_stages_and_dim_are_the_networks(backbone_id):
    spec = get_spec(backbone_id)
    network = make_network(spec)
    assert {n: (s["channels"], s["stride"]) for n, s in spec.stages.items()} == ARCHITECTURES[spec.architecture].stages
    x = torch.randn(2, 3, 224, 224)
    with torch.inference_mode():
        outputs = network.forward_intermediates(x, list(spec.stages))
        features = network.features(x)
    for (name, info), y in zip(spec.stages.items(), outputs):
        side = 224 // info["stride"]
        assert tuple(y.shape) == (2, info["channels"], side, side), name
    assert tuple(features.shape) == (2, spec.embedding_dim)
    first_linear = next(m for m in network.classifier().modules() if isinstance(m, torch.nn.Linear))
    assert first_linear.in_features == spec.embedding_dim   # the embedding is the classifier's input


def stage_modules(model, kind):
    """The torchvision modules whose outputs the stages are, read off the architectures."""
    if kind == "resnet":
        return [model.layer1, model.layer2, model.layer3, model.layer4]
    if kind == "convnext":
        return [model.features[i] for i in (1, 3, 5, 7)]
    if kind == "efficientnet":
        return [model.features[i] for i in range(1, 9)]
    if kind == "regnet":
        return [getattr(model.trunk_output, f"block{i}") for i in range(1, 5)]
    return [model.encoder.layers[b - 1] for b in VIT_STAGE_BLOCKS]


def penultimate_reference(model, kind):
    """torchvision's model with its last linear layer replaced by the identity: its output is the
    classifier's input, which the embedding must be."""
    ref = copy.deepcopy(model)
    if kind in ("resnet", "regnet"):
        ref.fc = torch.nn.Identity()
    elif kind == "convnext":
        ref.classifier[2] = torch.nn.Identity()
    elif kind == "efficientnet":
        ref.classifier[1] = torch.nn.Identity()
    else:
        ref.heads = torch.nn.Identity()
    return ref.eval()


@pytest.mark.parametrize("backbone_id", TORCHVISION_IDS)
def test_outputs_are_torchvisions_own(backbone_id, random_files):
    spec = get_spec(backbone_id)
    path, model = random_files(backbone_id)
    network = build(spec, path)
    kind = ARCHITECTURES[spec.architecture].kind
    captured = []
    hooks = [m.register_forward_hook(lambda mod, inp, out: captured.append(out)) for m in stage_modules(model, kind)]
    x = torch.randn(2, 3, 224, 224)
    try:
        with torch.inference_mode():
            logits = model(x)
    finally:
        for h in hooks:
            h.remove()
    with torch.inference_mode():
        torch.testing.assert_close(network(x), logits, rtol=0, atol=1e-5)
        torch.testing.assert_close(network.features(x), penultimate_reference(model, kind)(x), rtol=0, atol=1e-5)
        ours = network.forward_intermediates(x, list(spec.stages))
    for name, a, b in zip(spec.stages, ours, captured):
        if kind == "vit":   # (N, 1 + tokens, 768) sequence -> (N, 768, 14, 14) grid without the class token
            b = b[:, 1:].transpose(1, 2).reshape(2, 768, 14, 14)
        torch.testing.assert_close(a, b, rtol=0, atol=1e-5, msg=name)


@pytest.mark.parametrize("backbone_id", ["resnet18", "vit-b-16"])
def test_stages_come_in_the_order_asked_and_run_no_further(backbone_id):
    spec = get_spec(backbone_id)
    network = make_network(spec)
    kind = ARCHITECTURES[spec.architecture].kind
    last = stage_modules(network.model, kind)[-1]
    called = []
    hook = last.register_forward_hook(lambda *a: called.append(True))
    x = torch.randn(1, 3, 224, 224)
    try:
        with torch.inference_mode():
            late_first = network.forward_intermediates(x, ["stage3", "stage1"])
            alone = [network.forward_intermediates(x, [s])[0] for s in ("stage3", "stage1")]
        assert called == []
    finally:
        hook.remove()
    for a, b in zip(late_first, alone):
        torch.testing.assert_close(a, b, rtol=0, atol=0)
    assert late_first[0].shape[1] == spec.stages["stage3"]["channels"]


def test_unknown_or_no_stage_is_a_clear_error():
    network = make_network(get_spec("resnet18"))
    with pytest.raises(OddlingError) as err:
        network.forward_intermediates(torch.zeros(1, 3, 64, 64), ["stage2", "stage9"])
    assert "'stage9'" in str(err.value) and "stage1, stage2, stage3, stage4" in str(err.value)
    with pytest.raises(OddlingError, match="at least one stage"):
        network.forward_intermediates(torch.zeros(1, 3, 64, 64), [])


def test_vit_refuses_other_input_sizes():
    network = make_network(get_spec("vit-b-16"))
    with pytest.raises(OddlingError, match="224x224"):
        network.features(torch.zeros(1, 3, 160, 160))


def test_manifest_that_disagrees_with_the_network_is_refused(tmp_path):
    spec = get_spec("resnet18")
    wrong = dataclasses.replace(spec, stages=dict(spec.stages, stage2={"channels": 96, "stride": 8}))
    with pytest.raises(OddlingError, match="stage2"):
        make_network(wrong)
    with pytest.raises(OddlingError, match="embedding_dim 256"):
        make_network(dataclasses.replace(spec, embedding_dim=256))


@pytest.mark.parametrize("backbone_id", TORCHVISION_IDS)
def test_imported_file_loads_and_embeds(backbone_id, imported, cache):
    model = imported(backbone_id)
    spec = get_spec(backbone_id)
    backbone = load_backbone(backbone_id, cache, runtime="torch")
    assert backbone.weights_sha256.startswith(TEST_PREFIXES[backbone_id])
    x = np.random.default_rng(0).standard_normal((2, 3, 224, 224)).astype(np.float32)
    vec = backbone.embed(x)
    with torch.inference_mode():
        ref = penultimate_reference(model, ARCHITECTURES[spec.architecture].kind)(torch.from_numpy(x))
    np.testing.assert_allclose(vec, torch.nn.functional.normalize(ref, dim=1).numpy(), atol=1e-5)
    assert verify_weights(spec, cache).ok


@pytest.mark.parametrize("backbone_id", ONNX_IDS)
def test_onnx_runtime_agrees_with_pytorch(backbone_id, imported, cache):
    imported(backbone_id)
    torch_net = load_backbone(backbone_id, cache, runtime="torch")
    onnx_net = load_backbone(backbone_id, cache, runtime="onnx")
    assert onnx_net.runtime == "onnx"
    x = np.random.default_rng(1).standard_normal((3, 3, 224, 224)).astype(np.float32)   # not the export's batch of 2
    a = onnx_net.embed(x)            # the first batch is also checked against PyTorch by the runtime itself
    assert onnx_net.onnx.verified
    np.testing.assert_allclose(a, torch_net.embed(x), atol=1e-4)


@pytest.mark.parametrize("backbone_id", SMALL + ("vit-b-16",))
def test_stage_and_patch_representations(backbone_id, imported, cache):
    imported(backbone_id)
    spec = get_spec(backbone_id)
    x = np.random.default_rng(2).standard_normal((2, 3, 224, 224)).astype(np.float32)
    stages = load_representation(f"{backbone_id}/stages:stage1+stage4", cache, runtime="torch")
    assert stages.embedding_dim == spec.stages["stage1"]["channels"] + spec.stages["stage4"]["channels"]
    vec = stages.embed(x)
    assert vec.shape == (2, stages.embedding_dim)
    np.testing.assert_allclose(np.linalg.norm(vec, axis=1), 1.0, atol=1e-5)
    patches = load_representation(f"{backbone_id}/patches:stage2+stage3", cache, runtime="torch")
    grid = patches.preprocessing.crop // 8
    feats = patches.embed(x)
    assert patches.patch_shape == (grid * grid, patches.embedding_dim) == feats.shape[1:]


@pytest.mark.filterwarnings("ignore::oddling.OddlingWarning")   # few references for the 1% rate
def test_tune_tries_a_torchvision_embedding_and_stages(imported, cache, tmp_path):
    """`oddling tune` runs the new representations end to end (on invented images: the test is that
    it runs and ranks them, not how well)."""
    import oddling
    from PIL import Image

    imported("resnet18")
    rng = np.random.default_rng(0)
    for folder, n in (("reference", 12), ("test/normal", 12), ("test/odd", 12)):
        (tmp_path / folder).mkdir(parents=True)
        for i in range(n):
            base = np.full((64, 64, 3), 120, np.uint8) if "odd" not in folder else np.full((64, 64, 3), 30, np.uint8)
            noise = rng.integers(0, 40, (64, 64, 3), dtype=np.uint8)
            Image.fromarray(base + noise).save(tmp_path / folder / f"{i}.png")
    grid = [("resnet18", "knn", {"k": 3}), ("resnet18/stages:stage2+stage4", "knn", {"k": 3})]
    options = oddling.RunOptions(progress=False, cache_dir=cache, runtime="torch")
    result = oddling.tune(tmp_path / "test", tmp_path / "reference", tmp_path / "tuned.bank",
                          grid=grid, options=options)
    assert {t.representation: t.status for t in result.leaderboard} == {
        "resnet18": "ok", "resnet18/stages:stage2+stage4": "ok"}
    assert oddling.load_bank(result.bank_path).representation["backbone"] == "resnet18"


def test_import_refuses_a_file_that_is_not_weights(tmp_path):
    spec = get_spec("convnext-tiny")
    text = tmp_path / "convnext_tiny-983f1562.pth"
    text.write_text("hello\n")   # 6 bytes
    with pytest.raises(OddlingError, match="not a readable PyTorch weight file"):
        import_file(dataclasses.replace(spec, weights=dict(spec.weights, sha256_prefix=None)), text, tmp_path)
    assert not expected_cache_path(spec, tmp_path).exists()
    assert not (tmp_path / "weights" / "pins.json").exists()
    assert list((tmp_path / "weights" / spec.id).iterdir()) == []   # no staged copy left behind


def test_import_refuses_another_architectures_weights(tmp_path, random_files):
    path, _ = random_files("resnet50")
    spec = get_spec("resnet18")
    loose = dataclasses.replace(spec, weights=dict(spec.weights, sha256_prefix=None))
    with pytest.raises(OddlingError) as err:
        import_file(loose, path, tmp_path / "cache")
    message = str(err.value)
    assert "does not fit backbone 'resnet18'" in message and "wrong shapes" in message and "unexpected keys" in message
    assert not (tmp_path / "cache" / "weights" / "pins.json").exists()


def test_import_refuses_a_file_whose_digest_is_not_the_file_names(tmp_path, random_files):
    spec = get_spec("efficientnet-b0")
    spec = dataclasses.replace(spec, weights=dict(spec.weights, sha256_prefix="7f5810bc"))   # the shipped one
    path, _ = random_files("efficientnet-b0")
    with pytest.raises(OddlingError, match="does not start with 7f5810bc"):
        import_file(spec, path, tmp_path / "cache")
    assert not expected_cache_path(spec, tmp_path / "cache").exists()
