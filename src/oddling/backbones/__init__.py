"""Backbone registry: manifest entry -> verified weights -> network that maps images to embeddings.

Each family (one module per network type) provides `build(spec, weights_path) -> nn.Module`
whose `features(x)` returns one vector per image and whose `forward_intermediates(x, stages)`
returns the (N, C, H, W) outputs of the named stages the manifest lists (OddlingError for a
network that exposes none). Families are looked up by the manifest's `family` field.

Nothing here imports torch: the PyTorch network is built only when something needs it (the
first export, the first verification of an export, `--runtime torch`, intermediate stages). A
process that embeds through a verified export never loads torch.
"""
from __future__ import annotations

import importlib
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from oddling.errors import OddlingError, OddlingWarning
from oddling.paths import cache_dir
from oddling.backbones import onnx_runtime
from oddling.backbones import openvino_runtime
from oddling.backbones.manifest import BackboneSpec, get_spec, load_manifest
from oddling.backbones.weights import resolve_weights


class _FamilyBuilder:
    """`build` of a family module, imported on first call (the modules import torch)."""

    def __init__(self, module: str):
        self.module = module

    def __call__(self, spec, weights_path):
        return importlib.import_module(self.module).build(spec, weights_path)

    def __repr__(self) -> str:
        return f"<build of {self.module}>"


FAMILIES = {
    "efficientnet_lite": _FamilyBuilder("oddling.backbones.efficientnet_lite"),
    "open_clip": _FamilyBuilder("oddling.backbones.openclip"),
    "torchvision": _FamilyBuilder("oddling.backbones.torchvision_family"),
}

DEFAULT_BACKBONE = "efficientnet-lite0"

# "auto": OpenVINO when installed, else ONNX Runtime, else PyTorch.
RUNTIMES = ("auto", "openvino", "onnx", "torch")
PRECISIONS = openvino_runtime.PRECISIONS


def split_runtime(runtime: str) -> tuple[str, str]:
    """"openvino:bf16" -> ("openvino", "bf16"); "auto" -> ("auto", "fp32"). RunOptions folds
    `precision` into the runtime text this way, so every job passes it on unchanged."""
    name, _, precision = str(runtime).partition(":")
    return name, precision or "fp32"


def resolve_runtime(runtime: str, precision: str = "fp32") -> str:
    """The runtime that `runtime` means on this machine; OddlingError when it is not installed."""
    if runtime not in RUNTIMES:
        raise OddlingError(f"runtime must be one of {', '.join(RUNTIMES)}, got: {runtime!r}")
    if precision not in PRECISIONS:
        raise OddlingError(f"precision must be one of {', '.join(PRECISIONS)}, got: {precision!r}")
    if runtime == "auto":
        if openvino_runtime.available():
            runtime = "openvino"
        elif precision != "fp32":
            raise OddlingError(f"precision {precision} needs OpenVINO: pip install openvino")
        else:
            runtime = "onnx" if onnx_runtime.available() else "torch"
    if runtime == "openvino" and not openvino_runtime.available():
        raise OddlingError("runtime 'openvino' needs the openvino package: pip install openvino")
    if runtime == "onnx" and not onnx_runtime.available():
        raise OddlingError("runtime 'onnx' needs the onnxruntime package: pip install onnxruntime")
    if precision != "fp32" and runtime != "openvino":
        raise OddlingError(f"precision {precision} is only available with the OpenVINO runtime "
                           f"(--runtime openvino or auto), not {runtime!r}")
    return runtime


def stage_channels(spec: BackboneSpec, stages: Sequence[str]) -> int:
    """The channels of `stages` together; OddlingError naming the valid ones for an unknown stage."""
    known = spec.stages
    if not known:
        raise OddlingError(f"backbone {spec.id!r} exposes no intermediate stages; use its embedding "
                           "or a backbone that lists stages (`oddling backbones list`)")
    unknown = [s for s in stages if s not in known]
    if unknown:
        raise OddlingError(f"backbone {spec.id!r} has no stage {unknown[0]!r}; its stages: {', '.join(known)}")
    return sum(int(known[s]["channels"]) for s in stages)


