"""Calibration validity: do the detectors' flags hold the false-alarm rate on real normal images?

    python benchmarks/bench_calibration.py --out benchmarks/CALIBRATION_RESULTS.md   # ~25 minutes on 2 cores
    python benchmarks/bench_calibration.py --quick                                  # smoke run, ~1 minute
    python benchmarks/bench_calibration.py --detectors gaussian --references 100 --splits 60   # one detector, closer

What it does:
  1. Cuts one folder of normal images per case: seeded random square crops (96-160 px, random
     position, half of them mirrored) of ONE scikit-image sample picture (default: the `coffee`
     photo and the `gravel` texture), written as PNG files, so that every crop is a draw from the
     same kind of normal and any two are exchangeable.
  2. Embeds each folder once per representation with the project's own intake and runner
     (`efficientnet-lite0` for the vector detectors, `efficientnet-lite0/patches:stage2+stage3`
     for patch-knn).
  3. For each of `--splits` seeded random splits of a folder into references (`--references`,
     e.g. 100 and 200) and fresh normals (the rest), fits every detector on the references'
     features (`make_detector(...).fit(features, content hashes)`), scores the fresh normals and
     flags them with `ConformalThreshold(detector.calibration_scores_, alpha)` at alpha 0.01,
     0.05 and 0.1. A fresh normal that is flagged is a false alarm.
  4. Reports, per case, detector, reference count and alpha:
     - table 1: the pooled false-alarm rate (flagged / fresh normals over all splits), the mean and
       spread of the per-split rates, the banks that could not flag at all (cutoff inf), and two
       99% ranges with a verdict each ([OK], [ABOVE], [FAR BELOW] = recall thrown away):
       * "binomial": quantiles 0.5% / 99.5% of Binomial(N pooled, alpha) / N. It treats every fresh
         normal as an independent trial, but the fresh normals of one split share one bank and one
         cutoff, so the pooled count varies more than that: a calibrated detector lands above it
         now and then;
       * "split-aware": the pooled rate's range for an exact conformal method (calibration scores
         and fresh scores i.i.d.) whose cutoff sits at the same rank among the same number of
         calibration scores, split by split: each split's flagged count is then beta-binomial
         (Binomial(fresh, R) with R ~ Beta(r + 1, n - r), r calibration scores above the cutoff),
         and the splits are independent. This is the range a valid method should land in.
     - table 2: the share of splits whose realized rate exceeds alpha. The marginal guarantee
       bounds the average rate, not each bank's: a share of about 0.35-0.45 is expected, and the
       table gives the exact method's share beside it. When `ConformalThreshold` takes a
       `guarantee` keyword, the same is measured with `guarantee="confident", confidence=0.9`
       (at most 10% of banks with a true rate above alpha). Caveat: a split's realized rate is
       estimated from its few hundred fresh normals, so the realized share mixes the banks' true
       rates with that counting noise; the exact method's expected share includes the same noise.

Detectors (their own default calibration): knn (leave-one-out), patch-knn, gaussian, pca
(variance 0.95 and 0.99), iforest (5-fold cross-conformal, fold models kept; new images scored by
their mean, or for iforest by the fold model the content hash picks, as `oddling score` does).
patch-knn fits are slow (greedy coreset: ~4 s at 100 references, ~20 s at 200, one thread), so it
scores at most `PATCH_FRESH` fresh normals per split and is fitted at the larger reference counts
on the first case only, unless `--patch-all-cases`.

The detectors are fitted and scored on one thread (torch, BLAS, OpenMP, faiss): on a shared
2-core machine, two threads against another process's load wait in their barriers, and a
patch-knn fit took 25-50 s instead of 4 s (measured); one thread is steady. The embedding runs
as the pipeline runs it. Prints markdown; progress goes to stderr. Never asserts anything: it
measures.
"""
from __future__ import annotations

