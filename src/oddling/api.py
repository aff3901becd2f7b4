"""The public entry points. Everything the CLI does goes through these functions.

>>> import oddling
>>> bank = oddling.fit("good_parts/", "parts.bank")            # doctest: +SKIP
>>> result = oddling.score("todays_batch/", bank)              # doctest: +SKIP
>>> result.write_csv("scores.csv")                             # doctest: +SKIP
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from oddling import __version__
from oddling.detectors import patch as local
from oddling.backbones import DEFAULT_BACKBONE, Backbone, load_backbone
from oddling.bank.store import Bank, check_compatible, load_bank, save_bank
from oddling.detectors.conformal import cutoff_for_rate, min_calibration_size
from oddling.embedding.runner import OK, EmbeddedFiles, embed_files
from oddling.embedding.cache import EmbeddingCache
from oddling.errors import OddlingError
from oddling.data.health import STATS, fit_fences, health_findings, health_text
from oddling.data.intake import IntakeError, discover
from oddling.index.exact import leave_one_out_scores
from oddling.paths import cache_dir
from oddling.reporting.results import ScoreRow, count_ok, json_number, rows_to_csv, sort_rows, write_text
from oddling.scoring import bank_cutoff, score_vectors

CALIBRATION_METHOD = "leave-one-out"
MODES = ("global", local.MODE)
LOCAL_CALIBRATION = (
    "split: a seeded share of the references is held out and scored against the coreset of the others "
    "(leave-one-out would need one coreset per reference)")


class OddlingWarning(UserWarning):
    """Something the user should know but that does not stop the job."""


@dataclass
class RunOptions:
    """How to run the backbone; shared by fit, score and evaluate."""

    cache_dir: str | os.PathLike | None = None
    runtime: str = "auto"      # "auto" (ONNX Runtime when installed), "onnx" or "torch"
    batch_size: int = 32
    workers: int | None = None
    progress: bool = True
    use_cache: bool = True     # reuse and save embeddings in <cache>/embeddings


def _check_rate(target_fpr: float) -> float:
    if not 0.0 < float(target_fpr) < 1.0:
        raise OddlingError(f"target_fpr must be in (0, 1), got: {target_fpr}")
    return float(target_fpr)


def _folder(path, what: str) -> Path:
    folder = Path(path)
    if not folder.is_dir():
        raise OddlingError(f"{what} {folder} is not a folder")
    return folder


def _embed_folder(folder: Path, backbone: Backbone, options: RunOptions, desc: str,
                  exclude: tuple[Path, ...] = (), mode: str = "global") -> EmbeddedFiles:
    try:
        paths = discover(folder, exclude=exclude)
    except IntakeError as exc:
        raise OddlingError(exc.status) from exc
    return _embed_paths(folder, paths, backbone, options, desc, mode)


def _embed_paths(base: Path, paths: list[Path], backbone: Backbone, options: RunOptions, desc: str,
                 mode: str = "global") -> EmbeddedFiles:
    if mode == local.MODE:
        # Patch features are ~100x larger than an embedding: not cached.
        return embed_files(base, paths, backbone, batch_size=options.batch_size, workers=options.workers,
                           progress=options.progress, desc=desc,
                           preprocessing=local.local_preprocessing(backbone.preprocessing),
                           embed=lambda batch: local.patch_features(backbone.network, batch))
    cache = None
    if options.use_cache:
        cache = EmbeddingCache.open(cache_dir(options.cache_dir), backbone.fingerprint(), backbone.runtime)
    return embed_files(base, paths, backbone, batch_size=options.batch_size,
                       workers=options.workers, progress=options.progress, desc=desc, cache=cache)


def _require_global(bank: Bank, what: str) -> None:
    if bank.mode != "global":
        raise OddlingError(f"{what} works on global-mode banks only; bank {bank.path or ''} is in {bank.mode} mode")


def warn_if_few_calibration(n: int, target_fpr: float) -> None:
    needed = min_calibration_size(target_fpr)
    if n < max(needed, round(1 / target_fpr)):
        warnings.warn(
            f"only {n} calibration images for a target false-alarm rate of {target_fpr}: "
            f"about {round(1 / target_fpr)} or more are needed for the rate to mean much"
            + ("; with so few, no image can be flagged at all" if n < needed else ""),
            OddlingWarning,
            stacklevel=3,
        )


def fences_from_table(table: np.ndarray) -> dict:
    """Tukey fences of the references' image statistics (rows in health.STATS order)."""
    return fit_fences([dict(zip(STATS, row)) for row in table.tolist()])


