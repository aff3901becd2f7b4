"""Choosing the index for a bank, and its search parameters by measured recall.

`choose_index(vectors, k)`: exact search below `EXACT_BELOW` references; above, an approximate
index whose search parameter (nprobe for IVF, efSearch for HNSW) is the smallest that reaches
the target recall@k, measured against exact search:

1. a seeded sample of the references (`TUNING_QUERIES`, at most a tenth) is held out;
2. the index is built on the others, and the held-out vectors are searched in it, as new
   images will be: they are not in the index (a vector that is in an HNSW graph is found
   through its own links, which would overstate the recall);
3. the exact k nearest of each held-out vector among the others are the truth (chunked NumPy);
4. the parameter doubles until the recall's lower bound (mean - 2 standard errors over the
   held-out queries) reaches the target, then a bisection finds the smallest such value
   (recall grows with either parameter);
5. the held-out vectors are added; rows of the index are rows of `vectors`.

The result's `describe()` records the parameters, the measured recall and how it was measured.
"""
from __future__ import annotations

import math

import numpy as np

from oddling.errors import OddlingError
from oddling.index.base import check_vectors, recall_at_k
from oddling.index.exact import ExactCosineIndex
from oddling.index.hnsw import MAX_EF_SEARCH, HNSWCosineIndex
from oddling.index.ivf import IVFCosineIndex

KINDS = ("auto", "exact", "ivf", "hnsw")
# Below this many references `auto` searches exactly. Measured (benchmarks/bench_index.py
# --crossover, clustered 1280-d vectors, 2 cores): below it, exact
# search of 10,000 queries plus the leave-one-out calibration cost less than building and tuning
# an approximate index, and exact search is fast enough for a service.
EXACT_BELOW = 100_000
AUTO_APPROXIMATE = "hnsw"   # the faster of the two at the target recall in the benchmark
TUNING_QUERIES = 1000
MIN_TUNING_QUERIES = 50
TRUTH_CHUNK = 16384         # reference rows per exact-truth block


def check_kind(kind) -> str:
    if kind not in KINDS:
        raise OddlingError(f"index must be one of {', '.join(KINDS)}, got: {kind!r}")
    return kind


def exact_truth(vectors: np.ndarray, queries: np.ndarray, k: int, exclude: np.ndarray) -> np.ndarray:
    """Exact cosine distances (n_queries, k) of each query's k nearest rows, rows in `exclude`
    left out. In blocks of rows: never the whole (queries x references) matrix."""
    best = np.full((len(queries), k), np.inf, dtype=np.float32)
    excluded = np.zeros(len(vectors), dtype=bool)
    excluded[exclude] = True
    for start in range(0, len(vectors), TRUTH_CHUNK):
        block = np.asarray(vectors[start:start + TRUTH_CHUNK], dtype=np.float32)
        dist = 1.0 - queries @ block.T
        dist[:, excluded[start:start + len(block)]] = np.inf
        both = np.concatenate([best, dist], axis=1)
        best = np.take_along_axis(both, np.argpartition(both, k - 1, axis=1)[:, :k], axis=1)
    best.sort(axis=1)
    return np.clip(best, 0.0, 2.0)


def measure(index, queries: np.ndarray, truth: np.ndarray, k: int) -> tuple[float, float]:
    """(mean recall@k, its lower bound mean - 2 s.e.) over the queries."""
    found, _ = index.search(queries, k)
    per_query = recall_at_k(found, truth)
    mean = float(per_query.mean())
    se = float(per_query.std(ddof=1) / math.sqrt(len(per_query))) if len(per_query) > 1 else 0.0
    return mean, mean - 2.0 * se