import argparse
import datetime
import inspect
import math
import os
import platform
import subprocess
import sys
import tempfile
import time
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import stats
from scipy.signal import fftconvolve

from oddling.detectors import make_detector
from oddling.detectors.conformal import ConformalThreshold

ALPHAS = (0.01, 0.05, 0.1)
CROP_SIDES = (96, 160)          # smallest and largest crop side, pixels
VECTOR_REPRESENTATION = "efficientnet-lite0"
PATCH_REPRESENTATION = "efficientnet-lite0/patches:stage2+stage3"
PATCH_FRESH = 500               # fresh normals scored per patch-knn split (scoring: ~5-10 ms each)
LEVEL = 0.99


@dataclass(frozen=True)
class DetectorRun:
    key: str                    # the label in the tables and in --detectors
    name: str                   # the name in oddling.detectors.DETECTORS
    params: dict
    features: str               # "vectors" or "patches"


DETECTOR_RUNS = (
    DetectorRun("knn", "knn", {}, "vectors"),
    DetectorRun("patch-knn", "patch-knn", {}, "patches"),
    DetectorRun("gaussian", "gaussian", {}, "vectors"),
    DetectorRun("pca-0.95", "pca", {"variance": 0.95}, "vectors"),
    DetectorRun("pca-0.99", "pca", {"variance": 0.99}, "vectors"),
    DetectorRun("iforest", "iforest", {}, "vectors"),
)


# --- 1. the normal folders -----------------------------------------------------------------------

def sample_picture(name: str) -> np.ndarray:
    """A picture bundled with scikit-image, e.g. "coffee" (RGB photo) or "gravel" (grey texture)."""
    import skimage.data

    loader = getattr(skimage.data, name, None)
    if loader is None:
        raise SystemExit(f"scikit-image has no sample picture {name!r}")
    picture = np.asarray(loader())
    if picture.ndim not in (2, 3) or min(picture.shape[:2]) < CROP_SIDES[1]:
        raise SystemExit(f"skimage.data.{name}() is not a picture of at least {CROP_SIDES[1]} px a side")
    return picture


def write_crops(picture: np.ndarray, folder: Path, count: int, seed: int) -> list[Path]:
    """`count` seeded random square crops of `picture` as PNG files in `folder`: side uniform in
    CROP_SIDES, position uniform, mirrored left-right with probability 1/2. All are drawn the same
    way, independently, so any split into references and fresh images is exchangeable."""
    from PIL import Image

    rng = np.random.default_rng(seed)
    height, width = picture.shape[:2]
    folder.mkdir(parents=True)
    paths = []
    for i in range(count):
        side = int(rng.integers(CROP_SIDES[0], CROP_SIDES[1] + 1))
        top, left = int(rng.integers(0, height - side + 1)), int(rng.integers(0, width - side + 1))
        crop = picture[top:top + side, left:left + side]
        if rng.random() < 0.5:
            crop = crop[:, ::-1]
        path = folder / f"crop_{i:05d}.png"
        Image.fromarray(np.ascontiguousarray(crop)).save(path)
        paths.append(path)
    return paths


# --- 2. features, once per representation --------------------------------------------------------

@dataclass
class CaseFeatures:
    vectors: np.ndarray | None      # (n, 1280)
    patches: np.ndarray | None      # (n, locations, channels)
    groups: np.ndarray              # content hashes, one per image


def embed_case(folder: Path, paths: list[Path], representations: dict, options) -> CaseFeatures:
    """Every crop through the pipeline's intake and embedding runner, once per representation."""
    from oddling.jobs.reading import embed_paths

    features, groups = {}, None
    for kind, representation in representations.items():
        embedded = embed_paths(folder, paths, representation, options, f"embedding {kind}")
        bad = [r for r in embedded.records if r.row is None]
        if bad:
            raise SystemExit(f"{len(bad)} crops could not be embedded, e.g. {bad[0].path}: {bad[0].status}")
        features[kind] = embedded.embeddings
        hashes = np.array([r.sha256 for r in embedded.records])
        if groups is not None and not np.array_equal(groups, hashes):
            raise SystemExit("the two representations' records are not in the same file order")
        groups = hashes
    return CaseFeatures(features.get("vectors"), features.get("patches"), groups)


