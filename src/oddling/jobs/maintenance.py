"""Keeping a bank healthy: what it holds (info), what is wrong with its references (audit), and
changing its references without rebuilding it from scratch (add, remove)."""
from __future__ import annotations

import csv
import os
from pathlib import Path

import numpy as np

from oddling.bank.store import Bank, bank_lock, load_bank, previous_path, restore_previous, save_bank
from oddling.data.intake import discover
from oddling.detectors.conformal import smallest_supported_rate
from oddling.embedding.runner import OK
from oddling.errors import OddlingError
from oddling.jobs.common import RunOptions, embed_paths, load_bank_representation, supported_rate_text
from oddling.jobs.fitting import calibration_record, fences_from_table
from oddling.jobs.scoring import as_bank


def require_features(bank: Bank, what: str) -> None:
    """Jobs that work on the references' features need a bank that keeps them (not patch grids)."""
    if bank.features is None:
        raise OddlingError(f"{what} needs the references' feature vectors; bank {bank.path or ''} uses "
                           f"{bank.representation['id']} ({bank.detector.name}), whose patch grids are not kept. "
                           "Refit with `oddling fit` to change its references")


def refit(bank: Bank, references: list[dict], features: np.ndarray, health: np.ndarray) -> Bank:
    """The same detector fitted again on a changed reference set, recalibrated, fences recomputed."""
    detector = bank.detector.clone().fit(features, np.array([r["sha256"] for r in references]))
    bank.references, bank.features, bank.health_stats = references, features, health
    bank.detector = detector
    bank.calibration_scores = np.asarray(detector.calibration_scores_, dtype=np.float64)
    bank.calibration = calibration_record(detector, bank.target_fpr)
    bank.health_fences = fences_from_table(health)
    return bank


def _read_decisions(csv_path: Path, root: Path | None) -> list[Path]:
    """Files marked normal in a decisions CSV (path,decision) exported from the review page."""
    with open(csv_path, newline="", encoding="utf-8-sig") as f:
        reader = csv.DictReader(f)
        if not reader.fieldnames or not {"path", "decision"} <= set(reader.fieldnames):
            raise OddlingError(f"{csv_path} must have columns path,decision (got {reader.fieldnames})")
        rows = list(reader)
    base = root if root is not None else csv_path.parent
    files = []
    for row in rows:
        if (row["decision"] or "").strip().lower() != "normal":
            continue
        path = Path(row["path"])
        files.append(path if path.is_absolute() else base / path)
    missing = [str(p) for p in files if not p.is_file()]
    if missing:
        raise OddlingError(
            f"{len(missing)} files marked normal in {csv_path} were not found (first: {missing[0]}); "
            "pass --root with the folder that was scored")
    return files


def _bank_relative(path: Path, root: Path) -> str:
    """Reference paths stay relative to the bank's reference folder where they can; else absolute."""
    resolved = path.resolve()
    try:
        return resolved.relative_to(root).as_posix()
    except ValueError:
        return resolved.as_posix()


def bank_add(
    bank_path: str | os.PathLike,
    source: str | os.PathLike,
    *,
    root: str | os.PathLike | None = None,
    options: RunOptions | None = None,
) -> dict:
    """Add images to a bank: a folder (every image in it) or a decisions CSV (rows marked normal).

    Only files whose content is not in the bank yet are embedded; the detector is refitted and
    recalibrated; the bank is replaced atomically (the old one stays in place until the new one
    is complete). The bank's lock is held from reading it to saving it, so two `bank add`s (or
    an add and a remove) never lose one side's update: the second waits, then reads the first's.
    """
    with bank_lock(bank_path):
        return _bank_add(bank_path, source, root, options or RunOptions())


