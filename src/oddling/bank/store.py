"""The reference bank on disk: a folder with bank.json (human-readable metadata) and .npy arrays.

Format version 2 records the representation and the detector (name, parameters, fitted state);
version-1 banks (one kNN or patch mode, from earlier releases) still load. Saved into a
temporary sibling folder and renamed into place, so a crash never leaves a half-written bank
that loads. Arrays are read with allow_pickle=False: a bank is data, never code.

Loading maps rather than reads: `features.npy` (and detector arrays of `MAP_BYTES` or more) are
memory-mapped read-only (`np.load(mmap_mode="r")`), and checked (shape, finite, unit length)
in blocks of `CHECK_ROWS` rows read from the file, so a million-reference bank is never copied
whole into memory by loading it. The features may be stored as float16 (`vector_dtype`, set
by `oddling fit --vector-dtype float16`; verified then, see `oddling.bank.vectors`) and are
upcast block by block where used. An approximate index is saved with faiss's own writer as
`detector.index.faiss` and read memory-mapped where faiss can (`oddling.index.base`); banks of
format 2 written before that keep it as `detector.index.npy` and load as they did.

Writers of one bank take turns under an OS file lock (`bank_lock`, flock(2) on `.NAME.lock`
beside the bank). A save that stopped between its two renames is undone by the next reader or
writer (`recover`): the bank as it was before that save is put back. The version a save
replaces is kept, one level deep, as `.NAME.previous` beside the bank; `restore_previous` swaps
the two (`oddling bank undo`).
"""
from __future__ import annotations

import contextlib
import errno
import json
import math
import os
import re
import shutil
import tempfile
import threading
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

try:
    import fcntl
except ImportError:      # Windows: no flock; writers are not serialised there
    fcntl = None

from oddling.data.health import STATS
from oddling.detectors import make_detector
from oddling.detectors.base import Detector
from oddling.detectors.conformal import GUARANTEES, ConformalThreshold, Guarantee
from oddling.errors import OddlingError, OddlingWarning
from oddling.files import pid_alive, refuse_existing, save_array, write_failure

FORMAT_NAME = "oddling-bank"
FORMAT_VERSION = 2
READABLE_VERSIONS = (1, 2)
METADATA_FILE = "bank.json"
FEATURES_FILE = "features.npy"              # reference features (vector representations)
CALIBRATION_FILE = "calibration_scores.npy"
HEALTH_FILE = "health_stats.npy"
DETECTOR_PREFIX = "detector."               # detector arrays: detector.<name>.npy
HISTORY_FILE = "drift_history.jsonl"        # appended by `oddling drift`; carried over when a bank is replaced
V1_EMBEDDINGS_FILE = "embeddings.npy"
V1_SOURCES_FILE = "patch_sources.npy"
FAISS_SUFFIX = ".faiss"                     # detector indexes in faiss's file format: detector.<name>.faiss
VECTOR_DTYPES = ("float32", "float16")      # how features.npy may be stored
MAP_BYTES = 16 * 2 ** 20                    # detector arrays this large are memory-mapped, not read
CHECK_ROWS = 16384                          # feature rows checked per block on load


