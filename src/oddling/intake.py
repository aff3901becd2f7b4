"""Find input files and decode them safely to RGB; every file gets a status, none crashes the run."""
from __future__ import annotations

import hashlib
import os
import warnings
from pathlib import Path
from typing import Iterable

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

IMAGE_SUFFIXES = frozenset({".jpg", ".jpeg", ".png", ".bmp", ".tif", ".tiff", ".webp", ".gif"})
MAX_PIXELS_DEFAULT = 120_000_000   # decompression-bomb guard: ~11k x 11k, far above any camera frame
BANK_MARKER = "bank.json"          # a folder holding this file is an oddling bank, never input


class IntakeError(Exception):
    """A file that cannot be used; `status` is the short reason written into the results."""

    def __init__(self, status: str):
        super().__init__(status)
        self.status = status


def discover(root: Path, exclude: Iterable[Path] = ()) -> list[Path]:
    """Every regular, non-hidden file under `root`, sorted by relative path.

    Non-image files are included on purpose: they get a row saying why they were skipped.
    Hidden files and folders, excluded folders and bank folders are left out; symlinked
    folders are not followed (no loops).
    """
    root = Path(root)
    if not root.is_dir():
        raise IntakeError(f"{root} is not a folder")
    excluded = {Path(p).resolve() for p in exclude}
    found: list[Path] = []
    for dirpath, dirnames, filenames in os.walk(root, followlinks=False):
        here = Path(dirpath)
        keep = []
        for name in sorted(dirnames):
            sub = here / name
            if name.startswith(".") or sub.resolve() in excluded or (sub / BANK_MARKER).is_file():
                continue
            keep.append(name)
        dirnames[:] = keep
        for name in filenames:
            path = here / name
            if not name.startswith(".") and path.is_file():
                found.append(path)
    return sorted(found, key=lambda p: p.relative_to(root).as_posix())


def sha256_file(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _scale_to_uint8(values: np.ndarray) -> np.ndarray:
    """Min-max stretch to 0..255 for integer or float data of unknown range."""
    values = np.nan_to_num(values.astype(np.float64), nan=0.0, posinf=0.0, neginf=0.0)
    low, high = float(values.min()), float(values.max())
    if high <= low:
        return np.zeros(values.shape, np.uint8)
    return np.round((values - low) * (255.0 / (high - low))).astype(np.uint8)


def _white_background(image: Image.Image) -> Image.Image:
    """Composite transparency over white: a cut-out object on a page, as a viewer shows it."""
    rgba = image.convert("RGBA")
    background = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
    return Image.alpha_composite(background, rgba).convert("RGB")


def to_rgb(image: Image.Image) -> Image.Image:
    mode = image.mode
    if mode == "RGB":
        return image
    if mode in ("RGBA", "LA", "PA", "RGBa", "La") or (mode == "P" and "transparency" in image.info):
        return _white_background(image)
    if mode.startswith("I;16"):
        # 16-bit sensors fill the whole range: map 0..65535 linearly onto 0..255.
        values = np.asarray(image, dtype=np.float64)
        return Image.fromarray(np.round(values / 257.0).astype(np.uint8)).convert("RGB")
    if mode == "I":
        values = np.asarray(image, dtype=np.float64)
        top = values.max() if values.size else 0
        if values.min() >= 0 and top <= 255:       # 8-bit data stored as int32
            grey = values.astype(np.uint8)
        elif values.min() >= 0 and top <= 65535:   # 16-bit data stored as int32
            grey = np.round(values / 257.0).astype(np.uint8)
        else:
            grey = _scale_to_uint8(values)
        return Image.fromarray(grey).convert("RGB")
    if mode == "F":
        values = np.asarray(image, dtype=np.float64)
        finite = np.nan_to_num(values, nan=0.0)
        if finite.size and finite.min() >= 0.0 and finite.max() <= 1.0:   # normalised float image
            grey = np.round(finite * 255.0).astype(np.uint8)
        else:
            grey = _scale_to_uint8(values)
        return Image.fromarray(grey).convert("RGB")
    # "1", "L", "P", "CMYK", "YCbCr", "LAB", "HSV": Pillow's own conversion is the right one.
    return image.convert("RGB")


def load_rgb(path: Path, min_side: int | None = None, max_pixels: int = MAX_PIXELS_DEFAULT) -> Image.Image:
    """Decode `path` to a loaded RGB image, orientation applied; IntakeError says why not.

    With `min_side`, JPEGs decode at the smallest DCT scale that keeps both sides >= min_side
    (Pillow's draft mode): a 12-MP photo decodes about 8x faster when the network wants 256 px.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in IMAGE_SUFFIXES:
        raise IntakeError(f"skipped: not an image file type ({suffix or 'no extension'})")
    try:
        size = path.stat().st_size
    except OSError as exc:
        raise IntakeError(f"unreadable: {exc.strerror or exc}") from exc
    if size == 0:
        raise IntakeError("unreadable: empty file (0 bytes)")
    with warnings.catch_warnings():
        warnings.simplefilter("error", Image.DecompressionBombWarning)
        try:
            with Image.open(path) as image:
                w, h = image.size
                if w * h > max_pixels:
                    raise IntakeError(f"unreadable: image too large ({w} x {h} pixels, limit {max_pixels})")
                if min_side and image.format == "JPEG":
                    image.draft("RGB", (min_side, min_side))
                image.seek(0)   # first frame of an animation
                image.load()
                image = ImageOps.exif_transpose(image)
                return to_rgb(image)
        except IntakeError:
            raise
        except (Image.DecompressionBombError, Image.DecompressionBombWarning) as exc:
            raise IntakeError(f"unreadable: image too large ({exc})") from exc
        except UnidentifiedImageError as exc:
            raise IntakeError(f"unreadable: not a recognised image ({suffix} file)") from exc
        except (OSError, SyntaxError, ValueError, EOFError) as exc:
            message = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            if "truncated" in message.lower() or isinstance(exc, EOFError):
                raise IntakeError(f"unreadable: truncated or corrupt image data ({message})") from exc
            raise IntakeError(f"unreadable: corrupt image data ({message})") from exc
        except Exception as exc:  # a decoder bug on a hostile file must not stop the run
            raise IntakeError(f"unreadable: decoder failed ({type(exc).__name__}: {exc})") from exc
