"""Exact nearest-neighbour search over L2-normalised embeddings, as cosine distance (1 - cos).

faiss does the work: `faiss.knn` with inner product is the brute-force search `IndexFlatIP`
runs (the same `knn_inner_product` call, identical results), made on the vectors in place, so
the index costs no second copy of the references. Saved, it is an `IndexFlatIP` in faiss's
format. `knn_numpy` is the plain reference the tests hold it to.
"""
from __future__ import annotations

import faiss
import numpy as np

from oddling.index import base
from oddling.index.base import QUERY_CHUNK, check_vectors, deserialize, to_cosine  # noqa: F401 (re-exported)


class ExactCosineIndex:
    """Exact k-nearest-neighbour search by cosine distance over unit vectors."""

    kind = "exact"

    def __init__(self, vectors: np.ndarray):
        self.vectors = check_vectors(vectors, "vectors")

    @property
    def size(self) -> int:
        return int(self.vectors.shape[0])

    @property
    def dim(self) -> int:
        return int(self.vectors.shape[1])

    def add(self, vectors: np.ndarray) -> None:
        self.vectors = np.ascontiguousarray(np.concatenate([self.vectors, check_vectors(vectors, "vectors", self.dim)]))

    def search(self, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
        """(distances, indices), each (n_queries, k), nearest first. Distances in [0, 2]."""
        queries = check_vectors(queries, "queries", self.dim)
        if not 1 <= k <= self.size:
            raise ValueError(f"k must be in [1, {self.size}], got: {k}")
        distances = np.empty((len(queries), k), dtype=np.float32)
        indices = np.empty((len(queries), k), dtype=np.int64)
        chunk = base.QUERY_CHUNK
        for start in range(0, len(queries), chunk):
            sims, idx = faiss.knn(queries[start:start + chunk], self.vectors, k, metric=faiss.METRIC_INNER_PRODUCT)
            distances[start:start + chunk] = to_cosine(sims)
            indices[start:start + chunk] = idx
        return distances, indices

    def to_array(self) -> np.ndarray:
        index = faiss.IndexFlatIP(self.dim)
        index.add(self.vectors)
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
