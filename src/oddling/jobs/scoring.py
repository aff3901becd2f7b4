"""score: every file of a folder against a bank -> rows sorted by score, with p-values, flags and evidence."""
from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from oddling.bank.store import Bank, load_bank
from oddling.data.encoding import format_summary, image_format, warn_if_other_encoding
from oddling.data.health import health_findings, health_text
from oddling.detectors.base import Scores
from oddling.embedding.options import RunOptions
from oddling.errors import OddlingError
from oddling.files import write_text
from oddling.jobs.rates import check_target_rate, warn_if_few_calibration
from oddling.jobs.reading import embed_folder, folder, load_bank_representation
from oddling.reporting.results import ScoreRow, json_number, rows_to_csv, sort_rows


def as_bank(bank: Bank | str | os.PathLike) -> Bank:
    return bank if isinstance(bank, Bank) else load_bank(bank)


def require_flagging(bank: Bank, target_fpr: float | None, gate: str):
    """The bank's threshold, or an OddlingError naming the gate when it cannot flag anything at the
    rate: a gate built on it would pass every defect."""
    threshold = bank.threshold(target_fpr)
    if not threshold.can_flag:
        where = f" {bank.path}" if bank.path else ""
        raise OddlingError(f"{gate} needs a bank that can flag, and bank{where} cannot at target false-alarm rate "
                           f"{threshold.target_fpr:g}: {threshold.support_text()}. Refit it with more references or "
                           "a higher --target-fpr, or give a higher --target-fpr here")
    return threshold


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
        threshold = self.bank.threshold(self.target_fpr)
        return {
            "bank": str(self.bank.path) if self.bank.path else None,
            "backbone": self.bank.backbone["id"],
            "representation": self.bank.representation["id"],
            "detector": self.bank.detector.name,
            "params": self.bank.detector.get_params(),
            "n_references": self.bank.size,
            "n_files": len(self.rows),
            "n_scored": len(scores),
            "n_skipped": len(self.rows) - len(scores),
            "n_flagged": sum(bool(r.flagged) for r in self.rows),
            "target_fpr": self.target_fpr,
            "guarantee": threshold.describe() if threshold.can_flag else f"none: {threshold.support_text()}",
            "cutoff": json_number(self.cutoff),
            # p-values cannot go below this with this bank; images above every calibration score share it
            "p_value_floor": json_number(threshold.p_floor),
            "n_at_p_value_floor": sum(r.above_all is not None for r in self.scored),
            "score_min": json_number(min(scores)) if scores else None,
            "score_max": json_number(max(scores)) if scores else None,
        }

    def to_csv(self) -> str:
        return rows_to_csv(self.rows)

    def write_csv(self, path: str | os.PathLike, force: bool = False) -> Path:
        return write_text(Path(path), self.to_csv(), force=force)

    def anomaly_map(self, path: str) -> np.ndarray:
        """The (height, width) anomaly map of the scored file `path` (as in the rows), for detectors
        that score locations (the patch detector); same units as the score."""
        return anomaly_map(self.bank, self.root, next(r for r in self.rows if r.path == path))

    def write_maps(self, out_dir: str | os.PathLike) -> list[Path]:
        """One heatmap overlay PNG per scored file, at its relative path with ".png" appended (kept
        as is for a .png), so a.jpg and a.png never overwrite each other. Colours run from 0 to the
        batch's highest score, so maps of one batch compare."""
        from oddling.data.intake import load_rgb
        from oddling.reporting.heatmaps import overlay

        if not any(r.anomaly_grid is not None for r in self.scored) and self.scored:
            raise OddlingError(f"anomaly maps need a detector that scores locations (patch-knn); this bank's "
                               f"detector is {self.bank.detector.name}")
        out, written = Path(out_dir), []
        vmax = max((r.score for r in self.scored), default=1.0)
        for row in self.scored:
            target = out / (row.path if row.path.lower().endswith(".png") else f"{row.path}.png")
            target.parent.mkdir(parents=True, exist_ok=True)
            image = load_rgb(self.root / row.path)
            overlay(image, anomaly_map(self.bank, self.root, row, image.size), vmax).save(target)
            written.append(target)
        return written


def anomaly_map(bank: Bank, root: Path, row: ScoreRow, size: tuple[int, int] | None = None) -> np.ndarray:
    from oddling.reporting.heatmaps import upsample_map

    if row.anomaly_grid is None:
        raise OddlingError(f"{row.path} has no anomaly map (needs a patch-detector bank and a readable image)")
    if size is None:
        from oddling.data.intake import load_rgb

        size = load_rgb(root / row.path).size   # as decoded: EXIF orientation applied
    preprocessing = bank.representation["preprocessing"]
    return upsample_map(row.anomaly_grid, size, preprocessing["crop"], frame=preprocessing.get("frame", "crop"))


SCORE_CHUNK = 4096   # queries per detector call (as oddling.index.base.QUERY_CHUNK): bounds each call's work