@dataclass
class Bank:
    """A fitted detector over one representation of the references, and everything needed to trust it later.

    Attributes
    ----------
    representation : dict
        The representation's fingerprint: kind, id, preprocessing, dim, and the backbone's
        fingerprint (id, weights_sha256, preprocessing, embedding_dim) where a network is used.
    detector : Detector, fitted.
    references : list of dict
        One entry per usable reference image, in feature-row order: path (relative to
        `reference_root`, POSIX), sha256.
    features : ndarray (n, d) float32 or float16, or None
        The references' features for vector representations (what drift, audit and bank
        add/remove need); None for patch grids, which are not kept. A loaded bank's are a
        read-only memory map of features.npy; float16 when stored so (`vector_dtype`).
    calibration_scores : ndarray (n_cal,) float64, scores of known-normal images.
    calibration : dict
        method, n, target_fpr, cutoff (flag when score > cutoff), rule, guarantee ("marginal" or
        "confident", with its confidence; absent in older banks: marginal) and the promise in words.
    health_stats : ndarray (n, len(health.STATS)) float64; health_fences : dict (Tukey fences).
    skipped : list of dict, reference files that could not be used: path, status.
    """

    representation: dict
    detector: Detector
    references: list[dict]
    features: np.ndarray | None
    calibration_scores: np.ndarray
    calibration: dict
    reference_root: str
    tool_version: str
    created: str
    health_stats: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    health_fences: dict = field(default_factory=dict)
    skipped: list[dict] = field(default_factory=list)
    formats: dict = field(default_factory=dict)   # optional: the references' file formats (data.encoding.format_summary)
    vector_check: dict = field(default_factory=dict)
    tuning: dict = field(default_factory=dict)   # made by `tune`: what the configuration was chosen on
    path: Path | None = None
    format_version: int = FORMAT_VERSION

    @property
    def size(self) -> int:
        return len(self.references)

    @property
    def backbone(self) -> dict:
        """The backbone fingerprint, or for a representation without a network its own id."""
        return self.representation.get("backbone_fingerprint") or {"id": self.representation["id"]}

    @property
    def vector_dtype(self) -> str:
        """How the features are stored: "float16" or "float32" (also for a bank without features)."""
        return "float16" if self.features is not None and self.features.dtype == np.float16 else "float32"

    @property
    def target_fpr(self) -> float:
        return float(self.calibration["target_fpr"])

    @property
    def guarantee(self) -> Guarantee:
        return Guarantee.from_dict(self.calibration)

    def threshold(self, target_fpr: float | None = None) -> ConformalThreshold:
        """p-values, cutoff and flags at the bank's rate (or `target_fpr`), under the bank's guarantee."""
        return ConformalThreshold(self.calibration_scores, self.target_fpr if target_fpr is None else target_fpr,
                                  self.guarantee)

    def metadata(self) -> dict:
        state, _ = self.detector.state()
        return {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "tool_version": self.tool_version,
            "created": self.created,
            "representation": self.representation,
            "detector": {"name": self.detector.name, "params": self.detector.get_params(), "state": state,
                         "score": self.detector.describe_score()},
            "calibration": self.calibration,
            "health_fences": self.health_fences,
            "reference_root": self.reference_root,
            "n_references": self.size,
            "references": self.references,
            "skipped": self.skipped,
            "formats": self.formats,
            "vector_dtype": self.vector_dtype,
        } | ({"vector_check": self.vector_check} if self.vector_check else {}) | (
            {"tuning": self.tuning} if self.tuning else {})


_held: dict[str, list] = {}          # lock file -> [threading.RLock, file descriptor or None, depth]
_held_guard = threading.Lock()


def lock_path(path: str | os.PathLike) -> Path:
    """The lock file of a bank: `.<name>.lock` beside it (the bank folder itself is replaced)."""
    target = Path(os.path.abspath(path))
    return target.with_name(f".{target.name}.lock")


@contextlib.contextmanager
def bank_lock(path: str | os.PathLike):
    """Hold the exclusive lock of the bank at `path`: one writer at a time (POSIX flock(2)).

    Re-entrant within a process (save_bank takes it again inside bank add), and threads of one
    process take turns. The lock file is removed on release; a waiter that then holds a lock on
    the removed file notices (the path no longer names the file it locked) and tries again, so
    two writers never both hold it. Without fcntl (Windows) writers are not serialised.
    """
    lock = lock_path(path)
    with _held_guard:
        entry = _held.setdefault(str(lock), [threading.RLock(), None, 0])
    entry[0].acquire()
    try:
        if entry[2] == 0:
            entry[1] = _acquire_file_lock(lock)
        entry[2] += 1
        try:
            yield lock
        finally:
            entry[2] -= 1
            if entry[2] == 0 and entry[1] is not None:
                fd, entry[1] = entry[1], None
                try:
                    os.unlink(lock)       # while still holding it: see the docstring
                except OSError:
                    pass
                os.close(fd)
    finally:
        entry[0].release()


