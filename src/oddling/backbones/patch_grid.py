"""Patch grids, the `patches` representation: a backbone's middle stages as one feature vector per
location of a grid, averaged over each location's neighbourhood (local context, as in PatchCore).
NumPy only, so the export runtimes need no torch; `patch_features` runs a PyTorch network itself."""
from __future__ import annotations

import numpy as np

from oddling.data.preprocess import Preprocessing

# Ends of the 24-channel (stride 4, block index 2) and 40-channel (stride 8, block 4) stages of
# EfficientNet-Lite0, on the stride-8 grid. Measured on the brick scenario of tests/test_local.py
# (full bank, image AUROC over 3 seeds): 24+40 0.98-1.00, 40 alone 0.95-0.99, 40+80 0.90-0.93,
# 80+112 at stride 16 0.74-0.79. Small scratches live in the early, fine-grained stages.
LAYERS = (2, 4)
STRIDE = 8


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
