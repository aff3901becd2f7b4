"""Anomaly maps drawn for people: a patch detector's grid of nearest-patch distances upsampled to the
image, smoothed, and blended over it in colour (the review page, `ScoreResult.write_maps`)."""
from __future__ import annotations

import numpy as np

MAP_SIGMA = 4.0             # pixels of the network input (PatchCore smooths at this resolution too)


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


def overlay(image, heat: np.ndarray, vmax: float | None = None):
    """The image with the anomaly map blended over it (jet colours from 0 to vmax, alpha 0.5)."""
    from matplotlib import colormaps
    from PIL import Image

    top = float(vmax) if vmax else (float(heat.max()) or 1.0)
    colours = colormaps["jet"](np.clip(heat / top, 0.0, 1.0))[..., :3]
    base = np.asarray(image.convert("RGB"), dtype=np.float32) / 255.0
    blended = (0.5 * base + 0.5 * colours) * 255.0
    return Image.fromarray(blended.clip(0, 255).astype(np.uint8))