def _acquire_file_lock(lock: Path) -> int | None:
    if fcntl is None:
        return None
    if not lock.parent.is_dir():
        return None        # no folder, so no bank to replace: whoever creates one locks then
    try:
        while True:
            fd = os.open(lock, os.O_RDWR | os.O_CREAT, 0o666)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX)
                mine = os.fstat(fd)
                now = os.stat(lock)
            except FileNotFoundError:      # removed by the previous holder as we got it
                os.close(fd)
                continue
            except BaseException:
                os.close(fd)
                raise
            if (mine.st_dev, mine.st_ino) == (now.st_dev, now.st_ino):
                return fd
            os.close(fd)                   # we locked a file that has since been replaced
    except OSError as exc:
        raise OddlingError(f"cannot lock the bank {lock.parent / lock.name[1:-5]} for writing "
                           f"({exc.strerror or exc} on {lock})") from exc


def is_bank(path: Path) -> bool:
    return (Path(path) / METADATA_FILE).is_file()


def save_bank(bank: Bank, path: str | os.PathLike, force: bool = False) -> Path:
    """Write atomically. An existing bank is replaced only with force=True, and only once the new one is complete.

    A write that fails (a full disk, a read-only folder) raises OddlingError and leaves the old
    bank, if any, as it was, and no temporary files.
    """
    target = Path(path)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OddlingError(write_failure(f"bank {target}", exc)) from exc
    with bank_lock(target):
        _save_locked(bank, target, force)
    bank.path = target
    return target


def _save_locked(bank: Bank, target: Path, force: bool) -> None:
    recover(target)
    if target.exists():
        refuse_existing(target, force=force)
        if not target.is_dir() or not (is_bank(target) or not any(target.iterdir())):
            raise OddlingError(f"{target} exists and is not an oddling bank; refusing to replace it")
    tmp = None
    try:
        tmp = Path(tempfile.mkdtemp(dir=target.parent, prefix=f".{target.name}.writing-{os.getpid()}-"))
        os.chmod(tmp, 0o777 & ~_umask())    # mkdtemp makes 0700; a bank folder is made like any other
        _write_files(bank, tmp)
        if target.exists():
            if (target / HISTORY_FILE).is_file():
                shutil.copy2(target / HISTORY_FILE, tmp / HISTORY_FILE)
            old = target.with_name(f".{target.name}.old-{os.getpid()}")
            os.replace(target, old)
            try:
                os.replace(tmp, target)
            except BaseException:
                os.replace(old, target)
                raise
            try:
                _keep_as_previous(target, old)
            except OSError as exc:     # the new bank is in place; only the undo copy is missing
                _warn(f"bank {target} was saved, but the version it replaced could not be kept for "
                      f"`oddling bank undo` ({exc.strerror or exc})")
        else:
            os.replace(tmp, target)
    except BaseException as exc:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)
        if isinstance(exc, OSError):
            raise OddlingError(write_failure(f"bank {target}", exc)) from exc
        raise


_LEFTOVER = re.compile(r"(writing|old|discard)-(\d+)(-.*)?")


def previous_path(path: str | os.PathLike) -> Path:
    """Where the version a save replaced is kept: `.NAME.previous` beside the bank (one level)."""
    target = Path(path)
    return target.with_name(f".{target.name}.previous")


def _keep_as_previous(target: Path, old: Path) -> None:
    """`old` (the bank just replaced, moved aside) becomes the previous version; the one before goes."""
    if not is_bank(old):
        shutil.rmtree(old, ignore_errors=True)     # an empty folder that --force replaced
        return
    previous = previous_path(target)
    if previous.exists():
        discard = target.with_name(f".{target.name}.discard-{os.getpid()}")
        os.replace(previous, discard)
        os.replace(old, previous)
        shutil.rmtree(discard, ignore_errors=True)
    else:
        os.replace(old, previous)


