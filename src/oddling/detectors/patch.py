"""Local-defect mode: patch features from the backbone's middle stages, a coreset memory bank,
nearest-patch distances as an anomaly map, and the map's maximum as the image score.

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

from oddling.data.preprocess import Preprocessing

# torch is imported inside the functions that run the network or its tensor ops, so loading a
# patch bank (`bank info`, `drift --history`) does not import it.

MODE = "local"
# Ends of the 24-channel (stride 4, block index 2) and 40-channel (stride 8, block 4) stages of
# EfficientNet-Lite0, on the stride-8 grid. Measured on the brick scenario of tests/test_local.py
# (full bank, image AUROC over 3 seeds): 24+40 0.98-1.00, 40 alone 0.95-0.99, 40+80 0.90-0.93,
# 80+112 at stride 16 0.74-0.79. Small scratches live in the early, fine-grained stages.
LAYERS = (2, 4)
STRIDE = 8
PROJECTION_DIM = 128
SEED = 0
MAP_SIGMA = 4.0             # pixels of the network input (PatchCore smooths at this resolution too)
CALIBRATION_SHARE = 0.2
MIN_CALIBRATION = 10


def local_preprocessing(prep: Preprocessing) -> Preprocessing:
    """Resize the shorter side straight to the crop size: the whole centre square is analysed,
    so a defect near the border is not cropped away as the global mode's 256 -> 224 crop would."""
    return Preprocessing(prep.crop, prep.crop, prep.interpolation, prep.mean, prep.std)


def grid_size(crop: int) -> int:
    return crop // STRIDE


def patch_features(network, batch: np.ndarray, stages: tuple[str, ...] = ("stage2", "stage3")) -> np.ndarray:
    """(N, 3, S, S) preprocessed -> (N, G*G, C) float32 patch features, G = S/8, from a PyTorch
    network: `network.forward_intermediates` gives the named stages' outputs (the default: the
    ends of the 24- and 40-channel stages, the same outputs as block indices LAYERS of Lite0),
    `patch_grid` makes them patch features. The export runtimes give `patch_grid` the same
    stage outputs (`Backbone.intermediates`)."""
    import torch

    with torch.inference_mode():
        x = torch.from_numpy(np.ascontiguousarray(batch, dtype=np.float32)).contiguous(memory_format=torch.channels_last)
        maps = [np.ascontiguousarray(y.float().numpy()) for y in network.forward_intermediates(x, stages)]
    return patch_grid(maps, grid_size(batch.shape[-1]))


def patch_grid(maps: list[np.ndarray], grid: int) -> np.ndarray:
    """Stage outputs [(N, C_i, H_i, W_i), ...] -> (N, grid*grid, sum C_i) float32 patch features:
    each averaged over its 3x3 neighbourhood (local context, as in PatchCore), resized to the
    common grid and the channels concatenated in the order given. NumPy, so the export runtimes
    need no torch; the same operations as torch's `avg_pool2d(y, 3, 1, 1, count_include_pad=False)`
    and `interpolate(..., mode="bilinear", align_corners=False)`, within float32 rounding."""
    outputs = []
    for y in maps:
        y = _mean_3x3(np.asarray(y, dtype=np.float32))
        if y.shape[-2:] != (grid, grid):
            y = _bilinear_matrix(y.shape[-2], grid) @ y @ _bilinear_matrix(y.shape[-1], grid).T
        outputs.append(y)
    feats = np.concatenate(outputs, axis=1).transpose(0, 2, 3, 1)
    return np.ascontiguousarray(feats.reshape(len(feats), grid * grid, -1), dtype=np.float32)


def _mean_3x3(y: np.ndarray) -> np.ndarray:
    """Mean over each pixel's 3x3 neighbourhood of (..., H, W), counting only pixels inside the map."""
    rows = y.copy()
    rows[..., 1:, :] += y[..., :-1, :]
    rows[..., :-1, :] += y[..., 1:, :]
    out = rows.copy()
    out[..., :, 1:] += rows[..., :, :-1]
    out[..., :, :-1] += rows[..., :, 1:]
    return out / np.outer(_neighbours(y.shape[-2]), _neighbours(y.shape[-1]))


def _neighbours(n: int) -> np.ndarray:
    count = np.full(n, 3.0, np.float32)
    count[0] -= 1    # the first and last pixels have one neighbour less (a side of 1 pixel: only itself)
    count[-1] -= 1
    return count