def calibrate_references(embeddings: np.ndarray, hashes: list[str], k: int,
                         target_fpr: float) -> tuple[np.ndarray, dict]:
    """Leave-one-out calibration scores of the references and the cutoff they give."""
    scores = leave_one_out_scores(embeddings, np.array(hashes), k)
    return scores, calibration_record(scores, target_fpr, CALIBRATION_METHOD)


def calibration_record(scores: np.ndarray, target_fpr: float, method: str) -> dict:
    warn_if_few_calibration(len(scores), target_fpr)
    return {
        "method": method,
        "n": int(len(scores)),
        "target_fpr": target_fpr,
        "cutoff": json_number(cutoff_for_rate(scores, target_fpr), 12),
        "rule": "flagged when score > cutoff, i.e. conformal p-value <= target_fpr",
    }


def fit(
    reference_dir: str | os.PathLike,
    bank_path: str | os.PathLike | None = None,
    *,
    backbone: str = DEFAULT_BACKBONE,
    k: int = 5,
    target_fpr: float = 0.01,
    force: bool = False,
    mode: str = "global",
    coreset: float = 0.1,
    options: RunOptions | None = None,
) -> Bank:
    """Build a reference bank from a folder of normal images (and save it if `bank_path` is given).

    mode "global": one embedding per image, score = mean cosine distance to the k nearest
    references; calibration is leave-one-out over the bank: each reference is scored against the
    others (copies of itself excluded), which uses every image both as reference and as calibration.

    mode "local": patch features (see `oddling.detectors.patch`), a greedy k-center coreset of `coreset`
    times the patches, score = largest nearest-patch distance over the image; calibration is
    split (a seeded share of the references held out), and `k` is not used.
    """
    options = options or RunOptions()
    reference_dir = _folder(reference_dir, "reference folder")
    if mode not in MODES:
        raise OddlingError(f"mode must be one of {', '.join(MODES)}, got: {mode!r}")
    if not 0.0 < coreset <= 1.0:
        raise OddlingError(f"coreset must be in (0, 1], got: {coreset}")
    if mode == local.MODE:
        k = 1
    if k < 1:
        raise OddlingError(f"k must be >= 1, got: {k}")
    target_fpr = _check_rate(target_fpr)
    if bank_path is not None and Path(bank_path).exists() and not force:
        raise OddlingError(f"{bank_path} already exists; pass --force (force=True) to replace it")
    # Patch features come from the PyTorch network's inner stages: no ONNX export to make.
    net = load_backbone(backbone, options.cache_dir, "torch" if mode == local.MODE else options.runtime)
    exclude = (Path(bank_path),) if bank_path is not None else ()
    embedded = _embed_folder(reference_dir, net, options, "embedding references", exclude, mode)
    usable = embedded.ok_records
    skipped = [{"path": r.path, "status": r.status} for r in embedded.records if r.status != OK]
    distinct = len({r.sha256 for r in usable})
    if mode == local.MODE and distinct < 2 * local.MIN_CALIBRATION:
        raise OddlingError(f"{reference_dir} has {distinct} distinct usable images; local mode needs at least "
                           f"{2 * local.MIN_CALIBRATION} (half of them at most are held out to calibrate)")
    if distinct < k + 1:
        detail = f"; {len(skipped)} skipped (first: {skipped[0]['path']}: {skipped[0]['status']})" if skipped else ""
        raise OddlingError(
            f"{reference_dir} has {len(usable)} usable images ({distinct} distinct); at least k+1 = {k + 1} "
            f"distinct images are needed{detail}"
        )
    hashes = [r.sha256 for r in usable]
    local_info, sources = {}, np.zeros(0, np.int64)
    if mode == local.MODE:
        patch_bank = local.fit_patch_bank(embedded.embeddings, hashes, coreset)
        vectors, sources = patch_bank.patches, patch_bank.sources
        calibration_scores = patch_bank.calibration_scores
        calibration = calibration_record(calibration_scores, target_fpr, LOCAL_CALIBRATION)
        calibration["references"] = [usable[i].path for i in patch_bank.calibration_rows]
        local_info = {
            "layers": list(local.LAYERS), "grid": int(round(np.sqrt(embedded.embeddings.shape[1]))),
            "coreset_fraction": coreset, "n_patches": patch_bank.n_patches, "coreset_size": int(len(vectors)),
            "patch_dim": int(vectors.shape[1]), "projection_dim": local.PROJECTION_DIM if vectors.shape[1] > local.PROJECTION_DIM else None, "seed": local.SEED,
            "size_mb": round(vectors.nbytes / 2**20, 3),
        }
    else:
        vectors = embedded.embeddings
        calibration_scores, calibration = calibrate_references(vectors, hashes, k, target_fpr)
    bank = Bank(
        health_stats=embedded.health,
        health_fences=fences_from_table(embedded.health),
        backbone=net.fingerprint(),
        mode=mode,
        k=k,
        references=[{"path": r.path, "sha256": r.sha256} for r in usable],
        embeddings=vectors,
        calibration_scores=calibration_scores,
        calibration=calibration,
        reference_root=str(reference_dir.resolve()),
        tool_version=__version__,
        created=_dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
        skipped=skipped,
        local=local_info,
        patch_sources=sources,
    )
    if bank_path is not None:
        save_bank(bank, bank_path, force=force)
    return bank