@contextmanager
def one_thread(with_torch: bool):
    """Fit and score on one thread (see the docstring: steady under other processes' load)."""
    import faiss
    from threadpoolctl import threadpool_limits

    if with_torch:
        import torch

        torch.set_num_threads(1)
    faiss.omp_set_num_threads(1)
    with threadpool_limits(1):
        yield


# --- 3. splits and one bank each -----------------------------------------------------------------

def split(n_images: int, n_references: int, seed: int, index: int) -> tuple[np.ndarray, np.ndarray]:
    """(reference rows, fresh rows) of split `index`: a seeded permutation cut after n_references.
    The same split index gives nested references at every reference count."""
    order = np.random.default_rng([seed, index]).permutation(n_images)
    return order[:n_references], order[n_references:]


def threshold_variants() -> list[tuple[str, dict]]:
    """The calibration guarantees `ConformalThreshold` offers: marginal, and "confident" at 0.9.
    (Written when "confident" was still to come; kept general.) Marginal always; "confident" when
    its constructor takes a `guarantee` keyword (added by another change)."""
    variants = [("marginal", {})]
    if "guarantee" in inspect.signature(ConformalThreshold).parameters:
        from oddling.detectors.conformal import Guarantee

        variants.append(("confident 0.9", {"guarantee": Guarantee("confident", 0.9)}))
    return variants


@dataclass
class BankResult:
    """One fitted bank at one alpha and guarantee: what its flags did on its fresh normals."""

    case: str
    detector: str
    n_references: int
    alpha: float
    guarantee: str
    split: int
    n_calibration: int
    above_cutoff: int           # calibration scores above the cutoff: the cutoff's rank
    can_flag: bool
    fresh: int
    flagged: int

    @property
    def rate(self) -> float:
        return self.flagged / self.fresh


def measure_bank(run: DetectorRun, features: np.ndarray, groups: np.ndarray, references: np.ndarray,
                 fresh: np.ndarray, variants, labels: dict) -> list[BankResult]:
    """Fit once, score the fresh normals once, then flag at every alpha and guarantee."""
    detector = make_detector(run.name, run.params).fit(features[references], groups[references])
    calibration = np.asarray(detector.calibration_scores_, dtype=np.float64)
    scores = detector.anomaly_score(features[fresh], groups[fresh]).scores   # hashes: as the jobs pass them
    results = []
    for alpha in ALPHAS:
        for guarantee, keywords in variants:
            threshold = ConformalThreshold(calibration, alpha, **keywords)
            flags = threshold.flag(scores)
            results.append(BankResult(**labels, alpha=alpha, guarantee=guarantee, n_calibration=len(calibration),
                                      above_cutoff=int(np.sum(calibration > threshold.cutoff)),
                                      can_flag=bool(threshold.can_flag), fresh=len(fresh), flagged=int(flags.sum())))
    return results


def measure_case(case: str, case_index: int, features: CaseFeatures, runs, variants, args,
                 results: list, fit_seconds: dict) -> None:
    """Every detector on the same splits of one case (paired: a difference between detectors is
    not a difference of splits)."""
    for n_refs in args.references:
        for run in runs:
            if run.features == "patches" and n_refs != args.references[0] and case_index > 0 \
                    and not args.patch_all_cases:
                continue   # ~20 s a fit at 200 references: the larger counts on the first case only
            began = time.perf_counter()
            for index in range(args.splits):
                references, fresh = split(args.crops, n_refs, args.seed, index)
                if run.features == "patches":
                    fresh = fresh[:PATCH_FRESH]   # already in random order
                labels = dict(case=case, detector=run.key, n_references=n_refs, split=index)
                results += measure_bank(run, getattr(features, run.features), features.groups,
                                        references, fresh, variants, labels)
            seconds = (time.perf_counter() - began) / args.splits
            fit_seconds.setdefault(f"{run.key} at {n_refs} references", []).append(seconds)
            log(f"{case}: {run.key}, {n_refs} references: {args.splits} splits, {seconds:.1f} s each")


