"""Mean distance to the k nearest references: the default detector.

kNN distance as an outlier score: Ramaswamy, Rastogi & Shim, "Efficient algorithms for mining
outliers from large data sets", SIGMOD 2000 (k-th distance) and Angiulli & Pizzuti 2002 (sum
over the k nearest); on pretrained embeddings, Bergman, Cohen & Hoshen, "Deep nearest neighbor
anomaly detection", 2020. Distances are cosine (1 - cos) over L2-normalised vectors, found with
faiss: exactly, or for large banks with an approximate index whose recall is measured
(`oddling.index.choose_index`).

Calibration is leave-one-out: each reference is scored against all the others, every copy of
the same file (content hash) excluded. Above `CALIBRATION_SAMPLE` references only a seeded
random sample of them is scored (still against all the others): 20,000 calibration scores
support rates down to 1/20,001 and cost one search of 20,000 queries, whatever the bank's size.
"""
from __future__ import annotations

import numpy as np

from oddling.detectors.base import SEED, Detector, Scores, check_features, check_fitted, distinct_groups
from oddling.errors import OddlingError
from oddling.index import base as index_base
from oddling.index.exact import ExactCosineIndex, check_stored
from oddling.index.selection import check_kind, choose_index, load_index

CALIBRATION_SAMPLE = 20000
LEAVE_ONE_OUT = ("leave-one-out: each reference scored against the others, every copy of the same file "
                 "excluded")


def sampled_method(n_calibration: int, n: int) -> str:
    return (f"leave-one-out on a seeded random sample of {n_calibration} of the {n} references: each scored "
            "against all the others, every copy of the same file excluded")


def mean_knn_distance(distances: np.ndarray) -> np.ndarray:
    """The anomaly score: mean distance to the k nearest bank vectors (higher = more anomalous)."""
    return distances.mean(axis=1, dtype=np.float64)


def group_codes(groups: np.ndarray) -> tuple[np.ndarray, int]:
    """(one integer per row, equal for equal groups; the size of the largest group)."""
    _, codes, counts = np.unique(np.asarray(groups), return_inverse=True, return_counts=True)
    return codes.reshape(-1), int(counts.max()) if len(counts) else 0


def leave_one_out_distances(index, vectors: np.ndarray, codes: np.ndarray, largest_group: int, k: int,
                            rows: np.ndarray | None = None) -> np.ndarray:
    """(n_rows, k) distances of each row's k nearest references in `index`, every reference of its
    own group (itself included) left out; rows None = all. Searched `QUERY_CHUNK` rows at a time."""
    n = index.size
    if n - largest_group < k:
        raise ValueError(f"leave-one-out needs at least k={k} other distinct images, got {n - largest_group}")
    search_k = min(n, k + largest_group)
    count = n if rows is None else len(rows)
    out = np.empty((count, k), dtype=np.float32)
    chunk = index_base.QUERY_CHUNK
    for start in range(0, count, chunk):
        which = np.arange(start, min(count, start + chunk)) if rows is None else rows[start:start + chunk]
        queries = vectors[start:start + chunk] if rows is None else vectors[which]
        distances, found = index.search(queries, search_k)
        keep = codes[found] != codes[which][:, None]
        first = np.argsort(~keep, axis=1, kind="stable")[:, :k]      # the k nearest kept, in order
        out[start:start + len(which)] = np.take_along_axis(distances, first, axis=1)
    return out


def leave_one_out_scores(vectors: np.ndarray, groups: np.ndarray, k: int) -> np.ndarray:
    """Score each bank vector against the others, ignoring every vector of its own group, exactly.

    `groups` gives one id per vector (the file's content hash): an exact duplicate would sit at
    distance 0 and make its copy look more normal than any new image can. Exact and cheap for
    kNN: one search of the bank against itself.
    """
    vectors = np.ascontiguousarray(vectors, dtype=np.float32)
    codes, largest = group_codes(groups)
    return mean_knn_distance(leave_one_out_distances(ExactCosineIndex(vectors), vectors, codes, largest, k))


def _new_group_ids(n_old: int, m: int) -> np.ndarray:
    return np.arange(n_old, n_old + m).astype(str)   # what fit(union, None) would give these rows


