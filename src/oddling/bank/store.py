"""The reference bank on disk: a folder with bank.json (human-readable metadata) and .npy arrays.

Saved into a temporary sibling folder and renamed into place, so a crash never leaves a
half-written bank that loads. Arrays are read with allow_pickle=False: a bank is data, never code.
"""
from __future__ import annotations

import json
import os
import shutil
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from oddling.errors import OddlingError

FORMAT_NAME = "oddling-bank"
FORMAT_VERSION = 1
METADATA_FILE = "bank.json"
EMBEDDINGS_FILE = "embeddings.npy"
CALIBRATION_FILE = "calibration_scores.npy"
HEALTH_FILE = "health_stats.npy"
SOURCES_FILE = "patch_sources.npy"   # local mode: reference row each bank patch came from
HISTORY_FILE = "drift_history.jsonl"   # appended by `oddling drift`; carried over when a bank is replaced


@dataclass
class Bank:
    """Reference embeddings and everything needed to trust them later.

    Attributes
    ----------
    backbone : dict
        Fingerprint of the network: id, weights_sha256, preprocessing, embedding_dim.
    references : list of dict
        One entry per embedded reference image, in embedding-row order: path (relative to
        `reference_root`, POSIX), sha256.
    mode : str
        "global" (one L2-normalised embedding per reference) or "local" (patch features).
    embeddings : ndarray (n, d) float32, L2-normalised; in local mode (m, c) coreset patches.
    calibration_scores : ndarray (n_cal,) float64, scores of known-normal images.
    calibration : dict
        method, target_fpr, cutoff (flag when score > cutoff), n.
    health_stats : ndarray (n, len(health.STATS)) float64, per-reference image statistics.
    health_fences : dict
        Tukey fences per statistic, fitted on the references (health.fit_fences).
    skipped : list of dict
        Reference files that could not be used: path, status.
    local : dict
        Local mode only: layers, grid, coreset fraction, patches before and after the coreset,
        patch dimension, how calibration was done.
    patch_sources : ndarray (m,) int64, local mode: the reference row of each bank patch.
    """

    backbone: dict
    mode: str
    k: int
    references: list[dict]
    embeddings: np.ndarray
    calibration_scores: np.ndarray
    calibration: dict
    reference_root: str
    tool_version: str
    created: str
    health_stats: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    health_fences: dict = field(default_factory=dict)
    skipped: list[dict] = field(default_factory=list)
    local: dict = field(default_factory=dict)
    patch_sources: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    path: Path | None = None

    @property
    def size(self) -> int:
        return len(self.references)

    def metadata(self) -> dict:
        return {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "tool_version": self.tool_version,
            "created": self.created,
            "backbone": self.backbone,
            "mode": self.mode,
            "k": self.k,
            "calibration": self.calibration,
            "health_fences": self.health_fences,
            "reference_root": self.reference_root,
            "n_references": self.size,
            "references": self.references,
            "skipped": self.skipped,
        } | ({"local": self.local} if self.mode == "local" else {})


def is_bank(path: Path) -> bool:
    return (Path(path) / METADATA_FILE).is_file()


def save_bank(bank: Bank, path: str | os.PathLike, force: bool = False) -> Path:
    """Write atomically. An existing bank is replaced only with force=True, and only once the new one is complete."""
    target = Path(path)
    if target.exists():
        if not force:
            raise OddlingError(f"{target} already exists; pass --force (force=True) to replace it")
        if not target.is_dir() or not (is_bank(target) or not any(target.iterdir())):
            raise OddlingError(f"{target} exists and is not an oddling bank; refusing to replace it")
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(dir=target.parent, prefix=f".{target.name}.writing-"))
    try:
        np.save(tmp / EMBEDDINGS_FILE, np.ascontiguousarray(bank.embeddings, dtype=np.float32))
        np.save(tmp / CALIBRATION_FILE, np.asarray(bank.calibration_scores, dtype=np.float64))
        np.save(tmp / HEALTH_FILE, np.asarray(bank.health_stats, dtype=np.float64))
        if bank.mode == "local":
            np.save(tmp / SOURCES_FILE, np.asarray(bank.patch_sources, dtype=np.int64))
        # Metadata last: a folder without bank.json is never taken for a bank.
        with open(tmp / METADATA_FILE, "w", encoding="utf-8") as f:
            json.dump(bank.metadata(), f, indent=2)
            f.write("\n")
            f.flush()
            os.fsync(f.fileno())
        if target.exists():
            if (target / HISTORY_FILE).is_file():
                shutil.copy2(target / HISTORY_FILE, tmp / HISTORY_FILE)
            old = target.with_name(f".{target.name}.old-{os.getpid()}")
            os.replace(target, old)
            os.replace(tmp, target)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, target)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    bank.path = target
    return target