# --- 4. what a valid method would give ----------------------------------------------------------

def binomial_range(n: int, alpha: float, level: float = LEVEL) -> tuple[float, float]:
    """0.5% and 99.5% quantiles of Binomial(n, alpha), as rates."""
    tail = (1.0 - level) / 2.0
    return stats.binom.ppf(tail, n, alpha) / n, stats.binom.ppf(1.0 - tail, n, alpha) / n


def exact_count_pmf(bank: BankResult) -> np.ndarray:
    """Flagged-count distribution over 0..fresh for an exact conformal method with this bank's
    numbers: true rate R ~ Beta(r + 1, n - r) when the cutoff is the (r+1)-th largest of n i.i.d.
    calibration scores (the order statistics of uniforms), flagged | R ~ Binomial(fresh, R)."""
    counts = np.arange(bank.fresh + 1)
    if not bank.can_flag:
        return (counts == 0).astype(np.float64)
    r, n = bank.above_cutoff, bank.n_calibration
    return stats.betabinom.pmf(counts, bank.fresh, r + 1, n - r)


def exact_pooled_range(banks: list[BankResult], level: float = LEVEL) -> tuple[float, float, float]:
    """(mean, low, high) of the pooled rate for the exact method, the splits independent: the
    pooled count's distribution is the convolution of the splits' beta-binomials."""
    pmf = np.ones(1)
    for bank in banks:
        pmf = np.clip(fftconvolve(pmf, exact_count_pmf(bank)), 0.0, None)
    pmf /= pmf.sum()
    total = sum(b.fresh for b in banks)
    cdf = np.cumsum(pmf)
    tail = (1.0 - level) / 2.0
    low, high = np.searchsorted(cdf, tail), np.searchsorted(cdf, 1.0 - tail)
    return float(np.dot(np.arange(len(pmf)), pmf)) / total, low / total, high / total


def exact_share_above(bank: BankResult) -> tuple[float, float]:
    """For the exact method with this bank's numbers: (P(true rate > alpha), P(realized rate > alpha))."""
    if not bank.can_flag:
        return 0.0, 0.0
    r, n = bank.above_cutoff, bank.n_calibration
    true = stats.beta.sf(bank.alpha, r + 1, n - r)
    realized = stats.betabinom.sf(math.floor(bank.alpha * bank.fresh + 1e-9), bank.fresh, r + 1, n - r)
    return float(true), float(realized)


def verdict(rate: float, low: float, high: float) -> str:
    if rate > high:
        return "[ABOVE]"
    if rate < low:
        return "[FAR BELOW]"
    return "[OK]"


# --- 5. tables -----------------------------------------------------------------------------------

def groups_of(results: list[BankResult], guarantee: str):
    """Results grouped by (case, detector, references, alpha), in the order they were measured."""
    out: dict[tuple, list[BankResult]] = {}
    for b in results:
        if b.guarantee == guarantee:
            out.setdefault((b.case, b.detector, b.n_references, b.alpha), []).append(b)
    return out


