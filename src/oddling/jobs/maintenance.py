"""Keeping a bank healthy: what it holds (info), what is wrong with its references (audit), and
changing its references without rebuilding it from scratch (add, remove)."""
from __future__ import annotations

import csv
import os
from pathlib import Path

import numpy as np

from oddling.bank.store import Bank, bank_lock, load_bank, previous_path, restore_previous, save_bank
from oddling.data.intake import walk
from oddling.detectors.conformal import smallest_supported_rate, supported_rate_text
from oddling.embedding.options import RunOptions
from oddling.embedding.runner import OK
from oddling.errors import OddlingError
from oddling.jobs.fitting import calibration_record, fences_from_table, reference_entry, references_formats
from oddling.jobs.reading import embed_paths, load_bank_representation, no_images_message
from oddling.jobs.scoring import as_bank
from oddling.numbers import plural


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
    bank.formats = references_formats(references)
    return bank


def add_references(bank: Bank, added: list[dict], features: np.ndarray, health: np.ndarray) -> dict:
    """Append references (their entries, features, health rows) to the bank in memory.

    A detector that adds incrementally (kNN, `KNNDetector.add`) grows its index in place and
    updates its calibration: at most 20,000 references in all, every reference is scored
    leave-one-out again (the same scores, cutoff and index as a refit on the union, as long as
    the union stays below the size where `--index auto` would choose an approximate index);
    above, the calibration sample is updated (kept members' neighbours merged with the new
    references exactly, new members scored against all; see `KNNDetector.add`). Other detectors
    are refitted on the union. Returns how the calibration was updated.
    """
    if bank.vector_dtype == "float16":       # used as the bank will store them
        features = np.asarray(features, dtype=np.float16).astype(np.float32)
    references = bank.references + added
    if not bank.detector.adds_incrementally:
        refit(bank, references, np.concatenate([bank.features, features]).astype(np.float32),
              np.concatenate([bank.health_stats, health]))
        return {"calibration": "refitted"}
    detector = bank.detector
    change = detector.add(features, np.array([r["sha256"] for r in added]),
                          reference_groups=np.array([r["sha256"] for r in bank.references]))
    bank.references, bank.features = references, detector.references_   # one copy, the detector's
    bank.health_stats = np.concatenate([bank.health_stats, health])
    bank.calibration_scores = np.asarray(detector.calibration_scores_, dtype=np.float64)
    bank.calibration = calibration_record(detector, bank.target_fpr)
    bank.health_fences = fences_from_table(bank.health_stats)
    bank.formats = references_formats(references)
    return {"calibration": change["calibration"]}