def tune(index, queries: np.ndarray, truth: np.ndarray, k: int, target: float, start: int, limit: int):
    """Smallest search parameter in [start, limit] whose recall lower bound reaches the target.
    Returns (value, mean recall, lower bound, met)."""
    tried = {}

    def at(value):
        if value not in tried:
            index.set_search(value)
            tried[value] = measure(index, queries, truth, k)
        return tried[value]

    low, value = None, start
    while at(value)[1] < target and value < limit:
        low, value = value, min(limit, value * 2)
    if at(value)[1] < target:
        return value, *at(value), False
    high = value
    low = low if low is not None else start - 1
    while high - low > 1:        # at(low) misses the target (or low is below the range), at(high) meets it
        mid = (low + high) // 2
        if mid < start or at(mid)[1] < target:
            low = mid
        else:
            high = mid
    return high, *at(high), True


def choose_index(vectors: np.ndarray, k: int, kind: str = "auto", target_recall: float = 0.95, seed: int = 0):
    """An index over `vectors` (rows = rows of `vectors`) for k-nearest-neighbour search.

    kind "auto": exact below `EXACT_BELOW` references, else `AUTO_APPROXIMATE`; "exact", "ivf",
    "hnsw" as asked. Approximate indexes get the smallest nprobe / efSearch that reaches
    `target_recall` (see the module notes); `describe()` says what was measured.
    """
    check_kind(kind)
    if isinstance(target_recall, bool) or not isinstance(target_recall, (int, float)) or not 0 < target_recall <= 1:
        raise OddlingError(f"target_recall must be in (0, 1], got: {target_recall!r}")
    vectors = check_vectors(vectors, "vectors")
    n = len(vectors)
    if not 1 <= k < n:
        raise OddlingError(f"k must be in [1, {n - 1}] for {n} references, got: {k}")
    if kind == "auto":
        kind = "exact" if n < EXACT_BELOW else AUTO_APPROXIMATE
    if kind == "exact":
        return ExactCosineIndex(vectors)
    n_tune = min(TUNING_QUERIES, n // 10)
    if n_tune < MIN_TUNING_QUERIES or n - n_tune <= k:
        raise OddlingError(f"an approximate ({kind}) index needs at least {10 * MIN_TUNING_QUERIES} references "
                           f"to measure its recall, got {n}; use the exact index")
    rng = np.random.default_rng([seed, 0])
    order = rng.permutation(n)
    held, rest = np.sort(order[:n_tune]), np.sort(order[n_tune:])
    queries = np.ascontiguousarray(vectors[held])
    truth = exact_truth(vectors, queries, k, exclude=held)
    if kind == "ivf":
        index = IVFCosineIndex.build(vectors, rest, seed=seed)
        name, start, limit = "nprobe", 1, index.nlist
    else:
        index = HNSWCosineIndex.build(vectors, rest)
        name, start, limit = "efSearch", k, MAX_EF_SEARCH
    value, recall, lower, met = tune(index, queries, truth, k, float(target_recall), start, limit)
    if not met:
        raise OddlingError(f"the {kind} index reaches recall@{k} {recall:.3f} at {name}={value}, below the target "
                           f"{target_recall}; use another index (exact always has recall 1)")
    index.set_search(value)
    index.add_rows(vectors, held)
    index.choice = {
        "k": int(k), "target_recall": float(target_recall), "recall": round(recall, 6),
        "recall_lower_bound": round(lower, 6), "n_tuning_queries": int(n_tune), "n_at_tuning": int(n),
        "tuning_seed": int(seed),
        "measured": (f"recall@{k} of {n_tune} held-out references against exact search over the other {n - n_tune}; "
                     f"smallest {name} whose lower bound (mean - 2 s.e.) reaches the target"),
    }
    return index


def load_index(description: dict, array: np.ndarray | None, vectors: np.ndarray):
    """The index a detector saved: exact is rebuilt from the reference vectors; approximate ones
    are read from their saved array."""
    kind = description.get("kind")
    if kind == "exact":
        return ExactCosineIndex(vectors)
    if kind not in ("ivf", "hnsw"):
        raise ValueError(f"unknown index kind {kind!r}")
    if array is None:
        raise ValueError(f"the {kind} index array is missing")
    cls = IVFCosineIndex if kind == "ivf" else HNSWCosineIndex
    return cls.from_array(array, description)

