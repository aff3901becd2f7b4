"""Ground-truth labels for a test folder: from class subfolders, or from a CSV of path,label."""
from __future__ import annotations

import csv
from pathlib import Path

from oddling.errors import OddlingError

NORMAL_WORDS = {"normal", "0", "ok", "good"}
ANOMALY_WORDS = {"anomaly", "anomalous", "1", "defect", "bad"}


def label_from_folder(rel_path: str, normal_labels: tuple[str, ...]) -> tuple[int, str] | None:
    """(label, kind) from the first folder of a relative path; None for files at the top level."""
    parts = rel_path.split("/")
    if len(parts) < 2:
        return None
    folder = parts[0]
    return (0, "normal") if folder in normal_labels else (1, folder)


def read_labels_csv(path: Path) -> dict[str, tuple[int, str]]:
    """path,label[,kind] rows; label normal/anomaly (or 0/1). Paths relative to the test folder."""
    try:
        with open(path, newline="", encoding="utf-8-sig") as f:
            reader = csv.DictReader(f)
            if not reader.fieldnames or not {"path", "label"} <= set(reader.fieldnames):
                raise OddlingError(f"{path} must have a header with columns path,label (got {reader.fieldnames})")
            labels: dict[str, tuple[int, str]] = {}
            for line_no, row in enumerate(reader, start=2):
                word = (row["label"] or "").strip().lower()
                if word in NORMAL_WORDS:
                    value, kind = 0, "normal"
                elif word in ANOMALY_WORDS:
                    value, kind = 1, (row.get("kind") or "").strip() or "anomalous"
                else:
                    raise OddlingError(
                        f"{path} line {line_no}: label must be normal/anomaly or 0/1, got: {row['label']!r}")
                labels[Path(row["path"].strip()).as_posix()] = (value, kind)
    except OSError as exc:
        raise OddlingError(f"cannot read labels file {path}: {exc}") from exc
    return labels