def score_features(bank: Bank, features: np.ndarray, target_fpr: float | None = None, progress: bool = False,
                   groups: np.ndarray | None = None):
    """(Scores, p-values, flags, threshold) of feature rows against the bank. `groups`: the rows'
    content hashes (detectors with fold models pick each image's model by them).

    Streamed: the detector scores `SCORE_CHUNK` rows at a time, with a progress bar on stderr
    when there is more than one chunk (and `progress`). Only the results (n x k neighbours) are
    kept; no call holds more than a chunk's search, never all queries x all references."""
    threshold = bank.threshold(target_fpr)
    if len(features) <= SCORE_CHUNK:
        scored = bank.detector.anomaly_score(features, groups)
    else:
        import sys

        from tqdm import tqdm

        parts = []
        with tqdm(total=len(features), desc="scoring against the bank", unit="img", file=sys.stderr,
                  disable=not progress, leave=False) as bar:
            for start in range(0, len(features), SCORE_CHUNK):
                part_groups = None if groups is None else groups[start:start + SCORE_CHUNK]
                parts.append(bank.detector.anomaly_score(features[start:start + SCORE_CHUNK], part_groups))
                bar.update(len(parts[-1].scores))
        scored = join_scores(parts)
    return scored, threshold.p_values(scored.scores), threshold.flag(scored.scores), threshold


def join_scores(parts: list[Scores]) -> Scores:
    """The Scores of consecutive chunks as one."""
    def joined(name):
        arrays = [getattr(p, name) for p in parts]
        return None if arrays[0] is None else np.concatenate(arrays)

    return Scores(joined("scores"), joined("neighbour_rows"), joined("neighbour_distances"), joined("maps"))


def rows_from_embedded(bank: Bank, embedded, target_fpr: float | None,
                       progress: bool = False) -> tuple[list[ScoreRow], float]:
    threshold = bank.threshold(target_fpr)
    if not embedded.ok_records:
        return [ScoreRow(path=r.path, status=r.status, sha256=r.sha256) for r in embedded.records], threshold.cutoff
    scored, p_values, flagged, threshold = score_features(bank, embedded.embeddings, target_fpr, progress,
                                                          embedded.row_hashes)
    above_all = threshold.above_all(scored.scores)
    rows = []
    for rec in embedded.records:
        row = ScoreRow(path=rec.path, status=rec.status, sha256=rec.sha256, note=rec.note)
        if rec.row is not None:
            i = rec.row
            row.health = health_text(health_findings(embedded.health_of(rec), bank.health_fences))
            row.score = float(scored.scores[i])
            row.p_value = float(p_values[i])
            row.flagged = bool(flagged[i])
            row.above_all = threshold.n if above_all[i] else None
            if scored.neighbour_rows is not None:
                row.nearest = [bank.references[j]["path"] for j in scored.neighbour_rows[i]]
                row.nearest_distances = [float(d) for d in scored.neighbour_distances[i]]
            if scored.maps is not None:
                row.anomaly_grid = scored.maps[i]
        rows.append(row)
    return rows, threshold.cutoff


def warn_about_encoding(bank: Bank, root: Path, rows: list[ScoreRow]) -> None:
    """OddlingWarning when the scored files are encoded unlike the bank's references (format, JPEG
    quality): data.encoding.warn_if_other_encoding. Reads each scored file's header, no pixels."""
    if not bank.formats:
        return
    batch = format_summary(image_format(root / r.path) for r in rows if r.score is not None)
    warn_if_other_encoding(bank.formats, batch, stacklevel=4)


def score(
    incoming_dir: str | os.PathLike,
    bank: Bank | str | os.PathLike,
    *,
    target_fpr: float | None = None,
    backbone: str | None = None,
    allow_empty: bool = False,
    require_cutoff: bool = False,
    options: RunOptions | None = None,
) -> ScoreResult:
    """Score every file under `incoming_dir` against the bank.

    score = the bank's detector score (higher = more anomalous; `bank.detector.describe_score()`
    says what it measures); p_value = conformal p-value against the bank's calibration scores;
    flagged = p_value <= target_fpr (the bank's rate unless overridden). A folder without one
    usable image is an OddlingError ("no images found in ...") unless `allow_empty` (for
    pipelines: then the rows say why each file has no score). `require_cutoff` (what
    `--fail-on-flagged` asks): a bank that cannot flag at the rate is an OddlingError before any
    work, since a gate that cannot close must not report that nothing was flagged.
    """
    options = options or RunOptions()
    incoming_dir = folder(incoming_dir, "incoming folder")
    bank = as_bank(bank)
    if target_fpr is not None:
        target_fpr = check_target_rate(target_fpr)
    if require_cutoff:
        require_flagging(bank, target_fpr, "--fail-on-flagged")
    warn_if_few_calibration(bank.threshold(target_fpr))
    if backbone is not None and backbone != bank.backbone["id"]:
        raise OddlingError(f"bank {bank.path or ''} was made with {bank.backbone['id']!r}, not {backbone!r}; "
                           "scores from different backbones cannot be compared")
    rep = load_bank_representation(bank, options)
    exclude = (bank.path,) if bank.path else ()
    embedded = embed_folder(incoming_dir, rep, options, "scoring", exclude, allow_empty=allow_empty)
    rows, cutoff = rows_from_embedded(bank, embedded, target_fpr, options.progress)
    warn_about_encoding(bank, incoming_dir, rows)
    return ScoreResult(sort_rows(rows), bank, target_fpr or bank.target_fpr, cutoff, incoming_dir)
