"""tune: compare representations x detectors on the user's own labelled images and keep the winner.

No single outlier method suits all data: kNN distances, Gaussian (Mahalanobis) distances,
reconstruction residuals and isolation forests each win somewhere, and which features to feed
them matters as much. So the comparison is run on the data at hand, honestly:

- every configuration is fitted on the reference folder only and scores the labelled folder;
- the configuration is *chosen* on a seeded half of the labelled images (stratified by class,
  grouped by content: every copy of a file, by SHA-256, goes to the same half, so a copy on the
  other side cannot make the check an echo of the choice) and its AUROC is then reported on the
  other half (`holdout_auroc`), which played no part in the choice; the leaderboard's figures,
  measured on the choosing half, are optimistic because the best of many is picked there;
- every AUROC interval is the one `evaluate` reports (metrics.auroc_ci: Newcombe's score
  interval, each distinct content counted once);
- near ties go to the cheaper configuration (ms per image, measured without the cache, as new
  images will cost): within one standard error of the best, the "one-standard-error rule" of
  Breiman et al. 1984 (Hastie, Tibshirani & Friedman, *Elements of Statistical Learning*, 7.10),
  and never less than TIE. That standard error is DeLong's (metrics.delong_variance, on distinct
  contents), not the interval's: it is the usual one for comparing AUROCs and needs no
  distributional model, only two distinct contents of each class.
"""
from __future__ import annotations

import csv
import io
import json
import os
import sys
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from oddling.backbones.representation import RepresentationSpec, load_representation
from oddling.bank.store import save_bank
from oddling.data.intake import IntakeError, check_type, discover, sha256_file
from oddling.detectors import make_detector
from oddling.embedding.options import RunOptions
from oddling.embedding.runner import OK
from oddling.errors import OddlingError
from oddling.evaluation.metrics import CI_METHOD, content_counts
from oddling.errors import OddlingWarning
from oddling.files import refuse_existing, write_text
from oddling.jobs.evaluation import attach_labels, copies_notes
from oddling.jobs.rates import check_target_rate, warn_if_few_calibration
from oddling.jobs.reading import embed_paths, folder
from oddling.reporting.results import ScoreRow, json_number

MIN_PER_CLASS = 10     # below this an AUROC, let alone a choice between configurations, means little
TIE = 0.005            # AUROC differences this small are noise at the usual test-set sizes
COST_SAMPLE = 16       # images embedded without the cache to measure what a new image costs

# (representation, [(detector, params), ...]); vector detectors for vector representations.
VECTOR_DETECTORS = [("knn", {"k": 1}), ("knn", {"k": 5}), ("gaussian", {}), ("pca", {"variance": 0.95}),
                    ("pca", {"variance": 0.99}), ("iforest", {})]
PATCH_DETECTORS = [("patch-knn", {"coreset": 0.1})]
DEFAULT_REPRESENTATIONS = ["efficientnet-lite0", "efficientnet-lite0/stages:stage3+stage5+head", "pixels:32",
                           "efficientnet-lite0/patches:stage2+stage3", "efficientnet-lite0/patches:stage3+stage4"]


@dataclass
class Trial:
    representation: str
    detector: str
    params: dict
    auroc: float | None = None          # on the choosing half
    auroc_ci95: list | None = None      # metrics.auroc_ci, as evaluate's
    auroc_se: float | None = None       # DeLong standard error on distinct contents, for the tie band only
    ms_per_image: float | None = None   # features + scoring, per image of the labelled folder
    supports_target: bool | None = None  # whether its bank can flag anything at the target rate
    status: str = "ok"
    bank: object = field(default=None, repr=False)
    scores: np.ndarray | None = field(default=None, repr=False)     # of the readable labelled images
    readable: np.ndarray | None = field(default=None, repr=False)

    def to_dict(self) -> dict:
        return {"representation": self.representation, "detector": self.detector, "params": self.params,
                "auroc": json_number(self.auroc), "auroc_ci95": [json_number(v) for v in self.auroc_ci95 or []] or None,
                "ms_per_image": json_number(self.ms_per_image, 2), "supports_target": self.supports_target,
                "status": self.status}

    def fit_command(self) -> str:
        params = " ".join(f"--param {k}={json.dumps(v)}" for k, v in self.params.items())
        return f"oddling fit REF_DIR --bank OUT --representation {self.representation} --detector {self.detector} {params}".strip()


