"""Approximate cosine search on a hierarchical navigable small-world graph (HNSW, inner product).

Each reference is linked to about M near neighbours on several layers; a query walks the graph
greedily from the top layer down and keeps the efSearch best candidates on the bottom layer
(Malkov & Yashunin, "Efficient and robust approximate nearest neighbor search using
Hierarchical Navigable Small World graphs", IEEE TPAMI 2018; faiss's `IndexHNSWFlat`, Johnson,
Douze & Jégou 2019). Vectors are stored in full, so found distances are exact. Wrapped in
`IndexIDMap` so labels are bank rows whatever order the vectors were inserted in.

The graph is built on one thread: faiss's parallel insertion links vertices in whatever order
the threads reach them, so two builds of the same bank would differ, and oddling promises the
same bank and seed give the same scores. `choose_index` sets efSearch by measured recall.
"""
from __future__ import annotations

import math

import faiss
import numpy as np

from oddling.index.base import FaissCosineIndex, open_saved, threads

M = 32                   # links per vertex (faiss's default; 2M on the bottom layer)
EF_CONSTRUCTION = 64     # candidate list while building (faiss's default is 40)
MAX_EF_SEARCH = 4096     # the widest search `choose_index` tries


class HNSWCosineIndex(FaissCosineIndex):
    kind = "hnsw"

    def __init__(self, dim: int, m: int = M, ef_construction: int = EF_CONSTRUCTION, ef_search: int = 16,
                 index: faiss.Index | None = None):
        if index is None:
            graph = faiss.IndexHNSWFlat(dim, m, faiss.METRIC_INNER_PRODUCT)
            graph.hnsw.efConstruction = ef_construction
            index = faiss.IndexIDMap(graph)
        self._index = index
        self._graph = faiss.downcast_index(index.index)
        self.set_search(ef_search)

    @classmethod
    def build(cls, vectors: np.ndarray, rows: np.ndarray, m: int = M,
              ef_construction: int = EF_CONSTRUCTION) -> "HNSWCosineIndex":
        index = cls(vectors.shape[1], m, ef_construction)
        index.add_rows(vectors, rows)
        return index

    def _set_index(self, index: faiss.Index) -> None:
        ef_search = self.search_param
        self._index = index
        self._graph = faiss.downcast_index(index.index)
        self.set_search(ef_search)

    def _add(self, vectors: np.ndarray, rows: np.ndarray) -> None:
        with threads(1):
            self._index.add_with_ids(vectors, rows)

    @property
    def search_param(self) -> int:
        return int(self._graph.hnsw.efSearch)

    def set_search(self, ef_search: int) -> None:
        self._graph.hnsw.efSearch = int(max(1, ef_search))

    @property
    def max_level(self) -> int:
        # level L keeps 4**L times as many candidates, up to one per reference
        return max(1, math.ceil(math.log(max(1, self.size / self.search_param), 4)))

    def visited(self) -> float:
        return float(self._graph.hnsw.nb_neighbors(0) * self.search_param)   # ~ candidates x bottom-layer links

    def _search_wide(self, queries: np.ndarray, k: int, level: int):
        ef = min(max(self.size, k), self.search_param * 4 ** level)
        return self._index.search(queries, k, params=faiss.SearchParametersHNSW(efSearch=ef))

    def params(self) -> dict:
        return {"M": int(self._graph.hnsw.nb_neighbors(1)), "efConstruction": int(self._graph.hnsw.efConstruction),
                "efSearch": self.search_param}

    @classmethod
    def from_array(cls, array, description: dict | None = None) -> "HNSWCosineIndex":
        """From a saved index: a uint8 array (`to_array`) or an `IndexFile` (read memory-mapped)."""
        index, mapped_from = open_saved(array)
        inner = faiss.downcast_index(index.index) if isinstance(index, faiss.IndexIDMap) else None
        if not isinstance(inner, faiss.IndexHNSWFlat) or inner.metric_type != faiss.METRIC_INNER_PRODUCT:
            raise ValueError(f"the saved index is a {type(index).__name__}, not an inner-product HNSW index")
        description = dict(description or {})
        loaded = cls(index.d, index=index, ef_search=int(description.get("efSearch", inner.hnsw.efSearch)))
        loaded.mapped_from = mapped_from
        loaded.choice = {key: value for key, value in description.items()
                         if key not in ("kind", *loaded.params())} or None
        return loaded
