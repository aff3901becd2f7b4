"""Synthetic anomalies made from normal images, for choosing a configuration before any real defect
is labelled (`oddling tune` without a labelled folder).

Each kind takes an RGB uint8 image (H, W, 3) and a seeded generator and returns the altered image
and a boolean mask of the pixels it changed (all True for the global kinds). Sizes are relative to
the image's shorter side, so the same kind means the same thing on a 64 px crop and a 4-megapixel
frame. They are not the user's defects: they stand in for the usual kinds of visual change (a
wrong patch, a scratch, a spot, a stain, a blur, a missing piece, exposure, focus, sensor noise),
so a configuration that cannot see them is unlikely to see real ones, while one that sees them
all may still miss a defect unlike any of them.

The patch cut from another place (or another normal image) and pasted follows CutPaste: Li, Sohn,
Yoon & Pfister, "CutPaste: self-supervised learning for anomaly detection and localization",
CVPR 2021 (patch area 2-15% of the image, aspect ratio 0.3-3.3, a little colour jitter).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np


@dataclass(frozen=True)
class Kind:
    name: str
    description: str      # for the leaderboard and README: what it does, sized how
    local: bool           # a local defect (a mask) or a change of the whole frame
    make: Callable


def _side(image: np.ndarray) -> int:
    return min(image.shape[:2])


def _box(rng, image: np.ndarray, area_share: tuple[float, float], aspect: tuple[float, float] = (0.3, 3.3)):
    """(top, left, height, width) of a random box of a share of the image's area and an aspect ratio."""
    h, w = image.shape[:2]
    area = rng.uniform(*area_share) * h * w
    ratio = np.exp(rng.uniform(np.log(aspect[0]), np.log(aspect[1])))
    bh = int(np.clip(round(np.sqrt(area / ratio)), 2, h - 1))
    bw = int(np.clip(round(np.sqrt(area * ratio)), 2, w - 1))
    return int(rng.integers(0, h - bh + 1)), int(rng.integers(0, w - bw + 1)), bh, bw


def _ellipse_mask(rng, image: np.ndarray, radius_share: tuple[float, float]) -> np.ndarray:
    """A random ellipse anywhere in the frame (its centre may sit near the border: edge defects are common)."""
    h, w = image.shape[:2]
    side = _side(image)
    ry, rx = (max(1.0, rng.uniform(*radius_share) * side) for _ in range(2))
    cy, cx = rng.uniform(0, h), rng.uniform(0, w)
    angle = rng.uniform(0, np.pi)
    y, x = np.mgrid[0:h, 0:w].astype(np.float32)
    dy, dx = y - cy, x - cx
    u = dx * np.cos(angle) + dy * np.sin(angle)
    v = -dx * np.sin(angle) + dy * np.cos(angle)
    mask = (u / rx) ** 2 + (v / ry) ** 2 <= 1.0
    if not mask.any():
        mask[int(min(h - 1, cy)), int(min(w - 1, cx))] = True
    return mask


def _blend(image: np.ndarray, other: np.ndarray, mask: np.ndarray, alpha) -> np.ndarray:
    out = image.astype(np.float32)
    a = np.where(mask, alpha, 0.0)[..., None] if np.ndim(alpha) == 0 else (alpha * mask)[..., None]
    out = out * (1 - a) + other.astype(np.float32) * a
    return np.clip(np.round(out), 0, 255).astype(np.uint8)


def _gaussian(image: np.ndarray, sigma: float) -> np.ndarray:
    from scipy.ndimage import gaussian_filter

    return gaussian_filter(image.astype(np.float32), sigma=(sigma, sigma, 0), mode="reflect")


