"""Shared fixtures: outside data written as image files (scikit-learn's digits, scikit-image's samples)."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from PIL import Image

DIGIT_BANK = 0          # the "normal" digit
N_BANK = 100            # normal images in the bank
N_HELD_OUT = 50         # normal images held out for scoring
N_PER_OTHER_DIGIT = 8   # anomalies per other digit


def write_digit(array8x8: np.ndarray, path: Path) -> None:
    """UCI digits are 8x8 with values 0..16; write them as 64x64 grey PNGs, ink dark on white."""
    pixels = (255 - array8x8 * (255 / 16)).clip(0, 255).astype(np.uint8)
    Image.fromarray(pixels, mode="L").resize((64, 64), Image.Resampling.NEAREST).save(path)


@pytest.fixture(scope="session", autouse=True)
def private_cache(tmp_path_factory):
    """Tests never touch the user's cache folder: exports and pins go to a temporary one."""
    import os

    folder = tmp_path_factory.mktemp("cache")
    old = os.environ.get("ODDLING_CACHE_DIR")
    os.environ["ODDLING_CACHE_DIR"] = str(folder)
    yield folder
    if old is None:
        os.environ.pop("ODDLING_CACHE_DIR")
    else:
        os.environ["ODDLING_CACHE_DIR"] = old


@pytest.fixture(scope="session")
def digits_folders(tmp_path_factory) -> dict:
    """scikit-learn's bundled UCI handwritten digits as PNG folders: reference/, incoming/ and test/<label>/."""
    from sklearn.datasets import load_digits

    digits = load_digits()
    root = tmp_path_factory.mktemp("digits")
    # Shuffled (seeded) before the split: the UCI digits come in blocks by writer, so a plain
    # first-100 / next-50 split would make bank and held-out zeros differ in who wrote them.
    normal = np.random.default_rng(0).permutation(np.flatnonzero(digits.target == DIGIT_BANK))
    folders = {name: root / name for name in ("reference", "incoming")}
    for folder in folders.values():
        folder.mkdir()
    truth = {}
    for i in normal[:N_BANK]:
        write_digit(digits.images[i], folders["reference"] / f"d{i:04d}.png")
    for i in normal[N_BANK:N_BANK + N_HELD_OUT]:
        write_digit(digits.images[i], folders["incoming"] / f"d{i:04d}.png")
        truth[f"d{i:04d}.png"] = 0
    test = root / "test"
    (test / "normal").mkdir(parents=True)
    for i in normal[N_BANK:N_BANK + N_HELD_OUT]:
        write_digit(digits.images[i], test / "normal" / f"d{i:04d}.png")
    for digit in range(10):
        if digit == DIGIT_BANK:
            continue
        (test / f"digit{digit}").mkdir()
        for i in np.flatnonzero(digits.target == digit)[:N_PER_OTHER_DIGIT]:
            write_digit(digits.images[i], folders["incoming"] / f"d{i:04d}.png")
            write_digit(digits.images[i], test / f"digit{digit}" / f"d{i:04d}.png")
            truth[f"d{i:04d}.png"] = 1
    return {"root": root, "reference": folders["reference"], "incoming": folders["incoming"],
            "test": test, "truth": truth}


@pytest.fixture(scope="session")
def digits_bank(digits_folders, tmp_path_factory):
    import oddling

    path = tmp_path_factory.mktemp("banks") / "digits.bank"
    return oddling.fit(digits_folders["reference"], path, k=5,
                       options=oddling.RunOptions(progress=False))


@pytest.fixture(scope="session")
def embedded_backbone():
    from oddling.backbones import load_backbone

    return load_backbone("efficientnet-lite0")
