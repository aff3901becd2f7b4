"""Run a backbone with ONNX Runtime: export once into the cache, prove it agrees with PyTorch, reuse.

Measured on 2 cores: ONNX Runtime runs EfficientNet-Lite0 several times faster than PyTorch
eager for the same outputs (to ~1e-6). The export is keyed by backbone id, weight checksum,
input size and export settings; it is checked against PyTorch on the first real batch it sees
(max abs difference and cosine similarity) and refused if they disagree beyond fp32 tolerance.
"""
from __future__ import annotations

import json
import os
import sys
import tempfile
from pathlib import Path

import numpy as np
import torch

from oddling.errors import OddlingError

OPSET = 17
EXPORT_VERSION = 1        # bump when export settings change: old exports are then ignored
MAX_ABS_DIFF = 1e-4       # fp32 tolerance on unit-length embeddings
MIN_COSINE = 0.9999


def available() -> bool:
    try:
        import onnxruntime  # noqa: F401
    except ImportError:
        return False
    return True


class _Features(torch.nn.Module):
    def __init__(self, network: torch.nn.Module):
        super().__init__()
        self.network = network

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.network.features(x)


def export_path(cache: Path, backbone_id: str, weights_sha256: str, input_size: int) -> Path:
    name = f"{backbone_id}-{weights_sha256[:16]}-{input_size}px-opset{OPSET}-v{EXPORT_VERSION}.onnx"
    return cache / "onnx" / name


def export(network: torch.nn.Module, input_size: int, path: Path) -> Path:
    """Export in eval mode with a dynamic batch axis; written to a temporary file, then renamed."""
    path.parent.mkdir(parents=True, exist_ok=True)
    module = _Features(network).eval().to(memory_format=torch.contiguous_format)
    dummy = torch.zeros(2, 3, input_size, input_size)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.stem}-", suffix=".onnx")
    os.close(fd)
    try:
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")   # tracer warnings about shape-dependent padding: shapes are fixed
            torch.onnx.export(module, (dummy,), tmp, input_names=["images"], output_names=["features"],
                              dynamic_axes={"images": {0: "batch"}, "features": {0: "batch"}},
                              opset_version=OPSET, dynamo=False)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return path


def agreement(a: np.ndarray, b: np.ndarray) -> dict:
    """Max abs difference and smallest cosine similarity between two sets of unit vectors."""
    cos = np.sum(a * b, axis=1) / (np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1))
    return {"max_abs_diff": float(np.abs(a - b).max()), "min_cosine": float(cos.min())}


class OnnxSession:
    """An ONNX Runtime session for one exported backbone, verified on first use."""

    def __init__(self, path: Path, threads: int | None = None):
        import onnxruntime as ort

        options = ort.SessionOptions()
        options.intra_op_num_threads = threads or (os.cpu_count() or 1)
        options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        self.path = path
        self.session = ort.InferenceSession(str(path), options, providers=["CPUExecutionProvider"])
        self.verified_file = path.with_suffix(".verified.json")
        self.verified = self.verified_file.is_file()

    def features(self, batch: np.ndarray) -> np.ndarray:
        return self.session.run(None, {"images": np.ascontiguousarray(batch, dtype=np.float32)})[0]

    def verify(self, torch_features: np.ndarray, onnx_features: np.ndarray) -> dict:
        """Record the agreement, or refuse the export (file removed) if it is beyond tolerance."""
        a = torch_features / np.linalg.norm(torch_features, axis=1, keepdims=True)
        b = onnx_features / np.linalg.norm(onnx_features, axis=1, keepdims=True)
        check = agreement(a, b) | {"n_images": int(len(a))}
        if check["max_abs_diff"] > MAX_ABS_DIFF or check["min_cosine"] < MIN_COSINE:
            self.path.unlink(missing_ok=True)
            raise OddlingError(
                f"ONNX export {self.path.name} disagrees with PyTorch (max abs diff {check['max_abs_diff']:.2e}, "
                f"min cosine {check['min_cosine']:.6f}); export refused, use --runtime torch")
        self.verified = True
        try:
            self.verified_file.write_text(json.dumps(check, indent=2) + "\n")
            recorded = ""
        except OSError as exc:   # a read-only cache: the check holds for this run, and is made again next time
            recorded = f"; not recorded, {self.verified_file.parent} is not writable ({exc.strerror or exc})"
        print(f"oddling: ONNX export verified against PyTorch on {check['n_images']} images "
              f"(max abs diff {check['max_abs_diff']:.1e}){recorded}", file=sys.stderr)
        return check
