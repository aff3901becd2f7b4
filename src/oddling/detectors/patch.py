"""Local-defect mode: a coreset memory bank of reference patches, nearest-patch distances per location
(the anomaly map), and the map's maximum as the image score. The patch features themselves come
from the representation (backbones/patch_grid.py); drawing the maps is reporting/heatmaps.py's.

Patch-level nearest neighbours as in Cohen & Hoshen, "Sub-image anomaly detection with deep
pyramid correspondences" (SPADE), 2020, and Roth et al., "Towards total recall in industrial
anomaly detection" (PatchCore), CVPR 2022; the memory bank is bounded by greedy k-center
subsampling (Sener & Savarese, ICLR 2018), which covers within a factor 2 of the optimal
radius (Gonzalez 1985).
"""
from __future__ import annotations

from dataclasses import dataclass

import faiss
import numpy as np

# torch is imported inside the functions that need its tensor ops (the coreset), so loading a
# patch bank (`bank info`, `drift --history`) does not import it.

MODE = "local"
PROJECTION_DIM = 128
SEED = 0
N_FOLDS = 5
MAX_PATCHES = 16384        # the coreset's size at most: scoring cost is locations x coreset patches
GREEDY_POOL = 50_000       # greedy k-center candidates at least (see `coreset`)
# Above this many references, a seeded sample of this many is scored for calibration (as the kNN
# detector samples above 20,000): 2,000 scores support rates down to 1/2,001, and the cost stops
# growing with the references.
CALIBRATION_SAMPLE = 2000
# Neighbours looked up per location when scoring: enough that one of them nearly always comes from
# another fold than the nearest (see `fold_scores`).
FOLD_SEARCH = 4


def random_projection(dim: int, out_dim: int = PROJECTION_DIM, seed: int = SEED) -> np.ndarray:
    """Gaussian random projection (Johnson-Lindenstrauss): distances kept up to a small factor."""
    rng = np.random.default_rng(seed)
    return (rng.standard_normal((dim, out_dim)) / np.sqrt(out_dim)).astype(np.float32)


def greedy_k_center(points: np.ndarray, n_centers: int, first: int = 0) -> np.ndarray:
    """Indices of `n_centers` points chosen greedily: each next centre is the point farthest from
    the centres so far. Its covering radius is at most twice the optimum (Gonzalez 1985).

    One BLAS thread: each step is one small matrix-vector product, and two threads spend more on
    meeting each other than they save (50,000 x 64 points, 2,000 centres on a busy 2-core machine:
    2.3 s on one thread, 7 s on two; PyTorch's default threads took 35 s)."""
    from oddling.detectors.threads import one_blas_thread

    n = len(points)
    if not 1 <= n_centers <= n:
        raise ValueError(f"n_centers must be in [1, {n}], got: {n_centers}")
    x = np.ascontiguousarray(points, dtype=np.float32)
    sq = np.einsum("ij,ij->i", x, x)
    chosen = np.empty(n_centers, dtype=np.int64)
    chosen[0] = first
    nearest = np.full(n, np.inf, dtype=np.float32)
    distance = np.empty(n, dtype=np.float32)
    with one_blas_thread():
        for j in range(1, n_centers + 1):
            c = chosen[j - 1]
            np.dot(x, x[c], out=distance)          # |x - c|^2 = |x|^2 - 2 x.c + |c|^2
            distance *= -2.0
            distance += sq
            distance += sq[c]
            np.minimum(nearest, distance, out=nearest)
            if j < n_centers:
                chosen[j] = int(nearest.argmax())
    return chosen


