"""Per-file results and their files: the scores CSV (sorted, every input accounted for) and the JSON summary."""
from __future__ import annotations

import math
from dataclasses import dataclass, field

from oddling.data.csv_cells import csv_field, csv_text
from oddling.embedding.runner import OK
from oddling.numbers import json_number  # noqa: F401  (re-exported: its home is oddling.numbers)

SCORE_COLUMNS = ["path", "score", "p_value", "flagged", "nearest", "nearest_distance", "health", "status"]


@dataclass
class ScoreRow:
    path: str
    status: str
    sha256: str | None = None
    score: float | None = None
    p_value: float | None = None
    flagged: bool | None = None
    nearest: list[str] = field(default_factory=list)          # nearest references, nearest first
    nearest_distances: list[float] = field(default_factory=list)
    health: str = ""             # "ok" or the image statistics out of the references' range
    note: str = ""               # about an ok file, e.g. "first of 3 frames"; status stays "ok"
    label: int | None = None     # evaluate only: 1 anomalous, 0 normal
    kind: str | None = None      # evaluate only: anomaly kind (subfolder name) or "normal"
    anomaly_grid: object = None  # local mode: (G, G) nearest-patch distances; see ScoreResult.anomaly_map
    above_all: int | None = None  # N when the score is above all N calibration scores (p at its floor)

    @property
    def remarks(self) -> str:
        """What the status column adds to "ok": the frame note, and that the p-value is at its floor
        (it cannot go lower with this bank, so only the score still ranks such images)."""
        parts = [self.note] if self.note else []
        if self.above_all is not None:
            parts.append(f"above all {self.above_all} calibration scores")
        return "; ".join(parts)


def sort_rows(rows: list[ScoreRow]) -> list[ScoreRow]:
    """Highest score first (ties by path); files without a score last, by path."""
    scored = sorted((r for r in rows if r.score is not None), key=lambda r: (-r.score, r.path))
    unscored = sorted((r for r in rows if r.score is None), key=lambda r: r.path)
    return scored + unscored


def _num(value: float | None, digits: int = 6) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return f"{value:.{digits}f}"


def rows_to_csv(rows: list[ScoreRow], with_labels: bool = False) -> str:
    """The scores CSV: one line per row ending in "\\n", cells quoted as csv_field says."""
    columns = SCORE_COLUMNS + (["label", "kind"] if with_labels else [])
    lines = [columns]
    for r in rows:
        line = [
            csv_text(r.path),
            _num(r.score),
            _num(r.p_value),
            "" if r.flagged is None else ("true" if r.flagged else "false"),
            csv_text(r.nearest[0]) if r.nearest else "",
            _num(r.nearest_distances[0]) if r.nearest_distances else "",
            csv_text(r.health),
            csv_text(f"{r.status} ({r.remarks})" if r.remarks else r.status),
        ]
        if with_labels:
            line += ["" if r.label is None else ("anomalous" if r.label else "normal"), csv_text(r.kind or "")]
        lines.append(line)
    return "".join(",".join(csv_field(cell) for cell in line) + "\n" for line in lines)


def count_ok(rows: list[ScoreRow]) -> int:
    return sum(r.status == OK for r in rows)