class Backbone:
    """A network plus what identifies it: manifest spec and weight checksum.

    With an export session (OpenVINO or ONNX Runtime) the network is exported once into the
    cache, and the first batch also runs in PyTorch to prove both agree; after that the PyTorch
    network is not even built. `network` builds it on first use (`network_factory`). The export
    gives the embedding (`embed`), or, for a backbone loaded with `stages`, those stages' outputs
    (`intermediates`).
    """

    def __init__(self, spec: BackboneSpec, weights_sha256: str, network=None, onnx_session=None,
                 network_factory=None):
        if network is None and network_factory is None:
            raise ValueError("Backbone needs a network or a network_factory")
        self.spec = spec
        self.weights_sha256 = weights_sha256
        self._network = None
        self._factory = network_factory
        self.onnx = onnx_session   # the export's session (ONNX Runtime or OpenVINO), or None
        self.channels_last = spec.family == "efficientnet_lite"
        if network is not None:
            self._network = self._prepare(network)

    def _prepare(self, network):
        if self.channels_last:
            import torch

            # Depthwise convolutions run about twice as fast in this memory layout on CPU.
            network = network.to(memory_format=torch.channels_last)
        return network

    @property
    def network(self):
        """The PyTorch network, built (and torch imported) on first use."""
        if self._network is None:
            self._network = self._prepare(self._factory())
        return self._network

    @property
    def session(self):
        return self.onnx

    @property
    def runtime(self) -> str:
        """"torch", "onnx", "openvino" or "openvino-bf16": what made the vectors (embedding cache key)."""
        return self.onnx.runtime if self.onnx is not None else "torch"

    @property
    def precision(self) -> str:
        return getattr(self.onnx, "precision", "fp32")

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
        """What a bank records to refuse mixing embeddings from different networks. A reduced
        precision is recorded too (fp32 banks keep the fingerprint they always had)."""
        out = {
            "id": self.spec.id,
            "weights_sha256": self.weights_sha256,
            "preprocessing": self.spec.preprocessing.to_dict(),
            "embedding_dim": self.spec.embedding_dim,
        }
        if self.precision != "fp32":
            out["precision"] = self.precision
        return out

    def torch_features(self, batch: np.ndarray) -> np.ndarray:
        import torch

        with torch.inference_mode():
            x = torch.from_numpy(np.ascontiguousarray(batch, dtype=np.float32))
            if self.channels_last:
                x = x.contiguous(memory_format=torch.channels_last)
            return self.network.features(x).float().numpy()

    def torch_intermediates(self, batch: np.ndarray, stages: Sequence[str]) -> list[np.ndarray]:
        """(N, 3, H, W) preprocessed float32 -> the (N, C, H/stride, W/stride) outputs of `stages`,
        in the order asked, as float32 arrays."""
        import torch

        with torch.inference_mode():
            x = torch.from_numpy(np.ascontiguousarray(batch, dtype=np.float32))
            if self.channels_last:
                x = x.contiguous(memory_format=torch.channels_last)
            outputs = self.network.forward_intermediates(x, stages)
            return [np.ascontiguousarray(y.float().numpy()) for y in outputs]

    def intermediates(self, batch: np.ndarray, stages: Sequence[str]) -> list[np.ndarray]:
        """Like `torch_intermediates`, through the export when this backbone was loaded for
        exactly these stages (verified against PyTorch on the first batch), else PyTorch."""
        if self.onnx is None or self.onnx.stages != tuple(stages):
            return self.torch_intermediates(batch, stages)
        maps = self.onnx.outputs(batch)
        if not self.onnx.verified:
            self.onnx.verify_first(batch, maps, lambda: self.torch_intermediates(batch, stages))
        return maps

    def embed(self, batch: np.ndarray) -> np.ndarray:
        """(N, 3, H, W) preprocessed float32 -> (N, D) float32 L2-normalised embeddings."""
        if self.onnx is not None and self.onnx.stages:
            raise ValueError(f"backbone {self.id!r} was loaded for its stages {'+'.join(self.onnx.stages)}, "
                             "not its embedding: load it without stages to embed")
        if self.onnx is None:
            feats = self.torch_features(batch)
        else:
            feats = self.onnx.features(batch)
            if not self.onnx.verified:
                self.onnx.verify_first(batch, feats, lambda: self.torch_features(batch))
        norms = np.linalg.norm(feats, axis=1, keepdims=True)
        return (feats / np.maximum(norms, 1e-12)).astype(np.float32, copy=False)