def rate_table(results: list[BankResult], guarantee: str) -> list[str]:
    lines = ["| case | detector | refs | calib. scores | alpha | splits | fresh (pooled) | flagged | pooled rate "
             "| per-split mean ± sd | banks unable to flag | binomial 99% | verdict (binomial) "
             "| exact method: mean [99%] | verdict (split-aware) |",
             "| --- | --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | --- | ---: | --- | --- | --- | --- |"]
    for (case, detector, n_refs, alpha), banks in groups_of(results, guarantee).items():
        fresh, flagged = sum(b.fresh for b in banks), sum(b.flagged for b in banks)
        pooled = flagged / fresh
        rates = np.array([b.rate for b in banks])
        unable = sum(not b.can_flag for b in banks)
        b_low, b_high = binomial_range(fresh, alpha)
        e_mean, e_low, e_high = exact_pooled_range(banks)
        calibration = sorted({b.n_calibration for b in banks})
        lines.append(f"| {case} | {detector} | {n_refs} | {'/'.join(map(str, calibration))} | {alpha:g} | "
                     f"{len(banks)} | {fresh} | {flagged} | {pooled:.4f} | {rates.mean():.4f} ± {rates.std(ddof=1):.4f} "
                     f"| {unable}/{len(banks)} | [{b_low:.4f}, {b_high:.4f}] | {verdict(pooled, b_low, b_high)} "
                     f"| {e_mean:.4f} [{e_low:.4f}, {e_high:.4f}] | {verdict(pooled, e_low, e_high)} |")
    return lines


def share_table(results: list[BankResult], variants) -> list[str]:
    lines = ["| case | detector | refs | alpha | guarantee | splits | fresh / split | splits above alpha "
             "| exact method: share of true rates > alpha | exact method: expected share above [99%] | verdict |",
             "| --- | --- | ---: | ---: | --- | ---: | ---: | ---: | ---: | --- | --- |"]
    for guarantee, _ in variants:
        for (case, detector, n_refs, alpha), banks in groups_of(results, guarantee).items():
            above = sum(b.rate > alpha for b in banks)
            expected = np.array([exact_share_above(b) for b in banks])
            true_share, realized_share = expected.mean(axis=0)
            # The splits are independent: the count above alpha is about Binomial(splits, expected share).
            low = stats.binom.ppf((1 - LEVEL) / 2, len(banks), realized_share)
            high = stats.binom.ppf(1 - (1 - LEVEL) / 2, len(banks), realized_share)
            fresh = sorted({b.fresh for b in banks})
            lines.append(f"| {case} | {detector} | {n_refs} | {alpha:g} | {guarantee} | {len(banks)} | "
                         f"{'/'.join(map(str, fresh))} | {above}/{len(banks)} = {above / len(banks):.2f} | "
                         f"{true_share:.2f} | {realized_share:.2f} [{low / len(banks):.2f}, {high / len(banks):.2f}] "
                         f"| {'[ABOVE]' if above > high else '[OK]'} |")
    return lines


def summary_table(results: list[BankResult], guarantee: str) -> list[str]:
    """Pooled rate and split-aware verdict per case, detector and reference count: one row each."""
    rows: dict[tuple, dict] = {}
    for (case, detector, n_refs, alpha), banks in groups_of(results, guarantee).items():
        pooled = sum(b.flagged for b in banks) / sum(b.fresh for b in banks)
        _, low, high = exact_pooled_range(banks)
        unable = sum(not b.can_flag for b in banks)
        cell = f"{pooled:.4f} {verdict(pooled, low, high)}" + (f" ({unable}/{len(banks)} cannot flag)" if unable else "")
        rows.setdefault((case, detector, n_refs), {})[alpha] = cell
    lines = ["| case | detector | refs | " + " | ".join(f"alpha {a:g}" for a in ALPHAS) + " |",
             "| --- | --- | ---: | " + " | ".join("---" for _ in ALPHAS) + " |"]
    for (case, detector, n_refs), cells in rows.items():
        lines.append(f"| {case} | {detector} | {n_refs} | " + " | ".join(cells.get(a, "") for a in ALPHAS) + " |")
    return lines


# --- 6. the run ----------------------------------------------------------------------------------

