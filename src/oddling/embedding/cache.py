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
from pathlib import Path

import numpy as np

from oddling.data.health import STATS

FLUSH_EVERY = 256        # new vectors per chunk file: bounds the work lost to a hard kill
COMPACT_ABOVE = 64       # merge chunk files when there are more than this many


def _warn(message: str) -> None:
    from oddling.jobs.common import OddlingWarning   # lazily: jobs sit above embedding

    warnings.warn(message, OddlingWarning, stacklevel=3)


def cache_key(fingerprint: dict, runtime: str) -> str:
    text = json.dumps({"backbone": fingerprint, "runtime": runtime}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:24]


class _Damaged(Exception):
    """A chunk file that cannot be used; the message says why."""


class EmbeddingCache:
    """Features by file content hash, for one cache key.

    `dim` is the length every vector must have (None: the first chunk's); chunks whose arrays
    do not fit are skipped, like unreadable ones, and their images are embedded again.
    """

    def __init__(self, folder: Path, dim: int | None = None):
        self.folder = Path(folder)
        self.dim = dim
        self.vectors: dict[str, np.ndarray] = {}
        self.health: dict[str, np.ndarray] = {}
        self._pending_hashes: list[str] = []
        self._pending_vectors: list[np.ndarray] = []
        self._pending_health: list[np.ndarray] = []
        self.writable = True     # False once a write failed: the run goes on without saving

    @classmethod
    def open(cls, cache_root: Path, fingerprint: dict, runtime: str, *, dim: int | None = None) -> "EmbeddingCache":
        cache = cls(Path(cache_root) / "embeddings" / cache_key(fingerprint, runtime), dim)
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
        damaged: list[tuple[Path, str]] = []
        for path in files:
            try:
                hashes, vectors, health = self._read_chunk(path)
            except FileNotFoundError:
                continue   # removed by a concurrent compaction: its vectors are in the merged chunk
            except _Damaged as exc:
                damaged.append((path, str(exc)))
                continue
            for digest, vec, stats in zip(hashes, vectors, health):
                self.vectors[str(digest)] = vec
                self.health[str(digest)] = stats
        if damaged:
            self._drop(damaged)
            files = [f for f in files if f not in {p for p, _ in damaged}]
        if len(files) > COMPACT_ABOVE:
            self._compact(files)

    def _read_chunk(self, path: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(content hashes, vectors, health rows) of one chunk file, or _Damaged saying why not."""
        try:
            data = np.load(path, allow_pickle=False)
        except FileNotFoundError:
            raise
        except Exception as exc:   # any damage (empty, garbage, truncated, pickled): the cache is only a shortcut
            raise _Damaged(f"unreadable ({type(exc).__name__})") from exc
        if not isinstance(data, np.lib.npyio.NpzFile):
            raise _Damaged("not a chunk archive")
        with data:
            try:
                hashes, vectors, health = data["sha256"], data["vectors"], data["health"]
            except Exception as exc:
                raise _Damaged(f"unreadable arrays ({type(exc).__name__})") from exc
        n = len(hashes) if hashes.ndim == 1 else -1
        if n < 0 or hashes.dtype.kind != "U":
            raise _Damaged("content hashes are not a list of strings")
        if vectors.dtype != np.float32 or vectors.ndim != 2 or len(vectors) != n:
            raise _Damaged(f"vectors have shape {vectors.shape} ({vectors.dtype}), expected ({n}, d) float32")
        if self.dim is not None and vectors.shape[1] != self.dim:
            raise _Damaged(f"vectors have length {vectors.shape[1]}, expected {self.dim}")
        if health.dtype != np.float64 or health.shape != (n, len(STATS)):
            raise _Damaged(f"health rows have shape {health.shape}, expected ({n}, {len(STATS)})")
        if not np.isfinite(vectors).all():
            raise _Damaged("vectors hold NaN or infinite values")
        if self.dim is None:
            self.dim = vectors.shape[1]
        return hashes, vectors, health

    def _drop(self, damaged: list[tuple[Path, str]]) -> None:
        """Report damaged chunks once, and remove them so the next run does not meet them again."""
        for path, _ in damaged:
            try:
                path.unlink(missing_ok=True)
            except OSError:
                pass
        path, why = damaged[0]
        more = f" and {len(damaged) - 1} more" if len(damaged) > 1 else ""
        _warn(f"the embedding cache {self.folder} held damaged chunk files, skipped and removed "
              f"({path.name}: {why}{more}); their images are embedded again")

    def acceptable(self, vector: np.ndarray) -> bool:
        """Whether a vector may go into the cache: the right length, finite."""
        vector = np.asarray(vector)
        return (vector.ndim == 1 and (self.dim is None or len(vector) == self.dim)
                and bool(np.isfinite(vector).all()))

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
        if hashes and self._write_chunk(hashes, np.stack([self.vectors[h] for h in hashes]),
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
        if not self.writable or not self.acceptable(vector):
            return
        if self.dim is None:
            self.dim = len(vector)
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