@dataclass
class TuneResult:
    chosen: Trial
    leaderboard: list[Trial]      # best first; failed and untried configurations last
    holdout_auroc: float | None
    holdout_auroc_ci95: list | None
    n_choose: dict
    n_holdout: dict
    bank_path: Path | None
    files: dict = field(default_factory=dict)
    stopped_early: bool = False
    labels: np.ndarray | None = field(default=None, repr=False)   # of the labelled images, in discovery order
    choose: np.ndarray | None = field(default=None, repr=False)   # True for the choosing half, same order
    names: list[str] = field(default_factory=list, repr=False)    # their paths relative to the test folder
    contents: dict = field(default_factory=dict)   # metrics.content_counts of the labelled images
    notes: list[str] = field(default_factory=list)   # for stderr: folders read by case, copies

    def summary(self) -> dict:
        calibration = self.chosen.bank.calibration if self.chosen.bank is not None else {}
        return {
            "chosen": self.chosen.to_dict() | {"fit_command": self.chosen.fit_command(),
                                               "target_fpr": calibration.get("target_fpr"),
                                               "cutoff": calibration.get("cutoff"),
                                               "promise": calibration.get("promise"),
                                               "rate_note": calibration.get("note")},
            "holdout_auroc": json_number(self.holdout_auroc),
            "holdout_auroc_ci95": [json_number(v) for v in self.holdout_auroc_ci95] if self.holdout_auroc_ci95 else None,
            "auroc_ci_method": CI_METHOD,
            "leaderboard": [t.to_dict() for t in self.leaderboard],
            "n_choose": self.n_choose, "n_holdout": self.n_holdout,
            **self.contents,
            "notes": self.notes,
            "bank": str(self.bank_path) if self.bank_path else None,
            "files": {k: str(v) for k, v in self.files.items()},
            "stopped_early": self.stopped_early,
            "note": ("leaderboard AUROCs are measured on the half of the labelled images used to choose, so the "
                     "best of them is optimistic; holdout_auroc is measured on the other half, which played no part "
                     "in the choice; the halves split distinct contents (every copy of a file is in the same half)"),
        }


def default_grid(representations: list[str] | None = None) -> list[tuple[str, str, dict]]:
    grid = []
    for rep in representations or DEFAULT_REPRESENTATIONS:
        spec = RepresentationSpec.parse(rep)
        for name, params in (PATCH_DETECTORS if spec.feature_kind == "patches" else VECTOR_DETECTORS):
            grid.append((spec.id, name, dict(params)))
    return grid


def split_halves(labels: np.ndarray, seed: int, groups=None) -> np.ndarray:
    """True for the choosing half: each class's distinct contents shuffled (seeded) and split in two.

    `groups` names each image's content (its SHA-256; None: a content of its own); every copy of
    one content lands in the same half, so no content is on both sides. A content labelled both
    normal and anomalous goes where its normal copies go, and counts toward the anomalous half it
    lands in. Without groups every image is its own content (the same split as before groups).
    """
    labels = np.asarray(labels)
    groups = list(range(len(labels))) if groups is None else [
        g if g is not None else ("file", i) for i, g in enumerate(groups)]
    codes: dict = {}
    code = np.array([codes.setdefault(g, len(codes)) for g in groups], dtype=np.int64)
    rng = np.random.default_rng(seed)
    side: dict[int, bool] = {}
    for value in (0, 1):
        members = list(dict.fromkeys(code[labels == value].tolist()))   # first appearance order
        free = np.array([c for c in members if c not in side], dtype=np.int64)
        wanted = (len(members) + 1) // 2 - sum(side[c] for c in members if c in side)
        order = rng.permutation(free)
        for i, c in enumerate(order.tolist()):
            side[c] = i < wanted
    return np.array([side[c] for c in code.tolist()], dtype=bool)


def auroc_with_ci(labels: np.ndarray, scores: np.ndarray, groups=None) -> tuple[float, list]:
    """(AUROC over every image, 95% interval over distinct contents): the figures evaluate reports."""
    from oddling.evaluation.metrics import auroc, auroc_ci

    return auroc(labels, scores), list(auroc_ci(labels, scores, groups))