def coreset(features: np.ndarray, fraction: float, seed: int = SEED, max_centers: int | None = None) -> np.ndarray:
    """Rows of `features` kept by greedy k-center: `fraction` of them, at most `max_centers`.

    Above GREEDY_POOL rows (or 8 candidates per centre, if more) the greedy runs on a seeded
    subsample of that many candidates: its cost is candidates x centres, and a pool this much larger
    than the coreset still holds every kind of patch the coreset can keep. On a random projection to
    PROJECTION_DIM dimensions when the features have more (as PatchCore does to make the search
    cheap)."""
    n_centers = max(1, int(round(fraction * len(features))))
    if max_centers is not None:
        n_centers = min(n_centers, max(1, int(max_centers)))
    if n_centers >= len(features):
        return np.arange(len(features))
    pool = max(GREEDY_POOL, 8 * n_centers)
    candidates = np.arange(len(features))
    if len(features) > pool:
        candidates = np.sort(np.random.default_rng(seed).choice(len(features), pool, replace=False))
    points = features[candidates]
    if points.shape[1] > PROJECTION_DIM:   # a projection to as many dimensions would save nothing
        points = points @ random_projection(points.shape[1], PROJECTION_DIM, seed)
    return np.sort(candidates[greedy_k_center(points, n_centers)])


class PatchIndex:
    """Exact nearest-patch search (Euclidean, on raw features) with faiss."""

    def __init__(self, patches: np.ndarray):
        patches = np.ascontiguousarray(patches, dtype=np.float32)
        self.size = len(patches)
        self._index = faiss.IndexFlatL2(patches.shape[1])
        self._index.add(patches)

    def nearest(self, queries: np.ndarray, k: int = 1) -> tuple[np.ndarray, np.ndarray]:
        """(distances, bank rows) of the k nearest bank patches of each query row, nearest first;
        (n,) arrays for k = 1, else (n, k)."""
        k = min(k, self.size)
        sq, idx = self._index.search(np.ascontiguousarray(queries, dtype=np.float32), k)
        distances = np.sqrt(np.maximum(sq, 0.0)).astype(np.float64)
        return (distances[:, 0], idx[:, 0]) if k == 1 else (distances, idx)


@dataclass
class PatchScores:
    scores: np.ndarray     # (n,) image scores
    maps: np.ndarray       # (n, G, G) nearest-patch distance per location
    worst_source: np.ndarray  # (n,) reference row of the patch nearest to the worst location


def score_patches(index: PatchIndex, patch_sources: np.ndarray, features: np.ndarray) -> PatchScores:
    """features (n, G*G, C) -> image scores (the largest nearest-patch distance), grid maps and where
    the worst location's match came from: one model, the bank's whole coreset."""
    n, locations, dim = features.shape
    grid = int(round(np.sqrt(locations)))
    if n == 0:
        return PatchScores(np.zeros(0), np.zeros((0, grid, grid)), np.zeros(0, np.int64))
    dist, rows = index.nearest(features.reshape(-1, dim))
    dist = dist.reshape(n, locations)
    worst = dist.argmax(axis=1)
    sources = np.asarray(patch_sources)[rows.reshape(n, locations)[np.arange(n), worst]]
    return PatchScores(dist.max(axis=1), dist.reshape(n, grid, grid), sources)


def fold_scores(index: PatchIndex, patch_sources: np.ndarray, patch_folds: np.ndarray, n_folds: int,
                features: np.ndarray) -> PatchScores:
    """features (n, G*G, C) -> scores against the fold models of a cross-conformal bank: the mean of
    the K fold models' scores, and the mean of their maps.

    Fold model j is the coreset of every fold but j. At each location the nearest patch of the whole
    coreset (fold f, distance d1) is also the nearest of every fold model but f's, whose nearest is
    the first of the FOLD_SEARCH neighbours from another fold (d2; if all come from f, the last one's
    distance, a lower bound, which can only lower the score). So one search gives every fold model's
    distances: d1 for j != f, d2 for j = f. Each fold model's score is its largest location, and
    the calibration scores come from the same fold models (`fit_fold_bank`). The mean ranks as well
    as the whole coreset (measured: the same AUROC on the brick and fabric cases, where one fold
    model per image lost 0.01-0.02) and flags a little less than the rate promises.
    """
    n, locations, dim = features.shape
    grid = int(round(np.sqrt(locations)))
    if n == 0:
        return PatchScores(np.zeros(0), np.zeros((0, grid, grid)), np.zeros(0, np.int64))
    dist, rows = index.nearest(features.reshape(-1, dim), FOLD_SEARCH)
    dist, rows = dist.reshape(n * locations, -1), rows.reshape(n * locations, -1)
    folds = np.asarray(patch_folds)[rows]
    other = folds != folds[:, :1]
    second = np.where(other.any(axis=1), other.argmax(axis=1), dist.shape[1] - 1)
    d1 = dist[:, 0].reshape(n, locations)
    d2 = dist[np.arange(len(dist)), second].reshape(n, locations)
    nearest_fold = folds[:, 0].reshape(n, locations)
    per_fold = np.stack([np.where(nearest_fold == j, d2, d1).max(axis=1) for j in range(n_folds)], axis=1)
    maps = d1 + (d2 - d1) / n_folds          # the mean over the fold models at each location
    worst = maps.argmax(axis=1)
    sources = np.asarray(patch_sources)[rows[:, 0].reshape(n, locations)[np.arange(n), worst]]
    return PatchScores(per_fold.mean(axis=1), maps.reshape(n, grid, grid), sources)


