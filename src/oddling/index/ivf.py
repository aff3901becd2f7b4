"""Approximate cosine search with an inverted file over k-means cells (IVF-Flat, inner product).

The references are split into `nlist` cells by k-means; a query is compared exactly with the
vectors of the `nprobe` cells whose centroids are nearest to it (Jégou, Douze & Schmid, "Product
quantization for nearest neighbor search", IEEE TPAMI 2011, the inverted file of Sec. IV;
faiss's `IndexIVFFlat`, Johnson, Douze & Jégou 2019). Vectors are stored in full (no
compression), so a found neighbour's distance is exact; only neighbours in unvisited cells are
missed. `choose_index` sets nprobe by measured recall.
"""
from __future__ import annotations

import math

import faiss
import numpy as np

from oddling.index.base import FaissCosineIndex, open_saved, threads_for

NITER = 10                 # k-means iterations (faiss's default is 25; the centroids barely move after 10)
TRAIN_PER_LIST = 40        # k-means training points per cell (faiss asks for at least 39)
MIN_PER_LIST = 32          # never fewer training points per cell than this: nlist is capped by it


def default_nlist(n: int) -> int:
    """4 sqrt(n) cells, as a power of two (faiss's guideline: 4 to 16 sqrt(n)), at most n / 32."""
    nlist = 2 ** round(math.log2(max(1.0, 4.0 * math.sqrt(n))))
    return int(max(1, min(nlist, n // MIN_PER_LIST)))


class IVFCosineIndex(FaissCosineIndex):
    kind = "ivf"

    def __init__(self, dim: int, nlist: int, nprobe: int = 1, seed: int = 0, index: faiss.Index | None = None):
        if index is None:
            quantizer = faiss.IndexFlatIP(dim)
            index = faiss.IndexIVFFlat(quantizer, dim, nlist, faiss.METRIC_INNER_PRODUCT)
            index.cp.seed = seed
            index.cp.niter = NITER
            index.cp.min_points_per_centroid = 1      # we pass enough points ourselves; no faiss warning
            index.cp.max_points_per_centroid = TRAIN_PER_LIST + 1   # and faiss subsamples nothing
        self._index = index
        self.seed = seed
        self.n_train = 0
        self.set_search(nprobe)

    @classmethod
    def build(cls, vectors: np.ndarray, rows: np.ndarray, nlist: int | None = None, seed: int = 0) -> "IVFCosineIndex":
        """Train on a seeded sample of `vectors[rows]` and add those rows (labels = rows)."""
        nlist = default_nlist(len(rows)) if nlist is None else nlist
        index = cls(vectors.shape[1], nlist, seed=seed)
        rng = np.random.default_rng([seed, 1])
        sample = np.sort(rng.choice(rows, size=min(len(rows), TRAIN_PER_LIST * nlist), replace=False))
        with threads_for(float(len(sample)) * nlist * vectors.shape[1] * NITER):
            index._index.train(np.ascontiguousarray(vectors[sample], dtype=np.float32))
        index.n_train = int(len(sample))
        index.add_rows(vectors, rows)
        return index

    @property
    def nlist(self) -> int:
        return int(self._index.nlist)

    @property
    def search_param(self) -> int:
        return int(self._index.nprobe)

    def set_search(self, nprobe: int) -> None:
        self._index.nprobe = int(max(1, min(int(nprobe), self.nlist)))

    @property
    def max_level(self) -> int:
        # level L probes 4**L times as many cells; the last level probes them all (exhaustive)
        return max(1, math.ceil(math.log(max(1, self.nlist / self.search_param), 4)))

    def visited(self) -> float:
        return self.nlist + self.search_param * self.size / self.nlist

    def _search_wide(self, queries: np.ndarray, k: int, level: int):
        nprobe = self.nlist if level >= self.max_level else min(self.nlist, self.search_param * 4 ** level)
        return self._index.search(queries, k, params=faiss.SearchParametersIVF(nprobe=nprobe))

    def params(self) -> dict:
        return {"nlist": self.nlist, "nprobe": self.search_param, "kmeans_iterations": NITER,
                "n_train": self.n_train, "seed": self.seed}

    def _set_index(self, index: faiss.Index) -> None:
        nprobe = self.search_param
        self._index = index
        self.set_search(nprobe)

    @classmethod
    def from_array(cls, array, description: dict | None = None) -> "IVFCosineIndex":
        """From a saved index: a uint8 array (`to_array`) or an `IndexFile` (read memory-mapped)."""
        index, mapped_from = open_saved(array)
        if not isinstance(index, faiss.IndexIVFFlat) or index.metric_type != faiss.METRIC_INNER_PRODUCT:
            raise ValueError(f"the saved index is a {type(index).__name__}, not an inner-product IVF-Flat index")
        description = dict(description or {})
        loaded = cls(index.d, index.nlist, nprobe=int(description.get("nprobe", index.nprobe)),
                     seed=int(description.get("seed", 0)), index=index)
        loaded.n_train = int(description.get("n_train", 0))
        loaded.mapped_from = mapped_from
        loaded.choice = {key: value for key, value in description.items()
                         if key not in ("kind", *loaded.params())} or None
        return loaded