def _auroc_se(labels: np.ndarray, scores: np.ndarray, groups=None) -> float | None:
    """DeLong's standard error with each distinct content once; None below two contents of a class."""
    from oddling.evaluation.metrics import delong_variance, distinct_contents

    var = delong_variance(*distinct_contents(labels, scores, groups))
    return None if np.isnan(var) else float(np.sqrt(max(var, 0.0)))


def _uncached_ms_per_image(root: Path, paths: list[Path], representation, options: RunOptions) -> float:
    """What a new image costs: decode, preprocess and features, with the cache out of the way."""
    start = time.perf_counter()
    embed_paths(root, paths, representation, RunOptions(**{**options.__dict__, "use_cache": False}), "timing")
    return 1000 * (time.perf_counter() - start) / max(1, len(paths))


def rank(trials: list[Trial]) -> list[Trial]:
    """Best AUROC first; among those within the tie band of the best, the cheapest first; failures last.
    Configurations whose bank cannot flag at the target rate come after every one that can: a bank
    that flags nothing is no choice while another can flag."""
    done = [t for t in trials if t.auroc is not None]
    rest = [t for t in trials if t.auroc is None]
    if not done:
        return rest
    able = [t for t in done if t.supports_target is not False]
    if able and len(able) < len(done):
        return rank(able) + rank([t for t in done if t.supports_target is False]) + rest
    top = max(done, key=lambda t: t.auroc)
    best, band = top.auroc, max(TIE, top.auroc_se or 0.0)
    ties = sorted((t for t in done if t.auroc >= best - band), key=lambda t: (t.ms_per_image or 0.0, -t.auroc))
    others = sorted((t for t in done if t.auroc < best - band), key=lambda t: (-t.auroc, t.ms_per_image or 0.0))
    return ties + others + rest


def _content_hash(path: Path) -> str | None:
    """The file's SHA-256 (intake.sha256_file) after the checks made before any open, as the runner
    does; None for a file those refuse or that cannot be read (it is then a content of its own)."""
    try:
        check_type(path)
        return sha256_file(path)
    except (IntakeError, OSError):
        return None


@dataclass
class Labelled:
    """The labelled images of a test folder, in discovery order, with their content hashes."""

    paths: list[Path]
    labels: np.ndarray
    names: list[str]
    hashes: list[str | None]
    contents: dict     # metrics.content_counts
    notes: list[str]


def _labelled_paths(test_dir: Path, labels_csv, normal_labels) -> Labelled:
    try:
        paths = discover(test_dir)
    except IntakeError as exc:
        raise OddlingError(exc.status) from exc
    rows = [ScoreRow(path=p.relative_to(test_dir).as_posix(), status=OK) for p in paths]
    gaps = attach_labels(rows, labels_csv, normal_labels, test_dir)
    keep = [(p, r) for p, r in zip(paths, rows) if r.label is not None]
    labels = np.array([r.label for _, r in keep], dtype=np.int64)
    hashes = [_content_hash(p) for p, _ in keep]
    contents = content_counts(labels, hashes)
    n0, n1 = int((labels == 0).sum()), int((labels == 1).sum())
    d0, d1 = contents["n_distinct_normal"], contents["n_distinct_anomalous"]
    if d0 < MIN_PER_CLASS or d1 < MIN_PER_CLASS:
        copies = f" ({d0} and {d1} distinct contents)" if (d0, d1) != (n0, n1) else ""
        raise OddlingError(
            f"{test_dir} has {n0} normal and {n1} anomalous labelled images{copies}; tune needs at least "
            f"{MIN_PER_CLASS} of each, copies of one file counted once (half of them choose, half check the "
            f"choice). Normal folders: {', '.join(normal_labels)}")
    notes = list(gaps["notes"]) + copies_notes(contents, len(keep))
    return Labelled([p for p, _ in keep], labels, [r.path for _, r in keep], hashes, contents, notes)


