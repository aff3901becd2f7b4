"""ONNX Runtime gives the same embeddings as PyTorch on real images (scikit-image's samples)."""
import numpy as np
import pytest
from PIL import Image

from oddling.backbones import load_backbone
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
