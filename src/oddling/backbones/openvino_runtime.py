"""Run a backbone's ONNX export with OpenVINO's CPU plugin (the default runtime where installed).

The same export file as ONNX Runtime (`onnx_runtime.export_path`), compiled for the CPU with
`INFERENCE_PRECISION_HINT` set explicitly: on CPUs with bf16 or AMX units OpenVINO would
otherwise pick bf16 by itself. fp32 is verified against PyTorch on the first real batch exactly
like the ONNX Runtime path (max abs difference <= 1e-4, cosine >= 0.9999, recorded in
`<export>.openvino-f32.verified.json` with the OpenVINO version; a new OpenVINO version is
verified again) and refused, with the export deleted, if it disagrees.

`precision="bf16"` is optional and never silent: the first batch of every run is also embedded
in fp32 (the verified OpenVINO fp32 model) and bf16 is used only if the smallest cosine between
the two embeddings is >= BF16_MIN_COSINE and the ranking of the batch's images by their
nearest-neighbour score (each against the rest of the batch, k = 5; Spearman) is >=
BF16_MIN_SPEARMAN; else OddlingError. The figures are recorded in the bank.
"""
from __future__ import annotations

import json
import os
import sys
from pathlib import Path

import numpy as np

from oddling.backbones.onnx_runtime import ExportSession, agreement, unit_rows
from oddling.errors import OddlingError

PRECISIONS = ("fp32", "bf16")
_HINT = {"fp32": "f32", "bf16": "bf16"}
BF16_MIN_COSINE = 0.999
BF16_MIN_SPEARMAN = 0.99
MIN_IMAGES_FOR_RANKING = 3   # fewer images have fewer than 3 pairs: the ranking check is not made


def available() -> bool:
    try:
        import openvino  # noqa: F401
    except ImportError:
        return False
    return True


def version() -> str:
    import openvino

    return openvino.__version__


def cpu_supports_bf16() -> bool:
    import openvino as ov

    try:
        return "BF16" in ov.Core().get_property("CPU", "OPTIMIZATION_CAPABILITIES")
    except Exception:   # an old plugin without the property: assume not
        return False


def _spearman(a: np.ndarray, b: np.ndarray) -> float:
    """Spearman's rank correlation of two equally long vectors (ties broken by order)."""
    ra = np.argsort(np.argsort(a, kind="stable"), kind="stable").astype(np.float64)
    rb = np.argsort(np.argsort(b, kind="stable"), kind="stable").astype(np.float64)
    ra -= ra.mean()
    rb -= rb.mean()
    denominator = np.sqrt((ra * ra).sum() * (rb * rb).sum())
    return float((ra * rb).sum() / denominator) if denominator > 0 else 1.0


def batch_knn_scores(unit: np.ndarray, k: int = 5) -> np.ndarray:
    """Each image's mean cosine distance to its k nearest other images of the batch: the kNN
    detector's score with the rest of the batch as the references."""
    sims = unit @ unit.T
    np.fill_diagonal(sims, -np.inf)
    k = max(1, min(k, len(unit) - 1))
    nearest = -np.sort(-sims, axis=1)[:, :k]
    return (1.0 - nearest).mean(axis=1)


def ranking_agreement(reference: np.ndarray, reduced: np.ndarray) -> float | None:
    """Spearman between the images' nearest-reference scores in fp32 and in reduced precision,
    each image scored against the rest of the batch (the bank is not known while embedding): 1.0
    when the ranking a user would read is unchanged. None for fewer than MIN_IMAGES_FOR_RANKING."""
    if len(reference) < MIN_IMAGES_FOR_RANKING:
        return None
    return _spearman(batch_knn_scores(unit_rows(reference)), batch_knn_scores(unit_rows(reduced)))


