"""What is done with the log's rows: writing score results into it, the shift test over logged images,
the review page's rows, and exporting rows to CSV or Parquet.

Features for the shift test are not stored in the log: a row keeps the image's content hash, and
the vector is looked up in the embedding cache (every writer embeds through it), else re-embedded
from the file when it still exists with the same hash. Rows whose vector is in neither are left out
of the MMD test and counted (`n_without_features`); `--no-cache` runs leave only the second way.
"""
from __future__ import annotations

import os
import uuid
from pathlib import Path

import numpy as np

from oddling.data.intake import display_path, path_from_display
from oddling.errors import OddlingError
from oddling.logbook.store import EXPORT_COLUMNS, LogRow, ScoreLog, bank_fingerprint


def new_request_id() -> str:
    return uuid.uuid4().hex[:16]


def log_rows(score_rows, *, source: str, bank_fp: str, request: str | None = None, root: Path | None = None,
             names: list[str] | None = None) -> list[LogRow]:
    """ScoreRows as log rows. With `root`, `path` is the absolute file path (root / row.path);
    `names` overrides the row paths as names (the service's client file names)."""
    out = []
    base = Path(os.path.abspath(root)) if root is not None else None
    for i, row in enumerate(score_rows):
        name = names[i] if names is not None else row.path
        neighbours = [[display_path(p), float(d)] for p, d in zip(row.nearest, row.nearest_distances)]
        out.append(LogRow(
            source=source, name=display_path(name), status=row.status, bank=bank_fp,
            path=display_path(str(base / row.path)) if base is not None else None, sha256=row.sha256,
            score=row.score, p_value=row.p_value, flagged=row.flagged,
            nearest=display_path(row.nearest[0]) if row.nearest else None,
            nearest_distance=float(row.nearest_distances[0]) if row.nearest_distances else None,
            neighbours=neighbours or None, health=row.health or None, request=request))
    return out


def log_score_result(result, log: ScoreLog, request: str | None = None) -> int:
    """Append every row of an `oddling.score` result to the log (source "score"); the number written."""
    rows = log_rows(result.rows, source="score", bank_fp=bank_fingerprint(result.bank),
                    request=request or new_request_id(), root=result.root)
    log.append(rows)
    return len(rows)


# ---- features of logged images -----------------------------------------------------------------

def logged_features(rows: list[LogRow], representation, options, cache=None) -> tuple[np.ndarray, list[str]]:
    """(features, hashes) of the distinct content hashes among `rows`, in first-seen order, from the
    embedding cache or, failing that, the file at the row's path when it still holds the same bytes."""
    from oddling.data.intake import sha256_file
    from oddling.embedding.cache import open_cache
    from oddling.embedding.runner import embed_files

    if cache is None:
        cache = open_cache(representation, options)
    hashes = list(dict.fromkeys(r.sha256 for r in rows if r.sha256))
    found: dict[str, np.ndarray] = {}
    if cache is not None:
        for digest in hashes:
            hit = cache.get(digest)
            if hit is not None:
                found[digest] = hit[0]
    files: dict[str, Path] = {}
    for r in rows:
        if r.sha256 and r.sha256 not in found and r.sha256 not in files and r.path:
            path = Path(path_from_display(r.path))
            try:
                if path.is_file() and sha256_file(path) == r.sha256:
                    files[r.sha256] = path
            except OSError:
                continue
    if files:
        paths = list(files.values())
        embedded = embed_files(Path("/"), [p.absolute() for p in paths], representation,
                               batch_size=options.batch_size, workers=options.workers, progress=options.progress,
                               desc="re-embedding logged files", cache=cache)
        for rec in embedded.ok_records:
            if rec.sha256 in files:
                found[rec.sha256] = embedded.embeddings[rec.row]
    kept = [h for h in hashes if h in found]
    dim = representation.embedding_dim
    features = np.stack([found[h] for h in kept]).astype(np.float32) if kept else np.zeros((0, dim), np.float32)
    return features, kept