def _bilinear_matrix(n_in: int, n_out: int) -> np.ndarray:
    """(n_out, n_in) weights of bilinear resizing along one axis with half-pixel centres
    (align_corners=False): source = (i + 0.5) * n_in / n_out - 0.5, clamped at 0, rounded to
    float32 as torch's CPU kernel computes it (so the weights are torch's to the bit, checked for
    1..129 -> 7..56 pixels; computed in float64 they differ by up to 1e-5)."""
    scale = np.float64(np.float32(n_in) / np.float32(n_out))
    # One rounding to float32 after the multiply-subtract, as a fused multiply-add gives.
    source = np.maximum(scale * (np.arange(n_out) + 0.5) - 0.5, 0.0).astype(np.float32)
    low = np.minimum(source.astype(np.int64), n_in - 1)
    high = np.minimum(low + 1, n_in - 1)
    frac = source - low.astype(np.float32)
    weights = np.zeros((n_out, n_in), np.float32)
    np.add.at(weights, (np.arange(n_out), low), 1.0 - frac)
    np.add.at(weights, (np.arange(n_out), high), frac)
    return weights


def random_projection(dim: int, out_dim: int = PROJECTION_DIM, seed: int = SEED) -> np.ndarray:
    """Gaussian random projection (Johnson-Lindenstrauss): distances kept up to a small factor."""
    rng = np.random.default_rng(seed)
    return (rng.standard_normal((dim, out_dim)) / np.sqrt(out_dim)).astype(np.float32)


def greedy_k_center(points: np.ndarray, n_centers: int, first: int = 0) -> np.ndarray:
    """Indices of `n_centers` points chosen greedily: each next centre is the point farthest from
    the centres so far. Its covering radius is at most twice the optimum (Gonzalez 1985)."""
    import torch

    n = len(points)
    if not 1 <= n_centers <= n:
        raise ValueError(f"n_centers must be in [1, {n}], got: {n_centers}")
    x = torch.from_numpy(np.ascontiguousarray(points, dtype=np.float32))
    sq = (x * x).sum(1)
    chosen = np.empty(n_centers, dtype=np.int64)
    chosen[0] = first
    nearest = torch.full((n,), float("inf"))
    for j in range(1, n_centers + 1):
        c = x[chosen[j - 1]]
        d = sq - 2.0 * torch.mv(x, c) + sq[chosen[j - 1]]
        torch.minimum(nearest, d, out=nearest)
        if j < n_centers:
            chosen[j] = int(torch.argmax(nearest))
    return chosen


def coreset(features: np.ndarray, fraction: float, seed: int = SEED) -> np.ndarray:
    """Rows of `features` kept by greedy k-center, on a random projection of them to
    PROJECTION_DIM dimensions when they have more (as PatchCore does to make the search cheap)."""
    n_centers = max(1, int(round(fraction * len(features))))
    if n_centers >= len(features):
        return np.arange(len(features))
    if features.shape[1] > PROJECTION_DIM:   # a projection to as many dimensions would save nothing
        features = features @ random_projection(features.shape[1], PROJECTION_DIM, seed)
    return np.sort(greedy_k_center(features, n_centers))


