"""Labelled cases for `oddling tune`, built from open data and from an invented texture.

- digits: scikit-learn's bundled UCI handwritten digits, zeros normal, the other digits anomalous.
- brick: random crops of scikit-image's bundled `brick` photograph; small dark scratches and
  brown stains drawn on half of the test crops.
- fabric: an invented plain-weave fabric (thread period 8 px) with broken threads, holes and
  stains: a texture of our own, generated here.
Each builder writes reference/ and test/{normal,defect}/ under `root` and returns the two folders.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image

from conftest import write_digit

SIDE = 128


def _folders(root: Path) -> dict:
    for folder in ("reference", "test/normal", "test/defect"):
        (root / folder).mkdir(parents=True, exist_ok=True)
    return {"reference": root / "reference", "test": root / "test"}


def _save(array, path):
    Image.fromarray(np.asarray(array).clip(0, 255).astype(np.uint8)).save(path)


def digits_case(root: Path, n_reference: int = 100, per_other_digit: int = 6) -> dict:
    from sklearn.datasets import load_digits

    digits = load_digits()
    out = _folders(root)
    zeros = np.random.default_rng(0).permutation(np.flatnonzero(digits.target == 0))
    for i in zeros[:n_reference]:
        write_digit(digits.images[i], out["reference"] / f"d{i:04d}.png")
    for i in zeros[n_reference:]:
        write_digit(digits.images[i], root / "test" / "normal" / f"d{i:04d}.png")
    for digit in range(1, 10):
        for i in np.flatnonzero(digits.target == digit)[:per_other_digit]:
            write_digit(digits.images[i], root / "test" / "defect" / f"d{i:04d}.png")
    return out


def _small_defect(image: np.ndarray, rng) -> np.ndarray:
    """A dark scratch (2 px wide, 12-24 px long) or a brown stain (radius 4-7 px, half transparent)."""
    from skimage.draw import disk, line

    mask = np.zeros(image.shape[:2], bool)
    side = image.shape[0]
    r0, c0 = rng.integers(20, side - 20, 2)
    out = image.copy()
    if rng.random() < 0.5:
        angle, length = rng.uniform(0, np.pi), rng.integers(12, 25)
        r1 = int(np.clip(r0 + length * np.sin(angle), 0, side - 3))
        c1 = int(np.clip(c0 + length * np.cos(angle), 0, side - 3))
        for d in range(2):
            rr, cc = line(r0 + d, c0, r1 + d, c1)
            mask[rr, cc] = True
        out[mask] *= 0.25
    else:
        rr, cc = disk((r0, c0), rng.integers(4, 8), shape=mask.shape)
        mask[rr, cc] = True
        out[mask] = 0.5 * out[mask] + 0.5 * np.array([110.0, 70.0, 30.0])
    return out


def brick_case(root: Path, n_reference: int = 60, n_test: int = 24, seed: int = 3) -> dict:
    import skimage.data

    brick = skimage.data.brick().astype(np.float32)
    rng = np.random.default_rng(seed)
    out = _folders(root)

    def crop():
        y, x = rng.integers(0, brick.shape[0] - SIDE, 2)
        return np.stack([brick[y:y + SIDE, x:x + SIDE]] * 3, axis=-1)

    for i in range(n_reference):
        _save(crop(), out["reference"] / f"r{i:03d}.png")
    for i in range(n_test):
        _save(crop(), root / "test" / "normal" / f"n{i:03d}.png")
        _save(_small_defect(crop(), rng), root / "test" / "defect" / f"d{i:03d}.png")
    return out


def fabric(rng, side: int = SIDE, period: float = 8.0) -> np.ndarray:
    """A plain weave: warp (vertical) and weft (horizontal) threads crossing over and under in a
    checkerboard, with a random phase, slight thread-width wobble, lighting and sensor noise."""
    y, x = np.mgrid[0:side, 0:side].astype(np.float32)
    u = x / period + rng.uniform(0, 1)
    v = y / period + rng.uniform(0, 1)
    wobble = 0.08 * np.sin(2 * np.pi * (v / 7.0 + rng.uniform(0, 1)))
    warp = np.cos(np.pi * (u - np.round(u) + wobble)) ** 2       # bright at a warp thread's centre
    weft = np.cos(np.pi * (v - np.round(v))) ** 2
    warp_on_top = (np.round(u) + np.round(v)) % 2 == 0
    shade = np.where(warp_on_top, 0.55 + 0.45 * warp, 0.45 + 0.45 * weft)
    shade *= 1.0 + 0.05 * rng.uniform(-1, 1)
    colour = np.array([205.0, 188.0, 160.0])
    image = shade[..., None] * colour + rng.normal(0, 4.0, (side, side, 3))
    return image.astype(np.float32)


def _fabric_defect(image: np.ndarray, rng, period: float = 8.0) -> np.ndarray:
    """A broken thread (a 4-px band of one weft thread missing over 20-40 px), a hole (dark disc,
    radius 3-5 px) or a stain (a brown blob, radius 6-10 px)."""
    from skimage.draw import disk

    side = image.shape[0]
    out = image.copy()
    kind = rng.integers(0, 3)
    r0, c0 = rng.integers(16, side - 16, 2)
    if kind == 0:
        length = int(rng.integers(20, 41))
        out[r0:r0 + 4, c0:min(side, c0 + length)] *= 0.35
    elif kind == 1:
        rr, cc = disk((r0, c0), rng.integers(3, 6), shape=image.shape[:2])
        out[rr, cc] = rng.normal(25, 5, (len(rr), 3))
    else:
        y, x = np.mgrid[0:side, 0:side]
        radius = rng.uniform(6, 10)
        alpha = 0.75 * np.exp(-((y - r0) ** 2 + (x - c0) ** 2) / (2 * radius ** 2))[..., None]
        out = (1 - alpha) * out + alpha * np.array([100.0, 65.0, 25.0])
    return out


def fabric_case(root: Path, n_reference: int = 60, n_test: int = 24, seed: int = 5) -> dict:
    rng = np.random.default_rng(seed)
    out = _folders(root)
    for i in range(n_reference):
        _save(fabric(rng), out["reference"] / f"r{i:03d}.png")
    for i in range(n_test):
        _save(fabric(rng), root / "test" / "normal" / f"n{i:03d}.png")
        _save(_fabric_defect(fabric(rng), rng), root / "test" / "defect" / f"d{i:03d}.png")
    return out


CASES = {"digits": digits_case, "brick": brick_case, "fabric": fabric_case}
