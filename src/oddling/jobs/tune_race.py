"""The race `tune` runs over its grid: successive halving (Jamieson & Talwalkar, "Non-stochastic
best arm identification and hyperparameter optimization", AISTATS 2016).

Every candidate is fitted on a seeded subsample of the references and scored on a subsample of
the choosing half; the better half goes on with twice as many of both; the last round is the whole
of both, so the choice is confirmed on all the choosing images. Hopeless candidates stop early, and
features are computed once per representation and image (kept in memory between rounds), so the
cost grows with what the better candidates need, not with the grid. A budget in seconds stops the
race before a step that would overrun it, keeping time for the final fit.
"""
from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field

import numpy as np

from oddling.errors import OddlingError, OddlingWarning

ROUND_GROWTH = 2        # each round doubles its share, and keeps the better half of the candidates
DEFAULT_MS = 20.0       # what an image's features are assumed to cost before it is measured


@dataclass
class Trial:
    representation: str
    detector: str
    params: dict
    auroc: float | None = None          # on the choosing images of the last round it ran
    auroc_ci95: list | None = None      # metrics.auroc_ci, as evaluate's
    auroc_se: float | None = None       # DeLong standard error on distinct contents, for the tie band only
    per_kind: dict = field(default_factory=dict)   # AUROC of normals against each anomaly kind
    ms_per_image: float | None = None   # features + scoring, per new image
    supports_target: bool | None = None  # whether its bank can flag anything at the target rate
    rounds: int = 0                     # rounds it ran (the race's last: confirmed on the whole choosing half)
    status: str = "ok"
    bank: object = field(default=None, repr=False)
    scores: np.ndarray | None = field(default=None, repr=False)     # of every readable judging image (last round)
    readable: np.ndarray | None = field(default=None, repr=False)
    fit_seconds: float = 0.0

    def to_dict(self) -> dict:
        from oddling.numbers import json_number

        return {"representation": self.representation, "detector": self.detector, "params": self.params,
                "auroc": json_number(self.auroc), "auroc_ci95": [json_number(v) for v in self.auroc_ci95 or []] or None,
                "per_kind_auroc": {k: json_number(v) for k, v in sorted(self.per_kind.items())},
                "ms_per_image": json_number(self.ms_per_image, 2), "supports_target": self.supports_target,
                "rounds": self.rounds, "status": self.status}


@dataclass
class Schedule:
    """The nested subsamples of each round: reference rows and judging rows (of the choosing half)."""

    references: list[np.ndarray]
    judging: list[np.ndarray]

    def __len__(self) -> int:
        return len(self.references)


def nested_rows(groups: list, share: float, seed, labels: np.ndarray | None = None) -> np.ndarray:
    """Rows of a seeded share of the distinct groups (every row of a chosen group), nested: a smaller
    share's rows are among a larger one's for the same seed. With `labels`, shared out per class."""
    codes: dict = {}
    code = np.array([codes.setdefault(g if g is not None else ("row", i), len(codes)) for i, g in enumerate(groups)])
    order = np.random.default_rng(seed).permutation(len(codes))
    rank_of = np.empty(len(codes), dtype=np.int64)
    rank_of[order] = np.arange(len(codes))
    if labels is None:
        keep = rank_of[code] < max(1, int(np.ceil(share * len(codes))))
        return np.flatnonzero(keep)
    keep = np.zeros(len(code), dtype=bool)
    for value in (0, 1):
        members = np.unique(code[labels == value])
        if not len(members):
            continue
        ranked = members[np.argsort(rank_of[members])]
        chosen = set(ranked[:max(1, int(np.ceil(share * len(ranked))))].tolist())
        keep |= np.isin(code, list(chosen)) & (labels == value)
    return np.flatnonzero(keep)


def plan(n_reference_groups: int, per_class: int, n_candidates: int, race: bool,
         min_references: int = 50, min_per_class: int = 12) -> list[float]:
    """The shares of each round, ending at 1: a round is halved off only while it keeps at least
    `min_references` distinct references and `min_per_class` distinct judging contents of each
    class (smaller samples rank by noise), and more than two candidates would race in it."""
    shares = [1.0]
    if not race:
        return shares
    alive = n_candidates
    while (alive > 2 and shares[0] / ROUND_GROWTH * n_reference_groups >= min_references
           and shares[0] / ROUND_GROWTH * per_class >= min_per_class):
        shares.insert(0, shares[0] / ROUND_GROWTH)
        alive = (alive + 1) // 2
    return shares


class FeatureStore:
    """Features of one representation, computed once per image and kept for later rounds."""

    def __init__(self, representation, options):
        self.representation, self.options = representation, options
        self.rows: dict[tuple, np.ndarray] = {}
        self.seconds, self.images = 0.0, 0
        self.uncached_ms: float | None = None    # what a new image's features cost, without the cache

    def ms_per_image(self) -> float:
        return 1000 * self.seconds / self.images if self.images else DEFAULT_MS

    def missing(self, keys: list[tuple]) -> int:
        return sum(k not in self.rows for k in keys)

    def get(self, keys: list[tuple], paths: list, embed) -> tuple[np.ndarray, np.ndarray]:
        """(features of the readable ones among `keys`, readable mask), embedding what is missing."""
        need = [(k, p) for k, p in zip(keys, paths) if k not in self.rows]
        if need:
            start = time.perf_counter()
            features, readable = embed([p for _, p in need])
            self.seconds += time.perf_counter() - start
            self.images += len(need)
            it = iter(features)
            for (key, _), ok in zip(need, readable):
                self.rows[key] = next(it) if ok else None
        found = [self.rows[k] for k in keys]
        readable = np.array([f is not None for f in found], dtype=bool)
        usable = [f for f in found if f is not None]
        return (np.stack(usable) if usable else np.zeros((0,))), readable


def keep_better_half(trials: list["Trial"]) -> list["Trial"]:
    """The better half (rounded up) by AUROC, ties to the cheaper; failures dropped."""
    done = sorted((t for t in trials if t.auroc is not None), key=lambda t: (-t.auroc, t.ms_per_image or 0.0))
    return done[:max(1, (len(done) + 1) // 2)]


class Clock:
    """The budget: elapsed time against `budget_s` (None: no limit)."""

    def __init__(self, budget_s: float | None):
        self.budget_s, self.started = budget_s, time.monotonic()

    def elapsed(self) -> float:
        return time.monotonic() - self.started

    def allows(self, seconds: float, reserve: float = 0.0) -> bool:
        return self.budget_s is None or self.elapsed() + seconds + reserve <= self.budget_s


def quiet_build(build, *args, **kwargs):
    """build_bank with the calibration warnings held back (said once, for the chosen bank)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OddlingWarning)
        return build(*args, **kwargs)


def failed(trial: "Trial", exc: OddlingError) -> "Trial":
    trial.status = f"failed: {exc}"
    trial.auroc = None
    return trial