def _as_bank(bank: Bank | str | os.PathLike) -> Bank:
    return bank if isinstance(bank, Bank) else load_bank(bank)


def _load_matching_backbone(bank: Bank, backbone: str | None, options: RunOptions) -> Backbone:
    if backbone is not None and backbone != bank.backbone["id"]:
        raise OddlingError(
            f"bank {bank.path or ''} was made with backbone {bank.backbone['id']!r}, not {backbone!r}; "
            "scores from different backbones cannot be compared"
        )
    runtime = "torch" if bank.mode == local.MODE else options.runtime
    net = load_backbone(bank.backbone["id"], options.cache_dir, runtime)
    check_compatible(bank, net.fingerprint())
    return net


@dataclass
class ScoreResult:
    """Scored files, sorted highest score first; unreadable files at the end with their status."""

    rows: list[ScoreRow]
    bank: Bank
    target_fpr: float
    cutoff: float
    root: Path

    @property
    def scored(self) -> list[ScoreRow]:
        return [r for r in self.rows if r.score is not None]

    def summary(self) -> dict:
        scores = [r.score for r in self.scored]
        return {
            "bank": str(self.bank.path) if self.bank.path else None,
            "backbone": self.bank.backbone["id"],
            "n_references": self.bank.size,
            "k": self.bank.k,
            "n_files": len(self.rows),
            "n_scored": len(scores),
            "n_skipped": len(self.rows) - len(scores),
            "n_flagged": sum(bool(r.flagged) for r in self.rows),
            "target_fpr": self.target_fpr,
            "cutoff": json_number(self.cutoff),
            "score_min": json_number(min(scores)) if scores else None,
            "score_max": json_number(max(scores)) if scores else None,
        }

    def to_csv(self) -> str:
        return rows_to_csv(self.rows)

    def write_csv(self, path: str | os.PathLike, force: bool = False) -> Path:
        return write_text(Path(path), self.to_csv(), force=force)

    def anomaly_map(self, path: str) -> np.ndarray:
        """Local mode: the (height, width) anomaly map of the scored file `path` (as in the rows),
        nearest-patch distance per pixel, smoothed; same units as the score."""
        return anomaly_map(self.bank, self.root, next(r for r in self.rows if r.path == path))

    def write_maps(self, out_dir: str | os.PathLike) -> list[Path]:
        """Local mode: one heatmap overlay PNG per scored file, at its relative path with ".png"
        appended (kept as is for a .png), so a.jpg and a.png never overwrite each other. Colours
        run from 0 to the batch's highest score, so maps of one batch compare."""
        if self.bank.mode != local.MODE:
            raise OddlingError("anomaly maps need a local-mode bank (oddling fit --mode local)")
        from oddling.data.intake import load_rgb

        out, written = Path(out_dir), []
        vmax = max((r.score for r in self.scored), default=1.0)
        for row in self.scored:
            target = out / (row.path if row.path.lower().endswith(".png") else f"{row.path}.png")
            target.parent.mkdir(parents=True, exist_ok=True)
            image = load_rgb(self.root / row.path)
            local.overlay(image, anomaly_map(self.bank, self.root, row, image.size), vmax).save(target)
            written.append(target)
        return written


