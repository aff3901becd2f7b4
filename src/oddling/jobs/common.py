"""What every job shares: run options, the user-facing checks, and embedding a folder with a representation."""
from __future__ import annotations

import math
import warnings
from pathlib import Path

from oddling.detectors.conformal import min_calibration_size, smallest_supported_rate
from oddling.embedding.options import RunOptions
from oddling.errors import OddlingError, OddlingWarning


def check_rate(target_fpr: float) -> float:
    if isinstance(target_fpr, bool) or not isinstance(target_fpr, (int, float)) or not 0.0 < float(target_fpr) < 1.0:
        raise OddlingError(f"target_fpr must be in (0, 1), got: {target_fpr}")
    return float(target_fpr)


def folder(path, what: str) -> Path:
    found = Path(path)
    if not found.is_dir():
        raise OddlingError(f"{what} {found} is not a folder")
    return found


def plural(n: int, word: str, many: str | None = None) -> str:
    """"1 reference", "2 references": the count with the word in the right number."""
    return f"{n} {word if n == 1 else (many or word + 's')}"


def supported_rate_text(n: int, guarantee=None) -> str:
    """What a calibration set of n scores can do, in words people can act on."""
    lowest = smallest_supported_rate(n, guarantee)
    return f"{n} calibration scores support target false-alarm rates >= {math.ceil(lowest * 1000) / 1000:g}"


def warn_if_few_calibration(threshold, stacklevel: int = 3) -> None:
    """OddlingWarning when a bank's calibration is too small for its rate: nothing can be flagged,
    or only images above nearly every calibration score."""
    n, target_fpr, guarantee = threshold.n, threshold.target_fpr, threshold.guarantee
    needed = min_calibration_size(target_fpr, guarantee)
    if n >= max(needed, round(1 / target_fpr)):
        return
    if n < needed:
        advice = (f"; at {target_fpr} no image can be flagged at all ({threshold.support_text()}): refit with "
                  f"--target-fpr {_suggest_rate(n, guarantee)} or with more references (about {needed} calibration "
                  "scores or more)")
    else:
        advice = f"; about {round(1 / target_fpr)} or more calibration scores make the rate mean much"
    warnings.warn(supported_rate_text(n, guarantee) + advice, OddlingWarning, stacklevel=stacklevel)


def _suggest_rate(n: int, guarantee=None) -> str:
    lowest = smallest_supported_rate(n, guarantee)
    for rate in (0.01, 0.02, 0.05, 0.1, 0.2, 0.5):
        if rate >= 2 * lowest:
            return f"{rate:g}"
    return "0.5"


def embed_paths(base: Path, paths: list[Path], representation, options: RunOptions, desc: str):
    """Files -> features with the representation, through the embedding cache where it applies."""
    from oddling.embedding.cache import open_cache
    from oddling.embedding.runner import embed_files

    cache = open_cache(representation, options)
    if options.dask:
        from oddling.embedding.cluster import embed_on_cluster   # only here: plain runs never import distributed

        return embed_on_cluster(options.dask, base, paths, representation, runtime=options.runtime,
                                cache_dir=options.cache_dir, batch_size=options.batch_size, workers=options.workers,
                                progress=options.progress, desc=desc, cache=cache)
    return embed_files(base, paths, representation, batch_size=options.batch_size, workers=options.workers,
                       progress=options.progress, desc=desc, cache=cache)


def skipped_text(records, limit: int = 3) -> str:
    """The files that were not used, counted by status in the runner's and intake's own words (the
    CSV's status column): '2 "skipped: not an image file type (.txt)"; 1 "unreadable: empty file (0 bytes)"'."""
    from collections import Counter

    from oddling.embedding.runner import OK

    counts = Counter(r.status for r in records if r.status != OK).most_common()
    text = "; ".join(f'{n} "{status}"' for status, n in counts[:limit])
    return text + (f"; and {plural(len(counts) - limit, 'other status', 'other statuses')}" if len(counts) > limit
                   else "")


def no_images_message(root, records, left_out: dict | None = None) -> str:
    """"no images found in X (N files skipped: ...)": what a folder without one usable image held."""
    from oddling.embedding.runner import OK

    unused = [r for r in records if r.status != OK]
    parts = [f"{plural(len(unused), 'file')} skipped: {skipped_text(unused)}" if unused else "no files"]
    if left_out:
        parts.append("left out: " + ", ".join(f"{n} {kind}" for kind, n in sorted(left_out.items())))
    return f"no images found in {root} ({'; '.join(parts)})"


def embed_folder(root: Path, representation, options: RunOptions, desc: str, exclude: tuple[Path, ...] = (),
                 allow_empty: bool = False):
    """embed_paths over every file under `root`. A folder without one usable image is an OddlingError
    (no_images_message) unless `allow_empty`: then every file still has its record."""
    from oddling.data.intake import IntakeError, walk

    try:
        found = walk(root, exclude=exclude)
    except IntakeError as exc:
        raise OddlingError(exc.status) from exc
    embedded = embed_paths(root, found.paths, representation, options, desc)
    if not embedded.ok_records and not allow_empty:
        raise OddlingError(no_images_message(root, embedded.records, found.left_out))
    return embedded


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


def load_bank_representation(bank, options: RunOptions):
    """The representation a bank was made with, loaded and checked against the bank's record."""
    from oddling.backbones.representation import RepresentationSpec, load_representation
    from oddling.bank.store import check_compatible

    spec = RepresentationSpec.from_dict(bank.representation)
    representation = load_representation(spec, options.cache_dir, options.runtime)
    check_compatible(bank, representation.fingerprint())
    return representation
