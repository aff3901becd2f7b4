"""Backbone registry: manifest entry -> verified weights -> network that maps images to embeddings.

Each family (one module per network type) provides `build(spec, weights_path) -> nn.Module`
whose `features(x)` returns one vector per image. Families are looked up by the manifest's
`family` field.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import torch

from ..errors import OddlingError
from ..paths import cache_dir
from . import efficientnet_lite, openclip
from .manifest import BackboneSpec, get_spec, load_manifest
from .weights import resolve_weights

FAMILIES = {
    "efficientnet_lite": efficientnet_lite.build,
    "open_clip": openclip.build,
}

DEFAULT_BACKBONE = "efficientnet-lite0"


class Backbone:
    """A loaded network plus what identifies it: manifest spec and weight checksum."""

    def __init__(self, spec: BackboneSpec, weights_sha256: str, network: torch.nn.Module):
        self.spec = spec
        self.weights_sha256 = weights_sha256
        self.network = network
        self.channels_last = spec.family == "efficientnet_lite"
        if self.channels_last:
            # Depthwise convolutions run about twice as fast in this memory layout on CPU.
            self.network = self.network.to(memory_format=torch.channels_last)

    @property
    def id(self) -> str:
        return self.spec.id

    @property
    def preprocessing(self):
        return self.spec.preprocessing

    @property
    def embedding_dim(self) -> int:
        return self.spec.embedding_dim

    def fingerprint(self) -> dict:
        """What a bank records to refuse mixing embeddings from different networks."""
        return {
            "id": self.spec.id,
            "weights_sha256": self.weights_sha256,
            "preprocessing": self.spec.preprocessing.to_dict(),
            "embedding_dim": self.spec.embedding_dim,
        }

    @torch.inference_mode()
    def embed(self, batch: np.ndarray) -> np.ndarray:
        """(N, 3, H, W) preprocessed float32 -> (N, D) float32 L2-normalised embeddings."""
        x = torch.from_numpy(np.ascontiguousarray(batch, dtype=np.float32))
        if self.channels_last:
            x = x.contiguous(memory_format=torch.channels_last)
        feats = self.network.features(x).float()
        feats = torch.nn.functional.normalize(feats, dim=1)
        return feats.numpy().astype(np.float32, copy=False)


def load_backbone(backbone_id: str = DEFAULT_BACKBONE, cache: str | Path | None = None) -> Backbone:
    spec = get_spec(backbone_id)
    if spec.family not in FAMILIES:
        raise OddlingError(f"backbone {spec.id!r} has family {spec.family!r}, which this oddling cannot build")
    path, sha = resolve_weights(spec, cache_dir(cache))
    return Backbone(spec, sha, FAMILIES[spec.family](spec, path))


__all__ = ["Backbone", "BackboneSpec", "DEFAULT_BACKBONE", "FAMILIES", "get_spec", "load_backbone", "load_manifest"]