def anomaly_map(bank: Bank, root: Path, row: ScoreRow, size: tuple[int, int] | None = None) -> np.ndarray:
    if row.anomaly_grid is None:
        raise OddlingError(f"{row.path} has no anomaly map (needs a local-mode bank and a readable image)")
    if size is None:
        from oddling.data.intake import load_rgb

        size = load_rgb(root / row.path).size   # as decoded: EXIF orientation applied
    crop = bank.backbone["preprocessing"]["crop"]
    return local.upsample_map(row.anomaly_grid, size, crop)


def _score_embedded(bank: Bank, embedded: EmbeddedFiles, target_fpr: float | None) -> tuple[list[ScoreRow], float]:
    vs = score_vectors(bank, embedded.embeddings, target_fpr)
    rows = []
    for rec in embedded.records:
        row = ScoreRow(path=rec.path, status=rec.status, sha256=rec.sha256)
        if rec.row is not None:
            i = rec.row
            row.health = health_text(health_findings(embedded.health_of(rec), bank.health_fences))
            row.score = float(vs.scores[i])
            row.p_value = float(vs.p_values[i])
            row.flagged = bool(vs.flagged[i])
            row.nearest = [bank.references[j]["path"] for j in vs.neighbour_rows[i]]
            row.nearest_distances = [float(d) for d in vs.neighbour_distances[i]]
            if vs.maps is not None:
                row.anomaly_grid = vs.maps[i]
        rows.append(row)
    return rows, vs.cutoff


def score(
    incoming_dir: str | os.PathLike,
    bank: Bank | str | os.PathLike,
    *,
    target_fpr: float | None = None,
    backbone: str | None = None,
    options: RunOptions | None = None,
) -> ScoreResult:
    """Score every file under `incoming_dir` against the bank.

    score = mean cosine distance to the bank's k nearest references (higher = more anomalous), or
    for a local-mode bank the largest nearest-patch distance (maps: `ScoreResult.anomaly_map`);
    p_value = conformal p-value against the bank's calibration scores; flagged = p_value <=
    target_fpr (the bank's rate unless overridden).
    """
    options = options or RunOptions()
    incoming_dir = _folder(incoming_dir, "incoming folder")
    bank = _as_bank(bank)
    if target_fpr is not None:
        target_fpr = _check_rate(target_fpr)
        warn_if_few_calibration(len(bank.calibration_scores), target_fpr)
    net = _load_matching_backbone(bank, backbone, options)
    exclude = (bank.path,) if bank.path else ()
    embedded = _embed_folder(incoming_dir, net, options, "scoring", exclude, bank.mode)
    rows, cutoff = _score_embedded(bank, embedded, target_fpr)
    rate, _ = bank_cutoff(bank, target_fpr)
    return ScoreResult(sort_rows(rows), bank, rate, cutoff, incoming_dir)


