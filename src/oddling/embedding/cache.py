"""On-disk cache of embeddings, keyed by file content and everything that shapes the vector.

Layout: <cache>/embeddings/<key>/chunk-*.npz, where <key> digests the backbone id, weight
SHA-256, preprocessing, runtime (with its precision) and health definition; each chunk holds `sha256` (file content hashes) and
`vectors`, and `health` (the image statistics of health.STATS). Chunks are written to a temporary name and renamed, so a reader never sees half a
chunk and two processes sharing the cache never write the same file. Work is flushed every
FLUSH_EVERY new vectors and when a run stops (Ctrl-C included), so an interrupted fit or score
resumes where it stopped.
"""
from __future__ import annotations

import hashlib
import json
import os
import uuid
import zipfile
from pathlib import Path

import numpy as np

FLUSH_EVERY = 256        # new vectors per chunk file: bounds the work lost to a hard kill
COMPACT_ABOVE = 64       # merge chunk files when there are more than this many


def cache_key(fingerprint: dict, runtime: str) -> str:
    """The folder name for one representation and runtime. The image-health definition is in it
    too (the chunks hold health statistics): entries of another health version are not reused."""
    from oddling.data.health import HEALTH_VERSION

    text = json.dumps({"backbone": fingerprint, "runtime": runtime, "health_version": HEALTH_VERSION},
                      sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:24]


class EmbeddingCache:
    def __init__(self, folder: Path):
        self.folder = Path(folder)
        self.vectors: dict[str, np.ndarray] = {}
        self.health: dict[str, np.ndarray] = {}
        self._pending_hashes: list[str] = []
        self._pending_vectors: list[np.ndarray] = []
        self._pending_health: list[np.ndarray] = []

    @classmethod
    def open(cls, cache_root: Path, fingerprint: dict, runtime: str) -> "EmbeddingCache":
        cache = cls(Path(cache_root) / "embeddings" / cache_key(fingerprint, runtime))
        cache.folder.mkdir(parents=True, exist_ok=True)
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

    def _write_chunk(self, hashes: list[str], vectors: np.ndarray, health: np.ndarray) -> Path:
        name = f"chunk-{uuid.uuid4().hex}.npz"
        tmp = self.folder / f".{name}.partial"
        with open(tmp, "wb") as f:
            np.savez(f, sha256=np.array(hashes, dtype="U64"), vectors=np.asarray(vectors, np.float32),
                     health=np.asarray(health, np.float64))
        os.replace(tmp, self.folder / name)
        return self.folder / name

    def _compact(self, files: list[Path]) -> None:
        """Merge everything read into one chunk, then remove the files it replaces."""
        hashes = sorted(self.vectors)
        self._write_chunk(hashes, np.stack([self.vectors[h] for h in hashes]),
                          np.stack([self.health[h] for h in hashes]))
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
        self._pending_hashes.append(digest)
        self._pending_vectors.append(vector)
        self._pending_health.append(health)
        if len(self._pending_hashes) >= FLUSH_EVERY:
            self.flush()

    def flush(self) -> None:
        if self._pending_hashes:
            self._write_chunk(self._pending_hashes, np.stack(self._pending_vectors), np.stack(self._pending_health))
            self._pending_hashes, self._pending_vectors, self._pending_health = [], [], []
