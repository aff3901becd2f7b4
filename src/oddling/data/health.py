"""Image-health checks: cheap per-image statistics and Tukey's fences fitted on the references.

They name the plain-language reason a camera fault shows up ("too dark", "blurred", "unusual
size"), beside the embedding score. Fences: Tukey, *Exploratory Data Analysis*, 1977, with
k = 1.5 for "unusual" and k = 3 for "far out" (common practice).

Definitions (HEALTH_VERSION 2). The statistics are taken at one common scale, the *health
image*: the image resized (Pillow bicubic, antialiased, torchvision's rounding) so that its
shorter side is HEALTH_SIDE = 256 px, or the image itself when its shorter side is at most that
(never enlarged). For the default backbones that is exactly the image the network's preprocessing
makes before its centre crop, so the statistics cost only their arithmetic (well under 1 ms). A
common scale matters for sharpness above all: the variance of the Laplacian grows with the
resolution it is taken at, so it is only comparable between images measured at the same scale;
it is taken one octave below the health image (2 x 2 block means), where a JPEG decoded at
reduced size by DCT scaling and the same file decoded in full agree within 6 %.
Brightness agrees with the full-resolution value within 0.5 %; contrast and colourfulness lose
the finest texture (up to 15 % and 25 % lower on scikit-image's samples), which is why fences
fitted with an earlier definition are not reused for them (see `health_findings`).

Version 1 (earlier releases) took them on a box-filtered copy whose longer side was at most 512
px. Fences carry the version they were made with (`health_version` in each statistic's fence,
written as a pair because the bank's fence fields are numbers or pairs); fences without it are
version 1, and their brightness, contrast, sharpness and colourfulness fences are not compared
with version-2 statistics: those findings are skipped, with a one-time note saying to refit.
"""
from __future__ import annotations

import warnings

import numpy as np
from PIL import Image

from oddling.data.preprocess import Preprocessing
from oddling.errors import OddlingWarning

HEALTH_VERSION = 2
HEALTH_SIDE = 256   # the health image's shorter side, in pixels
DECODE_SIDE = 384   # images are decoded with both sides >= this (1.5 x HEALTH_SIDE), so that the resize
                    # to the health image is a real reduction whichever decoder (DCT scaling or not) ran
STATS = ("brightness", "contrast", "sharpness", "colourfulness", "width", "height", "aspect_ratio")
K_UNUSUAL = 1.5
K_FAR_OUT = 3.0

_SIZE_STATS = ("width", "height", "aspect_ratio")
_IMAGE_STATS = ("brightness", "contrast", "sharpness", "colourfulness")   # defined on the health image
_WORDS = {          # stat -> (below the lower fence, above the upper fence)
    "brightness": ("too dark", "too bright"),
    "contrast": ("low contrast", "high contrast"),
    "sharpness": ("blurred", "unusually sharp"),
    "colourfulness": ("unusual colour", "unusual colour"),
    **{name: ("unusual size", "unusual size") for name in _SIZE_STATS},
}
# The resize that makes the health image (mean and std do not matter: only the resize is used).
_HEALTH_RESIZE = Preprocessing(HEALTH_SIDE, HEALTH_SIDE, "bicubic", (0.0, 0.0, 0.0), (1.0, 1.0, 1.0))


def health_image(image: Image.Image) -> Image.Image:
    """The image the statistics are taken on: shorter side resized to HEALTH_SIDE, or the image
    itself when it is not larger than that."""
    if min(image.size) <= HEALTH_SIDE:
        return image
    return _HEALTH_RESIZE.resize(image)


def is_health_resize(preprocessing: Preprocessing, image_size: tuple[int, int]) -> bool:
    """Whether `preprocessing.resize` of an image of `image_size` makes the health image itself
    (so a caller that has it can pass it to `reduced_stats` instead of resizing twice)."""
    return (min(image_size) > HEALTH_SIDE and preprocessing.resize_shorter == HEALTH_SIDE
            and preprocessing.interpolation == "bicubic")