@dataclass
class EvaluationResult:
    """Scores with their true labels, the metrics, and what could not be used."""

    rows: list[ScoreRow]
    metrics: dict
    labels: np.ndarray     # of the labelled, scored rows, in `scored_labelled` order
    scores: np.ndarray
    bank: Bank | None = None
    root: Path | None = None    # the test folder

    @property
    def scored_labelled(self) -> list[ScoreRow]:
        return [r for r in self.rows if r.score is not None and r.label is not None]

    def write(self, out_dir: str | os.PathLike, force: bool = False) -> dict[str, Path]:
        """metrics.json, scores.csv, roc.png, pr.png in `out_dir`; existing files need force=True."""
        from oddling.evaluation import metrics as m
        from oddling.reporting.plots import plot_pr, plot_roc

        out = Path(out_dir)
        names = {"metrics": "metrics.json", "scores": "scores.csv", "roc": "roc.png", "pr": "pr.png"}
        clash = [n for n in names.values() if (out / n).exists()]
        if clash and not force:
            raise OddlingError(f"{out} already holds {', '.join(clash)}; pass --force to overwrite")
        out.mkdir(parents=True, exist_ok=True)
        paths = {key: out / name for key, name in names.items()}
        write_text(paths["metrics"], json.dumps(self.metrics, indent=2, sort_keys=True) + "\n", force=True)
        write_text(paths["scores"], rows_to_csv(self.rows, with_labels=True), force=True)
        fpr, tpr, _ = m.roc_curve(self.labels, self.scores)
        plot_roc(fpr, tpr, self.metrics["auroc"], paths["roc"])
        precision, recall, _ = m.precision_recall_curve(self.labels, self.scores)
        plot_pr(precision, recall, self.metrics["average_precision"], float(self.labels.mean()), paths["pr"])
        return paths


def evaluate(
    test_dir: str | os.PathLike,
    bank: Bank | str | os.PathLike,
    *,
    labels_csv: str | os.PathLike | None = None,
    normal_labels: tuple[str, ...] = ("normal",),
    beta: float = 1.0,
    target_fpr: float | None = None,
    options: RunOptions | None = None,
) -> EvaluationResult:
    """Score a labelled test folder and measure how well scores separate normal from anomalous.

    Labels come from subfolders (a folder named in `normal_labels` is normal, any other is an
    anomaly kind) or from `labels_csv`. Unreadable and unlabelled files are listed, never counted.
    """
    from oddling.data.labels import label_from_folder, read_labels_csv
    from oddling.evaluation.metrics import evaluation_summary

    options = options or RunOptions()
    test_dir = _folder(test_dir, "test folder")
    if beta <= 0:
        raise OddlingError(f"beta must be > 0, got: {beta}")
    bank = _as_bank(bank)
    if target_fpr is not None:
        target_fpr = _check_rate(target_fpr)
    net = _load_matching_backbone(bank, None, options)
    exclude = (bank.path,) if bank.path else ()
    embedded = _embed_folder(test_dir, net, options, "evaluating", exclude, bank.mode)
    rows, cutoff = _score_embedded(bank, embedded, target_fpr)
    table = read_labels_csv(Path(labels_csv)) if labels_csv else None
    for row in rows:
        found = table.get(row.path) if table is not None else label_from_folder(row.path, normal_labels)
        if found is not None:
            row.label, row.kind = found
    rows = sort_rows(rows)
    used = [r for r in rows if r.score is not None and r.label is not None]
    labels = np.array([r.label for r in used], dtype=np.int64)
    scores = np.array([r.score for r in used], dtype=np.float64)
    if not (labels == 0).any() or not (labels == 1).any():
        raise OddlingError(
            f"{test_dir} needs readable images of both classes; found {int((labels == 0).sum())} normal and "
            f"{int((labels == 1).sum())} anomalous (normal folders: {', '.join(normal_labels)})")
    summary = evaluation_summary(labels, scores, cutoff, kinds=[r.kind for r in used], beta=beta)
    rate, _ = bank_cutoff(bank, target_fpr)
    summary["bank"] = {"path": str(bank.path) if bank.path else None, "backbone": bank.backbone["id"],
                       "k": bank.k, "n_references": bank.size, "target_fpr": rate}
    summary["unreadable"] = [{"path": r.path, "status": r.status} for r in rows if r.score is None]
    summary["unlabelled"] = [r.path for r in rows if r.score is not None and r.label is None]
    return EvaluationResult(rows, summary, labels, scores, bank, test_dir)




