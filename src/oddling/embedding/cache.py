"""On-disk cache of embeddings, keyed by file content and everything that shapes the vector.

Layout: <cache>/embeddings/<key>/chunk-*.npz, where <key> digests the backbone id, weight
SHA-256, preprocessing and runtime; each chunk holds `sha256` (file content hashes) and
`vectors`, and `health` (the image statistics of health.STATS). Chunks are written to a temporary name and renamed, so a reader never sees half a
chunk and two processes sharing the cache never write the same file. Work is flushed every
FLUSH_EVERY new vectors and when a run stops (Ctrl-C included), so an interrupted fit or score
resumes where it stopped.

The cache is an optimisation: a chunk that cannot be written (a full disk, a read-only folder)
is reported once, as an OddlingWarning, and the run goes on without saving to the cache.
"""
from __future__ import annotations

import errno
import hashlib
import json
import os
import uuid
import warnings
import zipfile
from pathlib import Path

import numpy as np

FLUSH_EVERY = 256        # new vectors per chunk file: bounds the work lost to a hard kill
COMPACT_ABOVE = 64       # merge chunk files when there are more than this many


def _warn(message: str) -> None:
    from oddling.jobs.common import OddlingWarning   # lazily: jobs sit above embedding

    warnings.warn(message, OddlingWarning, stacklevel=3)


def cache_key(fingerprint: dict, runtime: str) -> str:
    text = json.dumps({"backbone": fingerprint, "runtime": runtime}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:24]


class EmbeddingCache:
    def __init__(self, folder: Path):
        self.folder = Path(folder)
        self.vectors: dict[str, np.ndarray] = {}
        self.health: dict[str, np.ndarray] = {}
        self._pending_hashes: list[str] = []
        self._pending_vectors: list[np.ndarray] = []
        self._pending_health: list[np.ndarray] = []
        self.writable = True     # False once a write failed: the run goes on without saving

    @classmethod
    def open(cls, cache_root: Path, fingerprint: dict, runtime: str) -> "EmbeddingCache":
        cache = cls(Path(cache_root) / "embeddings" / cache_key(fingerprint, runtime))
        try:
            cache.folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            cache.writable = False
            _warn(f"the embedding cache {cache.folder} cannot be used ({exc.strerror or exc}); this run goes on "
                  "without it")
            return cache
        cache._load()
        return cache

    def _chunk_files(self) -> list[Path]:
        return sorted(self.folder.glob("chunk-*.npz"))

    def _load(self) -> None:
        files = self._chunk_files()
        for path in files:
            try:
                with np.load(path, allow_pickle=False) as data:
                    for digest, vec, stats in zip(data["sha256"], data["vectors"], data["health"]):
                        self.vectors[str(digest)] = vec
                        self.health[str(digest)] = stats
            except (OSError, KeyError, ValueError, zipfile.BadZipFile):
                continue   # removed by a concurrent compaction, or damaged: those vectors are recomputed
        if len(files) > COMPACT_ABOVE:
            self._compact(files)

    def _write_chunk(self, hashes: list[str], vectors: np.ndarray, health: np.ndarray) -> Path | None:
        """Write one chunk; None (after one warning, and no more writes) when the disk refuses it."""
        if not self.writable:
            return None
        name = f"chunk-{uuid.uuid4().hex}.npz"
        tmp = self.folder / f".{name}.partial"
        try:
            with open(tmp, "wb") as f:
                np.savez(f, sha256=np.array(hashes, dtype="U64"), vectors=np.asarray(vectors, np.float32),
                         health=np.asarray(health, np.float64))
            os.replace(tmp, self.folder / name)
        except OSError as exc:
            try:
                tmp.unlink(missing_ok=True)
            except OSError:
                pass
            self.writable = False
            why = "no space left on device" if exc.errno == errno.ENOSPC else (exc.strerror or str(exc))
            _warn(f"could not save to the embedding cache {self.folder} ({why}); this run goes on without "
                  "saving features to it")
            return None
        return self.folder / name

    def _compact(self, files: list[Path]) -> None:
        """Merge everything read into one chunk, then remove the files it replaces."""
        hashes = sorted(self.vectors)
        if self._write_chunk(hashes, np.stack([self.vectors[h] for h in hashes]),
                             np.stack([self.health[h] for h in hashes])) is None:
            return
        for path in files:
            path.unlink(missing_ok=True)

    def get(self, digest: str | None) -> tuple[np.ndarray, np.ndarray] | None:
        """(vector, health statistics) for a content hash, or None."""
        if not digest or digest not in self.vectors:
            return None
        return self.vectors[digest], self.health[digest]

    def add(self, digest: str, vector: np.ndarray, health: np.ndarray) -> None:
        self.vectors[digest] = vector
        self.health[digest] = health
        if not self.writable:
            return
        self._pending_hashes.append(digest)
        self._pending_vectors.append(vector)
        self._pending_health.append(health)
        if len(self._pending_hashes) >= FLUSH_EVERY:
            self.flush()

    def flush(self) -> None:
        if self._pending_hashes:
            hashes, vectors, health = self._pending_hashes, self._pending_vectors, self._pending_health
            self._pending_hashes, self._pending_vectors, self._pending_health = [], [], []
            self._write_chunk(hashes, np.stack(vectors), np.stack(health))