def load_bank(path: str | os.PathLike) -> Bank:
    folder = Path(path)
    meta_path = folder / METADATA_FILE
    if not meta_path.is_file():
        raise OddlingError(f"{folder} is not an oddling bank (no {METADATA_FILE}); create one with `oddling fit`")
    try:
        meta = json.loads(meta_path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise OddlingError(f"{meta_path} is unreadable: {exc}") from exc
    if meta.get("format") != FORMAT_NAME:
        raise OddlingError(f"{folder} is not an oddling bank (format {meta.get('format')!r})")
    if meta.get("format_version") != FORMAT_VERSION:
        raise OddlingError(
            f"bank {folder} has format version {meta.get('format_version')}, this oddling reads version "
            f"{FORMAT_VERSION}; rebuild it with `oddling fit`"
        )
    try:
        embeddings = np.load(folder / EMBEDDINGS_FILE, allow_pickle=False)
        calibration_scores = np.load(folder / CALIBRATION_FILE, allow_pickle=False)
        health_stats = np.load(folder / HEALTH_FILE, allow_pickle=False)
        local = meta.get("local", {}) if meta.get("mode") == "local" else {}
        sources = np.load(folder / SOURCES_FILE, allow_pickle=False) if local else np.zeros(0, np.int64)
    except (OSError, ValueError) as exc:
        raise OddlingError(f"bank {folder} is damaged: {exc}") from exc
    expected = ((local["coreset_size"], local["patch_dim"]) if local
                else (meta["n_references"], meta["backbone"]["embedding_dim"]))
    if embeddings.shape != expected or (local and sources.shape != (expected[0],)):
        raise OddlingError(
            f"bank {folder} is damaged: embeddings have shape {embeddings.shape}, metadata says {expected}"
        )
    return Bank(
        backbone=meta["backbone"],
        mode=meta["mode"],
        k=int(meta["k"]),
        references=meta["references"],
        embeddings=embeddings,
        calibration_scores=calibration_scores,
        calibration=meta["calibration"],
        reference_root=meta["reference_root"],
        tool_version=meta["tool_version"],
        created=meta["created"],
        health_stats=health_stats,
        health_fences=meta.get("health_fences", {}),
        skipped=meta.get("skipped", []),
        local=local,
        patch_sources=sources,
        path=folder,
    )


def check_compatible(bank: Bank, fingerprint: dict) -> None:
    """Refuse to compare embeddings made by different networks, weights or preprocessing."""
    differences = []
    for key, label in (("id", "backbone"), ("weights_sha256", "weights SHA-256"),
                       ("preprocessing", "preprocessing"), ("embedding_dim", "embedding size")):
        if bank.backbone.get(key) != fingerprint.get(key):
            differences.append(f"{label}: bank has {bank.backbone.get(key)!r}, now {fingerprint.get(key)!r}")
    if differences:
        where = f" {bank.path}" if bank.path else ""
        raise OddlingError(
            f"bank{where} was made with a different backbone setup; its embeddings cannot be compared:\n  "
            + "\n  ".join(differences)
            + "\nRebuild the bank with `oddling fit`, or score with the backbone it was made with."
        )