def cut_paste(image: np.ndarray, rng, donor: np.ndarray | None = None):
    """A patch of 2-15% of the area (aspect 0.3-3.3) cut from another place of this image, or of a
    donor normal image, given a little colour jitter and pasted at a random place (CutPaste)."""
    source = donor if donor is not None and donor.shape == image.shape else image
    top, left, bh, bw = _box(rng, image, (0.02, 0.15))
    patch = source[top:top + bh, left:left + bw].astype(np.float32)
    patch = patch * rng.uniform(0.85, 1.15, 3) + rng.uniform(-12, 12, 3)          # colour jitter
    h, w = image.shape[:2]
    for _ in range(10):   # a place other than where it came from, where possible
        y, x = int(rng.integers(0, h - bh + 1)), int(rng.integers(0, w - bw + 1))
        if source is not image or abs(y - top) + abs(x - left) > (bh + bw) // 4:
            break
    out = image.copy()
    out[y:y + bh, x:x + bw] = np.clip(np.round(patch), 0, 255).astype(np.uint8)
    mask = np.zeros(image.shape[:2], bool)
    mask[y:y + bh, x:x + bw] = True
    return out, mask


def _segment_distance(h: int, w: int, r0, c0, r1, c1) -> np.ndarray:
    """Distance of every pixel centre to the segment (r0, c0)-(r1, c1)."""
    y, x = np.mgrid[0:h, 0:w].astype(np.float32)
    dy, dx = r1 - r0, c1 - c0
    t = np.clip(((y - r0) * dy + (x - c0) * dx) / max(dy * dy + dx * dx, 1e-9), 0.0, 1.0)
    return np.hypot(y - (r0 + t * dy), x - (c0 + t * dx))


def scratch(image: np.ndarray, rng, donor=None):
    """One to three thin lines (width about 1% of the side, at least 1 px; length 15-45% of the
    side), dark or bright, at random angles anywhere in the frame; edges anti-aliased."""
    h, w = image.shape[:2]
    side = _side(image)
    value = 0.0 if rng.random() < 0.5 else 255.0
    half = max(0.5, 0.005 * side)
    cover = np.zeros((h, w), np.float32)
    for _ in range(int(rng.integers(1, 4))):
        length, angle = rng.uniform(0.15, 0.45) * side, rng.uniform(0, np.pi)
        r0, c0 = rng.uniform(0, h), rng.uniform(0, w)
        distance = _segment_distance(h, w, r0, c0, r0 + length * np.sin(angle), c0 + length * np.cos(angle))
        cover = np.maximum(cover, np.clip(half + 0.5 - distance, 0.0, 1.0))
    out = _blend(image, np.full(image.shape, value, np.float32), np.ones((h, w), bool), cover)
    return out, cover > 0


def _disk(h: int, w: int, centre, radius: float) -> np.ndarray:
    y, x = np.mgrid[0:h, 0:w].astype(np.float32)
    return (y - centre[0]) ** 2 + (x - centre[1]) ** 2 <= radius * radius


def spots(image: np.ndarray, rng, donor=None):
    """One to four small round spots (radius 1.5-4% of the side, at least 1 px), each dark or bright."""
    h, w = image.shape[:2]
    side = _side(image)
    out = image.copy()
    mask = np.zeros((h, w), bool)
    for _ in range(int(rng.integers(1, 5))):
        spot = _disk(h, w, (rng.uniform(0, h), rng.uniform(0, w)), max(1.0, rng.uniform(0.015, 0.04) * side))
        if not spot.any():
            continue
        out[spot] = int(rng.integers(0, 40)) if rng.random() < 0.5 else int(rng.integers(215, 256))
        mask |= spot
    if not mask.any():   # every spot fell between pixel centres: put one at the centre of the frame
        mask = _disk(h, w, (h / 2, w / 2), max(1.0, 0.02 * side))
        out[mask] = 0
    return out, mask


def colour_stain(image: np.ndarray, rng, donor=None):
    """A translucent stain or colour cast: an ellipse (radii 6-18% of the side) blended 30-60% with
    one random colour, its edge softened."""
    mask = _ellipse_mask(rng, image, (0.06, 0.18))
    colour = rng.integers(0, 256, 3).astype(np.float32)
    soft = _gaussian(mask[..., None].astype(np.float32), max(1.0, 0.01 * _side(image)))[..., 0]
    alpha = rng.uniform(0.3, 0.6) * soft
    return _blend(image, np.broadcast_to(colour, image.shape), np.ones(mask.shape, bool), alpha), soft > 0.1