def restore_previous(path: str | os.PathLike) -> Bank:
    """Swap the bank at `path` with its previous version (so a second call swaps them back).

    Under the bank's lock; the previous version is checked in full before anything moves. The
    drift history stays with the bank in place. Done with renames like a save, so a crash
    midway is put right by `recover`: either the swap did not happen or it is complete.
    """
    target = Path(path)
    previous = previous_path(target)
    with bank_lock(target):
        recover(target)
        if not is_bank(previous):
            raise OddlingError(f"bank {target} has no previous version to go back to (one is kept when `bank add`, "
                               "`bank remove` or `fit --force` replace a bank)")
        load_bank(previous)
        try:
            if not target.exists():
                os.replace(previous, target)
            else:
                if not is_bank(target):
                    raise OddlingError(f"{target} exists and is not an oddling bank; refusing to replace it")
                if (target / HISTORY_FILE).is_file():
                    shutil.copy2(target / HISTORY_FILE, previous / HISTORY_FILE)
                old = target.with_name(f".{target.name}.old-{os.getpid()}")
                os.replace(target, old)
                try:
                    os.replace(previous, target)
                except BaseException:
                    os.replace(old, target)
                    raise
                os.replace(old, previous)
        except OSError as exc:
            raise OddlingError(f"could not restore the previous version of bank {target} "
                               f"({exc.strerror or exc})") from exc
        return load_bank(target)


def _leftovers(target: Path) -> list[tuple[str, int, Path]]:
    """(kind, owning PID, path) of what an interrupted save of `target` can leave beside it:
    `.NAME.writing-PID-*` (a new bank being written) and `.NAME.old-PID` (the bank it replaces,
    moved aside for the second rename)."""
    prefix = f".{target.name}."
    try:
        names = [n for n in os.listdir(target.parent) if n.startswith(prefix)]
    except OSError:
        return []
    found = []
    for name in names:
        match = _LEFTOVER.fullmatch(name[len(prefix):])
        if match and (match.group(1) == "writing" or match.group(3) is None):
            found.append((match.group(1), int(match.group(2)), target.parent / name))
    return found


def recover(target: str | os.PathLike) -> None:
    """Finish what an interrupted save left; call with the bank's lock held.

    A save replaces a bank with two renames: the bank to `.NAME.old-PID`, then the new one from
    `.NAME.writing-PID-*` to NAME; then the old one becomes `.NAME.previous`. A crash between
    the two renames leaves no bank at NAME; then the old bank is put back (the save that stopped
    never said it succeeded, so the bank is as it was before that command). A crash after them
    leaves `.NAME.old-PID` beside the new bank; it becomes the previous version. Other leftovers
    of processes that are no longer running (`.writing-*`, `.discard-*`) are removed.
    """
    target = Path(target)
    found = _leftovers(target)
    if not found:
        return
    try:
        _recover(target, found)
    except OSError as exc:
        raise OddlingError(f"bank {target} was left half replaced by a write that stopped, and cannot be put "
                           f"right ({exc.strerror or exc}); its previous state is in {found[0][2]}") from exc


def _recover(target: Path, found: list[tuple[str, int, Path]]) -> None:
    if not target.exists():
        olds = sorted((p for kind, _, p in found if kind == "old" and is_bank(p)), key=_mtime)
        if olds:
            os.replace(olds[-1], target)
            _warn(f"bank {target} had been left half replaced by a write that stopped; the bank as it was before "
                  "that write is back in place")
            found = _leftovers(target)
    stale = [(kind, path) for kind, pid, path in found if not pid_alive(pid)]
    olds = sorted((p for kind, p in stale if kind == "old" and is_bank(p)), key=_mtime)
    if olds and is_bank(target):
        # Stopped after the new bank was in place: what it replaced becomes the previous version.
        _keep_as_previous(target, olds[-1])
    for kind, path in stale:
        if path.exists():
            shutil.rmtree(path, ignore_errors=True)


def _mtime(path: Path) -> float:
    try:
        return path.stat().st_mtime
    except OSError:
        return 0.0


def _warn(message: str) -> None:
    import warnings

    warnings.warn(message, OddlingWarning, stacklevel=3)


