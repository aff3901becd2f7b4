"""tune: compare representations x detectors on the user's own images and keep the winner.

No single outlier method suits all data: kNN distances, Gaussian (Mahalanobis) distances,
reconstruction residuals and isolation forests each win somewhere, and which features to feed
them matters as much. So the comparison is run on the data at hand, honestly:

- every configuration is fitted on the reference folder only and scores the judging images: the
  user's labelled folder, or without one (or with `synthetic`) synthetic anomalies made from a
  seeded share of the references that is held out of every candidate's bank (jobs/tune_sets.py);
- candidates race (successive halving, jobs/tune_race.py): hopeless ones stop on a subsample, the
  choice is confirmed on the whole choosing half;
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
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from oddling.backbones.representation import RepresentationSpec, load_representation
from oddling.bank.store import save_bank
from oddling.data.intake import IntakeError, discover
from oddling.data.synthetic import KINDS as SYNTHETIC_KINDS
from oddling.detectors import make_detector
from oddling.embedding.options import RunOptions
from oddling.errors import OddlingError
from oddling.evaluation.metrics import CI_METHOD, content_counts
from oddling.files import refuse_existing, write_text
from oddling.jobs.rates import check_target_rate, warn_if_few_calibration
from oddling.jobs.reading import embed_paths, folder
from oddling.jobs.tune_race import Clock, FeatureStore, Trial, failed, keep_better_half, nested_rows, plan
from oddling.jobs.tune_sets import (MIN_PER_CLASS, JudgingSet, combine, embed_judging_set, hold_out, labelled_set,
                                    make_synthetic, scratch_folder)
from oddling.numbers import json_number

TIE = 0.005            # AUROC differences this small are noise at the usual test-set sizes
COST_SAMPLE = 16       # images embedded without the cache to measure what a new image costs
MIN_ROUND_REFERENCES = 50    # a race round fits on at least this many distinct references
MIN_ROUND_PER_CLASS = 12     # and judges on at least this many distinct contents of each class

# (representation, [(detector, params), ...]); vector detectors for vector representations.
VECTOR_DETECTORS = [("knn", {"k": 1}), ("knn", {"k": 5}), ("gaussian", {}), ("pca", {"variance": 0.95}),
                    ("pca", {"variance": 0.99}), ("iforest", {})]
PATCH_DETECTORS = [("patch-knn", {"coreset": 0.1})]
DEFAULT_REPRESENTATIONS = ["efficientnet-lite0", "efficientnet-lite0/stages:stage3+stage5+head", "pixels:32",
                           "colour:8", "efficientnet-lite0/patches:stage2+stage3",
                           "efficientnet-lite0/patches:stage3+stage4"]


def fit_command(trial: Trial, frame: str | None = None) -> str:
    params = " ".join(f"--param {k}={json.dumps(v)}" for k, v in trial.params.items())
    frame_text = f" --frame {frame}" if frame and frame != "stretch" else ""
    return (f"oddling fit REF_DIR --bank OUT --representation {trial.representation} --detector {trial.detector}"
            f"{frame_text} {params}").strip()


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
    labels: np.ndarray | None = field(default=None, repr=False)   # of the judging images, in set order
    choose: np.ndarray | None = field(default=None, repr=False)   # True for the choosing half, same order
    names: list[str] = field(default_factory=list, repr=False)    # their paths (labelled: relative to the test folder)
    contents: dict = field(default_factory=dict)   # metrics.content_counts of the judging images
    notes: list[str] = field(default_factory=list)   # for stderr: folders read by case, copies
    chosen_on: str = "labelled anomalies"
    holdout_per_kind: dict = field(default_factory=dict)
    frame: str | None = None
    rounds: int = 1
    seconds: float = 0.0
    held_out: list[str] = field(default_factory=list)   # references kept out of every candidate's bank

    def summary(self) -> dict:
        calibration = self.chosen.bank.calibration if self.chosen.bank is not None else {}
        return {
            "chosen": self.chosen.to_dict() | {"fit_command": fit_command(self.chosen, self.frame),
                                               "target_fpr": calibration.get("target_fpr"),
                                               "cutoff": calibration.get("cutoff"),
                                               "promise": calibration.get("promise"),
                                               "rate_note": calibration.get("note")},
            "chosen_on": self.chosen_on,
            "holdout_auroc": json_number(self.holdout_auroc),
            "holdout_auroc_ci95": [json_number(v) for v in self.holdout_auroc_ci95] if self.holdout_auroc_ci95 else None,
            "holdout_per_kind_auroc": {k: json_number(v) for k, v in sorted(self.holdout_per_kind.items())},
            "auroc_ci_method": CI_METHOD,
            "leaderboard": [t.to_dict() for t in self.leaderboard],
            "n_choose": self.n_choose, "n_holdout": self.n_holdout,
            **self.contents,
            "notes": self.notes,
            "rounds": self.rounds,
            "n_held_out_references": len(self.held_out),
            "bank": str(self.bank_path) if self.bank_path else None,
            "files": {k: str(v) for k, v in self.files.items()},
            "stopped_early": self.stopped_early,
            "note": ("leaderboard AUROCs are measured on the half of the judging images used to choose, so the "
                     "best of them is optimistic; holdout_auroc is measured on the other half, which played no part "
                     "in the choice; the halves split distinct contents (every copy of a file, and every synthetic "
                     "anomaly with the normal it was made from, is in the same half)"
                     + ("; synthetic anomalies are not your defects: confirm with `oddling evaluate` once labelled "
                        "examples exist" if "synthetic" in self.chosen_on else "")),
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
    normal and anomalous (a synthetic anomaly shares its source's group) goes where its normal
    copies go, and counts toward the anomalous half it lands in. Without groups every image is its
    own content (the same split as before groups).
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


def per_kind_auroc(labels: np.ndarray, kinds: list[str], scores: np.ndarray) -> dict:
    """AUROC of the normals against each anomaly kind alone."""
    from oddling.evaluation.metrics import auroc

    normal = labels == 0
    out = {}
    for kind in sorted({k for k, y in zip(kinds, labels) if y == 1}):
        mine = np.array([k == kind for k in kinds]) & (labels == 1)
        if normal.any() and mine.any():
            rows = normal | mine
            out[kind] = auroc(labels[rows], scores[rows])
    return out


def rank(trials: list[Trial]) -> list[Trial]:
    """Best AUROC first; among those within the tie band of the best, the cheapest first; failures last.
    Configurations whose bank cannot flag at the target rate come after every one that can: a bank
    that flags nothing is no choice while another can flag. Candidates the race stopped early rank
    after those that ran its last round (they were measured on fewer images)."""
    done = [t for t in trials if t.auroc is not None]
    rest = [t for t in trials if t.auroc is None]
    if not done:
        return rest
    last = max(t.rounds for t in done)
    finalists = [t for t in done if t.rounds == last]
    if len(finalists) < len(done):
        return rank(finalists) + sorted((t for t in done if t.rounds < last),
                                        key=lambda t: (-t.rounds, -t.auroc)) + rest
    able = [t for t in done if t.supports_target is not False]
    if able and len(able) < len(done):
        return rank(able) + rank([t for t in done if t.supports_target is False]) + rest
    top = max(done, key=lambda t: t.auroc)
    best, band = top.auroc, max(TIE, top.auroc_se or 0.0)
    ties = sorted((t for t in done if t.auroc >= best - band), key=lambda t: (t.ms_per_image or 0.0, -t.auroc))
    others = sorted((t for t in done if t.auroc < best - band), key=lambda t: (-t.auroc, t.ms_per_image or 0.0))
    return ties + others + rest


@dataclass
class Setting:
    """What one tune run needs at every step."""

    reference_dir: Path
    fit_refs: list[Path]          # what every candidate is fitted on (the hold-out left out)
    all_refs: list[Path]          # what the chosen configuration is fitted on at the end
    judging: JudgingSet
    choose: np.ndarray
    options: RunOptions
    quiet: RunOptions
    target_fpr: float | None
    promise: object
    frame: str | None
    clock: Clock
    ref_hashes: list = field(default_factory=list)
    held_out: list[Path] = field(default_factory=list)


def tune(
    test_dir: str | os.PathLike | None,
    reference_dir: str | os.PathLike,
    bank_path: str | os.PathLike | None = None,
    *,
    synthetic: bool = False,
    labels_csv: str | os.PathLike | None = None,
    normal_labels: tuple[str, ...] = ("normal",),
    representations: list[str] | None = None,
    grid: list[tuple[str, str, dict]] | None = None,
    budget_minutes: float | None = None,
    target_fpr: float | None = None,
    guarantee: str = "marginal",
    confidence: float | None = None,
    allow_no_cutoff: bool = False,
    frame: str | None = None,
    seed: int = 0,
    force: bool = False,
    race: bool = True,
    options: RunOptions | None = None,
) -> TuneResult:
    """Try a grid of representation x detector x parameters; keep the one that separates the judging
    images best, fitted on all of `reference_dir`, as the bank at `bank_path`.

    Judging images: the labelled `test_dir` (as `evaluate` reads it); without one (None), or with
    `synthetic`, synthetic anomalies made from a seeded share of the references held out of every
    candidate's bank (oddling.data.synthetic). See the module docstring for how the choice is kept
    honest (`holdout_auroc`). The target rate, guarantee, `allow_no_cutoff` and `frame` mean what
    they mean for `fit`. `race` False scores every candidate on everything (the full search).
    """
    from oddling.jobs.fitting import make_guarantee

    options = options or RunOptions()
    if test_dir is None and labels_csv is not None:
        raise OddlingError("--labels needs the labelled folder it describes")
    reference_dir = folder(reference_dir, "reference folder")
    test_dir = folder(test_dir, "test folder") if test_dir is not None else None
    target_fpr = check_target_rate(target_fpr) if target_fpr is not None else None
    promise = make_guarantee(guarantee, confidence)
    if budget_minutes is not None and budget_minutes <= 0:
        raise OddlingError(f"budget must be > 0 minutes, got: {budget_minutes}")
    files = _output_files(bank_path, force)
    grid = _checked_grid(grid or default_grid(representations), frame)
    clock = Clock(None if budget_minutes is None else 60 * budget_minutes)
    with scratch_folder() as scratch:
        setting = _setting(test_dir, reference_dir, bank_path, synthetic, labels_csv, normal_labels, seed, options,
                           target_fpr, promise, frame, clock, Path(scratch))
        trials, rounds, stopped = _race(grid, setting, seed, race)
        result = _finish(trials, setting, rounds, stopped, allow_no_cutoff, files, bank_path)
    if bank_path is not None:
        save_bank(result.chosen.bank, bank_path, force=force)
        write_leaderboard(result)
    return result


def _output_files(bank_path, force: bool) -> dict:
    if bank_path is None:
        return {}
    bank_path = Path(bank_path)
    files = {"leaderboard_csv": bank_path.with_name(bank_path.name + ".leaderboard.csv"),
             "leaderboard_json": bank_path.with_name(bank_path.name + ".leaderboard.json"),
             "figure": bank_path.with_name(bank_path.name + ".leaderboard.png")}
    refuse_existing(bank_path, *files.values(), force=force)
    return files


def _checked_grid(grid, frame: str | None):
    """Every configuration checked before any work starts."""
    from oddling.jobs.fitting import check_pairing

    for rep, name, params in grid:
        check_pairing(RepresentationSpec.parse(rep).framed(frame), make_detector(name, params))
    return grid


def _setting(test_dir, reference_dir, bank_path, synthetic, labels_csv, normal_labels, seed, options, target_fpr,
             promise, frame, clock, scratch: Path) -> Setting:
    exclude = (Path(bank_path),) if bank_path is not None else ()
    try:
        all_refs = discover(reference_dir, exclude=exclude)
    except IntakeError as exc:
        raise OddlingError(exc.status) from exc
    labelled = labelled_set(test_dir, labels_csv, normal_labels) if test_dir is not None else None
    made, fit_refs, held = None, all_refs, []
    if labelled is None or synthetic:
        fit_refs, held, held_hashes = hold_out(all_refs, seed)
        made = make_synthetic(held, held_hashes, scratch, list(SYNTHETIC_KINDS), seed, options.progress)
    judging = combine(labelled, made)
    if not judging.contents or made is not None:
        judging.contents = content_counts(judging.labels, judging.hashes)
    choose = split_halves(judging.labels, seed, judging.groups)
    quiet = RunOptions(**{**options.__dict__, "progress": False})
    from oddling.jobs.tune_sets import content_hash

    return Setting(reference_dir, fit_refs, all_refs, judging, choose, options, quiet, target_fpr, promise, frame,
                   clock, [content_hash(p) for p in fit_refs], held)


def _race(grid, setting: Setting, seed: int, race: bool) -> tuple[list[Trial], int, bool]:
    """Successive halving over the grid (one round when the data are too few to cut)."""
    from tqdm import tqdm

    judging, choose = setting.judging, setting.choose
    choose_rows = np.flatnonzero(choose)
    per_class = min(content_counts(judging.labels[choose_rows], [judging.hashes[i] for i in choose_rows])[key]
                    for key in ("n_distinct_normal", "n_distinct_anomalous"))
    ref_groups = len({h for h in setting.ref_hashes if h is not None})
    shares = plan(ref_groups, per_class, len(grid), race, MIN_ROUND_REFERENCES, MIN_ROUND_PER_CLASS)
    trials = [Trial(r, n, dict(p)) for r, n, p in grid]
    alive, stores, stopped = list(trials), {}, False
    bar = tqdm(total=len(grid), desc="tuning", unit="config", disable=not setting.options.progress, leave=False)
    try:
        for number, share in enumerate(shares, 1):
            last = number == len(shares)
            refs = nested_rows(setting.ref_hashes, share, [seed, 11]) if not last else np.arange(len(setting.fit_refs))
            judge = (choose_rows[nested_rows([judging.groups[i] for i in choose_rows], share, [seed, 12],
                                             judging.labels[choose_rows])] if not last else np.arange(len(judging)))
            bar.reset(total=len(alive))
            bar.set_description(f"tuning, round {number} of {len(shares)}")
            stopped = _run_round(alive, setting, stores, refs, judge, number, bar) or stopped
            if stopped:
                break
            if not last:
                survivors = keep_better_half(alive)
                for t in alive:
                    if t not in survivors and t.auroc is not None:
                        t.status = f"stopped after round {number} of {len(shares)} (the better half went on)"
                alive = survivors
    finally:
        bar.close()
    for t in trials:
        if t.rounds == 0 and t.status == "ok":
            t.status = "not tried: budget used up"
    return trials, len(shares), stopped


def _run_round(alive: list[Trial], setting: Setting, stores: dict, refs: np.ndarray, judge: np.ndarray,
               number: int, bar) -> bool:
    """Every live candidate fitted on the references `refs` and scored on the judging rows `judge`,
    representation by representation; True when the budget stopped the round."""
    for rep_id in dict.fromkeys(t.representation for t in alive):
        mine = [t for t in alive if t.representation == rep_id]
        store = _store(stores, rep_id, setting)
        ref_keys, judge_keys = [("ref", int(i)) for i in refs], [("judge", int(i)) for i in judge]
        seconds = (store.missing(ref_keys) + store.missing(judge_keys)) * store.ms_per_image() / 1000
        if not _affordable(seconds, alive, stores, setting):
            return True
        try:
            ref_x, ref_ok = store.get(ref_keys, [setting.fit_refs[i] for i in refs],
                                      lambda paths: _embed_references(paths, store, setting))
            judge_x, judge_ok = store.get(judge_keys, [int(i) for i in judge],
                                          lambda rows: embed_judging_set(setting.judging.subset(np.array(rows)),
                                                                         store.representation, setting.quiet))
            if store.uncached_ms is None:
                store.uncached_ms = _uncached_ms_per_image(setting.judging.subset(judge[:COST_SAMPLE]),
                                                           store.representation, setting.quiet)
        except OddlingError as exc:
            for trial in mine:
                failed(trial, exc)
                bar.update(1)
            continue
        ref_hashes = np.array([setting.ref_hashes[i] for i, ok in zip(refs, ref_ok) if ok], dtype=object)
        for trial in mine:
            if not _affordable(trial.fit_seconds * 2.5, alive, stores, setting):
                return True
            _evaluate(trial, store, ref_x, ref_hashes, judge_x, judge[judge_ok], setting, number)
            bar.update(1)
    return False


def _affordable(seconds: float, alive: list[Trial], stores: dict, setting: Setting) -> bool:
    """Whether the budget allows a step of `seconds`, keeping the end's reserve; the first candidate
    always runs, so there is something to keep."""
    if not any(t.auroc is not None for t in alive):
        return True
    return setting.clock.allows(seconds, _reserve(alive, stores, setting))


def _store(stores: dict, rep_id: str, setting: Setting) -> FeatureStore:
    if rep_id not in stores:
        spec = RepresentationSpec.parse(rep_id).framed(setting.frame)
        stores[rep_id] = FeatureStore(load_representation(spec, setting.options.cache_dir, setting.options.runtime),
                                      setting.quiet)
    return stores[rep_id]


def _embed_references(paths: list[Path], store: FeatureStore, setting: Setting) -> tuple[np.ndarray, np.ndarray]:
    embedded = embed_paths(setting.reference_dir, paths, store.representation, setting.quiet, "references")
    return embedded.embeddings, np.array([r.row is not None for r in embedded.records], dtype=bool)


def _uncached_ms_per_image(sample: JudgingSet, representation, options: RunOptions) -> float:
    """What a new image costs: decode, preprocess and features, with the cache out of the way."""
    import time

    start = time.perf_counter()
    embed_judging_set(sample, representation, RunOptions(**{**options.__dict__, "use_cache": False}))
    return 1000 * (time.perf_counter() - start) / max(1, len(sample))


def _reserve(alive: list[Trial], stores: dict, setting: Setting) -> float:
    """Seconds kept for the end: the best candidate so far fitted on every reference."""
    measured = [t for t in alive if t.auroc is not None]
    if not measured:
        return 0.0
    best = max(measured, key=lambda t: t.auroc)
    store = stores.get(best.representation)
    per_image = (store.ms_per_image() if store is not None else 20.0) / 1000
    unseen = len(setting.all_refs) - (len(setting.fit_refs) if store is not None and store.representation.cacheable
                                      else 0)
    return unseen * per_image + best.fit_seconds * max(1.0, len(setting.all_refs) / max(1, len(setting.fit_refs))) * 1.5


def _evaluate(trial: Trial, store: FeatureStore, ref_x: np.ndarray, ref_hashes: np.ndarray, judge_x: np.ndarray,
              judge_rows: np.ndarray, setting: Setting, number: int) -> None:
    """Fit one candidate, score the judging rows, and measure it on the choosing ones among them."""
    import time

    from oddling.detectors.conformal import ConformalThreshold
    from oddling.jobs.fitting import resolve_rate

    judging = setting.judging
    start = time.perf_counter()
    try:
        detector = make_detector(trial.detector, trial.params).fit(ref_x, ref_hashes)
        trial.fit_seconds = time.perf_counter() - start
        rate, _ = resolve_rate(detector.calibration_scores_, setting.target_fpr, setting.promise, allow_no_cutoff=True)
        trial.supports_target = ConformalThreshold(detector.calibration_scores_, rate, setting.promise).can_flag
        start = time.perf_counter()
        scores = detector.score_samples(judge_x, np.array([judging.hashes[i] for i in judge_rows], dtype=object))
        trial.ms_per_image = store.uncached_ms + 1000 * (time.perf_counter() - start) / max(1, len(scores))
    except OddlingError as exc:
        failed(trial, exc)
        return
    use = setting.choose[judge_rows]
    y, s = judging.labels[judge_rows][use], scores[use]
    groups = [judging.hashes[i] for i in judge_rows[use]]     # copies of one file count once in the interval
    if not ((y == 0).any() and (y == 1).any()):
        failed(trial, OddlingError("the judging images it could read hold one class only"))
        return
    trial.auroc, trial.auroc_ci95 = auroc_with_ci(y, s, groups)
    trial.auroc_se = _auroc_se(y, s, groups)
    trial.per_kind = per_kind_auroc(y, [judging.kinds[i] for i in judge_rows[use]], s)
    trial.rounds, trial.status = number, "ok"
    trial.scores, trial.readable = scores, np.isin(np.arange(len(judging)), judge_rows)


def _finish(trials: list[Trial], setting: Setting, rounds: int, stopped: bool, allow_no_cutoff: bool, files: dict,
            bank_path) -> TuneResult:
    """Rank, fit the chosen configuration on every reference, and measure it on the hold-out half."""
    board = rank(trials)
    chosen = board[0]
    if chosen.auroc is None:
        raise OddlingError("no configuration could be fitted and scored; first failure: "
                           + next((t.status for t in trials if t.status.startswith("failed")), "none"))
    chosen.bank = _final_bank(chosen, setting, allow_no_cutoff)
    if chosen.bank.threshold().can_flag:
        warn_if_few_calibration(chosen.bank.threshold(), stacklevel=3)
    judging, choose = setting.judging, setting.choose
    holdout, holdout_ci, holdout_kinds = None, None, {}
    held = ~choose[chosen.readable]
    y, s = judging.labels[chosen.readable][held], chosen.scores[held]
    if (y == 0).any() and (y == 1).any():
        groups = [g for g, r, c in zip(judging.hashes, chosen.readable, choose) if r and not c]
        holdout, holdout_ci = auroc_with_ci(y, s, groups)
        holdout_kinds = per_kind_auroc(y, [k for k, r, c in zip(judging.kinds, chosen.readable, choose)
                                           if r and not c], s)
    return TuneResult(chosen, board, holdout, holdout_ci, _half_counts(judging, choose),
                      _half_counts(judging, ~choose), Path(bank_path) if bank_path is not None else None, files,
                      stopped, judging.labels, choose, judging.names, judging.contents, judging.notes,
                      judging.chosen_on(), holdout_kinds, setting.frame, rounds, setting.clock.elapsed(),
                      [p.relative_to(setting.reference_dir).as_posix() for p in setting.held_out])


def _final_bank(chosen: Trial, setting: Setting, allow_no_cutoff: bool):
    """The chosen configuration fitted on every reference, calibrated as `fit` would, and recording
    what it was chosen on."""
    from oddling.jobs.fitting import build_bank
    from oddling.progress import progress_shown

    spec = RepresentationSpec.parse(chosen.representation).framed(setting.frame)
    representation = load_representation(spec, setting.options.cache_dir, setting.options.runtime)
    embedded = embed_paths(setting.reference_dir, setting.all_refs, representation, setting.options,
                           "fitting the chosen configuration")
    with progress_shown(setting.options.progress):
        bank = build_bank(embedded, representation, make_detector(chosen.detector, chosen.params), setting.target_fpr,
                          setting.reference_dir, guarantee=setting.promise, allow_no_cutoff=allow_no_cutoff)
    bank.tuning = {"chosen_on": setting.judging.chosen_on(), "auroc": json_number(chosen.auroc),
                   "per_kind_auroc": {k: json_number(v) for k, v in sorted(chosen.per_kind.items())},
                   "synthetic_kinds": sorted({k for k, m in zip(setting.judging.kinds, setting.judging.synthetic)
                                              if m and k != "normal"})}
    return bank


def _half_counts(judging: JudgingSet, half: np.ndarray) -> dict:
    labels = judging.labels
    counts = content_counts(labels[half], [g for g, inside in zip(judging.hashes, half) if inside])
    return {"normal": int(((labels == 0) & half).sum()), "anomalous": int(((labels == 1) & half).sum()),
            "distinct_normal": counts["n_distinct_normal"], "distinct_anomalous": counts["n_distinct_anomalous"]}


def leaderboard_csv(trials: list[Trial]) -> str:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(["rank", "representation", "detector", "params", "auroc", "auroc_ci_low", "auroc_ci_high",
                     "per_kind_auroc", "ms_per_image", "supports_target", "rounds", "status"])
    for i, t in enumerate(trials, 1):
        low, high = (t.auroc_ci95 or [None, None])
        kinds = json.dumps({k: round(v, 6) for k, v in sorted(t.per_kind.items())})
        writer.writerow([i, t.representation, t.detector, json.dumps(t.params, sort_keys=True),
                         "" if t.auroc is None else f"{t.auroc:.6f}", "" if low is None else f"{low:.6f}",
                         "" if high is None else f"{high:.6f}", kinds,
                         "" if t.ms_per_image is None else f"{t.ms_per_image:.2f}",
                         "" if t.supports_target is None else str(t.supports_target).lower(), t.rounds, t.status])
    return out.getvalue()


def write_leaderboard(result: TuneResult) -> None:
    from oddling.reporting.plots import plot_leaderboard

    write_text(result.files["leaderboard_csv"], leaderboard_csv(result.leaderboard), force=True)
    write_text(result.files["leaderboard_json"], json.dumps(result.summary(), indent=2, sort_keys=True) + "\n",
               force=True)
    plot_leaderboard([t.to_dict() for t in result.leaderboard if t.auroc is not None], result.holdout_auroc,
                     result.files["figure"])