def _bank_add(bank_path, source, root, options: RunOptions) -> dict:
    bank = load_bank(bank_path)
    require_features(bank, "bank add")
    source = Path(source)
    rep = load_bank_representation(bank, options)
    if source.is_dir():
        base, paths = source, discover(source, exclude=(Path(bank_path),))
    elif source.is_file() and source.suffix.lower() == ".csv":
        paths = _read_decisions(source, Path(root) if root else None)
        base = Path(os.path.commonpath([p.resolve().parent for p in paths])) if paths else source.parent
        paths = [p.resolve() for p in paths]
    else:
        raise OddlingError(f"{source} is neither a folder nor a decisions CSV")
    known = {r["sha256"] for r in bank.references}
    embedded = embed_paths(base, paths, rep, options, "embedding new references")
    ref_root = Path(bank.reference_root)
    added, duplicates = [], 0
    vectors, stats = [bank.features], [bank.health_stats]
    for rec in embedded.ok_records:
        if rec.sha256 in known:
            duplicates += 1
            continue
        known.add(rec.sha256)
        added.append({"path": _bank_relative(base / rec.path, ref_root), "sha256": rec.sha256})
        vectors.append(embedded.embeddings[rec.row:rec.row + 1])
        stats.append(embedded.health[rec.row:rec.row + 1])
    skipped = [{"path": r.path, "status": r.status} for r in embedded.records if r.status != OK]
    if added:
        refit(bank, bank.references + added, np.concatenate(vectors).astype(np.float32), np.concatenate(stats))
        save_bank(bank, bank_path, force=True)
    return {"added": len(added), "already_in_bank": duplicates, "skipped": skipped, "n_references": bank.size}


def bank_remove(bank_path: str | os.PathLike, paths: list[str]) -> dict:
    """Remove references by their bank path (as `bank info` / `audit` print them); refit and recalibrate.

    Under the bank's lock, from reading to saving, like `bank_add`."""
    with bank_lock(bank_path):
        bank = load_bank(bank_path)
        require_features(bank, "bank remove")
        wanted = set(paths)
        keep = [i for i, r in enumerate(bank.references) if r["path"] not in wanted]
        found = {bank.references[i]["path"] for i in range(bank.size)} & wanted
        not_found = sorted(wanted - found)
        if found:
            refit(bank, [bank.references[i] for i in keep], bank.features[keep], bank.health_stats[keep])
            save_bank(bank, bank_path, force=True)
    return {"removed": len(found), "not_found": not_found, "n_references": bank.size}


def bank_undo(bank_path: str | os.PathLike) -> dict:
    """Put back the version of a bank that the last `bank add`, `bank remove` or `fit --force`
    replaced; the replaced one becomes the previous version, so undoing twice is a redo.

    One level only: each save keeps just the version it replaced (`.NAME.previous` beside the
    bank). Under the bank's lock, like every writer.
    """
    bank = restore_previous(bank_path)
    return {"path": str(bank.path), "created": bank.created, "n_references": bank.size,
            "previous": str(previous_path(bank_path))}


def bank_info(bank_path: str | os.PathLike) -> dict:
    bank = load_bank(bank_path)
    meta = bank.metadata()
    n_cal = len(bank.calibration_scores)
    return {key: meta[key] for key in ("format_version", "tool_version", "created", "representation", "detector",
                                       "calibration", "reference_root", "n_references")} | {
        "format_version": bank.format_version, "backbone": bank.backbone, "n_skipped": len(bank.skipped),
        "path": str(bank.path), "lowest_supported_rate": smallest_supported_rate(n_cal),
        "supported_rates": supported_rate_text(n_cal)}


def audit(bank: Bank | str | os.PathLike, *, near_duplicate_factor: float | None = None,
          max_hash_bits: int | None = None) -> dict:
    """Findings about the reference set itself: outliers, duplicates, near duplicates, health.

    Near duplicates are judged against the bank's own neighbour distances (see
    `oddling.evaluation.reference_audit`): `near_duplicate_factor` of the median nearest-neighbour
    cosine distance, or at most `max_hash_bits` differing bits of a perceptual hash.
    """
    from oddling.evaluation.reference_audit import MAX_HASH_BITS, NEAR_DUPLICATE_FACTOR, audit_bank

    factor = NEAR_DUPLICATE_FACTOR if near_duplicate_factor is None else near_duplicate_factor
    bits = MAX_HASH_BITS if max_hash_bits is None else max_hash_bits
    if not 0.0 < factor < 1.0:
        raise OddlingError(f"near_duplicate_factor must be in (0, 1), got: {factor}")
    if not 0 <= bits <= 64:
        raise OddlingError(f"max_hash_bits must be in [0, 64], got: {bits}")
    bank = as_bank(bank)
    require_features(bank, "audit")
    findings = audit_bank(bank, near_duplicate_factor=factor, max_hash_bits=bits)
    return {"bank": str(bank.path) if bank.path else None, "n_references": bank.size,
            "near_duplicate_factor": factor, "max_hash_bits": bits, "findings": [f.to_dict() for f in findings]}