def _umask() -> int:
    try:       # Linux reports it without changing it (other threads may be creating files)
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _write_files(bank: Bank, folder: Path) -> None:
    if bank.features is not None:
        # np.save writes a contiguous array (a memory map included) straight to the file, no copy
        save_array(folder / FEATURES_FILE, np.ascontiguousarray(bank.features, dtype=bank.vector_dtype))
    save_array(folder / CALIBRATION_FILE, np.asarray(bank.calibration_scores, dtype=np.float64))
    save_array(folder / HEALTH_FILE, np.asarray(bank.health_stats, dtype=np.float64))
    for key, array in bank.detector.state()[1].items():
        save_array(folder / f"{DETECTOR_PREFIX}{key}.npy", np.ascontiguousarray(array))
    for key, index in bank.detector.faiss_indexes().items():
        path = folder / f"{DETECTOR_PREFIX}{key}{FAISS_SUFFIX}"
        try:
            index.write(path)
        except RuntimeError as exc:     # faiss reports a failed write (a full disk) as RuntimeError
            raise OSError(errno.EIO, f"faiss could not write {path.name}: {str(exc).splitlines()[0]}") from exc
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
    # Metadata last: a folder without bank.json is never taken for a bank.
    with open(folder / METADATA_FILE, "w", encoding="utf-8") as f:
        json.dump(bank.metadata(), f, indent=2)
        f.write("\n")
        f.flush()
        os.fsync(f.fileno())


class _Fields:
    """Reads bank.json with one clear message naming the field that is missing or wrong."""

    def __init__(self, folder: Path, meta):
        if not isinstance(meta, dict):
            raise OddlingError(f"bank {folder} is damaged: {METADATA_FILE} must hold a JSON object, "
                               f"got {type(meta).__name__}")
        self.folder, self.meta = folder, meta

    def fail(self, name: str, why: str):
        raise OddlingError(f"bank {self.folder} is damaged: field {name!r} {why}")

    def get(self, name: str, types, default=None, required: bool = True, source: dict | None = None):
        source = self.meta if source is None else source
        if name not in source:
            if required:
                self.fail(name, "is missing")
            return default
        value = source[name]
        if isinstance(value, bool) and bool not in (types if isinstance(types, tuple) else (types,)):
            self.fail(name, f"must be {_type_names(types)}, got {value!r}")
        if not isinstance(value, types):
            self.fail(name, f"must be {_type_names(types)}, got {type(value).__name__}")
        return value


def _type_names(types) -> str:
    types = types if isinstance(types, tuple) else (types,)
    return " or ".join({"dict": "an object", "list": "a list", "str": "a string", "int": "an integer",
                        "float": "a number", "NoneType": "null", "bool": "true/false"}.get(t.__name__, t.__name__)
                       for t in types)


def _load_array(folder: Path, name: str, memory_map: bool = False) -> np.ndarray:
    """The array of a .npy file of the bank: read, or with `memory_map` mapped read-only."""
    try:
        array = np.load(folder / name, allow_pickle=False, mmap_mode="r" if memory_map else None)
    except (OSError, ValueError, EOFError) as exc:
        raise OddlingError(f"bank {folder} is damaged: {name} cannot be read ({exc})") from exc
    if not np.issubdtype(array.dtype, np.number):
        raise OddlingError(f"bank {folder} is damaged: {name} holds {array.dtype}, not numbers")
    return array


def _check_calibration(f: _Fields, calibration: dict, scores: np.ndarray) -> None:
    rate = f.get("target_fpr", (int, float), source=calibration)
    if not 0.0 < rate < 1.0:
        f.fail("calibration.target_fpr", f"must be in (0, 1), got {rate}")
    cutoff = f.get("cutoff", (int, float, type(None)), source=calibration)
    if scores.ndim != 1 or not np.isfinite(scores).all():
        f.fail("calibration scores", "must be a 1-D array of finite numbers")
    n = f.get("n", int, None, required=False, source=calibration)
    if n is not None and n != len(scores):
        f.fail("calibration.n", f"is {n}, but {CALIBRATION_FILE} holds {len(scores)} scores")
    kind = f.get("guarantee", str, "marginal", required=False, source=calibration)
    if kind not in GUARANTEES:
        f.fail("calibration.guarantee", f"must be one of {', '.join(GUARANTEES)}, got {kind!r}")
    confidence = f.get("confidence", (int, float, type(None)), None, required=False, source=calibration)
    if kind == "confident" and not (confidence is not None and 0.0 < confidence < 1.0):
        f.fail("calibration.confidence", f"must be in (0, 1) for the confident guarantee, got {confidence}")
    expected = ConformalThreshold(scores, rate, Guarantee.from_dict(calibration)).cutoff
    recorded = math.inf if cutoff is None else float(cutoff)
    close = math.isfinite(expected) and abs(recorded - expected) <= 1e-9 * max(1.0, abs(expected))
    if not (recorded == expected or close):
        f.fail("calibration.cutoff", f"is {cutoff}, but the calibration scores give {expected}")


