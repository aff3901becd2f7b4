"""How image files are encoded (format, JPEG quality, from the header alone), summarised per set, and the
warning when a batch is encoded unlike the references."""
from __future__ import annotations

import warnings

from oddling.errors import OddlingWarning
from oddling.numbers import plural

# The luminance quantisation table of the JPEG standard (ITU-T T.81 Annex K, Table K.1), in natural
# (row-major) order, the order Pillow's JpegImagePlugin gives `image.quantization` in.
_JPEG_LUMINANCE = (16, 11, 10, 16, 24, 40, 51, 61, 12, 12, 14, 19, 26, 58, 60, 55, 14, 13, 16, 24, 40, 57, 69, 56,
                   14, 17, 22, 29, 51, 87, 80, 62, 18, 22, 37, 56, 68, 109, 103, 77, 24, 35, 55, 64, 81, 104, 113, 92,
                   49, 64, 78, 87, 103, 121, 120, 101, 72, 92, 95, 98, 112, 100, 103, 99)


def jpeg_quality(quantization: dict | None) -> int | None:
    """The IJG (libjpeg) quality 1..100 that best explains a JPEG's luminance table, or None.

    libjpeg scales the standard table by S = 5000 / Q for Q < 50, else 200 - 2Q (percent); the
    mean ratio of the file's table to the standard one estimates S, and inverting gives Q (common
    practice, as in ImageMagick's `identify -verbose`). Encoders with their own tables get the
    nearest IJG quality: an estimate, good enough to tell 95 from 60.
    """
    table = (quantization or {}).get(0)
    if table is None or len(table) != 64:
        return None
    scale = 100.0 * sum(q / s for q, s in zip(table, _JPEG_LUMINANCE)) / 64
    quality = (200.0 - scale) / 2 if scale <= 100 else 5000.0 / scale
    return int(min(100, max(1, round(quality))))


def image_format(path) -> tuple[str | None, int | None]:
    """(file format as Pillow names it, JPEG quality estimate) from the header alone; MPO (a camera
    JPEG with a preview) counts as JPEG. (None, None) when the file cannot be opened."""
    from PIL import Image

    try:
        with Image.open(path) as image:
            name = "JPEG" if image.format == "MPO" else image.format
            return name, jpeg_quality(getattr(image, "quantization", None)) if name == "JPEG" else None
    except Exception:   # unreadable files have their status already; the format is only a summary
        return None, None


def format_summary(items) -> dict:
    """{"PNG": 40, "JPEG": 12, "jpeg_quality": {"min", "median", "max"}} from (format, quality)
    pairs; {} if any format is unknown (a summary of part of the set would mislead)."""
    import statistics

    items = list(items)
    if not items or any(fmt is None for fmt, _ in items):
        return {}
    counts: dict = {}
    for fmt, _ in items:
        counts[fmt] = counts.get(fmt, 0) + 1
    qualities = sorted(q for fmt, q in items if fmt == "JPEG" and q is not None)
    if qualities:
        counts["jpeg_quality"] = {"min": qualities[0], "median": round(statistics.median(qualities)),
                                  "max": qualities[-1]}
    return dict(sorted(counts.items()))


def format_counts(summary: dict) -> dict[str, int]:
    """The per-format counts of a format_summary (without the JPEG quality entry)."""
    return {k: v for k, v in (summary or {}).items() if isinstance(v, int) and not isinstance(v, bool)}


def _formats_text(counts: dict[str, int]) -> str:
    if len(counts) == 1:
        return next(iter(counts))
    return " and ".join(f"{fmt} ({n})" for fmt, n in sorted(counts.items(), key=lambda kv: -kv[1]))


QUALITY_GAP = 15   # JPEG quality points between the references' and a batch's medians worth a warning


def warn_if_other_encoding(references: dict, batch: dict, stacklevel: int = 3) -> None:
    """OddlingWarning when a batch's files are encoded unlike the references': another format,
    or JPEG at a clearly different quality. Encoding alone moves embeddings, so normal frames of
    the same scene can score as anomalies (a bank fitted on PNGs flagged 12 of 12 normal JPEGs)."""
    mine, theirs = format_counts(references), format_counts(batch)
    if not mine or not theirs:
        return
    other = {fmt: n for fmt, n in theirs.items() if fmt not in mine}
    n = sum(theirs.values())
    if other:
        m = sum(other.values())
        warnings.warn(f"references are {_formats_text(mine)}; {m} of {plural(n, 'scored image')} "
                      f"{'is' if m == 1 else 'are'} {_formats_text(other)}: fit on images from the same pipeline "
                      "(the encoding alone can raise scores)", OddlingWarning, stacklevel=stacklevel)
        return
    q_ref, q_batch = (references.get("jpeg_quality") or {}).get("median"), (batch.get("jpeg_quality") or {}).get("median")
    if q_ref is not None and q_batch is not None and abs(q_ref - q_batch) >= QUALITY_GAP:
        warnings.warn(f"references are JPEG of quality about {q_ref}; the scored JPEGs about {q_batch}: fit on "
                      "images from the same pipeline (the encoding alone can raise scores)", OddlingWarning,
                      stacklevel=stacklevel)
