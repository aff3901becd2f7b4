"""What `tune` judges configurations on: labelled images of the user's own, synthetic anomalies made
from held-out references, or both, with the content groups that keep copies (and a synthetic
anomaly and the normal it was made from) on one side of every split."""
from __future__ import annotations

import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from oddling.data.intake import IntakeError, check_type, discover, load_rgb, sha256_file
from oddling.embedding.runner import OK
from oddling.errors import OddlingError

MIN_PER_CLASS = 10        # below this an AUROC, let alone a choice between configurations, means little
HOLDOUT_SHARE = 0.2       # of the distinct references, held out to make synthetic anomalies from
MIN_FIT_REFERENCES = 20   # references left for the candidates' banks after the hold-out
SYNTHETIC_FOLDER = "synthetic"


@dataclass
class JudgingSet:
    """The images every candidate is scored on, in a fixed order, with their truth.

    Image i is `roots[i] / names[i]` (labelled images under the test folder, synthetic ones under a
    scratch folder); `groups` name each image's content: its SHA-256, or for a synthetic image the
    SHA-256 of the reference it was made from, so it and its normal stay together.
    """

    roots: list[Path]
    names: list[str]
    labels: np.ndarray            # 1 anomalous, 0 normal
    kinds: list[str]              # the anomaly kind ("normal" for normals): a labelled folder or a synthetic kind
    groups: list[str | None]      # what keeps images on one side of a split (see above)
    synthetic: np.ndarray         # True for images made here from held-out references
    hashes: list[str | None] = field(default_factory=list)   # each file's own SHA-256: copies count once
    notes: list[str] = field(default_factory=list)
    contents: dict = field(default_factory=dict)

    @property
    def paths(self) -> list[Path]:
        return [root / name for root, name in zip(self.roots, self.names)]

    def __len__(self) -> int:
        return len(self.names)

    def subset(self, rows: np.ndarray) -> "JudgingSet":
        rows = np.asarray(rows, dtype=np.int64)
        pick = lambda items: [items[i] for i in rows.tolist()]   # noqa: E731
        return JudgingSet(pick(self.roots), pick(self.names), self.labels[rows], pick(self.kinds), pick(self.groups),
                          self.synthetic[rows], pick(self.hashes), self.notes, self.contents)

    def chosen_on(self) -> str:
        labelled, made = bool((~self.synthetic).any()), bool(self.synthetic.any())
        return {(True, False): "labelled anomalies", (False, True): "synthetic anomalies",
                (True, True): "labelled and synthetic anomalies"}[(labelled, made)]


def content_hash(path: Path) -> str | None:
    """The file's SHA-256 after the checks made before any open, as the runner does; None for a file
    those refuse or that cannot be read (it is then a content of its own)."""
    try:
        check_type(path)
        return sha256_file(path)
    except (IntakeError, OSError):
        return None


def hold_out(ref_paths: list[Path], seed: int) -> tuple[list[Path], list[Path], list[str | None]]:
    """(references the candidates are fitted on, held-out references, the held-out ones' hashes):
    a seeded share of the distinct contents, every copy of a held-out content held out with it."""
    hashes = [content_hash(p) for p in ref_paths]
    usable = sorted({h for h in hashes if h is not None})
    n_held = max(MIN_PER_CLASS, int(round(HOLDOUT_SHARE * len(usable))))
    if len(usable) - n_held < MIN_FIT_REFERENCES:
        raise OddlingError(
            f"tune without labelled defects holds out {n_held} references to make synthetic anomalies from and "
            f"needs {MIN_FIT_REFERENCES} more to fit on; the reference folder has {len(usable)} readable distinct "
            f"images: add references (at least {n_held + MIN_FIT_REFERENCES}) or give a labelled folder")
    held = set(np.random.default_rng([seed, 7]).permutation(len(usable))[:n_held].tolist())
    held_hashes = {usable[i] for i in held}
    fit = [p for p, h in zip(ref_paths, hashes) if h not in held_hashes]
    out = [(p, h) for p, h in zip(ref_paths, hashes) if h in held_hashes]
    first = {}
    for p, h in out:                      # one file per held-out content
        first.setdefault(h, p)
    return fit, list(first.values()), list(first.keys())


def _writer(path: Path):
    """How a synthetic image is saved so that it is encoded as its source: JPEG sources at their
    estimated quality, everything else as PNG (lossless: no artefact of its own)."""
    from oddling.data.encoding import image_format

    fmt, quality = image_format(path)
    if fmt == "JPEG":
        return ".jpg", {"format": "JPEG", "quality": int(quality or 90)}
    return ".png", {"format": "PNG"}