def load_bank(path: str | os.PathLike, *, memory_map: bool = True) -> Bank:
    """Read and check the bank at `path`. With `memory_map` (the default) the features, large
    detector arrays and an approximate index stay memory-mapped from the files (see the module
    notes); without it they are read into memory."""
    folder = Path(path)
    meta_path = folder / METADATA_FILE
    if not folder.exists() and _leftovers(folder):
        with bank_lock(folder):      # a save that stopped between its two renames: put the bank back
            recover(folder)
    if not folder.exists():
        raise OddlingError(f"bank {folder} does not exist; create one with `oddling fit`")
    if not meta_path.is_file():
        raise OddlingError(f"{folder} is not an oddling bank (no {METADATA_FILE}); create one with `oddling fit`")
    try:
        meta = json.loads(meta_path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise OddlingError(f"{meta_path} is unreadable: {exc}") from exc
    except RecursionError as exc:      # "[[[[...": nesting deeper than Python's parser goes
        raise OddlingError(f"{meta_path} is unreadable: nested too deeply") from exc
    f = _Fields(folder, meta)
    if meta.get("format") != FORMAT_NAME:
        raise OddlingError(f"{folder} is not an oddling bank (format {meta.get('format')!r})")
    version = meta.get("format_version")
    if version not in READABLE_VERSIONS:
        raise OddlingError(f"bank {folder} has format version {version!r}; this oddling reads versions "
                           f"{', '.join(map(str, READABLE_VERSIONS))}; rebuild it with `oddling fit`")
    references = f.get("references", list)
    for i, ref in enumerate(references):
        if not isinstance(ref, dict) or not isinstance(ref.get("path"), str) or not isinstance(ref.get("sha256"), str):
            f.fail(f"references[{i}]", "must be an object with string path and sha256")
    if f.get("n_references", int) != len(references):
        f.fail("n_references", f"is {meta['n_references']}, but {len(references)} references are listed")
    calibration = f.get("calibration", dict)
    calibration_scores = _load_array(folder, CALIBRATION_FILE).astype(np.float64)
    _check_calibration(f, calibration, calibration_scores)
    health_stats = _load_array(folder, HEALTH_FILE).astype(np.float64)
    if health_stats.ndim != 2 or len(health_stats) != len(references) or (
            references and health_stats.shape[1] != len(STATS)):
        f.fail(HEALTH_FILE, f"must have one row of {len(STATS)} statistics per reference "
                            f"({len(references)}), got shape {health_stats.shape}")
    if not np.isfinite(health_stats).all():
        f.fail(HEALTH_FILE, "holds NaN or infinite values")
    health_fences = f.get("health_fences", dict, {}, required=False)
    _check_fences(f, health_fences)
    if version == 1:
        representation, detector, features = _read_v1(f, len(references), memory_map)
    else:
        representation, detector, features = _read_v2(f, len(references), memory_map)
    return Bank(
        representation=representation, detector=detector, references=references, features=features,
        calibration_scores=calibration_scores, calibration=calibration,
        reference_root=f.get("reference_root", str), tool_version=f.get("tool_version", str),
        created=f.get("created", str), health_stats=health_stats, health_fences=health_fences,
        skipped=f.get("skipped", list, [], required=False), path=folder, format_version=version,
        formats=f.get("formats", dict, {}, required=False),
        vector_check=f.get("vector_check", dict, {}, required=False),
        tuning=f.get("tuning", dict, {}, required=False),
    )


def _check_fences(f: _Fields, fences: dict) -> None:
    """Each statistic: q1, q3 numbers; unusual, far_out [low, high] pairs of numbers."""
    def number(value) -> bool:
        return not isinstance(value, bool) and isinstance(value, (int, float)) and math.isfinite(value)

    for name, fence in fences.items():
        if not isinstance(fence, dict):
            f.fail(f"health_fences.{name}", "must be an object")
        for key, value in fence.items():
            ok = (number(value) if key in ("q1", "q3")
                  else isinstance(value, list) and len(value) == 2 and all(number(v) for v in value))
            if not ok:
                f.fail(f"health_fences.{name}.{key}", f"must be {'a number' if key in ('q1', 'q3') else '[low, high]'}, "
                       f"got {value!r}")


def _row_blocks(array: np.ndarray, path: Path):
    """`array` in blocks of CHECK_ROWS rows. A map of `path` is read block by block from the file
    instead of through the map, so the checked pages do not stay resident in this process."""
    mapped = isinstance(array, np.memmap) and array.flags.c_contiguous and array.ndim == 2
    if not mapped:
        for start in range(0, len(array), CHECK_ROWS):
            yield array[start:start + CHECK_ROWS]
        return
    row_bytes = array.dtype.itemsize * array.shape[1]
    with open(path, "rb") as fh:
        for start in range(0, len(array), CHECK_ROWS):
            count = min(CHECK_ROWS, len(array) - start)
            fh.seek(array.offset + start * row_bytes)
            yield np.fromfile(fh, dtype=array.dtype, count=count * array.shape[1]).reshape(count, array.shape[1])


def _check_features(f: _Fields, features: np.ndarray, n: int, dim: int, name: str) -> np.ndarray:
    """Shape, finite, unit length (or zero), checked block by block; float32 and float16 are kept
    as stored (a map stays a map), other dtypes become float32."""
    if features.ndim != 2 or features.shape != (n, dim):
        f.fail(name, f"must have shape ({n}, {dim}), got {features.shape}")
    if features.dtype.name not in VECTOR_DTYPES or not features.flags.c_contiguous:
        features = np.ascontiguousarray(features, dtype=np.float32)
    low, high, bad = math.inf, -math.inf, False
    for block in _row_blocks(features, f.folder / name):
        if not np.isfinite(block).all():
            f.fail(name, "holds NaN or infinite values")
        norms = np.linalg.norm(block.astype(np.float64), axis=1)
        if len(norms):
            low, high = min(low, float(norms.min())), max(high, float(norms.max()))
            bad = bad or not np.all((np.abs(norms - 1.0) < 1e-3) | (norms < 1e-6))
    if bad:
        f.fail(name, f"must hold unit-length vectors (found lengths from {low:.4g} to {high:.4g})")
    return features


def _detector(f: _Fields, name: str, params: dict, state: dict, arrays: dict) -> Detector:
    detector = make_detector(name, params)
    return detector.load_state(state, arrays)


def _detector_arrays(f: _Fields, memory_map: bool) -> dict:
    """{name: array} of detector.<name>.npy (large ones mapped) and {name: IndexFile} of
    detector.<name>.faiss (an index, read by the detector)."""
    arrays = {}
    for p in sorted(f.folder.glob(f"{DETECTOR_PREFIX}*.npy")):
        big = memory_map and p.stat().st_size >= MAP_BYTES
        arrays[p.name[len(DETECTOR_PREFIX):-4]] = _load_array(f.folder, p.name, memory_map=big)
    indexes = sorted(f.folder.glob(f"{DETECTOR_PREFIX}*{FAISS_SUFFIX}"))
    if indexes:
        from oddling.index.base import IndexFile   # faiss only for banks that hold an index

        for p in indexes:
            arrays[p.name[len(DETECTOR_PREFIX):-len(FAISS_SUFFIX)]] = IndexFile(p, memory_map)
    return arrays


def _read_v2(f: _Fields, n: int, memory_map: bool = True):
    representation = f.get("representation", dict)
    for key, types in (("kind", str), ("id", str), ("dim", int), ("preprocessing", dict)):
        f.get(key, types, source=representation)
    info = f.get("detector", dict)
    name = f.get("name", str, source=info)
    params = f.get("params", dict, source=info)
    state = f.get("state", dict, source=info)
    arrays = _detector_arrays(f, memory_map)
    dtype = f.get("vector_dtype", str, "float32", required=False)
    if dtype not in VECTOR_DTYPES:
        f.fail("vector_dtype", f"must be one of {', '.join(VECTOR_DTYPES)}, got {dtype!r}")
    features = None
    if representation["kind"] != "patches":
        features = _check_features(f, _load_array(f.folder, FEATURES_FILE, memory_map), n, representation["dim"],
                                   FEATURES_FILE)
        if features.dtype.name != dtype and "float16" in (dtype, features.dtype.name):
            f.fail("vector_dtype", f"is {dtype}, but {FEATURES_FILE} holds {features.dtype.name}")
    stored = set(arrays)
    if features is not None:
        arrays["references"] = features
    detector = _detector(f, name, params, state, arrays)
    stray = sorted(stored - set(detector.state()[1]) - set(detector.faiss_indexes()))
    if stray:     # a file the detector did not write: not this bank's (or the state is not what it says)
        suffix = FAISS_SUFFIX if not isinstance(arrays[stray[0]], np.ndarray) else ".npy"
        f.fail(f"{DETECTOR_PREFIX}{stray[0]}{suffix}", f"is not part of a {name} detector's state")
    return representation, detector, features


def _read_v1(f: _Fields, n: int, memory_map: bool = True):
    """Banks from before detectors were objects: mode global (kNN) or local (patch kNN)."""
    from oddling.backbones.representation import DEFAULT_PATCH_STAGES

    backbone = f.get("backbone", dict)
    for key, types in (("id", str), ("embedding_dim", int), ("preprocessing", dict)):
        f.get(key, types, source=backbone)
    mode = f.get("mode", str)
    k = f.get("k", int)
    embeddings = _load_array(f.folder, V1_EMBEDDINGS_FILE, memory_map and f.meta.get("mode") == "global")
    if mode == "global":
        features = _check_features(f, embeddings, n, backbone["embedding_dim"], V1_EMBEDDINGS_FILE)
        representation = {"kind": "embedding", "id": backbone["id"], "backbone": backbone["id"],
                          "preprocessing": backbone["preprocessing"], "dim": backbone["embedding_dim"],
                          "backbone_fingerprint": backbone}
        return representation, _detector(f, "knn", {"k": k}, {}, {"references": features}), features
    if mode != "local":
        f.fail("mode", f"must be global or local, got {mode!r}")
    local = f.get("local", dict)
    from oddling.backbones.patch_grid import local_preprocessing
    from oddling.data.preprocess import Preprocessing

    prep = local_preprocessing(Preprocessing.from_dict(backbone["preprocessing"]))
    representation = {"kind": "patches", "id": f"{backbone['id']}/patches:{'+'.join(DEFAULT_PATCH_STAGES)}",
                      "backbone": backbone["id"], "stages": list(DEFAULT_PATCH_STAGES),
                      "preprocessing": prep.to_dict(), "dim": f.get("patch_dim", int, source=local),
                      "backbone_fingerprint": backbone}
    params = {"coreset": f.get("coreset_fraction", (int, float), source=local), "seed": f.get("seed", int, 0, False, local)}
    arrays = {"patches": embeddings, "sources": _load_array(f.folder, V1_SOURCES_FILE)}
    return representation, _detector(f, "patch-knn", params, local, arrays), None


def check_compatible(bank: Bank, fingerprint: dict) -> None:
    """Refuse to compare features made by different representations, networks, weights or preprocessing."""
    differences = []
    mine, theirs = bank.representation, fingerprint
    for key, label in (("id", "representation"), ("preprocessing", "preprocessing"), ("dim", "feature size")):
        if mine.get(key) != theirs.get(key):
            differences.append(f"{label}: bank has {mine.get(key)!r}, now {theirs.get(key)!r}")
    a, b = mine.get("backbone_fingerprint") or {}, theirs.get("backbone_fingerprint") or {}
    for key, label in (("id", "backbone"), ("weights_sha256", "weights SHA-256"),
                       ("preprocessing", "backbone preprocessing"), ("embedding_dim", "embedding size")):
        if a.get(key) != b.get(key):
            differences.append(f"{label}: bank has {a.get(key)!r}, now {b.get(key)!r}")
    if differences:
        where = f" {bank.path}" if bank.path else ""
        raise OddlingError(
            f"bank{where} was made with a different representation; its features cannot be compared:\n  "
            + "\n  ".join(differences)
            + "\nRebuild the bank with `oddling fit`, or score with the representation it was made with."
        )
