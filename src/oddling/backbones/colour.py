"""Local colour statistics: the `colour:GRID` representation. No network.

The image is cut into GRID x GRID cells; each cell gives the mean and the spread (standard
deviation) of its pixels in CIELAB (L*, a*, b*: lightness and two opponent colour axes, in which
equal distances look about equally different). Pooled network embeddings are built to ignore
colour casts; these statistics are built to see them: a stain, a cast or a glare spot moves a
cell's a*, b* or L*, wherever it sits in the frame.

sRGB to CIELAB as the standards define it: IEC 61966-2-1 (sRGB transfer curve, D65 primaries)
and CIE 15 (L*a*b* from XYZ, D65 white). The tests compare it with scikit-image's `rgb2lab`.
"""
from __future__ import annotations

import numpy as np

GRIDS = range(2, 17)
CELL_PIXELS = 8                 # each cell is CELL_PIXELS x CELL_PIXELS pixels of the resized image
# sRGB (linear) -> XYZ, D65 (IEC 61966-2-1), and the D65 white point (CIE 15, 2-degree observer)
_RGB_TO_XYZ = np.array([[0.412453, 0.357580, 0.180423],
                        [0.212671, 0.715160, 0.072169],
                        [0.019334, 0.119193, 0.950227]])
_WHITE = np.array([0.95047, 1.0, 1.08883])
# Fixed scales so the statistics are of order one: L* spans 0..100 (centred at 50); a* and b* of
# everyday colours stay within about +-50.
_CENTRE = np.array([50.0, 0.0, 0.0])
_SCALE = 50.0


def rgb_to_lab(rgb: np.ndarray) -> np.ndarray:
    """(..., 3) sRGB in 0..255 -> (..., 3) CIELAB (L* 0..100, a*, b*), float64."""
    c = np.asarray(rgb, dtype=np.float64) / 255.0
    linear = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    xyz = linear @ _RGB_TO_XYZ.T / _WHITE
    delta = 6.0 / 29.0
    f = np.where(xyz > delta ** 3, np.cbrt(xyz), xyz / (3 * delta ** 2) + 4.0 / 29.0)
    lightness = 116.0 * f[..., 1] - 16.0
    a = 500.0 * (f[..., 0] - f[..., 1])
    b = 200.0 * (f[..., 1] - f[..., 2])
    return np.stack([lightness, a, b], axis=-1)


def colour_features(batch: np.ndarray, grid: int) -> np.ndarray:
    """(N, 3, S, S) RGB 0..255, S = grid * CELL_PIXELS -> (N, 6 * grid * grid) float32: per cell the
    mean and standard deviation of L*, a*, b*, centred and scaled to about unit size, then the
    whole vector L2-normalised (as every vector representation, for the cosine detectors)."""
    x = np.asarray(batch, dtype=np.float64)
    n, _, side, _ = x.shape
    cell = side // grid
    lab = rgb_to_lab(x.transpose(0, 2, 3, 1))[:, :grid * cell, :grid * cell]
    cells = lab.reshape(n, grid, cell, grid, cell, 3)
    mean = (cells.mean(axis=(2, 4)) - _CENTRE) / _SCALE
    spread = cells.std(axis=(2, 4)) / _SCALE
    flat = np.concatenate([mean, spread], axis=-1).reshape(n, -1)
    norms = np.linalg.norm(flat, axis=1, keepdims=True)
    return (flat / np.maximum(norms, 1e-12)).astype(np.float32)
