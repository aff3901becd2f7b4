"""What fitting a patch-knn bank costs, against the split calibration it replaced, in one run.

    python benchmarks/bench_patch_fit.py [--sizes 100,200] [--rounds 3] [--out benchmarks/PATCH_FIT_RESULTS.md]
    python benchmarks/bench_patch_fit.py --scale 200,1000,5000 --out benchmarks/PATCH_SCALE_RESULTS.md

The references are random 256 px crops of scikit-image's bundled brick and grass photographs
(cut here, written as PNGs), embedded once with the default patch representation
(`efficientnet-lite0/patches:stage2+stage3`, 28 x 28 locations x 64 channels); only the
detector's fit is timed, in interleaved rounds (baseline, candidate, baseline...), median reported:
  - baseline: the split calibration of the landed main before cross-conformal calibration (a
    seeded 20% of the references held out, a greedy coreset of the other 80%, the held-out scored
    against it), written out here with the same library functions;
  - candidate: `PatchKNNDetector().fit` (5 folds, a coreset per fold, every reference scored by
    the coresets of the other folds).
Target (the calibration issue): the candidate costs at most twice the baseline for the same
references, while every reference gives a calibration score instead of a fifth of them.

`--scale N1,N2,...` instead measures the fit as references grow (the split baseline is
quadratic in the references and is not run there): per size, the patch features (decode, network
stages, grid; ms per reference), the detector's fit in its phases (coreset, calibration) and
in all, the coreset's size, and scoring 200 new crops against the bank (ms per image). Target:
the fit at most 40 ms per reference image at 1,000 references (features and detector together).
Prints figures and ratios, never asserts.
"""
from __future__ import annotations

import argparse
import os
import platform
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image

from oddling.detectors.patch import PatchIndex, PatchKNNDetector, coreset, score_patches

SIDE = 256


def write_crops(folder: Path, n: int, seed: int = 0) -> list[Path]:
    from skimage import data

    photos = [data.brick(), data.grass()]
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for i in range(n):
        photo = photos[i % len(photos)]
        y, x = rng.integers(0, photo.shape[0] - SIDE, 2)
        path = folder / f"c{i:05d}.png"
        Image.fromarray(np.ascontiguousarray(photo[y:y + SIDE, x:x + SIDE])).convert("RGB").save(path)
        paths.append(path)
    return paths


def patch_features(folder: Path, paths: list[Path]):
    import oddling
    from oddling.backbones.representation import load_representation
    from oddling.jobs.reading import embed_paths

    options = oddling.RunOptions(progress=False, use_cache=False)
    rep = load_representation("efficientnet-lite0/patches:stage2+stage3")
    embedded = embed_paths(folder, paths, rep, options, "patches")
    return embedded.embeddings, embedded.row_hashes