def _read_decisions(csv_path: Path, root: Path | None) -> list[Path]:
    """Files marked normal in a decisions CSV (path,decision) exported from the review page."""
    with open(csv_path, newline="", encoding="utf-8-sig") as f:
        reader = csv.DictReader(f)
        if not reader.fieldnames or not {"path", "decision"} <= set(reader.fieldnames):
            raise OddlingError(f"{csv_path} must have columns path,decision (got {reader.fieldnames})")
        rows = list(reader)
    from oddling.data.csv_cells import path_from_cell

    files, outside = [], []
    for row in rows:
        if (row["decision"] or "").strip().lower() != "normal":
            continue
        # The page's export names the folder it scored; --root, when given, wins.
        folder = root if root is not None else Path(path_from_cell(row.get("scored_folder") or "") or csv_path.parent)
        path = folder / path_from_cell(row["path"] or "")
        # A decisions file is input like any other: its paths may only reach into the scored folder
        # (no "../", no absolute paths, no links out of it).
        try:
            path.resolve().relative_to(folder.resolve())
        except ValueError:
            outside.append(row["path"])
            continue
        files.append(path)
    if outside:
        raise OddlingError(
            f"{len(outside)} paths in {csv_path} lead outside the scored folder and were refused (first: "
            f"{outside[0]}); paths must be relative to the folder that was scored (--root); nothing was added")
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

    Only files whose content is not in the bank yet are embedded; the detector takes them in
    (`add_references`: incrementally for kNN, else refitted) and is recalibrated; the bank is
    replaced atomically (the old one stays in place until the new one
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
    left_out = None
    if source.is_dir():
        found = walk(source, exclude=(Path(bank_path),))
        base, paths, left_out = source, found.paths, found.left_out
    elif source.is_file() and source.suffix.lower() == ".csv":
        paths = _read_decisions(source, Path(root) if root else None)
        if not paths:
            raise OddlingError(f"{source} marks no file normal; nothing to add (the decision column says "
                               "normal for the images to add)")
        base = Path(os.path.commonpath([p.resolve().parent for p in paths]))
        paths = [p.resolve() for p in paths]
    else:
        raise OddlingError(f"{source} is neither a folder nor a decisions CSV")
    known = {r["sha256"] for r in bank.references}
    embedded = embed_paths(base, paths, rep, options, "embedding new references")
    if not embedded.ok_records:
        raise OddlingError(no_images_message(source, embedded.records, left_out) + "; nothing was added")
    ref_root = Path(bank.reference_root)
    added, duplicates = [], 0
    vectors, stats = [], []
    for rec in embedded.ok_records:
        if rec.sha256 in known:
            duplicates += 1
            continue
        known.add(rec.sha256)
        added.append(reference_entry(_bank_relative(base / rec.path, ref_root), rec.sha256, base / rec.path))
        vectors.append(embedded.embeddings[rec.row:rec.row + 1])
        stats.append(embedded.health[rec.row:rec.row + 1])
    skipped = [{"path": r.path, "status": r.status} for r in embedded.records if r.status != OK]
    change = {"calibration": "unchanged"}
    if added:
        change = add_references(bank, added, np.concatenate(vectors).astype(np.float32), np.concatenate(stats))
        save_bank(bank, bank_path, force=True)
    return {"added": len(added), "already_in_bank": duplicates, "skipped": skipped, "n_references": bank.size,
            "calibration": change["calibration"]}


AUDIT_KINDS = ("outlier", "duplicate", "near_duplicate", "health")
NAMED = "named"   # the reason of a reference named on the command line rather than found by an audit


def removal_targets(items: list[str], kinds: tuple[str, ...] = (), everything: bool = False) -> dict[str, list[str]]:
    """What `bank remove ITEMS` means: {reference path: [why: audit kinds, or "named"]}, in the order given.

    An item ending in .json that is a file is an audit JSON (`oddling audit --json`); from it only
    the findings of `kinds` are taken, or all of them with `everything`, and one of the two must
    be asked for: an audit usually lists more than a user means to remove. Any other item is a
    reference path as `bank info` / `audit` print it.
    """
    import json

    targets: dict[str, list[str]] = {}
    audits = 0
    for item in items:
        if item.endswith(".json") and Path(item).is_file():
            audits += 1
            try:
                findings = json.loads(Path(item).read_text(encoding="utf-8"))["findings"]
                pairs = [(f["path"], f["kind"]) for f in findings]
            except (OSError, UnicodeDecodeError, ValueError, KeyError, TypeError) as exc:
                raise OddlingError(f"{item} is not an audit JSON (from `oddling audit --json`)") from exc
            if not kinds and not everything:
                counts = {k: sum(kind == k for _, kind in pairs) for k in dict.fromkeys(kind for _, kind in pairs)}
                listed = ", ".join(f"{n} {k}" for k, n in counts.items())
                raise OddlingError(
                    f"{item} lists {plural(len(pairs), 'finding')}" + (f" ({listed})" if listed else "")
                    + ": say which to remove with --kind KIND (repeatable) or --all; --dry-run shows the list first")
            for path, kind in pairs:
                if everything or kind in kinds:
                    targets.setdefault(path, [])
                    if kind not in targets[path]:
                        targets[path].append(kind)
        else:
            targets.setdefault(item, [])
            if NAMED not in targets[item]:
                targets[item].append(NAMED)
    if (kinds or everything) and not audits:
        raise OddlingError("--kind and --all choose findings of an audit JSON (`oddling audit --json`); "
                           "name references by their paths without them")
    return targets


def bank_remove(bank_path: str | os.PathLike, paths: list[str], *, dry_run: bool = False,
                before=None) -> dict:
    """Remove references by their bank path (as `bank info` / `audit` print them); refit and recalibrate.

    Every path must name a reference of the bank: otherwise OddlingError naming those that do not,
    and nothing is changed. `before(paths)` (if given) is called with the references that will
    go, in bank order, before any work: the CLI prints them. The detector is then fitted on what
    is left; if it cannot be (too few references), OddlingError saying so, and nothing is changed.
    With `dry_run` the refit is tried but the bank is not replaced. Under the bank's lock, from
    reading to saving, like `bank_add`.
    """
    with bank_lock(bank_path):
        bank = load_bank(bank_path)
        require_features(bank, "bank remove")
        wanted = set(paths)
        present = {r["path"] for r in bank.references}
        not_found = [p for p in dict.fromkeys(paths) if p not in present]
        if not_found or not wanted:
            shown = ", ".join(not_found[:5]) + (f", and {len(not_found) - 5} more" if len(not_found) > 5 else "")
            raise OddlingError(
                (f"{plural(len(not_found), 'path')} not in bank {bank_path}: {shown}" if not_found
                 else "nothing to remove") + "; nothing was changed (`oddling bank info` and `oddling audit` "
                "show reference paths, relative to the reference folder)")
        going = [r["path"] for r in bank.references if r["path"] in wanted]
        if before is not None:
            before(going)
        keep = [i for i, r in enumerate(bank.references) if r["path"] not in wanted]
        try:
            refit(bank, [bank.references[i] for i in keep], bank.features[keep], bank.health_stats[keep])
        except OddlingError as exc:
            raise OddlingError(f"removing {plural(len(going), 'reference')} would leave {len(keep)}, too few for "
                               f"the {bank.detector.name} detector ({exc}); nothing was changed") from exc
        if not dry_run:
            save_bank(bank, bank_path, force=True)
        return {"removed": 0 if dry_run else len(going), "paths": going, "not_found": [], "n_references": bank.size,
                "dry_run": dry_run}


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
    threshold = bank.threshold()
    return {key: meta[key] for key in ("format_version", "tool_version", "created", "representation", "detector",
                                       "calibration", "reference_root", "n_references")} | {
        "format_version": bank.format_version, "backbone": bank.backbone, "n_skipped": len(bank.skipped),
        "path": str(bank.path), "lowest_supported_rate": smallest_supported_rate(n_cal, bank.guarantee),
        "supported_rates": supported_rate_text(n_cal, bank.guarantee), "vector_dtype": bank.vector_dtype,
        "guarantee": bank.guarantee.kind, "can_flag": threshold.can_flag,
        "promise": threshold.describe() if threshold.can_flag else f"none: {threshold.support_text()}",
        "vector_check": bank.vector_check, "tuning": bank.tuning}


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