def make_synthetic(held: list[Path], held_hashes: list[str], out: Path, kinds: list[str], seed: int,
                   progress: bool = False) -> JudgingSet:
    """For every held-out reference: itself, re-encoded (normal), and one synthetic anomaly of each
    kind (oddling.data.synthetic), saved under `out` encoded as the source is (so the encoding never
    tells the two classes apart); another held-out image is the cut-paste donor."""
    from PIL import Image

    from oddling.data.synthetic import make_anomaly
    from oddling.progress import bar, progress_shown

    import hashlib

    names, labels, kind_of, groups, hashes = [], [], [], [], []
    images = []
    for path in held:
        try:
            images.append(np.asarray(load_rgb(path)))
        except IntakeError:
            images.append(None)
    with progress_shown(progress), bar(len(held), "making synthetic anomalies", "image") as shown:
        for i, (path, digest, image) in enumerate(zip(held, held_hashes, images)):
            shown.update(1)
            if image is None or min(image.shape[:2]) < 8:
                continue
            suffix, save = _writer(path)
            donor = next((d for d in images[i + 1:] + images[:i] if d is not None and d.shape == image.shape), None)
            for kind, picture in [("normal", image)] + [
                    (k, make_anomaly(image, k, [seed, i, j], donor)[0]) for j, k in enumerate(kinds)]:
                name = f"{SYNTHETIC_FOLDER}/{kind}/{i:05d}{suffix}"
                (out / name).parent.mkdir(parents=True, exist_ok=True)
                Image.fromarray(picture).save(out / name, **save)
                hashes.append(hashlib.sha256((out / name).read_bytes()).hexdigest())
                names.append(name)
                labels.append(0 if kind == "normal" else 1)
                kind_of.append(kind)
                groups.append(digest)
    n_sources = len(set(groups))
    if n_sources < MIN_PER_CLASS:
        raise OddlingError(f"only {n_sources} held-out references could be read to make synthetic anomalies from; "
                           f"tune needs at least {MIN_PER_CLASS}")
    return JudgingSet([out] * len(names), names, np.array(labels, dtype=np.int64), kind_of, groups,
                      np.ones(len(names), dtype=bool), hashes)


def combine(labelled: JudgingSet | None, synthetic: JudgingSet | None) -> JudgingSet:
    """One set of both (labelled first), or the one given."""
    parts = [s for s in (labelled, synthetic) if s is not None]
    if len(parts) == 1:
        return parts[0]
    return JudgingSet(sum((p.roots for p in parts), []), sum((p.names for p in parts), []),
                      np.concatenate([p.labels for p in parts]), sum((p.kinds for p in parts), []),
                      sum((p.groups for p in parts), []), np.concatenate([p.synthetic for p in parts]),
                      sum((p.hashes for p in parts), []), sum((p.notes for p in parts), []))


def embed_judging_set(judging: JudgingSet, representation, options) -> tuple[np.ndarray, np.ndarray]:
    """(features of the readable images in set order, which images are readable), embedding each
    folder's images through the same runner and cache as every other job."""
    from oddling.jobs.reading import embed_paths

    features, readable = [], np.zeros(len(judging), dtype=bool)
    start = 0
    while start < len(judging):
        root = judging.roots[start]
        end = start
        while end < len(judging) and judging.roots[end] == root:
            end += 1
        embedded = embed_paths(root, [root / n for n in judging.names[start:end]], representation, options,
                               "judging images")
        readable[start:end] = [r.row is not None for r in embedded.records]
        features.append(embedded.embeddings)
        start = end
    return np.concatenate(features), readable


def labelled_set(test_dir: Path, labels_csv, normal_labels) -> JudgingSet:
    """The labelled images of a test folder (as `evaluate` reads them), with their content hashes;
    fewer than MIN_PER_CLASS distinct contents of either class is an OddlingError."""
    from oddling.evaluation.metrics import content_counts
    from oddling.jobs.evaluation import attach_labels, copies_notes
    from oddling.reporting.results import ScoreRow

    try:
        paths = discover(test_dir)
    except IntakeError as exc:
        raise OddlingError(exc.status) from exc
    rows = [ScoreRow(path=p.relative_to(test_dir).as_posix(), status=OK) for p in paths]
    gaps = attach_labels(rows, labels_csv, normal_labels, test_dir)
    keep = [(p, r) for p, r in zip(paths, rows) if r.label is not None]
    labels = np.array([r.label for _, r in keep], dtype=np.int64)
    hashes = [content_hash(p) for p, _ in keep]
    contents = content_counts(labels, hashes)
    n0, n1 = int((labels == 0).sum()), int((labels == 1).sum())
    d0, d1 = contents["n_distinct_normal"], contents["n_distinct_anomalous"]
    if d0 < MIN_PER_CLASS or d1 < MIN_PER_CLASS:
        copies = f" ({d0} and {d1} distinct contents)" if (d0, d1) != (n0, n1) else ""
        raise OddlingError(
            f"{test_dir} has {n0} normal and {n1} anomalous labelled images{copies}; tune needs at least "
            f"{MIN_PER_CLASS} of each, copies of one file counted once (half of them choose, half check the "
            f"choice), or none at all: without a labelled folder it judges on synthetic anomalies. Normal "
            f"folders: {', '.join(normal_labels)}")
    notes = list(gaps["notes"]) + copies_notes(contents, len(keep))
    return JudgingSet([test_dir] * len(keep), [r.path for _, r in keep], labels,
                      [r.kind or "anomalous" for _, r in keep], hashes, np.zeros(len(keep), dtype=bool), hashes, notes,
                      contents)


def scratch_folder() -> tempfile.TemporaryDirectory:
    """Where synthetic anomalies are written for one run (removed when the run ends)."""
    return tempfile.TemporaryDirectory(prefix="oddling-tune-")
