"""What every nearest-neighbour index offers, and the pieces they share.

All indexes work on L2-normalised float32 vectors and answer in cosine distance (1 - cos,
clipped to [0, 2]); rows are the positions of the vectors in the order they were added, so a
row is a reference's row in the bank. faiss does the work (Johnson, Douze & Jégou, "Billion-scale
similarity search with GPUs", IEEE Transactions on Big Data 2019); an index is saved in faiss's
own format, never pickled: the bank writes it with `faiss.write_index` to `detector.index.faiss`
and reads it back memory-mapped where faiss can (`read_index_file`); banks written before that
hold the same bytes as a uint8 array, `detector.index.npy` (`faiss.serialize_index`), still read.

`search` always runs in chunks of `QUERY_CHUNK` queries, so no call holds more than
(chunk x k) results of the faiss call at once, whatever the number of queries.
"""
from __future__ import annotations

import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import ClassVar, Protocol, runtime_checkable

import faiss
import numpy as np

QUERY_CHUNK = 4096  # queries per faiss call: bounds the (chunk x k) result buffers
ADD_CHUNK = 65536   # vectors gathered and added per faiss call
# Below this many multiply-adds a faiss call runs on one thread: each OpenMP parallel region
# costs milliseconds on a busy machine (measured on the shared 2-core box: k-means of 900 x 8
# points into 28 cells took 0.86 s on 2 threads, 0.0009 s on one), more than the work itself.
SMALL_WORK = 10_000_000


class threads:
    """faiss (OpenMP) on `n` threads inside the block (unchanged when None); the count restored after."""

    def __init__(self, n: int | None):
        self.n = n

    def __enter__(self):
        self.before = faiss.omp_get_max_threads()
        if self.n is not None:
            faiss.omp_set_num_threads(self.n)

    def __exit__(self, *exc):
        faiss.omp_set_num_threads(self.before)


def threads_for(work: float) -> threads:
    """One thread for small work (see SMALL_WORK), faiss's default otherwise."""
    return threads(1 if work < SMALL_WORK else None)