def tune(
    test_dir: str | os.PathLike,
    reference_dir: str | os.PathLike,
    bank_path: str | os.PathLike | None = None,
    *,
    labels_csv: str | os.PathLike | None = None,
    normal_labels: tuple[str, ...] = ("normal",),
    representations: list[str] | None = None,
    grid: list[tuple[str, str, dict]] | None = None,
    budget_minutes: float | None = None,
    target_fpr: float | None = None,
    guarantee: str = "marginal",
    confidence: float | None = None,
    allow_no_cutoff: bool = False,
    seed: int = 0,
    force: bool = False,
    options: RunOptions | None = None,
) -> TuneResult:
    """Try a grid of representation x detector x parameters; keep the one that separates the labelled
    images best, fitted on all of `reference_dir`, as the bank at `bank_path`.

    Labels come from `test_dir` as `evaluate` reads them. See the module docstring for how the
    choice is kept honest (`holdout_auroc`). The target rate, guarantee and `allow_no_cutoff` mean
    what they mean for `fit`: every configuration's bank is calibrated so; those that cannot flag at
    the rate are marked (`supports_target`) and not chosen while another can; a chosen bank that
    cannot flag is refused unless `allow_no_cutoff`.
    """
    from oddling.jobs.fitting import build_bank, check_pairing, make_guarantee, resolve_rate

    options = options or RunOptions()
    test_dir, reference_dir = folder(test_dir, "test folder"), folder(reference_dir, "reference folder")
    if target_fpr is not None:
        target_fpr = check_target_rate(target_fpr)
    promise = make_guarantee(guarantee, confidence)
    if budget_minutes is not None and budget_minutes <= 0:
        raise OddlingError(f"budget must be > 0 minutes, got: {budget_minutes}")
    files = {}
    if bank_path is not None:
        bank_path = Path(bank_path)
        files = {"leaderboard_csv": bank_path.with_name(bank_path.name + ".leaderboard.csv"),
                 "leaderboard_json": bank_path.with_name(bank_path.name + ".leaderboard.json"),
                 "figure": bank_path.with_name(bank_path.name + ".leaderboard.png")}
        refuse_existing(bank_path, *files.values(), force=force)
    grid = grid or default_grid(representations)
    for rep, name, params in grid:        # every configuration checked before any work starts
        check_pairing(RepresentationSpec.parse(rep), make_detector(name, params))
    labelled = _labelled_paths(test_dir, labels_csv, normal_labels)
    test_paths, labels, hashes = labelled.paths, labelled.labels, labelled.hashes
    choose = split_halves(labels, seed, hashes)
    exclude = (bank_path,) if bank_path is not None else ()
    ref_paths = discover(reference_dir, exclude=exclude)

    started = time.monotonic()
    trials: list[Trial] = []
    stopped = False
    from tqdm import tqdm

    bar = tqdm(total=len(grid), desc="tuning", unit="config", file=sys.stderr, disable=not options.progress,
               leave=False)
    quiet = RunOptions(**{**options.__dict__, "progress": False})
    try:
        for rep_id in dict.fromkeys(r for r, _, _ in grid):
            configs = [(n, p) for r, n, p in grid if r == rep_id]
            # The budget is checked between representations, once there is something to keep.
            out_of_time = budget_minutes is not None and time.monotonic() - started > 60 * budget_minutes
            if stopped or (out_of_time and any(t.auroc is not None for t in trials)):
                stopped = True
                trials += [Trial(rep_id, n, p, status="not tried: budget used up") for n, p in configs]
                bar.update(len(configs))
                continue
            bar.set_postfix_str(rep_id)
            try:
                representation = load_representation(rep_id, options.cache_dir, options.runtime)
                refs = embed_paths(reference_dir, ref_paths, representation, quiet, "references")
                test = embed_paths(test_dir, test_paths, representation, quiet, "labelled images")
                embed_ms = _uncached_ms_per_image(test_dir, test_paths[:COST_SAMPLE], representation, quiet)
            except OddlingError as exc:
                trials += [Trial(rep_id, n, p, status=f"failed: {exc}") for n, p in configs]
                bar.update(len(configs))
                continue
            readable = np.array([r.row is not None for r in test.records])
            readable_hashes = [h for h, ok in zip(hashes, readable) if ok]
            for name, params in configs:
                trial = Trial(rep_id, name, params)
                try:
                    with warnings.catch_warnings():   # said once, for the chosen bank, after the bar is gone
                        warnings.simplefilter("ignore", OddlingWarning)
                        bank = build_bank(refs, representation, make_detector(name, params), target_fpr,
                                          reference_dir, guarantee=promise, allow_no_cutoff=True)
                    trial.supports_target = bank.threshold().can_flag
                    t0 = time.perf_counter()
                    scores = bank.detector.score_samples(test.embeddings, test.row_hashes)
                    trial.ms_per_image = embed_ms + 1000 * (time.perf_counter() - t0) / max(1, len(scores))
                    use = choose[readable]
                    y, groups = labels[readable][use], [h for h, c in zip(readable_hashes, use) if c]
                    trial.auroc, trial.auroc_ci95 = auroc_with_ci(y, scores[use], groups)
                    trial.auroc_se = _auroc_se(y, scores[use], groups)
                    trial.bank, trial.scores, trial.readable = bank, scores, readable
                except OddlingError as exc:
                    trial.status = f"failed: {exc}"
                trials.append(trial)
                bar.update(1)
    finally:
        bar.close()
    board = rank(trials)
    chosen = board[0]
    if chosen.auroc is None:
        raise OddlingError("no configuration could be fitted and scored; first failure: "
                           + next((t.status for t in trials if t.status != "ok"), "none"))
    # The chosen bank keeps the promise asked for, or says why it cannot (as fit would).
    resolve_rate(chosen.bank.calibration_scores, target_fpr, promise, allow_no_cutoff)
    if chosen.bank.threshold().can_flag:
        warn_if_few_calibration(chosen.bank.threshold(), stacklevel=2)
    held = ~choose
    holdout, holdout_ci = _holdout(chosen, labels, held, hashes)
    result = TuneResult(chosen, board, holdout, holdout_ci, _half_counts(labels, hashes, choose),
                        _half_counts(labels, hashes, held), bank_path, files, stopped, labels, choose,
                        labelled.names, labelled.contents, labelled.notes)
    if bank_path is not None:
        save_bank(chosen.bank, bank_path, force=force)
        write_leaderboard(result)
    return result


