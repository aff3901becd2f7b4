"""evaluate: score a labelled folder and measure how well the scores separate normal from anomalous."""
from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from oddling.bank.store import Bank
from oddling.embedding.options import RunOptions
from oddling.errors import OddlingError
from oddling.files import refuse_existing, write_text
from oddling.jobs.rates import check_target_rate
from oddling.jobs.reading import embed_folder, folder, load_bank_representation
from oddling.jobs.scoring import as_bank, rows_from_embedded, warn_about_encoding
from oddling.numbers import plural
from oddling.reporting.results import ScoreRow, rows_to_csv, sort_rows


@dataclass
class EvaluationResult:
    """Scores with their true labels, the metrics, and what could not be used."""

    rows: list[ScoreRow]
    metrics: dict
    labels: np.ndarray     # of the labelled, scored rows, in `scored_labelled` order
    scores: np.ndarray
    bank: Bank | None = None
    root: Path | None = None    # the test folder
    notes: list[str] = field(default_factory=list)   # what the labels leave out, one line each, for stderr

    @property
    def scored_labelled(self) -> list[ScoreRow]:
        return [r for r in self.rows if r.score is not None and r.label is not None]

    def write(self, out_dir: str | os.PathLike, force: bool = False) -> dict[str, Path]:
        """metrics.json, scores.csv, roc.png, pr.png in `out_dir`; existing files need force=True."""
        from oddling.evaluation import metrics as m
        from oddling.reporting.plots import plot_pr, plot_roc

        out = Path(out_dir)
        names = {"metrics": "metrics.json", "scores": "scores.csv", "roc": "roc.png", "pr": "pr.png"}
        paths = {key: out / name for key, name in names.items()}
        refuse_existing(*paths.values(), force=force)
        out.mkdir(parents=True, exist_ok=True)
        write_text(paths["metrics"], json.dumps(self.metrics, indent=2, sort_keys=True) + "\n", force=True)
        write_text(paths["scores"], rows_to_csv(self.rows, with_labels=True), force=True)
        fpr, tpr, _ = m.roc_curve(self.labels, self.scores)
        plot_roc(fpr, tpr, self.metrics["auroc"], paths["roc"])
        precision, recall, _ = m.precision_recall_curve(self.labels, self.scores)
        plot_pr(precision, recall, self.metrics["average_precision"], float(self.labels.mean()), paths["pr"])
        return paths


def attach_labels(rows: list[ScoreRow], labels_csv: str | os.PathLike | None,
                  normal_labels: tuple[str, ...], root: Path | None = None) -> dict:
    """Set each row's label and kind; return what the labels leave out (data.labels.label_summary):
    rows of the labels CSV whose file is not in the folder, files with no label; with class
    folders also `normal_folders` (the folders taken as normal, any case) and `notes` (one line
    when a folder was taken as normal only by ignoring case). Class folders whose names differ only
    in case are an OddlingError (data.labels.class_folders)."""
    from oddling.data.labels import class_folders, label_from_folder, label_summary, read_labels_csv

    table = read_labels_csv(Path(labels_csv)) if labels_csv else None
    normal_folders, notes = [], []
    if table is None:
        normal_folders, notes = class_folders([r.path for r in rows], normal_labels,
                                              str(root) if root is not None else None)
    for row in rows:
        found = table.get(row.path) if table is not None else label_from_folder(row.path, normal_labels)
        if found is not None:
            row.label, row.kind = found
    if table is not None:
        return label_summary(table, [r.path for r in rows]) | {"normal_folders": [], "notes": []}
    unlabelled = sorted(r.path for r in rows if r.label is None)
    return {"missing_files": [], "unlabelled": unlabelled, "n_labelled": len(rows) - len(unlabelled),
            "normal_folders": normal_folders, "notes": notes}


def label_notes(gaps: dict, test_dir: Path, from_csv: bool) -> list[str]:
    """What the labels leave out (and how folders were read), in words for stderr
    (data.labels.describe_label_summary)."""
    from oddling.data.labels import ROWS_SHOWN, describe_label_summary

    notes = list(gaps.get("notes", []))
    if from_csv:
        return notes + describe_label_summary(gaps)
    paths = gaps["unlabelled"]
    if not paths:
        return notes
    more = f", and {len(paths) - ROWS_SHOWN} more" if len(paths) > ROWS_SHOWN else ""
    return notes + [f"{plural(len(paths), 'file')} at the top of {test_dir}, outside any class subfolder, "
                    f"{'has' if len(paths) == 1 else 'have'} no label (not counted): "
                    f"{', '.join(paths[:ROWS_SHOWN])}{more}"]


