"""Anomaly maps drawn for people: a patch detector's grid of nearest-patch distances upsampled to the
image, smoothed, and blended over it in colour (the review page, `ScoreResult.write_maps`)."""
from __future__ import annotations

import numpy as np

MAP_SIGMA = 4.0             # pixels of the network input (PatchCore smooths at this resolution too)


def upsample_map(grid_map: np.ndarray, size: tuple[int, int], crop: int = 224, sigma: float = MAP_SIGMA,
                 frame: str = "crop") -> np.ndarray:
    """Grid map -> (height, width) map at image resolution, over what the network saw (`frame`, see
    oddling.data.preprocess): the whole image ("stretch"), the whole image inside the square
    ("pad"), or its centre square ("crop"; outside it nothing was analysed and the map is 0).

    Bilinear upsampling to the network input, Gaussian smoothing there (sigma in input pixels),
    then resizing to the image region the input showed.
    """
    import torch
    import torch.nn.functional as F
    from scipy.ndimage import gaussian_filter

    def resized(array: np.ndarray, height: int, width: int) -> np.ndarray:
        t = torch.from_numpy(np.ascontiguousarray(array, dtype=np.float32))[None, None]
        return F.interpolate(t, size=(height, width), mode="bilinear", align_corners=False)[0, 0].numpy()

    width, height = size
    full = gaussian_filter(resized(grid_map, crop, crop), sigma=sigma, mode="nearest")
    if frame == "stretch":
        return resized(full, height, width)
    if frame == "pad":
        scale = crop / max(width, height)
        inner_w, inner_h = max(1, round(width * scale)), max(1, round(height * scale))
        left, top = (crop - inner_w) // 2, (crop - inner_h) // 2
        return resized(full[top:top + inner_h, left:left + inner_w], height, width)
    side = min(width, height)
    out = np.zeros((height, width), dtype=np.float32)
    top, left = int(round((height - side) / 2.0)), int(round((width - side) / 2.0))
    out[top:top + side, left:left + side] = resized(full, side, side)
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