def _read_decisions(csv_path: Path, root: Path | None) -> list[Path]:
    """Files marked normal in a decisions CSV (path,decision) exported from the review report."""
    import csv

    with open(csv_path, newline="", encoding="utf-8-sig") as f:
        reader = csv.DictReader(f)
        if not reader.fieldnames or not {"path", "decision"} <= set(reader.fieldnames):
            raise OddlingError(f"{csv_path} must have columns path,decision (got {reader.fieldnames})")
        rows = list(reader)
    base = root if root is not None else csv_path.parent
    files = []
    for row in rows:
        if row["decision"].strip().lower() != "normal":
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

    Only files whose content is not in the bank yet are embedded; calibration is recomputed; the
    bank is replaced atomically (the old one stays in place until the new one is complete).
    """
    options = options or RunOptions()
    bank = load_bank(bank_path)
    _require_global(bank, "bank add")
    source = Path(source)
    net = _load_matching_backbone(bank, None, options)
    if source.is_dir():
        base, paths = source, discover(source, exclude=(Path(bank_path),))
    elif source.is_file() and source.suffix.lower() == ".csv":
        paths = _read_decisions(source, Path(root) if root else None)
        base = Path(os.path.commonpath([p.resolve().parent for p in paths])) if paths else source.parent
        paths = [p.resolve() for p in paths]
    else:
        raise OddlingError(f"{source} is neither a folder nor a decisions CSV")
    known = {r["sha256"] for r in bank.references}
    embedded = _embed_paths(base, paths, net, options, "embedding new references")
    ref_root = Path(bank.reference_root)
    added, duplicates = [], 0
    vectors, stats = [bank.embeddings], [bank.health_stats]
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
        bank.references = bank.references + added
        bank.embeddings = np.concatenate(vectors).astype(np.float32)
        bank.health_stats = np.concatenate(stats)
        bank.health_fences = fences_from_table(bank.health_stats)
        bank.calibration_scores, bank.calibration = calibrate_references(
            bank.embeddings, [r["sha256"] for r in bank.references], bank.k, bank.calibration["target_fpr"])
        save_bank(bank, bank_path, force=True)
    return {"added": len(added), "already_in_bank": duplicates, "skipped": skipped, "n_references": bank.size}


def bank_remove(bank_path: str | os.PathLike, paths: list[str]) -> dict:
    """Remove references by their bank path (as `bank info` / `audit` print them); recalibrate."""
    bank = load_bank(bank_path)
    _require_global(bank, "bank remove")
    wanted = set(paths)
    keep = [i for i, r in enumerate(bank.references) if r["path"] not in wanted]
    found = {bank.references[i]["path"] for i in range(bank.size)} & wanted
    not_found = sorted(wanted - found)
    distinct = len({bank.references[i]["sha256"] for i in keep})
    if distinct < bank.k + 1:
        raise OddlingError(f"removing these would leave {distinct} distinct references; k={bank.k} needs "
                           f"at least {bank.k + 1}")
    if found:
        bank.references = [bank.references[i] for i in keep]
        bank.embeddings = bank.embeddings[keep]
        bank.health_stats = bank.health_stats[keep]
        bank.health_fences = fences_from_table(bank.health_stats)
        bank.calibration_scores, bank.calibration = calibrate_references(
            bank.embeddings, [r["sha256"] for r in bank.references], bank.k, bank.calibration["target_fpr"])
        save_bank(bank, bank_path, force=True)
    return {"removed": len(found), "not_found": not_found, "n_references": bank.size}


def bank_info(bank_path: str | os.PathLike) -> dict:
    bank = load_bank(bank_path)
    meta = bank.metadata()
    return {key: meta[key] for key in ("format_version", "tool_version", "created", "backbone", "mode", "k",
                                       "calibration", "reference_root", "n_references")} | {
        "n_skipped": len(bank.skipped), "path": str(bank.path)}



def drift(
    incoming_dir: str | os.PathLike,
    bank: Bank | str | os.PathLike,
    *,
    n_permutations: int = 500,
    seed: int = 0,
    record: bool = True,
    options: RunOptions | None = None,
) -> dict:
    """Has this whole batch moved away from the references?

    Two tests: MMD between the batch's and the bank's embeddings with a permutation p-value
    (Gretton et al. 2012), and the share flagged at the bank's cutoff against its target rate
    (exact binomial test). With `record`, one line per run is appended to the bank's history.
    """
    from oddling.bank.store import HISTORY_FILE
    from oddling.evaluation.shift import flagged_share_test, mmd_permutation_test, shift_verdict

    options = options or RunOptions()
    incoming_dir = _folder(incoming_dir, "incoming folder")
    bank = _as_bank(bank)
    _require_global(bank, "drift")
    net = _load_matching_backbone(bank, None, options)
    embedded = _embed_folder(incoming_dir, net, options, "embedding batch", (bank.path,) if bank.path else ())
    n = len(embedded.embeddings)
    if n < 2:
        raise OddlingError(f"{incoming_dir} has {n} readable images; a shift test needs at least 2")
    mmd = mmd_permutation_test(embedded.embeddings, bank.embeddings, n_permutations=n_permutations, seed=seed)
    scored = score_vectors(bank, embedded.embeddings)
    share = flagged_share_test(int(scored.flagged.sum()), n, bank.calibration["target_fpr"])
    shift = shift_verdict(mmd["p_value"], share["binomial_p_value"])
    result = {
        "batch": str(incoming_dir),
        "n_batch": n,
        "n_bank": bank.size,
        "mmd": json_number(float(np.sqrt(max(mmd["mmd2"], 0.0)))),
        "mmd2": json_number(mmd["mmd2"]),
        "mmd_p_value": json_number(mmd["p_value"]),
        "mmd_bandwidth": json_number(mmd["bandwidth"]),
        "n_permutations": n_permutations,
        "n_flagged": int(scored.flagged.sum()),
        "flagged_share": json_number(share["flagged_share"]),
        "expected_share": share["expected_share"],
        "binomial_p_value": json_number(share["binomial_p_value"]),
        "shift": bool(shift),
        "rule": "shift when either p-value < 0.025 (0.05 split over the two tests, Bonferroni)",
    }
    if record and bank.path is not None:
        entry = {"time": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()} | result
        with open(Path(bank.path) / HISTORY_FILE, "a", encoding="utf-8") as f:
            f.write(json.dumps(entry, sort_keys=True) + "\n")
    return result


def drift_history(bank_path: str | os.PathLike) -> list[dict]:
    from oddling.bank.store import HISTORY_FILE

    bank = load_bank(bank_path)
    path = Path(bank_path) / HISTORY_FILE
    if not path.is_file():
        raise OddlingError(f"{bank_path} has no drift history yet; run `oddling drift INCOMING --bank {bank_path}`")
    entries = [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines() if line.strip()]
    return [e | {"expected_share": e.get("expected_share", bank.calibration["target_fpr"])} for e in entries]


def audit(bank: Bank | str | os.PathLike) -> dict:
    """Findings about the reference set itself: outliers, duplicates, near duplicates, health."""
    from oddling.evaluation.reference_audit import NEAR_DUPLICATE_COSINE, audit_bank

    bank = _as_bank(bank)
    _require_global(bank, "audit")
    findings = audit_bank(bank)
    return {"bank": str(bank.path) if bank.path else None, "n_references": bank.size,
            "near_duplicate_cosine": NEAR_DUPLICATE_COSINE, "findings": [f.to_dict() for f in findings]}

__all__ = ["fit", "score", "evaluate", "drift", "drift_history", "audit", "bank_add", "bank_remove", "bank_info", "RunOptions", "ScoreResult",
           "EvaluationResult", "OddlingWarning", "load_bank", "count_ok"]