def copies_notes(counts: dict, n_files: int) -> list[str]:
    """What copies (files of one content, metrics.content_counts) do to the figures, for stderr."""
    notes = []
    if counts["n_duplicate_files"]:
        notes.append(f"{counts['n_duplicate_files']} of {plural(n_files, 'labelled file')} repeat the content of "
                     f"another file of their class ({counts['n_distinct_normal']} distinct normal, "
                     f"{counts['n_distinct_anomalous']} distinct anomalous contents): the AUROC counts every file, "
                     "its 95% interval each content once")
    if counts["n_contents_in_both_classes"]:
        notes.append(f"{plural(counts['n_contents_in_both_classes'], 'content')} labelled both normal and anomalous "
                     "(copies of one file in two classes): check the labels")
    return notes


def labelled_arrays(rows: list[ScoreRow], where: Path, normal_labels: tuple[str, ...]) -> tuple[np.ndarray, np.ndarray]:
    used = [r for r in rows if r.score is not None and r.label is not None]
    labels = np.array([r.label for r in used], dtype=np.int64)
    scores = np.array([r.score for r in used], dtype=np.float64)
    if not (labels == 0).any() or not (labels == 1).any():
        raise OddlingError(
            f"{where} needs readable images of both classes; found {int((labels == 0).sum())} normal and "
            f"{int((labels == 1).sum())} anomalous (normal folders: {', '.join(normal_labels)})")
    return labels, scores


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

    Labels come from subfolders (a folder named in `normal_labels`, compared ignoring case, is
    normal, any other is an anomaly kind; two folders differing only in case are an error) or from
    `labels_csv`. Unreadable and unlabelled files are listed, never counted. Copies (files of one
    SHA-256) count as files in the AUROC and once per content in its interval
    (metrics.evaluation_summary). `notes` (also metrics.json's `notes`) words for the CLI what the
    labels leave out (rows of the CSV whose file is missing, files with no label), a folder taken as
    normal by ignoring case, copies, and a cutoff that flags nothing.
    """
    from oddling.evaluation.metrics import evaluation_summary

    options = options or RunOptions()
    test_dir = folder(test_dir, "test folder")
    if beta <= 0:
        raise OddlingError(f"beta must be > 0, got: {beta}")
    bank = as_bank(bank)
    if target_fpr is not None:
        target_fpr = check_target_rate(target_fpr)
    rep = load_bank_representation(bank, options)
    embedded = embed_folder(test_dir, rep, options, "evaluating", (bank.path,) if bank.path else ())
    rows, cutoff = rows_from_embedded(bank, embedded, target_fpr)
    warn_about_encoding(bank, test_dir, rows)
    gaps = attach_labels(rows, labels_csv, normal_labels, test_dir)
    rows = sort_rows(rows)
    notes = label_notes(gaps, test_dir, labels_csv is not None)
    try:
        labels, scores = labelled_arrays(rows, test_dir, normal_labels)
    except OddlingError as exc:
        if not notes:
            raise
        raise OddlingError(f"{exc}; " + "; ".join(notes)) from exc
    used = [r for r in rows if r.score is not None and r.label is not None]
    summary = evaluation_summary(labels, scores, cutoff, kinds=[r.kind for r in used], beta=beta,
                                 groups=[r.sha256 for r in used])
    notes += copies_notes(summary, len(used))
    at_cutoff = summary["at_cutoff"]
    if at_cutoff["note"]:   # nothing flagged: say why in the bank's terms
        threshold = bank.threshold(target_fpr)
        if not threshold.can_flag:
            at_cutoff["note"] = (f"this bank cannot flag at {'its rate' if target_fpr is None else 'the rate asked'}: "
                                 f"{threshold.support_text()}; nothing is flagged, so precision is undefined (null) "
                                 "and recall is 0")
        else:
            at_cutoff["note"] = (f"nothing is flagged at the bank's cutoff ({threshold.cutoff:.4f} at target "
                                 f"false-alarm rate {threshold.target_fpr:g}): precision (anomalies among flagged "
                                 "images, 0 of 0) is undefined (null); recall is 0")
        notes.append(at_cutoff["note"])
    summary["normal_folders"] = gaps["normal_folders"]
    summary["notes"] = notes
    summary["bank"] = {"path": str(bank.path) if bank.path else None, "backbone": bank.backbone["id"],
                       "representation": bank.representation["id"], "detector": bank.detector.name,
                       "params": bank.detector.get_params(), "n_references": bank.size,
                       "target_fpr": target_fpr or bank.target_fpr}
    summary["unreadable"] = [{"path": r.path, "status": r.status} for r in rows if r.score is None]
    summary["unlabelled"] = [r.path for r in rows if r.score is not None and r.label is None]
    summary["labels_without_file"] = gaps["missing_files"]
    return EvaluationResult(rows, summary, labels, scores, bank, test_dir, notes)
