"""What every job shares: run options, the user-facing checks, and embedding a folder with a representation."""
from __future__ import annotations

import math
import os
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
    runtime: str = "auto"      # "auto" (OpenVINO, else ONNX Runtime, else PyTorch), "openvino", "onnx" or "torch"
    batch_size: int = 32
    workers: int | None = None
    progress: bool = True
    use_cache: bool = True     # reuse and save features in <cache>/embeddings
    precision: str = "fp32"    # "bf16": OpenVINO only, checked against fp32 on the first batch

    def __post_init__(self):
        # The precision travels inside the runtime text ("openvino:bf16"), so every job that
        # passes `runtime` to load_representation passes the precision with it.
        runtime, _, folded = str(self.runtime).partition(":")
        if folded and self.precision not in ("fp32", folded):
            raise OddlingError(f"runtime {self.runtime!r} contradicts precision {self.precision!r}")
        self.precision = folded or self.precision
        self.runtime = runtime if self.precision == "fp32" else f"{runtime}:{self.precision}"


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
        cache = EmbeddingCache.open(cache_dir(options.cache_dir), representation.cache_fingerprint(),
                                    representation.runtime)
    return embed_files(base, paths, representation, batch_size=options.batch_size, workers=options.workers,
                       progress=options.progress, desc=desc, cache=cache)


def embed_folder(root: Path, representation, options: RunOptions, desc: str, exclude: tuple[Path, ...] = ()):
    from oddling.data.intake import IntakeError, discover

    try:
        paths = discover(root, exclude=exclude)
    except IntakeError as exc:
        raise OddlingError(exc.status) from exc
    return embed_paths(root, paths, representation, options, desc)


def load_bank_representation(bank, options: RunOptions):
    """The representation a bank was made with, loaded and checked against the bank's record."""
    from oddling.backbones.representation import RepresentationSpec, load_representation
    from oddling.bank.store import check_compatible

    spec = RepresentationSpec.from_dict(bank.representation)
    representation = load_representation(spec, options.cache_dir, options.runtime)
    check_compatible(bank, representation.fingerprint())
    return representation
