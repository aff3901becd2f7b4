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
from oddling.data.encoding import format_summary, image_format
from oddling.data.health import STATS, fit_fences
from oddling.detectors import DEFAULT_DETECTOR, make_detector
from oddling.detectors.conformal import DEFAULT_RATES, MARGINAL, ConformalThreshold, Guarantee, default_rate
from oddling.embedding.options import RunOptions
from oddling.embedding.runner import OK
from oddling.errors import OddlingError
from oddling.files import refuse_existing
from oddling.jobs.rates import check_target_rate, warn_if_few_calibration
from oddling.jobs.reading import embed_folder, folder, no_images_message
from oddling.numbers import json_number
from oddling.progress import progress_shown

DEFAULT_REPRESENTATION = "efficientnet-lite0"
RULE = "flagged when score > cutoff, i.e. conformal p-value <= target_fpr"


def fences_from_table(table: np.ndarray) -> dict:
    """Tukey fences of the references' image statistics (rows in health.STATS order)."""
    return fit_fences([dict(zip(STATS, row)) for row in table.tolist()])


def make_guarantee(guarantee: str = MARGINAL, confidence: float | None = None) -> Guarantee:
    """The bank's guarantee from the user's words; a confidence without "confident" is a mistake."""
    if confidence is not None and guarantee != "confident":
        raise OddlingError("--confidence applies to --guarantee confident")
    try:
        return Guarantee(guarantee, confidence)
    except ValueError as exc:
        raise OddlingError(str(exc)) from exc


def resolve_rate(calibration_scores: np.ndarray, target_fpr: float | None, guarantee: Guarantee,
                 allow_no_cutoff: bool = False) -> tuple[float, str | None]:
    """(the bank's target rate, a note for the summary or None).

    No rate asked for: the first of DEFAULT_RATES the calibration supports, and the note says why
    when it is not the first. A rate asked for (or none supported) that cannot flag anything is
    an OddlingError with the numbers, unless `allow_no_cutoff`: then the bank is written without
    a cutoff and the note says so (and every gate refuses it later).
    """
    n = len(calibration_scores)
    asked = target_fpr
    if target_fpr is None:
        target_fpr = default_rate(n, guarantee) or DEFAULT_RATES[-1]
    threshold = ConformalThreshold(calibration_scores, target_fpr, guarantee)
    if threshold.can_flag:
        if asked is None and target_fpr != DEFAULT_RATES[0]:
            first = ConformalThreshold(calibration_scores, DEFAULT_RATES[0], guarantee)
            return target_fpr, f"target false-alarm rate {target_fpr:g}: {first.support_text()}"
        return target_fpr, None
    lowest = guarantee.smallest_supported_rate(n)
    what = (f"target false-alarm rate {target_fpr:g} can flag nothing" if asked is not None else
            f"no default target false-alarm rate ({', '.join(f'{r:g}' for r in DEFAULT_RATES)}) can flag anything")
    problem = (f"{what} with this bank: {threshold.support_text()}"
               + (f" (it supports rates >= {lowest:.3g})" if lowest < 1 else ""))
    if not allow_no_cutoff:
        raise OddlingError(f"{problem}. Add references, ask for a higher --target-fpr, or pass --allow-no-cutoff "
                           "to write a bank that flags nothing")
    return target_fpr, (f"no cutoff: {problem}; this bank flags nothing, and --fail-on-flagged, watch and serve "
                        "refuse it")


def calibration_record(detector, target_fpr: float, guarantee: Guarantee | None = None,
                       note: str | None = None) -> dict:
    guarantee = guarantee or Guarantee()
    threshold = ConformalThreshold(detector.calibration_scores_, target_fpr, guarantee)
    if threshold.can_flag:
        warn_if_few_calibration(threshold, stacklevel=4)
    record = {"method": detector.describe_calibration(), "n": threshold.n, "target_fpr": target_fpr,
              "cutoff": json_number(threshold.cutoff, 12), "rule": RULE} | guarantee.to_dict()
    record["promise"] = threshold.describe() if threshold.can_flag else "none: this bank cannot flag at its rate"
    return record | ({"note": note} if note else {})


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


def build_bank(embedded, representation, detector, target_fpr: float | None, reference_dir: Path,
               vector_dtype: str = "float32", guarantee: Guarantee | None = None,
               allow_no_cutoff: bool = False) -> Bank:
    """Fit the detector on embedded references and assemble the bank (not saved).

    target_fpr None: the first of DEFAULT_RATES the calibration supports (`resolve_rate`, which
    also refuses a rate that cannot flag unless `allow_no_cutoff`).

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
    guarantee = guarantee or Guarantee()
    target_fpr, note = resolve_rate(detector.calibration_scores_, target_fpr, guarantee, allow_no_cutoff)
    references = [reference_entry(r.path, r.sha256, reference_dir / r.path) for r in usable]
    return Bank(
        representation=representation.fingerprint(),
        detector=detector,
        references=references,
        features=features if representation.spec.feature_kind == "vector" else None,
        calibration_scores=np.asarray(detector.calibration_scores_, dtype=np.float64),
        calibration=calibration_record(detector, target_fpr, guarantee, note),
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
    target_fpr: float | None = None,
    guarantee: str = MARGINAL,
    confidence: float | None = None,
    allow_no_cutoff: bool = False,
    force: bool = False,
    vector_dtype: str = "float32",
    frame: str | None = None,
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

    `target_fpr` None (the default) takes the first of 0.01, 0.02, 0.05, 0.1 the calibration
    supports; a rate given that cannot flag anything is refused (OddlingError) unless
    `allow_no_cutoff`. `guarantee` "marginal" holds the rate on average over reference sets;
    "confident" holds it for this bank with probability `confidence` (default 0.9); see
    `oddling.detectors.conformal`. `frame`: how an image meets the network's square input,
    "stretch" (the default: every pixel in view), "pad" or "crop" (the centre square, as banks
    made before frames existed); see `oddling.data.preprocess`.
    """
    options = options or RunOptions()
    reference_dir = folder(reference_dir, "reference folder")
    params = dict(params or {})
    if k is not None:
        if detector != "knn":
            raise OddlingError(f"k applies to the knn detector, not {detector!r}")
        params["k"] = k
    model = make_detector(detector, params)
    spec = resolve_representation(representation, backbone, detector).framed(frame)
    check_pairing(spec, model)
    vector_dtype = check_vector_dtype(vector_dtype, spec, model)
    if target_fpr is not None:
        target_fpr = check_target_rate(target_fpr)
    promise = make_guarantee(guarantee, confidence)
    refuse_existing(bank_path, force=force)
    rep = load_representation(spec, options.cache_dir, options.runtime)
    exclude = (Path(bank_path),) if bank_path is not None else ()
    embedded = embed_folder(reference_dir, rep, options, "embedding references", exclude)
    with progress_shown(options.progress):    # the detector's long phases (a patch coreset) show bars too
        bank = build_bank(embedded, rep, model, target_fpr, reference_dir, vector_dtype, promise, allow_no_cutoff)
    if bank_path is not None:
        save_bank(bank, bank_path, force=force)
    return bank