def split_fit(features: np.ndarray, hashes: np.ndarray, fraction: float = 0.1, seed: int = 0) -> np.ndarray:
    """The landed main's split calibration: 20% of the distinct references (at least 10, at most
    half) held out and scored against the coreset of the rest. Returns the calibration scores."""
    distinct = sorted(set(hashes.tolist()))
    n_cal = min(max(10, int(round(0.2 * len(distinct)))), len(distinct) // 2)
    held = set(np.random.default_rng(seed).permutation(len(distinct))[:n_cal].tolist())
    held_hashes = {distinct[i] for i in held}
    is_cal = np.array([h in held_hashes for h in hashes.tolist()], dtype=bool)
    bank_rows, cal_rows = np.flatnonzero(~is_cal), np.flatnonzero(is_cal)
    patches = features[bank_rows].reshape(-1, features.shape[-1])
    keep = coreset(patches, fraction, seed)
    sources = np.repeat(bank_rows, features.shape[1])[keep]
    return score_patches(PatchIndex(np.ascontiguousarray(patches[keep])), sources, features[cal_rows]).scores


def timed(fn) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def scale(sizes: list[int], say) -> None:
    """Fit cost as references grow: features, coreset, calibration, scoring."""
    from oddling.detectors import patch
    from oddling.detectors.base import group_folds

    say("| references | features ms/ref | coreset s | calibration s | detector fit ms/ref | fit in all ms/ref | "
        "coreset patches | scoring ms/image | target <= 40 ms/ref at 1,000 |")
    say("| --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    with tempfile.TemporaryDirectory() as tmp:
        new = write_crops(Path(tmp) / "new", 200, seed=99)
        new_features, _ = patch_features(Path(tmp) / "new", new)
        for n in sizes:
            folder = Path(tmp) / f"refs{n}"
            paths = write_crops(folder, n, seed=n)
            start = time.perf_counter()
            x, h = patch_features(folder, paths)
            features_s = time.perf_counter() - start
            det = PatchKNNDetector()
            folds = group_folds(h, det.folds, det.seed)
            timings = {}
            original = patch.score_patches

            start = time.perf_counter()
            bank = patch.fit_fold_bank(x, folds, det.folds, det.coreset, det.seed, det.max_patches)
            fit_s = time.perf_counter() - start
            # the two phases, timed again on their own (the coreset alone, then what remains is calibration)
            start = time.perf_counter()
            for fold in range(det.folds):
                rows = np.flatnonzero(folds == fold)
                patch.coreset(x[rows].reshape(-1, x.shape[2]), det.coreset, det.seed,
                              max_centers=det.max_patches * len(rows) // n)
            timings["coreset"] = time.perf_counter() - start
            timings["calibration"] = max(0.0, fit_s - timings["coreset"])
            det.patches_, det.sources_, det.fold_starts_ = bank.patches, bank.sources, bank.fold_starts
            det.calibration_scores_, det.n_patches_, det.grid_ = bank.calibration_scores, bank.n_patches, 28
            start = time.perf_counter()
            det.anomaly_score(new_features)
            score_ms = 1000 * (time.perf_counter() - start) / len(new_features)
            fit_ms = 1000 * fit_s / n
            total_ms = fit_ms + 1000 * features_s / n
            met = "" if n != 1000 else ("[MET]" if total_ms <= 40 else "[NOT MET]")
            say(f"| {n} | {1000 * features_s / n:.1f} | {timings['coreset']:.1f} | {timings['calibration']:.1f} | "
                f"{fit_ms:.1f} | {total_ms:.1f} | {len(bank.patches)} | {score_ms:.1f} | {met} |")
            del x, bank


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--sizes", default="100,200", help="reference counts, comma-separated")
    parser.add_argument("--scale", default=None, help="instead: reference counts for the growth table, e.g. 200,1000,5000")
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--out", type=Path, default=None)
    args = parser.parse_args()
    sizes = [int(s) for s in args.sizes.split(",")]
    lines: list[str] = []

    def say(text: str = "") -> None:
        print(text, flush=True)
        lines.append(text)

    if args.scale:
        started = time.perf_counter()
        say("# Patch-knn fit as references grow")
        say()
        say(f"`python benchmarks/bench_patch_fit.py --scale {args.scale}`; {os.cpu_count()} cores, "
            f"{platform.processor() or platform.machine()}, Python {platform.python_version()}. References: random "
            "256 px crops of scikit-image's brick and grass photographs; default patch representation and "
            "detector parameters (coreset 0.1, at most 16,384 patches, 5 folds).")
        say()
        scale([int(s) for s in args.scale.split(",")], say)
        say()
        say(f"Wall time {time.perf_counter() - started:.0f} s.")
        if args.out:
            args.out.write_text("\n".join(lines) + "\n", encoding="utf-8")
        return

    started = time.perf_counter()
    say("# Patch-knn fit: cross-conformal calibration against the split it replaced")
    say()
    say(f"`python benchmarks/bench_patch_fit.py --sizes {args.sizes} --rounds {args.rounds}`; "
        f"{os.cpu_count()} cores, {platform.processor() or platform.machine()}, Python {platform.python_version()}.")
    say("References: random 256 px crops of scikit-image's brick and grass photographs; default patch "
        "representation (28 x 28 locations x 64 channels), embedded once; only the detector's fit is timed "
        f"(median of {args.rounds} interleaved rounds).")
    say()
    say("| references | split (landed main) s | ms/ref | calibration scores | cross-conformal s | ms/ref | "
        "calibration scores | ratio | target <= 2x |")
    say("| --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    with tempfile.TemporaryDirectory() as tmp:
        paths = write_crops(Path(tmp) / "refs", max(sizes))
        features, hashes = patch_features(Path(tmp) / "refs", paths)
        for n in sizes:
            x, h = features[:n], hashes[:n]
            base, cand = [], []
            n_base = len(split_fit(x, h))                               # warm-up, and the count
            n_cand = len(PatchKNNDetector().fit(x, h).calibration_scores_)
            for _ in range(args.rounds):
                base.append(timed(lambda: split_fit(x, h)))
                cand.append(timed(lambda: PatchKNNDetector().fit(x, h)))
            b, c = statistics.median(base), statistics.median(cand)
            ratio = c / b
            say(f"| {n} | {b:.2f} | {1000 * b / n:.1f} | {n_base} | {c:.2f} | {1000 * c / n:.1f} | {n_cand} | "
                f"{ratio:.2f}x | {'[MET]' if ratio <= 2.0 else '[NOT MET]'} |")
    say()
    say(f"Wall time {time.perf_counter() - started:.0f} s.")
    if args.out:
        args.out.write_text("\n".join(lines) + "\n", encoding="utf-8")


if __name__ == "__main__":
    sys.exit(main())
