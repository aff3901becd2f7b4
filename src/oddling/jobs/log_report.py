"""The review page over the scored-image log: the log's rows of a bank as a score result, and where
each logged file is now, for `reporting.page.write_report` (`oddling report --log`)."""
from __future__ import annotations

from pathlib import Path

from oddling.data.intake import path_from_display, sha256_file
from oddling.errors import OddlingError
from oddling.jobs.scoring import ScoreResult
from oddling.logbook.store import ScoreLog, bank_fingerprint
from oddling.reporting.results import ScoreRow, sort_rows


def report_rows(log: ScoreLog, bank, *, since: str | None = None, until: str | None = None,
                last: int | None = None):
    """(ScoreResult, image_of) for `reporting.page.write_report`: the log's rows of this bank as score
    rows (a name logged twice gets its log id appended), and where each one's file is, when it still
    exists with the logged content (else the page shows a placeholder)."""
    logged = log.rows(since=since, until=until, last=last, bank=bank_fingerprint(bank))
    if not logged:
        raise OddlingError(f"log {log.path} has no rows of this bank in that window")
    counts: dict[str, int] = {}
    for r in logged:
        counts[r.name] = counts.get(r.name, 0) + 1
    rows, files = [], {}
    for r in logged:
        name = r.name if counts[r.name] == 1 else f"{r.name} (log row {r.id})"
        neighbours = r.neighbours or ([[r.nearest, r.nearest_distance]] if r.nearest else [])
        row = ScoreRow(path=path_from_display(name), status=r.status, sha256=r.sha256, score=r.score,
                       p_value=r.p_value, flagged=r.flagged,
                       nearest=[path_from_display(p) for p, _ in neighbours],
                       nearest_distances=[float(d) for _, d in neighbours], health=r.health or "")
        rows.append(row)
        if r.path and r.score is not None:
            path = Path(path_from_display(r.path))
            try:
                if path.is_file() and (r.sha256 is None or sha256_file(path) == r.sha256):
                    files[row.path] = path
            except OSError:
                pass
    result = ScoreResult(sort_rows(rows), bank, bank.target_fpr, bank.threshold().cutoff, Path(log.path).parent)
    return result, (lambda row: files.get(row.path))