def laplacian(grey: np.ndarray) -> np.ndarray:
    """The 4-neighbour Laplacian with the edge pixel repeated outside the image: the same values
    as scipy.ndimage.laplace(grey, mode="reflect")."""
    p = np.pad(grey, 1, mode="edge")
    return p[:-2, 1:-1] + p[2:, 1:-1] + p[1:-1, :-2] + p[1:-1, 2:] - 4.0 * grey


def _histogram_moments(counts: np.ndarray, values: np.ndarray) -> tuple[float, float]:
    """Mean and (population) standard deviation of integer data given as a histogram: exact, and
    one pass over the pixels (np.bincount) instead of several float passes."""
    counts = counts.astype(np.float64)
    n = counts.sum()
    mean = float(counts @ values) / n
    return mean, float(np.sqrt(max(float(counts @ (values - mean) ** 2) / n, 0.0)))


_LEVELS = np.arange(256, dtype=np.float64)
_RG = np.arange(-255, 256, dtype=np.float64)            # R - G
_YB = np.arange(-510, 511, dtype=np.float64) / 2.0      # (R + G) / 2 - B, in halves


def colourfulness(rgb) -> float:
    """Hasler & Süsstrunk, "Measuring colourfulness in natural images", SPIE 5007, 2003:
    rg = R - G, yb = (R + G) / 2 - B, M = sqrt(sd_rg^2 + sd_yb^2) + 0.3 sqrt(mean_rg^2 + mean_yb^2).
    0 for any grey image; their scale puts "highly colourful" near 82 and "extremely" near 109.
    `rgb`: an RGB image or an (H, W, 3) uint8 array."""
    if isinstance(rgb, Image.Image):
        r, g, b = (np.asarray(band, dtype=np.int16).ravel() for band in rgb.split())
    else:
        rgb = np.asarray(rgb, dtype=np.uint8)
        r, g, b = (rgb[..., i].astype(np.int16).ravel() for i in range(3))
    mean_rg, sd_rg = _histogram_moments(np.bincount(r - g + 255, minlength=511), _RG)
    mean_yb, sd_yb = _histogram_moments(np.bincount(r + g - 2 * b + 510, minlength=1021), _YB)
    return float(np.hypot(sd_rg, sd_yb) + 0.3 * np.hypot(mean_rg, mean_yb))


def reduced_stats(health: Image.Image, width: int, height: int) -> dict[str, float]:
    """The STATS, given the health image already made (`health_image`, or the network's resize
    where `is_health_resize` says it is the same). width and height are the original file's."""
    if health.mode != "RGB":
        raise ValueError(f"image must be RGB (see oddling.data.intake.to_rgb), got mode: {health.mode!r}")
    if width < 1 or height < 1:
        raise ValueError(f"width and height must be >= 1, got: {width} x {height}")
    luma = health.convert("L")   # ITU-R 601 luma, as Pillow's "L"
    brightness, contrast = _histogram_moments(np.bincount(np.asarray(luma).ravel(), minlength=256), _LEVELS)
    # Sharpness one octave below the health image (2 x 2 block means, Pillow's reduce): the finest
    # octave depends on how the image was reduced (libjpeg's DCT scaling keeps more of it than a
    # bicubic resize); one octave lower, the two agree within 6 % on scikit-image's samples.
    octave = np.asarray(luma.reduce(2), dtype=np.float32)
    return {
        "brightness": brightness,
        "contrast": contrast,
        "sharpness": float(laplacian(octave).var(dtype=np.float64)),
        "colourfulness": colourfulness(health),
        "width": float(width),
        "height": float(height),
        "aspect_ratio": width / height,
    }


