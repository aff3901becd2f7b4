"""fit: a folder of normal images -> a bank (representation + fitted detector + calibration)."""
from __future__ import annotations

import datetime as _dt
import os
from pathlib import Path

import numpy as np

from oddling import __version__
from oddling.backbones.representation import RepresentationSpec, load_representation
from oddling.bank.store import Bank, save_bank
from oddling.bank.vectors import check_dtype, check_float16
from oddling.data.health import STATS, fit_fences
from oddling.detectors import DEFAULT_DETECTOR, make_detector
from oddling.detectors.conformal import ConformalThreshold
from oddling.embedding.runner import OK
from oddling.errors import OddlingError
from oddling.jobs.common import (RunOptions, check_rate, embed_folder, folder, format_summary, image_format,
                                 no_images_message, refuse_existing, warn_if_few_calibration)
from oddling.numbers import json_number

DEFAULT_REPRESENTATION = "efficientnet-lite0"
RULE = "flagged when score > cutoff, i.e. conformal p-value <= target_fpr"


def fences_from_table(table: np.ndarray) -> dict:
    """Tukey fences of the references' image statistics (rows in health.STATS order)."""
    return fit_fences([dict(zip(STATS, row)) for row in table.tolist()])


def calibration_record(detector, target_fpr: float) -> dict:
    threshold = ConformalThreshold(detector.calibration_scores_, target_fpr)
    warn_if_few_calibration(threshold.n, target_fpr, stacklevel=4)
    return {"method": detector.describe_calibration(), "n": threshold.n, "target_fpr": target_fpr,
            "cutoff": json_number(threshold.cutoff, 12), "rule": RULE}


def now_text() -> str:
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()


def resolve_representation(representation: str | None, backbone: str | None, detector_name: str) -> RepresentationSpec:
    """`--representation` wins; `--backbone` alone means its embedding (or its default patches for the
    patch detector), as before representations existed."""
    if representation is not None:
        spec = RepresentationSpec.parse(representation)
        if backbone is not None and spec.backbone not in (None, backbone):
            raise OddlingError(f"--backbone {backbone} contradicts --representation {representation}")
        return spec
    backbone = backbone or DEFAULT_REPRESENTATION
    if make_detector(detector_name).feature_kind == "patches":
        return RepresentationSpec.parse(f"{backbone}/patches")
    return RepresentationSpec.parse(backbone)


def check_pairing(spec: RepresentationSpec, detector) -> None:
    if spec.feature_kind != detector.feature_kind:
        raise OddlingError(
            f"detector {detector.name!r} works on {detector.feature_kind} features; representation {spec.id!r} "
            f"gives {spec.feature_kind}" + (" (use BACKBONE/patches:STAGES)" if detector.feature_kind == "patches"
                                            else " (use the patch detector, patch-knn)"))


def reference_entry(path: str, sha256: str, file: Path) -> dict:
    """One reference of a bank: its path, content hash and file format (JPEG: quality estimate too)."""
    fmt, quality = image_format(file)
    entry = {"path": path, "sha256": sha256}
    if fmt is not None:
        entry["format"] = fmt
    if quality is not None:
        entry["jpeg_quality"] = quality
    return entry


def references_formats(references: list[dict]) -> dict:
    """The bank's "formats" summary of its references (format_summary); {} if any is unknown."""
    return format_summary((r.get("format"), r.get("jpeg_quality")) for r in references)


def check_vector_dtype(vector_dtype: str, spec: RepresentationSpec, detector) -> str:
    """float16 storage is verified with kNN scores (`oddling.bank.vectors`): the knn detector only."""
    vector_dtype = check_dtype(vector_dtype)
    if vector_dtype == "float16" and (detector.name != "knn" or spec.feature_kind != "vector"):
        raise OddlingError(f"--vector-dtype float16 applies to the knn detector on vector features, not "
                           f"{detector.name} on {spec.id}; its features are kept as float32")
    return vector_dtype


def build_bank(embedded, representation, detector, target_fpr: float, reference_dir: Path,
               vector_dtype: str = "float32") -> Bank:
    """Fit the detector on embedded references and assemble the bank (not saved).

    vector_dtype "float16": the float16 rounding is checked first (`check_float16`, OddlingError
    when it moves scores by more than its tolerance), then the detector is fitted on the
    float16 vectors, the ones the bank keeps."""
    usable = embedded.ok_records
    if not usable:
        raise OddlingError(no_images_message(reference_dir, embedded.records))
    hashes = np.array([r.sha256 for r in usable])
    features, vector_check = embedded.embeddings, {}
    if vector_dtype == "float16":
        vector_check = check_float16(features, hashes, detector.k)
        features = np.asarray(features, dtype=np.float16)
        detector.fit(features.astype(np.float32), hashes)
    else:
        detector.fit(features, hashes)
    references = [reference_entry(r.path, r.sha256, reference_dir / r.path) for r in usable]
    return Bank(
        representation=representation.fingerprint(),
        detector=detector,
        references=references,
        features=features if representation.spec.feature_kind == "vector" else None,
        calibration_scores=np.asarray(detector.calibration_scores_, dtype=np.float64),
        calibration=calibration_record(detector, target_fpr),
        reference_root=str(reference_dir.resolve()),
        tool_version=__version__,
        created=now_text(),
        health_stats=embedded.health,
        health_fences=fences_from_table(embedded.health),
        skipped=[{"path": r.path, "status": r.status} for r in embedded.records if r.status != OK],
        formats=references_formats(references),
        vector_check=vector_check,
    )


def fit(
    reference_dir: str | os.PathLike,
    bank_path: str | os.PathLike | None = None,
    *,
    representation: str | None = None,
    detector: str = DEFAULT_DETECTOR,
    params: dict | None = None,
    backbone: str | None = None,
    k: int | None = None,
    target_fpr: float = 0.01,
    force: bool = False,
    vector_dtype: str = "float32",
    options: RunOptions | None = None,
) -> Bank:
    """Build a reference bank from a folder of normal images (and save it if `bank_path` is given).

    `representation` (see `oddling.backbones.representation`; default the EfficientNet-Lite0
    embedding) turns images into features; `detector` (see `oddling.detectors.DETECTORS`; default
    "knn") with its `params` learns what normal looks like and how its scores of normal images are
    spread (the calibration, which sets the cutoff for `target_fpr`). `k` is a shorthand for
    params={"k": k} of the kNN detector. `vector_dtype` "float16" stores the reference vectors at
    half the size, after checking that this moves kNN scores by at most 1e-3 (see
    `oddling.bank.vectors`; the knn detector only).
    """
    options = options or RunOptions()
    reference_dir = folder(reference_dir, "reference folder")
    params = dict(params or {})
    if k is not None:
        if detector != "knn":
            raise OddlingError(f"k applies to the knn detector, not {detector!r}")
        params["k"] = k
    model = make_detector(detector, params)
    spec = resolve_representation(representation, backbone, detector)
    check_pairing(spec, model)
    vector_dtype = check_vector_dtype(vector_dtype, spec, model)
    target_fpr = check_rate(target_fpr)
    refuse_existing(bank_path, force=force)
    rep = load_representation(spec, options.cache_dir, options.runtime)
    exclude = (Path(bank_path),) if bank_path is not None else ()
    embedded = embed_folder(reference_dir, rep, options, "embedding references", exclude)
    bank = build_bank(embedded, rep, model, target_fpr, reference_dir, vector_dtype)
    if bank_path is not None:
        save_bank(bank, bank_path, force=force)
    return bank