def load_backbone(backbone_id: str = DEFAULT_BACKBONE, cache: str | Path | None = None,
                  runtime: str = "torch", precision: str | None = None, stages: Sequence[str] = ()) -> Backbone:
    """Load and verify a backbone.

    runtime "auto" uses OpenVINO when installed, else ONNX Runtime, else PyTorch; it may carry
    a precision ("openvino:bf16", see split_runtime), or pass `precision`. With an export
    runtime the PyTorch network is built only if the export is missing or not yet verified.
    With `stages` (names from the manifest) the export holds those stages' outputs, one output
    each, for `Backbone.intermediates`, instead of the embedding; stage exports run in fp32.
    """
    stages = tuple(stages)
    runtime, folded = split_runtime(runtime)
    precision = precision or folded
    if stages and precision != "fp32":
        raise OddlingError(f"intermediate stages run in fp32 only, not {precision}")
    chosen = resolve_runtime(runtime, precision)
    spec = get_spec(backbone_id)
    if spec.family not in FAMILIES:
        raise OddlingError(f"backbone {spec.id!r} has family {spec.family!r}, which this oddling cannot build")
    if stages:
        stage_channels(spec, stages)   # before any export: an unknown name is the user's mistake
    folder = cache_dir(cache)
    try:
        path, sha = resolve_weights(spec, folder)
    except OSError as exc:   # e.g. pinning a new weight file's checksum in a read-only cache folder
        raise OddlingError(f"cannot use the cache folder {folder} for backbone {spec.id!r} "
                           f"({exc.strerror or exc}); pass --cache-dir with a writable folder") from exc

    def factory():
        return FAMILIES[spec.family](spec, path)

    if chosen == "torch":
        return Backbone(spec, sha, factory())
    onnx_file = onnx_runtime.export_path(folder, spec.id, sha, spec.preprocessing.crop, stages)
    backbone = Backbone(spec, sha, network_factory=factory)
    try:
        if not onnx_file.is_file():
            onnx_runtime.export(backbone.network, spec.preprocessing.crop, onnx_file, stages)
        if chosen == "openvino":
            session = openvino_runtime.OpenVinoSession(onnx_file, precision, cache_dir=folder / "openvino",
                                                       stages=stages)
        else:
            session = onnx_runtime.OnnxSession(onnx_file, stages=stages)
    except OSError as exc:
        # A cache folder that cannot be written: the export runtimes need the file, PyTorch does not.
        if runtime != "auto":
            raise OddlingError(f"runtime {chosen!r}: cannot write the ONNX export into {onnx_file.parent} "
                               f"({exc.strerror or exc}); pass --cache-dir with a writable folder, or use "
                               "--runtime torch") from exc
        import warnings

        warnings.warn(f"cannot write the ONNX export into {onnx_file.parent} ({exc.strerror or exc}): running with "
                      "PyTorch instead (slower, same results); pass --cache-dir with a writable folder",
                      OddlingWarning, stacklevel=2)
        return Backbone(spec, sha, factory())
    backbone.onnx = session
    return backbone


__all__ = ["PRECISIONS", "RUNTIMES", "Backbone", "BackboneSpec", "DEFAULT_BACKBONE", "FAMILIES", "get_spec",
           "load_backbone", "load_manifest", "resolve_runtime", "split_runtime", "stage_channels"]