class KNNDetector(Detector):
    """Mean cosine distance to the k nearest references.

    Parameters
    ----------
    k : int, default 5
        Neighbours averaged into each score.
    index : {"auto", "exact", "ivf", "hnsw"}, default "auto"
        How neighbours are found: "auto" searches exactly below
        `oddling.index.selection.EXACT_BELOW` references and with HNSW above; approximate
        indexes get search parameters that reach recall@k 0.95 against exact search, measured
        at fit (see `oddling.index.selection`).

    Attributes
    ----------
    references_ : ndarray (n, d), the L2-normalised reference features: float32, or as a bank stores
        them when loaded from one (a memory map; float16 for `vector_dtype` float16).
    index_ : the nearest-neighbour index over them (`describe()` gives its parameters and recall).
    calibration_scores_ : ndarray (n_cal,), leave-one-out scores of all references, or of a seeded
        sample of `CALIBRATION_SAMPLE` of them above that many.
    calibration_rows_ : ndarray (n_cal,) int64 of the sampled rows, or None when all are used.
    calibration_method_ : str

    Examples
    --------
    >>> import numpy as np
    >>> x = np.eye(4, dtype=np.float32)
    >>> KNNDetector(k=1).fit(x, None).anomaly_score(x[:1]).scores
    array([0.])

    References
    ----------
    Bergman, Cohen & Hoshen, "Deep nearest neighbor anomaly detection", arXiv:2002.10445, 2020.
    """

    name = "knn"
    title = "k nearest neighbours"
    citation = "Bergman, Cohen & Hoshen 2020 (kNN on pretrained features); Angiulli & Pizzuti 2002"
    keeps_training_features = True
    adds_incrementally = True
    has_neighbours = True
    evidence_title = "Nearest normal references (cosine distance)"

    def __init__(self, k: int = 5, index: str = "auto"):
        self.k = k
        self.index = index

    def _check_k(self) -> int:
        if isinstance(self.k, bool) or not isinstance(self.k, (int, np.integer)) or self.k < 1:
            raise OddlingError(f"k must be an integer >= 1, got: {self.k!r}")
        return int(self.k)

    # --- fitting -------------------------------------------------------------------------------
    def fit(self, features: np.ndarray, groups: np.ndarray | None = None) -> "KNNDetector":
        k = self._check_k()
        kind = check_kind(self.index)
        features = check_features(features)
        groups = distinct_groups(groups, len(features))
        if len(set(groups.tolist())) < k + 1:
            raise OddlingError(f"k={k} needs at least k+1 = {k + 1} distinct references, "
                               f"got {len(set(groups.tolist()))}")
        self.references_ = np.ascontiguousarray(features, dtype=np.float32)
        self.groups_ = np.asarray(groups)
        self.index_ = choose_index(self.references_, k, kind, seed=SEED)
        if isinstance(self.index_, ExactCosineIndex):
            self.references_ = self.index_.vectors       # one copy, shared with the exact index
        n = len(self.references_)
        rows = self._sample_rows(n)
        self._calibrate(rows, self._loo(rows))
        return self

    @staticmethod
    def _sample_rows(n: int) -> np.ndarray | None:
        if n <= CALIBRATION_SAMPLE:
            return None
        return np.sort(np.random.default_rng(SEED).choice(n, size=CALIBRATION_SAMPLE, replace=False)).astype(np.int64)

    def _loo(self, rows: np.ndarray | None) -> np.ndarray:
        codes, largest = group_codes(self.groups_)
        return leave_one_out_distances(self.index_, self.references_, codes, largest, self._check_k(), rows)

    def _calibrate(self, rows: np.ndarray | None, distances: np.ndarray) -> None:
        self.calibration_rows_ = rows
        self.calibration_distances_ = distances
        self.calibration_scores_ = mean_knn_distance(distances)
        n = len(self.references_)
        self.calibration_method_ = LEAVE_ONE_OUT if rows is None else sampled_method(len(rows), n)

    def add(self, features: np.ndarray, groups: np.ndarray | None = None, *,
            reference_groups: np.ndarray | None = None) -> dict:
        """Append references: the index grows in place and the calibration is updated, not refitted.

        `groups`: the new references' content hashes (None: each its own). `reference_groups`:
        the existing references' content hashes, in row order (the bank's `sha256` list); needed
        when the detector was loaded from a bank, since it does not keep them (one fitted or
        added to in this process remembers them).

        Calibration afterwards:
        - at most `CALIBRATION_SAMPLE` references in all: leave-one-out of every reference again
          (at most 20,000 queries: a few seconds), the same scores a refit gives;
        - a bank calibrated on a sample already: the sample stays a uniform random sample of all
          references (reservoir sampling, Vitter's Algorithm R, seeded by the bank's size): each
          new reference joins it with probability 20,000 / its row + 1, replacing a random
          member. Members kept keep their k neighbour distances except where a new reference
          (of another file) comes nearer than their k-th: those are merged in exactly. Members
          that join are scored leave-one-out against all references;
        - a bank that grows past 20,000 (or an older bank without its sample's distances): a
          fresh seeded sample, as fit draws it.
        The approximate index keeps the search parameters measured at fit (`describe()` says at
        how many references); refit after growing the bank many times over to measure them again.

        Returns what changed: added, n_references, calibration ("recomputed", "incremental" or
        "resampled"), calibration_changed (kept members whose neighbours changed),
        calibration_joined (members added to the sample).
        """
        k = self._check_k()
        check_fitted(self, "references_")
        features = check_features(features)
        n_old, m = len(self.references_), len(features)
        if features.shape[1] != self.references_.shape[1]:
            raise OddlingError(f"features have {features.shape[1]} dimensions; the detector holds "
                               f"{self.references_.shape[1]}")
        groups = _new_group_ids(n_old, m) if groups is None else distinct_groups(groups, m)
        if reference_groups is not None:
            old_groups = distinct_groups(reference_groups, n_old)
        elif getattr(self, "groups_", None) is not None:
            old_groups = self.groups_
        else:
            raise OddlingError("add needs the existing references' content hashes (reference_groups=..., "
                               "the bank's sha256 list in row order) for a detector loaded from a bank")
        summary = {"added": m, "n_references": n_old + m, "calibration": "unchanged",
                   "calibration_changed": 0, "calibration_joined": 0}
        if m == 0:
            return summary
        new = np.ascontiguousarray(features, dtype=np.float32)
        index = self._search_index()
        index.add(new)
        self.references_ = index.vectors if isinstance(index, ExactCosineIndex) else np.concatenate(
            [self.references_, new.astype(self.references_.dtype, copy=False)])
        self.groups_ = np.concatenate([np.asarray(old_groups), np.asarray(groups)])
        n = n_old + m
        old_rows = getattr(self, "calibration_rows_", None)
        old_distances = getattr(self, "calibration_distances_", None)
        if n <= CALIBRATION_SAMPLE:
            self._calibrate(None, self._loo(None))
            summary.update(calibration="recomputed", calibration_joined=m)
        elif old_rows is not None and old_distances is not None and n_old > CALIBRATION_SAMPLE:
            changed, joined = self._reservoir_update(old_rows, old_distances, n_old, new, k)
            summary.update(calibration="incremental", calibration_changed=changed, calibration_joined=joined)
        else:
            rows = self._sample_rows(n)
            self._calibrate(rows, self._loo(rows))
            summary.update(calibration="resampled", calibration_joined=int((rows >= n_old).sum()))
        return summary

    def _reservoir_update(self, rows, distances, n_old: int, new: np.ndarray, k: int) -> tuple[int, int]:
        rows, distances = rows.copy(), distances.copy()
        size, m = len(rows), len(new)
        rng = np.random.default_rng([SEED, n_old])
        positions = np.arange(n_old, n_old + m)
        accepted = positions[rng.random(m) < size / (positions + 1.0)]
        for row, slot in zip(accepted, rng.integers(0, size, len(accepted))):
            rows[slot] = row
        codes, largest = group_codes(self.groups_)
        kept = np.flatnonzero(rows < n_old)
        # kept members: merge the new references in (k + the largest new group of them, so at
        # least k of another file are among those looked at)
        new_codes = codes[n_old:]
        _, new_counts = np.unique(new_codes, return_counts=True)
        look = min(m, k + int(new_counts.max()))
        new_index = ExactCosineIndex(new)
        changed = 0
        chunk = index_base.QUERY_CHUNK
        for start in range(0, len(kept), chunk):
            slots = kept[start:start + chunk]
            found_d, found = new_index.search(self.references_[rows[slots]], look)
            found_d = np.where(new_codes[found] != codes[rows[slots]][:, None], found_d, np.inf)
            both = np.concatenate([distances[slots], found_d], axis=1)
            nearest = np.take_along_axis(both, np.argsort(both, axis=1, kind="stable")[:, :k], axis=1)
            changed += int((found_d.min(axis=1) < distances[slots, -1]).sum())
            distances[slots] = nearest
        joined = np.flatnonzero(rows >= n_old)
        if len(joined):
            distances[joined] = leave_one_out_distances(self.index_, self.references_, codes, largest, k, rows[joined])
        order = np.argsort(rows, kind="stable")
        self._calibrate(rows[order], distances[order])
        return changed, int(len(joined))

    # --- scoring -------------------------------------------------------------------------------
    def _search_index(self):
        if getattr(self, "index_", None) is None:
            self.index_ = ExactCosineIndex(self.references_)
        return self.index_

    def anomaly_score(self, features: np.ndarray, groups: np.ndarray | None = None) -> Scores:
        check_fitted(self, "references_")
        features = check_features(features)
        if len(features) == 0:
            return Scores(np.zeros(0), np.zeros((0, self.k), np.int64), np.zeros((0, self.k)))
        if features.shape[1] != self.references_.shape[1]:
            raise OddlingError(f"features have {features.shape[1]} dimensions; the detector was fitted on "
                               f"{self.references_.shape[1]}")
        distances, rows = self._search_index().search(features, self.k)
        return Scores(mean_knn_distance(distances), rows, distances.astype(np.float64))

    # --- state ---------------------------------------------------------------------------------
    def state(self) -> tuple[dict, dict[str, np.ndarray]]:
        # The references are the bank's reference features, kept there once; an exact index is
        # rebuilt from them on load, an approximate one is saved by `faiss_indexes`.
        check_fitted(self, "references_")
        index = self._search_index()
        state = {"calibration_method": self.calibration_method_, "index": index.describe()}
        arrays = {}
        if getattr(self, "calibration_rows_", None) is not None:
            arrays["calibration_rows"] = np.asarray(self.calibration_rows_, dtype=np.int64)
            arrays["calibration_distances"] = np.asarray(self.calibration_distances_, dtype=np.float32)
        return state, arrays

    def faiss_indexes(self) -> dict:
        """An approximate index, saved by the bank in faiss's file format (`index.write`)."""
        check_fitted(self, "references_")
        index = self._search_index()
        return {} if index.kind == "exact" else {"index": index}

    def load_state(self, state: dict, arrays: dict[str, np.ndarray]) -> "KNNDetector":
        """`arrays["references"]`: the bank's features, float32 or float16, kept as given (a
        memory map stays one); `arrays["index"]`: an approximate index, an
        `oddling.index.base.IndexFile` (read memory-mapped where faiss can) or, from banks
        written before index files, the uint8 array of `faiss.serialize_index`."""
        k = self._check_k()
        kind = check_kind(self.index)
        references = arrays.get("references")
        if references is None or references.ndim != 2 or len(references) < k:
            raise OddlingError(f"a kNN detector with k={k} needs at least {k} reference vectors")
        self.references_ = check_stored(references)
        self.calibration_method_ = str(state.get("calibration_method", LEAVE_ONE_OUT))
        self.groups_ = None
        description = state.get("index", {"kind": "exact"})
        if not isinstance(description, dict):
            raise OddlingError(f"the kNN detector's index description must be an object, got {description!r}")
        saved = description.get("kind")
        if kind != "auto" and saved != kind:
            raise OddlingError(f"the kNN detector was set to index {kind!r} but its saved index is {saved!r}")
        try:
            self.index_ = load_index(description, arrays.get("index"), self.references_)
        except ValueError as exc:
            raise OddlingError(f"the kNN detector's saved index is damaged: {exc}") from exc
        if (self.index_.size, self.index_.dim) != self.references_.shape:
            raise OddlingError(f"the kNN detector's saved index holds {self.index_.size} vectors of dimension "
                               f"{self.index_.dim}, the bank {self.references_.shape[0]} of "
                               f"{self.references_.shape[1]}")
        if isinstance(self.index_, ExactCosineIndex):
            self.references_ = self.index_.vectors
        self._load_calibration(arrays, k)
        return self

    def _load_calibration(self, arrays: dict, k: int) -> None:
        rows, distances = arrays.get("calibration_rows"), arrays.get("calibration_distances")
        self.calibration_rows_ = self.calibration_distances_ = None
        if rows is None and distances is None:
            return
        n = len(self.references_)
        if rows is None or distances is None:
            raise OddlingError("the kNN detector's calibration sample needs both calibration_rows and "
                               "calibration_distances")
        if (rows.ndim != 1 or not np.issubdtype(rows.dtype, np.integer) or len(rows) == 0
                or rows.min() < 0 or rows.max() >= n or np.any(np.diff(rows) <= 0)):
            raise OddlingError(f"the kNN detector's calibration_rows must be increasing row numbers in [0, {n})")
        if distances.shape != (len(rows), k) or not np.isfinite(distances).all() \
                or distances.min() < 0 or distances.max() > 2:
            raise OddlingError(f"the kNN detector's calibration_distances must be ({len(rows)}, {k}) distances "
                               f"in [0, 2], got shape {distances.shape}")
        self.calibration_rows_ = rows.astype(np.int64)
        self.calibration_distances_ = np.ascontiguousarray(distances, dtype=np.float32)
        self.calibration_scores_ = mean_knn_distance(self.calibration_distances_)

    def describe_score(self) -> str:
        text = (f"mean cosine distance (1 - cos) to the {self.k} nearest reference"
                f"{'s' if self.k != 1 else ''}; 0 = identical, 2 = opposite")
        index = getattr(self, "index_", None)
        if index is not None and index.kind != "exact":
            info = index.describe()
            text += (f" (found by an approximate {index.kind.upper()} index, recall@{info.get('k', self.k)} "
                     f"{info.get('recall', float('nan')):.3f} measured at fit)")
        return text