def image_stats(image: Image.Image, width: int, height: int) -> dict[str, float]:
    """The STATS of one RGB image (see the module's definitions).

    Brightness (mean, 0-255) and contrast (standard deviation) are taken on the grey (ITU-R 601
    luma) version of the health image, sharpness (variance of the 4-neighbour Laplacian) on that
    grey image averaged over 2 x 2 blocks, and colourfulness on the colour version. width and height are the original file's pixel size,
    passed in because the decoded image may be reduced.
    """
    if image.mode != "RGB":
        raise ValueError(f"image must be RGB (see oddling.data.intake.to_rgb), got mode: {image.mode!r}")
    return reduced_stats(health_image(image), width, height)


def tukey_fences(values, k: float) -> tuple[float, float]:
    """(Q1 - k IQR, Q3 + k IQR) with quartiles by numpy.percentile's default (linear) rule."""
    v = np.asarray(values, dtype=np.float64).ravel()
    if len(v) == 0:
        raise ValueError("values must not be empty")
    if not np.all(np.isfinite(v)):
        raise ValueError("values contain NaN or infinite entries")
    if not k >= 0:
        raise ValueError(f"k must be >= 0, got: {k}")
    q1, q3 = np.percentile(v, [25, 75])
    iqr = q3 - q1
    return float(q1 - k * iqr), float(q3 + k * iqr)


def fit_fences(stats_rows: list[dict]) -> dict:
    """Per statistic: {"q1", "q3", "unusual": [lo, hi], "far_out": [lo, hi]}, ready for JSON.

    When every reference shares a value (typically one camera's width and height) the IQR is 0
    and any other value lies outside both fences: a size change is then always reported.
    """
    if not stats_rows:
        raise ValueError("stats_rows must not be empty")
    fences = {}
    for name in STATS:
        values = [row[name] for row in stats_rows]
        q1, q3 = np.percentile(np.asarray(values, dtype=np.float64), [25, 75])
        fences[name] = {
            "q1": float(q1),
            "q3": float(q3),
            "unusual": list(tukey_fences(values, K_UNUSUAL)),
            "far_out": list(tukey_fences(values, K_FAR_OUT)),
            "health_version": [HEALTH_VERSION, HEALTH_VERSION],
        }
    return fences


def fence_version(fence: dict) -> int:
    """The definition version a statistic's fence was fitted with (1 when it does not say)."""
    version = fence.get("health_version", [1])
    try:
        return int(version[0] if isinstance(version, (list, tuple)) else version)
    except (TypeError, ValueError, IndexError):
        return 1


_noted_old_fences = False


def _note_old_fences(skipped: list[str]) -> None:
    global _noted_old_fences
    if _noted_old_fences:
        return
    _noted_old_fences = True
    warnings.warn(
        f"this bank's image-health fences were fitted with an earlier definition of the statistics (health "
        f"version 1); its {', '.join(skipped)} findings are skipped (size findings still apply). Refit the bank "
        "with `oddling fit` to get them back", OddlingWarning, stacklevel=3)


def health_findings(stats: dict, fences: dict) -> list[str]:
    """Plain words for each statistic outside its "unusual" fence, with " (far out)" when it is
    also beyond the "far out" fence; width, height and aspect ratio share one "unusual size".
    Statistics missing from the fences (a bank fitted before they existed) are skipped, and so are
    image statistics whose fence was fitted with another definition version (see the module
    docstring; a one-time note says so). Empty list = healthy."""
    findings: dict[str, bool] = {}   # word -> far out; insertion order follows STATS
    outdated = []
    for name in STATS:
        if name not in fences:
            continue
        if name in _IMAGE_STATS and fence_version(fences[name]) != HEALTH_VERSION:
            outdated.append(name)
            continue
        value = float(stats[name])
        (lo, hi), (far_lo, far_hi) = fences[name]["unusual"], fences[name]["far_out"]
        if lo <= value <= hi:
            continue
        word = _WORDS[name][0 if value < lo else 1]
        findings[word] = findings.get(word, False) or not far_lo <= value <= far_hi
    if outdated:
        _note_old_fences(outdated)
    return [word + (" (far out)" if far else "") for word, far in findings.items()]


def health_text(findings: list[str]) -> str:
    return "; ".join(findings) if findings else "ok"