def parse_counts(text: str) -> list[int]:
    counts = sorted({int(part) for part in text.split(",") if part.strip()})
    if not counts or counts[0] < 20:
        raise argparse.ArgumentTypeError(f"reference counts must be integers >= 20, got: {text!r}")
    return counts


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--cases", default="coffee,gravel", help="scikit-image sample pictures, one normal folder each")
    parser.add_argument("--crops", type=int, default=1000, help="crops per folder")
    parser.add_argument("--splits", type=int, default=20, help="random splits per case and reference count")
    parser.add_argument("--references", type=parse_counts, default=[100, 200], help="reference counts, e.g. 100,200")
    parser.add_argument("--detectors", default=",".join(r.key for r in DETECTOR_RUNS),
                        help="which of: " + ", ".join(r.key for r in DETECTOR_RUNS))
    parser.add_argument("--patch-all-cases", action="store_true",
                        help="fit patch-knn at every reference count on every case (default: the larger counts on "
                             "the first case only)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--quick", action="store_true", help="smoke run: first case, 300 crops, 5 splits, 100 references")
    parser.add_argument("--out", type=Path, default=None, help="also write the report (markdown) here")
    args = parser.parse_args()
    cases = [c.strip() for c in args.cases.split(",") if c.strip()]
    if args.quick:
        cases, args.crops, args.splits, args.references = cases[:1], 300, 5, [100]
    runs = [r for r in DETECTOR_RUNS if r.key in args.detectors.split(",")]
    unknown = set(args.detectors.split(",")) - {r.key for r in DETECTOR_RUNS}
    if unknown or not runs:
        parser.error(f"unknown detectors {sorted(unknown)}; known: {', '.join(r.key for r in DETECTOR_RUNS)}")
    if args.references[-1] > args.crops - 100:
        parser.error(f"--crops {args.crops} leaves fewer than 100 fresh normals at {args.references[-1]} references")
    if args.splits < 2:
        parser.error("--splits must be at least 2 (the spread of the per-split rates needs two)")
    pictures = {case: sample_picture(case) for case in cases}
    variants = threshold_variants()

    from oddling.backbones.representation import load_representation
    from oddling.embedding.options import RunOptions

    started = time.perf_counter()
    results: list[BankResult] = []
    fit_seconds: dict[str, list[float]] = {}
    with tempfile.TemporaryDirectory() as tmp:
        options = RunOptions(progress=False, cache_dir=Path(tmp) / "cache")
        kinds = {r.features for r in runs}
        representations = {kind: load_representation(spec, options.cache_dir, options.runtime)
                           for kind, spec in (("vectors", VECTOR_REPRESENTATION), ("patches", PATCH_REPRESENTATION))
                           if kind in kinds}
        for case_index, case in enumerate(cases):
            begun = time.perf_counter()
            folder = Path(tmp) / case
            paths = write_crops(pictures[case], folder, args.crops, seed=args.seed * 1000 + case_index)
            features = embed_case(folder, paths, representations, options)
            log(f"{case}: {len(paths)} crops cut and embedded in {time.perf_counter() - begun:.0f} s")
            with one_thread(with_torch="patches" in kinds):
                measure_case(case, case_index, features, runs, variants, args, results, fit_seconds)
            del features
    wall = time.perf_counter() - started

    lines = header(args, cases, pictures, runs, variants, wall, fit_seconds)
    lines += ["", "## Summary: pooled false-alarm rate and split-aware verdict (marginal guarantee)", ""]
    lines += summary_table(results, "marginal")
    for guarantee, _ in variants:
        lines += ["", f"## Table 1: realized false-alarm rate, guarantee {guarantee}", ""]
        lines += rate_table(results, guarantee)
    lines += ["", "## Table 2: share of splits whose realized rate exceeds alpha", ""]
    lines += share_table(results, variants)
    lines += ["", NOTES]
    text = "\n".join(lines) + "\n"
    print(text, end="")
    if args.out:
        args.out.write_text(text)


