"""Files -> embeddings: decode and preprocess in threads, run the backbone in batches.

Streams: at most two batches of decoded images are held at a time (the one being embedded and
the one being decoded), so memory does not grow with the number of files.
"""
from __future__ import annotations

import os
import sys
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from tqdm import tqdm

from .backbones import Backbone
from .embed_cache import EmbeddingCache
from .intake import IntakeError, load_rgb, sha256_file
from .preprocess import Preprocessing

OK = "ok"
_CACHED = "cached"   # internal: the vector is in the cache, nothing to decode


@dataclass
class FileRecord:
    """What happened to one input file. `row` indexes the embeddings when status is "ok"."""

    path: str
    sha256: str | None
    status: str
    row: int | None = None


@dataclass
class EmbeddedFiles:
    records: list[FileRecord]
    embeddings: np.ndarray  # (number of ok records, dim), float32, L2-normalised

    @property
    def ok_records(self) -> list[FileRecord]:
        return [r for r in self.records if r.row is not None]


def default_workers() -> int:
    return max(1, min(4, os.cpu_count() or 1))


def _prepare(path: Path, preprocessing: Preprocessing,
             cache: EmbeddingCache | None = None) -> tuple[str | None, np.ndarray | None, str]:
    """(sha256, network input, status) for one file; never raises for a bad file."""
    try:
        digest = sha256_file(path)
    except OSError as exc:
        return None, None, f"unreadable: {exc.strerror or exc}"
    if cache is not None and cache.get(digest) is not None:
        return digest, None, _CACHED
    try:
        image = load_rgb(path, min_side=preprocessing.resize_shorter)
        return digest, preprocessing.to_array(image), OK
    except IntakeError as exc:
        return digest, None, exc.status


def embed_files(
    root: Path,
    paths: list[Path],
    backbone: Backbone,
    batch_size: int = 32,
    workers: int | None = None,
    progress: bool = True,
    desc: str = "embedding",
    cache: EmbeddingCache | None = None,
) -> EmbeddedFiles:
    """Embed `paths` (files under `root`) in order; every file gets a record, readable or not.

    With a cache, files whose content was embedded before are not decoded again, and new
    vectors are saved as the run goes (also when it is interrupted).
    """
    if batch_size < 1:
        raise ValueError(f"batch_size must be >= 1, got: {batch_size}")
    root = Path(root)
    prep = backbone.preprocessing
    records: list[FileRecord] = []
    vectors: list[np.ndarray] = []
    batches = [paths[i:i + batch_size] for i in range(0, len(paths), batch_size)]
    bar = tqdm(total=len(paths), desc=desc, unit="img", file=sys.stderr, disable=not progress, leave=False)
    try:
        with ThreadPoolExecutor(max_workers=workers or default_workers()) as pool:
            submit = lambda batch: [pool.submit(_prepare, p, prep, cache) for p in batch]  # noqa: E731
            pending = submit(batches[0]) if batches else []
            for i, batch in enumerate(batches):
                results = [f.result() for f in pending]
                # Decode the next batch while the network works on this one.
                pending = submit(batches[i + 1]) if i + 1 < len(batches) else []
                to_embed = []
                for path, (digest, array, status) in zip(batch, results):
                    rel = path.relative_to(root).as_posix()
                    if status == _CACHED:
                        records.append(FileRecord(rel, digest, OK, len(vectors)))
                        vectors.append(cache.get(digest))
                    elif array is None:
                        records.append(FileRecord(rel, digest, status))
                    else:
                        records.append(FileRecord(rel, digest, OK, len(vectors)))
                        vectors.append(None)   # filled in below, once the batch has run
                        to_embed.append((len(vectors) - 1, digest, array))
                if to_embed:
                    embedded = backbone.embed(np.stack([a for _, _, a in to_embed]))
                    for (row, digest, _), vec in zip(to_embed, embedded):
                        vectors[row] = vec
                        if cache is not None:
                            cache.add(digest, vec)
                bar.update(len(batch))
    finally:
        bar.close()
        if cache is not None:
            cache.flush()   # keep the finished work, also on Ctrl-C
    embeddings = np.stack(vectors) if vectors else np.zeros((0, backbone.embedding_dim), np.float32)
    return EmbeddedFiles(records, embeddings.astype(np.float32, copy=False))