def drift_over_log(log: ScoreLog, bank, *, last: int | None = None, since: str | None = None,
                   n_permutations: int = 500, seed: int = 0, record: bool = False, options=None,
                   representation=None, cache=None) -> dict:
    """The shift test of `oddling drift` over logged images of this bank: the newest `last` scored
    rows, or those logged since `since` (log time text, see store.parse_time).

    MMD between the logged images' features (distinct contents) and the bank's, and the exact
    binomial test of the share of logged scores above the bank's cutoff; same rule as `drift`.
    """
    from oddling.evaluation.shift import flagged_share_test, mmd_permutation_test, shift_verdict
    from oddling.embedding.options import RunOptions
    from oddling.jobs.common import load_bank_representation
    from oddling.jobs.maintenance import require_features
    from oddling.jobs.monitoring import record_history, shift_figures

    if (last is None) == (since is None):
        raise OddlingError("give one of --last N or --since TIME")
    options = options or RunOptions()
    require_features(bank, "drift")
    fp = bank_fingerprint(bank)
    rows = log.rows(last=last, since=since, bank=fp, ok_only=True)
    if len(rows) < 2:
        other = log.rows(last=last, since=since, ok_only=True)
        hint = (f"; {len(other)} scored rows there belong to other banks (refitted or replaced banks get a new "
                "fingerprint)" if len(other) > len(rows) else "")
        raise OddlingError(f"log {log.path} has {len(rows)} scored images of this bank in that window; a shift "
                           f"test needs at least 2{hint}")
    if representation is None:
        representation = load_bank_representation(bank, options)
    features, kept = logged_features(rows, representation, options, cache)
    cutoff = bank.threshold().cutoff
    n_flagged = sum(1 for r in rows if r.score is not None and r.score > cutoff)
    share = flagged_share_test(n_flagged, len(rows), bank.target_fpr)
    if len(features) < 2:
        raise OddlingError(f"the features of only {len(features)} of the {len(set(r.sha256 for r in rows))} distinct "
                           "logged images are available (neither in the embedding cache nor in files that still "
                           "exist); a shift test needs at least 2")
    mmd = mmd_permutation_test(features, bank.features, n_permutations=n_permutations, seed=seed)
    shift = shift_verdict(mmd["p_value"], share["binomial_p_value"])
    window = f"last {last}" if last is not None else f"since {since}"
    result = {
        "batch": f"log {log.path} ({window})",
        "log": str(log.path),
        "window": window,
        "first_time": rows[0].time,
        "last_time": rows[-1].time,
        "n_rows": len(rows),
        "n_batch": len(features),
        "n_without_features": len(set(r.sha256 for r in rows if r.sha256)) - len(kept),
        "n_bank": bank.size,
    } | shift_figures(mmd, share, n_flagged, shift, n_permutations)
    if record and bank.path is not None:
        record_history(bank, result)
    return result


# ---- the review page from the log --------------------------------------------------------------

def report_rows(log: ScoreLog, bank, *, since: str | None = None, until: str | None = None,
                last: int | None = None):
    """(ScoreResult, image_of) for `reporting.page.write_report`: the log's rows of this bank as score
    rows (a name logged twice gets its log id appended), and where each one's file is, when it still
    exists with the logged content (else the page shows a placeholder)."""
    from oddling.data.intake import sha256_file
    from oddling.jobs.scoring import ScoreResult
    from oddling.reporting.results import ScoreRow, sort_rows

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


# ---- export ----------------------------------------------------------------------------------

def _csv_field(cell: str) -> str:
    if any(c in cell for c in ',"\r\n'):
        return '"' + cell.replace('"', '""') + '"'
    return cell


def _cell(column: str, value) -> str:
    from oddling.reporting.results import csv_text

    if value is None:
        return ""
    if column == "flagged":
        return "true" if value else "false"
    if isinstance(value, float):
        return f"{value:.6f}"
    if isinstance(value, int):
        return str(value)
    return csv_text(str(value))


def export_rows(rows: list[LogRow], out: str | os.PathLike, force: bool = False) -> Path:
    """Write rows to `out`: CSV (text cells as in the scores CSV: formula-safe, RFC 4180 quoting), or
    Parquet for a .parquet name (needs pyarrow)."""
    from oddling.files import refuse_existing, write_text

    out = Path(out)
    refuse_existing(out, force=force)
    if out.suffix.lower() == ".parquet":
        try:
            import pyarrow as pa
            import pyarrow.parquet as pq
        except ImportError:
            raise OddlingError("writing Parquet needs pyarrow, which is not installed (pip install pyarrow); "
                               "or export to a .csv file") from None
        table = pa.table({c: [getattr(r, c) for r in rows] for c in EXPORT_COLUMNS})
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = out.with_name(f".{out.name}.partial")
        pq.write_table(table, tmp)
        tmp.replace(out)
        return out
    if out.suffix.lower() != ".csv":
        raise OddlingError(f"export writes .csv or .parquet files, got: {out.name}")
    lines = [",".join(EXPORT_COLUMNS)]
    lines += [",".join(_csv_field(_cell(c, getattr(r, c))) for c in EXPORT_COLUMNS) for r in rows]
    return write_text(out, "".join(line + "\n" for line in lines), force=True)
