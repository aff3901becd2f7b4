"""Run a backbone from its ONNX export: export once into the cache, prove it agrees with PyTorch, reuse.

One export file serves two runtimes: ONNX Runtime (`OnnxSession`, here) and OpenVINO
(`openvino_runtime.OpenVinoSession`). An export holds either the embedding (one output,
`features`) or the outputs of named intermediate stages (one output per stage, named like it:
what the patch and pooled-stage representations use). It is keyed by backbone id, weight
checksum, input size, the stages and export settings; each runtime checks it against PyTorch
on the first real batch it runs (max abs difference and cosine similarity, see `compare`) and
records the result beside it (`.verified.json` for ONNX Runtime); an export that disagrees
beyond fp32 tolerance is deleted and refused. Once verified, nothing here needs torch: a
process that only scores imports neither torch nor the network code.
"""
from __future__ import annotations

import json
import os
import sys
import tempfile
from pathlib import Path

import numpy as np

from oddling.errors import OddlingError

OPSET = 17
EXPORT_VERSION = 1        # bump when export settings change: old exports are then ignored
MAX_ABS_DIFF = 1e-4       # fp32 tolerance on unit-length embeddings (stage maps: relative to their scale)
MIN_COSINE = 0.9999
FEATURES = "features"     # the output name of an embedding export


def available() -> bool:
    try:
        import onnxruntime  # noqa: F401
    except ImportError:
        return False
    return True


def export_path(cache: Path, backbone_id: str, weights_sha256: str, input_size: int,
                stages: tuple[str, ...] = ()) -> Path:
    """The export's file: the embedding's, or with `stages` the file of those stages' outputs
    (`...-224px-stage2+stage3-opset17-v1.onnx`)."""
    what = f"-{'+'.join(stages)}" if stages else ""
    name = f"{backbone_id}-{weights_sha256[:16]}-{input_size}px{what}-opset{OPSET}-v{EXPORT_VERSION}.onnx"
    return cache / "onnx" / name


def export(network, input_size: int, path: Path, stages: tuple[str, ...] = ()) -> Path:
    """Export in eval mode with a dynamic batch axis; written to a temporary file, then renamed.
    Without `stages` the one output is the embedding (`network.features`); with them, one output
    per stage, in the order given (`network.forward_intermediates`)."""
    import torch

    class _Outputs(torch.nn.Module):
        def __init__(self, network: torch.nn.Module):
            super().__init__()
            self.network = network

        def forward(self, x: torch.Tensor):
            if not stages:
                return self.network.features(x)
            return tuple(self.network.forward_intermediates(x, list(stages)))

    names = list(stages) or [FEATURES]
    path.parent.mkdir(parents=True, exist_ok=True)
    module = _Outputs(network).eval().to(memory_format=torch.contiguous_format)
    dummy = torch.zeros(2, 3, input_size, input_size)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.stem}-", suffix=".onnx")
    os.close(fd)
    try:
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")   # tracer warnings about shape-dependent padding: shapes are fixed
            torch.onnx.export(module, (dummy,), tmp, input_names=["images"], output_names=names,
                              dynamic_axes={"images": {0: "batch"}} | {name: {0: "batch"} for name in names},
                              opset_version=OPSET, dynamo=False)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return path


def unit_rows(x: np.ndarray) -> np.ndarray:
    x = np.asarray(x, dtype=np.float64)
    return x / np.maximum(np.linalg.norm(x, axis=1, keepdims=True), 1e-12)


def agreement(a: np.ndarray, b: np.ndarray) -> dict:
    """Max abs difference and smallest cosine similarity between two sets of unit vectors."""
    cos = np.sum(a * b, axis=1) / (np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1))
    return {"max_abs_diff": float(np.abs(a - b).max()), "min_cosine": float(cos.min())}


def location_rows(maps: np.ndarray, scale: float) -> np.ndarray:
    """(N, C, H, W) stage maps -> (N*H*W, C) rows, one per image location, divided by `scale`."""
    x = np.asarray(maps, dtype=np.float64)
    return x.transpose(0, 2, 3, 1).reshape(-1, x.shape[1]) / scale


