"""Files -> embeddings (and cheap image statistics): decode and preprocess in threads, run the
backbone in batches.

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

from oddling.backbones import Backbone
from oddling.embedding.cache import EmbeddingCache
from oddling.data.health import DECODE_SIDE, STATS, health_image, is_health_resize, reduced_stats
from oddling.data.intake import ORIGINAL_SIZE, IntakeError, check_header, check_type, frames_note, load_rgb, sha256_file
from oddling.data.preprocess import Preprocessing

OK = "ok"
_CACHED = "cached"   # internal: the vector is in the cache, nothing to decode


@dataclass
class FileRecord:
    """What happened to one input file. `row` indexes embeddings and health when status is "ok"."""

    path: str
    sha256: str | None
    status: str
    row: int | None = None
    note: str = ""     # about an ok file, e.g. "first of 3 frames"; status stays "ok"


@dataclass
class EmbeddedFiles:
    records: list[FileRecord]
    embeddings: np.ndarray  # (number of ok records, dim), float32, L2-normalised
    health: np.ndarray      # (number of ok records, len(health.STATS)), float64

    @property
    def ok_records(self) -> list[FileRecord]:
        return [r for r in self.records if r.row is not None]

    @property
    def row_hashes(self) -> np.ndarray:
        """The content hash of each embedding row, in row order."""
        hashes = np.empty(len(self.embeddings), dtype=object)
        for r in self.ok_records:
            hashes[r.row] = r.sha256
        return hashes

    def health_of(self, record: FileRecord) -> dict[str, float]:
        return dict(zip(STATS, self.health[record.row].tolist()))


def default_workers() -> int:
    return max(1, min(4, os.cpu_count() or 1))


# Formats that can hold more than one frame (APNG counts); JPEG and BMP never do.
_MULTI_FRAME_SUFFIXES = frozenset({".gif", ".tif", ".tiff", ".webp", ".png"})


def frames_note_of(path: Path) -> str:
    """"first of N frames" when only the first frame of an animation or multi-page file is scored;
    read from the header, so it is the same whether the features came from the cache or not."""
    if path.suffix.lower() not in _MULTI_FRAME_SUFFIXES:
        return ""
    try:
        return frames_note(check_header(path))
    except (IntakeError, OSError):
        return ""


def _prepare(path: Path, preprocessing: Preprocessing, cache: EmbeddingCache | None = None):
    """(sha256, network input, health statistics, status) for one file (the cached vector in place of
    the network input when status is _CACHED); never raises for a bad file."""
    try:
        # Before opening (a FIFO would block) and before the cache: a cached vector of the same
        # bytes must not turn "noext" or "a.txt" into "ok". Links, folders, devices get their status.
        check_type(path)
        digest = sha256_file(path)
    except IntakeError as exc:
        return None, None, None, exc.status
    except OSError as exc:
        return None, None, None, f"unreadable: {exc.strerror or exc}"
    hit = cache.get(digest) if cache is not None else None
    if hit is not None:   # (vector, health statistics) in place of (network input, health statistics)
        return digest, hit[0], hit[1], _CACHED
    try:
        # Large enough for the network and for the health image (shorter side HEALTH_SIDE).
        image = load_rgb(path, min_side=max(preprocessing.resize_shorter, DECODE_SIDE))
    except IntakeError as exc:
        return digest, None, None, exc.status
    resized = preprocessing.resize(image)
    # The default backbones' resize is the health image itself: the statistics cost no resize.
    health = resized if is_health_resize(preprocessing, image.size) else health_image(image)
    stats = reduced_stats(health, *image.info[ORIGINAL_SIZE])
    array = preprocessing.normalise(preprocessing.fit_frame(resized))
    return digest, array, np.array([stats[s] for s in STATS]), OK


def embed_files(
    root: Path,
    paths: list[Path],
    backbone: Backbone,
    batch_size: int = 32,
    workers: int | None = None,
    progress: bool = True,
    desc: str = "embedding",
    cache: EmbeddingCache | None = None,
    preprocessing: Preprocessing | None = None,
    embed=None,
) -> EmbeddedFiles:
    """Embed `paths` (files under `root`) in order; every file gets a record, readable or not.

    With a cache, files whose content was embedded before are not decoded again, and new
    vectors are saved as the run goes (also when it is interrupted). `preprocessing` and
    `embed` (batch -> one array per image) replace the backbone's own, as local mode does.
    """
    if batch_size < 1:
        raise ValueError(f"batch_size must be >= 1, got: {batch_size}")
    root = Path(root)
    prep = preprocessing or backbone.preprocessing
    embed = embed or backbone.embed
    records: list[FileRecord] = []
    vectors: list[np.ndarray | None] = []
    health: list[np.ndarray] = []
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
                for path, (digest, array, stats, status) in zip(batch, results):
                    rel = path.relative_to(root).as_posix()
                    if status == _CACHED:
                        records.append(FileRecord(rel, digest, OK, len(vectors), frames_note_of(path)))
                        vectors.append(array)   # the cached vector
                        health.append(stats)
                    elif array is None:
                        records.append(FileRecord(rel, digest, status))
                    else:
                        records.append(FileRecord(rel, digest, OK, len(vectors), frames_note_of(path)))
                        vectors.append(None)   # filled in below, once the batch has run
                        health.append(stats)
                        to_embed.append((len(vectors) - 1, digest, array))
                if to_embed:
                    embedded = embed(np.stack([a for _, _, a in to_embed]))
                    for (row, digest, _), vec in zip(to_embed, embedded):
                        vectors[row] = vec
                        if cache is not None:
                            cache.add(digest, vec, health[row])
                bar.update(len(batch))
    finally:
        bar.close()
        if cache is not None:
            cache.flush()   # keep the finished work, also on Ctrl-C
    if vectors:
        embeddings = np.stack(vectors).astype(np.float32, copy=False)
        stats_table = np.stack(health).astype(np.float64)
    else:
        embeddings = np.zeros((0, backbone.embedding_dim), np.float32)
        stats_table = np.zeros((0, len(STATS)))
    return EmbeddedFiles(records, embeddings, stats_table)
