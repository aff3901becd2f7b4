"""Exact nearest-neighbour search over L2-normalised embeddings, as cosine distance (1 - cos).

faiss does the work (inner-product flat index = exact search); `knn_numpy` is the plain
reference the tests hold it to.
"""
from __future__ import annotations

import faiss
import numpy as np

QUERY_CHUNK = 4096  # queries per faiss call: bounds the (chunk x k) result buffers


def _check(vectors: np.ndarray, name: str) -> np.ndarray:
    vectors = np.ascontiguousarray(vectors, dtype=np.float32)
    if vectors.ndim != 2:
        raise ValueError(f"{name} must be a 2-D array, got shape {vectors.shape}")
    return vectors


class ExactCosineIndex:
    """Exact k-nearest-neighbour search by cosine distance over unit vectors."""

    def __init__(self, vectors: np.ndarray):
        vectors = _check(vectors, "vectors")
        self.size, self.dim = vectors.shape
        self._index = faiss.IndexFlatIP(self.dim)
        self._index.add(vectors)

    def search(self, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
        """(distances, indices), each (n_queries, k), nearest first. Distances in [0, 2]."""
        queries = _check(queries, "queries")
        if queries.shape[1] != self.dim:
            raise ValueError(f"queries have dimension {queries.shape[1]}, the index holds {self.dim}")
        if not 1 <= k <= self.size:
            raise ValueError(f"k must be in [1, {self.size}], got: {k}")
        distances = np.empty((len(queries), k), dtype=np.float32)
        indices = np.empty((len(queries), k), dtype=np.int64)
        for start in range(0, len(queries), QUERY_CHUNK):
            sims, idx = self._index.search(queries[start:start + QUERY_CHUNK], k)
            distances[start:start + QUERY_CHUNK] = 1.0 - sims
            indices[start:start + QUERY_CHUNK] = idx
        # Rounding can push 1 - cos a hair below zero for identical vectors.
        np.clip(distances, 0.0, 2.0, out=distances)
        return distances, indices


def knn_numpy(vectors: np.ndarray, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Reference implementation: full distance matrix, stable sort."""
    vectors = _check(vectors, "vectors").astype(np.float64)
    queries = _check(queries, "queries").astype(np.float64)
    dist = 1.0 - queries @ vectors.T
    order = np.argsort(dist, axis=1, kind="stable")[:, :k]
    return np.clip(np.take_along_axis(dist, order, axis=1), 0.0, 2.0), order
