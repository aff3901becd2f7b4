"""Image-health checks: cheap per-image statistics and Tukey's fences fitted on the references.

They name the plain-language reason a camera fault shows up ("too dark", "blurred", "unusual
size"), beside the embedding score. Fences: Tukey, *Exploratory Data Analysis*, 1977, with
k = 1.5 for "unusual" and k = 3 for "far out" (common practice).
"""
from __future__ import annotations

import numpy as np
from PIL import Image
from scipy.ndimage import laplace

STATS = ("brightness", "contrast", "sharpness", "colourfulness", "width", "height", "aspect_ratio")
MAX_SIDE = 512      # statistics are computed on a copy whose longer side is at most this, so they
                    # cost the same for any file and sharpness is compared at a common scale
K_UNUSUAL = 1.5
K_FAR_OUT = 3.0

_SIZE_STATS = ("width", "height", "aspect_ratio")
_WORDS = {          # stat -> (below the lower fence, above the upper fence)
    "brightness": ("too dark", "too bright"),
    "contrast": ("low contrast", "high contrast"),
    "sharpness": ("blurred", "unusually sharp"),
    "colourfulness": ("unusual colour", "unusual colour"),
    **{name: ("unusual size", "unusual size") for name in _SIZE_STATS},
}


def _downscaled(image: Image.Image) -> Image.Image:
    longer = max(image.size)
    if longer <= MAX_SIDE:
        return image
    scale = MAX_SIDE / longer
    size = (max(1, round(image.width * scale)), max(1, round(image.height * scale)))
    return image.resize(size, Image.Resampling.BOX)   # area average: no ringing to fake sharpness


def colourfulness(rgb: np.ndarray) -> float:
    """Hasler & Süsstrunk, "Measuring colourfulness in natural images", SPIE 5007, 2003:
    rg = R - G, yb = (R + G) / 2 - B, M = sqrt(sd_rg^2 + sd_yb^2) + 0.3 sqrt(mean_rg^2 + mean_yb^2).
    0 for any grey image; their scale puts "highly colourful" near 82 and "extremely" near 109."""
    r, g, b = (rgb[..., i].astype(np.float64) for i in range(3))
    rg = r - g
    yb = 0.5 * (r + g) - b
    return float(np.hypot(rg.std(), yb.std()) + 0.3 * np.hypot(rg.mean(), yb.mean()))


def image_stats(image: Image.Image, width: int, height: int) -> dict[str, float]:
    """The STATS of one RGB image.

    Brightness (mean, 0-255), contrast (standard deviation) and sharpness (variance of the
    4-neighbour Laplacian) are taken on the grey (ITU-R 601 luma) version and colourfulness on
    the colour version, both downscaled so the longer side is <= MAX_SIDE. width and height
    are the original file's pixel size, passed in because the decoded image may be reduced.
    """
    if image.mode != "RGB":
        raise ValueError(f"image must be RGB (see oddling.data.intake.to_rgb), got mode: {image.mode!r}")
    if width < 1 or height < 1:
        raise ValueError(f"width and height must be >= 1, got: {width} x {height}")
    small = _downscaled(image)
    grey = np.asarray(small.convert("L"), dtype=np.float64)
    return {
        "brightness": float(grey.mean()),
        "contrast": float(grey.std()),
        "sharpness": float(laplace(grey, mode="reflect").var()),
        "colourfulness": colourfulness(np.asarray(small)),
        "width": float(width),
        "height": float(height),
        "aspect_ratio": width / height,
    }


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
        }
    return fences


def health_findings(stats: dict, fences: dict) -> list[str]:
    """Plain words for each statistic outside its "unusual" fence, with " (far out)" when it is
    also beyond the "far out" fence; width, height and aspect ratio share one "unusual size".
    Statistics missing from the fences (a bank fitted before they existed) are skipped.
    Empty list = healthy."""
    findings: dict[str, bool] = {}   # word -> far out; insertion order follows STATS
    for name in STATS:
        if name not in fences:
            continue
        value = float(stats[name])
        (lo, hi), (far_lo, far_hi) = fences[name]["unusual"], fences[name]["far_out"]
        if lo <= value <= hi:
            continue
        word = _WORDS[name][0 if value < lo else 1]
        findings[word] = findings.get(word, False) or not far_lo <= value <= far_hi
    return [word + (" (far out)" if far else "") for word, far in findings.items()]


def health_text(findings: list[str]) -> str:
    return "; ".join(findings) if findings else "ok"