def compare(reference, candidate) -> dict:
    """How an export's outputs agree with PyTorch's, in the units the tolerances are set in.

    An embedding (N, D) is compared as unit vectors, the way it is used. A list of stage maps
    (N, C, H, W) is compared location by location: each location's C channels are what the
    patch detector measures distances between; both sides are divided by the longest PyTorch
    row of that stage, so the max abs difference is relative to the features' scale (a change of
    scale shows), and the cosine checks every location's direction. The worst stage counts.
    """
    if isinstance(reference, np.ndarray):
        return agreement(unit_rows(reference), unit_rows(candidate))
    checks = []
    for ref, cand in zip(reference, candidate, strict=True):
        scale = max(float(np.linalg.norm(location_rows(ref, 1.0), axis=1).max()), 1e-12)
        checks.append(agreement(location_rows(ref, scale), location_rows(cand, scale)))
    return {"max_abs_diff": max(c["max_abs_diff"] for c in checks), "min_cosine": min(c["min_cosine"] for c in checks)}


class ExportSession:
    """What every runtime of the ONNX export shares: `outputs(batch)` (`features(batch)` for an
    embedding export), and `verify` against PyTorch on the first real batch, recorded in
    `verified_file`. `stages` names the stages an intermediate-stage export gives, () for an
    embedding export.

    Subclasses set `runtime` (the name in the embedding cache key), `label` (for messages) and
    `verified_file`, and implement `outputs`.
    """

    runtime = "onnx"
    label = "ONNX export"

    def __init__(self, path: Path, verified_file: Path, stages: tuple[str, ...] = ()):
        self.path = Path(path)
        self.stages = tuple(stages)
        self.verified_file = verified_file
        self.verified = self.verified_file.is_file()
        self.check: dict | None = self._read_check()

    def _read_check(self) -> dict | None:
        if not self.verified:
            return None
        try:
            return json.loads(self.verified_file.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None

    def outputs(self, batch: np.ndarray) -> list[np.ndarray]:   # pragma: no cover - abstract
        raise NotImplementedError

    def features(self, batch: np.ndarray) -> np.ndarray:
        return self.outputs(batch)[0]

    def refuse(self, message: str) -> None:
        """Delete the export and every runtime's record of it, then raise: the next run exports again."""
        self.path.unlink(missing_ok=True)
        for record in self.path.parent.glob(f"{self.path.stem}.*verified.json"):
            record.unlink(missing_ok=True)
        raise OddlingError(message)

    def verify(self, torch_outputs, export_outputs) -> dict:
        """Record the agreement, or refuse the export (file removed) if it is beyond tolerance.
        Both are embeddings (N, D), or lists of stage maps for a stage export (see `compare`)."""
        n_images = len(torch_outputs if isinstance(torch_outputs, np.ndarray) else torch_outputs[0])
        check = compare(torch_outputs, export_outputs) | {"n_images": int(n_images)} | self.versions()
        if not (check["max_abs_diff"] <= MAX_ABS_DIFF and check["min_cosine"] >= MIN_COSINE):
            self.refuse(
                f"{self.label} {self.path.name} disagrees with PyTorch (max abs diff {check['max_abs_diff']:.2e}, "
                f"min cosine {check['min_cosine']:.6f}); export refused, use {self.fallback_hint()}")
        try:
            self.verified_file.write_text(json.dumps(check, indent=2) + "\n")
            recorded = ""
        except OSError as exc:   # a read-only cache: the check holds for this run, and is made again next time
            recorded = f"; not recorded, {self.verified_file.parent} is not writable ({exc.strerror or exc})"
        self.verified, self.check = True, check
        print(f"oddling: {self.label} verified against PyTorch on {check['n_images']} images "
              f"(max abs diff {check['max_abs_diff']:.1e}){recorded}", file=sys.stderr)
        return check

    def verify_first(self, batch: np.ndarray, outputs, torch_outputs) -> dict:
        """Verify on the first real batch; `torch_outputs()` gives PyTorch's outputs for it."""
        return self.verify(torch_outputs(), outputs)

    def versions(self) -> dict:
        return {}

    def fallback_hint(self) -> str:
        return "--runtime torch"


class OnnxSession(ExportSession):
    """An ONNX Runtime session for one exported backbone, verified on first use."""

    runtime = "onnx"
    label = "ONNX export"

    def __init__(self, path: Path, threads: int | None = None, stages: tuple[str, ...] = ()):
        import onnxruntime as ort

        options = ort.SessionOptions()
        options.intra_op_num_threads = threads or (os.cpu_count() or 1)
        options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        super().__init__(path, Path(path).with_suffix(".verified.json"), stages)
        self.session = ort.InferenceSession(str(path), options, providers=["CPUExecutionProvider"])

    def outputs(self, batch: np.ndarray) -> list[np.ndarray]:
        return self.session.run(None, {"images": np.ascontiguousarray(batch, dtype=np.float32)})
