"""Backbone registry: manifest entry -> verified weights -> network that maps images to embeddings.

Each family (one module per network type) provides `build(spec, weights_path) -> nn.Module`
whose `features(x)` returns one vector per image and whose `forward_intermediates(x, stages)`
returns the (N, C, H, W) outputs of the named stages the manifest lists (OddlingError for a
network that exposes none). Families are looked up by the manifest's `family` field.
"""
from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np
import torch

from oddling.errors import OddlingError
from oddling.paths import cache_dir
from oddling.backbones import efficientnet_lite
from oddling.backbones import onnx_runtime
from oddling.backbones import openclip
from oddling.backbones import torchvision_family
from oddling.backbones.manifest import BackboneSpec, get_spec, load_manifest
from oddling.backbones.weights import resolve_weights

FAMILIES = {
    "efficientnet_lite": efficientnet_lite.build,
    "open_clip": openclip.build,
    "torchvision": torchvision_family.build,
}

DEFAULT_BACKBONE = "efficientnet-lite0"


RUNTIMES = ("auto", "onnx", "torch")


class Backbone:
    """A loaded network plus what identifies it: manifest spec and weight checksum.

    With an ONNX Runtime session the network is exported once into the cache, and the first
    batch also runs in PyTorch to prove both agree.
    """

    def __init__(self, spec: BackboneSpec, weights_sha256: str, network: torch.nn.Module,
                 onnx_session=None):
        self.spec = spec
        self.weights_sha256 = weights_sha256
        self.network = network
        self.onnx = onnx_session
        self.channels_last = spec.family == "efficientnet_lite"
        if self.channels_last:
            # Depthwise convolutions run about twice as fast in this memory layout on CPU.
            self.network = self.network.to(memory_format=torch.channels_last)

    @property
    def runtime(self) -> str:
        return "onnx" if self.onnx is not None else "torch"

    @property
    def id(self) -> str:
        return self.spec.id

    @property
    def preprocessing(self):
        return self.spec.preprocessing

    @property
    def embedding_dim(self) -> int:
        return self.spec.embedding_dim

    @property
    def stages(self) -> dict[str, dict]:
        """Intermediate stages from the manifest: name -> {"channels", "stride"}, network order."""
        return self.spec.stages

    def fingerprint(self) -> dict:
        """What a bank records to refuse mixing embeddings from different networks."""
        return {
            "id": self.spec.id,
            "weights_sha256": self.weights_sha256,
            "preprocessing": self.spec.preprocessing.to_dict(),
            "embedding_dim": self.spec.embedding_dim,
        }

    @torch.inference_mode()
    def torch_features(self, batch: np.ndarray) -> np.ndarray:
        x = torch.from_numpy(np.ascontiguousarray(batch, dtype=np.float32))
        if self.channels_last:
            x = x.contiguous(memory_format=torch.channels_last)
        return self.network.features(x).float().numpy()

    @torch.inference_mode()
    def torch_intermediates(self, batch: np.ndarray, stages: Sequence[str]) -> list[np.ndarray]:
        """(N, 3, H, W) preprocessed float32 -> the (N, C, H/stride, W/stride) outputs of `stages`,
        in the order asked, as float32 arrays."""
        x = torch.from_numpy(np.ascontiguousarray(batch, dtype=np.float32))
        if self.channels_last:
            x = x.contiguous(memory_format=torch.channels_last)
        outputs = self.network.forward_intermediates(x, stages)
        return [np.ascontiguousarray(y.float().numpy()) for y in outputs]

    def embed(self, batch: np.ndarray) -> np.ndarray:
        """(N, 3, H, W) preprocessed float32 -> (N, D) float32 L2-normalised embeddings."""
        if self.onnx is None:
            feats = self.torch_features(batch)
        else:
            feats = self.onnx.features(batch)
            if not self.onnx.verified:
                self.onnx.verify(self.torch_features(batch), feats)
        norms = np.linalg.norm(feats, axis=1, keepdims=True)
        return (feats / np.maximum(norms, 1e-12)).astype(np.float32, copy=False)


def load_backbone(backbone_id: str = DEFAULT_BACKBONE, cache: str | Path | None = None,
                  runtime: str = "torch") -> Backbone:
    """Load and verify a backbone. runtime "auto" uses ONNX Runtime when installed, else PyTorch."""
    if runtime not in RUNTIMES:
        raise OddlingError(f"runtime must be one of {', '.join(RUNTIMES)}, got: {runtime!r}")
    spec = get_spec(backbone_id)
    if spec.family not in FAMILIES:
        raise OddlingError(f"backbone {spec.id!r} has family {spec.family!r}, which this oddling cannot build")
    if runtime == "onnx" and not onnx_runtime.available():
        raise OddlingError("runtime 'onnx' needs the onnxruntime package: pip install onnxruntime")
    folder = cache_dir(cache)
    try:
        path, sha = resolve_weights(spec, folder)
    except OSError as exc:   # e.g. pinning a new weight file's checksum in a read-only cache folder
        raise OddlingError(f"cannot use the cache folder {folder} for backbone {spec.id!r} "
                           f"({exc.strerror or exc}); pass --cache-dir with a writable folder") from exc
    network = FAMILIES[spec.family](spec, path)
    session = None
    if runtime == "onnx" or (runtime == "auto" and onnx_runtime.available()):
        session = _onnx_session(network, spec, sha, folder, required=runtime == "onnx")
    return Backbone(spec, sha, network, session)


def _onnx_session(network, spec: BackboneSpec, sha: str, folder: Path, required: bool):
    """The ONNX Runtime session, exporting first if the cache holds no export (an existing one is
    only read). Where the export cannot be written or opened: OddlingError if ONNX was asked for
    (`required`), else a warning that says why and how to fix it, and None (PyTorch runs instead)."""
    onnx_file = onnx_runtime.export_path(folder, spec.id, sha, spec.preprocessing.crop)
    try:
        if not onnx_file.is_file():
            onnx_runtime.export(network, spec.preprocessing.crop, onnx_file)
        return onnx_runtime.OnnxSession(onnx_file)
    except OSError as exc:
        reason = f"cannot write the ONNX export into {onnx_file.parent} ({exc.strerror or exc})"
        fix = "pass --cache-dir with a writable folder"
    except Exception as exc:   # onnxruntime's own errors for a damaged file (InvalidProtobuf, Fail, ...)
        reason = f"cannot open the ONNX export {onnx_file} ({type(exc).__name__})"
        fix = "delete that file to export it again"
    if required:
        raise OddlingError(f"runtime 'onnx': {reason}; {fix}, or use --runtime torch")
    import warnings

    from oddling.jobs.common import OddlingWarning

    warnings.warn(f"{reason}: running with PyTorch instead (slower, same results); {fix} to use ONNX Runtime",
                  OddlingWarning, stacklevel=3)
    return None


__all__ = ["RUNTIMES", "Backbone", "BackboneSpec", "DEFAULT_BACKBONE", "FAMILIES", "get_spec", "load_backbone", "load_manifest"]