def header(args, cases, pictures, runs, variants, wall: float, fit_seconds: dict) -> list[str]:
    sizes = ", ".join(f"`{c}` ({'x'.join(map(str, pictures[c].shape[:2]))}{', grey' if pictures[c].ndim == 2 else ''})"
                      for c in cases)
    patch_note = ("every case" if args.patch_all_cases or len(args.references) == 1
                  else f"{args.references[0]} references on every case, the larger counts on `{cases[0]}` only")
    try:
        commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True, text=True,
                                cwd=Path(__file__).parent, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        commit = "unknown"
    timing = "; ".join(f"{key} {np.mean(values):.1f} s" for key, values in fit_seconds.items())
    return [
        "# Calibration validity of the detectors",
        "",
        f"Last run: {datetime.date.today().isoformat()}, `python benchmarks/bench_calibration.py "
        f"{' '.join(sys.argv[1:])}`, oddling commit {commit}; wall time {wall / 60:.1f} min.",
        "",
        f"- machine: {platform.platform()}, {os.cpu_count()} cores, Python {platform.python_version()}",
        f"- images: per case, {args.crops} square crops of one scikit-image sample picture: {sizes}; side uniform "
        f"in {CROP_SIDES[0]}-{CROP_SIDES[1]} px, position uniform, mirrored with probability 1/2 (seed {args.seed}); "
        "PNG files through the pipeline's intake",
        f"- features: `{VECTOR_REPRESENTATION}` (vector detectors), `{PATCH_REPRESENTATION}` (patch-knn), "
        "embedded once per case",
        f"- splits: {args.splits} seeded random splits per case and reference count, references "
        f"{', '.join(map(str, args.references))}, fresh normals = the other crops (patch-knn: the first "
        f"{PATCH_FRESH} of them; fitted at {patch_note})",
        "- detectors: " + ", ".join(f"{r.key} = `{r.name}`{f' {r.params}' if r.params else ''}" for r in runs)
        + "; groups = the crops' content hashes",
        f"- alphas: {', '.join(f'{a:g}' for a in ALPHAS)}; guarantees measured: {', '.join(v for v, _ in variants)}"
        + ("" if len(variants) > 1 else " (ConformalThreshold takes no `guarantee` keyword yet)"),
        f"- time per split (fit, score, flag; one thread), mean over cases: {timing}",
    ]


NOTES = """## How to read this

- A fresh normal is a crop never seen by the bank; flagging it is a false alarm. The conformal
  guarantee promises a rate at most alpha on average over banks (marginal), for references and
  fresh images exchangeable: true here by construction (every crop drawn the same way).
- "binomial 99%" is the plain range of Binomial(N pooled, alpha) / N pooled: it treats
  every fresh normal as independent, but the fresh normals of one split share one cutoff, so it
  is too narrow; "split-aware" is the range of an exact conformal method with the same numbers
  (see the docstring). A detector whose calibration scores are exchangeable with new scores lands
  inside the split-aware range; [FAR BELOW] there means conservative (recall thrown away),
  [ABOVE] means the false-alarm promise is broken. (Simulated with i.i.d. scores, 100
  calibration scores, 20 splits of 500 fresh normals at alpha 0.05: the binomial range missed an
  exact method's pooled rate 29% of the time, the split-aware range 1.2%.) Under a stricter
  guarantee ("confident"), a rate well below alpha is the point: its binomial verdict says how
  much lower, the split-aware one still checks the detector.
- "calib. scores": how many calibration scores a bank has (every detector calibrates on all
  references now). A bank with fewer than 1/alpha - 1 cannot flag anything at that alpha.
- Table 2: a split's rate is estimated from its fresh normals (a few hundred), so "splits above
  alpha" mixes the banks' true rates with counting noise; the exact method's expected share
  includes the same noise, its "share of true rates > alpha" does not.
- The splits of one case come from one folder: they show how the detectors behave on that kind
  of image, not on every kind; the second case is there so that a result is not one picture's luck."""


def log(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


if __name__ == "__main__":
    main()