def local_blur(image: np.ndarray, rng, donor=None):
    """An ellipse (radii 8-20% of the side) blurred (Gaussian, sigma 1.5-3% of the side)."""
    mask = _ellipse_mask(rng, image, (0.08, 0.2))
    blurred = _gaussian(image, max(1.0, rng.uniform(0.015, 0.03) * _side(image)))
    return _blend(image, blurred, mask, 1.0), mask


def missing_region(image: np.ndarray, rng, donor=None):
    """A region (a box of 2-8% of the area) removed and filled from its surroundings: normalised
    convolution, the Gaussian-weighted mean of the pixels around it (a smooth fill, as a part that is
    missing shows the plain background behind it)."""
    top, left, bh, bw = _box(rng, image, (0.02, 0.08), (0.5, 2.0))
    mask = np.zeros(image.shape[:2], bool)
    mask[top:top + bh, left:left + bw] = True
    sigma = max(2.0, 0.5 * max(bh, bw))
    known = (~mask).astype(np.float32)[..., None]
    fill = _gaussian(image.astype(np.float32) * known, sigma) / np.maximum(_gaussian(known, sigma), 1e-3)
    out = image.copy()
    out[mask] = np.clip(np.round(fill[mask]), 0, 255).astype(np.uint8)
    return out, mask


def exposure(image: np.ndarray, rng, donor=None):
    """The whole frame darker or brighter: gain 0.55-0.75 or 1.35-1.7."""
    gain = rng.uniform(0.55, 0.75) if rng.random() < 0.5 else rng.uniform(1.35, 1.7)
    out = np.clip(np.round(image.astype(np.float32) * gain), 0, 255).astype(np.uint8)
    return out, np.ones(image.shape[:2], bool)


def defocus(image: np.ndarray, rng, donor=None):
    """The whole frame out of focus: Gaussian blur, sigma 1-2% of the side (at least 1 px)."""
    out = _gaussian(image, max(1.0, rng.uniform(0.01, 0.02) * _side(image)))
    return np.clip(np.round(out), 0, 255).astype(np.uint8), np.ones(image.shape[:2], bool)


def sensor_noise(image: np.ndarray, rng, donor=None):
    """The whole frame with Gaussian noise, standard deviation 10-20 grey levels."""
    noisy = image.astype(np.float32) + rng.normal(0, rng.uniform(10, 20), image.shape)
    return np.clip(np.round(noisy), 0, 255).astype(np.uint8), np.ones(image.shape[:2], bool)


KINDS: dict[str, Kind] = {kind.name: kind for kind in (
    Kind("cut-paste", "a patch of 2-15% of the area cut from elsewhere (or another normal image) and pasted",
         True, cut_paste),
    Kind("scratch", "one to three thin lines, about 1% of the side wide, 15-45% long, dark or bright", True, scratch),
    Kind("spots", "one to four small dark or bright spots, radius 1.5-4% of the side", True, spots),
    Kind("stain", "a translucent colour cast, an ellipse of radius 6-18% of the side", True, colour_stain),
    Kind("local-blur", "a blurred ellipse of radius 8-20% of the side", True, local_blur),
    Kind("missing", "a region of 2-8% of the area filled smoothly from its surroundings", True, missing_region),
    Kind("exposure", "the whole frame 25-45% darker or 35-70% brighter", False, exposure),
    Kind("defocus", "the whole frame blurred, sigma 1-2% of the side", False, defocus),
    Kind("noise", "the whole frame with sensor noise of 10-20 grey levels", False, sensor_noise),
)}


def make_anomaly(image: np.ndarray, kind: str, seed, donor: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(altered RGB uint8 image, mask of the changed pixels) for one kind of KINDS; `seed` is anything
    `numpy.random.default_rng` takes, so the same image, kind and seed give the same anomaly."""
    if kind not in KINDS:
        raise ValueError(f"unknown synthetic anomaly kind {kind!r}; known: {', '.join(KINDS)}")
    image = np.ascontiguousarray(image, dtype=np.uint8)
    if image.ndim != 3 or image.shape[2] != 3 or min(image.shape[:2]) < 8:
        raise ValueError(f"a synthetic anomaly needs an RGB image of at least 8 x 8 pixels, got shape {image.shape}")
    return KINDS[kind].make(image, np.random.default_rng(seed), donor)