class PatchIndex:
    """Exact nearest-patch search (Euclidean, on raw features) with faiss."""

    def __init__(self, patches: np.ndarray):
        patches = np.ascontiguousarray(patches, dtype=np.float32)
        self._index = faiss.IndexFlatL2(patches.shape[1])
        self._index.add(patches)

    def nearest(self, queries: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(distance, bank row) of the nearest bank patch for each query row."""
        sq, idx = self._index.search(np.ascontiguousarray(queries, dtype=np.float32), 1)
        return np.sqrt(np.maximum(sq[:, 0], 0.0)).astype(np.float64), idx[:, 0]


@dataclass
class PatchScores:
    scores: np.ndarray     # (n,) max nearest-patch distance over locations
    maps: np.ndarray       # (n, G, G) nearest-patch distance per location
    worst_source: np.ndarray  # (n,) reference row of the patch nearest to the worst location


def score_patches(index: PatchIndex, patch_sources: np.ndarray, features: np.ndarray) -> PatchScores:
    """features (n, G*G, C) -> image scores, grid maps and where the worst location's match came from."""
    n, locations, dim = features.shape
    grid = int(round(np.sqrt(locations)))
    if n == 0:
        return PatchScores(np.zeros(0), np.zeros((0, grid, grid)), np.zeros(0, np.int64))
    dist, rows = index.nearest(features.reshape(-1, dim))
    dist = dist.reshape(n, locations)
    worst = dist.argmax(axis=1)
    sources = np.asarray(patch_sources)[rows.reshape(n, locations)[np.arange(n), worst]]
    return PatchScores(dist.max(axis=1), dist.reshape(n, grid, grid), sources)


def upsample_map(grid_map: np.ndarray, size: tuple[int, int], crop: int = 224, sigma: float = MAP_SIGMA) -> np.ndarray:
    """Grid map -> (height, width) map of the analysed centre square at image resolution.

    Bilinear upsampling to the network input, Gaussian smoothing there (sigma in input pixels),
    then resizing to the square's side in the image; outside that square (non-square images)
    nothing was analysed and the map is 0.
    """
    import torch
    import torch.nn.functional as F
    from scipy.ndimage import gaussian_filter

    width, height = size
    t = torch.from_numpy(np.asarray(grid_map, dtype=np.float32))[None, None]
    full = F.interpolate(t, size=(crop, crop), mode="bilinear", align_corners=False)[0, 0].numpy()
    full = gaussian_filter(full, sigma=sigma, mode="nearest")
    side = min(width, height)
    square = F.interpolate(torch.from_numpy(full)[None, None], size=(side, side), mode="bilinear",
                           align_corners=False)[0, 0].numpy()
    out = np.zeros((height, width), dtype=np.float32)
    top, left = int(round((height - side) / 2.0)), int(round((width - side) / 2.0))
    out[top:top + side, left:left + side] = square
    return out


def split_calibration(hashes: list[str], seed: int = SEED) -> tuple[np.ndarray, np.ndarray]:
    """(bank rows, calibration rows): a seeded share of the distinct images (all copies of one
    file on the same side) held out to calibrate, at least MIN_CALIBRATION of them, and never
    more than half."""
    distinct = sorted(set(hashes))
    n_cal = min(max(MIN_CALIBRATION, int(round(CALIBRATION_SHARE * len(distinct)))), len(distinct) // 2)
    held = set(np.random.default_rng(seed).permutation(len(distinct))[:n_cal].tolist())
    held_hashes = {distinct[i] for i in held}
    is_cal = np.array([h in held_hashes for h in hashes], dtype=bool)
    return np.flatnonzero(~is_cal), np.flatnonzero(is_cal)


def overlay(image, heat: np.ndarray, vmax: float | None = None):
    """The image with the anomaly map blended over it (jet colours from 0 to vmax, alpha 0.5)."""
    from matplotlib import colormaps
    from PIL import Image

    top = float(vmax) if vmax else (float(heat.max()) or 1.0)
    colours = colormaps["jet"](np.clip(heat / top, 0.0, 1.0))[..., :3]
    base = np.asarray(image.convert("RGB"), dtype=np.float32) / 255.0
    blended = (0.5 * base + 0.5 * colours) * 255.0
    return Image.fromarray(blended.clip(0, 255).astype(np.uint8))


@dataclass
class PatchBank:
    patches: np.ndarray            # (m, c) coreset of the bank images' patches
    sources: np.ndarray            # (m,) reference row each patch came from
    calibration_rows: np.ndarray   # references held out to calibrate
    calibration_scores: np.ndarray
    n_patches: int                 # patches before the coreset


def fit_patch_bank(features: np.ndarray, hashes: list[str], fraction: float, seed: int = SEED) -> PatchBank:
    """features (n, G*G, c) of the references -> coreset memory bank and split calibration scores.

    Split calibration, not leave-one-out: leaving one image out would mean one coreset per
    reference. The held-out images are scored against the coreset of the others exactly as new
    images will be, so their scores are exchangeable with new normal images' scores.
    """
    bank_rows, cal_rows = split_calibration(hashes, seed)
    patches = features[bank_rows].reshape(-1, features.shape[-1])
    sources = np.repeat(bank_rows, features.shape[1])
    keep = coreset(patches, fraction, seed)
    patches, sources = np.ascontiguousarray(patches[keep]), sources[keep]
    cal = score_patches(PatchIndex(patches), sources, features[cal_rows])
    return PatchBank(patches, sources.astype(np.int64), cal_rows, cal.scores, len(bank_rows) * features.shape[1])


from oddling.detectors.base import Detector, Scores, check_features, distinct_groups  # noqa: E402
from oddling.errors import OddlingError  # noqa: E402


class PatchKNNDetector(Detector):
    """Nearest-patch distance over a coreset memory bank; the image score is the worst location.

    Parameters
    ----------
    coreset : float, default 0.1
        Share of the reference patches kept (greedy k-center, Sener & Savarese 2018).
    seed : int, default 0
        Seeds the calibration split and the coreset's random projection.

    Attributes
    ----------
    patches_ : ndarray (m, c) float32, the coreset of reference patches.
    sources_ : ndarray (m,) int64, the reference row each kept patch came from.
    calibration_scores_ : scores of the held-out references (split conformal).
    calibration_rows_ : ndarray, reference rows held out to calibrate.
    n_patches_ : int, patches before the coreset.

    References
    ----------
    Cohen & Hoshen, "Sub-image anomaly detection with deep pyramid correspondences", 2020;
    Roth et al., "Towards total recall in industrial anomaly detection", CVPR 2022.
    """

    name = "patch-knn"
    title = "patch nearest neighbours with a coreset"
    citation = "Cohen & Hoshen 2020 (SPADE); Roth et al. 2022 (PatchCore); Sener & Savarese 2018 (coreset)"
    feature_kind = "patches"
    keeps_training_features = False
    has_neighbours = True
    evidence_title = "Reference with the patch nearest to the worst spot (nearest-patch distance)"

    def __init__(self, coreset: float = 0.1, seed: int = SEED):
        self.coreset = coreset
        self.seed = seed

    def get_params(self) -> dict:
        return {"coreset": self.coreset, "seed": self.seed}

    def _check_params(self) -> None:
        if isinstance(self.coreset, bool) or not isinstance(self.coreset, (int, float)) or not 0.0 < self.coreset <= 1.0:
            raise OddlingError(f"coreset must be in (0, 1], got: {self.coreset!r}")
        if isinstance(self.seed, bool) or not isinstance(self.seed, int):
            raise OddlingError(f"seed must be an integer, got: {self.seed!r}")

    def fit(self, features: np.ndarray, groups: np.ndarray | None = None) -> "PatchKNNDetector":
        from oddling.detectors.base import check_features, distinct_groups
        self._check_params()
        features = check_features(features, "patches")
        groups = distinct_groups(groups, len(features))
        distinct = len(set(groups.tolist()))
        if distinct < 2 * MIN_CALIBRATION:
            raise OddlingError(f"the patch detector needs at least {2 * MIN_CALIBRATION} distinct references "
                               f"(half of them at most are held out to calibrate), got {distinct}")
        bank = fit_patch_bank(features, groups.tolist(), self.coreset, self.seed)
        self.patches_, self.sources_ = bank.patches, bank.sources
        self.calibration_scores_ = bank.calibration_scores
        self.calibration_rows_ = np.asarray(bank.calibration_rows, dtype=np.int64)
        self.n_patches_ = int(bank.n_patches)
        self.grid_ = int(round(np.sqrt(features.shape[1])))
        self.calibration_method_ = SPLIT_CALIBRATION
        return self

    def anomaly_score(self, features: np.ndarray):
        features = check_features(features, "patches")
        ps = score_patches(PatchIndex(self.patches_), self.sources_, features)
        return Scores(ps.scores, ps.worst_source[:, None], ps.scores[:, None], ps.maps)

    def state(self) -> tuple[dict, dict[str, np.ndarray]]:
        return ({"n_patches": self.n_patches_, "coreset_size": int(len(self.patches_)),
                 "patch_dim": int(self.patches_.shape[1]), "grid": self.grid_,
                 "size_mb": round(self.patches_.nbytes / 2**20, 3),
                 "calibration_method": self.calibration_method_},
                {"patches": self.patches_, "sources": self.sources_, "calibration_rows": self.calibration_rows_})

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
        self.calibration_rows_ = np.asarray(arrays.get("calibration_rows", np.zeros(0, np.int64)), dtype=np.int64)
        try:
            self.n_patches_ = int(state["n_patches"])
            self.grid_ = int(state["grid"])
        except (KeyError, TypeError, ValueError) as exc:
            raise OddlingError(f"patch detector state lacks a valid {exc}") from exc
        self.calibration_method_ = str(state.get("calibration_method", SPLIT_CALIBRATION))
        return self

    def describe_score(self) -> str:
        return ("largest distance (Euclidean, in feature units) from any location of the image to its nearest "
                "reference patch; the map shows it per location")


SPLIT_CALIBRATION = ("split conformal: a seeded share of the references held out and scored against the coreset "
                     "of the others (leave-one-out would need one coreset per reference)")
