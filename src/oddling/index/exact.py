"""Exact nearest-neighbour search over L2-normalised embeddings, as cosine distance (1 - cos).

faiss does the work: `faiss.knn` with inner product is the brute-force search `IndexFlatIP`
runs (the same `knn_inner_product` call, identical results), made on the vectors in place, so
the index costs no second copy of the references: a bank's memory-mapped float32 features are
searched straight from the map. float16 vectors (`oddling fit --vector-dtype float16`) are
searched in blocks of `REFERENCE_BLOCK` rows, each upcast to float32 for its faiss call and
merged, so they are never copied whole either. Saved, it is an `IndexFlatIP` in faiss's format.
`knn_numpy` is the plain reference the tests hold it to.
"""
from __future__ import annotations

import faiss
import numpy as np

from oddling.index import base
from oddling.index.base import QUERY_CHUNK, check_vectors, deserialize, to_cosine  # noqa: F401 (re-exported)

REFERENCE_BLOCK = 65536   # float16 references upcast per faiss call (65,536 x 1280 float32: 335 MB)
STORED_DTYPES = (np.float32, np.float16)


def check_stored(vectors: np.ndarray) -> np.ndarray:
    """Reference vectors as stored: float32 or float16, C-contiguous, 2-D (a map stays a map)."""
    array = np.asarray(vectors)
    if array.dtype not in STORED_DTYPES:
        return check_vectors(array, "vectors")
    if array.ndim != 2:
        raise ValueError(f"vectors must be a 2-D array, got shape {array.shape}")
    return array if array.flags.c_contiguous else np.ascontiguousarray(array)


class ExactCosineIndex:
    """Exact k-nearest-neighbour search by cosine distance over unit vectors."""

    kind = "exact"

    def __init__(self, vectors: np.ndarray):
        self.vectors = check_stored(vectors)

    @property
    def size(self) -> int:
        return int(self.vectors.shape[0])

    @property
    def dim(self) -> int:
        return int(self.vectors.shape[1])

    def add(self, vectors: np.ndarray) -> None:
        new = check_vectors(vectors, "vectors", self.dim).astype(self.vectors.dtype, copy=False)
        self.vectors = np.ascontiguousarray(np.concatenate([self.vectors, new]))

    def search(self, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
        """(distances, indices), each (n_queries, k), nearest first. Distances in [0, 2]."""
        queries = check_vectors(queries, "queries", self.dim)
        if not 1 <= k <= self.size:
            raise ValueError(f"k must be in [1, {self.size}], got: {k}")
        distances = np.empty((len(queries), k), dtype=np.float32)
        indices = np.empty((len(queries), k), dtype=np.int64)
        chunk = base.QUERY_CHUNK
        for start in range(0, len(queries), chunk):
            sims, idx = self._knn(queries[start:start + chunk], k)
            distances[start:start + chunk] = to_cosine(sims)
            indices[start:start + chunk] = idx
        return distances, indices

    def _knn(self, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
        if self.vectors.dtype == np.float32:
            return faiss.knn(queries, self.vectors, k, metric=faiss.METRIC_INNER_PRODUCT)
        best_sims = best_rows = None
        for start in range(0, self.size, REFERENCE_BLOCK):
            block = np.ascontiguousarray(self.vectors[start:start + REFERENCE_BLOCK], dtype=np.float32)
            sims, rows = faiss.knn(queries, block, min(k, len(block)), metric=faiss.METRIC_INNER_PRODUCT)
            rows += start
            if best_sims is not None:
                sims, rows = np.concatenate([best_sims, sims], axis=1), np.concatenate([best_rows, rows], axis=1)
                # largest similarity first; on ties the earlier block (lower row) first, as one call would
                order = np.argsort(-sims, axis=1, kind="stable")[:, :k]
                sims, rows = np.take_along_axis(sims, order, axis=1), np.take_along_axis(rows, order, axis=1)
            best_sims, best_rows = sims, rows
        return best_sims, best_rows

    def to_array(self) -> np.ndarray:
        index = faiss.IndexFlatIP(self.dim)
        index.add(np.ascontiguousarray(self.vectors, dtype=np.float32))
        return faiss.serialize_index(index)

    @classmethod
    def from_array(cls, array: np.ndarray, description: dict | None = None) -> "ExactCosineIndex":
        index = deserialize(array)
        if not isinstance(index, faiss.IndexFlat) or index.metric_type != faiss.METRIC_INNER_PRODUCT:
            raise ValueError(f"the saved index is a {type(index).__name__}, not an exact inner-product index")
        vectors = faiss.rev_swig_ptr(index.get_xb(), index.ntotal * index.d)
        return cls(np.array(vectors, dtype=np.float32).reshape(index.ntotal, index.d))

    def describe(self) -> dict:
        return {"kind": self.kind}


def knn_numpy(vectors: np.ndarray, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Reference implementation: full distance matrix, stable sort."""
    vectors = check_vectors(vectors, "vectors").astype(np.float64)
    queries = check_vectors(queries, "queries").astype(np.float64)
    dist = 1.0 - queries @ vectors.T
    order = np.argsort(dist, axis=1, kind="stable")[:, :k]
    return np.clip(np.take_along_axis(dist, order, axis=1), 0.0, 2.0), order
