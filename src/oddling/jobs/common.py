"""What every job shares: run options, the user-facing checks, and embedding a folder with a representation."""
from __future__ import annotations

import math
import os
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path

from oddling.detectors.conformal import min_calibration_size, smallest_supported_rate
from oddling.errors import OddlingError


class OddlingWarning(UserWarning):
    """Something the user should know but that does not stop the job."""


@dataclass
class RunOptions:
    """How to run the representation; shared by every job that reads images."""

    cache_dir: str | os.PathLike | None = None
    runtime: str = "auto"      # "auto" (ONNX Runtime when installed), "onnx" or "torch"
    batch_size: int = 32
    workers: int | None = None
    progress: bool = True
    use_cache: bool = True     # reuse and save features in <cache>/embeddings


def check_rate(target_fpr: float) -> float:
    if isinstance(target_fpr, bool) or not isinstance(target_fpr, (int, float)) or not 0.0 < float(target_fpr) < 1.0:
        raise OddlingError(f"target_fpr must be in (0, 1), got: {target_fpr}")
    return float(target_fpr)


def folder(path, what: str) -> Path:
    found = Path(path)
    if not found.is_dir():
        raise OddlingError(f"{what} {found} is not a folder")
    return found


def refuse_existing(*paths, force: bool) -> None:
    """The one "already exists" check: outputs are checked before any work starts, so a refusal costs nothing."""
    for path in paths:
        if path is not None and Path(path).exists() and not force:
            raise OddlingError(f"{path} already exists; pass --force to replace it")


def check_output(path, *, force: bool, suffix: str | None = None, option: str = "output",
                 example: str | None = None) -> Path | None:
    """The one output-path check for a file a command writes, made before any work starts.

    Refused with OddlingError: a folder (name a file in it instead: `example`), a name without
    `suffix` where the writer needs one (a plot is PNG), an existing file unless `force` (the
    "already exists" rule of refuse_existing), and a path below something that is not a folder.
    Missing parent folders are fine: the writers create them. None passes through (option not given).
    """
    if path is None:
        return None
    path = Path(path)
    wanted = f"a file name ending in {suffix}" if suffix else "a file name"
    if path.is_dir():
        raise OddlingError(f"{option} {path} is a folder; give {wanted}, e.g. {path / (example or 'output' + (suffix or ''))}")
    if suffix is not None and path.suffix.lower() != suffix:
        raise OddlingError(f"{option} {path}: give {wanted} (this writer makes {suffix[1:].upper()} files), "
                           f"e.g. {path.with_suffix(suffix) if path.suffix else path.with_name(path.name + suffix)}")
    refuse_existing(path, force=force)
    parent = path.parent
    while not parent.exists() and parent != parent.parent:
        parent = parent.parent
    if parent.exists() and not parent.is_dir():
        raise OddlingError(f"{option} {path}: {parent} is a file, not a folder")
    return path


def plural(n: int, word: str, many: str | None = None) -> str:
    """"1 reference", "2 references": the count with the word in the right number."""
    return f"{n} {word if n == 1 else (many or word + 's')}"


def supported_rate_text(n: int) -> str:
    """What a calibration set of n scores can do, in words people can act on."""
    lowest = smallest_supported_rate(n)
    return f"{n} calibration scores support target false-alarm rates >= {math.ceil(lowest * 1000) / 1000:g}"


def warn_if_few_calibration(n: int, target_fpr: float, stacklevel: int = 3) -> None:
    needed = min_calibration_size(target_fpr)
    if n >= max(needed, round(1 / target_fpr)):
        return
    if n < needed:
        advice = (f"; at {target_fpr} no image can be flagged at all: refit with --target-fpr "
                  f"{_suggest_rate(n)} or add references (about {needed + 1} or more)")
    else:
        advice = f"; about {round(1 / target_fpr)} or more make the rate mean much"
    warnings.warn(supported_rate_text(n) + advice, OddlingWarning, stacklevel=stacklevel)


def _suggest_rate(n: int) -> str:
    lowest = smallest_supported_rate(n)
    for rate in (0.01, 0.02, 0.05, 0.1, 0.2, 0.5):
        if rate >= 2 * lowest:
            return f"{rate:g}"
    return "0.5"


def embed_paths(base: Path, paths: list[Path], representation, options: RunOptions, desc: str):
    """Files -> features with the representation, through the embedding cache where it applies."""
    from oddling.embedding.cache import EmbeddingCache
    from oddling.embedding.runner import embed_files
    from oddling.paths import cache_dir

    cache = None
    if options.use_cache and representation.cacheable:
        folder = cache_dir(options.cache_dir)
        try:
            cache = EmbeddingCache.open(folder, representation.cache_fingerprint(), representation.runtime)
            with tempfile.TemporaryFile(dir=cache.folder):   # it saves as the run goes: it must be writable
                pass
        except OSError as exc:
            cache = None
            warnings.warn(f"the embedding cache in {folder} is not usable ({exc.strerror or exc}): running "
                          "without it (nothing is reused or saved); pass --cache-dir with a writable folder, "
                          "or --no-cache to say so", OddlingWarning, stacklevel=3)
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


def load_bank_representation(bank, options: RunOptions):
    """The representation a bank was made with, loaded and checked against the bank's record."""
    from oddling.backbones.representation import RepresentationSpec, load_representation
    from oddling.bank.store import check_compatible

    spec = RepresentationSpec.from_dict(bank.representation)
    representation = load_representation(spec, options.cache_dir, options.runtime)
    check_compatible(bank, representation.fingerprint())
    return representation