@dataclass
class FoldBank:
    patches: np.ndarray            # (m, c) the folds' coresets, fold by fold
    sources: np.ndarray            # (m,) reference row each patch came from
    fold_starts: np.ndarray        # (K + 1,) fold k's patches are rows fold_starts[k]:fold_starts[k + 1]
    calibration_scores: np.ndarray  # (n,) each reference scored by the fold model without its fold
    n_patches: int                 # patches before the coreset


def fit_fold_bank(features: np.ndarray, folds: np.ndarray, n_folds: int, fraction: float,
                  seed: int = SEED, max_patches: int = MAX_PATCHES) -> FoldBank:
    """features (n, G*G, c) of the references, their fold numbers -> cross-conformal memory bank.

    Each fold's patches get their own greedy k-center coreset (its share of `max_patches` at most);
    fold model j is the union of the other folds' coresets, so it never saw fold j, and scores fold
    j's references exactly (a search of the union without fold j) as new images will be scored by
    it. The bank keeps all the folds' coresets: the coreset of all references. Greedy k-center costs
    candidates x centres per fold, so K coresets of n/K images cost about 1/K of one coreset of all.
    """
    from oddling.progress import bar

    n, locations, dim = features.shape
    parts, sources, starts = [], [], [0]
    with bar(n_folds, "patch coreset", "fold") as shown:
        for fold in range(n_folds):
            rows = np.flatnonzero(folds == fold)
            patches = features[rows].reshape(-1, dim)
            keep = coreset(patches, fraction, seed, max_centers=max_patches * len(rows) // n)
            parts.append(np.ascontiguousarray(patches[keep]))
            sources.append(np.repeat(rows, locations)[keep])
            starts.append(starts[-1] + len(keep))
            shown.update(1)
    patches, starts = np.concatenate(parts), np.asarray(starts, dtype=np.int64)
    scored = calibration_rows(n, seed)
    calibration = np.full(n, np.nan)
    with bar(len(scored), "patch calibration", "ref") as shown:
        for fold in range(n_folds):
            held = scored[folds[scored] == fold]
            if not len(held):
                continue
            index = PatchIndex(np.concatenate([patches[:starts[fold]], patches[starts[fold + 1]:]]))
            for chunk in np.array_split(held, max(1, len(held) // 64)):   # the bar moves as references are scored
                calibration[chunk] = score_patches(index, np.zeros(index.size, np.int64), features[chunk]).scores
                shown.update(len(chunk))
    return FoldBank(patches, np.concatenate(sources).astype(np.int64), starts, calibration[scored], n * locations)


def calibration_rows(n: int, seed: int = SEED) -> np.ndarray:
    """The references scored for calibration: all of them, or above CALIBRATION_SAMPLE a seeded
    sample of that many, in row order."""
    if n <= CALIBRATION_SAMPLE:
        return np.arange(n)
    return np.sort(np.random.default_rng([seed, n]).choice(n, CALIBRATION_SAMPLE, replace=False))


from oddling.detectors.base import (Detector, Scores, check_features, check_fitted, distinct_groups,  # noqa: E402
                                    group_folds)
from oddling.errors import OddlingError  # noqa: E402


class PatchKNNDetector(Detector):
    """Nearest-patch distance over a coreset memory bank; the image score is the worst location.

    Parameters
    ----------
    coreset : float, default 0.1
        Share of the reference patches kept (greedy k-center, Sener & Savarese 2018)...
    max_patches : int, default 16384
        ... but at most this many: scoring an image costs locations x coreset patches, so the cap
        keeps scoring time flat as references grow (reached above about 200 references).
    seed : int, default 0
        Seeds the folds and the coreset's random projection.
    folds : int >= 2, default 5
        Cross-conformal folds: each reference is scored by the coreset of the other folds, so n
        references give n calibration scores.

    Attributes
    ----------
    patches_ : ndarray (m, c) float32, the coreset of reference patches, fold by fold.
    sources_ : ndarray (m,) int64, the reference row each kept patch came from.
    fold_starts_ : ndarray (folds + 1,) int64, where each fold's patches start in `patches_`; None
        for banks written with split calibration (one model, the coreset of the non-held-out
        references).
    calibration_scores_ : each reference's score by the fold model that did not see it.
    n_patches_ : int, patches before the coreset.

    References
    ----------
    Cohen & Hoshen, "Sub-image anomaly detection with deep pyramid correspondences", 2020;
    Roth et al., "Towards total recall in industrial anomaly detection", CVPR 2022;
    Vovk, "Cross-conformal predictors", Annals of Mathematics and Artificial Intelligence 2015.
    """

    name = "patch-knn"
    title = "patch nearest neighbours with a coreset"
    citation = "Cohen & Hoshen 2020 (SPADE); Roth et al. 2022 (PatchCore); Sener & Savarese 2018 (coreset)"
    feature_kind = "patches"
    keeps_training_features = False
    has_neighbours = True
    evidence_title = "Reference with the patch nearest to the worst spot (nearest-patch distance)"

    def __init__(self, coreset: float = 0.1, seed: int = SEED, folds: int = N_FOLDS, max_patches: int = MAX_PATCHES):
        self.coreset = coreset
        self.seed = seed
        self.folds = folds
        self.max_patches = max_patches

    def _check_params(self) -> None:
        if isinstance(self.coreset, bool) or not isinstance(self.coreset, (int, float)) or not 0.0 < self.coreset <= 1.0:
            raise OddlingError(f"coreset must be in (0, 1], got: {self.coreset!r}")
        if isinstance(self.seed, bool) or not isinstance(self.seed, int):
            raise OddlingError(f"seed must be an integer, got: {self.seed!r}")
        if isinstance(self.folds, bool) or not isinstance(self.folds, int) or self.folds < 2:
            raise OddlingError(f"folds must be an integer >= 2, got: {self.folds!r}")
        if isinstance(self.max_patches, bool) or not isinstance(self.max_patches, int) or self.max_patches < self.folds:
            raise OddlingError(f"max_patches must be an integer >= folds ({self.folds}), got: {self.max_patches!r}")

    def fit(self, features: np.ndarray, groups: np.ndarray | None = None) -> "PatchKNNDetector":
        self._check_params()
        features = check_features(features, "patches")
        groups = distinct_groups(groups, len(features))
        folds = group_folds(groups, self.folds, self.seed)   # copies of a file in one fold
        bank = fit_fold_bank(features, folds, self.folds, self.coreset, self.seed, self.max_patches)
        self.patches_, self.sources_, self.fold_starts_ = bank.patches, bank.sources, bank.fold_starts
        self.calibration_scores_ = bank.calibration_scores
        self.n_patches_ = int(bank.n_patches)
        self.grid_ = int(round(np.sqrt(features.shape[1])))
        self.calibration_method_ = cross_conformal_method(self.folds, len(self.calibration_scores_), len(features))
        return self

    def _patch_folds(self) -> np.ndarray:
        return np.repeat(np.arange(len(self.fold_starts_) - 1), np.diff(self.fold_starts_))

    def anomaly_score(self, features: np.ndarray, groups: np.ndarray | None = None):
        check_fitted(self, "patches_")
        features = check_features(features, "patches")
        if features.shape[2] != self.patches_.shape[1]:
            raise OddlingError(f"patch features have {features.shape[2]} channels; the detector was fitted on "
                               f"{self.patches_.shape[1]}")
        index = PatchIndex(self.patches_)
        if self.fold_starts_ is None:
            ps = score_patches(index, self.sources_, features)
        else:
            ps = fold_scores(index, self.sources_, self._patch_folds(), len(self.fold_starts_) - 1, features)
        return Scores(ps.scores, ps.worst_source[:, None], ps.scores[:, None], ps.maps)

    def state(self) -> tuple[dict, dict[str, np.ndarray]]:
        check_fitted(self, "patches_")
        state = {"n_patches": self.n_patches_, "coreset_size": int(len(self.patches_)),
                 "patch_dim": int(self.patches_.shape[1]), "grid": self.grid_,
                 "size_mb": round(self.patches_.nbytes / 2**20, 3),
                 "calibration_method": self.calibration_method_}
        arrays = {"patches": self.patches_, "sources": self.sources_}
        if self.fold_starts_ is None:
            arrays["calibration_rows"] = self.calibration_rows_
        else:
            arrays["fold_starts"] = self.fold_starts_
        return state, arrays

    def load_state(self, state: dict, arrays: dict[str, np.ndarray]) -> "PatchKNNDetector":
        self._check_params()
        patches, sources = arrays.get("patches"), arrays.get("sources")
        if patches is None or sources is None or patches.ndim != 2 or len(patches) == 0:
            raise OddlingError("patch detector state needs a non-empty 2-D `patches` array and `sources`")
        if sources.shape != (len(patches),) or not np.issubdtype(sources.dtype, np.integer):
            raise OddlingError(f"patch detector `sources` must be {len(patches)} integers, got {sources.shape} {sources.dtype}")
        if not np.isfinite(patches).all():
            raise OddlingError("patch detector `patches` hold NaN or infinite values")
        self.patches_ = np.ascontiguousarray(patches, dtype=np.float32)
        self.sources_ = sources.astype(np.int64)
        self.fold_starts_ = self._check_fold_starts(arrays.get("fold_starts"), len(patches))
        if self.fold_starts_ is None:     # a bank written with split calibration
            self.calibration_rows_ = np.asarray(arrays.get("calibration_rows", np.zeros(0, np.int64)), dtype=np.int64)
        try:
            self.n_patches_ = int(state["n_patches"])
            self.grid_ = int(state["grid"])
        except (KeyError, TypeError, ValueError) as exc:
            raise OddlingError(f"patch detector state lacks a valid {exc}") from exc
        default = SPLIT_CALIBRATION if self.fold_starts_ is None else cross_conformal_method(len(self.fold_starts_) - 1)
        self.calibration_method_ = str(state.get("calibration_method", default))
        return self

    @staticmethod
    def _check_fold_starts(starts, n_patches: int) -> np.ndarray | None:
        if starts is None:
            return None
        starts = np.asarray(starts)
        if (starts.ndim != 1 or len(starts) < 3 or not np.issubdtype(starts.dtype, np.integer) or starts[0] != 0
                or starts[-1] != n_patches or np.any(np.diff(starts) <= 0)):
            raise OddlingError(f"patch detector `fold_starts` must rise from 0 to {n_patches} (one step per fold, "
                               "at least 2 folds)")
        return starts.astype(np.int64)

    def describe_score(self) -> str:
        if getattr(self, "fold_starts_", None) is None and hasattr(self, "patches_"):
            return ("largest distance (Euclidean, in feature units) from any location of the image to its nearest "
                    "reference patch; the map shows it per location")
        return ("largest distance (Euclidean, in feature units) from any location of the image to its nearest "
                "reference patch, averaged over the fold models (each the coreset of all references but one fold); "
                "the map shows the distance per location")


def cross_conformal_method(n_folds: int, n_calibration: int | None = None, n: int | None = None) -> str:
    who = ("each reference" if n_calibration is None or n_calibration == n else
           f"a seeded sample of {n_calibration} of the {n} references, each")
    return (f"{n_folds}-fold cross-conformal: {who} scored against the coreset of the other folds (copies "
            f"of a file kept in one fold); a new image's score is the mean over those {n_folds} fold models")


SPLIT_CALIBRATION = ("split conformal: a seeded share of the references held out and scored against the coreset "
                     "of the others (leave-one-out would need one coreset per reference)")
