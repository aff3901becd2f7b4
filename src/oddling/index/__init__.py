"""Nearest-neighbour indexes over L2-normalised vectors, in cosine distance (faiss).

`base.py` the interface (`CosineIndex`) and shared machinery, `exact.py` brute force (exact),
`ivf.py` IVF-Flat and `hnsw.py` HNSW (approximate), `selection.py` `choose_index`: which one,
with search parameters set by measured recall.
"""
from oddling.index.base import CosineIndex, recall_at_k
from oddling.index.exact import ExactCosineIndex, knn_numpy
from oddling.index.hnsw import HNSWCosineIndex
from oddling.index.ivf import IVFCosineIndex
from oddling.index.selection import EXACT_BELOW, KINDS, choose_index, load_index

__all__ = ["CosineIndex", "ExactCosineIndex", "IVFCosineIndex", "HNSWCosineIndex", "choose_index", "load_index",
           "knn_numpy", "recall_at_k", "EXACT_BELOW", "KINDS"]