class OpenVinoSession(ExportSession):
    """The ONNX export compiled by OpenVINO for the CPU at an explicit inference precision."""

    label = "OpenVINO model"

    def __init__(self, path: Path, precision: str = "fp32", threads: int | None = None,
                 cache_dir: Path | None = None, stages: tuple[str, ...] = ()):
        import openvino as ov

        if precision not in PRECISIONS:
            raise OddlingError(f"precision must be one of {', '.join(PRECISIONS)}, got: {precision!r}")
        if precision == "bf16" and not cpu_supports_bf16():
            raise OddlingError("precision bf16 needs a CPU with bf16 instructions (AVX512-BF16 or AMX); "
                               "this one has none: use --precision fp32")
        self.precision = precision
        self.runtime = "openvino" if precision == "fp32" else f"openvino-{precision}"
        super().__init__(path, Path(path).with_suffix(f".openvino-{_HINT[precision]}.verified.json"), stages)
        if self.check is not None and self.check.get("openvino") != ov.__version__:
            self.verified = False   # verified with another OpenVINO release: verify again
        if precision != "fp32":
            self.verified = False   # reduced precision is checked on the first batch of every run
        core = ov.Core()
        if cache_dir is not None:   # compiled blobs: a later process starts without recompiling
            core.set_property({"CACHE_DIR": str(cache_dir)})
        config = {
            "INFERENCE_PRECISION_HINT": _HINT[precision],
            "PERFORMANCE_HINT": "LATENCY",
            "INFERENCE_NUM_THREADS": int(threads or (os.cpu_count() or 1)),
        }
        self.compiled = core.compile_model(str(path), "CPU", config)
        hint = self.compiled.get_property("INFERENCE_PRECISION_HINT")
        self.actual_precision = hint.get_type_name() if hasattr(hint, "get_type_name") else str(hint)
        self._request = self.compiled.create_infer_request()
        self.reference = (OpenVinoSession(path, "fp32", threads, cache_dir, stages) if precision != "fp32" else None)

    def outputs(self, batch: np.ndarray) -> list[np.ndarray]:
        x = np.ascontiguousarray(batch, dtype=np.float32)
        result = self._request.infer({0: x})
        # Copies: the request reuses its output buffers on the next call.
        return [np.array(result[output], dtype=np.float32, copy=True) for output in self.compiled.outputs]

    def versions(self) -> dict:
        return {"openvino": version(), "precision": self.actual_precision}

    def fallback_hint(self) -> str:
        return "--runtime onnx or --runtime torch"

    def verify_first(self, batch: np.ndarray, outputs, torch_outputs) -> dict:
        """Verify on the first real batch: fp32 against PyTorch (`torch_outputs()` gives its
        outputs); reduced precision (embeddings only) against the verified fp32 model on the same batch."""
        if self.reference is None:
            return self.verify(torch_outputs(), outputs)
        ref = self.reference.features(batch)
        if not self.reference.verified:
            self.reference.verify(torch_outputs(), ref)
        return self.verify_reduced(ref, outputs)

    def verify_reduced(self, fp32_features: np.ndarray, reduced_features: np.ndarray) -> dict:
        a, b = unit_rows(fp32_features), unit_rows(reduced_features)
        check = agreement(a, b) | {"n_images": int(len(a)), "spearman_knn_ranking": ranking_agreement(a, b),
                                   "min_cosine_required": BF16_MIN_COSINE,
                                   "min_spearman_required": BF16_MIN_SPEARMAN} | self.versions()
        spearman = check["spearman_knn_ranking"]
        if check["min_cosine"] < BF16_MIN_COSINE or (spearman is not None and spearman < BF16_MIN_SPEARMAN):
            raise OddlingError(
                f"precision {self.precision} does not hold on these images: min cosine to fp32 "
                f"{check['min_cosine']:.5f} (needs >= {BF16_MIN_COSINE}), ranking of nearest-neighbour scores Spearman "
                f"{'n/a' if spearman is None else f'{spearman:.4f}'} (needs >= {BF16_MIN_SPEARMAN}); "
                "use --precision fp32")
        self.verified_file.write_text(json.dumps(check, indent=2) + "\n")
        self.verified, self.check = True, check
        ranking = "not checked, fewer than 3 images" if spearman is None else f"Spearman {spearman:.4f}"
        print(f"oddling: {self.precision} checked against fp32 on {check['n_images']} images "
              f"(min cosine {check['min_cosine']:.5f}, nearest-neighbour ranking {ranking})", file=sys.stderr)
        return check
