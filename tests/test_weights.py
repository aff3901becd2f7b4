"""Weight files are found, verified before loading, pinned when unknown; missing files say where to go.

The open_clip path is tested with a weight file the test creates: a randomly initialised
ViT-B-32 saved to disk. No network.
"""
import dataclasses

import numpy as np
import pytest
import torch

from oddling.backbones import load_backbone
from oddling.backbones.manifest import get_spec
from oddling.backbones.weights import expected_cache_path, import_weights, resolve_weights
from oddling.data.intake import sha256_file
from oddling.errors import OddlingError

CLIP_ID = "openclip-vit-b-32-laion2b"


@pytest.fixture(scope="module")
def random_clip_file(tmp_path_factory):
    open_clip = pytest.importorskip("open_clip")
    torch.manual_seed(0)
    model = open_clip.create_model("ViT-B-32", pretrained=None)
    path = tmp_path_factory.mktemp("clip") / "open_clip_pytorch_model.bin"
    torch.save(model.state_dict(), path)
    return path, model.eval()


def test_embedded_weights_checksum_matches_manifest(tmp_path):
    spec = get_spec("efficientnet-lite0")
    path, sha = resolve_weights(spec, tmp_path)
    assert sha == "579344248a93e23026e6b78f1f6faf0bc1d282386f6c881cdbaacd49cabf77db"   # measured on the package file


@pytest.mark.parametrize("backbone_id, sha256", [
    ("efficientnet-lite1", "77cc7160d37bebc1e0d68dc9e8d1e836a263e063f0825ec80d85670b2c913850"),
    ("efficientnet-lite2", "9656183eaeafe8cbf0cf560089305d34668787f6a26377ccbe5be192ed3f855d"),
])
def test_scaled_lite_weights_checksum_matches_manifest(tmp_path, backbone_id, sha256):
    path, sha = resolve_weights(get_spec(backbone_id), tmp_path)
    assert sha == sha256   # measured with sha256sum on the package file
    assert path.name == get_spec(backbone_id).weights["filename"]


def test_tampered_weights_refused(tmp_path):
    spec = get_spec("efficientnet-lite0")
    bad = dataclasses.replace(spec, weights=dict(spec.weights, sha256="0" * 64))
    with pytest.raises(OddlingError, match="expected 0000"):
        resolve_weights(bad, tmp_path)


def test_missing_clip_weights_say_which_file_where(tmp_path):
    with pytest.raises(OddlingError) as err:
        load_backbone(CLIP_ID, tmp_path)
    message = str(err.value)
    assert "open_clip_pytorch_model.bin" in message
    assert str(expected_cache_path(get_spec(CLIP_ID), tmp_path)) in message


def test_cache_dir_env_var_is_used(tmp_path, monkeypatch):
    monkeypatch.setenv("ODDLING_CACHE_DIR", str(tmp_path / "envcache"))
    with pytest.raises(OddlingError, match="envcache"):
        load_backbone(CLIP_ID)


def test_clip_loads_from_cache_and_matches_open_clip(tmp_path, random_clip_file):
    path, model = random_clip_file
    import_weights(get_spec(CLIP_ID), path, tmp_path)
    backbone = load_backbone(CLIP_ID, tmp_path)
    x = torch.randn(2, 3, 224, 224)
    ours = backbone.embed(x.numpy())
    with torch.inference_mode():
        theirs = torch.nn.functional.normalize(model.encode_image(x), dim=1).numpy()  # open_clip reference
    assert ours.shape == (2, 512)
    np.testing.assert_allclose(ours, theirs, atol=1e-5)


def test_unknown_checksum_pinned_then_enforced(tmp_path, random_clip_file):
    path, _ = random_clip_file
    spec = get_spec(CLIP_ID)
    import_weights(spec, path, tmp_path)
    _, sha = resolve_weights(spec, tmp_path)
    assert sha == sha256_file(path)
    target = expected_cache_path(spec, tmp_path)
    target.write_bytes(target.read_bytes()[:-10] + b"0123456789")   # file changed after pinning
    with pytest.raises(OddlingError, match="SHA-256"):
        resolve_weights(spec, tmp_path)