def _half_counts(labels: np.ndarray, hashes: list, half: np.ndarray) -> dict:
    counts = content_counts(labels[half], [h for h, inside in zip(hashes, half) if inside])
    return {"normal": int(((labels == 0) & half).sum()), "anomalous": int(((labels == 1) & half).sum()),
            "distinct_normal": counts["n_distinct_normal"], "distinct_anomalous": counts["n_distinct_anomalous"]}


def _holdout(trial: Trial, labels: np.ndarray, held: np.ndarray, hashes: list) -> tuple[float | None, list | None]:
    # Unreadable labelled files have no score: compare on the readable ones.
    use = held[trial.readable]
    y, s = labels[trial.readable][use], trial.scores[use]
    if not ((y == 0).any() and (y == 1).any()):
        return None, None
    groups = [h for h, ok, inside in zip(hashes, trial.readable, held) if ok and inside]
    return auroc_with_ci(y, s, groups)


def leaderboard_csv(trials: list[Trial]) -> str:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(["rank", "representation", "detector", "params", "auroc", "auroc_ci_low", "auroc_ci_high",
                     "ms_per_image", "status"])
    for i, t in enumerate(trials, 1):
        low, high = (t.auroc_ci95 or [None, None])
        writer.writerow([i, t.representation, t.detector, json.dumps(t.params, sort_keys=True),
                         "" if t.auroc is None else f"{t.auroc:.6f}", "" if low is None else f"{low:.6f}",
                         "" if high is None else f"{high:.6f}",
                         "" if t.ms_per_image is None else f"{t.ms_per_image:.2f}", t.status])
    return out.getvalue()


def write_leaderboard(result: TuneResult) -> None:
    from oddling.reporting.plots import plot_leaderboard

    write_text(result.files["leaderboard_csv"], leaderboard_csv(result.leaderboard), force=True)
    write_text(result.files["leaderboard_json"], json.dumps(result.summary(), indent=2, sort_keys=True) + "\n",
               force=True)
    plot_leaderboard([t.to_dict() for t in result.leaderboard if t.auroc is not None], result.holdout_auroc,
                     result.files["figure"])