@runtime_checkable
class CosineIndex(Protocol):
    """The index interface the detectors use."""

    kind: str

    @property
    def size(self) -> int: ...

    @property
    def dim(self) -> int: ...

    def add(self, vectors: np.ndarray) -> None:
        """Append vectors; they get rows size, size + 1, ..."""

    def search(self, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
        """(cosine distances float32, rows int64), each (n_queries, k), nearest first."""

    def to_array(self) -> np.ndarray:
        """The index in faiss's own format, as a 1-D uint8 array."""

    def describe(self) -> dict:
        """Kind and parameters, JSON-able (and, once chosen by `choose_index`, the measured recall)."""


def check_vectors(vectors: np.ndarray, name: str, dim: int | None = None) -> np.ndarray:
    vectors = np.ascontiguousarray(vectors, dtype=np.float32)
    if vectors.ndim != 2:
        raise ValueError(f"{name} must be a 2-D array, got shape {vectors.shape}")
    if dim is not None and vectors.shape[1] != dim:
        raise ValueError(f"{name} have dimension {vectors.shape[1]}, the index holds {dim}")
    return vectors


def check_index_array(array: np.ndarray) -> np.ndarray:
    array = np.asarray(array)
    if array.ndim != 1 or array.dtype != np.uint8 or len(array) == 0:
        raise ValueError(f"a saved index must be a non-empty 1-D uint8 array, got {array.dtype} {array.shape}")
    return np.ascontiguousarray(array)


def deserialize(array: np.ndarray):
    try:
        return faiss.deserialize_index(check_index_array(array))
    except RuntimeError as exc:   # faiss reports a damaged or foreign blob as RuntimeError
        raise ValueError(f"the saved index cannot be read by faiss ({str(exc).splitlines()[0]})") from exc


@dataclass(frozen=True)
class IndexFile:
    """A saved index in faiss's file format, to be read by `read_index_file` (memory-mapped or not)."""

    path: Path
    memory_map: bool = True


def read_index_file(saved: IndexFile) -> tuple[faiss.Index, bool]:
    """(the index, whether its data stay memory-mapped from the file).

    What faiss 1.15 maps (checked on the installed build, tests/test_index.py): `IO_FLAG_MMAP`
    maps the inverted lists of an IVF index (they become a read-only `OnDiskInvertedLists`);
    `IO_FLAG_MMAP_IFC` maps the vector storage of flat-code indexes, the `IndexHNSWFlat` inside
    our `IndexIDMap` included (the graph itself is read into memory). Anything else, or a map
    faiss refuses, is read normally. A mapped index must never be added to (faiss aborts the
    process on a mapped flat storage): `FaissCosineIndex.add` reads it into memory first.
    """
    path = str(saved.path)
    try:
        if saved.memory_map:
            with open(path, "rb") as f:
                ivf = f.read(4) in IVF_FOURCC
            try:
                return faiss.read_index(path, faiss.IO_FLAG_MMAP if ivf else faiss.IO_FLAG_MMAP_IFC), True
            except RuntimeError:
                pass       # not mappable here: read it normally
        return faiss.read_index(path), False
    except (OSError, RuntimeError) as exc:   # faiss reports a damaged or foreign file as RuntimeError
        raise ValueError(f"the saved index {saved.path.name} cannot be read by faiss "
                         f"({str(exc).splitlines()[0] if str(exc) else exc})") from exc


# The four bytes faiss's writer starts an IndexIVFFlat with (faiss/impl/index_write.cpp: "IwFl";
# "IvFl" is the older IVF-Flat tag it still reads).
IVF_FOURCC = (b"IwFl", b"IvFl")


def open_saved(saved) -> tuple[faiss.Index, Path | None]:
    """A saved index (a uint8 array from an older bank, or an `IndexFile`) -> (faiss index, the
    file it stays mapped from, or None when it is wholly in memory)."""
    if isinstance(saved, IndexFile):
        index, mapped = read_index_file(saved)
        return index, saved.path if mapped else None
    return deserialize(saved), None


def to_cosine(similarities: np.ndarray) -> np.ndarray:
    """Inner products of unit vectors -> cosine distances, clipped to [0, 2] (rounding can push
    1 - cos a hair below zero for identical vectors)."""
    distances = 1.0 - similarities
    np.clip(distances, 0.0, 2.0, out=distances)
    return distances


class FaissCosineIndex:
    """Shared machinery: chunked search, missing results re-searched wider, serialisation.

    Subclasses set `kind`, build `self._index` (a faiss index over inner product whose labels
    are rows) and implement `_search_wide(queries, k, level)`: the same search made wider
    (level 1, 2, ...), used for the few queries an approximate search returned fewer than k
    results for; `max_level` is where it becomes exhaustive.
    """

    kind: ClassVar[str]

    _index: faiss.Index
    choice: dict | None = None     # set by `choose_index`: the measured recall and how it was measured
    mapped_from: Path | None = None   # the file the index's data are memory-mapped from, if any

    @property
    def max_level(self) -> int:
        return 0

    @property
    def size(self) -> int:
        return int(self._index.ntotal)

    @property
    def dim(self) -> int:
        return int(self._index.d)

    def add(self, vectors: np.ndarray) -> None:
        vectors = check_vectors(vectors, "vectors", self.dim)
        self.unmap()
        self.add_rows(vectors, np.arange(self.size, self.size + len(vectors), dtype=np.int64), np.arange(len(vectors)))

    def add_rows(self, vectors: np.ndarray, rows: np.ndarray, take: np.ndarray | None = None) -> None:
        """Add `vectors[take]` (all when None) under the labels `rows`, in chunks (no full copy)."""
        take = rows if take is None else take
        for start in range(0, len(rows), ADD_CHUNK):
            part = take[start:start + ADD_CHUNK]
            self._add(np.ascontiguousarray(vectors[part], dtype=np.float32), rows[start:start + ADD_CHUNK])

    def _add(self, vectors: np.ndarray, rows: np.ndarray) -> None:
        self._index.add_with_ids(vectors, rows)

    def unmap(self) -> None:
        """Read a memory-mapped index wholly into memory (before adding: a mapped one is read-only)."""
        if self.mapped_from is not None:
            self._set_index(read_index_file(IndexFile(self.mapped_from, memory_map=False))[0])
            self.mapped_from = None

    def _set_index(self, index: faiss.Index) -> None:
        self._index = index

    def describe(self) -> dict:
        return {"kind": self.kind, **self.params()} | (self.choice or {})

    def params(self) -> dict:
        raise NotImplementedError

    def search(self, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
        queries = check_vectors(queries, "queries", self.dim)
        if not 1 <= k <= self.size:
            raise ValueError(f"k must be in [1, {self.size}], got: {k}")
        distances = np.empty((len(queries), k), dtype=np.float32)
        rows = np.empty((len(queries), k), dtype=np.int64)
        for start in range(0, len(queries), QUERY_CHUNK):
            chunk = queries[start:start + QUERY_CHUNK]
            with threads_for(len(chunk) * self.dim * self.visited()):
                sims, idx = self._index.search(chunk, k)
            level = 0
            while (short := np.flatnonzero((idx < 0).any(axis=1))).size:
                level += 1
                if level > self.max_level:
                    raise RuntimeError(f"{self.kind} index returned fewer than k={k} neighbours "
                                       f"for {short.size} queries even when searched exhaustively")
                sims[short], idx[short] = self._search_wide(chunk[short], k, level)
            distances[start:start + len(chunk)] = to_cosine(sims)
            rows[start:start + len(chunk)] = idx
        return distances, rows

    def _search_wide(self, queries: np.ndarray, k: int, level: int):
        raise NotImplementedError

    def visited(self) -> float:
        """About how many vectors one query is compared with (to judge the work of a search)."""
        raise NotImplementedError

    def to_array(self) -> np.ndarray:
        return faiss.serialize_index(self._index)

    def write(self, path: Path) -> None:
        """Save in faiss's file format (`faiss.write_index`). A mapped index is unchanged since it
        was read (adding unmaps it), so its file is copied: faiss would write a mapped IVF's lists
        as a reference to that other file."""
        if self.mapped_from is not None:
            shutil.copyfile(self.mapped_from, path)
        else:
            faiss.write_index(self._index, str(path))


def recall_at_k(found_distances: np.ndarray, exact_distances: np.ndarray, tolerance: float = 1e-5) -> np.ndarray:
    """Per-query recall@k, by distance: the share of the k neighbours found that are no farther than
    the exact k-th neighbour (plus a tolerance for float32 rounding, which differs between faiss's
    and NumPy's sums by up to ~1e-6 at 1280 dimensions).

    This is the recall of ANN-Benchmarks (Aumüller, Bernhardsson & Faithfull, Information Systems
    2020): ties at the k-th distance (exact copies in the bank) count as found whichever copy
    the index returns, where a row-set intersection would call one of them a miss.
    """
    kth = exact_distances[:, -1:].astype(np.float64)
    return (found_distances <= kth + tolerance).mean(axis=1)
