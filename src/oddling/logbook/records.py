"""What is done with the log's rows: writing score results into it, finding the features of logged
images, and exporting rows to CSV or Parquet (the shift test and the review page over the log are
jobs: jobs/monitoring.py and jobs/log_report.py).

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

from oddling.data.csv_cells import csv_field, csv_text
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


# ---- export ----------------------------------------------------------------------------------

def _cell(column: str, value) -> str:
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
    lines += [",".join(csv_field(_cell(c, getattr(r, c))) for c in EXPORT_COLUMNS) for r in rows]
    return write_text(out, "".join(line + "\n" for line in lines), force=True)
